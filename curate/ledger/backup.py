"""Backups and restores: a verified copy of the catalog, and putting one back in place.

``backup`` uses SQLite's online backup (other processes may keep writing) and verifies the copy
before it takes the final name; ``restore`` verifies the backup first and keeps the catalog it
replaces beside it. Nothing is ever deleted.

A backup records the chain head it was taken at (its own newest event, printed by ``backup``);
:func:`backup_head` reads it back without writing to the file, so ``verify --against BACKUP``
tells whether the catalog still extends it.
"""

from __future__ import annotations

import datetime as dt
import os
import shutil
from pathlib import Path

from curate.errors import CatalogError, InputError, IntegrityError
from curate.ledger.catalog import DEFAULT_CATALOG, Ledger
from curate.ledger.provenance import GENESIS, ChainHead, verify_chain
from curate.ledger.store import read_chain
from curate.ledger.verify import VerifyReport

__all__ = ["backup_catalog", "backup_head", "is_catalog_file", "restore_catalog"]

_SQLITE_MAGIC = b"SQLite format 3\x00"


def is_catalog_file(path: str | Path) -> bool:
    """Tell whether ``path`` is an SQLite file (a catalog or a backup of one)."""
    file = Path(path)
    if not file.is_file():
        return False
    with file.open("rb") as handle:
        return handle.read(len(_SQLITE_MAGIC)) == _SQLITE_MAGIC


def backup_head(path: str | Path) -> tuple[str, ChainHead]:
    """Give (catalog id, chain head) a backup was taken at, read without writing to it.

    The backup's own event chain must hold, or its head vouches for nothing (IntegrityError).
    """
    file = Path(path)
    if not is_catalog_file(file):
        raise InputError(f"{file}: not a backup made by `curate backup` (not an SQLite file)")
    catalog_id, events = read_chain(file)
    problem = verify_chain(events)
    if problem is not None:
        raise IntegrityError(
            f"{file}: the backup's own event log does not hold ({problem.message}); "
            "it cannot vouch for a head"
        )
    last = events[-1] if events else None
    head = ChainHead(
        last.seq if last else 0, last.hash if last else GENESIS, source=f"backup {file}"
    )
    return catalog_id, head


def _first_problem(report: VerifyReport) -> str:
    return report.problems[0] if report.problems else report.sqlite


def _remove(path: Path, *, keep_main: bool = False) -> None:
    """Remove a staged SQLite file's write-ahead companions (and the file unless kept)."""
    for suffix in ("-wal", "-shm"):
        Path(str(path) + suffix).unlink(missing_ok=True)
    if not keep_main:
        path.unlink(missing_ok=True)


def backup_catalog(ledger: Ledger, destination: str | Path, *, force: bool = False) -> VerifyReport:
    """Write a verified copy of the catalog to ``destination`` (while others may write)."""
    target = Path(destination)
    if target.exists() and not force:
        raise InputError(f"{target}: exists; choose a new file name or pass --force")
    if not target.parent.is_dir():
        raise InputError(f"{target.parent}: no such folder")
    partial = target.with_name(target.name + ".part")
    partial.unlink(missing_ok=True)
    try:
        ledger.store.backup_to(partial)
        with Ledger(partial, actor=ledger.actor) as copy:
            report = copy.verify()
        if not report.ok:
            raise IntegrityError(
                f"{target}: the copy does not verify ({_first_problem(report)}); nothing written"
            )
        os.replace(partial, target)
    finally:
        partial.unlink(missing_ok=True)
    return report


def restore_catalog(
    backup: str | Path, catalog_path: str | Path | None = None
) -> tuple[Path, Path | None]:
    """Put a verified backup in place of the catalog; give (catalog, where the old one went).

    The current catalog is kept beside it as ``NAME.before-restore-TIMESTAMP``; nothing is
    deleted. Stop other writers first.
    """
    source = Path(backup)
    if not source.is_file():
        raise InputError(f"{source}: no such backup file")
    target = Path(catalog_path or os.environ.get("CURATE_CATALOG") or DEFAULT_CATALOG)
    staged = target.with_name(target.name + ".restoring")
    if not is_catalog_file(source):
        raise InputError(f"{source}: not a catalog backup (not an SQLite file); nothing restored")
    shutil.copyfile(source, staged)  # verified as a copy: the backup file itself stays untouched
    try:
        with Ledger(staged) as candidate:
            report = candidate.verify()
            candidate.store.checkpoint()
    except CatalogError as err:
        _remove(staged)
        reason = str(err).removeprefix(f"{staged}: ")
        raise IntegrityError(f"{source}: {reason}; nothing restored") from None
    if not report.ok:
        _remove(staged)
        raise IntegrityError(
            f"{source}: the backup does not verify ({_first_problem(report)}); nothing restored"
        )
    _remove(staged, keep_main=True)
    kept = None
    if target.exists():
        stamp = dt.datetime.now(dt.UTC).strftime("%Y%m%dT%H%M%SZ")
        kept = target.with_name(f"{target.name}.before-restore-{stamp}")
        with Ledger(target) as old:
            old.store.checkpoint()
        os.replace(target, kept)
        for suffix in ("-wal", "-shm"):
            Path(str(target) + suffix).unlink(missing_ok=True)
    os.replace(staged, target)
    return target, kept
