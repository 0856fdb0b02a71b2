"""Read BIDS eye-tracking recordings: headerless ``*_physio.tsv.gz`` with JSON sidecars.

BIDS stores an eye-tracking recording as a physiological recording (sidecar
``"PhysioType": "eyetrack"``): a gzip-compressed, tab-separated file *without*
a header line, whose column names are listed in the sidecar's ``Columns``,
with ``n/a`` for missing values.  The screen geometry lives in the
stimulus-presentation object (``StimulusPresentation``) of the events
sidecar (``*_events.json``), with sizes in metres and the resolution in
pixels.  BIDS has no field for areas of interest: AOIs stay in our own tables.

How aoi_fix reads such a recording
----------------------------------
Sidecar
    ``<name>_physio.json`` next to ``<name>_physio.tsv.gz`` (required).
    ``Columns`` (required) names the columns.  ``SamplingFrequency`` (Hz)
    becomes ``[samples] rate_hz``.  ``StartTime`` (seconds) is used only when
    there is no timestamp column.  ``RecordedEye`` selects one eye when the
    file holds both eyes' columns (see below).
Time
    The timestamp column is the ``Columns`` entry named ``timestamp`` (the
    name BIDS recommends), else the first entry named like one: ``time``, or a
    name starting with ``time_`` / ``timestamp_`` or ending in ``_time`` /
    ``_timestamp`` (case-insensitive).  Its unit is the column's ``Units`` in
    the sidecar (``s``, ``ms``, ``us``/``µs``, ``ns`` or the words
    ``second(s)``, ``millisecond(s)``, ``microsecond(s)``, ``nanosecond(s)``);
    without ``Units`` it is inferred from the first samples: the median time
    step times ``SamplingFrequency`` is about 1 for seconds, 1e3 for ms, 1e6
    for µs and 1e9 for ns (within a factor of 2; otherwise an error asks for
    ``Units``).  Without a timestamp column, sample ``i`` is at
    ``StartTime + i / SamplingFrequency`` seconds, in a column called
    :data:`SYNTHETIC_TIME`; trial tables must then use that clock (seconds).
Gaze position
    ``x_coordinate`` and ``y_coordinate`` (the names BIDS specifies), or, in a
    file holding both eyes, the per-eye pairs ``x_coordinate_left`` /
    ``y_coordinate_left`` and ``x_coordinate_right`` / ``y_coordinate_right``
    (our convention; BIDS itself stores one eye per file).  With both eyes and
    ``RecordedEye`` ``"left"`` or ``"right"``, only that eye is used; with
    ``"both"``, ``"cyclopean"`` or no ``RecordedEye``, both are combined as
    for any binocular file.  Positions must be gaze on the screen in pixels:
    the sidecar's ``SampleCoordinateSystem`` (when given) must be
    ``gaze-on-screen`` and the coordinate ``Units`` or ``SampleCoordinateUnits``
    (when given) ``pixel``/``px``.  ``ScreenOrigin`` ``["top", "left"]`` (the
    default) is our own convention; with ``["bottom", "left"]`` y is taken to
    grow upwards and is flipped.  Other origins are an error.  Other columns
    (``pupil_size``, ...) are ignored.
Screen geometry
    ``ScreenResolution`` ``[width, height]`` in px, ``ScreenSize`` ``[width,
    height]`` in m and ``ScreenDistance`` in m, from ``StimulusPresentation``
    in the events sidecars that apply to the recording (BIDS inheritance: every
    ``*_events.json`` in the recording's folder or a parent folder up to the
    dataset root whose entities are all in the recording's name, nearer files
    overriding farther ones), falling back on the same keys in the physio
    sidecar (inside ``StimulusPresentation`` or at its top level).  Sizes
    above 10 m are taken as a unit mistake (centimetres?) and refused.

References
----------
.. [1] Brain Imaging Data Structure (BIDS) specification, "Physiological
   recordings" and the eye-tracking extension (BEP020): headerless
   ``_physio.tsv.gz``, ``Columns``, ``SamplingFrequency``, ``StartTime``,
   ``RecordedEye``, ``x_coordinate``/``y_coordinate``/``timestamp`` columns,
   ``StimulusPresentation`` with ``ScreenDistance``, ``ScreenSize`` (m),
   ``ScreenResolution`` (px) and ``ScreenOrigin``; ``n/a`` for missing values.
   https://bids-specification.readthedocs.io
"""

from __future__ import annotations

import copy
import gzip
import json
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import pandas as pd

from .config import Display, SampleColumns, study_from_dict
from .errors import ConfigError, InputFormatError, NoValidSamplesError, read_text

__all__ = ["PHYSIO_SUFFIX", "SYNTHETIC_TIME", "is_bids_physio", "physio_sidecar_path",
           "events_sidecars", "bids_inputs", "bids_samples_section", "bids_display",
           "study_for_bids", "read_physio", "read_bids_samples"]

#: A samples path ending in this is read as a BIDS physiological recording.
PHYSIO_SUFFIX = "_physio.tsv.gz"
#: Name of the time column made from ``StartTime + i / SamplingFrequency`` (seconds).
SYNTHETIC_TIME = "start_time_plus_i_over_rate_s"

_UNIT_WORDS = {
    "s": "s", "sec": "s", "second": "s", "seconds": "s",
    "ms": "ms", "millisecond": "ms", "milliseconds": "ms", "msec": "ms",
    "us": "us", "µs": "us", "μs": "us", "microsecond": "us", "microseconds": "us",
    "ns": "ns", "nanosecond": "ns", "nanoseconds": "ns",
}
_UNIT_PER_S = {"s": 1.0, "ms": 1e3, "us": 1e6, "ns": 1e9}
_PIXEL_WORDS = {"pixel", "pixels", "px"}
_PER_EYE = {"left": ("x_coordinate_left", "y_coordinate_left"),
            "right": ("x_coordinate_right", "y_coordinate_right")}
#: [samples] keys that describe the file layout; study_for_bids always sets them
_LAYOUT_KEYS = ("time", "time_unit", "x", "y", "x_left", "y_left", "x_right", "y_right",
                "valid", "valid_left", "valid_right", "valid_codes", "coords", "delimiter",
                "decimal", "rate_hz")
_MAX_METRES = 10.0


def is_bids_physio(path: str | Path) -> bool:
    """True when ``path`` names a BIDS physiological recording (``*_physio.tsv.gz``).

    >>> is_bids_physio("sub-01_task-movie_recording-eye1_physio.tsv.gz")
    True
    >>> is_bids_physio("samples.tsv.gz")
    False
    """
    return str(path).endswith(PHYSIO_SUFFIX)


def physio_sidecar_path(path: str | Path) -> Path:
    """The JSON sidecar of a ``*_physio.tsv.gz`` (or ``.tsv``) file.

    >>> physio_sidecar_path("a/sub-01_task-x_physio.tsv.gz").name
    'sub-01_task-x_physio.json'
    """
    path = Path(path)
    name = path.name
    for ext in (".tsv.gz", ".tsv"):
        if name.endswith(ext):
            return path.with_name(name[: -len(ext)] + ".json")
    return path.with_suffix(".json")


def _read_json(path: Path, what: str) -> dict:
    text = read_text(path, what=what, expected=f"a JSON {what}")
    try:
        data = json.loads(text)
    except json.JSONDecodeError as e:
        raise InputFormatError(f"{path}: line {e.lineno}: malformed JSON ({e.msg})") from None
    if not isinstance(data, dict):
        raise InputFormatError(f"{path}: expected a JSON object, found "
                               f"{type(data).__name__}")
    return data


def _sidecar(path: Path) -> tuple[Path, dict]:
    side = physio_sidecar_path(path)
    data = _read_json(side, "sidecar (BIDS requires a _physio.json next to each "
                            "_physio.tsv.gz)")
    cols = data.get("Columns")
    if (not isinstance(cols, list) or not cols
            or not all(isinstance(c, str) and c for c in cols)):
        raise InputFormatError(f"{side}: key 'Columns': found {cols!r}, expected a list of "
                               "column names (the physio file has no header line)")
    if len(set(cols)) != len(cols):
        dup = next(c for c in cols if cols.count(c) > 1)
        raise InputFormatError(f"{side}: key 'Columns': column '{dup}' is named twice")
    return side, data


def _entities(name: str) -> tuple[set[str], str]:
    """Key-value entities and suffix of a BIDS file name (without extension)."""
    stem = name.split(".", 1)[0]
    parts = stem.split("_")
    ents = {p for p in parts[:-1] if "-" in p}
    return ents, parts[-1]


def events_sidecars(path: str | Path) -> list[Path]:
    """The ``*_events.json`` files that apply to a recording, farthest first.

    BIDS inheritance, simplified: every ``*_events.json`` in the recording's
    folder or a parent folder (up to the folder holding
    ``dataset_description.json``, at most 5 levels up) whose key-value
    entities all appear in the recording's file name.  Within a folder, files
    with fewer entities come first, so nearer and more specific files
    override.
    """
    path = Path(path).resolve()
    ents, _ = _entities(path.name)
    ents = {e for e in ents if not e.startswith("recording-")}
    found: list[list[Path]] = []
    folder = path.parent
    for _ in range(6):
        level = []
        for cand in sorted(folder.glob("*_events.json")):
            c_ents, suffix = _entities(cand.name)
            if suffix == "events" and c_ents <= ents:
                level.append((len(c_ents), cand))
        found.append([p for _, p in sorted(level)])
        if (folder / "dataset_description.json").exists() or folder.parent == folder:
            break
        folder = folder.parent
    return [p for level in reversed(found) for p in level]


def bids_inputs(path: str | Path) -> dict[str, Path]:
    """Every file a BIDS recording is read from, by role (for checksums).

    ``physio`` (the data), ``physio_sidecar`` and ``events_sidecar_1``,
    ``events_sidecar_2``, ... (farthest first).
    """
    out = {"physio": Path(path), "physio_sidecar": physio_sidecar_path(path)}
    for i, p in enumerate(events_sidecars(path), start=1):
        out[f"events_sidecar_{i}"] = p
    return out


def _presentation(path: Path, side_data: Mapping) -> tuple[dict, str]:
    """Merged stimulus-presentation keys and a text naming where they came from."""
    merged: dict = {}
    sources = []
    fallback = dict(side_data.get("StimulusPresentation") or {})
    for key in ("ScreenSize", "ScreenResolution", "ScreenDistance", "ScreenOrigin"):
        if key in side_data and key not in fallback:
            fallback[key] = side_data[key]
    if fallback:
        merged.update(fallback)
        sources.append(str(physio_sidecar_path(path)))
    for ev in events_sidecars(path):
        sp = _read_json(ev, "events sidecar").get("StimulusPresentation")
        if sp is None:
            continue
        if not isinstance(sp, dict):
            raise InputFormatError(f"{ev}: key 'StimulusPresentation': expected an object, "
                                   f"found {type(sp).__name__}")
        merged.update(sp)
        sources.append(str(ev))
    return merged, (" and ".join(sources) if sources else "no sidecar")


def _pair(value, key: str, source: str, *, integer: bool) -> tuple[float, float]:
    ok = (isinstance(value, (list, tuple)) and len(value) == 2
          and all(isinstance(v, (int, float)) and not isinstance(v, bool) and v > 0
                  for v in value))
    if not ok:
        what = "two positive whole numbers [width, height] in px" if integer else \
            "two positive numbers [width, height] in metres"
        raise InputFormatError(f"{source}: key 'StimulusPresentation.{key}': found "
                               f"{value!r}, expected {what}")
    return float(value[0]), float(value[1])


def _origin(sp: Mapping, source: str) -> str:
    origin = sp.get("ScreenOrigin", ["top", "left"])
    if isinstance(origin, str):
        origin = [origin]
    words = [str(w).strip().lower() for w in origin] if isinstance(origin, list) else []
    text = "-".join(sorted(words))
    if text in ("left-top", "top-left", "topleft"):
        return "top-left"
    if text in ("bottom-left", "bottomleft"):
        return "bottom-left"
    raise InputFormatError(f"{source}: key 'StimulusPresentation.ScreenOrigin': found "
                           f"{origin!r}, expected [\"top\", \"left\"] or "
                           "[\"bottom\", \"left\"]")


def bids_display(path: str | Path) -> dict:
    """``[display]`` keys from the recording's stimulus-presentation metadata.

    Returns only the keys found (``width_px``/``height_px`` from
    ``ScreenResolution``, ``width_mm``/``height_mm`` from ``ScreenSize`` in m,
    ``distance_mm`` from ``ScreenDistance`` in m); the caller fills gaps from
    the study.

    Raises
    ------
    InputFormatError
        A malformed value, or a size above 10 m (a unit mistake).
    """
    path = Path(path)
    _, side = _sidecar(path)
    sp, source = _presentation(path, side)
    out: dict[str, Any] = {}
    if "ScreenResolution" in sp:
        w, h = _pair(sp["ScreenResolution"], "ScreenResolution", source, integer=True)
        if not (w.is_integer() and h.is_integer()):
            raise InputFormatError(f"{source}: key 'StimulusPresentation.ScreenResolution': "
                                   f"found {sp['ScreenResolution']!r}, expected whole pixels")
        out.update(width_px=int(w), height_px=int(h))
    if "ScreenSize" in sp:
        w, h = _pair(sp["ScreenSize"], "ScreenSize", source, integer=False)
        if max(w, h) > _MAX_METRES:
            raise InputFormatError(f"{source}: key 'StimulusPresentation.ScreenSize': found "
                                   f"{sp['ScreenSize']!r}, expected metres (BIDS); is it in "
                                   "centimetres?")
        out.update(width_mm=w * 1000.0, height_mm=h * 1000.0)
    if "ScreenDistance" in sp:
        d = sp["ScreenDistance"]
        if isinstance(d, bool) or not isinstance(d, (int, float)) or not d > 0:
            raise InputFormatError(f"{source}: key 'StimulusPresentation.ScreenDistance': "
                                   f"found {d!r}, expected a positive number of metres")
        if d > _MAX_METRES:
            raise InputFormatError(f"{source}: key 'StimulusPresentation.ScreenDistance': "
                                   f"found {d!r}, expected metres (BIDS); is it in "
                                   "centimetres?")
        out["distance_mm"] = float(d) * 1000.0
    _origin(sp, source)  # validated here so that a bad origin fails early
    return out


def _is_time_name(name: str) -> bool:
    low = name.lower()
    return (low in ("time", "timestamp") or low.startswith(("time_", "timestamp_"))
            or low.endswith(("_time", "_timestamp")))


def _time_column(columns: list[str]) -> str | None:
    if "timestamp" in columns:
        return "timestamp"
    return next((c for c in columns if _is_time_name(c)), None)


def _rate(side: Mapping, source: Path, *, required: bool) -> float:
    fs = side.get("SamplingFrequency")
    if fs is None and not required:
        return 0.0
    if isinstance(fs, bool) or not isinstance(fs, (int, float)) or not fs > 0:
        why = " (needed: the file has no timestamp column)" if required else ""
        raise InputFormatError(f"{source}: key 'SamplingFrequency': found {fs!r}, expected a "
                               f"positive number of Hz{why}")
    return float(fs)


def _peek_column(path: Path, columns: list[str], name: str, n: int = 200) -> np.ndarray:
    """The first ``n`` values of one column (for unit inference)."""
    try:
        head = pd.read_csv(path, sep="\t", header=None, names=columns, usecols=[name],
                           nrows=n, na_values=["n/a"], keep_default_na=True)
    except Exception as e:  # pandas raises several types; one message is enough
        raise InputFormatError(f"{path}: cannot read as tab-separated text ({e})") from None
    return pd.to_numeric(head[name], errors="coerce").to_numpy(dtype=float)


def _time_unit(path: Path, side_path: Path, side: Mapping, columns: list[str],
               name: str, rate_hz: float) -> str:
    meta = side.get(name)
    units = meta.get("Units") if isinstance(meta, dict) else None
    if units is not None:
        unit = _UNIT_WORDS.get(str(units).strip().lower())
        if unit is None:
            raise InputFormatError(f"{side_path}: key '{name}.Units': found {units!r}, "
                                   "expected s, ms, us or ns")
        return unit
    if rate_hz <= 0:
        raise InputFormatError(f"{side_path}: the unit of column '{name}' is unknown; "
                               f"give '{name}': {{\"Units\": \"ms\"}} or SamplingFrequency")
    t = _peek_column(path, columns, name)
    steps = np.diff(t[np.isfinite(t)])
    steps = steps[steps > 0]
    if len(steps) == 0:
        raise InputFormatError(f"{path}: cannot infer the unit of column '{name}' (no "
                               f"increasing times at the start); give '{name}': "
                               "{\"Units\": ...} in the sidecar")
    per_sample = float(np.median(steps)) * rate_hz  # time units per second
    for unit, scale in _UNIT_PER_S.items():
        if scale / 2 <= per_sample <= scale * 2:
            return unit
    raise InputFormatError(f"{path}: cannot infer the unit of column '{name}' (median step "
                           f"{np.median(steps):g} at {rate_hz:g} Hz fits none of s, ms, us, "
                           f"ns); give '{name}': {{\"Units\": ...}} in the sidecar")


def _check_coordinates(side_path: Path, side: Mapping, names: list[str]) -> None:
    system = side.get("SampleCoordinateSystem")
    if system is not None and str(system).strip().lower() != "gaze-on-screen":
        raise InputFormatError(f"{side_path}: key 'SampleCoordinateSystem': found {system!r}, "
                               "expected 'gaze-on-screen' (aoi_fix needs gaze on the screen "
                               "in pixels)")
    unit_keys = [("SampleCoordinateUnits", side.get("SampleCoordinateUnits"))]
    unit_keys += [(f"{n}.Units", side[n].get("Units")) for n in names
                  if isinstance(side.get(n), dict)]
    for key, units in unit_keys:
        if units is not None and str(units).strip().lower() not in _PIXEL_WORDS:
            raise InputFormatError(f"{side_path}: key '{key}': found {units!r}, expected "
                                   "'pixel' (aoi_fix needs gaze on the screen in pixels)")


def bids_samples_section(path: str | Path) -> dict:
    """``[samples]`` keys that describe a BIDS recording's layout (see the module docstring).

    Returns
    -------
    dict
        ``time``, ``time_unit``, ``x``/``y`` or per-eye ``x_left`` ...,
        ``coords = "px"``, ``delimiter = "\\t"``, ``decimal = "."``,
        ``rate_hz`` (``SamplingFrequency``; 0 when absent and a timestamp
        column exists).
    """
    path = Path(path)
    side_path, side = _sidecar(path)
    columns = side["Columns"]
    tcol = _time_column(columns)
    rate_hz = _rate(side, side_path, required=tcol is None)
    out: dict[str, Any] = {"coords": "px", "delimiter": "\t", "decimal": ".",
                           "rate_hz": rate_hz}
    if tcol is None:
        start = side.get("StartTime")
        if isinstance(start, bool) or not isinstance(start, (int, float)):
            raise InputFormatError(f"{side_path}: key 'StartTime': found {start!r}, expected a "
                                   "number of seconds (needed: the file has no timestamp "
                                   "column)")
        out.update(time=SYNTHETIC_TIME, time_unit="s")
    else:
        out.update(time=tcol, time_unit=_time_unit(path, side_path, side, columns, tcol,
                                                   rate_hz))
    if "x_coordinate" in columns or "y_coordinate" in columns:
        names = ["x_coordinate", "y_coordinate"]
        out.update(x="x_coordinate", y="y_coordinate")
    else:
        eyes = [e for e, (xn, yn) in _PER_EYE.items() if xn in columns or yn in columns]
        recorded = str(side.get("RecordedEye", "")).strip().lower()
        if recorded in ("left", "right") and recorded in eyes:
            eyes = [recorded]
        if not eyes:
            raise InputFormatError(f"{side_path}: key 'Columns': no gaze columns; expected "
                                   "'x_coordinate' and 'y_coordinate' (or per-eye "
                                   "'x_coordinate_left'/'y_coordinate_left', "
                                   "'x_coordinate_right'/'y_coordinate_right'); found "
                                   + ", ".join(columns))
        names = []
        for e in eyes:
            xn, yn = _PER_EYE[e]
            out[f"x_{e}"], out[f"y_{e}"] = xn, yn
            names += [xn, yn]
    missing = [n for n in names if n not in columns]
    if missing:
        raise InputFormatError(f"{side_path}: key 'Columns': column '{missing[0]}' is missing; "
                               "found " + ", ".join(columns))
    _check_coordinates(side_path, side, names)
    return out


def study_for_bids(physio_path: str | Path, base_study: Mapping) -> dict:
    """A study dict for a BIDS recording: ``[samples]`` and ``[display]`` from its sidecars.

    Parameters
    ----------
    physio_path : path
        The ``*_physio.tsv.gz`` recording.
    base_study : mapping
        A parsed study file (e.g. ``tomllib.load``), which need not have
        ``[samples]`` or ``[display]``.

    Returns
    -------
    dict
        A copy of ``base_study`` for :func:`aoi_fix.config.study_from_dict`
        (which validates it and applies ``--set`` overrides).  The layout keys
        of ``[samples]`` (columns, ``time_unit``, ``coords``, ``delimiter``,
        ``decimal``, ``rate_hz``, validity keys) come from the recording; the
        base's ``max_offscreen_frac`` and ``missing_values`` are kept, with
        ``n/a`` always among the missing values.  ``[display]`` keys found in
        the sidecars replace the base's; the base fills the ones not found.

    Raises
    ------
    ConfigError
        A display key is found neither in the sidecars nor in the study.
    InputFormatError
        A missing or malformed sidecar.
    """
    physio_path = Path(physio_path)
    data = copy.deepcopy(dict(base_study))
    layout = bids_samples_section(physio_path)
    base_samples = data.get("samples", {})
    if not isinstance(base_samples, Mapping):
        raise ConfigError("study section '[samples]': expected a table of keys, found "
                          f"{type(base_samples).__name__}")
    samples = {k: v for k, v in base_samples.items() if k not in _LAYOUT_KEYS}
    samples.update(layout)
    missing = list(samples.get("missing_values",
                               SampleColumns.__dataclass_fields__["missing_values"]
                               .default_factory()))
    samples["missing_values"] = missing if "n/a" in missing else [*missing, "n/a"]
    data["samples"] = samples
    base_display = data.get("display", {})
    if not isinstance(base_display, Mapping):
        raise ConfigError("study section '[display]': expected a table of keys, found "
                          f"{type(base_display).__name__}")
    display = {**base_display, **bids_display(physio_path)}
    need = [f.name for f in Display.__dataclass_fields__.values()]
    absent = [k for k in need if k not in display]
    if absent:
        raise ConfigError(f"{physio_path}: no value for display.{absent[0]}: expected "
                          "StimulusPresentation (ScreenResolution, ScreenSize, "
                          "ScreenDistance) in an events sidecar (*_events.json) or "
                          "[display] in the study")
    data["display"] = display
    return data


def _line_error(path: Path, columns: list[str], numeric: list[str], missing: set) -> str:
    """Find the first bad line of a file pyarrow refused (error path only)."""
    idx = {n: columns.index(n) for n in numeric}
    try:
        fh = gzip.open(path, "rt", encoding="utf-8", newline="") if path.suffix == ".gz" \
            else open(path, encoding="utf-8", newline="")
        with fh:
            for lineno, line in enumerate(fh, start=1):
                line = line.rstrip("\r\n")
                if not line:
                    continue
                cells = line.split("\t")
                if len(cells) != len(columns):
                    return (f"{path}: line {lineno}: found {len(cells)} fields, expected "
                            f"{len(columns)} (the sidecar's Columns)")
                for name, i in idx.items():
                    cell = cells[i].strip()
                    if cell in missing:
                        continue
                    try:
                        float(cell)
                    except ValueError:
                        return (f"{path}: line {lineno}, column '{name}': found {cell!r}, "
                                "expected a number or n/a")
    except (OSError, EOFError, UnicodeDecodeError) as e:
        return f"{path}: cannot read as gzip-compressed UTF-8 text ({e})"
    return f"{path}: cannot parse as tab-separated text"


def read_physio(path: str | Path, cols: SampleColumns, display: Display) -> pd.DataFrame:
    """Read a BIDS ``*_physio.tsv.gz`` into the tidy sample frame.

    Parameters
    ----------
    path : path
        The headerless recording; its sidecar gives the column names.
    cols : SampleColumns
        Usually from :func:`study_for_bids` (columns named as in the
        sidecar's ``Columns``, or :data:`SYNTHETIC_TIME` for the time).
    display : Display

    Returns
    -------
    DataFrame
        The tidy frame of :func:`aoi_fix.samples.tidy_samples`.  Error
        messages count lines from 1 (there is no header).

    Raises
    ------
    InputFormatError
        A missing file or sidecar, a column not in ``Columns``, a row with
        the wrong number of fields or text in a number column (naming the line).
    NoValidSamplesError
        No sample has a valid gaze position.
    """
    import pyarrow as pa
    import pyarrow.csv as pcsv

    from .samples import require_samples_file, tidy_samples

    path = require_samples_file(path)
    side_path, side = _sidecar(path)
    columns = side["Columns"]
    wanted = [getattr(cols, r) for r in ("time", "x", "y", "x_left", "y_left", "x_right",
                                         "y_right", "valid", "valid_left", "valid_right")
              if getattr(cols, r)]
    synthetic = cols.time == SYNTHETIC_TIME and SYNTHETIC_TIME not in columns
    needed = [n for n in dict.fromkeys(wanted) if not (synthetic and n == SYNTHETIC_TIME)]
    for n in needed:
        if n not in columns:
            raise InputFormatError(f"{side_path}: key 'Columns': column '{n}' is missing; "
                                   "found " + ", ".join(columns))
    positions = [getattr(cols, r) for r in ("x", "y", "x_left", "y_left", "x_right",
                                            "y_right") if getattr(cols, r)]
    missing = set(cols.missing_values) | {"n/a"}
    convert = pcsv.ConvertOptions(
        include_columns=needed, column_types={n: pa.float64() for n in positions},
        null_values=sorted(missing), strings_can_be_null=True)
    read = pcsv.ReadOptions(column_names=columns, block_size=1 << 22)
    parse = pcsv.ParseOptions(delimiter="\t")
    numeric = positions + ([] if synthetic else [cols.time])
    try:
        table = pcsv.read_csv(path, read_options=read, parse_options=parse,
                              convert_options=convert)
    except (pa.ArrowInvalid, pa.ArrowTypeError, UnicodeDecodeError, EOFError, OSError):
        raise InputFormatError(_line_error(path, columns, numeric, missing)) from None
    if not synthetic:
        tcol = table.column(cols.time)
        if not (pa.types.is_integer(tcol.type) or pa.types.is_floating(tcol.type)
                or pa.types.is_null(tcol.type)):
            raise InputFormatError(_line_error(path, columns, numeric, missing))
    raw = table.to_pandas()
    if synthetic:
        rate = _rate(side, side_path, required=True)
        start = float(side.get("StartTime", 0.0))
        raw[SYNTHETIC_TIME] = start + np.arange(len(raw), dtype=float) / rate
    sp, source = _presentation(path, side)
    if _origin(sp, source) == "bottom-left":
        for n in positions:
            if n.startswith("y_"):
                raw[n] = display.height_px - raw[n].to_numpy(dtype=float, na_value=np.nan)
    tidy = tidy_samples(raw, cols, display, source=str(path), line_of=lambda i: i + 1)
    if not tidy["valid"].any():
        raise NoValidSamplesError(f"{path}: none of the {len(tidy)} samples has a valid gaze "
                                  "position (all n/a or off the screen?)")
    return tidy


def read_bids_samples(path: str | Path) -> tuple[pd.DataFrame, Display, SampleColumns]:
    """Read a BIDS eye-tracking recording with nothing but its sidecars.

    Returns
    -------
    (DataFrame, Display, SampleColumns)
        The tidy sample frame, the display from the stimulus-presentation
        metadata, and the ``[samples]`` section that describes the file.

    Raises
    ------
    ConfigError
        The sidecars lack part of the screen geometry (use
        :func:`study_for_bids` with a study that has ``[display]``).
    InputFormatError, NoValidSamplesError
        As :func:`read_physio`.
    """
    data = study_for_bids(path, {})
    study = study_from_dict(data, source=str(physio_sidecar_path(path)))
    return read_physio(path, study.samples, study.display), study.display, study.samples

