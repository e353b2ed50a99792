"""Vector Base Amplitude Panning (V. Pulkki, JAES 45(6), 456-466, 1997).

2-D: the active pair of a horizontal ring (see :class:`pairwise.Ring`); the
gains g = p^T L^-1 of a pair have the closed form (Cramer's rule)
g_i = sin(w - t) / sin(w), g_j = sin(t) / sin(w) for a pair w degrees wide and
a source t degrees past speaker i; after power normalisation the common
factor 1/sin(w) drops out.

3-D: triplets are the faces of the convex hull of the speaker unit vectors
(scipy.spatial.ConvexHull).  For each direction p the face whose gains
p^T L^-1 are all >= 0 is chosen (robustly: the face with the largest smallest
gain), the gains are clipped at 0 and normalised to unit power.

Virtual speakers close a hull that does not surround the listener:
  * one at the zenith when no main speaker is higher than 60 deg, one at the
    nadir when none is lower than -60 deg;
  * then, while some hull face's plane passes within sin(5 deg) of the
    listener (a face spanning almost half the sphere, or the listener outside
    the hull), one more along that face's outward normal.
A virtual speaker has no output: its power g_v^2 is shared equally among the
real speakers adjacent to it in the hull (g_i <- sqrt(g_i^2 + g_v^2 / N_v)),
then the row is renormalised.  Power is kept, and gains stay continuous
across face edges because a virtual's gain is 0 on the edges opposite it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from .common import (
    COPLANAR_TOL_DEG,
    DUPLICATE_DEG,
    HOLE_OFFSET,
    POLE_COVER_DEG,
    VBAP_OPPOSITE_DEG,
    UnsuitableLayout,
    normalise_power,
)
from .pairwise import Ring

_CHUNK = 512  # directions per block in vbap3d_gains (bounds the (D, T, 3) scratch)


# ----------------------------------------------------------------------------- 2-D


def vbap2d_ring(azimuths: Sequence[float], ids: Sequence[str]) -> Ring:
    """The ring for 2-D VBAP: pairs up to (almost) 180 deg wide are panned across."""
    return Ring(azimuths, ids, stop_deg=180.0 - VBAP_OPPOSITE_DEG)


def vbap2d_gains(ring: Ring, azimuth_deg) -> np.ndarray:
    """2-D VBAP gains (D, n), power-normalised, for source azimuths (D,)."""
    i, j, p, t = ring.locate(np.atleast_1d(np.asarray(azimuth_deg, dtype=np.float64)))
    w = ring.width[i]
    gi = np.sin(np.radians(w - t))
    gj = np.sin(np.radians(t))
    stop = ring.stop[i]
    if np.any(stop):
        gi = np.where(stop, 1.0 - p, gi)
        gj = np.where(stop, p, gj)
    np.maximum(gi, 0.0, out=gi)
    np.maximum(gj, 0.0, out=gj)
    norm = np.hypot(gi, gj)
    gi = gi / norm
    gj = gj / norm
    return ring.scatter(i, j, gi, gj)


# ----------------------------------------------------------------------------- 3-D


@dataclass(frozen=True, eq=False)
class VbapMesh:
    """The triplets of a 3-D layout.

    ``vectors`` holds the unit vectors of the ``n_real`` real speakers (in the
    order given to :func:`build_mesh`) followed by the virtual ones.
    ``triangles`` (T, 3) index ``vectors``; ``inverses`` (T, 3, 3) are L^-1 with
    the rows of L the triangle's vectors; ``share`` (V, n_real) says how each
    virtual speaker's power is spread over the real speakers.
    """

    vectors: np.ndarray
    n_real: int
    triangles: np.ndarray
    inverses: np.ndarray
    share: np.ndarray
    flat: np.ndarray = field(repr=False)  # (3, 3T): inverses laid out for one matmul

    @property
    def virtual(self) -> np.ndarray:
        """Unit vectors (V, 3) of the virtual speakers."""
        return self.vectors[self.n_real:]

    @property
    def real_triangles(self) -> np.ndarray:
        """(T,) bool: the triangle has only real speakers."""
        return np.all(self.triangles < self.n_real, axis=1)


def _check_directions(u: np.ndarray, ids: Sequence[str]) -> None:
    k = u.shape[0]
    if k >= 2:
        c = np.clip(u @ u.T, -1.0, 1.0)
        c[np.tril_indices(k)] = -1.0
        a, b = np.unravel_index(int(np.argmax(c)), c.shape)
        if c[a, b] > np.cos(np.radians(DUPLICATE_DEG)):
            raise UnsuitableLayout(
                f'speakers "{ids[a]}" and "{ids[b]}" lie in the same direction from the listener '
                f"({np.degrees(np.arccos(c[a, b])):.2f} deg apart): VBAP cannot tell them apart; "
                f'move one of them, or use "dbap"'
            )
    if k < 3:
        raise UnsuitableLayout(
            f"all speakers lie in one plane through the listener ({k} speaker(s)); "
            f'3-D VBAP needs at least 3 directions out of one plane; use "pairwise" or "dbap"'
        )
    _, _, vt = np.linalg.svd(u, full_matrices=False)
    normal = vt[-1]
    if np.max(np.abs(u @ normal)) < np.sin(np.radians(COPLANAR_TOL_DEG)):
        tilt = float(np.degrees(np.arccos(min(1.0, abs(normal[2])))))
        raise UnsuitableLayout(
            "all speakers lie in one plane through the listener "
            f"(tilted {tilt:.1f} deg from horizontal), so their directions enclose no volume; "
            "3-D VBAP needs speakers out of that plane: add one above or below it, "
            'give a horizontal ring elevations within 1 deg of 0 (2-D pairs), or use "pairwise" or "dbap"'
        )


def build_mesh(unit_vectors, ids: Sequence[str]) -> VbapMesh:
    """Triangulate speaker directions (K, 3) for 3-D VBAP, adding virtual speakers.

    Raises :class:`UnsuitableLayout` for duplicate or coplanar directions.
    """
    from scipy.spatial import ConvexHull, QhullError

    u = np.asarray(unit_vectors, dtype=np.float64)
    u = u / np.linalg.norm(u, axis=1, keepdims=True)
    _check_directions(u, ids)
    k = u.shape[0]
    elev = np.degrees(np.arcsin(np.clip(u[:, 2], -1.0, 1.0)))
    virtual: list[np.ndarray] = []
    if elev.max() < POLE_COVER_DEG:
        virtual.append(np.array([0.0, 0.0, 1.0]))
    if elev.min() > -POLE_COVER_DEG:
        virtual.append(np.array([0.0, 0.0, -1.0]))
    for _ in range(32):
        pts = np.vstack([u] + virtual) if virtual else u
        try:
            hull = ConvexHull(pts)
        except QhullError as exc:  # pragma: no cover - coplanar cases are caught above
            raise UnsuitableLayout(f"the speaker directions have no convex hull ({exc.args[0].splitlines()[0]})")
        offsets = -hull.equations[:, 3]
        worst = int(np.argmin(offsets))
        if offsets[worst] > HOLE_OFFSET:
            break
        n = hull.equations[worst, :3]
        virtual.append(n / np.linalg.norm(n))
    else:  # pragma: no cover - needs a pathological layout
        raise UnsuitableLayout("the speakers leave holes that virtual speakers cannot close")
    tri = np.asarray(hull.simplices, dtype=np.intp)
    missing = np.setdiff1d(np.arange(k), tri.ravel())
    if missing.size:  # pragma: no cover - every point on a sphere is a hull vertex
        raise UnsuitableLayout(f'speaker "{ids[int(missing[0])]}" is not a corner of the speaker hull')
    mats = pts[tri]  # (T, 3, 3), rows = vectors
    inverses = np.linalg.inv(mats)
    nv = len(virtual)
    share = np.zeros((nv, k))
    for v in range(nv):
        touching = tri[np.any(tri == k + v, axis=1)].ravel()
        nb = np.unique(touching[touching < k])
        if nb.size == 0:
            nb = np.arange(k)
        share[v, nb] = 1.0 / nb.size
    flat = np.ascontiguousarray(inverses.transpose(1, 0, 2).reshape(3, -1))
    return VbapMesh(vectors=pts, n_real=k, triangles=tri, inverses=inverses, share=share, flat=flat)


def _raw_block(mesh: VbapMesh, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    t = mesh.triangles.shape[0]
    all_g = (p @ mesh.flat).reshape(p.shape[0], t, 3)
    # smallest gain of every triangle (np.minimum on strided views: a
    # reduction over a length-3 axis is many times slower in numpy)
    low = np.minimum(np.minimum(all_g[:, :, 0], all_g[:, :, 1]), all_g[:, :, 2])
    best = np.argmax(low, axis=1)
    g = all_g[np.arange(p.shape[0]), best]
    np.maximum(g, 0.0, out=g)
    return best, normalise_power(g)


def vbap3d_raw(mesh: VbapMesh, directions) -> tuple[np.ndarray, np.ndarray]:
    """Active triangle (D,) and its clipped, power-normalised gains (D, 3).

    The active triangle is the one whose smallest gain p^T L^-1 is largest:
    it is >= 0 exactly for the triangles that contain p.
    """
    p = np.asarray(directions, dtype=np.float64)
    d = p.shape[0]
    best = np.empty(d, dtype=np.intp)
    g = np.empty((d, 3))
    for start in range(0, d, _CHUNK):
        stop = min(d, start + _CHUNK)
        best[start:stop], g[start:stop] = _raw_block(mesh, p[start:stop])
    return best, g


def vbap3d_gains(mesh: VbapMesh, directions) -> np.ndarray:
    """3-D VBAP gains (D, n_real) for unit directions (D, 3), power-normalised.

    Virtual speakers' power is shared among their real neighbours.
    Works in blocks of a few hundred directions (keeps the scratch in cache).
    """
    p = np.asarray(directions, dtype=np.float64)
    d = p.shape[0]
    k = mesh.n_real
    kv = mesh.vectors.shape[0]
    out = np.empty((d, k))
    for start in range(0, d, _CHUNK):
        stop = min(d, start + _CHUNK)
        n = stop - start
        best, g = _raw_block(mesh, p[start:stop])
        power = np.zeros((n, kv))
        # the three corners of a triangle are distinct, so a plain put is enough
        np.put(power, (np.arange(n) * kv)[:, None] + mesh.triangles[best], g * g)
        if kv == k:
            np.sqrt(power, out=out[start:stop])
            continue
        real = power[:, :k]
        real += power[:, k:] @ mesh.share
        np.sqrt(real, out=real)
        out[start:stop] = normalise_power(real)
    return out
