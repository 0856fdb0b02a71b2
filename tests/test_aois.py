"""AOIs: reading WKT/GeoJSON polygons per frame and matching points to them.

Expected values are worked out by hand from the fixture polygons in
``fixtures/aois/shapes.csv`` (the same shapes as ``shapes.geojson``); the
point-in-polygon cross-check uses matplotlib's ``Path.contains_points`` as a
general-purpose reference library.  No published numbers are used.
"""

from __future__ import annotations

import json
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import shapely
from shapely import affinity
from hypothesis import given, settings
from hypothesis import strategies as st

from aoi_fix.aois import AoiTable, match_points, read_aois, stimulus_check
from aoi_fix.config import Stimulus
from aoi_fix.errors import ConfigError, InputFormatError

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures" / "aois"
STIMULI = {"clip": Stimulus(fps=25.0, width_px=200, height_px=100),
           "speaker": Stimulus(fps=30.0, width_px=100, height_px=100)}
HEADER = "stimulus,frame,aoi,wkt\n"
SQUARE = '"POLYGON ((10 10, 30 10, 30 30, 10 30, 10 10))"'


@pytest.fixture(scope="module", params=["shapes.csv", "shapes.geojson"])
def table(request):
    return read_aois(FIXTURES / request.param, stimuli=STIMULI)


def hits(table, stim, frame, pts, **kw):
    pts = np.asarray(pts, dtype=float)
    idx = match_points(table, stim, frame, pts[:, 0], pts[:, 1], **kw)
    names = table.names(stim, kw.get("priority", ()))
    return [names[i] if i >= 0 else None for i in idx]


def write(text: str, name: str = "aois.csv") -> Path:
    d = Path(tempfile.mkdtemp())
    p = d / name
    p.write_text(text, encoding="utf-8")
    return p


# --------------------------------------------------------------------------- reading

def test_names_in_priority_order_by_median_area(table):
    # areas: pair 2 x 100 = 200, mover 100 each frame, square 400,
    # donut 40*40 - 20*20 = 1200  -> smallest first.
    assert table.stimuli() == ("clip", "speaker")
    assert table.names("clip") == ("mover", "pair", "square", "donut")
    assert table.names("speaker") == ("eye", "face")
    assert table.frames("clip").tolist() == [0, 1, 3]
    assert table.names("unknown") == ()


def test_csv_and_geojson_give_the_same_table():
    a = read_aois(FIXTURES / "shapes.csv", stimuli=STIMULI).to_frame()
    b = read_aois(FIXTURES / "shapes.geojson", stimuli=STIMULI).to_frame()
    pd.testing.assert_frame_equal(a.drop(columns="wkt"), b.drop(columns="wkt"))
    ga = shapely.from_wkt(a["wkt"].to_numpy())
    gb = shapely.from_wkt(b["wkt"].to_numpy())
    assert shapely.equals(ga, gb).all()       # same shapes whatever the winding order


def test_to_frame_marks_fixed_aois_with_na(table):
    df = table.to_frame()
    assert list(df.columns) == ["stimulus", "frame", "aoi", "wkt", "area_px2"]
    assert df.loc[df["aoi"] == "square", "frame"].isna().all()
    assert df.loc[df["aoi"] == "mover", "frame"].tolist() == [0, 1, 3]


# --------------------------------------------------------------------------- hand-worked hits

def test_square_inside_outside_edges_and_vertices(table):
    pts = [(20, 20), (9.999, 20), (10, 20), (30, 25), (20, 10), (20, 30),   # inside, out, edges
           (10, 10), (30, 30), (30, 10), (10, 30),                          # vertices
           (30.000001, 30), (40, 40)]
    assert hits(table, "clip", 0, pts) == [
        "square", None, "square", "square", "square", "square",
        "square", "square", "square", "square", None, None]


def test_polygon_with_hole(table):
    pts = [(55, 15), (70, 30), (60, 30), (80, 20), (70, 20), (59.5, 30), (60.5, 30), (50, 50)]
    # ring, hole centre, hole edge (inside by the edge rule), hole vertex,
    # hole edge, ring just left of the hole, inside the hole, outer vertex
    assert hits(table, "clip", 0, pts) == [
        "donut", None, "donut", "donut", "donut", "donut", None, "donut"]


def test_multipolygon(table):
    pts = [(105, 15), (125, 15), (115, 15), (110, 20), (120, 10), (111, 15)]
    assert hits(table, "clip", 0, pts) == ["pair", "pair", None, "pair", "pair", None]


def test_moving_square_and_absent_frame(table):
    p = [(5, 65), (15, 65), (35, 65), (10, 65)]
    assert hits(table, "clip", 0, p) == ["mover", None, None, "mover"]
    assert hits(table, "clip", 1, p) == [None, "mover", None, "mover"]
    assert hits(table, "clip", 2, p) == [None, None, None, None]      # no row for frame 2
    assert hits(table, "clip", 3, p) == [None, None, "mover", None]
    assert hits(table, "clip", 4, p) == [None, None, None, None]      # past the last row
    assert hits(table, "clip", 10**9, p) == [None, None, None, None]


def test_per_point_frames_in_any_order(table):
    frame = np.array([3, 0, 1, 2, 0, 3, -1])
    x = np.array([35, 5, 15, 15, 15, 5, 5.0])
    y = np.full(7, 65.0)
    idx = match_points(table, "clip", frame, x, y)
    m = table.names("clip").index("mover")
    assert idx.tolist() == [m, m, m, -1, -1, -1, -1]


def test_nan_and_no_frame_give_minus_one(table):
    idx = match_points(table, "clip", [0, 0, -1, 0], [np.nan, 20, 20, 20],
                       [20, np.nan, 20, 20])
    assert idx.tolist() == [-1, -1, -1, table.names("clip").index("square")]
    assert match_points(table, "clip", 0, [], []).shape == (0,)
    assert match_points(table, "nothing", 0, [20.0], [20.0]).tolist() == [-1]


def test_overlap_priority_default_and_explicit(table):
    # eye (200 px^2) lies inside face (10000 px^2): the smaller AOI wins by default.
    pts = [(30, 25), (50, 50), (21, 25)]
    assert hits(table, "speaker", 0, pts) == ["eye", "face", "eye"]
    assert hits(table, "speaker", 1, pts) == ["eye", "face", "face"]   # the eye moved right
    assert table.names("speaker", ["face"]) == ("face", "eye")
    assert hits(table, "speaker", 0, pts, priority=["face"]) == ["face", "face", "face"]
    # a name of another stimulus is skipped here, a name of none is a typo
    assert table.names("speaker", ["square", "eye"]) == ("eye", "face")
    with pytest.raises(ConfigError, match="aois.priority.*'nose'"):
        table.names("speaker", ["nose"])


def test_priority_uses_median_area_and_breaks_ties_by_name():
    b = shapely.box
    df = pd.DataFrame({
        "stimulus": ["s"] * 5, "frame": [0, 1, 2, -1, -1], "aoi": ["grow", "grow", "grow",
                                                                  "zeta", "alpha"],
        # grow: areas 1, 1, 10000 -> median 1; zeta and alpha both 4 -> by name.
        "geometry": [b(0, 0, 1, 1), b(0, 0, 1, 1), b(0, 0, 100, 100), b(0, 0, 2, 2),
                     b(0, 0, 2, 2)]})
    assert AoiTable(df).names("s") == ("grow", "alpha", "zeta")


def test_margin_grows_every_aoi(table):
    # square 10..30; margin 2 px: 1.5 px off an edge is in, 2.5 px is out; off the
    # corner the margin is round: (31.2, 31.2) is 1.70 px away (in), (31.5, 31.5)
    # is 2.12 px away (out).
    pts = [(31.5, 20), (32.5, 20), (20, 8.5), (31.2, 31.2), (31.5, 31.5), (32, 20)]
    assert hits(table, "clip", 0, pts) == [None] * 6
    assert hits(table, "clip", 0, pts, margin_px=2.0) == [
        "square", None, "square", "square", None, "square"]
    # the hole of the donut shrinks by the margin: (70, 30) is 10 px from its edge
    assert hits(table, "clip", 0, [(61, 30), (70, 30)], margin_px=2.0) == ["donut", None]
    assert hits(table, "clip", 0, [(70, 30)], margin_px=10.0) == ["donut"]
    # moving AOIs grow too, on their own frame only
    assert hits(table, "clip", 1, [(21, 65), (-1, 65)], margin_px=2.0) == ["mover", None]
    with pytest.raises(ConfigError, match="margin"):
        match_points(table, "clip", 0, [1.0], [1.0], margin_px=-1)


def test_margin_overlap_is_resolved_by_priority():
    b = shapely.box
    df = pd.DataFrame({"stimulus": ["s", "s"], "frame": [-1, -1], "aoi": ["left", "right"],
                       "geometry": [b(0, 0, 10, 10), b(12, 0, 22, 10)]})
    t = AoiTable(df)
    # x = 11 is 1 px from both once grown by 2 px; equal areas -> "left" by name.
    assert hits(t, "s", 0, [(11, 5)], margin_px=2.0) == ["left"]
    assert hits(t, "s", 0, [(11, 5)], margin_px=2.0, priority=["right"]) == ["right"]


def test_static_and_moving_aois_mix_with_priority():
    b = shapely.box
    df = pd.DataFrame({"stimulus": ["s"] * 3, "frame": [-1, 0, 5], "aoi": ["bg", "dot", "dot"],
                       "geometry": [b(0, 0, 100, 100), b(0, 0, 10, 10), b(50, 50, 60, 60)]})
    t = AoiTable(df)
    f = np.array([0, 5, 5, 3, 99])
    x = np.array([5, 5, 55, 5, 55.0])
    assert hits(t, "s", f, np.c_[x, x]) == ["dot", "bg", "dot", "bg", "bg"]


# --------------------------------------------------------------------------- reference checks

def _mpl_contains(geom, x, y):
    from matplotlib.path import Path as MplPath

    pts = np.c_[x, y]
    out = np.zeros(len(x), dtype=bool)
    for poly in getattr(geom, "geoms", [geom]):
        inside = MplPath(np.asarray(poly.exterior.coords)).contains_points(pts)
        for hole in poly.interiors:
            inside &= ~MplPath(np.asarray(hole.coords)).contains_points(pts)
        out |= inside
    return out


@pytest.mark.parametrize("wkt", [
    "POLYGON ((10 10, 30 10, 30 30, 10 30, 10 10))",
    "POLYGON ((50 10, 90 10, 90 50, 50 50, 50 10), (60 20, 80 20, 80 40, 60 40, 60 20))",
    # concave "C" with a notch, and a star-ish shape given clockwise
    "POLYGON ((0 0, 80 0, 80 20, 20 20, 20 60, 80 60, 80 80, 0 80, 0 0))",
    "POLYGON ((50 5, 40 40, 5 45, 38 60, 25 95, 50 70, 75 95, 62 60, 95 45, 60 40, 50 5))",
    "MULTIPOLYGON (((0 0, 30 0, 15 40, 0 0)), ((40 40, 90 40, 90 90, 40 90, 40 40), "
    "(50 50, 60 50, 55 70, 50 50)))",
])
def test_matches_matplotlib_on_random_points(wkt):
    geom = shapely.from_wkt(wkt)
    df = pd.DataFrame({"stimulus": ["s"], "frame": [-1], "aoi": ["a"], "geometry": [geom]})
    t = AoiTable(df)
    rng = np.random.default_rng(7)
    x0, y0, x1, y1 = geom.bounds
    x = rng.uniform(x0 - 5, x1 + 5, 5000)
    y = rng.uniform(y0 - 5, y1 + 5, 5000)
    # exclude points within 1e-9 of an edge: there the answer is our convention
    far = shapely.distance(shapely.boundary(geom), shapely.points(x, y)) > 1e-9
    x, y = x[far], y[far]
    got = match_points(t, "s", 0, x, y) == 0
    want = _mpl_contains(geom, x, y)
    assert got.sum() > 200 and (~got).sum() > 200          # both outcomes exercised
    np.testing.assert_array_equal(got, want)


def test_many_frames_match_a_per_frame_reference():
    # 200 frames x 3 moving AOIs, points on random frames: compare with a plain
    # per-frame shapely loop (the test may loop; the library must not).
    rng = np.random.default_rng(3)
    rows = []
    for f in range(200):
        for k, name in enumerate(["a", "b", "c"]):
            if (f + k) % 7 == 0:
                continue                                     # absent on some frames
            cx, cy = 20 + f * 0.3 + 25 * k, 40 + 10 * np.sin(f / 10 + k)
            rows.append(("s", f, name, shapely.Point(cx, cy).buffer(12 + k, quad_segs=4)))
    t = AoiTable(pd.DataFrame(rows, columns=["stimulus", "frame", "aoi", "geometry"]))
    n = 20000
    frame = rng.integers(-1, 210, n)
    x, y = rng.uniform(0, 160, n), rng.uniform(0, 80, n)
    got = match_points(t, "s", frame, x, y)
    order = t.names("s")
    want = np.full(n, -1)
    for f in np.unique(frame[frame >= 0]):
        sel = np.flatnonzero(frame == f)
        for rank in range(len(order) - 1, -1, -1):
            g = t.geometry("s", order[rank], int(f))
            if g is not None:
                inside = shapely.intersects_xy(g, x[sel], y[sel])
                want[sel[inside]] = rank
    np.testing.assert_array_equal(got, want)


# --------------------------------------------------------------------------- cell grid
# Large calls classify most points with a per-polygon grid of cells (cells with
# no edge are wholly inside or outside) and leave only edge cells to GEOS.  The
# answer must be exactly that of testing every point with shapely.intersects_xy
# (the general-purpose reference here), including points on edges, on vertices
# and on the grid's own cell lines.

GRID_SHAPES = [
    "POLYGON ((10 10, 30 10, 30 30, 10 30, 10 10))",
    "POLYGON ((50 10, 90 10, 90 50, 50 50, 50 10), (60 20, 80 20, 80 40, 60 40, 60 20))",
    "POLYGON ((0 0, 80 0, 80 20, 20 20, 20 60, 80 60, 80 80, 0 80, 0 0))",
    "POLYGON ((50 5, 40 40, 5 45, 38 60, 25 95, 50 70, 75 95, 62 60, 95 45, 60 40, 50 5))",
    "MULTIPOLYGON (((0 0, 30 0, 15 40, 0 0)), ((40 40, 90 40, 90 90, 40 90, 40 40), "
    "(50 50, 60 50, 55 70, 50 50)))",
    "POLYGON ((0 0, 100 0.5, 0 1, 0 0))",                      # a sliver thinner than a cell
    "POLYGON ((0.1 0.3, 7.7 0.3, 7.7 9.1, 0.1 9.1, 0.1 0.3))",  # edges on the grid's lines
]


def _probe_points(geom, rng, n=4000):
    """Random points in and around the box, plus vertices, points on edges and
    points on the lines of the cell grid over the box."""
    from aoi_fix.aois import _GRID_CELLS as k

    x0, y0, x1, y1 = geom.bounds
    xs = [rng.uniform(x0 - 2, x1 + 2, n)]
    ys = [rng.uniform(y0 - 2, y1 + 2, n)]
    xy = shapely.get_coordinates(shapely.boundary(geom))
    xs.append(xy[:, 0])
    ys.append(xy[:, 1])
    t = rng.uniform(0, 1, len(xy) - 1)
    xs.append(xy[:-1, 0] + t * (xy[1:, 0] - xy[:-1, 0]))      # on (or a rounding off) edges
    ys.append(xy[:-1, 1] + t * (xy[1:, 1] - xy[:-1, 1]))
    gx = x0 + np.arange(k + 1) * ((x1 - x0) / k)
    gy = y0 + np.arange(k + 1) * ((y1 - y0) / k)
    xs.append(np.repeat(gx, k + 1))
    ys.append(np.tile(gy, k + 1))
    return np.concatenate(xs), np.concatenate(ys)


@pytest.mark.parametrize("wkt", GRID_SHAPES)
@pytest.mark.parametrize("margin", [0.0, 1.5])
def test_cell_grid_gives_the_answer_of_testing_every_point(wkt, margin, monkeypatch):
    from aoi_fix import aois as aois_mod

    geom = shapely.from_wkt(wkt)
    rng = np.random.default_rng(5)
    # a moving copy on 3 frames and a fixed copy: both code paths
    rows = [("s", f, "m", affinity.translate(geom, 3.0 * f, -2.0 * f)) for f in range(3)]
    rows.append(("s", -1, "z", geom))
    x, y = _probe_points(geom, rng)
    frame = rng.integers(-1, 3, x.size)
    for name in ("m", "z"):
        df = pd.DataFrame([r for r in rows if r[2] == name],
                          columns=["stimulus", "frame", "aoi", "geometry"])
        plain = AoiTable(df)
        gridded = AoiTable(df)
        monkeypatch.setattr(aois_mod, "_GRID_MIN_POINTS_PER_POLYGON", 0)
        got = match_points(gridded, "s", frame, x, y, margin_px=margin)
        assert gridded._track("s", name).grid(margin) is not None     # the grid was used
        monkeypatch.setattr(aois_mod, "_GRID_MIN_POINTS_PER_POLYGON", 10 ** 12)
        want = match_points(plain, "s", frame, x, y, margin_px=margin)
        assert plain._track("s", name).grid(margin) is None
        np.testing.assert_array_equal(got, want)
        assert (got == 0).sum() > 100 and (got == -1).sum() > 100


def test_cell_grid_classes_against_matplotlib():
    # cells the grid calls inside (outside) have their four corners and centre
    # inside (outside) per matplotlib.path, an independent point-in-polygon code
    from matplotlib.path import Path as MplPath

    from aoi_fix.aois import _EDGE, _GRID_CELLS, _INSIDE, _OUTSIDE, _cell_grid

    geom = shapely.from_wkt(GRID_SHAPES[3])                   # the concave star
    g = np.array([geom, None], dtype=object)
    b = shapely.bounds(g)
    classes, sx, sy = _cell_grid(g, *(b[:, k].copy() for k in range(4)))
    assert (classes[1] == _EDGE).all()                        # the None slot
    k = _GRID_CELLS
    iy, ix = np.divmod(np.arange(k * k), k)
    x0, y0 = b[0, 0], b[0, 1]
    path = MplPath(np.asarray(geom.exterior.coords))
    for cls, want in ((_INSIDE, True), (_OUTSIDE, False)):
        sel = classes[0] == cls
        assert sel.sum() > 10
        for fx, fy in ((0.5, 0.5), (0.01, 0.01), (0.99, 0.01), (0.01, 0.99), (0.99, 0.99)):
            px = x0 + (ix[sel] + fx) / sx[0]
            py = y0 + (iy[sel] + fy) / sy[0]
            assert (path.contains_points(np.c_[px, py]) == want).all()


ROWS = (FIXTURES / "shapes.csv").read_text().splitlines()[1:]
PROBE = np.random.default_rng(11)
PX, PY = PROBE.uniform(-5, 140, 3000), PROBE.uniform(-5, 105, 3000)
PF = PROBE.integers(-1, 5, 3000)
BASE = read_aois(FIXTURES / "shapes.csv", stimuli=STIMULI)


@settings(max_examples=25, deadline=None)
@given(st.permutations(ROWS))
def test_row_order_of_the_file_does_not_matter(rows):
    t = read_aois(write(HEADER + "\n".join(rows) + "\n"), stimuli=STIMULI)
    for stim in ("clip", "speaker"):
        assert t.names(stim) == BASE.names(stim)
        np.testing.assert_array_equal(match_points(t, stim, PF, PX, PY, margin_px=1.0),
                                      match_points(BASE, stim, PF, PX, PY, margin_px=1.0))


def test_table_is_read_only(table):
    with pytest.raises(AttributeError):
        table.source = "x"


# --------------------------------------------------------------------------- errors

@pytest.mark.parametrize("body, expect", [
    (HEADER + f"clip,,a,{SQUARE}\nclip,,b,\"POLYGON ((0 0, 10 10, 10 0, 0 10, 0 0))\"\n",
     "row 3, column 'wkt': found an invalid polygon (Self-intersection[5 5])"),
    (HEADER + "clip,,a,\"POLYGON ((0 0, 10 0, 10 10, 0 10, 0 0), (20 20, 30 20, 30 30, "
              "20 20))\"\n", "row 2, column 'wkt': found an invalid polygon (Hole lies outside"),
    (HEADER + "clip,,a,\"LINESTRING (0 0, 10 10)\"\n",
     "row 2, column 'wkt': found a LINESTRING, expected POLYGON or MULTIPOLYGON"),
    (HEADER + "clip,,a,\"POINT (1 1)\"\n", "found a POINT"),
    (HEADER + "clip,,a,\"POLYGN ((0 0, 1 0, 1 1, 0 0))\"\n",
     "row 2, column 'wkt': found 'POLYGN ((0 0, 1 0, 1 1, 0 0))', which is not well-formed"),
    (HEADER + "clip,,a,\"POLYGON EMPTY\"\n", "row 2, column 'wkt': found an empty polygon"),
    (HEADER + "clip,,a,\n", "row 2, column 'wkt': found an empty cell"),
    (HEADER + f"clip,-1,a,{SQUARE}\n", "row 2, column 'frame': found '-1' (negative)"),
    (HEADER + f"clip,1.5,a,{SQUARE}\n", "row 2, column 'frame': found '1.5' (fractional)"),
    (HEADER + f"clip,x,a,{SQUARE}\n", "row 2, column 'frame': found 'x' (not a number)"),
    (HEADER + f"film,0,a,{SQUARE}\n", "row 2, column 'stimulus': found 'film', expected a "
                                      "stimulus with a [stimuli.NAME] entry"),
    (HEADER + f"clip,0,(none),{SQUARE}\n", "row 2, column 'aoi': found '(none)', which is "
                                           "reserved"),
    (HEADER + f"clip,0,(off-video),{SQUARE}\n", "found '(off-video)', which is reserved"),
    (HEADER + f"clip,0,,{SQUARE}\n", "row 2, column 'aoi': found '', expected a non-empty"),
    (HEADER + f"clip,0,a,{SQUARE}\n\nclip,0,b,{SQUARE}\nclip,0,a,{SQUARE}\n",
     "row 5: found AOI 'a' of stimulus 'clip' on frame 0 again (first at row 2)"),
    (HEADER + f"clip,,a,{SQUARE}\nclip,3,a,{SQUARE}\n",
     "row 3: found AOI 'a' of stimulus 'clip' on frame 3 although row 2 gives it for every "
     "frame"),
    ("stimulus,frame,wkt\nclip,0,x\n", "row 1: missing column(s) 'aoi'"),
    (HEADER, "no AOI rows"),
    ("", "empty file"),
])
def test_csv_errors_name_file_row_and_column(body, expect):
    p = write(body, name="faces_aois.csv")
    with pytest.raises(InputFormatError) as e:
        read_aois(p, stimuli=STIMULI)
    msg = str(e.value)
    assert "faces_aois.csv" in msg
    assert expect in msg
    assert "\n" not in msg


def _feature(geom, **props):
    props = {"stimulus": "clip", "frame": 0, "aoi": "a", **props}
    return {"type": "Feature", "properties": props, "geometry": geom}


SQ = {"type": "Polygon", "coordinates": [[[0, 0], [10, 0], [10, 10], [0, 10], [0, 0]]]}


@pytest.mark.parametrize("doc, expect", [
    ({"type": "FeatureCollection", "features": [
        _feature(SQ), _feature({"type": "Polygon",
                                "coordinates": [[[0, 0], [10, 0], [10, 10], [0, 10]]]})]},
     "features[1]: ring 0 is not closed"),
    ({"type": "FeatureCollection", "features": [
        _feature({"type": "Polygon", "coordinates": [[[0, 0], [10, 0], [0, 0]]]})]},
     "features[0]: ring 0 has 3 positions, expected a closed ring of at least 4"),
    ({"type": "FeatureCollection", "features": [
        _feature({"type": "LineString", "coordinates": [[0, 0], [1, 1]]})]},
     "features[0]: found geometry type 'LineString'"),
    ({"type": "FeatureCollection", "features": [
        _feature({"type": "Polygon", "coordinates": [[[0, 0], [10, 10], [10, 0], [0, 10],
                                                      [0, 0]]]})]},
     "features[0]: found an invalid polygon (Self-intersection[5 5])"),
    ({"type": "FeatureCollection", "features": [_feature(SQ, frame=2.5)]},
     "features[0], property 'frame': found 2.5 (fractional)"),
    ({"type": "FeatureCollection", "features": [_feature(SQ, frame="3")]},
     "features[0], property 'frame': found the string '3'"),
    ({"type": "FeatureCollection", "features": [_feature(SQ, aoi="(none)")]},
     "features[0], property 'aoi': found '(none)', which is reserved"),
    ({"type": "FeatureCollection", "features": [_feature(SQ, stimulus="film")]},
     "features[0], property 'stimulus': found 'film'"),
    ({"type": "FeatureCollection", "features": [_feature(SQ), _feature(SQ)]},
     "features[1]: found AOI 'a' of stimulus 'clip' on frame 0 again (first at features[0])"),
    ({"type": "FeatureCollection", "features": []}, "found no features"),
    ({"type": "Feature"}, "found top-level type 'Feature', expected a GeoJSON FeatureCollection"),
])
def test_geojson_errors_name_file_and_feature(doc, expect):
    p = write(json.dumps(doc), name="shapes.geojson")
    with pytest.raises(InputFormatError) as e:
        read_aois(p, stimuli=STIMULI)
    msg = str(e.value)
    assert "shapes.geojson" in msg
    assert expect in msg
    assert "\n" not in msg


def test_malformed_json_and_missing_file():
    with pytest.raises(InputFormatError, match=r"bad.json: line 1, column \d+: malformed JSON"):
        read_aois(write("{\"type\": ", name="bad.json"), stimuli=STIMULI)
    with pytest.raises(InputFormatError, match="gone.csv: AOI file not found"):
        read_aois(Path(tempfile.mkdtemp()) / "gone.csv", stimuli=STIMULI)


def test_bom_crlf_and_trailing_blank_lines():
    text = "\ufeff" + HEADER.replace("\n", "\r\n") + f"clip,,a,{SQUARE}\r\n\r\n\r\n"
    t = read_aois(write(text), stimuli=STIMULI)
    assert t.names("clip") == ("a",)


def test_stimulus_check_names_the_aoi_row():
    p = write(HEADER + f"clip,,a,{SQUARE}\nspeaker,0,b,{SQUARE}\nspeaker,1,b,{SQUARE}\n")
    aois = read_aois(p, stimuli=STIMULI)
    trials = pd.DataFrame({"stimulus": ["clip"]})
    with pytest.raises(InputFormatError) as e:
        stimulus_check(trials, aois, "trials.csv", p)
    assert str(e.value) == (f"{p}: row 3, column 'stimulus': found 'speaker', which no trial in "
                            "trials.csv shows; expected one of 'clip'")
    stimulus_check(pd.DataFrame({"stimulus": ["clip", "speaker", "clip"]}), aois, "t.csv", p)


def test_grids_are_built_by_prepare_tracks_on_any_thread_only(monkeypatch):
    # convert prepares the AOIs on a side thread while detection runs, so
    # prepare_tracks must build the cell grid on whatever thread calls it;
    # match_points running on a worker thread must never build it (the
    # workers share the prepared polygons)
    from concurrent.futures import ThreadPoolExecutor

    from aoi_fix import aois as aois_mod
    from aoi_fix.aois import prepare_tracks

    monkeypatch.setattr(aois_mod, "_GRID_MIN_POINTS_PER_POLYGON", 0)
    df = pd.DataFrame({"stimulus": ["s"] * 3, "frame": [0, 1, 2], "aoi": ["m"] * 3,
                       "geometry": [shapely.box(f, 0, f + 10, 10) for f in range(3)]})
    x, y, f = np.array([5.0, 5.0, 50.0]), np.array([5.0, 5.0, 5.0]), np.array([0, 2, 1])
    with ThreadPoolExecutor(1) as pool:
        worker = AoiTable(df)
        got = pool.submit(match_points, worker, "s", f, x, y).result()
        assert worker._track("s", "m").grid(0.0, build=False) is None
        side = AoiTable(df)
        pool.submit(prepare_tracks, side, "s", n_points=10).result()
        assert side._track("s", "m").grid(0.0, build=False) is not None
    assert got.tolist() == [0, 0, -1]
    np.testing.assert_array_equal(match_points(side, "s", f, x, y), got)
