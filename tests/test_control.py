"""The control grammar: every address, argument checks, ids and numbers, the pattern hook,
scripts, format_line round trips, and the script cases of the bad-input corpus."""

import fnmatch
import math
import re
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fieldmix.control import (
    ADDRESSES,
    AddressSpec,
    ArgSpec,
    Command,
    ScriptEvent,
    command_to_message,
    format_line,
    parse_message,
    parse_script,
    parse_script_text,
    parse_token,
)
from fieldmix.errors import ConfigError, ControlError
from fieldmix.show import load_show

import bad_inputs

ROOT = Path(__file__).resolve().parents[1]
IDS = ("vox", "gtr", "kick.in", "fx_2")


def one(address, *args, ids=IDS, **kw):
    cmds = parse_message(address, args, ids, **kw)
    assert len(cmds) == 1
    return cmds[0]


def err(address, *args, ids=IDS, **kw) -> ControlError:
    with pytest.raises(ControlError) as e:
        parse_message(address, args, ids, **kw)
    assert e.value.reason in ControlError.REASONS
    assert "\n" not in str(e.value)
    return e.value


# ------------------------------------------------------------------ every address


@pytest.mark.parametrize(
    "address, args, expected",
    [
        ("/source/vox/azimuth", (45,), Command("source", 0, "azimuth", (45.0,))),
        ("/source/vox/azimuth", (-12.5,), Command("source", 0, "azimuth", (-12.5,))),
        ("/source/gtr/elevation", (30,), Command("source", 1, "elevation", (30.0,))),
        ("/source/gtr/elevation", (-90.0,), Command("source", 1, "elevation", (-90.0,))),
        ("/source/kick.in/distance", (2,), Command("source", 2, "distance", (2.0,))),
        ("/source/kick.in/distance", (0.0,), Command("source", 2, "distance", (0.0,))),
        ("/source/fx_2/position", (1, 2), Command("source", 3, "position", (1.0, 2.0))),
        ("/source/fx_2/position", (1.5, -2, 0.25), Command("source", 3, "position", (1.5, -2.0, 0.25))),
        ("/source/vox/gain", (-6,), Command("source", 0, "gain", (-6.0,))),
        ("/source/vox/gain", (24.0,), Command("source", 0, "gain", (24.0,))),
        ("/source/vox/mute", (1,), Command("source", 0, "mute", (1.0,))),
        ("/source/vox/mute", (0.0,), Command("source", 0, "mute", (0.0,))),
        ("/source/vox/solo", (1,), Command("source", 0, "solo", (1.0,))),
        ("/source/vox/solo", (0,), Command("source", 0, "solo", (0.0,))),
        ("/source/vox/spread", (360,), Command("source", 0, "spread", (360.0,))),
        ("/source/vox/spread", (0.0,), Command("source", 0, "spread", (0.0,))),
        ("/master/gain", (-3,), Command("master", None, "gain", (-3.0,))),
        ("/master/gain", (12.0,), Command("master", None, "gain", (12.0,))),
        ("/master/mute", (1,), Command("master", None, "mute", (1.0,))),
        ("/master/mute", (0,), Command("master", None, "mute", (0.0,))),
    ],
)
def test_every_address(address, args, expected):
    cmd = one(address, *args)
    assert cmd == expected
    assert all(type(v) is float for v in cmd.value)


def test_table_covers_the_documented_addresses():
    assert set(ADDRESSES) == {
        "/source/<id>/azimuth", "/source/<id>/elevation", "/source/<id>/distance",
        "/source/<id>/position", "/source/<id>/gain", "/source/<id>/mute", "/source/<id>/solo",
        "/source/<id>/spread", "/master/gain", "/master/mute",
    }
    for spec in ADDRESSES.values():
        assert spec.doc and spec.args and spec.target in ("source", "master")


def test_docs_mirror_the_table():
    doc = (ROOT / "docs" / "control-script.md").read_text(encoding="utf-8")
    for spec in ADDRESSES.values():
        row = [line for line in doc.splitlines() if f"`{spec.template}`" in line]
        assert row, f"{spec.template} missing from docs/control-script.md"
        assert f"`{spec.arg_text}`" in row[0], (spec.template, spec.arg_text)
        assert spec.range_text in row[0], (spec.template, spec.range_text)
        assert spec.doc in row[0], (spec.template, spec.doc)


def test_numpy_numbers_accepted():
    assert one("/source/vox/gain", np.float32(-3.5)).value == (-3.5,)
    assert one("/source/vox/azimuth", np.int64(10)).value == (10.0,)


@pytest.mark.parametrize(
    "given_az, expected", [(190, -170.0), (-180, 180.0), (180, 180.0), (540, 180.0), (-190.0, 170.0), (720, 0.0), (1e6, -80.0)]
)
def test_azimuth_wraps(given_az, expected):
    assert one("/source/vox/azimuth", given_az).value[0] == pytest.approx(expected, abs=1e-9)


# ------------------------------------------------------------------ ids and numbers


def test_id_and_number_are_the_same_source():
    for i, sid in enumerate(IDS, start=1):
        assert one(f"/source/{sid}/gain", -1) == one(f"/source/{i}/gain", -1)
    assert one("/source/3/spread", 10).source == 2


def test_number_out_of_range_and_zero():
    assert err("/source/0/gain", 0).reason == "unknown_source"
    e = err("/source/5/gain", 0)
    assert e.reason == "unknown_source" and "4 sources" in e.message


def test_unknown_source_suggests():
    e = err("/source/vox2/gain", 0)
    assert e.reason == "unknown_source" and 'unknown source "vox2"' in e.message and '"vox"' in e.message


def test_ids_are_case_sensitive_and_exact_without_match():
    assert err("/source/VOX/gain", 0).reason == "unknown_source"
    assert err("/source/*/gain", 0).reason == "unknown_source"
    assert err("/source/vo?/gain", 0).reason == "unknown_source"


# ------------------------------------------------------------------ error reasons


@pytest.mark.parametrize(
    "address, args, reason",
    [
        ("/source/vox/azimut", (1,), "unknown_address"),
        ("/source/vox", (1,), "unknown_address"),
        ("/source/vox/gain/", (1,), "unknown_address"),
        ("/master", (1,), "unknown_address"),
        ("/Master/gain", (1,), "unknown_address"),
        ("master/gain", (1,), "unknown_address"),
        ("", (), "unknown_address"),
        ("/cue/go", (), "unknown_address"),
        ("/cue", (), "unknown_address"),
        ("/source/nobody/gain", (1,), "unknown_source"),
        ("/source/vox/gain", (), "bad_arg_count"),
        ("/source/vox/gain", (1, 2), "bad_arg_count"),
        ("/source/vox/position", (1,), "bad_arg_count"),
        ("/source/vox/position", (1, 2, 3, 4), "bad_arg_count"),
        ("/master/mute", (), "bad_arg_count"),
        ("/source/vox/gain", ("-3",), "bad_type"),
        ("/source/vox/gain", (True,), "bad_type"),
        ("/source/vox/mute", (False,), "bad_type"),
        ("/source/vox/gain", (b"\x00",), "bad_type"),
        ("/source/vox/gain", (None,), "bad_type"),
        ("/source/vox/position", (1, "2"), "bad_type"),
        ("/source/vox/gain", (float("nan"),), "not_finite"),
        ("/source/vox/azimuth", (float("inf"),), "not_finite"),
        ("/source/vox/position", (1, float("-inf")), "not_finite"),
        ("/source/vox/elevation", (90.001,), "out_of_range"),
        ("/source/vox/elevation", (-91,), "out_of_range"),
        ("/source/vox/distance", (-0.1,), "out_of_range"),
        ("/source/vox/distance", (1000.5,), "out_of_range"),
        ("/source/vox/position", (0, 1000.5), "out_of_range"),
        ("/source/vox/position", (-1001, 0, 0), "out_of_range"),
        ("/source/vox/gain", (24.01,), "out_of_range"),
        ("/source/vox/gain", (-121,), "out_of_range"),
        ("/source/vox/gain", (10**400,), "out_of_range"),
        ("/master/gain", (12.5,), "out_of_range"),
        ("/source/vox/mute", (2,), "out_of_range"),
        ("/source/vox/mute", (0.5,), "out_of_range"),
        ("/source/vox/mute", (-1,), "out_of_range"),
        ("/master/mute", (1.0001,), "out_of_range"),
        ("/source/vox/spread", (360.5,), "out_of_range"),
        ("/source/vox/spread", (-1,), "out_of_range"),
    ],
)
def test_error_reasons(address, args, reason):
    e = err(address, *args)
    assert e.reason == reason, e.message


def test_args_must_be_a_sequence_not_a_string():
    assert err("/master/gain").reason == "bad_arg_count"
    with pytest.raises(ControlError) as e:
        parse_message("/master/gain", "3", IDS)
    assert e.value.reason == "bad_type"


def test_non_string_address():
    with pytest.raises(ControlError) as e:
        parse_message(42, (1,), IDS)
    assert e.value.reason == "unknown_address"


def test_messages_name_the_address():
    assert "/source/vox/elevation" in err("/source/vox/elevation", 95).message
    assert "-90 .. 90" in err("/source/vox/elevation", 95).message
    assert "<x> <y> [<z>]" in err("/source/vox/position", 1).message
    assert "fires the live server's cues" in err("/cue/1/go").message
    assert '"/source/vox/azimuth"' in err("/source/vox/azimut", 1).message


# ------------------------------------------------------------------ the pattern hook


def _glob(pattern, candidates):
    # a stand-in matcher for the hook (shell globbing, not OSC 1.0): enough to test the wiring;
    # a candidate is a name or a tuple of names (a source's id and its 1-based index)
    return [
        i
        for i, c in enumerate(candidates)
        if any(fnmatch.fnmatchcase(n, pattern) for n in ((c,) if isinstance(c, str) else c))
    ]


def test_match_hook_selects_several_sources():
    cmds = parse_message("/source/*/mute", (1,), IDS, match=_glob)
    assert [c.source for c in cmds] == [0, 1, 2, 3]
    assert all(c.param == "mute" and c.value == (1.0,) for c in cmds)
    cmds = parse_message("/source/[gk]*/gain", (-3,), IDS, match=_glob)
    assert [c.source for c in cmds] == [1, 2]


def test_match_hook_numbers_still_work_and_nothing_matched_is_unknown_source():
    assert parse_message("/source/2/gain", (0,), IDS, match=_glob)[0].source == 1
    with pytest.raises(ControlError) as e:
        parse_message("/source/z*/gain", (0,), IDS, match=_glob)
    assert e.value.reason == "unknown_source"


def test_match_hook_on_literal_parts():
    cmds = parse_message("/master/*", (1,), IDS, match=_glob)
    assert sorted(c.param for c in cmds) == ["gain", "mute"]
    # /source/vox/* with 1: position needs 2 args and is left out; the others apply
    cmds = parse_message("/source/vox/*", (1,), IDS, match=_glob)
    assert sorted(c.param for c in cmds) == ["azimuth", "distance", "elevation", "gain", "mute", "solo", "spread"]
    # /source/vox/* with 0.5: mute refuses it, the rest take it
    assert "mute" not in {c.param for c in parse_message("/source/vox/*", (0.5,), IDS, match=_glob)}
    # when nothing fits, the first error is raised
    with pytest.raises(ControlError) as e:
        parse_message("/master/*", (100,), IDS, match=_glob)
    assert e.value.reason == "out_of_range"


def test_match_hook_bad_indices_are_ignored():
    with pytest.raises(ControlError) as e:
        parse_message("/source/x/gain", (0,), IDS, match=lambda p, c: [99])
    assert e.value.reason == "unknown_source"


def test_extra_addresses_can_be_added():
    extra = AddressSpec("/source/<id>/width", "source", "width", (ArgSpec("deg", 0.0, 180.0, "degrees"),), doc="x")
    table = {**ADDRESSES, extra.template: extra}
    assert parse_message("/source/gtr/width", (90,), IDS, addresses=table) == [Command("source", 1, "width", (90.0,))]
    assert err("/source/gtr/width", 90).reason == "unknown_address"  # not in the default table


# ------------------------------------------------------------------ scripts


SCRIPT = """\
# a header comment
0 /master/mute 1

0.0   /source/vox/azimuth 30     # trailing comment
0.5 /source/2/position 1 2.5
0.5\t/source/kick.in/position -1 0 1.25
2   /master/gain -6
2   /master/mute 0
"""


def test_parse_script_text():
    ev = parse_script_text(SCRIPT, "s.txt", IDS)
    assert [e.line for e in ev] == [2, 4, 5, 6, 7, 8]
    assert [e.time for e in ev] == [0.0, 0.0, 0.5, 0.5, 2.0, 2.0]
    assert all(isinstance(e, ScriptEvent) and isinstance(e.time, float) for e in ev)
    assert ev[1] == ScriptEvent(0.0, 4, "/source/vox/azimuth", (30,), (Command("source", 0, "azimuth", (30.0,)),))
    assert ev[2].args == (1, 2.5) and ev[2].commands[0] == Command("source", 1, "position", (1.0, 2.5))
    assert ev[3].commands[0].value == (-1.0, 0.0, 1.25)
    assert ev[4].commands[0] == Command("master", None, "gain", (-6.0,))


def test_parse_script_file_and_bom(tmp_path):
    p = tmp_path / "c.txt"
    p.write_bytes(b"\xef\xbb\xbf0 /master/gain -3\r\n1e0 /master/gain -4\r\n")
    ev = parse_script(p, IDS)
    assert [(e.time, e.args) for e in ev] == [(0.0, (-3,)), (1.0, (-4,))]


def test_empty_script(tmp_path):
    assert parse_script_text("# nothing\n\n   \n", "e.txt", IDS) == []


def test_script_errors_name_the_line():
    with pytest.raises(ConfigError) as e:
        parse_script_text("0 /master/gain 0\n\n3 /source/vox2/gain 1\n", "control.txt", IDS)
    assert e.value.where == "control.txt line 3"
    assert str(e.value).startswith('control.txt line 3: unknown source "vox2"')


def test_script_inf_time_rejected():
    with pytest.raises(ConfigError, match="not a finite number"):
        parse_script_text("inf /master/gain 0\n", "c.txt", IDS)


def test_script_with_match_hook():
    ev = parse_script_text("0 /source/*/mute 1\n", "c.txt", IDS, match=_glob)
    assert len(ev[0].commands) == 4


@pytest.mark.parametrize(
    "tok, value",
    [("1", 1), ("-2", -2), ("+3", 3), ("1.5", 1.5), ("-.5", -0.5), ("1e3", 1000.0), ("2.", 2.0),
     ("abc", "abc"), ("1_0", "1_0"), ("0x10", "0x10")],
)
def test_parse_token(tok, value):
    got = parse_token(tok)
    assert got == value and type(got) is type(value)


def test_parse_token_inf_nan():
    assert math.isinf(parse_token("inf")) and math.isinf(parse_token("-Infinity"))
    assert math.isnan(parse_token("nan")) and math.isnan(parse_token("NaN"))


# ------------------------------------------------------------------ format_line


def test_format_line_examples():
    assert format_line(0, "/master/gain", [-6]) == "0 /master/gain -6"
    assert format_line(1.5, "/source/vox/position", [1, 0.1, -2.0]) == "1.5 /source/vox/position 1 0.1 -2.0"
    assert format_line(2.0, "/source/vox/gain", (np.float32(0.5),)) == "2.0 /source/vox/gain 0.5"


@pytest.mark.parametrize(
    "time, address, args",
    [
        (-1, "/master/gain", [0]),
        (float("nan"), "/master/gain", [0]),
        (True, "/master/gain", [0]),
        (0, "master/gain", [0]),
        (0, "/master gain", [0]),
        (0, "/master/gain#", [0]),
        (0, "/master/gain", [True]),
        (0, "/master/gain", [None]),
        (0, "/master/gain", ["two words"]),
        (0, "/master/gain", ["12"]),
        (0, "/master/gain", [""]),
        (0, "/master/gain", ["a#b"]),
    ],
)
def test_format_line_refuses(time, address, args):
    with pytest.raises(ValueError):
        format_line(time, address, args)


finite = st.floats(allow_nan=False, allow_infinity=False, min_value=-1000, max_value=1000)


@settings(max_examples=200, deadline=None)
@given(
    t=st.one_of(st.integers(0, 10**6), st.floats(0, 1e6, allow_nan=False)),
    x=st.one_of(finite, st.integers(-1000, 1000)),
    y=st.one_of(finite, st.integers(-1000, 1000)),
    z=st.one_of(finite, st.integers(-1000, 1000)),
)
def test_round_trip_position(t, x, y, z):
    line = format_line(t, "/source/gtr/position", [x, y, z])
    (ev,) = parse_script_text(line, "r.txt", IDS)
    assert ev.time == float(t)
    assert ev.address == "/source/gtr/position"
    assert ev.args == (x, y, z) and [type(a) for a in ev.args] == [type(x), type(y), type(z)]
    assert ev.commands == (Command("source", 1, "position", (float(x), float(y), float(z))),)


def test_round_trip_every_address_and_recording():
    lines = []
    expected = []
    t = 0.0
    for spec in ADDRESSES.values():
        address = spec.template.replace("<id>", "fx_2")
        args = [1] * spec.n_min if spec.kind == "flag" else [0.1 * (k + 1) for k in range(len(spec.args))]
        lines.append(format_line(t, address, args))
        expected.append((t, address, tuple(args)))
        t += 0.125
    text = "\n".join(lines) + "\n"
    ev = parse_script_text(text, "rec.txt", IDS)
    assert [(e.time, e.address, e.args) for e in ev] == expected
    # and a command goes back to the same message
    for e in ev:
        for cmd in e.commands:
            address, args = command_to_message(cmd, IDS)
            assert parse_message(address, args, IDS) == [cmd]


def test_command_to_message():
    assert command_to_message(Command("source", 1, "gain", (-3.0,)), IDS) == ("/source/gtr/gain", (-3.0,))
    assert command_to_message(Command("master", None, "mute", (1.0,)), IDS) == ("/master/mute", (1,))
    with pytest.raises(ValueError):
        command_to_message(Command("source", 9, "gain", (0.0,)), IDS)
    with pytest.raises(ValueError):
        command_to_message(Command("source", 0, "colour", (0.0,)), IDS)


# ------------------------------------------------------------------ examples and corpus


def test_example_scripts_parse():
    shows = ROOT / "configs" / "shows"
    pairs = [(p, p.with_suffix(".txt")) for p in sorted(shows.glob("*.json")) if p.with_suffix(".txt").exists()]
    if not pairs:
        pytest.skip("no example show with a control script yet")
    for show_path, script in pairs:
        show = load_show(show_path)
        events = parse_script(script, show.source_ids)
        assert events and all(e.commands for e in events)
        assert all(a.time <= b.time for a, b in zip(events, events[1:]))


@pytest.mark.parametrize("case", bad_inputs.cases("script"), ids=lambda c: c["name"])
def test_bad_script(case, tmp_path):
    target = bad_inputs.write_files(case, tmp_path)
    show = load_show(tmp_path / case["show"])  # the show of a script case is valid
    with pytest.raises(ConfigError) as e:
        parse_script(target, show.source_ids)
    msg = str(e.value)
    assert case["expect"] in msg
    assert "\n" not in msg and "\r" not in msg
    assert e.value.where.startswith(case.get("where", target.name))
    assert re.match(r"^control\.txt( line \d+)?$", e.value.where)


def test_docs_script_example_parses():
    doc = (ROOT / "docs" / "control-script.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```[a-z]*\n(.*?)```", doc, flags=re.S)
    script = [b for b in blocks if b.lstrip().startswith("# Night walk")][0]
    events = parse_script_text(script, "docs/control-script.md", ("vox", "gtr"))
    assert len(events) == 7 and events[-1].commands == (Command("master", None, "gain", (-12.0,)),)


def test_messages_stay_one_line_for_hostile_addresses():
    for address in ("/source/a\nb/gain", "/source/x\u2028y/gain", "/bad\r\n/x", "/source/vox/ga\x00in"):
        e = err(address, 0)
        assert len(str(e).splitlines()) == 1, str(e)
    e = err("/source/vox/gain", "left\nright")
    assert len(str(e).splitlines()) == 1 and e.reason == "bad_type"


def test_line_numbers_count_newlines_only():
    # a form feed or U+2028 inside a line is whitespace, not a new line
    text = "0 /master/gain 0\x0c\n1 /master/gain\u2028-3\n2 /source/nobody/gain 0\n"
    with pytest.raises(ConfigError) as e:
        parse_script_text(text, "c.txt", IDS)
    assert e.value.where == "c.txt line 3"
    ev = parse_script_text(text.rsplit("\n2 ", 1)[0], "c.txt", IDS)
    assert [(x.line, x.args) for x in ev] == [(1, (0,)), (2, (-3,))]


def _exact(pattern, candidates):
    return [i for i, c in enumerate(candidates) if pattern in ((c,) if isinstance(c, str) else c)]


@pytest.mark.parametrize(
    "address, args",
    [("/source/vox/azimuth", (10,)), ("/source/3/position", (1, 2)), ("/master/mute", (1,)),
     ("/source/fx_2/spread", (45.5,)), ("/master/gain", (-1,))],
)
def test_fast_path_and_pattern_path_agree(address, args):
    assert parse_message(address, args, IDS) == parse_message(address, args, IDS, match=_exact)


@pytest.mark.parametrize("address", ["/source/vox/azimut", "/cue/go", "/master", "/source/vox/gain/x"])
def test_unknown_address_on_both_paths(address):
    assert err(address, 1).reason == "unknown_address"
    assert err(address, 1, match=_exact).reason == "unknown_address"


def test_an_extension_may_claim_the_reserved_prefix():
    cue = AddressSpec("/cue/go", "cue", "go", (ArgSpec("n", 1, 999),), doc="x")
    assert parse_message("/cue/go", (3,), IDS, addresses={**ADDRESSES, cue.template: cue}) == [
        Command("cue", None, "go", (3.0,))
    ]


def test_azimuth_wrap_agrees_with_geometry():
    from fieldmix import geometry

    for a in np.concatenate([np.linspace(-2000, 2000, 4001), [-180.0, 180.0, 540.0, -540.0, 1e9 + 0.5]]):
        got = one("/source/vox/azimuth", float(a)).value[0]
        assert got == pytest.approx(float(geometry.wrap_deg(a)), abs=1e-9)
        assert -180.0 < got <= 180.0


def test_match_hook_sees_ids_and_indices():
    """`/source/[1-2]/spread 30`: a pattern over 1-based indices selects those sources."""
    cmds = parse_message("/source/[1-2]/spread", (30,), IDS, match=_glob)
    assert [c.source for c in cmds] == [0, 1]
