"""Leave-one-out error: two cheap upper bounds and the exact value from support-vector refits.

* Support-vector count (Vapnik 1995, 1998; from memory): a point that is not a support
  vector is still optimal for the problem without it, so its leave-one-out prediction is
  its training prediction with margin ≥ 1 — never an error.  Hence the leave-one-out
  error count is at most the number of support vectors, rate ≤ #SV / n.
* ξα-estimate (Joachims 2000, "Estimating the generalization performance of a SVM
  efficiently", ICML; form and constants from memory): a point can be a leave-one-out
  error only if ρ αᵢ R²_Δ + ξᵢ ≥ 1 with ρ = 2, slack ξᵢ = max(0, 1 − yᵢf(xᵢ)) and R²_Δ
  the range of kernel values, c ≤ K(x, x') ≤ c + R²_Δ, taken here over all training pairs
  (max K − min K).  The count of such points / n bounds the leave-one-out error rate for
  *stable* solutions, those with at least one free support vector (0 < αᵢ < uᵢ), so that
  the bias is pinned by the margin; reported as ``slack_bound_applies``.  Without a free
  support vector the bias can jump when a point is removed and the estimate may fall
  below the exact value (seen on iris versicolor/virginica, RBF gamma = 3, C = 0.1).
* Exact: only support vectors are refitted (see :mod:`solver.explanation._refit`): each refit
  drops the row and starts from the full solution with that multiplier lowered to 0 along
  the decremental path (Cauwenberghs & Poggio 2001: the free support vectors stay on the
  margin, sets updated at each event).  If that start meets the solver's stopping test on
  the whole dropped problem it is the refit; otherwise SMO continues from it on a working
  set and the answer is certified on the whole dropped problem.  ``brute_force`` refits
  every row with SMO from its default start on the whole dropped problem, for comparison.
"""

from __future__ import annotations

import time
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import ConvergenceWarning, InvalidInputError
from ..problem import DualProblem
from ..result import SolveResult
from ..status import Status
from ._refit import Refit, Refitter
from ._table import _check_classification, decision_on_training, misclassified

__all__ = ["LOO_METHODS", "SLACK_BOUND_FACTOR", "LeaveOneOut", "Sensitivity", "leave_one_out",
           "sensitivity"]

#: ``support_refits``: refit support vectors only (decremental path, SMO where needed);
#: ``brute_force``: SMO on every problem without one row from the default start.
LOO_METHODS = ("support_refits", "brute_force")
#: ρ in Joachims' ξα-estimate (ρ = 2 gives the bound; from memory).
SLACK_BOUND_FACTOR = 2.0
#: Largest shared Gram matrix (MiB) that leave-one-out computes once for all refits.
SHARED_GRAM_MB = 512.0
_BLOCK = 2048


@dataclass(frozen=True, eq=False)
class LeaveOneOut:
    """Leave-one-out figures for a solved binary classification problem.

    Rates are fractions of n.  ``slack_bound_applies``: the solution has a free support
    vector, the condition under which the ξα-estimate is a bound.  ``loo_values`` (n,)
    f₋ᵢ(xᵢ): the decision value at xᵢ of the model trained without i (for non-refitted
    points the full model's value, exact by the non-support-vector argument);
    ``loo_wrong`` (n,) its prediction is wrong.  Per refit (k refits, in ``refit_rows``
    order): ``refit_status`` labels, ``refit_iterations``, ``refit_seconds``,
    ``refit_max_change`` / ``refit_mean_change`` max / mean |f₋ᵢ(xⱼ) − f(xⱼ)| over training
    rows j ≠ i, ``refit_flips`` how many of those predictions change sign, ``refit_rounds``
    solver calls and ``refit_working_set`` final working-set size of each refit.
    ``near_boundary_rows`` rows with |f₋ᵢ(xᵢ)| ≤ kkt_tol: their leave-one-out sign is within
    the solver tolerance, so another solution meeting the same tolerance may classify
    them the other way (tighten ``kkt_tol`` to settle them).
    ``non_converged_rows`` refits that did not meet the tolerance
    (their values are used but flagged).  ``one_refit_seconds`` is the time of one cold
    refit (fastest of three probes for ``support_refits``, median for ``brute_force``);
    ``estimated_brute_force_seconds`` = n × that, measured directly for ``brute_force``.
    """

    method: str
    n: int
    n_support: int
    errors: int
    error_rate: float
    support_vector_bound: float
    slack_bound_count: int
    slack_bound_rate: float
    slack_bound_factor: float
    kernel_value_range: float
    slack_bound_applies: bool
    loo_values: np.ndarray
    loo_wrong: np.ndarray
    refit_rows: np.ndarray
    refit_status: tuple[str, ...]
    refit_iterations: np.ndarray
    refit_seconds: np.ndarray
    refit_max_change: np.ndarray
    refit_mean_change: np.ndarray
    refit_flips: np.ndarray
    refit_rounds: np.ndarray
    refit_working_set: np.ndarray
    non_converged_rows: np.ndarray
    near_boundary_rows: np.ndarray
    seconds: float
    one_refit_seconds: float
    estimated_brute_force_seconds: float
    kkt_tol: float
    solver_options: Mapping[str, Any] = field(default_factory=dict)
    #: run id of the child record that stores these figures (None when not stored)
    kept_as: str | None = None

    @property
    def refits(self) -> int:
        """Number of refits done."""
        return int(self.refit_rows.size)

    @property
    def all_converged(self) -> bool:
        """True when every refit met its tolerance."""
        return self.non_converged_rows.size == 0

    @property
    def estimated_seconds_saved(self) -> float:
        """Estimated brute-force time minus the time taken (≤ 0 for ``brute_force``)."""
        return self.estimated_brute_force_seconds - self.seconds

    @property
    def speedup(self) -> float:
        """Estimated brute-force time / time taken."""
        return self.estimated_brute_force_seconds / max(self.seconds, 1e-12)

    def to_dict(self) -> dict[str, Any]:
        """Scalars as plain data."""
        return {
            "method": self.method, "n": self.n, "n_support": self.n_support,
            "errors": self.errors, "error_rate": self.error_rate,
            "support_vector_bound": self.support_vector_bound,
            "slack_bound_count": self.slack_bound_count,
            "slack_bound_rate": self.slack_bound_rate,
            "slack_bound_factor": self.slack_bound_factor,
            "kernel_value_range": self.kernel_value_range,
            "slack_bound_applies": self.slack_bound_applies,
            "refits": self.refits, "non_converged": int(self.non_converged_rows.size),
            "non_converged_rows": self.non_converged_rows.tolist(),
            "near_boundary_rows": self.near_boundary_rows.tolist(),
            "seconds": self.seconds, "one_refit_seconds": self.one_refit_seconds,
            "estimated_brute_force_seconds": self.estimated_brute_force_seconds,
            "estimated_seconds_saved": self.estimated_seconds_saved,
            "speedup": self.speedup, "kkt_tol": self.kkt_tol, "kept_as": self.kept_as,
        }

    def to_columns(self) -> dict[str, np.ndarray]:
        """Per training point: ``row_id``, ``loo_value``, ``loo_wrong``, ``refitted``."""
        refitted = np.zeros(self.n, dtype=bool)
        refitted[self.refit_rows] = True
        return {"row_id": np.arange(self.n, dtype=np.int64), "loo_value": self.loo_values,
                "loo_wrong": self.loo_wrong, "refitted": refitted}


@dataclass(frozen=True, eq=False)
class Sensitivity:
    """How much each support vector moves the training decision values when removed.

    Arrays (k,) aligned with ``rows`` (training row ids of the support vectors):
    ``max_abs_change`` / ``mean_abs_change`` of |f₋ᵢ(xⱼ) − f(xⱼ)| over j ≠ i, ``flips``
    number of other training predictions that change sign, ``own_flip`` the point's own
    leave-one-out prediction differs from its training prediction, ``converged`` the
    refit met its tolerance.  ``ranking`` row ids from most to least influential
    (most flips first, then largest max |Δf|, then smaller row id).
    """

    rows: np.ndarray
    max_abs_change: np.ndarray
    mean_abs_change: np.ndarray
    flips: np.ndarray
    own_flip: np.ndarray
    converged: np.ndarray
    ranking: np.ndarray

    def top(self, k: int = 10) -> list[dict[str, Any]]:
        """The ``k`` most influential support vectors as plain-data records."""
        pos = {int(r): idx for idx, r in enumerate(self.rows)}
        out = []
        for r in self.ranking[: max(0, int(k))]:
            i = pos[int(r)]
            out.append({"row_id": int(r), "flips": int(self.flips[i]),
                        "max_abs_change": float(self.max_abs_change[i]),
                        "mean_abs_change": float(self.mean_abs_change[i]),
                        "own_flip": bool(self.own_flip[i]), "converged": bool(self.converged[i])})
        return out

    def to_columns(self) -> dict[str, np.ndarray]:
        """Equal-length arrays, one row per support vector, with its ``rank`` (1 = most)."""
        rank = np.empty(self.rows.size, dtype=np.int64)
        order = {int(r): k + 1 for k, r in enumerate(self.ranking)}
        rank[:] = [order[int(r)] for r in self.rows]
        return {"row_id": self.rows, "rank": rank, "max_abs_change": self.max_abs_change,
                "mean_abs_change": self.mean_abs_change, "flips": self.flips,
                "own_flip": self.own_flip, "converged": self.converged}


def kernel_range(problem: DualProblem, gram: np.ndarray | None = None) -> float:
    """max K − min K over all pairs of training rows (blockwise, O(n²d) work)."""
    if gram is not None:
        return float(gram.max() - gram.min())
    hi, lo = -np.inf, np.inf
    for s in range(0, problem.n, _BLOCK):
        e = min(problem.n, s + _BLOCK)
        K = problem.kernel_block(slice(s, e), slice(None))
        hi, lo = max(hi, float(K.max())), min(lo, float(K.min()))
    return hi - lo


def _solver() -> Callable[..., SolveResult]:
    from ..smo import solve_smo

    return solve_smo


def leave_one_out(
    problem: DualProblem,
    result: SolveResult,
    *,
    method: str = "support_refits",
    solver_options: Mapping[str, Any] | None = None,
    progress: Callable[[int, int], None] | None = None,
    shared_gram_mb: float = SHARED_GRAM_MB,
) -> LeaveOneOut:
    """Leave-one-out error of a converged binary SVM: bounds and the exact value.

    Parameters
    ----------
    problem, result : the solved problem and its converged solution.
    method : ``"support_refits"`` (refit support vectors only: decremental path, SMO
        warm-started from it where needed) or ``"brute_force"`` (SMO on every problem
        without one row, from the solver's default start).
    solver_options : keyword options for :func:`solver.smo.solve_smo` on each refit
        (default: the full solution's tolerance ``kkt_tol`` and ``trace="off"``); ``kkt_tol`` is
        also the stopping test every refit, path or solver, must meet.
    progress : called as ``progress(done, total)`` after each refit.
    shared_gram_mb : when the n × n Gram matrix fits this many MiB it is computed once;
        the decremental path (compiled), decision-value changes and certificates then read
        it.  Larger problems use kernel rows on demand (slower, same answers).

    Notes
    -----
    A leave-one-out error is a wrong predicted sign of f₋ᵢ(xᵢ) (f = 0 counts as the
    negative label, as in :meth:`solver.model.Model.classify`).  See the module docstring
    for the bounds (Vapnik; Joachims 2000) and the warm start.  The brute-force time of
    ``support_refits`` is estimated as n × the fastest of three measured cold refits.
    """
    _check_classification(problem, result, "leave-one-out")
    if method not in LOO_METHODS:
        raise InvalidInputError(
            f"unknown leave-one-out method {method!r}; choose one of {', '.join(LOO_METHODS)}"
        )
    if not result.success:
        raise InvalidInputError(
            f"leave-one-out needs a converged solution; the solver stopped with status "
            f"{result.status.label!r} ({result.message})"
        )
    opts = {"kkt_tol": float(result.certificate.kkt_tol), "trace": "off",
            **dict(solver_options or {})}
    if "alpha0" in opts:
        raise InvalidInputError("solver_options must not set alpha0: leave-one-out sets it")
    t_start = time.perf_counter()
    n, y = problem.n, problem.y
    alpha = np.asarray(result.alpha, dtype=np.float64)
    b = float(result.bias)
    ref = Refitter(problem, _solver(), opts, alpha=alpha, bias=b,
                   shared_gram=n * n * 8 / 2**20 <= shared_gram_mb)
    f_full = ref.base + b  # decision values of the full model on the training rows
    wrong_full = misclassified(f_full, y)
    margin = y * f_full
    support = ~np.asarray(result.certificate.at_lower, dtype=bool)
    n_sv = int(support.sum())
    xi = np.maximum(0.0, 1.0 - margin)
    r2 = kernel_range(problem, ref.gram)
    xa_count = int(np.sum(SLACK_BOUND_FACTOR * alpha * r2 + xi >= 1.0))
    warm = method == "support_refits"

    def refit(i: int, cold: bool) -> tuple[Refit, float]:
        t0 = time.perf_counter()
        out = ref.cold(i) if cold else ref.warm(i, margin)
        return out, time.perf_counter() - t0

    with warnings.catch_warnings():  # per-refit warnings are summarised below
        warnings.simplefilter("ignore", ConvergenceWarning)
        reference = float("nan")
        if warm:
            # brute-force time reference: the fastest of three cold refits after one untimed
            # warm-up (a conservative estimate of the saving), not counted in `seconds`
            t0 = time.perf_counter()
            probe = [refit(int(i), True)[1] for i in np.linspace(0, n - 1, min(4, n)).astype(int)]
            reference = float(min(probe[1:] or probe))
            t_start += time.perf_counter() - t0
        rows = np.flatnonzero(support) if warm else np.arange(n)
        k = rows.size
        loo_values = f_full.copy()
        status: list[str] = []
        iters = np.zeros(k, np.int64)
        secs = np.zeros(k)
        max_change = np.zeros(k)
        mean_change = np.zeros(k)
        flips = np.zeros(k, np.int64)
        rounds = np.zeros(k, np.int64)
        wsize = np.zeros(k, np.int64)
        for r, i in enumerate(rows):
            out, secs[r] = refit(int(i), not warm)
            status.append(out.status)
            iters[r] = out.iterations
            rounds[r], wsize[r] = out.rounds, out.working_set
            f_new = f_full + out.change + (out.bias - b)
            loo_values[i] = f_new[i]
            keep = out.keep
            diff = np.abs(f_new[keep] - f_full[keep])
            max_change[r] = float(diff.max(initial=0.0))
            mean_change[r] = float(diff.mean()) if diff.size else 0.0
            flips[r] = int(np.sum(misclassified(f_new[keep], y[keep]) != wrong_full[keep]))
            if progress is not None:
                progress(r + 1, k)
    seconds = time.perf_counter() - t_start
    if not warm:
        reference = float(np.median(secs)) if k else float("nan")
    loo_wrong = misclassified(loo_values, y)
    bad = rows[np.array([s != Status.CONVERGED.label for s in status], dtype=bool)]
    if bad.size:
        warnings.warn(
            f"{bad.size} of {k} leave-one-out refits did not converge (rows "
            f"{', '.join(map(str, bad[:10].tolist()))}{' …' if bad.size > 10 else ''}); "
            "their leave-one-out values are reported but flagged",
            ConvergenceWarning, stacklevel=2,
        )
    brute = seconds if not warm else n * reference
    errors = int(loo_wrong.sum())
    return LeaveOneOut(
        method=method, n=n, n_support=n_sv, errors=errors, error_rate=errors / n,
        support_vector_bound=n_sv / n, slack_bound_count=xa_count, slack_bound_rate=xa_count / n,
        slack_bound_factor=SLACK_BOUND_FACTOR, kernel_value_range=r2,
        slack_bound_applies=bool(result.certificate.n_free > 0), loo_values=loo_values,
        loo_wrong=loo_wrong,
        refit_rows=rows.astype(np.int64), refit_status=tuple(status), refit_iterations=iters,
        refit_seconds=secs, refit_max_change=max_change, refit_mean_change=mean_change,
        refit_flips=flips, refit_rounds=rounds, refit_working_set=wsize,
        non_converged_rows=bad.astype(np.int64),
        near_boundary_rows=np.flatnonzero(np.abs(loo_values) <= float(opts["kkt_tol"])),
        seconds=seconds,
        one_refit_seconds=reference, estimated_brute_force_seconds=brute,
        kkt_tol=float(opts["kkt_tol"]), solver_options=dict(opts),
    )


def sensitivity(
    problem: DualProblem,
    result: SolveResult,
    *,
    loo: LeaveOneOut | None = None,
    solver_options: Mapping[str, Any] | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> Sensitivity:
    """Influence of each support vector on the training decision values, from exact refits.

    Uses ``loo`` when given (either method), else runs
    :func:`leave_one_out` with ``method="support_refits"``.
    """
    if loo is None:
        loo = leave_one_out(problem, result, solver_options=solver_options, progress=progress)
    elif loo.n != problem.n:
        raise InvalidInputError(
            f"the leave-one-out record has {loo.n} rows but the problem has {problem.n}"
        )
    support = ~np.asarray(result.certificate.at_lower, dtype=bool)
    sel = support[loo.refit_rows]
    rows = loo.refit_rows[sel]
    f_full = decision_on_training(problem, np.asarray(result.alpha, np.float64),
                                  float(result.bias))
    own = misclassified(loo.loo_values[rows], problem.y[rows]) != misclassified(
        f_full[rows], problem.y[rows])
    conv = np.array([s == Status.CONVERGED.label for s in loo.refit_status], dtype=bool)[sel]
    mx, mean, fl = loo.refit_max_change[sel], loo.refit_mean_change[sel], loo.refit_flips[sel]
    order = np.lexsort((rows, -mx, -fl))
    return Sensitivity(rows=rows, max_abs_change=mx, mean_abs_change=mean, flips=fl,
                       own_flip=own, converged=conv, ranking=rows[order])
