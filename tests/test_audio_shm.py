"""The shared-memory block between the control process and the audio child.

Real shared memory, real threads and real spawned processes. The seqlock must detect a
torn write (the reader keeps the previous gains), values must round-trip, and no segment
may outlive its owner's close, even when a child that attached it was killed.
"""

from __future__ import annotations

import multiprocessing as mp
import os
import signal
import threading
import time
from pathlib import Path

import numpy as np
import pytest

from fieldmix.audio import shm as S
from fieldmix.audio.shm import AudioShm, ShmLayout, StatusWriter, TargetReader

DEV_SHM = Path("/dev/shm")


def _names():
    return {p.name for p in DEV_SHM.iterdir()} if DEV_SHM.is_dir() else set()


@pytest.fixture
def seg():
    s = AudioShm.create(4, 8)
    yield s
    s.close()
    s.unlink()


# ------------------------------------------------------------------ layout / round trip
def test_layout_is_aligned_and_sized_for_capacity():
    L = ShmLayout(32, 64)
    for off in (L.ctl_words, L.ctl_gains, L.st_words, L.st_floats, L.st_meters, L.beat):
        assert off % 64 == 0
    assert L.st_words >= L.ctl_gains + 4 * 32 * 64  # the gains fit before the status region
    assert L.beat >= L.st_meters + 4 * (2 * 32 + 2 * 64)
    assert ShmLayout.capacity_for(9) == 64
    assert ShmLayout.capacity_for(65) == 128
    assert ShmLayout.capacity_for(3, minimum=2) == 4
    with pytest.raises(ValueError):
        ShmLayout(0, 4)


def test_targets_round_trip_through_a_second_mapping(seg):
    other = AudioShm.attach(seg.name)
    try:
        assert (other.layout.n_inputs, other.layout.n_cols) == (4, 8)
        G = np.arange(4 * 6, dtype=np.float32).reshape(4, 6) / 10
        v = seg.write_targets(G)
        rd = TargetReader(other, 4, 6)
        assert rd.read() == TargetReader.NEW
        assert rd.version == v
        np.testing.assert_array_equal(rd.scratch, G)
        assert rd.read() == TargetReader.NONE  # nothing new
        seg.write_panic(True)
        assert rd.read() == TargetReader.NONE and rd.panic == 1
        n = seg.write_fade_out(120.0)
        rd.read()
        assert rd.fade_req == n and rd.fade_ms == pytest.approx(120.0)
        G2 = G * 2
        seg.write_targets(G2)
        assert rd.read() == TargetReader.NEW
        np.testing.assert_array_equal(rd.scratch, G2)
    finally:
        other.close()


def test_a_matrix_of_another_shape_waits_for_a_reader_of_that_shape(seg):
    rd = TargetReader(seg, 4, 6)
    seg.write_targets(np.ones((4, 6), np.float32))
    assert rd.read() == TargetReader.NEW
    seg.write_targets(np.full((4, 7), 0.5, np.float32))  # a layout change in flight
    assert rd.read() == TargetReader.NONE
    np.testing.assert_array_equal(rd.scratch, 1.0)  # previous gains kept
    rd7 = rd.reshape(4, 7)
    assert rd7.read() == TargetReader.NEW
    np.testing.assert_array_equal(rd7.scratch, 0.5)


def test_writer_refuses_bad_matrices(seg):
    with pytest.raises(ValueError, match="exceeds"):
        seg.write_targets(np.zeros((5, 8), np.float32))
    with pytest.raises(ValueError, match="non-finite"):
        seg.write_targets(np.array([[np.nan]], np.float32))
    assert int(seg.ctl[S.C_VERSION]) == 0  # nothing was published
    assert int(seg.ctl[S.C_SEQ]) % 2 == 0


def test_status_round_trip(seg):
    other = AudioShm.attach(seg.name)
    try:
        w = StatusWriter(other)
        w.begin()
        other.st[S.S_BLOCKS] = 1234
        other.st[S.S_N_IN] = 3
        other.st[S.S_N_OUT] = 5
        other.stf[S.F_DSP_MEAN] = 0.25
        other.in_peak[:3] = [0.1, 0.2, 0.3]
        other.out_rms[:5] = [1, 2, 3, 4, 5]
        w.end()
        snap = seg.read_status()
        assert snap is not None
        assert int(snap["words"][S.S_BLOCKS]) == 1234
        assert snap["floats"][S.F_DSP_MEAN] == 0.25
        in_peak, in_rms, out_peak, out_rms = snap["meters"]
        np.testing.assert_allclose(in_peak, [0.1, 0.2, 0.3], rtol=1e-6)
        np.testing.assert_array_equal(out_rms, [1, 2, 3, 4, 5])
        w.begin()  # a writer that stops half way (killed): the snapshot is refused
        assert seg.read_status(retries=3) is None
        StatusWriter(other)  # a new child resets the odd counter
        assert seg.read_status() is not None
    finally:
        other.close()


# ------------------------------------------------------------------ torn reads
def _slow_writer(shm: AudioShm, rows: int, cols: int, stop, rounds: int, pause: float):
    """Writes matrices whose every element is k, half, pause, other half (a slow, tearable write)."""
    half = rows // 2
    for k in range(1, rounds + 1):
        if stop is not None and stop.is_set():
            break
        ctl = shm.ctl
        ctl[S.C_SEQ] += 1
        shm.gains[:half, :cols] = k
        time.sleep(pause)
        shm.gains[half:rows, :cols] = k
        ctl[S.C_ROWS] = rows
        ctl[S.C_COLS] = cols
        ctl[S.C_VERSION] += 1
        ctl[S.C_SEQ] += 1
        time.sleep(pause / 4)


def _check_reader(shm: AudioShm, rows: int, cols: int, until) -> tuple[int, int, int]:
    rd = TargetReader(shm, rows, cols)
    fresh = torn = mixed = 0
    while not until():
        r = rd.read()
        if r == TargetReader.NEW:
            fresh += 1
            if rd.scratch.min() != rd.scratch.max():
                mixed += 1  # would be a torn matrix handed to the engine
        elif r == TargetReader.TORN:
            torn += 1
    return fresh, torn, mixed


def test_torn_reads_between_threads_are_detected(seg):
    rows, cols = 4, 8
    t = threading.Thread(target=_slow_writer, args=(seg, rows, cols, None, 60, 0.002))
    t.start()
    fresh, torn, mixed = _check_reader(seg, rows, cols, lambda: not t.is_alive())
    t.join()
    assert mixed == 0
    assert torn > 0  # the reader did run into half-written matrices ...
    assert fresh > 0  # ... and still took the complete ones


def test_reading_without_the_seqlock_would_tear(seg):
    """Control for the two torn-read tests: the same race, read naively, shows mixed matrices."""
    rows, cols = 4, 8
    t = threading.Thread(target=_slow_writer, args=(seg, rows, cols, None, 30, 0.002))
    t.start()
    mixed = 0
    while t.is_alive():
        m = seg.gains[:rows, :cols].copy()
        if m.min() != m.max():
            mixed += 1
    t.join()
    assert mixed > 0


def _proc_writer(name, rows, cols, rounds, pause):
    s = AudioShm.attach(name)
    try:
        _slow_writer(s, rows, cols, None, rounds, pause)
    finally:
        s.close()


def test_torn_reads_across_processes_are_detected(seg):
    rows, cols = 4, 8
    ctx = mp.get_context("spawn")
    p = ctx.Process(target=_proc_writer, args=(seg.name, rows, cols, 80, 0.002))
    p.start()
    fresh, torn, mixed = _check_reader(seg, rows, cols, lambda: p.exitcode is not None)
    p.join(30)
    assert p.exitcode == 0
    assert mixed == 0
    assert torn > 0 and fresh > 0
    assert int(seg.ctl[S.C_VERSION]) == 80


def _proc_status_writer(name, rounds):
    s = AudioShm.attach(name)
    w = StatusWriter(s)
    for k in range(1, rounds + 1):
        w.begin()
        s.st[S.S_N_IN] = 4
        s.st[S.S_N_OUT] = 8
        s.in_peak[:4] = k
        time.sleep(0.001)
        s.out_rms[:8] = k
        s.st[S.S_FRAME] = k
        w.end()
    s.close()


def test_status_snapshots_across_processes_are_consistent(seg):
    ctx = mp.get_context("spawn")
    p = ctx.Process(target=_proc_status_writer, args=(seg.name, 300))
    p.start()
    good = 0
    while p.exitcode is None:
        snap = seg.read_status(retries=2)
        if snap is None:
            continue
        k = int(snap["words"][S.S_FRAME])
        in_peak, _, _, out_rms = snap["meters"]
        if k == 0 and len(in_peak) == 0:
            continue  # before the first frame
        good += 1
        assert np.all(in_peak == k) and np.all(out_rms == k)
    p.join(30)
    assert p.exitcode == 0
    assert good > 0


# ------------------------------------------------------------------ cleanup
def _attach_and_hang(name, ready):
    s = AudioShm.attach(name)
    s.beat[S.B_PID] = os.getpid()
    ready.set()
    time.sleep(60)


def test_segment_is_unlinked_after_close_even_when_the_child_was_killed():
    prefix = f"fmx_test_{os.getpid()}_"
    s = AudioShm.create(2, 4, name=prefix + "kill")
    assert s.name in _names()
    ctx = mp.get_context("spawn")
    ready = ctx.Event()
    p = ctx.Process(target=_attach_and_hang, args=(s.name, ready))
    p.start()
    assert ready.wait(30)
    assert int(s.beat[S.B_PID]) == p.pid  # the child really mapped it
    os.kill(p.pid, signal.SIGKILL)
    p.join(10)
    assert p.exitcode == -signal.SIGKILL
    s.close()
    s.unlink()
    s.unlink()  # twice is harmless
    assert s.name not in _names()
    assert not [n for n in _names() if n.startswith(prefix)]  # other workers' files are not ours to judge
    with pytest.raises(FileNotFoundError):
        AudioShm.attach(s.name)


def test_attach_refuses_a_foreign_segment():
    from multiprocessing import shared_memory

    raw = shared_memory.SharedMemory(create=True, size=4096)
    try:
        with pytest.raises(ValueError, match="not a fieldmix"):
            AudioShm.attach(raw.name)
    finally:
        raw.close()
        raw.unlink()


def test_copy_control_into_a_bigger_segment(seg):
    G = np.random.default_rng(1).uniform(0, 1, (4, 8)).astype(np.float32)
    seg.write_targets(G)
    seg.write_panic(True)
    big = AudioShm.create(4, 16)
    try:
        big.copy_control_from(seg)
        rd = TargetReader(big, 4, 8)
        assert rd.read() == TargetReader.NEW
        np.testing.assert_array_equal(rd.scratch, G)
        assert rd.panic == 1
        assert int(big.ctl[S.C_VERSION]) == int(seg.ctl[S.C_VERSION])
    finally:
        big.close()
        big.unlink()
