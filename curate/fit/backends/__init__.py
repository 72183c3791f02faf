"""Model backends by kind: every way curate runs a model goes through one protocol.

- ``python``: a Python function, in process or rebuilt in workers from its reference;
- ``external``: a program that fits the exported table itself;
- ``petab-sbml``: a stored PEtab problem, its SBML model simulated with libroadrunner (imported
  on first use, so that importing curate does not load libroadrunner).

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
    if kind == "petab-sbml" and kind not in BACKENDS:  # sympy and libroadrunner load on first use
        from curate.fit.backends.petab_sbml import PetabSbml

        BACKENDS[kind] = PetabSbml
    backend = BACKENDS.get(kind)
    if backend is None:
        known = ", ".join(sorted({*BACKENDS, "petab-sbml"}))
        raise InputError(f"unknown model backend '{kind}'; known: {known}")
    return backend.from_description(description)
