"""Synthesised audio for the example show, so the demo needs no downloads.

Our own scenario, "harbour at dusk": a buoy bell, waves, a boat engine and
gulls. Deterministic (fixed seed), mono, 48 kHz, written as 16-bit WAV files.
``ensure_demo_audio(folder)`` writes the files that are missing.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

SAMPLERATE = 48000
DURATION_S = 24.0
FILES = ("buoy.wav", "waves.wav", "engine.wav", "gulls.wav")


def _t(n: int) -> np.ndarray:
    return np.arange(n, dtype=np.float64) / SAMPLERATE


def _level(x: np.ndarray, rms_dbfs: float) -> np.ndarray:
    """Scale to an RMS level in dB FS (AES17: full-scale sine = 0 dB FS)."""
    rms = np.sqrt(np.mean(x**2)) * np.sqrt(2.0)
    return x * (10 ** (rms_dbfs / 20.0) / max(rms, 1e-12))


def buoy(n: int, rng: np.random.Generator) -> np.ndarray:
    """An inharmonic bell struck every 3 s, long decay."""
    t = _t(n)
    out = np.zeros(n)
    partials = [(311.0, 1.0, 2.5), (523.0, 0.6, 1.8), (797.0, 0.4, 1.2), (1133.0, 0.25, 0.8), (1670.0, 0.15, 0.5)]
    for start in np.arange(0.25, n / SAMPLERATE, 3.0):
        i0 = int(start * SAMPLERATE)
        tt = t[: n - i0]
        strike = np.zeros_like(tt)
        for f, a, tau in partials:
            strike += a * np.sin(2 * np.pi * f * tt + rng.uniform(0, 2 * np.pi)) * np.exp(-tt / tau)
        attack = np.minimum(tt / 0.002, 1.0)
        out[i0:] += strike * attack
    return _level(out, -20.0)


def waves(n: int, rng: np.random.Generator) -> np.ndarray:
    """Brown-ish noise with slow swells, like surf on a breakwater."""
    white = rng.standard_normal(n)
    spec = np.fft.rfft(white)
    f = np.fft.rfftfreq(n, 1.0 / SAMPLERATE)
    shape = 1.0 / np.sqrt(np.maximum(f, 40.0))  # pink-ish tilt
    shape[f > 6000] *= np.exp(-(f[f > 6000] - 6000) / 3000)
    noise = np.fft.irfft(spec * shape, n)
    t = _t(n)
    swell = 0.35 + 0.65 * (0.5 - 0.5 * np.cos(2 * np.pi * t / 6.5)) ** 2
    return _level(noise * swell, -24.0)


def engine(n: int, rng: np.random.Generator) -> np.ndarray:
    """A slow diesel: 11 Hz firing pulses on a 55 Hz tone with harmonics (good for the sub send)."""
    t = _t(n)
    tone = sum(a * np.sin(2 * np.pi * 55.0 * k * t) for k, a in ((1, 1.0), (2, 0.5), (3, 0.3), (5, 0.15)))
    pulses = 0.55 + 0.45 * np.maximum(np.sin(2 * np.pi * 11.0 * t), 0.0) ** 3
    wobble = 1.0 + 0.05 * np.sin(2 * np.pi * 0.3 * t)
    return _level(tone * pulses * wobble, -22.0)


def gulls(n: int, rng: np.random.Generator) -> np.ndarray:
    """Falling chirps at random moments."""
    out = np.zeros(n)
    t_call = 0.6
    while t_call < n / SAMPLERATE - 1.0:
        for k in range(rng.integers(2, 5)):
            start = t_call + k * 0.22
            dur = rng.uniform(0.12, 0.2)
            i0, m = int(start * SAMPLERATE), int(dur * SAMPLERATE)
            if i0 + m >= n:
                break
            tt = np.arange(m) / SAMPLERATE
            f0, f1 = rng.uniform(2200, 2800), rng.uniform(1200, 1600)
            phase = 2 * np.pi * (f0 * tt + (f1 - f0) * tt**2 / (2 * dur))
            env = np.sin(np.pi * tt / dur) ** 2
            out[i0 : i0 + m] += env * (np.sin(phase) + 0.3 * np.sin(2 * phase))
        t_call += rng.uniform(1.5, 3.5)
    return _level(out, -26.0)


GENERATORS = {"buoy.wav": buoy, "waves.wav": waves, "engine.wav": engine, "gulls.wav": gulls}


def ensure_demo_audio(folder: Path, force: bool = False) -> list[Path]:
    """Write the demo's audio files into ``folder`` if missing; return the paths written."""
    import soundfile as sf

    folder.mkdir(parents=True, exist_ok=True)
    n = int(DURATION_S * SAMPLERATE)
    written = []
    for seed, name in enumerate(FILES):
        path = folder / name
        if path.exists() and not force:
            continue
        rng = np.random.default_rng(1000 + seed)
        x = GENERATORS[name](n, rng)
        fade = np.minimum(1.0, np.minimum(np.arange(n), np.arange(n)[::-1]) / (0.05 * SAMPLERATE))
        x = np.clip(x * fade, -0.98, 0.98)
        tmp = path.with_suffix(".tmp.wav")
        sf.write(str(tmp), x.astype(np.float32), SAMPLERATE, subtype="PCM_16")
        tmp.replace(path)
        written.append(path)
    return written


if __name__ == "__main__":  # python -m fieldmix.demo_audio FOLDER
    import sys

    for p in ensure_demo_audio(Path(sys.argv[1] if len(sys.argv) > 1 else "configs/shows/audio"), force=True):
        print(p)
