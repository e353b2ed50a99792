"""Horizontal rings: neighbour pairs, the gap rule, and the constant-power law.

A :class:`Ring` is a set of speakers sorted by azimuth.  For a source azimuth
it finds the neighbouring pair (i, j) that encloses it (j follows i
counter-clockwise, i.e. to the left) and the fraction p in [0, 1] of the way
from i to j.  A gap wider than the ring's ``stop_deg`` is not panned across:
p snaps to 0 in the half of the gap nearer i and to 1 in the half nearer j
(a pan pot at its stop); exactly in the middle both edges get p = 1/2.

``pairwise`` applies the constant-power sine/cosine law to (i, j, p):
g_i = cos(p * 90 deg), g_j = sin(p * 90 deg) (common practice, no source).
``vbap`` in 2-D uses the same ring with the vector-base law (see vbap.py).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from .common import DUPLICATE_DEG, STOP_GAP_DEG, UnsuitableLayout


class Ring:
    """Speakers of a horizontal ring, sorted by azimuth.

    ``azimuths`` are degrees (+ = left) of the ring's members in the caller's
    order; ``ids`` name them in error messages.  Gains come back in the
    caller's member order.
    """

    def __init__(self, azimuths: Sequence[float], ids: Sequence[str], stop_deg: float = STOP_GAP_DEG):
        az = np.mod(np.asarray(azimuths, dtype=np.float64), 360.0)
        if az.ndim != 1 or az.size < 2:
            raise UnsuitableLayout(f"needs at least 2 speakers in the ring, found {az.size}")
        order = np.argsort(az, kind="stable")
        self.n = int(az.size)
        self.order = order  # order[k] = caller's index of the k-th speaker by azimuth
        self.az = az[order]
        self.width = np.mod(np.roll(self.az, -1) - self.az, 360.0)
        close = np.flatnonzero(self.width < DUPLICATE_DEG)
        if close.size:
            k = int(close[0])
            a, b = ids[order[k]], ids[order[(k + 1) % self.n]]
            raise UnsuitableLayout(
                f'speakers "{a}" and "{b}" have the same azimuth ({self.az[k]:.1f} deg) '
                f"in the ring: they cannot be told apart by panning; move one of them"
            )
        self.stop_deg = float(stop_deg)
        self.stop = self.width > self.stop_deg

    def locate(self, azimuth_deg: np.ndarray):
        """For azimuths (D,) return (i, j, p, t): sorted pair indices, fraction, angle past i.

        ``p`` already follows the gap rule (0 or 1 inside a stop gap);
        ``t`` is the angle in degrees from speaker i to the source (before the rule).
        """
        a = np.mod(np.asarray(azimuth_deg, dtype=np.float64), 360.0)
        i = np.searchsorted(self.az, a, side="right") - 1
        i[i < 0] = self.n - 1
        j = i + 1
        j[j == self.n] = 0
        w = self.width[i]
        t = np.clip(np.mod(a - self.az[i], 360.0), 0.0, w)
        p = t / w
        stop = self.stop[i]
        if np.any(stop):
            # the nearer edge; exactly in the middle (to 1e-9 deg) both edges alike
            half = 0.5 * w
            snapped = np.where(np.abs(t - half) <= 1e-9, 0.5, (t > half).astype(np.float64))
            p = np.where(stop, snapped, p)
        return i, j, p, t

    def scatter(self, i, j, gi, gj) -> np.ndarray:
        """Gains (D, n) in the caller's member order from per-row pair gains."""
        d = i.shape[0]
        out = np.zeros((d, self.n))
        rows = np.arange(d)
        out[rows, self.order[i]] = gi
        out[rows, self.order[j]] = gj
        return out


def sine_cosine(p: np.ndarray):
    """Constant-power pan law for fraction p in [0, 1] (common practice, no source)."""
    q = np.asarray(p, dtype=np.float64) * (0.5 * np.pi)
    return np.cos(q), np.sin(q)


def pairwise_gains(ring: Ring, azimuth_deg) -> np.ndarray:
    """Constant-power pairwise gains (D, n) for source azimuths (D,) on ``ring``.

    Squares sum to 1 in every row.
    """
    i, j, p, _ = ring.locate(np.atleast_1d(np.asarray(azimuth_deg, dtype=np.float64)))
    gi, gj = sine_cosine(p)
    return ring.scatter(i, j, gi, gj)
