"""Report content on where a run came from: identity, environment, reproduction, audit."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ..run import RunRecord
from ..vocabulary import term
from ._records import _fmt_num, _plain, _scalar_items, _status_of

# --------------------------------------------------------------------------- identity


def _identity(rec: RunRecord, label: str) -> tuple[tuple[tuple[str, Any], ...], tuple]:
    man = rec.manifest or {}
    res = rec.result
    version = man.get("kktrace_version") or man.get("version")
    ident: list[tuple[str, Any]] = [
        ("run label", label),
        ("run id", rec.run_id or "not stored (in-memory run)"),
        ("created", rec.created or man.get("created") or "not recorded"),
        ("parent run", rec.parent_id or "none"),
        ("solver", res.solver),
        *((f"{term(k).label} time (s)" if k != "total_seconds" else "whole solver call (s)",
           "not recorded" if v is None else _plain(v)) for k, v in res.timing.items()),
        ("kktrace version at solve", version or "not recorded"),
        ("data fingerprint", rec.data.get("fingerprint") or "not recorded"),
        ("data source", rec.data.get("source") or "in-memory arrays"),
        ("training rows", _plain(rec.data.get("n_rows", rec.problem.n))),
        ("label column", rec.data.get("label_name") or "not named"),
    ]
    if rec.parent_digest:
        ident.append(("parent digest", rec.parent_digest))
    for key in ("digest", "run_digest", "format_version"):
        if key in man:
            ident.append((key.replace("_", " "), _plain(man[key])))
    env = man.get("environment")
    env_items = _scalar_items(env) if isinstance(env, Mapping) else ()
    return tuple(ident), env_items


def _command_parts(cmd: Any) -> tuple[str | None, str | None, str | None]:
    """(shell command, Python call, note) from a ``"command"`` attachment (text, list or dict)."""
    if cmd is None:
        return None, None, None
    python = note = None
    if isinstance(cmd, Mapping):
        python = cmd.get("python")
        note = cmd.get("note")
        cmd = cmd.get("text") or cmd.get("argv") or cmd.get("command")
    if isinstance(cmd, (list, tuple)):
        import shlex

        cmd = shlex.join(str(c) for c in cmd)
    return (str(cmd) if cmd else None, str(python) if python else None,
            str(note) if note else None)


def _options_for_code(options: Mapping[str, Any]) -> tuple[dict[str, Any], list[str]]:
    kept, dropped = {}, []
    for k, v in options.items():
        v = _plain(v)
        if isinstance(v, (str, int, float, bool)) or v is None:
            kept[str(k)] = v
        else:
            dropped.append(str(k))
    return kept, dropped


def _reproduce_code(rec: RunRecord) -> str:
    opts, dropped = _options_for_code(rec.result.options or {})
    opts.pop("callback", None)
    opt_text = ", ".join(f"{k}={v!r}" for k, v in opts.items())
    sep = ", " if opt_text else ""
    lines = ["# Python: repeat the solve on exactly the stored problem and compare."]
    if rec.run_id:
        lines += [
            "from solver.store import RunStore",
            "from solver.solvers import solve",
            "",
            f'record = RunStore("<store folder>").load({rec.run_id!r})',
            f"again = solve(record.problem, method={rec.result.solver!r}{sep}{opt_text})",
        ]
    else:
        desc = rec.problem.kernel.describe()
        info = rec.problem.info
        labels = info.get("labels") or {}
        lines += [
            "from solver.kernels import kernel_from_description",
            "from solver.problem import binary_classification",
            "from solver.solvers import solve",
            "",
            f"# X: the standardised training rows with fingerprint {rec.data.get('fingerprint')!r}",
            f"kernel = kernel_from_description({_plain(desc)!r})",
            f"problem = binary_classification(X, labels, kernel=kernel, C={info.get('C')!r}, "
            f"positive_label={labels.get('positive')!r})",
            f"again = solve(problem, method={rec.result.solver!r}{sep}{opt_text})",
        ]
    lines.append(f"assert again.status.label == {_status_label(rec.result)!r}")
    lines.append(f"assert again.iterations == {int(rec.result.iterations)}")
    if dropped:
        lines.append(f"# options not shown (not plain values): {', '.join(dropped)}")
    return "\n".join(lines)


def _status_label(result: Any) -> str:
    s = _status_of(result)
    return s.label if s is not None else str(getattr(result, "status", "unknown"))


# --------------------------------------------------------------------------- problem/audit


def _problem_items(rec: RunRecord) -> tuple[tuple[str, Any], ...]:
    p = rec.problem
    desc = p.describe()
    kern = desc.pop("kernel", {})
    items: list[tuple[str, Any]] = [("problem kind", p.kind), ("points (n)", p.n),
                                    ("features", int(p.X.shape[1]))]
    items.append(("kernel", kern.get("name")))
    for k, v in (kern.get("params") or {}).items():
        items.append((f"kernel {k}", _plain(v)))
    for k in ("C", "labels", "class_weight", "sample_weight", "class_counts"):
        if k in desc and desc[k] is not None:
            items.append((k, _plain(desc[k])))
    labels = desc.get("labels")
    if isinstance(labels, Mapping) and "positive" in labels:
        items.append(("label mapping", f"f(x) > 0 predicts {str(labels['positive'])!r} "
                      f"(positive), f(x) <= 0 predicts {str(labels['negative'])!r} (negative)"))
    items.append(("upper bounds range", f"{_fmt_num(p.upper.min())} … {_fmt_num(p.upper.max())}"))
    std = rec.standardiser
    ident = bool(np.all(std.centre == 0) and np.all(std.scale == 1))
    items.append(("features standardised", "no" if ident else "yes (mean 0, s.d. 1)"))
    names = rec.data.get("feature_names")
    if names:
        items.append(("feature names", ", ".join(map(str, names))))
    return tuple(items)


_PSD_KEYS = ("psd", "is_psd", "psd_verdict", "verdict")
_EIG_KEYS = ("min_eigenvalue", "smallest_eigenvalue", "lambda_min")


def _audit_indefinite(audit: Mapping[str, Any]) -> bool | None:
    """True when the audit says the kernel matrix is indefinite, None when it says nothing."""
    for k in _PSD_KEYS:
        if k in audit:
            v = audit[k]
            if isinstance(v, (bool, np.bool_)):
                return not bool(v)
            if isinstance(v, str):
                low = v.lower()
                if "indefinite" in low or "not" in low or "fail" in low or low == "no":
                    return True
                if "psd" in low or "semi" in low or "pass" in low or low in ("yes", "ok"):
                    return False
    return None


def _audit_verdict(audit: Mapping[str, Any] | None, rec: RunRecord) -> str:
    """One sentence: the PSD verdict and the smallest eigenvalue, or why there is none."""
    if not audit:
        psd = rec.problem.kernel.is_psd
        promise = {True: "positive semi-definite by construction",
                   False: "not positive semi-definite in general",
                   None: "of unknown definiteness"}[psd]
        return f"No kernel audit attached; the {rec.problem.kernel.name} kernel is {promise}."
    ind = _audit_indefinite(audit)
    eig = next((audit[k] for k in _EIG_KEYS if k in audit), None)
    kkt_tol = audit.get("psd_tol")
    scope = audit.get("psd_scope")
    word = {True: "INDEFINITE", False: "positive semi-definite", None: "not stated"}[ind]
    text = f"PSD verdict: {word}"
    if eig is not None:
        text += f"; smallest eigenvalue {_fmt_num(eig)}"
        if kkt_tol is not None:
            text += (f" (positive semi-definite when ≥ −{_fmt_num(kkt_tol)}, PSD tolerance "
                     f"{_fmt_num(kkt_tol)})")
    if scope:
        text += f"; checked on {str(scope).replace('_', ' ')}"
    return text + "."
