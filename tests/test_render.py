"""Offline render end to end: the same engine and show state as the live path."""

from __future__ import annotations

import math

import numpy as np
import pytest
import soundfile as sf

from conftest import run_cli, write_files, write_tone

STEREO_VBAP = {
    "name": "pair",
    "panner": "vbap",
    "speakers": [
        {"id": "L", "output": 1, "azimuth": 30, "elevation": 0, "distance": 2},
        {"id": "R", "output": 2, "azimuth": -30, "elevation": 0, "distance": 2},
    ],
}


def _show(source_extra=None, **top):
    src = {"id": "tone", "input": 1, "file": "tone.wav", "azimuth": 15, "distance": 2}
    src.update(source_extra or {})
    show = {"layout": "pair.json", "sources": [src]}
    show.update(top)
    return show


def _rms(x):
    return float(np.sqrt(np.mean(np.asarray(x, dtype=np.float64) ** 2)))


def test_tangent_law_level_ratio_end_to_end(tmp_path):
    """A 1 kHz source at azimuth 15 on a +-30 pair with vbap: channel ratio of the tangent law.

    Tangent law (Bennett, Barker & Edeko, JAES 33(5), 1985; 2-D VBAP obeys it, Pulkki 1997):
    (gL - gR)/(gL + gR) = tan(15)/tan(30) = 0.4641, so gL/gR = 1.4641/0.5359 -> 8.73 dB.
    """
    write_files(tmp_path, {"pair.json": STEREO_VBAP, "show.json": _show()})
    write_tone(tmp_path / "tone.wav", seconds=3.0)
    out = tmp_path / "out.wav"
    r = run_cli("render", tmp_path / "show.json", "-o", out, "-q")
    assert r.returncode == 0, r.stderr
    y, sr = sf.read(str(out), always_2d=True)
    assert sr == 48000 and y.shape[1] == 2
    seg = y[int(1.5 * sr) : int(2.5 * sr)]  # after the start fade-in
    measured = 20 * math.log10(_rms(seg[:, 0]) / _rms(seg[:, 1]))
    q = math.tan(math.radians(15)) / math.tan(math.radians(30))
    expected = 20 * math.log10((1 + q) / (1 - q))
    assert abs(measured - expected) < 0.05, (measured, expected)
    # and the power of the pair is that of the source (constant power, master 0 dB)
    src_rms = 0.25 / math.sqrt(2)
    assert abs(20 * math.log10(math.hypot(_rms(seg[:, 0]), _rms(seg[:, 1])) / src_rms)) < 0.05


def test_scripted_move_starts_at_its_time(tmp_path):
    """A script line at 1.000 s moves the source; the output changes from that sample on (within one block)."""
    write_files(
        tmp_path,
        {
            "pair.json": STEREO_VBAP,
            "show.json": _show(),
            "move.txt": "# move the tone to the right\n1.000 /source/tone/azimuth -15\n",
        },
    )
    write_tone(tmp_path / "tone.wav", seconds=2.0)
    block = 256
    a, b = tmp_path / "still.wav", tmp_path / "moved.wav"
    assert run_cli("render", tmp_path / "show.json", "-o", a, "-q", "--blocksize", block).returncode == 0
    r = run_cli("render", tmp_path / "show.json", "-o", b, "-q", "--blocksize", block, "--script", tmp_path / "move.txt")
    assert r.returncode == 0, r.stderr
    ya, sr = sf.read(str(a), always_2d=True)
    yb, _ = sf.read(str(b), always_2d=True)
    diff = np.abs(ya - yb).max(axis=1)
    first = int(np.argmax(diff > 1e-6))
    assert diff[first] > 1e-6
    assert sr - block <= first <= sr + block, first
    # after the glide the tone sits at -15: the mirror image of +15
    seg = yb[int(1.5 * sr) :]
    assert _rms(seg[:, 1]) > 2.5 * _rms(seg[:, 0])


def test_render_channel_per_output_and_unused_silent(tmp_path):
    """The file has one channel per interface output up to the highest used; unused ones are silent."""
    lay = {
        "panner": "vbap",
        "speakers": [
            {"id": "L", "output": 3, "azimuth": 30, "distance": 2},
            {"id": "R", "output": 4, "azimuth": -30, "distance": 2},
        ],
    }
    write_files(tmp_path, {"pair.json": lay, "show.json": _show({"azimuth": 30})})
    write_tone(tmp_path / "tone.wav", seconds=2.0)
    out = tmp_path / "o.wav"
    r = run_cli("render", tmp_path / "show.json", "-o", out, "-q", "--duration", "1.5")
    assert r.returncode == 0, r.stderr
    y, sr = sf.read(str(out), always_2d=True)
    assert y.shape == (int(1.5 * sr), 4)
    assert np.abs(y[:, :2]).max() == 0.0
    assert _rms(y[sr:, 2]) > 100 * _rms(y[sr:, 3]) + 1e-9  # at +30 the image is on L only


def test_demo_renders(tmp_path):
    """The built-in demo renders the example show and says what it wrote."""
    out = tmp_path / "demo.wav"
    r = run_cli("demo", "--out", out, "-q", timeout=300)
    assert r.returncode == 0, r.stderr
    assert "wrote" in r.stdout and str(out) in r.stdout
    y, sr = sf.read(str(out), always_2d=True)
    assert y.shape[0] > 10 * sr and np.isfinite(y).all()
    assert np.abs(y).max() <= 10 ** (-1 / 20) + 1e-6  # the ceiling (-1 dB FS) holds
    assert (np.sqrt((y**2).mean(axis=0)) > 1e-4).sum() >= 4  # sound reaches several speakers
