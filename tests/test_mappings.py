"""Sensor mappings (fieldmix.mappings): ranges, curves, dead band, smoothing, bad values,
x+y combining, patterns, file checks and the schema. Scenarios are our own: a distance
sensor (0..4095) steering the buoy's distance, an accelerometer's x and y (-1..1) steering
the engine's position, a knob (0..127) steering the gulls' spread.

The curves, dead band and smoothing are our own definitions (docs/mappings.md); the
one-pole low-pass reaching 1 - 1/e = 63.2 % of a step after one time constant is common
practice, no source.
"""

from __future__ import annotations

import json
import math

import pytest

from conftest import REPO
from fieldmix.control import Command
from fieldmix.errors import ConfigError
from fieldmix.mappings import CURVE_RATIO, CURVES, PARAMS, MappingSet, parse_mappings

HARBOUR = REPO / "configs" / "shows" / "harbour.json"


@pytest.fixture(scope="module")
def show():
    from fieldmix.show import load_show

    return load_show(HARBOUR)


@pytest.fixture
def state(show):
    from fieldmix.state import ShowState

    return ShowState(show)


def one(show, **kw):
    base = {"address": "/sensor/range", "source": "buoy", "param": "distance", "in": [0, 4095], "out": [0.5, 10]}
    base.update(kw)
    return parse_mappings([base], "harbour.json: mappings", show.source_ids)[0]


def mset(show, *items):
    return MappingSet(parse_mappings(list(items), "harbour.json: mappings", show.source_ids))


DIST = {"address": "/sensor/*/range", "source": "buoy", "param": "distance", "in": [0, 4095], "out": [0.5, 10]}
ACC_X = {"address": "/accel", "arg": 0, "source": "engine", "param": "x", "in": [-1, 1], "out": [-6, 6]}
ACC_Y = {"address": "/accel", "arg": 1, "source": "engine", "param": "y", "in": [-1, 1], "out": [-6, 6]}
KNOB = {"address": "/knobs/3", "source": "gulls", "param": "spread", "in": [0, 127], "out": [0, 180]}


# --------------------------------------------------------------------------- the value path


def test_linear_range_mapping(show):
    m = one(show)
    assert m.output_for(0) == pytest.approx(0.5)
    assert m.output_for(4095) == pytest.approx(10.0)
    assert m.output_for(4095 / 2) == pytest.approx(5.25)
    assert m.output_for(1000) == pytest.approx(0.5 + 9.5 * 1000 / 4095)


def test_clamping_and_unclamped(show):
    m = one(show)
    assert m.output_for(-300) == pytest.approx(0.5)
    assert m.output_for(99999) == pytest.approx(10.0)
    u = one(show, clamp=False)
    assert u.output_for(4095 * 1.5) == pytest.approx(0.5 + 9.5 * 1.5)  # beyond "out", linear
    # but never beyond the parameter's own range (distance 0 .. 1000 m)
    assert u.output_for(-4095) == 0.0
    assert u.output_for(1e300) == 1000.0


def test_inversion(show):
    m = one(show, invert=True)
    assert m.output_for(0) == pytest.approx(10.0)
    assert m.output_for(4095) == pytest.approx(0.5)
    assert m.output_for(1000) == pytest.approx(10.0 - 9.5 * 1000 / 4095)
    # a reversed input range does the same
    r = one(show, **{"in": [4095, 0]})
    assert r.output_for(1000) == pytest.approx(m.output_for(1000))


@pytest.mark.parametrize(
    "curve,mid",
    [
        ("linear", 0.5),
        ("slow_start", (math.sqrt(CURVE_RATIO) - 1) / (CURVE_RATIO - 1)),  # 9/99
        ("fast_start", math.log(1 + (CURVE_RATIO - 1) / 2) / math.log(CURVE_RATIO)),  # log_100(50.5)
        ("s_curve", 0.5),
    ],
)
def test_curve_end_points_and_midpoint(show, curve, mid):
    m = one(show, curve=curve, out=[0, 100], param="spread", source="gulls", **{"in": [0, 1]})
    assert m.output_for(0) == 0.0  # the ends exactly
    assert m.output_for(1) == 100.0
    assert m.output_for(0.5) == pytest.approx(100 * mid)
    # monotone increasing
    ys = [m.output_for(k / 200) for k in range(201)]
    assert all(b > a for a, b in zip(ys, ys[1:]))
    # s_curve: flat at the ends; slow_start: small first step, fast_start: large first step
    first = ys[1] - ys[0]
    if curve == "s_curve":
        assert first < 0.01
        assert m.output_for(0.25) == pytest.approx(100 * (3 * 0.0625 - 2 * 0.015625))
    elif curve == "slow_start":
        assert first < 0.5 * 100 / 200
    elif curve == "fast_start":
        assert first > 5 * 100 / 200


def test_curves_are_the_documented_set():
    assert set(CURVES) == {"linear", "slow_start", "fast_start", "s_curve"}
    for f in CURVES.values():
        assert f(0.0) == pytest.approx(0.0, abs=1e-15) and f(1.0) == pytest.approx(1.0, abs=1e-15)


# --------------------------------------------------------------------------- feed / tick


def test_distance_sensor_steers_distance_through_the_state(show, state):
    ms = mset(show, DIST)
    az0, el0, _ = state.sources[0].spherical
    assert ms.feed("/sensor/left/range", [2047.5], 0.0) is True
    cmds = ms.tick(0.01, state)
    assert cmds == [Command("source", 0, "distance", (pytest.approx(5.25),))]
    state.apply_all(cmds)
    az, el, d = state.sources[0].spherical
    assert d == pytest.approx(5.25) and az == pytest.approx(az0) and el == pytest.approx(el0, abs=1e-9)
    assert ms.tick(0.02, state) == []  # emit only on change
    ms.feed("/sensor/left/range", [2047.5], 0.03)  # same value again: no change
    assert ms.tick(0.04, state) == []


def test_knob_steers_spread_and_gain_uses_the_gain_command(show, state):
    gain = {"address": "/fader/1", "source": 2, "param": "gain_db", "in": [0, 1], "out": [-60, 6]}  # 2 = waves
    ms = mset(show, KNOB, gain)
    ms.feed("/knobs/3", [127], 0.0)
    ms.feed("/fader/1", [0.5], 0.0)
    cmds = ms.tick(0.0, state)
    assert Command("source", 3, "spread", (180.0,)) in cmds
    assert Command("source", 1, "gain", (-27.0,)) in cmds and len(cmds) == 2
    state.apply_all(cmds)
    assert state.sources[3].spread == 180.0 and state.sources[1].gain_db == -27.0


def test_azimuth_output_is_wrapped(show, state):
    ms = mset(show, {"address": "/turn", "source": "buoy", "param": "azimuth", "in": [0, 1], "out": [0, 360]})
    ms.feed("/turn", [0.75], 0.0)
    assert ms.tick(0.0, state) == [Command("source", 0, "azimuth", (-90.0,))]


def test_dead_band(show, state):
    ms = mset(show, dict(KNOB, dead_band=2))
    ms.feed("/knobs/3", [60], 0.0)
    state.apply_all(ms.tick(0.0, state))
    before = state.sources[3].spread
    for v in (61, 59, 61.9, 58.1):  # all within 2 of the last accepted (60)
        ms.feed("/knobs/3", [v], 0.0)
        assert ms.tick(0.0, state) == []
    assert ms.held == 4
    ms.feed("/knobs/3", [62], 0.0)  # 2 away: accepted
    cmds = ms.tick(0.0, state)
    assert cmds == [Command("source", 3, "spread", (pytest.approx(62 * 180 / 127),))]
    # relative to the last accepted input (62), not to the first one
    ms.feed("/knobs/3", [63.5], 0.0)
    assert ms.tick(0.0, state) == []
    ms.feed("/knobs/3", [64.5], 0.0)
    assert len(ms.tick(0.0, state)) == 1
    assert state.sources[3].spread == before  # tick itself never touches the state
    assert ms.stats()["held"] == 5


@pytest.mark.parametrize("tau_ms", [50.0, 200.0])
def test_smoothing_time_constant(show, state, tau_ms):
    """A step reaches 1 - 1/e = 63.2 % after one time constant (one-pole low-pass,
    common practice, no source); ticks every 1 ms, the lead applies each tick's commands."""
    ms = mset(show, dict(DIST, smooth_ms=tau_ms))
    # settle on a first value
    ms.feed("/sensor/a/range", [0], 0.0)
    t = 0.0
    for _ in range(int(tau_ms * 30)):
        t += 0.001
        state.apply_all(ms.tick(t, state))
    start = state.sources[0].spherical[2]
    assert start == pytest.approx(0.5, abs=1e-4)
    # the step
    t0 = t
    ms.feed("/sensor/a/range", [4095], t0)
    n = int(round(tau_ms))
    for k in range(1, n + 1):
        state.apply_all(ms.tick(t0 + k * 0.001, state))
    frac = (state.sources[0].spherical[2] - start) / (10.0 - start)
    assert frac == pytest.approx(1 - math.exp(-1), abs=0.01)
    # halfway in time it is below, at three time constants well above
    for k in range(n + 1, 3 * n + 1):
        state.apply_all(ms.tick(t0 + k * 0.001, state))
    frac3 = (state.sources[0].spherical[2] - start) / (10.0 - start)
    assert frac3 == pytest.approx(1 - math.exp(-3), abs=0.01)


def test_smoothing_does_not_depend_on_tick_spacing(show, state):
    from fieldmix.state import ShowState

    a, b = mset(show, dict(KNOB, smooth_ms=100)), mset(show, dict(KNOB, smooth_ms=100))
    sa, sb = state, ShowState(show)
    for ms, st in ((a, sa), (b, sb)):
        ms.feed("/knobs/3", [127], 0.0)
    for k in range(1, 101):
        sa.apply_all(a.tick(k * 0.001, sa))
    for t in (0.013, 0.05, 0.0777, 0.1):
        sb.apply_all(b.tick(t, sb))
    assert sa.sources[3].spread == pytest.approx(sb.sources[3].spread, rel=1e-9)
    start = show.sources[3].spread  # the filter starts from the state's value (20 degrees)
    assert sa.sources[3].spread == pytest.approx(start + (180 - start) * (1 - math.exp(-1)), rel=1e-9)


def test_smoothing_starts_from_the_state_and_settles(show, state):
    ms = mset(show, dict(KNOB, smooth_ms=20))
    ms.feed("/knobs/3", [0], 0.0)
    first = ms.tick(0.001, state)
    assert len(first) == 1 and 0 < first[0].value[0] < 20.0  # left 20 degrees, heading for 0
    t = 0.001
    n_cmds = 0
    for _ in range(2000):
        t += 0.001
        cmds = ms.tick(t, state)
        n_cmds += len(cmds)
        state.apply_all(cmds)
    assert state.sources[3].spread == 0.0  # snapped onto the target
    assert n_cmds < 2000  # and then it stopped emitting
    assert ms.tick(t + 1.0, state) == []


@pytest.mark.parametrize(
    "args,reason",
    [
        ([float("nan")], "not_finite"),
        ([float("inf")], "not_finite"),
        ([-math.inf], "not_finite"),
        ([10**400], "not_finite"),
        (["12"], "bad_type"),
        ([b"\x00\x01"], "bad_type"),
        ([True], "bad_type"),
        ([False], "bad_type"),
        ([None], "bad_type"),
        ([[1, 2]], "bad_type"),
        ([], "missing_arg"),
        (None, "bad_type"),
        ("12", "bad_type"),
    ],
)
def test_bad_values_counted_and_ignored(show, state, args, reason):
    ms = mset(show, DIST, ACC_X, ACC_Y)
    before = json.dumps(state.to_dict(), sort_keys=True)
    v0 = state.version
    assert ms.feed("/sensor/x/range", args, 0.0) is True  # taken: it matched a mapping
    assert ms.tick(0.1, state) == []
    assert ms.ignored[reason] == 1
    assert sum(ms.ignored.values()) == 1
    assert ms.stats()["ignored"][reason] == 1
    assert json.dumps(state.to_dict(), sort_keys=True) == before and state.version == v0
    # a good value afterwards still works
    ms.feed("/sensor/x/range", [0], 0.2)
    assert ms.tick(0.3, state) == [Command("source", 0, "distance", (0.5,))]


def test_missing_second_argument_only_hits_that_mapping(show, state):
    ms = mset(show, ACC_X, ACC_Y)
    assert ms.feed("/accel", [0.5], 0.0)
    assert ms.ignored == {"missing_arg": 1}
    z = float(state.sources[2].position[2])
    y = float(state.sources[2].position[1])
    assert ms.tick(0.0, state) == [Command("source", 2, "position", (3.0, y, z))]


def test_x_and_y_combine_into_one_position_command(show, state):
    ms = mset(show, ACC_X, ACC_Y)
    state.apply(Command("source", 2, "position", (-6.0, 4.0, 1.25)))
    ms.feed("/accel", [0.5, -0.25, 9.81], 0.0)
    cmds = ms.tick(0.0, state)
    assert cmds == [Command("source", 2, "position", (3.0, -1.5, 1.25))]  # z kept from the state
    state.apply_all(cmds)
    # only y changes: x comes from the state (another controller may have moved it)
    state.apply(Command("source", 2, "position", (2.0, -1.5, 1.25)))
    ms.feed("/accel", [0.5, 0.5], 0.1)
    assert ms.tick(0.1, state) == [Command("source", 2, "position", (2.0, 3.0, 1.25))]
    st = ms.stats()
    assert st["commands"] == 2 and st["accepted"] == 4


def test_z_mapping_keeps_x_and_y(show, state):
    ms = mset(show, {"address": "/lift", "source": "engine", "param": "z", "in": [0, 1], "out": [0, 3]})
    x, y = (float(v) for v in state.sources[2].position[:2])
    ms.feed("/lift", [1], 0.0)
    assert ms.tick(0.0, state) == [Command("source", 2, "position", (x, y, 3.0))]


def test_patterns_with_wildcards(show, state):
    ms = mset(
        show,
        dict(DIST, address="/sensor/*/range"),
        {"address": "/knob/[0-9]", "source": "gulls", "param": "spread", "in": [0, 127], "out": [0, 360]},
        {"address": "/pad/{a,b}/v?l", "source": "waves", "param": "gain_db", "in": [0, 1], "out": [-40, 0]},
    )
    taken = {
        "/sensor/front/range": True,
        "/sensor/7/range": True,
        "/sensor/range": False,  # a "*" does not cross "/" nor match a missing part
        "/sensor/a/b/range": False,
        "/knob/4": True,
        "/knob/x": False,
        "/knob/44": False,
        "/pad/a/val": True,
        "/pad/b/vol": True,
        "/pad/c/val": False,
        "/source/buoy/azimuth": False,
        "": False,
        "sensor/a/range": False,
    }
    for address, expect in taken.items():
        assert ms.feed(address, [1], 0.0) is expect, address
    assert ms.messages == sum(taken.values())
    assert ms.feed(12, [1], 0.0) is False  # not even a string: not ours
    cmds = ms.tick(0.0, state)
    assert {c.param for c in cmds} == {"distance", "spread", "gain"}


def test_one_message_feeds_every_matching_mapping(show, state):
    ms = mset(show, DIST, dict(DIST, source="waves", out=[1, 2]))
    ms.feed("/sensor/q/range", [4095], 0.0)
    cmds = ms.tick(0.0, state)
    assert cmds == [Command("source", 0, "distance", (10.0,)), Command("source", 1, "distance", (2.0,))]


def test_no_mappings_takes_nothing(show):
    ms = MappingSet(())
    assert ms.feed("/sensor/a/range", [1], 0.0) is False
    assert MappingSet.from_show(show).mappings == ()  # harbour.json has no "mappings"


def test_from_show_reads_the_mappings_key(show):
    from fieldmix.show import show_from_dict

    data = json.loads(HARBOUR.read_text())
    data["mappings"] = [DIST, KNOB]
    s = show_from_dict(data, "harbour.json", path=HARBOUR, layout=show.layout)
    ms = MappingSet.from_show(s)
    assert [m.param for m in ms.mappings] == ["distance", "spread"]
    data["mappings"] = [DIST, dict(KNOB, source="gull")]
    with pytest.raises(ConfigError) as ei:  # the show loader checks the mappings, with their place
        show_from_dict(data, "harbour.json", path=HARBOUR, layout=show.layout)
    assert ei.value.where == "harbour.json: mappings[1].source"
    assert 'did you mean "gulls"' in ei.value.message


def test_stats_are_json(show, state):
    ms = mset(show, DIST, KNOB)
    ms.feed("/sensor/a/range", [100], 0.0)
    ms.feed("/sensor/a/range", ["x"], 0.0)
    ms.tick(0.0, state)
    st = json.loads(json.dumps(ms.stats()))
    assert st["messages"] == 2 and st["accepted"] == 1 and st["ignored"]["bad_type"] == 1
    assert st["per_mapping"][0]["input"] == 100.0
    assert st["per_mapping"][1]["output"] is None


# --------------------------------------------------------------------------- broken mappings

W = "harbour.json: mappings"
GOOD = dict(DIST)


def _m(**kw):
    d = dict(GOOD)
    for k, v in kw.items():
        k = k.rstrip("_")
        if v is _DROP:
            d.pop(k)
        else:
            d[k] = v
    return d


_DROP = object()

BROKEN = [
    # (mappings, place after W, words in the message)
    ({"a": 1}, "", "expected a list of mappings"),
    ([GOOD, 3], "[1]", "expected a mapping object"),
    ([_m(address=_DROP)], "[0]", 'missing "address"'),
    ([_m(in_=_DROP)], "[0]", 'missing "in"'),
    ([_m(address="sensor/range")], "[0].address", "start with"),
    ([_m(address=5)], "[0].address", "expected an OSC address pattern"),
    ([_m(address="/sensor/[a/range")], "[0].address", "bad OSC address pattern"),
    ([_m(address="/source/*/distance")], "[0].address", "would take control messages"),
    ([_m(address="/*/buoy/gain")], "[0].address", '"/source/buoy/gain"'),
    ([_m(address="/master/{gain,x}")], "[0].address", "would take control messages"),
    ([_m(address="/cue/go")], "[0].address", "would take control messages"),
    ([_m(arg=-1)], "[0].arg", "out of range"),
    ([_m(arg=1.5)], "[0].arg", "expected an argument index"),
    ([_m(arg=True)], "[0].arg", "expected an argument index"),
    ([_m(source="boy")], "[0].source", 'did you mean "buoy"'),
    ([_m(source=9)], "[0].source", "no source number 9"),
    ([_m(source=0)], "[0].source", "no source number 0"),
    ([_m(source=True)], "[0].source", "expected a source id"),
    ([_m(source=1.5)], "[0].source", "expected a source id"),
    ([_m(param="azimut")], "[0].param", 'did you mean "azimuth"'),
    ([_m(param="mute")], "[0].param", "unknown parameter"),
    ([GOOD, _m(in_=[5, 5])], "[1].in", "two different ends"),
    ([_m(in_=[0, float("nan")])], "[0].in[1]", "not a finite number"),
    ([_m(in_=[0, "4095"])], "[0].in[1]", "expected a number"),
    ([_m(in_=[0, 1, 2])], "[0].in", "got 3 numbers"),
    ([_m(in_=[-1.7e308, 1.7e308])], "[0].in", "too wide"),
    ([_m(out=[0, 1001])], "[0].out[1]", "outside the range of distance"),
    ([_m(out=[-1, 5])], "[0].out[0]", "0 .. 1000 m"),
    ([_m(param="spread", out=[0, 400])], "[0].out[1]", "0 .. 360 degrees"),
    ([_m(param="gain_db", out=[-130, 0])], "[0].out[0]", "-120 .. 24 dB"),
    ([_m(param="elevation", out=[0, 91])], "[0].out[1]", "-90 .. 90"),
    ([_m(curve="expo")], "[0].curve", "unknown curve"),
    ([_m(clamp="yes")], "[0].clamp", "expected true or false"),
    ([_m(invert=1)], "[0].invert", "expected true or false"),
    ([_m(dead_band=-1)], "[0].dead_band", "negative"),
    ([_m(dead_band=float("inf"))], "[0].dead_band", "not a finite number"),
    ([_m(smooth_ms="fast")], "[0].smooth_ms", "expected a number"),
    ([_m(smooth_ms=-5)], "[0].smooth_ms", "out of range"),
    ([_m(curv="linear")], "[0].curv", 'did you mean "curve"'),
]


@pytest.mark.parametrize("data,place,words", BROKEN)
def test_broken_mappings_name_their_place(show, data, place, words):
    with pytest.raises(ConfigError) as ei:
        parse_mappings(data, W, show.source_ids)
    assert ei.value.where == W + place
    assert words in ei.value.message
    assert "\n" not in str(ei.value)


def test_reserved_transport_addresses(show):
    with pytest.raises(ConfigError) as ei:
        parse_mappings([_m(address="/stat*")], W, show.source_ids, reserved=["/ping", "/status"])
    assert ei.value.where == W + "[0].address" and '"/status"' in ei.value.message
    parse_mappings([_m(address="/stat*")], W, show.source_ids)  # without the reservation it is fine


# --------------------------------------------------------------------------- schema


# what only the code can check: show-dependent rules, pattern syntax, arithmetic limits
NOT_IN_SCHEMA = ("two different", "would take", '"/source/buoy/gain"', 'did you mean "buoy"', "no source number 9",
                 "bad OSC address", "too wide", "not a finite number")


def _validator():
    from jsonschema import Draft202012Validator

    schema = json.loads((REPO / "server" / "fieldmix" / "schemas" / "mappings.schema.json").read_text())
    Draft202012Validator.check_schema(schema)
    return Draft202012Validator(schema), schema


def test_schema_matches_the_code():
    v, schema = _validator()
    props = schema["$defs"]["mapping"]["properties"]
    assert props["param"]["enum"] == list(PARAMS)
    assert props["curve"]["enum"] == list(CURVES)
    by_param = {
        rule["if"]["properties"]["param"]["const"]: rule["then"]["properties"]["out"]["items"]
        for rule in schema["$defs"]["mapping"]["allOf"]
    }
    assert set(by_param) == set(PARAMS)
    for name, p in PARAMS.items():
        assert (by_param[name]["minimum"], by_param[name]["maximum"]) == (p.lo, p.hi)


def test_schema_accepts_the_good_and_refuses_what_it_can(show):
    v, _ = _validator()
    good = [DIST, ACC_X, ACC_Y, KNOB, dict(DIST, curve="s_curve", clamp=False, invert=True, dead_band=3,
                                            smooth_ms=80, description="range finder on the pier")]
    assert not list(v.iter_errors(good))
    parse_mappings(good, W, show.source_ids)
    expressible = [row for row in BROKEN if not any(w in row[2] for w in NOT_IN_SCHEMA)]
    assert len(expressible) >= 20
    for data, place, _ in expressible:
        assert list(v.iter_errors(data)), (data, place)


def test_non_finite_clock_is_a_callers_bug(show, state):
    ms = mset(show, DIST)
    with pytest.raises(ValueError):
        ms.feed("/sensor/a/range", [1], float("nan"))
    with pytest.raises(ValueError):
        ms.tick(float("inf"), state)


def test_the_docs_example_is_valid(show, state):
    """docs/mappings.md's example parses, passes the schema and runs."""
    text = (REPO / "docs" / "mappings.md").read_text()
    i = text.index('"mappings": [') + len('"mappings": ')
    example = json.loads(text[i : text.index("]\n```", i) + 1])
    v, _ = _validator()
    assert not list(v.iter_errors(example))
    ms = MappingSet(parse_mappings(example, W, show.source_ids))
    assert ms.feed("/boat/accel", [0.5, 0.5, 1.0], 0.0) and ms.feed("/desk/knob/3", [127], 0.0)
    cmds = ms.tick(1.0, state)
    assert [c.param for c in cmds] == ["position", "spread"]
    assert cmds[1].value == (240.0,)
