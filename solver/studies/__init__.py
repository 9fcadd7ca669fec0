"""Studies: hyperparameter grids with stratified seeded k-fold cross-validation, run on
Dask, every fit a stored run and the study a parent record (``task = "study"``).

Public entry point :func:`study` (re-exported by :mod:`solver`); see
:mod:`solver.studies.runner` for the flow, :mod:`.execute` for where fits run,
:mod:`.fits` for the fits themselves, :mod:`.records` for what is stored, and
:mod:`.table` for the results table and the one-standard-error rule.
"""

from __future__ import annotations

from .grid import Cell, Grid, make_grid, parse_values
from .report import study_report
from .runner import SCHEDULER_ENV, StudyOutcome, study, study_folds
from .table import ONE_SE_RULE

__all__ = ["study", "StudyOutcome", "Grid", "Cell", "make_grid", "parse_values",
           "study_folds", "SCHEDULER_ENV", "ONE_SE_RULE", "study_report"]
