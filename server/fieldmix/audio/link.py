"""The control process's side of the audio child: :class:`AudioLink`.

The link owns the shared-memory segment and the child process. Per-block data (target
gains, panic, fade-out requests) goes through the seqlocked control region; meters and
counters come back through the status region; rare events (a new layout, the glide time,
a bigger segment, stop) go by message over a ``multiprocessing`` Pipe. The control
process never imports ``sounddevice``: only the child (and the device-listing helper) do.

Supervision (:meth:`AudioLink.poll`, called by the daemon's event loop every 100-250 ms;
it never blocks for long):

- the child died (any exit code but a requested stop) or its heartbeat stalled (it is
  killed): a new child starts at once with the current targets, layout, panic state and
  glide (they live here and in the segment), state ``restarting`` until it runs again;
- the device was lost (the child reports it and exits with code 3): state
  ``device_lost``; a fresh child is tried after 0.5, 1, 2, 4, 4 ... s (PortAudio reads its
  device list only when it is initialised, so a new process is the clean way to find a
  device that came back); state ``running`` again when one opens the device.

Counters (callbacks, xruns, ...) are summed over every child the link has run.
"""

from __future__ import annotations

import concurrent.futures
import multiprocessing as mp
import os
import signal
import threading
import time
import weakref
from collections import deque
from contextlib import contextmanager
from typing import Optional, Sequence

import numpy as np

from ..engine import MAX_GAIN
from ..errors import FieldmixError
from . import child as C
from . import shm as S
from .shm import AudioShm, ShmLayout

STATES = ("starting", "running", "device_lost", "restarting", "stopped")
BACKENDS = ("virtual", "device")

_SPAWN_LOCK = threading.Lock()
_SEGMENTS = 0


@contextmanager
def _child_environment(extra: dict):
    """Put ``extra`` into os.environ while a child is spawned (it inherits the environment).

    This reaches the child before *any* of its imports, including a main module that the
    spawn machinery re-imports there. Variables the user set explicitly are left alone.
    """
    with _SPAWN_LOCK:
        added = [k for k in extra if k not in os.environ]
        for k in added:
            os.environ[k] = extra[k]
        try:
            yield
        finally:
            for k in added:
                os.environ.pop(k, None)


def plain_layout(cfg: dict, where: str = "layout") -> dict:
    """Check an ``engine_layout`` dict and turn it into plain Python values (picklable, numpy-free)."""
    try:
        n_out = int(cfg["n_outputs"])
        outputs = [int(o) for o in cfg["outputs"]]
        delays = [int(d) for d in np.asarray(cfg["delays"]).ravel()]
        subs = [int(s) for s in cfg.get("sub_outputs", ())]
        trims = cfg.get("sub_trims_db")
        trims = None if trims is None else [float(t) for t in trims]
        xover = float(cfg.get("crossover_hz", 80.0))
    except (KeyError, TypeError, ValueError) as exc:
        raise FieldmixError(f"{where}: incomplete engine layout ({exc})") from None
    if n_out < 1:
        raise FieldmixError(f"{where}: at least one speaker is needed")
    if len(outputs) != n_out or len(delays) != n_out:
        raise FieldmixError(f"{where}: {n_out} speakers but {len(outputs)} outputs and {len(delays)} delays")
    if min(outputs) < 1:
        raise FieldmixError(f"{where}: output channels are 1-based, got {min(outputs)}")
    if min(delays) < 0:
        raise FieldmixError(f"{where}: negative delay {min(delays)} samples")
    if any(not 0 <= s < n_out for s in subs):
        raise FieldmixError(f"{where}: sub speaker index out of range: {subs}")
    if trims is not None and len(trims) != len(subs):
        raise FieldmixError(f"{where}: {len(subs)} subs but {len(trims)} sub trims")
    if not (np.isfinite(xover) and xover > 0):
        raise FieldmixError(f"{where}: crossover must be a positive frequency, got {xover}")
    return {
        "n_outputs": n_out,
        "sub_outputs": subs,
        "sub_trims_db": trims,
        "crossover_hz": xover,
        "delays": delays,
        "outputs": outputs,
    }


def _cols(layout: dict) -> int:
    return layout["n_outputs"] + (1 if layout["sub_outputs"] else 0)


def _cleanup(procs: list, segments: list) -> None:  # weakref.finalize: no reference to the link
    for p in procs:
        try:
            if p.is_alive():
                p.kill()
                p.join(1.0)
        except Exception:
            pass
    for seg in segments:
        try:
            seg.close()
            seg.unlink()
        except Exception:
            pass


class AudioLink:
    """Start, feed, watch and restart the audio child. See the module docstring."""

    def __init__(
        self,
        state,
        backend: str = "virtual",
        device=None,
        samplerate: int = 48000,
        blocksize: int = 128,
        record: Optional[str] = None,
        client_name: Optional[str] = "fieldmix",
        engine_options: Optional[dict] = None,
        meter_ms: float = 50.0,
        stall_timeout: float = 2.0,
        start_timeout: float = 30.0,
        backoff: Sequence[float] = (0.5, 1.0, 2.0, 4.0),
        restart_fade_in_ms: float = 250.0,
        shm_min_cols: int = 64,
        input_channels: Optional[Sequence[int]] = None,
        source_files: Optional[Sequence[Optional[str]]] = None,
        inputs: Optional[str] = None,
    ):
        if backend not in BACKENDS:
            raise FieldmixError(f"audio backend must be one of {', '.join(BACKENDS)}, got {backend!r}")
        if isinstance(samplerate, bool) or not isinstance(samplerate, (int, np.integer)) or not 8000 <= samplerate <= 384000:
            raise FieldmixError(f"--samplerate: expected an integer rate 8000..384000 Hz, got {samplerate!r}")
        if isinstance(blocksize, bool) or not isinstance(blocksize, (int, np.integer)) or not 16 <= blocksize <= 4096:
            raise FieldmixError(f"--blocksize: expected 16..4096 frames, got {blocksize!r}")
        sources = list(state.sources)
        if not sources:
            raise FieldmixError("the show has no sources: nothing to play")
        if inputs is None:
            inputs = "files" if backend == "virtual" else "device"
        if inputs not in ("files", "device") or (backend == "virtual" and inputs != "files"):
            raise FieldmixError(f'audio inputs must be "device" or "files" ("files" with the virtual backend), got {inputs!r}')
        self.inputs = inputs
        self.backend = backend
        self.device = device
        self.samplerate = int(samplerate)
        self.blocksize = int(blocksize)
        self.record = str(record) if record else None
        self.client_name = client_name
        self.engine_options = dict(engine_options or {})
        self.meter_ms = float(meter_ms)
        self.stall_timeout = float(stall_timeout)
        self.start_timeout = float(start_timeout)
        self.backoff = tuple(float(b) for b in backoff) or (1.0,)
        self.restart_fade_in_ms = float(restart_fade_in_ms)
        self.shm_min_cols = int(shm_min_cols)

        self.n_inputs = len(sources)
        self.input_channels = [int(c) for c in (input_channels or [s.spec.input for s in sources])]
        if len(self.input_channels) != self.n_inputs or min(self.input_channels) < 1:
            raise FieldmixError(f"input channels must be 1-based, one per source: {self.input_channels}")
        if source_files is None:
            source_files = [str(s.spec.file) if getattr(s.spec, "file", None) else None for s in sources]
        self.source_files = [str(f) if f else None for f in source_files]
        self.glide_ms = float(state.show.glide_ms)
        self._layout = plain_layout(state.engine_layout(self.samplerate))
        self._layout_gen = 0
        self._targets = self._check_targets(state.target_matrix(), _cols(self._layout))
        self._absbuf = np.zeros_like(self._targets)
        self._panic = False

        self._ctx = mp.get_context("spawn")
        # children are started from a thread of their own, created with the first start: it
        # keeps the priority the process had then, so that a control process which lowers
        # its own threads' priority afterwards (the daemon does) still starts every new
        # audio child at the normal priority (an unprivileged process cannot raise it back)
        self._spawner = concurrent.futures.ThreadPoolExecutor(max_workers=1, thread_name_prefix="fieldmix-spawn")
        self._shm: Optional[AudioShm] = None
        self._old_shm: list[AudioShm] = []  # segments the current child may still be reading
        self._proc = None
        self._conn = None
        self._child_gen = 0
        self._spawned_at = 0.0
        self._child_ran = False  # the current child reported "ready"
        self._ready_at = 0.0
        self._ever_ran = False
        self._stopping = False
        self._state = "stopped"
        self._info: dict = {}
        self._ring_gen = -1  # applied_targets(): the child generation and ring entries read
        self._ring_seen = 0
        self._last_error: Optional[str] = None
        self._last_error_kind: Optional[str] = None
        self._lost_at: Optional[float] = None
        self._retry_at: Optional[float] = None
        self._retry_i = 0
        self._crash_times: deque = deque(maxlen=8)
        self._restarts = 0
        self._device_losses = 0
        self._recoveries: list[float] = []  # seconds from loss/crash to running again
        self._down_since: Optional[float] = None
        self._acc = {k: 0 for k in ("blocks", "expected", "flagged", "nonfinite", "limited", "cb_errors", "rec_overflow")}
        self._last_snap: Optional[dict] = None
        self._last_snap_gen = -1
        self._events: deque = deque(maxlen=256)
        self._new_events: list = []
        self._applied_layout_gen = 0
        self._record_part = 0
        self._procs_for_cleanup: list = []
        self._segments_for_cleanup: list = []
        self._finalizer = weakref.finalize(self, _cleanup, self._procs_for_cleanup, self._segments_for_cleanup)

    # ================================================================ helpers
    def _check_targets(self, G, cols: int) -> np.ndarray:
        G = np.asarray(G, dtype=np.float32)
        if G.shape != (self.n_inputs, cols):
            raise ValueError(f"target matrix must be {self.n_inputs} x {cols} for this layout, got {G.shape}")
        if not np.all(np.isfinite(G)):
            raise ValueError("non-finite value in target matrix")
        if G.size and float(np.abs(G).max()) > MAX_GAIN:
            raise ValueError(f"target gain beyond +-{MAX_GAIN:g}")
        return np.array(G, dtype=np.float32, copy=True)

    def _event(self, name: str, **data) -> None:
        e = {"time": time.time(), "event": name, **data}
        self._events.append(e)
        self._new_events.append(e)

    def _new_segment(self, cols: int) -> AudioShm:
        global _SEGMENTS
        _SEGMENTS += 1
        cap = ShmLayout.capacity_for(cols, self.shm_min_cols)
        seg = AudioShm.create(self.n_inputs, cap, name=f"fmx_{os.getpid()}_{_SEGMENTS}_{os.urandom(3).hex()}")
        self._segments_for_cleanup.append(seg)
        return seg

    def _record_path(self) -> Optional[str]:
        if not self.record:
            return None
        self._record_part += 1
        if self._record_part == 1:
            return self.record
        stem, ext = os.path.splitext(self.record)
        return f"{stem}.part{self._record_part}{ext or '.wav'}"

    # ================================================================ lifecycle
    def start(self, wait: bool = True, timeout: Optional[float] = None) -> "AudioLink":
        """Make the segment, start the child; with ``wait``, return once audio runs.

        Raises FieldmixError if the child cannot start (PortAudio missing, no such device,
        the device refuses the rate or block size, an unreadable source file ...).
        """
        if self._proc is not None:
            return self
        self._stopping = False
        self._shm = self._new_segment(_cols(self._layout))
        self._shm.write_targets(self._targets)
        self._shm.write_panic(self._panic)
        self._state = "starting"
        self._spawn(fade_in_ms=None)
        if not wait:
            return self
        deadline = time.monotonic() + (timeout if timeout is not None else self.start_timeout)
        while True:
            self.poll()
            if self._state == "running":
                return self
            if self._proc is None or (self._state in ("stopped", "device_lost") and not self._ever_ran):
                err = self._last_error or "the audio process stopped at start"
                self._teardown()
                raise FieldmixError(f"audio could not start: {err}")
            if time.monotonic() > deadline:
                self._teardown()
                raise FieldmixError(f"audio could not start within {timeout or self.start_timeout:g} s")
            time.sleep(0.02)

    def _spawn(self, fade_in_ms: Optional[float]) -> None:
        # a segment replaced while no child was there to acknowledge it: nobody reads it now
        for seg in self._old_shm:
            seg.close()
            seg.unlink()
            if seg in self._segments_for_cleanup:
                self._segments_for_cleanup.remove(seg)
        self._old_shm = []
        self._child_gen += 1
        cfg = {
            "backend": self.backend,
            "shm_name": self._shm.name,
            "child_gen": self._child_gen,
            "n_inputs": self.n_inputs,
            "input_channels": list(self.input_channels),
            "source_files": list(self.source_files),
            "samplerate": self.samplerate,
            "blocksize": self.blocksize,
            "device": self.device,
            "client_name": self.client_name,
            "record": self._record_path(),
            "glide_ms": self.glide_ms,
            "layout": dict(self._layout),
            "layout_gen": self._layout_gen,
            "engine_options": dict(self.engine_options),
            "meter_ms": self.meter_ms,
            "fade_in_ms": fade_in_ms,
            "file_inputs": self.inputs == "files",
        }
        parent_conn, child_conn = self._ctx.Pipe(duplex=True)
        proc = self._ctx.Process(target=C.child_main, args=(cfg, child_conn), name=f"fieldmix-audio-{self._child_gen}", daemon=True)
        env = dict(C.THREAD_ENV)
        env["JACK_NO_START_SERVER"] = "1"
        with _child_environment(env):
            self._spawner.submit(proc.start).result()
        child_conn.close()  # the child holds its own end; EOF now means the child is gone
        self._proc, self._conn = proc, parent_conn
        self._procs_for_cleanup[:] = [proc]
        self._spawned_at = time.monotonic()
        self._child_ran = False
        self._event("child_started", pid=proc.pid, generation=self._child_gen)

    def _teardown(self) -> None:
        proc = self._proc
        if proc is not None and proc.is_alive():
            proc.kill()
            proc.join(2.0)
        self._proc = None
        if self._conn is not None:
            self._conn.close()
            self._conn = None
        for seg in [self._shm, *self._old_shm]:
            if seg is not None:
                seg.close()
                seg.unlink()
        self._shm = None
        self._old_shm = []
        self._segments_for_cleanup.clear()
        self._procs_for_cleanup.clear()
        self._state = "stopped"

    def fade_out_and_stop(self, timeout: float = 0.5, fade_ms: float = 120.0) -> bool:
        """Fade out (within 200 ms), stop the child, free the segment. True if it went cleanly."""
        if self._proc is None:
            self._teardown()
            return True
        self._stopping = True
        t0 = time.monotonic()
        clean = False
        proc = self._proc
        try:
            if proc.is_alive() and self._child_ran:
                self._shm.write_fade_out(fade_ms)
                fade_deadline = t0 + min(0.2, fade_ms * 1e-3 + 0.08)
                while time.monotonic() < fade_deadline and proc.is_alive():
                    if self._shm.beat[S.B_FADED] == 1.0:
                        break
                    time.sleep(0.003)
            if proc.is_alive():
                try:
                    self._conn.send(("stop", 0.0))
                except (OSError, BrokenPipeError):
                    pass
                proc.join(max(0.05, timeout - (time.monotonic() - t0)))
            clean = proc.exitcode == C.EXIT_OK
            self._drain()
        finally:
            self._fold_counters()
            self._teardown()
            self._event("stopped", clean=clean, seconds=round(time.monotonic() - t0, 3))
        return clean

    close = fade_out_and_stop

    def __enter__(self) -> "AudioLink":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.fade_out_and_stop()

    # ================================================================ control side, per block
    def applied_targets(self) -> list:
        """(version, frame) for each target version the current child has taken since the
        last call: the frame position (samples since the child's first block, which is
        also sample 0 of a ``record`` file) at which it started to sound. Entries that the
        ring overwrote before this call are missing (the caller estimates those)."""
        seg = self._shm
        if seg is None or seg.closed:
            return []
        if self._ring_gen != self._child_gen:
            self._ring_gen, self._ring_seen = self._child_gen, 0
        beat = seg.beat
        n = int(beat[S.B_APPLIED_N])
        if n < self._ring_seen:  # a fresh segment or child: start over
            self._ring_seen = 0
        first = max(self._ring_seen, n - S.RING_LEN)
        out = []
        for i in range(first, n):
            k = S.B_RING + 2 * (i % S.RING_LEN)
            out.append((int(beat[k]), int(beat[k + 1])))
        if int(beat[S.B_APPLIED_N]) - first > S.RING_LEN:  # overwritten while we read: drop the oldest
            out = out[int(beat[S.B_APPLIED_N]) - first - S.RING_LEN:]
        self._ring_seen = n
        return out

    def push_targets(self, G) -> int:
        """Publish a new target matrix (n_inputs x columns of the current layout); returns its version."""
        if G.shape != self._targets.shape:
            raise ValueError(f"target matrix must be {self._targets.shape}, got {G.shape}")
        np.abs(G, out=self._absbuf)
        if not self._absbuf.max() <= MAX_GAIN:  # also refuses NaN (the comparison is false)
            raise ValueError(f"target gain non-finite or beyond +-{MAX_GAIN:g}")
        np.copyto(self._targets, G)
        if self._shm is None:
            return 0
        v = self._shm.write_targets(self._targets, check=False)
        for old in self._old_shm:
            if not old.closed:
                old.write_targets(self._targets, check=False)
        return v

    def panic(self, on: bool = True) -> None:
        """All outputs silent within one block (the engine ramps them down), until panic(False)."""
        self._panic = bool(on)
        for seg in (self._shm, *self._old_shm):
            if seg is not None and not seg.closed:
                seg.write_panic(self._panic)

    # ================================================================ rare events
    def set_glide_ms(self, ms: float) -> None:
        ms = float(ms)
        if not (np.isfinite(ms) and 0.0 <= ms <= 10000.0):
            raise FieldmixError(f"glide must be 0..10000 ms, got {ms}")
        self.glide_ms = ms
        self._send(("glide", ms))

    def send_layout(self, cfg: dict, targets=None) -> int:
        """Switch to a new engine layout (``ShowState.engine_layout``); returns its generation.

        ``targets`` (the new layout's target matrix) is required when the number of columns
        changes. Same speakers and outputs: the engine crossfades (gains ramp, delays
        crossfade). Otherwise the child builds a new engine and crossfades between the two;
        if the layout needs more output channels than the open stream has, the child fades
        out, reopens the stream and fades in (``reopened`` event).
        """
        layout = plain_layout(cfg)
        cols = _cols(layout)
        if targets is None:
            if cols != self._targets.shape[1]:
                raise ValueError("the new layout has another number of columns: pass its targets")
            targets = self._targets
        G = self._check_targets(targets, cols)
        self._layout_gen += 1
        if self._shm is not None and cols > self._shm.layout.n_cols:
            new = self._new_segment(cols)
            new.copy_control_from(self._shm)
            self._old_shm.append(self._shm)
            self._shm = new
            self._send(("shm", new.name))
        self._layout = layout
        self._targets = G
        self._absbuf = np.zeros_like(G)
        if self._shm is not None:
            for seg in (self._shm, *self._old_shm):
                if cols <= seg.layout.n_cols:
                    seg.write_targets(G)
        self._send(("layout", self._layout_gen, dict(layout), G))
        return self._layout_gen

    def _send(self, msg) -> None:
        if self._conn is None or self._proc is None or not self._proc.is_alive():
            return  # the next child starts from the current layout and glide anyway
        try:
            self._conn.send(msg)
        except (OSError, BrokenPipeError):
            pass

    # ================================================================ supervision
    def poll(self) -> list[dict]:
        """Take the child's messages, notice a dead or stalled child, restart / retry. Returns new events."""
        now = time.monotonic()
        self._drain()
        proc = self._proc
        if proc is not None and not self._stopping:
            self._remember_snapshot()
            if proc.exitcode is not None:
                self._on_child_exit(proc.exitcode, now)
            elif self._child_ran and now - max(float(self._shm.beat[S.B_MAIN]), self._ready_at) > self.stall_timeout:
                self._event("child_stalled", pid=proc.pid, seconds=round(now - float(self._shm.beat[S.B_MAIN]), 2))
                self._kill_child()
                self._on_child_exit(proc.exitcode, now, stalled=True)
            elif not self._child_ran and now - self._spawned_at > self.start_timeout:
                self._event("child_start_timeout", pid=proc.pid)
                self._last_error = f"the audio process did not start within {self.start_timeout:g} s"
                self._kill_child()
                self._on_child_exit(proc.exitcode, now, stalled=True)
        if self._proc is None and self._retry_at is not None and now >= self._retry_at and not self._stopping:
            self._retry_at = None
            self._spawn(fade_in_ms=self.restart_fade_in_ms)
        out, self._new_events = self._new_events, []
        return out

    def _kill_child(self) -> None:
        p = self._proc
        try:
            os.kill(p.pid, signal.SIGKILL)
        except (ProcessLookupError, TypeError):
            pass
        p.join(2.0)

    def _drain(self) -> None:
        conn = self._conn
        if conn is None:
            return
        try:
            while conn.poll(0):
                self._on_message(conn.recv())
        except (EOFError, OSError):
            pass

    def _on_message(self, msg) -> None:
        kind = msg[0]
        if kind == "ready":
            self._info = dict(msg[1])
            self._applied_layout_gen = max(self._applied_layout_gen, int(self._info.get("layout_gen", 0)))
            self._child_ran = True
            self._ready_at = time.monotonic()
            self._ever_ran = True
            was = self._state
            self._state = "running"
            self._retry_i = 0
            if self._down_since is not None:
                took = time.monotonic() - self._down_since
                self._recoveries.append(took)
                self._event("audio_back", after=was, seconds=round(took, 3))
                self._down_since = None
            self._event("running", **{k: self._info.get(k) for k in ("device", "samplerate", "blocksize", "pid")})
        elif kind == "error":
            _, err_kind, text = msg
            self._last_error, self._last_error_kind = text, err_kind
            self._event("error", kind=err_kind, message=text)
        elif kind == "device_lost":
            self._last_error, self._last_error_kind = msg[1], "device_lost"
            self._event("device_lost", message=msg[1])
        elif kind == "layout_applied":
            self._applied_layout_gen = max(self._applied_layout_gen, int(msg[1]))
            self._event("layout_applied", generation=int(msg[1]), mode=msg[2])
        elif kind == "reopened":
            self._info.update(msg[1])
            self._event("stream_reopened", outputs=msg[1].get("device_outputs"))
        elif kind == "shm_attached":
            keep = []
            for seg in self._old_shm:
                if seg.name == msg[1] or seg is self._shm:
                    keep.append(seg)
                else:
                    seg.close()
                    seg.unlink()
                    if seg in self._segments_for_cleanup:
                        self._segments_for_cleanup.remove(seg)
            self._old_shm = keep
        elif kind == "info":  # facts the child learns after "ready" (the audio thread's priority)
            if isinstance(msg[1], dict):
                self._info.update(msg[1])
        elif kind == "warning":
            self._event("warning", message=msg[1])
        elif kind == "stopped":
            self._event("child_stopped", reason=msg[1])

    def _remember_snapshot(self) -> None:
        snap = self._shm.read_status(retries=5) if self._shm is not None else None
        if snap is not None and int(snap["words"][S.S_CHILD_GEN]) == self._child_gen:
            self._last_snap, self._last_snap_gen = snap, self._child_gen

    def _fold_counters(self) -> None:
        """Add the finished child's counters to the running totals (once per child)."""
        snap = self._last_snap if self._last_snap_gen == self._child_gen else None
        if self._shm is not None and not self._shm.closed:
            fresh = self._shm.read_status(retries=5)
            if fresh is not None and int(fresh["words"][S.S_CHILD_GEN]) == self._child_gen:
                snap = fresh
        if snap is not None:
            w = snap["words"]
            for key, idx in (("blocks", S.S_BLOCKS), ("expected", S.S_EXPECTED), ("flagged", S.S_FLAGGED),
                             ("nonfinite", S.S_NONFINITE), ("limited", S.S_LIMITED), ("cb_errors", S.S_CB_ERRORS),
                             ("rec_overflow", S.S_REC_OVERFLOW)):  # fmt: skip
                self._acc[key] += int(w[idx])
        self._last_snap_gen = -2  # folded

    def _on_child_exit(self, code: Optional[int], now: float, stalled: bool = False) -> None:
        self._drain()
        self._fold_counters()
        if self._conn is not None:
            self._conn.close()
        self._proc, self._conn = None, None
        self._event("child_exited", code=code, stalled=stalled)
        if code == C.EXIT_FATAL:
            self._state = "stopped"
            self._event("audio_stopped", reason=self._last_error)
            return
        if code in (C.EXIT_DEVICE_LOST, C.EXIT_DEVICE_UNAVAILABLE) and not stalled:
            if not self._ever_ran:  # never ran: a wrong device is the user's to fix (start() raises)
                self._state = "device_lost"
                return
            if self._state != "device_lost":
                self._device_losses += 1
                self._down_since = self._down_since or now
                self._retry_i = 0
            self._state = "device_lost"
            delay = self.backoff[min(self._retry_i, len(self.backoff) - 1)]
            self._retry_i += 1
            self._retry_at = now + delay
            self._event("device_retry", in_seconds=delay)
            return
        # a crash, a kill, a stall: restart now (backing off if it keeps crashing)
        if not self._ever_ran:
            self._state = "stopped"
            self._last_error = self._last_error or f"the audio process exited with code {code} at start"
            return
        self._restarts += 1
        self._crash_times.append(now)
        if self._down_since is None:
            self._down_since = now
        if self._state != "device_lost":
            self._state = "restarting"
        recent = [t for t in self._crash_times if now - t < 30.0]
        if len(recent) >= 5:
            delay = self.backoff[min(len(recent) - 5, len(self.backoff) - 1)]
            self._retry_at = now + delay
            self._event("restart_backoff", in_seconds=delay)
        else:
            self._spawn(fade_in_ms=self.restart_fade_in_ms)

    # ================================================================ reading
    def meters(self) -> dict:
        """The newest meter frame: per-channel peak and RMS (linear; full scale = 1.0).

        RMS is the plain root-mean-square over the frame (a full-scale sine reads 0.707,
        i.e. -3.01 dB; AES17 dB FS would add 3.01 dB). ``valid`` is False before the current
        child has published a frame.
        """
        snap = self._shm.read_status() if self._shm is not None and not self._shm.closed else None
        if snap is not None and int(snap["words"][S.S_CHILD_GEN]) == self._child_gen:
            self._last_snap, self._last_snap_gen = snap, self._child_gen
        elif self._last_snap_gen == self._child_gen:
            snap = self._last_snap
        else:
            snap = None
        if snap is None:
            return {
                "valid": False, "frame": 0, "first_block": 0, "age_s": None,
                "in_peak": [0.0] * self.n_inputs, "in_rms": [0.0] * self.n_inputs,
                "out_peak": [0.0] * self._layout["n_outputs"], "out_rms": [0.0] * self._layout["n_outputs"],
                "panic": self._panic, "panic_block": 0, "targets_applied": 0, "faded_out": False, "layout_generation": 0,
            }  # fmt: skip
        w, f = snap["words"], snap["floats"]
        in_peak, in_rms, out_peak, out_rms = snap["meters"]
        return {
            "valid": True,
            "frame": int(w[S.S_FRAME]),
            "first_block": int(w[S.S_FIRST_BLOCK]),
            "blocks": int(w[S.S_BLOCKS]),
            "age_s": max(0.0, time.monotonic() - float(f[S.F_FRAME_TIME])),
            "in_peak": [float(v) for v in in_peak],
            "in_rms": [float(v) for v in in_rms],
            "out_peak": [float(v) for v in out_peak],
            "out_rms": [float(v) for v in out_rms],
            "panic": bool(w[S.S_PANIC]),
            "panic_block": int(w[S.S_PANIC_BLOCK]),
            "targets_applied": int(w[S.S_CTL_APPLIED]),
            "faded_out": bool(w[S.S_FADED_OUT]),
            "layout_generation": int(w[S.S_LAYOUT_GEN]),
        }

    def status(self) -> dict:
        """Audio state and counters (summed over every child this link has run)."""
        snap = self._shm.read_status() if self._shm is not None and not self._shm.closed else None
        cur = snap if snap is not None and int(snap["words"][S.S_CHILD_GEN]) == self._child_gen and self._proc is not None else None
        w = cur["words"] if cur is not None else None
        f = cur["floats"] if cur is not None else None

        def total(key, idx):
            return self._acc[key] + (int(w[idx]) if w is not None else 0)

        seen = total("blocks", S.S_BLOCKS)
        expected = max(seen, total("expected", S.S_EXPECTED))
        flagged = total("flagged", S.S_FLAGGED)
        missed = expected - seen
        return {
            "state": self._state,
            "backend": self.backend,
            "inputs": self.inputs,
            "device": self._info.get("device"),
            "hostapi": self._info.get("hostapi"),
            "samplerate": self.samplerate,
            "blocksize": int(w[S.S_BLOCKSIZE]) if w is not None and w[S.S_BLOCKSIZE] > 0 else self.blocksize,
            "device_inputs": int(w[S.S_DEV_IN]) if w is not None else self._info.get("device_inputs"),
            "device_outputs": int(w[S.S_DEV_OUT]) if w is not None else self._info.get("device_outputs"),
            "xruns": flagged + missed,
            "xruns_flagged": flagged,
            "callbacks_seen": seen,
            "callbacks_expected": expected,
            "callbacks_missed": missed,
            "dsp_load_mean": float(f[S.F_DSP_MEAN]) if f is not None else 0.0,
            "dsp_load_max": float(f[S.F_DSP_MAX]) if f is not None else 0.0,
            "nonfinite_inputs": total("nonfinite", S.S_NONFINITE),
            "limited_blocks": total("limited", S.S_LIMITED),
            "callback_errors": total("cb_errors", S.S_CB_ERRORS),
            "record": self._info.get("record"),
            "kernels": self._info.get("kernels"),
            "priority": self._info.get("priority"),
            "record_overflow": total("rec_overflow", S.S_REC_OVERFLOW),
            "restarts": self._restarts,
            "device_losses": self._device_losses,
            "recovery_seconds": [round(t, 3) for t in self._recoveries],
            "last_error": self._last_error,
            "layout_generation": self._layout_gen,
            "layout_applied": self._applied_layout_gen,
            "panic": self._panic,
            "pid": self._proc.pid if self._proc is not None else None,
        }

    @property
    def state(self) -> str:
        return self._state

    @property
    def events(self) -> list[dict]:
        return list(self._events)

    @property
    def targets(self) -> np.ndarray:
        return self._targets

    @property
    def layout(self) -> dict:
        return dict(self._layout)

    @property
    def pid(self) -> Optional[int]:
        return self._proc.pid if self._proc is not None else None

    def wait_for(self, predicate, timeout: float, interval: float = 0.05) -> bool:
        """poll() until ``predicate(self)`` is true or ``timeout`` passes (for tools and tests)."""
        deadline = time.monotonic() + timeout
        while True:
            self.poll()
            if predicate(self):
                return True
            if time.monotonic() > deadline:
                return False
            time.sleep(interval)
