"""The one plain-data conversion used for JSON output."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

from solver.plaindata import to_plain
from solver.status import Status


def test_numpy_paths_and_nesting_become_plain():
    v = {1: (np.float64(0.5), np.int32(3)), "a": np.arange(3), "p": Path("x/y"), "s": Status(0)}
    out = to_plain(v)
    assert out == {"1": [0.5, 3], "a": [0, 1, 2], "p": "x/y", "s": 0}
    assert type(out["1"][1]) is int
    json.dumps(out)


def test_nonfinite_kept_or_nulled():
    v = [np.float64("nan"), float("inf"), 1.0]
    kept = to_plain(v)
    assert math.isnan(kept[0]) and kept[1] == math.inf
    assert to_plain(v, nonfinite_as_none=True) == [None, None, 1.0]


def test_other_objects_converted_only_when_asked():
    obj = object()
    assert to_plain([obj])[0] is obj
    assert to_plain([obj], other=str)[0] == str(obj)
