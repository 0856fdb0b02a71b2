"""A BIDS recording goes through `fixations` with a study that has no [samples]/[display]."""

from __future__ import annotations

from pathlib import Path

from typer.testing import CliRunner

from aoi_fix.bids import read_bids_samples
from aoi_fix.cli import app
from aoi_fix.output import read_table
from aoi_fix.pipeline import fixations_from_file

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures" / "bids"
PHYSIO = FIXTURES / "sub-01" / "beh" / "sub-01_task-movie_recording-eye1_physio.tsv.gz"


def test_fixations_from_bids_needs_no_samples_section(tmp_path):
    study = tmp_path / "study.toml"
    study.write_text("[detection]\nmin_fixation_ms = 60.0\n")
    got = fixations_from_file(PHYSIO, study)
    # same as detecting on what the BIDS reader gives with the sidecar's geometry
    samples, display, cols = read_bids_samples(PHYSIO)
    assert len(got) > 0
    t0, t1 = samples["t_ms"].iat[0], samples["t_ms"].iat[-1]
    assert (got["onset_ms"] >= t0).all() and (got["offset_ms"] <= t1 + 10.0 + 1e-9).all()


def test_cli_fixations_on_bids(tmp_path):
    study = tmp_path / "study.toml"
    study.write_text("[detection]\nmethod = \"idt\"\n")
    out = tmp_path / "fix.csv"
    r = CliRunner().invoke(app, ["fixations", str(PHYSIO), "--study", str(study),
                                 "--out", str(out)])
    assert r.exit_code == 0, r.output
    assert len(read_table(out)) > 0
