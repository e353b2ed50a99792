"""ShowState: commands, the composed target matrix, and the cached pan rows."""

from __future__ import annotations

import numpy as np
import pytest

from conftest import REPO


@pytest.fixture
def show():
    from fieldmix.show import load_show

    return load_show(REPO / "configs" / "shows" / "harbour.json")


def _cmds(state, address, *args):
    from fieldmix.control import parse_message
    from fieldmix.live.core import osc_match

    return parse_message(address, list(args), state.source_ids, match=osc_match if any(c in address for c in "*?[{") else None)


def test_target_composes_pan_gain_mute_trim_master(show):
    from fieldmix.geometry import db_to_gain
    from fieldmix.state import ShowState

    st = ShowState(show)
    pan = st.pan_matrix()
    st.apply_all(_cmds(st, "/source/buoy/gain", -6))
    st.apply_all(_cmds(st, "/master/gain", -12))
    G = st.target_matrix().astype(np.float64)
    lay = st.layout
    main = list(lay.main_indices)
    trims = np.array([db_to_gain(lay.speakers[i].trim_db) for i in main])
    expect = pan[0, main] * db_to_gain(-6) * trims * db_to_gain(-12)
    assert np.allclose(G[0, main], expect, rtol=1e-6)
    # the sub bus: the engine source's send (-6 dB) times master; others send nothing
    assert G.shape[1] == len(lay.speakers) + 1
    assert G[2, -1] == pytest.approx(db_to_gain(-6) * db_to_gain(-12), rel=1e-6)
    assert G[0, -1] == 0.0
    st.apply_all(_cmds(st, "/source/buoy/mute", 1))
    assert not st.target_matrix()[0].any()
    st.apply_all(_cmds(st, "/master/mute", 1))
    assert not st.target_matrix().any()


def test_solo_in_place_silences_the_others_and_keeps_positions(show):
    """Solo (our definition, docs/control-script.md): while any source is soloed, only the
    soloed ones sound, with their own gains, positions and sub sends; mute still wins."""
    from fieldmix.state import ShowState

    st = ShowState(show)
    before = st.target_matrix().copy()
    st.apply_all(_cmds(st, "/source/engine/solo", 1))
    G = st.target_matrix()
    assert np.array_equal(G[2], before[2])  # the soloed source, unchanged (sub bus column too)
    assert not np.delete(G, 2, axis=0).any()  # everyone else silent, sub sends included
    st.apply_all(_cmds(st, "/source/{buoy,engine}/solo", 1))
    G = st.target_matrix()
    assert np.array_equal(G[[0, 2]], before[[0, 2]]) and not G[[1, 3]].any()
    st.apply_all(_cmds(st, "/source/buoy/mute", 1))  # a muted soloed source stays muted
    assert not st.target_matrix()[0].any()
    st.apply_all(_cmds(st, "/source/*/solo", 0))
    st.apply_all(_cmds(st, "/source/buoy/mute", 0))
    assert np.array_equal(st.target_matrix(), before)
    assert [s.to_dict()["solo"] for s in st.sources] == [False] * 4


def test_cached_rows_match_a_full_recompute(show):
    """Random moves: the incrementally updated pan matrix equals one computed from scratch."""
    from fieldmix.state import ShowState

    rng = np.random.default_rng(5)
    st = ShowState(show)
    for k in range(200):
        i = int(rng.integers(len(st.sources))) + 1
        kind = rng.integers(4)
        if kind == 0:
            st.apply_all(_cmds(st, f"/source/{i}/azimuth", float(rng.uniform(-180, 180))))
        elif kind == 1:
            st.apply_all(_cmds(st, f"/source/{i}/position", float(rng.uniform(-5, 5)), float(rng.uniform(-5, 5))))
        elif kind == 2:
            st.apply_all(_cmds(st, f"/source/{i}/spread", float(rng.uniform(0, 360))))
        else:
            st.apply_all(_cmds(st, f"/source/{i}/gain", float(rng.uniform(-20, 0))))
        if k % 7 == 0:
            st.pan_matrix()
    fresh = ShowState(show)
    for a, b in zip(fresh.sources, st.sources):
        a.position, a.spread, a.gain_db = b.position.copy(), b.spread, b.gain_db
    assert np.allclose(st.pan_matrix(), fresh.pan_matrix(), atol=1e-12)
    assert np.allclose(st.target_matrix(), fresh.target_matrix(), atol=1e-7)


def test_set_layout_refuses_a_layout_the_panners_cannot_serve_and_keeps_the_old(show, tmp_path):
    import json

    from fieldmix.errors import ConfigError
    from fieldmix.layout import load_layout
    from fieldmix.state import ShowState

    st = ShowState(show)
    before = st.target_matrix()
    bad = tmp_path / "up.json"
    bad.write_text(json.dumps({"panner": "pairwise", "speakers": [
        {"output": 1, "azimuth": 30, "elevation": 50, "distance": 2},
        {"output": 2, "azimuth": -30, "elevation": 50, "distance": 2}]}))
    with pytest.raises(ConfigError):
        st.set_layout(load_layout(bad))
    assert st.layout.name == "ring8"
    assert np.array_equal(st.target_matrix(), before)


def test_azimuth_keeps_distance_and_position_keeps_height(show):
    from fieldmix.state import ShowState

    st = ShowState(show)
    st.apply_all(_cmds(st, "/source/buoy/elevation", 20))
    az, el, d = st.sources[0].spherical
    st.apply_all(_cmds(st, "/source/buoy/azimuth", -90))
    az2, el2, d2 = st.sources[0].spherical
    assert az2 == pytest.approx(-90) and el2 == pytest.approx(20) and d2 == pytest.approx(d)
    z = st.sources[0].position[2]
    st.apply_all(_cmds(st, "/source/buoy/position", 1.0, 2.0))
    assert st.sources[0].position.tolist() == pytest.approx([1.0, 2.0, z])


def test_scalar_and_vector_conversions_agree():
    """The control path's scalar conversions equal the vectorised ones (one convention)."""
    from fieldmix import geometry

    rng = np.random.default_rng(2)
    for az, el, d in zip(rng.uniform(-180, 180, 200), rng.uniform(-90, 90, 200), rng.uniform(0, 50, 200)):
        v = geometry.sph_to_cart(az, el, d)
        s = geometry.sph_to_xyz(az, el, d)
        assert np.allclose(v, s, atol=1e-12)
        a1 = [float(t) for t in geometry.cart_to_sph(v)]
        a2 = geometry.xyz_to_sph(*s)
        assert np.allclose(a1, a2, atol=1e-9)
