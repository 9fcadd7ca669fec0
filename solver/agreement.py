"""Solver agreement: turn two runs of the same problem into measures and a verdict.

Measures (run A vs run B; f(x) = Σ αᵢyᵢK(xᵢ, x) + b is each run's decision value).  The
objective, decision values and feasibility are recomputed from each run's α, y, kernel and
bias (blockwise), never taken from the stored certificates.

============================  =========================================================  ====
measure                       definition                                                 pass
============================  =========================================================  ====
objective_rel_diff            |D_A − D_B| / max(|D_A|, |D_B|), D = ½αᵀQα + pᵀα             ≤
alpha_max_diff                maxᵢ |α_A,i − α_B,i| / maxᵢ (uᵢ − lᵢ)                        ≤
support_jaccard               |S_A ∩ S_B| / |S_A ∪ S_B|, S = {i : αᵢ − lᵢ > t·(uᵢ − lᵢ)}    ≥
bias_diff                     |b_A − b_B|  (decision-value units)                          ≤
decision_max_diff             maxᵢ |f_A(xᵢ) − f_B(xᵢ)| over the training rows             ≤
prediction_agreement          share of training rows on the same side of the boundary;    ≥
                              a row with |f_A| and |f_B| both ≤ the decision tolerance
                              counts as agreeing (it is on the boundary for both)
feasibility                   largest bound violation or |yᵀα − Δ| of either run,          ≤
                              divided by maxᵢ (uᵢ − lᵢ)
decision_max_diff_holdout     decision_max_diff on the held-out rows (only if given)       ≤
prediction_agreement_holdout  prediction_agreement on the held-out rows (only if given)    ≥
converged                     1 if both runs report status ``converged``, else 0           ≥
============================  =========================================================  ====

Reported without a tolerance: both objectives and their absolute difference, RMS α
difference (relative to max(u − l)), support-set sizes and the rows in only one set, both
biases, RMS decision difference, each run's duality gap, relative gap, maximal violation,
feasibility and status.

Non-unique optimum.  When Q is singular (e.g. a linear kernel with more points than
features) the optimal α need not be unique while the model is.  So alpha_max_diff and
support_jaccard are judged up to that freedom: at each level (strict, loose) a value outside
its tolerance still passes when max |Q(α_A − α_B)| is within that level's decision tolerance
and the objectives agree within that level's objective tolerance.  Such a pass is recorded
as *waived* with the reason, and a note says the multipliers differ along directions that
do not change the model.

Verdict.  ``"agree"``: the problems are identical, both runs converged and every measure
is within its strict tolerance.  ``"agree_within_tolerances"``: every measure is within its
loose tolerance but some measure is outside its strict one (a non-converged run always is:
``converged`` has strict tolerance 1, loose 0), or the problems differed and the
comparison was forced (``allow_mismatch``).  ``"disagree"``: some measure is outside its
loose tolerance.  ``failed`` names every measure outside its strict tolerance and
``failures`` states each one's value and tolerances.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field, fields
from typing import Any

import numpy as np

from .errors import InvalidInputError, ProblemMismatchError
from .kernels import PrecomputedKernel
from .model import model_from_solution
from .problem import DualProblem
from .result import SolveResult
from .run import RunRecord
from .status import Status, decide

__all__ = ["Tolerances", "Measure", "Comparison", "compare_runs", "compare_results", "VERDICTS"]

VERDICTS = ("agree", "agree_within_tolerances", "disagree")


@dataclass(frozen=True)
class Tolerances:
    """Every tolerance of the agreement verdict (strict → "agree", loose → "within tolerances")."""

    objective_rel_diff: float = 1e-6
    """Strict bound on |D_A − D_B| / max(|D_A|, |D_B|) (dimensionless)."""
    objective_rel_diff_loose: float = 1e-4
    """Loose bound on the relative objective difference."""
    alpha_max_diff: float = 1e-3
    """Strict bound on max |Δα| divided by the largest box width max(u − l) (dimensionless)."""
    alpha_max_diff_loose: float = 1e-2
    """Loose bound on the relative largest multiplier difference."""
    support_threshold: float = 1e-6
    """α threshold defining the support set: αᵢ − lᵢ > support_threshold·(uᵢ − lᵢ)."""
    support_jaccard: float = 1.0
    """Strict lower bound on the Jaccard index of the two support sets (1 = identical)."""
    support_jaccard_loose: float = 0.95
    """Loose lower bound on the support-set Jaccard index."""
    bias_diff: float = 1e-3
    """Strict bound on |b_A − b_B| (decision-value units; the margin is at |f| = 1)."""
    bias_diff_loose: float = 1e-2
    """Loose bound on the bias difference."""
    decision_max_diff: float = 1e-3
    """Strict bound on the largest |f_A(x) − f_B(x)| over the rows (decision-value units);
    also the half-width of the boundary band in which rows count as agreeing."""
    decision_max_diff_loose: float = 1e-2
    """Loose bound on the largest decision-value difference."""
    feasibility: float = 1e-9
    """Strict bound on each run's largest bound violation or |yᵀα − Δ|, divided by max(u − l)."""
    feasibility_loose: float = 1e-6
    """Loose bound on the relative feasibility violation."""
    prediction_agreement: float = 1.0
    """Strict lower bound on the share of rows predicted on the same side."""
    prediction_agreement_loose: float = 0.99
    """Loose lower bound on the prediction agreement share."""

    def __post_init__(self) -> None:
        for f in fields(self):
            v = getattr(self, f.name)
            if isinstance(v, bool) or not isinstance(v, (int, float, np.floating, np.integer)):
                raise InvalidInputError(f"tolerance {f.name} must be a number, got {v!r}")
            v = float(v)
            if not (math.isfinite(v) and v >= 0.0):
                raise InvalidInputError(f"tolerance {f.name} must be finite and >= 0, got {v!r}")
            object.__setattr__(self, f.name, v)
        for name in ("objective_rel_diff", "alpha_max_diff", "bias_diff", "decision_max_diff",
                     "feasibility"):
            if getattr(self, name) > getattr(self, name + "_loose"):
                raise InvalidInputError(f"tolerance {name} must not exceed {name}_loose")
        for name in ("support_jaccard", "prediction_agreement"):
            lo, hi = getattr(self, name + "_loose"), getattr(self, name)
            if not 0.0 <= lo <= hi <= 1.0:
                raise InvalidInputError(
                    f"tolerances need 0 <= {name}_loose <= {name} <= 1, got {lo} and {hi}")

    @classmethod
    def from_mapping(cls, values: Mapping[str, Any] | None) -> Tolerances:
        """Defaults overridden by ``values``; an unknown name raises :class:`InvalidInputError`."""
        if values is None:
            return cls()
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(values) - known)
        if unknown:
            raise InvalidInputError(
                f"unknown tolerance(s) {', '.join(unknown)}; known: {', '.join(sorted(known))}")
        return cls(**dict(values))

    def to_dict(self) -> dict[str, float]:
        """All tolerances as plain data."""
        return asdict(self)


@dataclass(frozen=True)
class Measure:
    """One gated measure: its value, both tolerances, and whether it passed each."""

    name: str
    value: float | None
    tolerance: float
    loose_tolerance: float
    rule: str  # "<=" or ">="
    passed: bool
    passed_loose: bool
    waived: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """Plain data."""
        return asdict(self)

    def describe(self) -> str:
        """e.g. ``"bias_diff = 0.05 (strict <= 0.001, loose <= 0.01)"``."""
        v = "n/a" if self.value is None else f"{self.value:.6g}"
        text = (f"{self.name} = {v} (strict {self.rule} {self.tolerance:g}, "
                f"loose {self.rule} {self.loose_tolerance:g})")
        return text + (f" [waived: {self.waived}]" if self.waived else "")


@dataclass(frozen=True, eq=False)
class Comparison:
    """Agreement of run A and run B: every measure, each run's certificate figures, verdict."""

    verdict: str
    verdict_text: str
    measures: Mapping[str, Measure]
    failed: tuple[str, ...]
    failures: tuple[str, ...]
    tolerances: Tolerances
    runs: tuple[Mapping[str, Any], Mapping[str, Any]]
    objective_abs_diff: float
    alpha_rms_diff: float
    support_size: tuple[int, int]
    support_only_a: tuple[int, ...]
    support_only_b: tuple[int, ...]
    bias: tuple[float, float]
    decision_rms_diff: float
    n_train: int
    n_holdout: int
    mismatches: tuple[str, ...] = ()
    override: str | None = None
    notes: tuple[str, ...] = field(default_factory=tuple)

    @property
    def agree(self) -> bool:
        """True for the verdict "agree"."""
        return self.verdict == "agree"

    def to_dict(self) -> dict[str, Any]:
        """Plain data: ``measures`` name → {value, tolerance, loose_tolerance, rule, passed,
        passed_loose}; ``tolerances`` measure name → strict tolerance; ``settings`` every
        :class:`Tolerances` field."""
        return {
            "verdict": self.verdict,
            "verdict_text": self.verdict_text,
            "measures": {k: m.to_dict() for k, m in self.measures.items()},
            "failed": list(self.failed),
            "failures": list(self.failures),
            "tolerances": {k: m.tolerance for k, m in self.measures.items()},
            "loose_tolerances": {k: m.loose_tolerance for k, m in self.measures.items()},
            "settings": self.tolerances.to_dict(),
            "runs": [dict(r) for r in self.runs],
            "objective_abs_diff": self.objective_abs_diff,
            "alpha_rms_diff": self.alpha_rms_diff,
            "support_size": list(self.support_size),
            "support_only_a": list(self.support_only_a),
            "support_only_b": list(self.support_only_b),
            "bias": list(self.bias),
            "decision_rms_diff": self.decision_rms_diff,
            "n_train": self.n_train,
            "n_holdout": self.n_holdout,
            "mismatches": list(self.mismatches),
            "override": self.override,
            "notes": list(self.notes),
        }


# --------------------------------------------------------------------------- problem identity


def _kernel_identity(problem: DualProblem) -> dict[str, Any]:
    d = problem.kernel.describe()
    params = {k: v for k, v in (d.get("params") or {}).items() if k != "gamma_source"}
    return {"name": d.get("name"), "params": params}


def _array_difference(name: str, a: np.ndarray, b: np.ndarray) -> str | None:
    if a.shape != b.shape:
        return f"{name}: shapes {a.shape} vs {b.shape}"
    if not np.array_equal(a, b):
        rows = np.flatnonzero(np.any((a != b).reshape(a.shape[0], -1), axis=1))
        return f"{name}: differ in {rows.size} row(s), first row {int(rows[0])}"
    return None


def problem_differences(problem_a: DualProblem, problem_b: DualProblem,
                        data_a: Mapping[str, Any] | None = None,
                        data_b: Mapping[str, Any] | None = None) -> list[str]:
    """Human-readable list of what differs between two problems (empty if identical)."""
    out: list[str] = []
    if data_a is not None and data_b is not None:
        fa, fb = data_a.get("fingerprint"), data_b.get("fingerprint")
        if fa != fb:
            out.append(f"data fingerprint: {fa!r} vs {fb!r}")
    if problem_a.kind != problem_b.kind:
        out.append(f"problem kind: {problem_a.kind!r} vs {problem_b.kind!r}")
    ka, kb = _kernel_identity(problem_a), _kernel_identity(problem_b)
    if ka != kb:
        out.append(f"kernel: {ka} vs {kb}")
    ca, cb = problem_a.info.get("C"), problem_b.info.get("C")
    if ca != cb:
        out.append(f"C: {ca!r} vs {cb!r}")
    for key in ("class_weight", "labels", "epsilon", "nu"):
        va, vb = problem_a.info.get(key), problem_b.info.get(key)
        if va != vb:
            out.append(f"{key.replace('_', ' ')}: {va!r} vs {vb!r}")
    if problem_a.delta != problem_b.delta:
        out.append(f"equality right-hand side: {problem_a.delta!r} vs {problem_b.delta!r}")
    for name, a, b in (("labels (y)", problem_a.y, problem_b.y),
                       ("lower bounds", problem_a.lower, problem_b.lower),
                       ("upper bounds (C times weights)", problem_a.upper, problem_b.upper),
                       ("linear term p", problem_a.p, problem_b.p),
                       ("training rows X", problem_a.X, problem_b.X),
                       ("data row of each variable", problem_a.data_rows, problem_b.data_rows)):
        d = _array_difference(name, a, b)
        if d:
            out.append(d)
    return out


# --------------------------------------------------------------------------- measures


def _holdout_values(problem: DualProblem, result: SolveResult, standardiser: Any,
                    X: np.ndarray) -> np.ndarray:
    model = model_from_solution(problem, result, standardiser)
    return model.values(X)


def _agreement(fa: np.ndarray, fb: np.ndarray, band: float) -> float:
    if fa.size == 0:
        return 1.0
    same = (fa > 0) == (fb > 0)
    boundary = (np.abs(fa) <= band) & (np.abs(fb) <= band)
    return float(np.mean(same | boundary))


def _width(problem: DualProblem) -> float:
    w = float(np.max(np.maximum(problem.upper - problem.lower, 0.0)))
    return w if w > 0 else 1.0


def _run_facts(label: str, problem: DualProblem, result: SolveResult, objective: float,
               data: Mapping[str, Any] | None, run_id: str | None) -> dict[str, Any]:
    c = result.certificate
    bound, eq = problem.feasibility(result.alpha)
    return {
        "label": label, "run_id": run_id, "solver": result.solver,
        "status": decide(result.status, c.max_violation, c.kkt_tol).label,
        "iterations": int(result.iterations),
        "dual_objective": float(objective),
        "certificate_dual_objective": float(c.dual_objective),
        "duality_gap": float(c.duality_gap), "relative_gap": float(c.relative_gap),
        "max_violation": float(c.max_violation), "kkt_tol": float(c.kkt_tol),
        "bias": float(result.bias), "bound_violation": bound, "equality_residual": eq,
        "fingerprint": None if data is None else data.get("fingerprint"),
        **result.timing,
    }


def _gate(name: str, value: float | None, strict: float, loose: float, rule: str,
          waiver: tuple[bool, bool, str] | None = None) -> Measure:
    """Judge ``value``; ``waiver`` = (pass strict anyway, pass loose anyway, reason)."""
    if value is None or not math.isfinite(value):
        ok = ok_loose = False
    elif rule == "<=":
        ok, ok_loose = value <= strict, value <= loose
    else:
        ok, ok_loose = value >= strict, value >= loose
    waived = None
    if waiver is not None and ((waiver[0] and not ok) or (waiver[1] and not ok_loose)):
        ok, ok_loose, waived = ok or waiver[0], ok_loose or waiver[1], waiver[2]
    return Measure(name=name, value=None if value is None else float(value),
                   tolerance=float(strict), loose_tolerance=float(loose), rule=rule,
                   passed=bool(ok), passed_loose=bool(ok_loose), waived=waived)


def compare_results(
    problem_a: DualProblem,
    result_a: SolveResult,
    problem_b: DualProblem,
    result_b: SolveResult,
    *,
    holdout_values: tuple[np.ndarray, np.ndarray] | None = None,
    tolerances: Tolerances | Mapping[str, float] | None = None,
    allow_mismatch: bool = False,
    data_a: Mapping[str, Any] | None = None,
    data_b: Mapping[str, Any] | None = None,
    run_ids: tuple[str | None, str | None] = (None, None),
) -> Comparison:
    """Agreement of two solutions; see the module notes for measures and verdict.

    Objectives, decision values and feasibility are recomputed from each α (the stored
    certificates are not trusted).  ``holdout_values`` are the two runs' decision values
    (m,) on held-out rows, if any.  Different problems raise :class:`ProblemMismatchError`
    naming every difference unless ``allow_mismatch``; per-row measures then need equal n
    (else they are n/a and fail).
    """
    tol = tolerances if isinstance(tolerances, Tolerances) else Tolerances.from_mapping(tolerances)
    diffs = problem_differences(problem_a, problem_b, data_a, data_b)
    if diffs and not allow_mismatch:
        raise ProblemMismatchError(
            "the two runs solve different problems, so their answers cannot be compared: "
            + "; ".join(diffs) + " (pass allow_mismatch=True to compare anyway)")
    alpha_a = np.asarray(result_a.alpha, dtype=np.float64)
    alpha_b = np.asarray(result_b.alpha, dtype=np.float64)
    for alpha, prob, label in ((alpha_a, problem_a, "A"), (alpha_b, problem_b, "B")):
        if alpha.shape != (prob.n,) or not np.all(np.isfinite(alpha)):
            raise InvalidInputError(f"run {label}: α must be {prob.n} finite numbers")
    qa, qb = problem_a.q_times(alpha_a), problem_b.q_times(alpha_b)  # Qα, blockwise
    da = 0.5 * float(alpha_a @ qa) + float(problem_a.p @ alpha_a)
    db = 0.5 * float(alpha_b @ qb) + float(problem_b.p @ alpha_b)
    scale = max(abs(da), abs(db))
    obj_abs = abs(da - db)
    obj_rel = obj_abs / scale if scale > 0 else 0.0
    runs = (_run_facts("A", problem_a, result_a, da, data_a, run_ids[0]),
            _run_facts("B", problem_b, result_b, db, data_b, run_ids[1]))
    feas = max(max(r["bound_violation"], r["equality_residual"]) / _width(p)
               for r, p in zip(runs, (problem_a, problem_b), strict=True))

    notes: list[str] = []
    alpha_max = jac = dec_max = agree_train = None
    alpha_rms = dec_rms = float("nan")
    waiver: tuple[bool, bool, str] | None = None
    only_a: tuple[int, ...] = ()
    only_b: tuple[int, ...] = ()
    size = (int(result_a.certificate.n_support), int(result_b.certificate.n_support))
    if problem_a.n == problem_b.n:
        width = _width(problem_a)
        dalpha = np.abs(alpha_a - alpha_b)
        alpha_max = float(np.max(dalpha)) / width
        alpha_rms = float(np.sqrt(np.mean(dalpha**2))) / width
        t = tol.support_threshold
        sa = alpha_a - problem_a.lower > t * (problem_a.upper - problem_a.lower)
        sb = alpha_b - problem_b.lower > t * (problem_b.upper - problem_b.lower)
        union = int(np.sum(sa | sb))
        jac = float(np.sum(sa & sb)) / union if union else 1.0
        only_a = tuple(int(i) for i in np.flatnonzero(sa & ~sb))
        only_b = tuple(int(i) for i in np.flatnonzero(sb & ~sa))
        size = (int(sa.sum()), int(sb.sum()))
        fa = problem_a.y * qa + float(result_a.bias)
        fb = problem_b.y * qb + float(result_b.bias)
        df = np.abs(fa - fb)
        dec_max, dec_rms = float(np.max(df)), float(np.sqrt(np.mean(df**2)))
        agree_train = _agreement(fa, fb, tol.decision_max_diff)
        # Q(α_A − α_B) ≈ 0 with equal objectives: both α are optima of a problem whose dual
        # optimum is not unique (Q singular along the difference), so α and the support
        # set are not identifiable; the model (Qα and b) is what must agree.
        null_move = float(np.max(np.abs(qa - qb)))
        model_strict = null_move <= tol.decision_max_diff and obj_rel <= tol.objective_rel_diff
        model_loose = (null_move <= tol.decision_max_diff_loose
                       and obj_rel <= tol.objective_rel_diff_loose)
        reason = (f"α differs mainly along directions Q maps to (nearly) zero "
                  f"(max |Q(α_A − α_B)| = {null_move:.3g}), which do not change the model: "
                  f"the optimal multipliers are not unique for this problem")
        waiver = (model_strict, model_loose, reason)
    else:
        notes.append(f"per-row measures not computed: {problem_a.n} vs {problem_b.n} rows")
    bias_diff = abs(float(result_a.bias) - float(result_b.bias))

    measures: dict[str, Measure] = {
        "objective_rel_diff": _gate("objective_rel_diff", obj_rel, tol.objective_rel_diff,
                                    tol.objective_rel_diff_loose, "<="),
        "alpha_max_diff": _gate("alpha_max_diff", alpha_max, tol.alpha_max_diff,
                                tol.alpha_max_diff_loose, "<=", waiver),
        "support_jaccard": _gate("support_jaccard", jac, tol.support_jaccard,
                                 tol.support_jaccard_loose, ">=", waiver),
        "bias_diff": _gate("bias_diff", bias_diff, tol.bias_diff, tol.bias_diff_loose, "<="),
        "decision_max_diff": _gate("decision_max_diff", dec_max, tol.decision_max_diff,
                                   tol.decision_max_diff_loose, "<="),
        "prediction_agreement": _gate("prediction_agreement", agree_train,
                                      tol.prediction_agreement,
                                      tol.prediction_agreement_loose, ">="),
        "feasibility": _gate("feasibility", feas, tol.feasibility, tol.feasibility_loose, "<="),
    }
    if any(measures[k].waived for k in ("alpha_max_diff", "support_jaccard")):
        notes.append(reason)
    n_hold = 0
    if holdout_values is not None:
        ha, hb = (np.asarray(v, dtype=np.float64).ravel() for v in holdout_values)
        if ha.shape != hb.shape:
            raise InvalidInputError(
                f"held-out decision values differ in length: {ha.size} vs {hb.size}")
        n_hold = int(ha.size)
        hmax = float(np.max(np.abs(ha - hb))) if n_hold else 0.0
        measures["decision_max_diff_holdout"] = _gate(
            "decision_max_diff_holdout", hmax, tol.decision_max_diff,
            tol.decision_max_diff_loose, "<=")
        measures["prediction_agreement_holdout"] = _gate(
            "prediction_agreement_holdout", _agreement(ha, hb, tol.decision_max_diff),
            tol.prediction_agreement, tol.prediction_agreement_loose, ">=")
    # the status rule (solver.status.decide), also for runs stored before it was applied
    both = float(all(decide(r.status, r.certificate.max_violation, r.certificate.kkt_tol)
                     == Status.CONVERGED for r in (result_a, result_b)))
    measures["converged"] = _gate("converged", both, 1.0, 0.0, ">=")

    failed = tuple(k for k, m in measures.items() if not m.passed)
    failures = tuple(measures[k].describe() for k in failed)
    loose_failed = [k for k, m in measures.items() if not m.passed_loose]
    override = None
    if diffs:
        override = ("comparison forced with allow_mismatch although the problems differ: "
                    + "; ".join(diffs))
    if loose_failed:
        verdict = "disagree"
        text = ("the runs disagree; outside the loose tolerances: "
                + "; ".join(measures[k].describe() for k in loose_failed))
    elif failed or diffs:
        verdict = "agree_within_tolerances"
        text = "the runs agree within the loose tolerances" + (
            "; outside the strict tolerances: " + "; ".join(failures) if failed else "")
    else:
        verdict = "agree"
        text = "the runs agree: every measure is within its strict tolerance"
    if diffs:
        text += ". NOTE: the problems differ (" + "; ".join(diffs) + ")"
    for r in runs:
        if r["status"] != Status.CONVERGED.label:
            notes.append(f"run {r['label']} ({r['solver']}) did not converge: {r['status']}")
        elif verdict != "agree" and r["kkt_tol"] > tol.decision_max_diff:
            notes.append(
                f"run {r['label']} ({r['solver']}) was solved only to maximal violation "
                f"<= {r['kkt_tol']:g}; differences of that order are expected, so "
                "re-solve it with a tighter kkt_tol to tell solver tolerance from disagreement")
    return Comparison(
        verdict=verdict, verdict_text=text, measures=measures, failed=failed, failures=failures,
        tolerances=tol, runs=runs, objective_abs_diff=obj_abs, alpha_rms_diff=alpha_rms,
        support_size=size, support_only_a=only_a, support_only_b=only_b,
        bias=(float(result_a.bias), float(result_b.bias)), decision_rms_diff=dec_rms,
        n_train=int(problem_a.n), n_holdout=n_hold, mismatches=tuple(diffs), override=override,
        notes=tuple(notes),
    )


def compare_runs(
    a: RunRecord,
    b: RunRecord,
    *,
    holdout_X: np.ndarray | None = None,
    tolerances: Tolerances | Mapping[str, float] | None = None,
    allow_mismatch: bool = False,
) -> Comparison:
    """Solver-agreement :class:`Comparison` of two runs (see module notes).

    Parameters
    ----------
    a, b : the runs; their problems must be identical (data fingerprint, kind, kernel, C,
        class weights, label mapping, bounds, p, Δ and training rows) unless
        ``allow_mismatch``, in which case the verdict says what differed and is at most
        "agree_within_tolerances".
    holdout_X : optional (m, d) held-out rows in raw units; each run standardises them with
        its own standardiser (as its training rows were), then decision values are compared.
    tolerances : :class:`Tolerances`, or a mapping overriding some of its defaults.

    Raises
    ------
    ProblemMismatchError : the problems differ and ``allow_mismatch`` is False.
    InvalidInputError : bad tolerances or held-out rows.
    """
    if not isinstance(a, RunRecord) or not isinstance(b, RunRecord):
        raise InvalidInputError("compare_runs needs two RunRecord objects")
    tol = tolerances if isinstance(tolerances, Tolerances) else Tolerances.from_mapping(tolerances)
    diffs = problem_differences(a.problem, b.problem, a.data, b.data)
    if diffs and not allow_mismatch:
        raise ProblemMismatchError(
            "the two runs solve different problems, so their answers cannot be compared: "
            + "; ".join(diffs) + " (pass allow_mismatch=True to compare anyway)")
    hv = None
    if holdout_X is not None:
        X = np.asarray(holdout_X, dtype=np.float64)
        if X.ndim != 2:
            raise InvalidInputError(f"held-out rows must be 2-D (rows, features), got {X.shape}")
        bad = np.argwhere(~np.isfinite(X))
        if bad.size:
            raise InvalidInputError(
                f"held-out rows: non-finite value at row {bad[0][0]}, column {bad[0][1]}")
        for rec, label in ((a, "A"), (b, "B")):
            d = rec.problem.X.shape[1]
            if X.shape[1] != d:
                raise InvalidInputError(
                    f"held-out rows have {X.shape[1]} columns; run {label} was trained on {d}")
            if isinstance(rec.problem.kernel, PrecomputedKernel):
                raise InvalidInputError(
                    f"run {label} uses a precomputed kernel: held-out rows need their own "
                    "kernel values and cannot be scored")
        hv = (_holdout_values(a.problem, a.result, a.standardiser, X),
              _holdout_values(b.problem, b.result, b.standardiser, X))
    return compare_results(a.problem, a.result, b.problem, b.result, holdout_values=hv,
                           tolerances=tol, allow_mismatch=allow_mismatch, data_a=a.data,
                           data_b=b.data, run_ids=(a.run_id, b.run_id))
