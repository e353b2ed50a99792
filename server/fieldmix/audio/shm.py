"""Shared memory between the control process and the audio child.

One segment (``multiprocessing.shared_memory``) holds three regions:

* **control** (the control process writes, the child reads at the start of each block):
  the target gain matrix, its shape and version, the master panic flag and the fade-out
  request;
* **status** (the child writes once per meter frame, the control process reads): meters
  per channel, callback counters, xrun counters, DSP load, the state of the audio side;
* **beat** (the child writes, single 8-byte words outside any seqlock): heartbeats.

Control and status each sit behind a *seqlock*: a 64-bit sequence counter that the one
writer makes odd before it writes and even again when it is done. A reader notes the
counter, copies the payload, and reads the counter again: an odd or changed counter means
the copy may be torn, and the reader keeps what it had (the child keeps the previous gains
and tries again at the next block; the control side retries a few times, then returns the
last good snapshot). There is exactly one writer per region, so no lock is ever taken and
the audio side never waits.

Memory ordering: the counter and every payload word are naturally aligned, so each single
store is atomic; on x86-64 (total store order) stores become visible in program order, which
is what the protocol needs. On weakly ordered CPUs a torn read could in theory slip through;
the worst case is one block ramping toward a matrix mixing old and new (finite, valid) gains,
corrected at the next block. The child also refuses non-finite gains.

The layout is fixed when the segment is made from the capacities ``(n_inputs, n_cols)``
(``n_cols`` = engine columns: speakers plus the sub bus); a layout with more columns than the
capacity needs a new segment, announced to the child by message (see ``link.py``).
Nothing here allocates array memory after construction: every access goes through views
made once.
"""

from __future__ import annotations

import struct
import time
from multiprocessing import shared_memory
from typing import Optional

import numpy as np

MAGIC = 0x464D5841  # "FMXA"
VERSION = 1
HEADER_BYTES = 64
ALIGN = 64

# ---------------------------------------------------------------- control region
# uint64 words (index 0 is the sequence counter)
C_SEQ = 0
C_VERSION = 1  # incremented on every target write
C_ROWS = 2  # shape of the matrix in use
C_COLS = 3
C_PANIC = 4  # 0/1
C_FADE_REQ = 5  # incremented on every fade-out request (an edge, not a level)
C_FADE_MS = 6  # fade-out time in microseconds (integer)
C_WORDS = 8

# ---------------------------------------------------------------- status region
S_SEQ = 0
S_FRAME = 1  # meter frames published
S_FIRST_BLOCK = 2  # index of the first block in this meter frame
S_BLOCKS = 3  # callbacks (blocks) seen since the stream started
S_EXPECTED = 4  # callbacks expected from elapsed time / block period
S_FLAGGED = 5  # callbacks whose status flags reported an xrun (or late virtual blocks)
S_NONFINITE = 6  # non-finite input samples replaced by the engine
S_LIMITED = 7  # blocks in which the safety ceiling acted
S_CTL_APPLIED = 8  # last control version (C_VERSION) applied to the engine
S_PANIC_BLOCK = 9  # block index at which the current panic state took effect
S_PANIC = 10  # panic state in effect
S_FADED_OUT = 11  # 1 when the engine reports it has faded out
S_N_IN = 12  # meter counts in use
S_N_OUT = 13
S_BLOCKSIZE = 14
S_DEV_OUT = 15  # output channels of the open stream (or the virtual device)
S_DEV_IN = 16
S_REC_FRAMES = 17  # frames written by the recorder thread
S_REC_OVERFLOW = 18  # blocks the recorder ring had no room for
S_LAYOUT_GEN = 19  # generation of the layout in effect
S_FADE_SEEN = 20  # last fade request (C_FADE_REQ) taken
S_CHILD_GEN = 21  # which child wrote this (the link numbers its children)
S_CB_ERRORS = 22  # blocks silenced because the block code raised
S_WORDS = 24
# float64 words
F_SAMPLERATE = 0
F_DSP_MEAN = 1  # callback duration / block period, mean over the meter frame
F_DSP_MAX = 2  # ... and max
F_FRAME_TIME = 3  # time.monotonic() when the frame was published
F_STREAM_START = 4  # time.monotonic() of the first callback
F_WORDS = 8

# ---------------------------------------------------------------- beat region
B_MAIN = 0  # time.monotonic() written by the child's supervising loop
B_AUDIO = 1  # time.monotonic() of the last block
B_PID = 2  # child pid (as a float; exact below 2**53)
B_FADED = 3  # 1.0 once the engine has faded out (written every block)
B_APPLIED_N = 4  # entries ever written to the applied-targets ring below (a count, as a float)
B_RING = 8  # ring of (target version, frame position) pairs: when each new target took effect
RING_LEN = 64  # entries (a 5 ms push rate fills it in 0.32 s; the control process reads it at 10 Hz or more)
B_WORDS = B_RING + 2 * RING_LEN


def _up(n: int, a: int = ALIGN) -> int:
    return (n + a - 1) // a * a


class ShmLayout:
    """Byte offsets of every region for the capacities ``(n_inputs, n_cols)``."""

    def __init__(self, n_inputs: int, n_cols: int):
        if n_inputs < 1 or n_cols < 1:
            raise ValueError(f"shared memory needs at least one input and one column, got {n_inputs} x {n_cols}")
        self.n_inputs = int(n_inputs)
        self.n_cols = int(n_cols)
        off = HEADER_BYTES
        self.ctl_words = off
        off = _up(off + 8 * C_WORDS)
        self.ctl_gains = off
        off = _up(off + 4 * self.n_inputs * self.n_cols)
        self.st_words = off
        off = _up(off + 8 * S_WORDS)
        self.st_floats = off
        off = _up(off + 8 * F_WORDS)
        self.st_meters = off  # in_peak, in_rms (n_inputs each), out_peak, out_rms (n_cols each)
        off = _up(off + 4 * (2 * self.n_inputs + 2 * self.n_cols))
        self.beat = off
        off = _up(off + 8 * B_WORDS)
        self.size = off

    @staticmethod
    def capacity_for(n_cols: int, minimum: int = 64) -> int:
        """Room to grow: at least ``minimum`` columns, else the next power of two."""
        cap = max(int(minimum), 1)
        while cap < n_cols:
            cap *= 2
        return cap


_HEADER = struct.Struct("<IIIIQ")  # magic, version, n_inputs, n_cols, size


class AudioShm:
    """One shared segment with views for both sides. Make with :meth:`create` or :meth:`attach`."""

    def __init__(self, shm: shared_memory.SharedMemory, layout: ShmLayout, owner: bool):
        self._shm = shm
        self.layout = layout
        self.owner = owner
        self.name = shm.name
        buf = shm.buf
        L = layout

        def view(dtype, count, offset):
            # np.frombuffer holds a buffer export for as long as the view lives, so the
            # mapping cannot be unmapped under it (SharedMemory.close() then raises
            # BufferError instead). np.ndarray(buffer=...) does not: a close would leave
            # dangling views (a segfault on the next access).
            return np.frombuffer(buf, dtype=dtype, count=count, offset=offset)

        self.ctl = view(np.uint64, C_WORDS, L.ctl_words)
        self.gains = view(np.float32, L.n_inputs * L.n_cols, L.ctl_gains).reshape(L.n_inputs, L.n_cols)
        self.st = view(np.uint64, S_WORDS, L.st_words)
        self.stf = view(np.float64, F_WORDS, L.st_floats)
        meters = view(np.float32, 2 * L.n_inputs + 2 * L.n_cols, L.st_meters)
        ni, nc = L.n_inputs, L.n_cols
        self.in_peak = meters[:ni]
        self.in_rms = meters[ni : 2 * ni]
        self.out_peak = meters[2 * ni : 2 * ni + nc]
        self.out_rms = meters[2 * ni + nc :]
        self.beat = view(np.float64, B_WORDS, L.beat)
        self._closed = False

    # ------------------------------------------------------------ lifecycle
    @classmethod
    def create(cls, n_inputs: int, n_cols: int, name: Optional[str] = None) -> "AudioShm":
        """Make a zeroed segment (the control process owns and unlinks it)."""
        layout = ShmLayout(n_inputs, n_cols)
        shm = shared_memory.SharedMemory(name=name, create=True, size=layout.size)
        shm.buf[: layout.size] = b"\x00" * layout.size
        _HEADER.pack_into(shm.buf, 0, MAGIC, VERSION, layout.n_inputs, layout.n_cols, layout.size)
        return cls(shm, layout, owner=True)

    @classmethod
    def attach(cls, name: str) -> "AudioShm":
        """Open an existing segment by name (the child side)."""
        shm = shared_memory.SharedMemory(name=name, create=False)
        try:
            magic, version, n_in, n_cols, size = _HEADER.unpack_from(shm.buf, 0)
            if magic != MAGIC or version != VERSION:
                raise ValueError(f"shared memory {name!r} is not a fieldmix audio segment (v{VERSION})")
            layout = ShmLayout(n_in, n_cols)
            if layout.size != size or shm.size < size:
                raise ValueError(f"shared memory {name!r} has an unexpected size")
        except BaseException:
            shm.close()
            raise
        return cls(shm, layout, owner=False)

    def close(self) -> None:
        """Drop the views and the mapping (does not unlink).

        If a view made here is still referenced somewhere (an old reader), the mapping
        stays until that view is gone (BufferError is swallowed): never a dangling view.
        """
        if self._closed:
            return
        self._closed = True
        for attr in ("ctl", "gains", "st", "stf", "in_peak", "in_rms", "out_peak", "out_rms", "beat"):
            setattr(self, attr, None)
        try:
            self._shm.close()
        except BufferError:
            # views are still out there: let go of the mapping; it is unmapped when the last
            # view dies (each holds the buffer), and SharedMemory.__del__ has nothing to redo
            self._shm._buf = None
            self._shm._mmap = None

    def unlink(self) -> None:
        """Remove the segment name (owner only; safe to call twice)."""
        try:
            self._shm.unlink()
        except FileNotFoundError:
            pass

    @property
    def closed(self) -> bool:
        return self._closed

    # ============================================================ control side
    def write_targets(self, G: np.ndarray, check: bool = True) -> int:
        """Seqlock-write a target matrix (n_rows, n_cols); returns its version.

        Refuses shapes beyond the capacity and (with ``check``) non-finite values
        (ValueError), so the audio side never sees them. A caller that has checked the
        values already passes ``check=False`` (then nothing here allocates).
        """
        rows, cols = G.shape
        if rows > self.layout.n_inputs or cols > self.layout.n_cols:
            raise ValueError(f"target matrix {rows} x {cols} exceeds the segment's {self.layout.n_inputs} x {self.layout.n_cols}")
        if check and not np.all(np.isfinite(G)):
            raise ValueError("non-finite value in target matrix")
        ctl = self.ctl
        ctl[C_SEQ] += 1  # odd: writing
        self.gains[:rows, :cols] = G
        ctl[C_ROWS] = rows
        ctl[C_COLS] = cols
        ctl[C_VERSION] += 1
        v = int(ctl[C_VERSION])
        ctl[C_SEQ] += 1  # even: done
        return v

    def write_panic(self, on: bool) -> None:
        ctl = self.ctl
        ctl[C_SEQ] += 1
        ctl[C_PANIC] = 1 if on else 0
        ctl[C_SEQ] += 1

    def write_fade_out(self, ms: float) -> int:
        """Request a fade-out of ``ms`` milliseconds; returns the request number."""
        ctl = self.ctl
        ctl[C_SEQ] += 1
        ctl[C_FADE_MS] = int(round(max(0.0, float(ms)) * 1000.0))
        ctl[C_FADE_REQ] += 1
        n = int(ctl[C_FADE_REQ])
        ctl[C_SEQ] += 1
        return n

    def copy_control_from(self, other: "AudioShm") -> None:
        """Carry the control state into a new (bigger) segment, before the child switches."""
        rows, cols = int(other.ctl[C_ROWS]), int(other.ctl[C_COLS])
        ctl = self.ctl
        ctl[C_SEQ] += 1
        if rows and cols:
            self.gains[:rows, :cols] = other.gains[:rows, :cols]
        for k in (C_VERSION, C_ROWS, C_COLS, C_PANIC, C_FADE_REQ, C_FADE_MS):
            ctl[k] = other.ctl[k]
        ctl[C_SEQ] += 1

    def read_status(self, retries: int = 50) -> Optional[dict]:
        """A consistent snapshot of the status region, or None if every try was torn."""
        st, stf = self.st, self.stf
        for i in range(retries):
            s1 = int(st[S_SEQ])
            if s1 & 1:
                time.sleep(0.0002 if i > 3 else 0)
                continue
            words = st.copy()
            floats = stf.copy()
            n_in = min(int(words[S_N_IN]), self.layout.n_inputs)
            n_out = min(int(words[S_N_OUT]), self.layout.n_cols)
            meters = (
                self.in_peak[:n_in].copy(),
                self.in_rms[:n_in].copy(),
                self.out_peak[:n_out].copy(),
                self.out_rms[:n_out].copy(),
            )
            if int(st[S_SEQ]) == s1:
                return {"seq": s1, "words": words, "floats": floats, "meters": meters}
            time.sleep(0.0002 if i > 3 else 0)
        return None

    # ============================================================ child side
    def writer_reset(self) -> None:
        """Called once by a new child: a killed predecessor may have left the counter odd."""
        if int(self.st[S_SEQ]) & 1:
            self.st[S_SEQ] += 1


class TargetReader:
    """The child's per-block read of the control region (no allocation per call).

    ``shape`` is the (rows, cols) the engine expects; a matrix of another shape (a layout
    change still in flight) is left pending until the engine has the new shape.
    """

    TORN = -1
    NONE = 0
    NEW = 1

    def __init__(self, shm: AudioShm, rows: int, cols: int):
        self.shm = shm
        self.rows = rows
        self.cols = cols
        self.scratch = np.zeros((rows, cols), dtype=np.float32)
        self._view = shm.gains[:rows, :cols]
        self._last_seq = -1
        self.version = 0  # version of the gains now in scratch
        self.panic = 0
        self.fade_req = 0
        self.fade_ms = 0.0
        self.torn = 0  # torn reads seen (diagnostics)

    def reshape(self, rows: int, cols: int) -> "TargetReader":
        """A reader for a new engine shape (built off the audio path), carrying the flags."""
        r = TargetReader(self.shm, rows, cols)
        r.panic, r.fade_req, r.fade_ms, r.torn = self.panic, self.fade_req, self.fade_ms, self.torn
        return r

    def read(self) -> int:
        """NEW if fresh gains (of the right shape) are in ``scratch``; NONE; or TORN."""
        ctl = self.shm.ctl
        s1 = int(ctl[C_SEQ])
        if s1 == self._last_seq:
            return self.NONE
        if s1 & 1:
            self.torn += 1
            return self.TORN
        version = int(ctl[C_VERSION])
        match = int(ctl[C_ROWS]) == self.rows and int(ctl[C_COLS]) == self.cols
        fresh = match and version != self.version
        if fresh:
            np.copyto(self.scratch, self._view)
        panic = int(ctl[C_PANIC])
        fade_req = int(ctl[C_FADE_REQ])
        fade_us = int(ctl[C_FADE_MS])
        if int(ctl[C_SEQ]) != s1:
            self.torn += 1
            return self.TORN  # keep everything as it was; the next block tries again
        self.panic = panic
        self.fade_req = fade_req
        self.fade_ms = fade_us * 1e-3
        if match:
            self._last_seq = s1
        if fresh:
            self.version = version
            return self.NEW
        return self.NONE


class StatusWriter:
    """The child's once-per-meter-frame publication of meters and counters."""

    def __init__(self, shm: AudioShm):
        self.shm = shm
        shm.writer_reset()

    def begin(self) -> None:
        self.shm.st[S_SEQ] += 1

    def end(self) -> None:
        self.shm.st[S_SEQ] += 1

    def beat_main(self, now: float) -> None:
        self.shm.beat[B_MAIN] = now

    def beat_audio(self, now: float) -> None:
        self.shm.beat[B_AUDIO] = now
