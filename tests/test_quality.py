"""Layout quality report (Gerzon vectors) and the `layout check` command."""

from __future__ import annotations

import numpy as np
import pytest

from conftest import REPO, run_cli

LAYOUTS = REPO / "configs" / "layouts"


def _load(name):
    from fieldmix.layout import load_layout

    return load_layout(LAYOUTS / name)


def test_energy_vector_of_single_speaker_is_its_direction():
    """rE of a source fed to one speaker points at that speaker with |rE| = 1 (Gerzon 1992, definition)."""
    from fieldmix.panning import gerzon_vectors

    units = np.array([[0.0, 1.0, 0.0], [-1.0, 0.0, 0.0]])
    _, re = gerzon_vectors(np.array([[1.0, 0.0], [0.0, 2.0]]), units)
    assert np.allclose(re, units)
    # equal power to two orthogonal speakers: rE halfway, |rE| = 1/sqrt(2)
    _, re2 = gerzon_vectors(np.array([[1.0, 1.0]]), units)
    assert np.allclose(np.linalg.norm(re2), 1 / np.sqrt(2))


def test_ring_of_eight_is_better_than_stereo_behind():
    """A ring of 8 has small errors everywhere; a stereo pair has a large error behind and a gap warning."""
    from fieldmix.quality import assess

    ring = assess(_load("ring8.json"))
    pair = assess(_load("stereo.json"))
    assert ring.max_error_deg < 10 and ring.min_re > 0.8
    assert pair.max_error_deg > 90
    assert any("gap of 300 deg" in w for w in pair.warnings)
    assert not any(w.startswith("gap") for w in ring.warnings)


def test_itu_50_warns_about_the_rear_gap():
    """5.0 (ITU-R BS.775): a 140 deg gap behind (110 to -110) and 80 deg at the sides."""
    from fieldmix.quality import assess

    rep = assess(_load("itu-5.0.json"))
    gaps = [w for w in rep.warnings if w.startswith("gap")]
    assert len(gaps) == 1 and "140 deg" in gaps[0]


def test_dome_sweeps_both_rings_and_warns_below():
    from fieldmix.quality import assess

    rep = assess(_load("dome-4-5-0.json"))
    assert [round(r.elevation) for r in rep.rings] == [0, 30]
    assert any("below" in w for w in rep.warnings)
    assert all(len(r.azimuths) == 72 for r in rep.rings)  # every 5 degrees


@pytest.mark.parametrize("ext", ["svg", "png"])
def test_layout_check_cli_prints_table_and_plots(tmp_path, ext):
    out = tmp_path / f"plot.{ext}"
    r = run_cli("layout", "check", LAYOUTS / "itu-5.0.json", "--plot", out)
    assert r.returncode == 0, r.stderr
    for word in ("largest direction error", "mean direction error", "smallest |rE|", "delay ms", "trim dB"):
        assert word in r.stdout
    assert out.stat().st_size > 2000
    head = out.read_bytes()[:200]
    assert (b"<svg" in head or b"<?xml" in head) if ext == "svg" else head.startswith(b"\x89PNG")


def test_every_example_layout_checks(tmp_path):
    for f in sorted(LAYOUTS.glob("*.json")):
        r = run_cli("layout", "check", f)
        assert r.returncode == 0, (f.name, r.stderr)
