"""Warnings raised by a report (:class:`~._records.Flag`) and the challenger comparison."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ..diagnosis._problem import SCALE_RATIO
from ..run import RunRecord
from ._provenance import _EIG_KEYS, _audit_indefinite
from ._records import Flag, _as_mapping, _fmt_num, _plain

#: A classification run is flagged when at least this share of its support vectors are
#: correctly classified points held at the upper bound C inside the margin (0 ≤ y·f(x) ≤ 1).
#: Our heuristic, and its basis: misclassified points sit at C for every C when the classes
#: overlap, so their number says nothing about C; correctly classified points inside the
#: margin are the ones a larger C pushes out of it (the margin narrows as C grows), so when
#: they make up most support vectors, a fit with a larger C is worth comparing.
BOUNDED_SHARE = 0.5
#: Features whose standard deviations differ by more than SCALE_RATIO count as unscaled:
#: one definition, the diagnosis's (solver/diagnosis/_problem.py).


# --------------------------------------------------------------------------- flags


def _run_flags(rec: RunRecord, label: str, term: Mapping[str, Any], audit: Mapping | None,
               facts: Mapping[str, Any]) -> list[Flag]:
    flags: list[Flag] = []
    status = term["status"]
    if not term["converged"]:
        flags.append(Flag("not_converged", "stop",
                          f"{label} did not converge: status {status} — {term['message']}. "
                          "Its multipliers are not an optimal solution.", label))
    if audit:
        ind = _audit_indefinite(audit)
        eig = next((audit[k] for k in _EIG_KEYS if k in audit), None)
        if ind:
            flags.append(Flag("indefinite_kernel", "caution",
                              f"{label}: the kernel audit finds the kernel matrix indefinite"
                              + (f" (smallest eigenvalue {_fmt_num(eig)})" if eig is not None
                                 else "") + "; the dual may be non-convex.", label))
    else:
        psd = rec.problem.kernel.is_psd
        if psd is False:
            flags.append(Flag("indefinite_kernel", "caution",
                              f"{label}: the {rec.problem.kernel.name} kernel is not positive "
                              "semi-definite in general and no kernel audit is attached.", label))
    ev = facts.get("event_counts", {})
    curv = sum(v for k, v in ev.items() if "curvature" in k)
    if curv:
        psd_known = audit is not None and _audit_indefinite(audit) is False
        flags.append(Flag("curvature_fixes", "note" if psd_known else "caution",
                          f"{label}: {curv} working-set pair(s) had non-positive curvature "
                          "K_ii + K_jj − 2K_ij and were regularised; this happens for duplicate "
                          "points" + (" (the kernel audit found the kernel PSD)." if psd_known
                                      else " or an indefinite kernel."), label))
    std = rec.standardiser
    standardised = not bool(np.all(std.centre == 0) and np.all(std.scale == 1))
    for w in rec.data.get("warnings") or ():
        low = str(w).lower()
        if "duplicate" in low or "identical features" in low:
            code, sev, tail = "conflicting_duplicates", "caution", ""
        elif "scale" in low:
            code = "unscaled_features"
            sev, tail = (("note", " (the run standardised the features before solving)")
                         if standardised else ("caution", ""))
        elif "constant" in low:
            code, sev, tail = "constant_feature", "caution", ""
        else:
            code, sev, tail = "data_warning", "caution", ""
        flags.append(Flag(code, sev, f"{label}: data warning — {w}{tail}", label))
    if (not standardised
            and rec.problem.kernel.name in ("rbf", "poly", "sigmoid", "linear")
            and rec.problem.X.shape[1] > 1
            and not any(f.code == "unscaled_features" for f in flags)):
        sd = rec.problem.X.std(axis=0)
        sd = sd[sd > 0]
        if sd.size > 1 and sd.max() / sd.min() > SCALE_RATIO:
            flags.append(Flag("unscaled_features", "caution",
                              f"{label}: features were not standardised and their spreads differ "
                              f"by a factor of {sd.max() / sd.min():.3g} (> {SCALE_RATIO:g}).",
                              label))
    n_sv = int(term.get("n_support") or 0)
    n_in = _bounded_inside_margin(rec)
    if n_sv and n_in is not None and n_in / n_sv >= BOUNDED_SHARE:
        flags.append(Flag("many_bounded", "caution",
                          f"{label}: {n_in} of {n_sv} support vectors are correctly classified "
                          f"points held at the upper bound C inside the margin (≥ "
                          f"{BOUNDED_SHARE:.0%}); a larger C would narrow the margin — compare "
                          "a fit with a larger C (our heuristic; misclassified points at C are "
                          "not counted: they sit at C for any C when the classes overlap).",
                          label))
    rep = facts.get("replay")
    if rep is not None and not rep["reproduced"]:
        flags.append(Flag("replay_mismatch", "caution",
                          f"{label}: replaying the trace does not give the final multipliers "
                          f"(largest difference {_fmt_num(rep['max_abs_difference'])}).", label))
    return flags


def _bounded_inside_margin(rec: RunRecord) -> int | None:
    """Correctly classified points at the upper bound (α = u, y·f(x) ≥ 0) of a binary
    classification run; None for other problems.  From the explanation attachment's
    categories when present, else from y·f(x) = (Qα)ᵢ + yᵢb."""
    p, res = rec.problem, rec.result
    if not p.labels or p.kind != "binary_classification" or p.n == 0:
        return None
    expl = rec.attachments.get("explanation") if rec.attachments else None
    if isinstance(expl, Mapping) and "category" in expl:
        cat = np.asarray(expl["category"]).astype(str)
        if cat.shape == (p.n,):
            return int(np.isin(cat, ("bounded_inside_margin", "bounded_on_margin")).sum())
    alpha = np.asarray(res.alpha, np.float64)
    margin = p.q_times(alpha) + p.y * float(res.bias)
    return int(np.sum(np.asarray(res.certificate.at_upper, bool) & (margin >= 0)))


#: Verdicts that mean the two solvers agree (strictly / within the loose tolerances).
AGREE_VERDICTS = ("agree",)
LOOSE_VERDICTS = ("agree_within_tolerances",)


def _comparison(comp: Any) -> tuple[dict[str, Any] | None, list[Flag]]:
    """Plain comparison record (verdict, every measure with its tolerances) and its flags."""
    d = _as_mapping(comp)
    if not d:
        return None, []
    measures_in = d.get("measures") or {}
    tols = d.get("tolerances") or {}
    loose = d.get("loose_tolerances") or {}
    failed = {str(f) for f in (d.get("failed") or [])}
    if isinstance(measures_in, Mapping):
        items = list(measures_in.items())
    else:
        items = [(m.get("name"), m) for m in measures_in if isinstance(m, Mapping)]
    rows = []
    for name, m in items:
        name = str(name)
        if isinstance(m, Mapping):
            row = {"name": name, "value": _plain(m.get("value")),
                   "rule": m.get("rule"),
                   "tolerance": _plain(m.get("tolerance", tols.get(name))),
                   "loose_tolerance": _plain(m.get("loose_tolerance", loose.get(name))),
                   "passed": m.get("passed"), "passed_loose": m.get("passed_loose"),
                   "waived": m.get("waived")}
        else:
            row = {"name": name, "value": _plain(m), "rule": None,
                   "tolerance": _plain(tols.get(name)), "loose_tolerance": _plain(loose.get(name)),
                   "passed": None, "passed_loose": None, "waived": None}
        if row["passed"] is None and "failed" in d:
            row["passed"] = name not in failed
        for k in ("passed", "passed_loose"):
            row[k] = None if row[k] is None else bool(row[k])
        rows.append(row)
    for name, kkt_tol in tols.items():
        if not any(r["name"] == str(name) for r in rows):
            rows.append({"name": str(name), "value": None, "rule": None,
                         "tolerance": _plain(kkt_tol),
                         "loose_tolerance": _plain(loose.get(name)),
                         "passed": (str(name) not in failed) if "failed" in d else None,
                         "passed_loose": None, "waived": None})
    verdict = str(d.get("verdict", "not stated"))
    extra = {str(k): _plain(v) for k, v in d.items()
             if k not in ("verdict", "measures", "tolerances", "loose_tolerances", "failed",
                          "settings", "runs", "verdict_text", "failures")
             and not isinstance(v, Mapping)
             and not (isinstance(v, (list, tuple, np.ndarray)) and len(v) == 0)}
    out = {"verdict": verdict, "verdict_text": str(d.get("verdict_text") or ""),
           "measures": rows, "failed": sorted(failed), "extra": extra}
    flags = []
    if verdict in AGREE_VERDICTS and not failed:
        pass
    elif verdict in LOOSE_VERDICTS:
        flags.append(Flag("solvers_agree_loosely", "note",
                          f"Challenger comparison verdict: {verdict} — the solvers agree only "
                          "within the loose tolerances"
                          + (f" (strict tolerance missed: {', '.join(sorted(failed))})"
                             if failed else "") + "."))
    else:
        flags.append(Flag("solvers_disagree", "stop",
                          f"Challenger comparison verdict: {verdict}"
                          + (f"; measures outside tolerance: {', '.join(sorted(failed))}"
                             if failed else "") + "."))
    return out, flags
