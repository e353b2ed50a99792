"""Panning: layout + source positions -> speaker gains (pure, no I/O).

Public API::

    ctx = PanningContext(layout)
    ctx.check(kind)                      # ConfigError if the panner cannot serve the layout
    ctx.gains(positions, spreads, kind)  # (S, n_speakers) float64, distance rule applied
    ctx.direct_gains(pairs)              # (n_speakers,) fixed linear gains
    ctx.kind_for(panner_or_None)         # resolves None to layout.panner

Pure functions for tests and reports are re-exported below; see
docs/panning.md for the methods and their sources.
"""

from .analysis import energy_spread_deg, gerzon_vectors, speaker_unit_vectors
from .common import UnsuitableLayout
from .context import PanningContext
from .dbap import dbap_exponent, dbap_gains
from .distance import distance_gain, near_blend, near_spread
from .pairwise import Ring, pairwise_gains, sine_cosine
from .spread import circle_offsets, cone_directions, tangent_basis
from .vbap import VbapMesh, build_mesh, vbap2d_gains, vbap2d_ring, vbap3d_gains, vbap3d_raw

__all__ = [
    "PanningContext",
    "gerzon_vectors",
    "energy_spread_deg",
    "speaker_unit_vectors",
    "UnsuitableLayout",
    "dbap_exponent",
    "dbap_gains",
    "distance_gain",
    "near_blend",
    "near_spread",
    "Ring",
    "pairwise_gains",
    "sine_cosine",
    "circle_offsets",
    "cone_directions",
    "tangent_basis",
    "VbapMesh",
    "build_mesh",
    "vbap2d_gains",
    "vbap2d_ring",
    "vbap3d_gains",
    "vbap3d_raw",
]
