"""Constants and small helpers shared by the panners (no I/O, no state).

The tolerances below are decisions of fieldmix (the methods themselves do not
fix them); docs/panning.md lists them for users.
"""

from __future__ import annotations

import numpy as np

#: ``pairwise`` uses the ear-level ring: main speakers with |elevation| <= this.
EAR_LEVEL_DEG = 10.0
#: ``vbap`` works in 2-D (pairs) when every main speaker has |elevation| <= this.
HORIZONTAL_TOL_DEG = 1.0
#: Two speakers whose directions (or, in 2-D, azimuths) are closer than this are
#: "the same direction": an amplitude panner cannot tell them apart.
DUPLICATE_DEG = 0.5
#: 3-D directions that all lie within this angle of one plane through the
#: listener are "coplanar": their convex hull has no volume.
COPLANAR_TOL_DEG = 1.0
#: A virtual speaker goes at the zenith (nadir) when no main speaker is higher
#: (lower) than this elevation.
POLE_COVER_DEG = 60.0
#: A hull face of unit vectors whose plane passes closer than this to the
#: listener (the centre of the unit sphere) is treated as a hole and gets a
#: virtual speaker along its outward normal.  sin(5 deg): such a face spans
#: almost a half sphere.
HOLE_OFFSET = float(np.sin(np.radians(5.0)))
#: ``pairwise``: a gap between neighbours wider than this is not panned across.
STOP_GAP_DEG = 180.0
#: ``vbap`` 2-D: a pair this close to opposite (180 deg) has no vector base
#: (the two vectors are parallel), so it is treated like a wider gap.
VBAP_OPPOSITE_DEG = 0.01
#: Gains down to -GAIN_TOL count as >= 0 when choosing the active triplet.
GAIN_TOL = 1e-9
#: A spread at or below this (degrees) is a point source.
POINT_SPREAD_DEG = 1e-9


class UnsuitableLayout(ValueError):
    """A panner cannot serve a layout; the context turns it into ConfigError."""


def normalise_power(g: np.ndarray) -> np.ndarray:
    """Scale every row of ``g`` (in place) to unit power (sum of squares 1).

    Rows that are all zero stay zero (never NaN).
    """
    norm = np.sqrt(np.einsum("ij,ij->i", g, g))
    inv = np.divide(1.0, norm, out=np.zeros_like(norm), where=norm > 0.0)
    g *= inv[:, None]
    return g


def as_positions(positions) -> np.ndarray:
    """Validate source positions: (S, 3) finite float64, else ValueError."""
    p = np.asarray(positions, dtype=np.float64)
    if p.ndim == 1 and p.shape[0] == 3:
        p = p[None, :]
    if p.ndim != 2 or p.shape[1] != 3:
        raise ValueError(f"positions must have shape (S, 3), got {p.shape}")
    if not np.all(np.isfinite(p)):
        bad = int(np.flatnonzero(~np.all(np.isfinite(p), axis=1))[0])
        raise ValueError(f"source position {bad} is not finite: {p[bad].tolist()}")
    return p


def as_spreads(spreads, n: int) -> np.ndarray:
    """Validate spreads (degrees): finite, broadcast to (S,), clipped to [0, 360]."""
    s = np.asarray(spreads, dtype=np.float64)
    try:
        s = np.broadcast_to(s, (n,))
    except ValueError:
        raise ValueError(f"spreads must have shape ({n},), got {s.shape}") from None
    if not np.all(np.isfinite(s)):
        bad = int(np.flatnonzero(~np.isfinite(s))[0])
        raise ValueError(f"spread of source {bad} is not finite: {s[bad]}")
    return np.clip(s, 0.0, 360.0)
