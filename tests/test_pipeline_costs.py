"""The cheaper paths of the pipeline give the same values as the plain ones.

Each change that made a study's fit or ``kktrace train`` cheaper (issues 15 and 20) is
checked here against the straightforward computation it replaced: npz members stored
without deflating, the fingerprint of text labels framed once per distinct label, the
column-at-once numeral check and parse of CSV cells, decision values by the compiled
kernel, and the row-cache mapping a process keeps between solves.
"""

from __future__ import annotations

import dataclasses
import hashlib
import io
import json
import zipfile

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.datasets import load_breast_cancer
from sklearn.metrics.pairwise import polynomial_kernel, rbf_kernel

import solver
import solver.smo as smo
from solver._intake import NUMERAL, column_reads_fast
from solver._products import COMPILED_MIN_ENTRIES, compiled_values
from solver.data import FINGERPRINT_VERSION, fingerprint, load_table
from solver.kernels import LinearKernel, PolynomialKernel, RBFKernel, SigmoidKernel
from solver.model import Standardiser, model_from_solution
from solver.problem import binary_classification
from solver.store.format import read_npz, write_npz


def test_npz_stores_noise_plainly_and_deflates_repeats():
    rng = np.random.default_rng(0)
    arrays = {"noise": rng.normal(size=5000), "zeros": np.zeros(5000),
              "flags": rng.random(5000) > 0.5, "small": rng.normal(size=10)}
    data = write_npz(arrays)
    kinds = {i.filename: i.compress_type for i in zipfile.ZipFile(io.BytesIO(data)).infolist()}
    assert kinds == {"noise.npy": zipfile.ZIP_STORED, "zeros.npy": zipfile.ZIP_DEFLATED,
                     "flags.npy": zipfile.ZIP_DEFLATED, "small.npy": zipfile.ZIP_DEFLATED}
    back = read_npz(data, "x.npz")
    assert all(np.array_equal(back[k], v) and back[k].dtype == v.dtype
               for k, v in arrays.items())
    assert write_npz(arrays) == data  # deterministic
    with np.load(io.BytesIO(data), allow_pickle=False) as z:  # numpy's own reader agrees
        assert np.array_equal(z["noise"], arrays["noise"])
    # the deflated members are small: zeros shrink by far more than 10x
    sizes = {i.filename: i.compress_size for i in zipfile.ZipFile(io.BytesIO(data)).infolist()}
    assert sizes["zeros.npy"] * 10 < 5000 * 8


def _fingerprint_by_definition(ds) -> str:
    """The encoding written out in solver.data.fingerprint's docstring, one part per label."""
    h = hashlib.sha256()

    def part(b: bytes) -> None:
        h.update(len(b).to_bytes(8, "little"))
        h.update(b)

    header = {"version": FINGERPRINT_VERSION, "n_rows": ds.n_rows,
              "n_features": ds.n_features, "feature_names": list(ds.feature_names),
              "label_name": ds.label_name, "x_dtype": "float64", "label_kind": "str"}
    part(json.dumps(header, sort_keys=True, ensure_ascii=False, separators=(",", ":")).encode())
    part((np.ascontiguousarray(ds.X, dtype="<f8") + 0.0).tobytes())
    h.update(len(ds.labels).to_bytes(8, "little"))
    for v in ds.labels.tolist():
        part(str(v).encode("utf-8"))
    return h.hexdigest()


def test_fingerprint_of_text_labels_follows_its_definition():
    rng = np.random.default_rng(3)
    labels = rng.choice(["pass", "fail", "rework", "Prüfung"], size=400)
    ds = solver.from_arrays(rng.normal(size=(400, 3)), labels, label_name="qc")
    assert ds.labels.dtype.kind not in "iuf"  # text labels
    assert fingerprint(ds) == _fingerprint_by_definition(ds)


@pytest.mark.parametrize("cells, fast", [
    (["1", "-2.5", " 3e4\t", "+.5", "7."], True),
    (["1", "x"], False),
    (["1\n2", "3"], False),            # a cell holding a newline is not two numerals
    (["\u00a01", "2"], True),          # other whitespace: the per-cell check decides
    (["1,5", "2"], False),
    (["nan", "1"], False),
    ([], True),
])
def test_column_check_agrees_with_the_per_cell_rule(cells, fast):
    assert column_reads_fast(cells) is fast
    assert fast == all(NUMERAL.fullmatch(c.strip()) for c in cells)


def test_csv_numbers_parse_to_the_same_bits_as_numpy(tmp_path):
    rng = np.random.default_rng(5)
    X = rng.normal(size=(300, 3)) * 10.0 ** rng.integers(-30, 30, size=(300, 3))
    lines = ["a,b,c,label"] + [f"{float(x[0])!r}, {x[1]:.17e},{x[2]:.6g},{'ab'[i % 2]}"
                               for i, x in enumerate(X)]
    path = tmp_path / "t.csv"
    path.write_text("\n".join(lines) + "\n")
    ds = load_table(path, label="label")
    want = np.array([[float(c) for c in ln.split(",")[:3]] for ln in lines[1:]])
    assert np.array_equal(ds.X, want)
    assert np.array_equal(ds.X, np.array([[c.strip() for c in ln.split(",")[:3]]
                                          for ln in lines[1:]]).astype(np.float64))


@pytest.mark.parametrize("kernel, reference", [
    (RBFKernel(gamma=0.03), lambda A, B: rbf_kernel(A, B, gamma=0.03)),
    (PolynomialKernel(gamma=0.05, degree=3, offset=1.0),
     lambda A, B: polynomial_kernel(A, B, degree=3, gamma=0.05, coef0=1.0)),
    (LinearKernel(), lambda A, B: A @ B.T),
    (SigmoidKernel(gamma=0.01, offset=0.2), lambda A, B: np.tanh(0.01 * A @ B.T + 0.2)),
])
def test_compiled_decision_values_match_scikit_learn_kernels(kernel, reference):
    # outside reference: scikit-learn's pairwise kernels on its bundled breast-cancer data
    X = load_breast_cancer().data
    Z = (X - X.mean(axis=0)) / X.std(axis=0)
    rng = np.random.default_rng(1)
    coef = rng.normal(size=200)
    got = compiled_values(kernel, Z[200:], Z[:200], coef)
    want = reference(Z[200:], Z[:200]) @ coef
    assert np.max(np.abs(got - want)) <= 1e-12 * max(1.0, np.max(np.abs(want)))


def test_model_values_take_the_compiled_path_and_agree_with_the_blocks():
    X = load_breast_cancer().data
    y = load_breast_cancer().target
    std = Standardiser.fit(X)
    prob = binary_classification(std.transform(X), np.where(y > 0, "benign", "malignant"),
                                 kernel=RBFKernel(gamma=0.02), C=3.0)
    res = smo.solve_smo(prob, kkt_tol=1e-4)
    model = model_from_solution(prob, res, std)
    Xbig = np.tile(X, (-(-COMPILED_MIN_ENTRIES // (X.shape[0] * model.support_points.shape[0])), 1))
    assert model.support_points.shape[0] * Xbig.shape[0] >= COMPILED_MIN_ENTRIES
    fast = model.values(Xbig)[: X.shape[0]]
    blocks = np.concatenate([model.kernel.block(std.transform(X[s:s + 100]),
                                                model.support_points) @ model.coefficients
                             for s in range(0, X.shape[0], 100)]) + model.bias
    assert np.max(np.abs(fast - blocks)) <= 1e-12 * np.max(np.abs(blocks))


def _blobs(n: int, seed: int):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 4))
    lab = np.where(X[:, 0] + 0.3 * X[:, 1] ** 2 + rng.normal(scale=0.5, size=n) > 0, "a", "b")
    return X, lab


def test_a_reused_row_cache_mapping_gives_the_bits_of_a_fresh_one():
    # rows above 4 MB go on their own mapping; after a solve it is kept for the next one
    X, lab = _blobs(1500, 0)
    prob = binary_classification(X, lab, kernel=RBFKernel(gamma=0.2), C=5.0)
    smo._SPARE.clear()
    first = smo.solve_smo(prob, kkt_tol=1e-4, threads=1)
    assert len(smo._SPARE) == 1
    # dirty the kept mapping: a solve that read a row slot before writing it would differ
    spare = np.frombuffer(smo._SPARE[0], dtype=np.float64)
    spare[: 8 << 20 >> 3] = np.nan
    del spare
    other = binary_classification(*_blobs(900, 1), kernel=RBFKernel(gamma=1.0), C=1.0)
    smo.solve_smo(other, kkt_tol=1e-4, threads=1)  # uses and returns the same mapping
    again = smo.solve_smo(prob, kkt_tol=1e-4, threads=1)
    assert np.array_equal(first.alpha, again.alpha) and first.bias == again.bias
    assert np.array_equal(first.trace.columns["i"], again.trace.columns["i"])
    assert first.iterations == again.iterations


def test_products_split_over_two_threads_give_the_bits_of_one(monkeypatch):
    import solver._products as products

    if min(smo.available_cores(), smo._threads_from_environment()) < 2:
        pytest.skip("one core or KKTRACE_THREADS=1: the product is not split")
    X, lab = _blobs(3001, 4)
    prob = binary_classification(X, lab, kernel=RBFKernel(gamma=0.3), C=2.0)
    v = np.where(np.arange(3001) % 3 == 0, np.linspace(0.0, 2.0, 3001), 0.0)
    monkeypatch.setattr(products, "SPLIT_MIN_ENTRIES", 1 << 40)
    one = products.compiled_q_times(prob, v)
    ones = compiled_values(prob.kernel, X[:1001], X[1001:], v[1001:])
    monkeypatch.setattr(products, "SPLIT_MIN_ENTRIES", 1)
    assert np.array_equal(products.compiled_q_times(prob, v), one)
    assert np.array_equal(compiled_values(prob.kernel, X[:1001], X[1001:], v[1001:]), ones)


def test_arrow_tables_are_those_pyarrow_infers_and_need_no_pandas():
    import subprocess
    import sys

    import pyarrow as pa

    from solver.store.format import arrow_table

    cols = {"i": [1, 2, None], "f": [1.0, None, 2], "b": [True, None, False],
            "s": ["a", None, "Prüfung"], "none": [None, None, None],
            "npf": np.array([1.5, 2.5, 3.5]), "npi": np.array([1, 2, 3]),
            "npu": np.array(["x", "yy", "z"]), "npb": np.array([True, False, True])}
    got, want = arrow_table(cols), pa.table(cols)  # outside reference: pyarrow's inference
    assert got.schema == want.schema and got.equals(want)
    code = ("import sys; from solver.store.format import arrow_table; "
            "arrow_table({'a': [1, None], 'b': ['x', 'y'], 'c': [0.5, 1.5]}); "
            "print('pandas' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.strip() == "False"


@pytest.mark.filterwarnings("ignore:feature scales differ")
def test_a_fold_prepared_once_gives_the_fits_a_fresh_preparation_gives():
    """A study's worker keeps the per-fold preparation (training subset, standardised rows,
    fingerprints) for the next cells of the fold; the fits are those of a fresh one."""
    from solver.studies import fits as F
    from solver.studies.grid import make_grid
    from solver.studies.runner import study_folds

    X, y = load_breast_cancer(return_X_y=True)
    ds = solver.from_arrays(X[:240], np.where(y[:240] == 1, "benign", "malignant"),
                            label_name="diagnosis")
    data = F.StudyData(ds, study_folds(ds.labels, 3, 0))
    opts = {"kernel": "rbf", "offset": 0.0, "kkt_tol": 1e-3, "iteration_limit": None,
            "trace": "sampled", "standardise": True}
    cells = make_grid("rbf", [0.5, 2.0], [0.02], None).cells()
    job = lambda c, k: F.FitJob(task="binary", fold=k, cells=(c,), keys=("key",),  # noqa: E731
                                warm=False, options=opts)

    def facts(out):  # everything but the seconds the solve took
        o = out[0]
        runs = tuple(dataclasses.replace(r, seconds=0.0) for r in o.view.runs)
        return runs, o.view.attachments["holdout"], json.loads(o.encoded[0].manifest)["data"]

    F._prep.clear()
    kept = [facts(F.fit_chain(data, job(c, 1))) for c in cells]  # the second reuses fold 1
    assert len(F._prep) == 1
    fresh = []
    for c in cells:
        F._prep.clear()
        fresh.append(facts(F.fit_chain(data, job(c, 1))))
    assert kept == fresh
    for k in (0, 2, 1):
        F.fit_chain(data, job(cells[0], k))
    assert len(F._prep) == F._PREP_KEEP  # bounded
    other = F.StudyData(solver.from_arrays(X[:240] * 2.0, ds.labels, label_name="diagnosis"),
                        data.folds)
    got = facts(F.fit_chain(other, job(cells[0], 1)))  # other data: not the kept fold
    assert got[2]["fingerprint"] != kept[0][2]["fingerprint"]
    del data, other
    import gc

    gc.collect()
    assert not F._prep  # the entries went with their data objects


# --- CSV files read by pyarrow (solver._csv_fast) against the csv-module path -------------

_TRICKY = ["1.5", " 1.5", "1.5 ", "\t2", "+1.5", "-.5", ".5", "5.", "1e5", "1E+05", "007",
           "1e-400", "1e400", "-0", "0.1", "nan", "NaN", "inf", "-Infinity", "", " ", "1_0",
           "0x10", "1d5", "+-1", "1e", ".", "abc", "N/A", "1,5", "\u00a01.5", "١٢", "1.5\u2003",
           "9007199254740993", "2.2250738585072011e-308", "4.9e-324", "1.7976931348623157e308"]


def _outcome(path, fast: bool, **kw):
    """(dataset facts or None, error text or None, warnings) of load_table on one path."""
    import warnings

    import solver._csv_fast as cf
    import solver.data as D

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(cf, "FAST_MIN_BYTES", 0)
        if not fast:
            mp.setattr(D, "_read_plain", lambda *a, **k: None)
        try:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                ds = load_table(path, **kw)
        except solver.InvalidInputError as exc:
            return None, str(exc), ()
    labels = None if ds.labels is None else [str(v) for v in ds.labels.tolist()]
    return ((ds.X.view(np.int64).tolist(), labels, ds.feature_names, ds.warnings), None,
            tuple(str(w.message) for w in caught))


@settings(derandomize=True, max_examples=80, deadline=None)
@given(cells=st.lists(st.lists(st.sampled_from(_TRICKY), min_size=2, max_size=2),
                      min_size=1, max_size=6),
       labels=st.lists(st.sampled_from(["pass", "fail", " pass", ""]), min_size=6, max_size=6),
       ending=st.sampled_from(["\n", "\r\n"]), bom=st.booleans(), tail=st.booleans())
def test_a_plain_csv_reads_the_same_on_both_paths(tmp_path_factory, cells, labels, ending,
                                                   bom, tail):
    path = tmp_path_factory.mktemp("csv") / "t.csv"
    rows = ["a,b,label", *(f"{x},{y},{labels[i]}" for i, (x, y) in enumerate(cells))]
    text = ending.join(rows) + (ending if tail else "")
    path.write_bytes((b"\xef\xbb\xbf" if bom else b"") + text.encode("utf-8"))
    for kw in ({"label": "label"}, {"label": "label", "min_classes": 1},
               {"label": None, "ignore_columns": ["label"]}):
        assert _outcome(path, True, **kw) == _outcome(path, False, **kw)


def test_the_plain_csv_path_is_taken_and_gives_float_bits(tmp_path, monkeypatch):
    """Random numerals of 17 significant digits over the whole exponent range: pyarrow's
    values are Python's float of each cell, bit for bit; the fast path was taken."""
    import solver._csv_fast as cf
    import solver.data as D

    rng = np.random.default_rng(5)
    mant = rng.integers(10**16, 10**17, size=(4000, 3))
    expo = rng.integers(-340, 130, size=(4000, 3))  # squares stay finite
    cells = [[f"{'-' if (m + e) % 3 == 0 else ''}{m}e{e}" for m, e in zip(mr, er, strict=True)]
             for mr, er in zip(mant.tolist(), expo.tolist(), strict=True)]
    lab = np.where(rng.random(4000) < 0.5, "pass", "fail")
    path = tmp_path / "n.csv"
    path.write_text("x,y,z,label\n" + "".join(f"{a},{b},{c},{q}\n" for (a, b, c), q
                                              in zip(cells, lab, strict=True)))
    assert path.stat().st_size >= cf.FAST_MIN_BYTES
    taken = []
    real = cf.read_plain_csv
    monkeypatch.setattr(cf, "read_plain_csv", lambda *a: taken.append(1) or real(*a))
    ds = load_table(path, label="label")
    assert taken and isinstance(D._read_plain(path, "", "label", None, 2, None, ","), D.Dataset)
    want = np.array([[float(c) for c in r] for r in cells])
    assert np.array_equal(ds.X.view(np.int64), want.view(np.int64))
    assert ds.labels.tolist() == lab.tolist()


_LABELS = ["pass", " pass", "fail", "1", "2", " 3 ", "1.0", "2.5", "-0", "1e2", "nan", "",
           " ", "inf", "N/A", "10000000000000000000001", "0x1", "yes"]


@settings(derandomize=True, max_examples=60, deadline=None)
@given(pool=st.lists(st.sampled_from(_LABELS), min_size=1, max_size=4, unique=True),
       seed=st.integers(0, 2**16))
def test_text_labels_canonicalised_per_value_equal_row_by_row(pool, seed):
    """Long text label columns are canonicalised once per distinct value
    (solver._intake._canonical_by_value); the array, its type or the error are those of
    the row-by-row rule."""
    import solver._intake as intake

    rng = np.random.default_rng(seed)
    items = [pool[k] for k in rng.integers(0, len(pool), size=intake.BY_VALUE_MIN_ROWS + 7)]

    def run(by_value: bool):
        with pytest.MonkeyPatch.context() as mp:
            if not by_value:
                mp.setattr(intake, "_canonical_by_value", lambda *a: None)
            try:
                out = intake.canonical_labels(np.array(items, dtype=object),
                                              intake.where_index, "f: ", "grade")
            except solver.InvalidInputError as exc:
                return str(exc)
            return out.dtype.str, out.tolist()

    assert run(True) == run(False)
    if intake._canonical_by_value(items, "f: ", "grade") is not None:
        assert not isinstance(run(True), str)


def _csv_writer_bytes(columns) -> bytes:
    """The reference: the standard library's csv.writer with its defaults."""
    import csv

    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(list(columns))
    cols = []
    for c in columns:
        arr = np.asarray(columns[c])
        vals = arr.tolist()
        if arr.dtype.kind == "f":
            vals = list(map(repr, vals))
        elif arr.dtype.kind == "O":
            vals = [repr(v) if isinstance(v, float) else v for v in vals]
        cols.append(vals)
    w.writerows(zip(*cols, strict=True))
    return buf.getvalue().encode()


_TEXT = st.one_of(st.none(), st.booleans(), st.integers(-5, 5),
                  st.floats(allow_nan=True, allow_infinity=True),
                  st.text(alphabet=st.sampled_from('ab ,"\r\n\t;é'), max_size=6))


@settings(derandomize=True, max_examples=120, deadline=None)
@given(n=st.integers(0, 6), width=st.integers(1, 4), data=st.data())
def test_write_csv_gives_the_bytes_of_the_csv_module(n, width, data):
    """solver.store.format.write_csv builds the file a column at a time; its bytes are
    those of csv.writer (the standard library) for float, int, bool and text columns,
    text with commas, quotes and line breaks, None, and a single column."""
    from solver.store.format import write_csv

    columns = {}
    for k in range(width):
        name = data.draw(st.text(alphabet=st.sampled_from('xy ,"\n'), min_size=1, max_size=4))
        kind = data.draw(st.sampled_from(["f", "i", "b", "O"]))
        if kind == "f":
            col = np.array(data.draw(st.lists(st.floats(), min_size=n, max_size=n)), float)
        elif kind == "i":
            col = np.array(data.draw(st.lists(st.integers(-10**12, 10**12), min_size=n,
                                              max_size=n)), dtype=np.int64)
        elif kind == "b":
            col = np.array(data.draw(st.lists(st.booleans(), min_size=n, max_size=n)), bool)
        else:
            col = np.empty(n, dtype=object)
            col[:] = data.draw(st.lists(_TEXT, min_size=n, max_size=n))
        columns[f"{name}{k}"] = col
    assert write_csv(columns) == _csv_writer_bytes(columns)


def test_write_csv_quotes_as_the_csv_module_does_on_hand_picked_cells():
    from solver.store.format import write_csv

    text = np.empty(8, dtype=object)
    text[:] = ["a\rb", "", None, 'x"y', "p,q", "l\nm", 1.5, True]
    for columns in ({"t": text, "v": np.arange(8.0)}, {"t": text}, {'na,"me': text}):
        assert write_csv(columns) == _csv_writer_bytes(columns)
