"""Trials: reading, placement of the video on the display, sample -> trial/frame/video px.

Every expected value below is worked out by hand from the inputs (no
published numbers are used).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from aoi_fix.config import Stimulus, study_from_dict
from aoi_fix.errors import ConfigError, InputFormatError
from aoi_fix.trials import (TRIAL_COLUMNS, assign_trials, fit_video, frame_count,
                            frame_index, on_video, read_trials, screen_to_video)

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures" / "trials"


def make_study(time_unit: str = "ms"):
    return study_from_dict({
        "display": {"width_px": 1920, "height_px": 1080, "width_mm": 531.0,
                    "height_mm": 299.0, "distance_mm": 600.0},
        "samples": {"time": "t", "x": "x", "y": "y", "time_unit": time_unit},
        "stimuli": {
            "clip": {"fps": 25.0, "width_px": 640, "height_px": 480},    # 4:3
            "speaker": {"fps": 30.0, "width_px": 1280, "height_px": 720},   # 16:9, fills
            "wide": {"fps": 25.0, "width_px": 2000, "height_px": 500},   # 4:1
            "tall": {"fps": 25.0, "width_px": 480, "height_px": 960},    # 1:2
        },
    })


STUDY = make_study()


def write(tmp_path: Path, text: str, name: str = "trials.csv", raw: bytes | None = None) -> Path:
    p = tmp_path / name
    p.write_bytes(raw if raw is not None else text.encode("utf-8"))
    return p


# --------------------------------------------------------------------------- placement

def test_fit_wider_video_gets_bars_above_and_below():
    # 2000x500 on 1920x1080: scale = min(1920/2000, 1080/500) = 0.96
    # -> 1920 x 480, x = 0, y = (1080 - 480) / 2 = 300.
    assert [float(v) for v in fit_video(2000, 500, 1920, 1080)] == [0.0, 300.0, 1920.0, 480.0]


def test_fit_taller_video_gets_bars_left_and_right():
    # 480x960 on 1920x1080: scale = min(1920/480, 1080/960) = 1.125
    # -> 540 x 1080, x = (1920 - 540) / 2 = 690, y = 0.
    assert [float(v) for v in fit_video(480, 960, 1920, 1080)] == [690.0, 0.0, 540.0, 1080.0]


def test_fit_same_aspect_fills_the_display():
    assert [float(v) for v in fit_video(1280, 720, 1920, 1080)] == [0.0, 0.0, 1920.0, 1080.0]


def test_read_fixture_sorted_with_default_placement():
    df = read_trials(FIXTURES / "trials.csv", study=STUDY)
    assert list(df.columns) == list(TRIAL_COLUMNS)
    assert df["trial"].tolist() == ["t01", "t02"]          # sorted by start
    assert df["start_ms"].tolist() == [1000.0, 5000.0]
    assert df["end_ms"].tolist() == [2000.0, 6000.0]
    # clip 640x480 on 1920x1080: scale 2.25 -> 1440 x 1080 at x = 240.
    assert df.loc[0, ["media_x_px", "media_y_px", "media_width_px",
                      "media_height_px"]].tolist() == [240.0, 0.0, 1440.0, 1080.0]
    assert df.loc[1, ["media_x_px", "media_y_px", "media_width_px",
                      "media_height_px"]].tolist() == [0.0, 0.0, 1920.0, 1080.0]
    for c in TRIAL_COLUMNS[2:]:
        assert df[c].dtype == np.float64


def test_explicit_placement_and_per_row_default():
    df = read_trials(FIXTURES / "placed.csv", study=STUDY)
    assert df["trial"].tolist() == ["1", "2"]               # ids stay strings
    assert df.loc[0, ["media_x_px", "media_y_px", "media_width_px",
                      "media_height_px"]].tolist() == [100.0, 50.0, 400.0, 200.0]
    assert df.loc[1, "media_width_px"] == 1920.0            # empty cells -> fit


def test_trial_ids_are_kept_as_text(tmp_path):
    p = write(tmp_path, "trial,stimulus,start,end\n007,clip,0,10\n7,clip,10,20\n")
    assert read_trials(p, study=STUDY)["trial"].tolist() == ["007", "7"]


def test_bom_crlf_blank_lines_and_extra_columns(tmp_path):
    text = "trial,stimulus,start,end,note\r\nA,clip,0,100,x\r\n\r\nB,tall,100,200,y\r\n\r\n\r\n"
    p = write(tmp_path, "", raw=b"\xef\xbb\xbf" + text.encode())
    df = read_trials(p, study=STUDY)
    assert df["trial"].tolist() == ["A", "B"]
    assert df.loc[1, "media_x_px"] == 690.0


@pytest.mark.parametrize("unit, start, end", [("s", "1.5", "2"), ("ms", "1500", "2000"),
                                              ("us", "1500000", "2000000"),
                                              ("ns", "1500000000", "2000000000")])
def test_time_units(tmp_path, unit, start, end):
    p = write(tmp_path, f"trial,stimulus,start,end\nA,clip,{start},{end}\n")
    df = read_trials(p, study=STUDY, time_unit=unit)
    assert df[["start_ms", "end_ms"]].iloc[0].tolist() == [1500.0, 2000.0]


def test_default_time_unit_is_the_studys(tmp_path):
    p = write(tmp_path, "trial,stimulus,start,end\nA,clip,1500000,2000000\n")
    df = read_trials(p, study=make_study("us"))
    assert df["start_ms"].iat[0] == 1500.0


def test_large_nanosecond_epoch_times_keep_sub_ms_precision(tmp_path):
    p = write(tmp_path, "trial,stimulus,start,end\nA,clip,1700000000000250000,"
                        "1700000000001250000\n")
    df = read_trials(p, study=STUDY, time_unit="ns")
    assert df["end_ms"].iat[0] - df["start_ms"].iat[0] == pytest.approx(1.0, abs=1e-3)


def test_unknown_time_unit():
    with pytest.raises(ConfigError, match="minutes"):
        read_trials(FIXTURES / "trials.csv", study=STUDY, time_unit="minutes")


# --------------------------------------------------------------------------- errors

HEADER = "trial,stimulus,start,end\n"


@pytest.mark.parametrize("body, expect", [
    (HEADER + "A,clip,0,100\nB,clip,abc,200\n", "row 3, column 'start': found 'abc'"),
    (HEADER + "A,clip,0,inf\n", "row 2, column 'end': found 'inf'"),
    (HEADER + "A,clip,0,nan\n", "row 2, column 'end': found 'nan'"),
    (HEADER + "A,clip,,100\n", "row 2, column 'start'"),
    (HEADER + "A,clip,100,100\n", "row 2, column 'end': found '100', expected a time after"),
    (HEADER + "A,clip,0,100\nB,clip,50,200\n",
     "row 3, column 'start': trial 'B' starts at 50 ms, before trial 'A' (row 2) ends"),
    (HEADER + "A,clip,0,100\n\nA,clip,100,200\n",
     "row 4, column 'trial': found trial 'A' again (first at row 2)"),
    (HEADER + "A,film,0,100\n", "row 2, column 'stimulus': found 'film', expected a stimulus"),
    (HEADER + ",clip,0,100\n", "row 2, column 'trial': found an empty cell"),
    (HEADER + "A,clip,0,100,7\n", "row 2: found 5 fields, expected 4"),
    ("trial,stimulus,start\nA,clip,0\n", "row 1: missing column(s) 'end'"),
    ("trial;stimulus;start;end\nA;clip;0;10\n", "comma-separated"),
    ("trial,stimulus,start,end,media_x_px\nA,clip,0,100,5\n",
     "missing column(s) 'media_y_px', 'media_width_px', 'media_height_px'"),
    ("trial,stimulus,start,end,media_x_px,media_y_px,media_width_px,media_height_px\n"
     "A,clip,0,100,0,0,0,100\n", "row 2, column 'media_width_px': found '0', expected a size > 0"),
    ("trial,stimulus,start,end,media_x_px,media_y_px,media_width_px,media_height_px\n"
     "A,clip,0,100,0,,100,100\n", "row 2, column 'media_y_px': found ''"),
    (HEADER, "no trial rows"),
    ("", "empty file"),
    ("\n\n", "empty file"),
])
def test_errors_name_file_row_and_column(tmp_path, body, expect):
    p = write(tmp_path, body, name="my_trials.csv")
    with pytest.raises(InputFormatError) as e:
        read_trials(p, study=STUDY)
    msg = str(e.value)
    assert "my_trials.csv" in msg
    assert expect in msg
    assert "\n" not in msg


def test_overlap_names_both_trials_even_when_file_is_unsorted(tmp_path):
    p = write(tmp_path, HEADER + "late,clip,500,900\nearly,clip,0,600\n")
    with pytest.raises(InputFormatError, match=r"row 2, column 'start': trial 'late' starts "
                                               r"at 500 ms, before trial 'early' \(row 3\)"):
        read_trials(p, study=STUDY)


def test_touching_trials_are_fine(tmp_path):
    p = write(tmp_path, HEADER + "A,clip,0,100\nB,clip,100,200\n")
    assert len(read_trials(p, study=STUDY)) == 2


def test_missing_file(tmp_path):
    with pytest.raises(InputFormatError, match="nope.csv: trial file not found"):
        read_trials(tmp_path / "nope.csv", study=STUDY)


# --------------------------------------------------------------------------- per-sample maps

TR = pd.DataFrame({"trial": ["b", "a"], "stimulus": ["speaker", "clip"],
                   "start_ms": [200.0, 0.0], "end_ms": [300.0, 100.0],
                   "media_x_px": [0.0, 240.0], "media_y_px": [0.0, 0.0],
                   "media_width_px": [1920.0, 1440.0], "media_height_px": [1080.0, 1080.0]})


def test_assign_trials_half_open_and_unsorted_table():
    t = [-5, 0, 99.999, 100, 150, 200, 299.9, 300, np.nan]
    assert assign_trials(t, TR).tolist() == [-1, 1, 1, -1, -1, 0, 0, -1, -1]


def test_assign_trials_empty_inputs():
    assert assign_trials([], TR).dtype == np.int64
    assert assign_trials([1.0, 2.0], TR.iloc[:0]).tolist() == [-1, -1]


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 50), st.integers(1, 20)), min_size=1, max_size=8),
       st.lists(st.floats(-10, 1200, allow_nan=False), max_size=50))
def test_assign_trials_matches_brute_force(gaps_lengths, times):
    starts, ends, t0 = [], [], 0.0
    for gap, length in gaps_lengths:
        starts.append(t0 + gap)
        ends.append(t0 + gap + length)
        t0 = ends[-1]
    tr = pd.DataFrame({"start_ms": starts[::-1], "end_ms": ends[::-1]})   # unsorted
    got = assign_trials(times, tr)
    for ti, gi in zip(times, got):               # loop over a handful of test points
        inside = [i for i in range(len(tr)) if tr.start_ms[i] <= ti < tr.end_ms[i]]
        assert gi == (inside[0] if inside else -1)


def test_frame_index_by_hand():
    # clip at 25 fps: a frame lasts 40 ms; trial "a" is 0..100 ms -> ceil(2.5) = 3 frames.
    # speaker at 30 fps: 100 ms -> 3 frames of 33.33 ms, trial "b" starts at 200 ms.
    t = np.array([0, 39.99, 40, 80, 99.99, 120, 200, 233.3, 233.34, 266.67, 299.9])
    idx = assign_trials(t, TR)
    got = frame_index(t, idx, TR, STUDY.stimuli)
    assert got.tolist() == [0, 0, 1, 2, 2, -1, 0, 0, 1, 2, 2]
    assert frame_count(TR, STUDY.stimuli).tolist() == [3, 3]


def test_frame_index_exact_boundaries_and_clip_to_last_frame():
    st_ = {"v": Stimulus(fps=30.0, width_px=10, height_px=10)}
    tr = pd.DataFrame({"stimulus": ["v"], "start_ms": [0.0], "end_ms": [1000.0]})
    k = np.arange(30)
    t = k * (1000.0 / 30.0)                       # the start of every frame
    assert frame_index(t, assign_trials(t, tr), tr, st_).tolist() == k.tolist()
    # trial longer than the assumed frame grid still ends on the last frame
    tr2 = pd.DataFrame({"stimulus": ["v"], "start_ms": [0.0], "end_ms": [1000.0 / 30 * 2]})
    assert frame_count(tr2, st_).tolist() == [2]
    assert frame_index([66.6], [0], tr2, st_).tolist() == [1]


def test_screen_to_video_and_on_video():
    # trial a: clip 640x480 drawn at (240, 0) size 1440x1080 -> factor 640/1440 = 4/9.
    x = np.array([240.0, 960.0, 1680.0, 239.0, 100.0, np.nan])
    y = np.array([0.0, 540.0, 1080.0, 10.0, 10.0, 5.0])
    idx = np.array([1, 1, 1, 1, -1, 1])
    xv, yv = screen_to_video(x, y, idx, TR, STUDY.stimuli)
    np.testing.assert_allclose(xv[:4], [0.0, 320.0, 640.0, -4 / 9])
    np.testing.assert_allclose(yv[:4], [0.0, 240.0, 480.0, 40 / 9])
    assert np.isnan(xv[4]) and np.isnan(yv[4]) and np.isnan(xv[5])
    assert on_video(x, y, idx, TR).tolist() == [True, True, True, False, False, False]


def test_screen_to_video_with_explicit_placement():
    df = read_trials(FIXTURES / "placed.csv", study=STUDY)
    # clip 640x480 drawn at (100, 50) as 400x200: x factor 1.6, y factor 2.4.
    xv, yv = screen_to_video([100, 300, 500], [50, 150, 250], [0, 0, 0], df, STUDY.stimuli)
    assert xv.tolist() == [0.0, 320.0, 640.0]
    assert yv.tolist() == [0.0, 240.0, 480.0]


# --------------------------------------------------------------------------- sorted fast path

@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(min_value=0, max_value=4000), min_size=1, max_size=300,
                unique=True),
       st.sampled_from([24.0, 25.0, 29.97, 30.0, 60.0]))
def test_placement_sorted_equals_the_general_functions(ticks, fps):
    """The binary-search path gives exactly assign_trials + frame_index.

    Times are multiples of 2.5 ms, so many fall exactly on trial starts, ends
    and 40 ms frame boundaries (the edge rules: start inclusive, end exclusive;
    a time on a frame boundary is the later frame).  Trials are listed out of
    time order, with a gap between them.
    """
    from aoi_fix.trials import placement_sorted

    t = np.sort(np.asarray(ticks, float)) * 2.5
    tr = pd.DataFrame({"stimulus": ["b", "a", "a"], "start_ms": [6000.0, 100.0, 3000.0],
                       "end_ms": [9000.0, 3000.0, 5000.0]})
    stim = {"a": Stimulus(fps=fps, width_px=4, height_px=3),
            "b": Stimulus(fps=25.0, width_px=4, height_px=3)}
    idx, fr = placement_sorted(t, tr, stim)
    want_idx = assign_trials(t, tr)
    assert idx.tolist() == want_idx.tolist()
    assert fr.tolist() == frame_index(t, want_idx, tr, stim).tolist()
