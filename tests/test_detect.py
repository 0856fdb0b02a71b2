"""Tests for aoi_fix.detect: velocity, I-VT, I-DT, merging and discarding.

Hand traces have answers worked out on paper; the I-DT implementation is
compared with a plain sequential I-DT written below straight from the
published description (Salvucci & Goldberg 2000, REFERENCES.md).
"""

from __future__ import annotations

import contextlib
import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from aoi_fix import detect as detect_module
from aoi_fix import geometry
from aoi_fix.clean import fill_gaps
from aoi_fix.config import Detection, Display
from aoi_fix.detect import (FIXATION_COLUMNS, detect_fixations, idt, ivt, merge_and_discard,
                            noise_velocity_deg_s, velocity_deg_s)
from aoi_fix.samples import nominal_interval_ms

# An invented display: 1000 x 1000 px, 0.5 mm square pixels, eye 600 mm from the centre.
DISPLAY = Display(width_px=1000, height_px=1000, width_mm=500.0, height_mm=500.0,
                  distance_mm=600.0)
PITCH_MM = 0.5
C = 500.0  # display centre in px, both axes


def _samples(t, x, y, valid=None) -> pd.DataFrame:
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if valid is None:
        valid = np.isfinite(x) & np.isfinite(y)
    valid = np.asarray(valid, dtype=bool)
    return pd.DataFrame({"t_ms": np.asarray(t, dtype=float), "x_px": np.where(valid, x, np.nan),
                         "y_px": np.where(valid, y, np.nan), "valid": valid})


def _px_for_deg_on_axis(deg: float) -> float:
    """Pixels from the centre, along an axis, at which the line of sight is at ``deg``:
    offset_mm = d * tan(deg) (plane geometry)."""
    return DISPLAY.distance_mm * math.tan(math.radians(deg)) / PITCH_MM


# --------------------------------------------------------------------------- worked trace

# 10 points inside a 4 px box (2 mm: 2*atan(1/600) = 0.19 deg, i.e. a 0.2 deg cluster),
# arranged so that their centroid is the box centre and the last point sits on it.
CLUSTER = np.array([(0, 0), (2, 0), (2, 2), (0, 2), (-2, 2), (-2, 0), (-2, -2), (0, -2),
                    (2, -2), (0, 0)], dtype=float)


def _worked_trace():
    jump = _px_for_deg_on_axis(5.0)  # a 5 deg jump to the right of the centre
    t = np.arange(20) * 10.0  # 100 Hz
    x = np.concatenate([C + CLUSTER[:, 0], C + jump + CLUSTER[:, 0]])
    y = np.concatenate([C + CLUSTER[:, 1], C + CLUSTER[:, 1]])
    return _samples(t, x, y), jump


def test_worked_trace_cluster_geometry():
    # the trace is what it claims to be (plane geometry)
    half_width_mm = 2 * PITCH_MM  # 2 px either side of the centre
    span_deg = math.degrees(2 * math.atan(half_width_mm / DISPLAY.distance_mm))
    assert span_deg <= 0.2
    _, jump = _worked_trace()
    assert float(geometry.angle_between_deg(C, C, C + jump, C, DISPLAY)) == pytest.approx(5.0)


@pytest.mark.parametrize("method", ["ivt", "idt"])
def test_worked_trace_two_fixations(method):
    # Salvucci & Goldberg (2000), REFERENCES.md worked trace: 10 samples at 100 Hz in a
    # 0.2 deg cluster, a 5 deg jump, 10 samples in another cluster => two fixations of
    # 100 ms each at the cluster centroids. On paper: onsets 0 and 100 ms, offsets
    # (last sample + one 10 ms interval) 100 and 200 ms; centroids (500, 500) and
    # (500 + jump, 500) since the cluster offsets sum to zero.
    samples, jump = _worked_trace()
    fix = detect_fixations(samples, display=DISPLAY, detection=Detection(method=method))
    assert list(fix.columns) == FIXATION_COLUMNS
    assert fix["fixation"].tolist() == [1, 2]
    np.testing.assert_allclose(fix["onset_ms"], [0.0, 100.0])
    np.testing.assert_allclose(fix["offset_ms"], [100.0, 200.0])
    np.testing.assert_allclose(fix["duration_ms"], [100.0, 100.0])
    np.testing.assert_allclose(fix["x_px"], [C, C + jump], atol=1e-9)
    np.testing.assert_allclose(fix["y_px"], [C, C], atol=1e-9)
    assert fix["start_row"].tolist() == [0, 10] and fix["end_row"].tolist() == [10, 20]


def test_worked_trace_idt_too_strict_threshold_finds_nothing():
    # the least dispersed 6-sample (60 ms) window is rows 0-5: x range 4 px = 2 mm about
    # the centre (2*atan(1/600) = 0.191 deg), y range 2 px = 1 mm (atan(1/600) = 0.095 deg),
    # D = 0.286 deg on paper; a 0.25 deg threshold rejects every window
    samples, _ = _worked_trace()
    fix = idt(fill_gaps(samples, max_gap_ms=75, interval_ms=10), display=DISPLAY,
              dispersion_threshold_deg=0.25, min_fixation_ms=60, interval_ms=10)
    assert len(fix) == 0 and list(fix.columns) == FIXATION_COLUMNS


# --------------------------------------------------------------------------- velocity

def _ramp(speed_deg_s, rate_hz, n, axis="x", start_deg=-3.0):
    """Gaze moving at constant angular speed along an axis through the display centre:
    angle(t) = start + speed * t, position = d * tan(angle) (plane geometry)."""
    t = np.arange(n) * 1000.0 / rate_hz
    ang = np.radians(start_deg + speed_deg_s * t / 1000.0)
    off = DISPLAY.distance_mm * np.tan(ang) / PITCH_MM
    if axis == "x":
        return _samples(t, C + off, np.full(n, C))
    return _samples(t, np.full(n, C), C + off)


def _engbert_kliegl(pos_deg, dt_s):
    """Engbert & Kliegl (2003), REFERENCES.md: v_n = (x_{n+2} + x_{n+1} - x_{n-1} - x_{n-2})
    / (6 dt), for the inner samples."""
    p = pos_deg
    return (p[4:] + p[3:-1] - p[1:-3] - p[:-4]) / (6 * dt_s)


@pytest.mark.parametrize("axis", ["x", "y"])
@pytest.mark.parametrize("rate_hz,window_ms", [(100, 20), (500, 20), (1000, 6), (250, 40)])
def test_velocity_of_linear_ramp_is_ramp_speed(axis, rate_hz, window_ms):
    speed = 40.0  # deg/s along the axis
    s = _ramp(speed, rate_hz, 60, axis=axis)
    v, vx, vy = velocity_deg_s(s, display=DISPLAY, window_ms=window_ms,
                               interval_ms=1000.0 / rate_hz)
    # every sample, including the clamped windows at the ends, sees exactly the ramp speed
    np.testing.assert_allclose(v, speed, rtol=1e-9)
    comp, other = (vx, vy) if axis == "x" else (vy, vx)
    np.testing.assert_allclose(comp, speed, rtol=1e-9)
    np.testing.assert_allclose(other, 0.0, atol=1e-9)
    # and the five-point formula of Engbert & Kliegl gives the same on a ramp
    ang = np.radians(-3.0 + speed * s["t_ms"].to_numpy() / 1000.0)
    ek = _engbert_kliegl(np.degrees(ang), 1.0 / rate_hz)
    np.testing.assert_allclose(ek, speed, rtol=1e-9)
    np.testing.assert_allclose(v[2:-2], ek, rtol=1e-9)


def test_velocity_negative_direction_and_lost_samples():
    s = _ramp(-25.0, 200, 40, axis="y", start_deg=2.0)
    s.loc[[10, 11], ["x_px", "y_px"]] = np.nan
    s.loc[[10, 11], "valid"] = False
    filled = fill_gaps(s, max_gap_ms=0, interval_ms=5.0)
    v, vx, vy = velocity_deg_s(filled, display=DISPLAY, window_ms=20, interval_ms=5.0)
    assert np.isnan(v[10:12]).all() and np.isnan(vy[10:12]).all()
    ok = np.isfinite(v)
    np.testing.assert_allclose(v[ok], 25.0, rtol=1e-9)   # speed is a magnitude
    np.testing.assert_allclose(vy[ok], -25.0, rtol=1e-9)  # y grows downwards


def test_velocity_of_still_gaze_is_zero():
    s = _samples(np.arange(10) * 4.0, np.full(10, 321.0), np.full(10, 654.0))
    v, vx, vy = velocity_deg_s(s, display=DISPLAY, window_ms=20, interval_ms=4.0)
    assert (v == 0).all() and (vx == 0).all() and (vy == 0).all()


def _noisy_fixation(sigma_deg, rate_hz=250, n=2000, seed=0):
    """White noise of SD sigma (deg, per axis) around the display centre."""
    rng = np.random.default_rng(seed)
    px_per_deg = _px_for_deg_on_axis(1.0)
    t = np.arange(n) * 1000.0 / rate_hz
    return _samples(t, C + rng.normal(0, sigma_deg, n) * px_per_deg,
                    C + rng.normal(0, sigma_deg, n) * px_per_deg)


def test_noise_adaptive_threshold_grows_with_noise():
    # Engbert & Kliegl (2003): threshold relative to noise, lambda * sigma with
    # sigma^2 = median(v^2) - median(v)^2. The same draws scaled by k scale the
    # velocities by k (px->deg is nearly linear within 1 deg of the centre), so the
    # threshold scales by k once it is above the floor.
    used = []
    for sigma in (0.2, 0.4, 0.8):
        fix = ivt(_noisy_fixation(sigma), display=DISPLAY, velocity_threshold_deg_s=30.0,
                  noise_factor=5.0, velocity_window_ms=20.0)
        used.append(fix.attrs["velocity_threshold_used_deg_s"])
        assert fix.attrs["velocity_threshold_used_deg_s"] == pytest.approx(
            5.0 * fix.attrs["noise_velocity_deg_s"])
    assert used[0] > 30.0
    assert used[0] < used[1] < used[2]
    assert used[1] / used[0] == pytest.approx(2.0, rel=0.02)
    assert used[2] / used[1] == pytest.approx(2.0, rel=0.02)


def test_noise_adaptive_threshold_equals_floor_on_clean_data():
    s = _samples(np.arange(200) * 4.0, np.full(200, 400.0), np.full(200, 600.0))
    fix = ivt(s, display=DISPLAY, velocity_threshold_deg_s=30.0, noise_factor=5.0)
    assert fix.attrs["velocity_threshold_used_deg_s"] == 30.0
    assert len(fix) == 1 and fix["duration_ms"][0] == pytest.approx(800.0)
    # tiny noise (0.005 deg) keeps 5 * sigma far below the 30 deg/s floor
    fix = ivt(_noisy_fixation(0.005), display=DISPLAY, velocity_threshold_deg_s=30.0)
    assert fix.attrs["velocity_threshold_used_deg_s"] == 30.0


def test_noise_factor_zero_is_fixed_threshold():
    fix = ivt(_noisy_fixation(0.8), display=DISPLAY, velocity_threshold_deg_s=30.0,
              noise_factor=0.0)
    assert fix.attrs["velocity_threshold_used_deg_s"] == 30.0


def test_noise_velocity_robust_sd_by_hand():
    # sigma^2 = median(v^2) - median(v)^2 per axis (Engbert & Kliegl 2003), RMS of the axes.
    vx = np.array([1.0, 2.0, 3.0, 4.0, 100.0])   # median v^2 = 9, median v = 3 -> 0
    vy = np.array([-2.0, 2.0, -2.0, 2.0, 2.0])   # median v^2 = 4, median v = 2 -> 0
    assert noise_velocity_deg_s(vx, vy) == 0.0
    vx = np.array([-1.0, 1.0, -1.0, 1.0, 0.0])   # median v^2 = 1, median v = 0 -> 1
    vy = np.array([-3.0, 3.0, -3.0, 3.0, 0.0])   # median v^2 = 9, median v = 0 -> 9
    assert noise_velocity_deg_s(vx, vy) == pytest.approx(math.sqrt((1 + 9) / 2))
    assert noise_velocity_deg_s(np.array([1.0, np.nan]), np.array([1.0, 1.0])) == 0.0


# --------------------------------------------------------------------------- I-DT reference

def reference_idt(filled: pd.DataFrame, *, display, dispersion_threshold_deg, min_fixation_ms,
                  interval_ms):
    """Plain sequential I-DT (Salvucci & Goldberg 2000), written from the description.

    Window [i, j): j is the smallest index with t[j-1] - t[i] + interval >= min_fixation_ms.
    D = (max x - min x) + (max y - min y) over per-axis degrees. If D <= threshold the
    window grows while adding the next sample keeps D <= threshold; it becomes a fixation
    [i, e) and the search continues at e. Otherwise i += 1. A window never includes a
    sample of another segment or a lost one (segment -1).
    """
    t = filled["t_ms"].to_numpy(float)
    seg = filled["segment"].to_numpy()
    ax, ay = geometry.px_to_deg(filled["x_px"].to_numpy(float),
                                filled["y_px"].to_numpy(float), display)
    n = len(t)

    def disp(i, j):
        return (ax[i:j].max() - ax[i:j].min()) + (ay[i:j].max() - ay[i:j].min())

    out = []
    i = 0
    while i < n:
        if seg[i] < 0:
            i += 1
            continue
        j = i + 1
        while j <= n and t[j - 1] - t[i] + interval_ms < min_fixation_ms:
            j += 1
        if j > n or np.any(seg[i:j] != seg[i]) or disp(i, j) > dispersion_threshold_deg:
            i += 1
            continue
        e = j
        while e < n and seg[e] == seg[i] and disp(i, e + 1) <= dispersion_threshold_deg:
            e += 1
        out.append((i, e))
        i = e
    return out


@st.composite
def traces(draw):
    """Random gaze traces: random walks with saccade-like jumps, dropouts (single and in
    runs), irregular clocks with jitter and occasional pauses. Times are on a 0.25 ms grid
    so that window-length comparisons are exact in floating point."""
    n = draw(st.integers(2, 160))
    seed = draw(st.integers(0, 2**32 - 1))
    interval_q = draw(st.sampled_from([4, 8, 16, 33, 40]))  # quarters of a ms: 1..10 ms
    jitter_q = draw(st.integers(0, interval_q // 3))
    step_px = draw(st.sampled_from([0.0, 0.3, 1.0, 3.0]))
    p_jump = draw(st.sampled_from([0.0, 0.02, 0.1]))
    p_drop = draw(st.sampled_from([0.0, 0.05, 0.2]))
    p_pause = draw(st.sampled_from([0.0, 0.02]))
    rng = np.random.default_rng(seed)
    steps = interval_q + rng.integers(-jitter_q, jitter_q + 1, n)
    steps[rng.random(n) < p_pause] += rng.integers(20, 800)
    t = 1000.0 + np.cumsum(np.maximum(steps, 1)) * 0.25
    walk = rng.normal(0, step_px, (n, 2))
    jumps = rng.random(n) < p_jump
    walk[jumps] += rng.uniform(-150, 150, (int(jumps.sum()), 2))
    pos = np.array([C, C]) + np.cumsum(walk, axis=0)
    valid = rng.random(n) >= p_drop
    if n > 10 and p_drop > 0:  # a longer loss
        a = int(rng.integers(0, n - 5))
        valid[a:a + int(rng.integers(1, 12))] = False
    if not valid.any():
        valid[0] = True
    return _samples(t, pos[:, 0], pos[:, 1], valid)


@settings(max_examples=250, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(s=traces(), thr=st.floats(0.05, 3.0), min_q=st.integers(0, 800),
       max_gap=st.sampled_from([0.0, 20.0, 75.0]))
def test_idt_equals_reference(s, thr, min_q, max_gap):
    min_ms = min_q * 0.25
    interval = nominal_interval_ms(s["t_ms"].to_numpy())
    filled = fill_gaps(s, max_gap_ms=max_gap, interval_ms=interval)
    got = idt(filled, display=DISPLAY, dispersion_threshold_deg=thr, min_fixation_ms=min_ms,
              interval_ms=interval)
    ref = reference_idt(filled, display=DISPLAY, dispersion_threshold_deg=thr,
                        min_fixation_ms=min_ms, interval_ms=interval)
    assert list(zip(got["start_row"].tolist(), got["end_row"].tolist())) == ref


def test_idt_equals_reference_on_long_fixation():
    # one long still stretch (longer than the 64-sample growth chunk) then a jump
    t = np.arange(300) * 2.0
    x = np.r_[np.full(250, 400.0), np.full(50, 700.0)]
    x[::7] += 1.0
    s = _samples(t, x, np.full(300, 500.0))
    filled = fill_gaps(s, max_gap_ms=75, interval_ms=2.0)
    got = idt(filled, display=DISPLAY, dispersion_threshold_deg=1.0, min_fixation_ms=100,
              interval_ms=2.0)
    ref = reference_idt(filled, display=DISPLAY, dispersion_threshold_deg=1.0,
                        min_fixation_ms=100, interval_ms=2.0)
    assert ref == [(0, 250), (250, 300)]
    assert list(zip(got["start_row"], got["end_row"])) == ref


# I-DT computes growth ends in batches of candidate starts and walks the chain of
# fixations afterwards; these settings of its private block/batch sizes force every
# path (many tiny blocks, batches and rounds; column-by-column growth to the end;
# long growers finished one by one; the walk one fixation at a time) on short traces.
IDT_SETTINGS = {
    "default": {},
    "tiny": dict(_IDT_BLOCK=1, _IDT_BATCH=2, _IDT_MIN_ROUND=1, _IDT_MIN_ACTIVE=1),
    "small": dict(_IDT_BLOCK=7, _IDT_BATCH=5, _IDT_MIN_ROUND=3, _IDT_MIN_ACTIVE=3),
    "one_by_one": dict(_IDT_BLOCK=16, _IDT_BATCH=4, _IDT_MIN_ROUND=2, _IDT_MIN_ACTIVE=10**9),
    "walk": dict(_IDT_BLOCK=32, _IDT_MIN_ROUND=10**9),
}


@contextlib.contextmanager
def _idt_settings(name):
    saved = {k: getattr(detect_module, k) for k in IDT_SETTINGS[name]}
    for k, v in IDT_SETTINGS[name].items():
        setattr(detect_module, k, v)
    try:
        yield
    finally:
        for k, v in saved.items():
            setattr(detect_module, k, v)


@st.composite
def fixation_traces(draw):
    """Long and many fixations: still or drifting stretches of 1-150 samples with
    noise, joined by jumps or few-sample saccades, on a regular or jittered clock
    (0.25 ms grid), with occasional dropouts."""
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    n_fix = draw(st.integers(1, 12))
    interval_q = draw(st.sampled_from([4, 8, 16]))
    jitter_q = draw(st.sampled_from([0, 1, interval_q // 4]))
    noise_px = draw(st.sampled_from([0.0, 0.2, 1.0, 3.0]))
    drift_px = draw(st.sampled_from([0.0, 0.05, 0.3]))
    p_drop = draw(st.sampled_from([0.0, 0.0, 0.01]))
    pos, cur = [], np.array([C, C]) + rng.uniform(-200, 200, 2)
    for _ in range(n_fix):
        m = int(rng.integers(1, 151))
        d = rng.normal(0, drift_px, 2)
        pos.append(cur + np.outer(np.arange(m), d) + rng.normal(0, noise_px, (m, 2)))
        cur = pos[-1][-1]
        nxt = np.array([C, C]) + rng.uniform(-250, 250, 2)
        k = int(rng.integers(0, 5))  # samples in flight
        pos.append(cur + np.outer(np.arange(1, k + 1) / (k + 1), nxt - cur))
        cur = nxt
    xy = np.concatenate(pos)
    n = len(xy)
    steps = interval_q + rng.integers(-jitter_q, jitter_q + 1, n)
    t = 1000.0 + np.cumsum(np.maximum(steps, 1)) * 0.25
    valid = rng.random(n) >= p_drop
    valid[0] = True
    return _samples(t, xy[:, 0], xy[:, 1], valid)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(s=fixation_traces(), thr=st.floats(0.1, 2.5), min_q=st.integers(0, 600),
       max_gap=st.sampled_from([0.0, 75.0]), how=st.sampled_from(sorted(IDT_SETTINGS)))
def test_idt_equals_reference_long_and_many_fixations(s, thr, min_q, max_gap, how):
    _assert_idt_equals_reference(s, thr, min_q * 0.25, max_gap, how)


def _assert_idt_equals_reference(s, thr, min_ms, max_gap, how):
    interval = nominal_interval_ms(s["t_ms"].to_numpy())
    filled = fill_gaps(s, max_gap_ms=max_gap, interval_ms=interval)
    with _idt_settings(how):
        got = idt(filled, display=DISPLAY, dispersion_threshold_deg=thr,
                  min_fixation_ms=min_ms, interval_ms=interval)
    ref = reference_idt(filled, display=DISPLAY, dispersion_threshold_deg=thr,
                        min_fixation_ms=min_ms, interval_ms=interval)
    assert list(zip(got["start_row"].tolist(), got["end_row"].tolist())) == ref


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(s=traces(), thr=st.floats(0.05, 3.0), min_q=st.integers(0, 800),
       max_gap=st.sampled_from([0.0, 20.0, 75.0]), how=st.sampled_from(sorted(IDT_SETTINGS)))
def test_idt_equals_reference_any_block_and_batch_size(s, thr, min_q, max_gap, how):
    _assert_idt_equals_reference(s, thr, min_q * 0.25, max_gap, how)


@pytest.mark.parametrize("how", sorted(IDT_SETTINGS))
def test_idt_equals_reference_on_slow_pursuit(how):
    # gaze sweeping a circle at 15 deg/s: every window passes, the fixations follow one
    # another with no gap, so the walk is one long chain inside one run of passing
    # starts (a single candidate to begin with); a few spikes and a loss break it up
    n = 3000
    ang = np.arange(n) * 0.25 / 200
    x = C + 200 * np.cos(ang)
    y = C + 200 * np.sin(ang)
    x[[700, 701, 1900]] += 40.0
    valid = np.ones(n, bool)
    valid[2400:2450] = False
    s = _samples(np.arange(n) * 1.0, x, y, valid)
    filled = fill_gaps(s, max_gap_ms=20, interval_ms=1.0)
    with _idt_settings(how):
        got = idt(filled, display=DISPLAY, dispersion_threshold_deg=1.0, min_fixation_ms=60,
                  interval_ms=1.0)
    ref = reference_idt(filled, display=DISPLAY, dispersion_threshold_deg=1.0,
                        min_fixation_ms=60, interval_ms=1.0)
    assert len(ref) > 30
    assert list(zip(got["start_row"].tolist(), got["end_row"].tolist())) == ref


# --------------------------------------------------------------------------- merge_and_discard

def _fix_table(rows, t, x, y, interval=10.0):
    """A raw fixation table for given (start_row, end_row) runs, by hand."""
    recs = []
    for k, (a, b) in enumerate(rows, start=1):
        onset, offset = t[a], min(t[b - 1] + interval, t[b] if b < len(t) else np.inf)
        recs.append({"fixation": k, "onset_ms": onset, "offset_ms": offset,
                     "duration_ms": offset - onset, "x_px": float(np.mean(x[a:b])),
                     "y_px": float(np.mean(y[a:b])), "start_row": a, "end_row": b})
    return pd.DataFrame(recs, columns=FIXATION_COLUMNS)


def _two_fixation_trace(second_x):
    # 100 Hz; rows 0-9 at x=500, rows 10-12 at 503 (between fixations), rows 13-29 at second_x
    t = np.arange(30) * 10.0
    x = np.r_[np.full(10, 500.0), np.full(3, 503.0), np.full(17, second_x)]
    y = np.full(30, 500.0)
    return t, x, y


def test_merge_short_gap_small_angle():
    # gap = onset 130 - offset 100 = 30 ms <= 75 ms; angle: 6 px = 3 mm at the centre,
    # atan(3/600) = 0.29 deg <= 1 deg => merged (common practice, REFERENCES.md)
    t, x, y = _two_fixation_trace(506.0)
    fix = _fix_table([(0, 10), (13, 30)], t, x, y)
    out = merge_and_discard(fix, _samples(t, x, y), display=DISPLAY, merge_max_gap_ms=75,
                            merge_max_angle_deg=1.0, min_fixation_ms=60, interval_ms=10)
    assert len(out) == 1
    assert out.loc[0, "onset_ms"] == 0.0 and out.loc[0, "offset_ms"] == 300.0
    assert out.loc[0, "duration_ms"] == 300.0
    assert (out.loc[0, "start_row"], out.loc[0, "end_row"]) == (0, 30)
    # centroid of all 30 samples it now spans: (10*500 + 3*503 + 17*506) / 30
    assert out.loc[0, "x_px"] == pytest.approx((10 * 500 + 3 * 503 + 17 * 506) / 30)
    assert out.loc[0, "y_px"] == pytest.approx(500.0)


@pytest.mark.parametrize("second_x,gap_ms,angle_deg", [
    (560.0, 75.0, 1.0),   # 60 px = 30 mm: atan(30/600) = 2.9 deg > 1 deg
    (506.0, 20.0, 1.0),   # 30 ms gap > 20 ms
    (506.0, 75.0, 0.0),   # 0 = never merge
])
def test_no_merge_large_angle_or_long_gap(second_x, gap_ms, angle_deg):
    t, x, y = _two_fixation_trace(second_x)
    fix = _fix_table([(0, 10), (13, 30)], t, x, y)
    out = merge_and_discard(fix, _samples(t, x, y), display=DISPLAY, merge_max_gap_ms=gap_ms,
                            merge_max_angle_deg=angle_deg, min_fixation_ms=60, interval_ms=10)
    assert out["start_row"].tolist() == [0, 13] and out["end_row"].tolist() == [10, 30]
    np.testing.assert_allclose(out["onset_ms"], [0.0, 130.0])
    np.testing.assert_allclose(out["offset_ms"], [100.0, 300.0])
    np.testing.assert_allclose(out["x_px"], [500.0, second_x])


def test_merge_chain_into_one():
    t = np.arange(40) * 10.0
    x = np.full(40, 500.0)
    fix = _fix_table([(0, 8), (10, 18), (20, 28), (30, 40)], t, x, x)
    out = merge_and_discard(fix, _samples(t, x, x), display=DISPLAY, merge_max_gap_ms=75,
                            merge_max_angle_deg=1.0, min_fixation_ms=60, interval_ms=10)
    assert (out["start_row"].tolist(), out["end_row"].tolist()) == ([0], [40])


def test_short_fixations_dropped_and_renumbered():
    # 100 ms, 30 ms, 60 ms (kept: "shorter than" min is discarded), 50 ms; far apart
    t = np.arange(60) * 10.0
    x = np.r_[np.full(15, 200.0), np.full(15, 400.0), np.full(15, 600.0), np.full(15, 800.0)]
    fix = _fix_table([(0, 10), (15, 18), (30, 36), (45, 50)], t, x, x)
    out = merge_and_discard(fix, _samples(t, x, x), display=DISPLAY, merge_max_gap_ms=75,
                            merge_max_angle_deg=1.0, min_fixation_ms=60, interval_ms=10)
    assert out["fixation"].tolist() == [1, 2]
    assert out["start_row"].tolist() == [0, 30]
    np.testing.assert_allclose(out["duration_ms"], [100.0, 60.0])


def _assert_typed_empty(out):
    assert len(out) == 0
    assert list(out.columns) == FIXATION_COLUMNS
    for c in ("fixation", "start_row", "end_row"):
        assert out[c].dtype == np.int64, c
    for c in ("onset_ms", "offset_ms", "duration_ms", "x_px", "y_px"):
        assert out[c].dtype == np.float64, c


def test_empty_inputs_give_empty_typed_tables():
    empty = _samples([], [], [])
    filled = fill_gaps(empty, max_gap_ms=75, interval_ms=10)
    _assert_typed_empty(idt(filled, display=DISPLAY, interval_ms=10))
    _assert_typed_empty(ivt(filled, display=DISPLAY, interval_ms=10))
    t = np.arange(10) * 10.0
    s = _samples(t, np.full(10, 500.0), np.full(10, 500.0))
    no_fix = pd.DataFrame({c: pd.Series([], dtype="int64" if c in ("fixation", "start_row",
                                                                   "end_row") else float)
                           for c in FIXATION_COLUMNS})
    _assert_typed_empty(merge_and_discard(no_fix, s, display=DISPLAY, interval_ms=10))


@pytest.mark.parametrize("method", ["ivt", "idt"])
def test_no_fixation_in_fast_motion_is_empty_typed(method):
    # 300 deg/s sweep: every sample moves 3 deg per 10 ms
    s = _ramp(300.0, 100, 8, start_deg=-12.0)
    fix = detect_fixations(s, display=DISPLAY, detection=Detection(method=method))
    _assert_typed_empty(fix)


# --------------------------------------------------------------------------- invariants

@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(s=traces(), method=st.sampled_from(["ivt", "idt"]),
       thr=st.floats(0.3, 2.0), vthr=st.floats(10.0, 100.0),
       min_ms=st.sampled_from([0.0, 20.0, 60.0, 100.0]),
       max_gap=st.sampled_from([0.0, 20.0, 75.0]),
       merge_gap=st.sampled_from([0.0, 75.0, 500.0]), merge_ang=st.sampled_from([0.0, 1.0, 5.0]))
def test_fixation_invariants(s, method, thr, vthr, min_ms, max_gap, merge_gap, merge_ang):
    det = Detection(method=method, dispersion_threshold_deg=thr, velocity_threshold_deg_s=vthr,
                    min_fixation_ms=min_ms, max_gap_ms=max_gap, merge_max_gap_ms=merge_gap,
                    merge_max_angle_deg=merge_ang)
    t = s["t_ms"].to_numpy()
    interval = nominal_interval_ms(t)
    fix = detect_fixations(s, display=DISPLAY, detection=det, interval_ms=interval)
    assert list(fix.columns) == FIXATION_COLUMNS
    assert fix["fixation"].tolist() == list(range(1, len(fix) + 1))
    if len(fix) == 0:
        return
    on, off = fix["onset_ms"].to_numpy(), fix["offset_ms"].to_numpy()
    a, b = fix["start_row"].to_numpy(), fix["end_row"].to_numpy()
    # every fixation's duration is offset - onset, and it is not shorter than the minimum
    assert (fix["duration_ms"].to_numpy() == off - on).all()
    assert (off - on >= min_ms - 1e-9).all()
    # fixations never overlap, are in time order and lie within the recording
    assert (off[:-1] <= on[1:]).all()
    assert (b[:-1] <= a[1:]).all()
    assert on[0] >= t[0] and off[-1] <= t[-1] + interval
    assert ((0 <= a) & (a < b) & (b <= len(t))).all()
    np.testing.assert_array_equal(on, t[a])
    # each fixation stays within one segment of usable data (never bridges a long loss)
    seg = fill_gaps(s, max_gap_ms=max_gap, interval_ms=interval)["segment"].to_numpy()
    for i, j in zip(a, b):
        assert seg[i] >= 0 and (seg[i:j] == seg[i]).all()
    assert np.isfinite(fix["x_px"]).all() and np.isfinite(fix["y_px"]).all()


# --------------------------------------------------------------------------- pauses

@pytest.mark.parametrize("method", ["ivt", "idt"])
@pytest.mark.parametrize("kind", ["clock_pause", "lost_rows"])
def test_no_fixation_bridges_a_long_pause(method, kind):
    # Gaze stays on one spot; 200 ms of no usable data (> max_gap_ms = 75) in the middle.
    # Merge options are generous, so only the loss can keep the fixations apart.
    if kind == "clock_pause":
        t = np.r_[np.arange(30) * 10.0, 500.0 + np.arange(30) * 10.0]
        s = _samples(t, np.full(60, 500.0), np.full(60, 500.0))
        before_end, after_start = 300.0, 500.0
    else:
        t = np.arange(80) * 10.0
        valid = np.ones(80, bool)
        valid[30:50] = False
        s = _samples(t, np.full(80, 500.0), np.full(80, 500.0), valid)
        before_end, after_start = 300.0, 500.0
    det = Detection(method=method, max_gap_ms=75, merge_max_gap_ms=1000, merge_max_angle_deg=5)
    fix = detect_fixations(s, display=DISPLAY, detection=det, interval_ms=10.0)
    assert len(fix) == 2
    np.testing.assert_allclose(fix["onset_ms"], [0.0, after_start])
    np.testing.assert_allclose(fix["offset_ms"], [before_end, after_start + 300.0])


@pytest.mark.parametrize("method", ["ivt", "idt"])
def test_short_dropout_is_bridged(method):
    # 50 ms lost (<= 75 ms): one fixation over the whole 600 ms
    t = np.arange(60) * 10.0
    valid = np.ones(60, bool)
    valid[20:25] = False
    s = _samples(t, np.full(60, 500.0), np.full(60, 500.0), valid)
    fix = detect_fixations(s, display=DISPLAY, detection=Detection(method=method),
                           interval_ms=10.0)
    assert len(fix) == 1
    assert fix.loc[0, "onset_ms"] == 0.0 and fix.loc[0, "offset_ms"] == 600.0


def _runs_over_gaze_with_holes(seed, n, n_cuts, *, lost_x, lost_y, valid):
    """Invented gaze positions (px) with NaN holes per axis, a validity mask, and
    ``n_cuts // 2`` runs [start, end) in time order at random places."""
    rng = np.random.default_rng(seed)
    x = rng.normal(300, 50, n)
    y = rng.normal(200, 30, n)
    x[rng.random(n) < lost_x] = np.nan
    y[rng.random(n) < lost_y] = np.nan
    ok = rng.random(n) < valid
    cuts = np.sort(rng.choice(np.arange(n + 1), size=n_cuts, replace=False))
    return x, y, ok, cuts[0::2], cuts[1::2]


@pytest.mark.parametrize("block", [3, 64, 1 << 17])
def test_run_means_by_groups_equal_prefix_sums(monkeypatch, block):
    # reference: numpy nanmean over each run (general-purpose library), and the
    # prefix-sum version kept for overlapping runs
    from aoi_fix import _chunks
    from aoi_fix.detect import _run_means, _run_means_prefix

    monkeypatch.setattr(_chunks, "BLOCK", block)
    n = 500
    x, y, valid, starts, ends = _runs_over_gaze_with_holes(7, n, 80, lost_x=0.1, lost_y=0.05,
                                                           valid=0.8)
    ends[3] = starts[3]  # an empty run
    ends[-1] = n  # a run to the very end
    for v in (None, valid):
        got, cnt = _run_means(starts, ends, x, y, v)
        ref, rcnt = _run_means_prefix(starts, ends, x, y, v)
        np.testing.assert_array_equal(cnt, rcnt)
        np.testing.assert_allclose(got, ref, rtol=1e-12, equal_nan=True)
        use = np.isfinite(x) & np.isfinite(y) & (True if v is None else v)
        for k in (0, 10, len(starts) - 1):
            sel = np.arange(starts[k], ends[k])
            sel = sel[use[sel]]
            assert cnt[k] == len(sel)
            if len(sel):
                assert got[k, 0] == pytest.approx(np.mean(x[sel]), rel=1e-12)


def _refine_reference(starts, ends, x, y, seg, rel_step=0.1):
    """Edge refinement one saccade at a time, from its definition (a plain loop)."""
    starts, ends = starts.copy(), ends.copy()
    for k in range(len(starts) - 1):
        s1, e0 = starts[k + 1], ends[k]
        if not (seg[s1] == seg[e0 - 1] and s1 > e0):
            continue
        steps = [(i, math.hypot(x[i + 1] - x[i], y[i + 1] - y[i])) for i in range(e0 - 1, s1)]
        peak = max(v for _, v in steps)
        if math.isnan(peak) or any(math.isnan(v) for _, v in steps):
            continue  # a NaN step: no step counts as fast
        fast = [i for i, v in steps if v >= rel_step * peak]
        ends[k] = max(ends[k], fast[0] + 1)
        starts[k + 1] = min(starts[k + 1], fast[-1] + 1)
    return starts, ends


@pytest.mark.parametrize("seed", range(6))
def test_refine_edges_equals_one_saccade_at_a_time(seed):
    # the vectorised refinement (all saccades in one pass) against the same
    # rule applied to each saccade in a Python loop; NaN steps included
    from aoi_fix.detect import _refine_edges, _runs

    rng = np.random.default_rng(seed)
    n = 3000
    x = np.cumsum(rng.normal(0, 1, n))
    y = np.cumsum(rng.normal(0, 1, n))
    if seed % 2:
        x[rng.random(n) < 0.01] = np.nan
    seg = np.cumsum(rng.random(n) < 0.01).astype(np.int32)
    seg[rng.random(n) < 0.01] = -1
    starts, ends = _runs(rng.random(n) < 0.7, seg)
    got = _refine_edges(starts, ends, x, y, seg)
    want = _refine_reference(starts, ends, x, y, seg)
    np.testing.assert_array_equal(got[0], want[0])
    np.testing.assert_array_equal(got[1], want[1])
    assert (got[1] != ends).any()  # the rule moved some edges


@pytest.mark.parametrize("method", ["ivt", "idt"])
def test_merge_reusing_detector_means_equals_recomputing(method):
    # detect_filled keeps the detector's means for runs no merge changes; the
    # public merge_and_discard sums every run again: the tables must be equal,
    # bit for bit
    from aoi_fix.detect import detect_filled

    rng = np.random.default_rng(3)
    n = 6000
    t = np.arange(n) * (1000 / 300)
    x = np.repeat(rng.uniform(100, 900, n // 60), 60) + rng.normal(0, 2, n)
    y = np.repeat(rng.uniform(100, 900, n // 60), 60) + rng.normal(0, 2, n)
    x[rng.random(n) < 0.03] = np.nan
    det = Detection(method=method, merge_max_angle_deg=2.0, merge_max_gap_ms=100.0)
    filled = fill_gaps(_samples(t, x, y), max_gap_ms=det.max_gap_ms, interval_ms=1000 / 300)
    got = detect_filled(filled, display=DISPLAY, detection=det, interval_ms=1000 / 300)
    raw = (ivt(filled, display=DISPLAY, interval_ms=1000 / 300) if method == "ivt" else
           idt(filled, display=DISPLAY, min_fixation_ms=det.min_fixation_ms,
               interval_ms=1000 / 300))
    want = merge_and_discard(raw, filled, display=DISPLAY, merge_max_gap_ms=100.0,
                             merge_max_angle_deg=2.0, min_fixation_ms=det.min_fixation_ms,
                             interval_ms=1000 / 300)
    merged_only = merge_and_discard(raw, filled, display=DISPLAY, merge_max_gap_ms=100.0,
                                    merge_max_angle_deg=2.0, min_fixation_ms=0.0,
                                    interval_ms=1000 / 300)
    assert len(merged_only) < len(raw)  # some runs were merged (not only discarded)
    pd.testing.assert_frame_equal(got, want, check_exact=True)


@pytest.mark.parametrize("block", [64, 1 << 17])
def test_run_means_sparse_runs_equal_the_same_runs_among_many(monkeypatch, block):
    # a few runs far apart are gathered before summing; each run's mean must be
    # bit for bit what it is when summed in place among all runs (the merge in
    # detect_filled relies on a run's mean not depending on the others)
    from aoi_fix import _chunks
    from aoi_fix.detect import _run_means

    monkeypatch.setattr(_chunks, "BLOCK", block)
    x, y, valid, starts, ends = _runs_over_gaze_with_holes(11, 20000, 1200, lost_x=0.05,
                                                           lost_y=0.0, valid=0.9)
    few = np.arange(0, len(starts), 37)
    assert (ends[few] - starts[few]).sum() * 4 < ends[few][-1] - starts[few][0]  # sparse
    assert (ends - starts).sum() * 4 >= ends[-1] - starts[0]                     # dense
    for v in (None, valid):
        dense, dcnt = _run_means(starts, ends, x, y, v)
        sparse, scnt = _run_means(starts[few], ends[few], x, y, v)
        np.testing.assert_array_equal(scnt, dcnt[few])
        np.testing.assert_array_equal(sparse, dense[few])
