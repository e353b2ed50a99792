"""Layout loading: the example layouts, alignment, defaults, and the bad-input corpus."""

import json
import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fieldmix import geometry
from fieldmix.errors import ConfigError
from fieldmix.jsonload import load_schema
from fieldmix.layout import layout_from_dict, load_layout, mean_main_distance, reference_distance

import bad_inputs

ROOT = Path(__file__).resolve().parents[1]
LAYOUTS = ROOT / "configs" / "layouts"
EXAMPLES = sorted(LAYOUTS.glob("*.json"))


def _speakers(layout):
    return {s.id: s for s in layout.speakers}


# ------------------------------------------------------------------ example layouts


def test_examples_present():
    names = {p.name for p in EXAMPLES}
    for required in ("stereo.json", "itu-5.0.json", "ring8.json", "dome-4-5-0.json", "ropewalk-gallery.json"):
        assert required in names


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_example_loads_and_is_consistent(path):
    layout = load_layout(path)
    assert layout.path == path
    assert layout.speakers, "no speakers"
    assert len({s.id for s in layout.speakers}) == len(layout.speakers)
    assert len({s.output for s in layout.speakers}) == len(layout.speakers)
    assert [s.index for s in layout.speakers] == list(range(len(layout.speakers)))
    assert layout.main_indices
    for s in layout.speakers:
        # both stored forms describe the same point
        p = geometry.sph_to_cart(s.azimuth, s.elevation, s.distance)
        np.testing.assert_allclose(p, s.position, atol=1e-9)
        assert -180.0 < s.azimuth <= 180.0
        assert 1.5 <= s.distance <= 4.5  # our examples stand 2-4 m away
        assert all(isinstance(v, float) for v in s.position)
        assert isinstance(s.output, int)


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_example_validates_against_shipped_schema(path):
    from jsonschema import Draft202012Validator

    schema = load_schema("layout")
    Draft202012Validator.check_schema(schema)
    errors = list(Draft202012Validator(schema).iter_errors(json.loads(path.read_text())))
    assert errors == []


def test_stereo():
    lay = load_layout(LAYOUTS / "stereo.json")
    sp = _speakers(lay)
    assert set(sp) == {"L", "R"}
    assert sp["L"].azimuth == 30.0 and sp["R"].azimuth == -30.0
    assert (sp["L"].output, sp["R"].output) == (1, 2)
    # azimuth + = left: L is at negative x
    assert sp["L"].position[0] < 0 < sp["R"].position[0]
    assert lay.panner in ("vbap", "pairwise")


def test_itu_5_0_angles():
    # ITU-R BS.775 3/2: C 0, L +30, R -30, LS +110, RS -110
    lay = load_layout(LAYOUTS / "itu-5.0.json")
    az = {s.id: s.azimuth for s in lay.speakers}
    assert az == {"C": 0.0, "L": 30.0, "R": -30.0, "LS": 110.0, "RS": -110.0}
    assert not lay.sub_indices
    assert all(s.elevation == 0.0 for s in lay.speakers)


def test_ring8():
    lay = load_layout(LAYOUTS / "ring8.json")
    mains = [lay.speakers[i] for i in lay.main_indices]
    assert len(mains) == 8
    angles = sorted(geometry.wrap_deg(s.azimuth) % 360 for s in mains)
    assert angles == [0, 45, 90, 135, 180, 225, 270, 315]
    assert all(s.distance == 3.0 and s.elevation == 0 for s in mains)
    assert len(lay.sub_indices) == 1
    assert lay.n_channels == 9


def test_dome_4_5_0():
    # ITU-R BS.2051 System D "4+5+0": ear layer 0, +-30, +-110; upper +-30, +-110 at 30
    lay = load_layout(LAYOUTS / "dome-4-5-0.json")
    ear = sorted(s.azimuth for s in lay.speakers if s.elevation == 0)
    up = sorted(s.azimuth for s in lay.speakers if s.elevation == 30)
    assert ear == [-110.0, -30.0, 0.0, 30.0, 110.0]
    assert up == [-110.0, -30.0, 30.0, 110.0]
    assert len(lay.speakers) == 9 and lay.panner == "vbap"


def test_gallery_alignment_matches_formula():
    # delay (d_max - d)/c and trim 20 log10(d/d_max): common practice, no source.
    lay = load_layout(LAYOUTS / "ropewalk-gallery.json")
    raw = json.loads((LAYOUTS / "ropewalk-gallery.json").read_text())
    assert lay.panner == "dbap"
    assert lay.options.auto_delay and lay.options.auto_trim
    assert lay.sub_indices, "the gallery has a sub"
    c = geometry.speed_of_sound(lay.options.temperature_c)
    d_max = max(s.distance for s in lay.speakers)
    for s, r in zip(lay.speakers, raw["speakers"]):
        assert s.delay_ms == pytest.approx(r.get("delay_ms", 0) + (d_max - s.distance) / c * 1000, abs=1e-9)
        assert s.trim_db == pytest.approx(r.get("trim_db", 0) + 20 * math.log10(s.distance / d_max), abs=1e-9)
        assert s.weight == r.get("weight", 1.0)
    far = max(lay.speakers, key=lambda s: s.distance)
    assert far.id == "stairs" and far.delay_ms == pytest.approx(1.5)  # file delay only


# ------------------------------------------------------------------ alignment


def _pair(d1, d2, **over):
    data = {
        "speakers": [
            {"id": "far", "output": 1, "azimuth": 30, "distance": d1},
            {"id": "near", "output": 2, "azimuth": -30, "distance": d2},
        ],
        "alignment": {"auto_delay": True, "auto_trim": True},
    }
    data.update(over)
    return data


def test_speed_of_sound_handbook():
    # handbook value: 343.2 m/s at 20 C, 331.3 m/s at 0 C (Kinsler & Frey, from memory)
    assert geometry.speed_of_sound(20.0) == pytest.approx(343.2, abs=0.05)
    assert geometry.speed_of_sound(0.0) == pytest.approx(331.3, abs=1e-9)
    # 2.914 ms per metre at 20 C (handbook value)
    assert 1000.0 / geometry.speed_of_sound(20.0) == pytest.approx(2.914, abs=0.001)


def test_alignment_computed_example():
    # 3 m and 2 m at 20 C: the near one waits 1 m of sound, 2.914 ms (handbook 2.914 ms/m),
    # and is trimmed by 20 log10(2/3) = -3.5218 dB (computed). Common practice, no source.
    lay = layout_from_dict(_pair(3.0, 2.0), "pair.json")
    far, near = lay.speakers
    assert far.delay_ms == 0.0 and far.trim_db == 0.0
    assert near.delay_ms == pytest.approx(2.914, abs=0.001)
    assert near.delay_ms == pytest.approx(1000.0 / geometry.speed_of_sound(20.0), rel=1e-12)
    assert near.trim_db == pytest.approx(-3.5218, abs=1e-4)


def test_alignment_adds_file_values_and_uses_temperature():
    data = _pair(4.0, 2.0, alignment={"auto_delay": True, "auto_trim": True, "temperature_c": 0})
    data["speakers"][1]["delay_ms"] = 1.0
    data["speakers"][1]["trim_db"] = 2.0
    data["speakers"][0]["trim_db"] = -1.0
    far, near = layout_from_dict(data).speakers
    assert near.delay_ms == pytest.approx(1.0 + 2.0 / 331.3 * 1000, rel=1e-12)
    assert near.trim_db == pytest.approx(2.0 + 20 * math.log10(0.5), rel=1e-12)
    assert far.trim_db == -1.0 and far.delay_ms == 0.0


def test_alignment_off_keeps_file_values():
    data = _pair(4.0, 2.0, alignment={"auto_delay": False, "auto_trim": False})
    data["speakers"][1]["delay_ms"] = 3.5
    far, near = layout_from_dict(data).speakers
    assert near.delay_ms == 3.5 and near.trim_db == 0.0


def test_alignment_delay_only_and_trim_only():
    far, near = layout_from_dict(_pair(3.0, 1.5, alignment={"auto_delay": True})).speakers
    assert near.delay_ms > 4.0 and near.trim_db == 0.0
    far, near = layout_from_dict(_pair(3.0, 1.5, alignment={"auto_trim": True})).speakers
    assert near.delay_ms == 0.0 and near.trim_db == pytest.approx(-6.0206, abs=1e-4)


def test_sub_counts_in_d_max():
    # documented choice: subs are aligned like any other speaker
    data = _pair(2.0, 2.0)
    data["speakers"].append({"id": "sub", "output": 3, "azimuth": 0, "distance": 3.0, "sub": True})
    lay = layout_from_dict(data)
    a, b, sub = lay.speakers
    assert sub.delay_ms == 0.0
    assert a.delay_ms == pytest.approx(1000 / geometry.speed_of_sound(20.0))
    assert b.delay_ms == a.delay_ms


def test_alignment_total_delay_bound():
    with pytest.raises(ConfigError, match="total delay"):
        layout_from_dict(_pair(900.0, 1.0, alignment={"auto_delay": True}), "far.json")


def test_alignment_total_trim_bound():
    with pytest.raises(ConfigError, match="total trim"):
        layout_from_dict(_pair(900.0, 0.5, alignment={"auto_trim": True}), "far.json")


# ------------------------------------------------------------------ defaults and forms


def test_defaults(tmp_path):
    p = tmp_path / "little-room.json"
    p.write_text(json.dumps({"speakers": [{"output": 3, "azimuth": 45}, {"output": 1, "azimuth": -45}]}))
    lay = load_layout(p)
    assert lay.name == "little-room"
    assert lay.panner == "vbap"
    assert [s.id for s in lay.speakers] == ["S1", "S2"]
    s = lay.speakers[0]
    assert (s.elevation, s.distance, s.trim_db, s.delay_ms, s.sub, s.weight) == (0.0, 1.0, 0.0, 0.0, False, 1.0)
    assert lay.n_channels == 3
    o = lay.options
    assert (o.auto_delay, o.auto_trim, o.temperature_c) == (False, False, 20.0)
    assert (o.dbap_rolloff_db, o.dbap_blur, o.crossover_hz) == (6.0, 0.2, 80.0)
    assert (o.reference_distance, o.distance_floor_db, o.near_radius) == (None, -40.0, None)
    assert reference_distance(lay) == 1.0


def test_options_are_mapped():
    data = {
        "speakers": [{"output": 1, "azimuth": 0, "distance": 2}],
        "panner": "dbap",
        "dbap": {"rolloff_db": 4.5, "blur": 0.5},
        "distance": {"reference": 2.5, "floor_db": -30, "near_radius": 0.75},
        "crossover_hz": 100,
        "alignment": {"temperature_c": 30},
    }
    lay = layout_from_dict(data)
    o = lay.options
    assert (o.dbap_rolloff_db, o.dbap_blur) == (4.5, 0.5)
    assert (o.reference_distance, o.distance_floor_db, o.near_radius) == (2.5, -30.0, 0.75)
    assert o.crossover_hz == 100.0 and o.temperature_c == 30.0
    assert lay.panner == "dbap"
    assert reference_distance(lay) == 2.5


def test_null_distance_options_mean_default():
    lay = layout_from_dict(
        {
            "speakers": [{"output": 1, "azimuth": 0, "distance": 2}, {"output": 2, "azimuth": 90, "distance": 4},
                         {"output": 3, "azimuth": 0, "distance": 9, "sub": True}],
            "distance": {"reference": None, "near_radius": None},
        }
    )
    assert lay.options.reference_distance is None and lay.options.near_radius is None
    assert mean_main_distance(lay) == 3.0  # the sub does not count
    assert reference_distance(lay) == 3.0


@pytest.mark.parametrize(
    "given, expected",
    [(0, 0.0), (180, 180.0), (-180, 180.0), (270, -90.0), (-270, 90.0), (360, 0.0), (190.5, -169.5)],
)
def test_azimuth_normalised(given, expected):
    s = layout_from_dict({"speakers": [{"output": 1, "azimuth": given}]}).speakers[0]
    assert s.azimuth == pytest.approx(expected, abs=1e-12)


def test_position_form():
    lay = layout_from_dict(
        {"speakers": [{"output": 1, "position": [-2, 2, 0]}, {"output": 2, "position": [0, -3]},
                      {"output": 3, "position": [0, 0, 2.5]}]}
    )
    a, b, c = lay.speakers
    assert a.azimuth == pytest.approx(45.0) and a.distance == pytest.approx(math.sqrt(8))
    assert b.position == (0.0, -3.0, 0.0) and b.azimuth == pytest.approx(180.0) and b.distance == 3.0
    assert c.elevation == pytest.approx(90.0) and c.distance == 2.5


def test_integer_valued_float_output_accepted():
    # JSON does not tell 2 from 2.0; both are channel 2
    s = layout_from_dict({"speakers": [{"output": 2.0, "azimuth": 0}]}).speakers[0]
    assert s.output == 2 and isinstance(s.output, int)


def test_sub_and_weight():
    lay = layout_from_dict(
        {"speakers": [{"id": "a", "output": 1, "azimuth": 0, "weight": 0.5},
                      {"id": "lfe", "output": 2, "azimuth": 0, "sub": True}]}
    )
    assert lay.main_indices == (0,) and lay.sub_indices == (1,)
    assert lay.speakers[0].weight == 0.5


def test_from_dict_rejects_nan_float_with_path():
    data = {"speakers": [{"output": 1, "azimuth": float("nan")}]}
    with pytest.raises(ConfigError) as e:
        layout_from_dict(data, "web")
    assert e.value.where == "web: speakers[0].azimuth"


def test_from_dict_rejects_non_json_value():
    with pytest.raises(ConfigError, match="unsupported value"):
        layout_from_dict({"speakers": [{"output": 1, "azimuth": {1, 2}}]}, "web")


def test_format_key_and_schema_pointer_accepted():
    lay = layout_from_dict(
        {"$schema": "../../server/fieldmix/schemas/layout.schema.json", "format": "fieldmix-layout/1",
         "name": "x", "description": "d", "speakers": [{"output": 1, "azimuth": 0, "note": "n"}]}
    )
    assert lay.name == "x"


def test_bom_tolerated(tmp_path):
    p = tmp_path / "bom.json"
    p.write_bytes(b"\xef\xbb\xbf" + json.dumps({"speakers": [{"output": 1, "azimuth": 0}]}).encode())
    assert load_layout(p).speakers[0].output == 1


def test_folder_instead_of_file(tmp_path):
    with pytest.raises(ConfigError, match="is a folder"):
        load_layout(tmp_path)


# ------------------------------------------------------------------ the corpus


RAW_JSONSCHEMA_PHRASES = ("is not of type", "Additional properties", "is a required property", "is greater than")


@pytest.mark.parametrize("case", bad_inputs.cases("layout"), ids=lambda c: c["name"])
def test_bad_layout(case, tmp_path):
    target = bad_inputs.write_files(case, tmp_path)
    with pytest.raises(ConfigError) as e:
        load_layout(target)
    msg = str(e.value)
    assert case["expect"] in msg
    assert "\n" not in msg and "\r" not in msg
    assert e.value.where.startswith(case.get("where", target.name))
    assert not any(p in msg for p in RAW_JSONSCHEMA_PHRASES), msg


def test_corpus_is_big_enough():
    assert len(bad_inputs.CASES) >= 20
    assert {c["kind"] for c in bad_inputs.CASES} == {"layout", "show", "script"}


# ------------------------------------------------------------------ never a crash

json_values = st.recursive(
    st.none() | st.booleans() | st.integers(-10**20, 10**20)
    | st.floats(allow_nan=True, allow_infinity=True) | st.text(max_size=8),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4),
    max_leaves=12,
)
speaker_keys = st.sampled_from(
    ["id", "output", "azimuth", "elevation", "distance", "position", "trim_db", "delay_ms", "sub", "weight", "x"]
)
speakers = st.lists(st.dictionaries(speaker_keys, json_values, max_size=6), max_size=4)


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(sp=speakers, panner=json_values, extra=st.dictionaries(st.sampled_from(
    ["alignment", "dbap", "distance", "crossover_hz", "name", "panner"]), json_values, max_size=3))
def test_random_layouts_load_or_fail_cleanly(sp, panner, extra):
    data = {"speakers": sp, **extra}
    try:
        lay = layout_from_dict(data, "fuzz.json")
    except ConfigError as e:
        assert len(str(e).splitlines()) == 1 and str(e).startswith("fuzz.json")
        return
    for s in lay.speakers:
        assert all(math.isfinite(v) for v in (*s.position, s.azimuth, s.elevation, s.distance, s.trim_db, s.delay_ms))
        assert s.distance >= 0.01


def test_hostile_key_names_stay_on_one_line():
    for key in ("a\nb", "x\u2028y", "\r"):
        with pytest.raises(ConfigError) as e:
            layout_from_dict({"speakers": [{"output": 1, "azimuth": 0, key: 1}]}, "k.json")
        assert len(str(e.value).splitlines()) == 1
        with pytest.raises(ConfigError) as e:
            layout_from_dict({"speakers": [{"output": 1, "azimuth": 0, "id": key}]}, "k.json")
        assert len(str(e.value).splitlines()) == 1
