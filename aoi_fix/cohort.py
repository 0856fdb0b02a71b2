"""Session and cohort tables: participants and ages, trial exclusions, one row per session and AOI.

The tool stops at the table: no statistics, no norms.  Three steps, each a
pure function over the tables of one session, plus the cohort stacking:

* :func:`read_participants` reads a participants table (ours, or a BIDS
  ``participants.tsv``) and :func:`participant_of_sessions` finds each
  session's participant and age in days; ``age_months = age_days / 30.4375``
  (the mean Gregorian month, 365.25 / 12 days: common practice).
* :func:`trial_exclusions` applies the ``[quality]`` exclusion rules to
  ``trial_quality``; :func:`session_summary` pools the used trials of a
  session per AOI and applies ``min_session_trials``.  Every dropped trial or
  session is a row of the ``exclusions`` table: nothing disappears silently.
* :func:`add_cohort_tables` adds ``participant, age_days, age_months`` to every
  table of a converted session and the ``session_summary`` and
  ``exclusions`` tables; :func:`write_cohort` stacks the sessions of a batch
  output folder into ``cohort_session_summary.csv`` and
  ``cohort_exclusions.csv`` with a JSON data dictionary per table.

Details and the choice between pooled and mean percentages: ``docs/cohort.md``.
"""

from __future__ import annotations

import csv
import json
import os
import re
import tempfile
from pathlib import Path
from typing import Iterable, Mapping

import numpy as np
import pandas as pd

from .errors import InputFormatError, UsageError, read_text

__all__ = ["read_participants", "participant_of_sessions", "trial_exclusions",
           "session_summary", "add_cohort_tables", "write_session_outputs", "write_cohort",
           "data_dictionary", "write_dictionary", "exclusion_counts", "plot_exclusions",
           "DAYS_PER_MONTH", "DAYS_PER_YEAR", "SESSION_SUMMARY_COLUMNS", "EXCLUSION_COLUMNS",
           "REASONS", "COHORT_TABLES"]

#: Mean Gregorian month in days (365.25 / 12): common practice for ages in months.
DAYS_PER_MONTH = 30.4375
#: Mean year in days (Julian year): common practice for ages in years.
DAYS_PER_YEAR = 365.25
#: Tables added to a session's outputs when a participants table is given.
COHORT_TABLES = ("session_summary", "exclusions")
PARTICIPANT_COLUMNS = ["participant", "age_days", "age_months"]
SESSION_SUMMARY_COLUMNS = [
    "participant", "session", "age_days", "age_months", "aoi", "n_trials_used",
    "n_trials_with_fixation", "fixation_ms_total", "pct_fixation_pooled",
    "pct_fixation_mean", "n_trials_total", "n_trials_excluded", "valid_fraction_mean",
    "offset_deg_mean", "accuracy_deg_mean", "precision_rms_deg_mean"]
EXCLUSION_COLUMNS = ["participant", "session", "age_days", "age_months", "trial", "level",
                     "reason", "value", "limit"]
#: Exclusion reasons, in the order the rules are applied, with their meaning.
REASONS = {
    "low_validity": "trial: flag_low_validity (valid_fraction < [quality] min_valid_fraction) "
                    "and [quality] exclude_low_validity = true; value = valid_fraction",
    "drift": "trial: flag_drift (offset_deg > [quality] max_offset_deg) and [quality] "
             "exclude_drift = true; value = offset_deg (deg)",
    "little_fixation": "trial: fixation_ms < [quality] min_trial_fixation_ms; value = "
                       "fixation_ms (ms)",
    "too_few_trials": "session: fewer usable trials than [quality] min_session_trials; "
                      "value = usable trials",
    "failed": "session (cohort_exclusions.csv only): the session could not be converted; "
              "see batch_report.csv",
}
RESERVED = ("(none)", "(off-video)")
COHORT_CSV = {"session_summary": "cohort_session_summary.csv",
              "exclusions": "cohort_exclusions.csv"}
QC_FIGURE = "qc_exclusions.png"
_AGE_UNITS = {"year": DAYS_PER_YEAR, "years": DAYS_PER_YEAR, "y": DAYS_PER_YEAR,
              "a": DAYS_PER_YEAR, "month": DAYS_PER_MONTH, "months": DAYS_PER_MONTH,
              "week": 7.0, "weeks": 7.0, "day": 1.0, "days": 1.0, "d": 1.0}
_MISSING = {"", "n/a", "na", "nan"}
_SUB = re.compile(r"^sub-[A-Za-z0-9]+$")


# --------------------------------------------------------------------------- participants

def _read_rows(path: Path) -> tuple[list[str], list[tuple[int, list[str]]], str]:
    """Header, (line, cells) of the non-blank data rows, and the delimiter."""
    text = read_text(path, what="participants table", expected="a participants table")
    lines = text.splitlines()
    first = next((i for i, ln in enumerate(lines) if ln.strip()), None)
    if first is None:
        raise InputFormatError(f"{path}: the file is empty; expected a header line such as "
                               "'participant,session,age_days'")
    delim = "\t" if "\t" in lines[first] or path.suffix.lower() == ".tsv" else ","
    rows = list(csv.reader(lines[first:], delimiter=delim))
    header = [c.strip() for c in rows[0]]
    data = []
    for k, cells in enumerate(rows[1:], start=first + 2):
        if not any(c.strip() for c in cells):
            continue  # a loop over participants, not samples
        if len(cells) != len(header):
            raise InputFormatError(f"{path}: line {k}: found {len(cells)} fields, expected "
                                   f"{len(header)}")
        data.append((k, [c.strip() for c in cells]))
    return header, data, delim


def _bad_rows(path: Path, lines: np.ndarray, bad: np.ndarray, column: str, values,
              expected: str) -> None:
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputFormatError(f"{path}: line {lines[i]}, column '{column}': found "
                               f"{np.asarray(values, dtype=object)[i]!r}, expected {expected}")


def _numbers(path, lines, values: pd.Series, column: str, expected: str) -> np.ndarray:
    missing = values.str.lower().isin(_MISSING).to_numpy()
    num = pd.to_numeric(values.where(~missing), errors="coerce").to_numpy(float)
    _bad_rows(path, lines, ~missing & ~(np.isfinite(num) & (num >= 0)), column, values,
              expected)
    return num


def _age_unit_days(path: Path, table: str = "participants") -> float:
    """Days per unit of the ``age`` column from the BIDS sidecar (years without one)."""
    sidecar = path.with_suffix(".json")
    if not sidecar.is_file():
        return DAYS_PER_YEAR
    try:
        meta = json.loads(sidecar.read_text(encoding="utf-8-sig"))
    except (OSError, ValueError) as e:
        raise InputFormatError(f"{sidecar}: not valid JSON ({e})") from None
    units = (meta.get("age") or {}).get("Units") if isinstance(meta, dict) else None
    if units is None:
        return DAYS_PER_YEAR
    key = str(units).strip().lower()
    if key not in _AGE_UNITS:
        raise InputFormatError(f"{sidecar}: key 'age.Units': found {units!r}, expected "
                               "years, months, weeks or days")
    return _AGE_UNITS[key]


def read_participants(path: str | Path) -> pd.DataFrame:
    """Read a participants table: who each session is, and how old.

    Three forms, told apart by their columns (comma- or tab-separated;
    other columns are ignored):

    * ``participant, session, age_days``: age at the session in days;
    * ``participant, session, birth_date, session_date``: ISO dates
      (``YYYY-MM-DD``); ``age_days`` = whole days between them;
    * a BIDS ``participants.tsv``: ``participant_id`` (``sub-<label>``) and
      ``age`` in years (BIDS convention; another unit when the
      ``participants.json`` sidecar gives ``age.Units``), converted as
      ``days = years * 365.25`` (common practice).  With a ``session``
      column it is one row per session; without, a session is matched
      through the ``sub-<label>`` at the start of its id (see
      :func:`participant_of_sessions`).

    An empty age cell (or ``n/a``) is an unknown age (missing); a malformed
    one is an error.

    Returns
    -------
    DataFrame
        ``participant`` (text), ``session`` (text, missing for a BIDS table
        without sessions), ``age_days`` (float), ``line`` (line in the
        file, header = 1).  ``attrs["bids"]`` tells the BIDS form and
        ``attrs["path"]`` the file, ``attrs["by_session"]`` whether it has a
        ``session`` column.

    Raises
    ------
    InputFormatError
        A missing file or column, an empty participant or session, a
        malformed age or date, a session date before the birth date, or a
        repeated session (participant for BIDS without sessions); one line
        naming the file, line and column.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "participants.csv"
    >>> _ = p.write_text("participant,session,birth_date,session_date\\n"
    ...                  "c1,c1_a,2023-01-10,2024-01-10\\n")
    >>> read_participants(p)[["participant", "session", "age_days"]].to_dict("records")
    [{'participant': 'c1', 'session': 'c1_a', 'age_days': 365.0}]
    """
    path = Path(path)
    header, data, _ = _read_rows(path)
    lines = np.array([k for k, _ in data], dtype=np.int64)
    cols = {h: pd.Series([cells[j] for _, cells in data], dtype=object).astype(str)
            for j, h in enumerate(header)}
    bids = "participant_id" in header
    pid = "participant_id" if bids else "participant"
    if pid not in header:
        raise InputFormatError(f"{path}: line 1: column 'participant' (or BIDS "
                               f"'participant_id') is missing; found columns: "
                               f"{', '.join(header)}")
    has_session = "session" in header
    if not bids and not has_session:
        raise InputFormatError(f"{path}: line 1: column 'session' is missing; found "
                               f"columns: {', '.join(header)}")
    part = cols[pid]
    _bad_rows(path, lines, (part == "").to_numpy(), pid, part, "a participant id")
    if bids:
        _bad_rows(path, lines, ~part.str.match(_SUB.pattern).to_numpy(), pid, part,
                  "'sub-<label>' with a letters-and-digits label (BIDS)")
    if has_session:
        ses = cols["session"]
        _bad_rows(path, lines, (ses == "").to_numpy(), "session", ses, "a session id")
    if bids:
        if "age" in header:
            age = _numbers(path, lines, cols["age"], "age",
                           "an age >= 0 in years (BIDS), or n/a") * _age_unit_days(path)
        else:
            age = np.full(len(data), np.nan)
    elif "age_days" in header:
        age = _numbers(path, lines, cols["age_days"], "age_days", "an age >= 0 in days")
    elif "birth_date" in header and "session_date" in header:
        days = {}
        for c in ("birth_date", "session_date"):
            v = cols[c]
            missing = v.str.lower().isin(_MISSING).to_numpy()
            d = pd.to_datetime(v.where(~missing), format="%Y-%m-%d", errors="coerce")
            _bad_rows(path, lines, ~missing & d.isna().to_numpy(), c, v,
                      "an ISO date YYYY-MM-DD")
            days[c] = (d.to_numpy("datetime64[ns]").astype("datetime64[D]"), missing)
        (b, bm), (s, sm) = days["birth_date"], days["session_date"]
        _bad_rows(path, lines, bm != sm, "session_date" if sm.any() else "birth_date",
                  np.where(sm, cols["session_date"], cols["birth_date"]),
                  "both birth_date and session_date, or neither (unknown age)")
        age = np.where(bm, np.nan, (s - b).astype("timedelta64[D]").astype(float)
                       if len(b) else np.array([], float))
        _bad_rows(path, lines, age < 0, "session_date", cols["session_date"],
                  "a date on or after birth_date")
    else:
        raise InputFormatError(f"{path}: line 1: no age columns; expected 'age_days', or "
                               "'birth_date' and 'session_date', or a BIDS participants.tsv "
                               f"with 'participant_id' and 'age'; found columns: "
                               f"{', '.join(header)}")
    key = cols["session"] if has_session else part
    first_line: dict[str, int] = {}
    for k, name in zip(lines, key):  # a loop over participants' rows
        if name in first_line:
            what = "session" if has_session else pid
            raise InputFormatError(f"{path}: line {k}, column '{what}': {name!r} is already "
                                   f"used on line {first_line[name]}")
        first_line[name] = int(k)
    out = pd.DataFrame({
        "participant": pd.array(part.to_numpy(object), dtype="string"),
        "session": pd.array(cols["session"].to_numpy(object) if has_session
                            else [pd.NA] * len(data), dtype="string"),
        "age_days": np.asarray(age, dtype=float),
        "line": lines,
    })
    out.attrs.update({"bids": bids, "path": str(path), "by_session": has_session})
    return out


def _bids_session_age(root: Path, sub: str, ses: str) -> float | None:
    """Age (days) of ``ses`` in ``root/sub/sub_sessions.tsv``, if that file gives one."""
    f = root / sub / f"{sub}_sessions.tsv"
    if not f.is_file():
        return None
    header, data, _ = _read_rows(f)
    if "session_id" not in header:
        raise InputFormatError(f"{f}: line 1: column 'session_id' is missing; found "
                               f"columns: {', '.join(header)}")
    if "age" not in header:
        return None
    j, a = header.index("session_id"), header.index("age")
    for k, cells in data:  # a loop over one child's sessions
        if cells[j] == ses:
            v = pd.Series([cells[a]])
            days = _numbers(f, np.array([k]), v, "age", "an age >= 0 in years (BIDS), or n/a")
            return float(days[0] * _age_unit_days(f))
    return None


def participant_of_sessions(participants: pd.DataFrame,
                            sessions: Iterable[str]) -> dict[str, dict]:
    """The participant and age of each session id.

    A table with a ``session`` column is matched on it, exactly.  A BIDS
    ``participants.tsv`` without one is matched through the session id's
    leading BIDS entity: session ``sub-01`` or ``sub-01_ses-2`` belongs to
    ``sub-01``.  Its age is the one of the session in
    ``sub-01/sub-01_sessions.tsv`` next to ``participants.tsv`` when that file
    has an ``age`` for ``ses-2`` (BIDS sessions file), else the participant's
    ``age``.  Sessions in the participants table but not asked for are
    ignored.

    Returns
    -------
    dict
        ``{session: {"participant": str, "age_days": float or None,
        "line": int}}``.

    Raises
    ------
    InputFormatError
        A session without a participant, naming the participants file.
    """
    path = participants.attrs.get("path", "participants")
    by_session = participants.attrs.get("by_session",
                                        bool(participants["session"].notna().any()))
    index = {(s if by_session else p): i for i, (s, p) in
             enumerate(zip(participants["session"], participants["participant"]))}
    out = {}
    for sid in sessions:  # a loop over sessions
        if by_session:
            i = index.get(sid)
            age_override = None
        else:
            ents = sid.split("_")
            sub = ents[0] if _SUB.match(ents[0]) else None
            if sub is None:
                raise InputFormatError(
                    f"{path}: session {sid!r} names no BIDS participant; expected a session "
                    "id that starts with 'sub-<label>' (e.g. sub-01_ses-2), or a 'session' "
                    "column in the participants table")
            i = index.get(sub)
            ses = next((e for e in ents[1:] if e.startswith("ses-")), None)
            age_override = (_bids_session_age(Path(path).parent, sub, ses)
                            if ses is not None and i is not None else None)
        if i is None:
            raise InputFormatError(f"{path}: no row for session {sid!r}; expected a row "
                                   "for every session converted")
        age = participants["age_days"].iat[i] if age_override is None else age_override
        out[sid] = {"participant": str(participants["participant"].iat[i]),
                    "age_days": None if not np.isfinite(age) else float(age),
                    "line": int(participants["line"].iat[i])}
    return out


# --------------------------------------------------------------------------- exclusions

def _flag(s: pd.Series) -> np.ndarray:
    """A flag column as plain bool; missing (no checks) is false."""
    if s.dtype == object or pd.api.types.is_string_dtype(s):
        s = s.astype("string").str.strip().str.lower().map(
            {"true": True, "false": False, "1": True, "0": False})
    return pd.array(s, dtype="boolean").fillna(False).to_numpy(dtype=bool)


def trial_exclusions(trial_quality: pd.DataFrame, *, quality) -> pd.DataFrame:
    """Trials broken by the ``[quality]`` exclusion rules, one row per trial and rule.

    Rules, in this order: ``low_validity`` (``flag_low_validity`` with
    ``exclude_low_validity``), ``drift`` (``flag_drift`` with
    ``exclude_drift``; a trial without usable checks has no drift flag and is
    kept) and ``little_fixation`` (``fixation_ms < min_trial_fixation_ms``).

    Returns
    -------
    DataFrame
        ``trial, reason, value, limit`` in trial order; empty (typed) when
        no trial breaks a rule.

    Examples
    --------
    >>> from aoi_fix.config import Quality
    >>> tq = pd.DataFrame({"trial": ["1", "2"], "valid_fraction": [0.9, 0.2],
    ...                    "fixation_ms": [900.0, 100.0],
    ...                    "flag_low_validity": [False, True], "offset_deg": [0.5, 0.4],
    ...                    "flag_drift": [False, False]})
    >>> trial_exclusions(tq, quality=Quality()).values.tolist()
    [['2', 'low_validity', 0.2, 0.5]]
    """
    n = len(trial_quality)
    trial = trial_quality["trial"].astype("string").to_numpy(object)
    rules = []
    if quality.exclude_low_validity:
        rules.append(("low_validity", _flag(trial_quality["flag_low_validity"]),
                      trial_quality["valid_fraction"], quality.min_valid_fraction))
    if quality.exclude_drift and "flag_drift" in trial_quality:
        rules.append(("drift", _flag(trial_quality["flag_drift"]),
                      trial_quality["offset_deg"], quality.max_offset_deg))
    fix = trial_quality["fixation_ms"].to_numpy(float)
    rules.append(("little_fixation", fix < quality.min_trial_fixation_ms,
                  trial_quality["fixation_ms"], quality.min_trial_fixation_ms))
    parts = []
    for rank, (reason, mask, value, limit) in enumerate(rules):  # a loop over rules
        parts.append(pd.DataFrame({"_pos": np.arange(n)[mask], "_rank": rank,
                                   "trial": trial[mask], "reason": reason,
                                   "value": pd.to_numeric(value, errors="coerce")
                                   .to_numpy(float)[mask],
                                   "limit": float(limit)}))
    out = pd.concat(parts, ignore_index=True).sort_values(["_pos", "_rank"], kind="stable")
    out = out.drop(columns=["_pos", "_rank"]).reset_index(drop=True)
    out["trial"] = out["trial"].astype("string")
    out["reason"] = out["reason"].astype("string")
    return out


def _ages(age_days) -> tuple[float, float]:
    a = np.nan if age_days is None else float(age_days)
    return a, a / DAYS_PER_MONTH


def session_summary(aoi_summary: pd.DataFrame, trial_quality: pd.DataFrame, *, quality,
                    session: str, participant: str | None = None,
                    age_days: float | None = None) -> tuple[pd.DataFrame, pd.DataFrame]:
    """One row per AOI over the session's used trials, and the session's exclusions.

    A trial is *used* when it breaks no rule of :func:`trial_exclusions`.
    When fewer than ``[quality] min_session_trials`` trials are used, the
    whole session is dropped: the summary is empty and the exclusions have a
    ``too_few_trials`` row for the session.  Per AOI (over the used trials
    whose stimulus has it, i.e. those with an ``aoi_summary`` row for it;
    the reserved ``(none)`` and ``(off-video)`` rows are in every trial):

    * ``pct_fixation_pooled = 100 * sum(fixation_ms) / sum(trial fixation
      time)``: time-weighted, trials count by their fixation time;
    * ``pct_fixation_mean``: mean of the trials' ``pct_fixation`` over the
      trials with fixation time: every trial counts the same.

    Session data quality (over used trials, missing values skipped):
    ``valid_fraction_mean``, ``offset_deg_mean``, ``accuracy_deg_mean``,
    ``precision_rms_deg_mean``; ``n_trials_total`` and ``n_trials_excluded``
    (trials breaking at least one trial rule).

    Returns
    -------
    summary : DataFrame
        :data:`SESSION_SUMMARY_COLUMNS`, AOIs in the order of ``aoi_summary``
        (reserved rows last).
    exclusions : DataFrame
        :data:`EXCLUSION_COLUMNS`: trial rows, then the session row if any.
    """
    age, months = _ages(age_days)
    who = pd.NA if participant is None else participant
    tx = trial_exclusions(trial_quality, quality=quality)
    excluded = set(tx["trial"].tolist())
    trials = trial_quality["trial"].astype("string")
    used = ~trials.isin(excluded).to_numpy(bool)
    n_used = int(used.sum())
    rows = [tx.assign(level="trial")]
    drop_session = n_used < quality.min_session_trials
    if drop_session:
        rows.append(pd.DataFrame({"trial": pd.array([pd.NA], dtype="string"),
                                  "level": ["session"], "reason": ["too_few_trials"],
                                  "value": [float(n_used)],
                                  "limit": [float(quality.min_session_trials)]}))
    ex = pd.concat(rows, ignore_index=True)
    ex.insert(0, "participant", pd.array([who] * len(ex), dtype="string"))
    ex.insert(1, "session", pd.array([session] * len(ex), dtype="string"))
    ex.insert(2, "age_days", age)
    ex.insert(3, "age_months", months)
    for c in ("trial", "level", "reason"):
        ex[c] = ex[c].astype("string")
    ex = ex[EXCLUSION_COLUMNS].astype({"value": float, "limit": float, "age_days": float,
                                       "age_months": float})

    used_trials = set(trials[used].tolist()) if not drop_session else set()
    a = aoi_summary[aoi_summary["trial"].astype("string").isin(used_trials)].copy()
    a["_total"] = a.groupby("trial", sort=False)["fixation_ms"].transform("sum")
    a["_has"] = a["_total"] > 0
    g = a.groupby("aoi", sort=False)
    s = pd.DataFrame({
        "n_trials_used": g.size(),
        "n_trials_with_fixation": g["_has"].sum(),
        "fixation_ms_total": g["fixation_ms"].sum(),
        "_denominator": g["_total"].sum(),
        "pct_fixation_mean": g["pct_fixation"].mean(),
    })
    s["pct_fixation_pooled"] = np.where(s["_denominator"] > 0, 100.0 * s["fixation_ms_total"]
                                        / s["_denominator"].where(s["_denominator"] > 0),
                                        np.nan)
    s = s.reset_index().rename(columns={"index": "aoi"})
    order = [a_ for a_ in s["aoi"] if a_ not in RESERVED] + [r for r in RESERVED
                                                             if r in set(s["aoi"])]
    s = s.set_index("aoi").loc[order].reset_index() if len(s) else s
    q = trial_quality[used] if not drop_session else trial_quality.iloc[:0]

    def mean(c):
        return float(pd.to_numeric(q[c], errors="coerce").mean()) if c in q and len(q) \
            else np.nan

    n = len(s)
    s = s.assign(participant=pd.array([who] * n, dtype="string"),
                 session=pd.array([session] * n, dtype="string"), age_days=age,
                 age_months=months, n_trials_total=len(trial_quality),
                 n_trials_excluded=len(excluded), valid_fraction_mean=mean("valid_fraction"),
                 offset_deg_mean=mean("offset_deg"), accuracy_deg_mean=mean("accuracy_deg"),
                 precision_rms_deg_mean=mean("precision_rms_deg"))
    s["aoi"] = s["aoi"].astype("string")
    s = s[SESSION_SUMMARY_COLUMNS].astype({
        "n_trials_used": "int64", "n_trials_with_fixation": "int64",
        "n_trials_total": "int64", "n_trials_excluded": "int64",
        **{c: float for c in ("age_days", "age_months", "fixation_ms_total",
                              "pct_fixation_pooled", "pct_fixation_mean",
                              "valid_fraction_mean", "offset_deg_mean", "accuracy_deg_mean",
                              "precision_rms_deg_mean")}})
    return s.reset_index(drop=True), ex.reset_index(drop=True)


def add_cohort_tables(tables: dict, *, session: str, participant: str | None,
                      age_days: float | None, quality, participants_path=None) -> dict:
    """A session's tables with participant and age, plus ``session_summary`` and ``exclusions``.

    ``participant, age_days, age_months`` become the first columns of
    ``fixations``, ``aoi_summary``, ``trial_quality`` and ``check_quality``;
    the manifest gets ``participant`` (id, age, source) and ``exclusions``
    (the rules and what they dropped).  ``tables`` is not modified.
    """
    out = dict(tables)
    summary, ex = session_summary(tables["aoi_summary"], tables["trial_quality"],
                                  quality=quality, session=session, participant=participant,
                                  age_days=age_days)
    age, months = _ages(age_days)
    for name in ("fixations", "aoi_summary", "trial_quality", "check_quality"):
        if name in tables and tables[name] is not None:
            df = tables[name].copy()
            df.insert(0, "participant",
                      pd.array([participant if participant is not None else pd.NA]
                               * len(df), dtype="string"))
            df.insert(1, "age_days", np.full(len(df), age))
            df.insert(2, "age_months", np.full(len(df), months))
            out[name] = df
    out["session_summary"] = summary
    out["exclusions"] = ex
    if "manifest" in tables:
        m = dict(tables["manifest"])
        m["participant"] = {"session": session, "participant": participant,
                            "age_days": None if np.isnan(age) else age,
                            "age_months": None if np.isnan(months) else months,
                            "participants_file": None if participants_path is None
                            else str(participants_path)}
        trial_rows = ex[ex["level"] == "trial"]
        m["exclusions"] = {
            "rules": {"exclude_low_validity": quality.exclude_low_validity,
                      "exclude_drift": quality.exclude_drift,
                      "min_trial_fixation_ms": quality.min_trial_fixation_ms,
                      "min_session_trials": quality.min_session_trials},
            "trials_total": int(len(tables["trial_quality"])),
            "trials_excluded": int(trial_rows["trial"].nunique()),
            "session_excluded": bool((ex["level"] == "session").any()),
            "rule": "trials_total = trials used + trials_excluded; every excluded trial "
                    "and session is a row of exclusions",
        }
        out["manifest"] = m
    return out


def typed_tables(tables: dict) -> dict:
    """``session_summary`` and ``exclusions`` read back from CSV, with their column types.

    An empty table read from CSV has untyped (text) columns; the dataset
    partitions of every session must share one schema.
    """
    out = dict(tables)
    for name, cols in (("session_summary", SESSION_SUMMARY_COLUMNS),
                       ("exclusions", EXCLUSION_COLUMNS)):
        if name in out:
            df, ref = out[name], _empty(cols)
            out[name] = df.astype({c: ref[c].dtype if not c.startswith("n_") else "int64"
                                   for c in cols if c in df.columns})
    return out


def write_session_outputs(tables: dict, out_dir, fmt: str = "csv", *, session=None,
                          plots: bool = False) -> list[Path]:
    """:func:`aoi_fix.pipeline.write_outputs`, which also writes ``session_summary``
    and ``exclusions`` when present, all or none."""
    from .pipeline import write_outputs

    return write_outputs(tables, out_dir, fmt, session=session, plots=plots)


# --------------------------------------------------------------------------- data dictionary

def _col(description: str, units: str | None = None, levels: Mapping | None = None) -> dict:
    d = {"Description": description}
    if units:
        d["Units"] = units
    if levels:
        d["Levels"] = dict(levels)
    return d


_WHO = {
    "participant": _col("Participant id from the participants table (never a name)."),
    "session": _col("Session id (the batch session table's 'session'; the partition key of "
                    "the Parquet dataset)."),
    "age_days": _col("Age at the session: given, or session_date - birth_date, or BIDS age "
                     "x 365.25 days per year (common practice). Missing when unknown.",
                     "days"),
    "age_months": _col("age_days / 30.4375 (the mean Gregorian month, common practice).",
                       "months"),
}
_RESERVED_LEVELS = {"(none)": "fixation time on the drawn video inside no AOI",
                    "(off-video)": "fixation time in the trial with gaze outside the "
                                   "drawn video"}
_FLAG_LEVELS = {"true": "the rule is broken", "false": "the rule holds"}


def data_dictionary() -> dict[str, dict]:
    """Column descriptions of every output table, in the spirit of BIDS sidecars.

    Returns
    -------
    dict
        ``{table: {column: {"Description", "Units"?, "Levels"?}}}`` for
        ``session_summary``, ``exclusions``, ``aoi_summary``, ``trial_quality``,
        ``fixations`` and ``check_quality``.  Columns that only some runs have
        (``event_type``, ``looking_events``) are included.

    >>> sorted(data_dictionary()["exclusions"]["level"]["Levels"])
    ['session', 'trial']
    """
    trial = _col("Trial id from the trial table (text).")
    stimulus = _col("Video shown in the trial.")
    aoi = _col("AOI name, or a reserved label.", levels=_RESERVED_LEVELS)
    return {
        "session_summary": {
            **_WHO,
            "aoi": aoi,
            "n_trials_used": _col("Used trials (no exclusion rule broken) whose stimulus has "
                                  "this AOI."),
            "n_trials_with_fixation": _col("Of those, trials with any fixation time."),
            "fixation_ms_total": _col("Sum of aoi_summary.fixation_ms over those trials.",
                                      "ms"),
            "pct_fixation_pooled": _col("100 x fixation_ms_total / total fixation time of "
                                        "those trials: time-weighted (trials count by their "
                                        "fixation time).", "percent"),
            "pct_fixation_mean": _col("Mean of aoi_summary.pct_fixation over those trials "
                                      "with fixation time: every trial counts the same.",
                                      "percent"),
            "n_trials_total": _col("Trials of the session (trial_quality rows)."),
            "n_trials_excluded": _col("Trials breaking at least one trial exclusion rule."),
            "valid_fraction_mean": _col("Mean trial_quality.valid_fraction over used trials.",
                                        "fraction (0-1)"),
            "offset_deg_mean": _col("Mean trial_quality.offset_deg over used trials with "
                                    "checks.", "deg"),
            "accuracy_deg_mean": _col("Mean trial_quality.accuracy_deg over used trials with "
                                      "checks.", "deg"),
            "precision_rms_deg_mean": _col("Mean trial_quality.precision_rms_deg over used "
                                           "trials with checks.", "deg"),
        },
        "exclusions": {
            **_WHO,
            "trial": _col("Excluded trial; empty for a whole session."),
            "level": _col("What is excluded.", levels={"trial": "one trial",
                                                       "session": "the whole session"}),
            "reason": _col("The rule that excluded it ([quality] keys).", levels=REASONS),
            "value": _col("The value the rule tested (units of the reason: fraction, deg, "
                          "ms or trials); empty for 'failed'."),
            "limit": _col("The rule's limit from [quality]; empty for 'failed'."),
        },
        "aoi_summary": {
            **{k: v for k, v in _WHO.items()},
            "trial": trial, "stimulus": stimulus, "aoi": aoi,
            "fixation_ms": _col("Fixation time in this AOI during the trial (time-weighted "
                                "samples).", "ms"),
            "pct_fixation": _col("100 x fixation_ms / fixation time of the trial; empty "
                                 "without fixation time.", "percent"),
            "pct_trial": _col("100 x fixation_ms / trial duration.", "percent"),
            "n_fixations": _col("Fixation parts of the trial whose majority AOI is this one."),
            "first_fixation_ms": _col("Onset of the first such part minus the trial start.",
                                      "ms"),
            "looking_events": _col("What counted as looking time (ivt_pursuit only).",
                                   levels={"fixation": "fixations only",
                                           "fixation+pursuit": "fixations and pursuits"}),
        },
        "trial_quality": {
            **_WHO,
            "trial": trial, "stimulus": stimulus,
            "duration_ms": _col("Trial duration, end - start.", "ms"),
            "n_samples": _col("Sample rows inside the trial."),
            "valid_fraction": _col("Share of the trial covered by valid raw samples.",
                                   "fraction (0-1)"),
            "fixation_ms": _col("Fixation time inside the trial.", "ms"),
            "flag_low_validity": _col("valid_fraction < [quality] min_valid_fraction.",
                                      levels=_FLAG_LEVELS),
            "offset_deg": _col("Modelled calibration offset at the trial's mid-time.", "deg"),
            "accuracy_deg": _col("Accuracy at the nearest usable check.", "deg"),
            "precision_rms_deg": _col("RMS sample-to-sample precision at that check.", "deg"),
            "flag_drift": _col("offset_deg > [quality] max_offset_deg; empty without checks.",
                               levels=_FLAG_LEVELS),
        },
        "fixations": {
            **_WHO,
            "trial": _col("Trial id; empty outside trials."),
            "fixation": _col("Detector's fixation number, 1-based, in time order."),
            "onset_ms": _col("First sample time of the part, recording clock.", "ms"),
            "offset_ms": _col("End of the part, recording clock.", "ms"),
            "duration_ms": _col("offset_ms - onset_ms.", "ms"),
            "x_px": _col("Fixation position, display x (0 = left edge).", "px"),
            "y_px": _col("Fixation position, display y (0 = top edge).", "px"),
            "aoi": _col("AOI holding most of the part's fixation time; empty for none, off "
                        "the video or outside trials."),
            "event_type": _col("Kind of event (ivt_pursuit only).",
                               levels={"fixation": "fixation", "pursuit": "smooth pursuit"}),
        },
        "check_quality": {
            **_WHO,
            "check": _col("Check number, 1-based, in time order."),
            "onset_ms": _col("Check target appeared.", "ms"),
            "offset_ms": _col("Check target disappeared.", "ms"),
            "target_x_px": _col("Target x on the display.", "px"),
            "target_y_px": _col("Target y on the display.", "px"),
            "n_samples": _col("Samples in the check window."),
            "data_loss": _col("Share of the window's samples without a valid position.",
                              "fraction (0-1)"),
            "fixation": _col("Fixation taken as the look at the target; empty if none."),
            "gaze_x_px": _col("Mean gaze x of that fixation in the window.", "px"),
            "gaze_y_px": _col("Mean gaze y of that fixation in the window.", "px"),
            "accuracy_deg": _col("Angle between gaze and target.", "deg"),
            "offset_x_deg": _col("Gaze minus target, x; positive = right.", "deg"),
            "offset_y_deg": _col("Gaze minus target, y; positive = down.", "deg"),
            "precision_rms_deg": _col("RMS sample-to-sample angle.", "deg"),
            "precision_std_deg": _col("sqrt(var_x + var_y) of the positions.", "deg"),
            "status": _col("Whether the check could be used.",
                           levels={"ok": "usable", "no fixation": "no fixation near the "
                                   "target", "no data": "no valid sample"}),
        },
    }


def _publish(final: Path, write) -> bool:
    """Write via ``write(tmp)`` and replace ``final`` only if the bytes differ."""
    final.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{final.name}.", suffix=".tmp", dir=final.parent)
    os.close(fd)
    tmp = Path(tmp)
    try:
        write(tmp)
        if final.is_file() and final.read_bytes() == tmp.read_bytes():
            tmp.unlink()
            return False
        os.replace(tmp, final)
        return True
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def write_dictionary(folder: str | Path) -> list[Path]:
    """Write ``<table>.json`` for every table of :func:`data_dictionary` into ``folder``."""
    out = []
    for table, cols in data_dictionary().items():
        text = json.dumps(cols, indent=2, ensure_ascii=False) + "\n"
        f = Path(folder) / f"{table}.json"
        _publish(f, lambda p, text=text: p.write_text(text, encoding="utf-8"))
        out.append(f)
    return out


# --------------------------------------------------------------------------- the cohort

def _empty(columns: list[str]) -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype="string" if c in (
        "participant", "session", "aoi", "trial", "level", "reason") else float)
        for c in columns})


def _combined(out_dir: Path, table: str, columns: list[str], sessions) -> pd.DataFrame:
    from .batch import DATASET, read_combined

    root = out_dir / DATASET / table
    if not root.is_dir() or not any(root.glob("session=*/*.parquet")):
        return _empty(columns)
    df = read_combined(out_dir, table)
    if sessions is not None:
        df = df[df["session"].isin(list(sessions))]
    return df[[c for c in columns if c in df.columns]]


def exclusion_counts(trial_quality: pd.DataFrame, exclusions: pd.DataFrame) -> pd.DataFrame:
    """Trials per session: used, and excluded by (first) reason.

    A trial breaking several rules counts under the first (rule order of
    :data:`REASONS`); the trials of a dropped session that broke no trial
    rule count under ``too_few_trials``; a failed session has no trials.

    Returns
    -------
    DataFrame
        Index ``session``; columns ``used`` and one per reason present.
    """
    total = trial_quality.groupby("session", sort=False).size()
    ex = exclusions.copy()
    sessions = pd.Index(pd.unique(pd.concat([pd.Series(total.index, dtype=object),
                                             ex["session"].astype(object)])))
    tr = ex[ex["level"] == "trial"].drop_duplicates(["session", "trial"], keep="first")
    counts = pd.crosstab(tr["session"], tr["reason"]).reindex(sessions, fill_value=0)
    total = total.reindex(sessions, fill_value=0)
    left = total - counts.sum(axis=1)
    dropped = ex.loc[(ex["level"] == "session") & (ex["reason"] == "too_few_trials"),
                     "session"].unique()
    in_dropped = sessions.isin(dropped)
    counts["too_few_trials"] = np.where(in_dropped, left, 0)
    counts.insert(0, "used", np.where(in_dropped, 0, left))
    order = ["used"] + [r for r in REASONS if r in counts.columns]
    counts = counts[order]
    counts = counts.loc[:, (counts != 0).any(axis=0) | (counts.columns == "used")]
    counts.index.name = "session"
    return counts.astype(int)


def plot_exclusions(counts: pd.DataFrame, path: str | Path, *,
                    labels: Mapping[str, str] | None = None) -> None:
    """Per session, trials used and excluded stacked by reason (horizontal bars).

    A quality-control figure, not a growth chart: no ages on an axis, no norms.
    """
    from .plots import _figure

    n = len(counts)
    fig = _figure(8.0, max(2.5, 0.35 * n + 1.5))
    ax = fig.subplots()
    y = np.arange(n)
    left = np.zeros(n)
    colours = {"used": "#4c9a2a", "low_validity": "#d95f02", "drift": "#7570b3",
               "little_fixation": "#e7298a", "too_few_trials": "#666666"}
    for c in counts.columns:  # a loop over reasons
        v = counts[c].to_numpy(float)
        ax.barh(y, v, left=left, color=colours.get(c, "#999999"),
                label=c if c == "used" else f"excluded: {c}")
        left += v
    names = [str(s) if labels is None else f"{s} ({labels.get(s, '')})"
             for s in counts.index]
    ax.set_yticks(y, names, fontsize=8)
    ax.invert_yaxis()
    ax.set_xlabel("trials")
    if n:
        ax.legend(loc="lower right", fontsize=8)
    fig.suptitle("Trials used and excluded per session (research use only)", fontsize=10)
    fig.tight_layout()
    fig.savefig(path, format="png", metadata={"Software": None})


def write_cohort(out_dir: str | Path, *, sessions: Iterable[str] | None = None,
                 failed: Iterable[Mapping] = (), plots: bool = False) -> dict[str, pd.DataFrame]:
    """Stack the sessions' ``session_summary`` and ``exclusions`` into the cohort files.

    Reads the partitions of ``out_dir/dataset/session_summary`` and
    ``out_dir/dataset/exclusions`` (only ``sessions`` when given) and writes
    ``out_dir/cohort_session_summary.csv`` and ``out_dir/cohort_exclusions.csv``
    (rows by session, then as in the session tables), the data dictionary
    ``out_dir/<table>.json`` and, with ``plots``, ``out_dir/qc_exclusions.png``.
    ``failed`` sessions (dicts with ``session``, ``participant``,
    ``age_days``) get a ``failed`` row in ``cohort_exclusions.csv``.  A file
    whose content did not change is not rewritten.

    Returns
    -------
    dict
        ``session_summary`` and ``exclusions`` DataFrames as written.
    """
    from .output import _write

    out_dir = Path(out_dir)
    sessions = None if sessions is None else list(sessions)
    ss = _combined(out_dir, "session_summary", SESSION_SUMMARY_COLUMNS, sessions)
    ex = _combined(out_dir, "exclusions", EXCLUSION_COLUMNS, sessions)
    failed = list(failed)
    if failed:
        age = np.array([np.nan if f.get("age_days") is None else f["age_days"]
                        for f in failed], dtype=float)
        fx = pd.DataFrame({
            "participant": pd.array([f.get("participant") for f in failed], dtype="string"),
            "session": pd.array([f["session"] for f in failed], dtype="string"),
            "age_days": age, "age_months": age / DAYS_PER_MONTH,
            "trial": pd.array([pd.NA] * len(failed), dtype="string"),
            "level": "session", "reason": "failed", "value": np.nan, "limit": np.nan})
        ex = pd.concat([ex, fx], ignore_index=True) if len(ex) else fx
    order = sessions if sessions is not None else sorted(set(ss["session"]) | set(ex["session"]))
    rank = {s: i for i, s in enumerate(order)}
    for name, df in (("ss", ss), ("ex", ex)):
        key = df["session"].map(lambda s: rank.get(s, len(rank))).astype(int)
        df = df.assign(_k=key.to_numpy()).sort_values("_k", kind="stable").drop(columns="_k")
        if name == "ss":
            ss = df.reset_index(drop=True)[SESSION_SUMMARY_COLUMNS]
        else:
            ex = df.reset_index(drop=True)[EXCLUSION_COLUMNS]
    _publish(out_dir / COHORT_CSV["session_summary"], lambda p: _write(ss, p, "csv"))
    _publish(out_dir / COHORT_CSV["exclusions"], lambda p: _write(ex, p, "csv"))
    write_dictionary(out_dir)
    if plots:
        tq = _combined(out_dir, "trial_quality", ["session", "trial"], sessions)
        counts = exclusion_counts(tq, ex).reindex([s for s in order if s in set(tq["session"])
                                                   or s in set(ex["session"])])
        who = dict(zip(ex["session"], ex["participant"].fillna("")))
        who.update(zip(ss["session"], ss["participant"].fillna("")))
        _publish(out_dir / QC_FIGURE, lambda p: plot_exclusions(counts, p, labels=who))
    return {"session_summary": ss, "exclusions": ex}


def remove_cohort_files(out_dir: str | Path) -> None:
    """Remove the cohort CSVs and figure (a batch run without participants)."""
    for name in (*COHORT_CSV.values(), QC_FIGURE):
        (Path(out_dir) / name).unlink(missing_ok=True)


def session_from_out_dir(out_dir, session: str | None) -> str:
    """The session id for ``convert --participants``: given, or ``out_dir``'s ``session=<id>``."""
    if session:
        return session
    name = Path(out_dir).name if out_dir is not None else ""
    if name.startswith("session=") and len(name) > len("session="):
        return name.split("=", 1)[1]
    raise UsageError("--participants needs the session id: give --session ID (or an "
                     "--out-dir named session=<id>)")
