"""Tests for the ``aoi-fix`` command line (typer's CliRunner; one subprocess)."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import CliRunner

import aoi_fix
from aoi_fix.cli import app
from aoi_fix.output import read_table
from aoi_fix.pipeline import fixations_from_file

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
SAMPLES = FIXTURES / "samples_small.csv"
STUDY = FIXTURES / "study.toml"
COLUMNS = "trial,fixation,onset_ms,offset_ms,duration_ms,x_px,y_px,aoi"

runner = CliRunner()


def _err(result) -> str:
    return getattr(result, "stderr", None) or result.output


def test_version():
    r = runner.invoke(app, ["--version"])
    assert r.exit_code == 0
    assert r.output.strip() == f"aoi-fix {aoi_fix.__version__}"


def test_app_help():
    r = runner.invoke(app, ["--help"])
    assert r.exit_code == 0
    assert "fixations" in r.output and "--version" in r.output
    assert "not a diagnostic device" in r.output


def test_fixations_help():
    r = runner.invoke(app, ["fixations", "--help"])
    assert r.exit_code == 0
    for opt in ("--study", "--out", "--set", "--format"):
        assert opt in r.output


def test_fixations_writes_table(tmp_path):
    out = tmp_path / "fix.csv"
    r = runner.invoke(app, ["fixations", str(SAMPLES), "--study", str(STUDY), "--out", str(out)])
    assert r.exit_code == 0, r.output
    text = out.read_text()
    assert text.splitlines()[0] == COLUMNS
    got = read_table(out)
    # the CLI is a thin face of the library: same table as the Python call
    expected = fixations_from_file(SAMPLES, STUDY)
    assert len(got) == len(expected) > 0
    pd.testing.assert_frame_equal(
        got[["fixation", "onset_ms", "offset_ms", "duration_ms", "x_px", "y_px"]],
        expected[["fixation", "onset_ms", "offset_ms", "duration_ms", "x_px", "y_px"]]
        .round(6), check_dtype=False)
    assert got["trial"].isna().all() and got["aoi"].isna().all()
    assert f"{len(expected)} fixations" in _err(r)
    # no temporary files left beside the output
    assert sorted(p.name for p in tmp_path.iterdir()) == ["fix.csv"]


def test_fixations_set_override_and_parquet(tmp_path):
    out = tmp_path / "fix.parquet"
    r = runner.invoke(app, ["fixations", str(SAMPLES), "--study", str(STUDY), "--out", str(out),
                            "--set", "detection.method=idt", "--format", "parquet"])
    assert r.exit_code == 0, r.output
    got = pd.read_parquet(out)
    assert ",".join(got.columns) == COLUMNS
    expected = fixations_from_file(SAMPLES, STUDY, overrides=["detection.method=idt"])
    pd.testing.assert_series_equal(got["onset_ms"], expected["onset_ms"], check_dtype=False)


def test_bad_input_exits_1_one_line_no_output(tmp_path):
    bad = tmp_path / "bad.csv"
    bad.write_text("time_ms,gaze_x,gaze_y\n0,1,2\n10,oops,3\n")
    out = tmp_path / "out" / "fix.csv"
    r = runner.invoke(app, ["fixations", str(bad), "--study", str(STUDY), "--out", str(out)])
    assert r.exit_code == 1
    err = _err(r).strip()
    assert len(err.splitlines()) == 1
    assert err.startswith("aoi-fix: error:") and "line 3" in err and "gaze_x" in err
    assert not out.exists()
    assert not (out.parent.exists() and any(out.parent.iterdir()))
    assert "Traceback" not in r.output


def test_bad_study_exits_1(tmp_path):
    study = tmp_path / "study.toml"
    study.write_text(STUDY.read_text().replace("distance_mm = 600.0", "distance_mm = -600.0"))
    out = tmp_path / "fix.csv"
    r = runner.invoke(app, ["fixations", str(SAMPLES), "--study", str(study), "--out", str(out)])
    assert r.exit_code == 1
    assert "display.distance_mm" in _err(r)
    assert not out.exists()


def test_failed_run_keeps_previous_output(tmp_path):
    out = tmp_path / "fix.csv"
    out.write_text("previous\n")
    bad = tmp_path / "bad.csv"
    bad.write_text("time_ms,gaze_x,gaze_y\n")
    r = runner.invoke(app, ["fixations", str(bad), "--study", str(STUDY), "--out", str(out)])
    assert r.exit_code == 1
    assert out.read_text() == "previous\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.csv", "fix.csv"]


def test_unknown_set_key_exits_2(tmp_path):
    out = tmp_path / "fix.csv"
    r = runner.invoke(app, ["fixations", str(SAMPLES), "--study", str(STUDY), "--out", str(out),
                            "--set", "detection.no_such_key=3"])
    assert r.exit_code == 2
    err = _err(r)
    assert "no_such_key" in err and "velocity_threshold_deg_s" in err
    assert not out.exists()


def test_bad_format_is_usage_error(tmp_path):
    out = tmp_path / "fix.xlsx"
    r = runner.invoke(app, ["fixations", str(SAMPLES), "--study", str(STUDY), "--out", str(out),
                            "--format", "xlsx"])
    assert r.exit_code == 2
    assert not out.exists()


def test_missing_argument_exits_2():
    r = runner.invoke(app, ["fixations"])
    assert r.exit_code == 2


def test_python_dash_m_version():
    r = subprocess.run([sys.executable, "-m", "aoi_fix", "--version"], capture_output=True,
                       text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip() == f"aoi-fix {aoi_fix.__version__}"


@pytest.mark.skipif(shutil.which("aoi-fix") is None and not (Path(sys.executable).parent
                                                            / "aoi-fix").exists(),
                    reason="console script not installed")
def test_console_script_version():
    exe = shutil.which("aoi-fix") or str(Path(sys.executable).parent / "aoi-fix")
    r = subprocess.run([exe, "--version"], capture_output=True, text=True, timeout=60)
    assert r.returncode == 0 and aoi_fix.__version__ in r.stdout


def test_program_exit_codes_and_output_as_a_process(tmp_path):
    # the console entry leaves with os._exit after flushing (aoi_fix.cli.run): the
    # output must still arrive and the codes must be main()'s
    import subprocess
    import sys as _sys

    ok = subprocess.run([_sys.executable, "-m", "aoi_fix", "--version"], capture_output=True,
                        text=True)
    assert ok.returncode == 0 and ok.stdout.strip().startswith("aoi-fix ")
    usage = subprocess.run([_sys.executable, "-m", "aoi_fix", "--bogus"], capture_output=True,
                           text=True)
    assert usage.returncode == 2 and "usage error" in usage.stderr
    bad = subprocess.run([_sys.executable, "-m", "aoi_fix", "fixations",
                          str(tmp_path / "missing.csv"), "--study", str(tmp_path / "s.toml"),
                          "--out", str(tmp_path / "f.csv")], capture_output=True, text=True)
    assert bad.returncode == 1 and bad.stderr.count("\n") == 1
    assert not (tmp_path / "f.csv").exists()
