"""fieldmix.engine -- the DSP core: N inputs to M outputs through a ramped gain matrix.

Pure DSP on float32 numpy blocks: no I/O, no threads, no logging, no globals.
The same object runs inside the audio callback (a child process) and inside
the offline renderer.  docs/engine.md explains the design; the short version:

* ``set_target(G)`` hands over a new gain matrix; the gains move to it by a
  per-sample linear ramp over the glide time (never shorter than one block);
  a ramp continues across blocks and a new target mid-ramp starts from the
  gains of that moment.  One block is one matrix product of the stacked
  ``[w*x | x]`` with ``[dG; Gc]`` while a ramp runs, and ``x @ Gc`` otherwise.
* Per-output alignment delays in whole samples (a ring buffer read through a
  precomputed index table); a delay change crossfades between the old and the
  new taps.
* Sub bus: one extra column of G, low-passed by a Linkwitz-Riley 4th-order
  filter (``crossover.py``) and written to each sub output times its trim.
* Safety: a fade-in from silence at start, ``panic()``, ``fade_out()``, a
  block-rate peak limiter with a hard clip at the ceiling (no output sample is
  ever above it), and non-finite input samples replaced by silence.
* Meters per input and output (sample peak and RMS of the last block).
* No allocation per block in steady state: every buffer is preallocated and
  every numpy call writes into it with ``out=``.
* Two paths for the elementwise work around the product: compiled kernels
  (``_kernels.py``, numba, when it imports) or numpy; ``FIELDMIX_KERNELS``
  (numba|numpy|auto) forces one.  Same results within float32 rounding.

Trims, source gains and master gain/mute are folded into G by the control
layer; the engine only sees G.
"""

from __future__ import annotations

import math
import os

import numpy as np

from .crossover import LR4Lowpass
from .errors import ConfigError, ControlError

__all__ = ["Engine", "peak_dbfs", "rms_dbfs", "MAX_GAIN", "INPUT_LIMIT"]

_F32 = np.dtype(np.float32)
_NB_TARGET_DTYPES = (np.dtype(np.float64), np.dtype(np.float32))  # set_target dtypes the kernel takes
_copyto = np.copyto
_vdot = np.vdot
_matmul = np.matmul
_multiply = np.multiply
_minimum = np.minimum
_maximum = np.maximum
_maxreduce = np.maximum.reduce
_sqrt = np.sqrt

#: Gain matrices whose sum of squared entries exceeds MAX_GAIN**2 are refused (so no
#: entry is beyond +-MAX_GAIN, +80 dB); this bound keeps every sum on the audio path finite.
MAX_GAIN = 1.0e4
#: Input samples are clamped to +-INPUT_LIMIT (+120 dB FS) -- only ever reached by garbage.
INPUT_LIMIT = 1.0e6
#: Crossfade between old and new delay taps.
DELAY_XFADE_MS = 15.0
#: Limiter: gain reduction reaches its value within this time (or the block, if shorter).
LIMITER_ATTACK_MS = 1.0
#: Limiter: time constant of the gain's return to unity.
LIMITER_RELEASE_MS = 150.0

_SQRT2 = math.sqrt(2.0)


def peak_dbfs(peak, floor_db: float = -200.0):
    """Sample peak (linear, full scale = 1.0) to dB FS: 20 log10(peak)."""
    p = np.abs(np.asarray(peak, dtype=np.float64))
    with np.errstate(divide="ignore"):
        out = np.maximum(20.0 * np.log10(p), floor_db)
    return float(out) if out.ndim == 0 else out


def rms_dbfs(rms, floor_db: float = -200.0):
    """Plain RMS (linear) to dB FS by AES17: 20 log10(rms * sqrt(2)).

    AES17 defines dB FS so that a full-scale sine reads 0 dB FS RMS; its plain
    RMS is 1/sqrt(2), hence the +3.01 dB.  (A full-scale square wave reads
    +3.01 dB FS RMS by this convention.)
    """
    r = np.abs(np.asarray(rms, dtype=np.float64)) * _SQRT2
    with np.errstate(divide="ignore"):
        out = np.maximum(20.0 * np.log10(r), floor_db)
    return float(out) if out.ndim == 0 else out


def _num(value, where: str, lo: float | None = None, hi: float | None = None, exc=ConfigError) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        if exc is ControlError:
            raise ControlError("bad_type", f"{where}: expected a number, got {value!r}")
        raise ConfigError(where, f"expected a number, got {value!r}")
    if not math.isfinite(v):
        if exc is ControlError:
            raise ControlError("not_finite", f"{where}: expected a finite number, got {value!r}")
        raise ConfigError(where, f"expected a finite number, got {value!r}")
    if (lo is not None and v < lo) or (hi is not None and v > hi):
        rng = f"between {lo:g} and {hi:g}" if (lo is not None and hi is not None) else (
            f"at least {lo:g}" if lo is not None else f"at most {hi:g}")
        if exc is ControlError:
            raise ControlError("out_of_range", f"{where}: must be {rng}, got {v:g}")
        raise ConfigError(where, f"must be {rng}, got {v:g}")
    return v


def _int(value, where: str, lo: int, hi: int | None = None) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        if isinstance(value, (float, np.floating)) and float(value).is_integer():
            value = int(value)
        else:
            raise ConfigError(where, f"expected a whole number, got {value!r}")
    v = int(value)
    if v < lo or (hi is not None and v > hi):
        rng = f"between {lo} and {hi}" if hi is not None else f"at least {lo}"
        raise ConfigError(where, f"must be {rng}, got {v}")
    return v


class _Views:
    """Views of the preallocated buffers for one block length (rebuilt when it changes)."""

    __slots__ = ("frames", "shape_in", "wlim", "xin", "wxc", "yc", "ysq", "ymask", "full", "subtmp", "mv_ms", "mv_pk",
                 "zwx", "zx", "zs", "zy", "zyo", "zall", "s_all", "s_xy", "halves", "s_red",
                 "s_y", "zxy", "ones", "ebuf", "wbuf", "idx", "tap_a", "tap_b", "cbuf",
                 "suby", "mask")


#: Below this many matrix cells (sources x outputs) ``kernels_for`` picks the numpy
#: path: the compiled kernels save a few microseconds a block there, while loading
#: numba costs about 60 MB of memory and half a second per process.
NUMBA_MIN_CELLS = 256


def kernel_preference(kernels: str = "auto") -> str:
    """The kernels to use: ``FIELDMIX_KERNELS`` (numba|numpy|auto) when set, else ``kernels``."""
    env = os.environ.get("FIELDMIX_KERNELS", "").strip().lower()
    want = env or (kernels if isinstance(kernels, str) else "")
    want = want.strip().lower() or "auto"
    if want not in ("auto", "numba", "numpy"):
        where = "FIELDMIX_KERNELS" if env else "engine.kernels"
        raise ConfigError(where, f"must be numba, numpy or auto, got {want!r}")
    return want


def kernels_for(n_inputs: int, n_outputs: int) -> str:
    """A long-running process's choice for mixes of this size: ``numpy`` for small ones, else ``auto``."""
    return "numpy" if int(n_inputs) * int(n_outputs) < NUMBA_MIN_CELLS else "auto"


class Engine:
    """Ramped N x M matrix mixer with delays, sub bus, ceiling and meters.

    Parameters: ``n_inputs``, ``n_outputs``, ``samplerate`` (Hz); ``max_block``:
    the largest block ``process`` accepts; ``glide_ms``: ramp time for a new
    target; ``ceiling_dbfs``: output sample-peak ceiling; ``fade_in_ms``: fade
    from silence at start; ``sub_outputs``: 0-based output columns fed by the
    sub bus (G then has one more column, the sub bus send); ``sub_trims_db``:
    one trim per sub output; ``crossover_hz``: the sub bus LR4 low-pass;
    ``max_delay_ms``: the longest alignment delay ``set_delays`` accepts.
    """

    def __init__(self, n_inputs: int, n_outputs: int, samplerate: float, max_block: int = 4096,
                 glide_ms: float = 30.0, ceiling_dbfs: float = -1.0, fade_in_ms: float = 1000.0,
                 sub_outputs=(), sub_trims_db=None, crossover_hz: float = 80.0,
                 max_delay_ms: float = 500.0, kernels: str = "auto"):
        N = _int(n_inputs, "engine.n_inputs", 1, 4096)
        M = _int(n_outputs, "engine.n_outputs", 1, 4096)
        fs = _num(samplerate, "engine.samplerate", 1.0, 1.0e6)
        MB = _int(max_block, "engine.max_block", 1, 1 << 16)
        self.n_inputs, self.n_outputs, self.samplerate, self.max_block = N, M, fs, MB
        self._glide_ms = _num(glide_ms, "engine.glide_ms", 0.0, 600000.0)
        ceiling_db = _num(ceiling_dbfs, "engine.ceiling_dbfs", -60.0, 0.0)
        fade_in = _num(fade_in_ms, "engine.fade_in_ms", 0.0, 600000.0)
        max_delay = _num(max_delay_ms, "engine.max_delay_ms", 0.0, 60000.0)

        subs = tuple(sub_outputs or ())
        seen = set()
        for k, j in enumerate(subs):
            jj = _int(j, f"engine.sub_outputs[{k}]", 0, M - 1)
            if jj in seen:
                raise ConfigError(f"engine.sub_outputs[{k}]", f"output {jj} listed twice")
            seen.add(jj)
        subs = tuple(int(j) for j in subs)
        if sub_trims_db is None:
            trims = (0.0,) * len(subs)
        else:
            trims = tuple(sub_trims_db)
            if len(trims) != len(subs):
                raise ConfigError("engine.sub_trims_db",
                                  f"expected {len(subs)} trims (one per sub output), got {len(trims)}")
            trims = tuple(_num(t, f"engine.sub_trims_db[{k}]", -120.0, 24.0) for k, t in enumerate(trims))
        self.sub_outputs = subs
        self.sub_trims_db = trims
        self._has_sub = bool(subs)
        Mb = M + 1 if subs else M  # matrix columns (the last is the sub bus when present)
        self._Mb = Mb
        self.crossover_hz = float(crossover_hz)

        # ---- the block buffer Z: columns [ w*x | x | y (M) | sub bus (0/1) ] ----
        # [w*x | x] is the stacked left operand of the ramp product, [x | y] is one
        # contiguous column range so that one pass meters inputs and outputs.
        C = 2 * N + Mb
        self._C = C
        self._Z = np.zeros((MB, C), dtype=np.float32)
        self._S = np.zeros((MB, C), dtype=np.float32)  # squares (meters)
        # ---- gains: two banks P of three matrices [dG ; Gc ; T] (3, N, Mb) ----
        # dG: per-sample increment of the running ramp; Gc: the gains at ramp sample
        # p - q; T: the target.  B = P[:2] viewed as (2N, Mb) is the right operand
        # of the stacked product.  Every update of the bank (new target, end of a
        # ramp, fold) is one small product K (3x3) @ P_cur -> P_next, then a swap.
        self._P = [np.zeros((3, N, Mb), dtype=np.float32) for _ in range(2)]
        self._bank = [self._bank_views(P) for P in self._P]
        self._cur = 0
        self._bk = self._bank[0]  # views of the current bank: (V, B, Gc, T, dG)
        self._K = np.zeros((3, 3), dtype=np.float32)
        self._stage = np.zeros((N, Mb), dtype=np.float32)
        self._submask = np.zeros(Mb, dtype=bool)
        for j in subs:
            self._submask[j] = True
        # ramp weight table: row n holds n + 1 for every input (w*x is one same-shape product)
        self._wrows = 2 * MB
        self._W = np.repeat(np.arange(1, self._wrows + 1, dtype=np.float32)[:, None], N, axis=1)
        self._wbuf = np.zeros((MB, N), dtype=np.float32)
        # contiguous scratch: numpy (2.x) buffers, i.e. allocates for, ufunc operands that
        # are not contiguous, so every elementwise op works on contiguous arrays and
        # strided views of Z are only written by BLAS or np.copyto
        self._xin = np.zeros((MB, N), dtype=np.float32)
        self._wxc = np.zeros((MB, N), dtype=np.float32)
        self._yc = np.zeros((MB, M), dtype=np.float32)
        self._ysq = np.zeros((MB, M), dtype=np.float32)
        self._ymask = np.zeros((MB, M), dtype=bool)
        self._full = np.zeros((MB, M), dtype=np.float32)
        self._ramp = False
        self._L = 1  # ramp length in samples
        self._p = 0  # samples of the ramp done
        self._q = 0  # samples since Gc was last brought up to date
        self._target_pending = False

        # ---- meters: [ms_in | ms_out | pk_in | pk_out] -> sqrt -> [rms_in | rms_out | peak_in | peak_out]
        self._mv = np.zeros(2 * (N + M), dtype=np.float32)
        self.in_rms = self._mv[:N]
        self.out_rms = self._mv[N:N + M]
        self.in_peak = self._mv[N + M:2 * N + M]
        self.out_peak = self._mv[2 * N + M:]
        self.nonfinite_count = 0
        self._mask = np.zeros((MB, N), dtype=bool)

        # ---- ceiling / limiter ----
        c = 10.0 ** (ceiling_db / 20.0)
        c32 = np.float32(c)
        if float(c32) > c:
            c32 = np.nextafter(c32, np.float32(0.0))
        self.ceiling_dbfs = ceiling_db
        self.ceiling = float(c32)  # linear, as a float32 value not above the exact ceiling
        self._c32 = float(c32)
        self._lim_g = 1.0
        self.limiter_active = False
        self.limited_blocks = 0
        self._attack = max(1, int(round(LIMITER_ATTACK_MS * fs / 1000.0)))
        self._release = LIMITER_RELEASE_MS * fs / 1000.0
        self._gbuf = np.zeros(MB, dtype=np.float32)

        # ---- envelope: fade-in, panic, fade-out ----
        self._ar = np.arange(1, MB + 1, dtype=np.float32)
        self._ebuf = np.zeros(MB, dtype=np.float32)
        self._fade_in_samples = fade_in * fs / 1000.0
        if self._fade_in_samples >= 1.0:
            self._env, self._env_target, self._env_step = 0.0, 1.0, 1.0 / self._fade_in_samples
        else:
            self._env, self._env_target, self._env_step = 1.0, 1.0, 0.0
        self._panic = False
        self._fading_out = False
        self._env_over_block = False  # panic: reach the target within the next block
        self._env_active = self._env != 1.0

        # ---- delays: ring of R logical rows (+ MB rows of tail for unwrapped writes) ----
        self.max_delay_samples = int(math.floor(max_delay * fs / 1000.0 + 1e-9))
        D = self.max_delay_samples
        self._ringR = D + MB
        if D > 0:
            self._ring = np.zeros((self._ringR + MB, Mb), dtype=np.float32)
            self._ringflat = self._ring[: self._ringR].reshape(-1)
            self._base_cur = np.zeros((MB, M), dtype=np.intp)
            self._base_new = np.zeros((MB, M), dtype=np.intp)
            self._idx = np.zeros((MB, M), dtype=np.intp)
            self._tap_a = np.zeros((MB, M), dtype=np.float32)
            self._tap_b = np.zeros((MB, M), dtype=np.float32)
            self._cbuf = np.zeros(MB, dtype=np.float32)
            self._base0 = (np.arange(MB, dtype=np.intp)[:, None] * Mb + np.arange(M, dtype=np.intp)[None, :])
            self._dm = np.zeros(M, dtype=np.intp)
            self._make_base(self._base_cur, np.zeros(M, dtype=np.intp))
        else:
            self._ring = None
        self._d_cur = np.zeros(M, dtype=np.int64)
        self._d_new = np.zeros(M, dtype=np.int64)
        self._d_pending = np.zeros(M, dtype=np.int64)
        self._d_has_pending = False
        self._ring_on = False
        self._t = 0
        self._hist = 0
        self._xf_pos = -1
        self._xf_len = max(1, int(round(DELAY_XFADE_MS * fs / 1000.0)))
        self._started = False  # becomes True with the first processed block

        # ---- sub bus ----
        if subs:
            self._filt = LR4Lowpass(crossover_hz, fs, max_block=MB, where="engine.crossover_hz")
            self._suby = np.zeros(MB, dtype=np.float32)
            self._subtmp = np.zeros(MB, dtype=np.float32)
            self._sub_gains = tuple((j, 10.0 ** (t / 20.0)) for j, t in zip(subs, trims))
        else:
            _num(crossover_hz, "engine.crossover_hz", 0.0, fs / 2.0)
            self._filt = None

        # ---- elementwise kernels: compiled (numba) or numpy, chosen here, compiled here ----
        want = kernel_preference(kernels)
        if want == "numpy":  # numba is not even imported (it costs ~60 MB and ~0.5 s)
            self.kernels = "numpy"
        else:
            from . import _kernels  # here, not at module import: importing numba takes ~0.5 s

            self.kernels = _kernels.choose(want)
        self._nb = self.kernels == "numba"
        self._acc = np.zeros(max(N, M), dtype=np.float32)  # kernel scratch: sums of squares
        self._acc64 = np.zeros(Mb, dtype=np.float64)  # kernel scratch: set_target's check
        self._pki = np.zeros(N + M, dtype=np.int32)  # kernel scratch: peaks as float32 bit patterns
        self._Zi = self._Z.view(np.int32)
        lim32 = np.float32(INPUT_LIMIT)
        self._lim = float(lim32)
        self._lim_bits = int(lim32.view(np.int32))
        if self._nb:  # (choose() has compiled the kernels: never on an audio block)
            self._k_in = _kernels.block_in
            self._k_out = _kernels.block_out
            self._k_bank = _kernels.bank_update
            self._k_target = _kernels.target_in

        self._vcache = {}
        self._v = None
        self._set_frames(min(MB, 256))

    # ------------------------------------------------------------------ views
    @staticmethod
    def _bank_views(P: np.ndarray):
        n3, N, Mb = P.shape
        # (V, B, Gc, T, dG)
        return (P.reshape(3, N * Mb), P[:2].reshape(2 * N, Mb), P[1], P[2], P[0])

    def _set_frames(self, F: int) -> _Views:
        v = self._vcache.get(F)
        if v is None:
            if len(self._vcache) >= 8:  # a renderer cutting blocks at events uses a few sizes
                self._vcache.clear()
            v = self._vcache[F] = self._build_views(F)
        self._v = v
        return v

    def _build_views(self, F: int) -> _Views:
        N, M, Mb = self.n_inputs, self.n_outputs, self._Mb
        v = _Views()
        v.frames = F
        v.shape_in = (F, N)
        # rows of the ramp weight table in use: a short cycle keeps them in cache
        # (a fold every ~15 blocks costs one small product)
        v.wlim = min(self._wrows, 16 * F)
        v.xin = self._xin[:F]
        v.wxc = self._wxc[:F]
        v.yc = self._yc[:F]
        v.ysq = self._ysq[:F]
        v.ymask = self._ymask[:F]
        v.full = self._full[:F]
        nm = N + M
        v.mv_ms = self._mv[:nm]
        v.mv_pk = self._mv[nm:]
        Z = self._Z[:F]
        S = self._S[:F]
        v.zall = Z
        v.zwx = Z[:, :N]
        v.zx = Z[:, N:2 * N]
        v.zs = Z[:, :2 * N]
        v.zy = Z[:, 2 * N:]
        v.zyo = Z[:, 2 * N:2 * N + M]
        v.zxy = Z[:, N:2 * N + M]
        v.s_all = S
        v.s_xy = S[:, N:2 * N + M]
        # per-column maxima: numpy's reduction along axis 0 is slow for many rows, so
        # long blocks first fold their squares in halves (whole rows, contiguous)
        halves = []
        n = F
        while n > 32 and n % 2 == 0:
            h = n // 2
            halves.append((S[:h], S[h:n]))
            n = h
        v.halves = tuple(halves)
        v.s_red = S[:n, N:2 * N + M]
        v.s_y = S[:, 2 * N:2 * N + M]
        v.ones = np.full(F, 1.0 / F, dtype=np.float32)
        v.ebuf = self._ebuf[:F]
        v.wbuf = self._wbuf[:F]
        v.mask = self._mask[:F]
        if self._ring is not None:
            v.idx = self._idx[:F]
            v.tap_a = self._tap_a[:F]
            v.tap_b = self._tap_b[:F]
            v.cbuf = self._cbuf[:F]
        if self._has_sub:
            v.suby = self._suby[:F]
            v.subtmp = self._subtmp[:F]
        return v

    def input_buffer(self, frames: int) -> np.ndarray:
        """A preallocated C-contiguous input block, shape (frames, n_inputs).

        Fill it (``buf[...] = data``, ``np.copyto``, ``np.take(..., out=buf)``)
        and pass it to ``process``: the caller then needs no block buffer of its
        own.  Valid until ``input_buffer``/``process`` is called with another
        frame count.
        """
        F = int(frames)
        if not 1 <= F <= self.max_block:
            raise ValueError(f"Engine.input_buffer: frames must be 1..{self.max_block}, got {frames!r}")
        v = self._v if self._v.frames == F else self._set_frames(F)
        return v.xin

    # --------------------------------------------------------------- control
    @property
    def glide_ms(self) -> float:
        return self._glide_ms

    def set_glide_ms(self, ms: float) -> None:
        """Ramp time for targets set from now on (a running ramp keeps its length)."""
        self._glide_ms = _num(ms, "glide_ms", 0.0, 600000.0, exc=ControlError)

    def set_target(self, G) -> None:
        """New target gain matrix, (n_inputs, n_outputs) or (n_inputs, n_outputs + 1) with a sub bus.

        Copied into a preallocated buffer; the ramp to it starts with the next
        block, from the gains of that moment.  Columns of sub outputs are
        ignored (the sub bus column feeds them).  Raises ControlError for a
        non-finite entry or a matrix whose squared entries sum to more than
        MAX_GAIN**2 (no entry beyond +80 dB); the previous target then stays.
        No allocation for a C-contiguous ``G`` of any float dtype.
        """
        if type(G) is not np.ndarray:
            G = np.asarray(G, dtype=np.float64)
        N, M, Mb = self.n_inputs, self.n_outputs, self._Mb
        sh = G.shape
        if len(sh) != 2 or sh[0] != N or (sh[1] != M and sh[1] != Mb) or G.dtype.kind not in "fiu":
            raise ValueError(f"Engine.set_target: expected a float array of shape ({N}, {M})"
                             + (f" or ({N}, {Mb})" if Mb != M else "") + f", got {G.dtype} {sh}")
        T = self._bk[3]
        if self._nb and not self._has_sub and G.dtype in _NB_TARGET_DTYPES and G.flags.c_contiguous \
                and G.flags.aligned:
            # one compiled pass: the check, then the copy (only if the check passed)
            if not self._k_target(G, T, MAX_GAIN * MAX_GAIN, self._acc64) <= MAX_GAIN * MAX_GAIN:
                self._refuse(G)
            self._target_pending = True
            return
        if self._has_sub:  # the sub output columns are ignored: check and keep the rest
            st = self._stage
            if sh[1] == Mb:
                np.copyto(st, G, casting="unsafe")
            else:
                np.copyto(st[:, :M], G, casting="unsafe")
                st[:, M] = 0.0
            np.copyto(st, 0.0, where=self._submask)
            G = st
        # one product checks everything: the sum of squares is finite and <= MAX_GAIN^2
        # only if every entry is finite and within +-MAX_GAIN
        ss = np.vdot(G, G)
        if not ss <= MAX_GAIN * MAX_GAIN:
            self._refuse(G)
        np.copyto(T, G, casting="unsafe")
        self._target_pending = True

    def _refuse(self, G) -> None:
        g = np.asarray(G, dtype=np.float64)
        bad = np.argwhere(~np.isfinite(g))
        if bad.size:
            i, j = bad[0]
            raise ControlError("not_finite", f"gain matrix [{i}, {j}] is {g[i, j]!r}: gains must be finite")
        raise ControlError("out_of_range",
                           f"gain matrix too large: the sum of squared gains is {float(np.vdot(g, g)):g}, "
                           f"at most {MAX_GAIN * MAX_GAIN:g} (no gain beyond +80 dB)")

    def _bank_update(self, k00, k01, k02, k10, k11, k12) -> None:
        """P_next = K @ P_cur with K = [[k00 k01 k02], [k10 k11 k12], [0 0 1]]; then swap."""
        nxt = 1 - self._cur
        if self._nb:
            self._k_bank(k00, k01, k02, k10, k11, k12, self._bk[0], self._bank[nxt][0])
            self._cur = nxt
            self._bk = self._bank[nxt]
            return
        K = self._K
        K[0, 0] = k00
        K[0, 1] = k01
        K[0, 2] = k02
        K[1, 0] = k10
        K[1, 1] = k11
        K[1, 2] = k12
        K[2, 2] = 1.0
        np.matmul(K, self._bk[0], out=self._bank[nxt][0])
        self._cur = nxt
        self._bk = self._bank[nxt]

    def _apply_target(self, F: int) -> None:
        # dG' = (T - Gc')/L with Gc' = Gc + q dG (the gains of this moment)
        L = max(int(round(self._glide_ms * self.samplerate / 1000.0)), F, 1)
        q = float(self._q) if self._ramp else 0.0
        inv = 1.0 / L
        self._bank_update(-q * inv, -inv, inv, q, 1.0, 0.0)
        self._ramp = True
        self._L = L
        self._p = 0
        self._q = 0
        self._target_pending = False

    def current_gains(self) -> np.ndarray:
        """Copy (float64) of the gains in force after the last processed sample.

        Shape (n_inputs, n_outputs [+1 sub bus column]).  A target set since
        the last block has not started yet and is not included.
        """
        V, B, Gc, T, dG = self._bk
        g = Gc.astype(np.float64)
        if self._ramp and self._q:
            g += self._q * dG.astype(np.float64)
        return g

    @property
    def ramping(self) -> bool:
        return self._ramp or self._target_pending

    def set_delays(self, samples) -> None:
        """Per-output alignment delays in whole samples (n_outputs integers, 0..max_delay_samples).

        A change crossfades (DELAY_XFADE_MS) from the old taps to the new ones;
        a change that arrives during a crossfade waits for it to finish.
        """
        d = np.asarray(samples)
        M = self.n_outputs
        if d.shape != (M,):
            raise ConfigError("engine.delays", f"expected {M} delays (one per output), got shape {d.shape}")
        if d.dtype.kind not in "iuf" or (d.dtype.kind == "f" and not np.all(np.isfinite(d))):
            raise ConfigError("engine.delays", "delays must be whole numbers of samples")
        di = np.rint(d).astype(np.int64) if d.dtype.kind == "f" else d.astype(np.int64)
        if d.dtype.kind == "f" and np.any(di != d):
            k = int(np.argmax(di != d))
            raise ConfigError(f"engine.delays[{k}]", f"expected a whole number of samples, got {d[k]!r}")
        bad = np.flatnonzero((di < 0) | (di > self.max_delay_samples))
        if bad.size:
            k = int(bad[0])
            raise ConfigError(f"engine.delays[{k}]",
                              f"{int(di[k])} samples is outside 0..{self.max_delay_samples} "
                              f"(max_delay_ms at {self.samplerate:g} Hz)")
        np.copyto(self._d_pending, di)
        self._d_has_pending = True

    @property
    def delays(self) -> np.ndarray:
        """Copy of the delays in force (the new ones once a crossfade has finished)."""
        return self._d_cur.copy()

    def _make_base(self, base: np.ndarray, d: np.ndarray) -> None:
        # flat ring index of output m at block offset n: (n - d_m) * Mb + m (plus t * Mb per
        # block); built without allocating (broadcasting operands make numpy allocate)
        np.multiply(d, self._Mb, out=self._dm)
        np.copyto(self._idx, self._dm)
        np.subtract(self._base0, self._idx, out=base)

    def panic(self, on: bool) -> None:
        """on: outputs fade to silence within the next block and stay silent.

        off: fade back in over fade-in time (at least the glide time).
        """
        self._env_active = True
        if on:
            self._panic = True
            self._env_target = 0.0
            self._env_over_block = True
        else:
            self._panic = False
            if not self._fading_out:
                n = max(self._fade_in_samples, self._glide_ms * self.samplerate / 1000.0, 1.0)
                self._env_target = 1.0
                self._env_step = 1.0 / n
                self._env_over_block = False

    @property
    def panicked(self) -> bool:
        return self._panic

    def fade_out(self, ms: float) -> None:
        """Fade the outputs to silence over ``ms`` (for shutdown); final: nothing brings them back."""
        ms = _num(ms, "fade_out_ms", 0.0, 600000.0, exc=ControlError)
        n = ms * self.samplerate / 1000.0
        self._fading_out = True
        self._env_target = 0.0
        self._env_active = True
        if n < 1.0:
            self._env_over_block = True
        else:
            self._env_over_block = False
            self._env_step = -max(self._env, 1e-9) / n

    @property
    def faded_out(self) -> bool:
        return self._fading_out and self._env == 0.0

    @property
    def envelope(self) -> float:
        """The output fade gain after the last block (0 silent .. 1 normal)."""
        return self._env

    # --------------------------------------------------------------- process
    def process(self, x: np.ndarray) -> np.ndarray:
        """Mix one block: x float32 (frames, n_inputs) -> view (frames, n_outputs).

        The result is a view of a preallocated buffer (its rows are not
        contiguous: copy it out with ``out[...] = y`` or ``np.copyto``), valid
        until the next call.  No allocation happens for a C-contiguous ``x``
        (for instance ``input_buffer(frames)``).
        """
        # The hot path: positional out= arguments and module-level function names,
        # because at 64 frames the per-call overhead is most of the cost.
        v = self._v
        sh = x.shape
        if sh != v.shape_in or x.dtype is not _F32:
            if x.dtype is not _F32 or len(sh) != 2 or sh[1] != self.n_inputs or not 1 <= sh[0] <= self.max_block:
                raise ValueError(f"Engine.process: expected float32 array of shape (frames, {self.n_inputs}) "
                                 f"with 1 <= frames <= {self.max_block}, got {x.dtype} {x.shape}")
            v = self._set_frames(sh[0])
        F = v.frames
        if not x.flags.c_contiguous:  # (allocates; pass C-contiguous blocks on the audio path)
            _copyto(v.xin, x)
            x = v.xin
        if self._nb:
            return self._process_nb(x, v)
        zx = v.zx

        # 1. input in, checked: the sum of squares is finite and small only if every sample is
        _copyto(zx, x)
        if not _vdot(x, x) <= 1.0e12:
            x = self._sanitize(x, v)

        # 2. the mix: one product, of [w*x | x] with [dG; Gc] while a ramp runs
        if self._target_pending:
            self._apply_target(F)
        if self._d_has_pending:
            self._delay_pending()
        ring_on = self._ring_on
        dest = self._ring[self._t:self._t + F] if ring_on else v.zy
        if self._ramp:
            q = self._q
            if q + F > v.wlim:
                self._fold()
                q = 0
            w = self._W[q:q + F]
            rem = self._L - self._p
            if rem < F:  # the ramp ends inside this block: hold the last weight
                _minimum(w, float(q + rem), out=v.wbuf)
                w = v.wbuf
            wxc = v.wxc
            _multiply(x, w, wxc)  # contiguous operands only (numpy buffers strided ones)
            _copyto(v.zwx, wxc)
            _matmul(v.zs, self._bk[1], dest)
            self._p += F
            self._q = q + F
            if self._p >= self._L:  # the ramp is over: the gains are the target, exactly
                self._bank_update(0.0, 0.0, 0.0, 0.0, 0.0, 1.0)
                self._ramp = False
                self._q = 0
        else:
            _matmul(zx, self._bk[2], dest)

        # 3. sub bus, 4. delays, 5. fades
        if self._has_sub:
            self._sub_bus(dest, v)
        if ring_on:
            self._delay_read(F, v)
        if self._env_active:
            self._envelope(F, v)

        # 6. meters of [x | y] in one pass: mean squares and squared peaks, then sqrt
        s_all = v.s_all
        _multiply(v.zall, v.zall, s_all)
        _matmul(v.ones, v.s_xy, v.mv_ms)
        for lo, hi in v.halves:  # long blocks: fold the squares in halves (contiguous, fast)
            _maximum(lo, hi, out=lo)
        _maxreduce(v.s_red, 0, None, v.mv_pk)
        mv = self._mv
        _sqrt(mv, mv)

        # 7. ceiling
        pk = _maxreduce(self.out_peak)
        if pk <= self._c32 and self._lim_g == 1.0:
            self.limiter_active = False
        else:
            self._limit(F, v, float(pk))
        self._started = True
        return v.zyo

    def _process_nb(self, x: np.ndarray, v: _Views) -> np.ndarray:
        """process() with the compiled kernels: in (copy, w*x, check, input meters), BLAS, out."""
        F = v.frames
        if not (x.flags.writeable and x.flags.aligned):  # another kernel signature: copy it
            _copyto(v.xin, x)
            x = v.xin
        if self._target_pending:
            self._apply_target(F)
        if self._d_has_pending:
            self._delay_pending()
        ring_on = self._ring_on
        dest = self._ring[self._t:self._t + F] if ring_on else v.zy
        if self._ramp:
            q = self._q
            if q + F > v.wlim:
                self._fold()
                q = 0
            rem = self._L - self._p
            bad = self._k_in(x, self._Z, self._Zi, F, float(q), float(q + rem) if rem < F else 1.0e30, True,
                             self._lim, self._lim_bits, self._acc, self._pki, self._mv)
            _matmul(v.zs, self._bk[1], dest)
            self._p += F
            self._q = q + F
            if self._p >= self._L:  # the ramp is over: the gains are the target, exactly
                self._bank_update(0.0, 0.0, 0.0, 0.0, 0.0, 1.0)
                self._ramp = False
                self._q = 0
        else:
            bad = self._k_in(x, self._Z, self._Zi, F, 0.0, 1.0e30, False, self._lim, self._lim_bits,
                             self._acc, self._pki, self._mv)
            _matmul(v.zx, self._bk[2], dest)
        if bad:
            self.nonfinite_count += bad
        if self._has_sub:
            self._sub_bus(dest, v)
        if ring_on:
            self._delay_read(F, v)
        if self._env_active:
            self._envelope(F, v)
        pk = self._k_out(self._Z, self._Zi, F, 2 * self.n_inputs, self._acc, self._pki, self._mv)
        if pk <= self._c32 and self._lim_g == 1.0:
            self.limiter_active = False
        else:
            self._limit(F, v, float(pk))
        self._started = True
        return v.zyo

    # ------------------------------------------------------------ rare paths
    def _sanitize(self, x: np.ndarray, v: _Views) -> np.ndarray:
        """Non-finite samples -> 0 (counted), the rest clamped to +-INPUT_LIMIT."""
        xin, mask = v.xin, v.mask
        if x is not xin:
            np.copyto(xin, x)
        np.isfinite(xin, out=mask)
        bad = mask.size - int(np.count_nonzero(mask))
        if bad:
            np.logical_not(mask, out=mask)
            np.copyto(xin, 0.0, where=mask)
            self.nonfinite_count += bad
        np.minimum(xin, INPUT_LIMIT, out=xin)
        np.maximum(xin, -INPUT_LIMIT, out=xin)
        np.copyto(v.zx, xin)
        return xin

    def _fold(self) -> None:
        self._bank_update(1.0, 0.0, 0.0, float(self._q), 1.0, 0.0)
        self._q = 0

    def _sub_bus(self, dest: np.ndarray, v: _Views) -> None:
        F = v.frames
        filt = self._filt
        filt.process(dest[:, self._Mb - 1], v.suby)
        if not filt.state_is_finite():  # defensive: never let the filter carry garbage
            filt.reset()
            v.suby[:] = 0.0
        for j, g in self._sub_gains:
            np.multiply(v.suby, g, out=v.subtmp)
            np.copyto(dest[:, j], v.subtmp)

    def _delay_pending(self) -> None:
        if self._ring is None:  # max_delay_ms = 0: set_delays only accepts zeros
            self._d_has_pending = False
            return
        if self._xf_pos >= 0:
            return  # wait for the running crossfade
        if np.array_equal(self._d_pending, self._d_cur):
            self._d_has_pending = False
            return
        if not self._started:  # nothing has played yet: no history to keep, no crossfade
            np.copyto(self._d_cur, self._d_pending)
            self._make_base(self._base_cur, self._d_cur)
            self._ring_on = bool(np.any(self._d_cur))
            self._d_has_pending = False
            return
        if not self._ring_on:
            if not np.any(self._d_pending):
                self._d_has_pending = False
                return
            self._ring_on = True
            self._hist = 0
        if self._hist >= int(self._d_pending.max()):
            np.copyto(self._d_new, self._d_pending)
            self._make_base(self._base_new, self._d_new)
            self._xf_pos = 0
            self._d_has_pending = False

    def _delay_read(self, F: int, v: _Views) -> None:
        t, R, Mb = self._t, self._ringR, self._Mb
        ring = self._ring
        if t + F > R:  # the write ran into the tail rows: copy them to the front
            np.copyto(ring[:t + F - R], ring[R:t + F])
        np.add(self._base_cur[:F], t * Mb, out=v.idx)
        np.take(self._ringflat, v.idx, out=v.tap_a, mode="wrap")
        if self._xf_pos >= 0:
            np.add(self._base_new[:F], t * Mb, out=v.idx)
            np.take(self._ringflat, v.idx, out=v.tap_b, mode="wrap")
            c = v.cbuf
            XL = float(self._xf_len)
            np.multiply(self._ar[:F], 1.0 / XL, out=c)
            c += self._xf_pos / XL
            np.minimum(c, 1.0, out=c)
            np.subtract(v.tap_b, v.tap_a, out=v.tap_b)
            np.copyto(v.full, c[:, None])
            np.multiply(v.tap_b, v.full, out=v.tap_b)
            np.add(v.tap_a, v.tap_b, out=v.tap_a)
            np.copyto(v.zyo, v.tap_a)
            self._xf_pos += F
            if self._xf_pos >= self._xf_len:
                self._xf_pos = -1
                np.copyto(self._d_cur, self._d_new)
                self._base_cur, self._base_new = self._base_new, self._base_cur
                if not np.any(self._d_cur) and not self._d_has_pending:
                    self._ring_on = False
        else:
            np.copyto(v.zyo, v.tap_a)
        self._t = (t + F) % R
        self._hist = min(self._hist + F, R)

    def _envelope(self, F: int, v: _Views) -> None:
        e, tgt = self._env, self._env_target
        zyo = v.zyo
        if e == tgt:
            if tgt == 0.0:
                zyo.fill(0.0)
            else:
                self._env_active = False  # back at unity: nothing to do until the next fade
            return
        over_block = self._env_over_block
        if over_block:
            step = (tgt - e) / F
            self._env_over_block = False
            self._env_step = step
        else:
            step = self._env_step
            if (tgt - e) * step <= 0.0:  # direction changed (e.g. panic off after a fade)
                step = math.copysign(abs(step) or 1.0 / F, tgt - e)
                self._env_step = step
        eb = v.ebuf
        np.multiply(self._ar[:F], step, out=eb)
        eb += e
        end = e + step * F
        if over_block or (step > 0 and end >= tgt) or (step < 0 and end <= tgt):
            if step > 0:
                np.minimum(eb, tgt, out=eb)
            else:
                np.maximum(eb, tgt, out=eb)
            eb[F - 1] = tgt
            self._env = tgt
        else:
            self._env = float(eb[F - 1])
        # zyo is a strided view: scale a contiguous copy (numpy buffers strided operands)
        np.copyto(v.yc, zyo)
        np.copyto(v.full, eb[:, None])
        np.multiply(v.yc, v.full, out=v.yc)
        np.copyto(zyo, v.yc)

    def _limit(self, F: int, v: _Views, pk: float) -> None:
        zyo, yc = v.zyo, v.yc
        c = self._c32
        np.copyto(yc, zyo)  # work on a contiguous copy
        g0 = self._lim_g
        if not math.isfinite(pk):  # defensive: cannot happen with bounded inputs and gains
            np.isfinite(yc, out=v.ymask)
            np.logical_not(v.ymask, out=v.ymask)
            np.copyto(yc, 0.0, where=v.ymask)
            pk = float(np.maximum.reduce(np.abs(yc, out=v.ysq), axis=None))
        elif pk <= c and g0 == 1.0:
            return
        need = c / pk if pk > c else 1.0
        rel = 1.0 - (1.0 - g0) * math.exp(-F / self._release)
        g1 = min(rel, need)
        if g1 > 0.99999:
            g1 = 1.0
        gb = self._gbuf[:F]
        if g1 < g0:  # attack: reach g1 within the attack time, then hold
            a = min(F, self._attack)
            np.multiply(self._ar[:F], 1.0 / a, out=gb)
            np.minimum(gb, 1.0, out=gb)
        else:  # release: straight line over the block
            np.multiply(self._ar[:F], 1.0 / F, out=gb)
        gb *= (g1 - g0)
        gb += g0
        np.copyto(v.full, gb[:, None])
        np.multiply(yc, v.full, out=yc)
        # last line of defence: nothing above the ceiling, ever
        np.minimum(yc, c, out=yc)
        np.maximum(yc, -c, out=yc)
        np.copyto(zyo, yc)
        self._lim_g = g1
        self.limiter_active = True
        self.limited_blocks += 1
        # output meters again, of what actually leaves
        ysq = v.ysq
        np.multiply(yc, yc, out=ysq)
        np.matmul(v.ones, ysq, out=self.out_rms)
        np.maximum.reduce(ysq, axis=0, out=self.out_peak)
        np.sqrt(self.out_rms, out=self.out_rms)
        np.sqrt(self.out_peak, out=self.out_peak)
