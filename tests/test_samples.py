"""Tests for aoi_fix.samples: reading raw sample files into the tidy frame.

Every format variant is written from one small hand-made table; each must give
the same tidy frame as the plain comma-separated file.
"""

from __future__ import annotations

import gzip
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from aoi_fix.config import Display, SampleColumns
from aoi_fix.errors import AoiFixError, InputFormatError, NoValidSamplesError
from aoi_fix.samples import nominal_interval_ms, read_samples, tidy_samples

DISPLAY = Display(width_px=1000, height_px=800, width_mm=500.0, height_mm=400.0,
                  distance_mm=600.0)
COLS = SampleColumns(time="t", x="gx", y="gy")

# time (ms), x (px), y (px); row 2 is a dropout (empty cells)
ROWS = [("0", "100.5", "200.25"),
        ("4", "101.5", "201.25"),
        ("8", "", ""),
        ("12", "103", "203.5"),
        ("16", "104.75", "204")]
EXPECTED = pd.DataFrame({
    "t_ms": [0.0, 4.0, 8.0, 12.0, 16.0],
    "x_px": [100.5, 101.5, np.nan, 103.0, 104.75],
    "y_px": [200.25, 201.25, np.nan, 203.5, 204.0],
    "valid": [True, True, False, True, True],
})


def _text(rows=ROWS, header=("t", "gx", "gy"), sep=",", decimal=".", eol="\n"):
    lines = [sep.join(header)]
    for r in rows:
        lines.append(sep.join(c.replace(".", decimal) for c in r))
    return eol.join(lines) + eol


def _write(tmp_path: Path, text: str, name="s.csv", encoding="utf-8") -> Path:
    p = tmp_path / name
    p.write_bytes(text.encode(encoding))
    return p


def _read(path, cols=COLS, display=DISPLAY):
    return read_samples(path, cols, display)


def test_clean_file_gives_tidy_frame(tmp_path):
    got = _read(_write(tmp_path, _text()))
    pd.testing.assert_frame_equal(got, EXPECTED)
    assert got["t_ms"].dtype == np.float64 and got["valid"].dtype == bool


@pytest.mark.parametrize("variant", [
    "semicolon", "tab", "decimal_comma", "gz", "bom", "crlf", "trailing_blank",
    "bom_crlf_gz", "extra_columns", "quoted_header"])
def test_format_variants_identical(tmp_path, variant):
    cols = COLS
    name = "s.csv"
    if variant == "semicolon":
        text = _text(sep=";")
    elif variant == "tab":
        text, name = _text(sep="\t"), "s.tsv"
    elif variant == "decimal_comma":
        text = _text(sep=";", decimal=",")
        cols = SampleColumns(time="t", x="gx", y="gy", decimal=",")
    elif variant == "bom":
        text = "\ufeff" + _text()
    elif variant == "crlf":
        text = _text(eol="\r\n")
    elif variant == "trailing_blank":
        text = _text() + "\n\n\n"
    elif variant == "extra_columns":
        rows = [("x", r[0], "7", r[1], r[2], "note") for r in ROWS]
        text = _text(rows=rows, header=("subject", "t", "pupil", "gx", "gy", "comment"))
    elif variant == "quoted_header":
        text = _text(header=('"t"', '"gx"', '"gy"'))
    else:
        text = _text()
    if variant in ("gz", "bom_crlf_gz"):
        if variant == "bom_crlf_gz":
            text = "\ufeff" + _text(eol="\r\n") + "\r\n"
        p = tmp_path / "s.csv.gz"
        p.write_bytes(gzip.compress(text.encode("utf-8")))
    else:
        p = _write(tmp_path, text, name)
    pd.testing.assert_frame_equal(_read(p, cols), EXPECTED)


def test_explicit_delimiter(tmp_path):
    cols = SampleColumns(time="t", x="gx", y="gy", delimiter=";")
    pd.testing.assert_frame_equal(_read(_write(tmp_path, _text(sep=";")), cols), EXPECTED)


def test_parquet_input(tmp_path):
    df = pd.DataFrame({"t": [0.0, 4, 8, 12, 16],
                       "gx": [100.5, 101.5, np.nan, 103.0, 104.75],
                       "gy": [200.25, 201.25, np.nan, 203.5, 204.0],
                       "other": ["a", "b", "c", "d", "e"]})
    p = tmp_path / "s.parquet"
    df.to_parquet(p, index=False)
    pd.testing.assert_frame_equal(_read(p), EXPECTED)


def test_parquet_missing_column(tmp_path):
    p = tmp_path / "s.parquet"
    pd.DataFrame({"t": [0.0], "gx": [1.0]}).to_parquet(p, index=False)
    with pytest.raises(InputFormatError) as e:
        _read(p)
    assert str(p) in str(e.value) and "'gy'" in str(e.value) and "gx" in str(e.value)


@pytest.mark.parametrize("spelling", ["", "NaN", "n/a", "nan", "NA", "-"])
def test_missing_value_spellings(tmp_path, spelling):
    rows = [r if i != 2 else ("8", spelling, spelling) for i, r in enumerate(ROWS)]
    pd.testing.assert_frame_equal(_read(_write(tmp_path, _text(rows=rows))), EXPECTED)


def test_custom_missing_value(tmp_path):
    rows = [r if i != 2 else ("8", "-1", "-1") for i, r in enumerate(ROWS)]
    cols = SampleColumns(time="t", x="gx", y="gy", missing_values=["", "-1"])
    pd.testing.assert_frame_equal(_read(_write(tmp_path, _text(rows=rows)), cols), EXPECTED)


def test_missing_only_one_coordinate_is_invalid(tmp_path):
    rows = [r if i != 2 else ("8", "102", "") for i, r in enumerate(ROWS)]
    pd.testing.assert_frame_equal(_read(_write(tmp_path, _text(rows=rows))), EXPECTED)


# --------------------------------------------------------------------------- validity

def _valid_rows(codes):
    # row 2 keeps a (tracker's stale) position but is flagged invalid
    return [(r[0], r[1] or "102", r[2] or "202", c) for r, c in zip(ROWS, codes)]


@pytest.mark.parametrize("codes,valid_codes", [
    (["1", "1", "0", "1", "1"], ()),
    (["true", "TRUE", "false", "True", "true"], ()),
    (["yes", "yes", "no", "yes", "yes"], ()),
    (["2", "1", "0", "1", "1"], ()),            # any nonzero = valid
    (["0", "0", "4", "0", "0"], ("0",)),          # a tracker where 0 means good
    (["ok", "ok", "bad", "ok", "ok"], ("ok",)),
])
def test_validity_column(tmp_path, codes, valid_codes):
    text = _text(rows=_valid_rows(codes), header=("t", "gx", "gy", "v"))
    cols = SampleColumns(time="t", x="gx", y="gy", valid="v", valid_codes=valid_codes)
    pd.testing.assert_frame_equal(_read(_write(tmp_path, text), cols), EXPECTED)


def test_unknown_validity_text_names_line(tmp_path):
    text = _text(rows=_valid_rows(["1", "1", "maybe", "1", "1"]), header=("t", "gx", "gy", "v"))
    p = _write(tmp_path, text)
    with pytest.raises(InputFormatError) as e:
        _read(p, SampleColumns(time="t", x="gx", y="gy", valid="v"))
    assert "line 4" in str(e.value) and "'v'" in str(e.value) and "maybe" in str(e.value)


def test_far_off_display_positions_invalid(tmp_path):
    # display is 1000 x 800; max_offscreen_frac 0.5 allows x in [-500, 1500], y in [-400, 1200]
    rows = [("0", "-100", "-100"), ("4", "1499", "1199"), ("8", "-10000", "-10000"),
            ("12", "500", "1300"), ("16", "1501", "400")]
    got = _read(_write(tmp_path, _text(rows=rows)))
    assert got["valid"].tolist() == [True, True, False, False, False]
    assert got["x_px"].isna().tolist() == [False, False, True, True, True]
    assert got.loc[0, "x_px"] == -100.0  # slightly off the display is still valid


def test_normalised_coordinates(tmp_path):
    rows = [("0", "0.5", "0.5"), ("4", "0", "1"), ("8", "0.25", "0.125")]
    cols = SampleColumns(time="t", x="gx", y="gy", coords="norm")
    got = _read(_write(tmp_path, _text(rows=rows)), cols)
    np.testing.assert_allclose(got["x_px"], [500.0, 0.0, 250.0])  # x * width_px
    np.testing.assert_allclose(got["y_px"], [400.0, 800.0, 100.0])  # y * height_px


@pytest.mark.parametrize("unit,stamps", [
    ("s", ["1.000", "1.004", "1.008", "1.012", "1.016"]),
    ("ms", ["1000", "1004", "1008", "1012", "1016"]),
    ("us", ["1000000", "1004000", "1008000", "1012000", "1016000"]),
    ("ns", ["1000000000", "1004000000", "1008000000", "1012000000", "1016000000"]),
])
def test_time_units(tmp_path, unit, stamps):
    rows = [(s, r[1], r[2]) for s, r in zip(stamps, ROWS)]
    cols = SampleColumns(time="t", x="gx", y="gy", time_unit=unit)
    got = _read(_write(tmp_path, _text(rows=rows)), cols)
    np.testing.assert_allclose(got["t_ms"], [1000.0, 1004.0, 1008.0, 1012.0, 1016.0],
                               rtol=0, atol=1e-6)


# --------------------------------------------------------------------------- binocular

def test_binocular_averaging(tmp_path):
    header = ("t", "lx", "ly", "rx", "ry")
    rows = [("0", "100", "200", "110", "210"),   # both valid -> mean
            ("4", "100", "200", "", ""),         # right lost -> left
            ("8", "", "", "120", "220"),         # left lost -> right
            ("12", "", "", "", "")]              # both lost -> invalid
    cols = SampleColumns(time="t", x_left="lx", y_left="ly", x_right="rx", y_right="ry")
    got = _read(_write(tmp_path, _text(rows=rows, header=header)), cols)
    np.testing.assert_array_equal(got["x_px"], [105.0, 100.0, 120.0, np.nan])
    np.testing.assert_array_equal(got["y_px"], [205.0, 200.0, 220.0, np.nan])
    assert got["valid"].tolist() == [True, True, True, False]
    assert got["valid_left"].tolist() == [True, True, False, False]
    assert got["valid_right"].tolist() == [True, False, True, False]
    np.testing.assert_array_equal(got["x_right_px"], [110.0, np.nan, 120.0, np.nan])


def test_binocular_per_eye_validity_columns(tmp_path):
    header = ("t", "lx", "ly", "lv", "rx", "ry", "rv")
    rows = [("0", "100", "200", "1", "110", "210", "1"),
            ("4", "100", "200", "1", "110", "210", "0"),
            ("8", "100", "200", "0", "110", "210", "1")]
    cols = SampleColumns(time="t", x_left="lx", y_left="ly", x_right="rx", y_right="ry",
                         valid_left="lv", valid_right="rv")
    got = _read(_write(tmp_path, _text(rows=rows, header=header)), cols)
    np.testing.assert_array_equal(got["x_px"], [105.0, 100.0, 110.0])
    assert got["valid"].all()


def test_single_eye_columns(tmp_path):
    rows = [("0", "100", "200"), ("4", "", "")]
    cols = SampleColumns(time="t", x_right="gx", y_right="gy")
    got = _read(_write(tmp_path, _text(rows=rows)), cols)
    assert got["valid"].tolist() == [True, False]
    assert got.loc[0, "x_px"] == 100.0


# --------------------------------------------------------------------------- errors

def test_missing_column_message(tmp_path):
    p = _write(tmp_path, _text(header=("t", "gx", "gaze_y")))
    with pytest.raises(InputFormatError) as e:
        _read(p)
    msg = str(e.value)
    assert str(p) in msg and "'gy'" in msg
    assert "t, gx, gaze_y" in msg  # lists the columns found
    assert "\n" not in msg


def test_text_in_number_column_names_line_and_column(tmp_path):
    rows = [r if i != 3 else ("12", "10x3", "203.5") for i, r in enumerate(ROWS)]
    p = _write(tmp_path, _text(rows=rows))
    with pytest.raises(InputFormatError) as e:
        _read(p)
    msg = str(e.value)
    # header is line 1, so data row index 3 is line 5
    assert str(p) in msg and "line 5" in msg and "'gx'" in msg and "10x3" in msg


def test_text_in_time_column_names_line(tmp_path):
    rows = [r if i != 1 else ("four", r[1], r[2]) for i, r in enumerate(ROWS)]
    p = _write(tmp_path, _text(rows=rows))
    with pytest.raises(InputFormatError) as e:
        _read(p)
    assert "line 3" in str(e.value) and "'t'" in str(e.value)


def test_missing_time_names_line(tmp_path):
    rows = [r if i != 3 else ("", r[1], r[2]) for i, r in enumerate(ROWS)]
    with pytest.raises(InputFormatError, match=r"line 5, column 't'"):
        _read(_write(tmp_path, _text(rows=rows)))


@pytest.mark.parametrize("bad_t,what", [("2", "backwards"), ("4", "repeats")])
def test_time_backwards_or_repeating_names_line(tmp_path, bad_t, what):
    rows = [r if i != 2 else (bad_t, r[1], r[2]) for i, r in enumerate(ROWS)]
    p = _write(tmp_path, _text(rows=rows))
    with pytest.raises(InputFormatError) as e:
        _read(p)
    msg = str(e.value)
    assert "line 4" in msg and what in msg and str(p) in msg


def test_truncated_last_row(tmp_path):
    text = _text() + "20,105"  # cut off mid-row, no newline
    p = _write(tmp_path, text)
    with pytest.raises(InputFormatError) as e:
        _read(p)
    assert "line 7" in str(e.value) and str(p) in str(e.value)


def test_empty_file(tmp_path):
    p = _write(tmp_path, "")
    with pytest.raises(InputFormatError, match="empty"):
        _read(p)


def test_blank_lines_only_file(tmp_path):
    with pytest.raises(InputFormatError, match="empty"):
        _read(_write(tmp_path, "\n\n  \n"))


def test_header_only_file(tmp_path):
    p = _write(tmp_path, "t,gx,gy\n")
    with pytest.raises(InputFormatError) as e:
        _read(p)
    assert str(p) in str(e.value) and "no sample rows" in str(e.value)


def test_no_valid_samples(tmp_path):
    rows = [(r[0], "", "") for r in ROWS]
    p = _write(tmp_path, _text(rows=rows))
    with pytest.raises(NoValidSamplesError) as e:
        _read(p)
    assert str(p) in str(e.value)
    assert isinstance(e.value, AoiFixError) and e.value.exit_code == 1


def test_file_not_found(tmp_path):
    with pytest.raises(InputFormatError, match="not found"):
        _read(tmp_path / "nope.csv")


def test_not_utf8(tmp_path):
    p = tmp_path / "s.csv"
    p.write_bytes(b"t,gx,gy\n0,\xff\xfe,1\n")
    with pytest.raises(InputFormatError):
        _read(p)


def test_single_column_header_suggests_delimiter(tmp_path):
    p = _write(tmp_path, "t|gx|gy\n0|1|2\n")
    with pytest.raises(InputFormatError, match="delimiter"):
        _read(p)


# --------------------------------------------------------------------------- tidy_samples / interval

def test_tidy_samples_keeps_every_row_in_order():
    raw = pd.DataFrame({"t": [0.0, 1.0, 2.0], "gx": [1.0, None, 3.0], "gy": [1.0, 2.0, 3.0]})
    got = tidy_samples(raw, COLS, DISPLAY)
    assert len(got) == 3 and got["valid"].tolist() == [True, False, True]
    assert list(got.columns) == ["t_ms", "x_px", "y_px", "valid"]


def test_nominal_interval():
    t = np.array([0.0, 8.333, 16.667, 25.0, 100.0])
    assert nominal_interval_ms(t) == pytest.approx(8.3335)  # median step
    assert nominal_interval_ms(t, rate_hz=120.0) == pytest.approx(1000 / 120)
    assert nominal_interval_ms(np.array([5.0])) == 1.0


def test_line_number_after_blank_line_mid_file(tmp_path):
    # lines: 1 header, 2 data, 3 blank, 4 data, 5 data, 6 time goes backwards
    p = _write(tmp_path, "t,gx,gy\n0,1,2\n\n1,3,4\n2,3,4\n1.5,3,4\n")
    with pytest.raises(InputFormatError) as e:
        _read(p)
    assert "line 6" in str(e.value)


def test_blank_line_mid_file_is_skipped(tmp_path):
    text = _text()
    head, rest = text.split("\n", 2)[0:2], text.split("\n", 2)[2]
    p = _write(tmp_path, "\n".join(head) + "\n\n" + rest)
    pd.testing.assert_frame_equal(_read(p), EXPECTED)


@pytest.mark.filterwarnings("error::DeprecationWarning")
def test_binocular_read_emits_no_deprecation_warning(tmp_path):
    rows = [("0", "100", "200", "110", "210"), ("4", "", "", "", "")]
    cols = SampleColumns(time="t", x_left="lx", y_left="ly", x_right="rx", y_right="ry")
    got = _read(_write(tmp_path, _text(rows=rows, header=("t", "lx", "ly", "rx", "ry"))), cols)
    assert got["valid"].tolist() == [True, False]


@settings(max_examples=200, deadline=None)
@given(steps=st.lists(st.one_of(st.sampled_from([1.0, 2.0, 2.5, 3.3333333333333335, 8.0]),
                                st.floats(0.001, 100.0)), min_size=1, max_size=400),
       sample=st.integers(1, 16), block=st.integers(1, 64))
def test_median_step_is_numpys_median_of_the_steps(steps, sample, block):
    # Reference: numpy's median of np.diff (general-purpose library); small
    # sample and block sizes send most draws through the counting path.
    import aoi_fix.samples as S

    t = np.cumsum(np.r_[1000.0, steps])
    old = S._STEP_SAMPLE, S._STEP_BLOCK
    S._STEP_SAMPLE, S._STEP_BLOCK = sample, block
    try:
        got = S.nominal_interval_ms(t)
    finally:
        S._STEP_SAMPLE, S._STEP_BLOCK = old
    assert got == float(np.median(np.diff(t)))


def test_eye_mean_is_numpys_nanmean():
    # reference: numpy.nanmean over the eyes (general-purpose library), bit for
    # bit, with all-NaN columns giving NaN (and no warning)
    import warnings

    from aoi_fix.samples import _eye_mean

    rng = np.random.default_rng(4)
    for shape in [(2, 5000), (1, 300)]:
        a = rng.normal(500, 100, shape)
        a[rng.random(shape) < 0.3] = np.nan
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            want = np.nanmean(a, axis=0)
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            got = _eye_mean(a)
        np.testing.assert_array_equal(got, want)
        assert np.isnan(got).any()
