"""One exception hierarchy for every failure a user can cause.

The CLI catches :class:`AoiFixError` once and exits 1 (bad data) with the
one-line message; :class:`UsageError` exits 2 (bad command line or override).
"""

from __future__ import annotations


class AoiFixError(Exception):
    """Root of every error aoi_fix raises on purpose.

    The message is one line naming the file, the row, column or key, what
    was found and what was expected.
    """

    exit_code = 1


class InputFormatError(AoiFixError):
    """A data file (samples, trials, AOIs, checks) is malformed."""


class ConfigError(AoiFixError):
    """The study file has a wrong key, type or value."""


class NoValidSamplesError(AoiFixError):
    """A recording has no valid gaze sample at all."""


class OutputError(AoiFixError):
    """An output path cannot be written."""


class UsageError(AoiFixError):
    """The command line (an option, a ``--set`` or ``--grid``) is wrong."""

    exit_code = 2


class OverrideError(UsageError, ConfigError):
    """A ``--set`` value of the right type but not allowed for its key (exit 2).

    Also a :class:`ConfigError`, so library callers catch it with the file's errors.
    """


def where(path: object, *, row: int | None = None, column: str | None = None,
          key: str | None = None) -> str:
    """Format the location part of an error message.

    >>> where("s.csv", row=3, column="x")
    "s.csv: row 3, column 'x'"
    """
    parts = []
    if row is not None:
        parts.append(f"row {row}")
    if column is not None:
        parts.append(f"column '{column}'")
    if key is not None:
        parts.append(f"key '{key}'")
    loc = str(path)
    return f"{loc}: {', '.join(parts)}" if parts else loc


def read_text(path, *, what: str, expected: str, error: type = InputFormatError) -> str:
    """Read a UTF-8 text file (a byte-order mark is dropped) or raise one clear line.

    ``what`` names the file in "not found" (e.g. "trial file"), ``expected``
    says what a folder should have been (e.g. "a trial CSV file").
    """
    from pathlib import Path

    path = Path(path)
    try:
        return path.read_bytes().decode("utf-8-sig")
    except FileNotFoundError:
        raise error(f"{path}: {what} not found") from None
    except IsADirectoryError:
        raise error(f"{path}: expected {expected}, found a folder") from None
    except UnicodeDecodeError as e:
        raise error(f"{path}: not UTF-8 text (byte {e.start})") from None
