"""Many control pages at once: 20 websocket clients while 50 source moves a second arrive over OSC.

Prints a table; asserts nothing. ``python -m fieldmix demo --still`` (the virtual audio
device) runs as a subprocess on loopback; one process of ours holds ``--clients`` aiohttp
websocket clients (the same protocol the page speaks, meters on as a page has them), and
the main process sends ``--rate`` moves a second of one source over UDP for ``--seconds``
(every move a distinct azimuth, so each one can be traced). Every client stamps each
``source`` message it receives with ``time.monotonic()`` (one clock for every process on
this machine); the sender stamps each send. Reported:

* delivery: per client, the moves received out of those sent, and whether its last
  update is the last move (coalescing may merge moves closer than 1/event_hz; the final
  state must always arrive);
* added delay: arrival minus send, p50 / p99 / max over every client and move;
* CPU of the daemon's control and audio processes (utime + stime over the run), and an
  idle run of the same length before it for comparison;
* meter frames per second each client received.

    python benchmarks/web.py                  # 20 clients, 50 moves/s, 20 s
    python benchmarks/web.py --clients 40 --rate 100 --seconds 30
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from live import DaemonProc, child_env, cpu_seconds, http_json, pct, read_line, stop_process  # noqa: E402

HOST = "127.0.0.1"
SOURCE = "buoy"


def azimuth_of(k: int) -> float:
    """The k-th move's azimuth: distinct for every k in a run, inside (-180, 180]."""
    return round(-179.0 + (k % 3580) * 0.1, 1)


def _h_clients(a) -> int:
    """Helper process: N websocket clients; prints 'ready', then one JSON line of what each received."""
    import aiohttp

    async def run():
        url = f"ws://{HOST}:{a.port}/ws"
        out = [{"moves": [], "meters": 0, "frames": 0, "last": None} for _ in range(a.clients)]
        stop = asyncio.Event()

        async def client(i, ws):
            rec = out[i]
            while not stop.is_set():
                try:
                    msg = await asyncio.wait_for(ws.receive(), 0.5)
                except asyncio.TimeoutError:
                    continue
                if msg.type != aiohttp.WSMsgType.TEXT:
                    break
                now = time.monotonic()
                rec["frames"] += 1
                m = json.loads(msg.data)
                for x in m["messages"] if m.get("type") == "batch" else [m]:
                    t = x.get("type")
                    if t == "source" and x["source"]["id"] == SOURCE:
                        az = round(x["source"]["azimuth"], 2)  # OSC carries float32: 0.1 steps survive at 0.01
                        rec["moves"].append((az, now))
                        rec["last"] = az
                    elif t == "meters":
                        rec["meters"] += 1

        async with aiohttp.ClientSession() as session:
            socks = [await session.ws_connect(url, max_msg_size=4 << 20) for _ in range(a.clients)]
            tasks = [asyncio.create_task(client(i, ws)) for i, ws in enumerate(socks)]
            print("ready", flush=True)
            loop = asyncio.get_running_loop()
            await loop.run_in_executor(None, sys.stdin.readline)  # the main process says when to stop
            await asyncio.sleep(a.settle)
            stop.set()
            await asyncio.gather(*tasks)
            for ws in socks:
                await ws.close()
        print(json.dumps(out), flush=True)

    asyncio.run(run())
    return 0


def send_moves(port: int, rate: float, seconds: float, first: int) -> list:
    """Paced sends of /source/<SOURCE>/azimuth; returns [(azimuth, monotonic send time)]."""
    from fieldmix.oscwire import encode_message

    sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    n = int(rate * seconds)
    sent = []
    t0 = time.monotonic()
    for k in range(n):
        due = t0 + k / rate
        while True:
            d = due - time.monotonic()
            if d <= 0:
                break
            time.sleep(min(d, 0.002))
        az = azimuth_of(first + k)
        pkt = encode_message(f"/source/{SOURCE}/azimuth", [az])
        sent.append((az, time.monotonic()))
        sock.sendto(pkt, (HOST, port))
    sock.close()
    return sent


def run_once(d: DaemonProc, a, loaded: bool, first: int) -> dict:
    audio_pid = d.audio().get("pid")
    helper = subprocess.Popen([sys.executable, __file__, "_clients", "--port", str(d.http_port), "--clients", str(a.clients),
                               "--settle", "1.0"], env=child_env(), stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)  # fmt: skip
    try:
        line = read_line(helper, 60.0)
        if line != "ready":
            raise RuntimeError(f"websocket clients did not start: {line!r}")
        time.sleep(1.0)  # hello frames out of the way
        c0 = (cpu_seconds(d.pid), cpu_seconds(audio_pid), time.monotonic())
        if loaded:
            sent = send_moves(d.osc_port, a.rate, a.seconds, first)
        else:
            time.sleep(a.seconds)
            sent = []
        c1 = (cpu_seconds(d.pid), cpu_seconds(audio_pid), time.monotonic())
        helper.stdin.write("stop\n")
        helper.stdin.flush()
        line = read_line(helper, 60.0)
        clients = json.loads(line)
    finally:
        stop_process(helper)
    wall = c1[2] - c0[2]
    r = {"sent": len(sent), "wall": wall, "cpu_control": 100 * (c1[0] - c0[0]) / wall,
         "cpu_audio": 100 * (c1[1] - c0[1]) / wall}  # fmt: skip
    send_t = {round(az, 2): t for az, t in sent}
    delays, received, last_ok, meter_fps = [], [], [], []
    for c in clients:
        got = [(az, t) for az, t in c["moves"] if az in send_t]
        received.append(len({az for az, _ in got}))
        delays += [t - send_t[az] for az, t in got]
        last_ok.append(bool(sent) and c["last"] == round(sent[-1][0], 2))
        meter_fps.append(c["meters"] / (wall + 2.0))
    r.update(received=received, delays=delays, last_ok=last_ok, meter_fps=meter_fps)
    return r


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    sub = ap.add_subparsers(dest="cmd")
    h = sub.add_parser("_clients")
    h.add_argument("--port", type=int, required=True)
    h.add_argument("--clients", type=int, default=20)
    h.add_argument("--settle", type=float, default=1.0)
    ap.add_argument("--clients", type=int, default=20)
    ap.add_argument("--rate", type=float, default=50.0, help="OSC moves a second")
    ap.add_argument("--seconds", type=float, default=20.0)
    a = ap.parse_args()
    if a.cmd == "_clients":
        return _h_clients(a)

    print(f"web benchmark: {a.clients} websocket clients, {a.rate:g} OSC moves/s of '{SOURCE}' for {a.seconds:g} s, "
          "demo show on the virtual device", flush=True)  # fmt: skip
    with tempfile.TemporaryDirectory(prefix="fieldmix-web-bench-") as tmp:
        folder = Path(tmp)
        args = ["demo", "--still", "--fresh", "--no-advertise", "--osc-port", "0", "--http-port", "0",
                "--state", str(folder / "state.json")]  # fmt: skip
        d = DaemonProc(args, child_env(), folder, "demo").wait_ready()
        try:
            deadline = time.monotonic() + 30
            while d.audio().get("state") != "running" and time.monotonic() < deadline:
                time.sleep(0.2)
            idle = run_once(d, a, loaded=False, first=0)
            load = run_once(d, a, loaded=True, first=0)
            st = http_json(d.http_port, "/api/status")
        finally:
            d.stop()
    n = load["sent"]
    dl = [x * 1e3 for x in load["delays"]]
    print()
    print(f"## Web clients under OSC moves (`benchmarks/web.py`, {a.clients} clients, {a.rate:g} moves/s, {a.seconds:g} s)")
    print("| run | control CPU % | audio CPU % | moves sent | received per client (min / median / max) | last move at every client | added delay p50 / p99 / max ms | meter frames/s per client (min) |")
    print("|---|---|---|---|---|---|---|---|")
    for name, r in (("idle (clients only)", idle), ("50 moves/s" if a.rate == 50 else f"{a.rate:g} moves/s", load)):
        rec = sorted(r["received"]) or [0]
        dd = [x * 1e3 for x in r["delays"]]
        print(f"| {name} | {r['cpu_control']:.1f} | {r['cpu_audio']:.1f} | {r['sent']} | "
              f"{rec[0]} / {rec[len(rec) // 2]} / {rec[-1]} | {'yes' if r['sent'] and all(r['last_ok']) else ('-' if not r['sent'] else 'NO')} | "
              f"{(f'{pct(dd, 50):.2f} / {pct(dd, 99):.2f} / {max(dd):.2f}') if dd else '-'} | {min(r['meter_fps']):.1f} |")  # fmt: skip
    lost = [n - x for x in load["received"]]
    print(f"\nmoves not seen individually (merged by coalescing, at most one per client frame): "
          f"min {min(lost)}, max {max(lost)} of {n}; every client's final state = the last move: {all(load['last_ok'])}")  # fmt: skip
    print(f"server web stats at the end: {json.dumps(st.get('web', {}))}; delay p99 {pct(dl, 99):.2f} ms")
    return 0


if __name__ == "__main__":
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    sys.exit(main())
