"""Cue lists: parsing and places of errors, fades (timing, shapes, arcs), overlapping
cues, chains, stop, back, standby, status, recording and atomic writing.

Every runner test drives a real ShowState loaded from a show file written to tmp_path
(the ring8 layout copied next to it) and applies the runner's Commands to it.
"""

from __future__ import annotations

import json
import re
import shutil
import struct

import numpy as np
import pytest

from conftest import REPO
from fieldmix import geometry
from fieldmix.control import command_to_message, parse_message
from fieldmix.cues import (
    PATHS,
    SHAPES,
    CueRunner,
    arc_delta,
    parse_cues,
    record_cue,
    write_show_atomically,
)
from fieldmix.errors import ConfigError, ControlError
from fieldmix.jsonload import load_schema, parse_json_text
from fieldmix.show import load_show
from fieldmix.state import ShowState

RING8 = REPO / "configs" / "layouts" / "ring8.json"
WHERE = "show.json: cues"

SOURCES = [
    {"id": "buoy", "input": 1, "azimuth": 60, "distance": 3.0},
    {"id": "surf", "input": 2, "azimuth": 180, "distance": 2.5, "spread": 90, "gain_db": -2},
    {"id": "gulls", "input": 3, "position": [1.0, 2.0, 0.5], "mute": True},
    {"id": "engine", "input": 4, "azimuth": -90, "distance": 4.0},
]
BUOY, SURF, GULLS, ENGINE = range(4)
IDS = [s["id"] for s in SOURCES]


def show_dict(cues=None) -> dict:
    d = {"name": "cue test", "layout": "layouts/ring8.json", "master_gain_db": -6, "sources": SOURCES}
    if cues is not None:
        d["cues"] = cues
    return d


@pytest.fixture
def folder(tmp_path):
    (tmp_path / "layouts").mkdir()
    shutil.copy(RING8, tmp_path / "layouts" / "ring8.json")
    return tmp_path


@pytest.fixture
def state(folder):
    p = folder / "show.json"
    p.write_text(json.dumps(show_dict()), encoding="utf-8")
    return ShowState(load_show(p))


def runner(state, cues) -> CueRunner:
    return CueRunner(parse_cues(cues, WHERE, state.source_ids))


def step(r: CueRunner, st: ShowState, t: float) -> list:
    cmds = r.tick(t, st)
    st.apply_all(cmds)
    return cmds


def sph(st, i):
    return st.sources[i].spherical


def gain_cmds(cmds, i):
    return [c.value[0] for c in cmds if c.target == "source" and c.source == i and c.param == "gain"]


# =============================================================================== parsing


def test_numbers_sort_numerically_and_text_equals_number(state):
    cl = parse_cues(
        [{"number": 10}, {"number": "2.5"}, {"number": 1}, {"number": 2}], WHERE, state.source_ids
    )
    assert [c.label for c in cl] == ["1", "2", "2.5", "10"]  # numeric, not text order
    assert cl.numbers == (1.0, 2.0, 2.5, 10.0)
    assert cl.index_of("2.5") == cl.index_of(2.5) == 2
    assert cl.index_of("10") == cl.index_of(10) == 3
    assert [c.place for c in cl] == [2, 3, 1, 0]  # places in the file are kept for messages
    with pytest.raises(ConfigError) as exc:
        parse_cues([{"number": 1}, {"number": "2.5"}, {"number": 2.5}], WHERE, state.source_ids)
    assert exc.value.where == "show.json: cues[2].number"
    assert "duplicate cue number 2.5" in exc.value.message and "cues[1].number" in exc.value.message


def test_a_number_sent_as_osc_float32_still_finds_its_cue(state):
    cl = parse_cues([{"number": 12.3}, {"number": 12.4}], WHERE, state.source_ids)
    f32 = struct.unpack("<f", struct.pack("<f", 12.3))[0]
    assert f32 != 12.3  # the premise: single precision changes the number
    assert cl.index_of(f32) == 0
    with pytest.raises(ControlError) as exc:
        cl.index_of(7)
    assert exc.value.reason == "out_of_range" and "no cue 7" in exc.value.message and "12.3 .. 12.4" in exc.value.message
    for bad, reason in ((True, "bad_type"), ("twelve", "bad_type"), (float("nan"), "not_finite"), (-1, "out_of_range")):
        with pytest.raises(ControlError) as exc:
            cl.index_of(bad)
        assert exc.value.reason == reason


def test_defaults_and_target_resolution(state):
    cl = parse_cues(
        [{"number": 1, "targets": {"3": {"gain_db": -3}, "buoy": {"azimuth": 370}, "surf": {"azimuth": -190}}}],
        WHERE,
        state.source_ids,
    )
    cue = cl[0]
    assert (cue.name, cue.fade, cue.shape, cue.wait, cue.chain, cue.master_gain_db) == ("", 0.0, "linear", 0.0, False, None)
    assert [t.id for t in cue.sources] == ["buoy", "surf", "gulls"]  # in source order; "3" = the third
    assert cue.sources[0].azimuth == pytest.approx(10.0)  # wrapped to (-180, 180]
    assert cue.sources[1].azimuth == pytest.approx(170.0)
    assert cue.sources[2].gain_db == -3.0 and cue.sources[2].azimuth is None
    assert parse_cues(None, WHERE, state.source_ids).cues == ()


def _one(target_key="buoy", **target):
    return [{"number": 1, "targets": {target_key: target}}]


# (name, cue list, expected place, substring of the message, the schema sees it too)
BROKEN = [
    ("not a list", {"number": 1}, "show.json: cues", "expected a list of cues", True),
    ("cue not object", [5], "show.json: cues[0]", "expected a cue", True),
    ("no number", [{"name": "x"}], "show.json: cues[0]", 'missing required key "number"', True),
    ("number text", [{"number": "12a"}], "show.json: cues[0].number", "not a cue number", True),
    ("number negative", [{"number": -1}], "show.json: cues[0].number", "negative", True),
    ("number bool", [{"number": True}], "show.json: cues[0].number", "true/false", True),
    ("number huge", [{"number": 1e7}], "show.json: cues[0].number", "too large", True),
    ("duplicate number", [{"number": 2}, {"number": "2.0"}], "show.json: cues[1].number", "duplicate cue number 2", False),
    ("fade negative", [{"number": 1, "fade": -0.5}], "show.json: cues[0].fade", "negative", True),
    ("fade nan", [{"number": 1, "fade": float("nan")}], "show.json: cues[0].fade", "finite", False),
    ("fade inf", [{"number": 1, "fade": float("inf")}], "show.json: cues[0].fade", "finite", False),
    ("fade text", [{"number": 1, "fade": "3s"}], "show.json: cues[0].fade", "expected a time in seconds", True),
    ("wait too long", [{"number": 1, "wait": 1e6}], "show.json: cues[0].wait", "too long", True),
    ("shape unknown", [{"number": 1, "shape": "s-curve"}], "show.json: cues[0].shape", 'did you mean "s_curve"', True),
    ("chain text", [{"number": 1, "chain": "yes"}], "show.json: cues[0].chain", "expected true or false", True),
    ("unknown cue key", [{"number": 1, "fdae": 2}], "show.json: cues[0].fdae", 'unknown key "fdae" (did you mean "fade"?)', True),
    ("name number", [{"number": 1, "name": 7}], "show.json: cues[0].name", "expected a string", True),
    ("targets list", [{"number": 1, "targets": []}], "show.json: cues[0].targets", "expected an object", True),
    ("unknown source", _one("boy", gain_db=0), "show.json: cues[0].targets.boy", 'unknown source "boy" (did you mean "buoy"?)', False),
    ("source number", _one("9", gain_db=0), 'show.json: cues[0].targets["9"]', "no source number 9: the show has 4 sources", False),
    ("source twice", [{"number": 1, "targets": {"buoy": {"mute": True}, "1": {"gain_db": 0}}}],
     'show.json: cues[0].targets["1"]', 'source "buoy" is given twice', False),
    ("target not object", [{"number": 1, "targets": {"buoy": 3}}], "show.json: cues[0].targets.buoy",
     "expected an object of source values", True),
    ("target empty", _one(), "show.json: cues[0].targets.buoy", "names no value", True),
    ("target key", _one(azimut=10), "show.json: cues[0].targets.buoy.azimut", 'did you mean "azimuth"', True),
    ("azimuth text", _one(azimuth="left"), "show.json: cues[0].targets.buoy.azimuth", 'got "left"', True),
    ("azimuth nan", _one(azimuth=float("nan")), "show.json: cues[0].targets.buoy.azimuth", "finite", False),
    ("elevation high", _one(elevation=91), "show.json: cues[0].targets.buoy.elevation", "from -90 to 90", True),
    ("distance negative", _one(distance=-1), "show.json: cues[0].targets.buoy.distance", "from 0 to 1000 m", True),
    ("distance far", _one(distance=1001), "show.json: cues[0].targets.buoy.distance", "out of range", True),
    ("position length", _one(position=[1, 2, 3, 4]), "show.json: cues[0].targets.buoy.position", "2 or 3 coordinates", True),
    ("position far", _one(position=[0, 2000]), "show.json: cues[0].targets.buoy.position[1]", "from -1000 to 1000 m", True),
    ("position bool", _one(position=[0, True]), "show.json: cues[0].targets.buoy.position[1]", "true/false", True),
    ("both forms", _one(position=[1, 1], distance=2), "show.json: cues[0].targets.buoy", "both position forms", True),
    ("path alone", _one(path="left", gain_db=0), "show.json: cues[0].targets.buoy.path", 'needs "azimuth"', True),
    ("path unknown", _one(azimuth=10, path="up"), "show.json: cues[0].targets.buoy.path", 'not one of "short", "left" or "right"', True),
    ("gain high", _one(gain_db=30), "show.json: cues[0].targets.buoy.gain_db", "from -120 to 24 dB", True),
    ("mute number", _one(mute=1), "show.json: cues[0].targets.buoy.mute", "expected true or false", True),
    ("spread wide", _one(spread=400), "show.json: cues[0].targets.buoy.spread", "from 0 to 360 degrees", True),
    ("motion number", _one(motion=3), "show.json: cues[0].targets.buoy.motion", "expected an object", True),
    ("motion and move", _one(motion={}, azimuth=10), "show.json: cues[0].targets.buoy.motion", '"motion" and "azimuth"', True),
    ("master high", [{"number": 1, "master": {"gain_db": 13}}], "show.json: cues[0].master.gain_db", "from -120 to 12 dB", True),
    ("master key", [{"number": 1, "master": {"mute": True}}], "show.json: cues[0].master.mute", 'unknown key "mute"', True),
    ("fourth cue", [{"number": 1}, {"number": 2}, {"number": 3}, {"number": 4, "targets": {"buoy": {"azimuth": None}}}],
     "show.json: cues[3].targets.buoy.azimuth", "expected an angle in degrees, got null", True),
]


@pytest.mark.parametrize("name,cues,where,expect,by_schema", BROKEN, ids=[b[0] for b in BROKEN])
def test_broken_cue_lists_name_the_place(state, name, cues, where, expect, by_schema):
    with pytest.raises(ConfigError) as exc:
        parse_cues(cues, WHERE, state.source_ids)
    assert exc.value.where == where
    assert expect in exc.value.message
    assert "\n" not in str(exc.value)
    if by_schema:  # the schema fragment refuses what it can express, too
        from jsonschema import Draft202012Validator

        assert not Draft202012Validator(load_schema("cues")).is_valid(cues)


def test_nan_literals_and_duplicate_keys_from_a_file_are_placed_below_the_list(state):
    data = parse_json_text('[{"number": 1}, {"number": 2, "fade": NaN}]', "show.json")
    with pytest.raises(ConfigError) as exc:
        parse_cues(data, WHERE, state.source_ids)
    assert exc.value.where == "show.json: cues[1].fade" and "NaN" in exc.value.message
    data = parse_json_text('[{"number": 1, "targets": {"buoy": {"mute": true, "mute": false}}}]', "show.json")
    with pytest.raises(ConfigError) as exc:
        parse_cues(data, WHERE, state.source_ids)
    assert exc.value.where == "show.json: cues[0].targets.buoy" and 'duplicate key "mute"' in exc.value.message


def _docs_example() -> dict:
    text = (REPO / "docs" / "cues.md").read_text(encoding="utf-8")
    block = re.search(r"```json\n(.*?)```", text, re.S).group(1)
    return json.loads(block)


def test_schema_accepts_valid_lists_and_the_docs_example_loads(folder):
    from jsonschema import Draft202012Validator

    schema = load_schema("cues")
    Draft202012Validator.check_schema(schema)
    v = Draft202012Validator(schema)
    example = _docs_example()
    assert v.is_valid(example["cues"])
    (folder / "shows").mkdir()
    p = folder / "shows" / "keeper.json"
    p.write_text(json.dumps(example), encoding="utf-8")
    show = load_show(p)  # the docs' example is a show file that loads
    cl = parse_cues(show.raw["cues"], "keeper.json: cues", show.source_ids)
    assert [c.label for c in cl] == ["1", "2", "2.5", "3", "4", "10"]
    assert cl[2].chain and cl[3].wait == 2.0 and cl[5].master_gain_db == -20.0
    for cues in (
        [{"number": "0.5", "name": "preset", "notes": "", "fade": 1, "shape": "ease_out", "wait": 0, "chain": False,
          "targets": {"buoy": {"azimuth": 10, "elevation": 5, "distance": 2, "path": "left", "gain_db": -3, "mute": False,
                               "spread": 30}, "2": {"position": [1, 2]}, "gulls": {"motion": None}},
          "master": {"gain_db": -3}}],
        [],
    ):
        assert v.is_valid(cues)
        parse_cues(cues, WHERE, IDS)


# =============================================================================== shapes


def test_shapes_end_points_symmetry_and_slopes():
    # f(0) = 0, f(1) = 1, monotonic; s_curve symmetric with zero slope at both ends.
    # The shapes are the plain polynomials docs/cues.md gives (common practice, no source).
    p = np.linspace(0.0, 1.0, 201)
    for name, f in SHAPES.items():
        v = np.array([f(x) for x in p])
        assert v[0] == 0.0 and v[-1] == 1.0, name
        assert np.all(np.diff(v) >= 0), name
    s = SHAPES["s_curve"]
    for x in p:
        assert s(x) + s(1.0 - x) == pytest.approx(1.0, abs=1e-12)
    h = 1e-6
    assert (s(h) - s(0.0)) / h < 1e-5  # slope 0 at the start
    assert (s(1.0) - s(1.0 - h)) / h < 1e-5  # and at the end
    assert (s(0.5 + h) - s(0.5 - h)) / (2 * h) == pytest.approx(1.5, rel=1e-6)  # fastest in the middle
    assert (SHAPES["ease_in"](h)) / h < 1e-5 and (1 - SHAPES["ease_in"](1 - h)) / h == pytest.approx(2.0, rel=1e-5)
    assert SHAPES["ease_out"](h) / h == pytest.approx(2.0, rel=1e-5) and (1 - SHAPES["ease_out"](1 - h)) / h < 1e-5
    assert SHAPES["linear"](0.3) == 0.3


def test_arc_delta_directions():
    assert arc_delta(170, -170, "short") == pytest.approx(20.0)
    assert arc_delta(170, -170, "left") == pytest.approx(20.0)
    assert arc_delta(170, -170, "right") == pytest.approx(-340.0)
    assert arc_delta(-170, 170, "short") == pytest.approx(-20.0)
    assert arc_delta(-170, 170, "left") == pytest.approx(340.0)
    assert arc_delta(0, 180, "short") == 180.0  # half a turn goes left
    for path in PATHS:
        assert arc_delta(33.0, 33.0, path) == 0.0  # never a full turn
    with pytest.raises(ValueError):
        arc_delta(0, 10, "up")


# =============================================================================== fades


def test_linear_gain_fade_start_middle_end(state):
    r = runner(state, [{"number": 1, "fade": 4, "targets": {"buoy": {"gain_db": -20}}}])
    assert r.go(100.0, state).label == "1"
    assert gain_cmds(step(r, state, 100.0), BUOY) == []  # nothing moved yet: nothing sent
    assert gain_cmds(step(r, state, 101.0), BUOY) == [pytest.approx(-5.0)]
    step(r, state, 102.0)
    assert state.sources[BUOY].gain_db == pytest.approx(-10.0)
    step(r, state, 103.999)
    assert state.sources[BUOY].gain_db == pytest.approx(-19.995)  # 3.999 / 4 of -20
    assert gain_cmds(step(r, state, 104.0), BUOY) == [-20.0]  # exactly the target, exactly on time
    assert step(r, state, 105.0) == []  # done: nothing more
    assert r.status(105.0)["running"] == []


def test_s_curve_fade_is_gentle_at_the_ends_and_symmetric(state):
    r = runner(state, [{"number": 1, "fade": 10, "shape": "s_curve", "targets": {"buoy": {"gain_db": -20}}}])
    r.go(0.0, state)
    step(r, state, 0.1)  # 1% of the fade
    early = state.sources[BUOY].gain_db
    assert -20 * 0.001 < early < 0.0  # a linear fade would be at -0.2 dB by now
    step(r, state, 5.0)
    assert state.sources[BUOY].gain_db == pytest.approx(-10.0)
    step(r, state, 9.9)
    late = state.sources[BUOY].gain_db
    assert late - (-20.0) == pytest.approx(0.0 - early)  # mirror image of the start
    step(r, state, 10.0)
    assert state.sources[BUOY].gain_db == -20.0


def test_a_fade_ends_exactly_even_when_ticked_late(state):
    r = runner(
        state,
        [{"number": 1, "fade": 2, "shape": "s_curve",
          "targets": {"buoy": {"azimuth": -100, "elevation": 20, "distance": 4.5},
                      "gulls": {"position": [-15.99, -15.97, 1.5]},
                      "surf": {"spread": 200, "gain_db": -0.93}}, "master": {"gain_db": -1.97}}],
    )
    # the premise: interpolating all the way (start + (end - start) * 1.0) misses these
    # targets by a rounding step, so only returning the target itself passes
    assert -2.0 + (-0.93 + 2.0) != -0.93 and -6.0 + (-1.97 + 6.0) != -1.97 and 1.0 + (-15.99 - 1.0) != -15.99
    r.go(5.0, state)
    step(r, state, 5.7)
    step(r, state, 9.37)  # the control loop hiccupped: the fade is over
    assert tuple(state.sources[BUOY].position) == geometry.sph_to_xyz(-100.0, 20.0, 4.5)
    assert tuple(state.sources[GULLS].position) == (-15.99, -15.97, 1.5)
    assert state.sources[SURF].spread == 200.0 and state.sources[SURF].gain_db == -0.93
    assert state.master_gain_db == -1.97


def test_short_arc_from_170_to_minus_170_passes_behind(state):
    r = runner(state, [
        {"number": 1, "targets": {"buoy": {"azimuth": 170}}},
        {"number": 2, "fade": 2, "targets": {"buoy": {"azimuth": -170}}},
    ])
    r.go(0.0, state)
    step(r, state, 0.0)
    assert sph(state, BUOY)[0] == pytest.approx(170.0)
    r.go(1.0, state)
    step(r, state, 1.5)
    assert sph(state, BUOY)[0] == pytest.approx(175.0)
    step(r, state, 2.0)
    assert abs(sph(state, BUOY)[0]) == pytest.approx(180.0)  # straight behind, not through the front
    step(r, state, 2.5)
    assert sph(state, BUOY)[0] == pytest.approx(-175.0)
    step(r, state, 3.0)
    assert sph(state, BUOY)[0] == pytest.approx(-170.0)
    assert sph(state, BUOY)[2] == pytest.approx(3.0)  # distance kept all the way


def test_right_path_from_170_to_minus_170_passes_in_front(state):
    r = runner(state, [
        {"number": 1, "targets": {"buoy": {"azimuth": 170}}},
        {"number": 2, "fade": 4, "targets": {"buoy": {"azimuth": -170, "path": "right"}}},
    ])
    r.go(0.0, state)
    r.go(0.0, state)
    step(r, state, 1.0)
    assert sph(state, BUOY)[0] == pytest.approx(170.0 - 85.0)  # azimuth decreasing
    step(r, state, 2.0)
    assert sph(state, BUOY)[0] == pytest.approx(0.0, abs=1e-9)  # through the front
    step(r, state, 4.0)
    assert sph(state, BUOY)[0] == pytest.approx(-170.0)


def test_left_means_azimuth_increasing_which_is_the_listeners_left(state):
    # Convention (ITU-R BS.2051, DEVELOPERS.md): azimuth + = left, x = right; so a source
    # halfway along a left turn from the front is on the negative-x side.
    r = runner(state, [
        {"number": 1, "targets": {"engine": {"azimuth": 0}}},
        {"number": 2, "fade": 2, "targets": {"engine": {"azimuth": 180, "path": "left"}}},
        {"number": 3, "targets": {"engine": {"azimuth": 0}}},
        {"number": 4, "fade": 2, "targets": {"engine": {"azimuth": 180, "path": "right"}}},
        {"number": 5, "targets": {"engine": {"azimuth": -170}}},
        {"number": 6, "fade": 2, "targets": {"engine": {"azimuth": 170, "path": "left"}}},
    ])
    r.go(0.0, state)
    r.go(0.0, state)
    step(r, state, 1.0)
    assert sph(state, ENGINE)[0] == pytest.approx(90.0)
    assert state.sources[ENGINE].position[0] == pytest.approx(-4.0)  # on the left
    step(r, state, 2.0)
    r.go(3.0, state)
    r.go(3.0, state)
    step(r, state, 4.0)
    assert sph(state, ENGINE)[0] == pytest.approx(-90.0)
    assert state.sources[ENGINE].position[0] == pytest.approx(4.0)  # on the right
    step(r, state, 5.0)
    r.go(6.0, state)
    r.go(6.0, state)
    step(r, state, 6.5)
    assert sph(state, ENGINE)[0] == pytest.approx(-170.0 + 85.0)  # the long way, increasing
    step(r, state, 7.0)
    assert sph(state, ENGINE)[0] == pytest.approx(0.0, abs=1e-9)


def test_elevation_and_distance_move_linearly(state):
    r = runner(state, [{"number": 1, "fade": 2, "targets": {"buoy": {"elevation": 30, "distance": 5}}}])
    r.go(0.0, state)
    step(r, state, 1.0)
    az, el, d = sph(state, BUOY)
    assert (az, el, d) == (pytest.approx(60.0), pytest.approx(15.0), pytest.approx(4.0))
    step(r, state, 2.0)
    assert sph(state, BUOY) == (pytest.approx(60.0), pytest.approx(30.0), pytest.approx(5.0))


def test_cartesian_targets_move_in_a_straight_line_and_xy_keeps_height(state):
    r = runner(state, [{"number": 1, "fade": 4, "shape": "ease_in", "targets": {"gulls": {"position": [3.0, -2.0]}}}])
    r.go(0.0, state)
    a = np.array([1.0, 2.0, 0.5])
    b = np.array([3.0, -2.0, 0.5])
    for t in (0.5, 1.3, 2.0, 3.1):
        step(r, state, t)
        p = state.sources[GULLS].position
        k = (t / 4.0) ** 2  # ease_in
        assert np.allclose(p, a + (b - a) * k, atol=1e-12)
    step(r, state, 4.0)
    assert tuple(state.sources[GULLS].position) == (3.0, -2.0, 0.5)


def test_unmute_at_the_start_mute_at_the_end(state):
    r = runner(state, [{"number": 1, "fade": 2,
                        "targets": {"gulls": {"mute": False, "gain_db": -10}, "buoy": {"mute": True, "gain_db": -30}}}])
    assert state.sources[GULLS].mute and not state.sources[BUOY].mute
    r.go(0.0, state)
    step(r, state, 0.0)
    assert not state.sources[GULLS].mute  # unmuted as the fade starts
    assert not state.sources[BUOY].mute
    step(r, state, 1.99)
    assert not state.sources[BUOY].mute  # the fade-down is heard
    step(r, state, 2.0)
    assert state.sources[BUOY].mute  # muted as the fade ends
    assert state.sources[BUOY].gain_db == -30.0


def test_spread_and_master_fade_linearly(state):
    r = runner(state, [{"number": 1, "fade": 3, "targets": {"surf": {"spread": 360}}, "master": {"gain_db": 0}}])
    r.go(0.0, state)
    step(r, state, 1.0)
    assert state.sources[SURF].spread == pytest.approx(90 + 270 / 3)
    assert state.master_gain_db == pytest.approx(-6 + 6 / 3)
    step(r, state, 3.0)
    assert state.sources[SURF].spread == 360.0 and state.master_gain_db == 0.0


# =============================================================================== overlaps


def test_a_cue_fired_mid_fade_starts_from_the_current_values(state):
    r = runner(state, [
        {"number": 1, "fade": 4, "targets": {"buoy": {"gain_db": -20, "azimuth": -60}}},
        {"number": 2, "fade": 2, "targets": {"buoy": {"gain_db": 0, "azimuth": 90}}},
    ])
    r.go(0.0, state)
    step(r, state, 2.0)
    g_before = state.sources[BUOY].gain_db
    p_before = state.sources[BUOY].position.copy()
    assert g_before == pytest.approx(-10.0) and sph(state, BUOY)[0] == pytest.approx(0.0, abs=1e-9)
    r.go(2.0, state)
    step(r, state, 2.0)
    assert state.sources[BUOY].gain_db == pytest.approx(g_before)  # no jump
    assert np.allclose(state.sources[BUOY].position, p_before, atol=1e-12)
    step(r, state, 2.001)
    assert state.sources[BUOY].gain_db == pytest.approx(-10.0 + 10 * 0.0005)
    step(r, state, 3.0)
    assert state.sources[BUOY].gain_db == pytest.approx(-5.0)
    assert sph(state, BUOY)[0] == pytest.approx(45.0)  # from 0 (where it was) towards 90
    step(r, state, 4.0)
    assert state.sources[BUOY].gain_db == 0.0 and sph(state, BUOY)[0] == pytest.approx(90.0)
    step(r, state, 5.0)  # cue 1's end time: it no longer owns anything
    assert state.sources[BUOY].gain_db == 0.0 and sph(state, BUOY)[0] == pytest.approx(90.0)


def test_values_a_new_cue_does_not_name_keep_fading(state):
    r = runner(state, [
        {"number": 1, "fade": 4, "targets": {"buoy": {"azimuth": -60, "gain_db": -20}}},
        {"number": 2, "fade": 2, "targets": {"buoy": {"distance": 5}, "surf": {"gain_db": -8}}},
    ])
    r.go(0.0, state)
    step(r, state, 1.0)
    r.go(1.0, state)
    step(r, state, 2.0)
    az, _, d = sph(state, BUOY)
    assert az == pytest.approx(0.0, abs=1e-9)  # cue 1's turn runs on: 60 -> -60 is halfway
    assert d == pytest.approx(4.0)  # cue 2's distance: 3 -> 5 is halfway
    assert state.sources[BUOY].gain_db == pytest.approx(-10.0)
    step(r, state, 3.0)
    assert sph(state, BUOY)[2] == pytest.approx(5.0)  # cue 2 is over
    assert sph(state, BUOY)[0] == pytest.approx(-30.0)  # cue 1 still turning
    step(r, state, 4.0)
    assert sph(state, BUOY)[0] == pytest.approx(-60.0) and sph(state, BUOY)[2] == pytest.approx(5.0)
    assert state.sources[BUOY].gain_db == -20.0


def test_a_spherical_cue_stops_a_straight_move_where_it_is(state):
    r = runner(state, [
        {"number": 1, "fade": 2, "targets": {"gulls": {"position": [-3.0, 2.0, 0.5]}}},
        {"number": 2, "fade": 2, "targets": {"gulls": {"distance": 5}}},
    ])
    r.go(0.0, state)
    step(r, state, 1.0)
    assert np.allclose(state.sources[GULLS].position, [-1.0, 2.0, 0.5])
    az1, el1, _ = sph(state, GULLS)
    r.go(1.0, state)
    step(r, state, 3.0)
    az, el, d = sph(state, GULLS)
    assert (az, el, d) == (pytest.approx(az1), pytest.approx(el1), pytest.approx(5.0))


def test_a_wait_leaves_the_earlier_fade_running_until_the_fade_starts(state):
    r = runner(state, [
        {"number": 1, "fade": 4, "targets": {"buoy": {"gain_db": -20}}},
        {"number": 2, "wait": 1, "fade": 1, "targets": {"buoy": {"gain_db": 0}}},
    ])
    r.go(0.0, state)
    step(r, state, 1.0)
    r.go(1.0, state)
    st = r.status()
    assert [(e["cue"], e["state"]) for e in st["running"]] == [("1", "fading"), ("2", "waiting")]
    assert st["running"][1]["starts_in"] == pytest.approx(1.0)
    step(r, state, 1.5)
    assert state.sources[BUOY].gain_db == pytest.approx(-7.5)  # still cue 1's fade
    step(r, state, 2.5)
    assert state.sources[BUOY].gain_db == pytest.approx(-5.0)  # cue 2 from -10 (at 2.0) towards 0
    step(r, state, 3.0)
    assert state.sources[BUOY].gain_db == 0.0


# =============================================================================== chains


def test_chain_starts_the_next_cue_when_the_fade_ends_plus_its_wait(state):
    r = runner(state, [
        {"number": 1, "fade": 2, "chain": True, "targets": {"buoy": {"gain_db": -10}}},
        {"number": 2, "wait": 1, "fade": 2, "targets": {"buoy": {"gain_db": -30}}},
        {"number": 3, "targets": {"buoy": {"gain_db": 6}}},
    ])
    r.go(10.0, state)
    step(r, state, 11.0)
    assert r.status()["chain_in"] == pytest.approx(1.0)
    step(r, state, 12.0)
    assert state.sources[BUOY].gain_db == -10.0
    assert r.current.label == "2" and r.next.label == "3"  # the chain pressed GO at 12
    step(r, state, 12.7)
    assert state.sources[BUOY].gain_db == -10.0  # cue 2 waits its 1 s
    step(r, state, 13.5)  # 0.5 s into cue 2's fade
    assert state.sources[BUOY].gain_db == pytest.approx(-15.0)
    step(r, state, 15.0)
    assert state.sources[BUOY].gain_db == -30.0
    step(r, state, 20.0)
    assert r.current.label == "2"  # cue 2 does not chain: cue 3 waits for the operator
    assert state.sources[BUOY].gain_db == -30.0


def test_chain_keeps_its_schedule_when_ticks_are_late(state):
    r = runner(state, [
        {"number": 1, "fade": 2, "chain": True, "targets": {"buoy": {"gain_db": -10}}},
        {"number": 2, "fade": 4, "targets": {"buoy": {"gain_db": -30}}},
    ])
    r.go(0.0, state)
    step(r, state, 3.0)  # one late tick: cue 1 ended at 2, cue 2 started at 2 from -10
    assert state.sources[BUOY].gain_db == pytest.approx(-15.0)


def test_chained_snaps_all_run_in_one_tick(state):
    r = runner(state, [
        {"number": 1, "chain": True, "targets": {"buoy": {"gain_db": -1}}},
        {"number": 2, "chain": True, "targets": {"surf": {"gain_db": -2}}},
        {"number": 3, "chain": True, "targets": {"engine": {"gain_db": -3}}},
    ])
    r.go(0.0, state)
    step(r, state, 0.0)
    assert [state.sources[i].gain_db for i in (BUOY, SURF, ENGINE)] == [-1.0, -2.0, -3.0]
    assert r.current.label == "3" and r.next is None


def test_a_chain_is_dropped_when_the_operator_presses_go(state):
    r = runner(state, [
        {"number": 1, "fade": 2, "chain": True, "targets": {"buoy": {"gain_db": -10}}},
        {"number": 2, "targets": {"surf": {"gain_db": -20}}},
        {"number": 3, "targets": {"engine": {"gain_db": -30}}},
    ])
    r.go(0.0, state)
    step(r, state, 1.0)
    r.go(1.0, state)  # the operator fires 2 early
    step(r, state, 2.5)
    assert r.current.label == "2"
    assert state.sources[ENGINE].gain_db == 0.0  # cue 3 was not chained in
    assert state.sources[BUOY].gain_db == -10.0  # cue 1's fade still finished


# =============================================================================== stop, back, standby


def test_stop_freezes_fades_and_cancels_waits_and_chains(state):
    r = runner(state, [
        {"number": 1, "fade": 4, "chain": True, "targets": {"buoy": {"gain_db": -20, "azimuth": -60}}},
        {"number": 2, "targets": {"surf": {"gain_db": -40}}},
        {"number": 5, "wait": 2, "fade": 1, "targets": {"engine": {"gain_db": -12}}},
    ])
    r.go(0.0, state)
    r.go(0.5, state, number=5)
    step(r, state, 0.5)
    assert r.stop(1.0) == ["1", "5"]
    step(r, state, 1.2)
    assert state.sources[BUOY].gain_db == pytest.approx(-5.0)  # the value at 1.0, not 1.2
    assert sph(state, BUOY)[0] == pytest.approx(30.0)
    frozen = state.sources[BUOY].position.copy()
    for t in (2.0, 3.0, 5.0, 9.0):
        assert step(r, state, t) == []
    assert state.sources[BUOY].gain_db == pytest.approx(-5.0)
    assert np.array_equal(state.sources[BUOY].position, frozen)
    assert state.sources[ENGINE].gain_db == 0.0  # cue 5's wait was cancelled
    assert state.sources[SURF].gain_db == -2.0  # cue 1's chain was cancelled
    assert r.status()["running"] == [] and not r.busy


def test_go_right_after_stop_starts_from_the_frozen_values(state):
    r = runner(state, [
        {"number": 1, "fade": 4, "targets": {"buoy": {"gain_db": -20}}},
        {"number": 2, "fade": 1, "targets": {"buoy": {"gain_db": 0}}},
    ])
    r.go(0.0, state)
    step(r, state, 0.5)
    r.stop(1.0)
    r.go(1.0, state)  # before any tick carried the frozen value
    step(r, state, 1.5)
    assert state.sources[BUOY].gain_db == pytest.approx(-2.5)  # halfway from -5, not from -2.5 (0.5 s)


def test_back_undoes_the_current_cue_towards_the_previous_look(state):
    cues = [
        {"number": 1, "fade": 1, "targets": {"buoy": {"gain_db": -10, "azimuth": 90}}},
        {"number": 2, "fade": 2, "shape": "s_curve", "targets": {"buoy": {"gain_db": -20}, "surf": {"spread": 200},
                                                              "gulls": {"position": [0, 3]}}},
    ]
    r = runner(state, cues)
    r.go(0.0, state)
    step(r, state, 1.0)
    r.go(2.0, state)
    step(r, state, 4.0)
    assert state.sources[BUOY].gain_db == -20.0 and state.sources[SURF].spread == 200.0
    # a controller changes something cue 2 does not name: back must leave it
    state.apply_all(parse_message("/source/engine/gain", [-7], state.source_ids))
    back_to = r.back(5.0, state)
    assert back_to.label == "1" and r.current.label == "1" and r.next.label == "2"
    step(r, state, 6.0)  # halfway through cue 2's fade time, with its shape
    assert state.sources[BUOY].gain_db == pytest.approx(-15.0)
    assert r.status()["running"][0]["cue"] == "back to 1"
    step(r, state, 7.0)
    assert state.sources[BUOY].gain_db == -10.0  # cue 1's value
    assert state.sources[SURF].spread == 90.0  # the show's start value (cue 1 names no spread)
    assert np.allclose(state.sources[GULLS].position, [1.0, 2.0, 0.5])
    assert sph(state, BUOY)[0] == pytest.approx(90.0)  # cue 2 named no azimuth
    assert state.sources[ENGINE].gain_db == -7.0  # the hand-made change stays
    assert r.back(8.0, state) is None  # back from the first cue: to the show's start
    assert r.current is None and r.next.label == "1"
    step(r, state, 9.0)
    assert state.sources[BUOY].gain_db == 0.0 and sph(state, BUOY)[0] == pytest.approx(60.0)
    assert r.back(10.0, state) is None and step(r, state, 11.0) == []  # nothing before the start


def test_standby_and_go_by_number(state):
    r = runner(state, [{"number": n, "targets": {"buoy": {"gain_db": -n}}} for n in (1, 2, 2.5, 3, 4)])
    assert r.next.label == "1" and r.current is None
    assert r.standby("2.5").label == "2.5"
    assert r.go(0.0, state).label == "2.5"
    step(r, state, 0.0)
    assert state.sources[BUOY].gain_db == -2.5
    assert r.next.label == "3"
    assert r.go(1.0, state, number=1).label == "1" and r.next.label == "2"
    assert r.go(2.0, state, number="4").label == "4" and r.next is None
    assert r.go(3.0, state) is None  # end of the list: nothing to fire
    step(r, state, 3.0)
    assert state.sources[BUOY].gain_db == -4.0
    with pytest.raises(ControlError) as exc:
        r.standby(7)
    assert exc.value.reason == "out_of_range"
    with pytest.raises(ControlError):
        r.go(4.0, state, number=True)
    assert r.current.label == "4"  # a refused GO changes nothing


def test_empty_list_does_nothing(state):
    r = runner(state, [])
    assert r.go(0.0, state) is None and r.back(0.0, state) is None and r.stop(0.0) == []
    assert r.tick(1.0, state) == [] and r.status()["next"] is None


# =============================================================================== commands


def test_commands_are_valid_messages_and_only_sent_on_change(folder):
    show = load_show(REPO / "configs" / "shows" / "harbour.json")
    st = ShowState(show)
    r = CueRunner(parse_cues([
        {"number": 1, "fade": 1, "targets": {"buoy": {"azimuth": -30, "gain_db": -6, "mute": True, "spread": 40},
                                             "2": {"position": [0.5, -2]}, "gulls": {"gain_db": -3}},
         "master": {"gain_db": -9}},
    ], "harbour.json: cues", st.source_ids))
    r.go(0.0, st)
    seen = []
    for t in np.linspace(0.0, 1.5, 16):
        cmds = step(r, st, float(t))
        seen += cmds
        keys = [(c.target, c.source, c.param) for c in cmds]
        assert len(keys) == len(set(keys))  # one command per parameter per tick
    assert seen
    for c in seen:
        # what a cue emits is what the control grammar accepts, value for value
        address, args = command_to_message(c, st.source_ids)
        again = parse_message(address, list(args), st.source_ids)
        assert len(again) == 1 and again[0].param == c.param and again[0].source == c.source
        assert np.allclose(again[0].value, c.value)
        if c.param == "position":
            assert len(c.value) == 3 and all(isinstance(v, float) for v in c.value)
    assert not any(c.source == 3 for c in seen)  # gulls is already at -3 dB: never sent
    assert sum(1 for c in seen if c.param == "mute") == 1
    assert step(r, st, 1.5) == []  # a second tick at the same time sends nothing


def test_a_spherical_cue_sends_nothing_until_the_source_moves(state):
    # buoy starts at azimuth 60, 3 m; an angle round trip of its position is off by an ulp
    p = tuple(state.sources[BUOY].position)
    assert geometry.sph_to_xyz(*geometry.xyz_to_sph(*p)) != p  # the premise
    r = runner(state, [{"number": 1, "fade": 2, "targets": {"buoy": {"azimuth": 60, "distance": 3.0}}},
                       {"number": 2, "fade": 2, "targets": {"buoy": {"elevation": 10}}}])
    r.go(0.0, state)
    for t in (0.0, 0.5, 1.0, 2.0, 3.0):
        assert step(r, state, t) == []  # already there: no position is sent
    r.go(3.0, state)
    assert step(r, state, 3.0) == []  # the fade has not moved anything yet
    assert [c.param for c in step(r, state, 3.5)] == ["position"]


def test_status_is_json_and_reports_progress(state):
    r = runner(state, [
        {"number": 1, "name": "Dawn", "fade": 4, "targets": {"buoy": {"gain_db": -4}}},
        {"number": 2, "wait": 3, "targets": {"buoy": {"gain_db": 0}}},
    ])
    r.go(0.0, state)
    step(r, state, 1.0)
    st = r.status()
    json.dumps(st, allow_nan=False)
    assert st["current"]["label"] == "1" and st["current"]["name"] == "Dawn" and st["next"]["label"] == "2"
    assert st["running"][0]["progress"] == pytest.approx(0.25) and st["running"][0]["remaining"] == pytest.approx(3.0)
    assert r.status(3.0)["running"][0]["progress"] == pytest.approx(0.75)
    assert [c["label"] for c in st["cues"]] == ["1", "2"] and st["cues"][1]["wait"] == 3.0


def test_moves_and_motions_send_motion_requests(state):
    r = runner(state, [
        {"number": 1, "targets": {"buoy": {"azimuth": 10}, "surf": {"motion": None}, "engine": {"gain_db": -1}}},
    ])
    r.go(0.0, state)
    step(r, state, 0.0)
    reqs = r.take_motion_requests()
    assert [(q.source_id, q.motion) for q in reqs] == [("buoy", None), ("surf", None)]  # both: stop any motion
    assert r.take_motion_requests() == []


def test_motion_objects_are_checked_by_the_motion_module_and_routed(state):
    from fieldmix import motion

    r = runner(state, [
        {"number": 1, "targets": {"gulls": {"motion": {"kind": "orbit", "radius": 2, "period": 8}}}},
        {"number": 2, "fade": 1, "targets": {"gulls": {"gain_db": -6}}},
        {"number": 3, "fade": 1, "targets": {"gulls": {"azimuth": 0}}},
    ])
    r.go(2.0, state)
    (req,) = r.take_motion_requests()
    assert req.motion == motion.parse_motion({"kind": "orbit", "radius": 2, "period": 8}, "x")
    assert (req.source, req.source_id, req.cue, req.time) == (GULLS, "gulls", "1", 2.0)
    r.go(3.0, state)
    assert r.take_motion_requests() == []  # a gain cue lets the motion run on
    r.go(4.0, state)
    assert [(q.source, q.motion) for q in r.take_motion_requests()] == [(GULLS, None)]  # a move stops it
    r.back(5.0, state)  # back to cue 2's look, in which the orbit runs: restart it
    (again,) = r.take_motion_requests()
    assert again.motion == req.motion and again.cue == "back to 2"
    r.back(6.0, state)
    r.back(7.0, state)  # undoing cue 1: the look before it has no motion, so stop the orbit
    assert [(q.source, q.motion, q.cue) for q in r.take_motion_requests()] == [(GULLS, None, "back to the start")]
    with pytest.raises(ConfigError) as exc:
        parse_cues([{"number": 1, "targets": {"gulls": {"motion": {"kind": "orbit", "radius": -2, "period": 8}}}}],
                   WHERE, state.source_ids)
    assert exc.value.where == "show.json: cues[0].targets.gulls.motion.radius"


# =============================================================================== recording


def test_record_cue_stores_the_state_in_order_and_loads_back(folder, state):
    state.apply_all(parse_message("/source/buoy/azimuth", [-33.5], state.source_ids))
    state.apply_all(parse_message("/source/buoy/gain", [-4.25], state.source_ids))
    state.apply_all(parse_message("/source/surf/mute", [1], state.source_ids))
    state.apply_all(parse_message("/source/gulls/spread", [45], state.source_ids))
    state.apply_all(parse_message("/source/engine/position", [900, 900, 0], state.source_ids))  # 1273 m away
    state.apply_all(parse_message("/master/gain", [-9], state.source_ids))
    data = show_dict(cues=[{"number": 1, "name": "one"}, {"number": "10", "name": "ten", "fade": 7}])
    before = json.dumps(data)
    new = record_cue(data, "2.5", "Recorded", state)
    assert json.dumps(data) == before  # the input is not changed
    assert [c["number"] for c in new["cues"]] == [1, 2.5, "10"]
    cue = new["cues"][1]
    assert cue["name"] == "Recorded" and cue["fade"] == 3.0
    assert cue["targets"]["buoy"]["azimuth"] == pytest.approx(-33.5)
    assert cue["targets"]["engine"] == {"position": [900.0, 900.0, 0.0], "gain_db": 0.0, "mute": False, "spread": 0.0}
    assert cue["master"] == {"gain_db": -9.0}

    path = folder / "recorded.json"
    write_show_atomically(path, new)
    show = load_show(path)
    cl = parse_cues(show.raw["cues"], "recorded.json: cues", show.source_ids)
    assert [c.label for c in cl] == ["1", "2.5", "10"]

    # playing the recorded cue on a fresh state gives the recorded state back
    fresh = ShowState(show)
    r = CueRunner(cl)
    r.go(0.0, fresh, number=2.5)
    step(r, fresh, 3.0)
    for a, b in zip(state.sources, fresh.sources):
        assert np.allclose(a.position, b.position, atol=1e-5)
        assert (a.gain_db, a.mute, a.spread) == (b.gain_db, b.mute, b.spread)
    assert fresh.master_gain_db == -9.0


def test_recording_over_a_cue_replaces_it_and_keeps_its_timing(state):
    data = show_dict(cues=[{"number": 1}, {"number": "10", "name": "ten", "fade": 7, "wait": 1, "chain": True,
                                          "notes": "slow", "shape": "ease_out"}])
    new = record_cue(data, 10, None, state)
    assert len(new["cues"]) == 2
    cue = new["cues"][1]
    assert (cue["number"], cue["name"], cue["fade"], cue["wait"], cue["chain"], cue["notes"], cue["shape"]) == (
        10, "ten", 7, 1, True, "slow", "ease_out")
    assert set(cue["targets"]) == set(IDS)
    newer = record_cue(new, 10.0, "renamed", state, fade=2)
    assert newer["cues"][1]["name"] == "renamed" and newer["cues"][1]["fade"] == 2
    first = record_cue(show_dict(), 0.5, "first", state)
    assert [c["number"] for c in first["cues"]] == [0.5]
    for bad in ("x", -1, float("nan"), True):
        with pytest.raises(ControlError):
            record_cue(data, bad, None, state)
    with pytest.raises(ControlError):
        record_cue(data, 3, None, state, fade=-1)
    with pytest.raises(ConfigError) as exc:  # a broken list is never rewritten
        record_cue(show_dict(cues=[{"number": 1, "fade": -1}]), 2, None, state)
    assert exc.value.where == "cues[0].fade"


def test_write_show_atomically_replaces_and_refuses_what_json_cannot_hold(tmp_path):
    p = tmp_path / "show.json"
    write_show_atomically(p, {"a": 1})
    write_show_atomically(p, {"a": 2, "b": "ü"})
    assert json.loads(p.read_text(encoding="utf-8")) == {"a": 2, "b": "ü"}
    with pytest.raises(ConfigError) as exc:
        write_show_atomically(p, {"a": float("nan")})
    assert "show.json: a" in str(exc.value)
    assert json.loads(p.read_text(encoding="utf-8")) == {"a": 2, "b": "ü"}  # the old file is intact
    with pytest.raises(ConfigError):
        write_show_atomically(tmp_path / "missing" / "show.json", {"a": 1})
    assert sorted(x.name for x in tmp_path.iterdir()) == ["show.json"]  # no temp file left
