"""Spread by multiple directions (MDAP: V. Pulkki, "Uniform spreading of
amplitude panned virtual sources", IEEE WASPAA 1999).

A source with spread s degrees is rendered as a fixed number of virtual
directions around its direction; their (power-normalised) gains are summed
with weights and the sum is normalised to unit power again.  The number of
directions never changes with s, and each direction moves continuously with
s, so the gains are continuous in s; s = 0 puts every direction on the
source itself.

2-D: N directions at offsets s * ((k + 1/2) / N - 1/2), k = 0..N-1, equal
weights (the midpoint rule over the arc of width s).  At s = 360 they are
evenly spaced round the whole circle; with N even the set is unchanged by a
half turn.

3-D: the centre and R rings of M directions on cones of half-angle
theta_r = (s/2) * r / R around the source (alternate rings turned by half a
step).  Each direction's weight is the solid angle it stands for: the centre
the cap up to h/2, ring r the band theta_r +- h/2 (the outermost ring only
its inner half), h = (s/2) / R, so that at s = 360 the whole sphere is
sampled evenly rather than piling up at the antipode.

Towards full spread the finite set of directions leaves a small ripple that
depends on where the source points, so from 300 to 360 deg the MDAP gains are
cross-faded (in amplitude, then renormalised) into the layout's "everywhere"
vector E: the normalised mean of the point gains over the whole circle (2-D)
or sphere (3-D), i.e. the limit of MDAP at 360 deg with infinitely many
directions.  The fade weight is smoothstep((s - 300) / 60), so at 360 deg the
gains are E whatever the source direction (a source crossing the listener
passes through E), and the fade has no kink.
"""

from __future__ import annotations

import numpy as np

#: virtual directions of a 2-D spread source
N_2D = 64
#: rings and directions per ring of a 3-D spread source (plus the centre)
RINGS_3D = 6
PER_RING_3D = 16
#: spread (degrees) from which MDAP fades into the "everywhere" vector
FULL_FADE_FROM_DEG = 300.0


def circle_offsets(spread_deg: np.ndarray, n: int = N_2D) -> np.ndarray:
    """Azimuth offsets (S, n) in degrees for spreads (S,)."""
    k = (np.arange(n) + 0.5) / n - 0.5
    return np.asarray(spread_deg, dtype=np.float64)[:, None] * k[None, :]


def tangent_basis(c: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two unit vectors (S, 3) perpendicular to unit vectors c (S, 3) and to each other.

    Frisvad's construction (J. Graphics Tools 16(3), 2012; formula from memory,
    then re-orthonormalised; the tests check it): continuous everywhere except at
    the nadir, where a fixed basis is used.
    """
    x, y, z = c[:, 0], c[:, 1], c[:, 2]
    near_nadir = z < -1.0 + 1e-9
    a = 1.0 / np.where(near_nadir, 1.0, 1.0 + z)
    b = -x * y * a
    t1 = np.stack([1.0 - x * x * a, b, -x], axis=1)
    t2 = np.stack([b, 1.0 - y * y * a, -y], axis=1)
    if np.any(near_nadir):
        t1[near_nadir] = (0.0, -1.0, 0.0)
        t2[near_nadir] = (-1.0, 0.0, 0.0)
    # re-orthonormalise (the formula loses precision close to the nadir)
    t1 -= np.sum(t1 * c, axis=1, keepdims=True) * c
    t1 /= np.linalg.norm(t1, axis=1, keepdims=True)
    # t2 = c x t1, written out (np.cross is slow for short arrays; same products)
    t2 = np.empty_like(t1)
    t2[:, 0] = c[:, 1] * t1[:, 2] - c[:, 2] * t1[:, 1]
    t2[:, 1] = c[:, 2] * t1[:, 0] - c[:, 0] * t1[:, 2]
    t2[:, 2] = c[:, 0] * t1[:, 1] - c[:, 1] * t1[:, 0]
    return t1, t2


def cone_directions(centres: np.ndarray, spread_deg: np.ndarray, rings: int = RINGS_3D, per_ring: int = PER_RING_3D):
    """Directions (S, N, 3) and weights (S, N) (rows sum to 1) for 3-D spread.

    N = 1 + rings * per_ring.  Spreads must be > 0.
    """
    c = np.asarray(centres, dtype=np.float64)
    s = c.shape[0]
    half = np.radians(np.asarray(spread_deg, dtype=np.float64)) * 0.5  # (S,)
    h = half / rings
    r = np.arange(1, rings + 1)
    theta = h[:, None] * r[None, :]  # (S, R)
    phase = 2.0 * np.pi * (np.arange(per_ring)[None, :] + 0.5 * (r[:, None] % 2)) / per_ring  # (R, M)
    t1, t2 = tangent_basis(c)
    # ring directions: cos(theta) c + sin(theta) (cos(phi) t1 + sin(phi) t2), one
    # coordinate at a time on (S, R * M) arrays (the same products and sums as a
    # broadcast over (S, R, M, 3), without the length-3 innermost axis)
    cos_phi = np.cos(phase).ravel()[None, :]
    sin_phi = np.sin(phase).ravel()[None, :]
    cos_t = np.repeat(np.cos(theta), per_ring, axis=1)  # (S, R * M)
    sin_t = np.repeat(np.sin(theta), per_ring, axis=1)
    dirs = np.empty((s, 1 + rings * per_ring, 3))
    dirs[:, 0, :] = c
    for x in range(3):
        tang = cos_phi * t1[:, x, None]
        tang += sin_phi * t2[:, x, None]
        tang *= sin_t
        ring = cos_t * c[:, x, None]
        ring += tang
        dirs[:, 1:, x] = ring
    # solid-angle weights, written with products of sines (no 1 - cos cancellation)
    w_centre = 2.0 * np.sin(h / 4.0) ** 2  # 1 - cos(h/2)
    w_ring = 2.0 * np.sin(theta) * np.sin(h / 2.0)[:, None] / per_ring  # bands theta_r +- h/2
    w_ring[:, -1] = 2.0 * np.sin(half - h / 4.0) * np.sin(h / 4.0) / per_ring  # last: inner half only
    w = np.concatenate([w_centre[:, None], np.repeat(w_ring, per_ring, axis=1)], axis=1)
    w /= w.sum(axis=1, keepdims=True)
    return dirs, w


def full_fade(spread_deg) -> np.ndarray:
    """Weight (S,) of the "everywhere" vector: smoothstep from 300 to 360 deg."""
    x = np.clip((np.asarray(spread_deg, dtype=np.float64) - FULL_FADE_FROM_DEG)
                / (360.0 - FULL_FADE_FROM_DEG), 0.0, 1.0)
    return x * x * (3.0 - 2.0 * x)


def fibonacci_sphere(n: int) -> np.ndarray:
    """n nearly evenly spread unit vectors (the Fibonacci lattice; geometry, no source)."""
    k = np.arange(n) + 0.5
    z = 1.0 - 2.0 * k / n
    r = np.sqrt(np.maximum(0.0, 1.0 - z * z))
    phi = np.pi * (3.0 - np.sqrt(5.0)) * k
    return np.stack([r * np.cos(phi), r * np.sin(phi), z], axis=1)


def everywhere_vector(point_gains: np.ndarray) -> np.ndarray:
    """E (K,): the normalised mean of point gains (D, K) over evenly spread directions."""
    e = np.asarray(point_gains, dtype=np.float64).mean(axis=0)
    n = np.linalg.norm(e)
    return e / n if n > 0.0 else np.full(e.shape, 1.0 / np.sqrt(e.size))
