"""Moving areas of interest (AOIs): reading polygons per video frame, and hit testing.

An AOI is a named polygon in video pixels that may change shape and place
from frame to frame, or stay fixed for the whole video.  Two input formats
are read:

* CSV with the columns ``stimulus, frame, aoi, wkt``: one polygon per row
  as WKT ``POLYGON`` or ``MULTIPOLYGON`` (holes allowed; OGC Simple
  Features / ISO 19125).  ``frame`` is 0-based; an empty ``frame`` means
  every frame of that stimulus.
* GeoJSON (RFC 7946) ``FeatureCollection`` whose features have
  ``Polygon`` or ``MultiPolygon`` geometry and the properties
  ``stimulus``, ``aoi`` and ``frame`` (``null`` or missing = every frame).
  Rings must be closed with at least 4 positions; either winding order is
  accepted.  (The coordinates are video pixels, not longitude/latitude.)

An AOI without a row for a frame is absent on that frame.  An AOI is either
fixed (one row with an empty frame) or moving (rows with frames), not both.

Conventions
-----------
Edges
    A point exactly on an AOI's boundary (edge or vertex, including the
    edge of a hole) counts as **inside** the AOI.  The same closed rule is
    used for the drawn video rectangle in :func:`aoi_fix.trials.on_video`.
Priority
    When AOIs overlap, the first AOI in the priority order wins: the names
    listed in the study's ``[aois] priority`` come first, in that order;
    the remaining AOIs follow by smallest median area first (over the
    frames where the AOI is present), so the most specific AOI wins (e.g.
    an eye inside a face); ties are broken by name.  The order never
    depends on the row order of the file.
Margin
    ``margin_px`` grows every polygon by that distance (shapely ``buffer``
    with 16 segments per quarter circle, so rounded corners are within
    0.13 % of the margin of the true distance).  A margin of about 1 to
    1.5 deg of visual angle has been suggested to allow for tracker
    accuracy (Orquin, Ashby & Clarke, 2016, from memory); the caller
    converts degrees to pixels.
Row numbers
    CSV errors give the line number in the file, the header being row 1;
    GeoJSON errors give the 0-based position in the ``features`` array as
    ``features[i]``.

References
----------
.. [1] Orquin, J. L., Ashby, N. J. S., & Clarke, A. D. F. (2016). Areas of
   interest as a signal detection problem in behavioral eye-tracking
   research. *J. Behavioral Decision Making*, 29, 103-115 (citation details
   from memory).
.. [2] Butler, H., et al. (2016). The GeoJSON Format. RFC 7946.
"""

from __future__ import annotations

import json
import math
import threading
from pathlib import Path
from typing import Iterable, Mapping, Sequence

import numpy as np
import pandas as pd
import shapely

from . import keyframes as _kf
from .errors import ConfigError, InputFormatError, read_text, where
from .trials import _read_rows

__all__ = [
    "RESERVED_AOI_NAMES",
    "AoiTable",
    "read_aois",
    "match_points",
    "stimulus_check",
]

#: Labels the output uses for "no AOI" and "not on the video"; not allowed as AOI names.
RESERVED_AOI_NAMES = ("(none)", "(off-video)")

_CSV_COLUMNS = ("stimulus", "frame", "aoi", "wkt")
_POLYGON_TYPES = (3, 6)  # shapely type ids of Polygon and MultiPolygon
_QUAD_SEGS = 16
# Above this many frames per stored row the dense frame -> row lookup is
# replaced by a binary search (very sparse, very long videos).
_DENSE_MAX_RATIO = 64
# Cells per side of the grid that classifies each polygon's bounding box
# (:func:`_cell_grid`), and how many points a call must test per polygon of an
# AOI before building that grid pays.  Measured on the benchmark sessions
# (1760 polygons of 2-200 vertices): a 32-cell grid takes about 29 us per
# polygon to build (16 cells: 14 us) and sends about half as many points to
# GEOS as 16 cells; each point it settles saves about 0.1 us, so it pays from
# about 300 points per polygon (the threshold stays at 400: the count is an upper
# bound, every sample of the trials showing the video).  convert builds it beside detection
# (pipeline.place_samples); 32 cells made the 4M-sample convert 6-10 % faster
# than 16 and left the 400k one unchanged, 64 cells cost 50 ms more at 400k.
_GRID_CELLS = 32
_GRID_MIN_POINTS_PER_POLYGON = 400


# --------------------------------------------------------------------------- the table

class _Track:
    """Geometry of one AOI of one stimulus: fixed, or one polygon per listed frame."""

    __slots__ = ("static", "frames", "geoms", "lookup", "median_area", "_buffered", "hold",
                 "_local", "_grids")

    def __init__(self, frames: np.ndarray, geoms: np.ndarray, hold: bool = False):
        self.hold = hold  # the last polygon also holds for every later frame (keyframes)
        self._buffered: dict[float, tuple] = {}
        self._grids: dict[float, tuple] = {}
        self._local = threading.local()
        if frames.size == 1 and frames[0] < 0:
            self.static = geoms[0]
            self.frames = np.empty(0, dtype=np.int64)
            self.geoms = np.array([None], dtype=object)
            self.lookup = None
        else:
            self.static = None
            self.frames = frames
            self.geoms = np.append(geoms, None)  # index -1 = absent
            max_frame = int(frames[-1])
            if max_frame + 2 <= _DENSE_MAX_RATIO * frames.size + 4096:
                lookup = np.full(max_frame + 2, -1, dtype=np.int64)
                lookup[frames] = np.arange(frames.size)
                lookup[-1] = frames.size - 1 if hold else -1
                self.lookup = lookup
            else:
                self.lookup = None
        self.median_area = float(np.median(shapely.area(geoms)))

    def rows(self, frame: np.ndarray) -> np.ndarray:
        """Index into ``geoms`` per frame (>= 0 frames only); -1 (the None slot) if absent."""
        if self.lookup is not None:
            return self.lookup[np.minimum(frame, self.lookup.size - 1)]
        pos = np.searchsorted(self.frames, frame)
        safe = np.minimum(pos, self.frames.size - 1)
        return np.where((self.frames[safe] == frame) | (self.hold & (frame > self.frames[-1])),
                        safe, -1)

    def buffered(self, margin_px: float):
        """(geoms, minx, miny, maxx, maxy) grown by the margin, prepared; cached."""
        hit = self._buffered.get(margin_px)
        if hit is not None:
            return hit
        geoms = np.append(self.static, None) if self.static is not None else self.geoms
        if margin_px > 0:
            grown = np.array(geoms, dtype=object)
            real = grown != None  # noqa: E711 (element-wise)
            grown[real] = shapely.buffer(grown[real], margin_px, quad_segs=_QUAD_SEGS)
            geoms = grown
        else:
            geoms = np.array(geoms, dtype=object)
        shapely.prepare(geoms)
        with np.errstate(all="ignore"):  # per thread (this may run on a side thread)
            b = shapely.bounds(geoms)  # NaN for the None slot
        out = (geoms, *(np.ascontiguousarray(b[:, k]) for k in range(4)))
        self._buffered[margin_px] = out
        return out

    def grid(self, margin_px: float, *, n_points: int = 0, build: bool | None = None):
        """The :func:`_cell_grid` of the grown polygons, or None.

        Built (once per margin) when ``n_points`` points are about to be
        tested and that is at least ``_GRID_MIN_POINTS_PER_POLYGON`` per
        polygon; afterwards returned whatever ``n_points`` is.  Building
        queries the shared prepared polygons, so by default only the main
        thread builds; ``build=True`` (:func:`prepare_tracks`) lets the
        calling thread build, for a caller sure that no other thread uses
        this track meanwhile.
        """
        hit = self._grids.get(margin_px)
        if build is None:
            build = threading.current_thread() is threading.main_thread()
        if hit is not None or not build:
            return hit
        geoms = self.buffered(margin_px)[0]
        if n_points < _GRID_MIN_POINTS_PER_POLYGON * max(len(geoms) - 1, 1):
            return None
        out = self._grids[margin_px] = _cell_grid(*self.buffered(margin_px))
        return out

    def geoms_here(self, margin_px: float) -> np.ndarray:
        """The prepared polygons of :meth:`buffered`, as this thread's own copy.

        GEOS builds parts of a prepared polygon lazily, on its first queries,
        so threads must not query one prepared polygon at the same time (we
        saw heap corruption when they did).  Worker threads therefore get a
        private clone, prepared for them and kept while the thread lives; the
        main thread uses the shared one.
        """
        geoms = self.buffered(margin_px)[0]
        if threading.current_thread() is threading.main_thread():
            return geoms
        mine = getattr(self._local, "geoms", None)
        if mine is None:
            mine = self._local.geoms = {}
        g = mine.get(margin_px)
        if g is None:
            g = shapely.from_wkb(shapely.to_wkb(geoms))
            shapely.prepare(g)
            mine[margin_px] = g
        return g


_OUTSIDE, _INSIDE, _EDGE = 0, 1, 2  # cell classes of _cell_grid


def _cell_grid(geoms: np.ndarray, minx: np.ndarray, miny: np.ndarray, maxx: np.ndarray,
               maxy: np.ndarray, cells: int = _GRID_CELLS):
    """Classify a K x K grid of cells over each polygon's bounding box.

    A cell is ``_EDGE`` when a polygon edge (of any ring) comes within a tiny
    tolerance of it; every other cell holds no boundary point, so it lies
    wholly inside or wholly outside the polygon and one test of its centre
    (one per run of such cells along a grid row, since neighbours without an
    edge between them share their class) decides it.  A point whose cell is
    not ``_EDGE`` is then classified by a table look-up; only points in
    ``_EDGE`` cells are left for the exact GEOS test, so the answer is the
    same as testing every point (tests compare both).  Rows that are None or
    have an empty bounding box are all ``_EDGE``.

    A point's cell is ``min(int((x - minx) * sx), K - 1)`` for a point inside
    the box (and the same with y); the same arithmetic places the edges, and
    it is monotone in x, so an edge never misses a cell it passes through.

    Returns
    -------
    (classes, sx, sy)
        ``classes``: uint8, shape (rows, K * K), index ``iy * K + ix``;
        ``sx``, ``sy``: cells per pixel of each row (0 for all-``_EDGE`` rows).
    """
    k = int(cells)
    n = len(geoms)
    w, h = maxx - minx, maxy - miny
    real = (geoms != None) & (w > 0) & (h > 0)  # noqa: E711 (element-wise; NaN compares False)
    with np.errstate(divide="ignore", invalid="ignore"):
        sx = np.where(real, k / np.where(real, w, 1.0), 0.0)
        sy = np.where(real, k / np.where(real, h, 1.0), 0.0)
    classes = np.full((n, k, k), _EDGE, dtype=np.uint8)
    rows = np.flatnonzero(real)
    if rows.size == 0:
        return classes.reshape(n, k * k), sx, sy
    # every edge of every ring, in cell units of its polygon's grid
    parts, part_row = shapely.get_parts(geoms[rows], return_index=True)
    rings, ring_part = shapely.get_rings(parts, return_index=True)
    xy, xy_ring = shapely.get_coordinates(rings, return_index=True)
    e = np.flatnonzero(xy_ring[1:] == xy_ring[:-1])
    r = rows[part_row[ring_part[xy_ring[e]]]]
    fx0 = (xy[e, 0] - minx[r]) * sx[r]
    fx1 = (xy[e + 1, 0] - minx[r]) * sx[r]
    fy0 = (xy[e, 1] - miny[r]) * sy[r]
    fy1 = (xy[e + 1, 1] - miny[r]) * sy[r]
    # cut long edges into pieces no longer than one cell along either axis
    m = np.maximum(np.ceil(np.maximum(np.abs(fx1 - fx0), np.abs(fy1 - fy0))), 1).astype(np.int64)
    j = np.repeat(np.arange(e.size), m)
    step = np.arange(j.size) - np.repeat(np.cumsum(m) - m, m)
    t0, t1 = step / m[j], (step + 1) / m[j]
    dx, dy = (fx1 - fx0)[j], (fy1 - fy0)[j]
    ax0, ax1 = fx0[j] + dx * t0, fx0[j] + dx * t1
    ay0, ay1 = fy0[j] + dy * t0, fy0[j] + dy * t1
    # cells each piece may touch, widened by far more than the rounding above
    tol = 1e-6
    lo_x = np.clip(np.floor(np.minimum(ax0, ax1) - tol), 0, k - 1).astype(np.int64)
    hi_x = np.clip(np.floor(np.maximum(ax0, ax1) + tol), 0, k - 1).astype(np.int64)
    lo_y = np.clip(np.floor(np.minimum(ay0, ay1) - tol), 0, k - 1).astype(np.int64)
    hi_y = np.clip(np.floor(np.maximum(ay0, ay1) + tol), 0, k - 1).astype(np.int64)
    rj = r[j]
    edge = np.zeros((n, k, k), dtype=bool)
    edge[~real] = True
    for ox in range(3):  # a piece spans at most 3 cells per axis (1 cell + tolerance)
        for oy in range(3):
            ix, iy = lo_x + ox, lo_y + oy
            ok = (ix <= hi_x) & (iy <= hi_y)
            edge[rj[ok], iy[ok], ix[ok]] = True
    # runs of edge-free cells along each grid row: one centre test per run
    free = ~edge.reshape(n * k, k)
    start = free.copy()
    start[:, 1:] &= ~free[:, :-1]
    first = np.flatnonzero(start.ravel())
    if first.size:
        fr, fi = np.divmod(first, k * k)  # polygon row, cell within its grid
        fy, fx = np.divmod(fi, k)
        inside = shapely.intersects_xy(geoms[fr], minx[fr] + (fx + 0.5) / sx[fr],
                                       miny[fr] + (fy + 0.5) / sy[fr])
        run = np.cumsum(start.ravel()) - 1
        flat = classes.reshape(-1)
        cells_free = np.flatnonzero(free.ravel())
        flat[cells_free] = inside[run[cells_free]].astype(np.uint8)
    return classes.reshape(n, k * k), sx, sy


class AoiTable:
    """AOI polygons per stimulus and frame, ready for hit testing.

    Build one with :func:`read_aois`, or directly from a DataFrame with the
    columns ``stimulus`` (str), ``frame`` (int >= 0, or -1 / NA for every
    frame), ``aoi`` (str) and ``geometry`` (shapely Polygon or
    MultiPolygon); an optional ``location`` column names each row's origin
    for error messages, and an optional ``hold`` column (bool) set on an
    AOI's last frame makes that polygon hold for all later frames (keyframes,
    :mod:`aoi_fix.keyframes`).  The table is read-only; its internal order is
    sorted, so nothing depends on the row order it was built from.

    Examples
    --------
    >>> t = AoiTable(pd.DataFrame({
    ...     "stimulus": ["clip", "clip"], "frame": [-1, -1], "aoi": ["face", "eye"],
    ...     "geometry": [shapely.box(0, 0, 100, 100), shapely.box(10, 10, 20, 20)]}))
    >>> t.names("clip")
    ('eye', 'face')
    >>> t.names("clip", priority=["face"])
    ('face', 'eye')
    """

    __slots__ = ("_rows", "_tracks", "source")

    def __init__(self, rows: pd.DataFrame, *, source: str = "AOI table"):
        missing = [c for c in ("stimulus", "frame", "aoi", "geometry") if c not in rows]
        if missing:
            raise ValueError(f"AoiTable needs the columns {', '.join(missing)}")
        df = pd.DataFrame({
            "stimulus": rows["stimulus"].astype(str).to_numpy(),
            "frame": pd.to_numeric(rows["frame"]).fillna(-1).astype(np.int64).to_numpy(),
            "aoi": rows["aoi"].astype(str).to_numpy(),
            "geometry": np.asarray(rows["geometry"], dtype=object),
            "location": (rows["location"].astype(str).to_numpy() if "location" in rows
                         else [f"index {i}" for i in range(len(rows))]),
            "ordinal": np.arange(len(rows)),
            "hold": rows["hold"].to_numpy(bool) if "hold" in rows else np.zeros(len(rows), bool),
        })
        if (df["frame"] < -1).any():
            raise ValueError("AoiTable: frames must be >= 0, or -1 / NA for every frame")
        _check_duplicates(df, source)
        df = df.sort_values(["stimulus", "aoi", "frame"], kind="stable").reset_index(drop=True)
        object.__setattr__(self, "source", str(source))
        object.__setattr__(self, "_rows", df)
        tracks: dict[str, dict[str, _Track]] = {}
        for (stim, aoi), g in df.groupby(["stimulus", "aoi"], sort=True):
            tracks.setdefault(stim, {})[aoi] = _Track(g["frame"].to_numpy(np.int64),
                                                      g["geometry"].to_numpy(object),
                                                      bool(g["hold"].iat[-1]))
        object.__setattr__(self, "_tracks", tracks)

    def __setattr__(self, name, value):
        raise AttributeError("AoiTable is read-only")

    def __len__(self) -> int:
        return len(self._rows)

    def __repr__(self) -> str:
        return (f"AoiTable({len(self)} polygons, stimuli={list(self.stimuli())}, "
                f"source={self.source!r})")

    def stimuli(self) -> tuple[str, ...]:
        """Stimuli with at least one AOI, sorted by name."""
        return tuple(self._tracks)

    def priority(self, stimulus: str, explicit: Iterable[str] = ()) -> tuple[str, ...]:
        """AOI names of a stimulus in the order in which overlapping AOIs win.

        Parameters
        ----------
        stimulus : str
        explicit : iterable of str
            The study's ``[aois] priority``: these win first, in this order.
            Names that this stimulus lacks are skipped, but a name that no
            stimulus of the table has is an error (a likely typo).

        Returns
        -------
        tuple of str
            ``explicit`` names first, then the others by smallest median
            area first, ties by name.  Empty for a stimulus without AOIs.

        Raises
        ------
        ConfigError
            A name in ``explicit`` that is no AOI of any stimulus.
        """
        explicit = [str(e) for e in explicit]
        if explicit:
            known = set(self._rows["aoi"])
            unknown = [e for e in explicit if e not in known]
            if unknown:
                raise ConfigError(f"study key 'aois.priority': found {unknown[0]!r}, expected "
                                  f"an AOI name of {self.source} ("
                                  + ", ".join(map(repr, sorted(known))) + ")")
        tracks = self._tracks.get(stimulus, {})
        first = [e for e in dict.fromkeys(explicit) if e in tracks]
        rest = sorted((n for n in tracks if n not in first),
                      key=lambda n: (tracks[n].median_area, n))
        return tuple(first + rest)

    def names(self, stimulus: str, priority: Iterable[str] = ()) -> tuple[str, ...]:
        """AOI names of a stimulus in priority order (see :meth:`priority`).

        :func:`match_points` returns indices into this tuple.
        """
        return self.priority(stimulus, priority)

    def frames(self, stimulus: str) -> np.ndarray:
        """Sorted frames with at least one moving-AOI polygon (fixed AOIs not included)."""
        f = self._rows.loc[(self._rows["stimulus"] == stimulus) & (self._rows["frame"] >= 0),
                           "frame"]
        return np.unique(f.to_numpy(np.int64))

    def geometry(self, stimulus: str, aoi: str, frame: int):
        """The AOI's polygon on a frame, or None when absent there."""
        tr = self._tracks.get(stimulus, {}).get(aoi)
        if tr is None or frame < 0:
            return None
        if tr.static is not None:
            return tr.static
        return tr.geoms[int(tr.rows(np.array([frame]))[0])]

    def location(self, stimulus: str) -> str:
        """Where the stimulus first appears in the source ("row 5", "features[3]")."""
        rows = self._rows[self._rows["stimulus"] == stimulus]
        if rows.empty:
            raise KeyError(stimulus)
        return str(rows.loc[rows["ordinal"].idxmin(), "location"])

    def to_frame(self) -> pd.DataFrame:
        """A copy as a DataFrame: ``stimulus, frame`` (Int64, NA = every frame),
        ``aoi``, ``wkt``, ``area_px2``, sorted by stimulus, AOI and frame."""
        r = self._rows
        return pd.DataFrame({
            "stimulus": r["stimulus"],
            "frame": pd.array(r["frame"].where(r["frame"] >= 0), dtype="Int64"),
            "aoi": r["aoi"],
            "wkt": shapely.to_wkt(r["geometry"].to_numpy(object), rounding_precision=-1),
            "area_px2": shapely.area(r["geometry"].to_numpy(object)),
        })

    def _track(self, stimulus: str, aoi: str) -> _Track:
        return self._tracks[stimulus][aoi]


def _check_duplicates(df: pd.DataFrame, source: str) -> None:
    """One polygon per (stimulus, frame, aoi); a fixed AOI has no per-frame rows."""
    key = df[["stimulus", "aoi", "frame"]]
    dup = key.duplicated(keep="first").to_numpy()
    if dup.any():
        i = int(np.flatnonzero(dup)[0])
        s, a, f = key.iloc[i]
        first = df.index[(key["stimulus"] == s) & (key["aoi"] == a) & (key["frame"] == f)][0]
        frame_txt = "every frame" if f < 0 else f"frame {f}"
        raise InputFormatError(f"{source}: {df['location'].iat[i]}: found AOI {a!r} of "
                               f"stimulus {s!r} on {frame_txt} again (first at "
                               f"{df['location'].iat[first]}), expected one polygon per "
                               "stimulus, frame and AOI")
    static = df["frame"] < 0
    if static.any():
        both = df[~static].merge(df[static], on=["stimulus", "aoi"], suffixes=("", "_static"))
        if len(both):
            b = both.sort_values("ordinal").iloc[0]
            raise InputFormatError(
                f"{source}: {b['location']}: found AOI {b['aoi']!r} of stimulus "
                f"{b['stimulus']!r} on frame {b['frame']} although {b['location_static']} "
                "gives it for every frame (empty frame); expected either one fixed row or "
                "rows per frame")


# --------------------------------------------------------------------------- reading

def _short(text: str, n: int = 40) -> str:
    return text if len(text) <= n else text[: n - 3] + "..."


def _check_name(value, loc: str, field: str, kind: str) -> str:
    if not isinstance(value, str) or not value.strip():
        raise InputFormatError(f"{loc}, {field}: found {value!r}, expected a non-empty "
                               f"{kind} name")
    value = value.strip()
    if kind == "AOI" and value in RESERVED_AOI_NAMES:
        raise InputFormatError(f"{loc}, {field}: found {value!r}, which is reserved for "
                               "output labels; expected another AOI name")
    return value


def _check_stimulus(value: str, loc: str, field: str, stimuli: Mapping) -> None:
    if value not in stimuli:
        known = ", ".join(map(repr, stimuli)) or "none defined"
        raise InputFormatError(f"{loc}, {field}: found {value!r}, expected a stimulus with "
                               f"a [stimuli.NAME] entry in the study ({known})")


def _parse_frame(value, loc: str, field: str) -> int:
    """-1 for every frame (empty / null), else a non-negative integer."""
    if value is None or (isinstance(value, str) and not value.strip()):
        return -1
    if isinstance(value, bool):
        num = math.nan
    elif isinstance(value, (int, float)):
        num = float(value)
    elif isinstance(value, str):
        try:
            num = float(value.strip())
        except ValueError:
            num = math.nan
    else:
        num = math.nan
    if not math.isfinite(num) or num < 0 or num != int(num):
        what = ("negative" if math.isfinite(num) and num < 0 else
                "fractional" if math.isfinite(num) else "not a number")
        raise InputFormatError(f"{loc}, {field}: found {value!r} ({what}), expected a "
                               "0-based frame number (integer >= 0) or empty for every frame")
    return int(num)


def _check_geometries(geoms: np.ndarray, locs: Sequence[str], texts: Sequence[str]) -> np.ndarray:
    """Vectorised validity checks; raise for the first bad polygon in file order."""
    n = len(geoms)
    parsed = np.array([g is not None for g in geoms], dtype=bool)
    type_id = np.full(n, -1)
    type_id[parsed] = shapely.get_type_id(geoms[parsed])
    poly = parsed & np.isin(type_id, _POLYGON_TYPES)
    empty = np.zeros(n, dtype=bool)
    empty[poly] = shapely.is_empty(geoms[poly])
    ok = poly & ~empty
    if ok.any():
        geoms[ok] = shapely.force_2d(geoms[ok])
    finite = np.zeros(n, dtype=bool)
    with np.errstate(all="ignore"):  # per thread: AOIs are read beside the samples parse
        if ok.any():
            finite[ok] = np.isfinite(shapely.bounds(geoms[ok])).all(axis=1)
    ok &= finite
    valid = np.zeros(n, dtype=bool)
    if ok.any():
        valid[ok] = shapely.is_valid(geoms[ok])
    bad = np.flatnonzero(~valid)
    if bad.size == 0:
        return geoms
    i = int(bad[0])
    loc, text = locs[i], texts[i]
    if not parsed[i]:
        msg = (f"found {_short(text)!r}, which is not well-formed; expected WKT POLYGON "
               "or MULTIPOLYGON")
    elif not poly[i]:
        msg = f"found a {geoms[i].geom_type.upper()}, expected POLYGON or MULTIPOLYGON"
    elif empty[i]:
        msg = ("found an empty polygon, expected a polygon with an area (leave the row out "
               "to make the AOI absent on that frame)")
    elif not finite[i]:
        msg = "found a non-finite coordinate, expected finite video pixel coordinates"
    else:
        reason = shapely.is_valid_reason(geoms[i])
        msg = (f"found an invalid polygon ({reason}), expected a valid polygon: rings that "
               "do not cross themselves or each other, holes inside the shell")
    raise InputFormatError(f"{loc}: {msg}")


def _read_csv(path: Path, stimuli: Mapping, problems=None):
    header, header_line, rows = _read_rows(path, "AOI")
    missing = [c for c in _CSV_COLUMNS if c not in header]
    if missing:
        raise InputFormatError(f"{where(path, row=header_line)}: missing column(s) "
                               f"{', '.join(map(repr, missing))}; found "
                               f"{', '.join(map(repr, header))}")
    if not rows:
        raise InputFormatError(f"{path}: no AOI rows after the header; expected one "
                               "polygon per row")
    col = {c: header.index(c) for c in _CSV_COLUMNS}
    kinds = _kf.csv_kinds(header, rows, path)  # keyframe / absent rows (keyframes.py)
    stims, frames, names, texts, locs = [], [], [], [], []
    for line, cells in rows:
        def cell(name: str) -> str:
            i = col[name]
            return cells[i].strip() if i < len(cells) else ""
        stim = _check_name(cell("stimulus"), where(path, row=line), "column 'stimulus'",
                           "stimulus")
        _check_stimulus(stim, where(path, row=line), "column 'stimulus'", stimuli)
        frames.append(_parse_frame(cell("frame"), where(path, row=line), "column 'frame'"))
        names.append(_check_name(cell("aoi"), where(path, row=line), "column 'aoi'", "AOI"))
        text = cell("wkt")
        if not text:
            raise InputFormatError(f"{where(path, row=line, column='wkt')}: found an empty "
                                   "cell, expected WKT POLYGON or MULTIPOLYGON")
        stims.append(stim)
        texts.append(text)
        locs.append(where(path, row=line, column="wkt"))
    with np.errstate(all="ignore"):  # e.g. "overflow in from_wkt" for 1e400; per thread
        geoms = shapely.from_wkt(np.array(texts, dtype=object), on_invalid="ignore")
    geoms, kinds = _kf.check_present(_check_geometries, geoms, locs, texts, kinds, problems)
    location = [f"row {line}" for line, _ in rows]
    return stims, frames, names, geoms, location, kinds


def _ring_check(ring, loc: str, what: str) -> None:
    if not isinstance(ring, list) or len(ring) < 4:
        n = len(ring) if isinstance(ring, list) else type(ring).__name__
        raise InputFormatError(f"{loc}: {what} has {n} positions, expected a closed ring of "
                               "at least 4 positions (RFC 7946)")
    for p in ring:
        if (not isinstance(p, list) or len(p) < 2
                or not all(isinstance(c, (int, float)) and not isinstance(c, bool)
                           and math.isfinite(c) for c in p)):
            raise InputFormatError(f"{loc}: {what} has the position {_short(json.dumps(p))}, "
                                   "expected [x, y] with finite numbers")
    if ring[0][:2] != ring[-1][:2]:
        raise InputFormatError(f"{loc}: {what} is not closed (first position "
                               f"{ring[0]} != last {ring[-1]}), expected first = last "
                               "(RFC 7946)")


def _read_geojson(path: Path, stimuli: Mapping, problems=None):
    text = read_text(path, what="AOI file", expected="an AOI file")
    if not text.strip():
        raise InputFormatError(f"{path}: empty file, expected a GeoJSON FeatureCollection")
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as e:
        raise InputFormatError(f"{path}: line {e.lineno}, column {e.colno}: malformed JSON "
                               f"({e.msg})") from None
    if not isinstance(doc, dict) or doc.get("type") != "FeatureCollection":
        found = doc.get("type") if isinstance(doc, dict) else type(doc).__name__
        raise InputFormatError(f"{path}: found top-level type {found!r}, expected a GeoJSON "
                               "FeatureCollection")
    feats = doc.get("features")
    if not isinstance(feats, list) or not feats:
        raise InputFormatError(f"{path}: key 'features': found no features, expected one "
                               "Polygon or MultiPolygon feature per AOI and frame")
    stims, frames, names, geoms, locs, texts, kinds = [], [], [], [], [], [], []
    for i, f in enumerate(feats):
        loc = f"{path}: features[{i}]"
        if not isinstance(f, dict) or f.get("type") != "Feature":
            raise InputFormatError(f"{loc}: expected an object with \"type\": \"Feature\"")
        props = f.get("properties")
        if not isinstance(props, dict):
            raise InputFormatError(f"{loc}: found no properties, expected 'stimulus', "
                                   "'aoi' and 'frame'")
        for k in ("stimulus", "aoi"):
            if k not in props:
                raise InputFormatError(f"{loc}: property {k!r} is missing")
        stim = _check_name(props["stimulus"], loc, "property 'stimulus'", "stimulus")
        _check_stimulus(stim, loc, "property 'stimulus'", stimuli)
        frame = _parse_frame(props.get("frame"), loc, "property 'frame'")
        if isinstance(props.get("frame"), str):
            raise InputFormatError(f"{loc}, property 'frame': found the string "
                                   f"{props['frame']!r}, expected a JSON number or null")
        name = _check_name(props["aoi"], loc, "property 'aoi'", "AOI")
        g = f.get("geometry")
        kinds.append(_kf.geojson_kind(props, g, loc))
        if kinds[-1] == _kf.ABSENT:  # an absent keyframe: "geometry": null
            for lst, v in zip((stims, frames, names, geoms, locs, texts),
                              (stim, frame, name, None, loc, "absent")):
                lst.append(v)
            continue
        gtype = g.get("type") if isinstance(g, dict) else None
        if gtype not in ("Polygon", "MultiPolygon"):
            raise InputFormatError(f"{loc}: found geometry type {gtype!r}, expected "
                                   "'Polygon' or 'MultiPolygon'")
        coords = g.get("coordinates")
        polys = [coords] if gtype == "Polygon" else coords
        if not isinstance(polys, list) or not polys or not all(
                isinstance(p, list) and p for p in polys):
            raise InputFormatError(f"{loc}: found coordinates "
                                   f"{_short(json.dumps(coords))}, expected a list of rings "
                                   f"for a {gtype}")
        for j, poly in enumerate(polys):
            for k, ring in enumerate(poly):
                what = (f"polygon {j} ring {k}" if gtype == "MultiPolygon" else f"ring {k}")
                _ring_check(ring, loc, what)
        shells = [shapely.Polygon([p[:2] for p in poly[0]], [[p[:2] for p in r]
                                                             for r in poly[1:]])
                  for poly in polys]
        geoms.append(shells[0] if gtype == "Polygon" else shapely.MultiPolygon(shells))
        stims.append(stim)
        frames.append(frame)
        names.append(name)
        locs.append(loc)
        texts.append(gtype)
    geoms, kinds = _kf.check_present(_check_geometries, geoms, locs, texts, kinds, problems)
    location = [f"features[{i}]" for i in range(len(feats))]
    return stims, frames, names, geoms, location, kinds


def read_aois(path, *, stimuli: Mapping, problems: list | None = None) -> AoiTable:
    """Read AOI polygons per stimulus and frame from CSV (WKT) or GeoJSON.

    Parameters
    ----------
    path : str or Path
        ``.geojson`` or ``.json``: a GeoJSON FeatureCollection; anything
        else: UTF-8 CSV (byte-order mark, CRLF and blank lines accepted)
        with the columns ``stimulus, frame, aoi, wkt``.  Polygons are in
        video pixels of the stimulus; see the module docstring for the
        formats and conventions.
    stimuli : Mapping[str, Stimulus]
        ``study.stimuli``: every stimulus named in the file needs an entry.
    problems : list, optional
        Lenient mode for ``aoi-fix aois check``: invalid polygons and
        keyframes that cannot be interpolated are appended here (dicts)
        and left out instead of raising.  AOIs drawn on keyframes (optional
        ``keyframe`` column or property) are expanded into per-frame
        polygons: see :mod:`aoi_fix.keyframes` and ``docs/keyframes.md``.

    Returns
    -------
    AoiTable

    Raises
    ------
    InputFormatError
        One line naming the file and the row (CSV: line number, header =
        row 1) or feature (``features[i]``, 0-based): a missing file or
        column, an empty file, unparsable WKT, a geometry that is not a
        polygon, an invalid (e.g. self-intersecting) polygon with the reason
        from GEOS, an unclosed or short GeoJSON ring, an empty, negative or
        fractional frame, a stimulus without ``[stimuli.NAME]``, an AOI named
        ``(none)`` or ``(off-video)``, a repeated (stimulus, frame, aoi).

    Examples
    --------
    >>> import tempfile
    >>> from aoi_fix.config import Stimulus
    >>> p = Path(tempfile.mkdtemp()) / "aois.csv"
    >>> _ = p.write_text('stimulus,frame,aoi,wkt\\n'
    ...                  'clip,,box,"POLYGON ((0 0, 10 0, 10 10, 0 10, 0 0))"\\n')
    >>> t = read_aois(p, stimuli={"clip": Stimulus(fps=25.0, width_px=64, height_px=48)})
    >>> t.names("clip")
    ('box',)
    """
    path = Path(path)
    if not path.exists():
        raise InputFormatError(f"{path}: AOI file not found")
    if path.suffix.lower() in (".geojson", ".json"):
        stims, frames, names, geoms, location, kinds = _read_geojson(path, stimuli, problems)
    else:
        stims, frames, names, geoms, location, kinds = _read_csv(path, stimuli, problems)
    df = pd.DataFrame({"stimulus": stims, "frame": np.asarray(frames, dtype=np.int64),
                       "aoi": names, "geometry": geoms, "location": location, "kind": kinds})
    df = _kf.expand_keyframes(df, source=str(path), problems=problems)  # keyframes.py
    return AoiTable(df, source=str(path))


# --------------------------------------------------------------------------- matching

def match_points(aois: AoiTable, stimulus: str, frame, x_vid, y_vid, *,
                 margin_px: float = 0.0, priority: Iterable[str] = ()) -> np.ndarray:
    """Index of the winning AOI for each point on its own video frame.

    Parameters
    ----------
    aois : AoiTable
    stimulus : str
        The video all points belong to (call once per trial or stimulus).
    frame : int or array_like of int
        0-based frame of each point (e.g. :func:`aoi_fix.trials.frame_index`);
        -1 means no frame and gives -1.
    x_vid, y_vid : array_like of float
        Point positions in video pixels; NaN gives -1.
    margin_px : float, keyword-only
        Grow every AOI by this distance in video pixels (>= 0).
    priority : iterable of str, keyword-only
        The study's ``[aois] priority`` (see :meth:`AoiTable.priority`).

    Returns
    -------
    numpy.ndarray of int64
        Index into ``aois.names(stimulus, priority)``, -1 where no AOI holds
        the point.  Boundary points count as inside.

    Notes
    -----
    Vectorised with shapely 2: for each AOI (in priority order) a bounding-
    box test in numpy picks candidate points still unassigned, each looked up
    to its frame's polygon through a frame -> polygon table, and one
    ``shapely.intersects_xy`` call over prepared polygons tests all of them.
    When a call has many points per polygon (at least
    ``_GRID_MIN_POINTS_PER_POLYGON``), a 32 x 32 grid of cells over each
    polygon's box, built once, settles the points in cells without an edge by
    a table look-up, and only points in edge cells go to GEOS; the answer is
    the same (tested).  Python loops run over AOIs only, never over points
    or frames.

    Examples
    --------
    >>> t = AoiTable(pd.DataFrame({
    ...     "stimulus": ["c", "c", "c"], "frame": [0, 1, -1], "aoi": ["dot", "dot", "bg"],
    ...     "geometry": [shapely.box(0, 0, 10, 10), shapely.box(10, 0, 20, 10),
    ...                  shapely.box(0, 0, 100, 100)]}))
    >>> t.names("c")
    ('dot', 'bg')
    >>> match_points(t, "c", [0, 1, 1, 0, -1], [5, 5, 10, 200, 5], [5, 5, 5, 5, 5]).tolist()
    [0, 1, 0, -1, -1]
    """
    margin_px = float(margin_px)
    if not math.isfinite(margin_px) or margin_px < 0:
        raise ConfigError(f"AOI margin: found {margin_px!r} px, expected a finite value >= 0")
    x = np.asarray(x_vid, dtype=float)
    y = np.asarray(y_vid, dtype=float)
    f = np.asarray(frame)
    if f.dtype.kind == "f":
        f = np.where(np.isfinite(f), f, -1)
    f = f.astype(np.int64)
    x, y, f = np.broadcast_arrays(x, y, f)
    shape = x.shape
    x, y, f = x.ravel(), y.ravel(), f.ravel()
    result = np.full(x.size, -1, dtype=np.int64)
    order = aois.names(stimulus, priority)
    if not order or x.size == 0:
        return result.reshape(shape)
    ok = np.isfinite(x) & np.isfinite(y) & (f >= 0)
    idx = np.flatnonzero(ok)
    xs, ys, fs = x[idx], y[idx], f[idx]
    res = np.full(idx.size, -1, dtype=np.int64)
    for rank, name in enumerate(order):
        track = aois._track(stimulus, name)
        _, minx, miny, maxx, maxy = track.buffered(margin_px)
        geoms = track.geoms_here(margin_px)
        grid = track.grid(margin_px, n_points=idx.size)
        if track.static is not None:
            cand = ((res < 0) & (xs >= minx[0]) & (xs <= maxx[0])
                    & (ys >= miny[0]) & (ys <= maxy[0]))
            sel = np.flatnonzero(cand)
            r = np.zeros(sel.size, dtype=np.int64) if grid is not None else None
        else:
            rows = track.rows(fs)  # -1 = the None slot, NaN bounds
            cand = ((res < 0) & (xs >= minx.take(rows)) & (xs <= maxx.take(rows))
                    & (ys >= miny.take(rows)) & (ys <= maxy.take(rows)))
            sel = np.flatnonzero(cand)
            r = rows[sel]
        if grid is not None:  # cells wholly inside or outside settle most points
            cls = _grid_class(grid, r, xs[sel], ys[sel], minx, miny)
            res[sel[cls == _INSIDE]] = rank
            keep = cls == _EDGE
            sel, r = sel[keep], r[keep]
        g = geoms[0] if track.static is not None else geoms.take(r)
        hit = shapely.intersects_xy(g, xs[sel], ys[sel])
        res[sel[hit]] = rank
    result[idx] = res
    return result.reshape(shape)


def _grid_class(grid, r: np.ndarray, x: np.ndarray, y: np.ndarray, minx: np.ndarray,
                miny: np.ndarray) -> np.ndarray:
    """Cell class (``_OUTSIDE``, ``_INSIDE``, ``_EDGE``) of points in row ``r``'s box."""
    classes, sx, sy = grid
    k = _GRID_CELLS
    ix = x - minx.take(r)
    ix *= sx.take(r)
    iy = y - miny.take(r)
    iy *= sy.take(r)
    ix = np.minimum(ix.astype(np.int64), k - 1)  # >= 0 inside the box; int() floors
    iy = np.minimum(iy.astype(np.int64), k - 1)
    iy *= k
    iy += ix
    iy += r * (k * k)
    return classes.reshape(-1).take(iy)


def prepare_tracks(aois: AoiTable, stimulus: str, *, margin_px: float = 0.0,
                   n_points: int = 0) -> None:
    """Grow, prepare and index every AOI of a stimulus for ``margin_px`` now.

    :func:`match_points` does this on first use.  ``shapely.prepare`` writes
    into the geometry objects, so it must happen once, before threads test
    points in parallel (each of them then clones the prepared polygons,
    :meth:`_Track.geoms_here`).  ``n_points``: how many points will be
    tested in all; when that is many per polygon, the cell grid that settles
    most points without GEOS is built too (by the calling thread, which may
    be a side thread: nothing else may use these AOIs until this returns;
    the threads of :func:`match_points` never build it).
    """
    for name in aois.names(stimulus):
        track = aois._track(stimulus, name)
        track.buffered(float(margin_px))
        track.grid(float(margin_px), n_points=int(n_points), build=True)


def stimulus_check(trials: pd.DataFrame, aois: AoiTable, trials_path, aois_path) -> None:
    """Raise when the AOI file has a stimulus that no trial shows.

    Such AOIs would silently never be hit, which usually means a misspelt
    stimulus name in one of the two files.  (A trial stimulus without
    ``[stimuli.NAME]`` is caught by :func:`aoi_fix.trials.read_trials`; a
    trial whose video has no AOIs is allowed.)

    Raises
    ------
    InputFormatError
        Naming the AOI file and the first row (or feature) of that stimulus.
    """
    shown = set(trials["stimulus"].astype(str))
    unused = [s for s in aois.stimuli() if s not in shown]
    if not unused:
        return
    first = min(unused, key=lambda s: aois._rows.loc[aois._rows["stimulus"] == s,
                                                     "ordinal"].min())
    loc = aois.location(first)
    field = "column 'stimulus'" if loc.startswith("row") else "property 'stimulus'"
    shown_txt = ", ".join(map(repr, sorted(shown))) or "none"
    raise InputFormatError(f"{aois_path}: {loc}, {field}: found {first!r}, which no trial "
                           f"in {trials_path} shows; expected one of {shown_txt}")
