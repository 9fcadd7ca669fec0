"""Reference comparison: Brier score and log-loss of kktrace's probabilities against
scikit-learn's ``CalibratedClassifierCV(SVC(...), method="sigmoid")`` on held-out splits.

Reported, not asserted equal: the two use different folds, and for several classes
different methods (kktrace: one sigmoid per one-vs-one pair, fitted on that pair's
cross-validated values, combined by pairwise coupling, Wu, Lin & Weng 2004, method 2;
scikit-learn: one sigmoid per class on one-vs-rest decision values, normalised to sum 1).

Data: scikit-learn's bundled breast cancer (569 rows, 2 classes), wine (178 rows, 3 classes)
and digits (1797 rows, 10 classes); a stratified 70 / 30 split (``train_test_split``,
``random_state`` = the split seed).  Both sides: features standardised on the training rows
(kktrace: each pair on its own rows), RBF kernel with the same fixed gamma = 1 / d (d
features; scikit-learn's ``gamma="scale"`` on standardised data, from memory), C = 1,
5 stratified folds.  kktrace's SMO stops at KKT tolerance 1e-3, scikit-learn's SVC at its
default tol 1e-3.

Prints, per dataset and split seed: rows, classes, Brier score (two classes: mean of
(P(positive) − y)²; several: mean over rows of the sum over classes of (p − [true class])²,
Brier 1950) and log-loss of both, their ratio kktrace / reference, accuracy of the most
probable class, and the number of held-out rows where kktrace's most probable class differs
from the class its decision values choose.

Run: ``python tests/benchmarks/bench_calibration.py [--seeds 0 1 2]
[--datasets breast_cancer wine digits]``
"""

from __future__ import annotations

import argparse
import tempfile
import time
import warnings

import numpy as np
from sklearn.calibration import CalibratedClassifierCV
from sklearn.datasets import load_breast_cancer, load_digits, load_wine
from sklearn.model_selection import StratifiedKFold, train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

import solver
from solver.calibration import calibration_evidence, multiclass_evidence, parent_calibration
from solver.data import from_arrays
from solver.model import model_from_solution
from solver.tasks import get_task

LOADERS = {"breast_cancer": load_breast_cancer, "wine": load_wine, "digits": load_digits}


def kktrace_probabilities(Xtr, ytr, Xte, gamma, store):
    """(m, k) probabilities, the decision-value classes (indices) and the class order."""
    ds = from_arrays(Xtr, ytr.astype(str), feature_names=[f"x{i}" for i in range(Xtr.shape[1])],
                     label_name="label")
    out = solver.train(ds, gamma=gamma, C=1.0, kkt_tol=1e-3, probabilities=True,
                       calibration_folds=5, calibration_seed=0, store=store, trace="off",
                       explain=False, parallel="sequential")
    if out.parent is None:  # binary: one run, columns [negative, positive]
        rec = out.records[0]
        from solver.calibration import Calibration

        cal = Calibration.from_attachment(rec.attachments["calibration"])
        model = model_from_solution(rec.problem, rec.result, rec.standardiser)
        f = model.values(Xte)
        classes = [str(v) for v in model.labels]
        return cal.probabilities(f), (f > 0).astype(np.int64), classes
    parent = out.parent
    pc = parent_calibration(parent, out.records)
    models = [model_from_solution(r.problem, r.result, r.standardiser) for r in out.records]
    pred = get_task(parent.task).predict(models, Xte, parent.info)
    classes = [str(c) for c in parent.info["class_values"]]
    voted = np.array([classes.index(str(v)) for v in pred.labels.tolist()], dtype=np.int64)
    return pc.probabilities(pred.values), voted, classes


def reference_probabilities(Xtr, ytr, Xte, gamma, seed):
    """scikit-learn's sigmoid calibration of an RBF SVC (reference library)."""
    est = make_pipeline(StandardScaler(), SVC(kernel="rbf", C=1.0, gamma=gamma))
    cal = CalibratedClassifierCV(est, method="sigmoid",
                                 cv=StratifiedKFold(5, shuffle=True, random_state=seed))
    cal.fit(Xtr, ytr.astype(str))
    return cal.predict_proba(Xte), [str(c) for c in cal.classes_]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, nargs="+", default=[0])
    ap.add_argument("--datasets", nargs="+", default=list(LOADERS), choices=list(LOADERS))
    args = ap.parse_args()
    head = (f"{'data':<14}{'seed':>5}{'rows':>6}{'k':>4}  {'Brier kk':>9}{'Brier ref':>10}"
            f"{'ratio':>7}  {'logloss kk':>10}{'logloss ref':>12}{'ratio':>7}  "
            f"{'acc kk':>7}{'acc ref':>8}{'disagree':>9}{'s kk':>7}{'s ref':>7}")
    print(head)
    print("-" * len(head))
    for name in args.datasets:
        X, y = LOADERS[name](return_X_y=True)
        gamma = 1.0 / X.shape[1]
        for seed in args.seeds:
            Xtr, Xte, ytr, yte = train_test_split(X, y, test_size=0.3, stratify=y,
                                                  random_state=seed)
            with tempfile.TemporaryDirectory() as store, warnings.catch_warnings():
                warnings.simplefilter("ignore")
                t0 = time.perf_counter()
                P, voted, classes = kktrace_probabilities(Xtr, ytr, Xte, gamma, store)
                t1 = time.perf_counter()
                R, rclasses = reference_probabilities(Xtr, ytr, Xte, gamma, seed)
                t2 = time.perf_counter()
            R = R[:, [rclasses.index(c) for c in classes]]
            truth = np.array([classes.index(str(v)) for v in yte], dtype=np.int64)
            if len(classes) == 2:  # the usual binary Brier score, mean (P(positive) - y)^2
                pos = truth == 1
                ek = calibration_evidence(P[:, 1], pos, np.where(voted == 1, 1.0, -1.0))
                er = calibration_evidence(R[:, 1], pos, R[:, 1] - 0.5)
            else:
                ek = multiclass_evidence(P, truth, voted)
                er = multiclass_evidence(R, truth, np.argmax(R, axis=1))
            acc_k = float(np.mean(np.argmax(P, axis=1) == truth))
            acc_r = float(np.mean(np.argmax(R, axis=1) == truth))
            print(f"{name:<14}{seed:>5}{len(yte):>6}{len(classes):>4}  "
                  f"{ek['brier_score']:>9.4f}{er['brier_score']:>10.4f}"
                  f"{ek['brier_score'] / er['brier_score']:>7.2f}  "
                  f"{ek['log_loss']:>10.4f}{er['log_loss']:>12.4f}"
                  f"{ek['log_loss'] / er['log_loss']:>7.2f}  "
                  f"{acc_k:>7.3f}{acc_r:>8.3f}{ek['disagreements']:>9d}"
                  f"{t1 - t0:>7.1f}{t2 - t1:>7.1f}")
    print("Brier: two classes mean (P(positive) - y)^2, else mean over rows of sum over "
          "classes of (p - [true class])^2; log-loss: "
          "-mean log p(true class); disagree: held-out rows where kktrace's most probable "
          "class differs from its decision-value class.")


if __name__ == "__main__":
    main()
