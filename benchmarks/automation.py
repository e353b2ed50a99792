"""64 sources in simultaneous fades or motions at the 100 Hz control rate.

Prints tables; asserts nothing. Two parts:

``ticks`` (in this process)
    A generated show of 64 sources on a 32-speaker VBAP ring, a ``LiveCore`` without
    audio. Three runs of 1,000 ticks on a simulated 10 ms clock: a cue that fades all 64
    azimuths (and gains) at once; 64 orbits; 64 orbits while that cue fades their gains.
    Each tick is what the live ticker does: the cue runner, the motions, applying the
    commands to the state (events to listeners, none here), plus the target push the core
    makes after it (``target_matrix``: the moved sources' pan rows). Reported: microseconds
    per tick (mean, p99, max) of wall time and of this thread's CPU time, and the share of a
    core at 100 ticks a second.
``live`` (needs JACK)
    ``python -m fieldmix serve`` on a private JACK dummy server (64 inputs, 32 outputs) at
    each ``--blocks`` size: an idle run, then a run with 64 orbits started over OSC, then
    a run with a cue fading all 64 sources over the run's length. Deadline misses
    (callbacks missing against those expected, plus xrun-flagged callbacks) and the
    control and audio processes' CPU, from GET /api/state before and after each run.

    python benchmarks/automation.py                        # both parts, 30 s live runs at 256 and 512
    python benchmarks/automation.py --parts ticks
    python benchmarks/automation.py --parts live --blocks 128,512 --seconds 60
"""

from __future__ import annotations

import argparse
import json
import os
import socket
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from live import DaemonProc, child_env, cpu_seconds, pct, steal_ticks  # noqa: E402

N_SRC = 64
N_SPK = 32
SR = 48000
GLIDE_MS = 30.0


def write_show(folder: Path, fade_s: float) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    ring = {"name": "bench ring 32", "panner": "vbap", "speakers": [
        {"id": f"R{k + 1}", "output": k + 1, "azimuth": round((360.0 * k / N_SPK + 180.0) % 360.0 - 180.0, 4), "distance": 3.0}
        for k in range(N_SPK)]}  # fmt: skip
    (folder / "ring.json").write_text(json.dumps(ring))
    sources = [{"id": f"s{k + 1}", "input": k + 1, "azimuth": round((360.0 * k / N_SRC + 180.0) % 360.0 - 180.0, 3),
                "distance": 2.5} for k in range(N_SRC)]  # fmt: skip
    cues = [
        {"number": 1, "name": "all 64 turn and fade", "fade": fade_s, "shape": "s_curve",
         "targets": {f"s{k + 1}": {"azimuth": round(((360.0 * k / N_SRC) + 170.0 + 180.0) % 360.0 - 180.0, 3),
                                   "gain_db": -12} for k in range(N_SRC)}},
        {"number": 2, "name": "64 gains down", "fade": fade_s,
         "targets": {f"s{k + 1}": {"gain_db": -18} for k in range(N_SRC)}},
    ]  # fmt: skip
    show = {"name": "automation benchmark", "layout": "ring.json", "glide_ms": GLIDE_MS, "samplerate": SR,
            "sources": sources, "cues": cues}  # fmt: skip
    (folder / "show.json").write_text(json.dumps(show))
    return folder / "show.json"


# ============================================================================ ticks
def tick_part(n_ticks: int) -> list:
    from fieldmix.live.core import LiveCore
    from fieldmix.show import load_show

    rows = []
    for name in ("cue: 64 azimuth + gain fades", "64 orbits", "64 orbits + a 64-gain cue fade"):
        with tempfile.TemporaryDirectory() as tmp:
            core = LiveCore(load_show(write_show(Path(tmp), fade_s=n_ticks / 100.0)))
            a = core.automation
            t = [1000.0]
            a.clock = lambda: t[0]
            core.flush()  # the first full pan matrix, outside the measurement
            if "orbits" in name:
                core.apply_message("/source/*/motion/orbit", [2.5, 8.0])
            if "cue" in name:
                core.apply_message("/cue/go", [1 if name.startswith("cue") else 2])
            wall, cpu = [], []
            for k in range(n_ticks):
                t[0] += 0.01
                w0, c0 = time.perf_counter(), time.thread_time()
                a.tick()
                core.flush()  # what the core's coalesced push does after the tick
                wall.append(time.perf_counter() - w0)
                cpu.append(time.thread_time() - c0)
            moved = core.applied
            rows.append((name, wall, cpu, dict(moved)))
    return rows


# ============================================================================ live
def live_part(blocks: list, seconds: float) -> list:
    from fieldmix.audio.jackutil import JackServer, jack_available
    from fieldmix.oscwire import encode_message

    missing = jack_available()
    if missing:
        print(f"JACK is not installed ({missing}): no live part")
        return []
    out = []
    with tempfile.TemporaryDirectory(prefix="fieldmix-auto-bench-") as tmp:
        folder = Path(tmp)
        show = write_show(folder / "show", fade_s=seconds)
        for block in blocks:
            srv = JackServer(name=f"fmauto{os.getpid()}", samplerate=SR, period=block, capture=N_SRC, playback=N_SPK,
                             log_path=folder / f"jackd-{block}.log")  # fmt: skip
            d = None
            try:
                srv.start()
                env = child_env(srv.env())
                args = ["serve", str(show), "--device", "system", "--blocksize", str(block), "--osc-port", "0",
                        "--http-port", "0", "--fresh", "--no-advertise", "--state", str(folder / f"state-{block}.json")]  # fmt: skip
                d = DaemonProc(args, env, folder, f"auto-{block}").wait_ready()
                deadline = time.monotonic() + 30
                while time.monotonic() < deadline:
                    a = d.audio()
                    if a.get("state") == "running" and a.get("callbacks_seen", 0) > 0:
                        break
                    time.sleep(0.2)
                time.sleep(2.0)
                sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
                for load in ("idle", "64 orbits", "64-source cue fade"):
                    if load == "64 orbits":
                        sock.sendto(encode_message("/source/*/motion/orbit", [2.5, 8.0]), ("127.0.0.1", d.osc_port))
                    elif load == "64-source cue fade":
                        sock.sendto(encode_message("/source/*/motion/stop", []), ("127.0.0.1", d.osc_port))
                        time.sleep(0.5)
                        sock.sendto(encode_message("/cue/go", [1]), ("127.0.0.1", d.osc_port))
                    time.sleep(0.5)
                    s0 = d.state()
                    c0 = (cpu_seconds(d.pid), cpu_seconds(s0["status"]["audio"].get("pid")))
                    st0, tt0 = steal_ticks()
                    t0 = time.monotonic()
                    time.sleep(seconds)
                    s1 = d.state()
                    t1 = time.monotonic()
                    st1, tt1 = steal_ticks()
                    c1 = (cpu_seconds(d.pid), cpu_seconds(s1["status"]["audio"].get("pid")))
                    a0, a1 = s0["status"]["audio"], s1["status"]["audio"]
                    seen = a1["callbacks_seen"] - a0["callbacks_seen"]
                    exp = a1["callbacks_expected"] - a0["callbacks_expected"]
                    m0, m1 = s0["status"]["messages"]["applied"], s1["status"]["messages"]["applied"]
                    au = s1["status"]["automation"]
                    row = {"block": block, "load": load, "seen": seen, "expected": exp, "missed": max(0, exp - seen),
                           "flagged": a1["xruns_flagged"] - a0["xruns_flagged"],
                           "cpu_control": 100 * (c1[0] - c0[0]) / (t1 - t0), "cpu_audio": 100 * (c1[1] - c0[1]) / (t1 - t0),
                           "steal": 100 * (st1 - st0) / max(1, tt1 - tt0),
                           "applied": {k: m1.get(k, 0) - m0.get(k, 0) for k in m1 if m1.get(k, 0) != m0.get(k, 0)},
                           "tick_ms_mean": au.get("tick_ms_mean"), "tick_ms_max": au.get("tick_ms_max")}  # fmt: skip
                    out.append(row)
                    print(f"  block {block} {load:<20} seen {seen}/{exp} missed {row['missed']} flagged {row['flagged']} "
                          f"cpu {row['cpu_control']:.0f}/{row['cpu_audio']:.0f}% steal {row['steal']:.1f}% "
                          f"applied {row['applied']} tick mean {row['tick_ms_mean']} ms", flush=True)  # fmt: skip
                sock.close()
            finally:
                if d is not None:
                    d.stop()
                srv.stop()
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--parts", default="ticks,live")
    ap.add_argument("--ticks", type=int, default=1000)
    ap.add_argument("--blocks", default="256,512")
    ap.add_argument("--seconds", type=float, default=30.0)
    a = ap.parse_args()
    parts = {p.strip() for p in a.parts.split(",")}
    print(f"automation benchmark: {N_SRC} sources, {N_SPK}-speaker VBAP ring, 100 Hz control rate", flush=True)
    if "ticks" in parts:
        rows = tick_part(a.ticks)
        print(f"\n## Control ticks ({a.ticks} ticks of 10 ms each, in process; tick + the target push)")
        print("| run | wall µs/tick mean / p99 / max | CPU µs/tick mean | share of a core at 100 Hz | commands applied |")
        print("|---|---|---|---|---|")
        for name, wall, cpu, applied in rows:
            w = [x * 1e6 for x in wall]
            c = [x * 1e6 for x in cpu]
            print(f"| {name} | {sum(w) / len(w):.0f} / {pct(w, 99):.0f} / {max(w):.0f} | {sum(c) / len(c):.0f} | "
                  f"{sum(c) / len(c) * 100 / 1e6 * 100:.1f} % | {applied} |")  # fmt: skip
    if "live" in parts:
        blocks = [int(b) for b in a.blocks.split(",") if b.strip()]
        print(f"\n## Live: deadline misses while 64 sources move ({a.seconds:g} s runs)", flush=True)
        rows = live_part(blocks, a.seconds)
        if rows:
            print("| block | run | callbacks seen / expected | missed | flagged | CPU control / audio % | steal % | tick ms mean / max |")
            print("|---|---|---|---|---|---|---|---|")
            for r in rows:
                print(f"| {r['block']} | {r['load']} | {r['seen']} / {r['expected']} | {r['missed']} | {r['flagged']} | "
                      f"{r['cpu_control']:.0f} / {r['cpu_audio']:.0f} | {r['steal']:.1f} | {r['tick_ms_mean']} / {r['tick_ms_max']} |")  # fmt: skip
    return 0


if __name__ == "__main__":
    sys.exit(main())
