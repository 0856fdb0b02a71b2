"""QC figures: written only on request, valid PNG files, atomic with the tables."""

from __future__ import annotations

import pytest

from aoi_fix import simulate
from aoi_fix.pipeline import convert

pytest.importorskip("matplotlib")

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, ISO/IEC 15948)


@pytest.fixture(scope="module")
def session_files(tmp_path_factory):
    ses = simulate.simulate_session("drifting_250hz", n_trials=2, seed=3)
    return simulate.write_session(ses, tmp_path_factory.mktemp("plots"))


def test_plots_written_as_png(session_files, tmp_path):
    p = session_files
    convert(p["samples"], study=p["study"], trials=p["trials"], aois=p["aois"],
            checks=p["checks"], out_dir=tmp_path, plots=True)
    pngs = sorted(x.name for x in tmp_path.glob("*.png"))
    assert pngs == ["qc_quality.png", "qc_trial_1.png"]
    for name in pngs:
        assert (tmp_path / name).read_bytes()[:8] == PNG_MAGIC


def test_no_plots_unless_asked(session_files, tmp_path):
    p = session_files
    convert(p["samples"], study=p["study"], trials=p["trials"], aois=p["aois"],
            out_dir=tmp_path)
    assert not list(tmp_path.glob("*.png"))
