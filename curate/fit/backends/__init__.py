"""Model backends by kind: every way curate runs a model goes through one protocol.

- ``python``: a Python function, in process or rebuilt in workers from its reference;
- ``external``: a program that fits the exported table itself.

Adding a backend is one module with a :class:`ModelBackend` subclass and one entry in
:data:`BACKENDS`.
"""

from __future__ import annotations

from typing import Any

from curate.errors import InputError
from curate.fit.backends.base import ExternalFit, ModelBackend, PointEvaluation
from curate.fit.backends.external import ExternalFitter
from curate.fit.backends.python import PythonFunction

__all__ = [
    "BACKENDS",
    "ExternalFit",
    "ExternalFitter",
    "ModelBackend",
    "PointEvaluation",
    "PythonFunction",
    "rebuild",
]

BACKENDS: dict[str, type[ModelBackend]] = {
    PythonFunction.kind: PythonFunction,
    ExternalFitter.kind: ExternalFitter,
}


def rebuild(description: dict[str, Any]) -> ModelBackend:
    """Give the backend a run record (or a worker task) describes."""
    kind = str(description.get("kind", ""))
    backend = BACKENDS.get(kind)
    if backend is None:
        raise InputError(f"unknown model backend '{kind}'; known: {', '.join(sorted(BACKENDS))}")
    return backend.from_description(description)
