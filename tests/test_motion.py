"""Running motions (fieldmix.motion): orbit, line, drift; continuity; file checks.

The motion kinds and their formulas are our own definitions (docs/motion.md); the checks
below follow from those definitions and from the coordinate convention of geometry.py
(x right, y front, z up; azimuth + = left, counter-clockwise seen from above).
"""

from __future__ import annotations

import math

import pytest

from fieldmix.errors import ConfigError
from fieldmix.geometry import xyz_to_sph
from fieldmix.motion import (
    COORD_HI,
    COORD_LO,
    DriftSpec,
    LineSpec,
    Motion,
    OrbitSpec,
    drift_time_scale,
    parse_motion,
)


def dist(p, q):
    return math.dist(p, q)


def close(p, q, tol=1e-9):
    return dist(p, q) <= tol


# --------------------------------------------------------------------------- orbit


def test_orbit_quarter_periods_left_is_counter_clockwise():
    spec = parse_motion({"kind": "orbit", "centre": [1.0, 2.0], "radius": 3.0, "period": 8.0}, "m")
    assert spec.direction == "left"
    start = (1.0, 5.0, 0.5)  # on the circle, in front of the centre
    m = Motion.start(spec, 100.0, start)
    # front -> left (x < centre) -> behind -> right -> front
    assert close(m.position_at(100.0), start)
    assert close(m.position_at(102.0), (1.0 - 3.0, 2.0, 0.5))
    assert close(m.position_at(104.0), (1.0, 2.0 - 3.0, 0.5))
    assert close(m.position_at(106.0), (1.0 + 3.0, 2.0, 0.5))
    assert close(m.position_at(108.0), start)
    assert close(m.position_at(108.0 + 800.0), start, 1e-6)  # 100 turns later, same place


def test_orbit_left_increases_azimuth_right_decreases():
    """Around the listener, "left" is the direction of increasing azimuth (geometry.py)."""
    for direction, sign in (("left", 1.0), ("right", -1.0)):
        spec = parse_motion({"kind": "orbit", "radius": 2.0, "period": 12.0, "direction": direction}, "m")
        m = Motion.start(spec, 0.0, (0.0, 2.0, 0.0))
        az_prev = xyz_to_sph(*m.position_at(0.0))[0]
        for k in range(1, 6):  # up to 150 degrees: no wrap
            az = xyz_to_sph(*m.position_at(k * 1.0))[0]
            assert (az - az_prev) * sign == pytest.approx(30.0, abs=1e-9)
            az_prev = az


def test_orbit_right_quarter():
    spec = parse_motion({"kind": "orbit", "centre": [0, 0, 1.5], "radius": 2, "period": 4, "direction": "right"}, "m")
    m = Motion.start(spec, 0.0, (0.0, 2.0, 1.5))
    assert close(m.position_at(1.0), (2.0, 0.0, 1.5))  # clockwise from above: front -> right


def test_orbit_radius_and_period_after_glide():
    spec = parse_motion({"kind": "orbit", "centre": [-2, 1], "radius": 4, "period": 5, "glide": 0.5}, "m")
    m = Motion.start(spec, 0.0, (3.0, 3.0, 1.0))  # off the circle
    for k in range(100):
        t = 0.5 + k * 0.137
        p = m.position_at(t)
        assert math.hypot(p[0] + 2, p[1] - 1) == pytest.approx(4.0, abs=1e-9)
        assert p[2] == pytest.approx(1.0)  # 2-D centre: keeps the height
        assert close(m.position_at(t + 5.0), p, 1e-9)  # periodic


def test_orbit_starts_at_nearest_phase_and_glides():
    spec = parse_motion({"kind": "orbit", "centre": [0, 0, 2.0], "radius": 3, "period": 20, "glide": 1.0}, "m")
    start = (-1.0, 1.0, 0.0)  # azimuth 45 deg (front-left), inside the circle, below its plane
    m = Motion.start(spec, 10.0, start)
    assert m.position_at(10.0) == start
    # the first positions stay near the start: the path is continuous and starts at rest radially
    prev = start
    for k in range(1, 101):
        p = m.position_at(10.0 + k * 0.01)
        assert dist(p, prev) < 0.05
        prev = p
    # after the glide it is on the circle, at the phase of the start plus the time run
    p = m.position_at(11.0)
    assert math.hypot(p[0], p[1]) == pytest.approx(3.0, abs=1e-9)
    assert p[2] == pytest.approx(2.0)
    assert xyz_to_sph(*p)[0] == pytest.approx(45.0 + 360.0 / 20.0, abs=1e-9)


def test_orbit_from_the_centre_itself_is_continuous():
    spec = parse_motion({"kind": "orbit", "centre": [1, 1], "radius": 2, "period": 4}, "m")
    m = Motion.start(spec, 0.0, (1.0, 1.0, 0.0))
    assert m.position_at(0.0) == (1.0, 1.0, 0.0)
    assert dist(m.position_at(0.01), (1.0, 1.0, 0.0)) < 1e-3
    p = m.position_at(1.0)
    assert math.hypot(p[0] - 1, p[1] - 1) == pytest.approx(2.0)


# --------------------------------------------------------------------------- line


def test_line_endpoints_and_period():
    spec = parse_motion({"kind": "line", "from": [-2, 1, 0], "to": [2, 3, 1], "period": 10}, "m")
    m = Motion.start(spec, 0.0, (-2.0, 1.0, 0.0))  # at "from": phase 0
    assert close(m.position_at(5.0), (2.0, 3.0, 1.0))  # half a period: at "to"
    assert close(m.position_at(10.0), (-2.0, 1.0, 0.0))  # a full period: back
    assert close(m.position_at(2.5), (0.0, 2.0, 0.5))  # a quarter: the middle
    assert close(m.position_at(1005.0), (2.0, 3.0, 1.0), 1e-6)
    # never beyond the ends, and the turns are eased: slow near the ends, fast in the middle
    pts = [m.position_at(2.0 + k * 0.01) for k in range(1000)]
    for p in pts:
        lam = (p[0] + 2.0) / 4.0
        assert -1e-12 <= lam <= 1 + 1e-12
    step_mid = dist(m.position_at(2.5), m.position_at(2.51))
    step_end = dist(m.position_at(5.0), m.position_at(5.01))
    assert step_end < step_mid / 50


def test_line_starts_at_nearest_point_heading_for_to():
    spec = parse_motion({"kind": "line", "from": [0, 0], "to": [4, 0], "period": 8, "glide": 0.5}, "m")
    start = (1.0, 0.7, 1.2)  # beside the segment at x = 1; the 2-D line keeps z = 1.2
    m = Motion.start(spec, 0.0, start)
    assert m.position_at(0.0) == start
    assert dist(m.position_at(0.01), start) < 0.01
    p = m.position_at(0.5)
    assert p[1] == pytest.approx(0.0) and p[2] == pytest.approx(1.2)
    xs = [m.position_at(0.5 + k * 0.1)[0] for k in range(5)]
    assert all(b > a for a, b in zip(xs, xs[1:]))  # heading for "to"


# --------------------------------------------------------------------------- drift


def _drift(seed=11, **kw):
    d = {"kind": "drift", "min": [-4, -2, 0.5], "max": [4, 6, 2.5], "time_scale": 1.5, "seed": seed}
    d.update(kw)
    return parse_motion(d, "m")


def test_drift_stays_in_its_region_over_an_hour():
    spec = _drift()
    m = Motion.start(spec, 0.0, (0.0, 0.0, 1.0))  # inside the box
    lo, hi = spec.lo, spec.hi
    seen_lo = [math.inf] * 3
    seen_hi = [-math.inf] * 3
    for k in range(36000):  # one hour at 10 Hz
        p = m.position_at(k * 0.1)
        for a in range(3):
            assert lo[a] - 1e-12 <= p[a] <= hi[a] + 1e-12
            seen_lo[a] = min(seen_lo[a], p[a])
            seen_hi[a] = max(seen_hi[a], p[a])
    # and it really wanders: it covers most of the box in every axis
    for a in range(3):
        assert seen_hi[a] - seen_lo[a] > 0.6 * (hi[a] - lo[a])


def test_drift_same_seed_same_path_at_any_evaluation_rate():
    spec = _drift(seed=42)
    a = Motion.start(spec, 5.0, (1.0, 1.0, 1.0))
    b = Motion.start(spec, 5.0, (1.0, 1.0, 1.0))
    every_10ms = {k: a.position_at(5.0 + k * 0.01) for k in range(0, 6001)}  # one minute
    for j in range(0, 1622):
        t_idx = j * 37  # every 37 ms, the same clock readings
        if t_idx > 6000:
            break
        assert b.position_at(5.0 + t_idx * 0.01) == every_10ms[t_idx]  # exactly equal
    # a motion that was asked only rarely gives the same answer as one asked often
    c = Motion.start(spec, 5.0, (1.0, 1.0, 1.0))
    assert c.position_at(5.0 + 6000 * 0.01) == every_10ms[6000]


def test_drift_other_seed_other_path():
    a = Motion.start(_drift(seed=1), 0.0, (0.0, 0.0, 1.0))
    b = Motion.start(_drift(seed=2), 0.0, (0.0, 0.0, 1.0))
    far = [dist(a.position_at(t), b.position_at(t)) for t in range(10, 200, 5)]
    assert sum(d > 0.5 for d in far) > len(far) // 2


def test_drift_leaves_from_the_current_position_at_rest():
    spec = _drift(seed=5)
    start = (2.0, 1.0, 1.5)
    m = Motion.start(spec, 3.0, start)
    assert m.position_at(3.0) == start
    assert m.position_at(2.0) == start  # before the start: where it was
    # starts at rest: the first 10 ms move far less than the drift's typical step
    assert dist(m.position_at(3.01), start) < 1e-3
    prev = start
    for k in range(1, 500):
        p = m.position_at(3.0 + k * 0.01)
        assert dist(p, prev) < 0.1
        prev = p


def test_drift_speed_is_the_rms_speed():
    """speed = RMS speed over a long run (our definition, docs/motion.md)."""
    spec = parse_motion({"kind": "drift", "centre": [0, 2], "size": [10, 6], "speed": 0.8, "seed": 3}, "m")
    assert spec.time_scale == pytest.approx(drift_time_scale((10, 6), 0.8))
    assert spec.time_scale == pytest.approx(math.hypot(10, 6) / (3 * math.sqrt(2) * 0.8))
    m = Motion.start(spec, 0.0, (0.0, 2.0, 0.0))
    dt = 0.01
    skip = int(4 * spec.time_scale / dt)  # past the start segments
    n = 200000
    prev = m.position_at(skip * dt)
    acc = 0.0
    for k in range(skip + 1, skip + n + 1):
        p = m.position_at(k * dt)
        acc += ((p[0] - prev[0]) ** 2 + (p[1] - prev[1]) ** 2 + (p[2] - prev[2]) ** 2) / (dt * dt)
        prev = p
    assert math.sqrt(acc / n) == pytest.approx(0.8, rel=0.1)


def test_drift_2d_region_keeps_height():
    spec = parse_motion({"kind": "drift", "min": [-1, -1], "max": [1, 1], "time_scale": 0.5, "seed": 9}, "m")
    m = Motion.start(spec, 0.0, (0.0, 0.0, 1.7))
    assert all(m.position_at(t * 0.3)[2] == 1.7 for t in range(200))


# --------------------------------------------------------------------------- stop, ranges, round trip


@pytest.mark.parametrize(
    "data",
    [
        {"kind": "orbit", "radius": 2, "period": 4},
        {"kind": "line", "from": [0, 0], "to": [1, 1], "period": 3},
        {"kind": "drift", "min": [0, 0], "max": [3, 3], "speed": 1, "seed": 0},
    ],
)
def test_stop_leaves_the_source_where_it_is(data):
    m = Motion.start(parse_motion(data, "m"), 0.0, (0.5, 0.5, 0.0))
    here = m.position_at(2.345)
    assert m.running
    assert m.stop(2.345) == here
    assert not m.running
    assert m.position_at(50.0) == here
    assert m.command_at(99.0, 3).value == here
    assert m.command_at(99.0, 3).param == "position" and m.command_at(99.0, 3).source == 3


@pytest.mark.parametrize(
    "data",
    [
        {"kind": "orbit", "centre": [995, -995, 3], "radius": 5, "period": 1},
        {"kind": "line", "from": [-1000, -1000, -1000], "to": [1000, 1000, 1000], "period": 0.2},
        {"kind": "drift", "min": [-1000, -1000, -1000], "max": [1000, 1000, 1000], "time_scale": 0.05, "seed": 7},
    ],
)
def test_positions_finite_and_in_the_grammars_range(data):
    from fieldmix.control import parse_message

    m = Motion.start(parse_motion(data, "m"), 0.0, (999.0, -999.0, 0.0))
    for t in [0.0, 1e-9, 0.013, 0.5, 7.77, 1e3, 1e6, 1e9, 3.3e12]:
        p = m.position_at(t)
        assert all(math.isfinite(v) and COORD_LO <= v <= COORD_HI for v in p)
        parse_message("/source/1/position", list(p), ["a"])  # the grammar takes it


def test_non_finite_time_or_start_refused():
    spec = parse_motion({"kind": "orbit", "radius": 1, "period": 2}, "m")
    m = Motion.start(spec, 0.0, (0, 1, 0))
    with pytest.raises(ValueError):
        m.position_at(float("nan"))
    with pytest.raises(ValueError):
        Motion.start(spec, 0.0, (0, float("inf"), 0))


@pytest.mark.parametrize(
    "data",
    [
        {"kind": "orbit", "centre": [1, 2, 3], "radius": 2.5, "period": 9, "direction": "right", "glide": 2},
        {"kind": "line", "from": [0, 0], "to": [1, 1], "period": 3, "glide": 0.25},
        {"kind": "drift", "min": [0, 0], "max": [3, 3], "speed": 1.5, "seed": 123},
        {"kind": "drift", "min": [0, 0, 0], "max": [3, 3, 1], "time_scale": 2, "seed": 2**53 - 1},
    ],
)
def test_to_dict_round_trips(data):
    spec = parse_motion(data, "m")
    assert parse_motion(spec.to_dict(), "m") == spec
    assert isinstance(spec, (OrbitSpec, LineSpec, DriftSpec)) and spec.kind == data["kind"]


# --------------------------------------------------------------------------- broken specs

W = "show.json: cues[2].targets.buoy.motion"
ORBIT = {"kind": "orbit", "radius": 2, "period": 4}
LINE = {"kind": "line", "from": [0, 0], "to": [1, 1], "period": 3}
DRIFT = {"kind": "drift", "min": [0, 0], "max": [3, 3], "speed": 1, "seed": 0}


def _with(base, **kw):
    d = dict(base)
    for k, v in kw.items():
        if v is _DROP:
            d.pop(k.rstrip("_"), None)
        else:
            d[k.rstrip("_")] = v
    return d


_DROP = object()

BROKEN = [
    # (data, place after W, words in the message)
    ([1, 2], "", "expected a motion object"),
    ({"radius": 2}, "", 'missing "kind"'),
    (_with(ORBIT, kind="orbitt"), ".kind", 'did you mean "orbit"'),
    (_with(ORBIT, radius=-1), ".radius", "out of range"),
    (_with(ORBIT, radius=0), ".radius", "above 0"),
    (_with(ORBIT, radius=float("nan")), ".radius", "not a finite number"),
    (_with(ORBIT, radius="big"), ".radius", "expected a number"),
    (_with(ORBIT, radius=True), ".radius", "true/false is not a number"),
    (_with(ORBIT, radius=_DROP), "", 'missing "radius"'),
    (_with(ORBIT, period=0), ".period", "out of range"),
    (_with(ORBIT, period=_DROP), "", 'missing "period"'),
    (_with(ORBIT, direction="up"), ".direction", "unknown direction"),
    (_with(ORBIT, centre=[1]), ".centre", "2 or 3 coordinates"),
    (_with(ORBIT, centre=[1, "x"]), ".centre[1]", "expected a number"),
    (_with(ORBIT, centre=[1, 2000]), ".centre[1]", "out of range"),
    (_with(ORBIT, centre=[998, 0], radius=5), ".radius", "outside the position range"),
    (_with(ORBIT, glide=0), ".glide", "out of range"),
    (_with(ORBIT, radiuss=3), ".radiuss", 'did you mean "radius"'),
    (_with(LINE, to=[0, 0]), ".to", "same point"),
    (_with(LINE, to=[1, 1, 1]), ".to", "both as [x, y]"),
    (_with(LINE, from_=_DROP), "", 'missing "from"'),
    (_with(LINE, from_={"x": 1}), ".from", "expected a point"),
    (_with(DRIFT, centre=[1, 1]), ".centre", "region is given twice"),
    (_with(DRIFT, max=[3, -1]), ".max[1]", "below min"),
    (_with(DRIFT, max=[0, 0]), ".max", "single point"),
    (_with(DRIFT, time_scale=2), ".time_scale", "not both"),
    (_with(DRIFT, speed=_DROP), "", 'missing "speed"'),
    (_with(DRIFT, speed=0), ".speed", "above 0"),
    (_with(DRIFT, seed=-1), ".seed", "out of range"),
    (_with(DRIFT, seed=1.5), ".seed", "expected an integer"),
    (_with(DRIFT, seed=_DROP), "", 'missing "seed"'),
    (_with(DRIFT, glide=1), ".glide", "needs no glide"),
    ({"kind": "drift", "centre": [0, 0], "size": [2, -1], "speed": 1, "seed": 1}, ".size[1]", "negative"),
    ({"kind": "drift", "centre": [999, 0], "size": [4, 1], "speed": 1, "seed": 1}, ".size[0]", "outside the position range"),
    ({"kind": "drift", "min": [0, 0], "max": [0.01, 0.01], "speed": 50, "seed": 1}, ".speed", "too fast"),
]


@pytest.mark.parametrize("data,place,words", BROKEN)
def test_broken_specs_name_their_place(data, place, words):
    with pytest.raises(ConfigError) as ei:
        parse_motion(data, W)
    assert ei.value.where == W + place
    assert words in ei.value.message
    assert "\n" not in str(ei.value)


def test_the_docs_examples_parse():
    import json

    from conftest import REPO

    text = (REPO / "docs" / "motion.md").read_text()
    block = text.split("## The three kinds", 1)[1].split("```json", 1)[1].split("```", 1)[0]
    kinds = [parse_motion(json.loads(line), "m").kind for line in block.strip().splitlines()]
    assert kinds == ["orbit", "line", "drift"]
