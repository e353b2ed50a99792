"""Distance-Based Amplitude Panning (T. Lossius, P. Baltazar, T. de la Hogue,
"DBAP - Distance-Based Amplitude Panning", ICMC 2009).

    v_i = k * w_i / d_i^a,   a = R / (20 log10 2),
    d_i = sqrt(|x - x_i|^2 + r_s^2),   k such that sum_i v_i^2 = 1,

for a rolloff of R dB per doubling of distance (R = 6 -> a = 0.9966), spatial
blur r_s (metres) and speaker weights w_i >= 0.

Spread (fieldmix's mapping): a spread of s degrees widens the blur to
    r_s'^2 = r_s^2 + D^2 tan^2(s / 4)
with D the reference distance of the layout: s = 180 gives a blur as large as
the layout, s = 360 an infinite blur (every speaker at its weight).  It is
computed as d_i'^2 = (|x - x_i|^2 + r_s^2) cos^2(s/4) + D^2 sin^2(s/4), which
is r_s'^2 scaled by cos^2(s/4) (the scale cancels in the normalisation) and
stays finite at s = 360.
"""

from __future__ import annotations

import numpy as np

from .common import normalise_power


def dbap_exponent(rolloff_db: float) -> float:
    """a = R / (20 log10 2) (Lossius et al. 2009)."""
    return float(rolloff_db) / (20.0 * np.log10(2.0))


def dbap_gains(sources, speakers, weights, rolloff_db: float, blur: float,
               spread_deg=None, spread_distance: float = 1.0) -> np.ndarray:
    """DBAP gains (S, K), power-normalised.

    ``sources`` (S, 3) and ``speakers`` (K, 3) in metres, ``weights`` (K,).
    ``spread_deg`` (S,) widens the blur (see module doc); ``spread_distance``
    is D, the layout's reference distance.
    """
    x = np.asarray(sources, dtype=np.float64)
    xs = np.asarray(speakers, dtype=np.float64)
    w = np.asarray(weights, dtype=np.float64)
    out = np.zeros((x.shape[0], xs.shape[0]))
    active = np.flatnonzero(w > 0.0)  # weight-0 speakers stay silent
    if active.size == 0 or x.shape[0] == 0:
        return out
    xs = xs[active]
    diff = x[:, None, :] - xs[None, :, :]
    d2 = np.einsum("skc,skc->sk", diff, diff) + blur * blur
    if spread_deg is not None:
        q = np.radians(np.asarray(spread_deg, dtype=np.float64)) * 0.25
        d2 = d2 * (np.cos(q) ** 2)[:, None] + (spread_distance * np.sin(q))[:, None] ** 2
    # scale by the nearest speaker's distance so neither overflow nor underflow
    # can silence a row (and a source on a speaker with no blur gets that speaker)
    d2 = np.maximum(d2, 1e-300)
    ratio = d2.min(axis=1, keepdims=True) / d2
    a = dbap_exponent(rolloff_db)
    out[:, active] = w[active][None, :] * ratio ** (0.5 * a)
    return normalise_power(out)
