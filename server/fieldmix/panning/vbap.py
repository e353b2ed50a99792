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

Finding the active face fast: :func:`build_mesh` also builds a lookup from a
cube-map grid of directions (6 faces x GRID x GRID cells) to the faces whose
cone can meet each cell (``TriangleLookup``).  A direction's gains are first
computed on its cell's candidates only; a candidate whose smallest gain is
>= 0 contains the direction, so it is the face the search over all faces would
pick (up to a tie on a shared edge or corner, where both give the same gains
to rounding).  A direction for which no candidate qualifies falls back to the
search over all faces, so the result never depends on the grid.
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
)
from .pairwise import Ring

_CHUNK = 512  # directions per block of the search over all faces (bounds the (D, T, 3) scratch)
GRID = 32  # cells per cube-map face edge in the face lookup
_WIDE = 8  # most candidates kept per cell; a cell with more always uses the full search
_SMALL = 384  # below this many directions the full search is faster than the lookup (measured)
_OTHER = np.array([[1, 2], [0, 2], [0, 1]], dtype=np.intp)  # the two face coordinates of a cube face


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
class TriangleLookup:
    """Candidate faces per cube-map cell (see the module docstring).

    ``first_id`` (C,): each cell's most likely face (the one whose cone holds
    the cell centre, else any candidate) and ``first_t`` (9, C) its inverse,
    the 9 entries of L^-1 row by row, as columns; ``cand`` (C, W) the
    candidate faces of each cell (padded by repeating the first), ``cand_inv``
    (C, 3, 3 W) their inverses side by side (p @ cand_inv[c] gives the W gain
    triples of cell c at once); ``overflow`` (C,) bool: the cell has more than
    W candidates (or none), so its directions always use the full search.
    """

    grid: int
    first_id: np.ndarray
    first_t: np.ndarray
    cand: np.ndarray
    cand_inv: np.ndarray
    overflow: np.ndarray


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
    lookup: TriangleLookup | None = field(default=None, repr=False)
    virtual_corner: np.ndarray = field(default=None, repr=False)  # (T,) bool: has a virtual corner
    triangles_t: np.ndarray = field(default=None, repr=False)  # (3, T): ``triangles`` as columns

    def __post_init__(self):
        if self.virtual_corner is None:
            object.__setattr__(self, "virtual_corner", np.any(self.triangles >= self.n_real, axis=1))
        if self.triangles_t is None:
            object.__setattr__(self, "triangles_t", np.ascontiguousarray(self.triangles.T))

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
    return VbapMesh(vectors=pts, n_real=k, triangles=tri, inverses=inverses, share=share, flat=flat,
                    lookup=build_lookup(inverses))


def build_lookup(inverses: np.ndarray, grid: int = GRID, width: int = _WIDE) -> TriangleLookup:
    """The cube-map face lookup for triangle inverses (T, 3, 3).

    On the cube face x[axis] = +-1 every direction is a positive multiple of a
    point (u, v) of the face, and the cone of a triangle is where the three
    gains x L^-1 are >= 0: three half-planes, linear in (u, v).  A triangle is
    a candidate of a cell when each of its gains is >= 0 at some corner of the
    cell (a superset of the triangles that meet the cell; exactness is not
    needed, as results are checked and a miss falls back to the full search).
    """
    margin = 1e-9 * np.linalg.norm(inverses, axis=1)  # (T, 3): a little more than rounding
    edges = np.linspace(-1.0, 1.0, grid + 1)
    mids = 0.5 * (edges[:-1] + edges[1:])
    corners = np.array([[-1.0, -1.0], [-1.0, 1.0], [1.0, -1.0], [1.0, 1.0]])
    cells, tris, depth = [], [], []
    for axis in range(3):
        a, b = _OTHER[axis]
        for sign in (1.0, -1.0):
            # the same test on the whole face first: only those triangles go on
            xf = np.zeros((4, 3))
            xf[:, axis] = sign
            xf[:, [a, b]] = corners
            gf = np.einsum("ij,tjk->itk", xf, inverses).max(axis=0)  # (T, 3)
            sel = np.flatnonzero(np.all(gf >= -margin, axis=1))
            ts = sel.size
            fsel = inverses[sel].transpose(1, 0, 2).reshape(3, -1)
            msel = margin[sel]
            # gains at (u, v) on the face: sign * row[axis] + u * row[a] + v * row[b];
            # their largest value over a cell's corners is separable in u and v
            base = sign * fsel[axis]  # (3 ts,)
            au = edges[:, None] * fsel[a][None, :]  # (G + 1, 3 ts)
            bv = edges[:, None] * fsel[b][None, :]
            mu = np.maximum(au[:-1], au[1:])  # (G, 3 ts)
            mv = np.maximum(bv[:-1], bv[1:])
            ok = (mu[:, None, :] + mv[None, :, :]).reshape(grid, grid, ts, 3) >= -(msel + base.reshape(ts, 3))
            ok = (ok[..., 0] & ok[..., 1] & ok[..., 2]).reshape(grid * grid, ts)
            gc = (base + mids[:, None, None] * fsel[a][None, None, :]) + mids[None, :, None] * fsel[b][None, None, :]
            low = _lowest(gc.reshape(grid * grid, ts, 3))
            cell, j = np.nonzero(ok)
            face = 2 * axis + (sign < 0.0)
            cells.append(cell + face * grid * grid)
            tris.append(sel[j])
            depth.append(low[cell, j])
    # (cell, triangle) pairs, in each cell the deepest at the cell centre first
    cell = np.concatenate(cells)
    tri = np.concatenate(tris)
    depth = np.concatenate(depth)
    order = np.lexsort((tri, -depth, cell))
    cell, tri = cell[order], tri[order]
    n_cells = 6 * grid * grid
    count = np.bincount(cell, minlength=n_cells)
    w = int(min(width, max(1, count.max())))
    rank = np.arange(cell.size) - np.repeat(np.cumsum(count) - count, count)
    keep = rank < w
    cand = np.zeros((n_cells, w), dtype=np.intp)
    cand[cell[keep], rank[keep]] = tri[keep]
    pad = np.arange(w)[None, :] >= count[:, None]
    cand = np.where(pad, cand[:, :1], cand)
    overflow = (count > w) | (count == 0)
    first_id = np.ascontiguousarray(cand[:, 0])
    return TriangleLookup(grid=grid, first_id=first_id, first_t=np.ascontiguousarray(inverses[first_id].reshape(-1, 9).T),
                          cand=cand,
                          cand_inv=np.ascontiguousarray(inverses[cand].transpose(0, 2, 1, 3).reshape(n_cells, 3, 3 * w)),
                          overflow=overflow)


def _cells(lookup: TriangleLookup, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Cube-map cell (D,) of every direction given as columns p (3, D), and whether it
    has one (not zero, finite)."""
    x, y, z = p
    ax, ay, az = np.abs(x), np.abs(y), np.abs(z)
    on_x = (ax >= ay) & (ax >= az)  # the same tie order as argmax: x, then y, then z
    on_y = ~on_x & (ay >= az)
    on_z = ~(on_x | on_y)
    m = np.where(on_x, ax, np.where(on_y, ay, az))
    ok = np.isfinite(m) & (m > 0.0)
    if not ok.all():
        m = np.where(ok, m, 1.0)
    main = np.where(on_x, x, np.where(on_y, y, z))
    half = 0.5 * lookup.grid
    scale = half / m
    # face coordinates: (y, z) on an x face, (x, z) on a y face, (x, y) on a z face
    u = np.where(on_x, y, x) * scale
    v = np.where(on_z, y, z) * scale
    u += half
    v += half
    top = lookup.grid - 1
    if not ok.all():
        np.nan_to_num(u, copy=False)
        np.nan_to_num(v, copy=False)
    i = np.clip(u, 0, top).astype(np.intp)
    j = np.clip(v, 0, top).astype(np.intp)
    face = on_y * 2 + on_z * 4 + (main < 0.0)
    return (face * lookup.grid + i) * lookup.grid + j, ok


def _lowest(g: np.ndarray) -> np.ndarray:
    return np.minimum(np.minimum(g[..., 0], g[..., 1]), g[..., 2])


def _select(mesh: VbapMesh, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Active triangle (D,) and its raw gains p^T L^-1 as columns (3, D), the same choice
    as the full search.  Works on coordinate columns: numpy is much faster on (D,)
    arrays than on (D, 3) rows."""
    d = p.shape[0]
    lk = mesh.lookup
    if lk is None or d < _SMALL:
        best, g = _search_all(mesh, p)
        return best, np.ascontiguousarray(g.T)
    pc = np.ascontiguousarray(p.T)  # (3, D)
    cell, ok = _cells(lk, pc)
    # pass 1: the cell's most likely triangle only
    f = np.take(lk.first_t, cell, axis=1)  # (9, D): L^-1 of that triangle, row by row
    x, y, z = pc
    g = np.empty((3, d))
    for c in range(3):
        np.multiply(x, f[c], out=g[c])
        g[c] += y * f[3 + c]
        g[c] += z * f[6 + c]
    best = np.take(lk.first_id, cell)
    todo = np.flatnonzero(~((_lowest_cols(g) >= 0.0) & ok))
    if todo.size:
        # pass 2: every candidate of the cell
        c2 = cell[todo]
        p2 = p[todo]
        w = lk.cand.shape[1]
        g2 = np.einsum("dj,djk->dk", p2, np.take(lk.cand_inv, c2, axis=0)).reshape(todo.size, w, 3)
        low2 = _lowest(g2)
        k2 = np.argmax(low2, axis=1)
        r2 = np.arange(todo.size)
        done = (low2[r2, k2] >= 0.0) & ok[todo] & ~lk.overflow[c2]
        best[todo] = lk.cand[c2, k2]
        g[:, todo] = g2[r2, k2].T
        rest = todo[~done]
        if rest.size:
            # pass 3: no candidate contains the direction: search every triangle
            b3, g3 = _search_all(mesh, p[rest])
            best[rest] = b3
            g[:, rest] = g3.T
    return best, g


def _lowest_cols(g: np.ndarray) -> np.ndarray:
    return np.minimum(np.minimum(g[0], g[1]), g[2])


def _search_all(mesh: VbapMesh, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The full search: for every direction the triangle with the largest smallest gain."""
    d = p.shape[0]
    best = np.empty(d, dtype=np.intp)
    g = np.empty((d, 3))
    t = mesh.triangles.shape[0]
    for start in range(0, d, _CHUNK):
        stop = min(d, start + _CHUNK)
        all_g = (p[start:stop] @ mesh.flat).reshape(stop - start, t, 3)
        # smallest gain of every triangle (np.minimum on strided views: a
        # reduction over a length-3 axis is many times slower in numpy)
        b = np.argmax(_lowest(all_g), axis=1)
        best[start:stop] = b
        g[start:stop] = all_g[np.arange(stop - start), b]
    return best, g


def _raw_columns(mesh: VbapMesh, p: np.ndarray, exhaustive: bool) -> tuple[np.ndarray, np.ndarray]:
    """Active triangle (D,) and its clipped, power-normalised gains as columns (3, D)."""
    if exhaustive:
        best, g = _search_all(mesh, p)
        g = np.ascontiguousarray(g.T)
    else:
        best, g = _select(mesh, p)
    np.maximum(g, 0.0, out=g)
    # normalise_power, written out for three columns (a row of zeros stays zero)
    norm = np.sqrt(g[0] * g[0] + g[1] * g[1] + g[2] * g[2])
    inv = np.divide(1.0, norm, out=np.zeros_like(norm), where=norm > 0.0)
    g *= inv
    return best, g


def vbap3d_raw(mesh: VbapMesh, directions, exhaustive: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Active triangle (D,) and its clipped, power-normalised gains (D, 3).

    The active triangle is the one whose smallest gain p^T L^-1 is largest:
    it is >= 0 exactly for the triangles that contain p.  ``exhaustive`` skips
    the face lookup and tests every triangle (same result; for tests).
    """
    best, g = _raw_columns(mesh, np.asarray(directions, dtype=np.float64), exhaustive)
    return best, np.ascontiguousarray(g.T)


def vbap3d_gains(mesh: VbapMesh, directions, exhaustive: bool = False) -> np.ndarray:
    """3-D VBAP gains (D, n_real) for unit directions (D, 3), power-normalised.

    Virtual speakers' power is shared among their real neighbours.
    ``exhaustive`` skips the face lookup (same result; for tests).
    """
    p = np.asarray(directions, dtype=np.float64)
    d = p.shape[0]
    k = mesh.n_real
    kv = mesh.vectors.shape[0]
    best, g = _raw_columns(mesh, p, exhaustive)
    tri = np.take(mesh.triangles_t, best, axis=1)  # (3, D) corners
    tri += np.arange(0, d * kv, kv)
    # one row of kv columns per direction, the virtual speakers' columns last; the
    # three corners of a triangle are distinct, so a plain put is enough
    full = np.zeros((d, kv))
    np.put(full, tri, g)
    out = full[:, :k] if kv > k else full
    if kv > k:
        virt = np.flatnonzero(np.take(mesh.virtual_corner, best))
        if virt.size:
            rp = full[virt, :k]  # contiguous copies
            pv = full[virt, k:]
            rp *= rp
            pv *= pv
            for v in range(kv - k):  # few virtual speakers: an outer product each
                rp += pv[:, v, None] * mesh.share[v]
            # every row of ``share`` sums to 1, so the power stays 1 and needs no
            # renormalising (it would change only the last bit)
            out[virt] = np.sqrt(rp, out=rp)
    return out
