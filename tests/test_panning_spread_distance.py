"""Spread (MDAP: V. Pulkki, IEEE WASPAA 1999; DBAP blur) and the distance rule."""

from __future__ import annotations

import numpy as np
import pytest

from fieldmix import geometry
from fieldmix.panning import (
    PanningContext,
    cone_directions,
    distance_gain,
    gerzon_vectors,
    near_spread,
    speaker_unit_vectors,
    tangent_basis,
)


from panning_helpers import at
from panning_helpers import make_layout as _make_layout


def make_layout(specs, panner="vbap", **kw):
    return _make_layout(specs, panner=panner, **kw)


RING8 = [(a, 0) for a in range(0, 360, 45)]
FIVE = [(0, 0), (30, 0), (-30, 0), (110, 0), (-110, 0)]  # ITU-R BS.775-3, nominal angles
DOME_450 = FIVE + [(30, 30), (-30, 30), (110, 30), (-110, 30)]  # ITU-R BS.2051 System D, nominal (memory)
CASES = [(RING8, "pairwise"), (FIVE, "pairwise"), (RING8, "vbap"), (FIVE, "vbap"),
         (DOME_450, "vbap"), (DOME_450, "dbap"), (RING8, "dbap")]


def sweep_spread(layout, kind, az=20.0, el=10.0, step=1.0):
    ctx = PanningContext(layout)
    spread = np.arange(0.0, 360.0 + step / 2, step)
    g = ctx.gains(np.repeat(at(az, el), spread.size, axis=0), spread, kind)
    return spread, g


# ----------------------------------------------------------------------------- spread


@pytest.mark.parametrize("specs, kind", CASES)
def test_spread_keeps_power_and_widens_the_image(specs, kind):
    # MDAP renormalises the summed gains (Pulkki 1999): constant sum of squares
    # (physics: intensity ~ amplitude^2).  Width from |rE| (Gerzon 1992, AES
    # preprint 3306): |rE| must fall as the spread grows.
    layout = make_layout(specs)
    spread, g = sweep_spread(layout, kind)
    assert np.all(np.isfinite(g)) and np.all(g >= 0.0)
    np.testing.assert_allclose(np.sum(g * g, axis=1), 1.0, atol=1e-12)
    _, re = gerzon_vectors(g, speaker_unit_vectors(layout))
    r = np.linalg.norm(re, axis=1)
    assert np.max(np.diff(r)) < 0.005  # monotonic up to small ripple
    assert r[0] - r[-1] > 0.3
    # and clearly falling quarter by quarter (a 90 deg spread barely widens an
    # image on a ring with speakers every 45 deg, hence the smaller first margin)
    for lo, hi, margin in [(0, 90, 0.005), (90, 180, 0.02), (180, 270, 0.02), (270, 360, 0.005)]:
        assert r[hi] < r[lo] - margin
    # at 0 it is the point source, and a tiny spread is almost the point source
    point = PanningContext(layout).gains(at(20.0, 10.0), [0.0], kind)[0]
    np.testing.assert_allclose(g[0], point, atol=1e-12)
    tiny = PanningContext(layout).gains(at(20.0, 10.0), [1e-4], kind)[0]
    np.testing.assert_allclose(tiny, point, atol=1e-5)


@pytest.mark.parametrize("specs, kind", CASES)
def test_spread_is_smooth(specs, kind):
    # a 0.1 deg change of spread never moves a gain by more than 0.005 (no jumps from
    # a changing count of virtual directions: the count is fixed)
    spread, g = sweep_spread(make_layout(specs), kind, step=0.1)
    assert np.max(np.abs(np.diff(g, axis=0))) < 0.005


def test_full_spread_on_a_regular_ring_is_even():
    for kind in ("pairwise", "vbap"):
        g = PanningContext(make_layout(RING8)).gains(at(13.0), [360.0], kind)[0]
        np.testing.assert_allclose(g, np.full(8, 8 ** -0.5), rtol=1e-9)
    # and on any layout full spread is the same "everywhere" vector whatever the
    # direction (docs/panning.md: the fade into E from 300 to 360 deg)
    for specs, kind in [(FIVE, "pairwise"), (FIVE, "vbap"), (DOME_450, "vbap")]:
        ctx = PanningContext(make_layout(specs))
        az = np.linspace(-180, 180, 37)
        g = ctx.gains(at(az, 20.0), np.full(az.size, 360.0), kind)
        np.testing.assert_allclose(g, np.repeat(g[:1], az.size, axis=0), atol=1e-12)
        assert np.all(g > 0.05)


def test_cone_directions_cover_the_sphere_evenly_at_full_spread():
    # solid-angle weights: at 360 deg the weighted mean direction is ~0 and the
    # weighted mean of z^2 is 1/3, as for a uniform sphere (geometry, no source)
    c = geometry.unit(np.array([[0.3, 0.5, -0.8], [0.0, 0.0, 1.0], [1.0, 0.0, 0.0]]))
    d, w = cone_directions(c, np.full(3, 360.0))
    np.testing.assert_allclose(w.sum(axis=1), 1.0)
    np.testing.assert_allclose(np.linalg.norm(d, axis=2), 1.0, atol=1e-12)
    mean = np.einsum("sn,snk->sk", w, d)
    assert np.max(np.linalg.norm(mean, axis=1)) < 0.02
    zz = np.einsum("sn,sn->s", w, d[:, :, 2] ** 2)
    assert zz[1] == pytest.approx(1 / 3, abs=0.02)
    # exact solid angles (spherical caps and bands: area 2 pi (cos a - cos b)):
    # centre cap of half-angle h/2 and the antipodal cap weigh the same,
    # ring r stands for the band (r -+ 1/2) h, h = 180 deg / R
    from fieldmix.panning.spread import PER_RING_3D as M, RINGS_3D as R
    h = np.pi / R
    np.testing.assert_allclose(w[:, 0], (1 - np.cos(h / 2)) / 2, rtol=1e-12)
    np.testing.assert_allclose(w[:, -M:].sum(axis=1), (1 - np.cos(h / 2)) / 2, rtol=1e-12)
    for r in range(1, R):
        band = w[:, 1 + (r - 1) * M:1 + r * M].sum(axis=1)
        np.testing.assert_allclose(band, (np.cos((r - 0.5) * h) - np.cos((r + 0.5) * h)) / 2, rtol=1e-12)
    # a spread of s puts every direction within s/2 of the centre
    d, _ = cone_directions(c, np.full(3, 40.0))
    ang = np.degrees(np.arccos(np.clip(np.einsum("snk,sk->sn", d, c), -1, 1)))
    assert ang.max() == pytest.approx(20.0, abs=1e-9)


def test_tangent_basis_is_orthonormal_everywhere():
    rng = np.random.default_rng(5)
    c = geometry.unit(np.vstack([rng.normal(size=(500, 3)), [[0, 0, -1.0]], [[1e-12, 0, -1.0]],
                                 [[0, 0, 1.0]], [[1e-5, 2e-5, -1.0]]]))
    t1, t2 = tangent_basis(c)
    for a, b in [(t1, t2), (t1, c), (t2, c)]:
        np.testing.assert_allclose(np.sum(a * b, axis=1), 0.0, atol=1e-12)
    np.testing.assert_allclose(np.linalg.norm(t1, axis=1), 1.0, atol=1e-12)
    np.testing.assert_allclose(np.linalg.norm(t2, axis=1), 1.0, atol=1e-12)


# ----------------------------------------------------------------------------- distance


@pytest.mark.parametrize("kind", ["pairwise", "vbap", "dbap"])
def test_inverse_distance_law_beyond_the_reference(kind):
    # -6.02 dB per doubling of distance (inverse distance law; physics)
    ctx = PanningContext(make_layout(DOME_450 if kind != "pairwise" else FIVE, distance_floor_db=-80.0))
    ref = ctx.reference_distance
    assert ref == pytest.approx(2.0)  # default: mean distance of the main speakers
    d = ref * np.array([1.0, 2.0, 4.0, 8.0, 16.0])
    g = ctx.gains(at(np.full(5, 40.0), 5.0, d), np.zeros(5), kind)
    level = 10 * np.log10(np.sum(g * g, axis=1))
    np.testing.assert_allclose(np.diff(level), -20 * np.log10(2.0), atol=1e-9)
    assert level[0] == pytest.approx(0.0, abs=1e-12)
    # inside the reference distance the level is 0 dB
    inside = ctx.gains(at(np.full(4, 40.0), 5.0, ref * np.array([0.05, 0.3, 0.7, 0.99])), np.zeros(4), kind)
    np.testing.assert_allclose(np.sum(inside * inside, axis=1), 1.0, atol=1e-12)


def test_distance_floor_holds():
    ctx = PanningContext(make_layout(FIVE, distance_floor_db=-30.0))
    g = ctx.gains(at([10.0] * 3, 0.0, [100.0, 1e4, 1e12]), np.zeros(3), "vbap")
    np.testing.assert_allclose(np.sqrt(np.sum(g * g, axis=1)), 10 ** (-30 / 20), rtol=1e-12)
    np.testing.assert_allclose(distance_gain([1.0, 4.0, 1e9], 2.0, -20.0), [1.0, 0.5, 0.1])


def test_reference_distance_defaults_to_the_mean_and_can_be_set():
    specs = [(0, 0, 1.0), (120, 0, 2.0), (-120, 0, 6.0)]
    assert PanningContext(make_layout(specs)).reference_distance == pytest.approx(3.0)
    ctx = PanningContext(make_layout(specs, reference_distance=5.0, near_radius=0.5))
    assert ctx.reference_distance == 5.0 and ctx.near_radius == 0.5
    assert PanningContext(make_layout(specs)).near_radius == pytest.approx(1.5)


def test_near_spread_formula():
    # fieldmix rule (docs/panning.md): s + (360 - s) (1 + cos(pi d / r_n)) / 2 inside r_n
    np.testing.assert_allclose(near_spread([0.0, 0.0, 0.0, 0.0, 30.0], [0.0, 0.5, 1.0, 3.0, 0.5], 1.0),
                               [360.0, 180.0, 0.0, 0.0, 195.0])


@pytest.mark.parametrize("specs, kind", [(RING8, "pairwise"), (FIVE, "pairwise"), ([(30, 0), (-30, 0)], "pairwise"),
                                         (FIVE, "vbap"), (DOME_450, "vbap"), (DOME_450, "dbap")])
def test_source_crossing_the_listener_changes_gains_continuously(specs, kind):
    # along straight lines through (and just past) the listener in 1 mm steps
    ctx = PanningContext(make_layout(specs))
    t = np.linspace(-4.0, 4.0, 8001)
    stereo = len(specs) == 2
    for offset, direction in [((0, 0, 0), (1, 0, 0)), ((0, 0, 0), (0, 1, 0)), ((0.02, 0, 0), (0, 1, 0)),
                              ((0, 0.05, 0.3), (1, 0.2, 0)), ((0, 0, 0), (0.3, -1, 0.4))]:
        p = np.asarray(offset)[None, :] + t[:, None] * geometry.unit(np.asarray(direction, float))[None, :]
        g = ctx.gains(p, np.zeros(t.size), kind)
        assert np.all(np.isfinite(g)) and np.all(g >= 0.0)
        step = np.max(np.abs(np.diff(g, axis=0)))
        # stereo: spread directions in the 300 deg stop gap snap one at a time
        # (1/64 of the image each), everywhere else the change is smooth
        assert step < (0.03 if stereo else 0.01), step
    # at the listener every main speaker sounds
    g0 = ctx.gains(np.zeros((1, 3)), [0.0], kind)[0]
    assert np.all(g0 > 0.05)
    assert np.sum(g0 ** 2) == pytest.approx(1.0, abs=1e-12)


def test_near_widening_can_be_switched_off():
    ctx = PanningContext(make_layout(RING8, near_radius=0.0))
    g = ctx.gains(at(0.0, 0.0, 0.01), [0.0], "pairwise")[0]
    np.testing.assert_allclose(g, np.eye(8)[0], atol=1e-12)
