"""Tests for aoi_fix.clean: gap filling and Savitzky-Golay smoothing."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.signal import savgol_filter

from aoi_fix.clean import fill_gaps, smooth_savgol


def _frame(t, x, y=None):
    x = np.asarray(x, dtype=float)
    y = np.zeros_like(x) if y is None else np.asarray(y, dtype=float)
    valid = np.isfinite(x) & np.isfinite(y)
    return pd.DataFrame({"t_ms": np.asarray(t, dtype=float), "x_px": x, "y_px": y,
                         "valid": valid})


NAN = np.nan


# --------------------------------------------------------------------------- fill_gaps

def test_short_gap_interpolated_exactly_linearly():
    # 100 Hz; rows 3-4 lost; missing time = t[5] - t[2] - interval = 30 - 10 = 20 ms <= 75 ms
    t = np.arange(8) * 10.0
    x = [10.0, 11.0, 12.0, NAN, NAN, 18.0, 19.0, 20.0]
    y = [5.0, 5.0, 5.0, NAN, NAN, -1.0, 0.0, 0.0]
    out = fill_gaps(_frame(t, x, y), max_gap_ms=75.0, interval_ms=10.0)
    # on paper: from (20 ms, 12) to (50 ms, 18): slope 0.2 px/ms -> 14 at 30 ms, 16 at 40 ms
    assert out["x_px"].tolist()[3:5] == pytest.approx([14.0, 16.0], abs=1e-12)
    # y from 5 to -1 over 30 ms: 3 at 30 ms, 1 at 40 ms
    assert out["y_px"].tolist()[3:5] == pytest.approx([3.0, 1.0], abs=1e-12)
    assert out["filled"].tolist() == [False, False, False, True, True, False, False, False]
    assert out["segment"].tolist() == [0] * 8
    # the raw validity is kept as it was: filled samples are not "valid" measurements
    assert out["valid"].tolist() == [True, True, True, False, False, True, True, True]
    # the input is not modified
    assert np.isnan(_frame(t, x, y)["x_px"][3])


def test_interpolation_uses_timestamps_not_row_counts():
    # irregular clock: the lost sample sits 1/4 of the way through the gap in time
    t = [0.0, 10.0, 12.5, 20.0, 30.0]
    x = [0.0, 100.0, NAN, 110.0, 120.0]
    out = fill_gaps(_frame(t, x), max_gap_ms=75.0, interval_ms=10.0)
    assert out.loc[2, "x_px"] == pytest.approx(102.5)  # 100 + 10 * (2.5 / 10)


def test_long_loss_kept():
    # rows 2..11 lost: missing time = t[12] - t[1] - 10 = 110 - 10 = 100 ms > 75 ms
    t = np.arange(15) * 10.0
    x = np.arange(15, dtype=float)
    x[2:12] = NAN
    out = fill_gaps(_frame(t, x), max_gap_ms=75.0, interval_ms=10.0)
    assert out["x_px"].isna().tolist() == [False] * 2 + [True] * 10 + [False] * 3
    assert not out["filled"].any()
    seg = out["segment"].to_numpy()
    assert (seg[2:12] == -1).all()
    assert seg[0] == seg[1] >= 0 and seg[12] == seg[13] == seg[14] >= 0
    assert seg[0] != seg[12]


def test_gap_of_exactly_max_gap_filled_and_just_longer_kept():
    # 100 Hz, max_gap 50 ms: 5 lost rows = 50 ms filled; 7 lost rows = 70 ms kept
    t = np.arange(30) * 10.0
    x = np.arange(30, dtype=float)
    x[3:8] = NAN     # 5 lost
    x[15:22] = NAN   # 7 lost
    out = fill_gaps(_frame(t, x), max_gap_ms=50.0, interval_ms=10.0)
    np.testing.assert_allclose(out["x_px"][3:8], np.arange(3, 8, dtype=float))  # a line
    assert out["filled"][3:8].all()
    assert out["x_px"][15:22].isna().all() and (out["segment"][15:22] == -1).all()


def test_pause_in_timestamps_cuts_segments():
    # all samples valid; a 500 ms hole in the clock (missing time 490 ms > 75 ms)
    t = np.concatenate([np.arange(5) * 10.0, 540.0 + np.arange(5) * 10.0])
    out = fill_gaps(_frame(t, np.ones(10)), max_gap_ms=75.0, interval_ms=10.0)
    assert out["segment"].tolist() == [0] * 5 + [1] * 5
    assert not out["filled"].any()


def test_short_pause_is_bridged():
    # a 40 ms hole in the clock: missing time 40 - 10 = 30 ms <= 75 ms -> one segment
    t = [0.0, 10.0, 20.0, 60.0, 70.0]
    out = fill_gaps(_frame(t, np.ones(5)), max_gap_ms=75.0, interval_ms=10.0)
    assert out["segment"].tolist() == [0] * 5


def test_leading_and_trailing_losses_stay_lost():
    t = np.arange(8) * 10.0
    x = [NAN, NAN, 2.0, 3.0, 4.0, 5.0, NAN, NAN]
    out = fill_gaps(_frame(t, x), max_gap_ms=75.0, interval_ms=10.0)
    assert out["x_px"].isna().tolist() == [True, True, False, False, False, False, True, True]
    assert out["segment"].tolist() == [-1, -1, 0, 0, 0, 0, -1, -1]
    assert not out["filled"].any()


def test_zero_max_gap_fills_nothing():
    t = np.arange(5) * 10.0
    out = fill_gaps(_frame(t, [1.0, 2.0, NAN, 4.0, 5.0]), max_gap_ms=0.0, interval_ms=10.0)
    assert np.isnan(out.loc[2, "x_px"])
    assert out["segment"].tolist() == [0, 0, -1, 1, 1]


def test_all_lost_and_empty():
    out = fill_gaps(_frame(np.arange(3) * 10.0, [NAN] * 3), max_gap_ms=75, interval_ms=10)
    assert out["segment"].tolist() == [-1, -1, -1]
    empty = fill_gaps(_frame([], []), max_gap_ms=75, interval_ms=10)
    assert len(empty) == 0 and {"filled", "segment"} <= set(empty.columns)


def test_every_sample_accounted_for():
    # STYLE.md habit 11: every sample is accounted for (either in a segment or lost).
    rng = np.random.default_rng(3)
    t = np.cumsum(rng.uniform(3, 5, 500))
    x = rng.normal(500, 20, 500)
    x[rng.random(500) < 0.2] = NAN
    out = fill_gaps(_frame(t, x, x), max_gap_ms=20.0, interval_ms=4.0)
    assert len(out) == 500
    seg = out["segment"].to_numpy()
    lost = seg == -1
    assert np.isnan(out["x_px"][lost]).all()
    assert np.isfinite(out["x_px"][~lost]).all()
    assert (np.diff(seg[~lost]) >= 0).all()  # segments numbered in time order
    assert set(np.unique(seg[~lost])) == set(range(seg.max() + 1))


# --------------------------------------------------------------------------- smooth_savgol

@pytest.mark.parametrize("window_ms,interval_ms,n_win", [
    (50.0, 10.0, 5),   # 5 samples
    (40.0, 10.0, 5),   # 4 rounded up to the next odd number
    (20.0, 2.0, 11),   # 10 -> 11
    (8.0, 4.0, 5),     # 2 -> at least polyorder + 2 = 4 -> odd 5
])
def test_savgol_equals_scipy_on_one_segment(window_ms, interval_ms, n_win):
    rng = np.random.default_rng(0)
    v = np.cumsum(rng.normal(0, 1, 60))
    t = np.arange(60) * interval_ms
    got = smooth_savgol(t, v, np.zeros(60, dtype=int), window_ms=window_ms,
                        interval_ms=interval_ms)
    # reference library: scipy.signal.savgol_filter, window as documented in clean.py
    expected = savgol_filter(v, n_win, 2, mode="interp")
    np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-12)
    assert not np.shares_memory(got, v)


def test_savgol_polyorder_3_and_quadratic_preserved():
    t = np.arange(40) * 5.0
    v = 0.5 * t ** 2 - 3 * t + 7  # a quadratic is kept exactly by an order-2 fit (least squares)
    got = smooth_savgol(t, v, np.zeros(40, dtype=int), window_ms=35, interval_ms=5)
    np.testing.assert_allclose(got, v, rtol=1e-9)
    rng = np.random.default_rng(2)
    w = rng.normal(size=40)
    got3 = smooth_savgol(t, w, np.zeros(40, dtype=int), window_ms=35, interval_ms=5,
                         polyorder=3)
    np.testing.assert_allclose(got3, savgol_filter(w, 7, 3, mode="interp"), atol=1e-12)


def test_savgol_per_segment_and_short_segments_untouched():
    rng = np.random.default_rng(1)
    v = rng.normal(size=40)
    v[20:23] = NAN
    seg = np.array([0] * 15 + [1] * 5 + [-1] * 3 + [2] * 17)
    got = smooth_savgol(np.arange(40) * 10.0, v, seg, window_ms=70, interval_ms=10)  # 7 samples
    np.testing.assert_allclose(got[:15], savgol_filter(v[:15], 7, 2, mode="interp"), atol=1e-12)
    assert np.array_equal(got[15:20], v[15:20])          # 5 < 7 samples: left alone
    assert np.isnan(got[20:23]).all()                   # lost samples untouched
    np.testing.assert_allclose(got[23:], savgol_filter(v[23:], 7, 2, mode="interp"), atol=1e-12)


def test_savgol_all_lost():
    v = np.array([NAN, NAN])
    got = smooth_savgol(np.array([0.0, 1.0]), v, np.array([-1, -1]), window_ms=20,
                        interval_ms=1)
    assert np.isnan(got).all()


@pytest.mark.parametrize("block", [1, 7, 64, 1 << 17])
def test_fixation_average_equals_the_window_mean_by_hand(monkeypatch, block):
    # Reference: the docstring's definition written as a plain loop over samples
    # (mean of the finite positions within h samples either side, cut at the
    # fixation's ends); the block size of the vectorised version must not matter.
    from aoi_fix import _chunks
    from aoi_fix.clean import fixation_average

    rng = np.random.default_rng(11)
    n = 500
    x, y = rng.normal(size=n), rng.normal(size=n)
    x[rng.random(n) < 0.1] = np.nan
    y[rng.random(n) < 0.05] = np.nan
    fx = pd.DataFrame({"start_row": [0, 40, 41, 200, 495], "end_row": [30, 41, 190, 480, 500]})
    interval, window = 4.0, 40.0
    h = 5
    want_x, want_y = x.copy(), y.copy()
    for s, e in zip(fx["start_row"], fx["end_row"]):
        for i in range(s, e):
            lo, hi = max(s, i - h), min(e, i + h + 1)
            ok = np.isfinite(x[lo:hi]) & np.isfinite(y[lo:hi])
            if ok.any():
                want_x[i], want_y[i] = x[lo:hi][ok].mean(), y[lo:hi][ok].mean()
    monkeypatch.setattr(_chunks, "BLOCK", block)
    got_x, got_y = fixation_average(pd.DataFrame({"x_px": x, "y_px": y}), fx,
                                    window_ms=window, interval_ms=interval)
    np.testing.assert_allclose(got_x, want_x, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(got_y, want_y, rtol=1e-12, atol=1e-12)


def _five_fixations_over_gaze(seed, n=700):
    """Invented gaze (px) with 8 % lost samples and five fixations, with their fid."""
    from aoi_fix.summary import fixation_of_sample

    rng = np.random.default_rng(seed)
    f = pd.DataFrame({"x_px": rng.normal(500, 40, n), "y_px": rng.normal(300, 40, n)})
    f.loc[rng.random(n) < 0.08, ["x_px", "y_px"]] = np.nan
    fx = pd.DataFrame({"start_row": [3, 50, 51, 300, 690], "end_row": [45, 51, 280, 650, 700]})
    return rng, f, fx, fixation_of_sample(n, fx)


@pytest.mark.parametrize("block", [1, 7, 64, 1 << 17])
def test_fixation_average_at_rows_is_the_whole_result_at_those_rows(monkeypatch, block):
    # Sweeps re-average only the samples whose window changed: those numbers must
    # be bit for bit the ones of the whole computation (same block arithmetic).
    from aoi_fix import _chunks
    from aoi_fix.clean import fixation_average

    rng, f, fx, fid = _five_fixations_over_gaze(12)
    n = len(f)
    monkeypatch.setattr(_chunks, "BLOCK", block)
    whole_x, whole_y = fixation_average(f, fx, window_ms=40.0, interval_ms=4.0, fid=fid)
    rows = np.sort(rng.choice(n, 150, replace=False))
    got_x, got_y = fixation_average(f, fx, window_ms=40.0, interval_ms=4.0, fid=fid, rows=rows)
    np.testing.assert_array_equal(got_x, whole_x[rows])
    np.testing.assert_array_equal(got_y, whole_y[rows])
    assert np.isfinite(got_x).sum() > 100


@pytest.mark.parametrize("block", [1, 7, 64, 1 << 17])
def test_fixation_average_by_blocks_is_the_whole_result(monkeypatch, block):
    # convert makes the averaged positions block by block where they are tested:
    # over the blocks of map_blocks they must be bit for bit the whole result,
    # windows without a finite sample included (they keep the input position)
    from aoi_fix import _chunks
    from aoi_fix.clean import fixation_average, fixation_average_blocks

    _, f, fx, fid = _five_fixations_over_gaze(13)
    n = len(f)
    f.loc[100:140, ["x_px", "y_px"]] = np.nan  # windows with no finite sample
    monkeypatch.setattr(_chunks, "BLOCK", block)
    whole_x, whole_y = fixation_average(f, fx, window_ms=40.0, interval_ms=4.0, fid=fid)
    at = fixation_average_blocks(f, fx, window_ms=40.0, interval_ms=4.0, fid=fid)
    parts = _chunks.map_blocks(at, n)
    np.testing.assert_array_equal(np.concatenate([p[0] for p in parts]), whole_x)
    np.testing.assert_array_equal(np.concatenate([p[1] for p in parts]), whole_y)
    assert (np.concatenate([p[0] for p in parts]) != f["x_px"].to_numpy()).sum() > 300
