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
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

__all__ = ["CAUTION", "Term", "TERMS", "caution_line", "term", "trace_term", "timing_text"]

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
        "violation before the step", "the SMO loop's own m(α) − M(α) at the start of "
        "iteration k (from its maintained gradient), i.e. of the state after iteration "
        "k − 1; the certificate's maximal violation is of the state after iteration k",
        "smo"),
    ("smo", "objective"): Term("dual objective after the step", "D after iteration k, "
                               "updated by the loop", "smo"),
    ("smo", "step"): Term("step", "change of αᵢ in iteration k", "smo"),
    ("smo", "active"): Term("active set", "variables not shrunk away", "smo"),
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
    ``"solve 0.48 s, compile 60.91 s, set-up 0.01 s (whole call 61.40 s)"``."""
    parts = []
    for key in ("solve_seconds", "compile_seconds", "setup_seconds"):
        v = timing.get(key)
        parts.append(f"{TERMS[key].label} " + ("not recorded" if v is None else f"{v:.2f} s"))
    total = timing.get("total_seconds")
    tail = f" (whole call {total:.2f} s)" if total is not None else ""
    return ", ".join(parts) + tail


def caution_line(*, prefix: bool = True) -> str:
    """The standing caution as one terminal line, ``"caution: " + CAUTION`` (without the
    ``"caution: "`` prefix when ``prefix`` is False, e.g. for a JSON field)."""
    return f"caution: {CAUTION}" if prefix else CAUTION
