"""Tests of the sub bus crossover (fieldmix.crossover).

References: scipy.signal (butter, sosfilt, sosfreqz) as an independent design and
filter; the Linkwitz-Riley properties (-6.02 dB at the crossover frequency, low-pass +
high-pass = all-pass) from S. Linkwitz, "Active crossover networks for noncoincident
drivers", JAES 24(1), 1976 (cited from memory; the properties are also common practice).
"""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest
import scipy.signal

from fieldmix.crossover import BlockSosFilter, LR4Lowpass, butterworth2_sos, lr4_sos
from fieldmix.errors import ConfigError

FS = 48000


@pytest.mark.parametrize("fc,fs", [(80.0, 48000), (120.0, 44100), (40.0, 96000), (2000.0, 48000)])
@pytest.mark.parametrize("kind", ["low", "high"])
def test_butterworth_section_equals_scipy_design(fc, fs, kind):
    ref = scipy.signal.butter(2, fc, kind, fs=fs, output="sos")
    np.testing.assert_allclose(butterworth2_sos(fc, fs, kind), ref, rtol=1e-12, atol=1e-15)


@pytest.mark.parametrize("fc", [60.0, 80.0, 120.0])
def test_lr4_is_minus_6_02_db_at_fc_and_sums_flat(fc):
    lo = lr4_sos(fc, FS, "low")
    hi = lr4_sos(fc, FS, "high")
    assert lo.shape == (2, 6) and np.array_equal(lo[0], lo[1])  # two Butterworth sections
    _, h = scipy.signal.sosfreqz(lo, worN=[fc], fs=FS)
    # Linkwitz-Riley: -6.02 dB (20 log10 0.5) at the crossover frequency (Linkwitz 1976, memory)
    assert abs(20 * np.log10(abs(h[0])) - 20 * np.log10(0.5)) < 0.01
    _, hh = scipy.signal.sosfreqz(hi, worN=[fc], fs=FS)
    assert abs(20 * np.log10(abs(hh[0])) + 6.0206) < 0.01
    f = np.geomspace(10.0, 20000.0, 400)
    _, hl = scipy.signal.sosfreqz(lo, worN=f, fs=FS)
    _, hh = scipy.signal.sosfreqz(hi, worN=f, fs=FS)
    s = 20 * np.log10(np.abs(hl + hh))
    assert np.abs(s).max() < 0.01  # low + high = all-pass: flat magnitude
    # and a 4th-order slope (24 dB per octave): three octaves above fc it is below -60 dB
    _, h4 = scipy.signal.sosfreqz(lo, worN=[8 * fc], fs=FS)
    assert 20 * np.log10(abs(h4[0])) < -60.0


def test_block_filter_equals_sosfilt_across_random_block_sizes():
    """Same signal, cut into random blocks (1..4096, across the 128-sample chunks):
    identical to one sosfilt over the whole signal, so the state is continuous."""
    rng = np.random.default_rng(21)
    x = rng.standard_normal(60000).astype(np.float32)
    ref = scipy.signal.sosfilt(np.vstack([scipy.signal.butter(2, 80.0, fs=FS, output="sos")] * 2),
                               x.astype(np.float64))
    for trial in range(3):
        f = LR4Lowpass(80.0, FS, max_block=4096)
        y = np.zeros_like(x)
        i = 0
        while i < len(x):
            n = min(int(rng.integers(1, 4097)) if trial else int(rng.choice([1, 127, 128, 129, 255])),
                    len(x) - i)
            f.process(x[i:i + n], y[i:i + n])
            i += n
        np.testing.assert_allclose(y, ref, atol=5e-7 * np.abs(ref).max() + 1e-8)
        # the state is scipy's zi layout: continuing with sosfilt from it matches too
        zf = scipy.signal.sosfilt(lr4_sos(80.0, FS), x.astype(np.float64),
                                  zi=np.zeros((2, 2)))[1]
        np.testing.assert_allclose(f.state, zf, rtol=1e-6, atol=1e-9)


def test_block_filter_reads_strided_input_and_generic_sos():
    rng = np.random.default_rng(22)
    sos = scipy.signal.butter(6, [200.0, 2000.0], "bandpass", fs=FS, output="sos")  # 6 sections
    f = BlockSosFilter(sos, max_block=512, chunk=64)
    block = rng.standard_normal((5000, 3)).astype(np.float32)
    y = np.zeros(5000, np.float32)
    for i in range(0, 5000, 500):
        f.process(block[i:i + 500, 1], y[i:i + 500])  # a strided column
    ref = scipy.signal.sosfilt(sos, block[:, 1].astype(np.float64))
    np.testing.assert_allclose(y, ref, atol=1e-5)


def test_reset_and_finite_state():
    f = LR4Lowpass(80.0, FS)
    x = np.ones(1000, np.float32)
    y = np.zeros(1000, np.float32)
    f.process(x, y)
    assert f.state_is_finite() and np.abs(f.state).max() > 0
    f.reset()
    assert np.all(f.state == 0.0)
    y2 = np.zeros(1000, np.float32)
    f.process(x, y2)
    np.testing.assert_array_equal(y, y2)


def test_bad_design_parameters():
    with pytest.raises(ConfigError, match="crossover_hz"):
        lr4_sos(0.0, FS)
    with pytest.raises(ConfigError, match="crossover_hz"):
        lr4_sos(24000.0, FS)
    with pytest.raises(ConfigError, match="crossover_hz"):
        lr4_sos(float("nan"), FS)
    with pytest.raises(ConfigError):
        lr4_sos("low", FS)
    with pytest.raises(ValueError):
        butterworth2_sos(80.0, FS, "band")
    with pytest.raises(ValueError):
        BlockSosFilter(np.zeros((2, 5)))


def test_no_allocation_per_block():
    f = LR4Lowpass(80.0, FS, max_block=4096)
    x = np.random.default_rng(23).standard_normal(300).astype(np.float32)
    y = np.zeros(300, np.float32)
    for _ in range(10):
        f.process(x, y)
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        tracemalloc.reset_peak()
        for _ in range(200):
            f.process(x, y)
        cur, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert cur - base <= 256
    assert peak - base < 300 * 8  # less than one float64 copy of the block
