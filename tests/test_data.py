"""Data intake: loaders, validation messages (file / row / column), warnings, fingerprint."""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from solver.data import Dataset, fingerprint, from_arrays, load_table
from solver.errors import DataWarning, InvalidInputError

NAMES = ["thickness", "moisture", "hardness"]


def table(rng, n: int = 8):
    """Small clean table: float features on comparable scales, labels ±1 (both present)."""
    X = rng.normal(size=(n, 3)) * np.array([1.0, 2.0, 0.5]) + np.array([10.0, 0.0, -3.0])
    y = np.where(np.arange(n) % 3 == 0, -1, 1)
    return X, y


def write_csv(path: Path, header, rows) -> Path:
    lines = [",".join(header)] + [",".join(str(c) for c in r) for r in rows]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def csv_of(path: Path, X, y, names=NAMES, label="status") -> Path:
    # repr(float) round-trips exactly (shortest repr, Python ≥ 3.1)
    rows = [[*map(repr, map(float, x)), v] for x, v in zip(X, y, strict=True)]
    return write_csv(path, [*names, label], rows)


# ---------------------------------------------------------------------- happy paths

def test_csv_basic(tmp_path, rng):
    X, y = table(rng)
    with warnings.catch_warnings():
        warnings.simplefilter("error", DataWarning)
        ds = load_table(csv_of(tmp_path / "batch.csv", X, y), label="status")
    assert isinstance(ds, Dataset)
    np.testing.assert_array_equal(ds.X, X)
    assert ds.labels.dtype == np.int64 and ds.labels.tolist() == y.tolist()
    assert ds.feature_names == tuple(NAMES) and ds.label_name == "status"
    assert ds.source.endswith("batch.csv") and ds.warnings == ()
    assert (ds.n_rows, ds.n_features) == (8, 3)
    assert not ds.X.flags.writeable
    d = ds.describe()
    assert json.loads(json.dumps(d)) == d and d["fingerprint"] == fingerprint(ds)


def test_csv_quotes_bom_spaces_and_blank_lines(tmp_path):
    p = tmp_path / "q.csv"
    p.write_bytes('\ufeff"a", b ,label\n1.5, 2 ,"yes"\n\n-3,4e1, no \n0,1,yes\n'.encode())
    ds = load_table(p, label="label")
    assert ds.feature_names == ("a", "b")
    np.testing.assert_array_equal(ds.X, [[1.5, 2.0], [-3.0, 40.0], [0.0, 1.0]])
    assert ds.labels.tolist() == ["yes", "no", "yes"]


def test_feature_columns_and_query_data(tmp_path, rng):
    X, y = table(rng)
    p = csv_of(tmp_path / "t.csv", X, y)
    ds = load_table(p, label="status", feature_columns=["hardness", "thickness"])
    assert ds.feature_names == ("hardness", "thickness")
    np.testing.assert_array_equal(ds.X, X[:, [2, 0]])
    q = load_table(p, label=None, feature_columns=NAMES)
    assert q.labels is None and q.label_name is None
    np.testing.assert_array_equal(q.X, X)


def test_parquet_npy_npz_load(tmp_path, rng):
    X, y = table(rng)
    pq.write_table(pa.table({"thickness": X[:, 0], "moisture": X[:, 1],
                             "hardness": X[:, 2], "status": y}), tmp_path / "t.parquet")
    ds = load_table(tmp_path / "t.parquet", label="status")
    np.testing.assert_array_equal(ds.X, X)
    assert ds.labels.tolist() == y.tolist()

    np.save(tmp_path / "t.npy", np.column_stack([X, y]))
    dn = load_table(tmp_path / "t.npy", label="col4")
    assert dn.feature_names == ("col1", "col2", "col3") and dn.label_name == "col4"
    assert dn.labels.dtype == np.int64 and dn.labels.tolist() == y.tolist()
    assert load_table(tmp_path / "t.npy", label=None).n_features == 4

    np.savez(tmp_path / "t.npz", X=X, y=y.astype(float), feature_names=np.array(NAMES),
             label_name=np.array("status"))
    dz = load_table(tmp_path / "t.npz", label="status")
    np.testing.assert_array_equal(dz.X, X)
    assert dz.labels.tolist() == y.tolist()
    np.savez(tmp_path / "u.npz", X=X, labels=np.array(["a", "b"] * 4))
    assert load_table(tmp_path / "u.npz", label="labels").labels.tolist() == ["a", "b"] * 4


def test_parquet_integer_bool_and_text_number_columns(tmp_path):
    p = tmp_path / "m.parquet"
    pq.write_table(pa.table({"count": pa.array([1, 2, 3], pa.int32()),
                             "flag": [True, False, True],
                             "text": ["1.5", " 2", "3e0"],
                             "cls": ["x", "y", "x"]}), p)
    ds = load_table(p, label="cls")
    np.testing.assert_array_equal(ds.X, [[1, 1, 1.5], [2, 0, 2], [3, 1, 3]])


# ------------------------------------------------------------------------ labels

@pytest.mark.parametrize("raw,expected,dtype", [
    (["1", "-1", "1"], [1, -1, 1], np.int64),
    (["1.0", "2.0", "1"], [1, 2, 1], np.int64),
    ([1.0, -1.0, 1.0], [1, -1, 1], np.int64),
    (["0.5", "1", "1"], [0.5, 1.0, 1.0], np.float64),
    ([" yes", "no ", "yes"], ["yes", "no", "yes"], str),
    ([True, False, True], ["True", "False", "True"], str),
    (np.array([1, "a", 1], dtype=object), ["1", "a", "1"], str),
])
def test_label_canonicalisation(raw, expected, dtype):
    ds = from_arrays(np.arange(6.0).reshape(3, 2), raw)
    assert ds.labels.tolist() == expected
    assert np.issubdtype(ds.labels.dtype, dtype)


def test_dataframe_columns_become_feature_names():
    import pandas as pd

    df = pd.DataFrame({"thickness": [1.0, 2.0, 3.0], "moisture": [0.1, 0.3, 0.2]})
    ds = from_arrays(df, ["a", "b", "a"])
    assert ds.feature_names == ("thickness", "moisture")
    np.testing.assert_array_equal(ds.X, df.to_numpy())


def test_min_classes_one_for_evaluation_data():
    ds = from_arrays(np.eye(3), ["a", "a", "a"], min_classes=1)
    assert ds.labels.tolist() == ["a"] * 3


# ------------------------------------------------------------------ fingerprint

def test_fingerprint_identical_across_formats(tmp_path, rng):
    X, y = table(rng, n=12)
    ref = from_arrays(X, y.astype(str), feature_names=NAMES, label_name="status")
    via_csv = load_table(csv_of(tmp_path / "f.csv", X, y), label="status")
    pq.write_table(pa.table({"thickness": X[:, 0], "moisture": X[:, 1],
                             "hardness": X[:, 2], "status": y}), tmp_path / "f.parquet")
    via_parquet = load_table(tmp_path / "f.parquet", label="status")
    np.savez(tmp_path / "f.npz", X=X, y=y.astype(np.float64), feature_names=np.array(NAMES),
             label_name=np.array("status"))
    via_npz = load_table(tmp_path / "f.npz", label="status")
    digests = {d.fingerprint for d in (ref, via_csv, via_parquet, via_npz)}
    assert len(digests) == 1 and len(next(iter(digests))) == 64
    # unnamed columns: .npy and arrays without names agree too
    np.save(tmp_path / "f.npy", np.column_stack([X, y]))
    assert (load_table(tmp_path / "f.npy", label="col4").fingerprint
            == from_arrays(X, y, label_name="col4").fingerprint)


def test_fingerprint_changes_with_any_value(rng):
    X, y = table(rng)
    base = from_arrays(X, y, feature_names=NAMES, label_name="status").fingerprint
    X2 = X.copy()
    X2[3, 1] = np.nextafter(X2[3, 1], np.inf)  # one value, one ulp
    y2 = y.copy()
    y2[5] = -y2[5]
    variants = [
        from_arrays(X2, y, feature_names=NAMES, label_name="status"),
        from_arrays(X, y2, feature_names=NAMES, label_name="status"),
        from_arrays(X, y, feature_names=["thickness", "moisture", "hard"], label_name="status"),
        from_arrays(X, y, feature_names=NAMES, label_name="class"),
        from_arrays(X, None, feature_names=NAMES),
        from_arrays(X, np.where(y > 0, "1", "minus"), feature_names=NAMES, label_name="status"),
        from_arrays(X[:, [1, 0, 2]], y, feature_names=[NAMES[i] for i in (1, 0, 2)],
                    label_name="status"),
    ]
    digests = [v.fingerprint for v in variants]
    assert base not in digests and len(set(digests)) == len(digests)
    # the source name and negative zero do not matter
    Xz = X.copy()
    Xz[0, 0] = 0.0
    Xn = Xz.copy()
    Xn[0, 0] = -0.0
    assert (from_arrays(Xz, y, source="a").fingerprint
            == from_arrays(Xn, y, source="b").fingerprint)


def test_fingerprint_distinguishes_text_and_numbers():
    X = np.eye(2)
    assert from_arrays(X, ["1", "2"]).fingerprint == from_arrays(X, [1, 2]).fingerprint
    assert from_arrays(X, [1.5, 2]).fingerprint != from_arrays(X, ["1.5", "2x"]).fingerprint


# --------------------------------------------------------------------- bad input

def bad_csv(tmp_path, body: str, name="bad.csv") -> Path:
    p = tmp_path / name
    p.write_text(body, encoding="utf-8")
    return p


@pytest.mark.parametrize("body,needles", [
    ("a,b,y\n1,2,p\n3,nan,q\n", ["bad.csv", "row 2 (line 3)", "column 'b'", "NaN"]),
    ("a,b,y\n1,2,p\n3,4,q\n5,-inf,p\n", ["bad.csv", "row 3 (line 4)", "column 'b'", "infinite"]),
    ("a,b,y\n1,2,p\n3,4.2.1,q\n",
     ["bad.csv", "row 2 (line 3)", "column 'b'", "'4.2.1' is not a number"]),
    ("a,b,y\n1,,p\n3,4,q\n", ["bad.csv", "row 1 (line 2)", "column 'b'", "empty cell"]),
    ("a,b,y\n1,2,p\n3,4,\n", ["bad.csv", "row 2 (line 3)", "label column 'y'", "missing"]),
    ("a,b,y\n1,2,p\n3,4,NaN\n", ["bad.csv", "row 2 (line 3)", "label column 'y'", "missing"]),
    ("a,b,y\n1,2,p\n3,4,p\n", ["bad.csv", "label column 'y'", "1 distinct value", "'p'",
                              "at least 2 classes"]),
    ("a,b,y\n1,2,p\n3,4\n", ["bad.csv", "row 2 (line 3)", "2 fields", "header has 3"]),
    ("a,b,y\n", ["bad.csv", "no data rows"]),
    ("", ["bad.csv", "empty", "header"]),
    ("a,b,a,y\n1,2,3,p\n", ["bad.csv", "columns 1 and 3", "'a'", "unique"]),
    ("a,,y\n1,2,p\n", ["bad.csv", "column 2 has an empty name"]),
    ("a,b,cls\n1,2,p\n3,4,q\n", ["bad.csv", "no label column 'y'", "'a', 'b', 'cls'"]),
    ('a,b,y\n1,"2,p\n', ["bad.csv", "malformed CSV"]),
])
def test_csv_errors_name_file_row_column(tmp_path, body, needles):
    with pytest.raises(InvalidInputError) as err:
        load_table(bad_csv(tmp_path, body), label="y")
    for needle in needles:
        assert needle in str(err.value), (needle, str(err.value))


def test_blank_lines_shift_line_numbers_not_rows(tmp_path):
    p = bad_csv(tmp_path, "a,y\n1,p\n\n\n2,q\nx,p\n")
    with pytest.raises(InvalidInputError, match=r"row 3 \(line 6\), column 'a'"):
        load_table(p, label="y")


def test_file_level_errors(tmp_path):
    with pytest.raises(InvalidInputError, match=r"missing\.csv: file not found"):
        load_table(tmp_path / "missing.csv", label="y")
    (tmp_path / "dir.csv").mkdir()
    with pytest.raises(InvalidInputError, match=r"dir\.csv: not a regular file"):
        load_table(tmp_path / "dir.csv", label="y")
    (tmp_path / "t.xlsx").write_bytes(b"x")
    with pytest.raises(InvalidInputError, match=r"t\.xlsx: unsupported file type '\.xlsx'"):
        load_table(tmp_path / "t.xlsx", label="y")
    (tmp_path / "latin.csv").write_bytes("a,y\n1,caf\xe9\n".encode("latin-1"))
    with pytest.raises(InvalidInputError, match=r"latin\.csv: cannot read the file as UTF-8"):
        load_table(tmp_path / "latin.csv", label="y")


@pytest.mark.parametrize("suffix,reader", [(".parquet", "Parquet"), (".npy", "NumPy"),
                                           (".npz", "NumPy")])
def test_corrupt_binary_files(tmp_path, suffix, reader):
    p = tmp_path / f"broken{suffix}"
    p.write_bytes(b"PAR1 this is not really a file \x00\x01\x02" * 3)
    with pytest.raises(InvalidInputError, match=rf"broken\{suffix}: cannot read as {reader}"):
        load_table(p, label="y")


class _Payload:
    """Unpickling this would call open(marker, "w") — loading must never do that."""

    def __init__(self, marker: Path):
        self.marker = marker

    def __reduce__(self):
        return (open, (str(self.marker), "w"))


@pytest.mark.parametrize("suffix", [".npy", ".npz"])
def test_object_arrays_are_refused_without_running_code(tmp_path, suffix):
    marker = tmp_path / "ran.txt"
    arr = np.array([[_Payload(marker), 1.0]], dtype=object)
    p = tmp_path / f"evil{suffix}"
    if suffix == ".npy":
        np.save(p, arr, allow_pickle=True)
    else:
        np.savez(p, X=arr)
    with pytest.raises(InvalidInputError, match=rf"evil\{suffix}: the file holds Python objects"):
        load_table(p, label=None)
    assert not marker.exists()


def test_parquet_errors(tmp_path):
    p = tmp_path / "e.parquet"
    pq.write_table(pa.table({"a": [1.0, None, 2.0], "y": ["p", "q", "p"]}), p)
    with pytest.raises(InvalidInputError, match=r"e\.parquet: row 2 \(index 1\), column 'a': "
                                                r"missing value"):
        load_table(p, label="y")
    pq.write_table(pa.table({"a": [1.0, 2.0, 3.0], "y": ["p", None, "p"]}), p)
    with pytest.raises(InvalidInputError, match=r"e\.parquet: row 2 \(index 1\), label column "
                                                r"'y': label is missing"):
        load_table(p, label="y")
    pq.write_table(pa.table({"a": [1.0, 2.0], "when": pa.array([1, 2], pa.timestamp("s")),
                             "y": ["p", "q"]}), p)
    with pytest.raises(InvalidInputError, match=r"e\.parquet: column 'when' has type timestamp"):
        load_table(p, label="y")
    pq.write_table(pa.table({"a": ["1", "x"], "y": ["p", "q"]}), p)
    with pytest.raises(InvalidInputError, match=r"row 2 \(index 1\), column 'a': 'x' is not"):
        load_table(p, label="y")
    dup = pa.Table.from_arrays([pa.array([1.0, 2.0]), pa.array([3.0, 4.0]),
                                pa.array(["p", "q"])], names=["a", "a", "y"])
    pq.write_table(dup, p)
    with pytest.raises(InvalidInputError, match=r"e\.parquet: columns 1 and 2 are both named 'a'"):
        load_table(p, label="y")
    pq.write_table(pa.table({"a": pa.array([], pa.float64()), "y": pa.array([], pa.string())}), p)
    with pytest.raises(InvalidInputError, match=r"e\.parquet: the table has no data rows"):
        load_table(p, label="y")


def test_npy_npz_errors(tmp_path):
    np.save(tmp_path / "one.npy", np.arange(3.0))
    with pytest.raises(InvalidInputError, match=r"one\.npy: expected a 2-D array"):
        load_table(tmp_path / "one.npy", label=None)
    np.save(tmp_path / "empty.npy", np.zeros((0, 3)))
    with pytest.raises(InvalidInputError, match=r"empty\.npy: the array has no data rows"):
        load_table(tmp_path / "empty.npy", label=None)
    np.save(tmp_path / "m.npy", np.array([[1.0, 2.0], [np.inf, 1.0]]))
    with pytest.raises(InvalidInputError, match=r"m\.npy: row 2 \(index 1\), column 'col1': "
                                                r"an infinite value"):
        load_table(tmp_path / "m.npy", label=None)
    with pytest.raises(InvalidInputError, match=r"no label column 'y'; available columns: "
                                                r"'col1', 'col2'"):
        load_table(tmp_path / "m.npy", label="y")

    X = np.arange(8.0).reshape(4, 2)
    np.savez(tmp_path / "a.npz", features=X)
    with pytest.raises(InvalidInputError, match=r"a\.npz: no array named 'X'; the archive holds "
                                                r"features"):
        load_table(tmp_path / "a.npz", label=None)
    np.savez(tmp_path / "b.npz", X=X, y=np.array([1, -1, 1]))
    with pytest.raises(InvalidInputError, match=r"b\.npz: label array 'y' has shape \(3,\) but "
                                                r"'X' has 4 rows"):
        load_table(tmp_path / "b.npz", label="y")
    np.savez(tmp_path / "c.npz", X=X, y=np.array([1, -1, 1, 1]), label_name=np.array("status"))
    with pytest.raises(InvalidInputError, match=r"c\.npz: no label column 'y'; the archive's "
                                                r"labels are named 'status'"):
        load_table(tmp_path / "c.npz", label="y")
    np.savez(tmp_path / "d.npz", X=X, feature_names=np.array(["u", "u"]))
    with pytest.raises(InvalidInputError, match=r"d\.npz: columns 1 and 2 are both named 'u'"):
        load_table(tmp_path / "d.npz", label=None)
    np.savez(tmp_path / "e.npz", X=X, feature_names=np.array(["u", "v", "w"]))
    with pytest.raises(InvalidInputError, match=r"e\.npz: 'feature_names' has 3 names but 'X' "
                                                r"has 2 columns"):
        load_table(tmp_path / "e.npz", label=None)
    np.savez(tmp_path / "f.npz", X=X)
    with pytest.raises(InvalidInputError, match=r"f\.npz: no label array"):
        load_table(tmp_path / "f.npz", label="y")


def test_feature_column_selection_errors(tmp_path, rng):
    X, y = table(rng)
    p = csv_of(tmp_path / "s.csv", X, y)
    with pytest.raises(InvalidInputError, match=r"s\.csv: no feature column\(s\) 'density'; "
                                                r"available columns: 'thickness'"):
        load_table(p, label="status", feature_columns=["thickness", "density"])
    with pytest.raises(InvalidInputError, match="'status' is the label column"):
        load_table(p, label="status", feature_columns=["thickness", "status"])
    with pytest.raises(InvalidInputError, match="entries 1 and 2 are both named 'moisture'"):
        load_table(p, label="status", feature_columns=["moisture", "moisture"])
    with pytest.raises(InvalidInputError, match="no feature columns"):
        load_table(p, label="status", feature_columns=[])
    text = csv_of(tmp_path / "text.csv", X, np.where(y > 0, "pass", "fail"))
    with pytest.raises(InvalidInputError, match=r"text\.csv: row 1 \(line 2\), column 'status': "
                                                r"'fail' is not a number"):
        load_table(text, label=None)  # the text label column read as a feature


def test_from_arrays_errors():
    X = np.arange(12.0).reshape(4, 3)
    with pytest.raises(InvalidInputError, match=r"labels have shape \(3,\) but X has 4 rows"):
        from_arrays(X, [1, 2, 1])
    with pytest.raises(InvalidInputError, match="no data rows"):
        from_arrays(np.zeros((0, 3)), [])
    with pytest.raises(InvalidInputError, match="no feature columns"):
        from_arrays(np.zeros((3, 0)))
    with pytest.raises(InvalidInputError, match="2-D"):
        from_arrays(np.arange(3.0))
    with pytest.raises(InvalidInputError, match="columns 2 and 3 are both named 'b'"):
        from_arrays(X, feature_names=["a", "b", "b"])
    with pytest.raises(InvalidInputError, match="2 feature names given for 3 columns"):
        from_arrays(X, feature_names=["a", "b"])
    with pytest.raises(InvalidInputError, match="label name 'a' is also a feature name"):
        from_arrays(X, [1, 2, 1, 2], feature_names=["a", "b", "c"], label_name="a")
    Xn = X.copy()
    Xn[2, 1] = np.nan
    with pytest.raises(InvalidInputError, match=r"row 3 \(index 2\), column 'b': NaN"):
        from_arrays(Xn, feature_names=["a", "b", "c"])
    Xo = X.astype(object)
    Xo[1, 2] = "heavy"
    with pytest.raises(InvalidInputError, match=r"row 2 \(index 1\), column 'col3': 'heavy'"):
        from_arrays(Xo)
    with pytest.raises(InvalidInputError, match=r"row 4 \(index 3\), labels: label is missing"):
        from_arrays(X, ["a", "b", "a", None])
    with pytest.raises(InvalidInputError, match=r"row 2 \(index 1\), label column 'y'"):
        from_arrays(X, [1.0, np.nan, 2.0, 1.0], label_name="y")
    with pytest.raises(InvalidInputError, match="1 distinct value"):
        from_arrays(X, [7, 7, 7, 7])
    with pytest.raises(InvalidInputError, match=r"src\.bin: "):
        from_arrays(X, [7, 7, 7, 7], source="src.bin")


# ----------------------------------------------------------------------- warnings

def test_conflicting_duplicates_warned_with_rows(tmp_path):
    p = write_csv(tmp_path / "dup.csv", ["a", "b", "y"],
                  [[1, 2, "p"], [3, 4, "q"], [1, 2, "q"], [5, 6, "p"], [3, 4, "q"], [1, 2, "p"]])
    with pytest.warns(DataWarning, match="identical features but different labels") as rec:
        ds = load_table(p, label="y")
    msg = str(rec[0].message)
    assert "dup.csv" in msg and "row 1 (line 2), row 3 (line 4), row 6 (line 7)" in msg
    assert "row 2 (line 3)" not in msg  # rows 2 and 5 agree: not a conflict
    assert rec[0].filename == __file__  # the warning points at the caller
    assert any("identical features" in w for w in ds.warnings)


def test_constant_and_unscaled_features_warned():
    rng = np.random.default_rng(7)
    X = np.column_stack([rng.normal(size=20), np.full(20, 3.0), rng.normal(size=20) * 5e4])
    with pytest.warns(DataWarning) as rec:
        ds = from_arrays(X, np.arange(20) % 2, feature_names=["ratio", "line", "mass_mg"])
    texts = [str(r.message) for r in rec]
    assert len(ds.warnings) == 2 and list(ds.warnings) == texts
    assert "constant feature column(s) 'line'" in texts[0]
    assert "'mass_mg'" in texts[1] and "'ratio'" in texts[1] and "differ by a factor" in texts[1]


def test_scales_within_1e3_not_warned():
    X = np.column_stack([np.linspace(0, 1, 10), np.linspace(0, 900, 10)])
    with warnings.catch_warnings():
        warnings.simplefilter("error", DataWarning)
        assert from_arrays(X, np.arange(10) % 2).warnings == ()


def test_parquet_is_read_single_threaded(tmp_path, monkeypatch):
    """Data files and stored tables are read without Arrow's thread pool: once started, it
    aborted about 1 CLI exit in 20 ("terminate called without an active exception")."""
    from solver.store.format import read_table, write_table

    calls = []
    original = pq.ParquetFile.read

    def spy(self, *args, **kwargs):
        calls.append(kwargs.get("use_threads", True))
        return original(self, *args, **kwargs)

    monkeypatch.setattr(pq.ParquetFile, "read", spy)
    pq.write_table(pa.table({"x": [1.0, 2.0, 3.0], "y": [1, -1, 1]}), tmp_path / "t.parquet")
    load_table(tmp_path / "t.parquet", label="y")
    read_table(write_table({"a": np.arange(3.0)}), "a.parquet")
    assert calls == [False, False]
