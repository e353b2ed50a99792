"""VBAP in 2-D and 3-D (V. Pulkki, JAES 45(6), 456-466, 1997)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from fieldmix import geometry
from fieldmix.errors import ConfigError
from fieldmix.panning import PanningContext, gerzon_vectors, speaker_unit_vectors
from fieldmix.panning.vbap import _SMALL, GRID


# ----------------------------------------------------------------------------- helpers


from panning_helpers import at
from panning_helpers import make_layout as _make_layout


def make_layout(specs, panner="vbap", **kw):
    return _make_layout(specs, panner=panner, **kw)


def sphere_grid(step=2.0):
    """Every direction on a step-degree azimuth/elevation grid, poles included."""
    az, el = np.meshgrid(np.arange(-180.0, 180.0, step), np.arange(-90.0, 90.0 + step / 2, step))
    return az.ravel(), el.ravel()


STEREO = [(30, 0), (-30, 0)]
FIVE = [(0, 0), (30, 0), (-30, 0), (110, 0), (-110, 0)]  # ITU-R BS.775-3 3/2, nominal angles
# ITU-R BS.2051 System D "4+5+0": ear level 0, +30, -30, +110, -110; upper layer +30, -30,
# +110, -110 at elevation 30.  Nominal values written from memory (the standard's table
# allows ranges: surrounds 100..120, upper elevation 30..45 / 30..55).
DOME_450 = FIVE + [(30, 30), (-30, 30), (110, 30), (-110, 30)]


def vbap_reference(vectors, p):
    """Independent VBAP for one set: solve L^T g = p (g = p^T L^-1) with numpy, then
    normalise to unit power (Pulkki 1997)."""
    L = np.asarray(vectors, dtype=np.float64)
    g = np.linalg.solve(L.T, np.asarray(p, dtype=np.float64))
    return g / np.linalg.norm(g)


# ----------------------------------------------------------------------------- 2-D


def test_2d_pair_follows_the_tangent_law_not_the_sine_law():
    # Tangent law: (g1 - g2)/(g1 + g2) = tan(phi)/tan(phi0) (Bennett, Barker & Edeko,
    # JAES 33(5), 1985); 2-D VBAP obeys it (Pulkki 1997).
    ctx = PanningContext(make_layout(STEREO))
    phi0 = 30.0
    phi = np.linspace(-30.0, 30.0, 121)
    g = ctx.gains(at(phi), np.zeros(phi.size), "vbap")
    g1, g2 = g[:, 0], g[:, 1]  # speaker at +30 (left), at -30 (right)
    ratio = (g1 - g2) / (g1 + g2)
    tangent = np.tan(np.radians(phi)) / np.tan(np.radians(phi0))
    np.testing.assert_allclose(ratio, tangent, atol=1e-6)
    np.testing.assert_allclose(np.sum(g * g, axis=1), 1.0, atol=1e-12)
    # worked example phi0 = 30, phi = 15 -> 0.4641 (computed: tan 15 / tan 30)
    i15 = int(np.argmin(np.abs(phi - 15.0)))
    assert ratio[i15] == pytest.approx(0.4641, abs=1e-4)
    # The sine law (Bauer 1961) predicts sin(phi)/sin(phi0) = 0.5176 at 15 deg: a
    # different law, and VBAP measurably does not follow it.
    sine = np.sin(np.radians(phi)) / np.sin(np.radians(phi0))
    assert np.max(np.abs(ratio - sine)) > 0.05  # > 10^4 times the tolerance above
    assert abs(ratio[i15] - sine[i15]) > 0.05


def test_2d_gains_match_an_independent_solve_on_the_active_pair():
    # g = p^T L^-1 on the pair that contains p, power-normalised (Pulkki 1997);
    # numpy.linalg.solve as the reference solver.
    layout = make_layout(FIVE)
    ctx = PanningContext(layout)
    assert ctx.vbap_mesh() is None  # all at elevation 0: 2-D pairs
    az = np.arange(-180.0, 180.0, 0.5)
    g = ctx.gains(at(az), np.zeros(az.size), "vbap")
    u2 = np.array([[-np.sin(np.radians(s.azimuth)), np.cos(np.radians(s.azimuth))] for s in layout.speakers])
    for row, a in zip(g, az):
        active = np.flatnonzero(row > 1e-12)
        assert 1 <= active.size <= 2
        if active.size == 2:
            p = np.array([-np.sin(np.radians(a)), np.cos(np.radians(a))])
            np.testing.assert_allclose(row[active], vbap_reference(u2[active], p), atol=1e-9)
        else:
            assert row[active[0]] == pytest.approx(1.0, abs=1e-12)
    assert np.all(g >= 0.0)


def test_2d_uses_small_elevation_tolerance():
    ctx = PanningContext(make_layout([(0, 0.5), (120, -0.8), (-120, 0.0)]))
    assert ctx.vbap_mesh() is None
    ctx3 = PanningContext(make_layout([(0, 0.0), (120, 5.0), (-120, 0.0), (60, 40)]))
    assert ctx3.vbap_mesh() is not None


def test_2d_gap_rule_wide_gap_stays_at_the_nearer_edge():
    ctx = PanningContext(make_layout(STEREO))
    g = ctx.gains(at([45.0, 120.0, 170.0, -45.0, -120.0, -170.0]), np.zeros(6), "vbap")
    np.testing.assert_allclose(g, [[1, 0]] * 3 + [[0, 1]] * 3, atol=1e-12)
    np.testing.assert_allclose(ctx.gains(at(180.0), [0.0], "vbap")[0], [2 ** -0.5] * 2, atol=1e-12)
    # 5.0's 140 deg rear gap is panned across: straight behind sounds in both surrounds
    g = PanningContext(make_layout(FIVE)).gains(at(180.0), [0.0], "vbap")[0]
    np.testing.assert_allclose(g, [0, 0, 0, 2 ** -0.5, 2 ** -0.5], atol=1e-12)


# ----------------------------------------------------------------------------- 3-D


@pytest.fixture(scope="module")
def dome():
    layout = make_layout(DOME_450, name="dome-450", path=Path("/x/dome.json"))
    return layout, PanningContext(layout)


def test_3d_source_at_a_speaker_gives_that_speaker_alone(dome):
    # VBAP reproduces a speaker's own direction with that speaker only (Pulkki 1997)
    layout, ctx = dome
    az = [s.azimuth for s in layout.speakers]
    el = [s.elevation for s in layout.speakers]
    g = ctx.gains(at(az, el), np.zeros(len(az)), "vbap")
    np.testing.assert_allclose(g, np.eye(len(az)), atol=1e-9)


def test_3d_velocity_vector_points_at_the_source_inside_every_real_triplet(dome):
    # Gerzon 1992 (AES preprint 3306): rV = sum g_i u_i / sum g_i.  For VBAP,
    # sum g_i l_i is parallel to p inside the active triplet (Pulkki 1997), so rV
    # points at the panning direction.  Reference gains: numpy.linalg.solve.
    layout, ctx = dome
    mesh = ctx.vbap_mesh()
    u = speaker_unit_vectors(layout)
    real = mesh.triangles[mesh.real_triangles]
    # the band between a ring of 5 and a ring of 4 has 5 + 4 triangles; the top fan
    # (4, virtual zenith) and the bottom fan (5, virtual nadir) make 18 in all
    assert real.shape[0] == 9 and mesh.triangles.shape[0] == 18
    rng = np.random.default_rng(3)
    for tri in real:
        w = rng.dirichlet(np.ones(3), size=40)  # points inside the spherical triangle
        p = geometry.unit(w @ u[tri])
        g = ctx.gains(p * 2.0, np.zeros(len(p)), "vbap")
        rv, _ = gerzon_vectors(g, u)
        np.testing.assert_allclose(geometry.unit(rv), p, atol=1e-9)
        assert np.all(g[:, np.setdiff1d(np.arange(len(u)), tri)] == 0.0)
        for row, pi in zip(g, p):
            np.testing.assert_allclose(row[tri], vbap_reference(u[tri], pi), atol=1e-9)


def test_3d_between_the_layers_only_three_real_speakers_sound(dome):
    # Independent of the mesh: every direction between the two layers (elevation
    # 1..29) lies in a triplet of real speakers; the active set is 3 speakers and
    # its gains equal p^T L^-1 normalised (numpy.linalg.solve), Pulkki 1997.
    layout, ctx = dome
    u = speaker_unit_vectors(layout)
    az, el = np.meshgrid(np.arange(-180.0, 180.0, 7.0), np.arange(1.0, 29.5, 4.0))
    p = geometry.sph_to_cart(az.ravel(), el.ravel())
    g = ctx.gains(p * 2.0, np.zeros(len(p)), "vbap")
    for row, pi in zip(g, p):
        active = np.flatnonzero(row > 1e-12)
        assert 2 <= active.size <= 3
        if active.size == 3:
            np.testing.assert_allclose(row[active], vbap_reference(u[active], pi), atol=1e-9)
        rv, _ = gerzon_vectors(row[None], u)
        np.testing.assert_allclose(geometry.unit(rv)[0], pi, atol=1e-9)


def test_3d_whole_sphere_is_finite_and_power_normalised(dome):
    # Power normalisation sum g^2 = 1 (Pulkki 1997), on a 2-degree grid, below the dome too.
    _, ctx = dome
    az, el = sphere_grid(2.0)
    g = ctx.gains(at(az, el), np.zeros(az.size), "vbap")
    assert np.all(np.isfinite(g)) and np.all(g >= 0.0)
    np.testing.assert_allclose(np.sum(g * g, axis=1), 1.0, atol=1e-12)
    below = el < -5.0
    assert np.all(g[below][:, 5:] == 0.0)  # below the dome: only ear-level speakers


def test_3d_virtual_speakers_close_the_dome(dome):
    # fieldmix rule (docs/panning.md): virtual zenith and nadir, their power shared
    # equally among the real speakers next to them in the hull.
    _, ctx = dome
    mesh = ctx.vbap_mesh()
    np.testing.assert_allclose(mesh.virtual, [[0, 0, 1], [0, 0, -1]], atol=1e-12)
    np.testing.assert_allclose(mesh.share.sum(axis=1), 1.0)
    g = ctx.gains(at([0.0, 0.0], [90.0, -90.0]), [0.0, 0.0], "vbap")
    np.testing.assert_allclose(g[0], [0] * 5 + [0.5] * 4, atol=1e-12)  # zenith: the 4 upper
    np.testing.assert_allclose(g[1], [5 ** -0.5] * 5 + [0] * 4, atol=1e-12)  # nadir: the 5 ear-level


def test_3d_gains_change_continuously_over_the_sphere(dome):
    # sweeps along meridians and parallels in 0.05 deg steps: no jumps (the glide
    # would hide them, but the virtual-speaker rule must not create any)
    _, ctx = dome
    lines = [at(np.full(3601, a), np.linspace(-90, 90, 3601)) for a in (0.0, 17.0, 95.0, 180.0, -140.0)]
    lines += [at(np.linspace(-180, 180, 7201), np.full(7201, e)) for e in (-60.0, -10.0, 0.0, 15.0, 30.0, 60.0)]
    for p in lines:
        g = ctx.gains(p, np.zeros(len(p)), "vbap")
        assert np.max(np.abs(np.diff(g, axis=0))) < 0.02


def test_3d_layout_that_does_not_surround_gets_enough_virtual_speakers():
    # a frontal wall: 3 rows in front only; nothing behind, above or below
    specs = [(a, e) for a in (-50, -25, 0, 25, 50) for e in (-15, 10, 35)]
    ctx = PanningContext(make_layout(specs))
    mesh = ctx.vbap_mesh()
    assert mesh.virtual.shape[0] >= 3  # zenith, nadir and at least one behind
    assert np.min(mesh.virtual[:, 1]) < -0.5
    az, el = sphere_grid(3.0)
    g = ctx.gains(at(az, el), np.zeros(az.size), "vbap")
    assert np.all(np.isfinite(g)) and np.all(g >= 0.0)
    np.testing.assert_allclose(np.sum(g * g, axis=1), 1.0, atol=1e-12)
    # inside the wall it is plain VBAP: the speaker's own direction
    np.testing.assert_allclose(ctx.gains(at(25.0, 10.0), [0.0], "vbap")[0], np.eye(15)[10], atol=1e-9)


def test_3d_raised_ring_works_with_virtual_poles():
    ctx = PanningContext(make_layout([(a, 20.0) for a in range(0, 360, 60)]))
    az, el = sphere_grid(5.0)
    g = ctx.gains(at(az, el), np.zeros(az.size), "vbap")
    np.testing.assert_allclose(np.sum(g * g, axis=1), 1.0, atol=1e-12)
    np.testing.assert_allclose(g[np.flatnonzero((az == 0) & (el == 90))[0]], [6 ** -0.5] * 6, atol=1e-12)


# ----------------------------------------------------------------------------- 3-D face lookup


def fibonacci_dome(n=64):
    """n speakers spread evenly (Fibonacci lattice) over the upper half sphere, the
    first quarter on an ear-level ring (the generated dome of benchmarks/panning.py)."""
    k = np.arange(n)
    el = np.degrees(np.arcsin((k + 0.5) / n * 0.98))
    el[: n // 4] = 0.0
    az = geometry.wrap_deg(np.degrees(k * np.pi * (3.0 - np.sqrt(5.0))))
    return make_layout(list(zip(az, el)), name="fibonacci-dome-64")


def dome_450_file():
    from fieldmix.layout import load_layout
    return load_layout(Path(__file__).resolve().parents[1] / "configs" / "layouts" / "dome-4-5-0.json")


def search_every_triangle(mesh, p):
    """Reference 3-D VBAP over every triangle (Pulkki 1997: the active triplet is the one
    whose gains p^T L^-1 are all >= 0, taken here as the largest smallest gain; L^-1 from
    numpy.linalg.inv), then the fieldmix virtual-speaker rule of docs/panning.md."""
    inv = np.linalg.inv(mesh.vectors[mesh.triangles])
    all_g = np.einsum("dj,tjk->dtk", p, inv)
    best = np.argmax(all_g.min(axis=2), axis=1)
    g = np.clip(all_g[np.arange(len(p)), best], 0.0, None)
    norm = np.linalg.norm(g, axis=1, keepdims=True)
    g = np.divide(g, norm, out=np.zeros_like(g), where=norm > 0)
    k, kv = mesh.n_real, mesh.vectors.shape[0]
    power = np.zeros((len(p), kv))
    np.put_along_axis(power, mesh.triangles[best], g * g, axis=1)
    real = np.sqrt(power[:, :k] + power[:, k:] @ mesh.share)
    norm = np.linalg.norm(real, axis=1, keepdims=True)
    return best, all_g, np.divide(real, norm, out=np.zeros_like(real), where=norm > 0)


def hard_directions(mesh, rng):
    """Random directions over the whole sphere, plus points on every triangle edge, every
    speaker (virtual ones too), the poles and axes, cube-face seams and the cell grid."""
    p = [rng.normal(size=(20000, 3))]
    tri = mesh.vectors[mesh.triangles]
    for a, b in ((0, 1), (1, 2), (2, 0)):
        t = rng.uniform(0.0, 1.0, (tri.shape[0], 12, 1))
        t[:, 0] = 0.5
        p.append((t * tri[:, None, a] + (1.0 - t) * tri[:, None, b]).reshape(-1, 3))
    p.append(mesh.vectors)
    p.append(np.vstack([np.eye(3), -np.eye(3)]))
    s = np.array([-1.0, 1.0])
    p.append(np.array([[x, y, z] for x in s for y in s for z in (0.0, *s)]))  # seams, cube corners
    grid = np.linspace(-1.0, 1.0, 2 * GRID + 1)  # the lookup's cell edges and centres
    u, v = np.meshgrid(grid, grid)
    for axis in range(3):
        q = np.zeros((u.size, 3))
        q[:, axis] = 1.0
        q[:, [i for i in range(3) if i != axis]] = np.stack([u.ravel(), v.ravel()], axis=1)
        p += [q, -q]
    p = np.vstack(p)
    return p / np.linalg.norm(p, axis=1, keepdims=True)


@pytest.mark.parametrize("make", [dome_450_file, fibonacci_dome], ids=["dome-4-5-0", "fibonacci-64"])
def test_3d_face_lookup_gives_the_gains_of_the_search_over_every_triangle(make):
    from fieldmix.panning import vbap3d_gains, vbap3d_raw
    mesh = PanningContext(make()).vbap_mesh()
    assert mesh.lookup is not None
    p = hard_directions(mesh, np.random.default_rng(11))
    best_ref, all_g, ref = search_every_triangle(mesh, p)
    fast = vbap3d_gains(mesh, p)
    np.testing.assert_allclose(fast, ref, rtol=0, atol=1e-12)
    np.testing.assert_allclose(vbap3d_gains(mesh, p, exhaustive=True), ref, rtol=0, atol=1e-12)
    # the same triangle wherever the choice is clear (not on an edge or at a corner)
    best, raw = vbap3d_raw(mesh, p)
    low = np.sort(all_g.min(axis=2), axis=1)
    clear = low[:, -1] - low[:, -2] > 1e-9
    assert np.count_nonzero(clear) > 20000 * 0.95
    np.testing.assert_array_equal(best[clear], best_ref[clear])
    # also for small batches (below _SMALL directions the full search is used)
    np.testing.assert_allclose(vbap3d_gains(mesh, p[:7]), ref[:7], rtol=0, atol=1e-12)


def test_3d_face_lookup_finds_the_triangle_among_its_candidates_almost_always():
    # the lookup must do its job (the full-search fallback alone would also give the
    # right gains): the containing triangle is among the cell's candidates
    from fieldmix.panning.vbap import _cells
    mesh = PanningContext(fibonacci_dome()).vbap_mesh()
    rng = np.random.default_rng(5)
    p = rng.normal(size=(20000, 3))
    p /= np.linalg.norm(p, axis=1, keepdims=True)
    best_ref, _, _ = search_every_triangle(mesh, p)
    cell, ok = _cells(mesh.lookup, np.ascontiguousarray(p.T))
    assert np.all(ok)
    found = np.any(mesh.lookup.cand[cell] == best_ref[:, None], axis=1) & ~mesh.lookup.overflow[cell]
    assert np.mean(found) > 0.99
    assert np.mean(mesh.lookup.first_id[cell] == best_ref) > 0.85
    assert mesh.lookup.cand.shape[1] <= 8


def test_3d_face_lookup_keeps_zero_and_tiny_directions_like_the_full_search():
    from fieldmix.panning import vbap3d_gains
    mesh = PanningContext(dome_450_file()).vbap_mesh()
    rng = np.random.default_rng(2)
    p = rng.normal(size=(_SMALL + 100, 3))  # enough directions for the lookup to be used
    p[:50] /= np.linalg.norm(p[:50], axis=1, keepdims=True)
    p[50:60] *= 1e-140  # gains are scale-free: same triangle, same gains
    p[60] = 0.0  # no direction: a zero row, never NaN
    g = vbap3d_gains(mesh, p)
    assert np.all(np.isfinite(g))
    np.testing.assert_array_equal(g[60], 0.0)
    np.testing.assert_allclose(np.sum(np.delete(g, 60, axis=0) ** 2, axis=1), 1.0, atol=1e-12)
    np.testing.assert_allclose(g, vbap3d_gains(mesh, p, exhaustive=True), rtol=0, atol=1e-12)


def test_3d_spread_gains_with_the_lookup_equal_mdap_over_every_triangle():
    # MDAP (Pulkki, IEEE WASPAA 1999): weighted sum of the point gains of the cone's
    # directions, renormalised; point gains from the reference search above
    from fieldmix.panning import cone_directions
    layout = fibonacci_dome()
    ctx = PanningContext(layout)
    mesh = ctx.vbap_mesh()
    rng = np.random.default_rng(9)
    az = rng.uniform(-180, 180, 40)
    el = np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, 40)))
    pos = at(az, el, 4.0)
    spread = rng.uniform(5.0, 250.0, 40)
    g = ctx.gains(pos, spread, "vbap")
    level = np.linalg.norm(g, axis=1)  # every source 4 m away: one distance gain for all
    np.testing.assert_allclose(level, level[0], rtol=1e-12)
    g = g / level[:, None]
    cd, w = cone_directions(geometry.unit(pos), spread)
    _, _, pg = search_every_triangle(mesh, cd.reshape(-1, 3))
    ref = np.einsum("sn,snk->sk", w, pg.reshape(40, cd.shape[1], -1))
    ref /= np.linalg.norm(ref, axis=1, keepdims=True)
    np.testing.assert_allclose(g, ref, rtol=0, atol=1e-12)


# ----------------------------------------------------------------------------- errors


@pytest.mark.parametrize("specs, tilt", [
    ([(0, 0), (0, 60), (180, 30), (180, -40), (0, -70)], "90.0"),  # the median plane (vertical)
    ([(0, 5), (90, 0), (180, -5), (-90, 0)], "5.0"),  # a ring tilted 5 deg forward
])
def test_coplanar_3d_layout_is_a_config_error(specs, tilt):
    layout = make_layout(specs, name="flat", path=Path("/shows/dome.json"))
    ctx = PanningContext(layout)
    with pytest.raises(ConfigError) as err:
        ctx.check("vbap")
    assert err.value.where == "dome.json"
    assert err.value.message.startswith('panner "vbap": all speakers lie in one plane through the listener')
    assert f"tilted {tilt} deg" in err.value.message
    ctx.check("dbap")  # dbap serves any layout


def test_duplicate_directions_are_rejected_clearly():
    # same direction, different distance (a near and a far speaker)
    specs = [(0, 0, 2.0), (0, 0, 4.0), (120, 0), (-120, 0), (0, 60)]
    with pytest.raises(ConfigError, match='"S1" and "S2" lie in the same direction'):
        PanningContext(make_layout(specs)).check("vbap")
    with pytest.raises(ConfigError, match="same azimuth"):
        PanningContext(make_layout([(30, 0, 2.0), (30, 0, 3.0), (-30, 0)])).check("vbap")  # 2-D too


def test_speaker_at_the_listener_is_rejected_for_direction_panners():
    specs = [{"az": 0, "dist": 0.0}, (120, 0), (-120, 0)]
    with pytest.raises(ConfigError, match="listener position"):
        PanningContext(make_layout(specs)).check("vbap")
    with pytest.raises(ConfigError, match="needs at least 2"):
        PanningContext(make_layout([(0, 0)])).check("vbap")
