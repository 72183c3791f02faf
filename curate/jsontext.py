"""Strict JSON (RFC 8259) of plain data, numpy allowed: every ``--json`` output and JSON file.

JSON has no NaN or Infinity (RFC 8259, section 6); Python's json module writes them anyway
unless told not to. Every non-finite number (float, numpy scalar or array element) becomes
null, and the dump runs with ``allow_nan=False`` so that none can slip through.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from typing import Any

import numpy as np

__all__ = ["finite", "to_json"]


def finite(value: Any) -> Any:
    """Give plain data with every NaN or infinite number replaced by None, recursively.

    Mappings, lists, tuples, sets, numpy arrays and numpy scalars are walked; other objects
    are left as they are (``to_json`` writes them as text).
    """
    if isinstance(value, bool) or value is None or isinstance(value, (str, int)):
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, np.ndarray):
        return [finite(item) for item in value.tolist()]
    if isinstance(value, np.generic):
        return finite(value.item())
    if isinstance(value, Mapping):
        return {
            (key.item() if isinstance(key, np.generic) else key): finite(item)
            for key, item in value.items()
        }
    if isinstance(value, (list, tuple, set, frozenset)):
        return [finite(item) for item in value]
    return value


def _json_default(value: Any) -> Any:
    return str(value)


def to_json(value: Any, *, sort_keys: bool = False) -> str:
    """Give indented, strict JSON of plain data (numpy scalars and arrays allowed; NaN -> null)."""
    return json.dumps(
        finite(value), indent=2, default=_json_default, ensure_ascii=False, allow_nan=False,
        sort_keys=sort_keys,
    )  # fmt: skip
