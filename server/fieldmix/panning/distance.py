"""The distance rule shared by every position-based panner.

Level (inverse distance law, -6.02 dB per doubling; physics):
    a(d) = 1                          for d <= ref
    a(d) = max(ref / d, 10^(F/20))    for d >  ref
with ref = options.reference_distance (default: the mean distance of the
main speakers) and F = options.distance_floor_db.

Near the listener (pairwise and vbap; dbap needs nothing, see docs):
    s_eff = s + (360 - s) * b(d / r_n),   b(x) = (1 + cos(pi x)) / 2 for x < 1, else 0
with r_n = options.near_radius (default ref / 2).  b is 1 at the centre, 0 at
r_n and flat at both ends, so the spread grows smoothly to 360 deg as a
source comes to the listener.
"""

from __future__ import annotations

import numpy as np


def distance_gain(d, ref: float, floor_db: float) -> np.ndarray:
    """Linear level factor for distances d (S,) in metres."""
    d = np.asarray(d, dtype=np.float64)
    floor = 10.0 ** (floor_db / 20.0)
    with np.errstate(divide="ignore"):
        g = np.where(d > ref, ref / np.maximum(d, ref), 1.0)
    return np.maximum(g, floor)


def near_blend(d, near_radius: float) -> np.ndarray:
    """b(d / r_n): 1 at the listener, falling smoothly to 0 at r_n (0 beyond)."""
    d = np.asarray(d, dtype=np.float64)
    if near_radius <= 0.0:
        return np.zeros_like(d)
    x = np.minimum(d / near_radius, 1.0)
    return 0.5 * (1.0 + np.cos(np.pi * x))


def near_spread(spread_deg, d, near_radius: float) -> np.ndarray:
    """Effective spread (S,) in degrees: grows to 360 at the listener."""
    s = np.asarray(spread_deg, dtype=np.float64)
    return s + (360.0 - s) * near_blend(d, near_radius)
