"""Tests for aoi_fix.sweep and ``aoi-fix sweep``: grids, identity with convert, -j, errors."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from aoi_fix import simulate
from aoi_fix.cli import app
from aoi_fix.config import load_study, study_from_dict
from aoi_fix.errors import UsageError
from aoi_fix.output import read_table
from aoi_fix.sweep import (SUMMARY_COLUMNS, build_settings, parse_grid, sweep)

runner = CliRunner()

GRID_ARGS = ["--grid", "detection.velocity_threshold_deg_s=20,45",
             "--grid", "detection.min_fixation_ms=60,100",
             "--grid", "detection.method=ivt,idt"]


def _err(result) -> str:
    return getattr(result, "stderr", None) or result.output


@pytest.fixture(scope="module")
def session(tmp_path_factory) -> dict:
    ses = simulate.simulate_session("lab_300hz_seconds", n_trials=2, seed=0)
    return simulate.write_session(ses, tmp_path_factory.mktemp("session"))


def _inputs(p: dict) -> list[str]:
    return [str(p["samples"]), "--study", str(p["study"]), "--trials", str(p["trials"]),
            "--aois", str(p["aois"]), "--checks", str(p["checks"])]


def _kw(p: dict) -> dict:
    return dict(study=p["study"], trials=p["trials"], aois=p["aois"], checks=p["checks"])


@pytest.fixture(scope="module")
def cli_sweep(session, tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("sweep")
    r = runner.invoke(app, ["sweep", *_inputs(session), *GRID_ARGS, "--out-dir", str(out)])
    assert r.exit_code == 0, _err(r)
    return out


def _text(path: Path) -> pd.DataFrame:
    return pd.read_csv(path, dtype=str, keep_default_na=False)


# --------------------------------------------------------------------------- identity

def _assert_rows_equal_convert(session, sweep_dir: Path, tmp_path: Path, key_columns,
                               base_sets=()):
    """Every setting's rows equal convert's aoi_summary.csv, compared as written text."""
    summary = _text(sweep_dir / "sweep_summary.csv")
    settings = _text(sweep_dir / "sweep_settings.csv")
    for _, row in settings.iterrows():
        sets = [a for s in base_sets for a in ("--set", s)]
        for k in key_columns:
            if row[k] != "":  # empty = the key does not act on this setting's method
                sets += ["--set", f"{k}={row[k]}"]
        out = tmp_path / f"convert_{row['setting']}"
        r = runner.invoke(app, ["convert", *_inputs(session), *sets, "--out-dir", str(out)])
        assert r.exit_code == 0, _err(r)
        want = _text(out / "aoi_summary.csv")[SUMMARY_COLUMNS]
        got = summary[summary["setting"] == row["setting"]][SUMMARY_COLUMNS]
        pd.testing.assert_frame_equal(got.reset_index(drop=True), want)


def test_rows_identical_to_convert(session, cli_sweep, tmp_path):
    keys = ["detection.velocity_threshold_deg_s", "detection.min_fixation_ms",
            "detection.method"]
    _assert_rows_equal_convert(session, cli_sweep, tmp_path, keys)


def test_rows_identical_to_convert_matching_keys(session, tmp_path):
    # raw-position matching (matched once per [aois]) and drift correction (per setting)
    out = tmp_path / "sweep"
    r = runner.invoke(app, ["sweep", *_inputs(session),
                            "--grid", "aois.position_window_ms=0,100",
                            "--grid", "quality.correct_offset=false,true",
                            "--grid", "aois.margin_deg=0,0.5",
                            "--set", "detection.min_fixation_ms=80",
                            "--out-dir", str(out)])
    assert r.exit_code == 0, _err(r)
    assert len(_text(out / "sweep_settings.csv")) == 8
    _assert_rows_equal_convert(session, out, tmp_path,
                               ["aois.position_window_ms", "quality.correct_offset",
                                "aois.margin_deg"], ["detection.min_fixation_ms=80"])


def test_settings_finding_the_same_fixations_reuse_tables(session, tmp_path):
    # two velocity floors below the noise-adaptive threshold give the same fixations;
    # the second setting reuses the first one's tables: still identical to convert
    out = tmp_path / "sweep"
    r = runner.invoke(app, ["sweep", *_inputs(session),
                            "--grid", "detection.velocity_threshold_deg_s=5,10,200",
                            "--out-dir", str(out)])
    assert r.exit_code == 0, _err(r)
    settings = _text(out / "sweep_settings.csv")
    assert settings.iloc[0, 2:].tolist() == settings.iloc[1, 2:].tolist()
    assert settings.iloc[0, 2:].tolist() != settings.iloc[2, 2:].tolist()
    _assert_rows_equal_convert(session, out, tmp_path, ["detection.velocity_threshold_deg_s"])
    used = json.loads((out / "manifest.json").read_text())["settings"]
    assert [u["values"]["detection.velocity_threshold_deg_s"] for u in used] == [5, 10, 200]


def test_settings_stats_agree_with_convert(session, cli_sweep, tmp_path):
    settings = pd.read_csv(cli_sweep / "sweep_settings.csv")
    row = settings[(settings["detection.method"] == "idt")
                   & (settings["detection.min_fixation_ms"] == 100)].iloc[0]
    out = tmp_path / "c"
    r = runner.invoke(app, ["convert", *_inputs(session), "--set", "detection.method=idt",
                            "--set", "detection.min_fixation_ms=100", "--out-dir", str(out)])
    assert r.exit_code == 0, _err(r)
    fix = read_table(out / "fixations.csv")
    fix = fix[fix["trial"].notna()]
    q = read_table(out / "trial_quality.csv")
    assert row["n_fixations"] == len(fix)
    assert row["median_duration_ms"] == pytest.approx(fix["duration_ms"].median(), abs=1e-6)
    assert row["mean_duration_ms"] == pytest.approx(fix["duration_ms"].mean(), abs=1e-6)
    assert row["fixation_share"] == pytest.approx(
        q["fixation_ms"].sum() / q["duration_ms"].sum(), abs=1e-6)
    assert ((settings["fixation_share"] > 0) & (settings["fixation_share"] <= 1)).all()


# --------------------------------------------------------------------------- grid shape

def test_method_specific_keys_not_duplicated(cli_sweep):
    s = pd.read_csv(cli_sweep / "sweep_settings.csv")
    # 2 velocities x 2 durations for ivt, 2 durations for idt (velocity does not apply)
    assert len(s) == 6
    assert s["setting"].tolist() == [1, 2, 3, 4, 5, 6]
    idt = s[s["detection.method"] == "idt"]
    assert len(idt) == 2 and idt["detection.velocity_threshold_deg_s"].isna().all()
    keys = ["detection.velocity_threshold_deg_s", "detection.min_fixation_ms",
            "detection.method"]
    assert not s[keys].astype(str).duplicated().any()
    assert list(s.columns) == ["setting", *keys, "n_fixations", "median_duration_ms",
                               "mean_duration_ms", "fixation_share"]


def test_summary_layout(cli_sweep):
    summary = pd.read_csv(cli_sweep / "sweep_summary.csv")
    assert list(summary.columns) == ["setting", "detection.velocity_threshold_deg_s",
                                     "detection.min_fixation_ms", "detection.method",
                                     *SUMMARY_COLUMNS]
    # every setting has the same trial x AOI rows; percentages of a trial sum to 100
    per = summary.groupby("setting").size()
    assert per.nunique() == 1
    sums = summary.groupby(["setting", "trial"])["pct_fixation"].sum()
    assert np.allclose(sums, 100.0, atol=1e-4)


def test_stability_rule(cli_sweep):
    summary = pd.read_csv(cli_sweep / "sweep_summary.csv")
    stab = pd.read_csv(cli_sweep / "sweep_stability.csv")
    assert list(stab.columns) == ["trial", "stimulus", "aoi", "n_settings", "pct_min",
                                  "pct_max", "pct_range", "pct_sd", "flag_unstable"]
    g = summary.groupby(["trial", "aoi"], sort=False)["pct_fixation"]
    want = pd.DataFrame({"lo": g.min(), "hi": g.max(), "sd": g.std(ddof=0)}).reset_index()
    m = stab.merge(want, on=["trial", "aoi"])
    assert len(m) == len(stab) == summary.groupby(["trial", "aoi"]).ngroups
    assert np.allclose(m["pct_min"], m["lo"]) and np.allclose(m["pct_max"], m["hi"])
    assert np.allclose(m["pct_range"], m["hi"] - m["lo"], atol=1e-5)
    assert np.allclose(m["pct_sd"], m["sd"], atol=1e-5)
    # default [sweep] max_range_pct = 10 percentage points
    assert (stab["flag_unstable"] == (stab["pct_range"] > 10.0)).all()
    assert (stab["n_settings"] == 6).all()


def test_max_range_pct_from_study(session):
    out = sweep(session["samples"], grid={"detection.velocity_threshold_deg_s": [20, 70]},
                overrides=["sweep.max_range_pct=0"], **_kw(session))
    stab = out["sweep_stability"]
    assert (stab["flag_unstable"] == (stab["pct_range"] > 0)).all()
    assert stab["flag_unstable"].any()
    assert "> 0.0" in out["manifest"]["stability_rule"]


def test_manifest(session, cli_sweep):
    m = json.loads((cli_sweep / "manifest.json").read_text())
    assert m["grid"] == {"detection.velocity_threshold_deg_s": [20.0, 45.0],
                         "detection.min_fixation_ms": [60.0, 100.0],
                         "detection.method": ["ivt", "idt"]}
    assert set(m["inputs"]) == {"samples", "study", "trials", "aois", "checks"}
    assert all(len(v["sha256"]) == 64 for v in m["inputs"].values())
    assert m["n_settings"] == len(m["settings"]) == 6
    first = m["settings"][0]
    assert first["values"] == {"detection.velocity_threshold_deg_s": 20.0,
                               "detection.min_fixation_ms": 60.0, "detection.method": "ivt"}
    assert first["parameters"]["detection"]["velocity_threshold_deg_s"] == 20.0
    want = load_study(session["study"], ["detection.velocity_threshold_deg_s=20",
                                         "detection.min_fixation_ms=60"])
    assert first["parameters"] == json.loads(json.dumps(want.to_dict()))
    idt = [x for x in m["settings"] if x["values"]["detection.method"] == "idt"]
    assert len(idt) == 2
    assert all(x["values"]["detection.velocity_threshold_deg_s"] is None for x in idt)


def test_jobs_give_identical_results(session, cli_sweep, tmp_path):
    out = tmp_path / "j2"
    r = runner.invoke(app, ["sweep", *_inputs(session), *GRID_ARGS, "--out-dir", str(out),
                            "-j", "2"])
    assert r.exit_code == 0, _err(r)
    for name in ("sweep_summary.csv", "sweep_settings.csv", "sweep_stability.csv",
                 "manifest.json"):
        assert (out / name).read_bytes() == (cli_sweep / name).read_bytes(), name


def test_library_matches_cli_and_parquet(session, cli_sweep, tmp_path):
    grid = parse_grid(GRID_ARGS[1::2])
    out = sweep(session["samples"], grid=grid, out_dir=tmp_path, fmt="parquet",
                **_kw(session))
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "manifest.json", "sweep_settings.parquet", "sweep_stability.parquet",
        "sweep_summary.parquet"]
    back = read_table(tmp_path / "sweep_summary.parquet")
    assert len(back) == len(out["sweep_summary"])
    csv = pd.read_csv(cli_sweep / "sweep_summary.csv")
    assert np.allclose(csv["pct_fixation"], out["sweep_summary"]["pct_fixation"].round(6),
                       equal_nan=True)


def test_study_round_trip_is_exact(session):
    base = load_study(session["study"])
    assert study_from_dict(base.to_dict()) == base


# --------------------------------------------------------------------------- plots

def test_plots_one_png_per_aoi(session, tmp_path):
    pytest.importorskip("matplotlib")
    r = runner.invoke(app, ["sweep", *_inputs(session),
                            "--grid", "detection.velocity_threshold_deg_s=20,45",
                            "--out-dir", str(tmp_path), "--plots"])
    assert r.exit_code == 0, _err(r)
    aois = pd.read_csv(tmp_path / "sweep_summary.csv")["aoi"].unique()
    pngs = sorted(tmp_path.glob("sweep_plot_*.png"))
    assert len(pngs) == len(aois)
    assert all(p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for p in pngs)


def test_plots_without_matplotlib(session, tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import fails
    out = tmp_path / "o"
    r = runner.invoke(app, ["sweep", *_inputs(session), "--grid",
                            "detection.min_fixation_ms=60,100", "--out-dir", str(out),
                            "--plots"])
    assert r.exit_code == 2
    assert "plots" in _err(r) and "matplotlib" in _err(r)
    assert not out.exists()


# --------------------------------------------------------------------------- bad input

@pytest.mark.parametrize("grid_arg, words", [
    ("detection.velocity_threshold=20,30", ["detection.velocity_threshold",
                                            "detection.velocity_threshold_deg_s"]),
    ("detecton.min_fixation_ms=60", ["detecton.min_fixation_ms", "detection.method"]),
    ("detection.min_fixation_ms=", ["detection.min_fixation_ms", "empty"]),
    ("detection.min_fixation_ms=60,,100", ["detection.min_fixation_ms", "empty"]),
    ("detection.min_fixation_ms=60,fast", ["detection.min_fixation_ms", "'fast'"]),
    ("detection.method=ivt,velocity", ["detection.method", "'velocity'"]),
    ("detection.velocity_threshold_deg_s=-5", ["detection.velocity_threshold_deg_s", "-5"]),
    ("detection.min_fixation_ms", ["detection.min_fixation_ms", "section.key=value1"]),
    ("min_fixation_ms=60", ["min_fixation_ms", "section.key=value1"]),
    ("detection.min_fixation_ms=60,60", ["detection.min_fixation_ms", "twice"]),
    ("sweep.max_range_pct=5,10", ["sweep.max_range_pct", "--set"]),
    ("detection.dispersion_threshold_deg=0.5,1", ["detection.dispersion_threshold_deg",
                                                  "idt"]),
])
def test_bad_grid_exits_2_and_writes_nothing(session, tmp_path, grid_arg, words):
    out = tmp_path / "o"
    r = runner.invoke(app, ["sweep", *_inputs(session), "--grid", grid_arg,
                            "--out-dir", str(out)])
    assert r.exit_code == 2, _err(r)
    msg = _err(r)
    assert msg.startswith("aoi-fix: error: ") and len(msg.strip().splitlines()) == 1
    for w in words:
        assert w in msg
    assert not out.exists()


def test_unknown_key_lists_valid_keys():
    with pytest.raises(UsageError) as e:
        parse_grid(["detection.treshold=1"])
    assert "detection.velocity_threshold_deg_s" in str(e.value)
    assert "detection.min_fixation_ms" in str(e.value)


def test_missing_grid_is_usage_error(session, tmp_path):
    r = runner.invoke(app, ["sweep", *_inputs(session), "--out-dir", str(tmp_path / "o")])
    assert r.exit_code == 2
    with pytest.raises(UsageError):
        sweep(session["samples"], grid={}, **_kw(session))
    with pytest.raises(UsageError, match="detection.min_fixation_ms"):
        sweep(session["samples"], grid={"detection.min_fixation_ms": []}, **_kw(session))
    with pytest.raises(UsageError, match="jobs"):
        sweep(session["samples"], grid={"detection.min_fixation_ms": [60]}, jobs=0,
              **_kw(session))


def test_build_settings_typed_values_and_lists(session):
    base = load_study(session["study"])
    s = build_settings(base, {"detection.min_fixation_ms": [60, "100"],
                              "aois.priority": [("eyes", "mouth"), "mouth,eyes"]})
    assert [x.values["detection.min_fixation_ms"] for x in s] == [60.0, 60.0, 100.0, 100.0]
    assert s[1].study.aois.priority == ("mouth", "eyes")
    assert not any(x.reload for x in s)
    r = build_settings(base, {"display.distance_mm": [550, 650]})
    assert all(x.reload for x in r) and r[1].study.display.distance_mm == 650.0


def test_task_groups_keep_threshold_neighbours_together(session):
    # worker tasks: every setting once; I-VT settings equal but for the velocity
    # threshold in one task, lowest threshold first; no task above the cap
    from aoi_fix.sweep import _task_groups

    base = load_study(session["study"])
    s = build_settings(base, parse_grid(["detection.method=ivt,idt",
                                         "detection.velocity_threshold_deg_s=45,20,30",
                                         "detection.min_fixation_ms=60,100",
                                         "detection.dispersion_threshold_deg=1.0"]))
    rest = list(range(1, len(s)))
    tasks = _task_groups(s, rest, 2)
    assert sorted(i for t in tasks for i in t) == rest
    cap = -(-len(rest) // 2)
    assert all(len(t) <= cap for t in tasks)
    for t in tasks:
        studies = [s[i].study.detection for i in t]
        if studies[0].method == "ivt":
            assert len({d.min_fixation_ms for d in studies}) == 1
            thr = [d.velocity_threshold_deg_s for d in studies]
            assert thr == sorted(thr)
        else:
            assert len(t) == 1
    assert max(len(t) for t in tasks) == 3      # 20, 30, 45 deg/s at 100 ms
