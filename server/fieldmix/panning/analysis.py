"""Localisation predictors for gain vectors (pure functions).

Gerzon, "General Metatheory of Auditory Localisation", AES 92nd Convention,
preprint 3306, 1992:
    velocity vector rV = sum_i g_i u_i / sum_i g_i
    energy vector   rE = sum_i g_i^2 u_i / sum_i g_i^2
"""

from __future__ import annotations

import numpy as np

from .. import geometry


def speaker_unit_vectors(layout) -> np.ndarray:
    """Unit vectors (n_speakers, 3) from the listener to every speaker (subs too)."""
    return geometry.unit(np.array([s.position for s in layout.speakers], dtype=np.float64).reshape(-1, 3))


def gerzon_vectors(gains, unit_vectors) -> tuple[np.ndarray, np.ndarray]:
    """(rV, rE), each (S, 3), for gains (S, K) and speaker unit vectors (K, 3).

    A row of all-zero gains gives zero vectors (never NaN).
    """
    g = np.atleast_2d(np.asarray(gains, dtype=np.float64))
    u = np.asarray(unit_vectors, dtype=np.float64)
    s1 = g.sum(axis=1, keepdims=True)
    g2 = g * g
    s2 = g2.sum(axis=1, keepdims=True)
    rv = np.divide(g @ u, s1, out=np.zeros((g.shape[0], 3)), where=s1 != 0.0)
    re = np.divide(g2 @ u, s2, out=np.zeros((g.shape[0], 3)), where=s2 != 0.0)
    return rv, re


def energy_spread_deg(re) -> np.ndarray:
    """A width figure from |rE|: 2 * arccos(|rE|) in degrees (0 = sharp).

    A fieldmix convention for reports (the arccos of |rE| is the half-angle
    of a cone whose mean direction has that length); 180 means no direction.
    """
    m = np.clip(np.linalg.norm(np.atleast_2d(re), axis=1), 0.0, 1.0)
    return 2.0 * np.degrees(np.arccos(m))
