"""The one table style every command prints: no borders, bold header, numbers right-aligned.

Change how the terminal shows a table here and every command follows.
"""

from __future__ import annotations

from collections.abc import Container, Iterable

from rich.table import Table

__all__ = ["field_table", "table"]


def table(columns: Iterable[str], *, right: Container[str] = ()) -> Table:
    """Give an empty table with these columns; those in ``right`` are right-aligned."""
    shown = Table(box=None, pad_edge=False, header_style="bold")
    for name in columns:
        shown.add_column(name, justify="right" if name in right else "left")
    return shown


def field_table() -> Table:
    """Give an empty two-column table of field names (dim) and values, without a header."""
    shown = Table(box=None, show_header=False, pad_edge=False)
    shown.add_column(style="dim")
    shown.add_column()
    return shown
