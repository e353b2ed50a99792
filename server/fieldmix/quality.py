"""Layout quality report: Gerzon's localisation vectors over a sweep of directions.

For every elevation ring the layout's main speakers use, a virtual source is
panned every 5 degrees of azimuth with the layout's own panner, at the
reference distance (so neither distance attenuation nor the near-field widening
takes part). For each direction we compute the energy vector
rE = sum g_i^2 u_i / sum g_i^2 (Gerzon 1992, AES preprint 3306): its direction
predicts where the image is heard, its length |rE| how sharp it is.

Thresholds for the plain-language warnings (our choices, common practice, no
source): a gap wider than 90 degrees between neighbouring ear-level speakers
(phantom images between a pair are dependable up to the 60 degrees of the
standard stereo pair and fall apart towards the speakers beyond roughly
90 degrees); a direction error of the energy vector above 10 degrees; |rE|
below 0.6 (a diffuse, hard-to-place image).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from . import geometry
from .model import Layout
from .panning import PanningContext, gerzon_vectors, speaker_unit_vectors

AZ_STEP_DEG = 5.0
GAP_WARN_DEG = 90.0
ERROR_WARN_DEG = 10.0
RE_WARN = 0.6
EAR_LEVEL_DEG = 10.0


@dataclass
class RingReport:
    elevation: float
    azimuths: np.ndarray  # (K,) degrees
    error_deg: np.ndarray  # (K,) angle between rE and the panning direction
    re_len: np.ndarray  # (K,) |rE|


@dataclass
class QualityReport:
    panner: str
    rings: list[RingReport]
    max_error_deg: float
    mean_error_deg: float
    min_re: float
    warnings: list[str] = field(default_factory=list)


def _ranges(az: np.ndarray, mask: np.ndarray) -> list[tuple[float, float]]:
    """Contiguous azimuth ranges (degrees) where ``mask`` holds, on a circular sweep."""
    out: list[tuple[float, float]] = []
    n = len(az)
    if mask.all():
        return [(-180.0, 180.0)]
    start = None
    # rotate so that we start outside a range
    k0 = int(np.argmin(mask))
    for j in range(n + 1):
        k = (k0 + j) % n
        on = bool(mask[k]) and j < n
        if on and start is None:
            start = az[k]
        if not on and start is not None:
            out.append((float(start), float(az[(k - 1) % n])))
            start = None
    return out


def _fmt_range(r: tuple[float, float]) -> str:
    """A sweep range in increasing azimuth (leftwards); one that wraps goes through the back."""
    a, b = r
    if a == b:
        return f"{a:+.0f}"
    if (a, b) == (-180.0, 180.0):
        return "all round"
    return f"{a:+.0f} to {b:+.0f}" + (" (through the back)" if b < a else "")


def elevation_rings(elevations, tolerance: float = 10.0) -> list[float]:
    """Group speaker elevations into rings: within ``tolerance`` of a ring's lowest member."""
    rings: list[list[float]] = []
    for e in sorted(elevations):
        if rings and e - rings[-1][0] <= tolerance:
            rings[-1].append(e)
        else:
            rings.append([e])
    return [round(float(np.mean(r)), 1) for r in rings]


def assess(layout: Layout, ctx: PanningContext | None = None) -> QualityReport:
    ctx = ctx or PanningContext(layout)
    kind = layout.panner
    ctx.check(kind)
    main = [layout.speakers[i] for i in layout.main_indices]
    units = speaker_unit_vectors(layout)
    ref = ctx.reference_distance
    elevations = elevation_rings([s.elevation for s in main])
    if kind == "pairwise":
        elevations = [0]  # pairwise pans on the ear-level ring only
    az = np.arange(-180.0 + AZ_STEP_DEG, 180.0 + 1e-9, AZ_STEP_DEG)
    rings: list[RingReport] = []
    warnings: list[str] = []
    for el in elevations:
        target = geometry.sph_to_cart(az, np.full_like(az, el), ref)
        g = ctx.gains(target, np.zeros(len(az)), kind)
        _, re = gerzon_vectors(g, units)
        err = geometry.angle_between_deg(re, target)
        rlen = np.linalg.norm(re, axis=1)
        rings.append(RingReport(float(el), az, err, rlen))
        bad = err > ERROR_WARN_DEG
        if bad.any():
            spots = ", ".join(_fmt_range(r) for r in _ranges(az, bad))
            warnings.append(
                f"elevation {el:+.0f}: the image is more than {ERROR_WARN_DEG:.0f} deg off "
                f"(energy vector) at azimuth {spots} (worst {err.max():.1f} deg)"
            )
        weak = rlen < RE_WARN
        if weak.any():
            spots = ", ".join(_fmt_range(r) for r in _ranges(az, weak))
            warnings.append(
                f"elevation {el:+.0f}: diffuse image (|rE| < {RE_WARN}) at azimuth {spots} "
                f"(lowest {rlen.min():.2f})"
            )
    ear = sorted((s for s in main if abs(s.elevation) <= EAR_LEVEL_DEG), key=lambda s: s.azimuth)
    if len(ear) >= 2:
        for a, b in zip(ear, ear[1:] + ear[:1]):
            gap = (b.azimuth - a.azimuth) % 360.0 or 360.0
            if gap > GAP_WARN_DEG:
                warnings.append(
                    f"gap of {gap:.0f} deg between speakers {a.id} ({a.azimuth:+.0f}) and {b.id} "
                    f"({b.azimuth:+.0f}): wider than {GAP_WARN_DEG:.0f} deg, phantom images there "
                    "pull towards the speakers"
                )
    if any(s.elevation > EAR_LEVEL_DEG for s in main) and not any(s.elevation < -EAR_LEVEL_DEG for s in main):
        warnings.append("no speakers below ear level: directions below the lowest ring are not covered")
    all_err = np.concatenate([r.error_deg for r in rings])
    all_re = np.concatenate([r.re_len for r in rings])
    return QualityReport(
        panner=kind,
        rings=rings,
        max_error_deg=float(all_err.max()),
        mean_error_deg=float(all_err.mean()),
        min_re=float(all_re.min()),
        warnings=warnings,
    )


def speaker_table(layout: Layout) -> str:
    head = f"{'id':<10} {'out':>4} {'azim':>7} {'elev':>6} {'dist m':>7} {'delay ms':>9} {'trim dB':>8}  role"
    rows = [head, "-" * len(head)]
    for s in layout.speakers:
        rows.append(
            f"{s.id:<10} {s.output:>4} {s.azimuth:>+7.1f} {s.elevation:>+6.1f} {s.distance:>7.2f} "
            f"{s.delay_ms:>9.3f} {s.trim_db:>+8.2f}  {'sub' if s.sub else 'main'}"
        )
    return "\n".join(rows)


def format_report(layout: Layout, rep: QualityReport) -> str:
    lines = [
        f"layout {layout.name}: {len(layout.speakers)} speakers "
        f"({len(layout.main_indices)} main, {len(layout.sub_indices)} sub), "
        f"{layout.n_channels} output channels, panner {rep.panner}",
        "",
        speaker_table(layout),
        "",
        "quality (Gerzon energy vector rE, every "
        f"{AZ_STEP_DEG:.0f} deg of azimuth on each ring: "
        + ", ".join(f"{r.elevation:+.0f}" for r in rep.rings)
        + " deg elevation)",
        f"  largest direction error  {rep.max_error_deg:6.1f} deg",
        f"  mean direction error     {rep.mean_error_deg:6.1f} deg",
        f"  smallest |rE|            {rep.min_re:6.2f}",
    ]
    if rep.warnings:
        lines += ["", "warnings:"] + [f"  - {w}" for w in rep.warnings]
    else:
        lines += ["", "no weak spots found"]
    return "\n".join(lines)


def plot(layout: Layout, rep: QualityReport, path) -> None:
    """Draw the layout from above with the direction error around the circle (SVG or PNG)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig = plt.figure(figsize=(7.5, 7.5))
    ax = fig.add_subplot(projection="polar")
    ax.set_theta_zero_location("N")  # front at the top
    ax.set_theta_direction(1)  # counter-clockwise = positive azimuth = left
    max_err = max(rep.max_error_deg, ERROR_WARN_DEG * 1.5)
    rmax = 1.0
    # error curves: radius = 1 - err / (2 * max_err) so that a perfect panner draws the unit circle
    colours = ["#2a9d8f", "#e9c46a", "#8ab17d", "#f4a261"]
    for k, ring in enumerate(rep.rings):
        th = np.radians(np.append(ring.azimuths, ring.azimuths[0]))
        err = np.append(ring.error_deg, ring.error_deg[0])
        r = rmax + 0.35 * err / max_err
        ax.plot(th, r, color=colours[k % len(colours)], lw=2, label=f"error at elevation {ring.elevation:+.0f}")
        ax.fill_between(th, rmax, r, color=colours[k % len(colours)], alpha=0.25)
    ax.plot(np.linspace(0, 2 * np.pi, 361), np.full(361, rmax), color="#555", lw=0.8, ls=":")
    ax.plot(
        np.linspace(0, 2 * np.pi, 361),
        np.full(361, rmax + 0.35 * ERROR_WARN_DEG / max_err),
        color="#c0392b",
        lw=0.8,
        ls="--",
        label=f"warning threshold {ERROR_WARN_DEG:.0f} deg",
    )
    for s in layout.speakers:
        rr = 0.35 if s.sub else (0.62 if s.elevation > EAR_LEVEL_DEG else 0.8)
        marker = "s" if s.sub else ("^" if s.elevation > EAR_LEVEL_DEG else "o")
        ax.plot(np.radians(s.azimuth), rr, marker=marker, ms=11, color="#264653")
        ax.annotate(f"{s.id}\n{s.output}", (np.radians(s.azimuth), rr), textcoords="offset points",
                    xytext=(0, -24), ha="center", fontsize=8)
    ax.plot(0, 0, marker="*", ms=12, color="#e76f51")
    ticks = np.arange(0, 360, 45)
    ax.set_thetagrids(ticks, [f"{(t + 180) % 360 - 180:+.0f}" if t not in (0, 180) else f"{t}" for t in ticks])
    ax.set_ylim(0, rmax + 0.4)
    ax.set_yticks([])
    ax.set_title(
        f"{layout.name} ({rep.panner}) seen from above, front at the top\n"
        f"markers: ear level o, upper ^, sub s; curves: energy-vector direction error "
        f"(outer edge = {max_err:.0f} deg)",
        fontsize=9,
    )
    ax.legend(loc="lower left", bbox_to_anchor=(-0.1, -0.12), fontsize=8, frameon=False)
    fig.savefig(str(path), bbox_inches="tight")
    plt.close(fig)
