"""Check an AOI file on its own, before any samples: ``aoi-fix aois check``.

:func:`check_aois` reads an AOI file leniently (every bad polygon is
reported, not only the first), expands keyframes (:mod:`aoi_fix.keyframes`)
and looks at every frame of every stimulus for:

=====================  ========  ==========================================
check                  severity  meaning
=====================  ========  ==========================================
``invalid_polygon``    error     a row whose geometry is not a usable polygon
                                 (unparsable, not a polygon, empty,
                                 non-finite, or invalid for another reason)
``self_intersection``  error     an invalid polygon whose ring crosses itself
``keyframe_shape``     error     consecutive keyframes with different vertex
                                 counts or winding (the earlier one is held)
``keyframe_interpolation`` error moving between two keyframes gives an
                                 invalid polygon (those frames are left out)
``overlap``            warning   two AOIs share area on some frames (the
                                 priority order decides; nested AOIs such as
                                 eyes inside a face are usually intended)
``outside_video``      warning   an AOI extends beyond ``0..width_px,
                                 0..height_px`` of its stimulus
``track_gap``          warning   an AOI disappears and comes back
=====================  ========  ==========================================

Frames checked per stimulus: 0 up to the last frame any row (or keyframe)
of the stimulus names; a stimulus with only fixed AOIs is checked once.
Format errors that stop :func:`aoi_fix.aois.read_aois` (a missing column, a
bad frame number, an unknown stimulus, ...) stop the check the same way.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Iterable, Sequence

import numpy as np
import pandas as pd
import shapely

from .aois import AoiTable, read_aois
from .config import Study, load_study

__all__ = ["FINDING_COLUMNS", "ERROR_CHECKS", "check_aois", "contact_sheet", "run_check",
           "default_frames"]

#: Columns of the findings table, in order.
FINDING_COLUMNS = ("severity", "check", "stimulus", "aoi", "other_aoi", "frames", "n_frames",
                   "area_px2", "location", "message")
#: Checks whose findings are errors (``aoi-fix aois check`` then exits 1).
ERROR_CHECKS = ("invalid_polygon", "self_intersection", "keyframe_shape",
                "keyframe_interpolation")
_MAX_RUNS = 8


def _ranges(frames: np.ndarray) -> str:
    """``[0, 1, 2, 5, 7, 8]`` -> ``"0-2, 5, 7-8"`` (at most 8 runs shown)."""
    f = np.asarray(frames, dtype=np.int64)
    if f.size == 0:
        return ""
    cut = np.flatnonzero(np.diff(f) != 1) + 1
    starts, ends = f[np.r_[0, cut]], f[np.r_[cut - 1, f.size - 1]]
    runs = [str(a) if a == b else f"{a}-{b}" for a, b in zip(starts, ends)]
    more = len(runs) - _MAX_RUNS
    return ", ".join(runs[:_MAX_RUNS]) + (f", ... (+{more} more)" if more > 0 else "")


def _span(table: AoiTable, stimulus: str) -> np.ndarray:
    f = table._rows.loc[table._rows["stimulus"] == stimulus, "frame"].to_numpy(np.int64)
    return np.arange(max(int(f.max()), 0) + 1)


def _geoms(table: AoiTable, stimulus: str, aoi: str, frames: np.ndarray) -> np.ndarray:
    """The AOI's polygon on each frame (None where absent)."""
    tr = table._track(stimulus, aoi)
    if tr.static is not None:
        out = np.empty(frames.size, dtype=object)
        out.fill(tr.static)
        return out
    return tr.geoms.take(tr.rows(frames))


def _bounds(g: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore"):
        return shapely.bounds(g)  # NaN rows where absent


def _finding(severity, check, stimulus, aoi, message, *, other="", frames=None,
             area=math.nan, location="") -> dict:
    f = np.asarray([] if frames is None else frames, dtype=np.int64)
    return {"severity": severity, "check": check, "stimulus": stimulus, "aoi": aoi,
            "other_aoi": other, "frames": _ranges(f), "n_frames": int(f.size),
            "area_px2": area, "location": location, "message": message}


def _overlaps(table, stim, names, geoms, bounds, frames, tol, out):
    for i, a in enumerate(names):  # loop over pairs of AOIs
        for b in names[i + 1:]:
            ba, bb = bounds[a], bounds[b]
            cand = np.flatnonzero((ba[:, 0] <= bb[:, 2]) & (bb[:, 0] <= ba[:, 2])
                                  & (ba[:, 1] <= bb[:, 3]) & (bb[:, 1] <= ba[:, 3]))
            if cand.size == 0:
                continue
            area = shapely.area(shapely.intersection(geoms[a][cand], geoms[b][cand]))
            hit = area > tol
            if not hit.any():
                continue
            idx = cand[hit]
            if shapely.covers(geoms[b][idx], geoms[a][idx]).all():
                how = f"; {a!r} lies inside {b!r} (nested)"
            elif shapely.covers(geoms[a][idx], geoms[b][idx]).all():
                how = f"; {b!r} lies inside {a!r} (nested)"
            else:
                how = ""
            out.append(_finding(
                "warning", "overlap", stim, a,
                f"{table.source}: stimulus {stim!r}: AOIs {a!r} and {b!r} overlap on "
                f"{idx.size} frame(s) (up to {area[hit].max():.1f} px2); {a!r} wins there "
                f"by priority{how}", other=b, frames=frames[idx], area=float(area[hit].max())))


def _outside(table, stim, name, g, b, frames, width, height, tol, out):
    cand = np.flatnonzero((b[:, 0] < 0) | (b[:, 1] < 0) | (b[:, 2] > width) | (b[:, 3] > height))
    if cand.size == 0:
        return
    video = shapely.box(0.0, 0.0, float(width), float(height))
    out_area = shapely.area(shapely.difference(g[cand], video))
    hit = out_area > tol
    if not hit.any():
        return
    idx = cand[hit]
    whole = int((out_area[hit] >= shapely.area(g[idx]) - tol).sum())
    extra = f", entirely outside on {whole}" if whole else ""
    out.append(_finding(
        "warning", "outside_video", stim, name,
        f"{table.source}: stimulus {stim!r}: AOI {name!r} extends outside the {width}x{height} "
        f"video on {idx.size} frame(s) (up to {out_area[hit].max():.1f} px2 outside{extra})",
        frames=frames[idx], area=float(out_area[hit].max())))


def _gaps(table, stim, name, g, frames, out):
    present = np.array([x is not None for x in g], dtype=bool)
    on = np.flatnonzero(present)
    if on.size == 0:
        return
    gap = frames[on[0]:on[-1] + 1][~present[on[0]:on[-1] + 1]]
    if gap.size:
        out.append(_finding(
            "warning", "track_gap", stim, name,
            f"{table.source}: stimulus {stim!r}: AOI {name!r} is absent on frames "
            f"{_ranges(gap)} and present before and after", frames=gap))


def _as_study(study) -> Study:
    return study if isinstance(study, Study) else load_study(study)


def check_aois(aois, *, study, area_tol_px2: float = 0.01) -> pd.DataFrame:
    """Findings about an AOI file: invalid polygons, overlaps, regions off the video, gaps.

    Parameters
    ----------
    aois : path or AoiTable
        An AOI file (CSV or GeoJSON, keyframes allowed), read leniently so
        that every invalid polygon is reported; or a table already read.
    study : Study or path
        For the stimuli (frame size) and ``[aois] priority``.
    area_tol_px2 : float, keyword-only
        Overlaps and areas outside the video up to this many square video
        pixels are ignored (float noise on shared edges).

    Returns
    -------
    DataFrame
        One row per finding with :data:`FINDING_COLUMNS`: ``severity``
        (``error`` or ``warning``), ``check`` (see the module docstring),
        ``stimulus``, ``aoi``, ``other_aoi`` (overlaps), ``frames`` (runs
        like ``0-12, 40``; ``all`` for a fixed AOI's row), ``n_frames``,
        ``area_px2`` (largest overlap or area outside the video),
        ``location`` (row or feature of the file) and a one-line
        ``message``.  Errors first, then by stimulus, AOI and check.  Empty
        (with these columns) when nothing is found.

    Examples
    --------
    >>> from aoi_fix.config import study_from_dict
    >>> st = study_from_dict({"display": {"width_px": 100, "height_px": 100, "width_mm": 100,
    ...                                   "height_mm": 100, "distance_mm": 600},
    ...                       "samples": {"time": "t", "x": "x", "y": "y"},
    ...                       "stimuli": {"c": {"fps": 25, "width_px": 50, "height_px": 50}}})
    >>> t = AoiTable(pd.DataFrame({"stimulus": ["c", "c"], "frame": [-1, -1],
    ...     "aoi": ["a", "b"], "geometry": [shapely.box(0, 0, 20, 20),
    ...                                     shapely.box(10, 10, 60, 30)]}))
    >>> check_aois(t, study=st)[["check", "aoi", "other_aoi", "area_px2"]]
               check aoi other_aoi  area_px2
    0        overlap   a         b     100.0
    1  outside_video   b               200.0
    """
    study = _as_study(study)
    rows: list[dict] = []
    if isinstance(aois, AoiTable):
        table = aois
    else:
        problems: list[dict] = []
        table = read_aois(aois, stimuli=study.stimuli, problems=problems)
        for p in problems:
            rows.append({"severity": "error", "check": p["check"], "stimulus": p["stimulus"],
                         "aoi": p["aoi"], "other_aoi": "", "frames": p["frame"],
                         "n_frames": pd.NA, "area_px2": math.nan,
                         "location": p["location"], "message": p["message"]})
    tol = float(area_tol_px2)
    for stim in table.stimuli():  # loop over stimuli and AOIs, never over frames
        frames = _span(table, stim)
        names = table.names(stim, study.aois.priority)
        geoms = {n: _geoms(table, stim, n, frames) for n in names}
        bounds = {n: _bounds(geoms[n]) for n in names}
        _overlaps(table, stim, names, geoms, bounds, frames, tol, rows)
        spec = study.stimuli[stim]
        for n in names:
            _outside(table, stim, n, geoms[n], bounds[n], frames, spec.width_px,
                     spec.height_px, tol, rows)
            if table._track(stim, n).static is None:
                _gaps(table, stim, n, geoms[n], frames, rows)
    out = pd.DataFrame(rows, columns=list(FINDING_COLUMNS))
    out["n_frames"] = pd.array(out["n_frames"], dtype="Int64")
    out["area_px2"] = out["area_px2"].astype(float)
    rank = (out["severity"] != "error").astype(int)
    out = (out.assign(_r=rank).sort_values(["_r", "stimulus", "aoi", "check", "other_aoi"],
                                           kind="stable")
           .drop(columns="_r").reset_index(drop=True))
    return out


def default_frames(table: AoiTable, stimulus: str, n: int = 6) -> list[int]:
    """``n`` frames spread evenly from 0 to the stimulus's last named frame."""
    last = int(_span(table, stimulus)[-1])
    return sorted(set(np.linspace(0, last, num=n).round().astype(int).tolist()))


def contact_sheet(table: AoiTable, stimulus: str, frames: Sequence[int], path, *,
                  width_px: int, height_px: int, priority: Iterable[str] = ()) -> None:
    """Draw the AOIs of ``stimulus`` on the chosen frames, one panel each, as a PNG.

    Needs matplotlib (the ``plots`` extra).  Each AOI keeps its colour in
    every panel; holes are left open; the video frame is the grey rectangle.
    """
    from matplotlib.patches import PathPatch, Rectangle
    from matplotlib.path import Path as MplPath

    from .plots import _figure, require_matplotlib

    require_matplotlib()
    frames = [int(f) for f in frames] or [0]
    ncol = min(len(frames), 3)
    nrow = math.ceil(len(frames) / ncol)
    aspect = height_px / width_px
    fig = _figure(4.0 * ncol, 4.0 * nrow * aspect + 0.8)
    axes = np.atleast_1d(fig.subplots(nrow, ncol, squeeze=False)).ravel()
    names = table.names(stimulus, priority)
    for ax, f in zip(axes, frames):  # loop over panels
        ax.add_patch(Rectangle((0, 0), width_px, height_px, fill=False, ec="0.5", lw=1))
        for j, name in reversed(list(enumerate(names))):  # large AOIs under small ones
            g = table.geometry(stimulus, name, f)
            if g is None:
                continue
            verts, codes = [], []
            for ring in shapely.get_rings(shapely.get_parts(g)):
                xy = shapely.get_coordinates(ring)
                verts.extend(xy.tolist())
                codes.extend([MplPath.MOVETO] + [MplPath.LINETO] * (len(xy) - 2)
                             + [MplPath.CLOSEPOLY])
            ax.add_patch(PathPatch(MplPath(verts, codes), fc=f"C{j}", ec=f"C{j}", alpha=0.35,
                                   lw=1.2, label=name))
            p = g.representative_point()
            ax.annotate(name, (p.x, p.y), fontsize=7, ha="center", va="center")
        pad = 0.05 * width_px
        ax.set_xlim(-pad, width_px + pad)
        ax.set_ylim(height_px + pad, -pad)
        ax.set_aspect("equal")
        ax.set_title(f"frame {f}", fontsize=9)
        ax.tick_params(labelsize=6)
    for ax in axes[len(frames):]:
        ax.set_visible(False)
    fig.suptitle(f"AOIs of {stimulus} (video px)", fontsize=10)
    fig.savefig(path, format="png")


def run_check(aois, *, study, out_dir=None, plots: bool = False,
              frames: Sequence[int] | None = None) -> pd.DataFrame:
    """What ``aoi-fix aois check`` does: check, and optionally write the results.

    Parameters
    ----------
    aois, study : path
        The AOI file and the study (TOML) or a :class:`Study`.
    out_dir : path, optional
        Folder for ``aoi_check.csv`` (the findings) and, with ``plots``,
        ``aoi_check_<stimulus>.png`` (one contact sheet per stimulus),
        written all or none.
    plots : bool
        Draw the contact sheets (needs matplotlib and ``out_dir``).
    frames : sequence of int, optional
        Frames drawn on each sheet; default six spread over each stimulus.

    Returns
    -------
    DataFrame
        The findings (:func:`check_aois`).
    """
    from .errors import UsageError
    from .output import AtomicOutputs

    study = _as_study(study)
    if plots and out_dir is None:
        raise UsageError("--plots needs --out DIR for the contact sheets")
    findings = check_aois(aois, study=study)
    if out_dir is None:
        return findings
    out_dir = Path(out_dir)
    with AtomicOutputs() as w:
        w.table(findings, out_dir / "aoi_check.csv")
        if plots:
            from .plots import require_matplotlib
            require_matplotlib()
            table = read_aois(aois, stimuli=study.stimuli, problems=[])
            for stim in table.stimuli():  # loop over stimuli
                spec = study.stimuli[stim]
                chosen = list(frames) if frames else default_frames(table, stim)
                w.file(out_dir / f"aoi_check_{stim}.png", lambda p, s=stim, c=chosen, sp=spec:
                       contact_sheet(table, s, c, p, width_px=sp.width_px,
                                     height_px=sp.height_px, priority=study.aois.priority))
    return findings
