"""The one exception tree of curate.

::

    CurateError                 anything the user can fix; the CLI prints str(err), exits 2
    ├── InputError              a file, cell, option or sidecar field is not what is expected
    │   ├── UnitError           a unit string is unknown or has the wrong dimension
    │   └── SimulationFailed    a model's ODEs could not be integrated at given parameters
    ├── NotFoundError           a dataset id or version the catalog does not hold
    ├── CatalogError            the catalog file cannot be opened or written as asked
    └── IntegrityError          stored data no longer matches its hashes (tampering, corruption)

Every message says what is wrong, where (file, line, column or field), the rule, and where
useful the remedy, in one line.
"""

from __future__ import annotations

from pathlib import Path

__all__ = [
    "CatalogError",
    "CurateError",
    "InputError",
    "IntegrityError",
    "NotFoundError",
    "SimulationFailed",
    "UnitError",
    "where",
]


class CurateError(Exception):
    """Base of every error a user can act on."""


class InputError(CurateError):
    """Input (file content, sidecar field, command option) that breaks a stated rule."""


class UnitError(InputError):
    """A unit string pint does not know, or a unit of the wrong dimension for its role."""


class SimulationFailed(InputError):
    """The ODE solver failed at some parameters (a fit records a failed start, not a crash)."""


class NotFoundError(CurateError):
    """A dataset id, version or file that does not exist."""


class CatalogError(CurateError):
    """The catalog cannot be opened, migrated or written."""


class IntegrityError(CurateError):
    """Stored content no longer matches its recorded hashes."""


def where(
    path: str | Path | None = None,
    *,
    line: int | None = None,
    column: str | None = None,
    field: str | None = None,
) -> str:
    """Give the location prefix of an error message: ``file, line 4, column 'value': ``."""
    parts: list[str] = []
    if path is not None:
        parts.append(str(path))
    if line is not None:
        parts.append(f"line {line}")
    if column is not None:
        parts.append(f"column '{column}'")
    if field is not None:
        parts.append(f"field '{field}'")
    return (", ".join(parts) + ": ") if parts else ""
