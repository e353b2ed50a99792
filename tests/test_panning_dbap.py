"""DBAP (T. Lossius, P. Baltazar, T. de la Hogue, "DBAP - Distance-Based Amplitude
Panning", ICMC 2009)."""

from __future__ import annotations

import numpy as np
import pytest

from fieldmix import geometry
from fieldmix.errors import ConfigError
from fieldmix.model import Layout, LayoutOptions, Speaker
from fieldmix.panning import PanningContext, dbap_exponent, dbap_gains


def make_layout_xyz(points, weights=None, subs=(), panner="dbap", name="test-layout", **options) -> Layout:
    """Layout from cartesian speaker positions (metres)."""
    speakers = []
    for i, p in enumerate(points):
        az, el, d = (float(v) for v in geometry.cart_to_sph(np.asarray(p, dtype=float)))
        speakers.append(Speaker(index=i, id=f"S{i + 1}", output=i + 1, position=tuple(float(v) for v in p),
                                azimuth=az, elevation=el, distance=d, sub=i in subs,
                                weight=1.0 if weights is None else float(weights[i])))
    return Layout(name=name, speakers=tuple(speakers), panner=panner, options=LayoutOptions(**options))


def paper_dbap(src, spk, w, rolloff_db, rs):
    """The paper's formula, written out independently (Lossius et al. 2009):
    v_i = k w_i / d_i^a, a = R / (20 log10 2), d_i = sqrt(|s - x_i|^2 + rs^2),
    k = 1 / sqrt(sum (w_i / d_i^a)^2)."""
    out = []
    a = rolloff_db / (20.0 * np.log10(2.0))
    for s in src:
        d = np.sqrt(np.sum((np.asarray(spk) - s) ** 2, axis=1) + rs ** 2)
        v = np.asarray(w) / d ** a
        out.append(v / np.sqrt(np.sum(v ** 2)))
    return np.array(out)


# an irregular room: 7 speakers at different heights and distances
ROOM = [(-3.0, 4.0, 0.0), (3.0, 4.5, 0.5), (5.0, -1.0, 0.0), (2.0, -4.0, 2.0),
        (-4.0, -3.0, 1.0), (-5.0, 0.5, 3.0), (0.0, 0.0, 5.0)]
WEIGHTS = [1.0, 0.8, 1.0, 1.2, 1.0, 0.5, 1.0]


def test_rolloff_6_db_gives_exponent_0_9966():
    # a = R / (20 log10 2); R = 6 dB -> a = 0.9966 (Lossius et al. 2009)
    assert dbap_exponent(6.0) == pytest.approx(0.9966, abs=5e-5)
    assert dbap_exponent(20.0 * np.log10(2.0)) == pytest.approx(1.0, abs=1e-12)


@pytest.mark.parametrize("rolloff, blur", [(6.0, 0.2), (3.0, 0.0), (9.0, 1.5)])
def test_matches_the_paper_formula(rolloff, blur):
    # Lossius et al. 2009, formula computed independently above
    layout = make_layout_xyz(ROOM, WEIGHTS, dbap_rolloff_db=rolloff, dbap_blur=blur)
    ctx = PanningContext(layout)
    rng = np.random.default_rng(11)
    src = rng.uniform(-3.0, 3.0, size=(200, 3))
    src[:, 2] = rng.uniform(0.0, 3.0, 200)
    ref = paper_dbap(src, ROOM, WEIGHTS, rolloff, blur)
    np.testing.assert_allclose(dbap_gains(src, ROOM, WEIGHTS, rolloff, blur), ref, rtol=1e-10, atol=1e-14)
    # the context adds only the distance rule, which is 1 inside the reference distance
    ref_d = np.mean(np.linalg.norm(ROOM, axis=1))
    inside = np.linalg.norm(src, axis=1) <= ref_d
    assert inside.sum() > 150
    g = ctx.gains(src, np.zeros(len(src)), "dbap")
    np.testing.assert_allclose(g[inside], ref[inside], rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(np.sum(g[inside] ** 2, axis=1), 1.0, atol=1e-12)


@pytest.mark.parametrize("rolloff", [6.0, 3.0])
def test_rolloff_is_r_db_per_doubling_of_distance(rolloff):
    # The definition of R (Lossius et al. 2009): with no blur, a speaker twice as far
    # from the source is R dB quieter.
    spk = [(1.0, 0.0, 0.0), (-2.0, 0.0, 0.0)]
    g = dbap_gains(np.zeros((1, 3)), spk, [1.0, 1.0], rolloff, 0.0)[0]
    assert 20 * np.log10(g[0] / g[1]) == pytest.approx(rolloff, abs=1e-9)


def test_sources_outside_the_hull_are_finite_and_normalised():
    # DBAP has no notion of a hull (Lossius et al. 2009): any position gives gains
    ctx = PanningContext(make_layout_xyz(ROOM, WEIGHTS, distance_floor_db=-60.0))
    far = np.array([[30.0, 0.0, 0.0], [0.0, -200.0, 10.0], [1e6, 1e6, -1e6], [0.0, 0.0, -50.0]])
    g = ctx.gains(far, np.zeros(4), "dbap")
    assert np.all(np.isfinite(g)) and np.all(g >= 0.0)
    assert np.all(g.sum(axis=1) > 0.0)
    ref = np.mean(np.linalg.norm(ROOM, axis=1))
    level = np.sqrt(np.sum(g ** 2, axis=1))
    expected = np.maximum(ref / np.linalg.norm(far, axis=1), 10 ** (-60 / 20))
    np.testing.assert_allclose(level, expected, rtol=1e-12)
    # the shape itself stays the paper's formula
    np.testing.assert_allclose(g / level[:, None], paper_dbap(far, ROOM, WEIGHTS, 6.0, 0.2), rtol=1e-9)


def test_source_on_a_speaker_without_blur_is_finite():
    ctx = PanningContext(make_layout_xyz(ROOM, dbap_blur=0.0))
    g = ctx.gains(np.array([ROOM[0]]), [0.0], "dbap")[0]
    assert np.all(np.isfinite(g))
    np.testing.assert_allclose(g, np.eye(len(ROOM))[0] * g[0], atol=1e-12)


def test_weights_zero_speaker_is_silent_and_subs_are_zero():
    w = [1.0, 0.0, 1.0, 1.0, 1.0, 1.0, 1.0]
    ctx = PanningContext(make_layout_xyz(ROOM, w, subs=(6,), reference_distance=10.0))  # no distance attenuation here
    src = np.array([[3.0, 4.4, 0.5], [0.0, 0.0, 0.0]])  # the first sits on the weight-0 speaker
    g = ctx.gains(src, [0.0, 0.0], "dbap")
    assert np.all(g[:, 1] == 0.0) and np.all(g[:, 6] == 0.0)
    np.testing.assert_allclose(np.sum(g ** 2, axis=1), 1.0, atol=1e-12)
    main = [0, 2, 3, 4, 5]
    np.testing.assert_allclose(g[:, main], paper_dbap(src, np.array(ROOM)[main], np.ones(5), 6.0, 0.2), rtol=1e-10)


def test_works_for_layouts_other_panners_refuse():
    # a single speaker, and a vertical line of speakers through the listener
    one = PanningContext(make_layout_xyz([(0.0, 3.0, 0.0)]))
    np.testing.assert_allclose(one.gains(np.array([[2.0, 0.0, -1.0]]), [0.0], "dbap"), [[1.0]])
    line = PanningContext(make_layout_xyz([(0.0, 0.0, -2.0), (0.0, 0.0, 2.0), (0.0, 0.0, 4.0)]))
    with pytest.raises(ConfigError):
        line.check("vbap")
    g = line.gains(np.array([[0.0, 0.0, 2.0]]), [0.0], "dbap")
    assert np.argmax(g[0]) == 1


def test_spread_widens_the_blur_towards_the_weights():
    # fieldmix mapping (docs/panning.md): rs'^2 = rs^2 + D^2 tan^2(spread / 4)
    ctx = PanningContext(make_layout_xyz(ROOM, WEIGHTS))
    src = np.array([[-2.5, 3.5, 0.2]])
    d = ctx.reference_distance
    for spread in (30.0, 90.0, 180.0):
        blur = np.sqrt(0.2 ** 2 + (d * np.tan(np.radians(spread / 4))) ** 2)
        np.testing.assert_allclose(ctx.gains(src, [spread], "dbap")[0],
                                   paper_dbap(src, ROOM, WEIGHTS, 6.0, blur)[0], rtol=1e-9)
    g360 = ctx.gains(src, [360.0], "dbap")[0]
    np.testing.assert_allclose(g360, np.array(WEIGHTS) / np.linalg.norm(WEIGHTS), rtol=1e-9)


@pytest.mark.parametrize("opts, word", [
    ({"dbap_rolloff_db": -1.0}, "dbap_rolloff_db"),
    ({"dbap_blur": float("inf")}, "dbap_blur"),
])
def test_bad_dbap_options_are_config_errors(opts, word):
    with pytest.raises(ConfigError, match=word):
        PanningContext(make_layout_xyz(ROOM, **opts)).check("dbap")


def test_all_weights_zero_is_a_config_error():
    with pytest.raises(ConfigError, match="weight 0"):
        PanningContext(make_layout_xyz(ROOM, [0.0] * 7)).check("dbap")
    with pytest.raises(ConfigError, match="weight"):
        PanningContext(make_layout_xyz(ROOM, [1.0] * 6 + [-1.0])).check("dbap")
