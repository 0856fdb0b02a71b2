"""Atomic writing of tables and the run manifest.

Every output goes to a temporary name in its final folder and is renamed into
place only when all outputs of the run were written: a failed run leaves no
partial file (and no file of the run at all).
"""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .errors import OutputError

__all__ = ["AtomicOutputs", "write_table", "sha256_file", "sha256_soon", "table_suffix",
           "read_table", "csv_text", "json_text"]

RESEARCH_NOTICE = ("aoi_fix is a research tool, not a diagnostic device; any clinical "
                   "decision belongs to qualified clinicians under local rules.")


def table_suffix(fmt: str) -> str:
    return ".parquet" if fmt == "parquet" else ".csv"


def sha256_file(path: str | Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def sha256_soon(paths: dict[str, str | Path]):
    """Start hashing files on a background thread; a future of ``{key: sha256}``.

    ``hashlib`` releases the GIL on large blocks, so hashing the inputs for the
    manifest overlaps with detection and matching instead of adding to them.

    >>> import tempfile, pathlib
    >>> f = pathlib.Path(tempfile.mkdtemp()) / "a.txt"
    >>> _ = f.write_bytes(b"abc")
    >>> sha256_soon({"a": f}).result()["a"][:16]  # FIPS 180-2 test vector "abc"
    'ba7816bf8f01cfea'
    """
    from concurrent.futures import ThreadPoolExecutor

    pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="aoi_fix-sha256")
    future = pool.submit(lambda: {k: sha256_file(p) for k, p in paths.items()})
    pool.shutdown(wait=False)
    return future


def _to_parquet_frame(df: pd.DataFrame) -> pd.DataFrame:
    out = df.copy()
    for c in out.columns:
        if c in ("aoi", "stimulus", "trial") and out[c].dtype == object or (
                c in ("aoi", "stimulus") and pd.api.types.is_string_dtype(out[c])):
            out[c] = out[c].astype("category")
    return out


def _write(df: pd.DataFrame, path: Path, fmt: str) -> None:
    if fmt == "parquet":
        _to_parquet_frame(df).to_parquet(path, index=False, engine="pyarrow")
    else:
        # 6 decimals (1 ns in ms) keeps CSV free of binary-float noise
        text = csv_text(df)
        if text is not None:
            with open(path, "w", encoding="utf-8", newline="") as fh:
                fh.write(text)
            return
        rounded = df.copy()
        for c in rounded.columns:
            if pd.api.types.is_float_dtype(rounded[c]):
                rounded[c] = rounded[c].round(6)
        rounded.to_csv(path, index=False, na_rep="", lineterminator="\n")


_NEEDS_QUOTES = ',"\n'  # delimiter, quote character, line terminator


def _quoted(text: str) -> str:
    """A CSV field as Python's csv module writes it with minimal quoting."""
    if any(ch in text for ch in _NEEDS_QUOTES):
        return '"' + text.replace('"', '""') + '"'
    return text


def _float_text(values: np.ndarray):
    """Python's ``repr`` of each float (as pandas writes it), NaN as empty; Arrow strings.

    Arrow's shortest round-trip formatting agrees with ``repr`` except that it
    leaves ``.0`` off whole numbers (added here) and may choose an exponent
    where ``repr`` does not (e.g. ``1e+10``); values with an exponent, below
    1e-4 or from 1e13 on are formatted by Python (few in our tables).
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    txt = pc.cast(pa.array(values), pa.string())
    with np.errstate(invalid="ignore"):
        size = np.abs(values)
        whole = np.isfinite(values) & (np.trunc(values) == values)  # Arrow writes no point
        odd = ((size < 1e-4) & (size > 0)) | ((size >= 1e13) & np.isfinite(size))
    if whole.any():
        txt = pc.if_else(pa.array(whole), pc.binary_join_element_wise(txt, ".0", ""), txt)
    odd |= pc.match_substring(txt, "e").to_numpy(zero_copy_only=False)
    nan = np.isnan(values)
    if nan.any():
        txt = pc.if_else(pa.array(nan), "", txt)
    if odd.any():  # the rare very small or very large values: Python's repr
        txt = pc.replace_with_mask(txt, pa.array(odd), pa.array(
            [repr(float(v)) for v in values[odd].tolist()], type=pa.string()))
    return txt


#: Tables with at least this many rows have their columns formatted on a few threads.
_PARALLEL_ROWS = 20_000


def _column_text(col: pd.Series):
    """One column as CSV fields (an Arrow string array), or None for a type left to pandas."""
    import pyarrow as pa
    import pyarrow.compute as pc

    dtype = col.dtype
    if dtype == np.float64:
        with np.errstate(over="ignore"):  # as pandas: |x| near 1e308 rounds to inf
            return _float_text(np.round(col.to_numpy(), 6))
    if dtype in (np.int64, np.int32, np.int16, np.int8, np.uint8, np.uint16, np.uint32):
        return pc.cast(pa.array(col.to_numpy()), pa.string())
    if dtype == np.bool_:
        return pa.array(np.where(col.to_numpy(), "True", "False"))
    if isinstance(dtype, pd.StringDtype) or dtype == object:
        # labels repeat (trial, stimulus, AOI): quote each distinct one once
        try:
            codes, uniques = pd.factorize(col)
        except TypeError:
            return None  # unhashable objects: leave them to pandas
        uniques = list(uniques)
        if not all(isinstance(u, str) for u in uniques):
            return None  # mixed objects: leave them to pandas
        if any("\r" in u for u in uniques):
            return None  # quoting of a carriage return differs between Pythons
        codes[codes < 0] = len(uniques)  # missing: an empty field
        texts = pa.array([_quoted(u) for u in uniques] + [""], type=pa.string())
        return texts.take(pa.array(codes))
    return None


def csv_text(df: pd.DataFrame) -> str | None:
    """The CSV text of a table with floats rounded to 6 decimals, or None.

    Byte for byte what ``df.round(6).to_csv(index=False, na_rep="",
    lineterminator="\\n")`` writes (tested against pandas), about six times
    faster on number columns: they are formatted by Arrow.  None for a
    column type it does not handle (the caller then uses pandas).

    >>> print(csv_text(pd.DataFrame({"a": [1.0, 0.1234567, np.nan], "b": ["x", None, "y,z"],
    ...                              "c": [1, 2, 3], "d": [True, False, True]})), end="")
    a,b,c,d
    1.0,x,1,True
    0.123457,,2,False
    ,"y,z",3,True
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    from ._chunks import map_items

    cols = [df.iloc[:, k] for k in range(df.shape[1])]
    if len(df) >= _PARALLEL_ROWS:
        # Arrow's kernels and numpy run without the GIL: columns side by side
        columns = map_items(_column_text, cols)
    else:
        columns = [_column_text(c) for c in cols]
    if any(c is None for c in columns):
        return None
    header = ",".join(_quoted(str(c)) for c in df.columns) + "\n"
    if len(df) == 0:
        return header
    if len(df.columns) == 1:  # csv writes a lone empty field as ""
        lines = pc.if_else(pc.equal(columns[0], ""), '""', columns[0])
    else:
        lines = pc.binary_join_element_wise(*columns, ",")
    # every line and its end joined by Arrow: one Python string for the table
    lines = pc.binary_join_element_wise(lines, "", "\n")
    whole = pa.ListArray.from_arrays(pa.array([0, len(lines)], pa.int32()), lines)
    return header + pc.binary_join(whole, "")[0].as_py()


def read_table(path: str | Path) -> pd.DataFrame:
    """Read a table written by aoi_fix (CSV or Parquet by suffix)."""
    path = Path(path)
    if path.suffix == ".parquet":
        return pd.read_parquet(path)
    text_cols = {c: "string" for c in ("trial", "stimulus", "aoi", "session", "status")}
    return pd.read_csv(path, keep_default_na=False, na_values=[""], dtype=text_cols)


class AtomicOutputs:
    """Collect outputs under temporary names; publish all or none.

    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> with AtomicOutputs() as out:
    ...     _ = out.table(pd.DataFrame({"a": [1]}), d / "t.csv")
    >>> (d / "t.csv").read_text()
    'a\\n1\\n'
    """

    def __init__(self) -> None:
        self._pending: list[tuple[Path, Path]] = []

    def _tmp_for(self, final: Path) -> Path:
        final = Path(final)
        folder = final.parent if str(final.parent) else Path(".")
        if final.exists() and final.is_dir():
            raise OutputError(f"{final}: output path is a folder; expected a file name")
        if folder.exists() and not folder.is_dir():
            raise OutputError(f"{folder}: expected an output folder, found a file")
        try:
            folder.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(prefix=f".{final.name}.", suffix=".tmp", dir=folder)
        except FileExistsError:
            raise OutputError(f"{folder}: expected an output folder, found a file") from None
        except OSError as e:
            blocker = next((p for p in (folder, *folder.parents) if p.is_file()), None)
            if blocker is not None:  # e.g. --out-dir results.csv/sub
                raise OutputError(f"{blocker}: expected an output folder, found a file "
                                  f"(writing {final})") from None
            raise OutputError(f"{folder}: cannot write here ({e.strerror})") from None
        os.close(fd)
        self._pending.append((Path(tmp), final))
        return Path(tmp)

    def table(self, df: pd.DataFrame, final: str | Path, fmt: str = "csv") -> Path:
        tmp = self._tmp_for(Path(final))
        try:
            _write(df, tmp, fmt)
        except OSError as e:
            raise OutputError(f"{final}: cannot write ({e.strerror})") from None
        return Path(final)

    def tables(self, items) -> list[Path]:
        """Write several ``(df, final, fmt)`` tables, formatted side by side.

        The temporary files are made in order first (a path that cannot take
        a file is reported then, before any table is written); the
        formatting (Arrow and numpy, mostly without the GIL) runs on a few
        threads, and of the tables that then fail to write, the first in
        ``items`` order is the error reported.  ``csv_text`` may use threads
        of its own for a large table inside these.
        """
        from ._chunks import map_items

        jobs = [(df, self._tmp_for(Path(final)), fmt, Path(final)) for df, final, fmt in items]

        def write(job) -> Path:
            df, tmp, fmt, final = job
            try:
                _write(df, tmp, fmt)
            except OSError as e:
                raise OutputError(f"{final}: cannot write ({e.strerror})") from None
            return final

        return map_items(write, jobs)

    def json(self, obj: Any, final: str | Path) -> Path:
        tmp = self._tmp_for(Path(final))
        tmp.write_text(json_text(obj))
        return Path(final)

    def file(self, final: str | Path, writer) -> Path:
        """Let ``writer(tmp_path)`` produce a file (e.g. a figure)."""
        tmp = self._tmp_for(Path(final))
        writer(tmp)
        return Path(final)

    def discard(self) -> None:
        for tmp, _ in self._pending:
            try:
                tmp.unlink()
            except FileNotFoundError:
                pass
        self._pending.clear()

    def commit(self) -> None:
        for tmp, final in self._pending:
            os.replace(tmp, final)
        self._pending.clear()

    def __enter__(self) -> "AtomicOutputs":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is None:
            self.commit()
        else:
            self.discard()


def json_text(obj: Any) -> str:
    """JSON with two-space indents; a list of several objects has one object per line.

    The per-trial accounting of a long session holds thousands of small
    objects: written one per line they stay readable, and the C encoder of
    :mod:`json` writes them (an indented dump runs in pure Python, several
    times slower).

    >>> print(json_text({"tool": "aoi_fix", "trials": [{"trial": "1", "n": 2},
    ...                                                 {"trial": "2", "n": 0}]}), end="")
    {
      "tool": "aoi_fix",
      "trials": [
        {"trial": "1", "n": 2},
        {"trial": "2", "n": 0}
      ]
    }
    """
    def key(k) -> str:
        return json.dumps(k if isinstance(k, str) else json.dumps(k))

    def enc(v, pad: str) -> str:
        inner = pad + "  "
        if isinstance(v, dict) and v:
            return "{\n" + ",\n".join(f"{inner}{key(k)}: {enc(x, inner)}"
                                      for k, x in v.items()) + f"\n{pad}}}"
        if isinstance(v, (list, tuple)) and v:
            if len(v) > 1 and all(isinstance(x, dict) for x in v):
                items = [json.dumps(x, default=_json_default) for x in v]
            else:
                items = [enc(x, inner) for x in v]
            return "[\n" + ",\n".join(inner + x for x in items) + f"\n{pad}]"
        return json.dumps(v, default=_json_default)

    return enc(obj, "") + "\n"


def _json_default(o: Any):
    import numpy as np

    if isinstance(o, (np.integer,)):
        return int(o)
    if isinstance(o, (np.floating,)):
        return float(o)
    if isinstance(o, (np.bool_,)):
        return bool(o)
    if isinstance(o, Path):
        return str(o)
    if isinstance(o, tuple):
        return list(o)
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


def write_table(df: pd.DataFrame, path: str | Path, fmt: str = "csv") -> Path:
    """Write one table atomically."""
    with AtomicOutputs() as out:
        out.table(df, path, fmt)
    return Path(path)
