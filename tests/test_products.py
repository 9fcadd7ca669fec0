"""Q v by the compiled kernel (solver/_products.py) against the full product K·(y∘v)
written out with numpy, on bundled datasets (scikit-learn's breast cancer and digits)."""

from __future__ import annotations

import numpy as np
import pytest

from solver._products import COMPILED_MIN_ENTRIES, compiled_q_times, use_compiled
from solver.kernels import CallableKernel, make_kernel
from solver.model import Standardiser
from solver.problem import binary_classification
from solver.solvers import solve

KERNELS = [("linear", {}), ("poly", {"gamma": 0.05, "degree": 3, "offset": 1.0}),
           ("rbf", {"gamma": 0.03}), ("sigmoid", {"gamma": 0.01, "offset": -0.5})]


def _data(name: str):
    from sklearn.datasets import load_breast_cancer, load_digits

    if name == "breast_cancer":
        X, y = load_breast_cancer(return_X_y=True)
    else:
        X, y = load_digits(return_X_y=True)
        keep = (y == 3) | (y == 8)
        X, y = X[keep], (y[keep] == 8).astype(int)
    return Standardiser.fit(X).transform(X), y


@pytest.mark.parametrize("kname,params", KERNELS)
@pytest.mark.parametrize("dataset", ["breast_cancer", "digits_3_8"])
def test_compiled_product_equals_the_full_product(dataset, kname, params):
    X, y = _data(dataset)
    prob = binary_classification(X, y, kernel=make_kernel(kname, **params), C=1.0)
    alpha = solve(prob, method="smo", kkt_tol=1e-3).alpha
    full = prob.y * (prob.kernel.block(prob.X, prob.X) @ (prob.y * alpha))  # every column
    fast = compiled_q_times(prob, alpha)
    assert fast is not None
    scale = max(1.0, float(np.max(np.abs(full))))
    assert float(np.max(np.abs(fast - full))) <= 1e-9 * scale
    # and the explanation's decision values through q_times, whichever path it takes
    assert float(np.max(np.abs(prob.q_times(alpha) - full))) <= 1e-9 * scale


def test_kernels_the_compiled_code_does_not_know_keep_numpy(monkeypatch):
    X, y = _data("breast_cancer")
    kern = CallableKernel(lambda a, b: a @ b.T)
    prob = binary_classification(X[:60], y[:60], kernel=kern, C=1.0)
    assert compiled_q_times(prob, np.ones(60)) is None
    assert use_compiled(COMPILED_MIN_ENTRIES, 1)
    assert not use_compiled(COMPILED_MIN_ENTRIES - 1, 1)
    monkeypatch.setenv("NUMBA_DISABLE_JIT", "1")
    assert not use_compiled(10 * COMPILED_MIN_ENTRIES, 1)
