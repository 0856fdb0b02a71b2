"""Threshold sweeps: run detection and aggregation under every combination of settings.

A sweep answers "would my AOI percentages change if I had picked another
threshold?".  It reads the inputs once, then for every combination of the
grid (a mapping ``"section.key" -> values``) detects fixations, matches them
to the AOIs and aggregates them exactly as ``convert`` would with those
values given as ``--set`` overrides.  Per setting, the rows of
``sweep_summary`` are the ``trial, stimulus, aoi, pct_fixation, fixation_ms,
n_fixations`` columns of that ``convert`` run's ``aoi_summary``.

What is computed once and what per setting
------------------------------------------
* Reading samples, trials, AOIs and checks: once, unless a swept key is in
  ``[display]``, ``[samples]`` or ``[stimuli.NAME]`` (they change how the
  inputs are read): then the inputs are read again for every setting.
* Trial and video-frame index of every sample: once (they depend only on the
  sample times, the trial table and the stimuli).
* AOI codes: once for each distinct ``[aois]`` section when samples are
  matched at their raw (interpolated) position (``aois.position_window_ms =
  0``).  With a window the matched position depends on the detected
  fixations (the average runs within each fixation), so fixation samples are
  matched per setting, except those of a fixation an earlier setting already
  found (same rows, gap filling and ``[aois]``), whose codes are reused.
* With ``quality.correct_offset = true`` and a check table, the drift model
  is refitted to each setting's check fixations: such settings run
  :func:`aoi_fix.pipeline.convert_session` itself.
* Gap filling: once per distinct ``detection.max_gap_ms`` within a worker.
* Detection, matching of fixation samples and aggregation: per setting.

Method-specific keys
--------------------
``detection.velocity_threshold_deg_s``, ``noise_factor``,
``velocity_window_ms``, ``smoothing`` and ``smoothing_window_ms`` act only on
I-VT; ``detection.dispersion_threshold_deg`` only on I-DT.  In a combination
whose method does not use a swept key, that key is left at its base value,
shown as missing in the tables, and the combination is counted once.
"""

from __future__ import annotations

import dataclasses
import itertools
import logging
import math
import re
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

import numpy as np
import pandas as pd

from .config import SECTIONS, Stimulus, Study, load_study, parse_override, study_from_dict
from .errors import AoiFixError, OutputError, UsageError

__all__ = ["sweep", "parse_grid", "build_settings", "Setting", "SUMMARY_COLUMNS",
           "SETTINGS_STAT_COLUMNS", "STABILITY_COLUMNS", "METHOD_ONLY_KEYS"]

log = logging.getLogger(__name__)

#: swept keys that act only on one detection method
METHOD_ONLY_KEYS = {
    "detection.velocity_threshold_deg_s": ("ivt", "ivt_pursuit"),
    "detection.noise_factor": ("ivt", "ivt_pursuit"),
    "detection.velocity_window_ms": ("ivt", "ivt_pursuit"),
    "detection.smoothing": ("ivt",),
    "detection.smoothing_window_ms": ("ivt",),
    "detection.dispersion_threshold_deg": ("idt",),
    "detection.saccade_threshold_deg_s": ("ivt_pursuit",),
    "detection.pursuit_window_ms": ("ivt_pursuit",),
    "detection.pursuit_min_speed_deg_s": ("ivt_pursuit",),
    "detection.pursuit_z": ("ivt_pursuit",),
    "detection.min_pursuit_ms": ("ivt_pursuit",),
}
#: sections whose keys change how the input files are read
RELOAD_SECTIONS = ("display", "samples", "stimuli")
#: per setting, the columns taken from ``aoi_summary`` (in this order)
SUMMARY_COLUMNS = ["trial", "stimulus", "aoi", "pct_fixation", "fixation_ms", "n_fixations"]
SETTINGS_STAT_COLUMNS = ["n_fixations", "median_duration_ms", "mean_duration_ms",
                         "fixation_share"]
STABILITY_COLUMNS = ["trial", "stimulus", "aoi", "n_settings", "pct_min", "pct_max",
                     "pct_range", "pct_sd", "flag_unstable"]


# --------------------------------------------------------------------------- the grid

def _all_keys() -> list[str]:
    keys = [f"{s}.{f.name}" for s, cls in SECTIONS.items() if s != "sweep"
            for f in dataclasses.fields(cls)]
    return keys + [f"stimuli.NAME.{f.name}" for f in dataclasses.fields(Stimulus)]


def _key_field(key: str) -> dataclasses.Field:
    """The dataclass field of a swept key; UsageError naming the valid keys."""
    section, _, name = key.rpartition(".")
    if section.startswith("stimuli.") and section.count(".") == 1:
        cls = Stimulus
    elif section == "sweep":
        raise UsageError(f"--grid '{key}': [sweep] keys set how a sweep is judged and "
                         "cannot be swept themselves; use --set instead")
    else:
        cls = SECTIONS.get(section)
    if cls is None:
        raise UsageError(f"--grid '{key}': unknown study key; valid keys: "
                         + ", ".join(_all_keys()))
    fields = {f.name: f for f in dataclasses.fields(cls)}
    if name not in fields:
        shown = section if cls is not Stimulus else "stimuli.NAME"
        raise UsageError(f"--grid '{key}': unknown study key; valid keys of [{shown}]: "
                         + ", ".join(f"{section}.{k}" for k in fields))
    return fields[name]


def _is_list_key(key: str) -> bool:
    return _key_field(key).type in ("tuple", tuple)


def parse_grid(options: Iterable[str]) -> dict[str, list[str]]:
    """Turn ``--grid section.key=v1,v2,...`` texts into a grid mapping.

    Values of list-valued keys (such as ``aois.priority``) contain commas, so
    their alternatives are separated by ``;`` instead.

    >>> parse_grid(["detection.min_fixation_ms=60,100", "detection.method=ivt,idt"])
    {'detection.min_fixation_ms': ['60', '100'], 'detection.method': ['ivt', 'idt']}
    >>> parse_grid(["aois.priority=eyes,mouth;mouth,eyes"])
    {'aois.priority': ['eyes,mouth', 'mouth,eyes']}

    Raises
    ------
    UsageError
        A text without ``=``, an unknown key (the valid keys are listed), an
        empty value list or empty value, a key given twice.
    """
    grid: dict[str, list[str]] = {}
    for text in options:
        key, eq, raw = text.partition("=")
        key = key.strip()
        if not eq or "." not in key:
            raise UsageError(f"--grid '{text}': expected section.key=value1,value2,...")
        sep = ";" if _is_list_key(key) else ","
        if key in grid:
            raise UsageError(f"--grid '{key}': given twice; list all its values in one --grid")
        values = [v.strip() for v in raw.split(sep)]
        if not raw.strip() or any(v == "" for v in values):
            raise UsageError(f"--grid '{text}': empty value; expected {key}=value1{sep}value2...")
        grid[key] = values
    return grid


def _value_text(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (list, tuple)):
        return ",".join(str(v) for v in value)
    return str(value)


def _typed_values(key: str, values: Sequence) -> list:
    """Each value converted to the key's type (the ``--set`` rules)."""
    _key_field(key)
    if isinstance(values, (str, bytes)) or not isinstance(values, Iterable):
        raise UsageError(f"--grid '{key}': expected a list of values, found {values!r}")
    values = list(values)
    if not values:
        raise UsageError(f"--grid '{key}': empty value list; give at least one value")
    out = []
    for v in values:
        _, _, typed = parse_override(f"{key}={_value_text(v)}")
        if typed in out:
            raise UsageError(f"--grid '{key}': value {_value_text(v)!r} is given twice")
        out.append(typed)
    return out


@dataclass(frozen=True)
class Setting:
    """One combination of the grid.

    ``values`` maps each swept key to its value, or ``None`` where the key
    does not act on the setting's detection method.  ``study`` is the
    resolved study; ``reload`` says the inputs must be read again (a swept
    key in ``[display]``, ``[samples]`` or ``[stimuli.NAME]``).
    """

    number: int
    values: dict
    study: Study
    reload: bool


def _set_value(data: dict, key: str, value: Any) -> None:
    section, _, name = key.rpartition(".")
    if section.startswith("stimuli."):
        stim = data.setdefault("stimuli", {})
        stim.setdefault(section.split(".", 1)[1], {})[name] = value
    else:
        data.setdefault(section, {})[name] = value


def build_settings(base: Study, grid: Mapping[str, Sequence]) -> list[Setting]:
    """Every distinct combination of the grid, numbered from 1 (first key slowest).

    Raises
    ------
    UsageError
        An unknown key, an empty or repeated value, a value of the wrong type
        or out of range, or a method-specific key that no swept or base
        method uses.
    """
    if not grid:
        raise UsageError("--grid: nothing to sweep; give at least one "
                         "--grid section.key=value1,value2,...")
    keys = list(grid)
    typed = {k: _typed_values(k, grid[k]) for k in keys}
    methods = typed.get("detection.method", [base.detection.method])
    for k in keys:
        m = METHOD_ONLY_KEYS.get(k)
        if m is not None and not set(m) & set(methods):
            raise UsageError(f"--grid '{k}': acts on method {' or '.join(map(repr, m))} only, "
                             f"but the sweep runs {', '.join(map(repr, methods))}; add --grid "
                             f"detection.method with {m[0]!r} or --set "
                             f"detection.method={m[0]}")
    base_dict = base.to_dict()
    # one check per value, so that an out-of-range value is named on its own
    for k in keys:
        for v in typed[k]:
            data = _copy_dict(base_dict)
            _set_value(data, k, v)
            try:
                study_from_dict(data, source="--grid")
            except AoiFixError as e:
                raise UsageError(f"--grid '{k}={_value_text(v)}': {e}") from None
    settings: list[Setting] = []
    seen = set()
    for combo in itertools.product(*(typed[k] for k in keys)):
        values = dict(zip(keys, combo))
        method = values.get("detection.method", base.detection.method)
        for k in keys:
            if method not in METHOD_ONLY_KEYS.get(k, (method,)):
                values[k] = None
        ident = tuple((k, _value_text(v) if v is not None else None) for k, v in values.items())
        if ident in seen:
            continue
        seen.add(ident)
        data = _copy_dict(base_dict)
        for k, v in values.items():
            if v is not None:
                _set_value(data, k, v)
        try:
            study = study_from_dict(data, source="--grid")
        except AoiFixError as e:
            raise UsageError(f"--grid setting {_describe(values)}: {e}") from None
        reload = any(k.split(".")[0] in RELOAD_SECTIONS for k, v in values.items()
                     if v is not None)
        settings.append(Setting(number=len(settings) + 1, values=values, study=study,
                                reload=reload))
    return settings


def _copy_dict(d: dict) -> dict:
    return {k: (_copy_dict(v) if isinstance(v, dict) else v) for k, v in d.items()}


def _describe(values: Mapping) -> str:
    return " ".join(f"{k}={_value_text(v)}" for k, v in values.items() if v is not None)


# --------------------------------------------------------------------------- one setting

def _match_fixations(session, placement, filled: pd.DataFrame, fixations: pd.DataFrame,
                     fid: np.ndarray, window_ms: float, store: dict):
    """AOI codes of the fixation samples at window-averaged positions, reusing known ones.

    The matched position of a fixation sample is the mean of the gap-filled
    samples in its window, the rows ``[max(i - h, start), min(i + h + 1,
    end))`` of its fixation (:func:`aoi_fix.clean.fixation_average`).  So a
    sample whose window rows are the same as when it was last matched, by any
    earlier setting (same gap filling and ``[aois]`` section: the caller keys
    ``store`` by those), gets the same code: settings that move a fixation's
    ends by a few samples re-match only the samples near those ends.  The
    rest are averaged and hit-tested on a session cut down to them (hit
    testing is per point).  Other samples get "not in trial", as in ``convert``.
    """
    from .clean import fixation_average, fixation_average_blocks, window_half_width, window_rows
    from .pipeline import Matched, match_session
    from .summary import CODE_NOT_IN_TRIAL

    n = len(fid)
    rows_t = np.int32 if n < 2**31 - 2**20 else np.int64  # row numbers (and windows)
    st = fixations["start_row"].to_numpy(rows_t)
    en = fixations["end_row"].to_numpy(rows_t)
    h = window_half_width(window_ms, session.interval_ms)
    fin = fid >= 0
    if "code" not in store:
        # nothing known yet: every fixation sample is matched, by convert's own path
        at = fixation_average_blocks(filled, fixations, window_ms=window_ms,
                                     interval_ms=session.interval_ms, fid=fid)
        first = match_session(session, positions=at, rows=fin, base=placement)
        lo, hi = window_rows(np.arange(n, dtype=rows_t), np.maximum(fid, 0), st, en, h)
        lo[~fin] = -1
        hi[~fin] = -1
        store.update(code=first.code.copy(), lo=lo, hi=hi)
        return first

    def changed(a: int, b: int) -> np.ndarray:  # rows a..b-1 whose window is not the stored one
        fb = fid[a:b]
        lo, hi = window_rows(np.arange(a, b, dtype=rows_t), np.maximum(fb, 0), st, en, h)
        miss = lo != store["lo"][a:b]
        miss |= hi != store["hi"][a:b]
        miss &= fb >= 0
        return np.flatnonzero(miss) + a

    from ._chunks import map_blocks

    # in blocks: no full-length temporaries per setting
    sel = np.concatenate(map_blocks(changed, n) or [np.zeros(0, np.int64)])
    lo, hi = window_rows(sel.astype(rows_t), fid[sel], st, en, h)
    names = placement.names_by_trial
    if len(sel):
        # averaged positions of the fixations holding those samples (the same numbers
        # as for the whole table: the average is computed in fixed blocks of rows)
        xm, ym = fixation_average(filled, fixations, window_ms=window_ms,
                                  interval_ms=session.interval_ms, fid=fid, rows=sel)
        part = dataclasses.replace(
            session, samples=pd.DataFrame({"t_ms": session.samples["t_ms"].to_numpy(float)[sel]}))
        part_base = Matched(trial_idx=placement.trial_idx[sel], frame=placement.frame[sel],
                            code=placement.code[sel], names_by_trial=placement.names_by_trial)
        fresh = match_session(part, x_px=xm, y_px=ym, base=part_base)
        del xm, ym
        names = fresh.names_by_trial
        store["code"][sel] = fresh.code
        store["lo"][sel] = lo
        store["hi"][sel] = hi
    code = np.where(fin, store["code"], np.int32(CODE_NOT_IN_TRIAL))
    return Matched(trial_idx=placement.trial_idx, frame=placement.frame, code=code,
                   names_by_trial=names)


def _evaluate_by_convert(session) -> dict:
    """One setting through :func:`aoi_fix.pipeline.convert_session` itself."""
    from .pipeline import convert_session

    tables = convert_session(session)
    fix = tables["fixations"]
    dur = fix.loc[fix["trial"].notna(), "duration_ms"].to_numpy(float)
    q = tables["trial_quality"]
    trial_ms = float(q["duration_ms"].sum())
    stats = {
        "n_fixations": int(len(dur)),
        "median_duration_ms": float(np.median(dur)) if len(dur) else math.nan,
        "mean_duration_ms": float(np.mean(dur)) if len(dur) else math.nan,
        "fixation_share": float(q["fixation_ms"].sum() / trial_ms) if trial_ms > 0 else math.nan,
    }
    man = tables["manifest"]
    used = {**man["detection_used"],
            "offset_correction_applied": bool(man["offset_correction"]["applied"])}
    summary = tables["aoi_summary"][SUMMARY_COLUMNS].reset_index(drop=True)
    return {"summary": summary, "stats": stats, "detection_used": used}


def _evaluate(setting: Setting, session, placement, cache: dict) -> dict:
    """Detection, matching and aggregation for one setting (mirrors ``convert_session``)."""
    from .clean import fill_gaps
    from .detect import detect_filled
    from .pipeline import (_full_interpolation, load_session, match_session, place_samples,
                           time_weights)
    from .summary import aoi_summary, fixation_of_sample, fixation_parts

    study = setting.study
    if setting.reload:
        p = session.paths
        session = load_session(p["samples"], study, p["trials"], p["aois"], p.get("checks"))
        placement = place_samples(session)
        cache = {}
    else:
        session = dataclasses.replace(session, study=study)
    if session.checks is not None and study.quality.correct_offset:
        # drift correction: the model is refitted per setting and the matched positions
        # depend on it; run convert's own code (slower, nothing to share)
        return _evaluate_by_convert(session)
    det = study.detection
    gap_key = ("filled", det.max_gap_ms)
    if gap_key not in cache:
        for k in [k for k in cache if k[0] == "filled"]:  # keep one filled frame
            del cache[k]
        for k in [k for k in cache if k[0] == "velocity"]:  # belongs to that frame
            del cache[k]
        cache[gap_key] = fill_gaps(session.samples, max_gap_ms=det.max_gap_ms,
                                   interval_ms=session.interval_ms)
    filled = cache[gap_key]
    fixations = detect_filled(filled, display=study.display, detection=det,
                              interval_ms=session.interval_ms, cache=cache)
    if "event_type" in fixations.columns:
        # pursuit events: looking time follows [aois] looking_events; run
        # convert's own summaries (nothing worth sharing)
        return _evaluate_by_convert(session)
    used = {"nominal_interval_ms": session.interval_ms, **dict(fixations.attrs),
            "offset_correction_applied": False}
    # a setting that finds exactly the fixations of an earlier one (e.g. a velocity
    # threshold below the noise-adaptive one) has the same tables
    same_key = ("same_fixations", det.max_gap_ms, _fixations_digest(fixations),
                repr(dataclasses.astuple(study.aois)))
    if same_key in cache:
        return {**cache[same_key], "detection_used": used}
    t = session.samples["t_ms"].to_numpy(float)
    fid = fixation_of_sample(len(t), fixations)
    window = study.aois.position_window_ms
    if window > 0:
        store = cache.setdefault(("fixation_codes", det.max_gap_ms,
                                  repr(dataclasses.astuple(study.aois))), {})
        matched = _match_fixations(session, placement, filled, fixations, fid, window, store)
    else:  # positions do not depend on the setting: match every sample once per [aois]
        codes_key = ("codes", repr(dataclasses.astuple(study.aois)))
        if codes_key not in cache:
            xi, yi = _full_interpolation(session.samples)
            cache[codes_key] = match_session(session, x_px=xi, y_px=yi, base=placement)
        matched = cache[codes_key]
    w_own, w = time_weights(session, fid, fixations)
    n_codes = max((len(n) for n in matched.names_by_trial), default=0)
    parts = fixation_parts(t, fid, matched.trial_idx, w, matched.code, fixations, n_codes,
                           w_own=w_own)
    summary = aoi_summary(session.trials, matched.names_by_trial, matched.trial_idx,
                          matched.code, w, parts)[SUMMARY_COLUMNS]
    inside = parts["trial_row"].to_numpy() >= 0
    dur = parts["duration_ms"].to_numpy(float)[inside]
    trial_ms = float((session.trials["end_ms"] - session.trials["start_ms"]).sum())
    stats = {
        "n_fixations": int(inside.sum()),
        "median_duration_ms": float(np.median(dur)) if len(dur) else math.nan,
        "mean_duration_ms": float(np.mean(dur)) if len(dur) else math.nan,
        "fixation_share": float(w[matched.trial_idx >= 0].sum() / trial_ms)
        if trial_ms > 0 else math.nan,
    }
    cache[same_key] = {"summary": summary, "stats": stats}  # small: one row per trial x AOI
    return {"summary": summary, "stats": stats, "detection_used": used}


def _fixations_digest(fixations: pd.DataFrame) -> str:
    """A fingerprint of a fixation table's rows, times and positions."""
    import hashlib

    h = hashlib.sha256()
    for c in ("start_row", "end_row", "onset_ms", "offset_ms", "x_px", "y_px"):
        h.update(np.ascontiguousarray(fixations[c].to_numpy()).tobytes())
    h.update(str(len(fixations)).encode())
    return h.hexdigest()


# --------------------------------------------------------------------------- workers

# Per worker process: the loaded session, placement, settings and a small cache.
# Set once by the pool initializer so the session is not sent with every task.
_WORKER: dict = {}


def _init_worker(session, placement, settings, shared=None) -> None:
    from ._chunks import single_thread_worker

    single_thread_worker()
    _WORKER.clear()
    _WORKER.update(session=session, placement=placement, settings=settings,
                   cache=dict(shared or {}))


def _shared_cache(settings: list[Setting], session) -> dict:
    """Gap filling and I-VT velocity of the first setting's gap filling, for every worker.

    Computed once in the parent; workers inherit it (the pool forks on Linux,
    elsewhere it is pickled once per worker) instead of each computing it.
    """
    from .clean import fill_gaps
    from .detect import velocity_and_noise

    same_input = [s for s in settings if not s.reload]
    if not same_input:
        return {}
    gap = same_input[0].study.detection.max_gap_ms
    filled = fill_gaps(session.samples, max_gap_ms=gap, interval_ms=session.interval_ms)
    cache = {("filled", gap): filled}
    for s in same_input:
        det = s.study.detection
        if det.method != "ivt" or det.max_gap_ms != gap:
            continue
        key = ("velocity", det.velocity_window_ms, det.smoothing, det.smoothing_window_ms)
        if key not in cache:
            cache[key] = velocity_and_noise(
                filled, display=s.study.display, window_ms=det.velocity_window_ms,
                interval_ms=session.interval_ms, smoothing=det.smoothing,
                smoothing_window_ms=det.smoothing_window_ms)
    return cache


def _lead_setting(settings: list[Setting]) -> int | None:
    """The first setting of the most common method among those on the same input."""
    methods = [s.study.detection.method for s in settings if not s.reload]
    if not methods:
        return None
    common = max(dict.fromkeys(methods), key=methods.count)
    return next(i for i, s in enumerate(settings)
                if not s.reload and s.study.detection.method == common)


def _cost_rank(setting: Setting) -> int:
    """Rough relative cost of a setting, to start the costly ones first."""
    if setting.reload:
        return 3
    return {"ivt": 0, "idt": 1}.get(setting.study.detection.method, 2)


def _task_groups(settings: list[Setting], indices: Sequence[int], n_jobs: int) -> list[list[int]]:
    """The settings ``indices`` as worker tasks, costliest first.

    I-VT settings that differ only in ``detection.velocity_threshold_deg_s``
    go to one task, lowest threshold first: thresholds below the noise-adaptive
    one find exactly the same fixations, and only the worker that evaluated
    one of them can reuse its tables (measured on the 12-setting benchmark
    sweep: the pool's wall time 2.27 s with one task per setting, 1.88 s like
    this).  A group is cut into pieces of at most ``ceil(len(indices) /
    n_jobs)`` settings so that every worker gets work.
    """
    key_of = "detection.velocity_threshold_deg_s"
    groups: dict[tuple, list[int]] = {}
    for i in indices:
        s = settings[i]
        if s.reload or s.study.detection.method not in ("ivt", "ivt_pursuit") \
                or key_of not in s.values:
            groups[("one", i)] = [i]
            continue
        rest = tuple((k, repr(v)) for k, v in s.values.items() if k != key_of)
        groups.setdefault(("ivt", rest), []).append(i)
    cap = max(1, math.ceil(len(indices) / max(n_jobs, 1)))
    tasks = []
    for g in groups.values():
        g = sorted(g, key=lambda i: (settings[i].study.detection.velocity_threshold_deg_s, i))
        tasks += [g[a:a + cap] for a in range(0, len(g), cap)]
    weight = {0: 1.0, 1: 1.5, 2: 2.0, 3: 3.0}
    return sorted(tasks, key=lambda t: (-sum(weight[_cost_rank(settings[i])] for i in t), t[0]))


def _run_in_worker(indices: list[int]) -> list[dict]:
    w = _WORKER
    return [_evaluate(w["settings"][i], w["session"], w["placement"], w["cache"])
            for i in indices]


# --------------------------------------------------------------------------- tables

def _value_column(values: list) -> pd.Series:
    shown = [None if v is None else (",".join(v) if isinstance(v, tuple) else v)
             for v in values]
    if all(v is None or (isinstance(v, (int, float)) and not isinstance(v, bool))
           for v in shown):
        return pd.Series([np.nan if v is None else v for v in shown], dtype=float)
    return pd.Series(shown, dtype=object)


def _key_columns(settings: list[Setting], repeat: Sequence[int] | None = None) -> pd.DataFrame:
    keys = list(settings[0].values)
    cols = {"setting": np.array([s.number for s in settings], dtype=np.int64)}
    for k in keys:
        cols[k] = _value_column([s.values[k] for s in settings])
    df = pd.DataFrame(cols)
    if repeat is not None:
        df = df.loc[np.repeat(np.arange(len(settings)), repeat)].reset_index(drop=True)
    return df


def _stability(summary: pd.DataFrame, max_range_pct: float) -> pd.DataFrame:
    pct = summary["pct_fixation"]
    g = pct.groupby([summary["trial"], summary["stimulus"], summary["aoi"]], sort=False,
                    dropna=False)
    out = pd.DataFrame({
        "n_settings": g.count().astype(np.int64),
        "pct_min": g.min(), "pct_max": g.max(), "pct_sd": g.std(ddof=0),
    }).reset_index()
    out.columns = ["trial", "stimulus", "aoi"] + list(out.columns[3:])
    out["pct_range"] = out["pct_max"] - out["pct_min"]
    out["flag_unstable"] = (out["pct_range"] > max_range_pct).to_numpy(dtype=bool)
    return out[STABILITY_COLUMNS]


def _safe_name(label: str) -> str:
    return re.sub(r"[^A-Za-z0-9_-]+", "_", str(label)).strip("_") or "aoi"


def _plot_aoi(sub: pd.DataFrame, stab: pd.DataFrame, aoi: str, keys: list[str], path) -> None:
    from matplotlib.figure import Figure  # no pyplot: no global figure state

    first, others = keys[0], keys[1:]
    na = sub[first].isna().to_numpy()
    xs = list(dict.fromkeys(sub.loc[~na, first].tolist()))
    numeric = all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in xs)
    xpos = {v: (float(v) if numeric else i) for i, v in enumerate(xs)}
    # settings whose method does not use the first key: one extra position, "n/a"
    if numeric and xs:
        span = (max(xpos.values()) - min(xpos.values())) or 1.0
        na_pos = max(xpos.values()) + 0.15 * span
    else:
        na_pos = len(xs)
    xcol = np.array([na_pos if m else xpos[v] for v, m in zip(sub[first], na)], dtype=float)
    sub = sub.assign(_x=xcol)
    unstable = set(stab.loc[stab["flag_unstable"], "trial"].astype(str))
    fig = Figure(figsize=(7, 4.5))
    ax = fig.subplots()
    n_labelled = 0
    group_cols = ["trial"] + others
    for gkey, line in sub.groupby(group_cols, sort=False, dropna=False):
        gkey = gkey if isinstance(gkey, tuple) else (gkey,)
        x = line["_x"].to_numpy(float)
        y = line["pct_fixation"].to_numpy(float)
        trial = str(gkey[0])
        if trial in unstable:
            label = None
            if n_labelled < 12:
                label = "trial " + trial + "".join(
                    f", {k.split('.')[-1]}={_value_text(v)}" for k, v in zip(others, gkey[1:])
                    if not (isinstance(v, float) and math.isnan(v)))
                n_labelled += 1
            ax.plot(x, y, marker="o", lw=1.6, label=label)
        else:
            ax.plot(x, y, color="0.75", lw=0.8, marker=".", zorder=0)
    ticks = list(xpos.values()) + ([na_pos] if na.any() else [])
    ax.set_xticks(ticks, [_value_text(v) for v in xs] + (["n/a"] if na.any() else []))
    ax.set_xlabel(first)
    ax.set_ylabel("pct_fixation (%)")
    n_unst = len(unstable)
    ax.set_title(f"AOI {aoi}: {n_unst} unstable trial(s) in colour, stable in grey")
    if n_labelled:
        ax.legend(fontsize=7, loc="best")
    fig.tight_layout()
    fig.savefig(path, format="png", dpi=100)


# --------------------------------------------------------------------------- sweep

def sweep(samples, *, study, trials, aois, checks=None, grid: Mapping[str, Sequence],
          out_dir=None, fmt: str = "csv", jobs: int = 1, overrides=(),
          plots: bool = False) -> dict:
    """Run detection and aggregation for every combination of a settings grid.

    Parameters
    ----------
    samples, trials, aois, checks : path
        The session's inputs, as for :func:`aoi_fix.pipeline.convert`.
    study : Study or path
        The base study (``overrides`` applied first, as with ``--set``).
    grid : mapping of str to sequence
        ``"section.key"`` -> values, e.g. ``{"detection.min_fixation_ms":
        [60, 100]}``.  Values may be typed or text (text follows the
        ``--set`` rules).  Keys acting on one detection method only are
        swept only with that method (see the module docstring).
    out_dir : path, optional
        Folder for ``sweep_summary``, ``sweep_settings``, ``sweep_stability``
        (all in ``fmt``), ``manifest.json`` and, with ``plots``, one PNG per
        AOI; written all or nothing.  Nothing is written when omitted.
    fmt : {"csv", "parquet"}
    jobs : int
        Worker processes; results do not depend on it.
    plots : bool
        Also draw ``sweep_plot_<aoi>.png`` (needs matplotlib, the ``plots``
        extra; needs ``out_dir``).

    Returns
    -------
    dict
        ``sweep_summary``, ``sweep_settings``, ``sweep_stability`` DataFrames
        and the ``manifest`` dict.

    Raises
    ------
    UsageError
        A bad grid (unknown key, empty list, wrong type or out-of-range
        value), ``jobs < 1``, or ``plots`` without matplotlib; raised before
        any input is read.
    """
    from . import __version__
    from .output import RESEARCH_NOTICE, AtomicOutputs, sha256_soon, table_suffix
    from .pipeline import _inputs_with_sha256, load_session, place_samples

    if fmt not in ("csv", "parquet"):
        raise UsageError(f"--format: found {fmt!r}, expected csv or parquet")
    if isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1:
        raise UsageError(f"-j/--jobs: found {jobs!r}, expected a whole number >= 1")
    if plots:
        try:
            import matplotlib  # noqa: F401
        except ImportError:
            raise UsageError("--plots needs matplotlib; install the plots extra: "
                             "pip install 'aoi-fix[plots]'") from None
    if out_dir is not None:
        out_dir = Path(out_dir)
        if out_dir.exists() and not out_dir.is_dir():
            raise OutputError(f"{out_dir}: expected an output folder, found a file")
    base = study if isinstance(study, Study) else load_study(study, overrides)
    if isinstance(study, Study) and overrides:
        base = study_from_dict(study.to_dict(), overrides=overrides)
    settings = build_settings(base, grid)
    keys = list(settings[0].values)

    session = load_session(samples, base, trials, aois, checks)
    inputs = dict(session.paths)
    if not isinstance(study, Study):
        inputs = {"study": Path(study), **inputs}
    input_sha256 = sha256_soon(inputs)  # on a thread while the settings run
    placement = place_samples(session)
    n_jobs = min(jobs, len(settings))
    log.info("sweep: %d settings, %d worker(s)", len(settings), n_jobs)
    if n_jobs == 1:
        cache: dict = {}
        results = [_evaluate(s, session, placement, cache) for s in settings]
    else:
        # work every setting shares is done once, before the workers fork; the costly
        # tasks go first so that the workers finish together (_task_groups)
        # The first setting of the most common method runs here, on all threads: its
        # AOI codes per fixation (most fixations recur in similar settings) go to
        # every worker with the gap filling and velocity.
        shared = _shared_cache(settings, session)
        results = [None] * len(settings)
        lead = _lead_setting(settings)
        if lead is not None:
            results[lead] = _evaluate(settings[lead], session, placement, shared)
        tasks = _task_groups(settings, [i for i in range(len(settings)) if i != lead], n_jobs)
        with ProcessPoolExecutor(max_workers=min(n_jobs, max(len(tasks), 1)),
                                 initializer=_init_worker,
                                 initargs=(session, placement, settings, shared)) as pool:
            futures = [(task, pool.submit(_run_in_worker, task)) for task in tasks]
            for task, f in futures:
                for i, r in zip(task, f.result()):
                    results[i] = r

    sizes = [len(r["summary"]) for r in results]
    summary = pd.concat([_key_columns(settings, sizes),
                         pd.concat([r["summary"] for r in results], ignore_index=True)],
                        axis=1)
    settings_table = pd.concat([_key_columns(settings),
                                pd.DataFrame([r["stats"] for r in results],
                                             columns=SETTINGS_STAT_COLUMNS)], axis=1)
    settings_table["n_fixations"] = settings_table["n_fixations"].astype(np.int64)
    max_range = base.sweep.max_range_pct
    stability = _stability(summary, max_range)

    per_key = {k: [] for k in keys}
    for s in settings:
        for k in keys:
            if s.values[k] is not None and s.values[k] not in per_key[k]:
                per_key[k].append(s.values[k])
    manifest = {
        "tool": "aoi_fix", "version": __version__, "notice": RESEARCH_NOTICE,
        "command": "sweep",
        "inputs": _inputs_with_sha256(inputs, input_sha256),
        "overrides": list(overrides),
        "grid": {k: [list(v) if isinstance(v, tuple) else v for v in per_key[k]]
                 for k in keys},
        "n_settings": len(settings),
        "base_parameters": base.to_dict(),
        "stability_rule": f"flag_unstable = pct_range > {max_range} "
                          "([sweep] max_range_pct, percentage points)",
        "settings": [{
            "setting": s.number,
            "values": {k: (list(v) if isinstance(v, tuple) else v)
                       for k, v in s.values.items()},
            "inputs_read_again": s.reload,
            "parameters": s.study.to_dict(),
            "detection_used": r["detection_used"],
        } for s, r in zip(settings, results)],
    }
    tables = {"sweep_summary": summary, "sweep_settings": settings_table,
              "sweep_stability": stability, "manifest": manifest}
    if out_dir is not None:
        suffix = table_suffix(fmt)
        with AtomicOutputs() as w:
            for name in ("sweep_summary", "sweep_settings", "sweep_stability"):
                w.table(tables[name], out_dir / f"{name}{suffix}", fmt)
            w.json(manifest, out_dir / "manifest.json")
            if plots:
                used = set()
                for aoi, sub in summary.groupby("aoi", sort=False):
                    name = _safe_name(aoi)
                    while name in used:
                        name += "_"
                    used.add(name)
                    st = stability[stability["aoi"] == aoi]
                    w.file(out_dir / f"sweep_plot_{name}.png",
                           lambda tmp, sub=sub, st=st, aoi=aoi: _plot_aoi(sub, st, aoi, keys,
                                                                          tmp))
    return tables
