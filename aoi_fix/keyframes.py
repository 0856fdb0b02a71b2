"""AOIs drawn on keyframes and moved linearly between them.

Instead of one polygon per video frame, an AOI can be drawn on a few
*keyframes*; every vertex then moves in a straight line, at constant speed,
from one keyframe to the next.  :func:`aoi_fix.aois.read_aois` expands the
keyframes once, at read time, into the per-frame polygons that the matching
code uses for every AOI, so matching is exactly as fast as with per-frame
input.  The syntax is documented in ``docs/keyframes.md``; in short:

* CSV: an optional column ``keyframe`` with ``true`` / ``1`` on the rows of
  an AOI drawn on keyframes (``false`` / ``0`` / empty: a row given per
  frame, as before).  A keyframe row with the WKT cell ``absent`` ends the
  AOI's track: the AOI is absent from that frame until its next keyframe.
* GeoJSON: the property ``"keyframe": true``; an absent keyframe has
  ``"geometry": null``.

Rules
-----
Between two polygon keyframes (frames ``a < b``) the polygon on frame
``f`` has the vertices ``P_a + (f - a) / (b - a) * (P_b - P_a)``.  The two
polygons must have the same structure: the same type, the same number of
parts (MULTIPOLYGON), of holes per part, and of vertices per ring, listed
with the same winding and ideally from the same corner.  Before the first
keyframe the first polygon holds (unless the first keyframe is absent); the
last keyframe holds for every later frame (its polygon, or absence), so no
video length is needed.  A polygon keyframe followed by an absent one holds
until the frame before the absent one.

The expanded table has one row per frame from 0 to the last keyframe; the
"hold after the last keyframe" rule is kept by a flag on the last row
(``hold``) that :class:`aoi_fix.aois.AoiTable` turns into a lookup entry for
all later frames, so no frame count is needed at read time.
"""

from __future__ import annotations

from typing import Callable, Sequence

import numpy as np
import pandas as pd
import shapely

from .errors import InputFormatError, where

__all__ = ["KEYFRAME_COLUMN", "ABSENT_WKT", "interpolate_polygons", "expand_keyframes"]

#: Optional CSV column (GeoJSON property) that marks keyframe rows.
KEYFRAME_COLUMN = "keyframe"
#: WKT cell of an absent keyframe (case-insensitive).
ABSENT_WKT = "absent"

# Row kinds, as the AOI readers hand them over.
PLAIN, KEY, ABSENT, DROPPED = 0, 1, 2, 3
_TRUE = ("true", "1")
_FALSE = ("false", "0", "")
_POLYGON_TYPES = (3, 6)


# --------------------------------------------------------------------------- reading

def csv_kinds(header: Sequence[str], rows, path) -> np.ndarray:
    """Kind of each CSV data row (plain, keyframe, absent keyframe).

    ``rows`` are ``(line, cells)`` as from the trial/AOI CSV reader; the
    ``wkt`` column must exist.  Raises for a ``keyframe`` cell that is not
    true/1/false/0/empty, or for ``absent`` on a row that is not a keyframe.
    """
    kinds = np.zeros(len(rows), dtype=np.int8)
    kcol = header.index(KEYFRAME_COLUMN) if KEYFRAME_COLUMN in header else None
    wcol = header.index("wkt")
    for j, (line, cells) in enumerate(rows):  # loop over AOI rows, not samples
        flag = cells[kcol].strip().lower() if kcol is not None and kcol < len(cells) else ""
        if flag in _TRUE:
            kinds[j] = KEY
        elif flag not in _FALSE:
            raise InputFormatError(f"{where(path, row=line, column=KEYFRAME_COLUMN)}: found "
                                   f"{cells[kcol].strip()!r}, expected true, 1, false, 0 or "
                                   "empty")
        text = cells[wcol].strip() if wcol < len(cells) else ""
        if text.lower() == ABSENT_WKT:
            if kinds[j] != KEY:
                raise InputFormatError(
                    f"{where(path, row=line, column='wkt')}: found 'absent' on a row that is "
                    f"not a keyframe; expected {KEYFRAME_COLUMN} = true (an AOI given per "
                    "frame is absent where it has no row)")
            kinds[j] = ABSENT
    return kinds


def geojson_kind(props: dict, geometry, loc: str) -> int:
    """Kind of one GeoJSON feature; an absent keyframe has ``"geometry": null``."""
    flag = props.get(KEYFRAME_COLUMN)
    if flag is None or flag is False or (type(flag) is int and flag == 0):
        kind = PLAIN
    elif flag is True or (type(flag) is int and flag == 1):
        kind = KEY
    else:
        raise InputFormatError(f"{loc}, property '{KEYFRAME_COLUMN}': found {flag!r}, "
                               "expected true, false, 1, 0 or null")
    return ABSENT if kind == KEY and geometry is None else kind


def _usable(geoms: np.ndarray) -> np.ndarray:
    """Rows that the reader's geometry check accepts (polygon, non-empty, finite, valid)."""
    ok = np.array([g is not None for g in geoms], dtype=bool)
    if ok.any():
        ok[ok] = np.isin(shapely.get_type_id(geoms[ok]), _POLYGON_TYPES)
    if ok.any():
        ok[ok] = ~shapely.is_empty(geoms[ok])
    if ok.any():
        with np.errstate(invalid="ignore"):
            ok[ok] = np.isfinite(shapely.bounds(geoms[ok])).all(axis=1)
    if ok.any():
        ok[ok] = shapely.is_valid(geoms[ok])
    return ok


def check_present(check: Callable, geoms, locs: Sequence[str], texts: Sequence[str],
                  kinds, problems: list | None = None):
    """Run the reader's geometry ``check`` on the rows that carry a polygon.

    Absent keyframes are left as None.  With a ``problems`` list, a bad
    polygon does not raise: its one-line message is appended (as a dict with
    ``index`` and ``message``) and its row becomes ``DROPPED``.

    Returns
    -------
    geoms, kinds : ndarray, ndarray
    """
    geoms = np.asarray(geoms, dtype=object)
    kinds = np.asarray(kinds, dtype=np.int8).copy()
    idx = np.flatnonzero(kinds != ABSENT)
    if problems is None:
        if idx.size:
            geoms[idx] = check(geoms[idx], [locs[i] for i in idx], [texts[i] for i in idx])
        return geoms, kinds
    ok = _usable(geoms[idx])
    good = idx[ok]
    if good.size:
        geoms[good] = check(geoms[good], [locs[i] for i in good], [texts[i] for i in good])
    for i in idx[~ok]:  # loop over bad rows only
        try:
            geoms[i] = check(np.array([geoms[i]], dtype=object), [locs[i]], [texts[i]])[0]
        except InputFormatError as e:
            problems.append({"index": int(i), "message": str(e)})
            geoms[i] = None
            kinds[i] = DROPPED
    return geoms, kinds


# --------------------------------------------------------------------------- interpolation

def _structure(g) -> tuple:
    """(type id, part of each ring, coordinates per ring, winding per ring)."""
    parts = shapely.get_parts(g)
    rings, part = shapely.get_rings(parts, return_index=True)
    return (int(shapely.get_type_id(g)), part.astype(np.int64),
            shapely.get_num_coordinates(rings).astype(np.int64), shapely.is_ccw(rings))


def _describe(s: tuple) -> str:
    type_id, part, ncoord, _ = s
    verts = (ncoord - 1).tolist()
    rings = ("rings of " + ", ".join(map(str, verts)) + " vertices" if len(verts) > 1
             else f"{verts[0]} vertices")
    if type_id == 6:
        return f"a MULTIPOLYGON of {int(part.max()) + 1} polygon(s) with {rings}"
    return f"a POLYGON with {rings}"


def _same_shape(sa: tuple, sb: tuple) -> bool:
    return (sa[0] == sb[0] and sa[1].shape == sb[1].shape and np.array_equal(sa[1], sb[1])
            and np.array_equal(sa[2], sb[2]))


def _build(coords: np.ndarray, s: tuple) -> np.ndarray:
    """``m`` geometries of structure ``s`` from an (m, n, 2) vertex array, in 3 shapely calls."""
    type_id, part, ncoord, _ = s
    m, n_rings, n_parts = coords.shape[0], ncoord.size, int(part.max()) + 1
    ring_idx = np.repeat(np.arange(m * n_rings), np.tile(ncoord, m))
    rings = shapely.linearrings(coords.reshape(-1, 2), indices=ring_idx)
    poly_idx = (np.arange(m)[:, None] * n_parts + part[None, :]).ravel()
    polys = shapely.polygons(rings, indices=poly_idx)
    if type_id == 6:
        return shapely.multipolygons(polys, indices=np.repeat(np.arange(m), n_parts))
    return polys


def interpolate_polygons(start, end, t) -> np.ndarray:
    """Polygons between ``start`` and ``end`` with every vertex moved linearly.

    Parameters
    ----------
    start, end : shapely Polygon or MultiPolygon
        Same structure: type, parts, holes, and vertices per ring.
    t : array_like of float
        Fractions of the way, 0 = ``start``, 1 = ``end``.

    Returns
    -------
    numpy.ndarray of object
        One geometry per ``t``: vertices ``start + t * (end - start)``.

    Raises
    ------
    ValueError
        The two polygons differ in structure.

    Examples
    --------
    >>> a, b = shapely.box(0, 0, 10, 10), shapely.box(20, 0, 30, 10)
    >>> [g.bounds for g in interpolate_polygons(a, b, [0.0, 0.5])]
    [(0.0, 0.0, 10.0, 10.0), (10.0, 0.0, 20.0, 10.0)]
    """
    sa, sb = _structure(start), _structure(end)
    if not _same_shape(sa, sb):
        raise ValueError(f"cannot interpolate {_describe(sa)} to {_describe(sb)}")
    t = np.atleast_1d(np.asarray(t, dtype=float))
    ca, cb = shapely.get_coordinates(start), shapely.get_coordinates(end)
    return _build(ca[None] + t[:, None, None] * (cb - ca)[None], sa)


# --------------------------------------------------------------------------- expansion

def _fill(n: int, g) -> np.ndarray:
    out = np.empty(n, dtype=object)
    out.fill(g)
    return out


def _problem(problems, message, check, stim, aoi, frame, location):
    problems.append({"check": check, "stimulus": stim, "aoi": aoi, "frame": frame,
                     "location": location, "message": message})


def _expand_track(g: pd.DataFrame, source: str, problems: list | None):
    """Per-frame rows of one keyframed AOI: (frames, geoms, locations, origin, hold)."""
    stim, aoi = g["stimulus"].iat[0], g["aoi"].iat[0]
    loc = g["location"].to_numpy(object)
    who = f"AOI {aoi!r} of stimulus {stim!r}"
    plain = np.flatnonzero(g["kind"].to_numpy() == PLAIN)
    if plain.size:
        first_key = int(np.flatnonzero(g["kind"].to_numpy() != PLAIN)[0])
        raise InputFormatError(
            f"{source}: {loc[plain[0]]}: {who} has keyframes ({loc[first_key]}) and this "
            f"row that is not one; expected {KEYFRAME_COLUMN} = true on every row of an AOI "
            "drawn on keyframes")
    frame = g["frame"].to_numpy(np.int64)
    if (frame < 0).any():
        i = int(np.flatnonzero(frame < 0)[0])
        raise InputFormatError(f"{source}: {loc[i]}: found a keyframe of {who} without a "
                               "frame, expected a 0-based frame number")
    order = np.argsort(frame, kind="stable")
    frame, loc = frame[order], loc[order]
    geom = g["geometry"].to_numpy(object)[order]
    origin = g["origin"].to_numpy(np.int64)[order]
    absent = g["kind"].to_numpy()[order] == ABSENT
    dup = np.flatnonzero(np.diff(frame) == 0)
    if dup.size:
        i = int(dup[0])
        raise InputFormatError(f"{source}: {loc[i + 1]}: found a second keyframe of {who} on "
                               f"frame {frame[i]} (first at {loc[i]}), expected one per frame")
    if absent.all():
        raise InputFormatError(f"{source}: {loc[0]}: {who} has only absent keyframes, "
                               "expected at least one polygon")
    out_f, out_g, out_loc, out_origin = [], [], [], []

    def put(frames, geoms, where_, org):
        out_f.append(frames)
        out_g.append(geoms)
        out_loc.append(np.full(frames.size, where_, dtype=object))
        out_origin.append(np.full(frames.size, org, dtype=np.int64))

    if not absent[0] and frame[0] > 0:  # the first polygon holds before it
        put(np.arange(frame[0]), _fill(frame[0], geom[0]), f"{loc[0]} (held)", origin[0])
    last = frame.size - 1
    for i in range(frame.size):  # loop over keyframes
        if absent[i]:
            continue
        put(np.array([frame[i]]), _fill(1, geom[i]), loc[i], origin[i])
        if i == last:
            break
        inner = np.arange(frame[i] + 1, frame[i + 1])
        if inner.size == 0:
            continue
        if absent[i + 1]:  # hold until the region ends
            put(inner, _fill(inner.size, geom[i]), f"{loc[i]} (held)", origin[i])
            continue
        pair = f"{loc[i]} and {loc[i + 1]}"
        sa, sb = _structure(geom[i]), _structure(geom[i + 1])
        msg = None
        if not _same_shape(sa, sb):
            msg = (f"{source}: {pair}: keyframes of {who} differ in shape ({_describe(sa)} "
                   f"vs {_describe(sb)}); expected the same number of vertices per ring to "
                   "move them linearly")
        elif not np.array_equal(sa[3], sb[3]):
            msg = (f"{source}: {pair}: keyframes of {who} list their vertices in opposite "
                   "winding order; expected the same order (same direction, same first "
                   "vertex) on both")
        else:
            ca, cb = shapely.get_coordinates(geom[i]), shapely.get_coordinates(geom[i + 1])
            t = (inner - frame[i]) / float(frame[i + 1] - frame[i])
            mid = _build(ca[None] + t[:, None, None] * (cb - ca)[None], sa)
            bad = np.flatnonzero(~shapely.is_valid(mid))
            if bad.size == 0:
                put(inner, mid, f"{pair} (interpolated)", origin[i])
                continue
            k = int(bad[0])
            msg = (f"{source}: {pair}: moving {who} between these keyframes gives an invalid "
                   f"polygon on frame {inner[k]} ({shapely.is_valid_reason(mid[k])}); "
                   "expected vertices in the same order on both keyframes, or add a "
                   "keyframe in between")
            if problems is not None:
                _problem(problems, msg, "keyframe_interpolation", stim, aoi,
                         f"{inner[bad[0]]}-{inner[bad[-1]]}", pair)
                good = np.flatnonzero(shapely.is_valid(mid))
                put(inner[good], mid[good], f"{pair} (interpolated)", origin[i])
                continue
        if problems is None:
            raise InputFormatError(msg)
        _problem(problems, msg, "keyframe_shape", stim, aoi,
                 f"{frame[i]}-{frame[i + 1]}", pair)
        put(inner, _fill(inner.size, geom[i]), f"{loc[i]} (held)", origin[i])
    frames = np.concatenate(out_f)
    hold = np.zeros(frames.size, dtype=bool)
    if not absent[-1]:
        hold[np.argmax(frames)] = True
    return (frames, np.concatenate(out_g), np.concatenate(out_loc),
            np.concatenate(out_origin), hold)


def expand_keyframes(rows: pd.DataFrame, *, source: str = "AOI table",
                     problems: list | None = None) -> pd.DataFrame:
    """Replace the keyframes of every AOI drawn on keyframes by per-frame rows.

    Parameters
    ----------
    rows : DataFrame
        ``stimulus, frame, aoi, geometry, location`` (as read) and ``kind``
        (0 a row given per frame or for every frame, 1 a keyframe, 2 an
        absent keyframe with geometry None, 3 a row dropped by a lenient
        read).  Without ``kind`` the rows are returned unchanged (plus
        ``hold``).
    source : str
        File name for error messages.
    problems : list, optional
        Lenient mode (used by :func:`aoi_fix.aoicheck.check_aois`): keyframe
        pairs that cannot be interpolated are reported here (dicts with
        ``check, stimulus, aoi, frame, location, message``) and the earlier
        keyframe is held instead of raising.  Entries that a lenient reader
        put there with an ``index`` get their stimulus, AOI and frame.

    Returns
    -------
    DataFrame
        ``stimulus, frame, aoi, geometry, location, hold``: rows of AOIs given
        per frame unchanged (``hold`` False); AOIs drawn on keyframes as one
        row per frame from 0 to their last keyframe, absent frames left out,
        ``hold`` True on the last row when the last keyframe is a polygon
        (it then holds for all later frames).  Rows keep the file order of
        the keyframes they come from.

    Raises
    ------
    InputFormatError
        An AOI mixing keyframes and other rows, a keyframe without a frame,
        two keyframes on one frame, only absent keyframes, and (unless
        lenient) two consecutive polygon keyframes of different structure or
        winding, or whose interpolation is an invalid polygon; each names the
        file and both rows.

    Examples
    --------
    >>> kf = pd.DataFrame({"stimulus": ["c", "c"], "frame": [0, 4], "aoi": ["dot", "dot"],
    ...                    "geometry": [shapely.box(0, 0, 2, 2), shapely.box(8, 0, 10, 2)],
    ...                    "location": ["row 2", "row 3"], "kind": [1, 1]})
    >>> out = expand_keyframes(kf)
    >>> out["frame"].tolist(), [g.bounds[0] for g in out["geometry"]], out["hold"].tolist()
    ([0, 1, 2, 3, 4], [0.0, 2.0, 4.0, 6.0, 8.0], [False, False, False, False, True])
    """
    cols = ["stimulus", "frame", "aoi", "geometry", "location"]
    if "kind" not in rows:
        return rows[cols].assign(hold=False)
    df = rows[cols + ["kind"]].reset_index(drop=True)
    df["origin"] = np.arange(len(df))
    df["frame"] = pd.to_numeric(df["frame"]).fillna(-1).astype(np.int64)
    if problems is not None:
        for p in problems:
            if "index" in p:
                r = df.iloc[p.pop("index")]
                text = p["message"]
                check = ("self_intersection" if "self-intersection" in text.lower()
                         else "invalid_polygon")
                p.update(check=check, stimulus=r["stimulus"], aoi=r["aoi"],
                         frame="all" if r["frame"] < 0 else str(r["frame"]),
                         location=r["location"])
    kind = df["kind"].to_numpy()
    df = df[kind != DROPPED]
    keyed = df["kind"].isin([KEY, ABSENT]).groupby([df["stimulus"], df["aoi"]]).transform("any")
    plain = df[~keyed.to_numpy(bool)]
    parts = [plain.assign(hold=False)]
    for _, g in df[keyed.to_numpy(bool)].groupby(["stimulus", "aoi"], sort=True):  # per AOI
        frames, geoms, locs, origin, hold = _expand_track(g, source, problems)
        parts.append(pd.DataFrame({"stimulus": g["stimulus"].iat[0], "frame": frames,
                                   "aoi": g["aoi"].iat[0], "geometry": geoms,
                                   "location": locs, "origin": origin, "hold": hold}))
    out = pd.concat(parts, ignore_index=True)
    out = out.sort_values(["origin", "frame"], kind="stable")
    return out[cols + ["hold"]].reset_index(drop=True)
