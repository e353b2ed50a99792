"""Time to recompute every gain of 64 sources on a 64-speaker 3-D layout.

Prints the median (and 10th/90th percentiles) of many repeats of
PanningContext.gains for each panner at spread 0 and 30 degrees.
Target (issue): at most 1 ms per call at spread 0.
Then, for vbap, the 3-D point gains of all spread-30 virtual directions (64 x 97)
with the face lookup against the search over every triangle, in the same run.

    python benchmarks/panning.py [--repeats N] [--sources S]
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # before numpy is imported
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import argparse  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from fieldmix import geometry  # noqa: E402
from fieldmix.model import Layout, Speaker  # noqa: E402
from fieldmix.panning import PanningContext  # noqa: E402


def dome(n: int = 64, seed: int = 1) -> Layout:
    """A generated dome: n speakers spread evenly (Fibonacci lattice) over the
    upper half sphere, elevation 0..~80 deg, at 3..5 m; no speaker below, so
    vbap uses a virtual nadir."""
    rng = np.random.default_rng(seed)
    k = np.arange(n)
    z = (k + 0.5) / n * 0.98  # sin(elevation) in [0, 0.98)
    el = np.degrees(np.arcsin(z))
    el[: n // 4] = 0.0  # a full ear-level ring (pairwise needs one)
    golden = np.pi * (3.0 - np.sqrt(5.0))
    az = geometry.wrap_deg(np.degrees(k * golden))
    dist = rng.uniform(3.0, 5.0, n)
    spk = []
    for i in range(n):
        p = geometry.sph_to_cart(az[i], el[i], dist[i])
        spk.append(Speaker(index=i, id=f"D{i + 1}", output=i + 1, position=tuple(float(v) for v in p),
                           azimuth=float(az[i]), elevation=float(el[i]), distance=float(dist[i])))
    return Layout(name="generated-dome-64", speakers=tuple(spk), panner="vbap")


def bench(fn, repeats: int) -> tuple[float, float, float]:
    for _ in range(20):
        fn()
    t = np.empty(repeats)
    for r in range(repeats):
        t0 = time.perf_counter()
        fn()
        t[r] = time.perf_counter() - t0
    return tuple(np.percentile(t, [50, 10, 90]) * 1e3)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=300)
    ap.add_argument("--sources", type=int, default=64)
    args = ap.parse_args()
    layout = dome()
    ctx = PanningContext(layout)
    rng = np.random.default_rng(7)
    s = args.sources
    az = rng.uniform(-180, 180, s)
    el = np.degrees(np.arcsin(rng.uniform(-0.2, 1.0, s)))
    pos = geometry.sph_to_cart(az, el, rng.uniform(2.0, 8.0, s))
    import scipy.spatial  # noqa: F401  (imported on first use by vbap; not part of the preparation time)

    prep = {}
    for kind in ("pairwise", "vbap", "dbap"):
        t0 = time.perf_counter()
        ctx.check(kind)
        prep[kind] = (time.perf_counter() - t0) * 1e3
    mesh = ctx.vbap_mesh()
    print(f"layout: {layout.name}, {len(layout.speakers)} speakers; vbap: {mesh.triangles.shape[0]} triplets, "
          f"{mesh.virtual.shape[0]} virtual speaker(s)")
    print("preparation (once per layout): " + ", ".join(f"{k} {v:.1f} ms" for k, v in prep.items()))
    print(f"{s} sources, {args.repeats} repeats, OPENBLAS_NUM_THREADS={os.environ['OPENBLAS_NUM_THREADS']}")
    print(f"{'kind':<9} {'spread':>6}  {'median ms':>9}  {'p10':>6}  {'p90':>6}")
    for kind in ("pairwise", "vbap", "dbap"):
        for spread in (0.0, 30.0):
            sp = np.full(s, spread)
            med, lo, hi = bench(lambda: ctx.gains(pos, sp, kind), args.repeats)
            print(f"{kind:<9} {spread:>6.0f}  {med:>9.3f}  {lo:>6.3f}  {hi:>6.3f}")
    from fieldmix.panning import cone_directions, vbap3d_gains

    lk = mesh.lookup
    print(f"vbap face lookup: {lk.cand.shape[0]} cells ({lk.grid} x {lk.grid} per cube face), "
          f"up to {lk.cand.shape[1]} candidates per cell, {int(lk.overflow.sum())} cell(s) always searched in full")
    dirs, _ = cone_directions(geometry.unit(pos), np.full(s, 30.0))
    dirs = dirs.reshape(-1, 3)
    print(f"vbap3d_gains for {dirs.shape[0]} directions (spread 30):")
    for label, exhaustive in (("every triangle", True), ("face lookup", False)):
        med, lo, hi = bench(lambda: vbap3d_gains(mesh, dirs, exhaustive=exhaustive), args.repeats)
        print(f"  {label:<15} median {med:.3f} ms  p10 {lo:.3f}  p90 {hi:.3f}")
    diff = np.max(np.abs(vbap3d_gains(mesh, dirs) - vbap3d_gains(mesh, dirs, exhaustive=True)))
    print(f"  largest difference between the two: {diff:.1e}")


if __name__ == "__main__":
    main()
