"""The whole jobs, as library functions the CLI calls: ``fixations`` and ``convert``."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .config import Study, load_study
from .detect import detect_fixations
from .errors import OutputError
from .output import RESEARCH_NOTICE, AtomicOutputs, sha256_file, sha256_soon, table_suffix
from .samples import nominal_interval_ms, read_samples

__all__ = ["fixations_table", "fixations_from_file", "FIXATION_OUTPUT_COLUMNS", "convert",
           "load_session", "match_session", "place_samples", "convert_session",
           "write_outputs"]

FIXATION_OUTPUT_COLUMNS = ["trial", "fixation", "onset_ms", "offset_ms", "duration_ms",
                           "x_px", "y_px", "aoi"]


def _load_study_for(study_path, samples_path, overrides) -> Study:
    """Load a study file; for a BIDS recording its sidecars give [samples] and [display]."""
    if not str(samples_path).endswith("_physio.tsv.gz"):
        return load_study(study_path, overrides)
    from .bids import study_for_bids
    from .config import read_study_dict, study_from_dict

    data = read_study_dict(study_path)
    return study_from_dict(study_for_bids(samples_path, data), source=str(study_path),
                           overrides=overrides)


def fixations_table(fixations: pd.DataFrame, *, trial=None, aoi=None) -> pd.DataFrame:
    """The public fixation table layout (``fixations.csv``).

    ``trial`` and ``aoi`` are empty (missing) unless given.  Detectors that
    also report pursuit (``ivt_pursuit``) add a last column ``event_type``
    (``fixation`` or ``pursuit``).
    """
    n = len(fixations)
    out = pd.DataFrame({
        "trial": pd.Series([pd.NA] * n if trial is None else trial, dtype="string"),
        "fixation": fixations["fixation"].to_numpy(dtype=np.int64),
        "onset_ms": fixations["onset_ms"].to_numpy(float),
        "offset_ms": fixations["offset_ms"].to_numpy(float),
        "duration_ms": fixations["duration_ms"].to_numpy(float),
        "x_px": fixations["x_px"].to_numpy(float),
        "y_px": fixations["y_px"].to_numpy(float),
        "aoi": pd.Series([pd.NA] * n if aoi is None else aoi, dtype="string"),
    })
    if "event_type" in fixations.columns:
        out["event_type"] = pd.Series(fixations["event_type"].to_numpy(object), dtype="string")
    return out


def fixations_from_file(samples_path: str | Path, study: Study | str | Path, *,
                        overrides=(), out: str | Path | None = None,
                        fmt: str = "csv") -> pd.DataFrame:
    """Read one recording, detect fixations, optionally write them.

    Parameters
    ----------
    samples_path : path
        Raw sample file (delimited text, ``.gz`` or Parquet).
    study : Study or path
        The study, or a TOML study file to load (``overrides`` applied).
    out : path, optional
        Where to write the fixation table (atomically).
    fmt : {"csv", "parquet"}

    Returns
    -------
    DataFrame
        The fixation table in the ``fixations.csv`` layout.
    """
    if not isinstance(study, Study):
        study = _load_study_for(study, samples_path, overrides)
    samples = read_samples(samples_path, study.samples, study.display)
    interval = nominal_interval_ms(samples["t_ms"].to_numpy(float), study.samples.rate_hz)
    fix = detect_fixations(samples, display=study.display, detection=study.detection,
                           interval_ms=interval)
    table = fixations_table(fix)
    table.attrs.update(fix.attrs)
    if out is not None:
        with AtomicOutputs() as w:
            w.table(table, out, fmt)
    return table


# --------------------------------------------------------------------------- convert

@dataclass
class Session:
    """Everything read from disk for one recording, validated and cross-checked."""

    study: Study
    samples: pd.DataFrame
    interval_ms: float
    trials: pd.DataFrame
    aois: "object"
    checks: pd.DataFrame | None
    paths: dict[str, Path]


@dataclass
class Matched:
    """Per-sample placement, independent of detection settings."""

    trial_idx: np.ndarray
    frame: np.ndarray
    code: np.ndarray
    names_by_trial: list[tuple[str, ...]]


def load_session(samples_path, study, trials_path, aois_path, checks_path=None, *,
                 overrides=()) -> Session:
    """Read and cross-check all inputs of one session (no detection yet)."""
    from ._chunks import side_thread
    from .aois import read_aois, stimulus_check
    from .trials import read_trials

    if not isinstance(study, Study):
        study = _load_study_for(study, samples_path, overrides)
    # The trial and AOI tables are read on a side thread while the samples are
    # parsed (the parse runs in C without the GIL and has idle moments); their
    # errors are still reported after any error of the samples file.
    with side_thread("aoi_fix-read") as side:
        trials_soon = side.submit(read_trials, trials_path, study=study)
        aois_soon = side.submit(read_aois, aois_path, stimuli=study.stimuli)
        samples = read_samples(samples_path, study.samples, study.display)
        interval = nominal_interval_ms(samples["t_ms"].to_numpy(float), study.samples.rate_hz)
        trials = trials_soon.result()
        _trials_meet_recording(trials, samples, trials_path, samples_path,
                               study.samples.time_unit)
        aois = aois_soon.result()
    stimulus_check(trials, aois, trials_path, aois_path)
    checks = None
    if checks_path is not None:
        from .quality import read_checks
        checks = read_checks(checks_path, study=study, samples=samples)
    paths = {"samples": Path(samples_path), "trials": Path(trials_path),
             "aois": Path(aois_path)}
    if checks_path is not None:
        paths["checks"] = Path(checks_path)
    return Session(study=study, samples=samples, interval_ms=interval, trials=trials,
                   aois=aois, checks=checks, paths=paths)


def _trials_meet_recording(trials: pd.DataFrame, samples: pd.DataFrame, trials_path,
                           samples_path, unit: str) -> None:
    """No trial overlapping the recording means another clock or unit: refuse it.

    A single trial outside the recording (a recording stopped early) is kept:
    it has no samples, valid_fraction 0 and is flagged.
    """
    from .errors import InputFormatError
    from .samples import TIME_SCALE_MS

    if len(trials) == 0 or len(samples) == 0:
        return
    t0 = float(samples["t_ms"].iat[0])
    t1 = float(samples["t_ms"].iat[-1])
    overlap = (trials["end_ms"] > t0) & (trials["start_ms"] <= t1)
    if not overlap.any():
        k = TIME_SCALE_MS[unit]
        raise InputFormatError(
            f"{trials_path}: no trial overlaps the recording {samples_path} "
            f"({t0 / k:.12g}..{t1 / k:.12g} {unit}); first trial {trials['start_ms'].iat[0] / k:.12g}..."
            f"{trials['end_ms'].iat[0] / k:.12g} {unit}; expected trial times on the "
            "samples' clock and in [samples] time_unit")


def _full_interpolation(samples: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """Positions with every interior gap interpolated (what any gap filling can give)."""
    t = samples["t_ms"].to_numpy(float)
    x = samples["x_px"].to_numpy(float)
    y = samples["y_px"].to_numpy(float)
    v = samples["valid"].to_numpy(bool)
    vi = np.flatnonzero(v)
    if len(vi) == 0:
        return x, y
    xi, yi = x.copy(), y.copy()
    inner = ~v & (np.arange(len(t)) > vi[0]) & (np.arange(len(t)) < vi[-1])
    xi[inner] = np.interp(t[inner], t[vi], x[vi])
    yi[inner] = np.interp(t[inner], t[vi], y[vi])
    return xi, yi


def match_session(session: Session, *, x_px=None, y_px=None, rows=None,
                  base: Matched | None = None, positions=None) -> Matched:
    """Trial, video frame and AOI code of every sample.

    Samples are placed and hit-tested in blocks (a few threads, see
    :mod:`aoi_fix._chunks`); within a block, one vectorised call per
    (video, scale) group.

    Codes: >= 0 index into the trial's AOI names (priority order), -1 on the
    video outside every AOI, -2 off the video, -3 outside every trial, no
    position, or not in ``rows``.

    Parameters
    ----------
    x_px, y_px : ndarray, optional
        Positions to test (default: the samples with every interior gap
        interpolated).
    rows : ndarray of bool, optional
        Only these samples are tested (e.g. fixation samples).
    base : Matched, optional
        Reuse its trial and frame index (they do not depend on positions).
    positions : callable, optional
        ``(a, b) -> (x_px, y_px)`` for sample rows ``a..b-1``, instead of
        ``x_px``/``y_px`` (e.g. :func:`aoi_fix.clean.fixation_average_blocks`:
        positions made block by block where they are tested).
    """
    from . import geometry
    from ._chunks import map_blocks
    from .aois import match_points, prepare_tracks
    from .summary import CODE_NONE, CODE_NOT_IN_TRIAL, CODE_OFF_VIDEO
    from .trials import (assign_trials, frame_index, media_rect, on_video_at,
                         placement_sorted, to_video_at, video_scale)

    study, trials = session.study, session.trials
    t = session.samples["t_ms"].to_numpy(float)
    testing = rows is None or bool(rows.any())  # else placement only (sweeps)
    if x_px is None and positions is None and testing:
        x_px, y_px = _full_interpolation(session.samples)
    increasing = len(t) < 2 or bool(np.all(t[1:] > t[:-1]))  # a recording's times
    if base is not None:
        trial_idx, frame = base.trial_idx, base.frame
    elif increasing:
        trial_idx, frame = placement_sorted(t, trials, study.stimuli)
    else:
        trial_idx = assign_trials(t, trials)
        frame = frame_index(t, trial_idx, trials, study.stimuli)
    code = np.full(len(t), CODE_NOT_IN_TRIAL, dtype=np.int32)
    margin_screen_px = geometry.deg_to_px(study.aois.margin_deg, study.display)
    # trials showing the same video at the same scale share one vectorised call
    stimuli_with_aois = set(session.aois.stimuli())
    names_by_trial = []
    group_of_trial = np.full(len(trials), -1, dtype=np.int64)
    groups: dict[tuple, int] = {}
    names_of: dict[str, tuple[str, ...]] = {}
    for k, (stim, media_w) in enumerate(zip(trials["stimulus"].tolist(),
                                            trials["media_width_px"].tolist())):
        # a loop over trials (no sample work)
        if stim not in names_of:
            names_of[stim] = tuple(session.aois.names(stim, study.aois.priority)) \
                if stim in stimuli_with_aois else ()
        names_by_trial.append(names_of[stim])
        scale = study.stimuli[stim].width_px / media_w
        key = (stim, float(margin_screen_px[0]) * scale)
        group_of_trial[k] = groups.setdefault(key, len(groups))
    group_list = list(groups)
    # samples per group (an upper bound of the points tested): decides whether
    # building the AOIs' cell grids pays
    if increasing:  # each trial is one slice of the samples: no full-length temporaries
        per_trial = (np.searchsorted(t, trials["end_ms"].to_numpy(float))
                     - np.searchsorted(t, trials["start_ms"].to_numpy(float)))
    else:
        per_trial = np.bincount(trial_idx[trial_idx >= 0], minlength=len(trials))
    per_group = np.bincount(group_of_trial, weights=per_trial, minlength=len(group_list)) \
        if len(trials) else np.zeros(len(group_list))
    for g, (stim, margin_vid) in enumerate(group_list):  # geometry ready before threads
        if stim in stimuli_with_aois:
            prepare_tracks(session.aois, stim, margin_px=margin_vid,
                           n_points=int(per_group[g]))

    rect, scale = media_rect(trials), video_scale(trials, study.stimuli)

    def block(a, b):  # samples a..b-1: place on the video and hit-test
        has = trial_idx[a:b] >= 0
        if rows is not None:
            has &= rows[a:b]
        if not has.any():
            return
        xa, ya = positions(a, b) if positions is not None else (x_px[a:b], y_px[a:b])
        has &= np.isfinite(xa)
        has &= np.isfinite(ya)
        cand = np.flatnonzero(has)
        if len(cand) == 0:
            return
        x_c, y_c = xa[cand], ya[cand]
        cand += a
        tr_c = trial_idx[cand]
        onv = on_video_at(x_c, y_c, tr_c, rect)
        code[cand[~onv]] = CODE_OFF_VIDEO
        cand, tr_c = cand[onv], tr_c[onv]
        xv, yv = to_video_at(x_c[onv], y_c[onv], tr_c, rect, scale)
        g_of = group_of_trial[tr_c] if len(group_list) > 1 else None
        present = [0] if g_of is None else \
            np.flatnonzero(np.bincount(g_of, minlength=len(group_list))).tolist()
        for g in present:  # a loop over the (video, scale) groups in this block
            sel = slice(None) if len(present) == 1 else np.flatnonzero(g_of == g)
            stim, margin_vid = group_list[g]
            r = cand[sel]
            if stim not in stimuli_with_aois:
                code[r] = CODE_NONE
                continue
            code[r] = match_points(session.aois, stim, frame[r], xv[sel], yv[sel],
                                   margin_px=margin_vid, priority=study.aois.priority)

    if testing:
        map_blocks(block, len(t))
    return Matched(trial_idx=trial_idx, frame=frame, code=code, names_by_trial=names_by_trial)


def place_samples(session: Session) -> Matched:
    """Trial and video frame of every sample, with the AOIs made ready for testing.

    :func:`match_session` without hit tests (every code
    ``CODE_NOT_IN_TRIAL``): the placement depends on sample times, trials
    and videos only, so it can be computed before detection (``convert``
    does so on a side thread, ``sweep`` once for all settings) and passed as
    ``base``.  The AOI polygons of every (video, scale) group are grown,
    prepared and given their cell grids here, so that later matching finds
    them built; nothing else may use ``session.aois`` until this returns.
    """
    return match_session(session, rows=np.zeros(len(session.samples), dtype=bool))


def _boundaries(trials: pd.DataFrame) -> np.ndarray:
    return np.unique(np.r_[trials["start_ms"].to_numpy(float), trials["end_ms"].to_numpy(float)])


def time_weights(session: Session, fid: np.ndarray,
                 fixations: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """Each sample's own time (ms, cut at trial boundaries) and that plus the carry.

    :func:`aoi_fix.summary.sample_weights` and :func:`~aoi_fix.summary.carry_weights`
    over the session's trial boundaries; ``fid`` from ``fixation_of_sample``.
    """
    from .summary import carry_weights, sample_weights

    t = session.samples["t_ms"].to_numpy(float)
    bounds = _boundaries(session.trials)
    w_own = sample_weights(t, fid, fixations, bounds)
    return w_own, w_own + carry_weights(t, fid, w_own, bounds)


def summarise(session: Session, matched: Matched, fixations: pd.DataFrame,
              filled: pd.DataFrame, fid: np.ndarray | None = None) -> dict[str, pd.DataFrame]:
    """Per-trial tables from detected fixations and the per-sample placement.

    ``fid``: :func:`aoi_fix.summary.fixation_of_sample` of ``fixations``, when known.
    """
    from .summary import aoi_summary, fixation_of_sample, fixation_parts, trial_quality

    t = session.samples["t_ms"].to_numpy(float)
    if fid is None:
        fid = fixation_of_sample(len(t), fixations)
    w_own, w = time_weights(session, fid, fixations)
    n_codes = max((len(n) for n in matched.names_by_trial), default=0)
    parts = fixation_parts(t, fid, matched.trial_idx, w, matched.code, fixations, n_codes,
                           w_own=w_own)
    trials = session.trials
    # looking time: which events the AOI tables count
    if "event_type" in fixations.columns:
        kinds = fixations["event_type"].to_numpy(object)
        parts["event_type"] = pd.Series(fixations.set_index("fixation")["event_type"]
                                        .reindex(parts["fixation"]).to_numpy(object))
        counted_kinds = session.study.aois.looking_events.split("+")
        counted_event = np.isin(kinds, counted_kinds)
        w_count = np.where((fid >= 0) & counted_event[np.maximum(fid, 0)], w, 0.0)
        parts_count = parts[np.isin(parts["event_type"].to_numpy(object), counted_kinds)]
    else:
        w_count, parts_count = w, parts
    tr_label = np.where(parts["trial_row"].to_numpy() >= 0,
                        trials["trial"].to_numpy(object)[np.maximum(parts["trial_row"].to_numpy(), 0)]
                        if len(trials) else None, None)
    aoi_label = _aoi_labels(matched.names_by_trial, parts["trial_row"].to_numpy(),
                            parts["code"].to_numpy())
    fix_table = fixations_table(parts, trial=pd.array(tr_label, dtype="string"),
                                aoi=pd.array(aoi_label, dtype="string"))
    summary = aoi_summary(trials, matched.names_by_trial, matched.trial_idx, matched.code,
                          w_count, parts_count)
    if "event_type" in fixations.columns:
        summary["looking_events"] = session.study.aois.looking_events
    raw_valid = session.samples["valid"].to_numpy(bool)
    quality = trial_quality(trials, matched.trial_idx, raw_valid, w_count, session.interval_ms,
                            min_valid_fraction=session.study.quality.min_valid_fraction)
    return {"fixations": fix_table, "aoi_summary": summary, "trial_quality": quality,
            "_parts": parts, "_fid": fid, "_w": w}


def _aoi_labels(names_by_trial: list[tuple[str, ...]], trial_row: np.ndarray,
                code: np.ndarray) -> np.ndarray:
    """AOI name of each (trial row, code) pair; None outside trials or AOIs.

    >>> _aoi_labels([("eyes", "mouth"), ("toy",)], np.array([0, 1, -1, 0]),
    ...             np.array([1, 0, 0, -1])).tolist()
    ['mouth', 'toy', None, None]
    """
    sizes = np.array([len(n) for n in names_by_trial], dtype=np.int64)
    flat = np.array([None] + [a for n in names_by_trial for a in n], dtype=object)
    first = np.concatenate([[1], 1 + np.cumsum(sizes)[:-1]]) if len(sizes) else sizes
    row = np.asarray(trial_row, dtype=np.int64)
    c = np.asarray(code, dtype=np.int64)
    ok = (row >= 0) & (c >= 0)
    where = np.zeros(len(row), dtype=np.int64)
    where[ok] = first[row[ok]] + c[ok]
    return flat[where]


def _sample_accounting(session: Session, matched: Matched, filled: pd.DataFrame,
                       fid: np.ndarray) -> dict:
    """The manifest's ``samples`` and ``trials`` sections (whole-sample counts)."""
    from .summary import per_trial_sums

    t = session.samples["t_ms"].to_numpy(float)
    valid = session.samples["valid"].to_numpy(bool)
    fill = filled["filled"].to_numpy(bool)
    lost = ~valid & ~fill
    in_tr = matched.trial_idx >= 0
    in_fix = fid >= 0
    n_tr = len(session.trials)
    n_all, n_valid, n_fill, n_lost, n_fix = (
        a.astype(int) for a in per_trial_sums(matched.trial_idx, n_tr, None, valid, fill,
                                              lost, in_fix))
    per_trial = [{"trial": str(name), "samples": a, "valid": v, "gap_filled": f, "lost": lo,
                  "in_fixations": fx}
                 for name, a, v, f, lo, fx in zip(session.trials["trial"].tolist(),
                                                  n_all.tolist(), n_valid.tolist(),
                                                  n_fill.tolist(), n_lost.tolist(),
                                                  n_fix.tolist())]
    return {
        "samples": {
            "total": int(len(t)), "valid": int(valid.sum()), "gap_filled": int(fill.sum()),
            "lost": int(lost.sum()), "inside_trials": int(in_tr.sum()),
            "outside_trials": int((~in_tr).sum()), "in_fixations": int(in_fix.sum()),
            "in_fixations_inside_trials": int((in_fix & in_tr).sum()),
            "in_fixations_outside_trials": int((in_fix & ~in_tr).sum()),
            "rule": "total = valid + gap_filled + lost = inside_trials + outside_trials",
        },
        "trials": per_trial,
    }


def _accounting(counted: dict, tables: dict) -> dict:
    """Every sample and fixation accounted for: ``counted`` from
    :func:`_sample_accounting`, fixation parts from :func:`summarise`."""
    parts = tables["_parts"]
    fid = tables["_fid"]
    return {
        "samples": counted["samples"],
        "fixations": {
            "detected": int(fid.max() + 1) if counted["samples"]["in_fixations"] else 0,
            "parts_written": int(len(parts)),
            "parts_outside_trials": int((parts["trial_row"] < 0).sum()),
            "parts_clipped_at_trial_boundary": int(parts["clipped"].sum()),
        },
        "trials": counted["trials"],
    }


def convert_session(session: Session, *, matched: Matched | None = None,
                    input_sha256=None) -> dict:
    """Detection, matching and summaries for one loaded session (nothing written).

    ``input_sha256``: the inputs' hashes for the manifest, as a dict or a future
    of one (:func:`aoi_fix.output.sha256_soon`); computed here when omitted.

    Returns a dict of the output tables plus ``manifest`` (a JSON-able dict).
    """
    from . import __version__
    from ._chunks import side_thread
    from .clean import fill_gaps
    from .detect import detect_filled

    study = session.study
    with side_thread("aoi_fix-place") as side:
        # placement and AOI preparation do not depend on detection: a side
        # thread does them meanwhile (detection leaves a core idle at times)
        placed = side.submit(place_samples, session) if matched is None else None
        filled = fill_gaps(session.samples, max_gap_ms=study.detection.max_gap_ms,
                           interval_ms=session.interval_ms)
        fixations = detect_filled(filled, display=study.display, detection=study.detection,
                                  interval_ms=session.interval_ms)
        if placed is not None:
            matched = placed.result()
    check_table = None
    model = None
    if session.checks is not None:
        from .quality import check_quality, drift_model
        check_table = check_quality(session.checks, session.samples, fixations,
                                    display=study.display,
                                    max_offset_deg=study.quality.check_max_offset_deg)
        model = drift_model(check_table)
    corrected = bool(study.quality.correct_offset and model is not None)
    window = study.aois.position_window_ms
    fid = None
    if corrected or window > 0 or placed is not None:
        from .clean import fixation_average
        from .summary import fixation_of_sample

        t = session.samples["t_ms"].to_numpy(float)
        fid = fixation_of_sample(len(t), fixations)
        if window > 0 and not corrected:
            # averaged positions made block by block where they are tested
            # (no two whole columns of them): the same numbers as below
            from .clean import fixation_average_blocks
            at = fixation_average_blocks(filled, fixations, window_ms=window,
                                         interval_ms=session.interval_ms, fid=fid)
            matched = match_session(session, positions=at, rows=fid >= 0, base=matched)
            del at
            filled = filled[["filled"]]
        else:
            if window > 0:
                xm, ym = fixation_average(filled, fixations, window_ms=window,
                                          interval_ms=session.interval_ms, fid=fid)
            else:
                xm, ym = _full_interpolation(session.samples)
            if corrected:
                from .quality import correct_positions
                xm, ym = correct_positions(xm, ym, t, model, study.display)
            # the gap-filled positions are used up: keep only the flags
            # (accounting), so that matching does not add to the peak memory
            filled = filled[["filled"]]
            matched = match_session(session, x_px=xm, y_px=ym, rows=fid >= 0, base=matched)
            del xm, ym
    if corrected:
        fixations = fixations.copy()
        mid = (fixations["onset_ms"].to_numpy(float) + fixations["offset_ms"].to_numpy(float)) / 2
        fixations["x_px"], fixations["y_px"] = correct_positions(
            fixations["x_px"].to_numpy(float), fixations["y_px"].to_numpy(float), mid, model,
            study.display)
    if fid is None:
        from .summary import fixation_of_sample
        fid = fixation_of_sample(len(session.samples), fixations)
    with side_thread("aoi_fix-count") as side:
        # the sample accounting needs no summary: counted meanwhile
        counted = side.submit(_sample_accounting, session, matched, filled, fid)
        tables = summarise(session, matched, fixations, filled, fid=fid)
        counted = counted.result()
    from .quality import trial_drift
    drift = trial_drift(session.trials, check_table, display=study.display,
                        max_offset_deg=study.quality.max_offset_deg)
    for c in drift.columns:
        tables["trial_quality"][c] = drift[c].to_numpy() if c != "flag_drift" else drift[c].array
    if check_table is not None:
        tables["check_quality"] = check_table
    manifest = {
        "tool": "aoi_fix", "version": __version__, "notice": RESEARCH_NOTICE,
        "inputs": _inputs_with_sha256(session.paths, input_sha256),
        "parameters": study.to_dict(),
        "detection_used": {
            "nominal_interval_ms": session.interval_ms,
            **{k: v for k, v in fixations.attrs.items()}},
        "offset_correction": {
            "applied": corrected,
            "reason": ("[quality] correct_offset = true and usable checks" if corrected else
                       "off" if not study.quality.correct_offset else "no usable checks")},
        **_accounting(counted, tables),
    }
    tables["manifest"] = manifest
    return tables


def _inputs_with_sha256(paths: dict[str, Path], sha256=None) -> dict:
    """``{role: {"path", "sha256"}}`` for the manifest; ``sha256`` a dict or a future."""
    if sha256 is None:
        sha256 = {}
    elif not isinstance(sha256, dict):
        sha256 = sha256.result()
    return {k: {"path": str(p), "sha256": sha256.get(k) or sha256_file(p)}
            for k, p in paths.items()}


OUTPUT_TABLES = ("fixations", "aoi_summary", "trial_quality")


def write_outputs(tables: dict, out_dir: str | Path, fmt: str = "csv", *,
                  session: Session | None = None, plots: bool = False) -> list[Path]:
    """Write the public tables and ``manifest.json`` atomically (all or none).

    With ``plots`` (and the session), also ``qc_quality.png`` (offset and
    validity over the session) and ``qc_trial_<first trial>.png`` (its gaze
    over the AOIs).
    """
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise OutputError(f"{out_dir}: expected an output folder, found a file")
    written = []
    with AtomicOutputs() as w:
        written += w.tables([(tables[name], out_dir / f"{name}{table_suffix(fmt)}", fmt)
                             for name in OUTPUT_TABLES + ("check_quality", "session_summary",
                                                          "exclusions")
                             if name in tables])
        written.append(w.json(tables["manifest"], out_dir / "manifest.json"))
        if plots and session is not None and len(session.trials):
            from . import plots as qc

            q = session.study.quality
            written.append(w.file(out_dir / "qc_quality.png", lambda p: qc.quality_timeline(
                tables["trial_quality"], tables.get("check_quality"), session.trials, p,
                max_offset_deg=q.max_offset_deg, min_valid_fraction=q.min_valid_fraction)))
            name = str(session.trials["trial"].iat[0])
            written.append(w.file(out_dir / f"qc_trial_{name}.png", lambda p: qc.trial_gaze(
                session.samples, tables["fixations"], session.trials, session.aois,
                session.study.stimuli, 0, p)))
    return written


def convert(samples, *, study, trials, aois, checks=None, out_dir=None, fmt: str = "csv",
            overrides=(), plots: bool = False, participants=None,
            session: str | None = None) -> dict:
    """Convert one session: fixations, AOI per fixation, per-trial tables.

    Parameters
    ----------
    samples, trials, aois, checks : path
        The raw recording, the trial table, the AOI table (CSV or GeoJSON) and
        optionally the calibration-check table.
    study : Study or path
        Study (or TOML file; ``overrides`` are applied).
    out_dir : path, optional
        Folder for ``fixations``, ``aoi_summary``, ``trial_quality`` and
        ``manifest.json``; nothing is written when omitted.
    fmt : {"csv", "parquet"}
    plots : bool
        Also write QC figures (needs matplotlib, the ``plots`` extra).
    participants : path, optional
        Participants table (:func:`aoi_fix.cohort.read_participants`): adds
        ``participant, age_days, age_months`` to every table and the
        ``session_summary`` and ``exclusions`` tables (``docs/cohort.md``).
    session : str, optional
        The session's id in ``participants`` (default: ``out_dir``'s name
        when it is ``session=<id>``).

    Returns
    -------
    dict
        ``fixations``, ``aoi_summary``, ``trial_quality`` DataFrames and the
        ``manifest`` dict (with ``participants``: also ``session_summary`` and
        ``exclusions``).
    """
    if plots:
        from .plots import require_matplotlib
        require_matplotlib()
    info = None
    if participants is not None:
        from .cohort import participant_of_sessions, read_participants, session_from_out_dir
        sid = session_from_out_dir(out_dir, session)
        info = participant_of_sessions(read_participants(participants), [sid])[sid]
    loaded = load_session(samples, study, trials, aois, checks, overrides=overrides)
    tables = convert_session(loaded, input_sha256=sha256_soon(loaded.paths))
    if info is not None:
        from .cohort import add_cohort_tables
        tables = add_cohort_tables(tables, session=sid, participant=info["participant"],
                                   age_days=info["age_days"], quality=loaded.study.quality,
                                   participants_path=Path(participants).resolve())
    if out_dir is not None:
        from .cohort import write_session_outputs
        write_session_outputs(tables, out_dir, fmt, session=loaded, plots=plots)
    return {k: v for k, v in tables.items() if not k.startswith("_")}
