"""A model that is a Python function: ``predict(params: dict, points: DataFrame) -> ndarray``.

Named as ``module:function`` or ``path/to/model.py:function`` (a file path is made absolute, so
worker processes and later reports load the same file), or given as a callable in memory.
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.util
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from curate.errors import InputError
from curate.fit.backends.base import ModelBackend

__all__ = ["Model", "PythonFunction", "absolute_reference", "load_model", "model_sha256"]

Model = Callable[[dict[str, float], pd.DataFrame], Any]


class PythonFunction(ModelBackend):
    """A Python function run in this process (or, when named by reference, in workers too)."""

    kind = "python"

    def __init__(
        self, function: Model, *, reference: str | None = None, label: str | None = None
    ) -> None:
        self.function = function
        self.reference = reference
        self._label = str(label or reference or getattr(function, "__qualname__", "function"))

    @classmethod
    def from_reference(cls, reference: str) -> PythonFunction:
        """Give the backend of ``module:function`` or ``file.py:function`` (loaded now)."""
        absolute = absolute_reference(reference)
        return cls(load_model(absolute), reference=absolute, label=reference)

    @classmethod
    def from_description(cls, description: dict[str, Any]) -> ModelBackend:
        """Give the backend back from its recorded reference."""
        reference = description.get("reference")
        if not reference:
            raise InputError("the python backend was an in-memory function; it cannot be reloaded")
        return cls(load_model(str(reference)), reference=str(reference),
                   label=str(description.get("label") or reference))  # fmt: skip

    def predict(self, parameters: dict[str, float], points: pd.DataFrame) -> np.ndarray:
        """Give the function's predictions."""
        return np.asarray(self.function(parameters, points))

    @property
    def portable(self) -> bool:
        """Tell whether a worker can load the function itself (it was named by reference)."""
        return self.reference is not None

    @property
    def label(self) -> str:
        """Give the reference as given (or the function's name)."""
        return self._label

    def describe(self) -> dict[str, Any]:
        """Give kind, absolute reference, the model file's sha256 and the label."""
        return {"kind": self.kind, "reference": self.reference, "label": self.label,
                "sha256": model_sha256(self.reference) if self.reference else None}  # fmt: skip


def absolute_reference(reference: str) -> str:
    """Give ``file.py:function`` with the file's absolute path (modules as given)."""
    target, sep, name = reference.rpartition(":")
    if sep and target.endswith(".py"):
        return f"{Path(target).resolve()}:{name}"
    return reference


def load_model(reference: str) -> Model:
    """Give the model callable named by ``module:function`` or ``file.py:function``."""
    target, sep, name = reference.rpartition(":")
    if not sep or not target or not name:
        raise InputError(
            f"--model '{reference}': expected module:function or path/to/model.py:function"
        )
    if target.endswith(".py"):
        path = Path(target)
        if not path.is_file():
            raise InputError(f"--model '{reference}': no such file {path}")
        module_name = (
            f"curate_model_{hashlib.sha256(str(path.resolve()).encode()).hexdigest()[:12]}"
        )
        module = sys.modules.get(module_name)
        if module is None:
            spec = importlib.util.spec_from_file_location(module_name, path)
            if spec is None or spec.loader is None:
                raise InputError(f"--model '{reference}': cannot load {path}")
            module = importlib.util.module_from_spec(spec)
            sys.modules[module_name] = module
            # as Python runs a script: modules beside the model file can be imported
            folder = str(path.resolve().parent)
            if folder not in sys.path:
                sys.path.insert(0, folder)
            try:
                spec.loader.exec_module(module)
            except Exception as err:
                del sys.modules[module_name]
                raise InputError(
                    f"--model '{reference}': loading {path} failed ({err or 'no message'})"
                ) from None
    else:
        try:
            module = importlib.import_module(target)
        except ImportError as err:
            raise InputError(f"--model '{reference}': cannot import {target} ({err})") from None
    function = getattr(module, name, None)
    if not callable(function):
        raise InputError(f"--model '{reference}': {target} defines no function '{name}'")
    return function  # type: ignore[no-any-return]


def model_sha256(reference: str) -> str | None:
    """Give the sha256 of a model file (None for an installed module)."""
    target = reference.rpartition(":")[0]
    path = Path(target)
    return (
        hashlib.sha256(path.read_bytes()).hexdigest()
        if target.endswith(".py") and path.is_file()
        else None
    )
