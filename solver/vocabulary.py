"""One vocabulary: one display label, one definition and one owner per shared quantity.

Every output that names one of these quantities (CLI, HTML, PDF, JSON, format spec) uses
the label and the definition from :data:`TERMS`, so one word never means two things.  The
owner says whose figure it is: ``"certificate"`` (kktrace's shared certificate,
:mod:`solver.certificate`, recomputed from α), ``"run"`` (the run as a whole),
``"smo"`` (the SMO loop's own figure, recorded in its trace) or ``"cvxopt"`` (the
interior-point library's own figure, recorded in the QP trace).

Two pairs are easily confused and are kept apart here:

* the certificate's **maximal violation** after iteration k and the SMO trace row's
  **violation before the step** k (the loop's own figure at the start of iteration k, i.e.
  the state after iteration k − 1, from its maintained gradient);
* the SVM **dual objective** D = ½αᵀQα + pᵀα, which cvxopt minimises as *its* primal
  problem: the QP trace's ``primal_objective`` column is cvxopt's name for D at its
  interior iterate, and its ``dual_objective`` column is cvxopt's Lagrange lower bound
  on D, not kktrace's dual objective.

Tables have their own sections, with the same :class:`Term` records: :data:`POINT_COLUMNS`
(the per-point table of ``explain`` and the report), :data:`LEAVE_ONE_OUT` (``explain
--leave-one-out`` and the report) and :data:`FIELDS` (other name / value rows of the
report).  The key is the JSON / CSV / Parquet / store name; renderers print the label
(:func:`label`, :func:`heading`), never the key itself.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

__all__ = ["figure_text", "SUPERSCRIPT_DIGITS", "CAUTION",
           "Term", "TERMS", "caution_line", "term", "trace_term", "timing_text",
           "POINT_COLUMNS", "LEAVE_ONE_OUT", "FIELDS", "label", "meaning", "labels", "heading",
           "json_key", "not_traced", "CATEGORY_WORDS", "category_label", "rank_points",
           "RANKING_RULE", "TRACE_COLUMNS"]

#: Digits and minus sign as Unicode superscripts (the exponent of ×10ⁿ).
SUPERSCRIPT_DIGITS = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


def figure_text(v: Any, *, power: str = "superscript") -> str:
    """The one display form of a figure, shared by the CLI, the HTML and the PDF.

    Reals: 6 significant digits; below 10⁻³ or from 10⁶ in magnitude, 4 significant digits
    as m×10ⁿ (trailing zeros dropped, so a tolerance 1e-05 reads 1×10⁻⁵ and a violation
    2.0724e-05 reads 2.072×10⁻⁵ everywhere).  ``power="caret"`` writes the exponent as
    ``×10^-5`` for renderers that set it themselves (the HTML's ``<sup>``).  Integers get
    thin-space thousands, booleans yes / no, None a dash, non-finite values n/a or ±∞.
    """
    if v is None:
        return "—"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, int):
        return f"{v:,}".replace(",", "\u2009")
    if isinstance(v, float):
        if v != v:
            return "n/a"
        if v in (float("inf"), float("-inf")):
            return "∞" if v > 0 else "−∞"
        if v != 0 and (abs(v) < 1e-3 or abs(v) >= 1e6):
            m, e = f"{v:.3e}".split("e")
            m = m.rstrip("0").rstrip(".")
            exp = str(int(e))
            if power == "caret":
                return f"{m}×10^{exp}"
            return f"{m}×10{exp.translate(SUPERSCRIPT_DIGITS)}"
        return f"{v:.6g}"
    return str(v)


#: The standing caution, printed by every output that presents evidence (report, demo,
#: export, challenge) in these words.
CAUTION = (
    "kktrace gives evidence about the optimisation, not a validation sign-off; decisions on use "
    "rest with the accountable model owner and validator under local regulation."
)


@dataclass(frozen=True)
class Term:
    """A display label, its definition (with units) and whose figure it is."""

    label: str
    definition: str
    owner: str


TERMS: dict[str, Term] = {
    # the shared certificate (recomputed from α; the same for every solver)
    "max_violation": Term(
        "maximal violation", "m(α) − M(α) of the shared certificate at α, gradient Qα + p "
        "recomputed (gradient units; Keerthi et al. 2001)", "certificate"),
    "kkt_tol": Term(
        "kkt_tol", "tolerance on the certificate's maximal violation; the run is converged "
        "only when the maximal violation is within it", "run"),
    "dual_objective": Term(
        "dual objective D (minimised)", "D = ½αᵀQα + pᵀα of the SVM dual problem", "certificate"),
    "primal_objective": Term(
        "primal objective P", "½αᵀQα + Σ uᵢ·max(0, −(Gᵢ + b yᵢ)) + Δ·b (slack from the hinge "
        "term)", "certificate"),
    "duality_gap": Term("duality gap P + D", "P + D ≥ 0, bounds the suboptimality of both",
                        "certificate"),
    "relative_gap": Term("relative gap", "(P + D) / max(|P|, |D|)", "certificate"),
    "n_free": Term("free", "support vectors strictly inside the box, l < α < u (they sit on "
                   "the margin, |f(x)| = 1)", "certificate"),
    "n_bounded": Term("at the bound", "support vectors with α = u (on or inside the margin)",
                      "certificate"),
    "bias": Term("bias b", "b of f(x) = Σ αᵢyᵢK(xᵢ, x) + b, from the certificate",
                 "certificate"),
    # timing of the solve call (solver.result.SolveResult.timing)
    "solve_seconds": Term("solve", "wall-clock seconds of the iterations themselves", "run"),
    "compile_seconds": Term(
        "compile", "wall-clock seconds compiling (or loading from the on-disk cache) the "
        "numba code, paid once per process; 0 for a solver without compiled code", "run"),
    "setup_seconds": Term(
        "set-up", "wall-clock seconds before the first iteration (kernel storage; for the "
        "QP solver loading cvxopt and building Q)", "run"),
    "total_seconds": Term("whole call", "wall-clock seconds of the whole solve call, "
                          "including the final certificate", "run"),
    "interior_point_tol": Term(
        "interior-point tolerance", "cvxopt's own stopping tolerance (abstol = reltol = "
        "feastol); not kkt_tol", "cvxopt"),
}

#: trace-row columns per solver: (solver, column) → term
_TRACE: dict[tuple[str, str], Term] = {
    ("smo", "violation"): Term(
        "violation before the step", "the SMO loop's own m(α) − M(α) (from its maintained "
        "gradient) at the working-set selection of iteration k's outer iteration: with the "
        "two-variable working set, of the state after iteration k − 1; with the block "
        "working set, of the state before the outer iteration's first step; the "
        "certificate's maximal violation is of the state after iteration k",
        "smo"),
    ("smo", "objective"): Term("dual objective after the step", "D after iteration k, "
                               "updated by the loop", "smo"),
    ("smo", "i"): Term("working set i", "first working-set index (0-based training row)",
                       "smo"),
    ("smo", "j"): Term("working set j", "second working-set index (0-based training row)",
                       "smo"),
    ("smo", "alpha_i"): Term("new αᵢ", "αᵢ after the step, as the solver holds it", "smo"),
    ("smo", "alpha_j"): Term("new αⱼ", "αⱼ after the step, as the solver holds it", "smo"),
    ("smo", "step"): Term("step", "change of αᵢ in iteration k", "smo"),
    ("smo", "active"): Term("active set", "variables not shrunk away", "smo"),
    ("smo", "outer"): Term("outer iteration", "the working-set selection iteration k belongs "
                           "to (equal to k for the two-variable working set)", "smo"),
    ("qp", "primal_objective"): Term(
        "cvxopt primal objective (= D at its interior iterate)", "cvxopt's primal objective "
        "½xᵀQx + pᵀx at its interior iterate x, before kktrace moves the answer onto the "
        "active bounds; it is kktrace's dual objective D of that iterate", "cvxopt"),
    ("qp", "dual_objective"): Term(
        "cvxopt dual objective (lower bound on D)", "cvxopt's Lagrange dual objective, a "
        "lower bound on the minimum of D; not kktrace's dual objective", "cvxopt"),
    ("qp", "gap"): Term("cvxopt gap sᵀz", "cvxopt's own complementarity gap at its iterate; "
                        "not the certificate's duality gap", "cvxopt"),
    ("qp", "relative_gap"): Term("cvxopt relative gap", "cvxopt's own relative gap at its "
                                 "iterate; not the certificate's relative gap", "cvxopt"),
    ("qp", "primal_residual"): Term("cvxopt primal residual", "cvxopt's own primal "
                                    "infeasibility at its iterate", "cvxopt"),
    ("qp", "dual_residual"): Term("cvxopt dual residual", "cvxopt's own dual infeasibility "
                                  "at its iterate", "cvxopt"),
    ("qp", "step"): Term("cvxopt step length", "interior-point step length", "cvxopt"),
    ("qp", "n_at_lower"): Term("held at 0", "points whose slack to α = 0 is below its "
                               "multiplier at the iterate", "cvxopt"),
    ("qp", "n_at_upper"): Term("held at u", "points whose slack to α = u is below its "
                               "multiplier at the iterate", "cvxopt"),
}


def term(key: str) -> Term:
    """The :class:`Term` of a shared quantity (a key of :data:`TERMS`)."""
    return TERMS[key]


def trace_term(solver: str, column: str) -> Term:
    """The :class:`Term` of a trace-row column of ``solver``; columns without an entry are
    labelled by their own name and owned by that solver."""
    return _TRACE.get((solver, column), Term(column, column, solver))


def timing_text(timing: Mapping[str, float | None]) -> str:
    """One line for :attr:`solver.result.SolveResult.timing`, e.g.
    ``"solve 0.004 s, compile 77.840 s, set-up 0.006 s (whole call 77.850 s)"`` (seconds to
    the millisecond, one style for every time)."""
    parts = []
    for key in ("solve_seconds", "compile_seconds", "setup_seconds"):
        v = timing.get(key)
        parts.append(f"{TERMS[key].label} " + ("not recorded" if v is None else f"{v:.3f} s"))
    total = timing.get("total_seconds")
    tail = f" (whole call {total:.3f} s)" if total is not None else ""
    return ", ".join(parts) + tail


#: display labels of the fit phases (solver.phases) whose own name would clash with a term:
#: the "solve" phase is the whole solver call, compile included, not the solve seconds
PHASE_LABELS = {"solve": "solver call"}


def phase_label(name: str) -> str:
    """Display label of the fit phase ``name`` (:data:`solver.phases.PHASES`)."""
    return PHASE_LABELS.get(name, name)


def caution_line(*, prefix: bool = True) -> str:
    """The standing caution as one terminal line, ``"caution: " + CAUTION`` (without the
    ``"caution: "`` prefix when ``prefix`` is False, e.g. for a JSON field)."""
    return f"caution: {CAUTION}" if prefix else CAUTION


# --------------------------------------------------------------------------- tables


def _terms(owner: str, *rows: tuple[str, str, str]) -> dict[str, Term]:
    return {k: Term(lab, m, owner) for k, lab, m in rows}


#: Per-point table (binary classification, ε-regression, one-class), in export order.
POINT_COLUMNS: dict[str, Term] = _terms(
    "explanation",
    ("row_id", "index",
     "training row index, counted from 0 in file order (data row = index + 1, as messages "
     "count)"),
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
    "leave_one_out",
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
    "run",
    ("n_rows", "training rows", "rows of the training data"),
    ("n_features", "features", "number of features"),
    ("psd_scope", "positive-semidefinite check covers", "which kernel matrix was checked"),
    ("python_implementation", "Python implementation", "the Python interpreter"),
    ("min_abs_value", "smallest absolute value", "smallest |value|"),
    ("manifest_sha256", "manifest SHA-256", "SHA-256 of the run's manifest.json"),
    ("run_id", "run id", "the run's folder name in the store"),
    # training data facts
    ("fingerprint", "data fingerprint", "SHA-256 over the training values and labels"),
    ("source", "data source", "the file the training data came from"),
    ("feature_names", "feature names", "the feature columns, in order"),
    ("label_name", "label column", "the column holding the labels"),
    # kernel audit (solver.audit)
    ("kernel", "kernel", "the kernel and its parameters"),
    ("sample_size", "rows in the checked sample", "rows the Gram matrix was checked on"),
    ("sampled", "checked on a sample", "yes when the check used a seeded sample of rows"),
    ("seed", "sample seed", "seed of the sample of rows"),
    ("symmetry_error", "largest asymmetry", "max |K − Kᵀ| on the checked rows"),
    ("symmetric", "symmetric", "largest asymmetry within the PSD tolerance"),
    ("min_eigenvalue", "smallest eigenvalue", "smallest eigenvalue of the checked Gram matrix"),
    ("max_eigenvalue", "largest eigenvalue", "largest eigenvalue of the checked Gram matrix"),
    ("psd_tol", "PSD tolerance", "PSD when the smallest eigenvalue ≥ −(this tolerance)"),
    ("psd", "positive semi-definite", "smallest eigenvalue ≥ −PSD tolerance"),
    ("psd_scope", "PSD check covers", "all rows or a sample of rows"),
    ("n_negative", "eigenvalues below −tolerance", "count of eigenvalues < −PSD tolerance"),
    ("declared_psd", "kernel declared PSD", "what the kernel promises by construction"),
    ("diag_min", "smallest K(x, x)", "smallest diagonal entry"),
    ("diag_max", "largest K(x, x)", "largest diagonal entry"),
    ("diag_error", "largest diagonal error", "largest |K(x, x) − expected value|"),
    ("condition", "condition number", "largest / smallest eigenvalue (∞ when singular)"),
    ("numerically_singular", "numerically singular", "smallest eigenvalue within tolerance of 0"),
    ("feature_map_terms", "explicit feature-map terms", "monomials of the polynomial map"),
    ("feature_map_weights", "feature-map weights", "weights of the explicit feature map"),
    ("feature_map_error", "feature-map largest error", "largest |φ(x)·φ(z) − K(x, z)|"),
    ("feature_map_matches", "feature map reproduces K", "feature-map error within tolerance"),
    ("notes", "notes", "remarks of the check"),
    # environment recorded with a run
    ("python", "Python version", "the Python version"),
    ("packages", "package versions", "versions of the numerical packages"),
    ("platform", "platform", "operating system"),
    ("machine", "machine", "processor architecture"),
    ("cpu_model", "CPU model", "processor model"),
    ("cpu_count", "CPU count", "logical processors"),
    ("byte_order", "byte order", "endianness"),
    ("blas", "BLAS", "the linear-algebra library numpy uses"),
    ("numba_disable_jit", "numba JIT disabled", "NUMBA_DISABLE_JIT was set"),
    # solver options
    ("iteration_limit", "iteration limit", "largest number of iterations"),
    ("time_limit", "time limit (s)", "wall-clock limit of the solve"),
    ("selection", "working-set selection", "how SMO picks its pair"),
    ("working_set", "working set", "two variables per step, or a block of variables solved "
     "by two-variable steps"),
    ("shrinking", "shrinking", "variables set aside while they stay at a bound"),
    ("trace", "trace level", "what the trace records"),
    ("sample_every", "trace row every (iterations)", "sampling of a sampled trace"),
    ("snapshot_every", "α snapshot every (iterations)", "snapshots of α for replay"),
    ("kernel_memory_mb", "kernel memory (MB)", "memory for a stored kernel matrix"),
    ("kernel_dtype", "kernel storage type", "floating-point type of stored kernel values"),
    ("row_cache_mb", "row cache (MB)", "memory of the kernel row cache"),
    ("warm_start", "warm start", "the run started from given multipliers"),
    ("callback_every", "callback every (iterations)", "how often a callback was called"),
    ("stall_window", "stall window (iterations)", "iterations without progress before stalled"),
    ("curvature_floor", "curvature floor", "smallest curvature a step divides by"),
    ("threads", "threads", "threads of the SMO loop"),
    ("size_limit", "size limit (points)", "largest problem the interior-point solver takes"),
    ("force", "size limit overridden", "the size limit was overridden"),
    ("kkt", "Newton-system solver", "how each interior-point step's KKT system is solved"),
    ("alpha0", "starting α", "given starting multipliers"),
    ("cvxopt_options", "cvxopt options", "options handed to cvxopt"),
    ("tighten", "tighten", "extra interior-point steps after the stopping test"),
    ("sample_weight", "per-row weights", "per-row weights of the bounds"),
    ("class_counts", "points per class", "training points per label"),
)

#: Every key shown without a section: the shared quantities (:data:`TERMS`) first, then
#: the per-point columns and the other report fields (leave-one-out keys such as
#: ``iterations`` mean something else there, so they are looked up with their section).
_ALL: dict[str, Term] = {**FIELDS, **POINT_COLUMNS, **TERMS}


def label(key: str, section: Mapping[str, Term] | None = None) -> str:
    """Display label of ``key`` (from ``section`` when given, else :data:`TERMS`).

    An unknown key is spelled as words (``first_key`` → ``first key``): never shown raw."""
    terms = section if section is not None else _ALL
    found = terms.get(key) or _ALL.get(key)
    return found.label if found is not None else str(key).replace("_", " ")


def heading(key: str) -> str:
    """Table heading of a column: its label (per-point columns, then :data:`TERMS`);
    other headings (a table's own words such as ``classified pass``, which may hold user
    labels) unchanged."""
    found = POINT_COLUMNS.get(key) or TERMS.get(key)
    return found.label if found is not None else str(key)


def json_key(name: str) -> str:
    """One key style for JSON: a label or key as lower-case words joined by ``_``
    (``"solve time (s)"`` → ``"solve_time_s"``); keys already in that style are kept."""
    import re

    key = re.sub(r"[^0-9a-zA-Z]+", "_", str(name)).strip("_")
    return key if key.isidentifier() and key == str(name) else key.lower() or "_"


def meaning(key: str, section: Mapping[str, Term] | None = None) -> str:
    """The meaning of ``key`` in one phrase ('' when the vocabulary does not hold it)."""
    terms = section if section is not None else _ALL
    found = terms.get(key) or _ALL.get(key)
    return found.definition if found is not None else ""


def labels(keys: Iterable[str], section: Mapping[str, Term] | None = None) -> tuple[str, ...]:
    """:func:`label` of every key."""
    return tuple(label(k, section) for k in keys)


#: Category codes of the per-point tables (and the certificate's coarse ones) in words,
#: for legends and captions; the tables and the JSON keep the codes.
CATEGORY_WORDS: dict[str, str] = {  # at most 21 characters: they fit beside a plot
    "non_support": "not a support vector",
    "margin_support": "on the margin",
    "bounded_inside_margin": "at bound, in margin",
    "bounded_misclassified": "at bound, wrong side",
    "bounded_on_margin": "at bound, on margin",
    "inside_tube": "inside the ε-tube",
    "on_tube_edge": "on the tube edge",
    "outside_tube": "outside the tube",
    "interior": "inside the region",
    "boundary": "on the boundary",
    "outside": "outside the region",
    "non-support": "not a support vector",
    "free": "free (0 < α < u)",
    "bounded": "at the bound (α = u)",
}


def category_label(code: str) -> str:
    """A category code in words (unknown codes: underscores as spaces)."""
    return CATEGORY_WORDS.get(str(code), str(code).replace("_", " "))


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
