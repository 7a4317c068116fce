"""JSON text of findings, items and reports: one cleaner from pandas/numpy values to strict JSON.

`plain` turns a value (dicts and lists too) into what json.dumps writes as valid JSON: NaN, NA,
NaT and infinities become null, numpy scalars plain Python numbers, timestamps ISO 8601 text.
Screens write their JSON through `to_json` (re-exported by screens/_frame.py); the worklist
and the quality report use `plain` with their own json.dumps options.
"""
from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pandas as pd

FINDING_DECIMALS = 4   # floats in findings' JSON are rounded to this (a whole number is written as one)


def plain(obj: Any, decimals: int | None = None) -> Any:
    """`obj` as plain JSON values. With `decimals`, floats are rounded to it and a whole float is
    written as an int; without, floats are kept as they are. An object with `as_dict()` (a
    screens.criteria.Threshold) is written as that dict; anything else unknown as its text."""
    if isinstance(obj, dict):
        return {str(k): plain(v, decimals) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [plain(v, decimals) for v in obj]
    if obj is None or obj is pd.NA or obj is pd.NaT:
        return None
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        x = float(obj)
        if math.isnan(x) or math.isinf(x):
            return None
        if decimals is None:
            return x
        x = round(x, decimals)
        return int(x) if x.is_integer() and abs(x) < 1e15 else x
    if isinstance(obj, pd.Timestamp):
        return obj.isoformat()
    if hasattr(obj, "as_dict"):
        return obj.as_dict()
    return str(obj) if not isinstance(obj, str) else obj


def to_json(obj: Any) -> str:
    """Strict JSON for findings: NaN/NA become null, numpy scalars plain numbers, floats rounded to
    FINDING_DECIMALS decimals."""
    return json.dumps(plain(obj, FINDING_DECIMALS), ensure_ascii=False, allow_nan=False)


def loads_list(text) -> list:
    """A JSON list from text; [] for a missing or blank text or JSON that is not a list."""
    if not isinstance(text, str) or not text.strip():
        return []
    value = json.loads(text)
    return value if isinstance(value, list) else []


def loads_object(text) -> dict:
    """A JSON object from text; {} for a missing or blank text or JSON that is not an object."""
    if not isinstance(text, str) or not text.strip():
        return {}
    value = json.loads(text)
    return value if isinstance(value, dict) else {}
