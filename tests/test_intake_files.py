"""Real and hostile data files: delimiters, decimal commas, trailing columns, empty cells
in file order, the numeral rule, overflow, and bounded .npy / .npz / Parquet reading.

Each case is a one-line :class:`InvalidInputError` naming the file (and row / column where
there is one); nothing allocates what a header merely declares.
"""

from __future__ import annotations

import io
import re
import struct
import time
import tracemalloc
import warnings
import zipfile
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from solver.data import INFLATE_FLOOR, load_table
from solver.errors import DataWarning, InvalidInputError


def _csv(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def _error(path: Path, **kw) -> str:
    with pytest.raises(InvalidInputError) as exc:
        load_table(path, **kw)
    msg = str(exc.value)
    assert "\n" not in msg and str(path) in msg, msg
    return msg


# ------------------------------------------------------------------------ delimiters

def test_semicolon_file_is_detected(tmp_path):
    p = _csv(tmp_path / "semi.csv", "a;b;label\n1.5;2;x\n3;4;y\n5;6;x\n")
    ds = load_table(p, label="label")
    assert ds.feature_names == ("a", "b")
    np.testing.assert_array_equal(ds.X, [[1.5, 2.0], [3.0, 4.0], [5.0, 6.0]])


def test_tab_file_is_detected_and_delimiter_can_be_forced(tmp_path):
    p = _csv(tmp_path / "tab.csv", "a\tb\tlabel\n1\t2\tx\n3\t4\ty\n")
    assert load_table(p, label="label").feature_names == ("a", "b")
    assert load_table(p, label="label", delimiter="\t").feature_names == ("a", "b")


def test_semicolon_file_read_with_a_comma_is_diagnosed(tmp_path):
    p = _csv(tmp_path / "semi.csv", "a;b;label\n1.5;2;x\n3;4;y\n")
    msg = _error(p, label="label", delimiter=",")
    assert "this looks semicolon-separated: use --delimiter ';'" in msg


def test_bad_delimiter_option_is_refused(tmp_path):
    p = _csv(tmp_path / "d.csv", "a,b,label\n1,2,x\n3,4,y\n")
    assert "delimiter" in _error(p, label="label", delimiter="ab")


def test_decimal_commas_are_refused_with_that_diagnosis(tmp_path):
    p = _csv(tmp_path / "dc.csv", "a;b;label\n1;2;x\n3;4,25;y\n5,5;6;x\n")
    msg = _error(p, label="label")
    assert "row 2 (line 3), column 'b'" in msg
    assert "'4,25' has a decimal comma" in msg and "decimal points only" in msg
    assert "first of 2 unreadable feature cell(s)" in msg


def test_trailing_empty_column_is_dropped_with_a_note(tmp_path):
    p = _csv(tmp_path / "trail.csv", "a,b,label,\n1,2,x,\n3,4,y,\n5,6,x,\n")
    with pytest.warns(DataWarning, match="no name and is empty in every row") as rec:
        ds = load_table(p, label="label")
    assert len(rec) == 1
    assert ds.feature_names == ("a", "b") and ds.X.shape == (3, 2)
    assert any("trailing delimiter" in w for w in ds.warnings)


def test_unnamed_column_with_values_is_still_an_error(tmp_path):
    p = _csv(tmp_path / "named.csv", "a,b,label,\n1,2,x,\n3,4,y,7\n")
    assert "column 4 has an empty name" in _error(p, label="label")


# ------------------------------------------------------------------------ empty cells

def test_first_empty_cell_in_file_order_and_the_count(tmp_path):
    # column b's blank (row 2) comes before column a's blank (row 3) in file order;
    # the earlier code reported column a's first (column by column)
    p = _csv(tmp_path / "blank.csv", "a,b,label\n1,2,x\n3,,y\n,6,x\n,,x\n")
    msg = _error(p, label="label")
    assert "row 2 (line 3), column 'b': empty cell" in msg
    assert "first of 4 unreadable feature cell(s) in file order: 4 empty" in msg


def test_parquet_nulls_first_in_file_order_and_counted(tmp_path):
    p = tmp_path / "nulls.parquet"
    pq.write_table(pa.table({"a": [1.0, 2.0, None, None], "b": [1.0, None, 3.0, 4.0],
                             "label": ["x", "y", "x", "y"]}), p)
    msg = _error(p, label="label")
    assert "row 2 (index 1), column 'b': missing value (null)" in msg
    assert "first of 3 missing feature value(s)" in msg


def test_missing_labels_are_counted(tmp_path):
    p = _csv(tmp_path / "nolab.csv", "a,label\n1,x\n2,\n3,y\n4,\n")
    msg = _error(p, label="label")
    assert "row 2 (line 3)" in msg and "first of 2 row(s) without a label" in msg


# ------------------------------------------------------------------------ numerals

@pytest.mark.parametrize("cell, words", [
    ("1e400", "beyond the range of 64-bit floating-point numbers"),
    ("-1e999", "beyond the range"),
    ("0x1A", "hexadecimal"),
    ("1_000", "digit-group separators"),
    ("\u0663", "non-ASCII digits"),          # Arabic-Indic digit three
    ("\uff11\uff12", "non-ASCII digits"),    # full-width "12"
    ("NA", "missing-value marker"),
    ("n/a", "missing-value marker"),
    ("nan", "NaN"),
    ("NaN", "NaN"),
    ("-Infinity", "an infinite value"),
    ("inf", "an infinite value"),
    ("1,000", "decimal comma"),
    ("12kg", "is not a number"),
])
def test_numeral_rule_ascii_decimal_only(tmp_path, cell, words):
    # before: Python's float() read '1_000', '٣' and '１２' as numbers and '1e400' as inf
    p = _csv(tmp_path / "num.csv", f'a,b,label\n1,2,x\n3,"{cell}",y\n5,6,x\n')
    msg = _error(p, label="label")
    assert "row 2 (line 3), column 'b'" in msg and words in msg, msg


@pytest.mark.parametrize("cell, value", [("+1.5", 1.5), (".5", 0.5), ("7.", 7.0),
                                         ("-2E-3", -2e-3), (" 4 ", 4.0), ("1e-400", 0.0)])
def test_numeral_rule_accepts_plain_decimal_numbers(tmp_path, cell, value):
    p = _csv(tmp_path / "ok.csv", f'a,b,label\n1,2,x\n3,"{cell}",y\n5,6,x\n')
    assert load_table(p, label="label").X[1, 1] == value


def test_numeral_rule_applies_to_parquet_text_and_npz_text(tmp_path):
    p = tmp_path / "t.parquet"
    pq.write_table(pa.table({"a": ["1", "1_000", "3"], "label": ["x", "y", "x"]}), p)
    assert "digit-group separators" in _error(p, label="label")
    z = tmp_path / "t.npz"
    np.savez(z, X=np.array([["1", "2"], ["\u0663", "4"]]), y=np.array([0, 1]))
    assert "row 2 (index 1), column 'col1'" in _error(z, label="y")


def test_numeral_labels_stay_text_unless_ascii(tmp_path):
    p = _csv(tmp_path / "lab.csv", "a,label\n1,1_000\n2,5\n3,5\n")
    ds = load_table(p, label="label")
    assert ds.labels.dtype.kind == "U" and ds.labels.tolist() == ["1_000", "5", "5"]


# ------------------------------------------------------------------------ overflow

def test_feature_whose_spread_overflows_is_refused(tmp_path):
    # before: the standard deviation overflowed to inf, the standardised column became 0
    # in every row and the run said converged
    p = _csv(tmp_path / "big.csv", "a,b,label\n1e300,2,x\n-1e300,4,y\n5,6,x\n3,1,y\n")
    msg = _error(p, label="label")
    assert "column 'a'" in msg and "overflows" in msg and "row 1 (line 2)" in msg


def test_standardiser_fit_refuses_overflow():
    from solver.model import Standardiser

    with pytest.raises(InvalidInputError, match=r"column 2 \(1-based\).*overflows"):
        Standardiser.fit(np.array([[1.0, 1e300], [2.0, -1e300], [3.0, 0.0]]))


# ------------------------------------------------------------------------ .npy / .npz

def _npy_header(shape, descr="<f8") -> bytes:
    buf = io.BytesIO()
    np.lib.format.write_array_header_1_0(
        buf, {"descr": descr, "fortran_order": False, "shape": shape})
    return buf.getvalue()


def test_npy_header_declaring_a_huge_shape_costs_nothing(tmp_path):
    # before: MemoryError (exit 4) after trying to allocate 160 GB
    p = tmp_path / "huge.npy"
    p.write_bytes(_npy_header((10**10, 2)) + b"\0" * 64)
    tracemalloc.start()
    t0 = time.perf_counter()
    msg = _error(p, label=None)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert "declares shape (10000000000, 2)" in msg and "64 data bytes follow" in msg
    assert peak < 10 * 2**20 and time.perf_counter() - t0 < 5


def test_npz_inflation_is_limited_before_inflating(tmp_path):
    # before: the archive was inflated in full (1.6 GB resident) before being rejected
    p = tmp_path / "bomb.npz"
    np.savez_compressed(p, X=np.zeros((INFLATE_FLOOR // 8 // 1000 + 1, 1000)))
    assert p.stat().st_size * 50 < INFLATE_FLOOR
    tracemalloc.start()
    msg = _error(p, label=None)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert "would inflate to" in msg and "store the data uncompressed" in msg
    assert peak < 10 * 2**20


def test_npz_member_with_lying_header_and_non_npy_member(tmp_path):
    odd = tmp_path / "odd.npz"
    with zipfile.ZipFile(odd, "w") as zf:
        zf.writestr("X.npy", b"not an array at all")
    assert "member 'X' is not in .npy format" in _error(odd, label=None)
    lie = tmp_path / "lie.npz"
    with zipfile.ZipFile(lie, "w") as zf:
        zf.writestr("X.npy", _npy_header((10**9, 3)) + b"\0" * 48)
    assert "declares shape (1000000000, 3)" in _error(lie, label=None)
    other = tmp_path / "other.npz"
    with zipfile.ZipFile(other, "w") as zf:
        zf.writestr("X.npy", _npy_header((1, 1)) + b"\0" * 8)
        zf.writestr("notes.txt", b"hello")
    assert "member 'notes.txt' is not a .npy array" in _error(other, label=None)


def test_npz_object_member_is_refused_without_unpickling(tmp_path):
    p = tmp_path / "obj.npz"
    np.savez(p, X=np.array([[1, "a"]], dtype=object))
    assert "Python objects" in _error(p, label=None)


# ------------------------------------------------------------------------ Parquet

def test_parquet_page_checksum_catches_a_flipped_byte(tmp_path):
    # before: a flipped byte in a page with a checksum was read as a changed value
    good = tmp_path / "good.parquet"
    pq.write_table(pa.table({"a": np.array([1.0, 12345.678, 3.0]), "b": [1.0, 2.0, 0.5],
                             "label": ["x", "y", "x"]}), good, write_page_checksum=True,
                   compression="none", use_dictionary=False, write_statistics=False)
    raw = bytearray(good.read_bytes())
    hits = [m.start() for m in re.finditer(re.escape(struct.pack("<d", 12345.678)), raw)]
    assert len(hits) == 1
    raw[hits[0] + 3] ^= 0x10
    bad = tmp_path / "bad.parquet"
    bad.write_bytes(bytes(raw))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataWarning)
        assert load_table(good, label="label").X[1, 0] == 12345.678
    assert "checksum" in _error(bad, label="label").lower()


def test_parquet_reads_only_the_wanted_columns_within_the_limit(tmp_path, monkeypatch):
    import solver.data as data

    p = tmp_path / "wide.parquet"
    pq.write_table(pa.table({"a": np.arange(4.0), "b": np.arange(4.0) % 2,
                             "note": ["x" * 1000] * 4, "label": ["x", "y", "x", "y"]}), p,
                   compression="zstd")
    assert load_table(p, label="label", ignore_columns=["note"]).feature_names == ("a", "b")
    monkeypatch.setattr(data, "INFLATE_FLOOR", 16)
    monkeypatch.setattr(data, "INFLATE_RATIO", 0)
    assert "would inflate to" in _error(p, label="label", ignore_columns=["note"])


# ------------------------------------------------------------------------ column choice

def test_ignore_columns(tmp_path):
    p = _csv(tmp_path / "ids.csv", "batch_id,a,b,label\nB-1,1,2,x\nB-2,3,4,y\n")
    ds = load_table(p, label="label", ignore_columns=["batch_id"])
    assert ds.feature_names == ("a", "b")
    assert "batch_id" in _error(p, label="label")  # text column, named in the error
    assert "not in the file" in _error(p, label="label", ignore_columns=["lot"])
    assert "cannot be ignored" in _error(p, label="label", ignore_columns=["label"])
    assert "every feature column is ignored" in _error(
        p, label="label", ignore_columns=["batch_id", "a", "b"])
