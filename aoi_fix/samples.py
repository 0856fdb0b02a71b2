"""Read any tracker's raw sample file into one tidy frame.

The tidy frame has one row per input row, in file order::

    t_ms   float64  time on the recording's own clock, in ms
    x_px   float64  gaze on the display in px (NaN when not valid)
    y_px   float64
    valid  bool     a usable gaze position exists for this sample

Binocular files also keep ``x_left_px, y_left_px, valid_left`` and the right-eye
equivalents; ``x_px/y_px`` is then the mean of the eyes where both are valid
and the valid eye where only one is.

A sample is invalid when its position cell is empty or one of
``[samples] missing_values``, when its validity column says so, when the
position is not finite, or when it lies farther outside the display than
``max_offscreen_frac`` of the display's size (a tracker's "lost" sentinel).
Invalid samples are kept (never dropped) so that every row is accounted for.
"""

from __future__ import annotations

import csv
import gzip
import io
import logging
from pathlib import Path

import numpy as np
import pandas as pd

from .config import Display, SampleColumns
from .errors import InputFormatError, NoValidSamplesError

__all__ = ["read_samples", "tidy_samples", "nominal_interval_ms", "TIME_SCALE_MS"]

log = logging.getLogger(__name__)

#: Multiply a timestamp in this unit by the factor to get ms.
TIME_SCALE_MS = {"s": 1000.0, "ms": 1.0, "us": 1e-3, "ns": 1e-6}

_TRUE_TEXT = {"true", "t", "yes", "y", "valid"}
_FALSE_TEXT = {"false", "f", "no", "n", "invalid", ""}


def _shown(value) -> str:
    """A parsed cell for a message: numbers as written, text quoted, missing said so."""
    if value is None or value is pd.NA or (isinstance(value, float) and value != value):
        return "no value (an empty cell or one of [samples] missing_values)"
    if isinstance(value, float):
        return f"{value:g}"
    return repr(str(value))


def _skip_blank_row(row) -> str:
    return "skip" if not row.text.strip() else "error"


def _open_text(path: Path):
    if path.suffix == ".gz":
        return io.TextIOWrapper(gzip.open(path, "rb"), encoding="utf-8-sig", newline="")
    return open(path, encoding="utf-8-sig", newline="")


def _head_line(path: Path) -> tuple[str, int]:
    """The header line and the number of blank lines before it."""
    try:
        with _open_text(path) as fh:
            for before, line in enumerate(fh):
                if line.strip():
                    return line.rstrip("\r\n"), before
    except UnicodeDecodeError as e:
        raise InputFormatError(f"{path}: not UTF-8 text (byte {e.start}); expected a "
                               "delimited text file") from None
    except (OSError, EOFError) as e:
        raise InputFormatError(f"{path}: cannot read ({e})") from None
    raise InputFormatError(f"{path}: the file is empty; expected a header line and samples")


def _sniff_delimiter(header: str, cols: SampleColumns, path: Path) -> str:
    if cols.delimiter != "auto":
        return cols.delimiter
    candidates = ["\t", ";", ","] if cols.decimal == "," else [",", "\t", ";"]
    if cols.decimal == ",":
        candidates.remove(",")
    best = max(candidates, key=lambda d: len(header.split(d)))
    if len(header.split(best)) < 2:
        raise InputFormatError(f"{path}: line 1: cannot tell the delimiter (tried comma, "
                               "semicolon, tab); set [samples] delimiter")
    return best


def _needed_columns(cols: SampleColumns) -> dict[str, str]:
    """Role -> column name for every column the study names."""
    roles = ["time", "x", "y", "x_left", "y_left", "x_right", "y_right",
             "valid", "valid_left", "valid_right"]
    return {r: getattr(cols, r) for r in roles if getattr(cols, r)}


def _diagnose(path: Path, delimiter: str, decimal: str, header: list[str],
              numeric: list[str], missing: set[str]) -> str:
    """Find the first bad line in a file pyarrow refused (error path only)."""
    idx = {name: header.index(name) for name in numeric}
    with _open_text(path) as fh:
        reader = csv.reader(fh, delimiter=delimiter)
        header_seen = False
        for row in reader:
            lineno = reader.line_num
            if not row or all(not c.strip() for c in row):
                continue
            if not header_seen:
                header_seen = True
                continue
            if len(row) != len(header):
                return (f"{path}: line {lineno}: found {len(row)} fields, expected "
                        f"{len(header)} (row cut off, or a different delimiter?)")
            for name, i in idx.items():
                cell = row[i].strip()
                if cell in missing:
                    continue
                text = cell.replace(decimal, ".") if decimal == "," else cell
                try:
                    float(text)
                except ValueError:
                    return (f"{path}: line {lineno}, column '{name}': found {cell!r}, "
                            f"expected a number with decimal mark '{decimal}'")
    return f"{path}: cannot parse as delimited text with delimiter {delimiter!r}"


def _read_table(path: Path, cols: SampleColumns) -> pd.DataFrame:
    """Read only the named columns as a DataFrame (pyarrow engine)."""
    import pyarrow as pa

    needed = _needed_columns(cols)
    names = list(dict.fromkeys(needed.values()))
    if path.suffix == ".parquet":
        import pyarrow.parquet as pq
        try:
            schema = pq.read_schema(path)
        except Exception as e:  # pyarrow raises several types here
            raise InputFormatError(f"{path}: not a readable Parquet file ({e})") from None
        missing_cols = [n for n in names if n not in schema.names]
        if missing_cols:
            raise InputFormatError(f"{path}: column '{missing_cols[0]}' is missing; "
                                   f"found columns: {', '.join(schema.names)}")
        return _owned_columns(pq.read_table(path, columns=names))

    import pyarrow.csv as pcsv

    header_line, blank_before = _head_line(path)
    delimiter = _sniff_delimiter(header_line, cols, path)
    header = [h.strip().strip('"') for h in header_line.split(delimiter)]
    for role, name in needed.items():
        if name not in header:
            raise InputFormatError(
                f"{path}: line 1: column '{name}' ([samples] {role}) is missing; found "
                f"columns: {', '.join(header)}" + (" (wrong delimiter?)" if len(header) == 1
                                                   else ""))
    for name in dict.fromkeys(needed.values()):
        if header.count(name) > 1:
            raise InputFormatError(f"{path}: line 1: column '{name}' appears {header.count(name)} "
                                   "times; expected each column name once")
    numeric = [needed[r] for r in ("time", "x", "y", "x_left", "y_left", "x_right", "y_right")
               if r in needed]
    missing = set(cols.missing_values)
    validity = [needed[r] for r in ("valid", "valid_left", "valid_right") if r in needed]
    column_types = {n: pa.float64() for n in numeric if n != cols.time}
    if cols.valid_codes:
        for v in validity:
            column_types[v] = pa.string()
    convert = pcsv.ConvertOptions(
        include_columns=names, column_types=column_types, null_values=list(missing),
        strings_can_be_null=True, decimal_point=cols.decimal, quoted_strings_can_be_null=True)
    # a line of only spaces is a blank line (pyarrow skips empty ones only)
    parse = pcsv.ParseOptions(delimiter=delimiter, invalid_row_handler=_skip_blank_row)
    try:
        table = pcsv.read_csv(path, parse_options=parse, convert_options=convert,
                              read_options=pcsv.ReadOptions(block_size=1 << 22,
                                                            skip_rows=blank_before))
    except (pa.ArrowException, UnicodeDecodeError, EOFError, OSError) as e:
        log.debug("pyarrow refused %s: %s", path, e)
        raise InputFormatError(_diagnose(path, delimiter, cols.decimal, header, numeric,
                                         missing)) from None
    tcol = table.column(cols.time)
    if not (pa.types.is_integer(tcol.type) or pa.types.is_floating(tcol.type)
            or pa.types.is_null(tcol.type)):
        raise InputFormatError(_diagnose(path, delimiter, cols.decimal, header, numeric,
                                         missing))
    return _owned_columns(table)


def _owned_columns(table) -> pd.DataFrame:
    """The table's columns as numpy-backed columns that this process owns.

    One column at a time is copied out of Arrow (nulls become NaN in number
    columns) and dropped from the table, so the peak is the table plus one
    column, and :func:`tidy_samples` may then work on the arrays in place
    (``owned=True``).  Text columns stay pandas strings.
    """
    import pyarrow as pa

    out = {}
    for name in list(table.column_names):
        col = table.column(name)
        table = table.drop_columns([name])
        if pa.types.is_floating(col.type) or pa.types.is_integer(col.type) \
                or pa.types.is_boolean(col.type):
            if col.null_count and not pa.types.is_floating(col.type):
                col = col.cast(pa.float64())
            out[name] = pd.Series(_chunks_to_numpy(col), copy=False)
        else:
            out[name] = col.to_pandas()
        del col
        pa.default_memory_pool().release_unused()  # hand the column's memory back now
    return pd.DataFrame(out, copy=False)


def _chunks_to_numpy(col) -> np.ndarray:
    """A numeric Arrow column as one numpy array that this process owns (nulls NaN).

    The parser's blocks are copied straight into one preallocated array: one
    copy, where ``ChunkedArray.to_numpy`` would first concatenate them into a
    read-only Arrow buffer that then needs a second copy to be writable.  The
    blocks are copied on a few threads (:func:`aoi_fix._chunks.map_items`):
    numpy copies without the GIL, and the page faults of the fresh output
    array, most of the cost, are taken in parallel too.
    """
    from ._chunks import map_items

    chunks = [c for c in col.chunks if len(c)]
    if not chunks:
        return np.array(col.to_numpy(), copy=True)
    first = chunks[0].to_numpy(zero_copy_only=False)
    out = np.empty(len(col), dtype=first.dtype)
    at = np.concatenate([[0], np.cumsum([len(c) for c in chunks])]).tolist()

    def copy(k: int) -> None:  # one parser block (MBs)
        out[at[k]:at[k + 1]] = first if k == 0 else chunks[k].to_numpy(zero_copy_only=False)

    map_items(copy, range(len(chunks)))
    return out


def _line_scanner(path: Path):
    """Map a 0-based data row to its line in the file (blank lines skipped by the parser).

    Only called on the error path: it reads the file once.
    """
    def line_of(i: int) -> int:
        seen = -1
        with _open_text(path) as fh:
            first = True
            for lineno, line in enumerate(fh, start=1):
                if not line.strip():
                    continue
                if first:
                    first = False
                    continue
                seen += 1
                if seen == i:
                    return lineno
        return i + 2
    return line_of


def _valid_from(values: pd.Series, cols: SampleColumns, path: Path, name: str,
                line_of=lambda i: i + 2) -> np.ndarray:
    if pd.api.types.is_bool_dtype(values):
        return values.to_numpy(dtype=bool, na_value=False)
    if pd.api.types.is_integer_dtype(values) and not cols.valid_codes \
            and not values.hasnans:
        return values.to_numpy() != 0
    if pd.api.types.is_numeric_dtype(values) and not cols.valid_codes:
        v = values.to_numpy(dtype=float, na_value=np.nan)
        return (v != 0) & ~np.isnan(v)
    s = values.astype("string").str.strip()
    if cols.valid_codes:
        ok = s.isin(list(cols.valid_codes)).to_numpy(dtype=bool, na_value=False)
        return ok
    low = s.str.lower()
    num = pd.to_numeric(low, errors="coerce")
    is_text_true = low.isin(list(_TRUE_TEXT)).to_numpy(dtype=bool, na_value=False)
    is_text_false = low.isin(list(_FALSE_TEXT)).to_numpy(dtype=bool, na_value=False)
    numv = num.to_numpy(dtype=float, na_value=np.nan)
    unknown = np.isnan(numv) & ~is_text_true & ~is_text_false & low.notna().to_numpy()
    if unknown.any():
        i = int(np.argmax(unknown))
        raise InputFormatError(f"{path}: line {line_of(i)}, column '{name}': found {s.iloc[i]!r}, "
                               "expected a validity value (nonzero/true = valid, or set "
                               "[samples] valid_codes)")
    return is_text_true | (np.nan_to_num(numv, nan=0.0) != 0)


def _eye_mean(stack: np.ndarray) -> np.ndarray:
    """Mean over the eyes (rows) ignoring NaN; NaN where no eye has a value.

    The arithmetic of ``np.nanmean(stack, axis=0)``, without its warning for
    all-NaN columns (``warnings.catch_warnings`` is not thread-safe, and the
    AOI table may be read on another thread meanwhile).

    >>> _eye_mean(np.array([[1.0, np.nan, np.nan], [3.0, 2.0, np.nan]])).tolist()
    [2.0, 2.0, nan]
    """
    lost = np.isnan(stack)
    count = (~lost).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(lost, 0.0, stack).sum(axis=0) / count


def tidy_samples(raw: pd.DataFrame, cols: SampleColumns, display: Display, *,
                 source: str = "samples", line_of=None, owned: bool = False) -> pd.DataFrame:
    """Turn a raw table (columns named as in ``[samples]``) into the tidy frame.

    Parameters
    ----------
    raw : DataFrame
        One row per sample, with the columns named in ``cols``.
    cols : SampleColumns
        The ``[samples]`` section.
    display : Display
        Used for normalised coordinates and the off-display rule.
    source : str
        File name used in error messages.
    line_of : callable, optional
        Maps a 0-based row to its line in the file for error messages
        (default: row + 2, a header and no blank lines).
    owned : bool
        The caller gives up ``raw``: its float columns may be reused (changed
        in place) as output columns instead of copied.  Default False.

    Returns
    -------
    DataFrame
        ``t_ms, x_px, y_px, valid`` (+ per-eye columns for binocular input).

    Examples
    --------
    >>> from aoi_fix.config import Display, SampleColumns
    >>> d = Display(width_px=100, height_px=100, width_mm=100.0, height_mm=100.0,
    ...             distance_mm=500.0)
    >>> raw = pd.DataFrame({"t": [0.0, 0.5], "gx": [0.5, None], "gy": [0.25, 0.5]})
    >>> tidy_samples(raw, SampleColumns(time="t", time_unit="s", x="gx", y="gy",
    ...              coords="norm"), d)
         t_ms  x_px  y_px  valid
    0     0.0  50.0  25.0   True
    1   500.0   NaN   NaN  False
    """
    if line_of is None:
        def line_of(i: int) -> int:
            return i + 2
    if len(raw) == 0:
        raise InputFormatError(f"{source}: no sample rows after the header; expected at "
                               "least one sample")
    t_raw = raw[cols.time]
    t_num = pd.to_numeric(t_raw, errors="coerce")
    bad = t_num.isna().to_numpy() | ~np.isfinite(t_num.to_numpy(dtype=float, na_value=np.nan))
    if bad.any():
        i = int(np.argmax(bad))
        raise InputFormatError(f"{source}: line {line_of(i)}, column '{cols.time}': found "
                               f"{_shown(t_raw.iloc[i])}, expected a finite time in "
                               f"{cols.time_unit}")
    scale = TIME_SCALE_MS[cols.time_unit]
    if owned and t_num.dtype == np.float64 and t_num.to_numpy().flags.writeable:
        t_ms = t_num.to_numpy()
        if scale != 1.0:
            t_ms *= scale
    else:
        t_ms = t_num.to_numpy(dtype=float) * scale
    if len(t_ms) > 1:
        back = t_ms[1:] <= t_ms[:-1]  # a bool per step: no full-size float temporary
        if back.any():
            i = int(np.argmax(back)) + 1
            what = "repeats" if t_ms[i] == t_ms[i - 1] else "goes backwards"
            raise InputFormatError(
                f"{source}: line {line_of(i)}, column '{cols.time}': time {what} "
                f"({t_raw.iloc[i - 1]} then {t_raw.iloc[i]}); expected strictly increasing "
                "times")

    sx, sy = (display.width_px, display.height_px) if cols.coords == "norm" else (1.0, 1.0)
    lim_x = cols.max_offscreen_frac * display.width_px
    lim_y = cols.max_offscreen_frac * display.height_px
    taken = [t_ms]  # arrays already used for an output column

    def number(name: str, scale: float) -> np.ndarray:
        col = raw[name]
        if not pd.api.types.is_float_dtype(col):
            col = pd.to_numeric(col, errors="coerce")
        out = col.to_numpy(dtype=float, na_value=np.nan)
        if not (owned and out.dtype == np.float64 and out.flags.writeable
                and not any(np.shares_memory(out, a) for a in taken)):
            out = np.array(out, dtype=float)  # own copy
        taken.append(out)
        if scale != 1.0:
            out *= scale
        return out

    def eye(xn: str, yn: str, vn: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        x = number(xn, sx)
        y = number(yn, sy)
        with np.errstate(invalid="ignore"):
            ok = (x >= -lim_x) & (x <= display.width_px + lim_x)  # False for NaN
            ok &= (y >= -lim_y) & (y <= display.height_px + lim_y)
        if vn:
            ok &= _valid_from(raw[vn], cols, Path(source), vn, line_of)
        bad = ~ok
        x[bad] = np.nan
        y[bad] = np.nan
        return x, y, ok

    out = {"t_ms": t_ms}
    if cols.binocular:
        eyes = {}
        for e in ("left", "right"):
            xn = getattr(cols, f"x_{e}")
            if xn:
                eyes[e] = eye(xn, getattr(cols, f"y_{e}"), getattr(cols, f"valid_{e}"))
        stack_x = np.vstack([v[0] for v in eyes.values()])
        stack_y = np.vstack([v[1] for v in eyes.values()])
        x, y = _eye_mean(stack_x), _eye_mean(stack_y)
        valid = np.isfinite(x) & np.isfinite(y)
        out.update(x_px=x, y_px=y, valid=valid)
        for e, (ex, ey, ev) in eyes.items():
            out[f"x_{e}_px"], out[f"y_{e}_px"], out[f"valid_{e}"] = ex, ey, ev
    else:
        x, y, ok = eye(cols.x, cols.y, cols.valid)
        out.update(x_px=x, y_px=y, valid=ok)
    return pd.DataFrame(out, copy=False)


def read_samples(path: str | Path, cols: SampleColumns, display: Display) -> pd.DataFrame:
    """Read a raw sample file (CSV/TSV/semicolon, optionally ``.gz``, or Parquet).

    Parameters
    ----------
    path : str or Path
        The recording. Delimiter is sniffed unless ``[samples] delimiter`` is set;
        a UTF-8 byte-order mark, CRLF line ends and trailing blank lines are fine.
    cols : SampleColumns
        The ``[samples]`` section of the study.
    display : Display
        The ``[display]`` section.

    Returns
    -------
    DataFrame
        The tidy frame (see the module docstring), one row per input row.

    Raises
    ------
    InputFormatError
        Missing file or column, text in a number column, a row cut off, times
        missing, repeated or going backwards; the message names file and line.
    NoValidSamplesError
        No sample has a valid gaze position.
    """
    path = require_samples_file(path)
    if path.name.endswith("_physio.tsv.gz"):  # a BIDS recording: columns from its sidecar
        from .bids import read_physio
        return read_physio(path, cols, display)
    raw = _read_table(path, cols)
    line_of = (lambda i: i + 2) if path.suffix == ".parquet" else _line_scanner(path)
    tidy = tidy_samples(raw, cols, display, source=str(path), line_of=line_of, owned=True)
    del raw
    if not tidy["valid"].any():
        raise NoValidSamplesError(f"{path}: none of the {len(tidy)} samples has a valid gaze "
                                  "position (check [samples] columns, coords and validity)")
    return tidy


def require_samples_file(path: str | Path) -> Path:
    """The path, or one line saying the samples file is missing or is a folder."""
    path = Path(path)
    if not path.exists():
        raise InputFormatError(f"{path}: samples file not found")
    if path.is_dir():
        raise InputFormatError(f"{path}: expected a samples file, found a folder")
    return path


def nominal_interval_ms(t_ms: np.ndarray, rate_hz: float = 0.0) -> float:
    """The recording's nominal sample interval in ms.

    ``1000 / rate_hz`` when the rate is given, else the median time step
    (exactly ``np.median(np.diff(t_ms))``, found without sorting every step:
    see :func:`_median_step`).

    >>> nominal_interval_ms(np.array([0.0, 4.0, 8.0, 20.0]))
    4.0
    """
    if rate_hz > 0:
        return 1000.0 / rate_hz
    if len(t_ms) < 2:
        return 1.0
    return _median_step(np.asarray(t_ms, dtype=float))


#: Steps per block of :func:`_median_step`, and the sample of steps its guess comes from.
_STEP_BLOCK = 1 << 16
_STEP_SAMPLE = 1 << 15


def _median_step(t: np.ndarray) -> float:
    """``np.median(np.diff(t))``, the same number, without a full-length sort.

    The steps of a recording cluster tightly around the sample interval.  A
    regular sample of the steps gives a narrow range that should hold the
    middle one(s); one pass in blocks counts the steps below the range and
    keeps those inside it, and only those are sorted.  When the range turns
    out not to hold the middle steps (odd data), the full median is taken.

    >>> t = np.cumsum(np.r_[0.0, np.full(99, 2.0), 50.0, np.full(100, 2.5)])
    >>> _median_step(t) == float(np.median(np.diff(t)))
    True
    """
    m = len(t) - 1
    if m <= 4 * _STEP_SAMPLE:
        return float(np.median(np.diff(t)))
    stride = m // _STEP_SAMPLE
    guess = np.sort(t[stride::stride][:_STEP_SAMPLE] - t[stride - 1:-1:stride][:_STEP_SAMPLE])
    j = len(guess) // 2  # the sample's middle, and a range of +-256 sampled steps around it
    lo, hi = guess[max(j - 256, 0)], guess[min(j + 256, len(guess) - 1)]
    below = 0
    kept = []
    for a in range(0, m, _STEP_BLOCK):  # a loop over blocks of steps
        d = np.diff(t[a:min(a + _STEP_BLOCK, m) + 1])
        below += int(np.count_nonzero(d < lo))
        kept.append(d[(d >= lo) & (d <= hi)])
    inside = np.sort(np.concatenate(kept))
    k_lo, k_hi = (m - 1) // 2, m // 2  # the middle step(s), 0-based
    if not (below <= k_lo and k_hi < below + len(inside)):
        return float(np.median(np.diff(t)))  # the guess missed: the plain way
    a, b = inside[k_lo - below], inside[k_hi - below]
    return float(a) if k_lo == k_hi else float(np.mean(np.array([a, b])))
