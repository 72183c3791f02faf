"""JSON output of every ``--json`` command: indented, numpy scalars allowed."""

from __future__ import annotations

import json
from typing import Any

import numpy as np

__all__ = ["to_json"]


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    return str(value)


def to_json(value: Any) -> str:
    """Give indented JSON of plain data (numpy scalars allowed)."""
    return json.dumps(value, indent=2, default=_json_default, ensure_ascii=False)
