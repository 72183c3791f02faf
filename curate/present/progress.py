"""The progress bar long commands show on a terminal (nothing when piped or asked for JSON)."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

__all__ = ["progress_bar"]


@contextmanager
def progress_bar(console: Console, label: str, *, enabled: bool) -> Iterator[Callable[..., None]]:
    """Give ``update(done, total, name)`` drawing a transient bar on ``console`` while in use."""
    columns = [TextColumn(label), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
               TextColumn("{task.description}")]  # fmt: skip
    with Progress(*columns, console=console, transient=True, disable=not enabled) as bar:
        task = bar.add_task("", total=None)

        def update(done: int, total: int, name: str = "") -> None:
            bar.update(task, completed=done, total=total, description=name)

        yield update
