"""Show loading: paths, defaults, source forms, direct panner, reserved keys, the corpus."""

import json
from pathlib import Path

import numpy as np
import pytest

from fieldmix import geometry
from fieldmix.errors import ConfigError
from fieldmix.jsonload import load_schema
from fieldmix.layout import layout_from_dict
from fieldmix.show import load_show, show_from_dict, show_name

import bad_inputs

ROOT = Path(__file__).resolve().parents[1]
SHOWS = sorted((ROOT / "configs" / "shows").glob("*.json"))

LAYOUT = {
    "name": "quad",
    "speakers": [
        {"id": "FL", "output": 1, "azimuth": 45, "distance": 2.0},
        {"id": "FR", "output": 2, "azimuth": -45, "distance": 2.0},
        {"id": "BL", "output": 3, "azimuth": 135, "distance": 4.0},
        {"id": "BR", "output": 4, "azimuth": -135, "distance": 4.0},
        {"id": "LFE", "output": 5, "azimuth": 0, "distance": 10.0, "sub": True},
    ],
}


def _write(folder: Path, name: str, obj) -> Path:
    p = folder / name
    p.parent.mkdir(parents=True, exist_ok=True)
    p.write_text(json.dumps(obj), encoding="utf-8")
    return p


def _show(tmp_path, sources, layout_rel="layouts/quad.json", **top):
    _write(tmp_path, "layouts/quad.json", LAYOUT)
    data = {"layout": layout_rel, "sources": sources}
    data.update(top)
    return load_show(_write(tmp_path, "shows/test.json", data))


def test_paths_resolve_against_show_folder(tmp_path):
    show = _show(
        tmp_path,
        [{"id": "vox", "input": 1, "file": "../audio/vox.wav"}],
        layout_rel="../layouts/quad.json",
    )
    assert show.layout_path == (tmp_path / "layouts" / "quad.json").resolve()
    assert show.layout.name == "quad"
    assert show.sources[0].file == (tmp_path / "audio" / "vox.wav").resolve()
    assert show.sources[0].file.is_absolute()
    assert show.path == tmp_path / "shows" / "test.json"


def test_defaults(tmp_path):
    show = _show(tmp_path, [{"id": "vox", "input": 3}], layout_rel="../layouts/quad.json")
    s = show.sources[0]
    assert (s.index, s.id, s.input, s.name) == (0, "vox", 3, "vox")
    assert (s.gain_db, s.mute, s.spread, s.panner, s.direct, s.sub_send_db, s.file) == (
        0.0, False, 0.0, None, (), None, None)
    # default: straight ahead at the reference distance = mean of the main speakers (3 m;
    # the sub does not count)
    np.testing.assert_allclose(s.position, (0.0, 3.0, 0.0), atol=1e-12)
    assert (show.master_gain_db, show.glide_ms, show.samplerate) == (0.0, 30.0, 48000)
    assert show_name(show) == "test"
    assert show.source_ids == ("vox",)


def test_default_distance_follows_reference_option(tmp_path):
    lay = layout_from_dict(dict(LAYOUT, distance={"reference": 1.5}))
    show = show_from_dict({"layout": "x.json", "sources": [{"id": "a", "input": 1, "azimuth": 90}]}, layout=lay)
    np.testing.assert_allclose(show.sources[0].position, (-1.5, 0.0, 0.0), atol=1e-12)


def test_top_level_values_and_name(tmp_path):
    show = _show(
        tmp_path,
        [{"id": "vox", "input": 1}],
        layout_rel="../layouts/quad.json",
        name="Night walk",
        master_gain_db=-6,
        glide_ms=50,
        samplerate=44100,
        description="x",
        format="fieldmix-show/1",
    )
    assert (show.master_gain_db, show.glide_ms, show.samplerate) == (-6.0, 50.0, 44100)
    assert isinstance(show.samplerate, int)
    assert show_name(show) == "Night walk"


def test_source_forms(tmp_path):
    show = _show(
        tmp_path,
        [
            {"id": "a", "input": 1, "azimuth": 90, "elevation": 30, "distance": 2},
            {"id": "b", "input": 2, "position": [1, 2]},
            {"id": "c", "input": 3, "position": [1, 2, 3]},
            {"id": "d", "input": 4, "elevation": 90, "distance": 0},
            {"id": "e", "input": 5, "azimuth": -400 + 360},
        ],
        layout_rel="../layouts/quad.json",
    )
    a, b, c, d, e = show.sources
    np.testing.assert_allclose(a.position, geometry.sph_to_cart(90, 30, 2), atol=1e-12)
    assert b.position == (1.0, 2.0, 0.0)
    assert c.position == (1.0, 2.0, 3.0)
    assert d.position == (0.0, 0.0, 0.0)  # at the listener: allowed for sources
    np.testing.assert_allclose(e.position, geometry.sph_to_cart(-40, 0, 3.0), atol=1e-12)


def test_sources_may_share_an_input(tmp_path):
    show = _show(
        tmp_path,
        [{"id": "mic-pan", "input": 1}, {"id": "mic-dbap", "input": 1, "panner": "dbap"}],
        layout_rel="../layouts/quad.json",
    )
    assert [s.input for s in show.sources] == [1, 1]
    assert show.sources[1].panner == "dbap"


def test_source_values(tmp_path):
    show = _show(
        tmp_path,
        [{"id": "v.1_x-y", "name": "Voice", "input": 7, "gain_db": -4.5, "mute": True, "spread": 90,
          "panner": "vbap", "sub_send_db": -6}],
        layout_rel="../layouts/quad.json",
    )
    s = show.sources[0]
    assert (s.id, s.name, s.input, s.gain_db, s.mute, s.spread, s.panner, s.sub_send_db) == (
        "v.1_x-y", "Voice", 7, -4.5, True, 90.0, "vbap", -6.0)


def test_direct_panner(tmp_path):
    show = _show(
        tmp_path,
        [{"id": "fx", "input": 1, "panner": "direct", "direct": {"BL": -3, "BR": 0, "LFE": -10}}],
        layout_rel="../layouts/quad.json",
    )
    s = show.sources[0]
    assert s.panner == "direct"
    assert s.direct == (("BL", -3.0), ("BR", 0.0), ("LFE", -10.0))


def test_sub_send_null_is_none(tmp_path):
    show = _show(tmp_path, [{"id": "a", "input": 1, "sub_send_db": None}], layout_rel="../layouts/quad.json")
    assert show.sources[0].sub_send_db is None


def test_reserved_keys_kept_in_raw(tmp_path):
    show = _show(
        tmp_path,
        [{"id": "a", "input": 1}],
        layout_rel="../layouts/quad.json",
        cues=[{"number": 1, "name": "one"}],
        mappings=[],
        network={"osc_port": 9000},
    )
    assert show.raw["cues"] == [{"number": 1, "name": "one"}] and [c.number for c in show.cues] == [1.0]
    assert show.raw["mappings"] == [] and show.mappings == ()
    assert show.raw["network"] == {"osc_port": 9000}


def test_show_from_dict_base_dir(tmp_path):
    _write(tmp_path, "quad.json", LAYOUT)
    show = show_from_dict(
        {"layout": "quad.json", "sources": [{"id": "a", "input": 1, "file": "a.wav"}]},
        where="web",
        base_dir=tmp_path,
    )
    assert show.path is None
    assert show.layout_path == (tmp_path / "quad.json").resolve()
    assert show.sources[0].file == (tmp_path / "a.wav").resolve()


def test_show_from_dict_rejects_nan_with_path():
    lay = layout_from_dict(LAYOUT)
    with pytest.raises(ConfigError) as e:
        show_from_dict({"layout": "x", "sources": [{"id": "a", "input": 1, "spread": float("inf")}]},
                       where="web", layout=lay)
    assert e.value.where == "web: sources[0].spread"


def test_layout_error_names_the_layout_file(tmp_path):
    _write(tmp_path, "bad-layout.json", {"speakers": [{"output": 1, "azimuth": "front"}]})
    p = _write(tmp_path, "s.json", {"layout": "bad-layout.json", "sources": [{"id": "a", "input": 1}]})
    with pytest.raises(ConfigError) as e:
        load_show(p)
    assert e.value.where == "bad-layout.json: speakers[0].azimuth"


def test_nul_in_path_is_a_config_error(tmp_path):
    p = _write(tmp_path, "s.json", {"layout": "a\u0000b.json", "sources": [{"id": "a", "input": 1}]})
    with pytest.raises(ConfigError) as e:
        load_show(p)
    assert e.value.where == "s.json: layout"


def test_schema_is_valid_draft_2020_12():
    from jsonschema import Draft202012Validator

    Draft202012Validator.check_schema(load_schema("show"))


@pytest.mark.parametrize("path", SHOWS, ids=lambda p: p.name)
def test_example_shows_load(path):
    show = load_show(path)
    assert show.sources
    assert len(set(show.source_ids)) == len(show.sources)
    assert show.layout.speakers


@pytest.mark.parametrize("case", bad_inputs.cases("show"), ids=lambda c: c["name"])
def test_bad_show(case, tmp_path):
    target = bad_inputs.write_files(case, tmp_path)
    with pytest.raises(ConfigError) as e:
        load_show(target)
    msg = str(e.value)
    assert case["expect"] in msg
    assert "\n" not in msg and "\r" not in msg
    assert e.value.where.startswith(case.get("where", target.name))
    assert "is not of type" not in msg and "Additional properties" not in msg


def _code_blocks(md: Path, lang: str) -> list:
    import re

    return re.findall(r"```" + lang + r"\n(.*?)```", md.read_text(encoding="utf-8"), flags=re.S)


def test_docs_examples_load():
    show_example = json.loads(_code_blocks(ROOT / "docs" / "shows.md", "json")[0])
    show = show_from_dict(show_example, where="docs/shows.md", base_dir=ROOT / "configs" / "shows")
    assert show.source_ids == ("vox", "gtr", "rain", "bell", "drone")
    assert show.sources[3].direct == (("R5", 0.0), ("R4", -6.0))
    for block in _code_blocks(ROOT / "docs" / "layouts.md", "json"):
        obj = json.loads(block)
        if "speakers" in obj:
            layout_from_dict(obj, where="docs/layouts.md")


def test_hostile_strings_stay_on_one_line(tmp_path):
    lay = layout_from_dict(dict(LAYOUT, name="quad\nroom"))
    cases = [
        {"layout": "x", "sources": [{"id": "a", "input": 1, "panner": "direct", "direct": {"F\u2028L": 0}}]},
        {"layout": "no\nsuch.json", "sources": [{"id": "a", "input": 1}]},
        {"layout": "x", "sources": [{"id": "a\nb", "input": 1}]},
    ]
    for i, data in enumerate(cases):
        with pytest.raises(ConfigError) as e:
            show_from_dict(data, where="s.json", layout=lay if i != 1 else None, base_dir=tmp_path)
        assert len(str(e.value).splitlines()) == 1, str(e.value)
