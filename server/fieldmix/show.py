"""Show files: JSON -> :class:`fieldmix.model.Show`, validated, layout loaded.

Reference: docs/shows.md. Same checking order as :mod:`fieldmix.layout`: bytes, JSON,
NaN/duplicate keys, schema ``schemas/show.schema.json``, then the rules here:

- source ids unique (two sources may share one ``input``: the same feed placed twice);
- a source gives its start position in one form: ``azimuth``/``elevation``/``distance``
  (defaults 0, 0 and the layout's reference distance) or ``position`` [x, y(, z)];
  neither means straight ahead at the reference distance;
- ``direct`` is required with ``"panner": "direct"``, refused with any other panner, and
  every speaker id it names must exist in the layout.

Relative paths (``layout``, each source's ``file``) resolve against the show file's
folder. Whether an audio file exists and has the right rate is the renderer's check.
``cues`` (fieldmix.cues, docs/cues.md) and ``mappings`` (fieldmix.mappings,
docs/mappings.md) are checked by their own parsers, with places below the key
(``show.json: cues[3].fade``); ``network`` is read by the live server. Any other unknown
key is an error (typo protection).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Optional

from fieldmix import geometry
from fieldmix.errors import ConfigError
from fieldmix.jsonload import check_plain, join_where, oneline, quote, quoted_list, read_json, validate
from fieldmix.layout import load_layout, reference_distance
from fieldmix.model import Layout, Show, SourceSpec

FORMAT = "fieldmix-show/1"
DEFAULT_GLIDE_MS = 30.0
DEFAULT_SAMPLERATE = 48000


def load_show(path) -> Show:
    """Read and validate a show file and the layout it names."""
    path = Path(path)
    where = oneline(path.name)
    data = read_json(path, where)
    return show_from_dict(data, where=where, path=path)


def show_from_dict(
    data: Any,
    where: str = "show.json",
    path: Optional[Path] = None,
    layout: Optional[Layout] = None,
    base_dir: Optional[Path] = None,
) -> Show:
    """Validate parsed show data and build the Show.

    ``layout``: use this Layout instead of loading the file named by ``data["layout"]``
    (``layout_path`` is still resolved and recorded). ``base_dir``: folder that relative
    paths resolve against (default: the show file's folder, else the current folder).
    """
    check_plain(data, where)
    validate(data, "show", where)
    path = Path(path) if path is not None else None
    if base_dir is None:
        base_dir = path.parent if path is not None else Path.cwd()
    base_dir = Path(base_dir)

    layout_path = _resolve(base_dir, data["layout"], join_where(where, ("layout",)))
    if layout is None:
        if not layout_path.is_file() and not layout_path.is_dir():
            raise ConfigError(
                join_where(where, ("layout",)),
                f'layout file not found: {quote(data["layout"], 200)} (looked for {oneline(layout_path)})',
            )
        layout = load_layout(layout_path)

    ref = reference_distance(layout)
    speaker_ids = [s.id for s in layout.speakers]
    seen: dict[str, int] = {}
    sources = []
    for i, src in enumerate(data["sources"]):
        here = ("sources", i)
        sid = src["id"]
        if sid in seen:
            raise ConfigError(
                join_where(where, here + ("id",)),
                f'duplicate source id "{sid}": also sources[{seen[sid]}]',
            )
        seen[sid] = i

        sph_keys = [k for k in ("azimuth", "elevation", "distance") if k in src]
        if "position" in src:
            if sph_keys:
                raise ConfigError(
                    join_where(where, here),
                    f'both position forms given ("position" and "{sph_keys[0]}"): '
                    "use either azimuth/elevation/distance or position, not both",
                )
            p = [float(v) for v in src["position"]]
            if len(p) == 2:
                p.append(0.0)
            pos = tuple(p)
        else:
            az = float(src.get("azimuth", 0.0))
            el = float(src.get("elevation", 0.0))
            dist = float(src.get("distance", ref))
            pos = tuple(float(v) for v in geometry.sph_to_cart(az, el, dist))

        panner = src.get("panner")
        direct: tuple = ()
        if panner == "direct":
            if "direct" not in src:
                raise ConfigError(
                    join_where(where, here),
                    'panner "direct" needs "direct": {"speaker id": gain_db, ...}',
                )
            pairs = []
            for spk, g in src["direct"].items():
                if spk not in speaker_ids:
                    raise ConfigError(
                        join_where(where, here + ("direct", spk)),
                        f"unknown speaker {quote(spk)}: layout {quote(layout.name)} has speakers "
                        f'{quoted_list(speaker_ids, conj="and")}',
                    )
                pairs.append((spk, float(g)))
            direct = tuple(pairs)
        elif "direct" in src:
            raise ConfigError(
                join_where(where, here + ("direct",)),
                '"direct" is only used with "panner": "direct"'
                + (f' (this source has "panner": "{panner}")' if panner else ""),
            )

        file_ = (
            _resolve(base_dir, src["file"], join_where(where, here + ("file",)))
            if "file" in src
            else None
        )
        ssd = src.get("sub_send_db")
        sources.append(
            SourceSpec(
                index=i,
                id=sid,
                input=int(src["input"]),
                position=pos,
                name=src.get("name") or sid,
                file=file_,
                gain_db=float(src.get("gain_db", 0.0)),
                mute=bool(src.get("mute", False)),
                spread=float(src.get("spread", 0.0)),
                panner=panner,
                direct=direct,
                sub_send_db=None if ssd is None else float(ssd),
            )
        )

    from fieldmix.control import TRANSPORT_ADDRESSES
    from fieldmix.cues import parse_cues
    from fieldmix.mappings import parse_mappings

    ids = tuple(s.id for s in sources)
    cues = parse_cues(data.get("cues"), join_where(where, ("cues",)), ids) if "cues" in data else None
    mappings = (
        tuple(parse_mappings(data["mappings"], join_where(where, ("mappings",)), ids, reserved=TRANSPORT_ADDRESSES))
        if "mappings" in data
        else ()
    )
    return Show(
        path=path,
        layout_path=layout_path,
        layout=layout,
        sources=tuple(sources),
        cues=cues,
        mappings=mappings,
        master_gain_db=float(data.get("master_gain_db", 0.0)),
        glide_ms=float(data.get("glide_ms", DEFAULT_GLIDE_MS)),
        samplerate=int(data.get("samplerate", DEFAULT_SAMPLERATE)),
        raw=data,
    )


def show_name(show: Show) -> str:
    """The show's display name: its ``name`` key, else the file name without .json."""
    name = show.raw.get("name") if isinstance(show.raw, dict) else None
    if name:
        return name
    return show.path.stem if show.path is not None else "show"


def _resolve(base_dir: Path, rel: str, where: str) -> Path:
    try:
        p = Path(rel)
        if not p.is_absolute():
            p = base_dir / p
        if "\x00" in rel:
            raise ValueError("the path contains a NUL character")
        return p.resolve()
    except (OSError, ValueError) as exc:
        raise ConfigError(where, f"not a usable file path: {oneline(exc)}") from None
