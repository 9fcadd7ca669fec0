"""One vocabulary for the tables every output shows: a key, one display label and one meaning.

The key is the column / field name in JSON, CSV, Parquet and the store; the label is
what the CLI, HTML and PDF print as the heading; the meaning is the sentence the
report's glossary and ``traces/README.md`` give.  Renderers never print a key itself:
they ask :func:`label` (an unknown key is turned into words, never shown raw).

Sections: :data:`POINT_COLUMNS` (the per-point table of ``explain`` and the report),
:data:`LEAVE_ONE_OUT` (``explain --leave-one-out`` and the report) and :data:`FIELDS`
(other fields shown as name / value rows in the report).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

__all__ = ["Term", "POINT_COLUMNS", "LEAVE_ONE_OUT", "FIELDS", "TERMS", "label", "meaning",
           "labels", "heading", "not_traced", "rank_points", "RANKING_RULE", "TRACE_COLUMNS"]


@dataclass(frozen=True)
class Term:
    """One quantity: ``key`` (machine name), ``label`` (display heading), ``meaning``."""

    key: str
    label: str
    meaning: str


def _terms(*rows: tuple[str, str, str]) -> dict[str, Term]:
    return {k: Term(k, lab, m) for k, lab, m in rows}


#: Per-point table (binary classification, ε-regression, one-class), in export order.
POINT_COLUMNS: dict[str, Term] = _terms(
    ("row_id", "row", "training row, counted from 0 in file order"),
    ("label", "label", "the point's label as given in the data"),
    ("alpha", "α", "the point's Lagrange multiplier αᵢ at the solution"),
    ("alpha_ratio", "α / u", "αᵢ divided by its upper bound uᵢ (1 = at the bound C·weight)"),
    ("decision_value", "f(x)", "decision value f(xᵢ) = Σⱼ αⱼyⱼK(xⱼ, xᵢ) + b"),
    ("margin", "y·f(x)", "signed margin yᵢ·f(xᵢ): ≥ 1 outside the margin, < 0 misclassified"),
    ("slack", "slack ξ", "ξᵢ = max(0, 1 − yᵢ·f(xᵢ))"),
    ("kkt_residual", "KKT residual",
     "how far the point is from meeting its KKT condition (gradient units; 0 = met)"),
    ("category", "category", "where the point ends up against its bounds and the margin"),
    ("reason", "reason", "the category in one sentence"),
    ("first_nonzero_iteration", "first α > 0",
     "first SMO iteration after which αᵢ > 0 (0: non-zero at the start)"),
    ("last_change_iteration", "last change", "last SMO iteration that changed αᵢ"),
    ("times_selected", "times selected", "how often SMO put the point in its working set"),
    ("target", "target", "the regression target value"),
    ("prediction", "prediction", "the model's prediction f(xᵢ)"),
    ("residual", "residual", "target minus prediction"),
    ("side", "side", "above, below or inside the ε-tube"),
    ("alpha_plus", "α⁺", "multiplier of the upper tube edge"),
    ("alpha_minus", "α⁻", "multiplier of the lower tube edge"),
    ("coefficient", "α⁺ − α⁻", "the point's coefficient in f(x)"),
    ("score", "score", "one-class score f(x) = Σ αⱼK(xⱼ, x) − ρ (≥ 0: inside the region)"),
)

#: ``explain --leave-one-out`` (binary classification), in output order.
LEAVE_ONE_OUT: dict[str, Term] = _terms(
    ("method", "method", "support_refits: only support vectors are refitted (the others "
     "cannot change); brute_force: every row refitted"),
    ("n", "training points", "number of training points n"),
    ("n_support", "support vectors", "support vectors of the full fit"),
    ("errors", "leave-one-out errors", "points misclassified by the model trained without them"),
    ("error_rate", "leave-one-out error rate", "errors / n (exact)"),
    ("support_vector_bound", "support-vector bound",
     "support vectors / n: an upper bound on the error rate (Vapnik)"),
    ("slack_bound_count", "points the slack bound counts",
     "points with ρ·αᵢ·R² + ξᵢ ≥ 1 (Joachims' ξα-estimate)"),
    ("slack_bound_rate", "slack bound (ξα-estimate)",
     "that count / n: an upper bound on the error rate when the bound applies"),
    ("slack_bound_factor", "slack bound factor ρ", "the factor ρ of the ξα-estimate (2)"),
    ("kernel_value_range", "kernel value range R²",
     "largest minus smallest kernel value over training pairs"),
    ("slack_bound_applies", "slack bound applies",
     "yes when a free support vector pins the bias (the condition for the ξα bound)"),
    ("refits", "refits", "number of refits done"),
    ("non_converged", "refits not converged", "refits that did not meet the KKT tolerance"),
    ("non_converged_rows", "rows of those refits", "their training rows"),
    ("near_boundary_rows", "rows within tolerance of f = 0",
     "rows whose left-out decision value is within kkt_tol of 0 (sign unsettled)"),
    ("seconds", "seconds taken", "wall time of the whole leave-one-out"),
    ("one_refit_seconds", "seconds for one cold refit",
     "time of one refit from the default start (fastest of three probes)"),
    ("estimated_brute_force_seconds", "estimated seconds refitting every row",
     "n × the time of one cold refit"),
    ("estimated_seconds_saved", "estimated seconds saved",
     "estimated brute-force time minus the time taken"),
    ("speedup", "speed-up", "estimated brute-force time / time taken"),
    ("kkt_tol", "KKT tolerance of the refits", "stopping tolerance every refit had to meet"),
    ("kind", "problem kind", "the task of the fit"),
    ("n_refits", "refits", "number of refits done"),
    ("all_converged", "every refit converged", "yes when every refit met its tolerance"),
    ("iterations", "refit iterations", "iterations summed over the refits"),
    ("bias_from_free", "bias from free support vectors",
     "yes when each refit's bias came from a free support vector"),
    ("exactness", "why it is exact", "the argument that makes the result exact"),
    ("rmse", "leave-one-out RMSE", "root mean squared leave-one-out residual"),
    ("mae", "leave-one-out MAE", "mean absolute leave-one-out residual"),
    ("outlier_share", "leave-one-out outlier share",
     "share of rows whose left-out score is below 0"),
    ("kept_as", "stored as record", "the child record holding these figures"),
    ("kept_digest", "its manifest SHA-256", "SHA-256 of that record's manifest.json"),
)

#: Other fields shown as name / value rows in the report (provenance, environment, audit).
FIELDS: dict[str, Term] = _terms(
    ("n_rows", "training rows", "rows of the training data"),
    ("n_features", "features", "number of features"),
    ("psd_scope", "positive-semidefinite check covers", "which kernel matrix was checked"),
    ("python_implementation", "Python implementation", "the Python interpreter"),
    ("min_abs_value", "smallest absolute value", "smallest |value|"),
    ("kkt_tol", "KKT tolerance", "stopping tolerance on the maximal violation"),
    ("max_violation", "final maximal violation", "m(α) − M(α) at the solution"),
    ("manifest_sha256", "manifest SHA-256", "SHA-256 of the run's manifest.json"),
    ("run_id", "run id", "the run's folder name in the store"),
)

#: Every term by key (point columns first, then leave-one-out, then other fields).
TERMS: dict[str, Term] = {**FIELDS, **LEAVE_ONE_OUT, **POINT_COLUMNS}


def label(key: str, section: Mapping[str, Term] | None = None) -> str:
    """Display label of ``key`` (from ``section`` when given, else :data:`TERMS`).

    An unknown key is spelled as words (``first_key`` → ``first key``): never shown raw."""
    terms = section if section is not None else TERMS
    term = terms.get(key) or TERMS.get(key)
    return term.label if term is not None else str(key).replace("_", " ")


def heading(key: str) -> str:
    """Table heading of a column: its :data:`TERMS` label; other headings (a table's own
    words such as ``classified pass``, which may hold user labels) unchanged."""
    term = TERMS.get(key)
    return term.label if term is not None else str(key)


def meaning(key: str, section: Mapping[str, Term] | None = None) -> str:
    """The meaning of ``key`` in one phrase ('' when the vocabulary does not hold it)."""
    terms = section if section is not None else TERMS
    term = terms.get(key) or TERMS.get(key)
    return term.meaning if term is not None else ""


def labels(keys: Iterable[str], section: Mapping[str, Term] | None = None) -> tuple[str, ...]:
    """:func:`label` of every key."""
    return tuple(label(k, section) for k in keys)


#: The trace columns of the per-point table: −1 in the stored table when not traced.
TRACE_COLUMNS = ("first_nonzero_iteration", "last_change_iteration", "times_selected")


def not_traced(solver: str | None, trace_level: str | None) -> str:
    """What a display shows instead of −1 in :data:`TRACE_COLUMNS`.

    Only a working-set solver (SMO) with a full trace records them; the interior-point
    challenger moves every multiplier at every iteration, so they do not exist for it."""
    from .solvers import SOLVER_METHODS

    if SOLVER_METHODS.get(str(solver)) == "interior-point":
        return "n/a (interior-point solver)"
    return f"n/a (trace level {trace_level or 'not full'})"


#: How the report's table of points carrying the solution is ordered (stated beside it).
RANKING_RULE = ("support vectors ordered by y·f(x), smallest first (misclassified points, "
                "then points inside the margin, then points on it), then by KKT residual, "
                "largest first, then by row")


def rank_points(columns: Mapping[str, Any], top: int) -> list[int]:
    """Positions of the ``top`` support vectors in :data:`RANKING_RULE` order.

    Margins are compared rounded to 9 significant digits, so two solvers whose solutions
    agree to their tolerances list the same rows (ties then go to the larger KKT
    residual, then the lower row).  Without a margin column (ε-regression, one-class)
    the order is the KKT residual, largest first, then the row."""
    import numpy as np

    alpha = np.asarray(columns.get("alpha", columns.get("coefficient")), dtype=np.float64)
    rows = np.asarray(columns["row_id"], dtype=np.int64)
    resid = np.asarray(columns.get("kkt_residual", np.zeros(rows.size)), dtype=np.float64)
    keys = [rows, -np.round(resid, 12)]
    if "margin" in columns:
        m = np.asarray(columns["margin"], dtype=np.float64)
        keys.append(np.array([float(f"{v:.9g}") for v in m]))
    order = np.lexsort(tuple(keys))
    return [int(k) for k in order if alpha[k] != 0][:top]
