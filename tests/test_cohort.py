"""Tests for ``aoi_fix.cohort``: participants and ages, exclusions, session and cohort tables.

The cohort is four small simulated sessions (``aoi_fix.simulate``, the
``infant_60hz_noisy`` style, two 2-s trials each) with known ages.  Two are
built to fail the exclusion rules: ``c2`` loses all gaze in its first trial
(``flag_low_validity`` -> a ``low_validity`` trial exclusion) and ``c3`` in both
trials (both excluded, so the session has no usable trial and is dropped
with ``too_few_trials``).  The session table is checked against a
recomputation from the per-trial tables written here with pandas groupby.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from aoi_fix import simulate
from aoi_fix.batch import batch, combine_sessions, read_combined, session_folder
from aoi_fix.cli import app
from aoi_fix.cohort import (DAYS_PER_MONTH, EXCLUSION_COLUMNS, REASONS,
                            SESSION_SUMMARY_COLUMNS, data_dictionary, exclusion_counts,
                            participant_of_sessions, read_participants, session_summary,
                            trial_exclusions)
from aoi_fix.config import Quality
from aoi_fix.errors import InputFormatError
from aoi_fix.output import read_table
from aoi_fix.pipeline import convert

ROOT = Path(__file__).resolve().parent.parent
IDS = ["c0", "c1", "c2", "c3"]
AGES = {"c0": 300.0, "c1": 365.0, "c2": 512.5, "c3": 700.0}
WHO = {"c0": "p1", "c1": "p2", "c2": "p1", "c3": "p3"}  # p1 seen twice (longitudinal)
runner = CliRunner()


def _err(result) -> str:
    return getattr(result, "stderr", None) or result.output


def _blank_trials(folder: Path, trials: list[str]) -> None:
    """Remove the gaze of every sample inside the given trials (heavy data loss)."""
    s = pd.read_csv(folder / "samples.csv", dtype=str, keep_default_na=False)
    tr = pd.read_csv(folder / "trials.csv", dtype={"trial": str})
    t = s["clock_ms"].astype(float)
    lost = np.zeros(len(s), bool)
    for _, r in tr[tr["trial"].isin(trials)].iterrows():  # a loop over trials
        lost |= (t >= r["start"]).to_numpy() & (t < r["end"]).to_numpy()
    s.loc[lost, ["gaze_h_px", "gaze_v_px"]] = ""
    s.to_csv(folder / "samples.csv", index=False)


@pytest.fixture(scope="module")
def template(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("cohort")
    for i, sid in enumerate(IDS):
        ses = simulate.simulate_session("infant_60hz_noisy", n_trials=2, trial_ms=2000,
                                        seed=10 + i)
        paths = simulate.write_session(ses, root / "sessions" / sid)
        if i == 0:
            shutil.copy(paths["study"], root / "study.toml")
            shutil.copy(paths["aois"], root / "aois.csv")
        paths["study"].unlink()
        paths["aois"].unlink()
    _blank_trials(root / "sessions" / "c2", ["1"])
    _blank_trials(root / "sessions" / "c3", ["1", "2"])
    (root / "sessions.csv").write_text("session,samples,trials,checks\n" + "".join(
        f"{s},sessions/{s}/samples.csv,sessions/{s}/trials.csv,sessions/{s}/checks.csv\n"
        for s in IDS))
    (root / "participants.csv").write_text("participant,session,age_days,group\n" + "".join(
        f"{WHO[s]},{s},{AGES[s]},x\n" for s in IDS))
    return root


@pytest.fixture(scope="module")
def ran(template, tmp_path_factory) -> Path:
    """The template cohort converted once by batch with participants (read-only)."""
    c = tmp_path_factory.mktemp("ran") / "c"
    shutil.copytree(template, c)
    report = batch(c / "sessions.csv", study=c / "study.toml", aois=c / "aois.csv",
                   out_dir=c / "out", participants=c / "participants.csv")
    assert report["status"].tolist() == ["converted"] * 4, report["message"].tolist()
    return c


@pytest.fixture
def cohort(template, tmp_path) -> Path:
    dst = tmp_path / "c"
    shutil.copytree(template, dst)
    return dst


def _batch_cli(c: Path, *extra: str):
    return runner.invoke(app, ["batch", str(c / "sessions.csv"), "--study",
                               str(c / "study.toml"), "--aois", str(c / "aois.csv"),
                               "--out-dir", str(c / "out"), *extra])


# --------------------------------------------------------------------------- the tables

def _recompute(aoi: pd.DataFrame, tq: pd.DataFrame, ex: pd.DataFrame) -> pd.DataFrame:
    """session x AOI figures from the per-trial tables, written independently of cohort.py."""
    dropped_trials = ex[ex["level"] == "trial"][["session", "trial"]].drop_duplicates()
    dropped_sessions = set(ex.loc[ex["level"] == "session", "session"])
    key = aoi[["session", "trial"]].merge(dropped_trials, how="left", indicator=True)
    used = aoi[(key["_merge"] == "left_only").to_numpy()
               & ~aoi["session"].isin(dropped_sessions).to_numpy()].copy()
    used["trial_total"] = used.groupby(["session", "trial"])["fixation_ms"].transform("sum")
    g = used.groupby(["session", "aoi"])
    out = pd.DataFrame({
        "n_trials_used": g["trial"].nunique(),
        "fixation_ms_total": g["fixation_ms"].sum(),
        "pct_fixation_pooled": 100 * g["fixation_ms"].sum() / g["trial_total"].sum(),
        "pct_fixation_mean": g["pct_fixation"].mean(),
    }).reset_index()
    tq_used = tq.merge(dropped_trials, how="left", indicator=True)
    tq_used = tq_used[tq_used["_merge"] == "left_only"]
    q = tq_used.groupby("session").agg(valid_fraction_mean=("valid_fraction", "mean"),
                                       offset_deg_mean=("offset_deg", "mean"))
    n = tq.groupby("session").agg(n_trials_total=("trial", "size"))
    n["n_trials_excluded"] = dropped_trials.groupby("session").size().reindex(
        n.index, fill_value=0)
    return out.merge(q, on="session").merge(n, on="session")


def test_session_summary_equals_a_recomputation_from_the_trial_tables(ran):
    out = ran / "out"
    ss = read_table(out / "cohort_session_summary.csv")
    assert list(ss.columns) == SESSION_SUMMARY_COLUMNS
    aoi = read_combined(out, "aoi_summary")
    tq = read_combined(out, "trial_quality")
    ex = read_table(out / "cohort_exclusions.csv")
    exp = _recompute(aoi, tq, ex)
    got = ss.merge(exp, on=["session", "aoi"], suffixes=("", "_exp"), how="outer",
                   indicator=True)
    assert (got["_merge"] == "both").all(), got[got["_merge"] != "both"]
    for c in ("n_trials_used", "fixation_ms_total", "pct_fixation_pooled",
              "pct_fixation_mean", "valid_fraction_mean", "offset_deg_mean",
              "n_trials_total", "n_trials_excluded"):
        np.testing.assert_allclose(got[c].astype(float), got[f"{c}_exp"].astype(float),
                                   atol=1e-5, err_msg=c)
    # every used session has one row per AOI, and the pooled percentages sum to 100
    assert sorted(ss["session"].unique()) == ["c0", "c1", "c2"]  # c3 dropped
    sums = ss.groupby("session")["pct_fixation_pooled"].sum()
    np.testing.assert_allclose(sums, 100.0, atol=1e-4)
    assert ss["aoi"].iloc[-2:].tolist() == ["(none)", "(off-video)"]
    # the combined dataset holds the same rows as the cohort CSV
    ds = read_combined(out, "session_summary")
    assert len(ds) == len(ss) and sorted(ds["session"].unique()) == ["c0", "c1", "c2"]


def _true(v) -> bool:
    return bool(v) if pd.notna(v) else False


def test_every_excluded_trial_and_session_is_listed_with_its_reason(ran):
    out = ran / "out"
    ex = read_table(out / "cohort_exclusions.csv")
    assert list(ex.columns) == EXCLUSION_COLUMNS
    tq = read_combined(out, "trial_quality")
    q = Quality()
    expected = []
    for _, r in tq.iterrows():  # a loop over the cohort's trials
        if _true(r["flag_low_validity"]):
            expected.append((r["session"], r["trial"], "low_validity", r["valid_fraction"],
                             q.min_valid_fraction))
        if _true(r["flag_drift"]):
            expected.append((r["session"], r["trial"], "drift", r["offset_deg"],
                             q.max_offset_deg))
    trials = ex[ex["level"] == "trial"]
    got = list(zip(trials["session"], trials["trial"], trials["reason"], trials["value"],
                   trials["limit"]))
    assert len(got) == len(expected)
    for g, e in zip(sorted(got), sorted(expected)):
        assert g[:3] == e[:3]
        assert g[3] == pytest.approx(e[3], abs=1e-6) and g[4] == pytest.approx(e[4])
    # the sessions built to fail
    assert ("c2", "1", "low_validity") in {g[:3] for g in got}
    assert {("c3", "1", "low_validity"), ("c3", "2", "low_validity")} <= {g[:3] for g in got}
    sess = ex[ex["level"] == "session"]
    assert sess[["session", "reason", "value", "limit"]].values.tolist() == \
        [["c3", "too_few_trials", 0.0, 1.0]]
    assert sess["trial"].isna().all()
    # ... and the counts add up: trials = used + excluded, for every session
    counts = exclusion_counts(tq, ex)
    assert counts.sum(axis=1).to_dict() == tq.groupby("session").size().to_dict()
    assert counts.loc["c3", "used"] == 0


def test_ages_and_participants_reach_every_table(ran):
    out = ran / "out"
    for table in ("aoi_summary", "trial_quality", "fixations", "check_quality",
                  "session_summary", "exclusions"):
        df = read_combined(out, table)
        assert {"participant", "age_days", "age_months"} <= set(df.columns), table
        for sid, part in df.groupby("session"):
            assert set(part["participant"]) == {WHO[sid]}, table
            np.testing.assert_allclose(part["age_days"], AGES[sid])
            np.testing.assert_allclose(part["age_months"], AGES[sid] / 30.4375)
    csv = read_table(session_folder(out, "c1") / "aoi_summary.csv")
    assert list(csv.columns[:3]) == ["participant", "age_days", "age_months"]
    manifest = json.loads((session_folder(out, "c2") / "manifest.json").read_text())
    assert manifest["participant"]["age_days"] == AGES["c2"]
    assert manifest["exclusions"]["trials_excluded"] >= 1


def test_ages_from_dates(tmp_path):
    (tmp_path / "p.csv").write_text(
        "participant,session,birth_date,session_date\n"
        "p1,a,2023-01-31,2024-02-29\n"   # across a leap day: 394 days
        "p1,b,2023-01-31,2023-01-31\n"   # the birth day itself: 0
        "p2,c,,\n")                      # unknown age
    p = read_participants(tmp_path / "p.csv")
    assert p["age_days"].iloc[:2].tolist() == [394.0, 0.0] and np.isnan(p["age_days"].iat[2])
    info = participant_of_sessions(p, ["a", "c"])
    assert info["a"] == {"participant": "p1", "age_days": 394.0, "line": 2}
    assert info["c"]["age_days"] is None
    assert DAYS_PER_MONTH == 365.25 / 12


def test_convert_with_participants_from_dates(template, tmp_path):
    s = template / "sessions" / "c1"
    (tmp_path / "p.csv").write_text("participant,session,birth_date,session_date\n"
                                    "kid,c1,2023-03-01,2024-03-01\n")  # 366 days
    out = tmp_path / "session=c1"
    r = runner.invoke(app, ["convert", str(s / "samples.csv"), "--study",
                            str(template / "study.toml"), "--trials", str(s / "trials.csv"),
                            "--aois", str(template / "aois.csv"), "--checks",
                            str(s / "checks.csv"), "--out-dir", str(out), "--participants",
                            str(tmp_path / "p.csv")])  # session id from the folder name
    assert r.exit_code == 0, r.output
    names = sorted(p.name for p in out.iterdir())
    assert names == ["aoi_summary.csv", "check_quality.csv", "exclusions.csv",
                     "fixations.csv", "manifest.json", "session_summary.csv",
                     "trial_quality.csv"]
    ss = read_table(out / "session_summary.csv")
    assert set(ss["participant"]) == {"kid"} and set(ss["session"]) == {"c1"}
    assert ss["age_days"].eq(366.0).all()
    np.testing.assert_allclose(ss["age_months"], 366.0 / 30.4375, atol=1e-6)  # CSV: 6 dp
    # without a session id to find the row: a usage error
    r = runner.invoke(app, ["convert", str(s / "samples.csv"), "--study",
                            str(template / "study.toml"), "--trials", str(s / "trials.csv"),
                            "--aois", str(template / "aois.csv"), "--out-dir",
                            str(tmp_path / "other"), "--participants", str(tmp_path / "p.csv")])
    assert r.exit_code == 2 and "--session" in _err(r)
    assert not (tmp_path / "other").exists()


def test_batch_session_folders_match_convert(ran):
    out = ran / "out"
    s = ran / "sessions" / "c2"
    ref = convert(s / "samples.csv", study=ran / "study.toml", trials=s / "trials.csv",
                  aois=ran / "aois.csv", checks=s / "checks.csv", out_dir=ran / "ref",
                  participants=ran / "participants.csv", session="c2")
    got = session_folder(out, "c2")
    for name in ("fixations", "aoi_summary", "trial_quality", "check_quality",
                 "session_summary", "exclusions"):
        assert (got / f"{name}.csv").read_bytes() == (ran / "ref" / f"{name}.csv") \
            .read_bytes(), name
    m = json.loads((got / "manifest.json").read_text())
    m.pop("batch")
    assert m == json.loads((ran / "ref" / "manifest.json").read_text())
    assert ref["exclusions"]["reason"].tolist() == ["low_validity"]


# --------------------------------------------------------------------------- rules

def test_rules_from_the_command_line(cohort):
    """min_trial_fixation_ms splits trials; exclude_low_validity=false keeps c2's lost trial."""
    first = batch(cohort / "sessions.csv", study=cohort / "study.toml",
                  aois=cohort / "aois.csv", out_dir=cohort / "base",
                  participants=cohort / "participants.csv")
    assert (first["status"] == "converted").all()
    tq = read_combined(cohort / "base", "trial_quality")
    fix = tq.loc[tq["session"] != "c3", "fixation_ms"].sort_values().to_numpy()
    limit = float(fix[len(fix) // 2 - 1] + fix[len(fix) // 2]) / 2  # a median cut
    r = _batch_cli(cohort, "--participants", str(cohort / "participants.csv"),
                   "--set", f"quality.min_trial_fixation_ms={limit}",
                   "--set", "quality.exclude_low_validity=false",
                   "--set", "quality.exclude_drift=false",
                   "--set", "quality.min_session_trials=2")
    assert r.exit_code == 0, r.output
    ex = read_table(cohort / "out" / "cohort_exclusions.csv")
    assert "low_validity" not in set(ex["reason"]) and "drift" not in set(ex["reason"])
    short = tq[tq["fixation_ms"] < limit]
    rows = ex[ex["reason"] == "little_fixation"]
    assert sorted(zip(rows["session"], rows["trial"])) == \
        sorted(zip(short["session"], short["trial"]))
    np.testing.assert_allclose(rows["limit"], limit)
    assert (rows["value"] < limit).all()
    # a session keeps both trials only if neither is short; others go as too_few_trials
    n_short = short.groupby("session").size().reindex(IDS, fill_value=0)
    dropped = sorted(ex.loc[ex["level"] == "session", "session"])
    assert dropped == sorted(n_short[n_short > 0].index)
    ss = read_table(cohort / "out" / "cohort_session_summary.csv")
    assert sorted(ss["session"].unique()) == sorted(n_short[n_short == 0].index)
    assert (ss["n_trials_used"] == 2).all()


def test_hand_trace_pooled_versus_mean():
    """Two trials: 1000 ms with 900 on 'face'; 100 ms with 0 on 'face'.

    pooled = 100 * 900 / 1100 = 81.818...; mean = (90 + 0) / 2 = 45; a third
    trial without fixation time counts as used but not in the mean.
    """
    aoi = pd.DataFrame({
        "trial": ["1", "1", "1", "2", "2", "2", "3", "3", "3"],
        "stimulus": "v", "aoi": ["face", "(none)", "(off-video)"] * 3,
        "fixation_ms": [900.0, 100.0, 0.0, 0.0, 50.0, 50.0, 0.0, 0.0, 0.0],
        "pct_fixation": [90.0, 10.0, 0.0, 0.0, 50.0, 50.0, np.nan, np.nan, np.nan]})
    tq = pd.DataFrame({"trial": ["1", "2", "3"], "valid_fraction": [0.9, 0.8, 0.1],
                       "fixation_ms": [1000.0, 100.0, 0.0],
                       "flag_low_validity": [False, False, True],
                       "offset_deg": [1.0, np.nan, 0.2],
                       "flag_drift": pd.array([False, pd.NA, False], dtype="boolean")})
    s, ex = session_summary(aoi, tq, quality=Quality(exclude_low_validity=False),
                            session="s", participant="p", age_days=30.4375)
    face = s.set_index("aoi").loc["face"]
    assert face["pct_fixation_pooled"] == pytest.approx(100 * 900 / 1100)
    assert face["pct_fixation_mean"] == pytest.approx(45.0)
    assert face["n_trials_used"] == 3 and face["n_trials_with_fixation"] == 2
    assert face["age_months"] == 1.0 and face["offset_deg_mean"] == pytest.approx(0.6)
    assert len(ex) == 0
    # with the default rules trial 3 goes (low validity), and min_session_trials=3 the session
    s, ex = session_summary(aoi, tq, quality=Quality(min_session_trials=3), session="s")
    assert len(s) == 0 and list(s.columns) == SESSION_SUMMARY_COLUMNS
    assert ex[["trial", "level", "reason", "value", "limit"]].astype(object) \
        .where(ex.notna(), None).values.tolist() == [
        ["3", "trial", "low_validity", 0.1, 0.5], [None, "session", "too_few_trials", 2.0, 3.0]]
    # one trial breaking two rules has two rows, in rule order
    tx = trial_exclusions(tq.assign(flag_drift=[False, False, True]),
                          quality=Quality(min_trial_fixation_ms=50))
    assert tx[["trial", "reason"]].values.tolist() == [
        ["3", "low_validity"], ["3", "drift"], ["3", "little_fixation"]]


# --------------------------------------------------------------------------- BIDS

def test_bids_participants_tsv(template, tmp_path):
    bids = tmp_path / "bids"
    bids.mkdir()
    (bids / "participants.tsv").write_text("participant_id\tage\tsex\n"
                                           "sub-01\t1.5\tn/a\nsub-02\tn/a\tn/a\n")
    p = read_participants(bids / "participants.tsv")
    assert p.attrs["bids"] and p["session"].isna().all()
    info = participant_of_sessions(p, ["sub-01", "sub-01_ses-2", "sub-02"])
    assert info["sub-01"]["age_days"] == pytest.approx(1.5 * 365.25)  # years, BIDS
    assert info["sub-01_ses-2"]["participant"] == "sub-01"
    assert info["sub-02"]["age_days"] is None
    # a sessions.tsv gives the age of each session
    (bids / "sub-01").mkdir()
    (bids / "sub-01" / "sub-01_sessions.tsv").write_text("session_id\tage\n"
                                                         "ses-1\t1.0\nses-2\t2.0\n")
    info = participant_of_sessions(p, ["sub-01_ses-2", "sub-01"])
    assert info["sub-01_ses-2"]["age_days"] == pytest.approx(2 * 365.25)
    assert info["sub-01"]["age_days"] == pytest.approx(1.5 * 365.25)
    with pytest.raises(InputFormatError, match="sub-<label>"):
        participant_of_sessions(p, ["s01"])
    with pytest.raises(InputFormatError, match="no row for session 'sub-03'"):
        participant_of_sessions(p, ["sub-03"])
    # ages in months, declared in participants.json
    (bids / "participants.json").write_text('{"age": {"Units": "months"}}')
    assert read_participants(bids / "participants.tsv")["age_days"].iat[0] == \
        pytest.approx(1.5 * 30.4375)
    # through convert, as a user would
    s = template / "sessions" / "c0"
    r = runner.invoke(app, ["convert", str(s / "samples.csv"), "--study",
                            str(template / "study.toml"), "--trials", str(s / "trials.csv"),
                            "--aois", str(template / "aois.csv"), "--out-dir",
                            str(tmp_path / "out"), "--participants",
                            str(bids / "participants.tsv"), "--session", "sub-01_ses-1"])
    assert r.exit_code == 0, r.output
    ss = read_table(tmp_path / "out" / "session_summary.csv")
    assert set(ss["participant"]) == {"sub-01"} and set(ss["session"]) == {"sub-01_ses-1"}
    np.testing.assert_allclose(ss["age_days"], 1.0 * 365.25)  # from sessions.tsv, in years


# --------------------------------------------------------------------------- bad files

@pytest.mark.parametrize("text,match", [
    ("", r"p\.csv: the file is empty"),
    ("who,session,age_days\na,b,1\n", r"p\.csv: line 1: column 'participant'"),
    ("participant,age_days\na,1\n", r"p\.csv: line 1: column 'session' is missing"),
    ("participant,session,age\na,b,1\n", r"p\.csv: line 1: no age columns"),
    ("participant,session,age_days\na,b,1\n,c,2\n", r"p\.csv: line 3, column 'participant'"),
    ("participant,session,age_days\na,b,1\nc,,2\n", r"p\.csv: line 3, column 'session'"),
    ("participant,session,age_days\na,b,x\n", r"p\.csv: line 2, column 'age_days': found 'x'"),
    ("participant,session,age_days\na,b,-3\n", r"line 2, column 'age_days': found '-3'"),
    ("participant,session,age_days\na,b,1\na,b,2\n",
     r"line 3, column 'session': 'b' is already used on line 2"),
    ("participant,session,age_days\n\na,b,1,9\n", r"p\.csv: line 3: found 4 fields"),
    ("participant,session,birth_date,session_date\na,b,2024-13-01,2025-01-01\n",
     r"line 2, column 'birth_date': found '2024-13-01', expected an ISO date"),
    ("participant,session,birth_date,session_date\na,b,2024-01-01,01/02/2025\n",
     r"line 2, column 'session_date'"),
    ("participant,session,birth_date,session_date\na,b,2024-01-02,2024-01-01\n",
     r"line 2, column 'session_date': found '2024-01-01', expected a date on or after"),
    ("participant,session,birth_date,session_date\na,b,2024-01-02,\n",
     r"line 2, column 'session_date'.*both"),
    ("participant_id\tage\n01\t1\n", r"line 2, column 'participant_id': found '01'"),
    ("participant_id\tage\nsub-01\t1\nsub-01\t2\n", r"line 3, column 'participant_id'"),
])
def test_bad_participants_files(tmp_path, text, match):
    (tmp_path / "p.csv").write_text(text)
    with pytest.raises(InputFormatError, match=match):
        read_participants(tmp_path / "p.csv")


def test_bad_participants_file_is_one_line_and_exit_1(cohort):
    (cohort / "participants.csv").write_text("participant,session,age_days\n"
                                             "p1,c0,12\np2,c1,abc\n")
    r = _batch_cli(cohort, "--participants", str(cohort / "participants.csv"))
    assert r.exit_code == 1
    msg = _err(r).strip().splitlines()
    assert len(msg) == 1 and "participants.csv: line 3, column 'age_days'" in msg[0]
    assert not (cohort / "out").exists()  # nothing done
    # a session of the session table without a participant row
    (cohort / "participants.csv").write_text("participant,session,age_days\np1,c0,12\n")
    r = _batch_cli(cohort, "--participants", str(cohort / "participants.csv"))
    assert r.exit_code == 1 and "no row for session 'c1'" in _err(r)
    r = _batch_cli(cohort, "--participants", str(cohort / "missing.csv"))
    assert r.exit_code == 1 and "participants table not found" in _err(r)
    r = _batch_cli(cohort, "--plots")
    assert r.exit_code == 2 and "--participants" in _err(r)


# --------------------------------------------------------------------------- batch behaviour

def test_second_run_rewrites_nothing_and_a_changed_age_converts_one_session(cohort):
    args = ("--participants", str(cohort / "participants.csv"))
    assert _batch_cli(cohort, *args).exit_code == 0
    out = cohort / "out"
    before = {p: p.stat().st_mtime_ns for p in out.rglob("*") if p.is_file()
              and p.name not in ("batch_report.csv", "_sessions.csv")}
    r = _batch_cli(cohort, *args)
    assert r.exit_code == 0 and "0 converted, 4 skipped" in _err(r)
    assert {p: p.stat().st_mtime_ns for p in before} == before
    text = (cohort / "participants.csv").read_text().replace("p2,c1,365.0", "p2,c1,366.0")
    (cohort / "participants.csv").write_text(text)
    report = batch(cohort / "sessions.csv", study=cohort / "study.toml",
                   aois=cohort / "aois.csv", out_dir=out,
                   participants=cohort / "participants.csv")
    assert report["status"].tolist() == ["skipped", "converted", "skipped", "skipped"]
    ss = read_table(out / "cohort_session_summary.csv")
    assert ss.loc[ss["session"] == "c1", "age_days"].eq(366.0).all()
    # a failed session leaves the cohort tables but is listed as a failed exclusion
    (cohort / "sessions" / "c0" / "samples.csv").write_text("clock_ms,gaze_h_px\n1,2\n")
    r = _batch_cli(cohort, *args)
    assert r.exit_code == 1
    ex = read_table(out / "cohort_exclusions.csv")
    row = ex[ex["session"] == "c0"]
    assert row[["participant", "level", "reason"]].values.tolist() == [["p1", "session",
                                                                        "failed"]]
    assert "c0" not in set(read_table(out / "cohort_session_summary.csv")["session"])
    # without participants the session folders go back to the plain tables
    report = batch(cohort / "sessions.csv", study=cohort / "study.toml",
                   aois=cohort / "aois.csv", out_dir=out)
    assert not (out / "cohort_session_summary.csv").exists()
    assert not (session_folder(out, "c1") / "session_summary.csv").exists()
    assert not (out / "dataset" / "session_summary").exists() or not any(
        (out / "dataset" / "session_summary").glob("session=*"))


def test_combine_sessions_builds_the_cohort_files_too(ran, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(ran / "out", out)
    shutil.rmtree(out / "dataset")
    (out / "cohort_session_summary.csv").unlink()
    combine_sessions(out)
    assert (out / "cohort_session_summary.csv").read_bytes() == \
        (ran / "out" / "cohort_session_summary.csv").read_bytes()


def test_qc_figure(cohort):
    pytest.importorskip("matplotlib")
    r = _batch_cli(cohort, "--participants", str(cohort / "participants.csv"), "--plots")
    assert r.exit_code == 0, r.output
    png = cohort / "out" / "qc_exclusions.png"
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


# --------------------------------------------------------------------------- dictionary

def test_data_dictionary_covers_every_column_and_matches_docs(ran):
    d = data_dictionary()
    out = ran / "out"
    for table in ("session_summary", "exclusions", "aoi_summary", "trial_quality",
                  "fixations", "check_quality"):
        cols = read_combined(out, table).columns
        missing = [c for c in cols if c not in d[table]]
        assert not missing, (table, missing)
        for c, entry in d[table].items():
            assert entry["Description"], (table, c)
        sidecar = json.loads((out / f"{table}.json").read_text())
        assert sidecar == d[table]
        shipped = ROOT / "docs" / "dictionary" / f"{table}.json"
        assert json.loads(shipped.read_text()) == d[table], \
            f"{shipped} is out of date: run aoi_fix.cohort.write_dictionary('docs/dictionary')"
    assert set(d["exclusions"]["reason"]["Levels"]) == set(REASONS)
    assert d["session_summary"]["age_months"]["Units"] == "months"


def test_cohort_doc_names_every_column_reason_and_key():
    text = (ROOT / "docs" / "cohort.md").read_text()
    for word in [*SESSION_SUMMARY_COLUMNS, *EXCLUSION_COLUMNS, *REASONS,
                 "exclude_low_validity", "exclude_drift", "min_trial_fixation_ms",
                 "min_session_trials", "30.4375", "365.25", "--participants"]:
        assert word in text, word
