"""Semantic verification: a run checked against itself, not only against its digests.

Digests show that the files are the ones the manifest lists; anyone who can write the
store can also rewrite a manifest and its digests consistently.  These checks recompute
what the manifest claims from the stored arrays, so a forged figure is caught whatever
the catalog says:

* the certificate recomputed from α, the problem arrays and the kernel (gradient from
  the support vectors' kernel columns only, G = y ⊙ K[:, S](α ⊙ y)_S + p) must match the
  manifest's figures within the tolerances below; counts and bound flags exactly;
* the problem arrays must be those the recorded problem implies (p = −1, Δ = 0, l = 0,
  u = C × class weight for classification, y = ±1 with the recorded class counts);
* ``model.npz`` / ``model.json`` must equal the model rebuilt from ``solution.npz``;
* a full SMO trace replayed from snapshot 0 must reach every later snapshot and the
  final α bit for bit; any trace's last snapshot must be the final α;
* manifest fields must be what the format (``traces/README.md`` section 4) allows:
  finite numbers, ISO times, known enumeration values;
* attachments that repeat a figure (explanation table α and labels, held-out label
  order) must agree with the run.

Tolerances (gradient units: those of G = Qα + p; objective units: those of the dual):
``|a − b| ≤ GRAD_RTOL · (1 + max|G|)`` for violation, m, M, bias and KKT residuals;
``|a − b| ≤ OBJ_RTOL · (1 + |D| + |P|)`` for the objectives and the gap.  The recomputed
gradient differs from a solver's maintained one by rounding only (measured below 1e-12
relative on the tablet-coating demo runs and the test problems), so these leave a margin
of about 10⁴ while still catching any forged figure that matters at the solver's tol.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from datetime import datetime, timezone
from typing import Any

import numpy as np

from ..certificate import certify
from ..model import model_from_solution
from ..run import RunRecord
from ..status import Status

__all__ = ["semantic_problems", "manifest_field_problems", "GRAD_RTOL", "OBJ_RTOL",
           "gradient_from_support"]

GRAD_RTOL = 1e-9
OBJ_RTOL = 1e-11
#: kernel rows evaluated per block when recomputing the gradient (memory: rows × |S| × 8 B)
_BLOCK_ROWS = 2048

_ISO = re.compile(r"[0-9]{4}-[0-9]{2}-[0-9]{2}T[0-9]{2}:[0-9]{2}:[0-9]{2}\.[0-9]{6}Z")
#: solver names a run may carry: our two solvers and "external" (a solution trained
#: elsewhere and rebuilt by ``kktrace challenge``; solver/exchange/challenge.py).
_SOLVERS = ("smo", "qp", "external")
_KERNELS = ("linear", "poly", "rbf", "sigmoid", "precomputed", "callable")
_GAMMA_SOURCES = ("given", "median_heuristic")
_BIAS_FROM = ("free_support_vectors", "interval_midpoint")
_TRACE_LEVELS = ("full", "sampled", "off")
_MANIFEST_KEYS = ("format", "format_version", "run_id", "created", "kktrace_version", "parent",
                  "command", "solver", "problem", "data", "standardiser", "certificate", "trace",
                  "model", "attachments", "environment", "files")
_M = "manifest.json"


def gradient_from_support(problem: Any, alpha: np.ndarray) -> np.ndarray:
    """G = Qα + p using only the kernel columns of the support set S = {αᵢ ≠ 0}.

    Qα = y ⊙ K[:, S] (α ⊙ y)_S, evaluated in row blocks (never an n × n product).
    """
    alpha = np.asarray(alpha, dtype=np.float64)
    S = np.flatnonzero(alpha != 0.0)
    G = np.array(problem.p, dtype=np.float64)
    if S.size == 0:
        return G
    coef = alpha[S] * problem.y[S]
    n = problem.n
    qa = np.empty(n)
    for s in range(0, n, _BLOCK_ROWS):
        e = min(n, s + _BLOCK_ROWS)
        qa[s:e] = problem.kernel_block(np.arange(s, e), S) @ coef
    return G + problem.y * qa


def _walk_nonfinite(value: Any, path: str, out: list[str]) -> None:
    if isinstance(value, float) and not math.isfinite(value):
        out.append(f"{_M}: field {path} is not a finite number ({value!r}; non-finite figures "
                   "are written as {\"$float\": ...})")
    elif isinstance(value, dict):
        for k, v in value.items():
            _walk_nonfinite(v, f"{path}.{k}" if path else str(k), out)
    elif isinstance(value, list):
        for i, v in enumerate(value):
            _walk_nonfinite(v, f"{path}[{i}]", out)


def _num(v: Any) -> float | None:
    """A manifest number (plain or ``{"$float": ...}``) as float, else None."""
    if isinstance(v, bool):
        return None
    if isinstance(v, (int, float)):
        return float(v)
    if isinstance(v, dict) and set(v) == {"$float"}:
        return {"nan": math.nan, "inf": math.inf, "-inf": -math.inf}.get(v["$float"])
    return None


def manifest_field_problems(m: Mapping[str, Any]) -> list[str]:
    """Fields of a parsed manifest that the format does not allow (one line each)."""
    out: list[str] = []
    _walk_nonfinite(dict(m), "", out)
    keys = tuple(m)
    if set(keys) != set(_MANIFEST_KEYS):
        missing = [k for k in _MANIFEST_KEYS if k not in m]
        extra = [k for k in keys if k not in _MANIFEST_KEYS]
        if missing:
            out.append(f"{_M}: missing field(s) {', '.join(missing)}")
        if extra:
            out.append(f"{_M}: unknown field(s) {', '.join(extra)}")
    created = m.get("created")
    rid = m.get("run_id")
    if not (isinstance(created, str) and _ISO.fullmatch(created)):
        out.append(f"{_M}: field created {created!r} is not an ISO 8601 UTC time "
                   "(YYYY-MM-DDTHH:MM:SS.ffffffZ)")
    else:
        try:
            t = datetime.strptime(created, "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=timezone.utc)
        except ValueError:
            out.append(f"{_M}: field created {created!r} is not a valid date and time")
        else:
            if isinstance(rid, str) and not rid.startswith(t.strftime("%Y%m%dT%H%M%S%fZ")):
                out.append(f"{_M}: field created {created!r} is not the instant of run id {rid}")
    s = m.get("solver") if isinstance(m.get("solver"), dict) else {}
    p = m.get("problem") if isinstance(m.get("problem"), dict) else {}
    c = m.get("certificate") if isinstance(m.get("certificate"), dict) else {}
    t = m.get("trace") if isinstance(m.get("trace"), dict) else None
    k = p.get("kernel") if isinstance(p.get("kernel"), dict) else {}
    info = p.get("info") if isinstance(p.get("info"), dict) else {}

    def enum(value: Any, allowed: tuple[str, ...], where: str) -> None:
        if value not in allowed:
            out.append(f"{_M}: field {where} {value!r} is not one of {', '.join(allowed)}")

    from ..solvers import SOLVERS

    enum(s.get("name"), tuple(sorted(set(_SOLVERS) | set(SOLVERS))), "solver.name")
    enum(s.get("status"), tuple(st.label for st in Status), "solver.status")
    # problem kinds: any lower-case identifier (classification is checked in depth below;
    # other duals carry their own arrays)
    if not (isinstance(p.get("kind"), str) and re.fullmatch(r"[a-z][a-z0-9_]{0,63}", p["kind"])):
        out.append(f"{_M}: field problem.kind {p.get('kind')!r} is not a problem kind name")
    enum(k.get("name"), _KERNELS, "problem.kernel.name")
    params = k.get("params") if isinstance(k.get("params"), dict) else {}
    if "gamma_source" in params:
        enum(params.get("gamma_source"), _GAMMA_SOURCES, "problem.kernel.params.gamma_source")
    for name in ("gamma", "offset"):
        if name in params and params[name] is not None:
            v = _num(params[name])
            if v is None or not math.isfinite(v) or (name == "gamma" and v <= 0):
                out.append(f"{_M}: field problem.kernel.params.{name} {params[name]!r} must be "
                           + ("a finite number > 0" if name == "gamma" else "a finite number"))
    if "degree" in params and not (isinstance(params["degree"], int)
                                   and not isinstance(params["degree"], bool)
                                   and params["degree"] >= 1):
        out.append(f"{_M}: field problem.kernel.params.degree {params['degree']!r} must be an "
                   "integer >= 1")
    enum(c.get("bias_from"), _BIAS_FROM, "certificate.bias_from")
    if t is not None:
        enum(t.get("level"), _TRACE_LEVELS, "trace.level")
    positive = [("solver.seconds", s.get("seconds"), 0.0),
                ("certificate.kkt_tol", c.get("kkt_tol", c.get("tol")), 0.0)]
    # a one-class problem has no C: its bounds come from ν (problem.info.nu)
    positive.append(("problem.info.nu", info.get("nu"), 0.0) if p.get("kind") == "one_class"
                    else ("problem.info.C", info.get("C"), 0.0))
    for where, v, lo in positive:
        f = _num(v)
        if f is None or not math.isfinite(f) or f < lo or (where != "solver.seconds" and f == 0):
            out.append(f"{_M}: field {where} {v!r} must be a finite number "
                       + (">= 0" if where == "solver.seconds" else "> 0"))
    for where, v in (("solver.iterations", s.get("iterations")), ("problem.n", p.get("n")),
                     ("problem.n_features", p.get("n_features"))):
        if isinstance(v, bool) or not isinstance(v, int) or v < 0:
            out.append(f"{_M}: field {where} {v!r} must be a non-negative integer")
    return out


class _Checker:
    """Collects problem lines while comparing recomputed and stored figures."""

    def __init__(self) -> None:
        self.problems: list[str] = []

    def close(self, where: str, stored: Any, recomputed: float, atol: float) -> None:
        a = _num(stored)
        b = float(recomputed)
        if a is None:
            self.problems.append(f"{where}: {stored!r} is not a number (recomputed {b!r})")
            return
        if math.isnan(a) and math.isnan(b):
            return
        if math.isinf(a) or math.isinf(b):
            if a != b:
                self.problems.append(f"{where}: manifest says {a!r}, recomputed {b!r}")
            return
        if not abs(a - b) <= atol:
            self.problems.append(f"{where}: manifest says {a!r}, recomputed {b!r} "
                                 f"(tolerance {atol:.3g})")

    def equal(self, where: str, stored: Any, recomputed: Any) -> None:
        if stored != recomputed or type(stored) is bool and not isinstance(recomputed, bool):
            self.problems.append(f"{where}: manifest says {stored!r}, recomputed {recomputed!r}")


def semantic_problems(
    record: RunRecord, model_json: Mapping[str, Any] | None = None,
    model_arrays: Mapping[str, np.ndarray] | None = None,
) -> list[str]:
    """Problem lines for a decoded run whose stored figures disagree with its arrays.

    ``model_json`` / ``model_arrays``: the parsed ``model.json`` and the arrays of
    ``model.npz`` (classification runs), compared with the model rebuilt from α.
    """
    m = record.manifest or {}
    ck = _Checker()
    problem, result = record.problem, record.result
    alpha = np.asarray(result.alpha, dtype=np.float64)
    n = problem.n
    _problem_arrays(record, ck)
    if not np.all(np.isfinite(alpha)):
        ck.problems.append("solution.npz: alpha holds non-finite values")
        return ck.problems
    stored = result.certificate
    try:
        G = gradient_from_support(problem, alpha)
    except Exception as exc:  # a kernel that cannot be evaluated (callable): say so
        ck.problems.append(f"solution.npz: the certificate cannot be recomputed ({exc})")
        return ck.problems
    cert = certify(problem, alpha, kkt_tol=stored.kkt_tol, gradient=G,
                   bound_tol=stored.bound_tol)
    gtol = GRAD_RTOL * (1.0 + float(np.max(np.abs(G))) if n else 1.0)
    scale = 1.0 + abs(cert.dual_objective) + (abs(cert.primal_objective)
                                              if math.isfinite(cert.primal_objective) else 0.0)
    otol = OBJ_RTOL * scale
    mc = m.get("certificate") if isinstance(m.get("certificate"), dict) else {}
    C = "certificate"
    for name in ("max_violation", "m_up", "M_low", "bias"):
        ck.close(f"{_M}: {C}.{name}", mc.get(name), getattr(cert, name), gtol)
    ck.close(f"{_M}: {C}.max_kkt_residual", mc.get("max_kkt_residual"),
             float(np.max(cert.kkt_residual)) if n else 0.0, gtol)
    for name in ("dual_objective", "primal_objective", "duality_gap"):
        ck.close(f"{_M}: {C}.{name}", mc.get(name), getattr(cert, name), otol)
    ck.close(f"{_M}: {C}.relative_gap", mc.get("relative_gap"), cert.relative_gap,
             otol / max(scale - 1.0, np.finfo(float).tiny) + 1e-12)
    width = float(np.max(problem.upper - problem.lower)) if n else 1.0
    for name in ("bound_violation", "equality_residual"):
        ck.close(f"{_M}: {C}.{name}", mc.get(name), getattr(cert, name), 1e-12 * (1 + width))
    for name in ("n_support", "n_free", "n_bounded", "n_zero"):
        ck.equal(f"{_M}: {C}.{name}", mc.get(name), getattr(cert, name))
    ck.equal(f"{_M}: {C}.bias_from", mc.get("bias_from"), cert.bias_from)
    ck.equal(f"{_M}: {C}.meets_tol", mc.get("meets_tol"), cert.meets_tol)
    if not np.array_equal(stored.at_lower, cert.at_lower):
        ck.problems.append(f"solution.npz: at_lower differs from the bound flags recomputed from "
                           f"alpha at {int(np.sum(stored.at_lower != cert.at_lower))} point(s)")
    if not np.array_equal(stored.at_upper, cert.at_upper):
        ck.problems.append(f"solution.npz: at_upper differs from the bound flags recomputed from "
                           f"alpha at {int(np.sum(stored.at_upper != cert.at_upper))} point(s)")
    diff = np.abs(np.asarray(stored.kkt_residual) - cert.kkt_residual)
    if n and not float(np.max(diff)) <= gtol:
        i = int(np.argmax(diff))
        ck.problems.append(f"solution.npz: kkt_residual[{i}] is {float(stored.kkt_residual[i])!r}, "
                           f"recomputed {float(cert.kkt_residual[i])!r} (tolerance {gtol:.3g})")
    status = result.status
    # the status rule (solver.status.decide): "converged" needs the certificate within kkt_tol,
    # whatever the backend said; QP runs written before the rule (no extra.attempts) kept
    # cvxopt's word, and readers apply the rule to them instead (decide on load)
    before_rule = result.solver == "qp" and "attempts" not in (result.extra or {})
    if (status == Status.CONVERGED and not before_rule
            and not cert.max_violation <= cert.kkt_tol + gtol):
        ck.problems.append(f"{_M}: solver.status says converged, but the recomputed maximal "
                           f"violation {cert.max_violation!r} exceeds kkt_tol {cert.kkt_tol!r}")
    ms = m.get("solver") if isinstance(m.get("solver"), dict) else {}
    # both solvers report the certificate's bias (solver/smo.py, solver/qp.py); an external
    # solution keeps the bias its file states, which the certificate judges, not replaces
    if result.solver != "external":
        ck.close(f"{_M}: solver.bias", ms.get("bias"), cert.bias, gtol)
    _trace_checks(record, ck)
    if problem.labels is not None:
        _model_checks(record, cert, model_json, model_arrays, ck)
        _attachment_checks(record, cert, ck)
    return ck.problems


def _problem_arrays(record: RunRecord, ck: _Checker) -> None:
    problem = record.problem
    m = record.manifest or {}
    mp = m.get("problem") if isinstance(m.get("problem"), dict) else {}
    info = problem.info or {}
    data = record.data or {}
    n = problem.n
    m_rows = int(problem.X.shape[0])  # data rows (ε-regression has two variables per row)
    if data.get("n_rows") is not None and data.get("n_rows") != m_rows:
        ck.problems.append(f"{_M}: data.n_rows {data.get('n_rows')!r} differs from the "
                           f"problem's {m_rows} data rows")
    names = data.get("feature_names")
    d_raw = record.standardiser.centre.shape[0] if record.standardiser is not None else None
    if isinstance(names, list) and d_raw is not None and len(names) != d_raw:
        ck.problems.append(f"{_M}: data.feature_names has {len(names)} names, the standardiser "
                           f"{d_raw} columns")
    std_m = m.get("standardiser") if isinstance(m.get("standardiser"), dict) else {}
    if record.standardiser is not None and std_m:
        ident = bool(np.all(record.standardiser.centre == 0) and
                     np.all(record.standardiser.scale == 1))
        if std_m.get("identity") is not None and bool(std_m.get("identity")) != ident:
            ck.problems.append(f"{_M}: standardiser.identity {std_m.get('identity')!r} differs "
                               "from the centre/scale arrays in solution.npz")
    if problem.kind != "binary_classification":
        return
    y = problem.y
    if not np.all(np.abs(y) == 1.0):
        ck.problems.append("solution.npz: y holds values other than -1 and +1")
        return
    if not np.all(problem.p == -1.0):
        ck.problems.append("solution.npz: p differs from -1 (a classification dual has p = -1)")
    if not np.all(problem.lower == 0.0):
        ck.problems.append("solution.npz: lower differs from 0 (a classification dual has l = 0)")
    if problem.delta != 0.0:
        ck.problems.append(f"{_M}: problem.delta {problem.delta!r} differs from 0")
    counts = info.get("class_counts")
    if isinstance(counts, Mapping):
        ck.equal(f"{_M}: problem.info.class_counts.positive", counts.get("positive"),
                 int(np.sum(y > 0)))
        ck.equal(f"{_M}: problem.info.class_counts.negative", counts.get("negative"),
                 int(np.sum(y < 0)))
    Cv = _num(info.get("C"))
    if Cv is None or not math.isfinite(Cv) or Cv <= 0:
        return  # reported by manifest_field_problems
    if info.get("sample_weight"):
        return  # per-point weights: the bounds are the record; nothing to rebuild them from
    expect = np.full(n, Cv)
    cw = info.get("class_weight")
    labels = info.get("labels") if isinstance(info.get("labels"), Mapping) else {}
    if isinstance(cw, Mapping):
        for side, sign in (("negative", -1.0), ("positive", 1.0)):
            w = cw.get(str(labels.get(side)))
            if w is not None:
                expect[y == sign] *= float(w)
    bad = np.flatnonzero(problem.upper != expect)
    if bad.size:
        i = int(bad[0])
        ck.problems.append(f"{_M}: problem.info.C {info.get('C')!r} (with its class weights) "
                           f"gives upper bound {float(expect[i])!r} at point {i}, but solution.npz "
                           f"holds {float(problem.upper[i])!r} ({bad.size} point(s) differ)")
    del mp


def _trace_checks(record: RunRecord, ck: _Checker) -> None:
    tr = record.result.trace
    res = record.result
    alpha = np.asarray(res.alpha)
    if tr is None:
        return
    snaps = np.asarray(tr.snapshot_iterations, dtype=np.int64)
    S = np.asarray(tr.snapshots)
    if snaps.size == 0:
        ck.problems.append("snapshots.npz: holds no snapshot")
        return
    if snaps[0] != 0 or np.any(np.diff(snaps) <= 0) or snaps[-1] != res.iterations:
        ck.problems.append(f"snapshots.npz: snapshot_iterations must rise from 0 to the final "
                           f"iteration {res.iterations} (found {snaps[0]} … {snaps[-1]})")
        return
    delta_cols = all(c in tr.columns for c in ("i", "j", "alpha_i", "alpha_j"))
    # SMO holds α exactly as the snapshots do, and so does the QP solver's last snapshot
    # when it says so (extra.final_snapshot "returned_alpha"); older QP runs kept the final
    # interior iterate there, before the answer was moved onto the bounds
    returned = (res.extra or {}).get("final_snapshot") == "returned_alpha"
    if (delta_cols or returned) and not np.array_equal(S[-1], alpha):
        k = int(np.sum(S[-1] != alpha))
        ck.problems.append(f"snapshots.npz: the last snapshot (iteration {snaps[-1]}) differs "
                           f"from the final alpha in solution.npz at {k} point(s)")
    it = np.asarray(tr.columns.get("iteration", np.zeros(0)), dtype=np.int64)
    if it.size and (np.any(np.diff(it) <= 0) or it[0] < 1 or it[-1] > res.iterations):
        ck.problems.append("trace.parquet: iteration column is not strictly rising within "
                           f"1 … {res.iterations}")
        return
    if tr.level != "full" or not delta_cols:
        return
    if it.size != res.iterations or (it.size and it[-1] != res.iterations):
        ck.problems.append(f"trace.parquet: a full trace must hold one row per iteration "
                           f"(1 … {res.iterations}); it holds {it.size} rows"
                           + (f" ending at {int(it[-1])}" if it.size else ""))
        return
    # replay from snapshot 0 through every row; each snapshot must be met bit for bit
    a = np.array(S[0], dtype=np.float64)
    ii = np.asarray(tr.columns["i"], dtype=np.int64)
    jj = np.asarray(tr.columns["j"], dtype=np.int64)
    ai = np.asarray(tr.columns["alpha_i"], dtype=np.float64)
    aj = np.asarray(tr.columns["alpha_j"], dtype=np.float64)
    n = a.shape[0]
    if it.size and (min(ii.min(), jj.min()) < 0 or max(ii.max(), jj.max()) >= n):
        ck.problems.append("trace.parquet: a working-set index lies outside 0 … n-1")
        return
    start = 0
    for k in range(1, snaps.size):
        stop = int(snaps[k])  # rows start..stop-1 hold iterations start+1 .. stop
        lo, hi = int(snaps[k - 1]), stop
        idx = np.empty(2 * (hi - lo), dtype=np.int64)
        val = np.empty(2 * (hi - lo))
        idx[0::2], idx[1::2] = ii[lo:hi], jj[lo:hi]
        val[0::2], val[1::2] = ai[lo:hi], aj[lo:hi]
        uniq, first_rev = np.unique(idx[::-1], return_index=True)
        a[uniq] = val[idx.shape[0] - 1 - first_rev]
        if not np.array_equal(a, S[k]):
            bad = int(np.sum(a != S[k]))
            ck.problems.append(f"snapshots.npz: snapshot at iteration {stop} differs from the "
                               f"trace replayed from iteration {snaps[k - 1]} at {bad} point(s)")
            return
        start = stop
    del start


def _model_checks(record: RunRecord, cert: Any, model_json: Mapping[str, Any] | None,
                  model_arrays: Mapping[str, np.ndarray] | None, ck: _Checker) -> None:
    m = record.manifest or {}
    if model_json is None or model_arrays is None:
        if m.get("model") is not None:
            ck.problems.append("model.json: listed by the manifest but not read")
        else:
            ck.problems.append(f"{_M}: field model is null for a classification run")
        return
    from dataclasses import replace

    rebuilt = model_from_solution(record.problem, replace(record.result, certificate=cert),
                                  record.standardiser)
    F, Z = "model.json", "model.npz"
    info = record.problem.info or {}
    labels = info.get("labels") if isinstance(info.get("labels"), Mapping) else {}
    ck.equal(f"{F}: labels", model_json.get("labels"), dict(labels))
    ck.equal(f"{F}: kernel", model_json.get("kernel"), (m.get("problem") or {}).get("kernel"))
    ck.equal(f"{F}: run_id", model_json.get("run_id"), record.run_id)
    ck.equal(f"{F}: status", model_json.get("status"), record.result.status.label)
    ck.equal(f"{F}: converged", model_json.get("converged"),
             record.result.status == Status.CONVERGED)
    ck.close(f"{F}: bias", model_json.get("bias"), float(record.result.bias), 0.0)
    ck.equal(f"{F}: n_support", model_json.get("n_support"), int(rebuilt.support_rows.shape[0]))
    for name, want in (("support_rows", rebuilt.support_rows),
                       ("support_points", rebuilt.support_points),
                       ("coefficients", rebuilt.coefficients),
                       ("centre", rebuilt.standardiser.centre),
                       ("scale", rebuilt.standardiser.scale)):
        got = model_arrays.get(name)
        if got is None or np.shape(got) != np.shape(want):
            ck.problems.append(f"{Z}: {name} has shape {np.shape(got)}, the model rebuilt from "
                               f"solution.npz {np.shape(want)}")
        elif not np.array_equal(got, want):
            k = int(np.sum(np.asarray(got) != np.asarray(want)))
            ck.problems.append(f"{Z}: {name} differs from the model rebuilt from solution.npz "
                               f"at {k} entr{'y' if k == 1 else 'ies'}")


def _attachment_checks(record: RunRecord, cert: Any, ck: _Checker) -> None:
    info = record.problem.info or {}
    labels = info.get("labels") if isinstance(info.get("labels"), Mapping) else {}
    neg, pos = labels.get("negative"), labels.get("positive")
    table = record.attachments.get("explanation")
    if isinstance(table, Mapping) and "alpha" in table and "label" in table:
        a = np.asarray(table["alpha"])
        lab = np.asarray(table["label"]).astype(str)
        if a.shape != record.result.alpha.shape or not np.array_equal(a, record.result.alpha):
            ck.problems.append("explanation.parquet: column alpha differs from solution.npz")
        elif lab.shape == record.problem.y.shape:
            want = np.where(record.problem.y > 0, str(pos), str(neg))
            bad = np.flatnonzero(lab != want)
            if bad.size:
                ck.problems.append(
                    f"explanation.parquet: label of point {int(bad[0])} is {lab[bad[0]]!r}, but "
                    f"y = {record.problem.y[bad[0]]:+.0f} maps to {want[bad[0]]!r} under the "
                    f"manifest's labels (negative {neg!r}, positive {pos!r}); {bad.size} differ")
    hold = record.attachments.get("holdout")
    if isinstance(hold, Mapping) and isinstance(hold.get("labels"), list):
        if [str(v) for v in hold["labels"]] != [str(neg), str(pos)]:
            ck.problems.append(f"holdout.json: labels {hold['labels']!r} differ from the "
                               f"manifest's (negative {neg!r}, positive {pos!r})")
