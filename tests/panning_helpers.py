"""Layouts built straight from the data model, for the panning tests (no JSON loader)."""

from __future__ import annotations

import numpy as np

from fieldmix import geometry
from fieldmix.model import Layout, LayoutOptions, Speaker


def make_layout(specs, panner="vbap", name="test-layout", path=None, **options) -> Layout:
    """Layout from (azimuth, elevation[, distance]) tuples or dicts with extra keys
    (id, sub, weight). Distance defaults to 2 m."""
    speakers = []
    for i, spec in enumerate(specs):
        if not isinstance(spec, dict):
            spec = dict(zip(("az", "el", "dist"), spec))
        az, el, dist = spec["az"], spec.get("el", 0.0), spec.get("dist", 2.0)
        pos = geometry.sph_to_cart(az, el, dist)
        speakers.append(Speaker(index=i, id=spec.get("id", f"S{i + 1}"), output=i + 1,
                                position=tuple(float(v) for v in pos), azimuth=float(az),
                                elevation=float(el), distance=float(dist),
                                sub=spec.get("sub", False), weight=spec.get("weight", 1.0)))
    return Layout(name=name, speakers=tuple(speakers), panner=panner,
                  options=LayoutOptions(**options), path=path)


def at(az, el=0.0, dist=2.0) -> np.ndarray:
    """Source positions (S, 3) for azimuths/elevations in degrees."""
    return np.atleast_2d(geometry.sph_to_cart(az, el, dist))
