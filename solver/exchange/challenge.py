"""Effective challenge of a model trained elsewhere: is it the optimum of the problem it claims?

For every binary problem of the external model (one, or one per pair of classes):

1. map each support vector to its training row (exact match after the stated input
   scaling, within a stated matching tolerance; every unmatched vector is counted and the
   challenge is refused if there is one);
2. rebuild α (αᵢ = coefficientᵢ·yᵢ, summed over duplicates; rows that are not support
   vectors get 0) and the dual problem with the caller's C (a missing C is refused: the
   largest multiplier max|coefficient| only bounds C from below);
3. certify the external solution with the one certificate (feasibility, maximal KKT
   violation, duality gap) — a float32 model (ONNX) is judged at the caller's tolerance
   plus a stated float32 rounding allowance;
4. solve the same problem afresh with SMO and with the QP challenger, and give the
   agreement verdict of the external solution against each.

Findings that make the external solution non-optimal (a coefficient outside the box for
the given C, a sign that disagrees with the row's label, the equality constraint, the
rows with the largest KKT residuals) are part of the result, never a crash.
"""

from __future__ import annotations

from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from .._workflow import NO_CHOICE, Columns, _fingerprint, _load_data, open_store
from ..certificate import certify
from ..data import Dataset
from ..errors import InvalidInputError
from ..model import Standardiser
from ..plaindata import to_plain
from ..problem import binary_classification
from ..result import SolveResult
from ..run import RunRecord
from ..status import Status, status_message
from ..vocabulary import figure_text
from .external import ExternalModel, ExternalPair, read_external_model

__all__ = ["ChallengeOutcome", "PairChallenge", "challenge", "FLOAT32_EPS", "TOP_RESIDUALS"]

FLOAT32_EPS = float(np.finfo(np.float32).eps)
#: rows with the largest KKT residuals named in the findings
TOP_RESIDUALS = 5


@dataclass(frozen=True)
class PairChallenge:
    """The challenge of one binary problem (``positive`` vs ``negative``)."""

    positive: Hashable
    negative: Hashable
    external_run: str
    fresh_runs: Mapping[str, str]
    verdicts: Mapping[str, str]
    certificate: Mapping[str, Any]
    optimal: bool
    findings: tuple[str, ...]
    matched: int
    kkt_tol: float
    float32_allowance: float

    def to_dict(self) -> dict[str, Any]:
        """Plain data."""
        return to_plain({k: getattr(self, k) for k in self.__dataclass_fields__})


@dataclass(frozen=True)
class ChallengeOutcome:
    """Every pair's challenge, the source file's digest and the overall verdict.

    verdict : the worst pair verdict against the fresh solvers ("agree" <
    "agree_within_tolerances" < "disagree"); optimal : every pair's external certificate
    met its tolerance.
    """

    source: str
    source_sha256: str
    source_format: str
    input_scaling: str
    pairs: tuple[PairChallenge, ...]
    verdict: str
    optimal: bool
    notes: tuple[str, ...] = field(default_factory=tuple)

    def to_dict(self) -> dict[str, Any]:
        """Plain data."""
        return to_plain({"source": self.source, "source_sha256": self.source_sha256,
                         "source_format": self.source_format,
                         "input_scaling": self.input_scaling, "verdict": self.verdict,
                         "optimal": self.optimal, "notes": list(self.notes),
                         "pairs": [p.to_dict() for p in self.pairs]})


_RANK = {"agree": 0, "agree_within_tolerances": 1, "disagree": 2}


def _label_index(values: np.ndarray, wanted: Hashable, source: str, data: str) -> np.ndarray:
    """Rows whose label equals ``wanted`` (compared as text, so 1 matches '1')."""
    mask = np.asarray([str(v) == str(wanted) for v in values.tolist()])
    if not mask.any():
        raise InvalidInputError(f"{source}: the model's label {wanted!r} does not occur in the "
                                f"label column of {data}")
    return mask


def _match_rows(points: np.ndarray, Z: np.ndarray, tol: float, source: str) -> np.ndarray:
    """Index into ``Z`` of each support vector (Chebyshev distance ≤ tol), or refuse."""
    from scipy.spatial import cKDTree

    dist, idx = cKDTree(Z).query(points, k=1, p=np.inf)
    missing = np.flatnonzero(~(dist <= tol))
    if missing.size:
        raise InvalidInputError(
            f"{source}: {missing.size} of {points.shape[0]} support vectors match no training "
            f"row within {tol:.3g} (largest distance {float(np.max(dist[missing])):.3g}); the "
            "model was not trained on these rows with this input scaling")
    return idx


def _allowance(alpha: np.ndarray, diag_max: float, bias: float, float32: bool) -> float:
    """Float32 rounding allowance on the KKT violation (our own bound, gradient units).

    Rounding every coefficient, support-vector coordinate and the bias to float32 moves each
    gradient entry by at most about ε₃₂·(Σ|αᵢ|·max K(x, x) + |b|); the factor 8 covers the
    kernel's own sensitivity to rounded coordinates.  Zero for a float64 source.
    """
    if not float32:
        return 0.0
    return 8.0 * FLOAT32_EPS * (float(np.sum(np.abs(alpha))) * max(diag_max, 1.0)
                                + abs(bias))


def _findings(problem: Any, alpha: np.ndarray, coef_sign_bad: np.ndarray, rows: np.ndarray,
              cert: Any, C: float) -> list[str]:
    out = []
    if coef_sign_bad.any():
        bad = rows[coef_sign_bad][:TOP_RESIDUALS]
        out.append(f"{int(coef_sign_bad.sum())} coefficient(s) have the sign of the other class "
                   f"(α < 0), e.g. index(es) {', '.join(map(str, bad.tolist()))} "
                   "(0-based; data row = index + 1)")
    over = alpha > problem.upper * (1 + 1e-6)
    if over.any():
        r = rows[over][:TOP_RESIDUALS]
        named = ", ".join(f"{i} (α = {a:.6g})" for i, a in zip(r, alpha[over], strict=False))
        out.append(f"{int(over.sum())} multiplier(s) exceed C = {C:g}, e.g. index(es) "
                   f"{named} (0-based; data row = index + 1)")
    if cert.equality_residual > 1e-6 * max(1.0, float(np.sum(np.abs(alpha)))):
        out.append(f"the equality constraint Σ αᵢyᵢ = 0 is off by {cert.equality_residual:.3g}")
    if not cert.meets_tol:
        res = np.asarray(cert.kkt_residual)
        order = np.argsort(-res, kind="stable")[:TOP_RESIDUALS]
        named = ", ".join(f"{int(rows[i])} ({res[i]:.3g})" for i in order if res[i] > 0)
        out.append(f"KKT conditions fail: maximal violation {figure_text(cert.max_violation)} "
                   f"> kkt_tol {figure_text(cert.kkt_tol)}; largest KKT residuals at index(es) "
                   f"{named} (0-based; data row = index + 1)")
    return out


def _external_result(problem: Any, alpha: np.ndarray, bias: float, kkt_tol: float,
                     options: Mapping[str, Any], findings: Sequence[str]) -> SolveResult:
    cert = certify(problem, alpha, kkt_tol=kkt_tol)
    feasible = cert.bound_violation <= 1e-9 * max(1.0, float(np.max(problem.upper)))
    ok = cert.meets_tol and feasible and not findings
    status = Status.CONVERGED if ok else Status.NOT_OPTIMAL
    detail = "external solution" if ok else "; ".join(findings) or "infeasible"
    return SolveResult(solver="external", status=status, message=status_message(status, detail),
                       alpha=alpha, bias=float(bias), iterations=0, certificate=cert,
                       seconds=0.0, options=dict(options))


def _challenge_pair(pair: ExternalPair, ext: ExternalModel, ds: Dataset, Z: np.ndarray, *,
                    C: float, kkt_tol: float, scaling: str, store: Any,
                    std: Standardiser, qp: bool) -> PairChallenge:
    from ..agreement import compare_runs
    from ..solvers import solve

    labels = ds.labels
    pos = _label_index(labels, pair.positive, ext.source, ds.source or "the data")
    neg = _label_index(labels, pair.negative, ext.source, ds.source or "the data")
    rows = np.flatnonzero(pos | neg)
    Zp = Z[rows]
    tol_match = (1e-5 if ext.float32 else 1e-9) * max(1.0, float(np.max(np.abs(Zp))))
    idx = _match_rows(pair.points, Zp, tol_match, ext.source)
    y = np.where(pos[rows], 1.0, -1.0)
    alpha = np.zeros(rows.size)
    np.add.at(alpha, idx, pair.coefficients * y[idx])
    sign_bad = alpha < -1e-12 * max(1.0, C)
    lab = labels[rows]
    positive_value = lab[pos[rows]][0]
    problem = binary_classification(Zp, lab, kernel=ext.kernel, C=C,
                                    positive_label=positive_value)
    diag_max = float(np.max(problem.kernel.diag(Zp[idx]))) if idx.size else 1.0
    allowance = _allowance(alpha, diag_max, pair.bias, ext.float32)
    ext_tol = kkt_tol + allowance
    cert0 = certify(problem, alpha, kkt_tol=ext_tol)
    findings = _findings(problem, alpha, sign_bad, rows, cert0, C)
    options = {"source": ext.source, "source_sha256": ext.source_sha256,
               "source_format": ext.source_format, "kkt_tol": ext_tol,
               "requested_kkt_tol": kkt_tol, "float32_allowance": allowance,
               "match_tol": tol_match, "input_scaling": scaling, "C": C,
               "pair": [str(pair.positive), str(pair.negative)]}
    ext_res = _external_result(problem, alpha, pair.bias, ext_tol, options, findings)
    data_facts = {"fingerprint": _fingerprint(ds), "feature_names": list(ds.feature_names),
                  "label_name": ds.label_name, "source": ds.source, "warnings": [],
                  "n_rows": int(rows.size), "rows": rows.tolist()}
    ext_rec = RunRecord(problem=problem, result=ext_res, data=data_facts, standardiser=std,
                        attachments={"external_model": {
                            "source": ext.source, "source_sha256": ext.source_sha256,
                            "source_format": ext.source_format, "support_vectors": int(idx.size),
                            "findings": list(findings), "input_scaling": scaling}})
    ext_id = store.save(ext_rec)
    fresh, verdicts = {}, {}
    methods = ["smo"] + (["qp"] if qp else [])
    for method in methods:
        res = solve(problem, method=method, kkt_tol=kkt_tol, trace="sampled")
        rec = RunRecord(problem=problem, result=res, data=data_facts, standardiser=std)
        comp = compare_runs(ext_rec, rec)
        rec = replace(rec, attachments={"comparison": to_plain(comp.to_dict())})
        fresh[method] = store.save(rec, parent=ext_id)
        verdicts[method] = str(comp.verdict)
    return PairChallenge(positive=pair.positive, negative=pair.negative, external_run=ext_id,
                         fresh_runs=fresh, verdicts=verdicts,
                         certificate=to_plain(ext_res.certificate.to_dict()),
                         optimal=ext_res.success, findings=tuple(findings),
                         matched=int(idx.size), kkt_tol=ext_tol, float32_allowance=allowance)


def challenge(
    model: str | Path,
    data: Dataset | str | Path,
    *,
    label: str | None,
    C: float | None,
    kkt_tol: float = 1e-3,
    standardise: bool = True,
    store: Any = None,
    challenger: bool = True, columns: Columns = NO_CHOICE,
) -> ChallengeOutcome:
    """Challenge an external model (ONNX file or open JSON table) on its training data.

    Parameters
    ----------
    model : the model file; data : its training data (labelled); label : label column.
    C : the penalty the model claims to have used (required).
    kkt_tol : tolerance on the maximal KKT violation (float32 models get a stated allowance).
    standardise : when the model carries no input scaling of its own, standardise the data
        as ``train`` would (mean 0, sd 1); ``False`` uses the features as given.
    challenger : also solve with the QP challenger (skipped above its size limit).
    columns : the data's feature / ignored columns and delimiter (as for ``train``).
    """
    ext = read_external_model(model)
    ds = _load_data(data, label, "training data", columns)
    if ds.labels is None:
        raise InvalidInputError("a challenge needs the training data's label column (--label)")
    width = ext.pairs[0].points.shape[1]
    if width != ds.X.shape[1]:
        raise InvalidInputError(f"{ext.source}: support vectors have {width} features but "
                                f"{ds.source or 'the data'} has {ds.X.shape[1]} feature columns")
    largest = max(float(np.max(np.abs(p.coefficients))) for p in ext.pairs)
    if C is None:
        raise InvalidInputError(f"give the model's C (--C): the largest multiplier in "
                                f"{ext.source} is {largest:.6g}, so C >= {largest:.6g}, but C "
                                "cannot be read from the model and kktrace does not guess it")
    if not (isinstance(C, (int, float)) and np.isfinite(C) and C > 0):
        raise InvalidInputError(f"C must be a finite number > 0, got {C!r}")
    if ext.centre is not None:
        if ext.centre.shape[0] != ds.X.shape[1]:
            raise InvalidInputError(f"{ext.source}: the Scaler has {ext.centre.shape[0]} "
                                    f"features, the data {ds.X.shape[1]}")
        std = Standardiser(centre=ext.centre, scale=ext.scale)
        scaling = "the model's own input scaling (ONNX Scaler or input_scaling)"
    elif standardise:
        std = Standardiser.fit(ds.X)
        scaling = "kktrace's standardiser fitted on the training data (mean 0, sd 1)"
    else:
        std = Standardiser.identity(ds.X.shape[1])
        scaling = "none (features as given)"
    Z = std.transform(ds.X)
    from ..qp import DEFAULT_SIZE_LIMIT

    st = open_store(store)
    notes = []
    pairs = []
    for pair in ext.pairs:
        n_pair = sum(1 for v in ds.labels.tolist() if str(v) in (str(pair.positive),
                                                                 str(pair.negative)))
        qp = challenger and n_pair <= DEFAULT_SIZE_LIMIT
        if challenger and not qp:
            notes.append(f"pair {pair.positive} vs {pair.negative}: QP challenger skipped "
                         f"({n_pair} rows exceed its size limit of {DEFAULT_SIZE_LIMIT})")
        pairs.append(_challenge_pair(pair, ext, ds, Z, C=float(C), kkt_tol=kkt_tol,
                                     scaling=scaling, store=st, std=std, qp=qp))
    worst = max((v for p in pairs for v in p.verdicts.values()), key=lambda v: _RANK.get(v, 3))
    notes.append("kktrace gives evidence about the optimisation, not a validation sign-off; "
                 "decisions rest with the accountable model owner and validator")
    return ChallengeOutcome(source=ext.source, source_sha256=ext.source_sha256,
                            source_format=ext.source_format, input_scaling=scaling,
                            pairs=tuple(pairs), verdict=worst,
                            optimal=all(p.optimal for p in pairs), notes=tuple(notes))
