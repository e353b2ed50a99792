"""PanningContext: one layout, every panner, the distance rule.

``PanningContext(layout)`` prepares each panner lazily the first time it is
asked for (``check`` or ``gains``) and keeps the result (or the error) for the
life of the context.  Nothing here does I/O or keeps globals.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Optional, Sequence

import numpy as np

from .. import geometry
from ..errors import ConfigError
from ..model import PANNERS, SOURCE_PANNERS, Layout
from .common import (
    EAR_LEVEL_DEG,
    HORIZONTAL_TOL_DEG,
    POINT_SPREAD_DEG,
    UnsuitableLayout,
    as_positions,
    as_spreads,
    normalise_power,
)
from .dbap import dbap_gains
from .distance import distance_gain, near_spread
from .pairwise import Ring, pairwise_gains
from .spread import N_2D, circle_offsets, cone_directions, everywhere_vector, fibonacci_sphere, full_fade
from .vbap import VbapMesh, build_mesh, vbap2d_gains, vbap2d_ring, vbap3d_gains


def _fade_to(g: np.ndarray, everywhere: np.ndarray, spread: np.ndarray) -> np.ndarray:
    """Cross-fade MDAP gains (S, K) into the everywhere vector near full spread."""
    f = full_fade(spread)
    if np.any(f > 0.0):
        g = (1.0 - f)[:, None] * g + f[:, None] * everywhere[None, :]
        normalise_power(g)
    return g


#: sources farther than this (metres) are panned as if at this distance (same
#: direction); the level still follows their true distance
FAR_LIMIT_M = 1e9


class _RingPanner:
    """pairwise, or vbap on a horizontal ring (2-D): azimuth only."""

    def __init__(self, ring: Ring, cols: np.ndarray, law, near_radius: float):
        self.ring = ring
        self.cols = cols
        self.law = law
        self.near_radius = near_radius
        self.everywhere = everywhere_vector(law(ring, np.arange(0.0, 360.0, 0.025)))

    def gains(self, p: np.ndarray, s: np.ndarray) -> np.ndarray:
        x, y = p[:, 0], p[:, 1]
        az = np.degrees(np.arctan2(-x, y))
        # the horizontal distance: a source straight above the listener is
        # everywhere on a ring, so it widens instead of flipping sides
        s_eff = near_spread(s, np.hypot(x, y), self.near_radius)
        g = np.empty((p.shape[0], self.ring.n))
        point = s_eff <= POINT_SPREAD_DEG
        if np.all(point):
            g[:] = self.law(self.ring, az)
            return g
        if np.any(point):
            g[point] = self.law(self.ring, az[point])
        wide = ~point
        n2 = int(np.count_nonzero(wide))
        virt = az[wide][:, None] + circle_offsets(s_eff[wide], N_2D)
        gv = self.law(self.ring, virt.ravel()).reshape(n2, N_2D, self.ring.n)
        g[wide] = _fade_to(normalise_power(gv.sum(axis=1)), self.everywhere, s_eff[wide])
        return g


class _MeshPanner:
    """vbap in 3-D."""

    def __init__(self, mesh: VbapMesh, cols: np.ndarray, near_radius: float):
        self.mesh = mesh
        self.cols = cols
        self.near_radius = near_radius
        self.everywhere = everywhere_vector(vbap3d_gains(mesh, fibonacci_sphere(8192)))

    def gains(self, p: np.ndarray, s: np.ndarray) -> np.ndarray:
        dirs = geometry.unit(p)
        s_eff = near_spread(s, np.linalg.norm(p, axis=1), self.near_radius)
        point = s_eff <= POINT_SPREAD_DEG
        if np.all(point):
            return vbap3d_gains(self.mesh, dirs)
        g = np.empty((p.shape[0], self.mesh.n_real))
        if np.any(point):
            g[point] = vbap3d_gains(self.mesh, dirs[point])
        wide = ~point
        n2 = int(np.count_nonzero(wide))
        cd, w = cone_directions(dirs[wide], s_eff[wide])
        gv = vbap3d_gains(self.mesh, cd.reshape(-1, 3)).reshape(n2, cd.shape[1], self.mesh.n_real)
        g[wide] = _fade_to(normalise_power(np.matmul(w[:, None, :], gv)[:, 0, :]), self.everywhere, s_eff[wide])
        return g


class _DbapPanner:
    def __init__(self, positions, weights, rolloff_db, blur, spread_distance, cols):
        self.positions = positions
        self.weights = weights
        self.rolloff_db = rolloff_db
        self.blur = blur
        self.spread_distance = spread_distance
        self.cols = cols

    def gains(self, p: np.ndarray, s: np.ndarray) -> np.ndarray:
        spread = s if np.any(s > POINT_SPREAD_DEG) else None
        return dbap_gains(p, self.positions, self.weights, self.rolloff_db, self.blur,
                          spread_deg=spread, spread_distance=self.spread_distance)


class PanningContext:
    """Gains for one layout: ``gains(positions, spreads, kind)``, ``direct_gains(pairs)``."""

    def __init__(self, layout: Layout):
        self.layout = layout
        self.where = Path(layout.path).name if layout.path is not None else layout.name
        self.n_speakers = len(layout.speakers)
        self.main = np.asarray(layout.main_indices, dtype=np.intp)
        self._panners: dict = {}
        self._distance: Optional[tuple] = None

    # ------------------------------------------------------------------ errors

    def _fail(self, message: str):
        raise ConfigError(self.where, message)

    # ------------------------------------------------------------------ shared

    def _main_geometry(self):
        spk = [self.layout.speakers[i] for i in self.main]
        pos = np.array([s.position for s in spk], dtype=np.float64).reshape(-1, 3)
        ids = [s.id for s in spk]
        return spk, pos, ids

    def _distance_rule(self) -> tuple[float, float, float]:
        """(reference distance, near radius, floor dB), validated once."""
        if self._distance is not None:
            return self._distance
        opt = self.layout.options
        if self.main.size == 0:
            self._fail("no main speakers (every speaker is a subwoofer): there is nothing to pan to")
        _, pos, _ = self._main_geometry()
        if not np.all(np.isfinite(pos)):
            self._fail("a main speaker has a position that is not a finite number")
        if opt.reference_distance is None:
            ref = float(np.mean(np.linalg.norm(pos, axis=1)))
            if not ref > 0.0:
                self._fail("the main speakers stand at the listener position (mean distance 0); "
                           "set options.reference_distance")
        else:
            ref = float(opt.reference_distance)
            if not (math.isfinite(ref) and ref > 0.0):
                self._fail(f"options.reference_distance must be a positive number of metres, got {opt.reference_distance}")
        floor = float(opt.distance_floor_db)
        if not (math.isfinite(floor) and floor <= 0.0):
            self._fail(f"options.distance_floor_db must be a finite number <= 0 dB, got {opt.distance_floor_db}")
        if opt.near_radius is None:
            near = 0.5 * ref
        else:
            near = float(opt.near_radius)
            if not (math.isfinite(near) and near >= 0.0):
                self._fail(f"options.near_radius must be a number of metres >= 0, got {opt.near_radius}")
        self._distance = (ref, near, floor)
        return self._distance

    @property
    def reference_distance(self) -> float:
        """ref of the distance rule, metres (ConfigError if the options are broken)."""
        return self._distance_rule()[0]

    @property
    def near_radius(self) -> float:
        """r_n of the near-listener widening, metres."""
        return self._distance_rule()[1]

    # ------------------------------------------------------------------ panners

    def _build(self, kind: str):
        _, near, _ = self._distance_rule()
        spk, pos, ids = self._main_geometry()
        az, el, dist = geometry.cart_to_sph(pos)
        if kind in ("pairwise", "vbap"):
            at_centre = np.flatnonzero(dist < 1e-6)
            if at_centre.size:
                raise UnsuitableLayout(
                    f'speaker "{ids[int(at_centre[0])]}" stands at the listener position (distance 0), '
                    f'so it has no direction; move it or use "dbap"'
                )
        if kind == "pairwise":
            sel = np.flatnonzero(np.abs(el) <= EAR_LEVEL_DEG)
            if sel.size < 2:
                found = ", ".join(f'"{ids[i]}"' for i in sel)
                raise UnsuitableLayout(
                    f"needs at least 2 main speakers at ear level (|elevation| <= {EAR_LEVEL_DEG:g} deg), "
                    f"found {sel.size}{' (' + found + ')' if found else ''}"
                )
            ring = Ring(az[sel], [ids[i] for i in sel])
            return _RingPanner(ring, self.main[sel], pairwise_gains, near)
        if kind == "vbap":
            if np.all(np.abs(el) <= HORIZONTAL_TOL_DEG):
                if self.main.size < 2:
                    raise UnsuitableLayout(f"needs at least 2 speakers, found {self.main.size}")
                return _RingPanner(vbap2d_ring(az, ids), self.main, vbap2d_gains, near)
            return _MeshPanner(build_mesh(geometry.unit(pos), ids), self.main, near)
        if kind == "dbap":
            opt = self.layout.options
            w = np.array([s.weight for s in spk], dtype=np.float64)
            if not np.all(np.isfinite(w)) or np.any(w < 0.0):
                bad = int(np.flatnonzero(~(np.isfinite(w) & (w >= 0.0)))[0])
                raise UnsuitableLayout(f'speaker "{ids[bad]}" has weight {w[bad]}: weights must be finite and >= 0')
            if not np.any(w > 0.0):
                raise UnsuitableLayout("every main speaker has weight 0: at least one must be > 0")
            rolloff = float(opt.dbap_rolloff_db)
            if not (math.isfinite(rolloff) and rolloff >= 0.0):
                raise UnsuitableLayout(f"options.dbap_rolloff_db must be a finite number >= 0 dB, got {opt.dbap_rolloff_db}")
            blur = float(opt.dbap_blur)
            if not (math.isfinite(blur) and blur >= 0.0):
                raise UnsuitableLayout(f"options.dbap_blur must be a finite number of metres >= 0, got {opt.dbap_blur}")
            return _DbapPanner(pos, w, rolloff, blur, self.reference_distance, self.main)
        raise AssertionError(kind)

    def _panner(self, kind: str):
        if kind not in PANNERS:
            if kind == "direct":
                raise ValueError('panner "direct" has fixed gains: use direct_gains()')
            self._fail(f'unknown panner "{kind}"; expected one of {", ".join(PANNERS)}')
        got = self._panners.get(kind)
        if got is None:
            try:
                got = self._build(kind)
            except UnsuitableLayout as exc:
                got = ConfigError(self.where, f'panner "{kind}": {exc}')
            except ConfigError as exc:
                got = exc
            self._panners[kind] = got
        if isinstance(got, ConfigError):
            raise ConfigError(got.where, got.message)
        return got

    def check(self, kind: str) -> None:
        """Raise ConfigError if panner ``kind`` cannot serve this layout ("direct" always can)."""
        if kind == "direct":
            return
        self._panner(kind)

    def kind_for(self, panner: Optional[str]) -> str:
        """The panner a source uses: its own, or the layout's when None."""
        kind = self.layout.panner if panner is None else panner
        if kind not in SOURCE_PANNERS:
            self._fail(f'unknown panner "{kind}"; expected one of {", ".join(SOURCE_PANNERS)}')
        return kind

    def vbap_mesh(self) -> Optional[VbapMesh]:
        """The 3-D triplets (with virtual speakers) of ``vbap``; None for a 2-D layout."""
        p = self._panner("vbap")
        return p.mesh if isinstance(p, _MeshPanner) else None

    # ------------------------------------------------------------------ gains

    def gains(self, positions, spreads, kind: str) -> np.ndarray:
        """Gains (S, n_speakers) for positions (S, 3) m and spreads (S,) deg.

        Columns follow ``layout.speakers``; sub columns are 0; the distance
        rule is applied.  ValueError for non-finite input, ConfigError when the
        panner cannot serve the layout.
        """
        panner = self._panner(kind)
        ref, _, floor = self._distance_rule()
        p = as_positions(positions)
        s = as_spreads(spreads, p.shape[0])
        out = np.zeros((p.shape[0], self.n_speakers))
        if p.shape[0] == 0:
            return out
        # hypot does not overflow for huge (finite) coordinates; the panners see
        # far sources pulled in to FAR_LIMIT_M along the same direction
        d = np.hypot(np.hypot(p[:, 0], p[:, 1]), p[:, 2])
        far = d > FAR_LIMIT_M
        if np.any(far):
            p = p.copy()
            p[far] *= (FAR_LIMIT_M / d[far])[:, None]
        g = panner.gains(p, s)
        g *= distance_gain(d, ref, floor)[:, None]
        out[:, panner.cols] = g
        return out

    def direct_gains(self, pairs: Sequence[tuple[str, float]]) -> np.ndarray:
        """Linear gains (n_speakers,) for (speaker_id, gain_db) pairs; no normalisation."""
        out = np.zeros(self.n_speakers)
        seen = set()
        for k, pair in enumerate(pairs):
            try:
                sid, gain_db = pair
            except (TypeError, ValueError):
                self._fail(f"direct[{k}]: expected (speaker id, gain dB), got {pair!r}")
            spk = self.layout.speaker_by_id(sid) if isinstance(sid, str) else None
            if spk is None:
                known = ", ".join(f'"{s.id}"' for s in self.layout.speakers if not s.sub)
                self._fail(f'direct[{k}]: unknown speaker "{sid}"; the layout has {known}')
            if spk.sub:
                self._fail(f'direct[{k}]: speaker "{sid}" is a subwoofer, fed only by the sub bus '
                           f"(use the source's sub send)")
            if sid in seen:
                self._fail(f'direct[{k}]: speaker "{sid}" is named twice')
            seen.add(sid)
            try:
                db = float(gain_db)
            except (TypeError, ValueError):
                self._fail(f'direct[{k}]: gain of speaker "{sid}" must be a number of dB, got {gain_db!r}')
            g = 10.0 ** (db / 20.0) if math.isfinite(db) and db < 300.0 else math.nan
            if not math.isfinite(g):
                self._fail(f'direct[{k}]: gain of speaker "{sid}" must be a finite number of dB, got {gain_db!r}')
            out[spk.index] = g
        return out
