"""The show state: the single source of truth for what every source is doing.

Interfaces (script player, OSC, web, cues) never touch the engine: they apply
:class:`fieldmix.control.Command` objects here, and the runner asks for the
engine's target matrix whenever :attr:`ShowState.version` has moved.

The target matrix is composed here, once, for every controller:

    G[n, m]   = pan[n, m] * source_gain[n] * (not mute[n]) * trim[m] * master
    G[n, bus] = sub_send[n] * source_gain[n] * (not mute[n]) * master

where ``mute[n]`` also holds while another source is soloed and this one is not
(solo in place), so trims, mutes, solos and the master all reach the audio through the engine's
per-sample ramps, like positions do: nothing can step.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Iterable, Optional

import numpy as np

from . import geometry
from .model import Layout, Show, SourceSpec
from .panning import PanningContext


@dataclass
class SourceRuntime:
    """The live, mutable state of one source."""

    spec: SourceSpec
    position: np.ndarray  # (3,) metres
    gain_db: float
    mute: bool
    spread: float
    panner: Optional[str]  # None = the layout's panner
    sub_send_db: Optional[float]
    solo: bool = False  # solo in place (a rehearsal tool: never saved)

    @property
    def id(self) -> str:
        return self.spec.id

    @property
    def spherical(self) -> tuple[float, float, float]:
        p = self.position
        return geometry.xyz_to_sph(float(p[0]), float(p[1]), float(p[2]))

    def to_dict(self) -> dict:
        az, el, d = self.spherical
        return {
            "id": self.spec.id,
            "name": self.spec.name,
            "input": self.spec.input,
            "azimuth": round(az, 6),
            "elevation": round(el, 6),
            "distance": round(d, 6),
            "position": [round(float(v), 6) for v in self.position.tolist()],
            "gain_db": self.gain_db,
            "mute": self.mute,
            "solo": self.solo,
            "spread": self.spread,
            "panner": self.panner,
            "sub_send_db": self.sub_send_db,
        }


def _used_kinds(layout: Layout, sources: Iterable[SourceRuntime]) -> set[str]:
    kinds = {layout.panner}
    for s in sources:
        if s.panner and s.panner != "direct":
            kinds.add(s.panner)
    return kinds


class ShowState:
    """Sources, master and layout, plus the rule that turns them into gains."""

    def __init__(self, show: Show, layout: Optional[Layout] = None):
        self.show = show
        self.sources: list[SourceRuntime] = [
            SourceRuntime(
                spec=s,
                position=np.asarray(s.position, dtype=np.float64).copy(),
                gain_db=float(s.gain_db),
                mute=bool(s.mute),
                spread=float(s.spread),
                panner=s.panner,
                sub_send_db=s.sub_send_db,
            )
            for s in show.sources
        ]
        self.master_gain_db = float(show.master_gain_db)
        self.master_mute = False
        self.version = 0
        self._pan: Optional[np.ndarray] = None  # cached pan matrix; rows in _dirty are stale
        self._dirty: set[int] = set()
        self._ids: Optional[tuple[str, ...]] = None
        self._layout: Layout
        self._ctx: PanningContext
        self.set_layout(layout or show.layout)

    # ----------------------------------------------------------------- layout
    @property
    def layout(self) -> Layout:
        return self._layout

    @property
    def panning(self) -> PanningContext:
        return self._ctx

    def set_layout(self, layout: Layout) -> None:
        """Switch layouts; raises ConfigError (and keeps the old one) if any panner in use cannot serve it."""
        ctx = PanningContext(layout)
        for kind in sorted(_used_kinds(layout, self.sources)):
            ctx.check(kind)
        for s in self.sources:
            if s.panner == "direct":
                ctx.direct_gains(s.spec.direct)  # raises ConfigError for unknown speakers
        self._layout = layout
        self._ctx = ctx
        self._pan = None
        self.version += 1

    @property
    def source_ids(self) -> tuple[str, ...]:
        ids = self._ids
        if ids is None or len(ids) != len(self.sources):  # ids never change; sources are fixed by the show
            ids = self._ids = tuple(s.spec.id for s in self.sources)
        return ids

    # --------------------------------------------------------------- commands
    def apply(self, cmd) -> None:
        """Apply one validated :class:`fieldmix.control.Command`."""
        if cmd.target == "master":
            if cmd.param == "gain":
                self.master_gain_db = float(cmd.value[0])
            elif cmd.param == "mute":
                self.master_mute = bool(cmd.value[0])
            else:  # pragma: no cover - the parser only builds known params
                raise ValueError(f"unknown master parameter {cmd.param!r}")
            self.version += 1
            return
        src = self.sources[cmd.source]
        v = cmd.value
        if cmd.param in ("azimuth", "elevation", "distance"):
            az, el, d = src.spherical
            if cmd.param == "azimuth":
                az = v[0]
            elif cmd.param == "elevation":
                el = v[0]
            else:
                d = v[0]
            src.position = np.array(geometry.sph_to_xyz(az, el, d), dtype=np.float64)
        elif cmd.param == "position":
            z = v[2] if len(v) > 2 else src.position[2]
            src.position = np.array([v[0], v[1], z], dtype=np.float64)
        elif cmd.param == "gain":
            src.gain_db = float(v[0])
        elif cmd.param == "mute":
            src.mute = bool(v[0])
        elif cmd.param == "solo":
            src.solo = bool(v[0])
        elif cmd.param == "spread":
            src.spread = float(v[0])
        else:  # pragma: no cover
            raise ValueError(f"unknown source parameter {cmd.param!r}")
        if cmd.param not in ("gain", "mute", "solo"):
            self._dirty.add(cmd.source)
        self.version += 1

    def apply_all(self, cmds: Iterable) -> None:
        for c in cmds:
            self.apply(c)

    # ------------------------------------------------------------------ gains
    def pan_matrix(self) -> np.ndarray:
        """(n_sources, n_speakers) panning gains, float64, sub columns zero.

        Rows are cached: only sources whose position or spread changed since the last
        call are panned again (a stream of moves of one source costs one row).
        """
        if self._pan is None:
            self._pan = np.zeros((len(self.sources), len(self._layout.speakers)), dtype=np.float64)
            rows = range(len(self.sources))
        else:
            rows = sorted(self._dirty)
        self._dirty.clear()
        if rows:
            self._pan_rows(self._pan, rows)
        return self._pan.copy()

    def _pan_rows(self, out: np.ndarray, rows) -> None:
        groups: dict[str, list[int]] = {}
        for i in rows:
            s = self.sources[i]
            if s.panner == "direct":
                out[i] = self._ctx.direct_gains(s.spec.direct)
            else:
                groups.setdefault(self._ctx.kind_for(s.panner), []).append(i)
        for kind, idx in groups.items():
            pos = np.stack([self.sources[i].position for i in idx])
            spr = np.array([self.sources[i].spread for i in idx], dtype=np.float64)
            out[idx] = self._ctx.gains(pos, spr, kind)

    @property
    def has_sub_bus(self) -> bool:
        return bool(self._layout.sub_indices)

    def target_matrix(self) -> np.ndarray:
        """The engine's target: (n_sources, n_speakers [+1 sub bus]) float32."""
        lay = self._layout
        pan = self.pan_matrix()

        def lin(db: float) -> float:  # plain floats: numpy scalars cost microseconds each
            return 10.0 ** (db / 20.0)

        solo = any(s.solo for s in self.sources)  # solo in place: the others fall silent (ramped)
        src_gain = np.array(
            [0.0 if s.mute or (solo and not s.solo) else lin(s.gain_db) for s in self.sources], dtype=np.float64
        )
        master = 0.0 if self.master_mute else lin(self.master_gain_db)
        trims = np.array([0.0 if spk.sub else lin(spk.trim_db) for spk in lay.speakers], dtype=np.float64)
        g = pan * src_gain[:, None] * trims[None, :] * master
        if self.has_sub_bus:
            send = np.array(
                [0.0 if s.sub_send_db is None else lin(s.sub_send_db) for s in self.sources],
                dtype=np.float64,
            )
            g = np.concatenate([g, (send * src_gain * master)[:, None]], axis=1)
        if not np.all(np.isfinite(g)):  # last guard: never hand a NaN to the audio
            raise ValueError("non-finite gain in target matrix")
        return g.astype(np.float32)

    def engine_layout(self, samplerate: int) -> dict:
        """The rare-event part of the engine's configuration for this layout."""
        lay = self._layout
        delays = np.array([int(round(spk.delay_ms * 1e-3 * samplerate)) for spk in lay.speakers], dtype=np.int64)
        subs = lay.sub_indices
        return {
            "n_outputs": len(lay.speakers),
            "sub_outputs": tuple(subs),
            "sub_trims_db": tuple(lay.speakers[i].trim_db for i in subs),
            "crossover_hz": lay.options.crossover_hz,
            "delays": delays,
            "outputs": tuple(spk.output for spk in lay.speakers),
        }

    def to_dict(self) -> dict:
        return {
            "layout": self._layout.name,
            "master": {"gain_db": self.master_gain_db, "mute": self.master_mute},
            "sources": [s.to_dict() for s in self.sources],
        }
