"""Tests for aoi_fix.config: the study file, its validation and ``--set`` overrides."""

from __future__ import annotations

import dataclasses
import textwrap
from pathlib import Path

import pytest

from aoi_fix.config import (Detection, Display, SampleColumns, Stimulus, Study, load_study,
                            parse_override, study_from_dict)
from aoi_fix.errors import AoiFixError, ConfigError, UsageError

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"

MINIMAL = {
    "display": {"width_px": 1280, "height_px": 720, "width_mm": 520.0, "height_mm": 292.5,
                "distance_mm": 600.0},
    "samples": {"time": "t", "x": "gx", "y": "gy"},
}


def _with(section: str, **keys) -> dict:
    data = {k: dict(v) for k, v in MINIMAL.items()}
    data.setdefault(section, {}).update(keys)
    return data


def _write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "study.toml"
    p.write_text(textwrap.dedent(text), encoding="utf-8")
    return p


# --------------------------------------------------------------------------- loading

def test_fixture_study_loads():
    s = load_study(FIXTURES / "study.toml")
    assert s.display == Display(width_px=1280, height_px=720, width_mm=520.0,
                                height_mm=292.5, distance_mm=600.0)
    assert (s.samples.time, s.samples.x, s.samples.y) == ("time_ms", "gaze_x", "gaze_y")


def test_defaults():
    s = study_from_dict(MINIMAL)
    # defaults are declared in config.py; the values in REFERENCES.md are common practice
    assert s.detection == Detection()
    assert s.detection.method == "ivt"
    assert s.detection.velocity_threshold_deg_s == 30.0  # common practice
    assert s.detection.max_gap_ms == 75.0  # common practice, ~75 ms
    assert s.detection.dispersion_threshold_deg == 1.0  # Blignaut 2009, ~1 deg (from memory)
    assert s.samples.time_unit == "ms"
    assert s.samples.coords == "px"
    assert s.samples.delimiter == "auto"
    assert s.samples.decimal == "."
    assert "n/a" in s.samples.missing_values and "" in s.samples.missing_values
    assert s.samples.valid_codes == ()
    assert s.stimuli == {}
    assert s.quality.correct_offset is False
    assert not s.samples.binocular


def test_study_is_frozen():
    s = study_from_dict(MINIMAL)
    with pytest.raises(dataclasses.FrozenInstanceError):
        s.display.width_px = 3  # type: ignore[misc]


def test_unknown_key_lists_valid_keys():
    with pytest.raises(ConfigError) as e:
        study_from_dict(_with("detection", velocity_treshold_deg_s=40))
    msg = str(e.value)
    assert "detection.velocity_treshold_deg_s" in msg
    for f in dataclasses.fields(Detection):
        assert f.name in msg
    assert "\n" not in msg


def test_unknown_section_lists_sections():
    data = dict(MINIMAL, detecton={"method": "idt"})
    with pytest.raises(ConfigError, match=r"detecton.*display.*samples.*detection"):
        study_from_dict(data)


@pytest.mark.parametrize("section,key,value", [
    ("display", "distance_mm", "far"),
    ("display", "width_px", 12.5),
    ("display", "width_px", "1280"),
    ("detection", "velocity_threshold_deg_s", True),
    ("detection", "method", "hmm"),
    ("samples", "time_unit", "minutes"),
    ("samples", "missing_values", 5),
    ("quality", "correct_offset", "yes"),
    ("detection", "max_gap_ms", float("inf")),
])
def test_wrong_type_or_choice_names_key(section, key, value):
    with pytest.raises(ConfigError) as e:
        study_from_dict(_with(section, **{key: value}))
    assert f"{section}.{key}" in str(e.value)


@pytest.mark.parametrize("section,key,value", [
    ("display", "distance_mm", -600.0),
    ("display", "distance_mm", 0.0),
    ("display", "width_mm", 0),
    ("display", "width_px", 0),
    ("display", "height_px", -5),
    ("detection", "velocity_threshold_deg_s", 0.0),
    ("detection", "dispersion_threshold_deg", 0),
    ("detection", "max_gap_ms", -1.0),
    ("detection", "min_fixation_ms", -10),
    ("quality", "min_valid_fraction", 1.5),
])
def test_negative_or_zero_values_name_key(section, key, value):
    with pytest.raises(ConfigError) as e:
        study_from_dict(_with(section, **{key: value}))
    assert f"{section}.{key}" in str(e.value)
    assert repr(value) in str(e.value) or str(value) in str(e.value)


def test_zero_allowed_where_meaningful():
    s = study_from_dict(_with("detection", max_gap_ms=0, noise_factor=0,
                              merge_max_angle_deg=0))
    assert s.detection.max_gap_ms == 0.0 and isinstance(s.detection.max_gap_ms, float)
    assert s.detection.noise_factor == 0.0


def test_integer_valued_float_accepted_for_int_key():
    s = study_from_dict(_with("display", width_px=1280.0))
    assert s.display.width_px == 1280 and isinstance(s.display.width_px, int)


def test_missing_required_key_names_it():
    data = {k: dict(v) for k, v in MINIMAL.items()}
    del data["display"]["distance_mm"]
    with pytest.raises(ConfigError, match=r"display\.distance_mm.*missing"):
        study_from_dict(data)


def test_malformed_toml(tmp_path):
    p = _write(tmp_path, """
        [display]
        width_px = 1280
        height_px = = 720
    """)
    with pytest.raises(ConfigError) as e:
        load_study(p)
    assert str(p) in str(e.value) and "TOML" in str(e.value)


def test_missing_display_section(tmp_path):
    p = _write(tmp_path, """
        [samples]
        time = "t"
        x = "gx"
        y = "gy"
    """)
    with pytest.raises(ConfigError, match=r"\[display\].*missing"):
        load_study(p)


def test_missing_study_file(tmp_path):
    with pytest.raises(ConfigError, match="not found"):
        load_study(tmp_path / "nope.toml")


def test_samples_need_gaze_columns():
    data = {k: dict(v) for k, v in MINIMAL.items()}
    data["samples"] = {"time": "t"}
    with pytest.raises(ConfigError, match="gaze columns"):
        study_from_dict(data)
    data["samples"] = {"time": "t", "x": "gx", "y": "gy", "x_left": "lx", "y_left": "ly"}
    with pytest.raises(ConfigError, match="not both"):
        study_from_dict(data)
    data["samples"] = {"time": "t", "x_left": "lx"}
    with pytest.raises(ConfigError, match="y_left"):
        study_from_dict(data)


def test_config_error_is_aoifix_error_exit_1():
    assert issubclass(ConfigError, AoiFixError)
    assert ConfigError("x").exit_code == 1


# --------------------------------------------------------------------------- stimuli

def test_stimuli_tables(tmp_path):
    p = _write(tmp_path, """
        [display]
        width_px = 1280
        height_px = 720
        width_mm = 520.0
        height_mm = 292.5
        distance_mm = 600.0

        [samples]
        time = "t"
        x = "gx"
        y = "gy"

        [stimuli.story1]
        fps = 25
        width_px = 1280
        height_px = 720

        [stimuli.story2]
        fps = 29.97
        width_px = 640
        height_px = 360
    """)
    s = load_study(p)
    assert set(s.stimuli) == {"story1", "story2"}
    assert s.stimuli["story1"] == Stimulus(fps=25.0, width_px=1280, height_px=720)
    assert isinstance(s.stimuli["story1"].fps, float)
    assert s.stimuli["story2"].fps == 29.97


def test_stimulus_missing_key_and_bad_value():
    data = dict(MINIMAL, stimuli={"story1": {"width_px": 1280, "height_px": 720}})
    with pytest.raises(ConfigError, match=r"stimuli\.story1\.fps"):
        study_from_dict(data)
    data = dict(MINIMAL, stimuli={"story1": {"fps": 0, "width_px": 1280, "height_px": 720}})
    with pytest.raises(ConfigError, match=r"stimuli\.story1\.fps"):
        study_from_dict(data)
    data = dict(MINIMAL, stimuli={"story1": 3})
    with pytest.raises(ConfigError, match="story1"):
        study_from_dict(data)


# --------------------------------------------------------------------------- --set

@pytest.mark.parametrize("text,expected", [
    ("detection.velocity_threshold_deg_s=40", ("detection", "velocity_threshold_deg_s", 40.0)),
    ("detection.method = idt", ("detection", "method", "idt")),
    ("display.width_px=1920", ("display", "width_px", 1920)),
    ("quality.correct_offset=true", ("quality", "correct_offset", True)),
    ("quality.correct_offset=False", ("quality", "correct_offset", False)),
    ("quality.correct_offset=1", ("quality", "correct_offset", True)),
    ("quality.correct_offset=no", ("quality", "correct_offset", False)),
    ("samples.valid_codes=0, 1 ,2", ("samples", "valid_codes", ("0", "1", "2"))),
    ("aois.priority=face", ("aois", "priority", ("face",))),
    ("samples.delimiter=tab", ("samples", "delimiter", "\t")),
    ("samples.x=gaze=x", ("samples", "x", "gaze=x")),
    ("stimuli.story1.fps=30", ("stimuli.story1", "fps", 30.0)),
])
def test_parse_override_types(text, expected):
    got = parse_override(text)
    assert got == expected
    assert type(got[2]) is type(expected[2])


@pytest.mark.parametrize("text", [
    "detection.velocity_threshold_deg_s",      # no '='
    "velocity_threshold_deg_s=40",             # no section
    "detection.velocity_threshold_deg_s=fast",  # not a number
    "detection.velocity_threshold_deg_s=nan",   # not finite
    "display.width_px=12.5",                   # not an integer
    "quality.correct_offset=maybe",            # not a bool
])
def test_parse_override_malformed(text):
    with pytest.raises(UsageError) as e:
        parse_override(text)
    assert e.value.exit_code == 2
    assert "--set" in str(e.value)


def test_override_unknown_key_and_section_exit_2():
    with pytest.raises(UsageError) as e:
        parse_override("detection.velocity_thresh=40")
    assert e.value.exit_code == 2
    assert "velocity_thresh" in str(e.value)
    assert "velocity_threshold_deg_s" in str(e.value)  # lists valid keys
    with pytest.raises(UsageError) as e:
        load_study(FIXTURES / "study.toml", ["detektion.method=idt"])
    assert e.value.exit_code == 2 and "detektion" in str(e.value)


def test_override_changes_value(tmp_path):
    s = load_study(FIXTURES / "study.toml", ["detection.method=idt",
                                             "detection.dispersion_threshold_deg=0.75"])
    assert s.detection.method == "idt"
    assert s.detection.dispersion_threshold_deg == 0.75


def test_override_applied_before_validation():
    # the file alone is invalid (negative threshold, missing distance) ...
    data = _with("detection", velocity_threshold_deg_s=-5)
    del data["display"]["distance_mm"]
    with pytest.raises(ConfigError):
        study_from_dict(data)
    # ... and the overrides make it valid: they are applied first
    s = study_from_dict(data, overrides=["detection.velocity_threshold_deg_s=45",
                                         "display.distance_mm=650"])
    assert s.detection.velocity_threshold_deg_s == 45.0
    assert s.display.distance_mm == 650.0
    # an override that is itself out of range is caught by the same validation
    with pytest.raises(ConfigError, match=r"display\.distance_mm"):
        study_from_dict(MINIMAL, overrides=["display.distance_mm=-1"])


def test_override_adds_stimulus():
    s = study_from_dict(MINIMAL, overrides=["stimuli.clip.fps=24", "stimuli.clip.width_px=320",
                                            "stimuli.clip.height_px=240"])
    assert s.stimuli["clip"] == Stimulus(fps=24.0, width_px=320, height_px=240)


def test_override_does_not_mutate_input():
    data = _with("detection", method="ivt")
    study_from_dict(data, overrides=["detection.method=idt"])
    assert data["detection"]["method"] == "ivt"


# --------------------------------------------------------------------------- round trip

def test_to_dict_round_trips():
    data = _with("samples", valid="ok", valid_codes=["1", "2"], time_unit="us",
                 missing_values=["", "-1"])
    data["detection"] = {"method": "idt", "dispersion_threshold_deg": 0.8,
                         "min_fixation_ms": 100}
    data["aois"] = {"priority": ["face", "toy"], "margin_deg": 0.5}
    data["quality"] = {"correct_offset": True}
    data["stimuli"] = {"a": {"fps": 25, "width_px": 1280, "height_px": 720}}
    s = study_from_dict(data)
    d = s.to_dict()
    assert d["samples"]["valid_codes"] == ["1", "2"]  # plain lists, not tuples
    assert d["stimuli"]["a"] == {"fps": 25.0, "width_px": 1280, "height_px": 720}
    again = study_from_dict(d)
    assert again == s
    assert isinstance(again, Study)


def test_fixture_to_dict_round_trips():
    s = load_study(FIXTURES / "study.toml")
    assert study_from_dict(s.to_dict()) == s


def test_sample_columns_binocular_flag():
    assert SampleColumns(time="t", x_left="lx", y_left="ly").binocular
    assert not SampleColumns(time="t", x="x", y="y").binocular


@pytest.mark.parametrize("data,override", [
    (dict(MINIMAL, display=5), "display.width_px=3"),
    (dict(MINIMAL, stimuli=5), "stimuli.a.fps=3"),
])
def test_override_into_non_table_section_is_config_error(data, override):
    with pytest.raises(ConfigError):
        study_from_dict(data, overrides=[override])


def test_non_table_section_without_override_is_config_error():
    with pytest.raises(ConfigError, match=r"\[display\].*table"):
        study_from_dict(dict(MINIMAL, display=5))
