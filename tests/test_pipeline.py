"""End-to-end tests of ``convert`` on small simulated sessions.

Sessions come from :mod:`aoi_fix.simulate` (3 trials of 8 s or fewer) and are
written to temporary folders in their raw tracker layouts.  The ground-truth
figures below are the project's acceptance figures, measured the way
``benchmarks/agreement.py`` measures them; their thresholds (kappa >= 0.80,
event F1 >= 0.85, pct_fixation within 3 points for >= 95 % of cells, valid
fraction within 0.02, offset within 0.5 deg) come from the project issue, not
from a paper.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from aoi_fix import simulate
from aoi_fix.cli import app
from aoi_fix.config import study_from_dict
from aoi_fix.errors import AoiFixError, InputFormatError
from aoi_fix.evaluate import cohen_kappa, event_f1, fixation_mask
from aoi_fix.output import read_table
from aoi_fix.pipeline import FIXATION_OUTPUT_COLUMNS, convert

RESERVED = ["(none)", "(off-video)"]
AOI_SUMMARY_COLUMNS = ["trial", "stimulus", "aoi", "fixation_ms", "pct_fixation", "pct_trial",
                       "n_fixations", "first_fixation_ms"]
TRIAL_QUALITY_COLUMNS = ["trial", "stimulus", "duration_ms", "n_samples", "valid_fraction",
                         "fixation_ms", "flag_low_validity", "offset_deg", "accuracy_deg",
                         "precision_rms_deg", "flag_drift"]
CHECK_QUALITY_COLUMNS = ["check", "onset_ms", "offset_ms", "target_x_px", "target_y_px",
                         "n_samples", "data_loss", "fixation", "gaze_x_px", "gaze_y_px",
                         "accuracy_deg", "offset_x_deg", "offset_y_deg", "precision_rms_deg",
                         "precision_std_deg", "status"]
TABLES = ("fixations", "aoi_summary", "trial_quality", "check_quality")


def _run(paths, out_dir=None, fmt="csv", overrides=(), checks=True, **kw):
    return convert(kw.get("samples", paths["samples"]), study=paths["study"],
                   trials=kw.get("trials", paths["trials"]), aois=kw.get("aois", paths["aois"]),
                   checks=paths["checks"] if checks else None, out_dir=out_dir, fmt=fmt,
                   overrides=overrides)


def _simulated(tmp_path_factory, style, n_trials, seed, overrides=(), name=None):
    ses = simulate.simulate_session(style, n_trials=n_trials, seed=seed)
    folder = tmp_path_factory.mktemp(name or style)
    paths = simulate.write_session(ses, folder / "inputs")
    out = _run(paths, out_dir=folder / "out", overrides=overrides)
    return {"ses": ses, "paths": paths, "out": out, "out_dir": folder / "out",
            "study": study_from_dict(ses.study, overrides=overrides)}


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    return _simulated(tmp_path_factory, "lab_300hz_seconds", 3, 0)


@pytest.fixture(scope="module")
def gzip500(tmp_path_factory):
    return _simulated(tmp_path_factory, "gzip_500hz_semicolon_comma_us", 3, 0)


@pytest.fixture(scope="module")
def drift_corrected(tmp_path_factory):
    return _simulated(tmp_path_factory, "drifting_250hz", 3, 0,
                      overrides=["quality.correct_offset=true"])


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    """A 2-trial session for the invariance tests."""
    ses = simulate.simulate_session("lab_300hz_seconds", n_trials=2, seed=1)
    folder = tmp_path_factory.mktemp("small")
    paths = simulate.write_session(ses, folder)
    return {"ses": ses, "paths": paths, "out": _run(paths)}


@pytest.fixture(params=["lab", "gzip500"])
def run(request):
    return request.getfixturevalue(request.param)


# --------------------------------------------------------------------------- outputs

def test_output_files_and_columns(lab):
    out_dir = lab["out_dir"]
    names = sorted(p.name for p in out_dir.iterdir())
    assert names == sorted(["fixations.csv", "aoi_summary.csv", "trial_quality.csv",
                            "check_quality.csv", "manifest.json"])
    header = {n: (out_dir / f"{n}.csv").read_text().splitlines()[0].split(",") for n in TABLES}
    assert header["fixations"] == FIXATION_OUTPUT_COLUMNS
    assert header["aoi_summary"] == AOI_SUMMARY_COLUMNS
    assert header["trial_quality"] == TRIAL_QUALITY_COLUMNS
    assert header["check_quality"] == CHECK_QUALITY_COLUMNS
    man = json.loads((out_dir / "manifest.json").read_text())
    for key in ("tool", "version", "notice", "inputs", "parameters", "detection_used",
                "offset_correction", "samples", "fixations", "trials"):
        assert key in man
    assert set(man["inputs"]) == {"samples", "trials", "aois", "checks"}
    # the in-memory tables are what was written (CSV keeps 6 decimals)
    for n in TABLES:
        got = read_table(out_dir / f"{n}.csv")
        assert len(got) == len(lab["out"][n]) > 0
        num = [c for c in got.columns if pd.api.types.is_float_dtype(got[c])]
        np.testing.assert_allclose(got[num].to_numpy(float),
                                   lab["out"][n][num].to_numpy(float), atol=1e-6)


def test_read_table_keeps_trial_ids_as_text(lab):
    got = read_table(lab["out_dir"] / "fixations.csv")["trial"].dropna()
    assert sorted(set(got.tolist())) == sorted(set(lab["out"]["fixations"]["trial"].dropna()))


def test_without_checks_no_check_table(small, tmp_path):
    out = _run(small["paths"], out_dir=tmp_path, checks=False)
    assert "check_quality" not in out
    assert not (tmp_path / "check_quality.csv").exists()
    tq = out["trial_quality"]
    assert tq["offset_deg"].isna().all() and tq["flag_drift"].isna().all()
    assert out["manifest"]["offset_correction"]["applied"] is False


def test_parquet_equals_csv(lab, tmp_path):
    _run(lab["paths"], out_dir=tmp_path, fmt="parquet")
    names = sorted(p.name for p in tmp_path.iterdir())
    assert names == sorted([f"{n}.parquet" for n in TABLES] + ["manifest.json"])
    for n in TABLES:
        pq = pd.read_parquet(tmp_path / f"{n}.parquet")
        csv = read_table(lab["out_dir"] / f"{n}.csv")
        # the same CSV as text, to compare ids and labels without type guessing
        text = pd.read_csv(lab["out_dir"] / f"{n}.csv", dtype=str, keep_default_na=False)
        assert list(pq.columns) == list(csv.columns)
        assert len(pq) == len(csv)
        for c in pq.columns:
            a, b = pq[c], csv[c]
            if pd.api.types.is_float_dtype(a):
                np.testing.assert_allclose(a.to_numpy(float), b.to_numpy(float), atol=1e-6)
            else:
                got = ["" if pd.isna(v) else str(v) for v in a.astype(object)]
                assert got == text[c].tolist(), (n, c)
    fx = pd.read_parquet(tmp_path / "fixations.parquet")
    s = pd.read_parquet(tmp_path / "aoi_summary.parquet")
    tq = pd.read_parquet(tmp_path / "trial_quality.parquet")
    cq = pd.read_parquet(tmp_path / "check_quality.parquet")
    assert isinstance(s["aoi"].dtype, pd.CategoricalDtype)
    assert isinstance(s["stimulus"].dtype, pd.CategoricalDtype)
    assert isinstance(fx["aoi"].dtype, pd.CategoricalDtype)
    assert fx["aoi"].isna().any()  # missing AOIs stay missing, not the text "nan"
    assert pd.api.types.is_integer_dtype(fx["fixation"])
    assert pd.api.types.is_integer_dtype(s["n_fixations"])
    assert pd.api.types.is_bool_dtype(tq["flag_low_validity"])
    assert str(tq["flag_drift"].dtype) == "boolean"  # nullable: empty without checks
    assert str(cq["fixation"].dtype) == "Int64"      # nullable: empty without a fixation


def test_failed_run_writes_nothing_bad_aoi(small, tmp_path):
    bad = tmp_path / "bad_aois.csv"
    lines = small["paths"]["aois"].read_text().splitlines()
    cells = lines[5].split(",", 3)
    lines[5] = ",".join(cells[:3] + ['"POLYGON ((0 0, 10 0, oops))"'])
    bad.write_text("\n".join(lines) + "\n")
    out_dir = tmp_path / "out"
    with pytest.raises(InputFormatError) as e:
        _run(small["paths"], out_dir=out_dir, aois=bad)
    assert str(bad) in str(e.value)
    assert not out_dir.exists() or list(out_dir.iterdir()) == []


@pytest.mark.parametrize("threads", ["1", "2"])
def test_error_order_when_several_inputs_are_bad(small, tmp_path, monkeypatch, threads):
    # trials and AOIs are read on a side thread during the samples parse; the
    # error reported must still be the first in reading order: samples, then
    # trials, then AOIs (one message per run, the one a user fixes first);
    # with one thread the side work runs inline and must report the same
    monkeypatch.setenv("AOI_FIX_THREADS", threads)
    bad_samples = tmp_path / "samples.csv"
    bad_samples.write_text("no,such,columns\n1,2,3\n")
    bad_trials = tmp_path / "trials.csv"
    bad_trials.write_text("nothing useful\n")
    bad_aois = tmp_path / "aois.csv"
    bad_aois.write_text("nothing useful\n")
    for kw, culprit in [(dict(samples=bad_samples, trials=bad_trials, aois=bad_aois),
                         bad_samples),
                        (dict(trials=bad_trials, aois=bad_aois), bad_trials),
                        (dict(aois=bad_aois), bad_aois)]:
        with pytest.raises(AoiFixError) as e:
            _run(small["paths"], out_dir=tmp_path / "out", **kw)
        assert str(e.value).startswith(str(culprit)), (culprit, str(e.value))
        assert not (tmp_path / "out").exists()


def test_failed_write_publishes_nothing(small, tmp_path):
    # trial_quality cannot be written (a folder has its name) after fixations and
    # aoi_summary were: none of them may appear, and no temporary file stays
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    (out_dir / "trial_quality.csv").mkdir()
    with pytest.raises(AoiFixError):
        _run(small["paths"], out_dir=out_dir)
    assert [p.name for p in out_dir.iterdir()] == ["trial_quality.csv"]
    assert list((out_dir / "trial_quality.csv").iterdir()) == []


# --------------------------------------------------------------------------- accounting

def test_manifest_accounting(run):
    ses, man = run["ses"], run["out"]["manifest"]
    s = man["samples"]
    n_raw = len(ses.raw)
    assert s["total"] == n_raw
    assert s["total"] == s["valid"] + s["gap_filled"] + s["lost"]
    assert s["total"] == s["inside_trials"] + s["outside_trials"]
    assert s["in_fixations"] == s["in_fixations_inside_trials"] + s["in_fixations_outside_trials"]
    # the rows of the raw file that are valid, counted independently from the simulator
    assert s["valid"] == int(ses.samples["valid"].sum())
    # inside trials, counted from the simulator's own trial labels
    assert s["inside_trials"] == int((ses.truth_samples["trial"] > 0).sum())
    per = man["trials"]
    assert [p["trial"] for p in per] == [str(t) for t in ses.trials["trial"]]
    assert sum(p["samples"] for p in per) == s["inside_trials"]
    for p in per:
        assert p["samples"] == p["valid"] + p["gap_filled"] + p["lost"]
    assert sum(p["in_fixations"] for p in per) == s["in_fixations_inside_trials"]
    f = man["fixations"]
    fx = run["out"]["fixations"]
    assert f["parts_written"] == len(fx)
    assert f["parts_outside_trials"] == int(fx["trial"].isna().sum())
    assert f["detected"] == fx["fixation"].nunique()
    # n_samples per trial agrees with the manifest
    assert run["out"]["trial_quality"]["n_samples"].tolist() == [p["samples"] for p in per]


# --------------------------------------------------------------------------- aoi_summary

def test_pct_fixation_sums_to_100_and_ms_match(run):
    s = run["out"]["aoi_summary"]
    tq = run["out"]["trial_quality"].set_index("trial")
    for trial, g in s.groupby("trial", sort=False):
        if g["fixation_ms"].sum() > 0:
            assert g["pct_fixation"].sum() == pytest.approx(100.0)
        else:
            assert g["pct_fixation"].isna().all()
        assert g["fixation_ms"].sum() == pytest.approx(tq.loc[trial, "fixation_ms"])
        dur = tq.loc[trial, "duration_ms"]
        assert g["pct_trial"].sum() == pytest.approx(100.0 * g["fixation_ms"].sum() / dur)
        assert g["pct_trial"].sum() <= 100.0 + 1e-9


def test_aoi_summary_rows_per_trial(run):
    s = run["out"]["aoi_summary"]
    aois = run["ses"].aois
    trials = run["ses"].trials
    for trial, stim in zip(trials["trial"].astype(str), trials["stimulus"]):
        g = s[s["trial"].astype(str) == trial]
        names = set(aois.loc[aois["stimulus"] == stim, "aoi"])
        assert len(g) == len(names) + 2
        assert set(g["aoi"].iloc[:-2]) == names
        assert g["aoi"].iloc[-2:].tolist() == RESERVED
        assert (g["stimulus"] == stim).all()
    assert len(s) == sum(len(set(aois.loc[aois["stimulus"] == st, "aoi"])) + 2
                         for st in trials["stimulus"])


def test_n_fixations_and_first_fixation_agree_with_fixations_table(run):
    s = run["out"]["aoi_summary"]
    fx = run["out"]["fixations"]
    tq = _trial_windows_ms(run["ses"])
    for (trial, aoi), g in s.groupby(["trial", "aoi"], sort=False):
        if aoi in RESERVED:
            continue
        parts = fx[(fx["trial"] == str(trial)) & (fx["aoi"] == aoi)]
        assert g["n_fixations"].iat[0] == len(parts)
        if len(parts):
            assert g["first_fixation_ms"].iat[0] == pytest.approx(
                parts["onset_ms"].min() - tq.loc[str(trial), "start_ms"], abs=1e-6)
            assert g["first_fixation_ms"].iat[0] >= 0
        else:
            assert np.isnan(g["first_fixation_ms"].iat[0])


def test_fixations_do_not_overlap_and_stay_in_windows(run):
    fx = run["out"]["fixations"]
    ses = run["ses"]
    on, off = fx["onset_ms"].to_numpy(), fx["offset_ms"].to_numpy()
    assert np.all(np.diff(on) > 0)  # time order
    assert np.all(off[:-1] <= on[1:] + 1e-9)
    assert np.all(off > on)
    np.testing.assert_allclose(fx["duration_ms"], off - on, atol=1e-9)
    t = ses.samples["t_ms"].to_numpy()
    dt = 1000.0 / ses.rate_hz
    assert on[0] >= t[0] and off[-1] <= t[-1] + dt + 1e-6
    tm = _trial_windows_ms(ses)
    inside = fx[fx["trial"].notna()]
    assert len(inside) > 0
    st = tm.loc[inside["trial"].astype(str), "start_ms"].to_numpy()
    en = tm.loc[inside["trial"].astype(str), "end_ms"].to_numpy()
    assert np.all(inside["onset_ms"].to_numpy() >= st)
    assert np.all(inside["offset_ms"].to_numpy() <= en + 1e-9)
    # parts outside every trial do not overlap a trial window
    outside = fx[fx["trial"].isna()]
    for a, b in zip(outside["onset_ms"], outside["offset_ms"]):
        assert not np.any((a < tm["end_ms"].to_numpy()) & (b > tm["start_ms"].to_numpy()))
    # some fixation was actually clipped, so the checks above saw the case
    assert run["out"]["manifest"]["fixations"]["parts_clipped_at_trial_boundary"] > 0


# --------------------------------------------------------------------------- ground truth

def _trial_windows_ms(ses):
    """Trial windows as the trials file holds them (times rounded as written)."""
    to_ms = {"s": 1000.0, "ms": 1.0, "us": 1e-3}[ses.style.time_unit]
    return pd.DataFrame({"start_ms": ses.trials["start"].to_numpy(float) * to_ms,
                         "end_ms": ses.trials["end"].to_numpy(float) * to_ms},
                        index=ses.trials["trial"].astype(str))


def _agreement(run):
    """Kappa and event F1 as benchmarks/agreement.py measures them."""
    ses, det = run["ses"], run["out"]["fixations"]
    t = ses.truth_samples["t_ms"].to_numpy(float)
    truth_fix = (ses.truth_samples["label"] == "fixation").to_numpy()
    kappa = cohen_kappa(truth_fix, fixation_mask(t, det))
    whole = det.groupby("fixation", as_index=False).agg(onset_ms=("onset_ms", "min"),
                                                        offset_ms=("offset_ms", "max"))
    return kappa, event_f1(ses.truth_fixations, whole)["f1"]


def _pct_within_3(run):
    tp = simulate.true_aoi_percent(run["ses"]).astype({"trial": str})
    mine = run["out"]["aoi_summary"][["trial", "aoi", "pct_fixation"]].astype({"trial": str})
    m = tp.merge(mine, on=["trial", "aoi"], how="left", suffixes=("_true", "_found"))
    m = m.dropna(subset=["pct_fixation_true"])
    assert len(m) > 0
    diff = (m["pct_fixation_true"] - m["pct_fixation_found"].fillna(np.inf)).abs()
    return float((diff <= 3.0).mean()), float(diff.max())


def test_sample_kappa_and_event_f1(run):
    kappa, f1 = _agreement(run)
    # thresholds from the project issue (not a paper); kappa as in Andersson et al. (2017)
    assert kappa >= 0.80, kappa
    assert f1 >= 0.85, f1


def test_pct_fixation_against_truth(run):
    within, worst = _pct_within_3(run)
    assert within >= 0.95, (within, worst)  # threshold from the project issue


def test_valid_fraction_against_truth(run):
    tv = simulate.true_valid_fraction(run["ses"]).astype({"trial": str})
    q = run["out"]["trial_quality"].astype({"trial": str})
    m = tv.merge(q, on="trial", suffixes=("_true", "_found"))
    assert len(m) == len(tv)
    assert np.all(np.abs(m["valid_fraction_true"] - m["valid_fraction_found"]) <= 0.02)
    # flag_low_validity is (true valid fraction < [quality] min_valid_fraction = 0.5)
    assert (m["flag_low_validity"] == (m["valid_fraction_true"] < 0.5)).all()


def test_low_validity_flag_on_a_lossy_session(tmp_path):
    # the infant style loses a lot of data; at least check the flag follows the truth
    # whatever the mix of flagged trials
    ses = simulate.simulate_session("infant_60hz_noisy", n_trials=3, seed=3)
    paths = simulate.write_session(ses, tmp_path)
    out = _run(paths, checks=False)
    tv = simulate.true_valid_fraction(ses).astype({"trial": str})
    q = out["trial_quality"].astype({"trial": str}).merge(tv, on="trial",
                                                          suffixes=("", "_true"))
    assert np.all(np.abs(q["valid_fraction"] - q["valid_fraction_true"]) <= 0.02)
    assert (q["flag_low_validity"] == (q["valid_fraction_true"] < 0.5)).all()
    # with the limit raised above every trial's validity, every trial is flagged
    out2 = _run(paths, checks=False, overrides=["quality.min_valid_fraction=1.0"])
    below = out2["trial_quality"]["valid_fraction"] < 1.0
    assert (out2["trial_quality"]["flag_low_validity"] == below).all() and below.any()


def test_drift_correction_applied_in_manifest(drift_corrected):
    oc = drift_corrected["out"]["manifest"]["offset_correction"]
    assert oc["applied"] is True
    assert drift_corrected["out"]["manifest"]["parameters"]["quality"]["correct_offset"] is True


def test_pct_fixation_against_truth_with_drift_correction(drift_corrected):
    within, worst = _pct_within_3(drift_corrected)
    assert within >= 0.95, (within, worst)


def test_drift_correction_helps(drift_corrected, tmp_path):
    # without the correction the drifting session is clearly worse than with it
    out = _run(drift_corrected["paths"])
    assert out["manifest"]["offset_correction"]["applied"] is False
    off, _ = _pct_within_3({"ses": drift_corrected["ses"], "out": out})
    on, _ = _pct_within_3(drift_corrected)
    assert on > off + 0.2, (on, off)


# --------------------------------------------------------------------------- invariance

def _assert_same_tables(a, b, names=TABLES):
    for n in names:
        pd.testing.assert_frame_equal(a[n].reset_index(drop=True), b[n].reset_index(drop=True),
                                      check_exact=False, rtol=1e-12, atol=1e-9, obj=n)
    for k in ("samples", "fixations", "trials", "detection_used", "offset_correction"):
        assert a["manifest"][k] == b["manifest"][k], k


def _shuffled_csv(src: Path, dst: Path, seed: int) -> Path:
    lines = src.read_text().splitlines()
    body = lines[1:]
    order = np.random.default_rng(seed).permutation(len(body))
    if np.all(order == np.arange(len(body))):
        order = order[::-1]
    dst.write_text("\n".join([lines[0]] + [body[i] for i in order]) + "\n")
    return dst


@pytest.mark.parametrize("seed", [0, 1])
def test_aoi_row_order_does_not_matter(small, tmp_path, seed):
    aois = _shuffled_csv(small["paths"]["aois"], tmp_path / "aois.csv", seed)
    assert aois.read_text() != small["paths"]["aois"].read_text()
    _assert_same_tables(small["out"], _run(small["paths"], aois=aois))


@pytest.mark.parametrize("seed", [2, 3])
def test_trial_row_order_does_not_matter(small, tmp_path, seed):
    trials = _shuffled_csv(small["paths"]["trials"], tmp_path / "trials.csv", seed)
    assert trials.read_text() != small["paths"]["trials"].read_text()
    _assert_same_tables(small["out"], _run(small["paths"], trials=trials))


def test_split_recording_equals_whole(tmp_path):
    # a 500 Hz recording with the velocity threshold at its fixed floor in the
    # whole file and in both halves (the noise-adaptive threshold is a
    # whole-file statistic; checked below so the comparison is meaningful)
    ses = simulate.simulate_session("gzip_500hz_semicolon_comma_us", n_trials=3, seed=4)
    st = ses.style
    whole_paths = simulate.write_session(ses, tmp_path / "whole")
    whole = _run(whole_paths, checks=False)
    tm = ses.trials_ms
    # split 150 ms before trial 2 starts (during the 300 ms pause between trials)
    split_ms = tm["start_ms"].iat[1] - 150.0
    t = ses.samples["t_ms"].to_numpy()
    cut = int(np.searchsorted(t, split_ms))
    halves = []
    for k, (rows, trial_rows) in enumerate([(slice(0, cut), [0]),
                                            (slice(cut, None), list(range(1, len(tm))))]):
        d = tmp_path / f"half{k}"
        d.mkdir()
        samples = d / f"samples.{st.extension}"
        comp = {"method": "gzip", "mtime": 0} if st.compression == "gzip" else None
        ses.raw.iloc[rows].to_csv(samples, sep=st.delimiter, decimal=st.decimal, index=False,
                                  na_rep=st.na_rep, float_format=st.float_format,
                                  compression=comp)
        trials = d / "trials.csv"
        ses.trials.iloc[trial_rows].to_csv(trials, index=False, float_format="%.3f")
        # an AOI file may only hold stimuli its trial file shows
        aois = d / "aois.csv"
        shown = set(ses.trials["stimulus"].iloc[trial_rows])
        ses.aois[ses.aois["stimulus"].isin(shown)].to_csv(aois, index=False)
        halves.append(_run(whole_paths, samples=samples, trials=trials, aois=aois,
                           checks=False))
    thr = [h["manifest"]["detection_used"]["velocity_threshold_used_deg_s"]
           for h in [whole] + halves]
    assert thr[0] == thr[1] == thr[2], thr
    n = [h["manifest"]["samples"]["total"] for h in halves]
    assert sum(n) == whole["manifest"]["samples"]["total"]
    joined = pd.concat([h["aoi_summary"] for h in halves], ignore_index=True)
    pd.testing.assert_frame_equal(joined, whole["aoi_summary"], check_exact=False,
                                  rtol=1e-9, atol=1e-9)
    cols = ["trial", "n_samples", "valid_fraction", "fixation_ms", "flag_low_validity"]
    joined_q = pd.concat([h["trial_quality"][cols] for h in halves], ignore_index=True)
    pd.testing.assert_frame_equal(joined_q, whole["trial_quality"][cols], check_exact=False,
                                  rtol=1e-9, atol=1e-9)


# --------------------------------------------------------------------------- CLI

runner = CliRunner()


def test_cli_convert_equals_library(lab, tmp_path):
    p = lab["paths"]
    out_dir = tmp_path / "cli"
    r = runner.invoke(app, ["convert", str(p["samples"]), "--study", str(p["study"]),
                            "--trials", str(p["trials"]), "--aois", str(p["aois"]),
                            "--checks", str(p["checks"]), "--out-dir", str(out_dir)])
    assert r.exit_code == 0, r.output
    for n in TABLES:
        # whole files, byte for byte, against the library's run on the same inputs
        assert (out_dir / f"{n}.csv").read_text() == (lab["out_dir"] / f"{n}.csv").read_text(), n
    a = json.loads((out_dir / "manifest.json").read_text())
    b = json.loads((lab["out_dir"] / "manifest.json").read_text())
    assert a == b  # same inputs (paths and hashes), same version: nothing volatile


def test_cli_convert_bad_input_exit_1(small, tmp_path):
    bad = tmp_path / "trials.csv"
    bad.write_text("trial,stimulus,start,end\n1,story1,5,oops\n")
    p = small["paths"]
    out_dir = tmp_path / "out"
    r = runner.invoke(app, ["convert", str(p["samples"]), "--study", str(p["study"]),
                            "--trials", str(bad), "--aois", str(p["aois"]),
                            "--out-dir", str(out_dir)])
    assert r.exit_code == 1
    assert not out_dir.exists() or list(out_dir.iterdir()) == []


def test_cli_demo(tmp_path):
    d = tmp_path / "demo"
    r = runner.invoke(app, ["demo", str(d)])
    assert r.exit_code == 0, r.output
    assert "valid_fraction" in r.output
    for lab in ("eyes", "mouth", "(none)"):
        assert lab in r.output
    assert "not a diagnostic device" in r.output
    inputs = sorted(p.name for p in (d / "inputs").iterdir())
    assert "study.toml" in inputs and "trials.csv" in inputs and "aois.csv" in inputs
    assert any(n.startswith("samples.") for n in inputs)
    outs = sorted(p.name for p in (d / "out").iterdir())
    for n in ("fixations.csv", "aoi_summary.csv", "trial_quality.csv", "manifest.json"):
        assert n in outs
    s = read_table(d / "out" / "aoi_summary.csv")
    for _, g in s.groupby("trial"):
        assert g["pct_fixation"].sum() == pytest.approx(100.0, abs=1e-4) or \
            g["pct_fixation"].isna().all()


# --------------------------------------------------------------------------- threads

def test_blocks_and_threads_do_not_change_results(tmp_path, monkeypatch):
    """Block size and thread count are implementation details (aoi_fix._chunks).

    Many small blocks on two threads must give exactly the tables of one
    thread; several repeats also exercise concurrent hit testing on shared
    AOI tables (GEOS prepared polygons are cloned per worker thread).
    """
    from aoi_fix import _chunks, simulate
    from aoi_fix.pipeline import convert_session, load_session

    ses = simulate.simulate_session("lab_300hz_seconds", n_trials=3, seed=5)
    p = simulate.write_session(ses, tmp_path)

    def run():
        s = load_session(p["samples"], p["study"], p["trials"], p["aois"])
        return convert_session(s)

    monkeypatch.setenv("AOI_FIX_THREADS", "1")
    one = run()
    monkeypatch.setenv("AOI_FIX_THREADS", "2")
    monkeypatch.setattr(_chunks, "BLOCK", 997)
    for _ in range(3):
        many = run()
        for name in ("fixations", "aoi_summary", "trial_quality"):
            pd.testing.assert_frame_equal(one[name], many[name], check_exact=True)
