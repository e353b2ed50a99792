"""pairwise panner, the shared context API, direct gains and input guards."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from fieldmix import geometry
from fieldmix.errors import ConfigError
from fieldmix.panning import PanningContext, Ring, pairwise_gains


# ----------------------------------------------------------------------------- helpers


from panning_helpers import at
from panning_helpers import make_layout as _make_layout


def make_layout(specs, panner="pairwise", **kw):
    return _make_layout(specs, panner=panner, **kw)


STEREO = [(30, 0), (-30, 0)]  # +-30 pair (ITU-R BS.775 front pair, nominal)
FIVE = [(0, 0), (30, 0), (-30, 0), (110, 0), (-110, 0)]  # ITU-R BS.775-3 3/2, nominal angles


# ----------------------------------------------------------------------------- the pan law


def test_centre_of_a_pair_is_minus_3_01_db():
    # Constant-power pan law: each speaker at 1/sqrt(2) = -3.01 dB at the centre.
    # Common practice ("-3 dB pan law"), no source.
    ctx = PanningContext(make_layout(STEREO))
    g = ctx.gains(at(0.0), [0.0], "pairwise")[0]
    assert geometry.gain_to_db(g[0]) == pytest.approx(-3.0103, abs=1e-4)
    assert geometry.gain_to_db(g[1]) == pytest.approx(-3.0103, abs=1e-4)
    # and the middle of any other pair of an irregular ring (L and LS of 5.0, 80 deg apart)
    g = PanningContext(make_layout(FIVE)).gains(at(70.0), [0.0], "pairwise")[0]
    np.testing.assert_allclose(g[[1, 3]], [2 ** -0.5, 2 ** -0.5], atol=1e-12)
    assert np.count_nonzero(g) == 2


@pytest.mark.parametrize("specs", [FIVE, [(a, 0) for a in range(0, 360, 45)], [(10, 0), (95, 3), (170, -4), (260, 0)]])
def test_squares_sum_to_one_over_a_full_sweep(specs):
    # Intensity ~ amplitude squared: constant power = constant sum of squares.
    # Physics / common practice, no source.
    ctx = PanningContext(make_layout(specs))
    az = np.arange(-180.0, 180.0, 0.1)
    g = ctx.gains(at(az), np.zeros(az.size), "pairwise")
    np.testing.assert_allclose(np.sum(g * g, axis=1), 1.0, atol=1e-12)
    assert np.all(g >= 0.0)
    # at most two speakers sound at once
    assert np.max(np.count_nonzero(g > 1e-15, axis=1)) == 2


def test_two_speakers_follow_the_classic_sine_cosine_law_exactly():
    # gains cos(p*90deg), sin(p*90deg) for pan fraction p (common practice, no source)
    ctx = PanningContext(make_layout(STEREO))
    phi = np.linspace(-30.0, 30.0, 241)
    g = ctx.gains(at(phi), np.zeros(phi.size), "pairwise")
    p = (phi + 30.0) / 60.0  # 0 at the right speaker (-30), 1 at the left (+30)
    np.testing.assert_allclose(g[:, 1], np.cos(p * np.pi / 2), atol=1e-12)  # right
    np.testing.assert_allclose(g[:, 0], np.sin(p * np.pi / 2), atol=1e-12)  # left


def test_any_spacing_uses_the_law_between_neighbours():
    # ring with uneven gaps 40, 100, 110, 110 deg (common practice, no source)
    azs = [0.0, 40.0, 140.0, 250.0]
    ring = Ring(azs, ["a", "b", "c", "d"])
    for lo, hi, w in [(0, 1, 40.0), (1, 2, 100.0), (2, 3, 110.0), (3, 0, 110.0)]:
        p = np.linspace(0.0, 1.0, 51)
        src = azs[lo] + p * w
        g = pairwise_gains(ring, src)
        np.testing.assert_allclose(g[:, lo], np.cos(p * np.pi / 2), atol=1e-12)
        np.testing.assert_allclose(g[:, hi], np.sin(p * np.pi / 2), atol=1e-12)


def test_source_elevation_is_ignored():
    ctx = PanningContext(make_layout(FIVE))
    az = np.linspace(-180, 180, 73)
    flat = ctx.gains(at(az, 0.0), np.zeros(az.size), "pairwise")
    # same azimuth, 40 deg up, same 3-D distance (2 m = ref, so no level change; the
    # horizontal distance 1.53 m is beyond the near radius of 1 m)
    high = ctx.gains(at(az, 40.0), np.zeros(az.size), "pairwise")
    np.testing.assert_allclose(high, flat, atol=1e-12)


# ----------------------------------------------------------------------------- gaps


def test_gap_wider_than_180_is_not_panned_across():
    # stereo: the back gap is 300 deg; directions in it stay at the nearer edge
    ctx = PanningContext(make_layout(STEREO))
    g = ctx.gains(at([60.0, 100.0, 179.0]), np.zeros(3), "pairwise")
    np.testing.assert_allclose(g, [[1.0, 0.0]] * 3, atol=1e-12)  # left speaker only
    g = ctx.gains(at([-60.0, -100.0, -179.0]), np.zeros(3), "pairwise")
    np.testing.assert_allclose(g, [[0.0, 1.0]] * 3, atol=1e-12)  # right speaker only
    # exactly in the middle of the gap (straight behind) both edges alike, so a
    # source coming straight from behind does not pick a side
    np.testing.assert_allclose(ctx.gains(at(180.0), [0.0], "pairwise")[0], [2 ** -0.5] * 2, atol=1e-12)


def test_gap_up_to_180_is_panned_across():
    # 5.0 rear gap LS (+110) .. RS (-110) is 140 deg: straight behind is between them
    ctx = PanningContext(make_layout(FIVE))
    g = ctx.gains(at(180.0), [0.0], "pairwise")[0]
    np.testing.assert_allclose(g, [0, 0, 0, 2 ** -0.5, 2 ** -0.5], atol=1e-12)
    # exactly 180 deg: two speakers left and right, front is half way
    g = PanningContext(make_layout([(90, 0), (-90, 0)])).gains(at([0.0, 45.0]), [0, 0], "pairwise")
    np.testing.assert_allclose(g[0], [2 ** -0.5, 2 ** -0.5], atol=1e-12)
    np.testing.assert_allclose(g[1], [np.sin(0.75 * np.pi / 2), np.cos(0.75 * np.pi / 2)], atol=1e-12)


# ----------------------------------------------------------------------------- ring selection


def test_only_ear_level_main_speakers_take_part():
    specs = [(30, 0), (-30, 0), (110, 9.0), (-110, -9.0), (0, 11.0), (180, 45), {"az": 0, "el": 0, "sub": True, "id": "SUB"}]
    ctx = PanningContext(make_layout(specs))
    az = np.arange(-180, 180, 1.0)
    g = ctx.gains(at(az), np.zeros(az.size), "pairwise")
    assert np.all(g[:, 4:] == 0.0)  # elevation 11, 45 and the sub never sound
    assert np.all(g[:, :4].max(axis=0) > 0.99)  # the four ear-level ones all do
    # a source right at the +110 speaker's azimuth
    np.testing.assert_allclose(ctx.gains(at(110.0), [0.0], "pairwise")[0, :4], [0, 0, 1, 0], atol=1e-12)


def test_sub_columns_are_zero_and_columns_follow_layout_order():
    specs = [{"az": 0, "el": 0, "sub": True, "id": "LFE"}, (-30, 0), {"az": 0, "sub": True, "id": "LFE2"}, (30, 0)]
    ctx = PanningContext(make_layout(specs))
    g = ctx.gains(at([30.0, -30.0]), [0.0, 0.0], "pairwise")
    assert g.shape == (2, 4) and g.dtype == np.float64
    np.testing.assert_allclose(g, [[0, 0, 0, 1], [0, 1, 0, 0]], atol=1e-12)


# ----------------------------------------------------------------------------- errors


def test_fewer_than_two_ear_level_speakers_is_a_config_error():
    layout = make_layout([(0, 0), (45, 30), (-45, 30)], name="high")
    ctx = PanningContext(layout)
    with pytest.raises(ConfigError) as err:
        ctx.check("pairwise")
    assert err.value.where == "high"
    assert 'panner "pairwise"' in err.value.message and "ear level" in err.value.message
    with pytest.raises(ConfigError):  # gains refuse too, every time
        ctx.gains(at(0.0), [0.0], "pairwise")
    with pytest.raises(ConfigError):
        ctx.gains(at(0.0), [0.0], "pairwise")
    ctx.check("dbap")  # the other panners are unaffected


def test_error_names_the_file_when_the_layout_has_a_path():
    layout = make_layout([(0, 0)], name="mono", path=Path("/somewhere/mono.json"))
    with pytest.raises(ConfigError) as err:
        PanningContext(layout).check("pairwise")
    assert err.value.where == "mono.json"
    assert str(err.value).startswith("mono.json: panner \"pairwise\"")


def test_two_ring_speakers_at_one_azimuth_are_rejected():
    layout = make_layout([(0, 0), (0, 5), (90, 0), (-90, 0)])
    with pytest.raises(ConfigError, match="same azimuth"):
        PanningContext(layout).check("pairwise")


def test_no_main_speakers_is_a_config_error():
    layout = make_layout([{"az": 0, "sub": True}])
    for kind in ("pairwise", "vbap", "dbap"):
        with pytest.raises(ConfigError, match="no main speakers"):
            PanningContext(layout).check(kind)


def test_unknown_panner_kind():
    ctx = PanningContext(make_layout(STEREO))
    with pytest.raises(ConfigError, match="unknown panner"):
        ctx.check("hoa")
    with pytest.raises(ConfigError, match="unknown panner"):
        ctx.kind_for("hoa")


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_non_finite_positions_raise_value_error(bad):
    ctx = PanningContext(make_layout(FIVE, panner="vbap"))
    pos = np.array([[0.0, 2.0, 0.0], [bad, 1.0, 0.0]])
    for kind in ("pairwise", "vbap", "dbap"):
        with pytest.raises(ValueError, match="source position 1"):
            ctx.gains(pos, [0.0, 0.0], kind)
        with pytest.raises(ValueError, match="spread"):
            ctx.gains(pos[:1], [bad], kind)


def test_huge_finite_positions_give_finite_gains():
    ctx = PanningContext(make_layout(FIVE + [(45, 40)], panner="vbap"))
    pos = np.array([[1e300, -1e300, 1e300], [0.0, 1e200, 0.0], [-1e-300, 0.0, 0.0], [0.0, 0.0, 0.0]])
    for kind in ("pairwise", "vbap", "dbap"):
        g = ctx.gains(pos, [0.0, 10.0, 0.0, 360.0], kind)
        assert np.all(np.isfinite(g)) and np.all(g >= 0.0)
        level = np.sum(g * g, axis=1)
        np.testing.assert_allclose(level[:2], 10 ** (-40 / 10), rtol=1e-9)  # the -40 dB floor
        np.testing.assert_allclose(level[2:], 1.0, rtol=1e-9)


def test_bad_shapes_raise_value_error():
    ctx = PanningContext(make_layout(FIVE))
    with pytest.raises(ValueError):
        ctx.gains(np.zeros((3, 2)), np.zeros(3), "pairwise")
    with pytest.raises(ValueError):
        ctx.gains(np.ones((3, 3)), np.zeros(4), "pairwise")
    assert ctx.gains(np.zeros((0, 3)), np.zeros(0), "pairwise").shape == (0, 5)


def test_bad_distance_options_are_config_errors():
    for opts, word in [({"reference_distance": -1.0}, "reference_distance"),
                       ({"distance_floor_db": 3.0}, "distance_floor_db"),
                       ({"near_radius": float("nan")}, "near_radius")]:
        with pytest.raises(ConfigError, match=word):
            PanningContext(make_layout(FIVE, **opts)).check("pairwise")


# ----------------------------------------------------------------------------- kind_for, direct


def test_kind_for_resolves_none_to_the_layout_panner():
    ctx = PanningContext(make_layout(FIVE, panner="dbap"))
    assert ctx.kind_for(None) == "dbap"
    assert ctx.kind_for("vbap") == "vbap"
    assert ctx.kind_for("direct") == "direct"
    ctx.check("direct")  # always servable


def test_direct_gains_are_fixed_linear_gains_without_normalisation():
    specs = [{"az": 30, "id": "L"}, {"az": -30, "id": "R"}, {"az": 0, "sub": True, "id": "SUB"}]
    ctx = PanningContext(make_layout(specs))
    g = ctx.direct_gains([("R", -6.0), ("L", 0.0)])
    assert g.shape == (3,)
    np.testing.assert_allclose(g, [1.0, 10 ** (-6 / 20), 0.0], rtol=1e-12)
    np.testing.assert_array_equal(ctx.direct_gains([]), [0.0, 0.0, 0.0])
    with pytest.raises(ConfigError, match='unknown speaker "C"'):
        ctx.direct_gains([("L", 0.0), ("C", -3.0)])
    with pytest.raises(ConfigError, match="subwoofer"):
        ctx.direct_gains([("SUB", 0.0)])
    with pytest.raises(ConfigError, match="twice"):
        ctx.direct_gains([("L", 0.0), ("L", -3.0)])
    for bad in (float("nan"), float("inf"), "loud", 1e6):
        with pytest.raises(ConfigError, match="gain"):
            ctx.direct_gains([("L", bad)])
