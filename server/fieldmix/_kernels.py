"""fieldmix._kernels -- optional compiled elementwise kernels for the engine (numba).

The engine's big matrix product stays in BLAS (``np.matmul`` with ``out=``).
Everything elementwise around it is fused here into two compiled calls per block:

* ``block_in``: input copy into the block buffer Z, the ramp weights ``w*x``,
  the finite/range check with the fix-up (non-finite -> 0, clamp to +-limit),
  and the input meters (RMS, sample peak);
* ``block_out``: the output meters and the largest output peak (for the ceiling);
* ``target_in`` (``set_target``: check and copy in one pass) and ``bank_update`` (the
  3x3 update of the gain banks, elementwise: OpenBLAS is slow for that shape).

Which kernels an Engine uses is chosen when it is built (``choose()``): the
environment variable ``FIELDMIX_KERNELS`` = ``numba`` | ``numpy`` forces one; unset
(or ``auto``) means numba if it imports, else the pure-numpy code in engine.py.
Both give the same results within float32 rounding (the tests run both).

Compilation happens in ``warm_up()`` (called by the Engine constructor), never on an
audio block.  ``cache=True`` keeps the machine code on disk: numba writes it next to
this file, or, when the package directory is read-only, in its user-wide cache
directory (``NUMBA_CACHE_DIR`` overrides both).
"""

from __future__ import annotations

import os
import time

import numpy as np

from .errors import ConfigError

__all__ = ["available", "choose", "warm_up", "block_in", "block_out", "bank_update", "target_in", "compile_seconds", "IMPORT_ERROR"]

IMPORT_ERROR: str | None = None
try:  # numba is optional: the engine has a pure-numpy path
    from numba import njit
except Exception as exc:  # ImportError, or a numba that refuses this numpy
    njit = None
    IMPORT_ERROR = f"{type(exc).__name__}: {exc}"

block_in = None
block_out = None
bank_update = None
target_in = None
compile_seconds: float | None = None  # time of the first warm_up (compile or cache load)
_warm = False
_failed: str | None = None  # why warm_up failed, if it did


def available() -> bool:
    return njit is not None


def choose(want: str | None = None) -> str:
    """'numba' or 'numpy' for ``want`` (numba|numpy|auto; None: FIELDMIX_KERNELS, default auto).

    Choosing numba compiles the kernels (first call in a process only); if that fails,
    auto falls back to numpy and an explicit numba raises ConfigError.
    """
    if want is None:
        want = os.environ.get("FIELDMIX_KERNELS", "auto")
    want = str(want).strip().lower() or "auto"
    if want not in ("auto", "numba", "numpy"):
        raise ConfigError("FIELDMIX_KERNELS", f"must be numba, numpy or auto, got {want!r}")
    if want == "numpy":
        return "numpy"
    if njit is None:
        if want == "numba":
            raise ConfigError("FIELDMIX_KERNELS", f"numba was asked for but does not import ({IMPORT_ERROR})")
        return "numpy"
    global _failed
    if _failed is None:
        try:
            warm_up()  # compile (or load) now, in the constructor, never on an audio block
        except Exception as exc:  # a numba that cannot compile here: keep the numpy path
            _failed = f"{type(exc).__name__}: {exc}"
    if _failed is not None:
        if want == "numba":
            raise ConfigError("FIELDMIX_KERNELS", f"numba was asked for but its kernels do not compile ({_failed})")
        return "numpy"
    return "numba"


if njit is not None:
    _jit = njit(cache=True, nogil=True, fastmath=False, error_model="numpy", boundscheck=False)

    @_jit
    def _block_in(x, Z, Zi, F, q, cap, ramp, limit, limit_bits, acc, pki, mv):  # pragma: no cover - compiled
        """x (F, N) -> Z[:F, N:2N] (and Z[:F, :N] = w*x when ramp); input meters into mv.

        Zi: Z viewed as int32.  Weight of frame n: min(q + n + 1, cap).  Returns the
        number of non-finite samples replaced by 0; finite samples beyond +-limit
        (a float32 value; limit_bits: its int32 bit pattern) are clamped.
        acc: float32 scratch (>= N) for the sums of squares; pki: int32 (N + M), the
        peaks as float32 bit patterns; mv: float32 [rms_in N | rms_out M | pk_in N | pk_out M].
        Written so that LLVM vectorises it: every inner loop runs over a row slice,
        and the peak is an integer maximum of |v| bit patterns (monotonic in |v| for
        float32, NaN above inf; exact) because a float maximum does not vectorise.
        """
        N = x.shape[1]
        M = pki.shape[0] - N
        absmask = np.int32(0x7FFFFFFF)
        for i in range(N):
            acc[i] = 0.0
            pki[i] = 0
        for n in range(F):
            xr = x[n]
            zx = Z[n, N:2 * N]
            for i in range(N):
                zx[i] = xr[i]
            if ramp:
                w = np.float32(q + n + 1.0)
                if w > cap:
                    w = np.float32(cap)
                zw = Z[n, 0:N]
                for i in range(N):
                    zw[i] = xr[i] * w
            for i in range(N):
                acc[i] += xr[i] * xr[i]
            zi = Zi[n, N:2 * N]
            for i in range(N):
                pki[i] = max(pki[i], zi[i] & absmask)
        top = np.int32(0)
        for i in range(N):
            top = max(top, pki[i])
        bad = 0
        if top > limit_bits:  # some sample is non-finite or beyond +-limit: redo, sanitised
            lim = np.float32(limit)
            for i in range(N):
                acc[i] = 0.0
                pki[i] = 0
            for n in range(F):
                w = np.float32(q + n + 1.0)
                if w > cap:
                    w = np.float32(cap)
                for i in range(N):
                    v = x[n, i]
                    if not np.isfinite(v):
                        v = np.float32(0.0)
                        bad += 1
                    elif v > lim:
                        v = lim
                    elif v < -lim:
                        v = -lim
                    Z[n, N + i] = v
                    if ramp:
                        Z[n, i] = v * w
                    acc[i] += v * v
                    pki[i] = max(pki[i], Zi[n, N + i] & absmask)
        inv = np.float32(1.0 / F)
        pkf = pki.view(np.float32)
        for i in range(N):
            mv[i] = np.sqrt(acc[i] * inv)
            mv[N + M + i] = pkf[i]
        return bad

    @_jit
    def _block_out(Z, Zi, F, c0, acc, pki, mv):  # pragma: no cover - compiled
        """Output meters of Z[:F, c0:c0+M] (c0 = 2N) into mv; returns the largest sample
        peak (NaN if some output sample is NaN; see _block_in for the method)."""
        N = c0 // 2
        M = pki.shape[0] - N
        absmask = np.int32(0x7FFFFFFF)
        pko = pki[N:]
        for j in range(M):
            acc[j] = 0.0
            pko[j] = 0
        for n in range(F):
            zy = Z[n, c0:c0 + M]
            for j in range(M):
                acc[j] += zy[j] * zy[j]
            zi = Zi[n, c0:c0 + M]
            for j in range(M):
                pko[j] = max(pko[j], zi[j] & absmask)
        inv = np.float32(1.0 / F)
        pkf = pki.view(np.float32)
        top = N
        for j in range(M):
            mv[N + j] = np.sqrt(acc[j] * inv)
            mv[2 * N + M + j] = pkf[N + j]
            if pko[j] > pki[top]:
                top = N + j
        return pkf[top]

    @_jit
    def _bank_update(k00, k01, k02, k10, k11, k12, src, dst):  # pragma: no cover - compiled
        """dst = K @ src for the gain banks (3, N*Mb), K = [[k00 k01 k02], [k10 k11 k12], [0 0 1]].

        K's entries are rounded to float32 as the numpy path's float32 K is.  Elementwise
        (OpenBLAS is slow for a 3x3 left operand); the last row is copied exactly, and a
        row of K like [0 0 1] gives the target exactly."""
        c00, c01, c02 = np.float32(k00), np.float32(k01), np.float32(k02)
        c10, c11, c12 = np.float32(k10), np.float32(k11), np.float32(k12)
        a, b, c = src[0], src[1], src[2]
        d0, d1, d2 = dst[0], dst[1], dst[2]
        for j in range(a.shape[0]):
            d0[j] = c00 * a[j] + c01 * b[j] + c02 * c[j]
        for j in range(a.shape[0]):
            d1[j] = c10 * a[j] + c11 * b[j] + c12 * c[j]
        for j in range(a.shape[0]):
            d2[j] = c[j]

    @_jit
    def _target_in(G, T, max_ss, acc):  # pragma: no cover - compiled
        """Sum of squares of G (float64); only if it is <= max_ss, copy G into T (float32).

        acc: float64 scratch (>= columns), per-column partial sums (so the loop
        vectorises).  Returns the sum (NaN/inf/huge when refused: T is then untouched)."""
        Mc = G.shape[1]
        for j in range(Mc):
            acc[j] = 0.0
        for i in range(G.shape[0]):
            g = G[i]
            for j in range(Mc):
                v = np.float64(g[j])
                acc[j] += v * v
        ss = 0.0
        for j in range(Mc):
            ss += acc[j]
        if ss <= max_ss:
            for i in range(G.shape[0]):
                g = G[i]
                t = T[i]
                for j in range(Mc):
                    t[j] = np.float32(g[j])
        return ss

    bank_update = _bank_update
    target_in = _target_in
    block_in = _block_in
    block_out = _block_out


def warm_up() -> float:
    """Compile (or load from the cache) both kernels for the engine's argument types.

    Returns the seconds this call took (0 after the first).  The engine's arrays are
    always C-contiguous, writable float32 (x, Z, acc, mv) and int32 (Z's view, pki): one signature.
    """
    global _warm, compile_seconds
    if _warm or njit is None:
        return 0.0
    t0 = time.perf_counter()
    N, M, F = 2, 2, 4
    x = np.zeros((F, N), dtype=np.float32)
    Z = np.zeros((F, 2 * N + M + 1), dtype=np.float32)
    acc = np.zeros(2 * (N + M), dtype=np.float32)
    pki = np.zeros(N + M, dtype=np.int32)
    mv = np.zeros(2 * (N + M), dtype=np.float32)
    lim = np.float32(1.0e6)
    _block_in(x, Z, Z.view(np.int32), F, 0.0, 1.0e30, True, float(lim), int(lim.view(np.int32)), acc, pki, mv)
    _block_out(Z, Z.view(np.int32), F, 2 * N, acc, pki, mv)
    P = np.zeros((2, 3, N * M), dtype=np.float32)
    _bank_update(1.0, 0.0, 0.0, 0.0, 1.0, 0.0, P[0], P[1])
    for dt in (np.float64, np.float32):  # the two dtypes set_target takes without a cast
        _target_in(np.zeros((N, M), dtype=dt), np.zeros((N, M), dtype=np.float32), 1.0, np.zeros(M))
    compile_seconds = time.perf_counter() - t0
    # from here on a call with other argument types raises instead of compiling on an
    # audio block (the engine passes only the types warmed up above)
    for k in (_block_in, _block_out, _bank_update, _target_in):
        k.disable_compile()
    _warm = True
    return compile_seconds
