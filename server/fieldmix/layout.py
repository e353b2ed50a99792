"""Layout files: JSON -> :class:`fieldmix.model.Layout`, validated.

Reference: docs/layouts.md (every key, default and range). Order of checks: bytes
(UTF-8), JSON syntax, NaN/Infinity and duplicate keys (:mod:`fieldmix.jsonload`), the
JSON Schema ``schemas/layout.schema.json`` (types, ranges, unknown keys), then the rules
a schema cannot express (here). Every failure is one :class:`ConfigError` line naming
the file and the JSON path.

Alignment (``"alignment": {"auto_delay": true, "auto_trim": true}``): every speaker is
aligned to the farthest one, subwoofers included in ``d_max`` like any other speaker:
delay ``(d_max - d_i) / c`` and trim ``20 log10(d_i / d_max)`` dB (common practice, no
source), ``c = geometry.speed_of_sound(temperature_c)``. ``Speaker.delay_ms`` and
``Speaker.trim_db`` hold the totals (file value + automatic part).

Whether a panner can serve the geometry (e.g. 3-D VBAP needs speakers off one plane)
is decided by :mod:`fieldmix.panning`, not here.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any, Optional

from fieldmix import geometry
from fieldmix.errors import ConfigError
from fieldmix.jsonload import check_plain, join_where, oneline, read_json, validate
from fieldmix.model import Layout, LayoutOptions, Speaker

FORMAT = "fieldmix-layout/1"
DEFAULT_PANNER = "vbap"
DEFAULT_DISTANCE_M = 1.0  # a speaker given by azimuth alone stands 1 m away
MIN_DISTANCE_M = 0.01  # closer than 1 cm counts as "at the listener position"
MAX_TOTAL_DELAY_MS = 1000.0  # file delay + automatic delay (the engine's delay lines)
MIN_TOTAL_TRIM_DB = -60.0  # file trim + automatic trim
MAX_TOTAL_TRIM_DB = 12.0


def load_layout(path) -> Layout:
    """Read and validate a layout file. Raises ConfigError (one line, names the place)."""
    path = Path(path)
    where = oneline(path.name)
    data = read_json(path, where)
    return layout_from_dict(data, where=where, path=path)


def layout_from_dict(data: Any, where: str = "layout.json", path: Optional[Path] = None) -> Layout:
    """Validate parsed layout data and build the Layout (alignment computed)."""
    check_plain(data, where)
    validate(data, "layout", where)
    path = Path(path) if path is not None else None

    options = _options(data)
    speakers_raw = data["speakers"]

    # ---- per speaker: ids, position forms, listener position
    ids: dict[str, int] = {}
    outputs: dict[int, int] = {}
    built = []  # (index, id, output, pos, az, el, dist, trim, delay, sub, weight, explicit_distance)
    for i, sp in enumerate(speakers_raw):
        here = ("speakers", i)
        sid = sp.get("id", f"S{i + 1}")
        if sid in ids:
            given = "" if "id" in sp else " (the default id of this place)"
            raise ConfigError(
                join_where(where, here + ("id",) if "id" in sp else here),
                f'duplicate speaker id "{sid}"{given}: also speakers[{ids[sid]}]',
            )
        ids[sid] = i
        out = int(sp["output"])
        if out in outputs:
            j = outputs[out]
            raise ConfigError(
                join_where(where, here + ("output",)),
                f'output {out} is already used by speakers[{j}] ("{built[j][1]}"): '
                "each speaker needs its own output channel",
            )
        outputs[out] = i

        has_pos = "position" in sp
        sph_keys = [k for k in ("azimuth", "elevation", "distance") if k in sp]
        if has_pos and sph_keys:
            raise ConfigError(
                join_where(where, here),
                f'both position forms given ("position" and "{sph_keys[0]}"): '
                'use either azimuth/elevation/distance or position, not both',
            )
        if not has_pos and "azimuth" not in sp:
            if sph_keys:
                msg = (
                    f'"{sph_keys[0]}" given without "azimuth": a speaker needs "azimuth" '
                    "(with optional elevation and distance) or \"position\" [x, y, z]"
                )
            else:
                msg = (
                    'no position: give "azimuth" (with optional "elevation" and "distance") '
                    'or "position" [x, y, z]'
                )
            raise ConfigError(join_where(where, here), msg)

        if has_pos:
            p = [float(v) for v in sp["position"]]
            if len(p) == 2:
                p.append(0.0)
            az, el, dist = (float(v) for v in geometry.cart_to_sph(p))
            if dist < MIN_DISTANCE_M:
                raise ConfigError(
                    join_where(where, here + ("position",)),
                    f"speaker at the listener position ({_fmt(dist)} m from [0, 0, 0]; "
                    f"at least {MIN_DISTANCE_M} m): a speaker needs a direction",
                )
            pos = tuple(p)
            explicit_distance = True
        else:
            az = float(geometry.wrap_deg(float(sp["azimuth"])))
            el = float(sp.get("elevation", 0.0))
            explicit_distance = "distance" in sp
            dist = float(sp.get("distance", DEFAULT_DISTANCE_M))
            if dist < MIN_DISTANCE_M:
                raise ConfigError(
                    join_where(where, here + ("distance",)),
                    f"speaker at the listener position (distance {_fmt(dist)} m; "
                    f"at least {MIN_DISTANCE_M} m): a speaker needs a direction",
                )
            pos = tuple(float(v) for v in geometry.sph_to_cart(az, el, dist))
        built.append(
            (
                i,
                sid,
                out,
                pos,
                az,
                el,
                dist,
                float(sp.get("trim_db", 0.0)),
                float(sp.get("delay_ms", 0.0)),
                bool(sp.get("sub", False)),
                float(sp.get("weight", 1.0)),
                explicit_distance,
            )
        )

    # ---- layout-wide rules
    mains = [b for b in built if not b[9]]
    if not mains:
        raise ConfigError(
            join_where(where, ("speakers",)),
            "all speakers are subs: at least one speaker must have \"sub\": false to pan to",
        )
    if all(b[10] == 0.0 for b in mains):
        raise ConfigError(
            join_where(where, ("speakers",)),
            "every main speaker has weight 0: DBAP would have nowhere to send sound; "
            "give at least one a weight above 0",
        )

    # ---- alignment
    auto = options.auto_delay or options.auto_trim
    if auto:
        for b in built:
            if not b[11]:
                raise ConfigError(
                    join_where(where, ("speakers", b[0])),
                    "automatic alignment needs the distance of every speaker: "
                    'give "distance" (or "position")',
                )
    c = geometry.speed_of_sound(options.temperature_c)
    d_max = max(b[6] for b in built)
    speakers = []
    for b in built:
        (i, sid, out, pos, az, el, dist, trim, delay, sub, weight, _) = b
        if options.auto_delay:
            delay += (d_max - dist) / c * 1000.0
        if options.auto_trim:
            trim += 20.0 * math.log10(dist / d_max)
        if delay > MAX_TOTAL_DELAY_MS:
            raise ConfigError(
                join_where(where, ("speakers", i)),
                f"total delay {delay:.1f} ms (file + automatic) exceeds {MAX_TOTAL_DELAY_MS:.0f} ms: "
                "check the distances",
            )
        if not (MIN_TOTAL_TRIM_DB <= trim <= MAX_TOTAL_TRIM_DB):
            raise ConfigError(
                join_where(where, ("speakers", i)),
                f"total trim {trim:.1f} dB (file + automatic) is outside "
                f"{MIN_TOTAL_TRIM_DB:.0f}..+{MAX_TOTAL_TRIM_DB:.0f} dB: check the distances",
            )
        speakers.append(
            Speaker(
                index=i,
                id=sid,
                output=out,
                position=pos,
                azimuth=az,
                elevation=el,
                distance=dist,
                trim_db=trim,
                delay_ms=delay,
                sub=sub,
                weight=weight,
            )
        )

    name = data.get("name")
    if name is None:
        name = path.stem if path is not None else Path(where).stem or "layout"
    return Layout(
        name=name,
        speakers=tuple(speakers),
        panner=data.get("panner", DEFAULT_PANNER),
        options=options,
        path=path,
    )


def mean_main_distance(layout: Layout) -> float:
    """Mean distance of the speakers that take part in panning (not subs)."""
    d = [s.distance for s in layout.speakers if not s.sub]
    return sum(d) / len(d)


def reference_distance(layout: Layout) -> float:
    """The distance of 0 dB: the file's ``distance.reference`` or the mean main distance."""
    ref = layout.options.reference_distance
    return float(ref) if ref is not None else mean_main_distance(layout)


def _options(data: dict) -> LayoutOptions:
    al = data.get("alignment", {})
    db = data.get("dbap", {})
    di = data.get("distance", {})
    base = LayoutOptions()
    return LayoutOptions(
        auto_delay=bool(al.get("auto_delay", base.auto_delay)),
        auto_trim=bool(al.get("auto_trim", base.auto_trim)),
        temperature_c=float(al.get("temperature_c", base.temperature_c)),
        dbap_rolloff_db=float(db.get("rolloff_db", base.dbap_rolloff_db)),
        dbap_blur=float(db.get("blur", base.dbap_blur)),
        reference_distance=_opt_float(di.get("reference", base.reference_distance)),
        distance_floor_db=float(di.get("floor_db", base.distance_floor_db)),
        near_radius=_opt_float(di.get("near_radius", base.near_radius)),
        crossover_hz=float(data.get("crossover_hz", base.crossover_hz)),
    )


def _opt_float(v) -> Optional[float]:
    return None if v is None else float(v)


def _fmt(x: float) -> str:
    return f"{x:.3g}"
