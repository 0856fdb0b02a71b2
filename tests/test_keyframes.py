"""AOIs drawn on keyframes: expansion into per-frame polygons at read time.

Expected values are worked out by hand (squares moving a few pixels per
frame) or from the closed form of the motion (straight lines; a circle,
where linear keyframe interpolation is off by at most the sagitta
``r (1 - cos(theta / 2))`` of the arc between two keyframes, plane geometry).
No published numbers are used.
"""

from __future__ import annotations

import json
import math
import re

import numpy as np
import pandas as pd
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st

from aoi_fix import simulate
from aoi_fix.aois import AoiTable, match_points, read_aois
from aoi_fix.config import Stimulus
from aoi_fix.errors import InputFormatError
from aoi_fix.keyframes import expand_keyframes, interpolate_polygons
from aoi_fix.pipeline import convert

STIMULI = {"clip": Stimulus(fps=25.0, width_px=200, height_px=100)}
HEADER = "stimulus,frame,aoi,wkt,keyframe\n"


def sq(x, y, s=10):
    return f'"POLYGON (({x} {y}, {x + s} {y}, {x + s} {y + s}, {x} {y + s}, {x} {y}))"'


def write(tmp_path, text, name="aois.csv"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def bounds(table, aoi, frames, stim="clip"):
    out = []
    for f in frames:
        g = table.geometry(stim, aoi, f)
        out.append(None if g is None else tuple(round(v, 9) for v in g.bounds))
    return out


def assert_same_geometry(a, b, stim, aoi, frames, atol=1e-9):
    for f in frames:  # loop over frames in a test
        ga, gb = a.geometry(stim, aoi, f), b.geometry(stim, aoi, f)
        assert (ga is None) == (gb is None), (aoi, f)
        if ga is None:
            continue
        assert ga.geom_type == gb.geom_type
        assert shapely.get_num_interior_rings(shapely.get_parts(ga)).tolist() == \
            shapely.get_num_interior_rings(shapely.get_parts(gb)).tolist()
        ca, cb = shapely.get_coordinates(ga), shapely.get_coordinates(gb)
        assert ca.shape == cb.shape, (aoi, f)
        np.testing.assert_allclose(ca, cb, rtol=0, atol=atol, err_msg=f"{aoi} frame {f}")


# --------------------------------------------------------------------------- by hand

def test_linear_between_keyframes_and_hold_before_and_after(tmp_path):
    p = write(tmp_path, HEADER + f"clip,2,ball,{sq(0, 60)},true\nclip,6,ball,{sq(8, 60)},1\n")
    t = read_aois(p, stimuli=STIMULI)
    # frames 0-1 hold the first keyframe, 2..6 move 2 px per frame, 7.. hold the last
    xs = [b[0] for b in bounds(t, "ball", range(10))]
    assert xs == [0, 0, 0, 2, 4, 6, 8, 8, 8, 8]
    assert t.geometry("clip", "ball", 1_000_000).bounds == (8, 60, 18, 70)


def test_absent_keyframes_end_and_restart_a_track(tmp_path):
    p = write(tmp_path, HEADER
              + "clip,0,ball,absent,true\n"          # absent before the first polygon
              + f"clip,3,ball,{sq(0, 0)},true\n"
              + f"clip,5,ball,{sq(4, 0)},true\n"
              + "clip,7,ball,ABSENT,true\n"          # held on 6, absent 7..9
              + f"clip,10,ball,{sq(0, 50)},true\n"
              + "clip,12,ball,absent,true\n")        # absent for ever after
    t = read_aois(p, stimuli=STIMULI)
    got = [None if b is None else b[:2] for b in bounds(t, "ball", range(15))]
    assert got == [None, None, None, (0, 0), (2, 0), (4, 0), (4, 0), None, None, None,
                   (0, 50), (0, 50), None, None, None]
    assert t.geometry("clip", "ball", 500) is None


def test_matching_uses_expanded_frames_and_hold(tmp_path):
    p = write(tmp_path, HEADER + f"clip,0,dot,{sq(0, 0)},true\nclip,4,dot,{sq(40, 0)},true\n"
              + f'clip,,bg,"POLYGON ((0 0, 200 0, 200 100, 0 100, 0 0))",\n')
    t = read_aois(p, stimuli=STIMULI)
    assert t.names("clip") == ("dot", "bg")
    # frame 2: dot at x 20..30; frame 9 (after the last keyframe): x 40..50
    got = match_points(t, "clip", [2, 2, 9, 9, 9], [25, 5, 45, 5, 25], [5, 5, 5, 5, 5])
    assert got.tolist() == [0, 1, 0, 1, 1]


def test_hold_after_last_keyframe_sparse_lookup():
    # two keyframes far apart with an absent stretch: the sparse lookup also holds
    df = pd.DataFrame({"stimulus": ["c"] * 3, "frame": [0, 1, 900_000], "aoi": ["a"] * 3,
                       "geometry": [shapely.box(0, 0, 1, 1), None, shapely.box(5, 5, 6, 6)],
                       "location": ["row 2", "row 3", "row 4"], "kind": [1, 2, 1]})
    t = AoiTable(expand_keyframes(df))
    assert t._track("c", "a").lookup is None  # sparse: binary search
    assert t.geometry("c", "a", 0).bounds == (0, 0, 1, 1)
    assert t.geometry("c", "a", 1) is None
    assert t.geometry("c", "a", 899_999) is None
    assert t.geometry("c", "a", 900_000).bounds == (5, 5, 6, 6)
    assert t.geometry("c", "a", 5_000_000).bounds == (5, 5, 6, 6)
    got = match_points(t, "c", [0, 5, 950_000], [0.5, 0.5, 5.5], [0.5, 0.5, 5.5])
    assert got.tolist() == [0, -1, 0]


def test_single_keyframe_holds_everywhere(tmp_path):
    p = write(tmp_path, HEADER + f"clip,5,ball,{sq(1, 1)},true\n")
    t = read_aois(p, stimuli=STIMULI)
    assert bounds(t, "ball", [0, 5, 99]) == [(1, 1, 11, 11)] * 3


def test_holes_and_multipolygons_move_vertex_by_vertex():
    a = shapely.from_wkt("MULTIPOLYGON (((0 0, 10 0, 10 10, 0 10, 0 0), (2 2, 2 4, 4 4, 2 2)),"
                         " ((20 0, 22 0, 22 2, 20 0)))")
    b = shapely.affinity.translate(a, 10, 20)
    mid = interpolate_polygons(a, b, [0.0, 0.25, 1.0])
    assert [g.geom_type for g in mid] == ["MultiPolygon"] * 3
    assert shapely.equals_exact(mid[0], a, tolerance=0) and shapely.equals_exact(mid[2], b, 0)
    assert shapely.equals_exact(mid[1], shapely.affinity.translate(a, 2.5, 5), tolerance=1e-12)
    assert shapely.get_num_interior_rings(shapely.get_parts(mid[1])).tolist() == [1, 0]


def test_rows_in_file_order_are_kept_for_locations(tmp_path):
    p = write(tmp_path, HEADER + f"clip,0,b,{sq(0, 0)},true\nclip,3,b,{sq(3, 0)},true\n")
    rows = read_aois(p, stimuli=STIMULI)._rows.set_index("frame")["location"]
    assert rows.to_dict() == {0: "row 2", 1: "row 2 and row 3 (interpolated)",
                              2: "row 2 and row 3 (interpolated)", 3: "row 3"}


def test_without_keyframe_column_nothing_changes(tmp_path):
    p = write(tmp_path, "stimulus,frame,aoi,wkt\n" + f"clip,0,b,{sq(0, 0)}\nclip,3,b,{sq(3, 0)}\n")
    t = read_aois(p, stimuli=STIMULI)
    assert t.frames("clip").tolist() == [0, 3]
    assert t.geometry("clip", "b", 1) is None and t.geometry("clip", "b", 4) is None


# --------------------------------------------------------------------------- errors

def test_vertex_count_mismatch_names_both_rows(tmp_path):
    tri = '"POLYGON ((0 0, 10 0, 5 8, 0 0))"'
    p = write(tmp_path, HEADER + f"clip,0,b,{sq(0, 0)},true\nclip,4,b,{tri},true\n")
    with pytest.raises(InputFormatError) as e:
        read_aois(p, stimuli=STIMULI)
    msg = str(e.value)
    assert msg.startswith(f"{p}: row 2 and row 3: keyframes of AOI 'b' of stimulus 'clip'")
    assert "a POLYGON with 4 vertices vs a POLYGON with 3 vertices" in msg
    assert "\n" not in msg


def test_ring_structure_mismatch(tmp_path):
    holed = '"POLYGON ((0 0, 10 0, 10 10, 0 10, 0 0), (2 2, 2 4, 4 4, 4 2, 2 2))"'
    p = write(tmp_path, HEADER + f"clip,0,b,{sq(0, 0)},true\nclip,4,b,{holed},true\n")
    with pytest.raises(InputFormatError, match=r"rings of 4, 4 vertices"):
        read_aois(p, stimuli=STIMULI)


def test_opposite_winding_is_an_error(tmp_path):
    ccw = '"POLYGON ((0 0, 0 10, 10 10, 10 0, 0 0))"'
    p = write(tmp_path, HEADER + f"clip,0,b,{sq(0, 0)},true\nclip,4,b,{ccw},true\n")
    with pytest.raises(InputFormatError, match=r"row 2 and row 3: .*opposite winding"):
        read_aois(p, stimuli=STIMULI)


def test_interpolation_through_an_invalid_polygon_is_an_error(tmp_path):
    # same winding, but the vertices start from another corner: the square twists
    turned = '"POLYGON ((10 10, 0 10, 0 0, 10 0, 10 10))"'
    p = write(tmp_path, HEADER + f"clip,0,b,{sq(0, 0)},true\nclip,4,b,{turned},true\n")
    with pytest.raises(InputFormatError, match=r"row 2 and row 3: moving .* invalid polygon on "
                                               r"frame 2"):
        read_aois(p, stimuli=STIMULI)


@pytest.mark.parametrize("rows,pattern", [
    (f"clip,0,b,{sq(0, 0)},yes\n", r"row 2, column 'keyframe': found 'yes', expected true"),
    ("clip,0,b,absent,\n", r"row 2, column 'wkt': found 'absent' on a row that is not a "
                           r"keyframe"),
    (f"clip,0,b,{sq(0, 0)},true\nclip,1,b,{sq(0, 0)},\n",
     r"row 3: AOI 'b' of stimulus 'clip' has keyframes \(row 2\) and this row"),
    (f"clip,,b,{sq(0, 0)},true\n", r"row 2: found a keyframe of AOI 'b' .* without a frame"),
    (f"clip,3,b,{sq(0, 0)},true\nclip,3,b,{sq(1, 0)},true\n",
     r"row 3: found a second keyframe of AOI 'b' .* on frame 3 \(first at row 2\)"),
    ("clip,3,b,absent,true\n", r"row 2: AOI 'b' of stimulus 'clip' has only absent keyframes"),
])
def test_keyframe_format_errors(tmp_path, rows, pattern):
    p = write(tmp_path, HEADER + rows)
    with pytest.raises(InputFormatError, match=pattern) as e:
        read_aois(p, stimuli=STIMULI)
    assert str(e.value).startswith(str(p))


def test_invalid_keyframe_polygon_still_rejected(tmp_path):
    bow = '"POLYGON ((0 0, 10 10, 10 0, 0 10, 0 0))"'
    p = write(tmp_path, HEADER + f"clip,0,b,{bow},true\n")
    with pytest.raises(InputFormatError, match=r"row 2, column 'wkt': found an invalid polygon"):
        read_aois(p, stimuli=STIMULI)


# --------------------------------------------------------------------------- GeoJSON

def _feature(frame, geom, key=True, aoi="b"):
    props = {"stimulus": "clip", "aoi": aoi, "frame": frame}
    if key is not None:
        props["keyframe"] = key
    return {"type": "Feature", "properties": props,
            "geometry": None if geom is None else json.loads(shapely.to_geojson(geom))}


def test_geojson_keyframes_match_csv(tmp_path):
    csv = write(tmp_path, HEADER + f"clip,1,b,{sq(0, 0)},true\nclip,5,b,{sq(8, 4)},true\n"
                + "clip,7,b,absent,true\n" + f"clip,9,b,{sq(0, 0)},true\n"
                + f'clip,,bg,"POLYGON ((0 0, 200 0, 200 100, 0 100, 0 0))",false\n')
    doc = {"type": "FeatureCollection", "features": [
        _feature(1, shapely.from_wkt(sq(0, 0).strip('"'))),
        _feature(5, shapely.from_wkt(sq(8, 4).strip('"')), key=1),
        _feature(7, None),
        _feature(9, shapely.from_wkt(sq(0, 0).strip('"'))),
        _feature(None, shapely.Polygon([(0, 0), (200, 0), (200, 100), (0, 100)]), key=None,
                 aoi="bg")]}
    gj = write(tmp_path, json.dumps(doc), "aois.geojson")
    a, b = read_aois(csv, stimuli=STIMULI), read_aois(gj, stimuli=STIMULI)
    for aoi in ("b", "bg"):
        assert_same_geometry(a, b, "clip", aoi, range(15))
    assert bounds(b, "b", [3, 6, 7, 8, 9, 20])[0] == (4, 2, 14, 12)
    assert bounds(b, "b", [6, 7, 8]) == [(8, 4, 18, 14), None, None]


def test_geojson_null_geometry_needs_keyframe(tmp_path):
    doc = {"type": "FeatureCollection", "features": [_feature(3, None, key=False)]}
    with pytest.raises(InputFormatError, match=r"features\[0\]: found geometry type None"):
        read_aois(write(tmp_path, json.dumps(doc), "a.geojson"), stimuli=STIMULI)


def test_geojson_bad_keyframe_value(tmp_path):
    doc = {"type": "FeatureCollection", "features": [_feature(3, shapely.box(0, 0, 1, 1),
                                                              key="true")]}
    with pytest.raises(InputFormatError, match=r"features\[0\], property 'keyframe': found "
                                               r"'true'"):
        read_aois(write(tmp_path, json.dumps(doc), "a.geojson"), stimuli=STIMULI)


def test_geojson_mismatch_names_both_features(tmp_path):
    doc = {"type": "FeatureCollection", "features": [
        _feature(0, shapely.box(0, 0, 5, 5)),
        _feature(4, shapely.Polygon([(0, 0), (5, 0), (2, 4)]))]}
    p = write(tmp_path, json.dumps(doc), "a.geojson")
    with pytest.raises(InputFormatError, match=re.escape(f"{p}: features[0] and features[1]:")):
        read_aois(p, stimuli=STIMULI)


# --------------------------------------------------------------------------- per frame vs keyframes

def _linear_scene(n_frames=40):
    """Per-frame rows computed from the closed form, and the same motion as keyframes.

    ``face``: a 24-gon ellipse moving right then down (keyframes 0, 20, 39);
    ``eyes``: a MULTIPOLYGON moving with it; ``card``: a square with a hole
    that is held from 10, absent 15..24 and moves again from 25.
    """
    ring = np.column_stack([30 * np.cos(np.linspace(0, 2 * np.pi, 24, endpoint=False)),
                            40 * np.sin(np.linspace(0, 2 * np.pi, 24, endpoint=False))])
    eye = ring * 0.2
    f = np.arange(n_frames, dtype=float)
    # face centre: (60 + 1.5 f, 50) up to 20, then down 0.75 px per frame
    cx = np.where(f <= 20, 60 + 1.5 * f, 90.0)
    cy = np.where(f <= 20, 50.0, 50 + 0.75 * (f - 20))
    card = [np.array([[0, 0], [20, 0], [20, 20], [0, 20]], float),
            np.array([[5, 5], [5, 10], [10, 10], [10, 5]], float)]
    kx = np.select([f <= 10, f < 15, f < 25], [10 + 0.3 * f, 13.0, np.nan], 150 - 2.0 * (f - 25))

    def face(x, y):
        return shapely.Polygon(ring + (x, y))

    def eyes(x, y):
        return shapely.MultiPolygon([shapely.Polygon(eye + (x - 12, y - 10)),
                                     shapely.Polygon(eye + (x + 12, y - 10))])

    def cardg(x):
        return shapely.Polygon(card[0] + (x, 60), [card[1] + (x, 60)])

    per_frame = []
    for k in range(n_frames):  # loop over frames (building a fixture)
        per_frame += [("face", k, face(cx[k], cy[k])), ("eyes", k, eyes(cx[k], cy[k]))]
        if not np.isnan(kx[k]):
            per_frame.append(("card", k, cardg(kx[k])))
    keys = [("face", k, face(cx[k], cy[k])) for k in (0, 20, n_frames - 1)]
    keys += [("eyes", k, eyes(cx[k], cy[k])) for k in (0, 20, n_frames - 1)]
    keys += [("card", 0, cardg(10.0)), ("card", 10, cardg(13.0)), ("card", 15, None),
             ("card", 25, cardg(150.0)), ("card", n_frames - 1, cardg(kx[-1]))]

    def table(rows, keyed):
        wkt = ["absent" if g is None else shapely.to_wkt(g, rounding_precision=-1)
               for _, _, g in rows]
        df = pd.DataFrame({"aoi": [r[0] for r in rows], "frame": [r[1] for r in rows],
                           "wkt": wkt})
        if keyed:
            df["keyframe"] = "true"
        return df
    return table(per_frame, False), table(keys, True)


def _write_scene(df, stim, path):
    df.assign(stimulus=stim)[["stimulus", "frame", "aoi", "wkt"]
                             + (["keyframe"] if "keyframe" in df else [])].to_csv(path,
                                                                                 index=False)


def test_linear_motion_per_frame_equals_keyframes(tmp_path):
    per_frame, keyed = _linear_scene()
    _write_scene(per_frame, "clip", tmp_path / "pf.csv")
    _write_scene(keyed, "clip", tmp_path / "kf.csv")
    a = read_aois(tmp_path / "pf.csv", stimuli=STIMULI)
    b = read_aois(tmp_path / "kf.csv", stimuli=STIMULI)
    assert a.names("clip") == b.names("clip")  # same median areas -> same priority
    for aoi in ("face", "eyes", "card"):
        assert_same_geometry(a, b, "clip", aoi, range(40))


def test_circular_motion_within_sagitta(tmp_path):
    """A square whose centre runs round a circle of radius r, keyframes every k frames."""
    r, n, k = 30.0, 120, 10
    theta = 2 * np.pi / n * k  # angle between keyframes
    tol = r * (1 - math.cos(theta / 2))  # largest distance of a chord from its arc
    f = np.arange(0, n + 1)
    cx, cy = 100 + r * np.cos(2 * np.pi * f / n), 50 + r * np.sin(2 * np.pi * f / n)
    rows = "".join(f"clip,{i},s,{sq(cx[i], cy[i], 8)},true\n" for i in range(0, n + 1, k))
    t = read_aois(write(tmp_path, HEADER + rows), stimuli=STIMULI)
    err = np.array([shapely.hausdorff_distance(t.geometry("clip", "s", i),
                                               shapely.box(cx[i], cy[i], cx[i] + 8, cy[i] + 8))
                    for i in f])
    assert err.max() <= tol + 1e-9
    assert err.max() > 0.99 * tol  # the bound is reached half-way between keyframes
    assert 1.02 < tol < 1.03  # 30 px radius, 30 deg between keyframes: about 1 px


@pytest.fixture(scope="module")
def session_pair(tmp_path_factory):
    """A small simulated session converted with per-frame and with keyframed AOIs."""
    ses = simulate.simulate_session("lab_300hz_seconds", n_trials=2, seed=3)
    folder = tmp_path_factory.mktemp("kf_session")
    paths = simulate.write_session(ses, folder)
    n_frames = int(round(8000 * 30 / 1000))
    per_frame, keyed = _linear_scene(n_frames)
    scale = 1280 / 200  # the scene was drawn for a 200 x 100 video
    for df in (per_frame, keyed):
        df["wkt"] = [w if w == "absent" else shapely.to_wkt(
            shapely.affinity.scale(shapely.from_wkt(w), scale, scale * 0.9, origin=(0, 0)),
            rounding_precision=-1) for w in df["wkt"]]
    pf = pd.concat([per_frame.assign(stimulus=s) for s in ("story1", "story2")])
    kf = pd.concat([keyed.assign(stimulus=s) for s in ("story1", "story2")])
    pf[["stimulus", "frame", "aoi", "wkt"]].to_csv(folder / "pf.csv", index=False)
    kf[["stimulus", "frame", "aoi", "wkt", "keyframe"]].to_csv(folder / "kf.csv", index=False)
    common = dict(study=paths["study"], trials=paths["trials"], checks=paths["checks"])
    return (convert(paths["samples"], aois=folder / "pf.csv", **common),
            convert(paths["samples"], aois=folder / "kf.csv", **common))


@pytest.mark.parametrize("name", ["fixations", "aoi_summary", "trial_quality"])
def test_convert_tables_identical(session_pair, name):
    a, b = session_pair
    pd.testing.assert_frame_equal(a[name], b[name])


def test_convert_session_hits_moving_aois(session_pair):
    s = session_pair[0]["aoi_summary"]
    assert set(s["aoi"]) >= {"face", "eyes", "card"}
    assert s.loc[s["aoi"].isin(["face", "eyes", "card"]), "fixation_ms"].sum() > 0


# --------------------------------------------------------------------------- properties

@settings(max_examples=40, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 30), st.booleans(), st.integers(-20, 20)),
                min_size=1, max_size=6, unique_by=lambda r: r[0]),
       st.randoms(use_true_random=False))
def test_row_order_does_not_matter_and_keyframes_are_exact(keys, rnd):
    if all(absent for _, absent, _ in keys):
        keys = keys + [(31, False, 0)]
    rows = [{"stimulus": "c", "frame": f, "aoi": "a", "location": f"row {i + 2}",
             "kind": 2 if absent else 1,
             "geometry": None if absent else shapely.box(dx, 0, dx + 5, 5)}
            for i, (f, absent, dx) in enumerate(keys)]
    shuffled = rows[:]
    rnd.shuffle(shuffled)
    a = AoiTable(expand_keyframes(pd.DataFrame(rows)))
    b = AoiTable(expand_keyframes(pd.DataFrame(shuffled)))
    for f, absent, dx in keys:  # every keyframe is reproduced exactly
        g = a.geometry("c", "a", f)
        assert (g is None) if absent else g.bounds == (dx, 0, dx + 5, 5)
    for f in range(40):
        ga, gb = a.geometry("c", "a", f), b.geometry("c", "a", f)
        assert (ga is None and gb is None) or shapely.equals_exact(ga, gb, tolerance=0)
