"""The PEtab simulation table of a fit: the measurement rows with the model's ``simulation``.

PEtab v1 defines the simulation table as the measurement table's columns with ``simulation``
in place of (here: beside) ``measurement``; tools compare it with the measurements and plot it.
Numbers are written at full precision (the shortest text that reads back to the same float).
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from curate.errors import InputError
from curate.export.files import write_text

__all__ = ["check_simulation_path", "write_simulation_table"]


def check_simulation_path(path: Path) -> None:
    """Refuse a path the table cannot be written to, before any work is done."""
    if path.is_dir():
        raise InputError(
            f"--simulations {path}: is a folder; expected a file name such as simulations.tsv"
        )
    if not path.parent.is_dir():
        raise InputError(f"--simulations {path}: no folder {path.parent}; create it first")


def write_simulation_table(path: Path, table: pd.DataFrame) -> str:
    """Write the simulation table as TSV atomically; give its sha256."""
    check_simulation_path(path)
    return write_text(path, table.to_csv(sep="\t", index=False, lineterminator="\n"),
                      make_folders=False)  # fmt: skip
