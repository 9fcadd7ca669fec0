"""Convergence and audit reports from stored runs: HTML, PDF and JSON.

>>> paths = write_report([record], "out", formats=("html", "json"))   # doctest: +SKIP

All three formats are rendered from one :class:`ReportContent` built by
:func:`build_report_content`, so they always carry the same figures.  Every report ends
with the standing caution :data:`CAUTION`.
"""

from __future__ import annotations

import os
import secrets
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from ..errors import InvalidInputError
from ..run import RunRecord
from .content import CAUTION, Flag, ReportContent, build_report_content

__all__ = [
    "CAUTION",
    "FORMATS",
    "Flag",
    "ReportContent",
    "build_report_content",
    "write_report",
    "render_report",
]

#: Output formats and their file suffixes.
FORMATS: dict[str, str] = {"html": ".html", "pdf": ".pdf", "json": ".json"}


def render_report(content: ReportContent, fmt: str) -> bytes:
    """One format of the report as bytes (``"html"``, ``"pdf"`` or ``"json"``)."""
    if fmt == "html":
        from .html import render_html

        return render_html(content).encode("utf-8")
    if fmt == "json":
        from .summary import summary_json

        return summary_json(content).encode("utf-8")
    if fmt == "pdf":
        import io

        from .pdf import render_pdf

        buf = io.BytesIO()
        render_pdf(content, buf)
        return buf.getvalue()
    raise InvalidInputError(f"unknown report format {fmt!r}; choose from {', '.join(FORMATS)}")


def _write_all(files: Mapping[Path, bytes]) -> None:
    """Write every file under a fresh temporary name in its folder, then rename them all.

    A failure while writing leaves no report file behind.  ``open(..., "xb")`` honours the
    umask (unlike ``mkstemp``'s 0600), so reports are ordinary readable files."""
    temps: dict[Path, Path] = {}
    try:
        for path, data in files.items():
            tmp = path.with_name(f".{path.name}.{os.getpid()}.{secrets.token_hex(6)}.tmp")
            temps[path] = tmp
            with open(tmp, "xb") as fh:
                fh.write(data)
        for path, tmp in temps.items():
            os.replace(tmp, path)
    except BaseException:
        for tmp in temps.values():
            tmp.unlink(missing_ok=True)
        raise


def write_report(
    runs: Sequence[RunRecord],
    out_dir: str | Path,
    *,
    formats: Sequence[str] = ("html", "pdf", "json"),
    comparison: Any | Mapping | None = None,
    notes: str | None = None,
    stem: str = "report",
    holdout: Mapping | None = None,
    parent: Any = None,
    parent_members: Sequence[RunRecord] = (),
    evidence: Sequence[Mapping | None] | None = None,
) -> dict[str, Path]:
    """Write the report for ``runs`` into ``out_dir`` as ``<stem>.html`` / ``.pdf`` / ``.json``.

    All formats are rendered in memory first and each file is written atomically, so a
    failure leaves no half-written report.  Returns format → path.
    """
    formats = tuple(formats)
    unknown = [f for f in formats if f not in FORMATS]
    if unknown or not formats:
        raise InvalidInputError(
            f"unknown report format(s) {', '.join(map(repr, unknown)) or '(none given)'}; "
            f"choose from {', '.join(FORMATS)}"
        )
    if not stem or "/" in stem or "\\" in stem or stem.startswith("."):
        raise InvalidInputError(f"report file stem {stem!r} must be a plain file name")
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InvalidInputError(f"report folder {str(out)!r} exists and is not a folder")
    content = build_report_content(runs, comparison=comparison, holdout=holdout, notes=notes,
                                   parent=parent, parent_members=parent_members,
                                   evidence=evidence)
    rendered = {f: render_report(content, f) for f in formats}
    out.mkdir(parents=True, exist_ok=True)
    paths = {f: out / f"{stem}{FORMATS[f]}" for f in rendered}
    _write_all({paths[f]: data for f, data in rendered.items()})
    return paths
