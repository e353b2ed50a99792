"""Plain data types shared by every layer (no I/O, no numpy state).

Loaders (``fieldmix.layout``, ``fieldmix.show``) build these from files and
validate them; panners and the mix model only read them.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Optional

PANNERS = ("pairwise", "vbap", "dbap")
SOURCE_PANNERS = PANNERS + ("direct",)


@dataclass(frozen=True)
class Speaker:
    index: int  # 0-based place in the layout's speaker list
    id: str  # unique; defaults to "S<n>" (n = 1-based place) when the file gives none
    output: int  # 1-based output channel of the interface
    position: tuple[float, float, float]  # metres, x right, y front, z up
    azimuth: float  # degrees, + = left
    elevation: float  # degrees, + = up
    distance: float  # metres from the listener
    trim_db: float = 0.0  # total trim applied (file trim + automatic alignment trim)
    delay_ms: float = 0.0  # total delay applied (file delay + automatic alignment delay)
    sub: bool = False  # subwoofer: takes no part in panning, fed by the sub bus
    weight: float = 1.0  # DBAP speaker weight (Lossius et al. 2009), >= 0


@dataclass(frozen=True)
class LayoutOptions:
    # alignment
    auto_delay: bool = False  # delay nearer speakers by (d_max - d_i)/c
    auto_trim: bool = False  # trim nearer speakers by 20 log10(d_i / d_max)
    temperature_c: float = 20.0  # air temperature for the speed of sound
    # DBAP
    dbap_rolloff_db: float = 6.0  # R, dB per doubling of distance
    dbap_blur: float = 0.2  # spatial blur r_s, metres
    # distance model (all panners)
    reference_distance: Optional[float] = None  # None: the mean distance of the main speakers
    distance_floor_db: float = -40.0  # distance attenuation never goes below this
    near_radius: Optional[float] = None  # None: half the reference distance; inside it a source widens
    # subwoofers
    crossover_hz: float = 80.0  # Linkwitz-Riley 4th-order low-pass for the sub bus


@dataclass(frozen=True)
class Layout:
    name: str
    speakers: tuple[Speaker, ...]
    panner: str = "vbap"  # one of PANNERS
    options: LayoutOptions = field(default_factory=LayoutOptions)
    path: Optional[Path] = None

    @property
    def main_indices(self) -> tuple[int, ...]:
        """Indices of the speakers that take part in panning (not subs)."""
        return tuple(s.index for s in self.speakers if not s.sub)

    @property
    def sub_indices(self) -> tuple[int, ...]:
        return tuple(s.index for s in self.speakers if s.sub)

    @property
    def n_channels(self) -> int:
        """Channels of a rendered file / outputs the interface needs: the highest output."""
        return max(s.output for s in self.speakers)

    def speaker_by_id(self, speaker_id: str) -> Optional[Speaker]:
        for s in self.speakers:
            if s.id == speaker_id:
                return s
        return None


@dataclass(frozen=True)
class SourceSpec:
    """A source as the show file declares it (its start state)."""

    index: int  # 0-based place in the show's source list
    id: str
    input: int  # 1-based input channel of the live interface
    position: tuple[float, float, float]  # start position, metres
    name: str = ""
    file: Optional[Path] = None  # audio file for offline rendering (absolute)
    gain_db: float = 0.0
    mute: bool = False
    spread: float = 0.0  # degrees, 0 = point source, 360 = everywhere
    panner: Optional[str] = None  # None = the layout's panner; or one of SOURCE_PANNERS
    direct: tuple[tuple[str, float], ...] = ()  # panner "direct": (speaker id, gain dB) pairs
    sub_send_db: Optional[float] = None  # None = no sub send


@dataclass(frozen=True)
class Show:
    path: Optional[Path]
    layout_path: Path
    layout: Layout
    sources: tuple[SourceSpec, ...]
    master_gain_db: float = 0.0
    glide_ms: float = 30.0
    samplerate: int = 48000  # offline render rate; live rate comes from the device
    raw: dict = field(default_factory=dict, compare=False, repr=False)  # the parsed JSON, for keys later issues add
    cues: Any = field(default=None, compare=False, repr=False)  # fieldmix.cues.CueList (None: no cues key)
    mappings: tuple = field(default=(), compare=False, repr=False)  # fieldmix.mappings.Mapping, in file order

    @property
    def source_ids(self) -> tuple[str, ...]:
        return tuple(s.id for s in self.sources)
