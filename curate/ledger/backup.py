"""Backups and restores: a verified copy of the catalog, and putting one back in place.

``backup`` uses SQLite's online backup (other processes may keep writing) and verifies the copy
before it takes the final name; ``restore`` verifies the backup first and keeps the catalog it
replaces beside it. Nothing is ever deleted.
"""

from __future__ import annotations

import datetime as dt
import os
import shutil
from pathlib import Path

from curate.errors import InputError, IntegrityError
from curate.ledger.catalog import DEFAULT_CATALOG, Ledger
from curate.ledger.verify import VerifyReport

__all__ = ["backup_catalog", "restore_catalog"]


def _first_problem(report: VerifyReport) -> str:
    return report.problems[0] if report.problems else report.sqlite


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
    with Ledger(source) as candidate:
        report = candidate.verify()
    if not report.ok:
        raise IntegrityError(
            f"{source}: the backup does not verify ({_first_problem(report)}); nothing restored"
        )
    target = Path(catalog_path or os.environ.get("CURATE_CATALOG") or DEFAULT_CATALOG)
    staged = target.with_name(target.name + ".restoring")
    shutil.copyfile(source, staged)
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
