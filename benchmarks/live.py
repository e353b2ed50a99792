"""The live server under load: deadline misses, OSC throughput, control latency, memory.

Prints tables; asserts nothing. Everything runs on this machine: a private JACK dummy
server started under its own name, ``python -m fieldmix serve`` as a subprocess on it, load
generators in processes of their own, all traffic on 127.0.0.1, every loop bounded in count
and time, and every child process (and jackd) stopped in ``finally`` blocks.

Parts (``--parts``, default all):

``deadlines``
    For each block size (``--blocks``, default 64,128,256,512) a JACK dummy server
    (``jackd --no-realtime -d dummy -r 48000 -p BLOCK -C 32 -P 32``) and a daemon on a
    generated show (32 sources on inputs 1..32, a 32-speaker ring on outputs 1..32, VBAP,
    in a temporary folder). Runs of ``--seconds`` (default 60) each: ``idle``, then
    ``osc`` (a sender process: 10,000 OSC messages a second over UDP), ``ws`` (20 aiohttp
    websocket clients in one process receiving updates while one of them sends 100 moves a
    second), ``reload`` (the layout file rewritten every 2 s, alternately rotated by 1 deg).
    Counters are read from GET /api/state (``status.audio``) at the start and the end of
    each run: callbacks seen / expected, xrun-flagged callbacks, DSP load. Each loaded run
    is compared with the idle run of the same block size in the same session.
``latency``
    A tone client (1 kHz) feeds the daemon's input 1; a recorder client records two of the
    daemon's outputs and stamps every JACK cycle it gets with ``time.monotonic()`` (the
    graph is tone -> daemon -> recorder, no feedback loop, so the recorder sees the
    daemon's output of the same cycle). ``/source/s1/azimuth`` alternates between two
    speakers' directions over UDP at known monotonic times; the latency is the time of the
    first non-zero sample on the speaker that was silent before, minus the send time. Also
    printed: until that speaker's level is within 0.1 dB of its final value (the glide).
``throughput``
    Paced UDP sends at increasing rates to the daemon and to a bare python-osc server (an
    AsyncIOOSCUDPServer whose default handler only counts), both measured the same way in
    the same run: a ``/ping`` barrier, a count, N messages, a barrier, a count. Lossless
    rate = the highest rate at which every message was applied.
``memory``
    ``python -m fieldmix demo --osc-port 0 --http-port 0``: resident size (VmRSS, and PSS
    which does not count shared pages twice) of the control and audio processes, and
    their CPU over ~10 s (utime + stime from /proc/PID/stat), with the demo script playing
    and with ``--still``.

    python benchmarks/live.py                       # everything, 60 s runs (about 25 min)
    python benchmarks/live.py --seconds 10          # a quick pass (about 7 min)
    python benchmarks/live.py --blocks 512,128 --parts deadlines --loads idle,osc
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse
import json
import math
import random
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
import urllib.request
from pathlib import Path
from typing import Optional

REPO = Path(__file__).resolve().parents[1]
SERVER = REPO / "server"
sys.path.insert(0, str(SERVER))

SR = 48000
N_SOURCES = 32
N_SPEAKERS = 32
GLIDE_MS = 30.0
LOADS = ("idle", "osc", "ws", "reload")
HOST = "127.0.0.1"


# ============================================================================ helpers
def child_env(base: Optional[dict] = None) -> dict:
    env = dict(os.environ if base is None else base)
    env["PYTHONPATH"] = str(SERVER) + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    env.setdefault("OPENBLAS_NUM_THREADS", "1")
    env.setdefault("OMP_NUM_THREADS", "1")
    return env


def stop_process(p: Optional[subprocess.Popen], timeout: float = 5.0, sig=signal.SIGTERM) -> None:
    """Stop one child we started (by its own pid): signal, wait, then kill."""
    if p is None or p.poll() is not None:
        return
    try:
        p.send_signal(sig)
        p.wait(timeout)
    except subprocess.TimeoutExpired:
        p.kill()
        try:
            p.wait(timeout)
        except subprocess.TimeoutExpired:
            pass
    except ProcessLookupError:
        pass


def read_line(p: subprocess.Popen, timeout: float) -> str:
    """One line of a child's stdout within ``timeout`` s ('' if it ended or said nothing)."""
    import select

    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        r, _, _ = select.select([p.stdout], [], [], 0.1)
        if r:
            return p.stdout.readline().strip()
        if p.poll() is not None:
            return ""
    return ""


def http_json(port: int, path: str, timeout: float = 10.0) -> dict:
    with urllib.request.urlopen(f"http://{HOST}:{port}{path}", timeout=timeout) as r:
        return json.loads(r.read().decode("utf-8"))


def clk_tck() -> int:
    try:
        return os.sysconf("SC_CLK_TCK")
    except (ValueError, OSError):
        return 100


def cpu_seconds(pid: Optional[int]) -> float:
    """utime + stime of one process, seconds (nan if it is gone)."""
    if not pid:
        return float("nan")
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return float("nan")
    fields = text.rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / clk_tck()  # fields 14, 15 of stat(5)


def memory_kb(pid: Optional[int]) -> dict:
    """{'rss': kB, 'pss': kB} (psutil if installed, else /proc)."""
    out = {"rss": float("nan"), "pss": float("nan")}
    if not pid:
        return out
    try:
        import psutil  # optional

        p = psutil.Process(pid)
        out["rss"] = p.memory_info().rss / 1024
        try:
            out["pss"] = p.memory_full_info().pss / 1024
        except Exception:
            pass
        return out
    except ImportError:
        pass
    except Exception:
        return out
    try:
        for ln in Path(f"/proc/{pid}/status").read_text().splitlines():
            if ln.startswith("VmRSS:"):
                out["rss"] = float(ln.split()[1])
        for ln in Path(f"/proc/{pid}/smaps_rollup").read_text().splitlines():
            if ln.startswith("Pss:"):
                out["pss"] = float(ln.split()[1])
    except OSError:
        pass
    return out


def steal_ticks() -> tuple[int, int]:
    """(steal, total) jiffies of the whole machine from /proc/stat."""
    try:
        parts = Path("/proc/stat").read_text().splitlines()[0].split()[1:]
        vals = [int(v) for v in parts]
        return (vals[7] if len(vals) > 7 else 0), sum(vals[:8])
    except (OSError, ValueError, IndexError):
        return 0, 0


def pct(xs, q):
    import numpy as np

    return float(np.percentile(np.asarray(xs, dtype=float), q)) if len(xs) else float("nan")


# ============================================================================ the show
def ring_layout(rot: float = 0.0) -> dict:
    return {
        "name": "bench ring",
        "panner": "vbap",
        "speakers": [
            {"id": f"R{k + 1}", "output": k + 1,
             "azimuth": round((360.0 * k / N_SPEAKERS + rot + 180.0) % 360.0 - 180.0, 4), "distance": 3.0}
            for k in range(N_SPEAKERS)
        ],
    }  # fmt: skip


def write_layout(path: Path, rot: float) -> None:
    """Rewrite the layout file the way an editor that saves atomically does (temp + rename)."""
    tmp = path.with_name(f".{path.name}.tmp")
    tmp.write_text(json.dumps(ring_layout(rot), indent=1), encoding="utf-8")
    os.replace(tmp, path)


def write_show(folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    write_layout(folder / "ring.json", 0.0)
    step = 360.0 / N_SOURCES
    sources = []
    for k in range(N_SOURCES):
        az = 0.0 if k == 0 else round((step * k + step / 2 + 180.0) % 360.0 - 180.0, 3)
        sources.append({"id": f"s{k + 1}", "input": k + 1, "azimuth": az, "distance": 3.0})
    show = {"name": "live benchmark", "layout": "ring.json", "glide_ms": GLIDE_MS, "samplerate": SR, "sources": sources}
    (folder / "show.json").write_text(json.dumps(show, indent=1), encoding="utf-8")
    return folder / "show.json"


# ============================================================================ the daemon
class DaemonProc:
    """``python -m fieldmix <cmd> ...`` as a subprocess; finds its ports in what it prints."""

    def __init__(self, args: list, env: dict, folder: Path, tag: str):
        self.out_path = folder / f"daemon-{tag}.out"
        self.err_path = folder / f"daemon-{tag}.log"
        self._out = open(self.out_path, "wb")
        self._err = open(self.err_path, "wb")
        self.proc = subprocess.Popen([sys.executable, "-m", "fieldmix", *args], env=env, cwd=str(folder),
                                     stdin=subprocess.DEVNULL, stdout=self._out, stderr=self._err)  # fmt: skip
        self.http_port = None
        self.osc_port = None

    def wait_ready(self, timeout: float = 90.0) -> "DaemonProc":
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            text = self.out_path.read_text(errors="replace")
            for ln in text.splitlines():
                ln = ln.strip()
                if ln.startswith("page") and "http://" in ln:
                    self.http_port = int(ln.split("http://", 1)[1].split("/", 1)[0].rsplit(":", 1)[1])
                elif ln.startswith("OSC") and " udp " in ln:
                    self.osc_port = int(ln.split(" udp ", 1)[1].split(",", 1)[0])
            if self.http_port and self.osc_port:
                return self
            if self.proc.poll() is not None:
                break
            time.sleep(0.2)
        tail = self.err_path.read_text(errors="replace")[-2000:]
        raise RuntimeError(f"the daemon did not come up (exit {self.proc.poll()}): {tail}")

    @property
    def pid(self) -> int:
        return self.proc.pid

    def state(self) -> dict:
        return http_json(self.http_port, "/api/state")

    def audio(self) -> dict:
        return self.state()["status"]["audio"]

    def stop(self) -> None:
        stop_process(self.proc, timeout=10.0)  # SIGTERM: fade out, save, exit 0
        for f in (self._out, self._err):
            try:
                f.close()
            except Exception:
                pass


def start_serve(show: Path, srv, folder: Path, block: int) -> DaemonProc:
    env = child_env(srv.env())
    args = ["serve", str(show), "--device", "system", "--samplerate", str(SR), "--blocksize", str(block),
            "--osc-port", "0", "--http-port", "0", "--fresh", "--state", str(folder / f"state-{block}.json")]  # fmt: skip
    d = DaemonProc(args, env, folder, f"serve-{block}").wait_ready()
    deadline = time.monotonic() + 30.0
    while time.monotonic() < deadline:  # running, and callbacks counted
        a = d.audio()
        if a.get("state") == "running" and a.get("callbacks_seen", 0) > 0:
            break
        time.sleep(0.2)
    return d


# ============================================================================ OSC bytes
def osc_message(address: str, *args) -> bytes:
    from fieldmix.oscwire import encode_message

    return encode_message(address, list(args))


def parse_osc(data: bytes):
    from fieldmix.oscwire import decode_packet

    items = decode_packet(data)
    return [(m.address, list(m.args)) for _, m in items]


def flood_packets() -> list[bytes]:
    return [osc_message(f"/source/s{k + 1}/azimuth", float((37 * j + 11 * k) % 360 - 179.5))
            for j in range(24) for k in range(N_SOURCES)]  # fmt: skip


class OscClient:
    """A UDP socket on loopback that sends and reads replies (for barriers and counts)."""

    def __init__(self, port: int):
        self.addr = (HOST, port)
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        self.sock.bind((HOST, 0))
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 1 << 20)

    def send(self, packet: bytes) -> None:
        self.sock.sendto(packet, self.addr)

    def request(self, packet: bytes, want: str, timeout: float = 10.0, match=None):
        """Send, then read replies until one with address ``want`` (and ``match(args)``) arrives."""
        self.sock.sendto(packet, self.addr)
        deadline = time.monotonic() + timeout
        while True:
            left = deadline - time.monotonic()
            if left <= 0:
                return None
            self.sock.settimeout(left)
            try:
                data, _ = self.sock.recvfrom(65536)
            except socket.timeout:
                return None
            try:
                msgs = parse_osc(data)
            except Exception:
                continue
            for address, args in msgs:
                if address == want and (match is None or match(args)):
                    return args

    def close(self) -> None:
        self.sock.close()


def pace(send, packets: list, rate: float, count: int, limit_s: float, tick: float = 0.001) -> tuple[int, float]:
    """Send ``count`` packets at ``rate`` per second (absolute schedule); returns (sent, seconds)."""
    t0 = time.monotonic()
    deadline = t0 + limit_s
    sent = 0
    n = len(packets)
    while sent < count:
        now = time.monotonic()
        if now > deadline:
            break
        due = min(count, int((now - t0) * rate) + 1)
        while sent < due:
            send(packets[sent % n])
            sent += 1
        time.sleep(tick)
    return sent, time.monotonic() - t0


# ============================================================================ helper processes
def helper(cmd: str, *args, env: Optional[dict] = None) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, str(Path(__file__).resolve()), cmd, *map(str, args)],
                            env=env or child_env(), stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, bufsize=1)  # fmt: skip


def _h_osc_flood(a) -> int:
    """Sender process: ``rate`` messages a second for ``seconds`` to the daemon's UDP port."""
    packets = flood_packets()
    sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    sock.bind((HOST, 0))
    target = (HOST, a.port)
    print("start", flush=True)
    sent, took = pace(lambda p: sock.sendto(p, target), packets, a.rate, int(a.rate * a.seconds), a.seconds + 5.0, tick=0.002)
    sock.close()
    print(json.dumps({"sent": sent, "seconds": round(took, 3)}), flush=True)
    return 0


def _h_ws_load(a) -> int:
    """Websocket clients: ``clients`` connections that read everything; client 0 sends moves."""
    import asyncio

    import aiohttp

    async def run() -> dict:
        url = f"http://{HOST}:{a.port}/ws"
        frames = [0] * a.clients
        nbytes = [0] * a.clients
        replies = {"ack": 0, "error": 0}
        timeout = aiohttp.ClientTimeout(total=None, sock_connect=10)
        async with aiohttp.ClientSession(timeout=timeout) as session:
            wss = []
            for _ in range(a.clients):
                wss.append(await asyncio.wait_for(session.ws_connect(url, autoping=True, max_msg_size=8 << 20), 10.0))

            async def reader(i, ws):
                async for msg in ws:
                    if msg.type == aiohttp.WSMsgType.TEXT:
                        frames[i] += 1
                        nbytes[i] += len(msg.data)
                        if i == 0 and '"error"' in msg.data[:40]:
                            replies["error"] += 1
                    elif msg.type in (aiohttp.WSMsgType.CLOSED, aiohttp.WSMsgType.ERROR):
                        break

            tasks = [asyncio.create_task(reader(i, ws)) for i, ws in enumerate(wss)]
            await asyncio.sleep(0.5)  # hello + first frames
            base = list(frames)
            print("ready", flush=True)
            t0 = time.monotonic()
            end = t0 + a.seconds
            moves = 0
            period = 1.0 / a.moves if a.moves > 0 else None
            while time.monotonic() < end:
                if period is None:
                    await asyncio.sleep(0.1)
                    continue
                due = int((time.monotonic() - t0) / period) + 1
                while moves < due:
                    k = moves % N_SOURCES
                    await wss[0].send_str(json.dumps({"type": "move", "source": f"s{k + 1}",
                                                      "azimuth": float((7 * moves) % 360 - 179.5)}))  # fmt: skip
                    moves += 1
                await asyncio.sleep(0.005)
            took = time.monotonic() - t0
            for ws in wss:
                await ws.close()
            for t in tasks:
                t.cancel()
            await asyncio.gather(*tasks, return_exceptions=True)
        got = [f - b for f, b in zip(frames, base)]
        return {"clients": a.clients, "moves": moves, "seconds": round(took, 3),
                "frames_per_client_s": round(sum(got) / a.clients / max(took, 1e-9), 1),
                "bytes_per_client_s": round(sum(nbytes) / a.clients / max(took, 1e-9)),
                "min_frames": min(got), "errors_client0": replies["error"]}  # fmt: skip

    try:
        res = asyncio.run(asyncio.wait_for(run(), a.seconds + 60.0))
    except Exception as exc:
        res = {"error": f"{type(exc).__name__}: {exc}"}
    print(json.dumps(res), flush=True)
    return 0


def _h_bare_osc(a) -> int:
    """A bare python-osc server: AsyncIOOSCUDPServer, a no-op default handler (it only counts)."""
    import asyncio

    from pythonosc.dispatcher import Dispatcher
    from pythonosc.osc_server import AsyncIOOSCUDPServer

    count = [0]

    def noop(address, *args):
        count[0] += 1

    disp = Dispatcher()
    disp.map("/ping", lambda address, *args: ("/pong", *args))  # python-osc sends a returned message back
    disp.map("/status", lambda address, *args: ("/status", "applied_total", count[0]))
    disp.set_default_handler(noop)

    async def run():
        loop = asyncio.get_running_loop()
        server = AsyncIOOSCUDPServer((HOST, 0), disp, loop)
        transport, _ = await server.create_serve_endpoint()
        print(f"port {transport.get_extra_info('sockname')[1]}", flush=True)
        end = time.monotonic() + a.seconds
        while time.monotonic() < end and not stop.is_set():
            await asyncio.sleep(0.1)
        transport.close()

    stop = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: stop.set())
    asyncio.run(run())
    return 0


_CLIENT_NAME = None


def _h_recorder(a) -> int:
    """JACK recorder: records ``inputs`` channels between 'start' and 'stop PATH'; stamps every cycle."""
    import numpy as np

    from fieldmix.audio.devices import import_sounddevice, match_device, query_in_this_process, set_jack_client_name

    global _CLIENT_NAME
    _CLIENT_NAME = set_jack_client_name(a.client)  # PortAudio keeps the pointer
    sd = import_sounddevice()
    dev = match_device(query_in_this_process(sd)["devices"], "system")
    cap = int(a.max_seconds * SR)
    buf = np.zeros((cap, a.inputs), dtype=np.float32)
    ncb = int(a.max_seconds * SR / 16) + 16
    cb_t = np.zeros(ncb)
    cb_start = np.zeros(ncb, dtype=np.int64)
    cb_n = np.zeros(ncb, dtype=np.int64)
    st = {"on": False, "pos": 0, "k": 0}

    def cb(indata, frames, t, status):
        now = time.monotonic()
        if not st["on"]:
            return
        pos, k = st["pos"], st["k"]
        if pos + frames > cap or k >= ncb:
            st["on"] = False
            return
        buf[pos : pos + frames] = indata
        cb_t[k] = now
        cb_start[k] = pos
        cb_n[k] = frames
        st["pos"] = pos + frames
        st["k"] = k + 1

    stream = sd.InputStream(device=dev["index"], samplerate=SR, blocksize=0, channels=a.inputs, dtype="float32", callback=cb)
    stream.start()
    print(f"ready {a.client}", flush=True)
    for line in sys.stdin:
        parts = line.split()
        if not parts:
            continue
        if parts[0] == "quit":
            break
        if parts[0] == "start":
            st["pos"], st["k"] = 0, 0
            st["on"] = True
            print("ok", flush=True)
        elif parts[0] == "stop" and len(parts) == 2:
            st["on"] = False
            time.sleep(0.05)
            k, pos = st["k"], st["pos"]
            np.savez(parts[1], data=buf[:pos], cb_t=cb_t[:k], cb_start=cb_start[:k], cb_n=cb_n[:k])
            print("ok", flush=True)
    sys.stdout.flush()
    os._exit(0)  # skip Pa_Terminate (it can hang when a JACK server went away)


def _h_clicker(a) -> int:
    """JACK client with one output: a single 1.0 sample at the start of the next cycle on each 'click' line."""
    from fieldmix.audio.devices import import_sounddevice, match_device, query_in_this_process, set_jack_client_name

    global _CLIENT_NAME
    _CLIENT_NAME = set_jack_client_name(a.client)
    sd = import_sounddevice()
    dev = match_device(query_in_this_process(sd)["devices"], "system")
    st = {"want": False, "stamps": []}

    def cb(outdata, frames, t, status):
        now = time.monotonic()
        outdata.fill(0.0)
        if st["want"] and len(st["stamps"]) < 10000:
            st["want"] = False
            outdata[0, 0] = 1.0
            st["stamps"].append(now)

    stream = sd.OutputStream(device=dev["index"], samplerate=SR, blocksize=0, channels=1, dtype="float32", callback=cb)
    stream.start()
    print(f"ready {a.client}", flush=True)
    for line in sys.stdin:
        if line.startswith("click"):
            st["want"] = True
        elif line.startswith("quit"):
            break
    print(" ".join(repr(x) for x in st["stamps"]), flush=True)
    os._exit(0)


# ============================================================================ deadline runs
def deadline_run(d: DaemonProc, load: str, seconds: float, folder: Path, opts) -> dict:
    proc = None
    stop_evt = threading.Event()
    thread = None
    info: dict = {}
    try:
        if load == "osc":
            proc = helper("_osc-flood", "--port", d.osc_port, "--rate", opts.osc_rate, "--seconds", seconds + 2.0)
            if read_line(proc, 20.0) != "start":
                raise RuntimeError(f"OSC sender did not start: {proc.stderr.read()[-500:] if proc.poll() is not None else ''}")
        elif load == "ws":
            proc = helper("_ws-load", "--port", d.http_port, "--clients", opts.ws_clients, "--moves", opts.ws_moves,
                          "--seconds", seconds + 2.0)  # fmt: skip
            if read_line(proc, 40.0) != "ready":
                err = proc.stdout.read()[-500:] + proc.stderr.read()[-1000:] if proc.poll() is not None else ""
                raise RuntimeError(f"websocket clients did not connect: {err}")
        elif load == "reload":
            writes = [0]

            def rewrite():
                i = 0
                while not stop_evt.wait(2.0) and i < 10000:
                    i += 1
                    write_layout(folder / "ring.json", 1.0 if i % 2 else 0.0)
                    writes[0] = i
                if i % 2:  # leave the original layout in place
                    write_layout(folder / "ring.json", 0.0)

            thread = threading.Thread(target=rewrite, daemon=True)
            thread.start()
        s0 = d.state()
        c0 = (cpu_seconds(d.pid), cpu_seconds(s0["status"]["audio"].get("pid")))
        st0, tot0 = steal_ticks()
        t0 = time.monotonic()
        time.sleep(seconds)
        s1 = d.state()
        t1 = time.monotonic()
        st1, tot1 = steal_ticks()
        c1 = (cpu_seconds(d.pid), cpu_seconds(s1["status"]["audio"].get("pid")))
        a0, a1 = s0["status"]["audio"], s1["status"]["audio"]
        seen = a1["callbacks_seen"] - a0["callbacks_seen"]
        expected = a1["callbacks_expected"] - a0["callbacks_expected"]
        m0, m1 = s0["status"]["messages"]["applied"], s1["status"]["messages"]["applied"]
        applied = {k: m1.get(k, 0) - m0.get(k, 0) for k in m1 if m1.get(k, 0) != m0.get(k, 0)}
        res = {
            "load": load,
            "seconds": t1 - t0,
            "seen": seen,
            "expected": expected,
            "missed": max(0, expected - seen),
            "flagged": a1["xruns_flagged"] - a0["xruns_flagged"],
            "dsp_mean": a1.get("dsp_load_mean", float("nan")),
            "dsp_max": a1.get("dsp_load_max", float("nan")),
            "restarts": a1.get("restarts", 0) - a0.get("restarts", 0),
            "cpu_control": (c1[0] - c0[0]) / (t1 - t0) * 100,
            "cpu_audio": (c1[1] - c0[1]) / (t1 - t0) * 100,
            "steal": (st1 - st0) / max(1, tot1 - tot0) * 100,
            "applied": applied,
            "layouts": a1.get("layout_applied", 0) - a0.get("layout_applied", 0),
            "state": a1.get("state"),
        }
    finally:
        stop_evt.set()
        if thread is not None:
            thread.join(5.0)
            info["writes"] = writes[0]
        if proc is not None:
            try:
                proc.stdin.close()
            except Exception:
                pass
            line = read_line(proc, seconds + 30.0)
            if line.startswith("{"):
                info.update(json.loads(line))
            stop_process(proc)
    res["info"] = info
    return res


# ============================================================================ latency
def jack_ports(srv, client: str) -> tuple[list, list]:
    def num(p):
        return int(p.rsplit("_", 1)[1])

    ports = srv.client_ports(client)
    return (sorted((p for p in ports if ":in_" in p), key=num), sorted((p for p in ports if ":out_" in p), key=num))


def _rec_cmd(rec, line: str, timeout: float = 20.0) -> None:
    rec.stdin.write(line + "\n")
    rec.stdin.flush()
    if read_line(rec, timeout) != "ok":
        raise RuntimeError(f"recorder did not answer {line.split()[0]!r}")


def _stamp_of(cb_t, cb_start, n: int) -> float:
    """Time of recorded sample n: its cycle's monotonic stamp + its place in the cycle."""
    import numpy as np

    j = int(np.searchsorted(cb_start, n, side="right")) - 1
    return float(cb_t[j] + (n - cb_start[j]) / SR)


def measure_latency(srv, d: DaemonProc, block: int, moves: int, folder: Path) -> dict:
    import numpy as np

    from fieldmix.audio.jackutil import Probe

    tone = rec = click = None
    osc = OscClient(d.osc_port)
    through = []
    try:
        env = child_env(srv.env())
        max_s = moves * 0.35 + 8.0
        rec = helper("_recorder", "--client", "fmbrec", "--inputs", 2, "--max-seconds", max_s, env=env)
        click = helper("_clicker", "--client", "fmbclick", env=env)
        for p in (rec, click):
            if not read_line(p, 30.0).startswith("ready"):
                raise RuntimeError(f"JACK helper did not start: {p.stderr.read()[-800:] if p.poll() is not None else ''}")
        d_in, d_out = jack_ports(srv, "fieldmix")
        r_in, _ = jack_ports(srv, "fmbrec")
        _, k_out = jack_ports(srv, "fmbclick")
        a_ch, b_ch = 0, 4  # speakers R1 (0 deg) and R5 (45 deg)
        osc.send(osc_message("/source/s1/azimuth", 0.0))

        # 1. the audio path alone: a click into input 1 (s1 sits on R1), recorded directly and after the daemon
        srv.disconnect_all(d_in[0])  # system:capture_1 (silent)
        srv.connect(k_out[0], d_in[0])
        srv.disconnect_all(r_in[0])
        srv.connect(k_out[0], r_in[0])
        srv.disconnect_all(r_in[1])
        srv.connect(d_out[a_ch], r_in[1])
        time.sleep(0.5)
        _rec_cmd(rec, "start")
        for _ in range(10):
            time.sleep(0.2 + random.uniform(0.0, 2 * block / SR))
            click.stdin.write("click\n")
            click.stdin.flush()
        time.sleep(0.3)
        path = folder / f"clicks-{block}.npz"
        _rec_cmd(rec, f"stop {path}")
        z = np.load(path)
        x, ct, cs = z["data"], z["cb_t"], z["cb_start"]
        firsts = []
        for ch in (0, 1):
            idx = np.flatnonzero(np.abs(x[:, ch]) > 0.1)
            firsts.append([int(i) for k, i in enumerate(idx) if k == 0 or i - idx[k - 1] > SR // 20])
        later = np.asarray(firsts[1], dtype=np.int64)
        for n in firsts[0]:  # each direct click with the first one after the daemon within 0.2 s
            k = int(np.searchsorted(later, n))
            if k < len(later) and later[k] - n < SR // 5:
                through.append(_stamp_of(ct, cs, int(later[k])) - _stamp_of(ct, cs, n))
        if len(through) < len(firsts[0]):
            print(f"  clicks: {len(firsts[0])} sent and recorded, {len(firsts[1])} seen after the daemon, "
                  f"peak after the daemon {float(np.max(np.abs(x[:, 1]))) if len(x) else 0:.3g}", flush=True)
        srv.disconnect(k_out[0], d_in[0])

        # 2. control: a tone on input 1; s1 jumps between R1 and R5 over UDP
        tone = Probe(srv, "fmbtone", freq=1000.0, amp=0.5, inputs=1)
        _, t_out = jack_ports(srv, "fmbtone")
        srv.connect(t_out[0], d_in[0])
        for k, o in enumerate((a_ch, b_ch)):
            srv.disconnect_all(r_in[k])
            srv.connect(d_out[o], r_in[k])
        time.sleep(0.5)
        _rec_cmd(rec, "start")
        time.sleep(0.3)
        P = block / SR
        sends = []
        for i in range(moves):
            target = 45.0 if i % 2 == 0 else 0.0
            pkt = osc_message("/source/s1/azimuth", target)
            t = time.monotonic()
            osc.send(pkt)
            sends.append((t, 1 if target == 45.0 else 0))
            time.sleep(0.25 + random.uniform(0.0, 2 * P))  # random phase against the block clock
        time.sleep(0.3)
        path = folder / f"latency-{block}.npz"
        _rec_cmd(rec, f"stop {path}")
        z = np.load(path)
        data, cb_t, cb_start = z["data"], z["cb_t"], z["cb_start"]
    finally:
        osc.close()
        for p in (rec, click):
            if p is not None:
                try:
                    p.stdin.write("quit\n")
                    p.stdin.flush()
                except Exception:
                    pass
                stop_process(p)
        if tone is not None:
            tone.close()

    # analysis: the sample n on the watched channel, its time = its cycle's stamp + offset
    first, settled, skipped = [], [], 0
    thr = 1e-6
    win = SR // 1000  # 48 samples = one period of the 1 kHz tone: the window RMS is phase-free
    glide = int(GLIDE_MS * SR / 1000)

    def t_of(n: int) -> float:
        return _stamp_of(cb_t, cb_start, n)

    for t_send, ch in sends:
        j0 = int(np.searchsorted(cb_t, t_send, side="right")) - 1  # the cycle before the send
        if j0 < 1:
            skipped += 1
            continue
        lo = int(cb_start[j0])
        pre = data[int(cb_start[j0 - 1]) : lo, ch]
        j_hi = int(np.searchsorted(cb_t, t_send + 0.2, side="right"))
        hi = int(cb_start[min(j_hi, len(cb_start) - 1)])
        if pre.size == 0 or float(np.max(np.abs(pre))) > thr or hi <= lo:
            skipped += 1  # not silent before the move (or not recorded): no clean edge
            continue
        idx = np.flatnonzero(np.abs(data[lo:hi, ch]) > thr)
        if idx.size == 0:
            skipped += 1
            continue
        n = lo + int(idx[0])
        first.append(t_of(n) - t_send)
        seg = data[n : n + glide + int(0.08 * SR), ch].astype(np.float64)
        if seg.size < glide + win + int(0.05 * SR):
            continue
        csum = np.concatenate(([0.0], np.cumsum(seg * seg)))
        rms = np.sqrt(np.maximum((csum[win:] - csum[:-win]) / win, 1e-30))  # rms[m] = window seg[m : m + win]
        final = float(np.median(rms[glide + int(0.02 * SR) :]))
        ok = np.abs(20 * np.log10(rms / final)) <= 0.1
        bad = np.flatnonzero(~ok[: glide + int(0.02 * SR)])
        m = int(bad[-1]) + 1 if bad.size else 0
        settled.append(t_of(n + m + win - 1) - t_send)  # the window's last sample
    return {"first": first, "settled": settled, "skipped": skipped, "moves": moves, "block": block, "through": through}


# ============================================================================ throughput
def throughput(port: int, kind: str, rates: list, step_s: float) -> list:
    """Paced sends at each rate; returns [(rate, sent, applied, send_rate)]. Stops after two lossy steps."""
    osc = OscClient(port)
    packets = flood_packets()

    def count():
        args = osc.request(osc_message("/status"), "/status", timeout=10.0)
        if args is None:
            return None
        kv = dict(zip(args[0::2], args[1::2]))
        return int(kv["applied_total"])

    tag = [0]

    def barrier(wait: float) -> bool:
        """/ping with a fresh tag until its /pong comes back (a ping can be dropped too)."""
        for _ in range(4):
            tag[0] += 1
            t = tag[0]
            if osc.request(osc_message("/ping", t), "/pong", timeout=wait, match=lambda args: list(args) == [t]) is not None:
                return True
        return False

    out = []
    lossy = 0
    try:
        for rate in rates:
            if not barrier(5.0):
                break
            c0 = count()
            n = int(rate * step_s)
            sent, took = pace(osc.send, packets, rate, n, step_s + 5.0)
            if not barrier(5.0):  # a barrier: earlier datagrams are handled
                out.append((rate, sent, None, sent / took))
                break
            c1 = count()
            if c0 is None or c1 is None:
                break
            applied = c1 - c0
            out.append((rate, sent, applied, sent / took))
            lossy = lossy + 1 if applied < sent else 0
            if lossy >= 2:
                break
            time.sleep(0.3)
    finally:
        osc.close()
    return out


def lossless(rows) -> float:
    best = 0.0
    for rate, sent, applied, send_rate in rows:
        if applied is not None and applied >= sent:
            best = max(best, min(rate, send_rate))
    return best


# ============================================================================ memory
def measure_memory(folder: Path, still: bool, idle_s: float) -> dict:
    args = ["demo", "--osc-port", "0", "--http-port", "0", "--fresh", "--state", str(folder / f"demo-state-{int(still)}.json")]
    if still:
        args.append("--still")
    d = DaemonProc(args, child_env(), folder, f"demo-{int(still)}")
    try:
        d.wait_ready()
        time.sleep(3.0)  # warm up: imports done, first blocks played
        audio_pid = d.audio().get("pid")
        pids = {"control": d.pid, "audio": audio_pid}
        c0 = {k: cpu_seconds(p) for k, p in pids.items()}
        t0 = time.monotonic()
        time.sleep(idle_s)
        t = time.monotonic() - t0
        c1 = {k: cpu_seconds(p) for k, p in pids.items()}
        mem = {k: memory_kb(p) for k, p in pids.items()}
        return {"still": still, "mem": mem, "cpu": {k: (c1[k] - c0[k]) / t * 100 for k in pids}, "seconds": t}
    finally:
        d.stop()


# ============================================================================ report
def fmt_deadline_table(rows_by_block: dict) -> list[str]:
    out = ["| block | load | seen/expected | missed | flagged | misses (missed+flagged) | vs idle | DSP load mean/max | CPU control/audio % | steal % | load check |",
           "|---|---|---|---|---|---|---|---|---|---|---|"]  # fmt: skip
    for block, rows in rows_by_block.items():
        idle = next((r for r in rows if r["load"] == "idle"), None)
        for r in rows:
            misses = r["missed"] + r["flagged"]
            rel = "-"
            if idle is not None and r is not idle:
                im = idle["missed"] + idle["flagged"]
                rel = f"{misses - im:+d}"
            info = r.get("info") or {}
            chk = ""
            if r["load"] == "osc":
                got = r["applied"].get("osc", 0)
                chk = f"sent {info.get('sent', '?')}, applied {got} ({got / r['seconds']:.0f}/s)"
            elif r["load"] == "ws":
                chk = (f"{info.get('clients', '?')} clients, {info.get('frames_per_client_s', '?')} frames/s each, "
                       f"{r['applied'].get('web', 0)} moves applied")  # fmt: skip
            elif r["load"] == "reload":
                chk = f"{info.get('writes', '?')} rewrites, {r['layouts']} layouts applied"
            if r.get("restarts"):
                chk += f"; {r['restarts']} audio restarts"
            pc = 100.0 * r["seen"] / max(1, r["expected"])
            out.append(
                f"| {block} | {r['load']} | {r['seen']}/{r['expected']} ({pc:.1f}%) | {r['missed']} | {r['flagged']} | {misses} | {rel} "
                f"| {r['dsp_mean']:.3f}/{r['dsp_max']:.3f} | {r['cpu_control']:.0f}/{r['cpu_audio']:.0f} | {r['steal']:.1f} | {chk} |"
            )
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=60.0, help="length of each deadline run (default 60)")
    ap.add_argument("--blocks", default="64,128,256,512", help="block sizes, comma separated")
    ap.add_argument("--loads", default=",".join(LOADS), help=f"loads, comma separated, of {','.join(LOADS)} (idle always runs first)")
    ap.add_argument("--parts", default="deadlines,latency,throughput,memory")
    ap.add_argument("--osc-rate", type=float, default=10000.0)
    ap.add_argument("--ws-clients", type=int, default=20)
    ap.add_argument("--ws-moves", type=float, default=100.0, help="moves a second sent by websocket client 0")
    ap.add_argument("--latency-moves", type=int, default=40)
    ap.add_argument("--latency-blocks", default=None, help="block sizes for the latency part (default: --blocks)")
    ap.add_argument("--throughput-block", type=int, default=None, help="the session the throughput part runs in (default: the largest block)")
    ap.add_argument("--throughput-step", type=float, default=2.0, help="seconds per rate step")
    ap.add_argument("--rates", default="2000,4000,6000,8000,10000,14000,20000,28000,40000,56000,80000")
    ap.add_argument("--idle-cpu-seconds", type=float, default=10.0)
    a = ap.parse_args()

    parts = {p.strip() for p in a.parts.split(",") if p.strip()}
    blocks = [int(b) for b in a.blocks.split(",") if b.strip()]
    loads = [l.strip() for l in a.loads.split(",") if l.strip()]
    bad = [l for l in loads if l not in LOADS]
    if bad:
        ap.error(f"unknown load {bad}")
    loads = ["idle"] + [l for l in loads if l != "idle"]
    lat_blocks = [int(b) for b in a.latency_blocks.split(",")] if a.latency_blocks else blocks
    tp_block = a.throughput_block or max(blocks)
    rates = [float(r) for r in a.rates.split(",")]
    session_blocks = [b for b in blocks if "deadlines" in parts or ("latency" in parts and b in lat_blocks)
                      or ("throughput" in parts and b == tp_block)]  # fmt: skip
    if "throughput" in parts and tp_block not in session_blocks:
        session_blocks.append(tp_block)

    from fieldmix.audio.jackutil import JackServer, jack_available

    missing = jack_available()
    if missing and session_blocks:
        print(f"JACK is not installed ({missing}): only the memory part can run")
        session_blocks = []

    print(f"live benchmark: {N_SOURCES} sources x {N_SPEAKERS} speakers, {SR} Hz, glide {GLIDE_MS:g} ms, "
          f"runs of {a.seconds:g} s; blocks {blocks}; loads {loads}; parts {sorted(parts)}", flush=True)  # fmt: skip
    deadlines: dict = {}
    latency: dict = {}
    tp: dict = {}
    memory: list = []
    t_start = time.monotonic()
    with tempfile.TemporaryDirectory(prefix="fieldmix-live-bench-") as tmp:
        folder = Path(tmp)
        show = write_show(folder / "show")
        for block in session_blocks:
            srv = JackServer(name=f"fmbench{os.getpid()}", samplerate=SR, period=block, capture=32, playback=32,
                             log_path=folder / f"jackd-{block}.log")  # fmt: skip
            d = None
            try:
                srv.start()
                d = start_serve(show, srv, folder, block)
                print(f"[{time.monotonic() - t_start:6.0f} s] block {block}: daemon pid {d.pid}, "
                      f"audio pid {d.audio().get('pid')}, OSC {d.osc_port}, HTTP {d.http_port}", flush=True)  # fmt: skip
                if "latency" in parts and block in lat_blocks:
                    try:
                        latency[block] = measure_latency(srv, d, block, a.latency_moves, folder)
                        L = latency[block]
                        print(f"  latency: first change p50 {pct(L['first'], 50) * 1e3:.2f} ms, p99 {pct(L['first'], 99) * 1e3:.2f} ms "
                              f"({len(L['first'])}/{L['moves']})", flush=True)  # fmt: skip
                    except Exception as exc:
                        print(f"  latency failed: {type(exc).__name__}: {exc}", flush=True)
                    time.sleep(2.0)
                if "deadlines" in parts:
                    rows = []
                    for load in loads:
                        try:
                            r = deadline_run(d, load, a.seconds, folder / "show", a)
                        except Exception as exc:
                            print(f"  {load} failed: {type(exc).__name__}: {exc}", flush=True)
                            continue
                        rows.append(r)
                        print(f"  {load:<6} seen {r['seen']}/{r['expected']} missed {r['missed']} flagged {r['flagged']} "
                              f"dsp {r['dsp_mean']:.3f} cpu {r['cpu_control']:.0f}/{r['cpu_audio']:.0f}% steal {r['steal']:.1f}% "
                              f"{r.get('info')} applied {r['applied']}", flush=True)  # fmt: skip
                        time.sleep(2.0)  # settle
                    deadlines[block] = rows
                if "throughput" in parts and block == tp_block:
                    bare = helper("_bare-osc", "--seconds", 600)
                    try:
                        line = read_line(bare, 20.0)
                        if not line.startswith("port "):
                            raise RuntimeError(f"bare python-osc server did not start: {line!r}")
                        bare_port = int(line.split()[1])
                        # interleave: fieldmix, bare, fieldmix, bare (the machine's noise hits both)
                        for rep in range(2):
                            tp.setdefault("fieldmix", []).append(throughput(d.osc_port, "fieldmix", rates, a.throughput_step))
                            tp.setdefault("python-osc", []).append(throughput(bare_port, "bare", rates, a.throughput_step))
                        for k, v in tp.items():
                            print(f"  throughput {k}: lossless {[lossless(r) for r in v]}", flush=True)
                    finally:
                        stop_process(bare)
                    tp["block"] = block
            finally:
                if d is not None:
                    d.stop()
                srv.stop()
        if "memory" in parts:
            for still in (False, True):
                try:
                    memory.append(measure_memory(folder, still, a.idle_cpu_seconds))
                except Exception as exc:
                    print(f"  memory ({'still' if still else 'script'}) failed: {type(exc).__name__}: {exc}", flush=True)

    # ------------------------------------------------------------ tables
    print()
    print(f"took {time.monotonic() - t_start:.0f} s")
    if deadlines:
        print(f"\n## Deadline misses ({a.seconds:g} s runs; counters from GET /api/state at start and end)")
        print("\n".join(fmt_deadline_table(deadlines)))
        print("misses = callbacks missing against the expected count + xrun-flagged callbacks; vs idle = misses minus"
              " the idle run's at the same block size, same session")  # fmt: skip
    if latency:
        print(f"\n## Control latency (UDP send -> first changed output sample; glide {GLIDE_MS:g} ms)")
        print("| block | moves measured | first change p50 / p99 / max ms | settled 0.1 dB p50 / p99 ms | target p99 (2 blocks + glide) ms | first-change p99 met | settled p99 met | input->output through the daemon (clicks) median ms |")
        print("|---|---|---|---|---|---|---|---|")
        for block, L in latency.items():
            tgt = (2 * block / SR) * 1e3 + GLIDE_MS
            f, s = L["first"], L["settled"]
            p99f, p99s = pct(f, 99) * 1e3, pct(s, 99) * 1e3
            print(f"| {block} | {len(f)}/{L['moves']} | {pct(f, 50) * 1e3:.2f} / {p99f:.2f} / {max(f, default=float('nan')) * 1e3:.2f} "
                  f"| {pct(s, 50) * 1e3:.2f} / {p99s:.2f} | {tgt:.2f} | {'yes' if p99f <= tgt else 'no'} | {'yes' if p99s <= tgt else 'no'} "
                  f"| {pct(L['through'], 50) * 1e3:.2f} ({len(L['through'])} clicks) |")  # fmt: skip
    if tp:
        print(f"\n## OSC throughput (UDP on loopback, paced, {a.throughput_step:g} s per rate; daemon on JACK at {tp.get('block')} frames)")
        print("| server | pass | rates sent, msg/s (lost of those sent, when any) | lossless msg/s |")
        print("|---|---|---|---|")
        for k in ("fieldmix", "python-osc"):
            for i, rows in enumerate(tp.get(k, [])):
                steps = ", ".join(f"{r[3]:.0f}" + (" no barrier" if r[2] is None else ("" if r[2] >= r[1] else f" (lost {r[1] - r[2]})"))
                                  for r in rows)  # fmt: skip
                print(f"| {k} | {i + 1} | {steps} | {lossless(rows):.0f} |")
        fm = max((lossless(r) for r in tp.get("fieldmix", [])), default=0.0)
        po = max((lossless(r) for r in tp.get("python-osc", [])), default=0.0)
        if po > 0:
            print(f"ratio fieldmix / bare python-osc (best pass of each): {fm / po:.2f} (target 0.7)")
    if memory:
        print("\n## Memory and idle CPU (`python -m fieldmix demo --osc-port 0 --http-port 0`)")
        print("| demo | control RSS / PSS MB | audio RSS / PSS MB | together RSS / PSS MB | CPU control % | CPU audio % |")
        print("|---|---|---|---|---|---|")
        for m in memory:
            c, au = m["mem"]["control"], m["mem"]["audio"]
            print(f"| {'--still' if m['still'] else 'script playing'} | {c['rss'] / 1024:.1f} / {c['pss'] / 1024:.1f} "
                  f"| {au['rss'] / 1024:.1f} / {au['pss'] / 1024:.1f} | {(c['rss'] + au['rss']) / 1024:.1f} / {(c['pss'] + au['pss']) / 1024:.1f} "
                  f"| {m['cpu']['control']:.1f} | {m['cpu']['audio']:.1f} |")  # fmt: skip
        print(f"CPU over {a.idle_cpu_seconds:g} s, % of one core (utime + stime); target: together at most 200 MB")
    return 0


def _helper_main(argv: list) -> int:
    ap = argparse.ArgumentParser(prog="live.py helper")
    sub = ap.add_subparsers(dest="cmd", required=True)
    p = sub.add_parser("_osc-flood")
    p.add_argument("--port", type=int, required=True)
    p.add_argument("--rate", type=float, required=True)
    p.add_argument("--seconds", type=float, required=True)
    p = sub.add_parser("_ws-load")
    p.add_argument("--port", type=int, required=True)
    p.add_argument("--clients", type=int, required=True)
    p.add_argument("--moves", type=float, required=True)
    p.add_argument("--seconds", type=float, required=True)
    p = sub.add_parser("_bare-osc")
    p.add_argument("--seconds", type=float, default=600.0)
    p = sub.add_parser("_clicker")
    p.add_argument("--client", required=True)
    p = sub.add_parser("_recorder")
    p.add_argument("--client", required=True)
    p.add_argument("--inputs", type=int, default=2)
    p.add_argument("--max-seconds", type=float, required=True)
    a = ap.parse_args(argv)
    a.seconds = min(getattr(a, "seconds", 0.0), 3600.0)  # every helper is bounded in time
    return {"_osc-flood": _h_osc_flood, "_ws-load": _h_ws_load, "_bare-osc": _h_bare_osc, "_recorder": _h_recorder,
            "_clicker": _h_clicker}[a.cmd](a)


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1].startswith("_"):
        sys.exit(_helper_main(sys.argv[1:]))
    sys.exit(main())
