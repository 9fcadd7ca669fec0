"""Run store: tamper-evident run folders (JSON + Parquet + npz), SQLite catalog, replay, reproduce.

The folder format is specified in ``traces/README.md``.
"""

from __future__ import annotations

from .catalog import COLUMNS as CATALOG_COLUMNS
from .format import FORMAT_NAME, FORMAT_VERSION, RUN_ID_PATTERN, check_run_id, is_run_id, new_run_id
from .integrity import Verification
from .replay import ReplayState, replay, replayable_iterations
from .reproduce import Reproduction, reproduce
from .store import DEFAULT_DIR, ENV_VAR, RunStore

__all__ = [
    "RunStore",
    "Verification",
    "replay",
    "ReplayState",
    "replayable_iterations",
    "reproduce",
    "Reproduction",
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "RUN_ID_PATTERN",
    "CATALOG_COLUMNS",
    "ENV_VAR",
    "DEFAULT_DIR",
    "check_run_id",
    "is_run_id",
    "new_run_id",
]
