"""Tests for ``aoi_fix.bids``: BIDS eye-tracking recordings (headerless physio + sidecars).

``fixtures/bids`` is a tiny hand-made dataset (see its README): the right
answers below can be read off the files.  The last tests write a simulated
session both as our CSV and as BIDS and check that ``batch`` gives the same
tables for both.
"""

from __future__ import annotations

import copy
import gzip
import json
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from aoi_fix import simulate
from aoi_fix.batch import batch, session_folder
from aoi_fix.bids import (SYNTHETIC_TIME, bids_display, bids_inputs, bids_samples_section,
                          events_sidecars, is_bids_physio, read_bids_samples, read_physio,
                          study_for_bids)
from aoi_fix.config import Display, study_from_dict
from aoi_fix.errors import ConfigError, InputFormatError, NoValidSamplesError

FIXTURE = Path(__file__).resolve().parent.parent / "fixtures" / "bids"
SUB01 = FIXTURE / "sub-01" / "beh" / "sub-01_task-movie_recording-eye1_physio.tsv.gz"
SUB02 = FIXTURE / "sub-02" / "beh" / "sub-02_task-movie_physio.tsv.gz"


def _write_physio(folder: Path, name: str, lines: list[str], sidecar: dict) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"{name}_physio.tsv.gz"
    with gzip.open(path, "wt", encoding="utf-8") as fh:
        fh.write("".join(ln + "\n" for ln in lines))
    (folder / f"{name}_physio.json").write_text(json.dumps(sidecar))
    return path


SCREEN = {"StimulusPresentation": {"ScreenResolution": [1000, 800], "ScreenSize": [0.5, 0.4],
                                   "ScreenDistance": 0.6}}


def _tiny(tmp_path: Path, lines=None, sidecar=None, events=SCREEN) -> Path:
    lines = lines if lines is not None else [f"{i * 4}\t{500 + i}\t{400 - i}" for i in range(6)]
    side = {"SamplingFrequency": 250, "StartTime": 0, "PhysioType": "eyetrack",
            "Columns": ["timestamp", "x_coordinate", "y_coordinate"],
            "timestamp": {"Units": "ms"}}
    side.update(sidecar or {})
    side = {k: v for k, v in side.items() if v is not None}
    tmp_path.mkdir(parents=True, exist_ok=True)
    if events is not None:
        (tmp_path / "task-a_events.json").write_text(json.dumps(events))
    return _write_physio(tmp_path, "sub-1_task-a", lines, side)


# --------------------------------------------------------------------------- the fixture

def test_read_with_timestamp_column():
    tidy, display, cols = read_bids_samples(SUB01)
    # metres in the events sidecar -> mm; resolution in px
    assert display == Display(width_px=1280, height_px=720, width_mm=520.0, height_mm=292.5,
                              distance_mm=600.0)
    assert (cols.time, cols.time_unit, cols.x, cols.y) == ("timestamp", "ms", "x_coordinate",
                                                          "y_coordinate")
    assert cols.rate_hz == 100.0 and "n/a" in cols.missing_values
    assert tidy["t_ms"].tolist() == [1000.0 + 10 * i for i in range(20)]
    assert tidy["valid"].sum() == 19 and not tidy["valid"][10]  # the n/a row
    assert np.isnan(tidy["x_px"][10])
    assert tidy["x_px"][:10].tolist() == [400.0, 401.0] * 5
    assert tidy["y_px"][11:].tolist() == [301.0, 300.0] * 4 + [301.0]


def test_read_without_timestamp_column_uses_start_time_and_rate():
    tidy, display, cols = read_bids_samples(SUB02)
    assert cols.time == SYNTHETIC_TIME and cols.time_unit == "s"
    # StartTime 2.5 s + i / 50 Hz
    assert tidy["t_ms"].tolist() == pytest.approx([2500.0 + 20 * i for i in range(8)])
    assert tidy["valid"].tolist() == [True] * 3 + [False] + [True] * 4
    # the nearer sub-02 events sidecar overrides the distance of the root one
    assert display.distance_mm == 650.0 and display.width_mm == 520.0


def test_sidecars_follow_bids_inheritance():
    assert [p.name for p in events_sidecars(SUB01)] == ["task-movie_events.json"]
    assert [p.name for p in events_sidecars(SUB02)] == ["task-movie_events.json",
                                                        "sub-02_task-movie_events.json"]
    assert set(bids_inputs(SUB02)) == {"physio", "physio_sidecar", "events_sidecar_1",
                                       "events_sidecar_2"}
    assert is_bids_physio(SUB01) and not is_bids_physio(FIXTURE / "README.md")


# --------------------------------------------------------------------------- layout rules

def test_time_unit_inferred_from_steps_without_units(tmp_path):
    # 500 Hz, timestamps in microseconds: median step 2000 x 500 Hz = 1e6 per second
    lines = [f"{10_000_000 + 2000 * i}\t{500}\t{400}" for i in range(20)]
    path = _tiny(tmp_path, lines, {"SamplingFrequency": 500, "timestamp": None})
    assert bids_samples_section(path)["time_unit"] == "us"
    tidy, _, _ = read_bids_samples(path)
    assert np.diff(tidy["t_ms"]).tolist() == [2.0] * 19


def test_time_column_named_like_a_timestamp(tmp_path):
    path = _tiny(tmp_path, sidecar={"Columns": ["tracker_time", "x_coordinate",
                                                "y_coordinate"],
                                    "tracker_time": {"Units": "s"}, "timestamp": None},
                 lines=[f"{i * 0.004:.3f}\t500\t400" for i in range(5)])
    sec = bids_samples_section(path)
    assert (sec["time"], sec["time_unit"]) == ("tracker_time", "s")


def test_per_eye_columns_and_recorded_eye(tmp_path):
    cols = ["timestamp", "x_coordinate_left", "y_coordinate_left", "x_coordinate_right",
            "y_coordinate_right"]
    lines = ["0\t100\t200\t110\t220", "4\t100\t200\tn/a\tn/a", "8\tn/a\tn/a\t130\t240"]
    both = _tiny(tmp_path / "b", lines, {"Columns": cols, "RecordedEye": "both"})
    tidy, _, c = read_bids_samples(both)
    assert c.binocular and (c.x_left, c.x_right) == ("x_coordinate_left", "x_coordinate_right")
    assert tidy["x_px"].tolist() == [105.0, 100.0, 130.0]  # mean where both are valid
    left = _tiny(tmp_path / "l", lines, {"Columns": cols, "RecordedEye": "left"})
    tidy, _, c = read_bids_samples(left)
    assert c.x_right == "" and tidy["valid"].tolist() == [True, True, False]


def test_bottom_left_origin_flips_y(tmp_path):
    events = copy.deepcopy(SCREEN)
    events["StimulusPresentation"]["ScreenOrigin"] = ["bottom", "left"]
    tidy, _, _ = read_bids_samples(_tiny(tmp_path, events=events))
    assert tidy["y_px"].tolist() == [800.0 - (400 - i) for i in range(6)]


def test_geometry_may_sit_in_the_physio_sidecar(tmp_path):
    path = _tiny(tmp_path, sidecar={"ScreenSize": [0.3, 0.2], "ScreenResolution": [600, 400],
                                    "ScreenDistance": 0.5}, events=None)
    assert bids_display(path) == {"width_px": 600, "height_px": 400, "width_mm": 300.0,
                                  "height_mm": 200.0, "distance_mm": 500.0}


def test_study_for_bids_fills_samples_and_display(tmp_path):
    path = _tiny(tmp_path, events={"StimulusPresentation": {"ScreenResolution": [1000, 800],
                                                            "ScreenSize": [0.5, 0.4]}})
    base = {"display": {"distance_mm": 700.0, "width_px": 1},
            "samples": {"time": "old", "x": "old_x", "y": "old_y", "max_offscreen_frac": 0.1},
            "detection": {"method": "idt"},
            "stimuli": {"v": {"fps": 25.0, "width_px": 640, "height_px": 360}}}
    data = study_for_bids(path, base)
    study = study_from_dict(data, overrides=["detection.min_fixation_ms=90"])
    # BIDS wins where it has a value; the study fills the rest
    assert study.display == Display(1000, 800, 500.0, 400.0, 700.0)
    assert (study.samples.time, study.samples.x) == ("timestamp", "x_coordinate")
    assert study.samples.max_offscreen_frac == 0.1 and study.samples.delimiter == "\t"
    assert study.detection.method == "idt" and study.detection.min_fixation_ms == 90.0
    assert base["samples"]["time"] == "old"  # the base is not modified
    tidy = read_physio(path, study.samples, study.display)
    assert len(tidy) == 6


# --------------------------------------------------------------------------- errors

@pytest.mark.parametrize("change,error,match", [
    (lambda p: p.with_name(p.name.replace(".tsv.gz", ".json")).unlink(), InputFormatError,
     r"_physio\.json: sidecar .*not found"),
    (lambda p: p.with_name(p.name.replace(".tsv.gz", ".json")).write_text("{"),
     InputFormatError, r"line 1: malformed JSON"),
    (lambda p: p.with_name(p.name.replace(".tsv.gz", ".json")).write_text(
        json.dumps({"Columns": ["timestamp", "gx", "gy"], "SamplingFrequency": 250,
                    "timestamp": {"Units": "ms"}})),
     InputFormatError, r"key 'Columns': no gaze columns; expected 'x_coordinate'"),
    (lambda p: p.with_name(p.name.replace(".tsv.gz", ".json")).write_text(
        json.dumps({"Columns": ["x_coordinate", "y_coordinate"], "SamplingFrequency": 250})),
     InputFormatError, r"key 'StartTime': found None, expected a number of seconds"),
    (lambda p: p.with_name(p.name.replace(".tsv.gz", ".json")).write_text(
        json.dumps({"Columns": ["timestamp", "x_coordinate", "y_coordinate"],
                    "SampleCoordinateUnits": "deg", "timestamp": {"Units": "ms"}})),
     InputFormatError, r"'SampleCoordinateUnits': found 'deg', expected 'pixel'"),
    (lambda p: (p.parent / "task-a_events.json").write_text(json.dumps(
        {"StimulusPresentation": {"ScreenSize": [52, 29], "ScreenResolution": [1000, 800],
                                  "ScreenDistance": 0.6}})),
     InputFormatError, r"ScreenSize': found \[52, 29\], expected metres"),
    (lambda p: (p.parent / "task-a_events.json").write_text(json.dumps(
        {"StimulusPresentation": {"ScreenResolution": [1000, 800]}})),
     ConfigError, r"no value for display\.width_mm"),
    (lambda p: (p.parent / "task-a_events.json").write_text(json.dumps(
        dict(SCREEN, StimulusPresentation=dict(SCREEN["StimulusPresentation"],
                                               ScreenOrigin=["center"])))),
     InputFormatError, r"ScreenOrigin': found \['center'\]"),
])
def test_bad_sidecars(tmp_path, change, error, match):
    path = _tiny(tmp_path)
    change(path)
    with pytest.raises(error, match=match):
        read_bids_samples(path)


@pytest.mark.parametrize("lines,match", [
    (["0\t500\t400", "4\t501", "8\t502\t398"], r"line 2: found 2 fields, expected 3"),
    (["0\t500\t400", "4\t501\t399", "8\tleft\t398"],
     r"line 3, column 'x_coordinate': found 'left', expected a number or n/a"),
    (["0\t500\t400", "0\t501\t399"], r"line 2, column 'timestamp': time repeats"),
])
def test_bad_rows_name_the_line(tmp_path, lines, match):
    with pytest.raises(InputFormatError, match=match):
        read_bids_samples(_tiny(tmp_path, lines))


def test_all_missing_is_no_valid_samples(tmp_path):
    with pytest.raises(NoValidSamplesError, match="none of the 3 samples"):
        read_bids_samples(_tiny(tmp_path, ["0\tn/a\tn/a", "4\tn/a\tn/a", "8\tn/a\tn/a"]))


# --------------------------------------------------------------------------- in batch

def _toml_without(text: str, sections: tuple[str, ...]) -> str:
    """The study text without some top-level sections (a BIDS base study)."""
    out, skip = [], False
    for line in text.splitlines():
        if line.startswith("["):
            skip = line.strip("[] ").split(".")[0] in sections
        if not skip:
            out.append(line)
    return "\n".join(out) + "\n"


def test_batch_reads_bids_like_csv(tmp_path):
    """The same simulated recording as our CSV and as BIDS gives the same tables."""
    ses = simulate.simulate_session("infant_60hz_noisy", n_trials=2, trial_ms=2000, seed=7)
    st = ses.style
    paths = simulate.write_session(ses, tmp_path / "csv")
    root = tmp_path / "bids"
    root.mkdir()
    (root / "dataset_description.json").write_text(json.dumps({"Name": "simulated",
                                                               "BIDSVersion": "1.10.0"}))
    d = st.display
    (root / "task-story_events.json").write_text(json.dumps({"StimulusPresentation": {
        "ScreenResolution": [d.width_px, d.height_px],
        "ScreenSize": [d.width_mm / 1000, d.height_mm / 1000],
        "ScreenDistance": d.distance_mm / 1000}}))
    beh = root / "sub-07" / "beh"
    beh.mkdir(parents=True)
    physio = beh / "sub-07_task-story_physio.tsv.gz"
    ses.raw[[st.time_col, st.x_col, st.y_col]].to_csv(
        physio, sep="\t", header=False, index=False, na_rep="n/a",
        float_format=st.float_format, compression={"method": "gzip", "mtime": 0})
    (beh / "sub-07_task-story_physio.json").write_text(json.dumps({
        "PhysioType": "eyetrack", "RecordedEye": "cyclopean", "SamplingFrequency": st.rate_hz,
        "StartTime": 0, "SampleCoordinateSystem": "gaze-on-screen",
        "Columns": ["timestamp", "x_coordinate", "y_coordinate"],
        "timestamp": {"Units": "ms"}, "x_coordinate": {"Units": "pixel"},
        "y_coordinate": {"Units": "pixel"}}))
    study_text = paths["study"].read_text()
    (tmp_path / "base.toml").write_text(_toml_without(study_text, ("display", "samples")))
    assert "display" not in tomllib.loads((tmp_path / "base.toml").read_text())
    (tmp_path / "sessions.csv").write_text(
        "session,samples,trials,checks,study\n"
        f"csv,csv/samples.csv,csv/trials.csv,csv/checks.csv,{paths['study']}\n"
        "bids,bids/sub-07/beh/sub-07_task-story_physio.tsv.gz,csv/trials.csv,"
        "csv/checks.csv,\n")
    kw = dict(study=tmp_path / "base.toml", aois=paths["aois"], out_dir=tmp_path / "out")
    report = batch(tmp_path / "sessions.csv", **kw)
    assert report["status"].tolist() == ["converted", "converted"], report["message"].tolist()
    a, b = session_folder(tmp_path / "out", "csv"), session_folder(tmp_path / "out", "bids")
    for name in ("fixations", "aoi_summary", "trial_quality", "check_quality"):
        assert (a / f"{name}.csv").read_bytes() == (b / f"{name}.csv").read_bytes(), name
    manifest = json.loads((b / "manifest.json").read_text())
    assert set(manifest["batch"]["fingerprint"]["inputs_sha256"]) >= {
        "samples", "physio_sidecar", "events_sidecar_1", "study", "aois", "trials", "checks"}
    assert manifest["parameters"]["display"]["distance_mm"] == pytest.approx(d.distance_mm)

    assert batch(tmp_path / "sessions.csv", **kw)["status"].tolist() == ["skipped"] * 2
    # the sidecars are inputs: a changed screen distance converts the session again
    ev = root / "task-story_events.json"
    data = json.loads(ev.read_text())
    data["StimulusPresentation"]["ScreenDistance"] = 0.7
    ev.write_text(json.dumps(data))
    assert batch(tmp_path / "sessions.csv", **kw)["status"].tolist() == ["skipped",
                                                                        "converted"]
    # and a broken sidecar fails that session only
    (beh / "sub-07_task-story_physio.json").write_text("{}")
    report = batch(tmp_path / "sessions.csv", **kw)
    assert report["status"].tolist() == ["skipped", "failed"]
    assert "key 'Columns'" in report["message"][1]


def test_fixture_is_what_its_readme_says():
    side = json.loads(SUB01.with_name(SUB01.name.replace(".tsv.gz", ".json")).read_text())
    assert side["Columns"][:3] == ["timestamp", "x_coordinate", "y_coordinate"]
    raw = pd.read_csv(SUB01, sep="\t", header=None, names=side["Columns"], na_values="n/a")
    assert len(raw) == 20 and raw["x_coordinate"].isna().sum() == 1
