"""A corpus of broken input files (data only, no tests).

Swept by tests/test_layout_load.py, test_show_load.py, test_control.py (through the
loaders) and by the CLI tests (through the command line). Each case is a dict:

- ``name``: unique, short;
- ``kind``: ``"layout"``, ``"show"`` or ``"script"``;
- ``files``: {relative file name: text (str) or raw bytes}, written into one folder;
- ``target``: the file to load (the layout, the show, or the control script);
- ``show``: for ``kind == "script"`` only: the (valid) show file whose source ids the
  script is checked against;
- ``expect``: a substring the one-line error message (``str(error)``) must contain;
- ``where``: optional; the error's place must start with it (``ConfigError.where``).

Every case must produce a ConfigError; none may crash or load. ``write_files`` and
``cases`` are helpers for the sweeps (not tests).
"""

import json
from pathlib import Path


def write_files(case: dict, folder) -> Path:
    """Write a case's files into ``folder``; return the path of its target."""
    folder = Path(folder)
    for name, content in case["files"].items():
        p = folder / name
        p.parent.mkdir(parents=True, exist_ok=True)
        if isinstance(content, bytes):
            p.write_bytes(content)
        else:
            p.write_text(content, encoding="utf-8")
    return folder / case["target"]


def cases(kind: str) -> list:
    """The cases of one kind (``"layout"``, ``"show"`` or ``"script"``)."""
    return [c for c in CASES if c["kind"] == kind]


def _j(obj) -> str:
    return json.dumps(obj, indent=2)


def _layout(**over):
    base = {
        "name": "pair",
        "panner": "vbap",
        "speakers": [
            {"id": "L", "output": 1, "azimuth": 30, "distance": 2.5},
            {"id": "R", "output": 2, "azimuth": -30, "distance": 2.5},
        ],
    }
    base.update(over)
    return base



GOOD_LAYOUT = _j(_layout())


def _show(**over):
    base = {
        "name": "test show",
        "layout": "pair.json",
        "sources": [
            {"id": "vox", "input": 1, "azimuth": 0},
            {"id": "gtr", "input": 2, "azimuth": 20},
        ],
    }
    base.update(over)
    return base


GOOD_SHOW = _j(_show())


def _script_case(name, text, expect, where=None):
    case = {
        "name": name,
        "kind": "script",
        "files": {"pair.json": GOOD_LAYOUT, "show.json": GOOD_SHOW, "control.txt": text},
        "target": "control.txt",
        "show": "show.json",
        "expect": expect,
    }
    if where:
        case["where"] = where
    return case


def _layout_case(name, content, expect, where=None):
    case = {
        "name": name,
        "kind": "layout",
        "files": {"layout.json": content if isinstance(content, (str, bytes)) else _j(content)},
        "target": "layout.json",
        "expect": expect,
    }
    if where:
        case["where"] = where
    return case


def _show_case(name, content, expect, where=None, layout=GOOD_LAYOUT, extra_files=None):
    files = {"show.json": content if isinstance(content, (str, bytes)) else _j(content)}
    if layout is not None:
        files["pair.json"] = layout
    files.update(extra_files or {})
    case = {"name": name, "kind": "show", "files": files, "target": "show.json", "expect": expect}
    if where:
        case["where"] = where
    return case


def _sp(**kw):
    return dict(kw)


CASES = [
    # ------------------------------------------------------------------ layouts
    _layout_case(
        "layout-not-utf8",
        b'{"speakers": [{"id": "caf\xe9", "output": 1, "azimuth": 0}]}',
        "not UTF-8",
        where="layout.json",
    ),
    _layout_case(
        "layout-not-json",
        '{\n  "speakers": [\n    {"output": 1 "azimuth": 0}\n  ]\n}\n',
        "not valid JSON",
        where="layout.json line 3 column",
    ),
    _layout_case("layout-empty-file", "", "not valid JSON"),
    _layout_case("layout-top-is-list", "[1, 2]", "expected an object, got a list"),
    _layout_case(
        "layout-missing-output",
        _layout(speakers=[_sp(id="L", azimuth=30), _sp(id="R", output=2, azimuth=-30)]),
        'missing required key "output"',
        where="layout.json: speakers[0]",
    ),
    _layout_case(
        "layout-duplicate-output",
        _layout(speakers=[_sp(output=1, azimuth=30), _sp(output=1, azimuth=-30)]),
        "output 1 is already used by speakers[0]",
        where="layout.json: speakers[1].output",
    ),
    _layout_case(
        "layout-duplicate-speaker-id",
        _layout(speakers=[_sp(id="L", output=1, azimuth=30), _sp(id="L", output=2, azimuth=-30)]),
        'duplicate speaker id "L"',
        where="layout.json: speakers[1].id",
    ),
    _layout_case(
        "layout-default-id-collides",
        _layout(speakers=[_sp(id="S2", output=1, azimuth=30), _sp(output=2, azimuth=-30)]),
        'duplicate speaker id "S2"',
    ),
    _layout_case(
        "layout-nan-literal",
        '{"speakers": [{"output": 1, "azimuth": NaN}]}',
        "NaN is not allowed",
        where="layout.json: speakers[0].azimuth",
    ),
    _layout_case(
        "layout-infinity-literal",
        '{"speakers": [{"output": 1, "azimuth": 0, "distance": Infinity}]}',
        "Infinity is not allowed",
        where="layout.json: speakers[0].distance",
    ),
    _layout_case(
        "layout-number-overflows",
        '{"speakers": [{"output": 1, "azimuth": 0, "trim_db": -1e400}]}',
        "not finite",
        where="layout.json: speakers[0].trim_db",
    ),
    _layout_case(
        "layout-string-azimuth",
        _layout(speakers=[_sp(output=1, azimuth=30), _sp(output=2, azimuth="left")]),
        'expected a number, got "left"',
        where="layout.json: speakers[1].azimuth",
    ),
    _layout_case(
        "layout-bool-distance",
        _layout(speakers=[_sp(output=1, azimuth=30, distance=True)]),
        "expected a number, got true",
        where="layout.json: speakers[0].distance",
    ),
    _layout_case(
        "layout-bool-output",
        _layout(speakers=[_sp(output=True, azimuth=30)]),
        "expected an integer, got true",
    ),
    _layout_case(
        "layout-output-not-integer",
        _layout(speakers=[_sp(output=1.5, azimuth=30)]),
        "expected an integer, got 1.5",
    ),
    _layout_case(
        "layout-output-zero",
        _layout(speakers=[_sp(output=0, azimuth=30)]),
        "0 is out of range: must be from 1 to 1024",
        where="layout.json: speakers[0].output",
    ),
    _layout_case(
        "layout-output-string",
        _layout(speakers=[_sp(output="3", azimuth=30)]),
        'expected an integer, got "3"',
    ),
    _layout_case(
        "layout-distance-zero",
        _layout(speakers=[_sp(output=1, azimuth=30, distance=0)]),
        "speaker at the listener position",
        where="layout.json: speakers[0].distance",
    ),
    _layout_case(
        "layout-position-origin",
        _layout(speakers=[_sp(output=1, azimuth=30), _sp(output=2, position=[0, 0, 0])]),
        "speaker at the listener position",
        where="layout.json: speakers[1].position",
    ),
    _layout_case(
        "layout-empty-speakers",
        _layout(speakers=[]),
        "the layout has no speakers",
        where="layout.json: speakers",
    ),
    _layout_case("layout-no-speakers-key", {"name": "x"}, 'missing required key "speakers"'),
    _layout_case(
        "layout-only-subs",
        _layout(speakers=[_sp(output=1, azimuth=0, sub=True)]),
        "all speakers are subs",
    ),
    _layout_case(
        "layout-unknown-panner",
        _layout(panner="vbapp"),
        'unknown panner "vbapp"',
        where="layout.json: panner",
    ),
    _layout_case(
        "layout-both-position-forms",
        _layout(speakers=[_sp(output=1, azimuth=30, position=[1, 2, 0])]),
        "both position forms",
        where="layout.json: speakers[0]",
    ),
    _layout_case(
        "layout-no-position",
        _layout(speakers=[_sp(output=1, id="L")]),
        "no position",
        where="layout.json: speakers[0]",
    ),
    _layout_case(
        "layout-elevation-without-azimuth",
        _layout(speakers=[_sp(output=1, elevation=30)]),
        'given without "azimuth"',
    ),
    _layout_case(
        "layout-position-too-long",
        _layout(speakers=[_sp(output=1, position=[1, 2, 3, 4])]),
        "expected 2 or 3 items, got 4",
        where="layout.json: speakers[0].position",
    ),
    _layout_case(
        "layout-position-string-coordinate",
        _layout(speakers=[_sp(output=1, position=[1, "2", 0])]),
        'expected a number, got "2"',
        where="layout.json: speakers[0].position[1]",
    ),
    _layout_case(
        "layout-trim-out-of-range",
        _layout(speakers=[_sp(output=1, azimuth=30, trim_db=20)]),
        "must be from -60 to 12 dB",
        where="layout.json: speakers[0].trim_db",
    ),
    _layout_case(
        "layout-delay-negative",
        _layout(speakers=[_sp(output=1, azimuth=30, delay_ms=-1)]),
        "must be from 0 to 500 ms",
    ),
    _layout_case(
        "layout-elevation-out-of-range",
        _layout(speakers=[_sp(output=1, azimuth=30, elevation=95)]),
        "must be from -90 to 90",
    ),
    _layout_case(
        "layout-unknown-speaker-key",
        _layout(speakers=[_sp(output=1, azimut=30)]),
        'unknown key "azimut" (did you mean "azimuth"?)',
        where="layout.json: speakers[0]",
    ),
    _layout_case(
        "layout-unknown-top-key",
        dict(_layout(), spekers=[]),
        'unknown key "spekers"',
        where="layout.json",
    ),
    _layout_case(
        "layout-duplicate-json-key",
        '{"speakers": [{"output": 1, "azimuth": 0, "azimuth": 30}]}',
        'duplicate key "azimuth"',
        where="layout.json: speakers[0]",
    ),
    _layout_case(
        "layout-bad-speaker-id",
        _layout(speakers=[_sp(id="front left", output=1, azimuth=30)]),
        'invalid id "front left"',
    ),
    _layout_case(
        "layout-all-weights-zero",
        _layout(speakers=[_sp(output=1, azimuth=30, weight=0), _sp(output=2, azimuth=-30, weight=0)]),
        "weight 0",
    ),
    _layout_case(
        "layout-alignment-needs-distance",
        _layout(
            alignment={"auto_delay": True},
            speakers=[_sp(output=1, azimuth=30, distance=3), _sp(output=2, azimuth=-30)],
        ),
        "automatic alignment needs the distance",
        where="layout.json: speakers[1]",
    ),
    _layout_case(
        "layout-alignment-not-bool",
        _layout(alignment={"auto_delay": "yes"}),
        'expected true or false, got "yes"',
        where="layout.json: alignment.auto_delay",
    ),
    _layout_case(
        "layout-wrong-format-version",
        _layout(format="fieldmix-layout/9"),
        'expected "fieldmix-layout/1"',
    ),
    _layout_case(
        "layout-giant-integer",
        '{"speakers": [{"output": ' + "9" * 5000 + ', "azimuth": 0}]}',
        "not usable JSON",
    ),
    _layout_case("layout-nested-too-deep", "[" * 5000 + "]" * 5000, "nested too deeply"),
    {
        "name": "layout-file-missing",
        "kind": "layout",
        "files": {},
        "target": "nowhere.json",
        "expect": "file not found",
        "where": "nowhere.json",
    },
    # ------------------------------------------------------------------ shows
    _show_case(
        "show-missing-layout-file",
        _show(layout="layouts/missing.json"),
        "layout file not found",
        where="show.json: layout",
    ),
    _show_case(
        "show-broken-layout",
        GOOD_SHOW,
        'missing required key "output"',
        where="pair.json: speakers[0]",
        layout=_j(_layout(speakers=[_sp(azimuth=0)])),
    ),
    _show_case("show-not-json", '{"layout": "pair.json", "sources": [}', "not valid JSON", where="show.json line 1"),
    _show_case("show-not-utf8", b'{"layout": "pair.json", "name": "\xff"}', "not UTF-8"),
    _show_case(
        "show-duplicate-source-id",
        _show(sources=[{"id": "vox", "input": 1}, {"id": "vox", "input": 2}]),
        'duplicate source id "vox"',
        where="show.json: sources[1].id",
    ),
    _show_case(
        "show-unknown-top-key",
        dict(_show(), sorces=[]),
        'unknown key "sorces" (did you mean "sources"?)',
        where="show.json",
    ),
    _show_case(
        "show-digits-source-id",
        _show(sources=[{"id": "12", "input": 1}]),
        'invalid source id "12"',
        where="show.json: sources[0].id",
    ),
    _show_case(
        "show-wildcard-source-id",
        _show(sources=[{"id": "vox*", "input": 1}]),
        'invalid source id "vox*"',
    ),
    _show_case(
        "show-source-id-with-space",
        _show(sources=[{"id": "lead vox", "input": 1}]),
        'invalid source id "lead vox"',
    ),
    _show_case(
        "show-missing-input",
        _show(sources=[{"id": "vox"}]),
        'missing required key "input"',
        where="show.json: sources[0]",
    ),
    _show_case(
        "show-input-zero",
        _show(sources=[{"id": "vox", "input": 0}]),
        "must be from 1 to 1024",
        where="show.json: sources[0].input",
    ),
    _show_case(
        "show-no-sources",
        _show(sources=[]),
        "the show has no sources",
    ),
    _show_case(
        "show-direct-unknown-speaker",
        _show(sources=[{"id": "fx", "input": 1, "panner": "direct", "direct": {"L": 0, "X9": -3}}]),
        'unknown speaker "X9"',
        where="show.json: sources[0].direct.X9",
    ),
    _show_case(
        "show-direct-missing",
        _show(sources=[{"id": "fx", "input": 1, "panner": "direct"}]),
        'panner "direct" needs "direct"',
        where="show.json: sources[0]",
    ),
    _show_case(
        "show-direct-without-direct-panner",
        _show(sources=[{"id": "fx", "input": 1, "direct": {"L": 0}}]),
        '"direct" is only used with "panner": "direct"',
    ),
    _show_case(
        "show-direct-gain-string",
        _show(sources=[{"id": "fx", "input": 1, "panner": "direct", "direct": {"L": "loud"}}]),
        'expected a number, got "loud"',
        where="show.json: sources[0].direct.L",
    ),
    _show_case(
        "show-unknown-source-panner",
        _show(sources=[{"id": "fx", "input": 1, "panner": "ambisonic"}]),
        'unknown panner "ambisonic"',
    ),
    _show_case(
        "show-bad-position-length",
        _show(sources=[{"id": "vox", "input": 1, "position": [1]}]),
        "expected 2 or 3 items, got 1",
        where="show.json: sources[0].position",
    ),
    _show_case(
        "show-both-position-forms",
        _show(sources=[{"id": "vox", "input": 1, "position": [1, 2], "distance": 3}]),
        "both position forms",
    ),
    _show_case(
        "show-gain-bool",
        _show(sources=[{"id": "vox", "input": 1, "gain_db": False}]),
        "expected a number, got false",
        where="show.json: sources[0].gain_db",
    ),
    _show_case(
        "show-gain-nan",
        '{"layout": "pair.json", "sources": [{"id": "vox", "input": 1, "gain_db": NaN}]}',
        "NaN is not allowed",
        where="show.json: sources[0].gain_db",
    ),
    _show_case(
        "show-spread-out-of-range",
        _show(sources=[{"id": "vox", "input": 1, "spread": 400}]),
        "must be from 0 to 360",
    ),
    _show_case(
        "show-file-not-string",
        _show(sources=[{"id": "vox", "input": 1, "file": 3}]),
        "expected a string, got 3",
        where="show.json: sources[0].file",
    ),
    _show_case(
        "show-glide-zero",
        _show(glide_ms=0),
        "must be from 1 to 10000 ms",
        where="show.json: glide_ms",
    ),
    _show_case(
        "show-samplerate-string",
        _show(samplerate="48k"),
        'expected an integer, got "48k"',
    ),
    _show_case(
        "show-master-gain-too-high",
        _show(master_gain_db=20),
        "must be from -120 to 12 dB",
    ),
    _show_case(
        "show-layout-not-string",
        _show(layout=["pair.json"]),
        "expected a string, got a list",
        where="show.json: layout",
    ),
    _show_case(
        "show-cues-wrong-type",
        _show(cues="later"),
        'expected a list, got "later"',
        where="show.json: cues",
    ),
    _show_case(
        "show-cue-negative-fade",
        _show(cues=[{"number": 1, "fade": -2, "targets": {"vox": {"azimuth": 30}}}]),
        "",
        where="show.json: cues[0].fade",
    ),
    _show_case(
        "show-cue-unknown-source",
        _show(cues=[{"number": 1, "targets": {"drums": {"gain_db": -6}}}]),
        "drums",
        where="show.json: cues[0].targets.drums",
    ),
    _show_case(
        "show-cue-duplicate-number",
        _show(cues=[{"number": 2.5}, {"number": "2.5"}]),
        "duplicate cue number",
        where="show.json: cues[1].number",
    ),
    _show_case(
        "show-cue-bad-motion",
        _show(cues=[{"number": 1, "targets": {"vox": {"motion": {"kind": "orbit", "radius": -1, "period": 10}}}}]),
        "",
        where="show.json: cues[0].targets.vox.motion.radius",
    ),
    _show_case(
        "show-mapping-empty-input-range",
        _show(mappings=[{"address": "/sensor/a", "source": "vox", "param": "distance", "in": [5, 5], "out": [1, 4]}]),
        "",
        where="show.json: mappings[0].in",
    ),
    _show_case(
        "show-mapping-takes-a-control-address",
        _show(mappings=[{"address": "/source/vox/gain", "source": "vox", "param": "gain_db", "in": [0, 1], "out": [-40, 0]}]),
        "",
        where="show.json: mappings[0].address",
    ),
    _show_case(
        "show-mapping-unknown-param",
        _show(mappings=[{"address": "/sensor/a", "source": "vox", "param": "colour", "in": [0, 1], "out": [0, 1]}]),
        "colour",
        where="show.json: mappings[0].param",
    ),
    # ------------------------------------------------------------------ scripts
    _script_case(
        "script-unknown-source",
        "0 /source/vox/gain -3\n# comment\n\n1.5 /source/vox2/azimuth 10\n",
        'unknown source "vox2"',
        where="control.txt line 4",
    ),
    _script_case(
        "script-source-number-out-of-range",
        "0 /source/3/gain 0\n",
        "no source number 3",
        where="control.txt line 1",
    ),
    _script_case(
        "script-time-backwards",
        "0 /source/vox/gain 0\n2.0 /source/vox/gain -3\n1.5 /source/vox/gain -6\n",
        "time goes backwards",
        where="control.txt line 3",
    ),
    _script_case(
        "script-negative-time",
        "-1 /master/gain 0\n",
        "negative",
        where="control.txt line 1",
    ),
    _script_case(
        "script-time-not-a-number",
        "soon /master/gain 0\n",
        'expected a time in seconds first, got "soon"',
    ),
    _script_case("script-missing-address", "0 /master/gain 0\n1.0\n", "expected an address", where="control.txt line 2"),
    _script_case(
        "script-not-utf8",
        b"0 /master/gain 0\n1 /source/vox/gain -3 # caf\xe9\n",
        "not UTF-8",
        where="control.txt line 2",
    ),
    _script_case(
        "script-unknown-address",
        "0 /source/vox/azimut 10\n",
        'unknown address "/source/vox/azimut"',
    ),
    _script_case("script-reserved-cue", "0 /cue/go 1\n", "fires the live server's cues"),
    _script_case(
        "script-bad-arg-count",
        "0 /source/vox/azimuth 10 20\n",
        "takes 1 argument",
    ),
    _script_case(
        "script-position-one-coordinate",
        "0 /source/vox/position 1\n",
        "takes 2 or 3 arguments",
    ),
    _script_case(
        "script-bad-type",
        "0 /source/vox/azimuth left\n",
        'expected a number for <deg>, got "left"',
    ),
    _script_case("script-nan", "0 /source/vox/gain nan\n", "not a finite number"),
    _script_case("script-inf", "0 /source/gtr/distance inf\n", "not a finite number"),
    _script_case(
        "script-elevation-out-of-range",
        "0 /source/vox/elevation 95\n",
        "out of range (-90 .. 90 degrees)",
    ),
    _script_case("script-giant-number", "0 /master/gain " + "9" * 5000 + "\n", "not a finite number"),
    _script_case("script-master-gain-too-high", "0 /master/gain 18\n", "out of range (-120 .. 12 dB)"),
    _script_case("script-mute-not-flag", "0 /source/vox/mute 0.5\n", "is not 0 or 1"),
    _script_case("script-no-slash", "0 master/gain 0\n", 'addresses start with "/"'),
    {
        "name": "script-file-missing",
        "kind": "script",
        "files": {"pair.json": GOOD_LAYOUT, "show.json": GOOD_SHOW},
        "target": "control.txt",
        "show": "show.json",
        "expect": "control script not found",
        "where": "control.txt",
    },
]

# the lead adds (they need panning / the renderer): all speakers in one plane for a 3-D
# panner, a missing audio file, an audio file at the wrong sample rate.

assert len({c["name"] for c in CASES}) == len(CASES), "case names must be unique"
