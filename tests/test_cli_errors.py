"""Broken layouts, shows and scripts through the real command line.

Each must give exactly one clear line on stderr that names the place, exit with
status 2, print no traceback and leave no output file behind.
"""

from __future__ import annotations


import pytest

from bad_inputs import CASES
from conftest import run_cli, write_files, write_tone

PAIR = {
    "panner": "vbap",
    "speakers": [
        {"id": "L", "output": 1, "azimuth": 30, "distance": 2},
        {"id": "R", "output": 2, "azimuth": -30, "distance": 2},
    ],
}

# Cases that need the panners or the renderer (the loader corpus is in bad_inputs.py).
EXTRA = [
    {
        "name": "3-D vbap with all speakers in one vertical plane through the listener",
        "kind": "layout",
        "files": {
            "flat.json": {
                "panner": "vbap",
                "speakers": [
                    {"output": 1, "azimuth": 0, "elevation": 0, "distance": 2},
                    {"output": 2, "azimuth": 0, "elevation": 60, "distance": 2},
                    {"output": 3, "azimuth": 180, "elevation": 30, "distance": 2},
                    {"output": 4, "azimuth": 180, "elevation": -30, "distance": 2},
                ],
            }
        },
        "target": "flat.json",
        "expect": "plane",
    },
    {
        "name": "audio file missing",
        "kind": "show",
        "files": {
            "pair.json": PAIR,
            "show.json": {"layout": "pair.json", "sources": [{"id": "a", "input": 1, "file": "nothere.wav", "azimuth": 0}]},
        },
        "target": "show.json",
        "expect": "sources[0].file",
    },
    {
        "name": "audio file at another sample rate",
        "kind": "show",
        "files": {
            "pair.json": PAIR,
            "show.json": {"layout": "pair.json", "sources": [{"id": "a", "input": 1, "file": "t44.wav", "azimuth": 0}]},
        },
        "tone": ("t44.wav", 44100),
        "target": "show.json",
        "expect": "44100 Hz",
    },
    {
        "name": "audio file that is not audio",
        "kind": "show",
        "files": {
            "pair.json": PAIR,
            "junk.wav": b"RIFF\x00\x00\x00\x00this is not a wave file at all",
            "show.json": {"layout": "pair.json", "sources": [{"id": "a", "input": 1, "file": "junk.wav", "azimuth": 0}]},
        },
        "target": "show.json",
        "expect": "junk.wav",
    },
    {
        "name": "pairwise panner on a layout with no ear-level pair",
        "kind": "layout",
        "files": {
            "up.json": {
                "panner": "pairwise",
                "speakers": [
                    {"output": 1, "azimuth": 30, "elevation": 45, "distance": 2},
                    {"output": 2, "azimuth": -30, "elevation": 45, "distance": 2},
                ],
            }
        },
        "target": "up.json",
        "expect": "pairwise",
    },
]

ALL = [pytest.param(c, id=c["name"]) for c in list(CASES) + EXTRA]


def _command(case, tmp_path, out):
    target = tmp_path / case["target"]
    if case["kind"] == "layout":
        return ["layout", "check", target]
    if case["kind"] == "show":
        return ["render", target, "-o", out, "-q"]
    show = tmp_path / case.get("show", "show.json")
    return ["render", show, "-o", out, "-q", "--script", target]


@pytest.mark.parametrize("case", ALL)
def test_broken_input_gives_one_clear_line_and_exit_2(case, tmp_path):
    write_files(tmp_path, case["files"])
    if "tone" in case:
        name, sr = case["tone"]
        write_tone(tmp_path / name, sr=sr, seconds=0.5)
    out = tmp_path / "out.wav"
    r = run_cli(*_command(case, tmp_path, out), cwd=tmp_path)
    assert r.returncode == 2, (r.returncode, r.stdout, r.stderr)
    lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, r.stderr
    assert lines[0].startswith("fieldmix: error: ")
    assert "Traceback" not in r.stderr
    assert case["expect"] in lines[0], lines[0]
    assert not out.exists()
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".partial")]


def test_bad_option_values_exit_2(tmp_path):
    show = {"layout": "pair.json", "sources": [{"id": "a", "input": 1, "file": "t.wav", "azimuth": 0}]}
    write_files(tmp_path, {"pair.json": PAIR, "show.json": show})
    write_tone(tmp_path / "t.wav", seconds=0.5)
    ok = run_cli("render", tmp_path / "show.json", "-o", tmp_path / "ok.wav", "-q")
    assert ok.returncode == 0, ok.stderr  # the files are fine: only the options below are wrong
    for args in (
        ["render", tmp_path / "show.json", "-o", tmp_path / "x.wav", "--duration", "soon"],
        ["render", tmp_path / "show.json", "-o", tmp_path / "x.wav", "--duration", "-1"],
        ["render", tmp_path / "show.json", "-o", tmp_path / "x.wav", "--blocksize", "8", "--duration", "1"],
        ["render", tmp_path / "show.json", "-o", tmp_path / "x.txt", "--duration", "1"],
        ["layout", "check", tmp_path / "pair.json", "--plot", tmp_path / "p.gif"],
        ["layout", "check", tmp_path / "missing.json"],
    ):
        r = run_cli(*args)
        assert r.returncode == 2, (args, r.stderr)
        assert "Traceback" not in r.stderr
        assert "fieldmix: error:" in r.stderr
    assert not (tmp_path / "x.wav").exists()
