"""Reference checks of one-vs-one multi-class fits and of class / sample weights.

Outside sources:
- scikit-learn's SVC, which is one-vs-one as well (its documentation says so), on
  scikit-learn's bundled copies of the UCI iris, wine, optical digits and Wisconsin breast
  cancer data (no download).  SVC's pair objective is rebuilt from its stored α·y of the
  pair's support vectors, so each of our pairs is compared with the same pair of theirs.
- a hand-worked three-class example on a line (derivation in the test's comments).

The tie rule: SVC's prediction counts the votes of the pairs, pair (i, j) voting for class i
where its decision value is positive, and a tie goes to the class that comes first in its
(sorted) class order (from memory of the reference library's prediction loop: "the first
class with the most votes").  Ours is the same rule with the pair's sign the other way
round (pair (i, j) votes for j where f_ij > 0, ``solver/tasks/multiclass.py``), so predicted
classes can only differ where some pair's decision value is near zero; those rows are
counted.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer, load_digits, load_iris, load_wine
from sklearn.svm import SVC

from solver.kernels import make_kernel
from solver.model import Standardiser, model_from_solution
from solver.problem import binary_classification
from solver.smo import solve_smo
from solver.tasks import WeightSpec, get_task

MC = get_task("multiclass")


def _standardise(X: np.ndarray) -> np.ndarray:
    sd = X.std(axis=0)
    return (X - X.mean(axis=0)) / np.where(sd > 0, sd, 1.0)


# scikit-learn's bundled datasets; standardised once here and given to both fits as they are
DATASETS = {
    "iris": lambda: load_iris(return_X_y=True),
    "wine": lambda: load_wine(return_X_y=True),
    "digits": lambda: load_digits(return_X_y=True),
}


def _kernels(d: int) -> dict[str, tuple[dict, dict]]:
    g = 1.0 / d  # gamma passed explicitly to both
    return {
        "linear": ({"name": "linear"}, {"kernel": "linear"}),
        "poly": ({"name": "poly", "gamma": g, "offset": 1.0, "degree": 3},
                 {"kernel": "poly", "gamma": g, "coef0": 1.0, "degree": 3}),
        "rbf": ({"name": "rbf", "gamma": g}, {"kernel": "rbf", "gamma": g}),
    }


def _fit_pairs(X, lab, kern, C, weights=None, kkt_tol=1e-5):
    """Our one-vs-one fit through the task (members → problems → SMO), no store."""
    members = MC.members(lab, weights=weights)
    fits = []
    for m in members:
        prob = MC.build_problem(X[m.rows], m, kernel=kern, C=C)
        r = solve_smo(prob, kkt_tol=kkt_tol)
        fits.append((m, prob, r))
    return members, fits


def _svc_pair_alpha(svc: SVC, i: int, j: int, rows: np.ndarray) -> np.ndarray:
    """α of SVC's pair (i, j) on our pair rows ``rows`` (indices into the full data).

    SVC keeps the support vectors grouped by class (counts per class); the coefficients of
    pair (i, j) for class i's support vectors sit in coefficient row j − 1, for class j's in
    row i (the layout of the reference library, from memory)."""
    starts = np.concatenate([[0], np.cumsum(svc.n_support_)])
    coef = svc.dual_coef_
    alpha_full = {}
    for cls, row in ((i, j - 1), (j, i)):
        sl = slice(starts[cls], starts[cls + 1])
        for idx, c in zip(svc.support_[sl], coef[row, sl], strict=True):
            alpha_full[int(idx)] = abs(float(c))
    pos = {int(r): k for k, r in enumerate(rows)}
    a = np.zeros(rows.shape[0])
    for idx, v in alpha_full.items():
        a[pos[idx]] = v
    return a


@pytest.mark.slow
@pytest.mark.parametrize("dataset", sorted(DATASETS))
def test_every_pair_matches_scikit_learn_svc(dataset):
    # scikit-learn SVC (one-vs-one) at tol 1e-5, ours at kkt_tol 1e-5: every pair's dual
    # objective within 1e-6 relative; predicted classes identical except rows where some pair
    # has |f| < 1e-3 or the vote ties (counted in `near`).
    X0, lab = DATASETS[dataset]()
    X = _standardise(X0.astype(np.float64))
    Cs = (1.0,) if dataset == "digits" else (1.0, 10.0)
    for kname, (ours, theirs) in _kernels(X.shape[1]).items():
        for C in Cs:
            kern = make_kernel(ours["name"], **{k: v for k, v in ours.items() if k != "name"})
            members, fits = _fit_pairs(X, lab, kern, C)
            svc = SVC(C=C, tol=1e-5, decision_function_shape="ovo", **theirs).fit(X, lab)
            k = len(svc.classes_)
            pairs = [(i, j) for i in range(k) for j in range(i + 1, k)]
            assert len(fits) == len(pairs) == k * (k - 1) // 2
            for (i, j), (m, prob, r) in zip(pairs, fits, strict=True):
                assert r.success, (dataset, kname, C, m.key, r.message)
                a_svc = _svc_pair_alpha(svc, i, j, m.rows)
                d_ours, d_svc = prob.objective(r.alpha), prob.objective(a_svc)
                assert abs(d_ours - d_svc) <= 1e-6 * abs(d_svc), (dataset, kname, C, m.key,
                                                                 d_ours, d_svc)
            models = [model_from_solution(p, r, Standardiser.identity(X.shape[1]))
                      for _, p, r in fits]
            pred = MC.predict(models, X, MC.describe(members, lab))
            f_svc = -svc.decision_function(X)  # their pair (i, j) is positive for class i
            near = (np.min(np.minimum(np.abs(pred.values), np.abs(f_svc)), axis=1) < 1e-3) \
                | pred.tie
            differ = np.asarray(pred.labels.tolist()) != svc.predict(X)
            assert not np.any(differ & ~near), (dataset, kname, C, np.flatnonzero(differ))
            # the pairs' signs agree wherever neither value is near zero
            far = np.minimum(np.abs(pred.values), np.abs(f_svc)) >= 1e-3
            assert np.all(np.sign(pred.values)[far] == np.sign(f_svc)[far])


def test_class_weights_on_the_three_wine_classes_match_svc():
    # scikit-learn SVC(class_weight=...) scales C per class in every pair, as ours does
    # (uᵢ = C·w_class): each pair's objective within 1e-6 relative; and 'balanced'
    # (w_c = n / (k·n_c), the same formula in both) the same way.
    X0, lab = load_wine(return_X_y=True)
    X = _standardise(X0)
    kern = make_kernel("rbf", gamma=1.0 / X.shape[1])
    for spec, theirs in (({"0": 1.0, "1": 3.0, "2": 0.5}, {0: 1.0, 1: 3.0, 2: 0.5}),
                         ("balanced", "balanced")):
        members, fits = _fit_pairs(X, lab, kern, 2.0, WeightSpec(class_weight=spec))
        svc = SVC(C=2.0, tol=1e-5, kernel="rbf", gamma=1.0 / X.shape[1],
                  class_weight=theirs).fit(X, lab)
        pairs = [(0, 1), (0, 2), (1, 2)]
        for (i, j), (m, prob, r) in zip(pairs, fits, strict=True):
            assert r.success
            a_svc = _svc_pair_alpha(svc, i, j, m.rows)
            d_ours, d_svc = prob.objective(r.alpha), prob.objective(a_svc)
            assert abs(d_ours - d_svc) <= 1e-6 * abs(d_svc), (spec, m.key, d_ours, d_svc)
            # the bounds really are C·w_class (not the unweighted C)
            if spec == "balanced":
                n_c = np.bincount(lab)
                w = len(lab) / (3 * n_c)
                assert np.allclose(prob.upper, 2.0 * w[m.labels])


def _binary_sets():
    bc_X, bc_y = load_breast_cancer(return_X_y=True)
    w_X, w_y = load_wine(return_X_y=True)
    keep = (w_y == 0) | (w_y == 1)
    return {"breast_cancer": (_standardise(bc_X), bc_y),
            "wine_0_1": (_standardise(w_X[keep]), w_y[keep])}


@pytest.mark.parametrize("name", ["breast_cancer", "wine_0_1"])
def test_class_and_sample_weights_match_svc(name):
    # scikit-learn SVC with class_weight= and with sample_weight= (both scale C: per class,
    # per row) against binary_classification's class_weight / sample_weight: dual objective
    # within 1e-6 relative, for linear and RBF.
    X, lab = _binary_sets()[name]
    rng = np.random.default_rng(11)
    sw = rng.uniform(0.2, 3.0, size=lab.shape[0])
    for kname, theirs in (("linear", {"kernel": "linear"}),
                          ("rbf", {"kernel": "rbf", "gamma": 1.0 / X.shape[1]})):
        kern = make_kernel(kname, **({"gamma": 1.0 / X.shape[1]} if kname == "rbf" else {}))
        for ours, fit_kw, svc_kw in (
            ({"class_weight": {0: 2.5, 1: 0.7}}, {}, {"class_weight": {0: 2.5, 1: 0.7}}),
            ({"sample_weight": sw}, {"sample_weight": sw}, {}),
        ):
            prob = binary_classification(X, lab, kernel=kern, C=0.1, **ours)
            r = solve_smo(prob, kkt_tol=1e-5)
            assert r.success
            svc = SVC(C=0.1, tol=1e-5, **theirs, **svc_kw).fit(X, lab, **fit_kw)
            a = np.zeros(prob.n)
            a[svc.support_] = np.abs(svc.dual_coef_[0])
            d_ours, d_svc = prob.objective(r.alpha), prob.objective(a)
            assert abs(d_ours - d_svc) <= 1e-6 * abs(d_svc), (name, kname, ours.keys(),
                                                             d_ours, d_svc)
            # weights change the solution (else the check could not fail)
            plain = solve_smo(binary_classification(X, lab, kernel=kern, C=0.1), kkt_tol=1e-5)
            assert abs(prob.objective(plain.alpha) - d_ours) > 1e-6 * abs(d_ours)


def test_hand_worked_three_classes_on_a_line():
    # Three well-separated classes on a line, linear kernel, C large enough to be a hard
    # margin: class a at x = 0, 1; class b at x = 4, 5; class c at x = 8, 9.
    # Pair (a, b): the nearest points are 1 (a, y = −1) and 4 (b, y = +1).  The hard-margin
    # hyperplane is w x + b0 with w·1 + b0 = −1 and w·4 + b0 = +1, so w = 2/3, b0 = −5/3
    # (f = 0 at x = 2.5).  Only those two points are support vectors, with α equal for both
    # (Σ αᵢ yᵢ = 0) and w = α·(4 − 1) → α = w / 3 = 2/9.  Dual objective (minimised form)
    # ½‖w‖² − Σα = ½·4/9 − 4/9 = −2/9.
    # Pair (b, c) is the same picture shifted by 4: w = 2/3, b0 = −13/3 (f = 0 at 6.5),
    # α = 2/9 on x = 5 and x = 8.
    # Pair (a, c): nearest points 1 and 8, gap 7: w = 2/7, b0 = −9/7 (f = 0 at 4.5),
    # α = w / 7 = 2/49 on x = 1 and x = 8, objective ½·4/49 − 4/49 = −2/49.
    # Votes at x = 4.6: (a, b) → b, (a, c) → c (4.6 > 4.5), (b, c) → b: b wins 2 : 1 : 0.
    # At x = 2.0: a, a, b → a.  At x = 9.5: c, c, c.
    X = np.array([[0.0], [1.0], [4.0], [5.0], [8.0], [9.0]])
    lab = np.array(["a", "a", "b", "b", "c", "c"])
    kern = make_kernel("linear")
    members, fits = _fit_pairs(X, lab, kern, 1e6, kkt_tol=1e-10)
    want = {("a", "b"): (2 / 3, -5 / 3, 2 / 9, -2 / 9),
            ("a", "c"): (2 / 7, -9 / 7, 2 / 49, -2 / 49),
            ("b", "c"): (2 / 3, -13 / 3, 2 / 9, -2 / 9)}
    sv_rows = {("a", "b"): [1, 2], ("a", "c"): [1, 4], ("b", "c"): [3, 4]}
    for m, prob, r in fits:
        w, b0, a, obj = want[m.key]
        assert r.success
        model = model_from_solution(prob, r, Standardiser.identity(1))
        # slope and intercept of the pair's hyperplane, read off two decision values
        f0, f1 = model.values(np.array([[0.0], [1.0]]))
        assert f1 - f0 == pytest.approx(w, abs=1e-8)
        assert f0 == pytest.approx(b0, abs=1e-8)
        alpha_full = np.zeros(6)
        alpha_full[m.rows] = r.alpha
        assert np.flatnonzero(alpha_full > 1e-9).tolist() == sv_rows[m.key]
        assert alpha_full[sv_rows[m.key]] == pytest.approx([a, a], abs=1e-8)
        assert prob.objective(r.alpha) == pytest.approx(obj, abs=1e-9)
    models = [model_from_solution(p, r, Standardiser.identity(1)) for _, p, r in fits]
    pred = MC.predict(models, np.array([[4.6], [2.0], [9.5]]), MC.describe(members, lab))
    assert pred.labels.tolist() == ["b", "a", "c"]
    assert pred.votes.tolist() == [[0, 2, 1], [2, 1, 0], [0, 1, 2]]
    assert not pred.tie.any()
