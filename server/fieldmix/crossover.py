"""Sub bus crossover: a Linkwitz-Riley 4th-order low-pass, run block by block.

A Linkwitz-Riley 4th-order (LR4) low-pass is two identical 2nd-order
Butterworth low-pass sections in cascade (S. Linkwitz, "Active crossover
networks for noncoincident drivers", JAES 24(1), 1976 -- cited from memory).
It is -6.02 dB at the crossover frequency, and its low-pass and high-pass
outputs sum to an all-pass (flat magnitude).

Design: bilinear transform with the cut-off pre-warped, K = tan(pi fc / fs)
(common practice, no source); the result equals ``scipy.signal.butter(2, fc,
fs=fs, output='sos')``, which the tests use as the independent reference.

Running it without per-sample Python loops and without per-block allocation:
the cascade is a linear system with a state ``s`` of 2 values per section
(the transposed direct form II state, the same layout as scipy's ``zi``).
For a chunk of ``r`` samples the exact block form is

    [ s' ]   [ A^r  K_r ] [ s ]
    [ y  ] = [ O_r  H_r ] [ x ]

with ``H_r`` the r x r lower-triangular Toeplitz matrix of the impulse
response, ``O_r`` the free response of the state, ``K_r`` the input-to-state
map and ``A^r`` the state transition.  One float64 matrix-vector product per
chunk of at most ``chunk`` samples does the whole chunk; the state carries over
exactly from chunk to chunk and from block to block, so the output does not
depend on how the signal is cut into blocks (checked against
``scipy.signal.sosfilt`` on the same signal cut at random places).
Everything is precomputed for chunk lengths up to ``chunk``; the matrix for a
shorter last chunk is assembled (by slicing, into a preallocated buffer) only
when the remainder length changes.
"""

from __future__ import annotations

import math

import numpy as np

from .errors import ConfigError

__all__ = ["butterworth2_sos", "lr4_sos", "BlockSosFilter", "LR4Lowpass"]


def _check_fc(fc: float, fs: float, where: str) -> tuple[float, float]:
    try:
        fc = float(fc)
        fs = float(fs)
    except (TypeError, ValueError):
        raise ConfigError(where, f"crossover frequency and sample rate must be numbers, got {fc!r}, {fs!r}")
    if not (math.isfinite(fs) and fs > 0):
        raise ConfigError(where, f"sample rate must be a positive number, got {fs!r}")
    if not (math.isfinite(fc) and 0.0 < fc < 0.5 * fs):
        raise ConfigError(where, f"crossover frequency must be between 0 and {0.5 * fs:g} Hz (half the sample rate), got {fc!r}")
    return fc, fs


def butterworth2_sos(fc: float, fs: float, kind: str = "low", where: str = "crossover_hz") -> np.ndarray:
    """One 2nd-order Butterworth section as an sos row ``[b0, b1, b2, 1, a1, a2]``.

    Bilinear transform with pre-warping: K = tan(pi fc/fs), Q = 1/sqrt(2).
    """
    fc, fs = _check_fc(fc, fs, where)
    if kind not in ("low", "high"):
        raise ValueError(f"kind must be 'low' or 'high', got {kind!r}")
    k = math.tan(math.pi * fc / fs)
    k2 = k * k
    r2 = math.sqrt(2.0)
    norm = 1.0 / (1.0 + r2 * k + k2)
    a1 = 2.0 * (k2 - 1.0) * norm
    a2 = (1.0 - r2 * k + k2) * norm
    if kind == "low":
        b0 = k2 * norm
        b1 = 2.0 * b0
    else:
        b0 = norm
        b1 = -2.0 * b0
    return np.array([[b0, b1, b0, 1.0, a1, a2]], dtype=np.float64)


def lr4_sos(fc: float, fs: float, kind: str = "low", where: str = "crossover_hz") -> np.ndarray:
    """Linkwitz-Riley 4th order: the Butterworth section twice, shape (2, 6)."""
    sec = butterworth2_sos(fc, fs, kind, where)
    return np.vstack([sec, sec])


def _sos_step(sos: np.ndarray, state: np.ndarray, x: float) -> tuple[float, np.ndarray]:
    """One sample of the cascade in transposed direct form II (construction only)."""
    s = state.astype(np.float64).copy()
    v = float(x)
    for k in range(sos.shape[0]):
        b0, b1, b2, _a0, a1, a2 = sos[k]
        z1, z2 = s[2 * k], s[2 * k + 1]
        y = b0 * v + z1
        s[2 * k] = b1 * v - a1 * y + z2
        s[2 * k + 1] = b2 * v - a2 * y
        v = y
    return v, s


class BlockSosFilter:
    """A cascade of biquads run on float32 blocks through the exact block form.

    ``process(x, out)`` filters ``x`` (1-D float32, any stride, length F) into
    ``out`` (1-D float32, length F), continuing from the state left by the
    previous call.  No allocation in steady state (for a repeated block size).
    """

    def __init__(self, sos, max_block: int = 4096, chunk: int = 128):
        sos = np.asarray(sos, dtype=np.float64)
        if sos.ndim != 2 or sos.shape[1] != 6 or sos.shape[0] < 1:
            raise ValueError("sos must have shape (n_sections, 6)")
        if not np.allclose(sos[:, 3], 1.0):
            raise ValueError("sos sections must be normalised (a0 = 1)")
        if int(max_block) < 1 or int(chunk) < 1:
            raise ValueError("max_block and chunk must be positive")
        self.sos = sos.copy()
        self.max_block = int(max_block)
        n = 2 * sos.shape[0]
        self.order = n
        p = min(int(chunk), self.max_block)
        self.chunk = p

        # State-space (A, b, c, d) of the cascade, by probing the sample step.
        zero = np.zeros(n)
        d, b = _sos_step(sos, zero, 1.0)
        A = np.zeros((n, n))
        c = np.zeros(n)
        for i in range(n):
            e = np.zeros(n)
            e[i] = 1.0
            c[i], A[:, i] = _sos_step(sos, e, 0.0)
        self._A, self._b, self._c, self._d = A, b, c, d

        # Powers A^k (k = 0..p), impulse response, free response, input-to-state map.
        apow = np.empty((p + 1, n, n))
        apow[0] = np.eye(n)
        for k in range(1, p + 1):
            apow[k] = A @ apow[k - 1]
        h = np.empty(p)
        h[0] = d
        for k in range(1, p):
            h[k] = c @ apow[k - 1] @ b
        H = np.zeros((p, p))
        for i in range(p):
            H[i, : i + 1] = h[i::-1]
        O = np.stack([c @ apow[k] for k in range(p)])  # (p, n)
        Kfull = np.stack([apow[p - 1 - j] @ b for j in range(p)], axis=1)  # (n, p)
        self._apow, self._H, self._O, self._Kfull = apow, H, O, Kfull

        dim = n + p
        self._m_full = np.ascontiguousarray(self._assemble(p))
        self._m_rem_buf = np.zeros((dim, dim))
        self._rem = 0  # remainder length currently assembled in _m_rem_buf
        self._m_rem = self._m_rem_buf[:0, :0]
        # ping-pong state/sample vectors: [state (n) | samples (<= p)]
        self._za = np.zeros(dim)
        self._zb = np.zeros(dim)

    def _assemble(self, r: int, out: np.ndarray | None = None) -> np.ndarray:
        n, p = self.order, self.chunk
        if out is None:
            out = np.empty((n + r, n + r))
        out[:n, :n] = self._apow[r]
        out[:n, n:] = self._Kfull[:, p - r:]
        out[n:, :n] = self._O[:r]
        out[n:, n:] = self._H[:r, :r]
        return out

    def reset(self) -> None:
        self._za[:] = 0.0
        self._zb[:] = 0.0

    @property
    def state(self) -> np.ndarray:
        """Copy of the filter state, shaped like scipy's ``zi`` (n_sections, 2)."""
        return self._za[: self.order].reshape(-1, 2).copy()

    def state_is_finite(self) -> bool:
        s = self._za[: self.order]
        return bool(np.isfinite(np.add.reduce(s)))

    def process(self, x: np.ndarray, out: np.ndarray) -> None:
        n, p = self.order, self.chunk
        f = x.shape[0]
        za, zb = self._za, self._zb
        k0 = 0
        while k0 < f:
            r = f - k0
            if r >= p:
                r = p
                m = self._m_full
            else:
                if r != self._rem:
                    self._m_rem = self._assemble(r, self._m_rem_buf[: n + r, : n + r])
                    self._rem = r
                m = self._m_rem
            np.copyto(za[n : n + r], x[k0 : k0 + r])
            np.matmul(m, za[: n + r], out=zb[: n + r])
            np.copyto(out[k0 : k0 + r], zb[n : n + r])
            za, zb = zb, za
            k0 += r
        self._za, self._zb = za, zb


class LR4Lowpass(BlockSosFilter):
    """The sub bus filter: LR4 low-pass at ``fc`` Hz (two Butterworth sections)."""

    def __init__(self, fc: float, fs: float, max_block: int = 4096, chunk: int = 128,
                 where: str = "crossover_hz"):
        self.fc = float(fc)
        self.fs = float(fs)
        super().__init__(lr4_sos(fc, fs, "low", where), max_block=max_block, chunk=chunk)
