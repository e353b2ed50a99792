"""Tests of the DSP engine (fieldmix.engine).

Reference values are computed here independently (float64 numpy, scipy.signal),
never taken from the engine itself.
"""

from __future__ import annotations

import math
import os
import subprocess
import sys
import tracemalloc

import numpy as np
import pytest
import scipy.signal

from fieldmix import _kernels
from fieldmix.engine import Engine, peak_dbfs, rms_dbfs
from fieldmix.errors import ConfigError, ControlError

FS = 48000

KERNELS = ["numpy", pytest.param("numba", marks=pytest.mark.skipif(
    not _kernels.available(), reason=f"numba not importable: {_kernels.IMPORT_ERROR}"))]


@pytest.fixture(autouse=True, params=KERNELS)
def kernels(request, monkeypatch):
    """Every test in this file runs on both elementwise paths (FIELDMIX_KERNELS)."""
    monkeypatch.setenv("FIELDMIX_KERNELS", request.param)
    return request.param


def make(n_in=2, n_out=2, **kw):
    kw.setdefault("fade_in_ms", 0.0)
    return Engine(n_in, n_out, FS, **kw)


def run(eng, x, block=256, targets=None):
    """Process x (frames, n_in) in blocks; targets: {frame index (block start): G}."""
    out = []
    targets = targets or {}
    for i in range(0, len(x), block):
        if i in targets:
            eng.set_target(targets[i])
        out.append(eng.process(np.ascontiguousarray(x[i:i + block])).copy())
    return np.concatenate(out)


def settle(eng, G, n_in, block=256, blocks=20):
    eng.set_target(G)
    z = np.zeros((block, n_in), np.float32)
    for _ in range(blocks):
        eng.process(z)
    assert not eng.ramping


class RefMixer:
    """Independent float64 model of the ramp rule: per-sample linear ramp from the
    gains of the moment to the target over max(glide, first block) samples."""

    def __init__(self, n_in, n_out, glide_samples):
        self.g = np.zeros((n_in, n_out))
        self.start = self.g.copy()
        self.target = self.g.copy()
        self.L = 1
        self.p = 1
        self.glide = glide_samples

    def set_target(self, G):
        self.pending = np.array(G, dtype=np.float64)

    def process(self, x):
        F = len(x)
        if getattr(self, "pending", None) is not None:
            self.start = self.g.copy()
            self.target = self.pending
            self.pending = None
            self.L = max(self.glide, F, 1)
            self.p = 0
        k = self.p + np.arange(1, F + 1)
        frac = np.minimum(k, self.L) / self.L
        gains = self.start[None] + frac[:, None, None] * (self.target - self.start)[None]
        self.p += F
        self.g = gains[-1]
        return np.einsum("fn,fnm->fm", x.astype(np.float64), gains)


# ---------------------------------------------------------------- ramps
def effective_gain_trace(eng, frames, block, level=0.5, changes=None):
    """One input held at `level`; output 0 / level is the effective gain per sample."""
    x = np.full((frames, 1), level, np.float32)
    y = run(eng, x, block=block, targets=changes)
    return y / level


def test_target_step_becomes_linear_ramp_across_blocks():
    eng = make(1, 2, glide_ms=30.0)
    settle(eng, [[1.0, 0.0]], 1)
    L = int(round(0.030 * FS))  # 1440 samples, more than 5 blocks of 256
    g = effective_gain_trace(eng, 4096, 256, changes={0: [[0.0, 1.0]]})
    # slope bound: 1/L of the step per sample (step = 1.0)
    dg = np.abs(np.diff(np.vstack([[1.0, 0.0], g]), axis=0))
    assert dg.max() <= (1.0 / L) * (1 + 1e-4)
    # exactly linear, reaching the target at sample L (1-based) and not before
    k = np.arange(1, 4097)
    expect = np.minimum(k, L) / L
    np.testing.assert_allclose(g[:, 1], expect, atol=2e-6)
    np.testing.assert_allclose(g[:, 0], 1.0 - expect, atol=2e-6)
    assert g[L - 2, 1] < 1.0 - 1e-4 and abs(g[L - 1, 1] - 1.0) < 1e-6
    assert not eng.ramping


def test_retarget_mid_ramp_starts_from_current_gains():
    eng = make(1, 1, glide_ms=30.0)
    settle(eng, [[0.0]], 1)
    L = 1440
    g = effective_gain_trace(eng, 4096, 64, changes={0: [[1.0]], 704: [[0.2]]})[:, 0]
    # before the retarget: the first ramp, 704 samples in
    np.testing.assert_allclose(g[:704], np.arange(1, 705) / L, atol=2e-6)
    g_then = 704 / L
    # after: a new ramp of L samples from g_then to 0.2
    k = np.arange(1, 4096 - 704 + 1)
    np.testing.assert_allclose(g[704:], g_then + np.minimum(k, L) / L * (0.2 - g_then), atol=2e-6)
    # no discontinuity: no sample-to-sample change beyond either slope
    step = np.abs(np.diff(g))
    assert step.max() <= max(1.0, abs(0.2 - g_then)) / L * (1 + 1e-4)


def test_glide_never_shorter_than_one_block():
    eng = make(1, 1, glide_ms=0.0)
    settle(eng, [[0.0]], 1, block=512)
    g = effective_gain_trace(eng, 1024, 512, changes={0: [[1.0]]})[:, 0]
    # the ramp spans the whole first block (512 samples), then holds
    np.testing.assert_allclose(g[:512], np.arange(1, 513) / 512, atol=2e-6)
    assert np.all(g[512:] == 1.0)
    assert np.abs(np.diff(g)).max() <= 1 / 512 * (1 + 1e-4)
    # and glide 5 ms (240 samples) with blocks of 1024: 1024-sample ramp
    eng.set_glide_ms(5.0)
    g = effective_gain_trace(eng, 2048, 1024, changes={0: [[0.0]]})[:, 0]
    np.testing.assert_allclose(g[:1024], 1 - np.arange(1, 1025) / 1024, atol=2e-6)


def test_ramps_match_reference_over_random_blocks_and_retargets():
    """Random block sizes 16..4096, random retargets: engine == float64 model."""
    rng = np.random.default_rng(7)
    n_in, n_out = 3, 4
    eng = make(n_in, n_out, glide_ms=20.0, ceiling_dbfs=0.0)
    ref = RefMixer(n_in, n_out, glide_samples=960)
    total = 0
    for b in range(60):
        F = int(rng.choice([16, 17, 64, 100, 256, 1000, 4096])) if b % 7 else 4096
        if rng.random() < 0.4:
            G = rng.uniform(-0.3, 0.3, (n_in, n_out))
            eng.set_target(G)
            ref.set_target(G)
        x = rng.uniform(-0.4, 0.4, (F, n_in)).astype(np.float32)
        y = eng.process(x)
        yr = ref.process(x)
        np.testing.assert_allclose(y, yr, atol=3e-6, rtol=0, err_msg=f"block {b} ({F} frames)")
        np.testing.assert_allclose(eng.current_gains(), ref.g, atol=2e-6)
        total += F
    assert total > 20000


def test_source_jump_sine_has_no_splatter_above_2khz():
    """A 100 Hz sine whose gain jumps from speaker 1 to speaker 2: with the engine's
    ramp, energy above 2 kHz is >= 60 dB below the signal in every output; the same
    jump applied as a bare step (by hand) fails that check."""
    n = FS
    t = np.arange(n) / FS
    x = (0.5 * np.sin(2 * np.pi * 100.0 * t)).astype(np.float32)[:, None]
    jump = (n // 2) // 256 * 256
    eng = make(1, 2, ceiling_dbfs=0.0)
    settle(eng, [[1.0, 0.0]], 1)
    y = run(eng, x, block=256, targets={jump: [[0.0, 1.0]]})
    seg = slice(jump - FS // 4, jump + FS // 4)

    def hf_db(sig):
        w = np.hanning(len(sig))
        P = np.abs(np.fft.rfft(sig * w)) ** 2
        f = np.fft.rfftfreq(len(sig), 1 / FS)
        return 10 * np.log10(P[f >= 2000.0].sum() / P.sum())

    for j in range(2):
        assert hf_db(y[seg, j].astype(np.float64)) <= -60.0
    g = np.zeros((n, 2))
    g[:jump, 0] = 1.0
    g[jump:, 1] = 1.0
    step = x.astype(np.float64) * g
    for j in range(2):
        assert hf_db(step[seg, j]) > -60.0  # the check can fail


# ---------------------------------------------------------------- ceiling
def test_ceiling_holds_with_20db_too_much():
    n = FS
    t = np.arange(n) / FS
    s = np.sin(2 * np.pi * 997.0 * t)
    x = (10.0 * np.stack([s, -s], axis=1)).astype(np.float32)  # full-scale sine x 10
    for block in (16, 64, 256, 4096):
        eng = make(2, 2, ceiling_dbfs=-1.0)
        eng.set_target(np.eye(2))
        y = run(eng, x, block=block)
        c = 10 ** (-1 / 20)
        assert np.abs(y).max() <= c, block
        assert eng.limiter_active and eng.limited_blocks > 0
        assert np.isfinite(y).all()
        # and the limiter is not just muting: the output is near the ceiling
        assert np.abs(y[len(y) // 2:]).max() > 0.8 * c


def test_ceiling_with_ramps_sub_and_delays():
    rng = np.random.default_rng(3)
    eng = Engine(3, 4, FS, fade_in_ms=0.0, sub_outputs=(3,), ceiling_dbfs=-3.0)
    eng.set_delays([0, 10, 100, 5])
    c = 10 ** (-3 / 20)
    for b in range(200):
        if b % 5 == 0:
            eng.set_target(rng.uniform(0, 3.0, (3, 5)))
        F = int(rng.integers(16, 600))
        y = eng.process((rng.standard_normal((F, 3)) * 2.0).astype(np.float32))
        assert np.abs(y).max() <= c


def test_normal_level_passes_untouched():
    rng = np.random.default_rng(4)
    eng = make(2, 3, ceiling_dbfs=-1.0)
    G = np.array([[1.0, 0.5, 0.0], [0.0, 0.25, 1.0]])
    settle(eng, G, 2)
    x = (rng.uniform(-0.3, 0.3, (4096, 2))).astype(np.float32)
    y = run(eng, x, block=512)
    ref = x.astype(np.float64) @ G
    # gains 1 and 0 and powers of two: exact in float32
    assert np.array_equal(y, ref.astype(np.float32))
    assert eng.limited_blocks == 0 and not eng.limiter_active


def test_limiter_releases_back_to_untouched():
    eng = make(1, 1, ceiling_dbfs=-1.0)
    settle(eng, [[1.0]], 1)
    loud = np.full((4800, 1), 2.0, np.float32)
    run(eng, loud, block=256)
    assert eng.limiter_active
    quiet = np.full((FS * 3, 1), 0.25, np.float32)
    y = run(eng, quiet, block=256)
    assert not eng.limiter_active
    assert np.all(y[-4800:] == 0.25)
    # the recovery is gradual: no jumps in the gain while releasing
    assert np.abs(np.diff(y[:, 0])).max() < 0.01


# ---------------------------------------------------------------- bad samples
def test_nan_and_inf_input_never_reach_outputs_and_are_counted():
    rng = np.random.default_rng(5)
    eng = make(3, 2, sub_outputs=(1,))
    G = rng.uniform(0, 0.5, (3, 3))
    eng.set_target(G)
    x = rng.uniform(-0.5, 0.5, (2048, 3)).astype(np.float32)
    bad = [(10, 0, np.nan), (11, 1, np.inf), (300, 2, -np.inf), (1500, 0, np.nan), (1501, 0, np.nan)]
    for i, j, v in bad:
        x[i, j] = v
    y = run(eng, x, block=128)
    assert np.isfinite(y).all()
    assert eng.nonfinite_count == len(bad)
    assert np.isfinite(eng.in_peak).all() and np.isfinite(eng.out_rms).all()
    # the sub filter kept a finite state and keeps producing sound
    y2 = run(eng, rng.uniform(-0.5, 0.5, (4096, 3)).astype(np.float32), block=128)
    assert np.isfinite(y2).all() and np.abs(y2[:, 1]).max() > 1e-3
    # bad samples became silence, the rest was mixed normally: compare with a clean twin
    x_clean = np.nan_to_num(x, nan=0.0, posinf=0.0, neginf=0.0)
    eng2 = make(3, 2, sub_outputs=(1,))
    eng2.set_target(G)
    y_clean = run(eng2, x_clean, block=128)
    np.testing.assert_allclose(y, y_clean, atol=1e-6)


def test_huge_finite_input_stays_finite_and_under_ceiling():
    eng = make(2, 2)
    eng.set_target(np.eye(2))
    x = np.full((256, 2), 1e30, np.float32)
    x[:, 1] = -3e38
    for _ in range(4):
        y = eng.process(x)
        assert np.isfinite(y).all() and np.abs(y).max() <= eng.ceiling
    assert np.isfinite(eng.in_peak).all()


# ---------------------------------------------------------------- fades
def test_fade_in_from_silence_at_start():
    eng = Engine(1, 1, FS, fade_in_ms=100.0, glide_ms=0.0, ceiling_dbfs=0.0)
    eng.set_target([[1.0]])
    x = np.full((FS // 2, 1), 0.5, np.float32)
    y = run(eng, x, block=256)[:, 0]
    n = 4800
    assert y[0] <= 0.5 * 2.0 / n  # starts from silence (first block also ramps the gain)
    assert np.all(np.diff(y[:n]) >= -1e-7)  # rises monotonically
    assert np.all(y[n + 256:] == 0.5)  # then untouched
    assert abs(y[n // 2] - 0.25) < 0.02  # halfway: half the level (linear fade)


def test_panic_silent_within_one_block_and_stays_silent():
    for block in (16, 256, 4096):
        eng = make(2, 2, fade_in_ms=200.0, glide_ms=30.0)
        settle(eng, np.eye(2), 2, block=256, blocks=60)
        x = np.full((block, 2), 0.5, np.float32)
        eng.process(x)
        eng.panic(True)
        y = eng.process(x).copy()
        assert y[-1].max() == 0.0  # silent by the end of the very next block
        assert np.abs(np.diff(y[:, 0])).max() <= 0.5 / block * 1.01  # a fade over the block
        for _ in range(5):
            assert np.all(eng.process(x) == 0.0)
        eng.panic(False)
        ys = run(eng, np.full((FS // 2, 2), 0.5, np.float32), block=block)
        # back in over the fade-in time (200 ms = 9600 samples), smoothly
        assert ys[0, 0] < 0.01 and ys[-1, 0] == 0.5
        assert abs(ys[4800 - 1, 0] - 0.25) < 0.5 * block / 9600 + 0.01
        assert np.abs(np.diff(ys[:, 0])).max() <= 0.5 / 9600 * 1.01 + 1e-7


def test_fade_out_for_shutdown():
    eng = make(1, 1, ceiling_dbfs=0.0)
    settle(eng, [[1.0]], 1)
    eng.fade_out(50.0)  # 2400 samples
    assert not eng.faded_out
    y = run(eng, np.full((4800, 1), 0.5, np.float32), block=256)[:, 0]
    assert eng.faded_out
    assert y[0] > 0.49 and np.all(y[2400:] == 0.0)
    assert np.all(np.diff(y) <= 1e-7)
    eng.panic(False)  # fade_out is final
    assert np.all(run(eng, np.full((1024, 1), 0.5, np.float32))[:, 0] == 0.0)


# ---------------------------------------------------------------- delays
def test_impulse_comes_out_exactly_d_samples_later():
    d = [0, 1, 37, 4000, 24000]
    eng = make(1, 5, max_delay_ms=500.0, ceiling_dbfs=0.0)
    eng.set_delays(d)
    eng.set_target(np.ones((1, 5)) * 0.5)
    x = np.zeros((30000, 1), np.float32)
    x[5000, 0] = 1.0
    y = run(eng, x, block=256)
    for j, dj in enumerate(d):
        nz = np.flatnonzero(y[:, j])
        assert list(nz) == [5000 + dj], (j, nz[:5])
        assert y[5000 + dj, j] == 0.5


def _delay_change_run(sig, d_from, d_to, block=128, change_at=9600):
    eng = make(1, 2, ceiling_dbfs=0.0)
    eng.set_delays(d_from)
    settle(eng, [[1.0, 1.0]], 1, block=block)
    x = sig[:, None].astype(np.float32)
    out = []
    for i in range(0, len(x), block):
        if i == change_at:
            eng.set_delays(d_to)
        out.append(eng.process(np.ascontiguousarray(x[i:i + block])).copy())
    return np.concatenate(out), eng


def test_delay_change_has_no_click_and_no_gap():
    n = FS
    t = np.arange(n) / FS
    A = 0.5
    f = 200.0
    sig = A * np.sin(2 * np.pi * f * t)
    # 0 -> 240 samples (one period of 200 Hz: in phase, so a gap would show as a dip)
    y, eng = _delay_change_run(sig, [0, 0], [240, 60])
    assert list(eng.delays) == [240, 60]
    slope = 2 * np.pi * f / FS * A
    xf = 0.015 * FS
    bound = (slope + 2 * A / xf) * 1.05
    for j in range(2):
        assert np.abs(np.diff(y[:, j])).max() <= bound, j
    # no gap: the level over every 5 ms window stays near the sine's RMS
    w = 240
    r = np.sqrt(np.convolve(y[:, 0] ** 2, np.ones(w) / w, mode="valid"))
    assert r[w:].min() > 0.9 * A / math.sqrt(2)
    # and the new delay is exact: the output is the input 240 samples later
    np.testing.assert_allclose(y[-4800:, 0], sig[-4800 - 240:-240], atol=1e-6)
    np.testing.assert_allclose(y[-4800:, 1], sig[-4800 - 60:-60], atol=1e-6)
    # a change between non-zero delays, on noise: no dropout (crossfade of two taps)
    rng = np.random.default_rng(9)
    noise = rng.uniform(-0.5, 0.5, n)
    y2, eng2 = _delay_change_run(noise, [100, 0], [3000, 7])
    r2 = np.sqrt(np.convolve(y2[:, 0] ** 2, np.ones(w) / w, mode="valid"))
    nominal = 0.5 / math.sqrt(3)
    assert r2[4000:].min() > 0.5 * nominal
    np.testing.assert_allclose(y2[-4800:, 0], noise[-4800 - 3000:-3000], atol=1e-6)
    np.testing.assert_allclose(y2[-4800:, 1], noise[-4800 - 7:-7], atol=1e-6)


def test_delay_errors():
    eng = make(1, 2, max_delay_ms=10.0)  # 480 samples
    with pytest.raises(ConfigError, match=r"delays\[1\]"):
        eng.set_delays([0, 481])
    with pytest.raises(ConfigError, match=r"delays\[0\]"):
        eng.set_delays([-1, 0])
    with pytest.raises(ConfigError, match="delays"):
        eng.set_delays([1, 2, 3])
    with pytest.raises(ConfigError, match=r"delays\[0\]"):
        eng.set_delays([1.5, 2])
    eng.set_delays([480, 0.0])


# ---------------------------------------------------------------- meters
def test_meters_against_independent_values():
    rng = np.random.default_rng(11)
    n_in, n_out = 5, 3
    eng = make(n_in, n_out, ceiling_dbfs=0.0)
    G = rng.uniform(0, 0.3, (n_in, n_out))
    settle(eng, G, n_in)
    for F in (16, 100, 256, 1024, 4096):
        x = rng.uniform(-0.8, 0.8, (F, n_in)).astype(np.float32)
        y = eng.process(x).astype(np.float64)
        x64 = x.astype(np.float64)
        np.testing.assert_allclose(eng.in_peak, np.abs(x64).max(axis=0), rtol=1e-7)
        np.testing.assert_allclose(eng.in_rms, np.sqrt((x64 ** 2).mean(axis=0)), rtol=2e-6)
        np.testing.assert_allclose(eng.out_peak, np.abs(y).max(axis=0), rtol=1e-7)
        np.testing.assert_allclose(eng.out_rms, np.sqrt((y ** 2).mean(axis=0)), rtol=2e-6)


def test_meter_db_convention_aes17():
    """AES17: a full-scale sine reads 0 dB FS RMS (plain RMS 1/sqrt(2), i.e. -3.01 dB)."""
    t = np.arange(4800) / FS
    eng = make(1, 1, ceiling_dbfs=0.0, max_block=4800)
    settle(eng, [[0.5]], 1)
    x = np.sin(2 * np.pi * 1000.0 * t).astype(np.float32)[:, None]  # 1 kHz, 100 cycles
    eng.process(x)
    assert abs(float(eng.in_rms[0]) - 1 / math.sqrt(2)) < 1e-5  # the arrays hold plain RMS
    assert abs(rms_dbfs(eng.in_rms[0])) < 0.001
    assert abs(peak_dbfs(eng.in_peak[0])) < 0.001
    assert abs(rms_dbfs(eng.out_rms[0]) - 20 * math.log10(0.5)) < 0.001
    assert rms_dbfs(0.0) == -200.0
    np.testing.assert_allclose(peak_dbfs(np.array([1.0, 0.1])), [0.0, -20.0])


# ---------------------------------------------------------------- sub bus
def test_sub_bus_is_lr4_of_the_sub_send_across_random_blocks():
    """Sub outputs = LR4 low-pass (scipy.signal.butter(2, fc) twice, sosfilt) of x @ g_sub,
    times the trim; the filter state carries over block boundaries."""
    rng = np.random.default_rng(12)
    n_in, n_out = 3, 4
    subs = (1, 3)
    trims = (-6.0, 2.0)
    eng = Engine(n_in, n_out, FS, fade_in_ms=0.0, sub_outputs=subs, sub_trims_db=trims,
                 crossover_hz=90.0, ceiling_dbfs=0.0, glide_ms=0.0)
    G = rng.uniform(0, 0.4, (n_in, n_out + 1))
    G[:, 1] = np.nan  # sub output columns of G are ignored
    G[:, 3] = 5.0
    eng.set_target(G)
    z = np.zeros((16, n_in), np.float32)
    eng.process(z)  # the (one-block) ramp to G happens on silence
    x = (rng.uniform(-0.3, 0.3, (30000, n_in))).astype(np.float32)
    ys = []
    i = 0
    while i < len(x):
        F = min(int(rng.integers(16, 4097)), len(x) - i)
        ys.append(eng.process(x[i:i + F]).copy())
        i += F
    y = np.concatenate(ys).astype(np.float64)
    sos = scipy.signal.butter(2, 90.0, "low", fs=FS, output="sos")
    bus = x.astype(np.float64) @ G[:, n_out]
    low = scipy.signal.sosfilt(np.vstack([sos, sos]), bus)
    for j, tdb in zip(subs, trims):
        np.testing.assert_allclose(y[:, j], low * 10 ** (tdb / 20), atol=2e-6)
    main = x.astype(np.float64) @ G[:, [0, 2]]
    np.testing.assert_allclose(y[:, [0, 2]], main, atol=2e-6)


def test_sub_bus_errors():
    with pytest.raises(ConfigError, match=r"sub_outputs\[0\]"):
        Engine(2, 2, FS, sub_outputs=(2,))
    with pytest.raises(ConfigError, match="sub_trims_db"):
        Engine(2, 3, FS, sub_outputs=(2,), sub_trims_db=(0.0, 1.0))
    with pytest.raises(ConfigError, match="crossover_hz"):
        Engine(2, 3, FS, sub_outputs=(2,), crossover_hz=30000.0)
    eng = Engine(2, 3, FS, sub_outputs=(2,))
    eng.set_target(np.zeros((2, 3)))  # no sub send column: the bus gets nothing
    eng.set_target(np.zeros((2, 4)))
    with pytest.raises(ValueError):
        eng.set_target(np.zeros((2, 5)))


# ---------------------------------------------------------------- errors
def test_bad_targets_refused_and_previous_kept():
    eng = make(2, 2, ceiling_dbfs=0.0)
    settle(eng, [[0.5, 0.0], [0.0, 0.5]], 2)
    with pytest.raises(ControlError) as ei:
        eng.set_target([[np.nan, 0.0], [0.0, 1.0]])
    assert ei.value.reason == "not_finite" and "[0, 0]" in str(ei.value)
    with pytest.raises(ControlError) as ei:
        eng.set_target([[np.inf, 0.0], [0.0, 1.0]])
    assert ei.value.reason == "not_finite"
    with pytest.raises(ControlError) as ei:
        eng.set_target([[2e4, 0.0], [0.0, 1.0]])
    assert ei.value.reason == "out_of_range"
    with pytest.raises(ValueError):
        eng.set_target(np.zeros((3, 2)))
    y = eng.process(np.full((64, 2), 0.5, np.float32))
    assert np.all(y == 0.25) and not eng.ramping
    with pytest.raises(ControlError):
        eng.set_glide_ms(float("nan"))
    with pytest.raises(ControlError):
        eng.set_glide_ms(-1.0)


def test_constructor_errors_name_the_place():
    for kw, where in [(dict(n_inputs=0), "n_inputs"), (dict(samplerate=-1), "samplerate"),
                      (dict(max_block=0), "max_block"), (dict(glide_ms=float("inf")), "glide_ms"),
                      (dict(ceiling_dbfs=3.0), "ceiling_dbfs"), (dict(fade_in_ms=-5), "fade_in_ms"),
                      (dict(max_delay_ms="x"), "max_delay_ms")]:
        args = dict(n_inputs=2, n_outputs=2, samplerate=FS)
        args.update(kw)
        with pytest.raises(ConfigError, match=where):
            Engine(**args)


def test_process_rejects_wrong_blocks():
    eng = make(2, 2, max_block=256)
    for bad in (np.zeros((64, 3), np.float32), np.zeros((64, 2), np.float64),
                np.zeros((257, 2), np.float32), np.zeros((0, 2), np.float32), np.zeros(64, np.float32)):
        with pytest.raises(ValueError):
            eng.process(bad)


# ---------------------------------------------------------------- block sizes, buffers
def test_block_sizes_16_and_4096_and_input_buffer():
    rng = np.random.default_rng(13)
    G = rng.uniform(0, 0.3, (4, 6))
    for F in (16, 4096):
        a = make(4, 6, ceiling_dbfs=0.0)
        b = make(4, 6, ceiling_dbfs=0.0)
        ref = RefMixer(4, 6, 1440)
        for eng in (a, b):
            eng.set_target(G)
        ref.set_target(G)
        for k in range(max(3, 8192 // F)):
            x = rng.uniform(-0.5, 0.5, (F, 4)).astype(np.float32)
            ya = a.process(x).copy()
            buf = b.input_buffer(F)
            buf[...] = x
            yb = b.process(buf)
            assert ya.shape == (F, 6)
            np.testing.assert_array_equal(ya, yb)
            np.testing.assert_allclose(ya, ref.process(x), atol=3e-6)


# ---------------------------------------------------------------- allocation
def _traced(fn, n):
    tracemalloc.start()
    try:
        for _ in range(20):
            fn()
        base = tracemalloc.get_traced_memory()[0]
        tracemalloc.reset_peak()
        for _ in range(n):
            fn()
        cur, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return cur - base, peak - base


@pytest.mark.parametrize("features", ["plain", "sub+delays"])
def test_no_allocation_in_steady_state(features):
    rng = np.random.default_rng(14)
    n_in, n_out, F = 16, 16, 256
    block_bytes = F * n_in * 4  # 16 KiB: one input block
    kw = dict(sub_outputs=(15,), max_delay_ms=100.0) if features != "plain" else {}
    eng = make(n_in, n_out, ceiling_dbfs=0.0, **kw)
    if features != "plain":
        eng.set_delays(np.arange(n_out) * 3)
    cols = n_out + (1 if features != "plain" else 0)
    Ga = np.ascontiguousarray(rng.uniform(0, 0.1, (n_in, cols)))
    Gb = np.ascontiguousarray(rng.uniform(0, 0.1, (n_in, cols)))
    x = (rng.standard_normal((F, n_in)) * 0.1).astype(np.float32)
    state = {"i": 0}

    def block():
        i = state["i"] = state["i"] + 1
        if i % 3 == 0:
            eng.set_target(Ga if i % 2 else Gb)  # a ramp is always running
        eng.process(x)

    for _ in range(50):
        block()
    assert eng.ramping
    grown, peak = _traced(block, 200)
    assert eng.ramping
    assert grown <= 256, grown
    assert peak < block_bytes, peak
    # the measurement can fail: the same loop with one block-sized temporary does
    grown2, peak2 = _traced(lambda: (block(), x * 2.0), 50)
    assert peak2 >= block_bytes


@pytest.mark.parametrize("case", ["fade-in", "limiter", "delay changes", "non-finite input", "panic"])
def test_no_allocation_on_the_rare_paths_either(case):
    """Fades, the limiter, delay crossfades and bad input samples are allocation-free too."""
    rng = np.random.default_rng(15)
    n, F = 16, 256
    block_bytes = F * n * 4
    eng = Engine(n, n, FS, fade_in_ms=1e5 if case == "fade-in" else 0.0, max_delay_ms=100.0,
                 sub_outputs=(0,))
    eng.set_target(np.eye(n, n + 1) * (10.0 if case == "limiter" else 0.5))
    x = (rng.standard_normal((F, n)) * 0.3).astype(np.float32)
    if case == "non-finite input":
        x[3, 4] = np.nan
        x[100, 0] = -np.inf
    delays = [np.arange(n) * 3, np.arange(n) * 5]
    state = {"i": 0}
    if case == "panic":
        eng.panic(True)

    def block():
        i = state["i"] = state["i"] + 1
        if case == "delay changes" and i % 3 == 0:
            eng.set_delays(delays[i % 2])
        eng.process(x)

    for _ in range(20):
        block()
    grown, peak = _traced(block, 100)
    assert grown <= 512, grown
    assert peak < block_bytes, peak
    if case == "limiter":
        assert eng.limiter_active
    if case == "non-finite input":
        assert eng.nonfinite_count == 2 * 140
    if case == "fade-in":
        assert 0.0 < eng.envelope < 1.0



# ---------------------------------------------------------------- the two elementwise paths
def test_engine_runs_the_kernels_asked_for(kernels, monkeypatch):
    eng = make(3, 4)
    assert eng.kernels == kernels
    monkeypatch.setenv("FIELDMIX_KERNELS", "fast")
    with pytest.raises(ConfigError, match="FIELDMIX_KERNELS"):
        make(3, 4)


def test_the_numpy_path_does_not_load_numba(tmp_path):
    """numba costs ~60 MB and ~0.5 s a process: kernels="numpy" (what the audio child picks
    for a small show) must not import it, nor must building a state or the audio link."""
    code = (
        "import sys\n"
        "from fieldmix.engine import Engine, kernels_for\n"
        "e = Engine(4, 10, 48000, kernels=kernels_for(4, 10))\n"
        "assert e.kernels == 'numpy', e.kernels\n"
        "import fieldmix.audio.link, fieldmix.state, fieldmix.live.daemon\n"
        "print('numba' in sys.modules, 'llvmlite' in sys.modules)\n"
    )
    env = {k: v for k, v in os.environ.items() if k != "FIELDMIX_KERNELS"}
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.split() == ["False", "False"]


def test_kernels_for_picks_numpy_for_small_mixes_only(monkeypatch):
    from fieldmix.engine import NUMBA_MIN_CELLS, kernel_preference, kernels_for

    assert kernels_for(4, 10) == "numpy"  # the demo show: 4 sources, 9 outputs + sub bus
    assert kernels_for(32, 33) == "auto"
    assert kernels_for(1, NUMBA_MIN_CELLS) == "auto" and kernels_for(1, NUMBA_MIN_CELLS - 1) == "numpy"
    monkeypatch.delenv("FIELDMIX_KERNELS", raising=False)
    assert kernel_preference("numpy") == "numpy"
    with pytest.raises(ConfigError, match="engine.kernels"):
        kernel_preference("fast")
    monkeypatch.setenv("FIELDMIX_KERNELS", "numba")  # the environment overrides the argument
    assert kernel_preference("numpy") == "numba"


def _scenario(kind, monkeypatch):
    """A hard block sequence: ramps and retargets, sub bus, delays and a delay change,
    non-finite and huge input, the limiter acting, a fade; returns outputs, meters, counters."""
    monkeypatch.setenv("FIELDMIX_KERNELS", kind)
    rng = np.random.default_rng(21)
    n_in, n_out = 7, 5
    eng = make(n_in, n_out, sub_outputs=(4,), max_delay_ms=20.0, glide_ms=5.0, fade_in_ms=3.0)
    assert eng.kernels == kind
    eng.set_delays([0, 3, 17, 0, 5])
    outs, meters = [], []
    for k in range(60):
        F = int(rng.choice([16, 33, 64, 100, 256]))
        if k % 4 == 0:
            eng.set_target(rng.uniform(0.0, 1.5 if k > 30 else 0.3, (n_in, n_out + 1)))
        if k == 20:
            eng.set_delays([4, 0, 9, 2, 0])
        x = (rng.standard_normal((F, n_in)) * (2.0 if 40 <= k < 45 else 0.2)).astype(np.float32)
        if k in (10, 11):
            x[F // 2, 3] = np.nan
            x[0, 0] = np.inf
            x[1, 6] = -3.0e9  # finite, beyond INPUT_LIMIT: clamped
        outs.append(eng.process(x).copy())
        meters.append(np.concatenate([eng.in_peak, eng.in_rms, eng.out_peak, eng.out_rms]))
    return np.concatenate(outs), np.array(meters), (eng.nonfinite_count, eng.limited_blocks), eng.current_gains()


@pytest.mark.skipif(not _kernels.available(), reason="numba not importable")
@pytest.mark.parametrize("kernels", ["numpy"], indirect=True)  # runs once, builds both itself
def test_numba_and_numpy_paths_agree(kernels, monkeypatch):
    """Same blocks through both paths: outputs, meters and counters agree within float32 rounding."""
    y_np, m_np, c_np, g_np = _scenario("numpy", monkeypatch)
    y_nb, m_nb, c_nb, g_nb = _scenario("numba", monkeypatch)
    assert np.all(np.isfinite(y_nb)) and np.all(np.isfinite(y_np))
    assert c_np == c_nb and c_np[0] == 2 * 2 and c_np[1] > 0
    np.testing.assert_allclose(y_nb, y_np, rtol=1e-5, atol=2e-6)
    np.testing.assert_allclose(m_nb, m_np, rtol=2e-5, atol=1e-6)
    np.testing.assert_allclose(g_nb, g_np, rtol=1e-6, atol=1e-7)
    # the sample peaks are exact on both paths (max |x| of what was metered)
    assert np.max(np.abs(y_nb)) <= make(1, 1).ceiling


@pytest.mark.parametrize("kernels", [KERNELS[1]], indirect=True)
def test_compiled_kernels_allocate_nothing(kernels):
    """tracemalloc does not see numba's allocator: check the kernels' machine code instead.

    Each kernel is compiled afresh (no cache) from its Python source, and its LLVM IR must
    not call the numba runtime's allocator; a variant with one np.empty does, so the
    check can fail."""
    import numba

    def ir_of(pyfunc, args):
        f = numba.njit(nogil=True, boundscheck=False, error_model="numpy")(pyfunc)
        f(*args)
        return "\n".join(f.inspect_llvm().values())

    N, M, F = 3, 2, 4
    Z = np.zeros((F, 2 * N + M + 1), np.float32)
    Zi = Z.view(np.int32)
    x = np.zeros((F, N), np.float32)
    acc = np.zeros(8, np.float32)
    pki = np.zeros(N + M, np.int32)
    mv = np.zeros(2 * (N + M), np.float32)
    P = np.zeros((2, 3, N * M), np.float32)
    lim = np.float32(1e6)
    cases = [
        (_kernels.block_in.py_func, (x, Z, Zi, F, 0.0, 1e30, True, float(lim), int(lim.view(np.int32)), acc, pki, mv)),
        (_kernels.block_out.py_func, (Z, Zi, F, 2 * N, acc, pki, mv)),
        (_kernels.bank_update.py_func, (1.0, 0.0, 0.0, 0.0, 1.0, 0.0, P[0], P[1])),
        (_kernels.target_in.py_func, (np.zeros((N, M)), np.zeros((N, M), np.float32), 1.0, np.zeros(M))),
    ]
    for fn, args in cases:
        ir = ir_of(fn, args)
        assert "NRT_MemInfo_alloc" not in ir and "NRT_Allocate" not in ir, fn.__name__

    def allocating(n):
        return np.empty(n, np.float32)

    ir = ir_of(allocating, (3,))
    assert "NRT_MemInfo_alloc" in ir or "NRT_Allocate" in ir


@pytest.mark.parametrize("kernels", [KERNELS[1]], indirect=True)
def test_kernels_never_compile_on_an_audio_block(kernels):
    """Compilation happens when the Engine is built; afterwards the dispatchers refuse to compile."""
    eng = make(4, 4)
    n_before = {k: len(k.signatures) for k in (_kernels.block_in, _kernels.block_out,
                                                _kernels.bank_update, _kernels.target_in)}
    assert all(n_before.values())
    x = np.ones((32, 4), np.float32)
    ro = x.copy()
    ro.flags.writeable = False  # another numba type: the engine copies it instead
    for G in (np.eye(4), np.eye(4, dtype=np.float32), np.eye(4, dtype=np.int64), [[0.5] * 4] * 4):
        eng.set_target(G)
        eng.process(x)
        eng.process(ro)
    assert {k: len(k.signatures) for k in n_before} == n_before


@pytest.mark.parametrize("kernels", ["numpy"], indirect=True)
def test_runs_without_numba(kernels):
    """With numba not importable the engine takes the numpy path; forcing numba then fails clearly."""
    import os
    import subprocess
    import sys
    from pathlib import Path

    code = (
        "import sys; sys.modules['numba'] = None\n"  # an import of numba now raises ImportError
        "import numpy as np\n"
        "from fieldmix.engine import Engine\n"
        "e = Engine(2, 2, 48000, fade_in_ms=0.0); e.set_target(np.eye(2))\n"
        "y = e.process(np.ones((64, 2), np.float32))\n"
        "print(e.kernels, float(y[-1, 0]))\n"
        "import os; os.environ['FIELDMIX_KERNELS'] = 'numba'\n"
        "from fieldmix.errors import ConfigError\n"
        "try:\n    Engine(2, 2, 48000)\nexcept ConfigError as exc:\n    print('refused', 'FIELDMIX_KERNELS' in str(exc))\n"
    )
    env = dict(os.environ)
    env.pop("FIELDMIX_KERNELS", None)
    server = str(Path(__file__).resolve().parents[1] / "server")
    env["PYTHONPATH"] = server + os.pathsep + env.get("PYTHONPATH", "")
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    lines = out.stdout.split("\n")
    assert lines[0].split()[0] == "numpy"
    assert abs(float(lines[0].split()[1]) - 64 / 1440) < 1e-6  # the first ramp: 64 of 1440 samples
    assert lines[1] == "refused True"
