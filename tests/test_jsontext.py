"""The --json writer: strict JSON (no NaN or Infinity), numpy scalars and arrays allowed."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from curate.jsontext import to_json


def strict_loads(text):
    # RFC 8259 section 6: NaN and Infinity are not JSON numbers; Python's json module accepts
    # them by default, so refuse them explicitly
    def refuse(name):
        raise ValueError(f"not JSON: {name}")

    return json.loads(text, parse_constant=refuse)


def test_non_finite_numbers_become_null_everywhere():
    data = {
        "nan": float("nan"),
        "inf": math.inf,
        "minus_inf": -math.inf,
        "numpy_nan": np.float64("nan"),
        "numpy_float32_inf": np.float32("inf"),
        "array": np.array([1.5, np.nan, np.inf]),
        "nested": [{"deep": (np.nan, 2.0)}],
        "fine": np.int64(3),
        np.int64(7): "numpy key",
        "flag": np.bool_(True),
    }
    parsed = strict_loads(to_json(data))
    assert parsed == {
        "nan": None,
        "inf": None,
        "minus_inf": None,
        "numpy_nan": None,
        "numpy_float32_inf": None,
        "array": [1.5, None, None],
        "nested": [{"deep": [None, 2.0]}],
        "fine": 3,
        "7": "numpy key",
        "flag": True,
    }


def test_the_strict_parser_refuses_what_python_would_accept():
    with pytest.raises(ValueError, match="not JSON: NaN"):
        strict_loads(json.dumps({"x": float("nan")}))
