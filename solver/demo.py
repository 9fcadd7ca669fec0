"""Invented demo scenario: release/reject decisions on a tablet-coating line.

**The data are invented.**  They imitate the shape of a quality-control problem in
pharmaceutical manufacturing so that the demo has something plausible to chew on; they
describe no real product, process, laboratory or specification, and they are never used
as a check of kktrace's correctness.

Each row is one sampled batch, measured on four instruments:

=========================  ======  ============================================
column                     unit    meaning
=========================  ======  ============================================
``coating_thickness_um``   µm      film-coat thickness
``dissolution_30min_pct``  %       drug released after 30 minutes
``hardness_n``             N       tablet breaking force
``moisture_pct``           %       loss on drying
``lab_decision``           —       ``release`` or ``reject`` (the label)
=========================  ======  ============================================

A further file grades the same batches three ways in ``coating_grade``: ``release`` as
above, ``rework`` for a batch just outside the window (or inside it but up to 4.2 %
moist) with its hardness in range — it could be re-coated or re-dried — and ``reject``
for the rest.  The demo trains it one-vs-one, so that a multi-class report is there too.

The (invented) laboratory releases a batch when its *true* thickness and dissolution lie
inside a curved, banana-shaped window (thicker coats dissolve more slowly, and the
acceptable dissolution band bends with thickness), its moisture is at most 3.6 % and its
hardness lies in 85–160 N.  The recorded measurements carry instrument noise and are
rounded to instrument resolution, so the classes overlap near the window's edge and a
non-linear kernel is needed.

Two further invented tables feed the other tasks (:func:`run_demo` writes them next to the
first, they are not shipped):

* **coating thickness (ε-regression)** — one row per coating-pan run with its settings
  ``spray_rate_g_min`` (g/min), ``coating_time_min`` (min), ``pan_speed_rpm`` (rpm),
  ``inlet_air_c`` (°C) and the measured ``coating_thickness_um`` (µm, the target).  The
  (invented) film grows with sprayed mass (rate × time), loses efficiency away from an
  inlet temperature of 53 °C and uniformity away from a pan speed of 11 rpm; the gauge
  adds noise of standard deviation 2 µm, so a tube of ε = 2.5 µm is about the noise level.
* **unusual batches (one-class)** — the four measurements of the *released* batches of
  the training table, without the decision (``released_batches.csv``), and the held-out
  batches with a column ``unusual`` (``yes`` for a batch the laboratory rejected)
  (``new_batches.csv``): is a new batch unlike every released batch?
"""

from __future__ import annotations

import csv
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np

__all__ = [
    "DEMO_SEED",
    "DEMO_COLUMNS",
    "DEMO_LABEL",
    "DEMO_SETTINGS",
    "DemoOutcome",
    "DemoPart",
    "coating_process_tables",
    "write_task_data",
    "GRADE_LABEL",
    "tablet_coating_grade_tables",
    "tablet_coating_tables",
    "write_table",
    "write_demo_data",
    "shipped_data",
    "run_demo",
]

#: Seed of the generator (``numpy.random.default_rng``); the shipped CSVs use it.
DEMO_SEED = 20240611
#: Feature columns, then the label column, in file order.
DEMO_COLUMNS = ("coating_thickness_um", "dissolution_30min_pct", "hardness_n", "moisture_pct")
DEMO_LABEL = "lab_decision"
#: Label column of the three-way grade files (multi-class part): release / rework / reject.
GRADE_LABEL = "coating_grade"
GRADE_FILE, GRADE_HOLDOUT_FILE = "tablet_coating_grades.csv", "tablet_coating_grades_holdout.csv"
#: Rows in the training and held-out files.
N_TRAIN, N_HOLDOUT = 360, 120
#: Decimal places each column is recorded with (instrument resolution).
_DECIMALS = {"coating_thickness_um": 1, "dissolution_30min_pct": 1, "hardness_n": 0,
             "moisture_pct": 2}
#: Training settings used by :func:`run_demo` (RBF kernel, gamma by the median heuristic).
DEMO_SETTINGS: Mapping[str, Any] = {"kernel": "rbf", "C": 10.0, "kkt_tol": 1e-5}
TRAIN_FILE, HOLDOUT_FILE = "tablet_coating.csv", "tablet_coating_holdout.csv"

#: Seed of the coating-process table (ε-regression part of the demo).
PROCESS_SEED = 20240612
#: Process settings, then the target, in file order; decimals recorded per column.
PROCESS_COLUMNS = ("spray_rate_g_min", "coating_time_min", "pan_speed_rpm", "inlet_air_c")
PROCESS_TARGET = "coating_thickness_um"
_PROCESS_DECIMALS = {"spray_rate_g_min": 1, "coating_time_min": 0, "pan_speed_rpm": 1,
                     "inlet_air_c": 1, "coating_thickness_um": 1}
#: Rows in the coating-process training and held-out files.
N_PROCESS_TRAIN, N_PROCESS_HOLDOUT = 240, 80
#: Settings of the ε-regression part.  ε and kkt_tol are in target units (µm): the maximal
#: violation is measured on the gradient, which carries the target's unit, so 1e-3 µm is far
#: below the gauge's resolution of 0.1 µm (and within reach of the QP challenger's accuracy).
REGRESSION_SETTINGS: Mapping[str, Any] = {"kernel": "rbf", "C": 100.0, "epsilon": 2.5,
                                          "kkt_tol": 1e-3}
#: Settings of the one-class part (ν: at most 5 % of released batches outside).
ONE_CLASS_SETTINGS: Mapping[str, Any] = {"kernel": "rbf", "nu": 0.05, "kkt_tol": 1e-5}
PROCESS_FILE, PROCESS_HOLDOUT_FILE = "coating_process.csv", "coating_process_holdout.csv"
RELEASED_FILE, NEW_BATCHES_FILE = "released_batches.csv", "new_batches.csv"
#: Column of new_batches.csv marking the batches the laboratory rejected.
UNUSUAL_COLUMN = "unusual"


def _batches(rng: np.random.Generator, n: int, *, grades: bool = False
             ) -> dict[str, np.ndarray]:
    """``n`` invented batches: recorded features and the lab's decision (with ``grades``:
    the three-way grade :data:`GRADE_LABEL` instead, from the same draws)."""
    thick = np.clip(rng.normal(86.0, 13.0, n), 45.0, 135.0)
    hard = np.clip(rng.normal(118.0, 16.0, n), 60.0, 180.0)
    # thicker coats and harder cores dissolve more slowly
    diss = np.minimum(99.5, 93.0 - 0.30 * (thick - 86.0) - 0.08 * (hard - 118.0)
                      + rng.normal(0.0, 4.5, n))
    moist = np.exp(rng.normal(np.log(2.6), 0.28, n))
    # the acceptance window: an ellipse around a curved centre line (banana shape)
    centre = 88.5 + 0.22 * (thick - 86.0) - 0.012 * (thick - 86.0) ** 2
    inside = ((thick - 86.0) / 24.0) ** 2 + ((diss - centre) / 8.5) ** 2 <= 1.0
    release = inside & (moist <= 3.6) & (hard >= 85.0) & (hard <= 160.0)
    # instrument noise (standard deviations in each column's unit), then rounding
    recorded = {
        "coating_thickness_um": thick + rng.normal(0.0, 2.0, n),
        "dissolution_30min_pct": np.minimum(100.0, diss + rng.normal(0.0, 1.5, n)),
        "hardness_n": hard + rng.normal(0.0, 3.0, n),
        "moisture_pct": np.maximum(0.05, moist + rng.normal(0.0, 0.12, n)),
    }
    out = {k: np.round(v, _DECIMALS[k]) for k, v in recorded.items()}
    if not grades:
        out[DEMO_LABEL] = np.where(release, "release", "reject")
        return out
    # the invented grading: a batch just outside the window (radius ≤ 1.45), or inside
    # it but slightly too moist (≤ 4.2 %), can be re-coated or re-dried: rework; hardness
    # out of range, or further out, is scrapped: reject
    radius = np.sqrt(((thick - 86.0) / 24.0) ** 2 + ((diss - centre) / 8.5) ** 2)
    hard_ok = (hard >= 85.0) & (hard <= 160.0)
    rework = ~release & hard_ok & (((radius <= 1.45) & (moist <= 3.6))
                                   | ((radius <= 1.0) & (moist <= 4.2)))
    out[GRADE_LABEL] = np.where(release, "release", np.where(rework, "rework", "reject"))
    return out


def tablet_coating_tables(
    *, seed: int = DEMO_SEED, n_train: int = N_TRAIN, n_holdout: int = N_HOLDOUT
) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    """Invented training and held-out tables (column name → (n,) array), from one seed.

    Features are float64 in the units of :data:`DEMO_COLUMNS`; the label column holds
    the strings ``"release"`` / ``"reject"``.  Same seed → identical tables.
    """
    rng = np.random.default_rng(seed)
    both = _batches(rng, n_train + n_holdout)
    train = {k: v[:n_train] for k, v in both.items()}
    holdout = {k: v[n_train:] for k, v in both.items()}
    return train, holdout


def coating_process_tables(
    *, seed: int = PROCESS_SEED, n_train: int = N_PROCESS_TRAIN,
    n_holdout: int = N_PROCESS_HOLDOUT,
) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    """Invented coating-pan runs (settings → measured thickness), training and held out.

    Thickness (µm) = 0.016 · spray rate · time · (0.88 − 0.0012 (inlet − 53)²)
    · (1 − 0.004 (pan speed − 11)²) + gauge noise N(0, 2²), all invented; each column is
    rounded to its recorded resolution.  Same seed → identical tables.
    """
    rng = np.random.default_rng(seed)
    n = n_train + n_holdout
    spray = rng.uniform(40.0, 90.0, n)
    minutes = rng.uniform(60.0, 150.0, n)
    pan = rng.uniform(6.0, 16.0, n)
    inlet = rng.uniform(40.0, 66.0, n)
    grown = (0.016 * spray * minutes * (0.88 - 0.0012 * (inlet - 53.0) ** 2)
             * (1.0 - 0.004 * (pan - 11.0) ** 2))
    cols = {"spray_rate_g_min": spray, "coating_time_min": minutes, "pan_speed_rpm": pan,
            "inlet_air_c": inlet, PROCESS_TARGET: grown + rng.normal(0.0, 2.0, n)}
    both = {k: np.round(v, _PROCESS_DECIMALS[k]) for k, v in cols.items()}
    return ({k: v[:n_train] for k, v in both.items()},
            {k: v[n_train:] for k, v in both.items()})


def _write_columns(table: Mapping[str, np.ndarray], path: Path,
                   decimals: Mapping[str, int]) -> Path:
    """CSV of ``table`` in its key order; numeric columns with ``decimals``, others as text."""
    cols = list(table)
    n = len(table[cols[0]])
    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(cols)
        for r in range(n):
            w.writerow([f"{float(table[c][r]):.{decimals[c]}f}" if c in decimals
                        else str(table[c][r]) for c in cols])
    return path


def tablet_coating_grade_tables(
    *, seed: int = DEMO_SEED, n_train: int = N_TRAIN, n_holdout: int = N_HOLDOUT
) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    """The same invented batches as :func:`tablet_coating_tables` (same seed, same
    feature values) graded three ways in :data:`GRADE_LABEL`: ``release`` (as there),
    ``rework`` (just outside the window, or a little too moist) or ``reject``."""
    rng = np.random.default_rng(seed)
    both = _batches(rng, n_train + n_holdout, grades=True)
    return ({k: v[:n_train] for k, v in both.items()},
            {k: v[n_train:] for k, v in both.items()})


def write_task_data(directory: str | Path) -> dict[str, tuple[Path, Path]]:
    """Write the multi-class, regression and one-class demo files; task name →
    (training, held-out).

    ``multiclass``: the tablet-coating batches graded release / rework / reject
    (:func:`tablet_coating_grade_tables`);

    ``regression``: the coating-process tables; ``one-class``: the released batches of the
    tablet-coating training table (features only) and its held-out batches with the
    :data:`UNUSUAL_COLUMN` (``yes`` where the laboratory rejected the batch).
    """
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    p_train, p_hold = coating_process_tables()
    train, hold = tablet_coating_tables()
    released = train[DEMO_LABEL] == "release"
    new = {c: hold[c] for c in DEMO_COLUMNS}
    new[UNUSUAL_COLUMN] = np.where(hold[DEMO_LABEL] == "reject", "yes", "no")
    g_train, g_hold = tablet_coating_grade_tables()
    return {
        "multiclass": (_write_columns(g_train, directory / GRADE_FILE, _DECIMALS),
                       _write_columns(g_hold, directory / GRADE_HOLDOUT_FILE, _DECIMALS)),
        "regression": (_write_columns(p_train, directory / PROCESS_FILE, _PROCESS_DECIMALS),
                       _write_columns(p_hold, directory / PROCESS_HOLDOUT_FILE,
                                      _PROCESS_DECIMALS)),
        "one-class": (_write_columns({c: train[c][released] for c in DEMO_COLUMNS},
                                     directory / RELEASED_FILE, _DECIMALS),
                      _write_columns(new, directory / NEW_BATCHES_FILE, _DECIMALS)),
    }


def _fmt(column: str, value: Any) -> str:
    if column == DEMO_LABEL:
        return str(value)
    return f"{float(value):.{_DECIMALS[column]}f}"


def write_table(table: Mapping[str, np.ndarray], path: str | Path) -> Path:
    """Write a demo table as CSV (header row; fixed decimals so output is byte-stable)."""
    path = Path(path)
    cols = [*DEMO_COLUMNS, DEMO_LABEL]
    n = len(table[DEMO_LABEL])
    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(cols)
        for r in range(n):
            w.writerow([_fmt(c, table[c][r]) for c in cols])
    return path


def write_demo_data(directory: str | Path, *, seed: int = DEMO_SEED) -> tuple[Path, Path]:
    """Generate the demo tables and write ``tablet_coating.csv`` and the held-out file."""
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    train, holdout = tablet_coating_tables(seed=seed)
    return (write_table(train, directory / TRAIN_FILE),
            write_table(holdout, directory / HOLDOUT_FILE))


def shipped_data() -> tuple[Path, Path]:
    """Paths of the demo CSVs shipped inside the package (training, held-out)."""
    base = resources.files("solver") / "data"
    return Path(str(base / TRAIN_FILE)), Path(str(base / HOLDOUT_FILE))


@dataclass(frozen=True, eq=False)
class DemoOutcome:
    """What :func:`run_demo` wrote.

    store : store root; data_files : (training CSV, held-out CSV) written for the demo;
    train : the :class:`solver.api.TrainOutcome`; reports : format → path of the audit
    report; explanation_files : per-point tables exported for the primary run;
    seconds : wall-clock time of the whole demo.
    """

    store: Path
    data_files: tuple[Path, Path]
    train: Any
    reports: Mapping[str, Path]
    explanation_files: Mapping[str, Path]
    seconds: float
    parts: Mapping[str, DemoPart] = field(default_factory=dict)


@dataclass(frozen=True, eq=False)
class DemoPart:
    """A further task run by the demo (``regression``, ``one-class``, ...).

    title : one line saying what it shows; data_files : (training, held-out) files;
    train : its :class:`solver.api.TrainOutcome`; reports : format → report path.
    """

    title: str
    data_files: tuple[Path, Path]
    train: Any
    reports: Mapping[str, Path]


def _task_parts(api: Any, run_store: Any, root: Path, quiet: bool,
                progress: Any) -> dict[str, DemoPart]:
    """Train and report the multi-class (release / rework / reject, one-vs-one),
    regression (coating thickness) and one-class (unusual batches) parts of the demo."""
    files = write_task_data(root / "demo-data")
    plan = {
        "multiclass": ("multi-class: the same batches graded release / rework / reject, "
                       "one-vs-one", dict(label=GRADE_LABEL, **DEMO_SETTINGS),
                       "tablet-coating-grades-audit"),
        "regression": ("ε-regression: coating thickness predicted from the pan settings",
                       dict(task="regression", target=PROCESS_TARGET, **REGRESSION_SETTINGS),
                       "coating-thickness-regression"),
        "one-class": ("one-class: new batches unlike every released batch",
                      dict(task="one-class", outlier_column=UNUSUAL_COLUMN,
                           **ONE_CLASS_SETTINGS),
                      "unusual-batches"),
    }
    parts = {}
    for name, (title, options, stem) in plan.items():
        train_csv, holdout_csv = files[name]
        outcome = api.train(train_csv, solver="both", holdout=holdout_csv, store=run_store,
                            quiet=quiet, progress=progress, **options)
        reports = api.report(
            list(outcome.run_ids), store=run_store, stem=stem,
            out_dir=root / "reports" / f"demo-{outcome.run_ids[0]}",
            notes=f"Demo run ({title}) on invented tablet-coating data (not a real product "
                  "or process).")
        parts[name] = DemoPart(title=title, data_files=(train_csv, holdout_csv),
                               train=outcome, reports=reports)
    return parts


def run_demo(
    *,
    store: Any = None,
    quiet: bool = True,
    progress: Callable[[str, Mapping[str, Any]], None] | None = None,
) -> DemoOutcome:
    """Run the whole audit on the invented tablet-coating data.

    Generates the data into ``<store>/demo-data/``, trains SMO with the QP challenger
    (held-out file scored), exports the primary run's per-point table (CSV and Parquet)
    and writes the audit report (HTML, PDF, JSON) into ``<store>/reports/``; then the
    further parts (:attr:`DemoOutcome.parts`): the same batches graded release / rework /
    reject and trained one-vs-one (a multi-class parent over three pair runs, its report
    with the multi-class section), ε-regression of the coating thickness and a
    one-class model of the released batches, each with its challenger and its report.
    ``store`` is a directory, a :class:`~solver.store.RunStore` or None (``$KKTRACE_STORE``
    or ``./traces``).
    """
    import time

    from . import api

    t0 = time.perf_counter()
    run_store = api.open_store(store)
    root = Path(run_store.root)
    train_csv, holdout_csv = write_demo_data(root / "demo-data")
    outcome = api.train(
        train_csv, label=DEMO_LABEL, solver="both", holdout=holdout_csv, store=run_store,
        quiet=quiet, progress=progress, **DEMO_SETTINGS,
    )
    primary = outcome.run_ids[0]
    out_dir = root / "reports" / f"demo-{primary}"
    explanation_files = api.export_explanation(primary, out_dir, store=run_store)
    reports = api.report(
        list(outcome.run_ids), store=run_store, out_dir=out_dir, stem="tablet-coating-audit",
        notes="Demo run on invented tablet-coating QC data (not a real product or process).",
    )
    parts = _task_parts(api, run_store, root, quiet, progress)
    return DemoOutcome(
        store=root, data_files=(train_csv, holdout_csv), train=outcome, reports=reports,
        explanation_files=explanation_files, seconds=time.perf_counter() - t0, parts=parts,
    )
