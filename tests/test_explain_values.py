"""Decision values of the explanation table read off the solver's final gradient
(solver.explanation._values) against the full kernel product, on scikit-learn's bundled
datasets (issue 15): equal to 1e-9 relative, and the check that guards them can fail."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer, load_digits, load_iris, load_wine
from sklearn.metrics.pairwise import rbf_kernel

import solver
from solver.explanation import point_table
from solver.explanation._values import SPOT_TOL, q_alpha
from solver.kernels import RBFKernel
from solver.model import Standardiser
from solver.problem import binary_classification
from solver.result import KeptGradient
from solver.smo import solve_smo

pytestmark = pytest.mark.filterwarnings("ignore::solver.DataWarning")


def _two_classes(name):
    """(X, labels) of a bundled dataset cut to two of its classes (source: scikit-learn's
    bundled copies of the UCI breast cancer, iris, wine and optical digits data)."""
    if name == "breast_cancer":
        X, y = load_breast_cancer(return_X_y=True)
        return X, np.where(y == 1, "benign", "malignant")
    X, y = {"iris": load_iris, "wine": load_wine, "digits": load_digits}[name](return_X_y=True)
    a, b = {"iris": (1, 2), "wine": (1, 2), "digits": (3, 8)}[name]
    keep = (y == a) | (y == b)
    return X[keep], np.where(y[keep] == a, f"class {a}", f"class {b}")


@pytest.mark.parametrize("name", ["breast_cancer", "iris", "wine", "digits"])
@pytest.mark.parametrize("C", [1.0, 100.0])
def test_stored_decision_values_equal_the_full_product(tmp_path, name, C):
    X, labels = _two_classes(name)
    ds = solver.from_arrays(X, labels, label_name="class")
    out = solver.train(ds, C=C, gamma=0.02, store=tmp_path, kkt_tol=1e-3)
    rec = solver.RunStore(tmp_path).load(out.run_id)
    note = rec.attachments["explanation_values"]
    assert note["source"] == "solver_gradient", note
    assert note["rows_checked"] == min(rec.problem.n, 128)
    f_stored = np.asarray(rec.attachments["explanation"]["decision_value"], np.float64)
    # the full product by scikit-learn's pairwise RBF kernel on the stored (standardised) rows
    P = rec.problem
    K = rbf_kernel(P.X, P.X, gamma=0.02)
    f_full = K @ (P.y * rec.result.alpha) + rec.result.bias
    rel = np.abs(f_stored - f_full) / np.maximum(1.0, np.abs(f_full))
    assert rel.max() <= 1e-9, rel.max()


def _solved(C=10.0):
    X, labels = _two_classes("breast_cancer")
    Z = Standardiser.fit(X).transform(X)
    P = binary_classification(Z, labels, kernel=RBFKernel(gamma=0.02), C=C)
    return P, solve_smo(P, kkt_tol=1e-3, trace="off")


def test_a_gradient_that_disagrees_with_the_product_is_not_used():
    P, r = _solved()
    exact = P.q_times(r.alpha)
    rows = np.unique(np.linspace(0, P.n - 1, min(P.n, 128)).round().astype(np.int64))
    bad2 = r.kept_gradient.values.copy()
    bad2[rows[3]] += 100 * SPOT_TOL * max(1.0, abs(exact[rows[3]]))
    qa, note = q_alpha(P, dataclasses.replace(r, kept_gradient=KeptGradient(r.alpha, bad2)))
    assert note["source"] == "kernel_product" and note["largest_relative_difference"] > SPOT_TOL
    np.testing.assert_array_equal(qa, exact)


def test_a_gradient_of_another_alpha_or_a_loaded_run_falls_back_to_the_product(tmp_path):
    P, r = _solved()
    other = r.alpha.copy()
    other[np.flatnonzero(other)[0]] *= 0.5
    qa, note = q_alpha(P, dataclasses.replace(r, alpha=other))
    assert note["source"] == "kernel_product" and "no gradient" in note["reason"]
    np.testing.assert_array_equal(qa, P.q_times(other))
    table = point_table(P, dataclasses.replace(r, kept_gradient=None))
    assert table.values_note["source"] == "kernel_product"
    fresh = point_table(P, r)
    assert fresh.values_note["source"] == "solver_gradient"
    a = np.asarray(table.columns["decision_value"])
    b = np.asarray(fresh.columns["decision_value"])
    assert np.max(np.abs(a - b) / np.maximum(1.0, np.abs(a))) <= 1e-9
    assert list(table.columns["category"]) == list(fresh.columns["category"])
