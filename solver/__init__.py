"""kktrace: SVM dual solvers with auditable optimisation traces (import package ``solver``).

The public workflow, with the same names as the ``kktrace`` command:

>>> import solver
>>> out = solver.train("batches.csv", label="lab_decision", solver="both")  # doctest: +SKIP
>>> solver.report(out.run_ids)                                             # doctest: +SKIP

``train`` solves with SMO (and the QP challenger), ``load_run`` / ``runs`` read the store,
``compare`` gives the solver-agreement verdict, ``explain`` / ``leave_one_out`` say why
points became support vectors, ``replay`` rebuilds a recorded iteration, ``verify``
checks integrity and reproduction, ``apply`` applies a stored model, ``report`` writes
HTML / PDF / JSON.  Names are loaded on first use, so ``import solver`` stays light.
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

__version__ = "0.1.0"

#: public name → module that defines it
_EXPORTS: dict[str, str] = {
    # workflow (solver.api)
    "train": "api",
    "TrainOutcome": "api",
    "load_run": "api",
    "runs": "api",
    "compare": "api",
    "explain": "api",
    "leave_one_out": "api",
    "replay": "api",
    "verify": "api",
    "VerifyOutcome": "api",
    "apply": "api",
    "ModelOutput": "api",
    "report": "api",
    "export_explanation": "api",
    "open_store": "api",
    "check_output_path": "api",
    "store_listing": "api",
    "clean_store": "api",
    "new_signing_keys": "api",
    # studies (solver.studies)
    "study": "studies",
    "StudyOutcome": "studies",
    "study_report": "studies",
    # convergence on hard problems (solver.resolve, solver.diagnosis, solver.hard)
    "diagnose": "resolve",
    "what_if": "resolve",
    "WhatIf": "resolve",
    "parse_change": "resolve",
    "resume": "resolve",
    "ResumeOutcome": "resolve",
    "overlay": "resolve",
    "Diagnosis": "diagnosis",
    "hard_problem": "hard",
    # model exchange (solver.exchange)
    "export_onnx": "exchange.workflow",
    "ExportOutcome": "exchange.workflow",
    "challenge": "exchange.workflow",
    "ChallengeOutcome": "exchange.workflow",
    # demo
    "run_demo": "demo",
    "DemoOutcome": "demo",
    "tablet_coating_tables": "demo",
    "write_demo_data": "demo",
    # data
    "Dataset": "data",
    "load_table": "data",
    "from_arrays": "data",
    "fingerprint": "data",
    # building blocks
    "make_kernel": "kernels",
    "binary_classification": "problem",
    "regression": "problem",
    "one_class": "problem",
    "regression_measures": "measures",
    "novelty_measures": "measures",
    "nu_property": "measures",
    "DualProblem": "problem",
    "solve": "solvers",
    "SolveResult": "result",
    "Certificate": "certificate",
    "certify": "certificate",
    "Standardiser": "model",
    "Model": "model",
    "model_from_solution": "model",
    "RunRecord": "run",
    "ParentRecord": "run",
    "Member": "run",
    "get_task": "tasks",
    "task_for_kind": "tasks",
    "RunStore": "store",
    "Status": "status",
    "to_plain": "plaindata",
    # one vocabulary (labels, definitions, whose figure)
    "Term": "vocabulary",
    "term": "vocabulary",
    "trace_term": "vocabulary",
    "timing_text": "vocabulary",
    "caution_line": "vocabulary",
    "figure_text": "vocabulary",
    "vocabulary": "_vocabulary_module",
    # errors and warnings
    "KktraceError": "errors",
    "InvalidInputError": "errors",
    "IntegrityError": "errors",
    "ProblemMismatchError": "errors",
    "ConvergenceWarning": "errors",
    "DataWarning": "errors",
    "StoreWarning": "errors",
}

__all__ = ["__version__", *_EXPORTS]


def __getattr__(name: str) -> Any:
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'solver' has no attribute {name!r}")
    if module == "_vocabulary_module":  # the vocabulary module itself
        value = import_module(".vocabulary", __name__)
        globals()[name] = value
        return value
    value = getattr(import_module(f".{module}", __name__), name)
    globals()[name] = value  # cache: later look-ups skip this function
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_EXPORTS))

