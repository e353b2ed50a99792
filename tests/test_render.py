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
    r = run_cli("demo", "--render", "--out", out, "-q", timeout=300)
    assert r.returncode == 0, r.stderr
    assert "wrote" in r.stdout and str(out) in r.stdout
    y, sr = sf.read(str(out), always_2d=True)
    assert y.shape[0] > 10 * sr and np.isfinite(y).all()
    assert np.abs(y).max() <= 10 ** (-1 / 20) + 1e-6  # the ceiling (-1 dB FS) holds
    assert (np.sqrt((y**2).mean(axis=0)) > 1e-4).sum() >= 4  # sound reaches several speakers


def _two_tone(path, sr=48000, seconds=2.0):
    """50 Hz + 2 kHz, each at amplitude 0.2."""
    t = np.arange(int(seconds * sr)) / sr
    x = 0.2 * np.sin(2 * np.pi * 50 * t) + 0.2 * np.sin(2 * np.pi * 2000 * t)
    sf.write(str(path), x.astype(np.float32), sr, subtype="FLOAT")


def _band_level(x, sr, f):
    """Amplitude of the component at frequency f (a whole number of periods in x)."""
    n = len(x)
    spec = np.abs(np.fft.rfft(x * np.hanning(n))) / (n / 4)
    k = int(round(f * n / sr))
    return float(spec[k - 2 : k + 3].max())


def test_direct_panner_and_sub_send_through_the_render(tmp_path):
    """`direct` feeds named speakers at fixed gains; the sub gets only the low end of the sub send.

    Sub crossover: Linkwitz-Riley 4th order low-pass at 80 Hz (common practice, no source):
    50 Hz passes (about -0.6 dB, computed from the LR4 magnitude), 2 kHz is more than 100 dB down.
    """
    lay = {
        "panner": "vbap",
        "crossover_hz": 80,
        "speakers": [
            {"id": "L", "output": 1, "azimuth": 30, "distance": 2},
            {"id": "R", "output": 2, "azimuth": -30, "distance": 2},
            {"id": "mon", "output": 3, "azimuth": 0, "distance": 1},
            {"id": "LFE", "output": 4, "azimuth": 0, "elevation": -20, "distance": 2, "sub": True},
        ],
    }
    show = {
        "layout": "lay.json",
        "sources": [
            {"id": "vox", "input": 1, "file": "two.wav", "panner": "direct", "direct": {"mon": -6}},
            {"id": "kick", "input": 2, "file": "two.wav", "azimuth": 30, "sub_send_db": 0},
        ],
    }
    write_files(tmp_path, {"lay.json": lay, "show.json": show})
    _two_tone(tmp_path / "two.wav")
    out = tmp_path / "o.wav"
    r = run_cli("render", tmp_path / "show.json", "-o", out, "-q")
    assert r.returncode == 0, r.stderr
    y, sr = sf.read(str(out), always_2d=True)
    seg = slice(int(1.2 * sr), int(1.2 * sr) + sr // 2)  # 0.5 s: whole periods of 50 Hz and 2 kHz
    left, right, mon, sub = (y[seg, k] for k in range(4))  # file channel = output - 1
    # direct: the monitor carries only vox at -6 dB (kick is at +30, on L alone)
    assert abs(20 * math.log10(_band_level(mon, sr, 2000) / 0.2) - (-6.0)) < 0.1
    assert _band_level(left, sr, 2000) == pytest.approx(0.2, rel=0.02)
    assert _band_level(right, sr, 2000) < 1e-4
    # sub: LR4 low-pass of the send
    lr4_50 = 1.0 / (1.0 + (50.0 / 80.0) ** 4)  # |H_LR4(f)| = 1 / (1 + (f/fc)^4)
    assert _band_level(sub, sr, 50) == pytest.approx(0.2 * lr4_50, rel=0.03)
    assert _band_level(sub, sr, 2000) < 0.2 * 1e-5


def test_render_rejects_nothing_to_render(tmp_path):
    show = _show()
    del show["sources"][0]["file"]
    write_files(tmp_path, {"pair.json": STEREO_VBAP, "show.json": show})
    r = run_cli("render", tmp_path / "show.json", "-o", tmp_path / "o.wav", "-q")
    assert r.returncode == 2 and "--duration" in r.stderr


@pytest.mark.parametrize("panner", ["pairwise", "vbap", "dbap"])
def test_moving_source_keeps_constant_power(tmp_path, panner):
    """Noise orbiting a ring of 8: the summed power of the speaker feeds stays put.

    Intensity is the sum of squared speaker gains (physics, no source); the render's
    total power in 100 ms windows must stay within +-0.5 dB while the source circles.
    """
    ring = {
        "panner": panner,
        "speakers": [{"output": k + 1, "azimuth": 45 * k - 180 + 45, "distance": 2} for k in range(8)],
    }
    rng = np.random.default_rng(1)
    sr = 48000
    sf.write(str(tmp_path / "noise.wav"), (0.1 * rng.standard_normal(5 * sr)).astype(np.float32), sr, subtype="FLOAT")
    script = "\n".join(f"{1.0 + k * 0.01:.2f} /source/tone/azimuth {(k * 1.2) % 360 - 180:.2f}" for k in range(300))
    write_files(
        tmp_path,
        {"ring.json": ring, "show.json": {"layout": "ring.json", "sources": [{"id": "tone", "input": 1, "file": "noise.wav", "azimuth": 0, "distance": 2}]},
         "orbit.txt": script + "\n"},
    )
    out = tmp_path / "o.wav"
    r = run_cli("render", tmp_path / "show.json", "-o", out, "-q", "--script", tmp_path / "orbit.txt")
    assert r.returncode == 0, r.stderr
    y, _ = sf.read(str(out), always_2d=True)
    win = sr // 10
    seg = y[int(1.1 * sr) : int(4.0 * sr)]
    p = (seg[: len(seg) // win * win] ** 2).sum(axis=1).reshape(-1, win).mean(axis=1)
    src = 0.01  # mean square of the source
    db = 10 * np.log10(p / src)
    assert np.abs(db).max() < 0.5, db.round(2)
    # and the image really moved: every speaker carried the source at some point
    assert ((seg**2).mean(axis=0) > 1e-4).all()
