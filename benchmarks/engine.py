"""Benchmark of the DSP engine (fieldmix.engine.Engine) on one core.

Prints, for sources x speakers and block sizes at 48 kHz, the median time of
one block in microseconds, the realtime factor (block duration / time) and the
ratio to a floor measured in the same run: the two bare numpy products of the
same shapes (x @ G and x @ dG) that a ramped block needs at least.

Modes:
  static    gains at their target (one product per block)
  ramp      a ramp running in every block, with a new target every block
            (set_target + process timed together: the worst case)
  glide     a ramp running in every block without new targets (a long glide)

Each row times the numpy and the numba elementwise paths (see docs/engine.md) in the
same loop as the floor, when numba imports (--kernels picks one).

Usage:  python benchmarks/engine.py            # the full table
        python benchmarks/engine.py --quick    # fewer blocks per figure
        python benchmarks/engine.py --layouts 64x64 --blocks 64 --features
"""

from __future__ import annotations

import os

# The engine runs on one core inside the audio child: measure it that way.
# (Must be set before numpy is imported.)
os.environ["OPENBLAS_NUM_THREADS"] = "1"
os.environ["OMP_NUM_THREADS"] = "1"
os.environ["MKL_NUM_THREADS"] = "1"

import argparse  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "server"))

import numpy as np  # noqa: E402

from fieldmix import _kernels  # noqa: E402
from fieldmix.engine import Engine  # noqa: E402

SR = 48000
LAYOUTS = ((8, 8), (32, 32), (64, 64), (128, 64))
BLOCKS = (32, 64, 128, 256, 1024)
WARMUP_S = 0.3  # the first few hundred blocks after a start run at half speed here


def _median_us(samples_ns) -> float:
    return float(np.median(np.asarray(samples_ns, dtype=np.float64))) / 1000.0


def _make_engine(n_in, n_out, block, glide_ms=30.0, **kw) -> Engine:
    return Engine(n_in, n_out, SR, max_block=max(block, 4096), glide_ms=glide_ms,
                  fade_in_ms=0.0, **kw)


def _engine_for(kernels, n_in, n_out, block, glide_ms, engine_kw):
    old = os.environ.get("FIELDMIX_KERNELS")
    os.environ["FIELDMIX_KERNELS"] = kernels
    try:
        eng = _make_engine(n_in, n_out, block, glide_ms=glide_ms, **engine_kw)
    finally:
        if old is None:
            os.environ.pop("FIELDMIX_KERNELS", None)
        else:
            os.environ["FIELDMIX_KERNELS"] = old
    assert eng.kernels == kernels
    return eng


def bench_case(n_in, n_out, block, mode, n_blocks, rng, direct=False, engine_kw=None, kernels=("numpy",)):
    """Median microseconds per block for each engine (one per kernel kind) and the floor, interleaved.

    Returns ({kernels: us}, floor_us).
    """
    engine_kw = dict(engine_kw or {})
    glide = 30.0 if mode != "glide" else 600000.0  # "glide": one ramp that outlasts the run
    engines = [_engine_for(k, n_in, n_out, block, glide, engine_kw) for k in kernels]
    cols = n_out + (1 if engine_kw.get("sub_outputs") else 0)
    x = (rng.standard_normal((block, n_in)) * 0.05).astype(np.float32)
    g_a = rng.uniform(0.0, 0.1, (n_in, cols))
    g_b = rng.uniform(0.0, 0.1, (n_in, cols))
    for eng in engines:
        eng.set_target(g_a)
        if mode == "glide":
            eng.process(x)
            eng.set_target(g_b)
    # floor: the two bare products of the same shapes
    xf = np.ascontiguousarray(x)
    G = np.ascontiguousarray(g_a[:, :n_out], dtype=np.float32)
    dG = np.ascontiguousarray(g_b[:, :n_out], dtype=np.float32)
    yf = np.empty((block, n_out), dtype=np.float32)

    def make_block(eng):
        buf = eng.input_buffer(block) if direct else None

        def engine_block(i):
            if mode == "ramp":
                eng.set_target(g_a if i & 1 else g_b)
            if direct:
                np.copyto(buf, xf)
                return eng.process(buf)
            return eng.process(xf)
        return engine_block

    blocks = [make_block(e) for e in engines]

    def floor_block():
        np.matmul(xf, G, out=yf)
        np.matmul(xf, dG, out=yf)

    i = 0
    t_end = time.perf_counter() + WARMUP_S
    while time.perf_counter() < t_end or i < 50:  # warm-up: caches, page faults, clock
        for b in blocks:
            b(i)
        floor_block()
        i += 1
    t_eng = [[] for _ in engines]
    t_floor = []
    pc = time.perf_counter_ns
    for i in range(n_blocks):
        for k, b in enumerate(blocks):  # interleaved: each engine, then the floor, every block
            t0 = pc()
            b(i)
            t_eng[k].append(pc() - t0)
        t1 = pc()
        floor_block()
        t_floor.append(pc() - t1)
    for eng in engines:
        if mode == "static":
            assert not eng.ramping, "static case must not ramp"
        else:
            assert eng.ramping, "ramp case must ramp"
    return {k: _median_us(t) for k, t in zip(kernels, t_eng)}, _median_us(t_floor)


def _kernel_kinds(args):
    if args.kernels:
        return tuple(args.kernels)
    return ("numpy", "numba") if _kernels.available() else ("numpy",)


def run_engine_table(args, rng) -> None:
    layouts = [tuple(int(v) for v in s.split("x")) for s in args.layouts] if args.layouts else LAYOUTS
    blocks = [int(b) for b in args.blocks] if args.blocks else BLOCKS
    modes = args.modes or ("static", "ramp", "glide")
    kinds = _kernel_kinds(args)
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"engine: one core, {SR} Hz, median of {args.n} blocks; floor = x@G + x@dG (two bare numpy products); "
          f"numpy {np.__version__}, load average {load:.2f} on {os.cpu_count()} cores")
    if "numba" in kinds:
        import numba
        _kernels.warm_up()
        print(f"numba {numba.__version__}: kernels compiled/loaded in {_kernels.compile_seconds or 0.0:.2f} s "
              f"(first engine of this run)")
    print(f"input {'written into eng.input_buffer() then process(buf)' if args.direct else 'passed to process(x) (copied in)'}; "
          f"engines of each row timed interleaved with the floor, block by block")
    hdr = f"{'layout':>8} {'block':>5} {'mode':>6} {'kernels':>7} | {'us/block':>9} {'x realtime':>10} | {'floor us':>8} {'engine/floor':>12}"
    print(hdr)
    print("-" * len(hdr))
    for n_in, n_out in layouts:
        for block in blocks:
            for mode in modes:
                res, fl = bench_case(n_in, n_out, block, mode, args.n, rng, direct=args.direct, kernels=kinds)
                for k in kinds:
                    us = res[k]
                    rt = block / SR * 1e6 / us
                    print(f"{n_in:>3}x{n_out:<4} {block:>5} {mode:>6} {k:>7} | {us:9.1f} {rt:10.1f} | "
                          f"{fl:8.1f} {us / fl:12.2f}", flush=True)


def run_features(args, rng) -> None:
    """Cost of the optional parts: delays, the sub bus, a delay crossfade, the limiter."""
    layouts = [tuple(int(v) for v in s.split("x")) for s in args.layouts] if args.layouts else ((64, 64),)
    blocks = [int(b) for b in args.blocks] if args.blocks else (64, 256)
    kinds = _kernel_kinds(args)
    print()
    print("features (mode ramp, new target every block; delays and limiter rows: default kernels):")
    hdr = f"{'layout':>8} {'block':>5} {'case':>22} | {'us/block':>9} {'x realtime':>10} | {'floor us':>8} {'engine/floor':>12}"
    print(hdr)
    print("-" * len(hdr))
    for n_in, n_out in layouts:
        for block in blocks:
            cases = {
                "plain": {},
                "sub bus (1 sub)": {"sub_outputs": (n_out - 1,)},
            }
            for name, kw in cases.items():
                res, fl = bench_case(n_in, n_out, block, "ramp", args.n, rng, engine_kw=kw, kernels=kinds)
                for k, us in res.items():
                    print(f"{n_in:>3}x{n_out:<4} {block:>5} {name + ' ' + k:>22} | {us:9.1f} "
                          f"{block / SR * 1e6 / us:10.1f} | {fl:8.1f} {us / fl:12.2f}", flush=True)
            us, fl = _bench_delays(n_in, n_out, block, args.n, rng)
            print(f"{n_in:>3}x{n_out:<4} {block:>5} {'delays (all differ)':>22} | {us:9.1f} "
                  f"{block / SR * 1e6 / us:10.1f} | {fl:8.1f} {us / fl:12.2f}", flush=True)
            us, fl = _bench_limiter(n_in, n_out, block, args.n, rng)
            print(f"{n_in:>3}x{n_out:<4} {block:>5} {'limiter acting':>22} | {us:9.1f} "
                  f"{block / SR * 1e6 / us:10.1f} | {fl:8.1f} {us / fl:12.2f}", flush=True)


def _bench_delays(n_in, n_out, block, n_blocks, rng):
    eng = _make_engine(n_in, n_out, block)
    eng.set_delays(np.arange(n_out) * 7 % 400)
    x = (rng.standard_normal((block, n_in)) * 0.05).astype(np.float32)
    g = [rng.uniform(0, 0.1, (n_in, n_out)) for _ in range(2)]
    G = g[0].astype(np.float32)
    yf = np.empty((block, n_out), np.float32)
    for i in range(max(50, 2 * 24000 // block)):  # fill the ring, finish the delay crossfade
        eng.set_target(g[i & 1])
        eng.process(x)
    te, tf = [], []
    pc = time.perf_counter_ns
    for i in range(n_blocks):
        t0 = pc()
        eng.set_target(g[i & 1])
        eng.process(x)
        t1 = pc()
        np.matmul(x, G, out=yf)
        np.matmul(x, G, out=yf)
        t2 = pc()
        te.append(t1 - t0)
        tf.append(t2 - t1)
    return _median_us(te), _median_us(tf)


def _bench_limiter(n_in, n_out, block, n_blocks, rng):
    eng = _make_engine(n_in, n_out, block)
    x = (rng.standard_normal((block, n_in)) * 3.0).astype(np.float32)  # far over the ceiling
    g = [rng.uniform(0, 0.5, (n_in, n_out)) for _ in range(2)]
    G = g[0].astype(np.float32)
    yf = np.empty((block, n_out), np.float32)
    for i in range(50):
        eng.set_target(g[i & 1])
        eng.process(x)
    te, tf = [], []
    pc = time.perf_counter_ns
    for i in range(n_blocks):
        t0 = pc()
        eng.set_target(g[i & 1])
        eng.process(x)
        t1 = pc()
        np.matmul(x, G, out=yf)
        np.matmul(x, G, out=yf)
        t2 = pc()
        te.append(t1 - t0)
        tf.append(t2 - t1)
    assert eng.limiter_active
    return _median_us(te), _median_us(tf)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="fewer blocks per figure (noisier)")
    ap.add_argument("-n", type=int, default=None, help="blocks per figure (default 2000, --quick 400)")
    ap.add_argument("--layouts", nargs="*", help="e.g. 8x8 64x64 (default: 8x8 32x32 64x64 128x64)")
    ap.add_argument("--blocks", nargs="*", help="block sizes (default: 32 64 128 256 1024)")
    ap.add_argument("--modes", nargs="*", choices=("static", "ramp", "glide"), help="default: all three")
    ap.add_argument("--kernels", nargs="*", choices=("numpy", "numba"),
                    help="elementwise paths to time, interleaved (default: both when numba imports)")
    ap.add_argument("--direct", action="store_true",
                    help="write the input into eng.input_buffer() and process it (as the audio callback can)")
    ap.add_argument("--features", action="store_true", help="also time delays, the sub bus and the limiter")
    ap.add_argument("--no-engine", action="store_true", help="skip the engine table")
    # Further sections (the lead's --render comparison, ...) get their flag here and
    # their call in main() below, next to the engine sections.
    args = ap.parse_args(argv)
    if args.n is None:
        args.n = 400 if args.quick else 2000
    rng = np.random.default_rng(1)

    # ---- section: engine (this file's part) ----
    if not args.no_engine:
        run_engine_table(args, rng)
    if args.features:
        run_features(args, rng)
    # ---- further sections go here ----
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
