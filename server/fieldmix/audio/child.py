"""The audio child process: the engine and one backend, nothing else.

Started by :class:`fieldmix.audio.link.AudioLink` with multiprocessing's "spawn" method
(never fork: a forked child would inherit the control process's threads, locks and
sockets). This module imports nothing heavy at the top, so :func:`child_main` can set the
thread environment (``OPENBLAS_NUM_THREADS=1`` ...) before numpy loads; the link also puts
those variables into the environment the child is spawned with, which covers a main module
that the spawn machinery re-imports in the child.

One code path for every block, :meth:`AudioChild._block`, used by both backends:

- ``virtual``: a clocked loop in the main thread; block k starts at ``t0 + k * P``
  (``time.monotonic``, no drift), its inputs come from the sources' files (looped), its
  outputs go to the meters and optionally to a WAV file through a writer thread.
- ``device``: one duplex sounddevice stream; its callback calls ``_block``. The main
  thread supervises (heartbeat, stop, stream reopen, device loss).

Per block: take queued rare events (swapped in by the receiver thread, applied between
blocks), read the control region of the shared memory (seqlock; a torn read keeps the
previous gains), fill the engine's input, process, map speakers to device columns, copy to
the recorder ring, accumulate meters, and once per meter frame publish status. Nothing in
it allocates arrays, takes a lock or does I/O.

Exit codes: 0 stopped on request; 3 device lost while running; 4 device not available at
start; 5 fatal (PortAudio missing, unusable configuration); 1 an unexpected error.
"""

from __future__ import annotations

import os
import signal
import sys
import threading
import time
import traceback
from collections import deque

from ..errors import FieldmixError

EXIT_OK = 0
EXIT_CRASH = 1
EXIT_DEVICE_LOST = 3
EXIT_DEVICE_UNAVAILABLE = 4
EXIT_FATAL = 5

S = None  # fieldmix.audio.shm, imported in the child once numpy may load

THREAD_ENV = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1", "NUMEXPR_NUM_THREADS": "1"}

XFADE_MS = 50.0  # crossfade between two engines on a layout change that needs a new engine
REOPEN_FADE_MS = 60.0  # fade out before a stream reopen
REOPEN_FADE_IN_MS = 200.0  # fade in after it
STOP_FADE_MS = 100.0  # fade out on a signal or when the control process vanished
STALL_S = 1.0  # no callback for this long while the stream claims to run: device lost


class _Fatal(Exception):
    def __init__(self, kind: str, message: str, code: int):
        super().__init__(message)
        self.kind = kind
        self.message = message
        self.code = code


def raise_priority(mode: str = "normal") -> str:
    """Give the calling thread (only it: Linux schedules threads) audio priority.

    ``auto``: SCHED_FIFO at priority 70 (what a realtime JACK setup gives its clients),
    else ``nice`` -10, else unchanged; ``normal``: unchanged. Returns what it got, e.g.
    ``"fifo 70"``, ``"nice -10"`` or ``"normal"``. Needs the right to do so (root,
    CAP_SYS_NICE or an rtprio limit, as audio users usually have); without it nothing
    changes. A runaway realtime thread is still bounded by the kernel's realtime
    throttling (by default 95 % of each second), and the audio child does bounded work
    per block.
    """
    if mode != "auto":
        return "normal"
    try:
        lo, hi = os.sched_get_priority_min(os.SCHED_FIFO), os.sched_get_priority_max(os.SCHED_FIFO)
        prio = max(lo, min(hi, 70))
        os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(prio))
        return f"fifo {prio}"
    except (AttributeError, OSError):
        pass
    try:
        tid = threading.get_native_id()
        os.setpriority(os.PRIO_PROCESS, tid, -10)  # per thread on Linux (a thread id is a task id)
        return "nice -10"
    except (AttributeError, OSError):
        return "normal"


def child_main(cfg: dict, conn) -> None:
    """Entry point of the spawned process (``cfg`` holds only plain Python values)."""
    for k, v in THREAD_ENV.items():
        os.environ.setdefault(k, v)
    os.environ.setdefault("JACK_NO_START_SERVER", "1")
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C belongs to the control process
    import faulthandler

    faulthandler.enable()  # a crash in native code leaves a traceback on stderr
    code = EXIT_CRASH
    child = None
    try:
        child = AudioChild(cfg, conn)
        signal.signal(signal.SIGTERM, child._on_sigterm)
        code = child.run()
    except _Fatal as exc:
        _send_now(child, conn, ("error", exc.kind, exc.message))
        code = exc.code
    except BaseException as exc:  # report, never hang
        _send_now(child, conn, ("error", "internal", f"{type(exc).__name__}: {exc}\n{traceback.format_exc(limit=8)}"))
        code = EXIT_CRASH
    finally:
        if child is not None:
            child.shutdown_messenger()
        try:
            conn.close()
        except Exception:
            pass
        sys.stdout.flush()
        sys.stderr.flush()
        os._exit(code)  # skip Pa_Terminate (it can hang after a JACK server vanished)


def _send_now(child, conn, msg) -> None:
    if child is not None:
        child.post(msg)
        return
    try:
        conn.send(msg)
    except Exception:
        pass


class Recorder:
    """WAV writer thread fed through a preallocated ring of blocks (the audio path only copies)."""

    def __init__(self, path: str, samplerate: int, channels: int, blocksize: int, seconds: float = 4.0):
        import numpy as np
        import soundfile as sf

        self.path = path
        self.channels = channels
        n_slots = max(8, int(seconds * samplerate / blocksize))
        self.ring = np.zeros((n_slots, blocksize, channels), dtype=np.float32)
        self.lengths = np.zeros(n_slots, dtype=np.int64)
        self.n_slots = n_slots
        self.w = 0  # blocks pushed (audio thread writes)
        self.r = 0  # blocks written (writer thread writes)
        self.overflow = 0
        self.frames_written = 0
        self.error = None
        suffix = os.path.splitext(path)[1].lower()
        fmt = {".rf64": "RF64", ".w64": "W64"}.get(suffix, "WAV")
        self._file = sf.SoundFile(path, "w", samplerate=samplerate, channels=channels, subtype="FLOAT", format=fmt)
        self._stop = False
        self._thread = threading.Thread(target=self._run, name="fieldmix-recorder", daemon=True)
        self._thread.start()

    def push(self, block) -> None:
        """Audio path: copy one block (frames, device channels) into the ring, or count an overflow."""
        size = self.ring.shape[1]
        for k in range(0, block.shape[0], size):  # a device period longer than a slot spans slots
            part = block[k : k + size]
            w = self.w
            if w - self.r >= self.n_slots:
                self.overflow += 1
                return
            slot = w % self.n_slots
            n = part.shape[0]
            c = min(self.channels, part.shape[1])
            dst = self.ring[slot]
            dst[:n, :c] = part[:, :c]
            if c < self.channels:
                dst[:n, c:] = 0.0
            self.lengths[slot] = n
            self.w = w + 1

    def _run(self) -> None:
        try:
            while True:
                stop = self._stop
                while self.r < self.w:
                    slot = self.r % self.n_slots
                    n = int(self.lengths[slot])
                    self._file.write(self.ring[slot, :n])
                    self.frames_written += n
                    self.r += 1
                if stop:
                    break
                time.sleep(0.02)
        except Exception as exc:  # disk full, ...: keep the audio running, report
            self.error = f"{type(exc).__name__}: {exc}"
        finally:
            try:
                self._file.close()
            except Exception:
                pass

    def close(self, timeout: float = 5.0) -> None:
        self._stop = True
        self._thread.join(timeout)


class _EngineSlot:
    """An engine and everything shaped like it (built off the audio path)."""

    def __init__(self, np, engine, layout: dict, reader, gen: int):
        self.engine = engine
        self.layout = layout
        self.reader = reader
        self.gen = gen
        self.n_out = int(layout["n_outputs"])
        self.n_cols = self.n_out + (1 if layout["sub_outputs"] else 0)
        cols = [int(o) - 1 for o in layout["outputs"]]
        self.out_cols = np.array(cols, dtype=np.intp)
        self.dev_out_needed = max(cols) + 1
        self.glide_pending = True  # set the real glide after the first block
        self.contiguous = cols == list(range(self.n_out))  # speaker j -> device column j


class AudioChild:
    def __init__(self, cfg: dict, conn):
        import numpy as np

        self.np = np
        self.cfg = cfg
        self.conn = conn
        self.backend = cfg["backend"]
        self.sr = int(cfg["samplerate"])
        self.blocksize = int(cfg["blocksize"])
        self.period = self.blocksize / self.sr
        self.n_in = int(cfg["n_inputs"])
        self.child_gen = int(cfg["child_gen"])
        self.meter_blocks = max(1, int(round(cfg.get("meter_ms", 50.0) * 1e-3 / self.period)))
        self._virtual_out = self.backend == "virtual"  # outputs go to a buffer of ours
        self.file_inputs = self.backend == "virtual" or bool(cfg.get("file_inputs"))
        self.follow_jack_period = bool(cfg.get("follow_jack_period", True))
        # "normal" by default: on the 2-vCPU VM we measure on, SCHED_FIFO for the audio thread
        # made deadline misses under load worse, not better (docs/performance.md); "auto"
        # is for machines where JACK itself runs realtime
        self.priority_mode = str(os.environ.get("FIELDMIX_AUDIO_PRIORITY") or cfg.get("priority") or "normal")
        self.priority = None  # what raise_priority() got, once the audio thread has run

        # messages: a receiver thread takes them, the audio path takes prepared actions
        self._outbox: deque = deque()
        self._actions: deque = deque()
        self._stop_reason = None  # set by a "stop" message, a signal, or the parent vanishing
        self._stop_fade_ms = STOP_FADE_MS
        self._reopen = None  # a slot that needs a stream with more output channels
        self._messenger_stop = False
        self._old_shm = []  # replaced segments stay mapped (small) until this process exits

        global S
        from . import shm as S
        from .shm import AudioShm, StatusWriter, TargetReader

        self._TargetReader = TargetReader
        self._StatusWriter = StatusWriter
        self._AudioShm = AudioShm
        self.shm = AudioShm.attach(cfg["shm_name"])
        self.status = StatusWriter(self.shm)
        self.shm.beat[S.B_PID] = os.getpid()
        self._rx_shm = self.shm  # the segment new readers bind to (receiver thread)

        try:
            from ..engine import Engine
        except ImportError as exc:
            raise _Fatal("config", f"the engine cannot be imported: {exc}", EXIT_FATAL) from None
        self._Engine = Engine
        self.engine_options = dict(cfg.get("engine_options") or {})
        if "kernels" not in self.engine_options:
            # one choice for the life of this process, from the first layout's size: a
            # small show does not load numba at all (docs/engine.md, "Kernels")
            from ..engine import kernels_for

            self.engine_options["kernels"] = kernels_for(self.n_in, int(cfg["layout"]["n_outputs"]) + 1)
        self.glide_ms = float(cfg["glide_ms"])

        layout = cfg["layout"]
        self.layout_gen = int(cfg.get("layout_gen", 0))
        self.slot = self._make_slot(layout, self.layout_gen, fade_in_ms=cfg.get("fade_in_ms"))
        self.old = None  # an engine fading out during a crossfade (or None)
        self.old_cols = None

        # counters and meter accumulators (preallocated)
        self.blocks = 0
        self.frames_seen = 0  # frames of the last callback (on JACK: the server's period)
        self.frame_pos = 0  # frames processed by this child (the sample position of the next block)
        self._period_reported = False
        self.flagged = 0
        self.expected = 0
        self.t_first = 0.0
        self.panic = 0
        self.panic_block = 0
        self.fade_seen = 0
        self.cb_errors = 0
        self.bad_targets = 0
        self.cb_error_text = None
        self._frame = 0
        self._frame_first = 0
        self._frame_blocks = 0
        self._load_sum = 0.0
        self._load_max = 0.0
        self._alloc_meters(self.slot.n_out)
        self._acc_in_peak = np.zeros(self.n_in, dtype=np.float32)
        self._acc_in_ms = np.zeros(self.n_in, dtype=np.float64)
        self._tmp_in = np.zeros(self.n_in, dtype=np.float64)
        self._acc_frames = 0
        self.dev_in = 0
        self.dev_out = 0
        self.recorder = None
        self._nonfinite_base = 0
        self._limited_base = 0
        self._exp_base = 0  # callbacks expected before the current stream was (re)opened
        self._t_first_pending = True
        self._blocks_at_open = 0
        self._t_stream = time.monotonic()
        self._internal_fade = None  # ms: a fade the child itself asks for (stop, reopen)

        # the control region may hold requests from a predecessor: take them as the baseline
        r = self.slot.reader
        r.read()
        self.fade_seen = r.fade_req
        if r.panic:
            self.slot.engine.panic(True)
            self.panic = 1

        self._messenger = threading.Thread(target=self._messenger_loop, name="fieldmix-audio-msg", daemon=True)
        self._messenger.start()

    # ================================================================ building blocks
    def _make_slot(self, layout: dict, gen: int, fade_in_ms=None, targets=None):
        np = self.np
        opts = dict(self.engine_options)
        if fade_in_ms is not None:
            opts["fade_in_ms"] = float(fade_in_ms)
        max_block = max(4096, self.blocksize)
        try:
            eng = self._Engine(
                n_inputs=self.n_in,
                n_outputs=int(layout["n_outputs"]),
                samplerate=self.sr,
                max_block=max_block,
                glide_ms=0.0,  # the first target is taken at once (under the fade-in); glide after
                sub_outputs=tuple(layout["sub_outputs"]),
                sub_trims_db=tuple(layout["sub_trims_db"]) if layout.get("sub_trims_db") is not None else None,
                crossover_hz=float(layout["crossover_hz"]),
                **opts,
            )
            eng.set_delays(np.asarray(layout["delays"], dtype=np.int64))
        except (FieldmixError, ValueError, TypeError) as exc:
            raise _Fatal("config", f"the engine refused the layout: {exc}", EXIT_FATAL) from None
        cols = int(layout["n_outputs"]) + (1 if layout["sub_outputs"] else 0)
        reader = self._TargetReader(self._rx_shm, self.n_in, cols)
        try:
            if targets is not None:
                eng.set_target(np.asarray(targets, dtype=np.float32).reshape(self.n_in, cols))
            elif reader.read() == reader.NEW:
                eng.set_target(reader.scratch)
        except (FieldmixError, ValueError) as exc:
            raise _Fatal("config", f"the engine refused the targets: {exc}", EXIT_FATAL) from None
        return _EngineSlot(np, eng, layout, reader, gen)

    def _alloc_meters(self, n_out: int) -> None:
        np = self.np
        self._acc_out_peak = np.zeros(n_out, dtype=np.float32)
        self._acc_out_ms = np.zeros(n_out, dtype=np.float64)
        self._tmp_out = np.zeros(n_out, dtype=np.float64)

    def post(self, msg) -> None:
        """Queue a message for the control process (sent by the receiver thread)."""
        self._outbox.append(msg)

    # ================================================================ messages
    def _messenger_loop(self) -> None:
        conn = self.conn
        while not self._messenger_stop:
            try:
                while self._outbox:
                    conn.send(self._outbox.popleft())
                if conn.poll(0.05):
                    msg = conn.recv()
                    self._handle(msg)
            except (EOFError, OSError, BrokenPipeError):
                # the control process is gone: fade out and stop
                if self._stop_reason is None:
                    self._stop_reason = "parent gone"
                return
            except Exception as exc:  # a message we could not act on: report, keep playing
                self.post(("warning", f"message not applied: {type(exc).__name__}: {exc}"))

    def shutdown_messenger(self, timeout: float = 1.0) -> None:
        """Flush what is queued for the parent, then stop the receiver thread."""
        deadline = time.monotonic() + timeout
        while self._outbox and self._messenger.is_alive() and time.monotonic() < deadline:
            time.sleep(0.005)
        self._messenger_stop = True
        self._messenger.join(max(0.0, deadline - time.monotonic()) + 0.1)
        while self._outbox:
            try:
                self.conn.send(self._outbox.popleft())
            except Exception:
                break

    def _handle(self, msg) -> None:
        kind = msg[0]
        if kind == "stop":
            self._stop_fade_ms = float(msg[1]) if len(msg) > 1 and msg[1] is not None else 0.0
            self._stop_reason = "requested"
        elif kind == "glide":
            ms = float(msg[1])
            self._actions.append(lambda: self._apply_glide(ms))
        elif kind == "layout":
            _, gen, layout, targets = msg
            self._prepare_layout(int(gen), layout, targets)
        elif kind == "shm":
            name = msg[1]
            new = self._AudioShm.attach(name)
            self._rx_shm = new  # readers built from now on (a layout that follows) bind to it
            readers = (self._TargetReader(new, self.slot.reader.rows, self.slot.reader.cols), self._StatusWriter(new))
            self._actions.append(lambda: self._apply_shm(new, readers))
        elif kind == "ping":
            self.post(("pong", msg[1] if len(msg) > 1 else None))
        else:
            self.post(("warning", f"unknown message {kind!r}"))

    def _apply_glide(self, ms: float) -> None:
        self.glide_ms = ms
        if not self.slot.glide_pending:
            self.slot.engine.set_glide_ms(ms)

    def _apply_shm(self, new, readers) -> None:
        reader, status = readers
        old = self.shm
        new.beat[S.B_PID] = os.getpid()
        cur = self.slot.reader
        if cur.shm is not new:
            if (cur.rows, cur.cols) != (reader.rows, reader.cols):
                reader = cur.reshape(cur.rows, cur.cols)  # rare: a layout swapped in meanwhile
                reader.shm = new
                reader._view = new.gains[: cur.rows, : cur.cols]
            reader.read()  # requests already taken are not taken again
            reader.version, reader.fade_req = cur.version, self.fade_seen
            self.slot.reader = reader
        self.shm, self.status = new, status
        self._old_shm.append(old)
        self.post(("shm_attached", new.name))

    def _prepare_layout(self, gen: int, layout: dict, targets) -> None:
        """Receiver thread: build what the new layout needs, then queue the swap."""
        cur = self.slot
        same_engine = (
            int(layout["n_outputs"]) == cur.n_out
            and tuple(layout["sub_outputs"]) == tuple(cur.layout["sub_outputs"])
            and tuple(layout.get("sub_trims_db") or ()) == tuple(cur.layout.get("sub_trims_db") or ())
            and float(layout["crossover_hz"]) == float(cur.layout["crossover_hz"])
            and tuple(layout["outputs"]) == tuple(cur.layout["outputs"])
        )
        if same_engine:
            delays = self.np.asarray(layout["delays"], dtype=self.np.int64)

            def swap_in_place():
                cur.engine.set_delays(delays)  # the engine crossfades delay changes
                cur.layout = layout
                cur.gen = gen
                self.post(("layout_applied", gen, "crossfade"))

            self._actions.append(swap_in_place)
            return
        needed = max(int(o) for o in layout["outputs"])
        if needed > self.dev_out and self.backend == "device":
            slot = self._make_slot(layout, gen, fade_in_ms=REOPEN_FADE_IN_MS, targets=targets)
            self._reopen = slot  # the main thread fades out, reopens, swaps, fades in
            return
        slot = self._make_slot(layout, gen, fade_in_ms=XFADE_MS, targets=targets)
        n_out_new = slot.n_out
        meters = (
            self.np.zeros(n_out_new, dtype=self.np.float32),
            self.np.zeros(n_out_new, dtype=self.np.float64),
            self.np.zeros(n_out_new, dtype=self.np.float64),
        )
        grow = needed > self.dev_out  # virtual device: more channels
        new_out = self.np.zeros((self.blocksize, needed), dtype=self.np.float32) if grow else None
        self._actions.append(lambda: self._swap_slot(slot, meters, new_out, "engine_swap" if not grow else "reopen"))

    def _swap_slot(self, slot, meters, new_out, mode: str) -> None:
        """Audio path, between blocks: the old engine fades out while the new one fades in."""
        old = self.slot
        self._nonfinite_base += int(old.engine.nonfinite_count)
        self._limited_base += int(old.engine.limited_blocks)
        if self.old is None and not old.engine.faded_out:
            old.engine.fade_out(XFADE_MS)
            self.old, self.old_cols = old, old.out_cols
        if self.panic:
            slot.engine.panic(True)
        slot.reader.read()
        slot.reader.fade_req = self.fade_seen
        self.slot = slot
        self._acc_out_peak, self._acc_out_ms, self._tmp_out = meters
        if new_out is not None:
            self._vout = new_out
            self.dev_out = new_out.shape[1]
        self.post(("layout_applied", slot.gen, mode))

    # ================================================================ the block
    def _block(self, indata, outdata) -> None:
        """One block for either backend. ``indata`` None: take the virtual inputs."""
        t0 = time.perf_counter()
        np = self.np
        frames = outdata.shape[0]
        while self._actions:
            self._actions.popleft()()
        if self._virtual_out:
            outdata = self._vout  # the virtual device may have grown in an action just now
        slot = self.slot
        eng = slot.engine
        r = slot.reader
        if r.read() == r.NEW:
            try:
                eng.set_target(r.scratch)
                # when this version starts to sound: its frame position (for recordings of control)
                beat = self.shm.beat
                n = int(beat[S.B_APPLIED_N])
                k = S.B_RING + 2 * (n % S.RING_LEN)
                beat[k] = r.version
                beat[k + 1] = self.frame_pos
                beat[S.B_APPLIED_N] = n + 1
            except (ValueError, FieldmixError):  # an out-of-range matrix: the previous target stays
                self.bad_targets += 1
        if r.panic != self.panic:
            self.panic = r.panic
            eng.panic(bool(r.panic))
            if self.old is not None:
                self.old.engine.panic(bool(r.panic))
            self.panic_block = self.blocks
        if r.fade_req != self.fade_seen:
            self.fade_seen = r.fade_req
            eng.fade_out(r.fade_ms)
        if self._internal_fade is not None:
            eng.fade_out(self._internal_fade)
            self._internal_fade = None

        if indata is None:
            x = eng.input_buffer(frames)
            self._virtual_inputs(x, frames)
        elif self._in_identity:  # sources on inputs 1..N in order: one copy
            x = eng.input_buffer(frames)
            np.copyto(x, indata[:, : self.n_in])
        else:  # np.take into a contiguous buffer (into the engine's strided view it would allocate)
            x = self._xin[:frames]
            np.take(indata, self._in_cols, axis=1, out=x, mode="clip")
        y = eng.process(x)
        if slot.glide_pending:
            slot.glide_pending = False
            eng.set_glide_ms(self.glide_ms)
        if slot.contiguous:
            outdata[:, : slot.n_out] = y
            if outdata.shape[1] > slot.n_out:
                outdata[:, slot.n_out :] = 0.0
        else:
            outdata.fill(0.0)
            outdata[:, slot.out_cols] = y
        old = self.old
        if old is not None:  # crossfade: the old engine, fading out, adds its last blocks
            xo = old.engine.input_buffer(frames)
            np.copyto(xo, x)
            yo = old.engine.process(xo)
            outdata[:, self.old_cols] += yo
            if old.engine.faded_out:
                self.old = None
        if self.recorder is not None:
            self.recorder.push(outdata)

        # meters (the engine's are per block: peak and RMS of this block)
        np.maximum(self._acc_in_peak, eng.in_peak, out=self._acc_in_peak)
        np.multiply(eng.in_rms, eng.in_rms, out=self._tmp_in)
        self._tmp_in *= frames
        self._acc_in_ms += self._tmp_in
        np.maximum(self._acc_out_peak, eng.out_peak, out=self._acc_out_peak)
        np.multiply(eng.out_rms, eng.out_rms, out=self._tmp_out)
        self._tmp_out *= frames
        self._acc_out_ms += self._tmp_out
        self._acc_frames += frames

        now = time.monotonic()
        if self._t_first_pending:
            self._t_first_pending = False
            self.t_first = now
        self.blocks += 1
        self.frame_pos += frames
        self.frames_seen = frames
        self.expected = self._exp_base + int((now - self.t_first) * self.sr / frames) + 1
        beat = self.shm.beat
        beat[S.B_AUDIO] = now
        beat[S.B_FADED] = 1.0 if eng.faded_out else 0.0
        self._frame_blocks += 1
        load = (time.perf_counter() - t0) / (frames / self.sr)
        self._load_sum += load
        if load > self._load_max:
            self._load_max = load
        if self._frame_blocks >= self.meter_blocks:
            self._publish(now)

    def _publish(self, now: float) -> None:
        np = self.np
        shm = self.shm
        eng = self.slot.engine
        st, stf = shm.st, shm.stf
        n_out = self._acc_out_peak.shape[0]
        n = max(1, self._acc_frames)
        self.status.begin()
        st[S.S_FRAME] = self._frame + 1
        st[S.S_FIRST_BLOCK] = self._frame_first
        st[S.S_BLOCKS] = self.blocks
        st[S.S_EXPECTED] = max(self.expected, self.blocks)
        st[S.S_FLAGGED] = self.flagged
        st[S.S_NONFINITE] = int(eng.nonfinite_count) + self._nonfinite_base
        st[S.S_LIMITED] = int(eng.limited_blocks) + self._limited_base
        st[S.S_CTL_APPLIED] = self.slot.reader.version
        st[S.S_PANIC_BLOCK] = self.panic_block
        st[S.S_PANIC] = self.panic
        st[S.S_FADED_OUT] = 1 if eng.faded_out else 0
        st[S.S_N_IN] = self.n_in
        st[S.S_N_OUT] = n_out
        st[S.S_BLOCKSIZE] = self.frames_seen or self.blocksize
        st[S.S_DEV_OUT] = self.dev_out
        st[S.S_DEV_IN] = self.dev_in
        if self.recorder is not None:
            st[S.S_REC_FRAMES] = self.recorder.frames_written
            st[S.S_REC_OVERFLOW] = self.recorder.overflow
        st[S.S_LAYOUT_GEN] = self.slot.gen
        st[S.S_FADE_SEEN] = self.fade_seen
        st[S.S_CHILD_GEN] = self.child_gen
        st[S.S_CB_ERRORS] = self.cb_errors
        stf[S.F_SAMPLERATE] = self.sr
        stf[S.F_DSP_MEAN] = self._load_sum / max(1, self._frame_blocks)
        stf[S.F_DSP_MAX] = self._load_max
        stf[S.F_FRAME_TIME] = now
        stf[S.F_STREAM_START] = self.t_first
        shm.in_peak[: self.n_in] = self._acc_in_peak
        np.divide(self._acc_in_ms, n, out=self._tmp_in)
        np.sqrt(self._tmp_in, out=self._tmp_in)
        shm.in_rms[: self.n_in] = self._tmp_in
        shm.out_peak[:n_out] = self._acc_out_peak
        np.divide(self._acc_out_ms, n, out=self._tmp_out)
        np.sqrt(self._tmp_out, out=self._tmp_out)
        shm.out_rms[:n_out] = self._tmp_out
        self.status.end()
        self._frame += 1
        self._frame_first = self.blocks
        self._frame_blocks = 0
        self._load_sum = 0.0
        self._load_max = 0.0
        self._acc_in_peak.fill(0.0)
        self._acc_in_ms.fill(0.0)
        self._acc_out_peak.fill(0.0)
        self._acc_out_ms.fill(0.0)
        self._acc_frames = 0

    # ================================================================ virtual inputs
    def _load_virtual_inputs(self) -> None:
        np = self.np
        import soundfile as sf

        files = self.cfg.get("source_files") or [None] * self.n_in
        arrays = []
        for i, path in enumerate(files):
            if not path:
                arrays.append(None)
                continue
            try:
                data, rate = sf.read(path, dtype="float32", always_2d=True)
            except Exception as exc:
                raise _Fatal("config", f"sources[{i}].file: cannot read {path!r}: {exc}", EXIT_FATAL) from None
            mono = data.mean(axis=1) if data.shape[1] > 1 else data[:, 0]
            if rate != self.sr:
                from math import gcd

                from scipy.signal import resample_poly

                g = gcd(int(rate), self.sr)
                mono = resample_poly(mono, self.sr // g, int(rate) // g).astype(np.float32)
            if mono.shape[0] < self.blocksize:  # a tiny file: repeat it up to one block
                mono = np.tile(mono, self.blocksize // max(1, mono.shape[0]) + 1) if mono.shape[0] else np.zeros(self.blocksize, np.float32)
            mono = np.nan_to_num(mono, nan=0.0, posinf=0.0, neginf=0.0)
            arrays.append(np.ascontiguousarray(mono, dtype=np.float32))
        lengths = {a.shape[0] for a in arrays if a is not None}
        self._vin_none = [i for i, a in enumerate(arrays) if a is None]
        if len(lengths) == 1 and not self._vin_none:
            # one matrix, one position: one copy per block (two at the wrap)
            self._vin_matrix = np.ascontiguousarray(np.stack(arrays, axis=1))
            self._vin_list = None
        else:
            self._vin_matrix = None
            self._vin_list = [(i, a) for i, a in enumerate(arrays) if a is not None]
        self._vin_pos = [0] * self.n_in
        self._vin_mpos = 0

    def _virtual_inputs(self, x, frames: int) -> None:
        m = self._vin_matrix
        if m is not None:
            L = m.shape[0]
            p = self._vin_mpos
            k = min(frames, L - p)
            x[:k] = m[p : p + k]
            if k < frames:
                x[k:frames] = m[: frames - k]
            self._vin_mpos = (p + frames) % L
            return
        for i in self._vin_none:
            x[:, i] = 0.0
        pos = self._vin_pos
        for i, a in self._vin_list:
            L = a.shape[0]
            p = pos[i]
            k = min(frames, L - p)
            x[:k, i] = a[p : p + k]
            if k < frames:
                x[k:frames, i] = a[: frames - k]
            pos[i] = (p + frames) % L

    # ================================================================ run
    def run(self) -> int:
        if self.backend == "virtual":
            return self._run_virtual()
        if self.backend == "device":
            return self._run_device()
        raise _Fatal("config", f"unknown audio backend {self.backend!r}", EXIT_FATAL)

    def _start_recorder(self, channels: int) -> None:
        path = self.cfg.get("record")
        if not path:
            return
        try:
            self.recorder = Recorder(path, self.sr, channels, self.blocksize)
        except Exception as exc:
            raise _Fatal("config", f"cannot record to {path!r}: {exc}", EXIT_FATAL) from None

    def _info(self, **extra) -> dict:
        d = {
            "backend": self.backend,
            "samplerate": self.sr,
            "blocksize": self.blocksize,
            "device_inputs": self.dev_in,
            "device_outputs": self.dev_out,
            "pid": os.getpid(),
            "layout_gen": self.slot.gen,
            "record": self.recorder.path if self.recorder else None,
            "kernels": self.slot.engine.kernels,
            "priority": self.priority,
        }
        d.update(extra)
        return d

    def _stop_with_fade(self, wait_blocks_fn) -> None:
        """Fade out (unless the control process already did or wants none), then return."""
        ms = self._stop_fade_ms
        eng = self.slot.engine
        if ms > 0 and not eng.faded_out:
            self._internal_fade = ms
            deadline = time.monotonic() + ms * 1e-3 + 0.15
            while not self.slot.engine.faded_out and time.monotonic() < deadline:
                wait_blocks_fn()

    def _finish(self) -> None:
        if self.recorder is not None:
            self.recorder.close()
            if self.recorder.error:
                self.post(("warning", f"recording: {self.recorder.error}"))
        self.post(("stopped", self._stop_reason))

    # ---------------------------------------------------------------- virtual
    def _run_virtual(self) -> int:
        np = self.np
        self._load_virtual_inputs()
        self.dev_in = self.n_in
        self.dev_out = self.slot.dev_out_needed
        self._vout = np.zeros((self.blocksize, self.dev_out), dtype=np.float32)
        self._start_recorder(self.dev_out)
        self.priority = "normal"  # a demo and test clock, not a device deadline: it competes fairly
        self.post(("ready", self._info(device="virtual")))
        P = self.period
        t0 = time.monotonic()
        k = 0
        stopping = False
        stop_deadline = 0.0
        while True:
            now = time.monotonic()
            start_due = t0 + k * P
            if now > start_due + 2 * P:
                # fell behind by more than two blocks (a stalled machine): skip to now, count it
                self.flagged += 1
                k = int((now - t0) / P)
            self._block(None, self._vout)
            done = time.monotonic()
            if done > t0 + (k + 1) * P + P:
                self.flagged += 1  # finished after the block was due at the "device"
            k += 1
            self.shm.beat[S.B_MAIN] = done  # (self.shm: the segment may have been replaced)
            if self._stop_reason is not None:
                if not stopping:
                    stopping = True
                    ms = self._stop_fade_ms
                    if ms > 0 and not self.slot.engine.faded_out:
                        self._internal_fade = ms
                        stop_deadline = done + ms * 1e-3 + 0.15
                    else:
                        stop_deadline = done  # faded already, or no fade wanted
                if self.slot.engine.faded_out or done >= stop_deadline:
                    self._publish(done)
                    break
            nxt = t0 + k * P
            delay = nxt - time.monotonic()
            if delay > 0:
                time.sleep(delay)
        self._finish()
        return EXIT_OK

    # ---------------------------------------------------------------- device
    def _open_stream(self, sd, n_out: int):
        import numpy as np

        dev = self._device
        # On JACK the server fixes the period. A fixed PortAudio blocksize there makes
        # PortAudio's buffer processor hold one extra buffer between input and output,
        # so the stream follows the server's period (blocksize 0) and the engine takes
        # whatever frame count each callback brings.
        blocksize = 0 if self.follow_jack_period and "jack" in str(dev.get("hostapi", "")).lower() else self.blocksize
        try:
            if self.file_inputs:  # the show's files are the inputs: an output-only stream
                stream = sd.OutputStream(
                    device=dev["index"],
                    samplerate=self.sr,
                    blocksize=blocksize,
                    channels=n_out,
                    dtype="float32",
                    callback=self._out_callback,
                )
            else:
                stream = sd.Stream(
                    device=(dev["index"], dev["index"]),
                    samplerate=self.sr,
                    blocksize=blocksize,
                    channels=(self.dev_in, n_out),
                    dtype="float32",
                    callback=self._callback,
                )
        except Exception as exc:
            raise _Fatal("device_unavailable", f'cannot open "{dev["name"]}" at {self.sr} Hz, {self.blocksize} frames, '
                         f"{self.dev_in} in / {n_out} out: {exc}", EXIT_DEVICE_UNAVAILABLE) from None  # fmt: skip
        self.dev_out = n_out
        self.latency = tuple(float(v) for v in np.atleast_1d(stream.latency)) if stream.latency is not None else None
        return stream

    def _callback(self, indata, outdata, frames, time_info, status) -> None:
        if self.priority is None:  # first call, in PortAudio's audio thread: give it audio priority
            self.priority = raise_priority(self.priority_mode)
            self.post(("info", {"priority": self.priority}))
        try:
            if status and (status.input_overflow or status.input_underflow or status.output_underflow or status.output_overflow):
                self.flagged += 1
            self._block(indata, outdata)
        except Exception as exc:  # never let an exception stop the stream: silence, count, report
            outdata.fill(0.0)
            self.cb_errors += 1
            if self.cb_error_text is None:
                self.cb_error_text = f"{type(exc).__name__}: {exc}"
                self.post(("warning", f"audio callback error (block silenced): {self.cb_error_text}"))

    def _out_callback(self, outdata, frames, time_info, status) -> None:
        self._callback(None, outdata, frames, time_info, status)

    def _set_input_map(self, inputs) -> None:
        """Source i reads device input column inputs[i] - 1."""
        np = self.np
        self._in_cols = np.array([int(c) - 1 for c in inputs], dtype=np.intp)
        self._in_identity = [int(c) - 1 for c in inputs] == list(range(self.n_in))
        self._xin = np.zeros((max(4096, self.blocksize), self.n_in), dtype=np.float32)

    def _run_device(self) -> int:
        from .devices import import_sounddevice, match_device, query_in_this_process, set_jack_client_name

        self._jack_name = set_jack_client_name(self.cfg.get("client_name"))  # kept alive: PortAudio keeps the pointer
        try:
            sd = import_sounddevice()
        except FieldmixError as exc:
            raise _Fatal("portaudio_missing", str(exc), EXIT_FATAL) from None
        if self.file_inputs:
            self._load_virtual_inputs()
            self.dev_in = 0
        else:
            inputs = [int(c) for c in self.cfg["input_channels"]]
            self.dev_in = max(inputs) if inputs else 1
            self._set_input_map(inputs)
        n_out = self.slot.dev_out_needed
        try:
            devices = query_in_this_process(sd)["devices"]
            spec = self.cfg.get("device")
            if spec is None or spec == "":
                idx = sd.default.device[1]
                if idx is None or idx < 0:
                    raise FieldmixError("no default audio device (give one with --device)")
                spec = int(idx)
            self._device = match_device(devices, spec, need_input=self.dev_in, need_output=n_out)
        except FieldmixError as exc:
            raise _Fatal("device_unavailable", str(exc), EXIT_DEVICE_UNAVAILABLE) from None
        stream = self._open_stream(sd, n_out)
        self._start_recorder(n_out)
        try:
            stream.start()
        except Exception as exc:
            raise _Fatal("device_unavailable", f'cannot start the stream on "{self._device["name"]}": {exc}', EXIT_DEVICE_UNAVAILABLE) from None
        self._blocks_at_open, self._t_stream = self.blocks, time.monotonic()
        self.post(("ready", self._info(device=self._device["name"], hostapi=self._device["hostapi"], latency=self.latency)))
        code = EXIT_OK
        while True:
            time.sleep(0.02)
            now = time.monotonic()
            beat = self.shm.beat  # (the segment may have been replaced)
            beat[S.B_MAIN] = now  # this process is alive
            if not self._period_reported and self.frames_seen:
                self._period_reported = True
                if self.frames_seen != self.blocksize:
                    self.post(("warning", f'"{self._device["name"]}" runs at {self.frames_seen} frames a period, '
                                          f"not the {self.blocksize} asked for: fieldmix follows the device "
                                          "(on JACK the server sets the period: jackd -p)"))  # fmt: skip
            if self._stop_reason is not None:
                self._stop_with_fade(lambda: time.sleep(0.005))
                try:
                    stream.abort()  # the engine has faded out: no need to drain
                    stream.close()
                except Exception:
                    pass
                break
            if self._reopen is not None:
                slot, self._reopen = self._reopen, None
                stream = self._reopen_stream(sd, stream, slot)
                if stream is None:
                    code = EXIT_DEVICE_UNAVAILABLE
                    break
                continue
            if self.blocks > self._blocks_at_open:
                last, limit = beat[S.B_AUDIO], max(STALL_S, 20 * self.period)
            else:  # the first callback of a stream may take longer on a busy machine
                last, limit = self._t_stream, 2 * max(STALL_S, 20 * self.period)
            if not stream.active or now - last > limit:
                why = "the stream stopped" if not stream.active else f"no audio callback for {now - last:.1f} s"
                self.post(("device_lost", f'"{self._device["name"]}": {why}'))
                self._stop_reason = "device lost"
                code = EXIT_DEVICE_LOST
                break  # no close: PortAudio can hang closing a stream whose server vanished
        if self.recorder is not None:
            self.recorder.close()
        if code == EXIT_OK:
            self._finish()
        return code

    def _reopen_stream(self, sd, stream, slot):
        """More output channels than the open stream has: fade out, reopen, swap, fade in."""
        self._internal_fade = REOPEN_FADE_MS
        deadline = time.monotonic() + REOPEN_FADE_MS * 1e-3 + 0.3
        while not self.slot.engine.faded_out and time.monotonic() < deadline and stream.active:
            time.sleep(0.005)
        try:
            stream.stop()
            stream.close()
        except Exception as exc:
            self.post(("warning", f"closing the stream for a reopen: {exc}"))
        if self.panic:
            slot.engine.panic(True)
        slot.reader.read()
        slot.reader.fade_req = self.fade_seen
        self._nonfinite_base += int(self.slot.engine.nonfinite_count)
        self._limited_base += int(self.slot.engine.limited_blocks)
        self.slot = slot
        self._alloc_meters(slot.n_out)
        self.old = None
        self._exp_base = max(self.expected, self.blocks)  # the gap while reopening is not a miss
        self._t_first_pending = True
        try:
            new = self._open_stream(sd, slot.dev_out_needed)
            new.start()
        except _Fatal as exc:
            self.post(("device_lost", exc.message))
            return None
        except Exception as exc:
            self.post(("device_lost", f"cannot start the reopened stream: {exc}"))
            return None
        self._blocks_at_open, self._t_stream = self.blocks, time.monotonic()
        self.post(("layout_applied", slot.gen, "reopen"))
        self.post(("reopened", self._info(device=self._device["name"])))
        return new

    def _on_sigterm(self, signum, frame) -> None:
        if self._stop_reason is None:
            self._stop_fade_ms = STOP_FADE_MS
            self._stop_reason = "SIGTERM"
