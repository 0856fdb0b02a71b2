"""Tests for aoi_fix.summary on tiny hand-worked traces.

Every expected number below is worked out by hand in the comments (no value
is copied from the code under test).  Conventions checked here are the ones
the module docstring writes down: each fixation sample stands for the time to
the next sample, the last one for ``offset_ms - t``; weights are cut at trial
boundaries; the majority AOI of a fixation part is decided by time, not by
sample count.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from aoi_fix.summary import (CODE_NONE, CODE_NOT_IN_TRIAL, CODE_OFF_VIDEO, NONE_LABEL,
                             OFF_VIDEO_LABEL, aoi_summary, carry_weights, fixation_of_sample,
                             fixation_parts, sample_weights, trial_quality)


def _fix(start_row, end_row, onset_ms, offset_ms, x_px=None, y_px=None):
    n = len(start_row)
    return pd.DataFrame({
        "fixation": np.arange(1, n + 1, dtype=np.int64),
        "start_row": np.asarray(start_row, dtype=np.int64),
        "end_row": np.asarray(end_row, dtype=np.int64),
        "onset_ms": np.asarray(onset_ms, float),
        "offset_ms": np.asarray(offset_ms, float),
        "duration_ms": np.asarray(offset_ms, float) - np.asarray(onset_ms, float),
        "x_px": np.asarray(x_px if x_px is not None else [100.0] * n, float),
        "y_px": np.asarray(y_px if y_px is not None else [200.0] * n, float),
    })


# --------------------------------------------------------------------------- fixation_of_sample

def test_fixation_of_sample_hand_trace():
    # rows 1..3 are fixation 0, rows 5..6 fixation 1 (end_row is exclusive)
    fx = _fix([1, 5], [4, 7], [10, 50], [40, 70])
    got = fixation_of_sample(8, fx)
    assert got.tolist() == [-1, 0, 0, 0, -1, 1, 1, -1]


def test_fixation_of_sample_empty():
    got = fixation_of_sample(4, _fix([], [], [], []))
    assert got.tolist() == [-1, -1, -1, -1]


# --------------------------------------------------------------------------- sample_weights

T10 = np.arange(0.0, 100.0, 10.0)  # 10 samples, 0..90 ms


def test_weights_sum_to_fixation_duration_without_boundaries():
    # fixation 0: samples at 10, 20, 30, offset 40 -> 10 + 10 + 10 = 30 = 40 - 10
    # fixation 1: samples at 50, 60, offset 75      -> 10 + 15      = 25 = 75 - 50
    fx = _fix([1, 5], [4, 7], [10, 50], [40, 75])
    fid = fixation_of_sample(len(T10), fx)
    w = sample_weights(T10, fid, fx, np.array([]))
    assert w.tolist() == [0, 10, 10, 10, 0, 10, 15, 0, 0, 0]
    for k in range(len(fx)):
        assert w[fid == k].sum() == pytest.approx(fx["duration_ms"].iat[k])


def test_weights_of_adjacent_fixations_do_not_leak():
    # two fixations back to back: rows 0..2 (offset 30) and rows 3..5 (offset 55)
    fx = _fix([0, 3], [3, 6], [0, 30], [30, 55])
    fid = fixation_of_sample(len(T10), fx)
    w = sample_weights(T10, fid, fx, np.array([]))
    # the last sample of fixation 0 (t=20) carries 30 - 20 = 10; of fixation 1 (t=50) 55 - 50
    assert w.tolist() == [10, 10, 10, 10, 10, 5, 0, 0, 0, 0]


def test_weights_are_cut_at_trial_boundaries():
    # fixation: samples 10..60 (rows 1..6), offset 70; a trial boundary at 25 ms
    fx = _fix([1], [7], [10], [70])
    fid = fixation_of_sample(len(T10), fx)
    w_own = sample_weights(T10, fid, fx, np.array([25.0]))
    # the sample at 20 would stand for 20..30; cut at 25 it stands for 5 ms only
    assert w_own.tolist() == [0, 10, 5, 10, 10, 10, 10, 0, 0, 0]
    # ... and the 5 ms after the boundary go to the next sample of the fixation (30)
    w = w_own + carry_weights(T10, fid, w_own)
    assert w.tolist() == [0, 10, 5, 15, 10, 10, 10, 0, 0, 0]
    assert w.sum() == pytest.approx(60.0)  # still the fixation's duration
    w = w_own
    # no weight ever reaches across a boundary
    assert np.all((T10 >= 25) | (T10 + w <= 25))


def test_weights_zero_outside_fixations():
    fx = _fix([2], [4], [20], [40])
    fid = fixation_of_sample(len(T10), fx)
    w = sample_weights(T10, fid, fx, np.array([0.0, 100.0]))
    assert np.all(w[fid < 0] == 0)
    assert w.sum() == pytest.approx(20.0)


# --------------------------------------------------------------------------- fixation_parts

def test_fixation_spanning_two_trials_becomes_two_clipped_parts():
    # one fixation on samples 20..70 (rows 2..7), offset 80; trial 0 = [0, 45), trial 1 = [45, 100)
    fx = _fix([2], [8], [20], [80], x_px=[300.0], y_px=[400.0])
    fid = fixation_of_sample(len(T10), fx)
    w_own = sample_weights(T10, fid, fx, np.array([0.0, 45.0, 100.0]))
    w = w_own + carry_weights(T10, fid, w_own)
    # weights: 20:10, 30:10, 40:min(10, 45-40)=5, 50:10 + the 5 ms after the
    # boundary, 60:10, 70:80-70=10
    assert w[2:8].tolist() == [10, 10, 5, 15, 10, 10]
    trial_idx = np.where(T10 < 45, 0, 1)
    code = np.array([-3, -3, 0, 1, 1, CODE_NONE, CODE_NONE, 0, -3, -3])
    parts = fixation_parts(T10, fid, trial_idx, w, code, fx, n_codes=2, w_own=w_own)
    assert len(parts) == 2
    assert parts["trial_row"].tolist() == [0, 1]
    assert parts["fixation"].tolist() == [1, 1]  # the detector's number, both parts
    # part 0: onset 20, offset 40 + 5 = 45 (clipped at the boundary)
    # part 1: onset 45 (the boundary: the fixation was in progress), offset 80
    assert parts["onset_ms"].tolist() == [20.0, 45.0]
    assert parts["offset_ms"].tolist() == [45.0, 80.0]
    assert parts["duration_ms"].tolist() == [25.0, 35.0]
    assert parts["clipped"].tolist() == [True, True]
    # position of a part is that of the whole fixation
    assert parts["x_px"].tolist() == [300.0, 300.0] and parts["y_px"].tolist() == [400.0, 400.0]
    # majority by time: part 0 code 0 has 10 ms, code 1 has 10 + 5 = 15 ms -> 1;
    # part 1 (none) has 15 + 10 = 25 ms, code 0 has 10 ms -> (none)
    assert parts["code"].tolist() == [1, CODE_NONE]
    # parts never overlap and stay inside their trial windows
    assert parts["offset_ms"].iat[0] <= 45.0 <= parts["onset_ms"].iat[1]


def test_majority_aoi_is_by_time_not_by_sample_count():
    # irregular sampling: samples at 0, 5, 10, 40 belong to one fixation ending at 50
    t = np.array([0.0, 5.0, 10.0, 40.0, 50.0])
    fx = _fix([0], [4], [0], [50])
    fid = fixation_of_sample(len(t), fx)
    w = sample_weights(t, fid, fx, np.array([]))
    assert w.tolist() == [5, 5, 30, 10, 0]
    # code 0 on two samples (10 ms), code 1 on one sample (30 ms), off-video 10 ms
    code = np.array([0, 0, 1, CODE_OFF_VIDEO, CODE_NOT_IN_TRIAL])
    parts = fixation_parts(t, fid, np.zeros(5, dtype=np.int64), w, code, fx, n_codes=2)
    assert len(parts) == 1
    assert parts["code"].iat[0] == 1
    assert not parts["clipped"].iat[0]
    assert parts["duration_ms"].iat[0] == 50.0


def test_fixation_parts_off_video_majority():
    t = np.array([0.0, 10.0, 20.0, 30.0])
    fx = _fix([0], [3], [0], [30])
    fid = fixation_of_sample(len(t), fx)
    w = sample_weights(t, fid, fx, np.array([]))
    code = np.array([CODE_OFF_VIDEO, CODE_OFF_VIDEO, 0, CODE_NOT_IN_TRIAL])
    parts = fixation_parts(t, fid, np.zeros(4, dtype=np.int64), w, code, fx, n_codes=1)
    assert parts["code"].tolist() == [CODE_OFF_VIDEO]


def test_fixation_parts_empty_is_typed():
    t = np.arange(3.0)
    fx = _fix([], [], [], [])
    fid = fixation_of_sample(3, fx)
    parts = fixation_parts(t, fid, np.zeros(3, dtype=np.int64), np.zeros(3),
                           np.full(3, CODE_NOT_IN_TRIAL), fx, n_codes=1)
    assert len(parts) == 0
    assert {"fixation", "trial_row", "onset_ms", "offset_ms", "code", "clipped"} <= set(parts)
    assert parts["onset_ms"].dtype == float


# --------------------------------------------------------------------------- aoi_summary

def _trials():
    return pd.DataFrame({"trial": ["a", "b"], "stimulus": ["s1", "s2"],
                         "start_ms": [50.0, 150.0], "end_ms": [150.0, 250.0]})


def test_aoi_summary_hand_case():
    trials = _trials()
    names = [("eyes", "mouth"), ("book",)]
    # trial a: eyes 10 + 20 = 30 ms, off-video 10 ms, none 0, mouth 0 -> total 40 ms
    # trial b: no fixation time at all
    trial_idx = np.array([-1, 0, 0, 0, 0, 1, 1])
    code = np.array([CODE_NOT_IN_TRIAL, 0, 0, CODE_NONE, CODE_OFF_VIDEO,
                     CODE_NOT_IN_TRIAL, CODE_NOT_IN_TRIAL])
    w = np.array([10.0, 10, 20, 0, 10, 0, 0])
    parts = pd.DataFrame({"trial_row": [-1, 0, 0, 0], "code": [0, 0, 0, CODE_OFF_VIDEO],
                          "onset_ms": [20.0, 65.0, 90.0, 120.0]})
    out = aoi_summary(trials, names, trial_idx, code, w, parts)
    assert list(out.columns) == ["trial", "stimulus", "aoi", "fixation_ms", "pct_fixation",
                                 "pct_trial", "n_fixations", "first_fixation_ms"]
    # one row per AOI of the trial's stimulus, zeros included, then the reserved rows
    assert out["trial"].tolist() == ["a"] * 4 + ["b"] * 3
    assert out["aoi"].tolist() == ["eyes", "mouth", NONE_LABEL, OFF_VIDEO_LABEL,
                                   "book", NONE_LABEL, OFF_VIDEO_LABEL]
    assert out["stimulus"].tolist() == ["s1"] * 4 + ["s2"] * 3
    a = out[out["trial"] == "a"].set_index("aoi")
    assert a["fixation_ms"].tolist() == [30.0, 0.0, 0.0, 10.0]
    # 30 / 40 = 75 %, 10 / 40 = 25 %
    assert a["pct_fixation"].tolist() == pytest.approx([75.0, 0.0, 0.0, 25.0])
    assert a["pct_fixation"].sum() == pytest.approx(100.0)
    # share of the 100 ms trial: 30 % and 10 %
    assert a["pct_trial"].tolist() == pytest.approx([30.0, 0.0, 0.0, 10.0])
    # the part outside every trial (trial_row -1) is not counted
    assert a.loc["eyes", "n_fixations"] == 2
    assert a.loc["mouth", "n_fixations"] == 0
    assert a.loc[OFF_VIDEO_LABEL, "n_fixations"] == 1
    # first fixation relative to the trial start (50 ms): 65 - 50 = 15, 120 - 50 = 70
    assert a.loc["eyes", "first_fixation_ms"] == 15.0
    assert a.loc[OFF_VIDEO_LABEL, "first_fixation_ms"] == 70.0
    assert np.isnan(a.loc["mouth", "first_fixation_ms"])
    b = out[out["trial"] == "b"]
    assert (b["fixation_ms"] == 0).all() and b["pct_fixation"].isna().all()
    assert (b["n_fixations"] == 0).all()
    assert out["n_fixations"].dtype == np.int64


def test_aoi_summary_trial_without_aois_has_reserved_rows_only():
    trials = _trials().iloc[:1]
    out = aoi_summary(trials, [()], np.array([0, 0]), np.array([CODE_NONE, CODE_OFF_VIDEO]),
                      np.array([30.0, 10.0]),
                      pd.DataFrame({"trial_row": [0], "code": [CODE_NONE], "onset_ms": [60.0]}))
    assert out["aoi"].tolist() == [NONE_LABEL, OFF_VIDEO_LABEL]
    assert out["pct_fixation"].tolist() == pytest.approx([75.0, 25.0])


# --------------------------------------------------------------------------- trial_quality

def test_trial_quality_hand_case():
    trials = pd.DataFrame({"trial": ["a", "b"], "stimulus": ["s1", "s1"],
                           "start_ms": [0.0, 100.0], "end_ms": [100.0, 200.0]})
    # trial a: 10 samples at 10 ms, 7 valid -> 7 x 10 / 100 = 0.7
    # trial b: 12 samples (timestamps crowded), all valid -> 12 x 10 / 100 = 1.2, capped at 1
    trial_idx = np.r_[np.zeros(10, int), np.ones(12, int), [-1, -1]]
    valid = np.r_[[True] * 7 + [False] * 3, [True] * 12, [True, True]]
    w = np.r_[np.full(10, 5.0), np.full(12, 2.0), [100.0, 100.0]]
    q = trial_quality(trials, trial_idx, valid, w, 10.0, min_valid_fraction=0.75)
    assert q["trial"].tolist() == ["a", "b"]
    assert q["duration_ms"].tolist() == [100.0, 100.0]
    assert q["n_samples"].tolist() == [10, 12]
    assert q["valid_fraction"].tolist() == pytest.approx([0.7, 1.0])
    # fixation time 10 x 5 = 50 and 12 x 2 = 24; samples outside trials not counted
    assert q["fixation_ms"].tolist() == pytest.approx([50.0, 24.0])
    assert q["flag_low_validity"].tolist() == [True, False]


def test_trial_quality_pause_lowers_valid_fraction():
    # a trial of 100 ms with samples only in its first half (a pause in the recording)
    trials = pd.DataFrame({"trial": ["a"], "stimulus": ["s"], "start_ms": [0.0],
                           "end_ms": [100.0]})
    q = trial_quality(trials, np.zeros(5, int), np.ones(5, bool), np.zeros(5), 10.0,
                      min_valid_fraction=0.5)
    assert q["valid_fraction"].iat[0] == pytest.approx(0.5)
    assert not q["flag_low_validity"].iat[0]  # 0.5 is not below 0.5


def test_one_sample_part_between_two_close_boundaries_stays_inside_its_trial():
    # samples every 10 ms; one fixation on rows 1..6 (10..60, offset 70); a short
    # trial [22, 37) holds the single sample at 30 -> its part is exactly 22..37
    fx = _fix([1], [7], [10], [70])
    fid = fixation_of_sample(len(T10), fx)
    bounds = np.array([22.0, 37.0])
    w_own = sample_weights(T10, fid, fx, bounds)
    w = w_own + carry_weights(T10, fid, w_own)
    trial_idx = np.where((T10 >= 22) & (T10 < 37), 0, -1)
    code = np.full(len(T10), CODE_NONE)
    parts = fixation_parts(T10, fid, trial_idx, w, code, fx, n_codes=0, w_own=w_own)
    inside = parts[parts["trial_row"] == 0]
    assert inside["onset_ms"].tolist() == [22.0] and inside["offset_ms"].tolist() == [37.0]
    # parts tile the fixation without overlap: 10..22, 22..37, 37..70
    assert parts["onset_ms"].tolist() == [10.0, 22.0, 37.0]
    assert parts["offset_ms"].tolist() == [22.0, 37.0, 70.0]


@pytest.mark.parametrize("in_order", [True, False])
def test_per_trial_sums_equal_pandas_groupby(in_order):
    # reference: pandas groupby sums (samples outside trials, -1, left out); in time
    # order a trial is one run of samples, shuffled it is many
    from aoi_fix.summary import per_trial_sums

    rng = np.random.default_rng(2)
    tr = rng.integers(-1, 6, size=300)
    if in_order:
        tr = np.sort(tr)
    flag = rng.random(300) < 0.3
    w = rng.random(300)
    n, f, s = per_trial_sums(tr, 7, None, flag, w)
    g = pd.DataFrame({"tr": tr, "one": 1, "flag": flag, "w": w})
    ref = g[g["tr"] >= 0].groupby("tr")[["one", "flag", "w"]].sum().reindex(range(7),
                                                                             fill_value=0)
    np.testing.assert_array_equal(n, ref["one"].to_numpy())
    np.testing.assert_array_equal(f, ref["flag"].to_numpy())
    np.testing.assert_allclose(s, ref["w"].to_numpy(), rtol=1e-12)
    assert n.dtype == np.int64 and f.dtype == np.int64
