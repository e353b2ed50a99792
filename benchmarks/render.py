"""Offline render speed: 60 s of 32 sources to 32 speakers, against sox in the same run.

sox does the equivalent static mix: `sox -M` merges the 32 mono source files and `remix`
sends every input to every output with a fixed gain (a 32 x 32 matrix). fieldmix renders
the same sources through a 32-speaker ring with VBAP (gains computed once, no script).
Both write 32-channel float WAV files to a temporary folder. Prints both times and the ratio.

    python benchmarks/render.py [--seconds 60] [--sources 32]
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse
import json
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import soundfile as sf

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "server"))


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=60.0)
    ap.add_argument("--sources", type=int, default=32)
    ap.add_argument("--speakers", type=int, default=32)
    ap.add_argument("--blocksize", type=int, default=1024)
    ap.add_argument("--repeats", type=int, default=3)
    a = ap.parse_args()

    from fieldmix.render import render
    from fieldmix.show import load_show

    sr = 48000
    n = int(a.seconds * sr)
    tmp = Path(tempfile.mkdtemp(prefix="fieldmix-bench-"))
    try:
        rng = np.random.default_rng(7)
        names = []
        for i in range(a.sources):
            x = (0.1 * rng.standard_normal(n)).astype(np.float32)
            name = f"s{i + 1}.wav"
            sf.write(str(tmp / name), x, sr, subtype="FLOAT")
            names.append(name)
        layout = {
            "panner": "vbap",
            "speakers": [
                {"output": k + 1, "azimuth": (360.0 * k / a.speakers + 180) % 360 - 180, "distance": 2.0}
                for k in range(a.speakers)
            ],
        }
        show = {
            "layout": "ring.json",
            "sources": [
                {"id": f"src{i + 1}", "input": i + 1, "file": names[i], "azimuth": (i * 37.0) % 360 - 180, "spread": 30}
                for i in range(a.sources)
            ],
        }
        (tmp / "ring.json").write_text(json.dumps(layout))
        (tmp / "show.json").write_text(json.dumps(show))
        loaded = load_show(tmp / "show.json")

        def run_fieldmix():
            render(loaded, tmp / "fm.wav", blocksize=a.blocksize)

        rng2 = np.random.default_rng(3)
        gains = rng2.uniform(0.0, 0.2, size=(a.speakers, a.sources))
        remix = [",".join(f"{i + 1}v{gains[o, i]:.4f}" for i in range(a.sources)) for o in range(a.speakers)]
        sox = shutil.which("sox")
        sox_cmd = [sox, "-M", *[str(tmp / nm) for nm in names], "-e", "floating-point", "-b", "32",
                   str(tmp / "sox.wav"), "remix", *remix] if sox else None

        def run_sox():
            subprocess.run(sox_cmd, check=True, capture_output=True)

        def best(fn):
            ts = []
            for _ in range(a.repeats):
                t0 = time.perf_counter()
                fn()
                ts.append(time.perf_counter() - t0)
            return min(ts)

        t_fm = best(run_fieldmix)
        print(f"render {a.seconds:.0f} s, {a.sources} sources -> {a.speakers} speakers, block {a.blocksize}")
        print(f"  fieldmix render : {t_fm:7.2f} s  ({a.seconds / t_fm:6.1f}x realtime)")
        if sox_cmd:
            t_sox = best(run_sox)
            print(f"  sox -M + remix  : {t_sox:7.2f} s  ({a.seconds / t_sox:6.1f}x realtime)")
            print(f"  ratio fieldmix/sox time: {t_fm / t_sox:.2f} (below 1 = faster than sox)")
        else:
            print("  sox not installed: no comparison (./dev.sh bench installs it as root)")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
