"""Tests for ``aoi_fix.batch`` and ``aoi-fix batch``: cohorts, incremental runs, faults, make.

The cohort is three small simulated sessions (``aoi_fix.simulate``, the
``infant_60hz_noisy`` style, two 2-s trials each) sharing one study and one
AOI file; the second has no calibration checks, the third its own study
(I-DT instead of I-VT).
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import CliRunner

from aoi_fix import simulate
from aoi_fix.batch import (REPORT_COLUMNS, batch, combine_sessions, read_combined,
                           read_session_table, session_folder)
from aoi_fix.cli import app
from aoi_fix.errors import InputFormatError, OutputError, UsageError
from aoi_fix.output import read_table
from aoi_fix.pipeline import convert

ROOT = Path(__file__).resolve().parent.parent
RECIPE = ROOT / "docs" / "Makefile.example"
IDS = ["s0", "s1", "s2"]
runner = CliRunner()


def _err(result) -> str:
    return getattr(result, "stderr", None) or result.output


@pytest.fixture(scope="module")
def cohort_template(tmp_path_factory) -> Path:
    """sessions/<id>/{samples,trials,checks}.csv, study.toml, study_idt.toml, aois.csv."""
    root = tmp_path_factory.mktemp("cohort")
    for i, sid in enumerate(IDS):
        ses = simulate.simulate_session("infant_60hz_noisy", n_trials=2, trial_ms=2000,
                                        seed=i)
        paths = simulate.write_session(ses, root / "sessions" / sid)
        if i == 0:
            shutil.copy(paths["study"], root / "study.toml")
            shutil.copy(paths["aois"], root / "aois.csv")
        if i == 1:
            paths["checks"].unlink()
        paths["study"].unlink()
        paths["aois"].unlink()
    text = (root / "study.toml").read_text()
    (root / "study_idt.toml").write_text(text + "\n[detection]\nmethod = \"idt\"\n")
    (root / "sessions.csv").write_text(
        "session,samples,trials,checks,study\n"
        "s0,sessions/s0/samples.csv,sessions/s0/trials.csv,sessions/s0/checks.csv,\n"
        "s1,sessions/s1/samples.csv,sessions/s1/trials.csv,,\n"
        "s2,sessions/s2/samples.csv,sessions/s2/trials.csv,sessions/s2/checks.csv,"
        "study_idt.toml\n")
    return root


@pytest.fixture
def cohort(cohort_template, tmp_path) -> Path:
    dst = tmp_path / "cohort"
    shutil.copytree(cohort_template, dst)
    return dst


def _run(c: Path, out: str = "out", **kw) -> pd.DataFrame:
    return batch(c / "sessions.csv", study=c / "study.toml", aois=c / "aois.csv",
                 out_dir=c / out, **kw)


def _files(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _mtimes(folder: Path) -> dict[str, int]:
    return {p.relative_to(folder).as_posix(): p.stat().st_mtime_ns
            for p in folder.rglob("*") if p.is_file() and p.name != "batch_report.csv"
            and p.name != "_sessions.csv"}


# --------------------------------------------------------------------------- the outputs

def test_batch_writes_the_tables_of_convert_and_a_hive_dataset(cohort):
    report = _run(cohort)
    assert list(report.columns) == REPORT_COLUMNS
    assert report["session"].tolist() == IDS
    assert report["status"].tolist() == ["converted"] * 3, report["message"].tolist()
    on_disk = read_table(cohort / "out" / "batch_report.csv")
    assert on_disk["session"].tolist() == IDS and list(on_disk.columns) == REPORT_COLUMNS

    rows = {r["session"]: r for r in read_session_table(cohort / "sessions.csv")}
    per_session = {}
    for sid in IDS:
        r = rows[sid]
        ref = cohort / f"ref_{sid}"
        expected = convert(r["samples"], study=r["study"] or cohort / "study.toml",
                           trials=r["trials"], aois=cohort / "aois.csv", checks=r["checks"],
                           out_dir=ref)
        got_dir = session_folder(cohort / "out", sid)
        names = ["fixations", "aoi_summary", "trial_quality"] + (
            ["check_quality"] if r["checks"] else [])
        assert sorted(p.name for p in got_dir.iterdir()) == sorted(
            [f"{n}.csv" for n in names] + ["manifest.json"])
        for n in names:  # the same tables as convert, byte for byte
            assert (got_dir / f"{n}.csv").read_bytes() == (ref / f"{n}.csv").read_bytes(), n
        manifest = json.loads((got_dir / "manifest.json").read_text())
        batch_part = manifest.pop("batch")
        assert manifest == json.loads((ref / "manifest.json").read_text())
        assert batch_part["session"] == sid
        assert set(batch_part["fingerprint"]["inputs_sha256"]) >= {"samples", "trials",
                                                                   "aois", "study"}
        per_session[sid] = expected
    assert per_session["s2"]["manifest"]["parameters"]["detection"]["method"] == "idt"
    assert per_session["s0"]["manifest"]["parameters"]["detection"]["method"] == "ivt"

    # the combined dataset, as any Parquet reader sees it
    combined = pd.read_parquet(cohort / "out" / "dataset" / "aoi_summary")
    assert "session" in combined.columns
    assert sorted(combined["session"].astype(str).unique()) == IDS
    assert len(combined) == sum(len(t["aoi_summary"]) for t in per_session.values())
    mine = read_combined(cohort / "out", "aoi_summary")
    for sid in IDS:
        part = mine[mine["session"] == sid].drop(columns="session").reset_index(drop=True)
        exp = per_session[sid]["aoi_summary"].reset_index(drop=True)
        pd.testing.assert_frame_equal(part, exp, check_dtype=False,
                                      check_categorical=False)
    checks = read_combined(cohort / "out", "check_quality")
    assert sorted(checks["session"].unique()) == ["s0", "s2"]  # s1 has no checks
    index = pd.read_csv(cohort / "out" / "dataset" / "_sessions.csv", dtype=str)
    assert index["session"].tolist() == IDS


def test_second_run_does_no_work_and_says_so(cohort):
    _run(cohort)
    before = _mtimes(cohort / "out")
    r = runner.invoke(app, ["batch", str(cohort / "sessions.csv"), "--study",
                            str(cohort / "study.toml"), "--aois", str(cohort / "aois.csv"),
                            "--out-dir", str(cohort / "out")])
    assert r.exit_code == 0, r.output
    assert "0 converted, 3 skipped, 0 failed" in _err(r)
    assert _mtimes(cohort / "out") == before  # nothing rewritten
    report = read_table(cohort / "out" / "batch_report.csv")
    assert report["status"].tolist() == ["skipped"] * 3


def test_only_changed_sessions_are_converted_again(cohort):
    _run(cohort)
    trials = cohort / "sessions" / "s1" / "trials.csv"
    trials.write_text(trials.read_text() + "\n")  # new content, same meaning
    samples = cohort / "sessions" / "s0" / "samples.csv"
    os.utime(samples, (1e9, 1e9))  # a new date but the same content
    assert _run(cohort)["status"].tolist() == ["skipped", "converted", "skipped"]
    # a changed parameter changes every session's fingerprint
    r = _run(cohort, overrides=["detection.min_fixation_ms=80"])
    assert r["status"].tolist() == ["converted"] * 3
    assert _run(cohort, overrides=["detection.min_fixation_ms=80"])["status"].tolist() == \
        ["skipped"] * 3
    # as does the shared AOI file, and --force redoes everything
    (cohort / "aois.csv").write_text((cohort / "aois.csv").read_text() + "\n")
    assert _run(cohort)["status"].tolist() == ["converted"] * 3
    assert _run(cohort, force=True)["status"].tolist() == ["converted"] * 3


def test_a_deleted_output_is_rebuilt(cohort):
    _run(cohort)
    (cohort / "out" / "dataset" / "fixations" / "session=s2" / "part-0.parquet").unlink()
    (session_folder(cohort / "out", "s0") / "trial_quality.csv").unlink()
    assert _run(cohort)["status"].tolist() == ["converted", "skipped", "converted"]


def test_format_change_replaces_the_tables(cohort):
    _run(cohort)
    assert _run(cohort, fmt="parquet")["status"].tolist() == ["converted"] * 3
    names = sorted(p.name for p in session_folder(cohort / "out", "s1").iterdir())
    assert names == ["aoi_summary.parquet", "fixations.parquet", "manifest.json",
                     "trial_quality.parquet"]


def test_sessions_dropped_from_the_table_leave_the_dataset(cohort):
    _run(cohort)
    table = cohort / "sessions.csv"
    table.write_text("\n".join(table.read_text().splitlines()[:3]) + "\n")  # s0, s1
    assert _run(cohort)["session"].tolist() == ["s0", "s1"]
    combined = read_combined(cohort / "out", "aoi_summary")
    assert sorted(combined["session"].unique()) == ["s0", "s1"]
    assert session_folder(cohort / "out", "s2").is_dir()  # its folder is left alone


# --------------------------------------------------------------------------- faults

def test_a_bad_session_never_stops_the_others(cohort):
    _run(cohort)
    (cohort / "sessions" / "s1" / "samples.csv").write_text("clock_ms,gaze_h_px\n1,2\n")
    with open(cohort / "sessions.csv", "a") as fh:
        fh.write("s3,sessions/s3/samples.csv,sessions/s0/trials.csv,,\n")
    r = runner.invoke(app, ["batch", str(cohort / "sessions.csv"), "--study",
                            str(cohort / "study.toml"), "--aois", str(cohort / "aois.csv"),
                            "--out-dir", str(cohort / "out")])
    assert r.exit_code == 1
    assert "0 converted, 2 skipped, 2 failed" in _err(r)
    report = read_table(cohort / "out" / "batch_report.csv")
    assert report["status"].tolist() == ["skipped", "failed", "skipped", "failed"]
    msg = dict(zip(report["session"], report["message"]))
    assert "samples.csv" in msg["s1"] and "gaze_v_px" in msg["s1"]
    assert msg["s3"].endswith("samples.csv: samples file not found")
    # the dataset holds exactly the sessions that are up to date ...
    assert sorted(read_combined(cohort / "out", "aoi_summary")["session"].unique()) == \
        ["s0", "s2"]
    # ... while the failed session's folder keeps its last good conversion
    assert (session_folder(cohort / "out", "s1") / "manifest.json").is_file()


def test_an_unexpected_error_is_isolated_too(cohort, monkeypatch):
    import aoi_fix.pipeline as pipeline

    real = pipeline.convert_session

    def flaky(session, **kw):
        if "s1" in str(session.paths["samples"]):
            raise RuntimeError("boom")
        return real(session, **kw)

    monkeypatch.setattr(pipeline, "convert_session", flaky)
    report = _run(cohort)
    assert report["status"].tolist() == ["converted", "failed", "converted"]
    assert report["message"][1] == "unexpected error (please report): RuntimeError: boom"


@pytest.mark.parametrize("sid", ["../up", "a/b", "with space", "x=y", ".hidden", "é", "a" * 65])
def test_unsafe_session_ids_are_refused_naming_the_row(cohort, sid):
    (cohort / "sessions.csv").write_text(
        "session,samples,trials\n"
        "ok,sessions/s0/samples.csv,sessions/s0/trials.csv\n"
        f"\"{sid}\",sessions/s1/samples.csv,sessions/s1/trials.csv\n")
    with pytest.raises(InputFormatError, match=r"sessions\.csv: line 3, column 'session'"):
        _run(cohort)
    assert not (cohort / "out").exists()  # nothing done
    r = runner.invoke(app, ["batch", str(cohort / "sessions.csv"), "--study",
                            str(cohort / "study.toml"), "--aois", str(cohort / "aois.csv"),
                            "--out-dir", str(cohort / "out")])
    assert r.exit_code == 1
    assert "line 3, column 'session'" in _err(r) and "Traceback" not in r.output


@pytest.mark.parametrize("text,match", [
    ("session,samples,trials\ns0,a.csv,b.csv\nS0,c.csv,d.csv\n",
     r"line 3, column 'session': 'S0' is already used on line 2"),
    ("session,samples\ns0,a.csv\n", r"line 1: column 'trials' is missing"),
    ("session,samples,trials\ns0,,b.csv\n", r"line 2, column 'samples': empty"),
    ("session,samples,trials\ns0,a.csv\n", r"line 2: found 2 fields, expected 3"),
    ("", r"the file is empty"),
])
def test_bad_session_tables(tmp_path, text, match):
    (tmp_path / "s.csv").write_text(text)
    with pytest.raises(InputFormatError, match=match):
        read_session_table(tmp_path / "s.csv")


def test_session_table_paths_resolve_against_its_folder(tmp_path):
    sub = tmp_path / "lab"
    sub.mkdir()
    (sub / "s.csv").write_text("session,samples,trials,checks,study,group\n"
                               f"a,x/s.csv,{tmp_path / 't.csv'},,,toddlers\n\n")
    (row,) = read_session_table(sub / "s.csv")
    assert row["samples"] == sub.resolve() / "x" / "s.csv"
    assert row["trials"] == tmp_path / "t.csv"
    assert row["checks"] is None and row["study"] is None and row["row"] == 2


def test_errors_before_any_work(cohort):
    with pytest.raises(UsageError, match="--format"):
        _run(cohort, fmt="xlsx")
    with pytest.raises(UsageError, match="-j/--jobs"):
        _run(cohort, jobs=0)
    with pytest.raises(UsageError, match="--set"):
        _run(cohort, overrides=["detection.nonsense=1"])
    with pytest.raises(InputFormatError, match="AOI file not found"):
        batch(cohort / "sessions.csv", study=cohort / "study.toml", aois=cohort / "no.csv",
              out_dir=cohort / "out")
    (cohort / "file").write_text("x")
    with pytest.raises(OutputError, match="expected an output folder"):
        _run(cohort, out="file")
    assert not (cohort / "out").exists()


# --------------------------------------------------------------------------- parallel

def test_parallel_results_are_identical_to_serial(cohort):
    a = _run(cohort, out="serial", jobs=1)
    b = _run(cohort, out="parallel", jobs=2)
    assert a.drop(columns="seconds").equals(b.drop(columns="seconds"))
    fa, fb = _files(cohort / "serial"), _files(cohort / "parallel")
    fa.pop("batch_report.csv"), fb.pop("batch_report.csv")
    assert fa.keys() == fb.keys()
    assert [k for k in fa if fa[k] != fb[k]] == []


def test_cli_progress_is_plain_lines_off_a_terminal(cohort):
    r = runner.invoke(app, ["batch", str(cohort / "sessions.csv"), "--study",
                            str(cohort / "study.toml"), "--aois", str(cohort / "aois.csv"),
                            "--out-dir", str(cohort / "out"), "-j", "2", "--format",
                            "parquet", "--set", "detection.min_fixation_ms=70"])
    assert r.exit_code == 0, r.output
    lines = [ln for ln in _err(r).splitlines() if ln.startswith("[")]
    assert sorted(ln.split("]")[0] for ln in lines) == ["[1/3", "[2/3", "[3/3"]
    assert all(": converted (" in ln for ln in lines)
    assert "\x1b[" not in _err(r)  # no terminal control codes
    manifest = json.loads((session_folder(cohort / "out", "s0") / "manifest.json").read_text())
    assert manifest["parameters"]["detection"]["min_fixation_ms"] == 70.0


def test_scheduler_without_dask_is_a_usage_error(cohort):
    try:
        import distributed  # noqa: F401
        pytest.skip("dask distributed is installed")
    except ImportError:
        pass
    r = runner.invoke(app, ["batch", str(cohort / "sessions.csv"), "--study",
                            str(cohort / "study.toml"), "--aois", str(cohort / "aois.csv"),
                            "--out-dir", str(cohort / "out"), "--scheduler",
                            "tcp://127.0.0.1:8786"])
    assert r.exit_code == 2
    assert "cluster extra" in _err(r)
    assert not (cohort / "out").exists()


def test_dask_scheduler_gives_the_same_results(cohort):
    distributed = pytest.importorskip("distributed")
    a = _run(cohort, out="serial")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster:
        b = _run(cohort, out="dask", scheduler=cluster.scheduler_address)
    assert a.drop(columns="seconds").equals(b.drop(columns="seconds"))
    fa, fb = _files(cohort / "serial"), _files(cohort / "dask")
    fa.pop("batch_report.csv"), fb.pop("batch_report.csv")
    assert fa == fb


# --------------------------------------------------------------------------- make

def _aoi_fix_command() -> Path | None:
    exe = Path(sys.executable).parent / "aoi-fix"
    return exe if exe.exists() else None


@pytest.mark.skipif(shutil.which("make") is None, reason="make is not installed")
def test_makefile_recipe_builds_once_then_nothing(cohort):
    aoi_fix_cmd = _aoi_fix_command()
    if aoi_fix_cmd is None:
        pytest.skip("the aoi-fix console script is not installed next to this Python")
    args = ["make", "-f", str(RECIPE), f"AOI_FIX={aoi_fix_cmd}", "IN=sessions", "OUT=out",
            "STUDY=study.toml", "AOIS=aois.csv"]
    first = subprocess.run(args + ["-j2"], cwd=cohort, capture_output=True, text=True,
                           timeout=120)
    assert first.returncode == 0, first.stdout + first.stderr
    assert first.stdout.count(" convert ") == 3
    combined = read_combined(cohort / "out", "aoi_summary")
    assert sorted(combined["session"].unique()) == IDS
    for sid in IDS:  # the recipe runs convert itself: same tables as the library
        ref = convert(cohort / "sessions" / sid / "samples.csv", study=cohort / "study.toml",
                      trials=cohort / "sessions" / sid / "trials.csv",
                      aois=cohort / "aois.csv")["aoi_summary"]
        assert len(combined[combined["session"] == sid]) == len(ref) > 0
    assert not (cohort / "out" / "dataset" / "check_quality" / "session=s1").exists()

    before = _mtimes(cohort / "out")
    assert subprocess.run(args + ["-q"], cwd=cohort).returncode == 0  # up to date
    again = subprocess.run(args + ["-j2"], cwd=cohort, capture_output=True, text=True,
                           timeout=60)
    assert again.returncode == 0 and "Nothing to be done" in again.stdout
    assert _mtimes(cohort / "out") == before
    # a newer input makes its session (and only the combine step after it) out of date
    dry = subprocess.run(args + ["-n"], cwd=cohort, capture_output=True, text=True)
    assert " convert " not in dry.stdout
    os.utime(cohort / "sessions" / "s1" / "trials.csv")
    dry = subprocess.run(args + ["-n"], cwd=cohort, capture_output=True, text=True)
    assert dry.stdout.count(" convert ") == 1 and "sessions/s1/samples.csv" in dry.stdout
    assert "combine_sessions" in dry.stdout


def test_combine_sessions_matches_batch_layout(cohort):
    _run(cohort, out="out")
    shutil.rmtree(cohort / "out" / "dataset")
    index = combine_sessions(cohort / "out")
    assert index["session"].tolist() == IDS
    a = read_combined(cohort / "out", "trial_quality")
    assert sorted(a["session"].unique()) == IDS
    assert a["flag_low_validity"].dtype == bool
    # a column only one session has (e.g. from its own study's settings) is kept
    import pyarrow as pa
    import pyarrow.parquet as pq

    f = cohort / "out" / "dataset" / "trial_quality" / "session=s2" / "part-0.parquet"
    t = pq.read_table(f)
    pq.write_table(t.append_column("extra", pa.array(["x"] * len(t))), f)
    b = read_combined(cohort / "out", "trial_quality")
    assert b.groupby("session")["extra"].count().tolist() == [0, 0, len(t)]


def test_numeric_looking_ids_stay_text(cohort):
    (cohort / "sessions.csv").write_text(
        "session,samples,trials\n"
        "01,sessions/s0/samples.csv,sessions/s0/trials.csv\n"
        "02,sessions/s1/samples.csv,sessions/s1/trials.csv\n")
    assert _run(cohort)["session"].tolist() == ["01", "02"]
    assert read_combined(cohort / "out", "fixations")["session"].unique().tolist() == \
        ["01", "02"]
