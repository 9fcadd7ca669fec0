"""Decision values from the support vectors only equal the full n × n product.

Reference: scikit-learn's bundled datasets (breast cancer, wine, iris); the full product
K·(αy) is computed here independently with scikit-learn's ``rbf_kernel`` (reference library).
"""

import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer, load_iris, load_wine
from sklearn.metrics.pairwise import rbf_kernel

from solver.explanation._table import decision_on_training
from solver.kernels import RBFKernel
from solver.problem import binary_classification
from solver.smo import solve_smo


@pytest.mark.parametrize("loader", [load_breast_cancer, load_wine, load_iris])
def test_support_only_decision_equals_full_product(loader):
    X, t = loader(return_X_y=True)
    X = (X - X.mean(0)) / X.std(0)
    y = np.where(t == t.max(), 1, 0)
    prob = binary_classification(X, y, kernel=RBFKernel(gamma=0.1), C=1.0)
    res = solve_smo(prob, kkt_tol=1e-3)
    alpha = np.asarray(res.alpha)
    assert 0 < np.count_nonzero(alpha) < prob.n  # some rows carry no weight
    f = decision_on_training(prob, alpha, float(res.bias))
    full = rbf_kernel(prob.X, prob.X, gamma=0.1) @ (alpha * prob.y) + float(res.bias)
    np.testing.assert_allclose(f, full, rtol=1e-9, atol=1e-9 * np.max(np.abs(full)))
