"""The allocator setting of the command-line program (aoi_fix/_memory.py)."""

import sys

import numpy as np
import pytest

from aoi_fix import _memory


def test_off_when_asked(monkeypatch):
    monkeypatch.setenv("AOI_FIX_MALLOC", "default")
    assert _memory.keep_freed_memory() is False


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc mallopt")
def test_applied_on_linux_and_harmless(monkeypatch):
    monkeypatch.delenv("AOI_FIX_MALLOC", raising=False)
    assert _memory.keep_freed_memory() is True
    # large blocks still allocate, free and hold their values
    a = np.arange(5_000_000, dtype=np.float64)
    b = a * 2.0
    del a
    c = np.ones(5_000_000)
    assert float(b[-1]) == 2.0 * 4_999_999 and float(c.sum()) == 5_000_000.0
