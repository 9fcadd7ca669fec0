"""Report content that ties a run to its stored evidence: the manifest digest and the
verification done while the report was written, the decision rule (asked of the run's
task) and the standardiser's centre and scale per feature."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ..run import RunRecord
from ._records import Table

__all__ = ["_evidence_items", "_decision_items", "_scaling_table"]


def _evidence_items(rec: RunRecord, ev: Mapping[str, Any] | None
                    ) -> tuple[tuple[tuple[str, Any], ...], dict[str, Any]]:
    """(rows shown, facts for the JSON) of the check made while writing the report."""
    if ev is None:
        facts = {"manifest_sha256": None, "verified": None, "checked_at": None}
        return ((("manifest SHA-256", "not available: the run was passed in memory, not "
                  "read from a store"),
                 ("verification while writing", "not done: nothing on disk to check")), facts)
    ok = bool(ev.get("verified"))
    chain = list(ev.get("parent_chain") or [])
    what = (f"passed at {ev.get('checked_at')}: {ev.get('files_checked')} files match the "
            "digests in manifest.json and the run passed every check against itself "
            "(traces/README.md section 12: certificate recomputed from α, model rebuilt, "
            "trace checked)" if ok else
            "FAILED: " + "; ".join(map(str, ev.get("problems") or [])))
    rows: list[tuple[str, Any]] = [("manifest SHA-256", ev.get("manifest_sha256")),
                                   ("verification while writing", what)]
    if len(chain) > 1:
        rows.append(("parent chain checked", " → ".join(chain)))
    signer = ev.get("signer")
    rows.append(("signature", f"signed by {signer}" + (" (trusted key)" if ev.get("trusted")
                                                        else " (no trusted key given)")
                 if signer else "not signed"))
    return tuple(rows), dict(ev)


def _decision_items(rec: RunRecord) -> tuple[tuple[str, str], ...]:
    """The run's decision rule, from its task (never by branching on the problem kind)."""
    from ..errors import InvalidInputError
    from ..tasks import task_for_kind

    try:
        task = task_for_kind(rec.problem.kind)
    except InvalidInputError:
        return (("decision rule", f"not available for problem kind {rec.problem.kind!r}"),)
    return tuple((str(k), str(v)) for k, v in task.decision_rule(rec))


def _scaling_table(rec: RunRecord) -> Table | None:
    """Centre and scale of the standardiser, one row per feature (raw units)."""
    std = rec.standardiser
    centre = np.atleast_1d(np.asarray(getattr(std, "centre", ()), np.float64))
    scale = np.atleast_1d(np.asarray(getattr(std, "scale", ()), np.float64))
    if centre.size == 0 or centre.shape != scale.shape:
        return None
    names = [str(v) for v in (rec.data.get("feature_names") or [])]
    if len(names) != centre.size:
        names = [f"feature {k + 1}" for k in range(centre.size)]
    identity = bool(np.all(centre == 0) and np.all(scale == 1))
    note = ("Standardising was off: features enter the kernel in raw units (centre 0, scale 1)."
            if identity else "Each feature enters the kernel as (x − centre) / scale, with the "
            "centre and scale fitted on the training rows (raw units).")
    rows = tuple((n, float(c), float(s)) for n, c, s in zip(names, centre, scale, strict=True))
    return Table(columns=("feature", "centre", "scale"), rows=rows, note=note)
