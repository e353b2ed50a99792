"""JACK helpers for tests and benchmarks (not used by the server itself).

- :class:`JackServer` starts a JACK2 dummy-driver server under its *own* name
  (``jackd -n NAME --no-realtime -d dummy ...``), so tests never disturb another JACK
  server on the machine. Every process that should use it needs ``JACK_DEFAULT_SERVER=NAME``
  in its environment (:meth:`JackServer.env`); ``JACK_NO_START_SERVER=1`` keeps a client
  from starting a default server by accident when ours is down.

  Names come from a small pool (``fmtest-0`` ... ``fmtest-7``), not from the pid: JACK2
  keeps a machine-wide registry of at most 8 servers (``/dev/shm/jack-shm-registry``), a
  server that did not unregister (killed, or stuck at shutdown) leaves its entry behind,
  and an entry is reclaimed only when a server of the *same name* starts again. Unique
  names per run would fill the registry after a few runs ("Too many servers already
  active"); a pool reuses its own stale entries. A name whose server is running is skipped.
- Port helpers wrap ``jack_lsp -c``, ``jack_connect`` and ``jack_disconnect``.
- ``python -m fieldmix.audio.jackutil probe ...`` is a small JACK client (a PortAudio
  stream with its own client name) that plays a sine on its output 1 and records its inputs
  on request; tests drive it over stdin/stdout (see :class:`Probe`).
"""

from __future__ import annotations

import glob
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Optional, Sequence


class JackError(RuntimeError):
    pass


def jack_available() -> Optional[str]:
    """None if jackd and the port tools are installed, else what is missing."""
    missing = [t for t in ("jackd", "jack_lsp", "jack_connect", "jack_disconnect") if not shutil.which(t)]
    return ", ".join(missing) if missing else None


class JackServer:
    """A private JACK dummy server. ``with JackServer() as srv: ...`` starts and stops it."""

    POOL = tuple(f"fmtest-{i}" for i in range(8))

    def __init__(
        self,
        name: Optional[str] = None,
        samplerate: int = 48000,
        period: int = 128,
        capture: int = 16,
        playback: int = 16,
        log_path: Optional[Path] = None,
    ):
        self._fixed_name = name
        self.name = name or self.POOL[0]
        self.samplerate = int(samplerate)
        self.period = int(period)
        self.capture = int(capture)
        self.playback = int(playback)
        self.log_path = Path(log_path) if log_path else None
        self.proc: Optional[subprocess.Popen] = None
        self._out = None
        self.starts = 0

    # ------------------------------------------------------------ environment
    def env(self, base: Optional[dict] = None) -> dict:
        env = dict(os.environ if base is None else base)
        env["JACK_DEFAULT_SERVER"] = self.name
        env["JACK_NO_START_SERVER"] = "1"
        return env

    @property
    def command(self) -> list[str]:
        return [
            "jackd", "-n", self.name, "--no-realtime",
            "-d", "dummy", "-r", str(self.samplerate), "-p", str(self.period),
            "-C", str(self.capture), "-P", str(self.playback),
        ]  # fmt: skip

    # ------------------------------------------------------------ lifecycle
    def _name_in_use(self, name: str) -> bool:
        env = self.env()
        env["JACK_DEFAULT_SERVER"] = name
        try:
            r = subprocess.run(["jack_lsp"], env=env, capture_output=True, text=True, timeout=5.0)
        except subprocess.TimeoutExpired:
            return True
        return r.returncode == 0

    def start(self, timeout: float = 15.0) -> "JackServer":
        """Start the server (again, under the same name after a stop); wait until it serves ports."""
        if self.running:
            return self
        if self._fixed_name is None and self.starts == 0:
            # first start: a pool name no running server uses (a restart keeps the name)
            free = [n for n in self.POOL if not self._name_in_use(n)]
            if not free:
                raise JackError(f"every test server name is in use ({', '.join(self.POOL)})")
            candidates = free
        else:
            candidates = [self.name]
        errors = []
        for name in candidates:
            self.name = name
            try:
                return self._start_once(timeout)
            except JackError as exc:
                errors.append(str(exc))
                if "already active" not in str(exc) and "in use" not in str(exc):
                    break
        raise JackError("; ".join(errors))

    def _start_once(self, timeout: float) -> "JackServer":
        import tempfile

        out = tempfile.TemporaryFile()
        self.proc = subprocess.Popen(self.command, env=self.env(), stdout=out, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL)
        self._out = out
        self.starts += 1
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                rc, text = self.proc.returncode, self._output()
                hint = ""
                if "Too many servers" in text:
                    hint = (" (JACK's server registry /dev/shm/jack-shm-registry is full of stale entries;"
                            " with no jackd running it can be removed)")
                self.proc = None
                self._out.close()
                self._out = None
                first = text.strip().splitlines()[0] if text.strip() else "no output"
                raise JackError(f"jackd exited with status {rc} at start ({' '.join(self.command)}): {first}{hint}")
            try:
                if "system:playback_1" in self.ports(timeout=3.0):
                    return self
            except (JackError, subprocess.TimeoutExpired):
                pass
            time.sleep(0.1)
        self.stop()
        raise JackError(f"jackd did not come up within {timeout:g} s")

    def _output(self) -> str:
        """What jackd printed so far (also appended to the log file, if one was given)."""
        out = getattr(self, "_out", None)
        if out is None:
            return ""
        out.seek(0)
        text = out.read().decode("utf-8", "replace")
        return text

    @property
    def running(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def stop(self, timeout: float = 5.0) -> None:
        p = self.proc
        if p is not None and p.poll() is None:
            p.send_signal(signal.SIGTERM)
            try:
                p.wait(timeout)
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait(timeout)
        self.proc = None
        out = getattr(self, "_out", None)
        if out is not None:
            if self.log_path:
                with open(self.log_path, "a", encoding="utf-8") as log:
                    log.write(self._output())
            out.close()
            self._out = None
        self._clean_shm()

    def _clean_shm(self) -> None:
        """Remove the semaphores / shm files a stopped server of *this name* left behind."""
        for path in glob.glob(f"/dev/shm/jack_sem.*_{self.name}_*") + glob.glob(f"/dev/shm/jack_{self.name}_*"):
            try:
                os.unlink(path)
            except OSError:
                pass

    def __enter__(self) -> "JackServer":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()

    # ------------------------------------------------------------ ports
    def _run(self, args: Sequence[str], timeout: float = 5.0) -> subprocess.CompletedProcess:
        return subprocess.run(list(args), env=self.env(), capture_output=True, text=True, timeout=timeout)

    def ports(self, timeout: float = 5.0) -> list[str]:
        r = self._run(["jack_lsp"], timeout)
        if r.returncode != 0:
            raise JackError(f"jack_lsp failed: {r.stderr.strip() or r.stdout.strip()}")
        return [ln.strip() for ln in r.stdout.splitlines() if ln.strip()]

    def connections(self, timeout: float = 5.0) -> dict[str, list[str]]:
        """``jack_lsp -c`` as {port: [connected ports]} (every port listed, connected or not)."""
        r = self._run(["jack_lsp", "-c"], timeout)
        if r.returncode != 0:
            raise JackError(f"jack_lsp -c failed: {r.stderr.strip() or r.stdout.strip()}")
        out: dict[str, list[str]] = {}
        current = None
        for ln in r.stdout.splitlines():
            if not ln.strip():
                continue
            if ln[:1].isspace():
                if current is not None:
                    out[current].append(ln.strip())
            else:
                current = ln.strip()
                out[current] = []
        return out

    def connect(self, a: str, b: str) -> None:
        r = self._run(["jack_connect", a, b])
        if r.returncode != 0 and b not in self.connections().get(a, []):
            raise JackError(f"jack_connect {a} {b} failed: {r.stderr.strip() or r.stdout.strip()}")

    def disconnect(self, a: str, b: str) -> None:
        r = self._run(["jack_disconnect", a, b])
        if r.returncode != 0 and b in self.connections().get(a, []):
            raise JackError(f"jack_disconnect {a} {b} failed: {r.stderr.strip() or r.stdout.strip()}")

    def disconnect_all(self, port: str) -> None:
        for other in list(self.connections().get(port, [])):
            self.disconnect(port, other)

    def client_ports(self, client: str) -> list[str]:
        return [p for p in self.ports() if p.split(":", 1)[0] == client]

    def io_ports(self, client: str) -> tuple[list[str], list[str]]:
        """(input ports, output ports) of a PortAudio client, in channel order (``in_N`` / ``out_N``)."""

        def num(p: str) -> int:
            tail = p.rsplit("_", 1)[-1]
            return int(tail) if tail.isdigit() else 0

        ports = self.client_ports(client)
        return (sorted((p for p in ports if ":in_" in p), key=num), sorted((p for p in ports if ":out_" in p), key=num))

    def wait_for_ports(self, client: str, count: int, timeout: float = 10.0) -> list[str]:
        deadline = time.monotonic() + timeout
        while True:
            ports = self.client_ports(client)
            if len(ports) >= count:
                return ports
            if time.monotonic() > deadline:
                raise JackError(f"client {client!r} has {len(ports)} ports, expected {count} (all ports: {self.ports()})")
            time.sleep(0.05)


# ===================================================================== probe client
class Probe:
    """Drive a ``probe`` JACK client in a subprocess: a sine on out_1, recording on request."""

    def __init__(self, server: JackServer, client: str, freq: float = 1000.0, amp: float = 0.5, inputs: int = 2, blocksize: int = 0):
        self.server = server
        self.client = client
        pkg_root = str(Path(__file__).resolve().parents[2])
        env = server.env()
        env["PYTHONPATH"] = pkg_root + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
        cmd = [
            sys.executable, "-m", "fieldmix.audio.jackutil", "probe",
            "--client", client, "--freq", str(freq), "--amp", str(amp),
            "--inputs", str(inputs), "--samplerate", str(server.samplerate), "--blocksize", str(blocksize),
        ]  # fmt: skip
        self.proc = subprocess.Popen(cmd, env=env, stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, bufsize=1)
        line = self._readline(20.0)
        if not line.startswith("ready"):
            err = self._stderr()
            self.close()
            raise JackError(f"probe did not start: {line!r} {err}")

    def _readline(self, timeout: float) -> str:
        import select

        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            r, _, _ = select.select([self.proc.stdout], [], [], 0.1)
            if r:
                return self.proc.stdout.readline().strip()
            if self.proc.poll() is not None:
                return ""
        raise JackError("probe did not answer in time")

    def _stderr(self) -> str:
        if self.proc.poll() is None:
            return ""
        try:
            return self.proc.stderr.read()[-2000:]
        except Exception:
            return ""

    def record(self, seconds: float, path: Path, timeout: float = 10.0) -> Path:
        """Record ``seconds`` of every probe input into ``path`` (float WAV)."""
        self.start_record(seconds, path)
        return self.finish_record(timeout)["path"]

    def start_record(self, seconds: float, path: Path) -> None:
        """Begin a recording and return at once (the caller acts meanwhile); then :meth:`finish_record`."""
        self._rec_seconds = float(seconds)
        self._rec_path = Path(path)
        self.proc.stdin.write(f"rec {seconds} {path}\n")
        self.proc.stdin.flush()

    def finish_record(self, timeout: float = 10.0) -> dict:
        """Wait for the recording begun by :meth:`start_record`.

        Returns ``path``; ``t0``, the ``time.monotonic()`` (CLOCK_MONOTONIC, shared by every
        process on the machine) at which the callback holding the first recorded frame began;
        ``flagged``, callbacks in the recording with a PortAudio status flag; ``late_ms``, how
        far the last callback ran behind the clock implied by ``t0`` and the frames recorded
        (a callback JACK skipped shows as a block or more)."""
        line = self._readline(timeout + getattr(self, "_rec_seconds", 0.0))
        parts = line.split()
        if not parts or parts[0] != "ok":
            raise JackError(f"probe recording failed: {line!r} {self._stderr()}")
        info = {"path": getattr(self, "_rec_path", None) or Path(parts[1]), "t0": None, "flagged": None, "late_ms": None}
        if len(parts) >= 5:
            info.update(t0=float(parts[-3]), flagged=int(parts[-2]), late_ms=float(parts[-1]))
        return info

    def close(self, timeout: float = 5.0) -> None:
        if self.proc.poll() is None:
            try:
                self.proc.stdin.write("quit\n")
                self.proc.stdin.flush()
            except (BrokenPipeError, OSError, ValueError):
                pass
            try:
                self.proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout)
        for f in (self.proc.stdin, self.proc.stdout, self.proc.stderr):
            try:
                f.close()
            except Exception:
                pass


_CLIENT_NAME_BUF = None


def _probe_main(args) -> int:
    import threading

    from .devices import import_sounddevice, match_device, query_in_this_process, set_jack_client_name

    global _CLIENT_NAME_BUF
    _CLIENT_NAME_BUF = set_jack_client_name(args.client)  # PortAudio keeps the pointer
    sd = import_sounddevice()
    import numpy as np
    import soundfile as sf

    dev = match_device(query_in_this_process(sd)["devices"], args.device)
    sr = args.samplerate
    w = 2 * np.pi * args.freq / sr
    state = {"phase": 0, "want": 0, "got": 0, "buf": None, "t0": 0.0, "flagged": 0, "late": 0.0}
    done = threading.Event()

    def cb(indata, outdata, frames, t, status):
        now = time.monotonic()
        n = np.arange(state["phase"], state["phase"] + frames)
        outdata[:, 0] = args.amp * np.sin(w * n)
        if outdata.shape[1] > 1:
            outdata[:, 1:] = 0.0
        state["phase"] += frames
        want, got = state["want"], state["got"]
        if got < want:
            if got == 0:
                state["t0"], state["flagged"], state["late"] = now, 0, 0.0
            else:  # behind the clock that t0 and the frames so far imply: skipped callbacks
                state["late"] = max(state["late"], now - state["t0"] - got / sr)
            if status:
                state["flagged"] += 1
            k = min(frames, want - got)
            state["buf"][got : got + k] = indata[:k]
            state["got"] = got + k
            if got + k >= want:
                done.set()

    stream = sd.Stream(
        device=(dev["index"], dev["index"]),
        samplerate=sr,
        blocksize=args.blocksize,
        channels=(args.inputs, 1),
        dtype="float32",
        callback=cb,
    )
    stream.start()
    print(f"ready {args.client}", flush=True)
    for line in sys.stdin:
        parts = line.split()
        if not parts:
            continue
        if parts[0] == "quit":
            break
        if parts[0] == "rec" and len(parts) == 3:
            frames = int(round(float(parts[1]) * sr))
            done.clear()
            state["buf"] = np.zeros((frames, args.inputs), dtype=np.float32)
            state["got"] = 0
            state["want"] = frames
            if not done.wait(float(parts[1]) + 5.0):
                print("error timeout", flush=True)
                continue
            sf.write(parts[2], state["buf"], sr, subtype="FLOAT")
            print(f"ok {parts[2]} {state['t0']:.6f} {state['flagged']} {1000.0 * state['late']:.3f}", flush=True)
        else:
            print(f"error unknown command {line.strip()!r}", flush=True)
    sys.stdout.flush()
    os._exit(0)  # skip Pa_Terminate: it hangs if the JACK server went away


def main(argv: Optional[Sequence[str]] = None) -> int:
    import argparse

    ap = argparse.ArgumentParser(prog="python -m fieldmix.audio.jackutil")
    sub = ap.add_subparsers(dest="cmd", required=True)
    p = sub.add_parser("probe", help="sine on out_1, record inputs on 'rec SECONDS PATH' lines from stdin")
    p.add_argument("--client", default="fmprobe")
    p.add_argument("--device", default="system")
    p.add_argument("--freq", type=float, default=1000.0)
    p.add_argument("--amp", type=float, default=0.5)
    p.add_argument("--inputs", type=int, default=2)
    p.add_argument("--samplerate", type=int, default=48000)
    p.add_argument("--blocksize", type=int, default=0)
    s = sub.add_parser("server", help="run a private dummy server in the foreground until Ctrl-C")
    s.add_argument("--name", default=None)
    s.add_argument("--period", type=int, default=128)
    args = ap.parse_args(argv)
    if args.cmd == "probe":
        return _probe_main(args)
    srv = JackServer(name=args.name, period=args.period).start()
    print(f"JACK_DEFAULT_SERVER={srv.name}", flush=True)
    try:
        while srv.running:
            time.sleep(0.5)
    except KeyboardInterrupt:
        pass
    finally:
        srv.stop()
    return 0


if __name__ == "__main__":
    sys.exit(main())
