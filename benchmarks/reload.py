"""Layout hot reload latency: from the start of a save to the core's ``layout`` event.

A temporary show with a 16-speaker ring and 8 sources; a LiveCore and a LayoutWatcher
(both backends: watchfiles if installed, and the polling fallback); ``--saves`` saves of a
changed layout per backend and save style (truncate + write in place, and temp file +
rename), a pause between saves so each is its own change. Prints p50 / p99 / max of the
save -> event time in ms. Target (issue 3): save -> new gains at most 300 ms.

With ``--audio`` a real audio child (virtual backend: the engine in real time) is
attached and the time until the child reports running the new layout is printed too.

    python benchmarks/reload.py [--saves 50] [--audio] [--interval 0.1]
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse
import asyncio
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "server"))


def ring(n: int, rot: float) -> dict:
    return {
        "name": "ring",
        "panner": "vbap",
        "speakers": [
            {"id": f"R{k + 1}", "output": k + 1, "azimuth": round((360.0 * k / n + rot + 180) % 360 - 180, 3), "distance": 3.0}
            for k in range(n)
        ],
    }


def save(path: Path, data: dict, how: str) -> None:
    text = json.dumps(data, indent=1)
    if how == "in-place":
        with open(path, "w", encoding="utf-8") as f:
            f.write(text)
    else:
        tmp = path.with_name(f".{path.name}.tmp")
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, path)


def pct(xs, q):
    return float(np.percentile(np.asarray(xs), q)) if xs else float("nan")


async def measure(folder: Path, backend: str, how: str, saves: int, interval: float, audio: bool, speakers: int):
    from fieldmix.live.core import LiveCore
    from fieldmix.live.reload import LayoutWatcher
    from fieldmix.show import load_show

    core = LiveCore(load_show(folder / "show.json"))
    link = None
    if audio:
        from fieldmix.audio.link import AudioLink

        link = AudioLink(core.state, backend="virtual", blocksize=128, inputs="files")
        link.start()
        core.link = link
    path = folder / "ring.json"
    got = asyncio.Event()
    stamp = {}

    def on(e):
        if e.get("type") == "layout" and e.get("origin") == "reload":
            stamp["t"] = time.monotonic()
            got.set()
        elif e.get("type") == "error":
            print("  error:", e["error"]["message"])

    core.add_listener(on)
    events, applied = [], []
    watcher = LayoutWatcher(core, interval=interval, backend=backend)
    await watcher.start()
    try:
        for i in range(saves):
            got.clear()
            await asyncio.sleep(0.15 + 0.05 * (i % 3))  # idle between saves, phases vary
            t0 = time.monotonic()
            save(path, ring(speakers, rot=(i + 1) * 1.5), how)
            try:
                await asyncio.wait_for(got.wait(), 5.0)
            except asyncio.TimeoutError:
                print(f"  save {i}: no reload within 5 s")
                continue
            events.append((stamp["t"] - t0) * 1000)
            if link is not None:
                gen = link.status()["layout_generation"]
                deadline = time.monotonic() + 5.0
                while time.monotonic() < deadline:
                    link.poll()
                    m = link.meters()
                    if m["valid"] and m["layout_generation"] >= gen:
                        applied.append((time.monotonic() - t0) * 1000)
                        break
                    await asyncio.sleep(0.002)
    finally:
        await watcher.stop()
        if link is not None:
            link.fade_out_and_stop()
    return events, applied


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--saves", type=int, default=50)
    ap.add_argument("--interval", type=float, default=0.1, help="poll backend period, s")
    ap.add_argument("--speakers", type=int, default=16)
    ap.add_argument("--audio", action="store_true", help="attach a virtual audio child and time the child's switch too")
    a = ap.parse_args()

    from fieldmix.live.reload import watchfiles_available

    backends = (["watchfiles"] if watchfiles_available() else []) + ["poll"]
    with tempfile.TemporaryDirectory(prefix="fieldmix-reload-") as d:
        folder = Path(d)
        (folder / "ring.json").write_text(json.dumps(ring(a.speakers, 0.0)), encoding="utf-8")
        sources = [{"id": f"s{k + 1}", "input": k + 1, "azimuth": 45 * k - 180 + 1, "distance": 3} for k in range(8)]
        if a.audio:
            import soundfile as sf

            t = np.arange(48000 * 2) / 48000
            sf.write(str(folder / "tone.wav"), (0.1 * np.sin(2 * np.pi * 440 * t)).astype(np.float32), 48000)
            for s in sources:
                s["file"] = "tone.wav"
        (folder / "show.json").write_text(json.dumps({"layout": "ring.json", "sources": sources}), encoding="utf-8")
        print(f"{a.saves} saves per row, {a.speakers} speakers, 8 sources, poll interval {a.interval} s; ms from save start")
        print(f"{'backend':<11} {'save':<9} {'event p50':>9} {'p99':>7} {'max':>7}" + (f" {'audio p50':>10} {'p99':>7} {'max':>7}" if a.audio else ""))
        for backend in backends:
            for how in ("in-place", "rename"):
                ev, ap_ = asyncio.run(measure(folder, backend, how, a.saves, a.interval, a.audio, a.speakers))
                line = f"{backend:<11} {how:<9} {pct(ev, 50):9.1f} {pct(ev, 99):7.1f} {max(ev, default=float('nan')):7.1f}"
                if a.audio:
                    line += f" {pct(ap_, 50):10.1f} {pct(ap_, 99):7.1f} {max(ap_, default=float('nan')):7.1f}"
                print(line + (f"   ({len(ev)}/{a.saves} seen)" if len(ev) != a.saves else ""))
    return 0


if __name__ == "__main__":
    sys.exit(main())
