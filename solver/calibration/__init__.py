"""Probability outputs: Platt scaling on cross-validated decision values, pairwise
coupling for several classes, and the calibration evidence a validator files.

>>> from solver.calibration import calibrate, couple_pairwise    # doctest: +SKIP
>>> cal = calibrate(problem, n_folds=5, seed=0)                   # doctest: +SKIP
>>> cal.probabilities(model.values(X))[:, 1]                      # doctest: +SKIP
"""

from __future__ import annotations

from .coupling import couple_pairwise, couple_pairwise_rows, coupling_matrix
from .crossval import ATTACHMENT, DEFAULT_FOLDS, DEFAULT_SEED, Calibration, calibrate
from .evidence import calibration_evidence, multiclass_evidence
from .folds import stratified_folds
from .multiclass import (
    COUPLING_METHOD,
    PAIR_CLIP,
    PairwiseCalibration,
    pair_calibration,
    parent_calibration,
)
from .platt import FIT_MESSAGES, FitStatus, SigmoidFit, fit_sigmoid, sigmoid_probability

__all__ = [
    "ATTACHMENT",
    "COUPLING_METHOD",
    "DEFAULT_FOLDS",
    "DEFAULT_SEED",
    "FIT_MESSAGES",
    "PAIR_CLIP",
    "Calibration",
    "FitStatus",
    "PairwiseCalibration",
    "SigmoidFit",
    "calibrate",
    "calibration_evidence",
    "couple_pairwise",
    "couple_pairwise_rows",
    "coupling_matrix",
    "fit_sigmoid",
    "multiclass_evidence",
    "pair_calibration",
    "parent_calibration",
    "sigmoid_probability",
    "stratified_folds",
]
