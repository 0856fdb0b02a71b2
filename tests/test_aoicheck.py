"""``aoi-fix aois check``: findings about an AOI file, on hand-made files.

Every expected area and frame list is worked out by hand from the squares
below (a 200 x 100 video).  No published numbers are used.
"""

from __future__ import annotations

import json

import pandas as pd
import pytest
import shapely
from typer.testing import CliRunner

from aoi_fix.aoicheck import FINDING_COLUMNS, check_aois, default_frames, run_check
from aoi_fix.aois import read_aois
from aoi_fix.cli import app
from aoi_fix.config import study_from_dict
from aoi_fix.errors import InputFormatError, UsageError

runner = CliRunner()

STUDY_TOML = """[display]
width_px = 1280
height_px = 720
width_mm = 520.0
height_mm = 292.5
distance_mm = 600.0

[samples]
time = "t"
x = "x"
y = "y"

[stimuli.clip]
fps = 25
width_px = 200
height_px = 100
"""


def sq(x, y, s):
    return f'"POLYGON (({x} {y}, {x + s} {y}, {x + s} {y + s}, {x} {y + s}, {x} {y}))"'


# frames 0..4 of a 200 x 100 video
MESSY = (
    "stimulus,frame,aoi,wkt,keyframe\n"
    f"clip,,face,{sq(10, 10, 50)},\n"                    # row 2: fixed, 2500 px2
    f"clip,,eye,{sq(20, 20, 10)},\n"                     # row 3: inside the face
    f"clip,0,ball,{sq(50, 50, 20)},\n"                   # row 4: 10 x 10 over the face
    f"clip,1,ball,{sq(100, 50, 20)},\n"                  # row 5
    f'clip,4,ball,"POLYGON ((190 80, 210 80, 210 90, 190 90, 190 80))",\n'  # row 6: 100 px2 off
    'clip,2,bad,"POLYGON ((0 0, 10 10, 10 0, 0 10, 0 0))",\n'            # row 7: bow-tie
    'clip,3,bad2,"LINESTRING (0 0, 1 1)",\n'                             # row 8: not a polygon
    f"clip,0,mover,{sq(150, 10, 10)},true\n"             # row 9
    'clip,4,mover,"POLYGON ((150 10, 160 10, 155 18, 150 10))",true\n'   # row 10: 3 vertices
)


@pytest.fixture
def files(tmp_path):
    study = tmp_path / "study.toml"
    study.write_text(STUDY_TOML)
    aois = tmp_path / "aois.csv"
    aois.write_text(MESSY)
    return {"study": study, "aois": aois, "dir": tmp_path}


def test_findings_on_a_messy_file(files):
    got = check_aois(files["aois"], study=files["study"])
    assert list(got.columns) == list(FINDING_COLUMNS)
    table = [tuple(r) for r in got[["severity", "check", "aoi", "other_aoi", "frames",
                                    "location"]].itertuples(index=False)]
    assert table == [
        ("error", "self_intersection", "bad", "", "2", "row 7"),
        ("error", "invalid_polygon", "bad2", "", "3", "row 8"),
        ("error", "keyframe_shape", "mover", "", "0-4", "row 9 and row 10"),
        ("warning", "outside_video", "ball", "", "4", ""),
        ("warning", "overlap", "ball", "face", "0", ""),
        ("warning", "track_gap", "ball", "", "2-3", ""),
        ("warning", "overlap", "eye", "face", "0-4", ""),
    ]
    area = dict(zip(zip(got["check"], got["aoi"]), got["area_px2"]))
    assert area[("overlap", "ball")] == pytest.approx(100.0)
    assert area[("outside_video", "ball")] == pytest.approx(100.0)
    assert area[("overlap", "eye")] == pytest.approx(100.0)
    assert got.loc[got["aoi"] == "eye", "n_frames"].tolist() == [5]
    msgs = dict(zip(zip(got["check"], got["aoi"]), got["message"]))
    assert "'eye' lies inside 'face' (nested)" in msgs[("overlap", "eye")]
    assert "Self-intersection" in msgs[("self_intersection", "bad")]
    assert msgs[("self_intersection", "bad")].startswith(f"{files['aois']}: row 7, column 'wkt'")
    assert "found a LINESTRING" in msgs[("invalid_polygon", "bad2")]
    assert "4 vertices vs a POLYGON with 3 vertices" in msgs[("keyframe_shape", "mover")]
    assert all("\n" not in m for m in got["message"])


def test_clean_file_gives_empty_typed_table(files):
    files["aois"].write_text("stimulus,frame,aoi,wkt\n" + f"clip,,a,{sq(0, 0, 10)}\n"
                             + f"clip,,b,{sq(10, 0, 10)}\n")  # touching edges, no overlap
    got = check_aois(files["aois"], study=files["study"])
    assert got.empty and list(got.columns) == list(FINDING_COLUMNS)
    assert str(got["n_frames"].dtype) == "Int64" and got["area_px2"].dtype == float


def test_keyframed_track_checked_frame_by_frame(files):
    # moving right 10 px per frame from x = 150: crosses the edge x = 200 on frame 4,
    # is wholly past it on 5 and (held) on 6, absent 7-8, back on 9
    files["aois"].write_text("stimulus,frame,aoi,wkt,keyframe\n"
                             f"clip,0,car,{sq(150, 10, 20)},true\n"
                             f"clip,5,car,{sq(200, 10, 20)},true\n"
                             "clip,7,car,absent,true\n"
                             f"clip,9,car,{sq(0, 10, 20)},true\n")
    got = check_aois(files["aois"], study=files["study"])
    rows = {c: (f, a) for c, f, a in zip(got["check"], got["frames"], got["area_px2"])}
    assert rows["outside_video"] == ("4-6", pytest.approx(400.0))  # held on 6, 20x20 off
    assert rows["track_gap"][0] == "7-8"
    assert "entirely outside on 2" in got.loc[got["check"] == "outside_video",
                                              "message"].iat[0]


def test_geojson_invalid_feature_located(files):
    doc = {"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"stimulus": "clip", "aoi": "a", "frame": None},
         "geometry": {"type": "Polygon",
                      "coordinates": [[[0, 0], [10, 10], [10, 0], [0, 10], [0, 0]]]}},
        {"type": "Feature", "properties": {"stimulus": "clip", "aoi": "b", "frame": None},
         "geometry": json.loads(shapely.to_geojson(shapely.box(0, 0, 5, 5)))}]}
    p = files["dir"] / "aois.geojson"
    p.write_text(json.dumps(doc))
    got = check_aois(p, study=files["study"])
    assert got[["check", "aoi", "frames", "location"]].values.tolist() == [
        ["self_intersection", "a", "all", "features[0]"]]


def test_format_errors_still_raise(files):
    files["aois"].write_text("stimulus,frame,aoi\nclip,0,a\n")
    with pytest.raises(InputFormatError, match="missing column"):
        check_aois(files["aois"], study=files["study"])


def test_result_does_not_depend_on_row_order(files):
    lines = MESSY.splitlines()
    rev = "\n".join([lines[0]] + lines[:0:-1]) + "\n"
    a = check_aois(files["aois"], study=files["study"])
    files["aois"].write_text(rev)
    b = check_aois(files["aois"], study=files["study"])
    cols = ["severity", "check", "aoi", "other_aoi", "frames", "n_frames", "area_px2"]
    pd.testing.assert_frame_equal(a[cols], b[cols])


def test_default_frames(files):
    files["aois"].write_text("stimulus,frame,aoi,wkt\n" + f"clip,100,a,{sq(0, 0, 10)}\n")
    t = read_aois(files["aois"], stimuli=study_from_dict({
        "display": {"width_px": 1, "height_px": 1, "width_mm": 1, "height_mm": 1,
                    "distance_mm": 1}, "samples": {"time": "t", "x": "x", "y": "y"},
        "stimuli": {"clip": {"fps": 25, "width_px": 200, "height_px": 100}}}).stimuli)
    assert default_frames(t, "clip") == [0, 20, 40, 60, 80, 100]


def test_run_check_writes_findings_and_sheet(files):
    out = files["dir"] / "out"
    got = run_check(files["aois"], study=files["study"], out_dir=out, plots=True,
                    frames=[0, 2, 4])
    assert sorted(p.name for p in out.iterdir()) == ["aoi_check.csv", "aoi_check_clip.png"]
    back = pd.read_csv(out / "aoi_check.csv", keep_default_na=False)
    assert back["check"].tolist() == got["check"].tolist()
    assert (out / "aoi_check_clip.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_plots_need_out(files):
    with pytest.raises(UsageError, match="--plots needs --out"):
        run_check(files["aois"], study=files["study"], plots=True)


# --------------------------------------------------------------------------- CLI

def _cli(*args):
    return runner.invoke(app, ["aois", "check", *map(str, args)])


def test_cli_exits_1_on_errors_and_prints_table(files):
    r = _cli(files["aois"], "--study", files["study"])
    assert r.exit_code == 1
    assert "self_intersection" in r.stdout and "track_gap" in r.stdout
    assert "3 error(s), 4 warning(s)" in r.output


def test_cli_exits_0_with_warnings_only(files):
    files["aois"].write_text("stimulus,frame,aoi,wkt\n" + f"clip,,a,{sq(0, 0, 10)}\n"
                             + f"clip,,b,{sq(5, 0, 10)}\n")
    r = _cli(files["aois"], "--study", files["study"])
    assert r.exit_code == 0, r.output
    assert "overlap" in r.stdout and "0 error(s), 1 warning(s)" in r.output


def test_cli_out_plots_frames(files):
    out = files["dir"] / "o"
    r = _cli(files["aois"], "--study", files["study"], "--out", out, "--plots",
             "--frames", "0,4")
    assert r.exit_code == 1  # the messy file has errors; results are written anyway
    assert (out / "aoi_check.csv").is_file() and (out / "aoi_check_clip.png").is_file()


@pytest.mark.parametrize("extra", [["--plots"], ["--frames", "a,b"], ["--frames", "-3"]])
def test_cli_usage_errors_exit_2(files, extra):
    r = _cli(files["aois"], "--study", files["study"], *extra)
    assert r.exit_code == 2


def test_cli_format_error_one_line(files):
    files["aois"].write_text("stimulus,frame,aoi\nclip,0,a\n")
    r = _cli(files["aois"], "--study", files["study"])
    assert r.exit_code == 1
    err = getattr(r, "stderr", None) or r.output
    assert "missing column(s) 'wkt'" in err and len(err.strip().splitlines()) == 1


def test_every_row_invalid_still_reports(files):
    files["aois"].write_text("stimulus,frame,aoi,wkt\n"
                             'clip,0,a,"POLYGON ((0 0, 10 10, 10 0, 0 10, 0 0))"\n'
                             'clip,1,a,"POLYGON ((0 0, 1 0"\n')
    got = check_aois(files["aois"], study=files["study"])
    assert got[["check", "frames", "location"]].values.tolist() == [
        ["invalid_polygon", "1", "row 3"], ["self_intersection", "0", "row 2"]]
    assert "not well-formed" in got["message"].iat[0]
