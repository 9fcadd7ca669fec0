"""Checks on the problem, the final multipliers, the certificate, events and the kernel audit.

Pure computations on arrays and plain data (no files).  The kernel probe evaluates the
kernel on at most PROBE_ROWS seeded rows: O(PROBE_ROWS² d) time plus one eigh of that size.
"""

from __future__ import annotations

import contextlib
from collections.abc import Mapping
from typing import Any

import numpy as np

from ..certificate import Certificate, certify
from ..problem import DualProblem
from ._records import Finding

__all__ = ["kernel_probe", "conditioning", "indefinite", "penalty", "duplicates", "imbalance",
           "collinear", "unscaled", "drift", "PROBE_ROWS", "IDENTITY_OFFDIAG",
           "CONSTANT_SPREAD", "SCALE_RATIO", "IMBALANCE_SHARE", "COLLINEAR_CORR",
           "ROUNDING_RATIO", "PENALTY_LARGE", "DRIFT_SHARE", "DRIFT_ROUNDING"]

#: rows of the seeded kernel probe (numpy.random.default_rng(0))
PROBE_ROWS = 300
#: kernel ≈ identity: 95 % of the normalised off-diagonal values |K_ij|/√(K_ii K_jj) below this
IDENTITY_OFFDIAG = 1e-3
#: kernel ≈ constant (up to sign): median of 1 − |normalised K_ij| below this
CONSTANT_SPREAD = 1e-3
#: unscaled features: standard deviations differ by more than this factor (the report's
#: flag uses the same factor; standardising for distance-based kernels is common practice)
SCALE_RATIO = 100.0
#: class imbalance: the smaller class holds at most this share of the rows
IMBALANCE_SHARE = 0.05
#: collinear features: |correlation| at least this
COLLINEAR_CORR = 1.0 - 1e-6
#: a negative eigenvalue smaller than this share of the largest is of rounding size
ROUNDING_RATIO = 1e-6
#: C × (largest kernel diagonal) at or above this counts as a large penalty (our heuristic)
PENALTY_LARGE = 1e4
#: drift: a rebuilt figure differing by more than this share of kkt_tol is a finding, unless
#: it is within DRIFT_ROUNDING × ‖α‖₁ × max Kᵢᵢ (the scale of the gradient's rounding; on a
#: 200 000-iteration run with ‖α‖₁ ≈ 4·10⁶ the difference measured 9·10⁻¹¹)
DRIFT_SHARE = 0.1
DRIFT_ROUNDING = 1e-12

_EPS = float(np.finfo(np.float64).eps)


def _one_blas_thread() -> contextlib.AbstractContextManager:
    """BLAS limited to one thread when threadpoolctl is installed: on a busy 2-core machine a
    threaded 300 × 300 eigh took 1.6–3.3 s against 0.013 s on one thread (measured)."""
    try:
        import threadpoolctl
    except ImportError:  # pragma: no cover - optional
        return contextlib.nullcontext()
    return threadpoolctl.threadpool_limits(1)


def kernel_probe(problem: DualProblem, *, rows: int = PROBE_ROWS, seed: int = 0) -> dict[str, Any]:
    """Kernel values on a seeded sample of rows: normalised off-diagonal statistics and the
    sample Gram's eigenvalues (a negative one holds for the full Gram by Cauchy interlacing)."""
    n = problem.n
    m = min(n, rows)
    idx = np.sort(np.random.default_rng(seed).choice(n, size=m, replace=False))
    with _one_blas_thread():
        K = problem.kernel_block(idx, idx)
        K = 0.5 * (K + K.T)
        lam = np.linalg.eigvalsh(K)
    diag = np.diag(K).copy()
    out: dict[str, Any] = {"rows": int(m), "seed": seed, "min_eigenvalue": float(lam[0]),
                           "max_eigenvalue": float(lam[-1]),
                           "psd_tol": float(m * _EPS * max(np.max(np.abs(lam)), _EPS))}
    pos = np.clip(lam, 0.0, None)
    out["top_eigenvalue_share"] = float(pos[-1] / pos.sum()) if pos.sum() > 0 else None
    if m >= 2 and np.all(diag > 0):
        c = K / np.sqrt(np.outer(diag, diag))
        off = np.abs(c[~np.eye(m, dtype=bool)])
        out["offdiag_p95"] = float(np.quantile(off, 0.95))
        out["offdiag_median"] = float(np.median(off))
        out["spread_median"] = float(np.median(1.0 - off))
    return out


def conditioning(probe: Mapping[str, Any], sv_share: float,
                 gamma: float | None = None) -> list[Finding]:
    """Kernel ≈ identity (γ too large) or ≈ constant (γ too small, unscaled features);
    with the kernel's ``gamma`` the what-if suggestion moves it by a factor 1000."""
    out = []
    p95 = probe.get("offdiag_p95")
    ev = {k: probe.get(k) for k in ("rows", "offdiag_p95", "offdiag_median", "spread_median",
                                    "top_eigenvalue_share", "min_eigenvalue", "max_eigenvalue")}
    if p95 is not None and p95 < IDENTITY_OFFDIAG:
        out.append(Finding(
            "kernel_near_identity", "caution",
            f"the kernel is close to the identity: 95 % of normalised off-diagonal values are "
            f"below {p95:.2g} on {probe['rows']} probed rows, and {sv_share:.0%} of the rows are "
            "support vectors (each point is fitted on its own)",
            {**ev, "support_share": sv_share, "threshold": IDENTITY_OFFDIAG},
            "use a smaller γ (e.g. the median heuristic on standardised features)",
            None if gamma is None else f"gamma={gamma / 1000:g}"))
    spread = probe.get("spread_median")
    if spread is not None and spread < CONSTANT_SPREAD:
        out.append(Finding(
            "kernel_near_constant", "caution",
            f"kernel values are nearly all equal up to sign: the median of 1 − |normalised "
            f"K_ij| is {spread:.2g} and the largest eigenvalue carries "
            f"{(probe.get('top_eigenvalue_share') or 0):.1%} of the probed spectrum",
            {**ev, "threshold": CONSTANT_SPREAD},
            "use a larger γ, or standardise the features if one column dominates the distances",
            None if gamma is None else f"gamma={gamma * 1000:g}"))
    return out


def indefinite(probe: Mapping[str, Any], audit: Mapping[str, Any] | None,
               events: Mapping[str, np.ndarray], kinds: Mapping[int, str],
               psd_declared: bool | None) -> tuple[list[Finding], dict[str, Any]]:
    """Negative eigenvalues (kernel audit, else the probe) and the curvature-fix events."""
    src = "kernel audit" if audit and audit.get("min_eigenvalue") is not None else "kernel probe"
    a = audit if src == "kernel audit" else probe
    lam_min, lam_max = float(a["min_eigenvalue"]), float(a["max_eigenvalue"])
    tol = float(a.get("psd_tol") or 0.0)
    code = {v: k for k, v in kinds.items()}.get("curvature_fix")
    ev_it = np.asarray(events["iteration"])
    sel = np.asarray(events["kind"]) == code
    curv_it, curv_val = ev_it[sel], np.asarray(events["value"])[sel]
    curv = {"count": int(sel.sum())}
    if curv_it.size:
        curv.update(first_iteration=int(curv_it[0]), last_iteration=int(curv_it[-1]),
                    iterations=[int(v) for v in curv_it[:20]],
                    most_negative=float(curv_val.min()))
    checks = {"source": src, "min_eigenvalue": lam_min, "max_eigenvalue": lam_max,
              "psd_tol": tol, "curvature_events": curv}
    out = []
    if lam_min < -tol:
        ratio = -lam_min / max(abs(lam_max), _EPS)
        tiny = ratio <= ROUNDING_RATIO
        where = (f"; {curv['count']} curvature fix(es) between iterations "
                 f"{curv['first_iteration']} and {curv['last_iteration']}" if curv_it.size
                 else "; no pair met non-positive curvature during the run")
        out.append(Finding(
            "indefinite_kernel", "note" if tiny else "caution",
            f"the {src} finds a negative eigenvalue {lam_min:.3g} (largest {lam_max:.3g}, "
            f"ratio {ratio:.2g}" + (", of rounding size" if tiny else "") + ")" + where,
            {**checks, "ratio": ratio, "rounding_size": tiny},
            ("shift the Gram's spectrum (add |λ_min| to its diagonal) or store it at full "
             "precision" if tiny else
             "the dual may be non-convex: use a positive semi-definite kernel, or compare "
             "with the QP challenger and several starts")))
    elif curv_it.size:
        out.append(Finding(
            "curvature_fixes", "note" if psd_declared else "caution",
            f"{curv['count']} working-set pair(s) had non-positive curvature K_ii + K_jj − "
            f"2K_ij between iterations {curv['first_iteration']} and {curv['last_iteration']} "
            "although no negative eigenvalue was found: duplicate rows give zero curvature",
            checks, "look for duplicate rows (see conflicting_duplicates)"))
    return out, checks


def penalty(problem: DualProblem, alpha: np.ndarray, cert: Certificate, *, converged: bool,
            iterations: int, gap_series: list[dict[str, Any]] | None,
            unscaled: bool = False) -> list[Finding]:
    """C too large (huge multipliers, slow gap tail) or too small (all at the bound).  With
    unscaled features the large C × kernel scale is their effect, reported there instead."""
    out = []
    n_sv, n_b = int(cert.n_free + cert.n_bounded), int(cert.n_bounded)
    C = problem.info.get("C")
    width = float(np.max(problem.upper - problem.lower))
    dmax = float(np.max(problem.kernel_diag()))
    slow = (not converged) or iterations >= 50 * problem.n
    if C is not None and slow and not unscaled and width * max(dmax, _EPS) >= PENALTY_LARGE:
        tail = None
        if gap_series and len(gap_series) >= 2:
            g0, g1 = gap_series[0]["relative_gap"], gap_series[-1]["relative_gap"]
            tail = {"from": g0, "to": g1, "factor": (g0 / g1) if g1 > 0 else None}
        amax = float(np.max(alpha - problem.lower))
        out.append(Finding(
            "penalty_large", "caution",
            f"C = {C:g} is large for this problem: {n_b} of {n_sv} support vectors at the bound,"
            f" the largest multiplier {amax:.3g}, relative duality gap {cert.relative_gap:.3g} "
            f"after {iterations} iterations" + (
                f" (it fell only from {tail['from']:.3g} to {tail['to']:.3g} over the stored "
                "snapshots of the second half)" if tail else ""),
            {"C": C, "kernel_diag_max": dmax, "bounded": n_b, "support": n_sv,
             "bounded_share": n_b / n_sv if n_sv else None, "largest_alpha": amax,
             "relative_gap": cert.relative_gap, "gap_tail": gap_series or [],
             "threshold": PENALTY_LARGE},
            "overlapping classes cannot be separated: lower C (e.g. by 1000×) and compare",
            f"C={C / 1000:g}"))
    if n_sv >= 2 and cert.n_free == 0 and n_b == n_sv:
        out.append(Finding(
            "penalty_small", "note",
            f"all {n_sv} support vectors sit at their upper bound (C = {C}) and none is free: "
            "the bias comes from the interval midpoint",
            {"C": C, "support": n_sv, "bounded": n_b, "bias_from": cert.bias_from},
            "a larger C lets some multipliers settle inside the box",
            None if C is None else f"C={C * 100:g}"))
    return out


def duplicates(problem: DualProblem, precomputed: bool) -> list[Finding]:
    """Identical feature rows with opposite signs y (classification labels)."""
    if precomputed or problem.info.get("class_counts") is None:
        return []
    F = np.ascontiguousarray(problem.features())
    _, inv = np.unique(F, axis=0, return_inverse=True)
    inv = inv.reshape(-1)
    pos = np.bincount(inv, weights=(problem.y > 0).astype(float))
    cnt = np.bincount(inv)
    bad = np.flatnonzero((pos > 0) & (pos < cnt))
    if bad.size == 0:
        return []
    groups = [np.flatnonzero(inv == g).tolist()[:6] for g in bad[:10]]
    rows = int(np.isin(inv, bad).sum())
    return [Finding(
        "conflicting_duplicates", "caution",
        f"{bad.size} group(s) of identical rows carry both labels ({rows} rows), e.g. rows "
        f"{groups[0]}: no decision function separates them and their pair curvature is zero",
        {"groups": int(bad.size), "rows": rows, "examples": groups},
        "merge or remove the conflicting rows, or accept that they end at the bound C")]


def imbalance(problem: DualProblem) -> list[Finding]:
    """The smaller class's share of the rows (classification problems)."""
    counts = problem.info.get("class_counts")
    if not counts:
        return []
    neg, pos = int(counts.get("negative", 0)), int(counts.get("positive", 0))
    small = min(neg, pos)
    share = small / max(neg + pos, 1)
    if share > IMBALANCE_SHARE:
        return []
    return [Finding(
        "class_imbalance", "caution",
        f"the smaller class has {small} of {neg + pos} rows ({share:.1%}); the larger one "
        "dominates the hinge loss",
        {"negative": neg, "positive": pos, "share": share, "threshold": IMBALANCE_SHARE},
        "weight the classes (--class-weight balanced) and report balanced accuracy")]


def collinear(problem: DualProblem, names: list[str] | None, precomputed: bool) -> list[Finding]:
    """Pairs of features with |correlation| ≥ COLLINEAR_CORR (on at most 5000 rows)."""
    X = problem.X
    if precomputed or X.shape[1] < 2 or X.shape[1] > 500:
        return []
    Xs = X[:5000]
    sd = Xs.std(axis=0)
    keep = np.flatnonzero(sd > 0)
    if keep.size < 2:
        return []
    R = np.corrcoef(Xs[:, keep], rowvar=False)
    iu = np.triu_indices(keep.size, k=1)
    hit = np.flatnonzero(np.abs(R[iu]) >= COLLINEAR_CORR)
    if hit.size == 0:
        return []
    label = (lambda k: names[k]) if names and len(names) == X.shape[1] else (lambda k: f"x{k}")
    pairs = [{"a": label(int(keep[iu[0][t]])), "b": label(int(keep[iu[1][t]])),
              "correlation": float(R[iu][t])} for t in hit[:10]]
    return [Finding(
        "collinear_features", "note",
        f"{hit.size} feature pair(s) are almost perfectly correlated, e.g. {pairs[0]['a']} and "
        f"{pairs[0]['b']} (r = {pairs[0]['correlation']:.10f}): the kernel matrix is close to "
        "singular along their difference",
        {"pairs": pairs, "threshold": COLLINEAR_CORR},
        "drop or combine one of each pair")]


def unscaled(problem: DualProblem, standardised: bool, names: list[str] | None,
             precomputed: bool) -> list[Finding]:
    """Feature spreads of rows that were not standardised."""
    if standardised or precomputed or problem.X.shape[1] < 2:
        return []
    sd = problem.X.std(axis=0)
    ok = np.flatnonzero(sd > 0)
    if ok.size < 2 or sd[ok].max() / sd[ok].min() <= SCALE_RATIO:
        return []
    ratio = float(sd[ok].max() / sd[ok].min())
    big = int(ok[np.argmax(sd[ok])])
    name = names[big] if names and len(names) == problem.X.shape[1] else f"x{big}"
    return [Finding(
        "unscaled_features", "caution",
        f"features were not standardised and their standard deviations differ by a factor "
        f"{ratio:.3g} (> {SCALE_RATIO:g}); {name} dominates the kernel",
        {"standard_deviations": [float(v) for v in sd], "ratio": ratio, "largest": name,
         "threshold": SCALE_RATIO},
        "standardise the features (the default of train)", "standardise")]


def drift(problem: DualProblem, alpha: np.ndarray, stored: Certificate, kkt_tol: float,
          loop_objective: float | None, last_objective: float | None) -> tuple[list[Finding],
                                                                           dict[str, Any]]:
    """The stored certificate (from the solver's incrementally updated gradient) against one
    rebuilt from scratch from the stored α.

    The incremental gradient itself is not stored, so its largest difference from the
    rebuilt one is bounded from below: |Δm| and |ΔM| (extremes over the same index sets),
    |Δb| for a bias averaged over free points, and 2|ΔD| / ‖α‖₁ for the objective.
    """
    fresh = certify(problem, alpha, kkt_tol=kkt_tol)
    d_dual = abs(fresh.dual_objective - stored.dual_objective)
    l1 = float(np.sum(np.abs(alpha)))
    parts = {"m_up": abs(fresh.m_up - stored.m_up) if np.isfinite(fresh.m_up) else 0.0,
             "M_low": abs(fresh.M_low - stored.M_low) if np.isfinite(fresh.M_low) else 0.0,
             "bias": abs(fresh.bias - stored.bias),
             "objective": 2.0 * d_dual / l1 if l1 > 0 else 0.0}
    bound = max(parts.values())
    rounding = DRIFT_ROUNDING * max(1.0, l1 * float(np.max(np.abs(problem.kernel_diag()))))
    threshold = max(DRIFT_SHARE * kkt_tol, rounding)
    checks = {"gradient_difference_lower_bound": bound, "parts": parts,
              "rebuilt_max_violation": fresh.max_violation,
              "stored_max_violation": stored.max_violation,
              "rebuilt_dual_objective": fresh.dual_objective,
              "stored_dual_objective": stored.dual_objective,
              "loop_objective": loop_objective, "last_trace_objective": last_objective,
              "threshold": threshold, "rounding_scale": rounding}
    out = []
    if bound > threshold:
        out.append(Finding(
            "numerical_drift", "stop" if fresh.max_violation > kkt_tol >= stored.max_violation
            else "caution",
            f"the solver's incrementally updated gradient differs from one rebuilt from the "
            f"stored α by at least {bound:.3g} (kkt_tol {kkt_tol:g}); the rebuilt maximal "
            f"violation is {fresh.max_violation:.3g} against {stored.max_violation:.3g} stored",
            checks, "resume the run (the gradient is rebuilt from α at the start) or tighten "
            "kkt_tol"))
    return out, checks
