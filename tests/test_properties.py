"""Invariants of ``convert`` on random small sessions (hypothesis).

Each example is a whole session written to files and run through the library
function :func:`aoi_fix.pipeline.convert` (the one ``aoi-fix convert`` calls):

* every sample is counted exactly once: ``total = valid + gap_filled + lost =
  inside_trials + outside_trials``, and per trial ``samples = valid +
  gap_filled + lost``;
* a trial's ``pct_fixation`` rows sum to 100, or are all empty when the trial
  has no fixation time;
* fixations never overlap and lie inside the recording;
* shuffling the rows of the AOI table or the trial table changes nothing.

Hypothesis draws the structure (rates, trial and AOI layout, detection
settings) and a seed; numpy draws the details from that seed, so a failing
example shrinks to a small structure and a reproducible trace.  Example counts
are modest so that the module runs in well under a minute.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, Phase, assume, given, settings
from hypothesis import strategies as st

from aoi_fix.config import study_from_dict
from aoi_fix.pipeline import convert

DISPLAY = {"width_px": 800, "height_px": 600, "width_mm": 400.0, "height_mm": 300.0,
           "distance_mm": 600.0}
STIMULI = {"a": {"fps": 25.0, "width_px": 64, "height_px": 48},
           "b": {"fps": 30.0, "width_px": 80, "height_px": 60}}
SETTINGS = settings(max_examples=50, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow])


# --------------------------------------------------------------------------- strategies

@st.composite
def sessions(draw):
    """A random small session as plain tables (samples, trials, AOIs) and a study."""
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    rate_hz = draw(st.sampled_from([60.0, 120.0, 300.0]))
    n = draw(st.integers(20, 400))
    dt = 1000.0 / rate_hz
    steps = np.full(n - 1, dt)
    # a few pauses in the recording
    n_pauses = draw(st.integers(0, 2))
    if n_pauses:
        steps[rng.integers(0, n - 1, n_pauses)] += rng.uniform(50, 400, n_pauses)
    t = 1000.0 + np.r_[0.0, np.cumsum(steps)]
    # gaze: fixations at random places with noise, joined by jumps
    x = np.empty(n)
    y = np.empty(n)
    i = 0
    while i < n:
        k = int(rng.integers(3, 60))
        x[i:i + k] = rng.uniform(-50, 850) + rng.normal(0, 3, min(k, n - i))
        y[i:i + k] = rng.uniform(-50, 650) + rng.normal(0, 3, min(k, n - i))
        i += k
    loss = draw(st.sampled_from([0.0, 0.05, 0.3, 1.0]))
    if loss:
        starts = rng.random(n) < loss / 5
        runs = np.convolve(starts, np.ones(int(rng.integers(1, 30))), mode="full")[:n] > 0
        x[runs] = np.nan
        y[runs] = np.nan
    if np.all(np.isnan(x)):
        x[0], y[0] = 400.0, 300.0  # at least one valid sample (else: a clear error)
    samples = pd.DataFrame({"t": t, "gx": x, "gy": y})

    # trials: non-overlapping windows, some running past the recording's ends
    n_trials = draw(st.integers(1, 4))
    edges = np.unique(np.round(rng.uniform(t[0] - 300, t[-1] + 300, 2 * n_trials), 3))
    if len(edges) < 2:
        edges = np.array([t[0], t[-1]])
    pairs = [(edges[j], edges[j + 1]) for j in range(0, len(edges) - 1, 2)]
    trials = []
    for j, (a, b) in enumerate(pairs):
        stim = str(rng.choice(list(STIMULI)))
        row = {"trial": f"t{j + 1}", "stimulus": stim, "start": a, "end": b}
        if rng.random() < 0.5:
            row.update(media_x_px=float(rng.uniform(0, 300)),
                       media_y_px=float(rng.uniform(0, 200)),
                       media_width_px=float(rng.uniform(100, 500)),
                       media_height_px=float(rng.uniform(100, 400)))
        trials.append(row)
    trials = pd.DataFrame(trials)
    # at least one trial must meet the recording (none at all is refused as a
    # clock or unit mismatch: a bad-input case, not a property)
    assume(bool(((trials["end"] > t[0]) & (trials["start"] <= t[-1])).any()))

    # AOIs: fixed or moving boxes (moving = one row per listed frame), overlapping freely
    aois = []
    for stim in sorted(set(trials["stimulus"])):
        w, h = STIMULI[stim]["width_px"], STIMULI[stim]["height_px"]
        for name in ["eye", "face", "toy"][: draw(st.integers(0, 3))]:
            frames = [""] if rng.random() < 0.5 else sorted(
                set(rng.integers(0, 300, int(rng.integers(1, 30))).tolist()))
            for f in frames:
                x0, y0 = rng.uniform(-10, w), rng.uniform(-10, h)
                x1, y1 = x0 + rng.uniform(1, w), y0 + rng.uniform(1, h)
                aois.append({"stimulus": stim, "frame": f, "aoi": name,
                             "wkt": f"POLYGON (({x0:.3f} {y0:.3f}, {x1:.3f} {y0:.3f}, "
                                    f"{x1:.3f} {y1:.3f}, {x0:.3f} {y1:.3f}, {x0:.3f} {y0:.3f}))"})
    if not aois:
        aois.append({"stimulus": trials["stimulus"].iat[0], "frame": "", "aoi": "all",
                     "wkt": "POLYGON ((0 0, 40 0, 40 40, 0 40, 0 0))"})
    aois = pd.DataFrame(aois)

    method = draw(st.sampled_from(["ivt", "idt"]))
    study = {
        "display": DISPLAY,
        "samples": {"time": "t", "time_unit": "ms", "x": "gx", "y": "gy"},
        "detection": {"method": method,
                      "min_fixation_ms": draw(st.sampled_from([0.0, 40.0, 100.0])),
                      "max_gap_ms": draw(st.sampled_from([0.0, 75.0, 200.0])),
                      "merge_max_gap_ms": draw(st.sampled_from([0.0, 75.0])),
                      "velocity_window_ms": draw(st.sampled_from([0.0, 20.0]))},
        "aois": {"margin_deg": draw(st.sampled_from([0.0, 1.0])),
                 "position_window_ms": draw(st.sampled_from([0.0, 100.0]))},
        "stimuli": STIMULI,
    }
    return {"samples": samples, "trials": trials, "aois": aois, "study": study}


def _run(session: dict, folder: Path, *, trial_order=None, aoi_order=None) -> dict:
    """Write the session's files (rows in the given order) and convert it."""
    folder.mkdir(parents=True, exist_ok=True)
    paths = {k: folder / f"{k}.csv" for k in ("samples", "trials", "aois")}
    session["samples"].to_csv(paths["samples"], index=False, float_format="%.6f")
    trials = session["trials"] if trial_order is None else session["trials"].iloc[trial_order]
    aois = session["aois"] if aoi_order is None else session["aois"].iloc[aoi_order]
    trials.to_csv(paths["trials"], index=False)
    aois.to_csv(paths["aois"], index=False)
    study = study_from_dict(session["study"])
    return convert(paths["samples"], study=study, trials=paths["trials"], aois=paths["aois"])


# --------------------------------------------------------------------------- properties

@SETTINGS
@given(sessions())
def test_every_sample_is_counted_exactly_once(session):
    with tempfile.TemporaryDirectory() as d:
        out = _run(session, Path(d))
    s = out["manifest"]["samples"]
    assert s["total"] == len(session["samples"])
    assert s["total"] == s["valid"] + s["gap_filled"] + s["lost"]
    assert s["total"] == s["inside_trials"] + s["outside_trials"]
    assert s["in_fixations"] == s["in_fixations_inside_trials"] + s["in_fixations_outside_trials"]
    per_trial = out["manifest"]["trials"]
    assert len(per_trial) == len(session["trials"])
    for tr in per_trial:
        assert tr["samples"] == tr["valid"] + tr["gap_filled"] + tr["lost"]
        assert 0 <= tr["in_fixations"] <= tr["samples"]
    assert sum(tr["samples"] for tr in per_trial) == s["inside_trials"]
    assert s["valid"] == int(session["samples"]["gx"].notna().sum())
    f = out["manifest"]["fixations"]
    assert f["parts_written"] == len(out["fixations"])
    assert f["parts_outside_trials"] == int(out["fixations"]["trial"].isna().sum())


@SETTINGS
@given(sessions())
def test_pct_fixation_sums_to_100_or_is_empty(session):
    with tempfile.TemporaryDirectory() as d:
        out = _run(session, Path(d))
    summary = out["aoi_summary"]
    quality = out["trial_quality"].set_index("trial")
    assert sorted(summary["trial"].unique()) == sorted(session["trials"]["trial"])
    for trial, rows in summary.groupby("trial"):
        pct = rows["pct_fixation"].astype(float)
        total_ms = float(rows["fixation_ms"].sum())
        assert (rows["fixation_ms"] >= 0).all()
        if total_ms > 0:
            assert pct.notna().all()
            assert abs(pct.sum() - 100.0) < 1e-6, (trial, pct.tolist())
        else:
            assert pct.isna().all(), (trial, pct.tolist())
        assert abs(total_ms - float(quality.loc[trial, "fixation_ms"])) < 1e-6
        assert float(rows["pct_trial"].sum()) <= 100.0 + 1e-6


@settings(SETTINGS)
@given(sessions())
def test_fixations_never_overlap_and_lie_inside_the_recording(session):
    with tempfile.TemporaryDirectory() as d:
        out = _run(session, Path(d))
    fix = out["fixations"]
    t = session["samples"]["t"].to_numpy()
    interval = out["manifest"]["detection_used"]["nominal_interval_ms"]
    if len(fix) == 0:
        return
    on = fix["onset_ms"].to_numpy(float)
    off = fix["offset_ms"].to_numpy(float)
    assert (np.diff(on) > 0).all(), "parts are in time order"
    assert (off[:-1] <= on[1:] + 1e-9).all(), "a fixation (part) overlaps the next"
    assert (off > on).all()
    assert np.allclose(fix["duration_ms"].to_numpy(float), off - on)
    eps = 1e-5  # sample times are written with 6 decimals
    assert on.min() >= t[0] - eps
    assert off.max() <= t[-1] + interval + eps
    assert (np.diff(fix["fixation"].to_numpy()) >= 0).all()


@settings(max_examples=30, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow])
@given(sessions(), st.randoms(use_true_random=False))
def test_row_order_of_aois_and_trials_changes_nothing(session, rnd):
    n_tr, n_aoi = len(session["trials"]), len(session["aois"])
    trial_order = list(range(n_tr))
    aoi_order = list(range(n_aoi))
    rnd.shuffle(trial_order)
    rnd.shuffle(aoi_order)
    with tempfile.TemporaryDirectory() as d:
        a = _run(session, Path(d) / "a")
        b = _run(session, Path(d) / "b", trial_order=trial_order, aoi_order=aoi_order)
    for name in ("fixations", "aoi_summary", "trial_quality"):
        pd.testing.assert_frame_equal(a[name], b[name], check_exact=True, obj=name)
    for key in ("samples", "fixations", "trials", "detection_used"):
        assert a["manifest"][key] == b["manifest"][key], key
