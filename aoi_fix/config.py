"""The study file: frozen dataclasses built and validated in one place.

A study file is TOML with the sections ``[display]``, ``[samples]``,
``[detection]``, ``[aois]``, ``[quality]``, ``[sweep]`` and one
``[stimuli.NAME]`` table per video.  Every key is documented in
``docs/parameters.md``; every key has a default except the display geometry,
the sample column names and each stimulus' size and frame rate.

Overrides given as ``section.key=value`` (``--set`` on the command line)
are applied before validation, with the same type checks as the file.
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Mapping

from .errors import ConfigError, OverrideError, UsageError, read_text

__all__ = [
    "Display",
    "SampleColumns",
    "Detection",
    "AoiOptions",
    "Quality",
    "SweepOptions",
    "Stimulus",
    "Study",
    "load_study",
    "read_study_dict",
    "study_from_dict",
    "parse_override",
    "apply_overrides",
]

REQUIRED = dataclasses.MISSING


def _opt(default=REQUIRED, *, doc: str, choices: tuple | None = None,
         min: float | None = None, min_inclusive: bool = True,
         max: float | None = None, kind: type | None = None):
    meta = {"doc": doc, "choices": choices, "min": min,
            "min_inclusive": min_inclusive, "max": max, "kind": kind}
    if isinstance(default, list):
        return field(default_factory=lambda d=tuple(default): d, metadata=meta)
    if default is REQUIRED:
        return field(metadata=meta)
    return field(default=default, metadata=meta)


@dataclass(frozen=True)
class Display:
    """Where the gaze lands: the display's size in pixels and mm, and the eye's distance."""

    width_px: int = _opt(doc="display width in pixels", min=1)
    height_px: int = _opt(doc="display height in pixels", min=1)
    width_mm: float = _opt(doc="visible display width in mm", min=0, min_inclusive=False)
    height_mm: float = _opt(doc="visible display height in mm", min=0, min_inclusive=False)
    distance_mm: float = _opt(doc="eye to display-centre distance in mm", min=0,
                              min_inclusive=False)


@dataclass(frozen=True)
class SampleColumns:
    """How to read a raw sample file: column names, units and text conventions."""

    time: str = _opt(doc="name of the timestamp column")
    time_unit: str = _opt("ms", doc="unit of the timestamps", choices=("s", "ms", "us", "ns"))
    x: str = _opt("", doc="gaze x column (monocular or already combined)")
    y: str = _opt("", doc="gaze y column")
    x_left: str = _opt("", doc="left-eye x column (binocular)")
    y_left: str = _opt("", doc="left-eye y column")
    x_right: str = _opt("", doc="right-eye x column")
    y_right: str = _opt("", doc="right-eye y column")
    valid: str = _opt("", doc="validity column for x/y (nonzero or true = valid)")
    valid_left: str = _opt("", doc="left-eye validity column")
    valid_right: str = _opt("", doc="right-eye validity column")
    valid_codes: tuple = _opt([], doc="if set, the validity values that mean valid "
                                      "(instead of nonzero/true)", kind=str)
    coords: str = _opt("px", doc="px = display pixels; norm = 0..1 of the display",
                       choices=("px", "norm"))
    delimiter: str = _opt("auto", doc="field delimiter", choices=("auto", ",", ";", "\t"))
    decimal: str = _opt(".", doc="decimal mark", choices=(".", ","))
    missing_values: tuple = _opt(["", "NaN", "nan", "NA", "n/a", "N/A", "null", "-"],
                                 doc="cell texts that mean missing gaze", kind=str)
    max_offscreen_frac: float = _opt(0.5, doc="a position farther outside the display than "
                                             "this fraction of its size is invalid", min=0)
    rate_hz: float = _opt(0.0, doc="nominal sampling rate; 0 = median of the time steps",
                          min=0)

    @property
    def binocular(self) -> bool:
        return bool(self.x_left or self.x_right)


@dataclass(frozen=True)
class Detection:
    """Fixation detection: method, thresholds and post-processing."""

    method: str = _opt("ivt", doc="ivt (velocity), idt (dispersion) or ivt_pursuit (velocity "
                                  "for saccades, fitted gaze speed for pursuit)",
                       choices=("ivt", "idt", "ivt_pursuit"))
    velocity_threshold_deg_s: float = _opt(
        30.0, doc="I-VT: lowest velocity threshold; raised to noise_factor x the "
                  "measured noise velocity when the data are noisier", min=0,
        min_inclusive=False)
    noise_factor: float = _opt(
        5.0, doc="I-VT: the threshold is at least this many robust SDs of the "
                 "velocity noise (0 = fixed threshold only)", min=0)
    velocity_window_ms: float = _opt(20.0, doc="I-VT: span of the central difference "
                                               "used for velocity", min=0)
    smoothing: str = _opt("none", doc="position smoothing before velocity",
                          choices=("none", "savgol"))
    smoothing_window_ms: float = _opt(20.0, doc="Savitzky-Golay window span", min=0,
                                      min_inclusive=False)
    dispersion_threshold_deg: float = _opt(1.0, doc="I-DT: largest dispersion "
                                                    "(x range + y range)", min=0,
                                           min_inclusive=False)
    min_fixation_ms: float = _opt(60.0, doc="shorter fixations are discarded "
                                           "(I-DT: also the initial window)", min=0)
    max_gap_ms: float = _opt(75.0, doc="dropouts up to this long are interpolated; "
                                       "longer ones stay losses", min=0)
    merge_max_gap_ms: float = _opt(75.0, doc="fixations separated by at most this "
                                             "much time ...", min=0)
    merge_max_angle_deg: float = _opt(1.0, doc="... and at most this angle are merged "
                                               "(0 = never merge)", min=0)
    saccade_threshold_deg_s: float = _opt(
        60.0, doc="ivt_pursuit: lowest saccade threshold (velocity_threshold_deg_s is then "
                  "the lower onset threshold a saccade's flanks are followed down to)",
        min=0, min_inclusive=False)
    pursuit_window_ms: float = _opt(200.0, doc="ivt_pursuit: window of the fitted gaze "
                                               "speed", min=0, min_inclusive=False)
    pursuit_min_speed_deg_s: float = _opt(1.5, doc="ivt_pursuit: slowest movement called "
                                                   "pursuit", min=0)
    pursuit_z: float = _opt(3.5, doc="ivt_pursuit: the fitted speed must be this many "
                                     "standard errors above zero", min=0)
    min_pursuit_ms: float = _opt(100.0, doc="ivt_pursuit: shorter pursuits become "
                                            "fixation; must exceed merge_max_gap_ms", min=0)


@dataclass(frozen=True)
class AoiOptions:
    """AOI matching."""

    margin_deg: float = _opt(0.0, doc="margin added around every AOI, in degrees", min=0)
    priority: tuple = _opt([], doc="order in which overlapping AOIs win; empty = "
                                   "smallest area first", kind=str)
    looking_events: str = _opt("fixation", doc="what counts as looking time in the AOI "
                                               "tables: fixation only, or fixation and "
                                               "pursuit (ivt_pursuit)",
                               choices=("fixation", "fixation+pursuit"))
    position_window_ms: float = _opt(
        100.0, doc="each fixation sample is matched at its position averaged over this "
                   "window within its fixation (0 = the raw sample position)", min=0)


@dataclass(frozen=True)
class Quality:
    """Data-quality rules and flags."""

    min_valid_fraction: float = _opt(0.5, doc="flag_low_validity below this share of "
                                              "valid samples", min=0, max=1)
    max_offset_deg: float = _opt(1.5, doc="flag_drift above this modelled offset", min=0)
    correct_offset: bool = _opt(False, doc="subtract the modelled drift before AOI matching")
    check_max_offset_deg: float = _opt(5.0, doc="a check fixation farther than this from "
                                                "its target is not used", min=0,
                                       min_inclusive=False)
    exclude_low_validity: bool = _opt(True, doc="session tables: drop trials with "
                                                "flag_low_validity (listed in exclusions)")
    exclude_drift: bool = _opt(True, doc="session tables: drop trials with flag_drift "
                                         "(listed in exclusions)")
    min_trial_fixation_ms: float = _opt(0.0, doc="session tables: drop trials with less "
                                                 "fixation time than this (0 = none)", min=0)
    min_session_trials: int = _opt(1, doc="session tables: drop a session with fewer "
                                          "usable trials than this", min=0)


@dataclass(frozen=True)
class SweepOptions:
    """Threshold sweeps."""

    max_range_pct: float = _opt(10.0, doc="flag a trial x AOI whose pct_fixation range "
                                          "across settings exceeds this", min=0)


@dataclass(frozen=True)
class Stimulus:
    """One video: frame rate and frame size."""

    fps: float = _opt(doc="frames per second", min=0, min_inclusive=False)
    width_px: int = _opt(doc="video frame width in pixels", min=1)
    height_px: int = _opt(doc="video frame height in pixels", min=1)


SECTIONS: dict[str, type] = {
    "display": Display,
    "samples": SampleColumns,
    "detection": Detection,
    "aois": AoiOptions,
    "quality": Quality,
    "sweep": SweepOptions,
}


@dataclass(frozen=True)
class Study:
    """Everything a run needs to know besides the data files."""

    display: Display
    samples: SampleColumns
    detection: Detection = field(default_factory=Detection)
    aois: AoiOptions = field(default_factory=AoiOptions)
    quality: Quality = field(default_factory=Quality)
    sweep: SweepOptions = field(default_factory=SweepOptions)
    stimuli: Mapping[str, Stimulus] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """Plain nested dict (for the manifest and for round trips)."""
        out: dict[str, Any] = {}
        for name in SECTIONS:
            out[name] = {k: (list(v) if isinstance(v, tuple) else v)
                         for k, v in dataclasses.asdict(getattr(self, name)).items()}
        out["stimuli"] = {k: dataclasses.asdict(v) for k, v in self.stimuli.items()}
        return out

    def replace(self, **sections) -> "Study":
        return dataclasses.replace(self, **sections)


# --------------------------------------------------------------------------- validation

def _type_name(f: dataclasses.Field) -> str:
    t = f.type if isinstance(f.type, str) else getattr(f.type, "__name__", str(f.type))
    return {"tuple": "list of strings"}.get(t, t)


def _check_value(cls: type, f: dataclasses.Field, value: Any, where: str) -> Any:
    t = f.type if isinstance(f.type, str) else f.type.__name__
    meta = f.metadata
    key = f"{where}.{f.name}"
    bad = None
    if t == "bool":
        if not isinstance(value, bool):
            bad = "true or false"
    elif t == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            if isinstance(value, float) and value.is_integer():
                value = int(value)
            else:
                bad = "an integer"
    elif t == "float":
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            bad = "a number"
        else:
            value = float(value)
            if not math.isfinite(value):
                bad = "a finite number"
    elif t == "str":
        if not isinstance(value, str):
            bad = "a string"
    elif t == "tuple":
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, (list, tuple)) or not all(isinstance(v, (str, int, float))
                                                           and not isinstance(v, bool)
                                                           for v in value):
            bad = "a list of strings"
        else:
            value = tuple(str(v) for v in value)
    if bad:
        raise ConfigError(f"study key '{key}': found {value!r}, expected {bad}")
    choices = meta.get("choices")
    if choices and value not in choices:
        raise ConfigError(f"study key '{key}': found {value!r}, expected one of "
                          + ", ".join(repr(c) for c in choices))
    lo, hi = meta.get("min"), meta.get("max")
    if lo is not None and t in ("int", "float"):
        if value < lo or (value == lo and not meta.get("min_inclusive", True)):
            cmp = ">=" if meta.get("min_inclusive", True) else ">"
            raise ConfigError(f"study key '{key}': found {value!r}, expected a value {cmp} {lo}")
    if hi is not None and t in ("int", "float") and value > hi:
        raise ConfigError(f"study key '{key}': found {value!r}, expected a value <= {hi}")
    return value


def _build(cls: type, data: Mapping[str, Any], where: str):
    if not isinstance(data, Mapping):
        raise ConfigError(f"study section '[{where}]': expected a table of keys, "
                          f"found {type(data).__name__}")
    fields = {f.name: f for f in dataclasses.fields(cls)}
    for k in data:
        if k not in fields:
            raise ConfigError(f"study key '{where}.{k}' is unknown; valid keys of "
                              f"[{where}]: {', '.join(fields)}")
    kwargs = {}
    for name, f in fields.items():
        if name in data:
            kwargs[name] = _check_value(cls, f, data[name], where)
        elif f.default is REQUIRED and f.default_factory is REQUIRED:
            raise ConfigError(f"study key '{where}.{name}' is missing; expected "
                              f"{_type_name(f)}: {f.metadata['doc']}")
    return cls(**kwargs)


def _validate_samples(s: SampleColumns) -> SampleColumns:
    mono = bool(s.x or s.y)
    bino = bool(s.x_left or s.y_left or s.x_right or s.y_right)
    if not mono and not bino:
        raise ConfigError("study section [samples]: no gaze columns; expected 'x' and 'y' "
                          "or 'x_left'/'y_left' and/or 'x_right'/'y_right'")
    if mono and bino:
        raise ConfigError("study section [samples]: give either 'x'/'y' or per-eye columns, "
                          "not both")
    if mono and not (s.x and s.y):
        raise ConfigError("study section [samples]: 'x' and 'y' must both be given")
    for eye in ("left", "right"):
        xs, ys = getattr(s, f"x_{eye}"), getattr(s, f"y_{eye}")
        if bool(xs) != bool(ys):
            raise ConfigError(f"study section [samples]: 'x_{eye}' and 'y_{eye}' must both "
                              "be given")
    return s


def study_from_dict(data: Mapping[str, Any], *, source: str = "study",
                    overrides: Iterable[str] = ()) -> Study:
    """Build and validate a :class:`Study` from a nested dict (e.g. parsed TOML).

    ``overrides`` are ``section.key=value`` strings applied before validation.
    """
    data = {k: (dict(v) if isinstance(v, Mapping) else v) for k, v in data.items()}
    if "stimuli" in data and isinstance(data["stimuli"], Mapping):
        data["stimuli"] = {k: (dict(v) if isinstance(v, Mapping) else v)
                           for k, v in data["stimuli"].items()}
    overrides = list(overrides)
    data = apply_overrides(data, overrides)
    valid_sections = list(SECTIONS) + ["stimuli"]
    for k in data:
        if k not in valid_sections:
            raise ConfigError(f"{source}: section '[{k}]' is unknown; valid sections: "
                              + ", ".join(valid_sections))
    try:
        for req in ("display", "samples"):
            if req not in data:
                raise ConfigError(f"study section '[{req}]' is missing")
        parts = {name: _build(cls, data.get(name, {}), name) for name, cls in SECTIONS.items()}
        _validate_samples(parts["samples"])
        det = parts["detection"]
        if det.method == "ivt_pursuit" and det.min_pursuit_ms <= det.merge_max_gap_ms:
            raise ConfigError("study key 'detection.min_pursuit_ms': found "
                              f"{det.min_pursuit_ms:g}, expected a value > "
                              f"detection.merge_max_gap_ms ({det.merge_max_gap_ms:g}) so that "
                              "merging never swallows a pursuit")
        stim_raw = data.get("stimuli", {})
        if not isinstance(stim_raw, Mapping):
            raise ConfigError("study section '[stimuli]': expected one table per video, "
                              "e.g. [stimuli.story1]")
        stimuli = {str(name): _build(Stimulus, tbl, f"stimuli.{name}")
                   for name, tbl in stim_raw.items()}
    except ConfigError as e:
        for text in overrides:  # a value typed on the command line is a usage error
            if f"study key '{text.split('=', 1)[0].strip()}'" in str(e):
                raise OverrideError(f"--set '{text}': {e}") from None
        raise ConfigError(f"{source}: {e}") from None
    return Study(stimuli=stimuli, **parts)


def read_study_dict(path: str | Path) -> dict:
    """Parse a TOML study file into a nested dict (no validation yet).

    Raises
    ------
    ConfigError
        A missing or unreadable file, or malformed TOML.
    """
    path = Path(path)
    text = read_text(path, what="study file", expected="a TOML study file", error=ConfigError)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise ConfigError(f"{path}: malformed TOML: {e}") from None
    return data


def load_study(path: str | Path, overrides: Iterable[str] = ()) -> Study:
    """Read a TOML study file and apply ``section.key=value`` overrides.

    Raises
    ------
    ConfigError
        Malformed TOML, an unknown section or key, a wrong type or value.
    UsageError
        A malformed or unknown override.
    """
    path = Path(path)
    data = read_study_dict(path)
    return study_from_dict(data, source=str(path), overrides=overrides)


# --------------------------------------------------------------------------- overrides

def _field_for(section: str, key: str) -> dataclasses.Field:
    cls = Stimulus if section.startswith("stimuli.") else SECTIONS.get(section)
    if cls is None:
        raise UsageError(f"--set '{section}.{key}': unknown section '{section}'; valid "
                         "sections: " + ", ".join(list(SECTIONS) + ["stimuli.NAME"]))
    fields = {f.name: f for f in dataclasses.fields(cls)}
    if key not in fields:
        raise UsageError(f"--set '{section}.{key}': unknown key; valid keys of "
                         f"[{section}]: {', '.join(fields)}")
    return fields[key]


def parse_override(text: str) -> tuple[str, str, Any]:
    """Split ``section.key=value`` and convert the value to the key's type.

    >>> parse_override("detection.velocity_threshold_deg_s=40")
    ('detection', 'velocity_threshold_deg_s', 40.0)
    """
    if "=" not in text:
        raise UsageError(f"--set '{text}': expected section.key=value")
    lhs, raw = text.split("=", 1)
    if "." not in lhs:
        raise UsageError(f"--set '{text}': expected section.key=value")
    section, key = lhs.strip().rsplit(".", 1)
    f = _field_for(section, key)
    t = f.type if isinstance(f.type, str) else f.type.__name__
    raw = raw.strip()
    try:
        if t == "bool":
            low = raw.lower()
            if low not in ("true", "false", "1", "0", "yes", "no"):
                raise ValueError
            value: Any = low in ("true", "1", "yes")
        elif t == "int":
            value = int(raw)
        elif t == "float":
            value = float(raw)
            if not math.isfinite(value):
                raise ValueError
        elif t == "tuple":
            value = tuple(v.strip() for v in raw.split(",") if v.strip())
        else:
            value = {"\\t": "\t", "tab": "\t"}.get(raw, raw) if key == "delimiter" else raw
    except ValueError:
        raise UsageError(f"--set '{text}': found {raw!r}, expected {_type_name(f)}") from None
    return section, key, value


def apply_overrides(data: dict, overrides: Iterable[str]) -> dict:
    """Return a copy of the nested study dict with overrides applied."""
    data = {k: (dict(v) if isinstance(v, dict) else v) for k, v in data.items()}
    for text in overrides:
        section, key, value = parse_override(text)
        target = data.get("stimuli" if section.startswith("stimuli.") else section, {})
        if not isinstance(target, dict):
            raise ConfigError(f"study section '[{section.split('.')[0]}]': expected a table of "
                              f"keys, found {type(target).__name__}")
        if section.startswith("stimuli."):
            name = section.split(".", 1)[1]
            stim = dict(data.setdefault("stimuli", {}))
            if not isinstance(stim.get(name, {}), dict):
                raise ConfigError(f"study section '[{section}]': expected a table of keys")
            stim[name] = dict(stim.get(name, {}))
            stim[name][key] = value
            data["stimuli"] = stim
        else:
            sec = dict(data.get(section, {}))
            sec[key] = value
            data[section] = sec
    return data
