"""RunRecord ↔ run-folder files (format version 1, specified in ``traces/README.md``).

:func:`encode_record` turns a record into ``{file name: bytes}`` plus the manifest
(without its ``files`` table); :func:`decode_record` does the reverse from the bytes of
each file, validating every field it uses.  No file-system access happens here.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np

from .. import __version__
from ..certificate import Certificate
from ..errors import IntegrityError, InvalidInputError
from ..kernels import Kernel, PrecomputedKernel, kernel_from_description
from ..model import Model, Standardiser, model_from_solution
from ..problem import DualProblem
from ..result import TRACE_LEVELS, SolveResult, Trace
from ..run import RunRecord
from ..status import Status
from . import format as fmt
from .environment import environment
from .format import (
    FORMAT_NAME,
    FORMAT_VERSION,
    dump_json,
    from_plain,
    number,
    parse_json,
    read_npz,
    read_table,
    to_plain,
    write_csv,
    write_npz,
    write_table,
)
from .format import (
    field as get,
)

__all__ = ["encode_record", "decode_record", "decode_model", "UnavailableKernel", "MODEL_FORMAT"]

MODEL_FORMAT = "kktrace-model"
M = "manifest.json"
_ATTACHMENT_NAME = re.compile(r"[a-z][a-z0-9_]{0,40}")
_RESERVED = {"manifest", "trace", "events", "snapshots", "solution", "model", "arrays", "catalog"}
TABLE_ATTACHMENTS = ("explanation",)
_DTYPE = re.compile(r"bool|u?int(8|16|32|64)|float(32|64)|<U[0-9]{1,6}")

#: Units and meanings of the SMO and QP trace columns (copied into Parquet field metadata).
COLUMN_DOCS = {
    "iteration": "iteration number k (1-based); the row describes the state after iteration k",
    "i": "first index of the SMO working set (row number, 0-based)",
    "j": "second index of the SMO working set (row number, 0-based)",
    "alpha_i": "new value of alpha[i] after the step (units of C)",
    "alpha_j": "new value of alpha[j] after the step (units of C)",
    "step": "change of alpha[i] in this iteration (units of C)",
    "objective": "dual objective 1/2 a'Qa + p'a after the step (minimised; <= 0 for "
                 "classification)",
    "violation": "maximal KKT violation m(a) - M(a) at the working-set selection of the "
                 "step's outer iteration (units of the gradient); for the two-variable "
                 "working set, before the step",
    "active": "size of the active (unshrunk) set during the iteration",
    "outer": "outer iteration (working-set selection) the step belongs to; equal to the "
             "iteration for the two-variable working set",
    "primal_objective": "interior-point primal objective (units of the dual objective)",
    "dual_objective": "interior-point dual objective (units of the dual objective)",
    "gap": "interior-point duality gap (units of the dual objective)",
    "relative_gap": "gap divided by max(|primal|, |dual|) (dimensionless)",
    "primal_residual": "interior-point primal infeasibility (norm, units of alpha)",
    "dual_residual": "interior-point dual infeasibility (norm, units of the gradient)",
}


@dataclass(frozen=True, eq=False)
class UnavailableKernel(Kernel):
    """Stand-in for a callable kernel of a stored run: it is described but cannot be evaluated."""

    name: ClassVar[str] = "callable"
    description: Mapping[str, Any] = field(default_factory=dict)

    def _refuse(self) -> None:
        raise InvalidInputError(
            f"this run used a user-supplied kernel function {self.description.get('params')!r}; "
            "functions are not stored, so kernel values cannot be computed from the run alone"
        )

    def block(self, A: np.ndarray, B: np.ndarray) -> np.ndarray:
        self._refuse()
        raise AssertionError  # unreachable

    def diag(self, A: np.ndarray) -> np.ndarray:
        self._refuse()
        raise AssertionError  # unreachable

    def describe(self) -> dict[str, Any]:
        return dict(self.description)


def _dtype_name(arr: np.ndarray) -> str:
    return "str" if arr.dtype.kind in "UO" else str(arr.dtype)


def _columns(mapping: Any, where: str, *, text: bool = False) -> dict[str, np.ndarray]:
    """Validate a mapping of equal-length 1-D arrays (numbers/booleans, or text if allowed)."""
    if not isinstance(mapping, Mapping):
        raise InvalidInputError(f"{where} must be a mapping of equal-length 1-D arrays")
    out, length = {}, None
    for name, col in mapping.items():
        if not isinstance(name, str) or not name:
            raise InvalidInputError(f"{where}: column name {name!r} must be a non-empty string")
        arr = np.asarray(col)
        if arr.ndim != 1:
            raise InvalidInputError(f"{where}: column {name!r} must be 1-D, got shape {arr.shape}")
        if arr.dtype.kind == "O" and text and all(isinstance(v, str) for v in arr.tolist()):
            pass
        elif arr.dtype.kind == "U" and text:
            pass
        elif arr.dtype.kind not in "biuf":
            raise InvalidInputError(f"{where}: column {name!r} has unsupported dtype {arr.dtype}")
        if length is not None and arr.shape[0] != length:
            raise InvalidInputError(
                f"{where}: column {name!r} has {arr.shape[0]} rows, expected {length}"
            )
        length = arr.shape[0]
        out[name] = arr
    return out


# ----------------------------------------------------------------------------- encode

def encode_record(
    record: RunRecord, *, run_id: str, created: str, parent: Mapping[str, str] | None
) -> tuple[dict[str, bytes], dict[str, Any]]:
    """Serialise ``record`` → (files ``{name: bytes}``, manifest without ``files``)."""
    if not isinstance(record, RunRecord):
        raise InvalidInputError(f"save() needs a RunRecord, got {type(record).__name__}")
    problem, result = record.problem, record.result
    if not isinstance(problem, DualProblem) or not isinstance(result, SolveResult):
        raise InvalidInputError("RunRecord.problem / .result must be a DualProblem / SolveResult")
    n = problem.n
    alpha = np.ascontiguousarray(result.alpha, dtype=np.float64)
    if alpha.shape != (n,):
        raise InvalidInputError(f"result.alpha has shape {alpha.shape}, the problem has n = {n}")
    cert = result.certificate
    arrays: dict[str, np.ndarray] = {}  # every {"$array": key} target, written to arrays.npz
    files: dict[str, bytes] = {}

    solution = {
        "alpha": np.asarray(result.alpha), "X": problem.X, "y": problem.y, "p": problem.p,
        "lower": problem.lower, "upper": problem.upper,
        "kkt_residual": np.asarray(cert.kkt_residual, dtype=np.float64),
        "at_lower": np.asarray(cert.at_lower, dtype=bool),
        "at_upper": np.asarray(cert.at_upper, dtype=bool),
        "standardiser_centre": np.asarray(record.standardiser.centre, dtype=np.float64),
        "standardiser_scale": np.asarray(record.standardiser.scale, dtype=np.float64),
    }
    for key in ("kkt_residual", "at_lower", "at_upper"):
        if solution[key].shape != (n,):
            raise InvalidInputError(
                f"certificate.{key} has shape {solution[key].shape}, expected ({n},)")
    if solution["alpha"].dtype != np.float64:
        raise InvalidInputError(f"result.alpha must be float64, got {solution['alpha'].dtype}")
    if isinstance(problem.kernel, PrecomputedKernel):
        solution["gram"] = problem.kernel.gram_matrix
    if problem.rows is not None:  # index map: variable i reads data row rows[i]
        solution["rows"] = np.asarray(problem.rows, dtype=np.int64)
    files["solution.npz"] = write_npz(solution)

    trace_m = None
    if result.trace is not None:
        trace_m = _encode_trace(result.trace, files)

    model_m = None
    if problem.labels is not None:
        model = model_from_solution(problem, result, record.standardiser)
        model_m = "model.json"
        files["model.npz"] = write_npz({
            "support_rows": model.support_rows.astype(np.int64),
            "support_points": model.support_points,
            "coefficients": model.coefficients, "centre": model.standardiser.centre,
            "scale": model.standardiser.scale,
        })
        files["model.json"] = dump_json({
            "format": MODEL_FORMAT, "format_version": FORMAT_VERSION, "run_id": run_id,
            "status": result.status.label, "converged": result.success,
            "decision_rule": "f(x) = sum over s of coefficients[s] * K(support_points[s], z) "
                             "+ bias, z = (x - centre) / scale; label = labels.positive where "
                             "f(x) > 0, else labels.negative",
            "kernel": to_plain(problem.kernel.describe(), None, "model.kernel"),
            "bias": to_plain(model.bias, None, "model.bias"),
            "labels": {"negative": to_plain(model.labels[0], None, "labels"),
                       "positive": to_plain(model.labels[1], None, "labels")},
            "n_support": int(model.support_rows.shape[0]), "n_features": int(problem.X.shape[1]),
            "feature_names": to_plain(list(record.data.get("feature_names") or []), None,
                                      "data.feature_names"),
            "arrays": {"support_rows": "int64 (k,)", "support_points": "float64 (k, d)",
                       "coefficients": "float64 (k,)", "centre": "float64 (d,)",
                       "scale": "float64 (d,)"},
        })

    command = None
    att_m: dict[str, Any] = {}
    for name, value in record.attachments.items():
        if name == "command":  # the reproducing command line (a string, or plain data)
            command = to_plain(value, None, "attachment 'command'")
            continue
        if not isinstance(name, str) or not _ATTACHMENT_NAME.fullmatch(name) or name in _RESERVED:
            raise InvalidInputError(
                f"attachment name {name!r} is not allowed (lower-case letters, digits, '_'; "
                f"not one of {', '.join(sorted(_RESERVED))})"
            )
        if name in TABLE_ATTACHMENTS:
            cols = _columns(value, f"attachment {name!r}", text=True)
            files[f"{name}.parquet"] = write_table(cols, metadata={"kktrace.attachment": name})
            files[f"{name}.csv"] = write_csv(cols)
            att_m[name] = {"kind": "table", "files": [f"{name}.parquet", f"{name}.csv"],
                           "rows": int(next(iter(cols.values())).shape[0]) if cols else 0,
                           "columns": {c: str(a.dtype) if a.dtype.kind != "O" else "object"
                                       for c, a in cols.items()}}
        else:
            files[f"{name}.json"] = dump_json(to_plain(value, arrays, f"attachment {name!r}"))
            att_m[name] = {"kind": "json", "files": [f"{name}.json"]}

    manifest: dict[str, Any] = {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "run_id": run_id,
        "created": created,
        "kktrace_version": __version__,
        "parent": dict(parent) if parent else None,
        "command": command,
        "solver": {
            "name": str(result.solver),
            "status": Status(result.status).label,
            "message": str(result.message),
            "iterations": int(result.iterations),
            "seconds": to_plain(float(result.seconds), None, "seconds"),
            "bias": to_plain(float(result.bias), None, "bias"),
            "options": to_plain(dict(result.options), arrays, "result.options"),
            "extra": to_plain(dict(result.extra), arrays, "result.extra"),
        },
        "problem": {
            "kind": str(problem.kind), "n": n, "n_features": int(problem.X.shape[1]),
            **({"n_data_rows": int(problem.X.shape[0])} if problem.rows is not None else {}),
            "delta": to_plain(problem.delta, None, "problem.delta"),
            "kernel": to_plain(problem.kernel.describe(), None, "problem.kernel"),
            "info": to_plain(dict(problem.info), arrays, "problem.info"),
        },
        "data": to_plain(dict(record.data), arrays, "data"),
        "standardiser": {"identity": bool(np.all(record.standardiser.centre == 0)
                                          and np.all(record.standardiser.scale == 1)),
                         "n_features": int(np.asarray(record.standardiser.centre).shape[0])},
        "certificate": to_plain(cert.to_dict(), None, "certificate"),
        "trace": trace_m,
        "model": model_m,
        "attachments": att_m,
        "environment": environment(),
    }
    if arrays:
        files["arrays.npz"] = write_npz(arrays)
    return files, manifest


def _encode_trace(trace: Trace, files: dict[str, bytes]) -> dict[str, Any]:
    if trace.level not in TRACE_LEVELS:
        raise InvalidInputError(f"trace level {trace.level!r} is not one of {TRACE_LEVELS}")
    cols = _columns(trace.columns, "trace.columns")
    evs = _columns(trace.events, "trace.events")
    kinds = {str(int(k)): str(v) for k, v in trace.event_kinds.items()}
    snaps = np.ascontiguousarray(trace.snapshots, dtype=np.float64)
    snap_it = np.ascontiguousarray(trace.snapshot_iterations, dtype=np.int64)
    if snaps.ndim != 2 or snap_it.shape != (snaps.shape[0],):
        raise InvalidInputError(
            f"trace snapshots must be (k, n) with k iterations; got {snaps.shape} / {snap_it.shape}"
        )
    meta = {"kktrace.format_version": str(FORMAT_VERSION), "kktrace.solver": str(trace.solver)}
    files["trace.parquet"] = write_table(cols, metadata=meta, descriptions=COLUMN_DOCS)
    files["events.parquet"] = write_table(evs, metadata={**meta, "kktrace.event_kinds":
                                                         dump_json(kinds).decode()})
    files["snapshots.npz"] = write_npz({"snapshot_iterations": snap_it, "snapshots": snaps})
    return {
        "solver": str(trace.solver), "level": trace.level,
        "rows": int(next(iter(cols.values())).shape[0]) if cols else 0,
        "sample_every": int(trace.sample_every), "snapshot_every": int(trace.snapshot_every),
        "columns": {c: str(a.dtype) for c, a in cols.items()},
        "events": {"rows": int(next(iter(evs.values())).shape[0]) if evs else 0,
                   "columns": {c: str(a.dtype) for c, a in evs.items()}},
        "event_kinds": kinds,
        "snapshots": int(snaps.shape[0]),
    }


# ----------------------------------------------------------------------------- decode

def _str_map(obj: Any, fname: str, path: str) -> dict[str, str]:
    if not isinstance(obj, dict) or not all(isinstance(v, str) for v in obj.values()):
        raise IntegrityError(f"{fname}: field {path} must map names to strings")
    return obj


def _table_dtypes(spec: dict[str, str], fname: str, path: str) -> dict[str, str]:
    out = {}
    for name, dt in spec.items():
        if dt not in ("str", "object") and not _DTYPE.fullmatch(dt):
            raise IntegrityError(f"{fname}: field {path}.{name} has unsupported dtype {dt!r}")
        out[name] = "str" if dt in ("object",) or dt.startswith("<U") else dt
    return out


#: version-1 option names (read from old manifests only; never written) → version-2 names
_V1_OPTIONS = {"max_iter": "iteration_limit", "cache_mb": "row_cache_mb", "tau": "curvature_floor"}


def upgrade_v2(manifest: dict[str, Any]) -> dict[str, Any]:
    """A version-1 or -2 manifest in version-3 form: an SMO run of those versions used the
    two-variable working set (option ``working_set`` = ``"pair"``); its trace, which has
    no ``outer`` column, gets one equal to ``iteration`` when decoded (each step was its
    own selection).  A view for decoding, like :func:`upgrade_v1`."""
    m = dict(manifest)
    s = m.get("solver")
    if (isinstance(s, dict) and s.get("name") == "smo" and isinstance(s.get("options"), dict)
            and "working_set" not in s["options"]):
        m["solver"] = dict(s, options=dict(s["options"], working_set="pair"))
    return m


def upgrade_v1(manifest: dict[str, Any]) -> dict[str, Any]:
    """A version-1 manifest with its option and certificate names in version-2 form.

    Only names change: ``tol`` → ``kkt_tol`` (SMO) or ``interior_point_tol`` (QP, where it
    was cvxopt's stopping tolerance), ``max_iter`` → ``iteration_limit``, ``cache_mb`` →
    ``row_cache_mb``, ``tau`` → ``curvature_floor``; the certificate's ``tol`` → ``kkt_tol``.
    The stored bytes (and so every digest) are untouched: this is a view for decoding.
    """
    m = dict(manifest)
    s = m.get("solver")
    if isinstance(s, dict) and isinstance(s.get("options"), dict):
        s = dict(s)
        qp = s.get("name") == "qp"
        opts = {}
        for key, value in s["options"].items():
            if key == "tol":
                key = "interior_point_tol" if qp else "kkt_tol"
            opts[_V1_OPTIONS.get(key, key)] = value
        s["options"] = opts
        m["solver"] = s
    c = m.get("certificate")
    if isinstance(c, dict) and "tol" in c and "kkt_tol" not in c:
        c = {("kkt_tol" if k == "tol" else k): v for k, v in c.items()}
        m["certificate"] = c
    return m


def decode_record(manifest: Any, blobs: Mapping[str, bytes]) -> RunRecord:
    """Rebuild a :class:`RunRecord` from a parsed manifest and the bytes of its files."""
    m = manifest
    if not isinstance(m, dict):
        raise IntegrityError(f"{M}: the document must be a JSON object")
    if get(m, "format", str, M, "") != FORMAT_NAME:
        raise IntegrityError(f"{M}: field format must be {FORMAT_NAME!r}")
    ver = get(m, "format_version", int, M, "")
    if ver not in fmt.READABLE_VERSIONS:
        raise IntegrityError(
            f"{M}: format_version {ver} is not supported (this reads "
            f"{', '.join(map(str, fmt.READABLE_VERSIONS))})")
    if ver == 1:
        m = upgrade_v1(m)
    if ver < 3:
        m = upgrade_v2(m)
    run_id = fmt.check_run_id_integrity(get(m, "run_id", str, M, ""), M)
    created = get(m, "created", str, M, "")
    parent = get(m, "parent", dict, M, "", optional=True)
    parent_id = parent_digest = None
    if parent is not None:
        parent_id = fmt.check_run_id_integrity(get(parent, "run_id", str, M, "parent"), M)
        parent_digest = get(parent, "manifest_sha256", str, M, "parent")
    command = m.get("command")

    def blob(name: str) -> bytes:
        if name not in blobs:
            raise IntegrityError(f"{name}: missing from the run folder")
        return blobs[name]

    arrays = read_npz(blob("arrays.npz"), "arrays.npz") if "arrays.npz" in blobs else {}

    s = get(m, "solver", dict, M, "")
    try:
        status = Status.from_label(get(s, "status", str, M, "solver"))
    except ValueError as exc:
        raise IntegrityError(f"{M}: field solver.status: {exc}") from None
    options = from_plain(get(s, "options", dict, M, "solver"), arrays, f"{M}: solver.options")
    extra = from_plain(get(s, "extra", dict, M, "solver"), arrays, f"{M}: solver.extra")

    p = get(m, "problem", dict, M, "")
    n = get(p, "n", int, M, "problem")
    d = get(p, "n_features", int, M, "problem")
    n_data = get(p, "n_data_rows", int, M, "problem") if "n_data_rows" in p else None
    sol_spec: dict[str, tuple[str, tuple[int | None, ...]]] = {
        "alpha": ("f", (n,)), "X": ("f", (n if n_data is None else n_data, d)),
        "y": ("f", (n,)), "p": ("f", (n,)),
        "lower": ("f", (n,)), "upper": ("f", (n,)), "kkt_residual": ("f", (n,)),
        "at_lower": ("b", (n,)), "at_upper": ("b", (n,)),
        "standardiser_centre": ("f", (None,)), "standardiser_scale": ("f", (None,)),
    }
    kdesc = get(p, "kernel", dict, M, "problem")
    kname = get(kdesc, "name", str, M, "problem.kernel")
    if kname == "precomputed":
        sol_spec["gram"] = ("f", (None, None))
    if n_data is not None:
        sol_spec["rows"] = ("i", (n,))
    sol = read_npz(blob("solution.npz"), "solution.npz", sol_spec)
    kernel = _decode_kernel(kdesc, kname, sol.get("gram"))
    info = from_plain(get(p, "info", dict, M, "problem"), arrays, f"{M}: problem.info")
    try:
        problem = DualProblem(
            X=sol["X"], y=sol["y"], p=sol["p"], lower=sol["lower"], upper=sol["upper"],
            delta=number(p, "delta", M, "problem"), kernel=kernel,
            kind=get(p, "kind", str, M, "problem"), info=info, rows=sol.get("rows"),
        )
        standardiser = Standardiser(centre=sol["standardiser_centre"],
                                    scale=sol["standardiser_scale"])
    except InvalidInputError as exc:
        raise IntegrityError(f"solution.npz: problem arrays are inconsistent ({exc})") from None

    c = get(m, "certificate", dict, M, "")
    try:
        certificate = Certificate(
            kkt_tol=number(c, "kkt_tol", M, "certificate"),
            max_violation=number(c, "max_violation", M, "certificate"),
            m_up=number(c, "m_up", M, "certificate"), M_low=number(c, "M_low", M, "certificate"),
            bias=number(c, "bias", M, "certificate"),
            bias_from=get(c, "bias_from", str, M, "certificate"),
            dual_objective=number(c, "dual_objective", M, "certificate"),
            primal_objective=number(c, "primal_objective", M, "certificate"),
            duality_gap=number(c, "duality_gap", M, "certificate"),
            relative_gap=number(c, "relative_gap", M, "certificate"),
            bound_violation=number(c, "bound_violation", M, "certificate"),
            equality_residual=number(c, "equality_residual", M, "certificate"),
            n_free=get(c, "n_free", int, M, "certificate"),
            n_bounded=get(c, "n_bounded", int, M, "certificate"),
            n_zero=get(c, "n_zero", int, M, "certificate"),
            bound_tol=number(c, "bound_tol", M, "certificate"),
            kkt_residual=sol["kkt_residual"], at_lower=sol["at_lower"], at_upper=sol["at_upper"],
        )
    except TypeError as exc:
        raise IntegrityError(f"{M}: field certificate is malformed ({exc})") from None

    trace = None
    t = get(m, "trace", dict, M, "", optional=True)
    if t is not None:
        trace = _decode_trace(t, blob, n, ver)

    result = SolveResult(
        solver=get(s, "name", str, M, "solver"), status=status,
        message=get(s, "message", str, M, "solver"), alpha=sol["alpha"],
        bias=number(s, "bias", M, "solver"), iterations=get(s, "iterations", int, M, "solver"),
        certificate=certificate, seconds=number(s, "seconds", M, "solver"), options=options,
        trace=trace, extra=extra,
    )
    data = from_plain(get(m, "data", dict, M, ""), arrays, f"{M}: data")

    attachments: dict[str, Any] = {}
    for name, spec in get(m, "attachments", dict, M, "").items():
        path = f"attachments.{name}"
        if not _ATTACHMENT_NAME.fullmatch(name) or name in _RESERVED:
            raise IntegrityError(f"{M}: field attachments has an invalid name {name!r}")
        kind = get(spec, "kind", str, M, path)
        if kind == "table":
            dtypes = _str_map(get(spec, "columns", dict, M, path), M, f"{path}.columns")
            cols = read_table(blob(f"{name}.parquet"), f"{name}.parquet",
                              _table_dtypes(dtypes, M, f"{path}.columns"), f"{path}.columns")
            for col, dt in dtypes.items():
                if dt.startswith("<U"):
                    cols[col] = cols[col].astype(dt)
            attachments[name] = cols
        elif kind == "json":
            attachments[name] = from_plain(parse_json(blob(f"{name}.json"), f"{name}.json"),
                                           arrays, f"{name}.json")
        else:
            raise IntegrityError(f"{M}: field {path}.kind {kind!r} is not 'table' or 'json'")
    if command is not None:
        attachments["command"] = command

    return RunRecord(
        problem=problem, result=result, data=data, standardiser=standardiser, run_id=run_id,
        created=created, parent_id=parent_id, parent_digest=parent_digest,
        attachments=attachments, manifest=m,
    )


def _decode_kernel(desc: dict[str, Any], name: str, gram: np.ndarray | None) -> Kernel:
    if name == "precomputed":
        return PrecomputedKernel(gram_matrix=gram)
    if name == "callable":
        return UnavailableKernel(description=desc)
    params = get(desc, "params", dict, M, "problem.kernel")
    for k, v in params.items():
        if not (v is None or isinstance(v, (int, float, str))):
            raise IntegrityError(f"{M}: field problem.kernel.params.{k} must be a number or string")
    try:
        return kernel_from_description({"name": name, "params": params})
    except (InvalidInputError, TypeError) as exc:
        raise IntegrityError(f"{M}: field problem.kernel is invalid ({exc})") from None


def _decode_trace(t: dict[str, Any], blob: Any, n: int, version: int) -> Trace:
    P = "trace"
    level = get(t, "level", str, M, P)
    if level not in TRACE_LEVELS:
        raise IntegrityError(f"{M}: field trace.level {level!r} is not one of {TRACE_LEVELS}")
    col_types = _table_dtypes(_str_map(get(t, "columns", dict, M, P), M, "trace.columns"), M,
                              "trace.columns")
    ev = get(t, "events", dict, M, P)
    ev_types = _table_dtypes(_str_map(get(ev, "columns", dict, M, "trace.events"), M,
                                      "trace.events.columns"), M, "trace.events.columns")
    rows = get(t, "rows", int, M, P)
    cols = read_table(blob("trace.parquet"), "trace.parquet", col_types, "trace.columns")
    if any(a.shape[0] != rows for a in cols.values()):
        raise IntegrityError(f"trace.parquet: row count differs from manifest.json field "
                             f"trace.rows = {rows}")
    events = read_table(blob("events.parquet"), "events.parquet", ev_types,
                        "trace.events.columns")
    if any(a.shape[0] != get(ev, "rows", int, M, "trace.events") for a in events.values()):
        raise IntegrityError("events.parquet: row count differs from manifest.json field "
                             "trace.events.rows")
    kinds_raw = _str_map(get(t, "event_kinds", dict, M, P), M, "trace.event_kinds")
    try:
        kinds = {int(k): v for k, v in kinds_raw.items()}
    except ValueError:
        raise IntegrityError(f"{M}: field trace.event_kinds keys must be integers") from None
    k = get(t, "snapshots", int, M, P)
    snap = read_npz(blob("snapshots.npz"), "snapshots.npz",
                    {"snapshot_iterations": ("i", (k,)), "snapshots": ("f", (k, n))})
    solver = get(t, "solver", str, M, P)
    if version < 3 and solver == "smo" and "outer" not in cols and "iteration" in cols:
        cols["outer"] = np.array(cols["iteration"], dtype=np.int64)  # see upgrade_v2
    return Trace(
        solver=solver, level=level, columns=cols, events=events,
        event_kinds=kinds, snapshot_iterations=snap["snapshot_iterations"],
        snapshots=snap["snapshots"], sample_every=get(t, "sample_every", int, M, P),
        snapshot_every=get(t, "snapshot_every", int, M, P),
    )


def decode_model(model_json: bytes, model_npz: bytes, gram: np.ndarray | None = None) -> Model:
    """The :class:`~solver.model.Model` stored as ``model.json`` + ``model.npz``."""
    F = "model.json"
    doc = parse_json(model_json, F)
    if not isinstance(doc, dict) or doc.get("format") != MODEL_FORMAT:
        raise IntegrityError(f"{F}: field format must be {MODEL_FORMAT!r}")
    k = get(doc, "n_support", int, F, "")
    d = get(doc, "n_features", int, F, "")
    arr = read_npz(model_npz, "model.npz", {
        "support_rows": ("i", (k,)), "support_points": ("f", (k, d)), "coefficients": ("f", (k,)),
        "centre": ("f", (d,)), "scale": ("f", (d,)),
    })
    kdesc = get(doc, "kernel", dict, F, "")
    kernel = _decode_kernel(kdesc, get(kdesc, "name", str, F, "kernel"), gram)
    labels = get(doc, "labels", dict, F, "")
    for key in ("negative", "positive"):
        if key not in labels or not isinstance(labels[key], (int, float, str, bool)):
            raise IntegrityError(f"{F}: field labels.{key} must be a number or string")
    try:
        std = Standardiser(centre=arr["centre"], scale=arr["scale"])
    except InvalidInputError as exc:
        raise IntegrityError(f"model.npz: {exc}") from None
    return Model(
        support_rows=arr["support_rows"], support_points=arr["support_points"],
        coefficients=arr["coefficients"], bias=number(doc, "bias", F, ""), kernel=kernel,
        standardiser=std, labels=(labels["negative"], labels["positive"]),
    )
