"""Pursuit events in convert: the event_type column and what counts as looking time."""

from __future__ import annotations

import numpy as np
import pytest

from aoi_fix import simulate
from aoi_fix.errors import AoiFixError
from aoi_fix.pipeline import convert


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    # invented storyteller session with pursuit segments (our simulator)
    ses = simulate.simulate_session("lab_300hz_seconds", n_trials=2, seed=4,
                                    pursuit_fraction=0.3)
    return simulate.write_session(ses, tmp_path_factory.mktemp("looking"))


def _run(files, *sets):
    return convert(files["samples"], study=files["study"], trials=files["trials"],
                   aois=files["aois"], overrides=list(sets))


def test_default_method_keeps_the_documented_columns(files):
    out = _run(files)
    assert out["fixations"].columns.tolist() == [
        "trial", "fixation", "onset_ms", "offset_ms", "duration_ms", "x_px", "y_px", "aoi"]
    assert "looking_events" not in out["aoi_summary"].columns


def test_pursuit_method_reports_event_types_and_counts_fixations_only(files):
    out = _run(files, "detection.method=ivt_pursuit")
    fx = out["fixations"]
    assert set(fx["event_type"].unique()) == {"fixation", "pursuit"}
    summary = out["aoi_summary"]
    assert (summary["looking_events"] == "fixation").all()
    # counted time per trial equals the fixation events' time inside the trial
    inside = fx[fx["trial"].notna() & (fx["event_type"] == "fixation")]
    per_trial = inside.groupby("trial")["duration_ms"].sum()
    counted = summary.groupby("trial")["fixation_ms"].sum()
    for trial, ms in per_trial.items():
        assert counted[trial] == pytest.approx(ms, abs=1e-6)


def test_looking_time_adds_pursuit(files):
    only_fix = _run(files, "detection.method=ivt_pursuit")
    both = _run(files, "detection.method=ivt_pursuit", "aois.looking_events=fixation+pursuit")
    a = only_fix["aoi_summary"].groupby("trial")["fixation_ms"].sum()
    b = both["aoi_summary"].groupby("trial")["fixation_ms"].sum()
    fx = both["fixations"]
    pursuit_ms = fx[fx["trial"].notna() & (fx["event_type"] == "pursuit")] \
        .groupby("trial")["duration_ms"].sum()
    for trial in a.index:
        assert b[trial] == pytest.approx(a[trial] + pursuit_ms.get(trial, 0.0), abs=1e-6)
    # percentages still sum to 100 per trial
    sums = both["aoi_summary"].groupby("trial")["pct_fixation"].sum()
    assert np.allclose(sums, 100.0)


def test_min_pursuit_must_exceed_merge_gap(files):
    # a value given with --set is a usage error, the same value in the file a ConfigError
    with pytest.raises(AoiFixError, match="min_pursuit_ms"):
        _run(files, "detection.method=ivt_pursuit", "detection.min_pursuit_ms=50")
