"""Intake of a whole folder: log every valid data file, quarantine every bad one with a reason.

Each file is its own transaction, so a killed intake leaves every file either fully logged or
still waiting in the folder, and a rerun logs the rest (already logged data are recognised by
their content hash and not added twice). What the run knows of the catalog (duplicates by
content hash, ids, typical values, units, condition kinds) is read once and kept in step with
each file logged, so a folder of N files costs O(N log N), not O(N^2) (see ``_KeptIndex``). A bad file is moved, with its sidecar and a
``.reason.txt`` beside it, into the quarantine folder: nothing is deleted.

When a file of the same name is logged later (the fixed version, put back into the folder),
the old quarantine entry's ``NAME.reason.txt`` is renamed ``NAME.resolved.txt`` with a last
line saying which dataset it became and when, so the quarantine shows only what still waits
for a person; the quarantined copy of the bad file stays, as everything does.
"""

from __future__ import annotations

import datetime as dt
import os
import re
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from curate.errors import CurateError, InputError
from curate.ingest.files import Draft, build_draft
from curate.ingest.sidecar import load_sidecar
from curate.ingest.tables import DATA_SUFFIXES
from curate.ledger.catalog import AddResult, Ledger
from curate.ledger.context import ActionContext
from curate.records import DatasetVersion

__all__ = ["IntakeItem", "IntakeReport", "intake_folder"]

QUARANTINE = "quarantine"


@dataclass(frozen=True)
class IntakeItem:
    """What happened to one file."""

    file: str
    status: str  # added | duplicate | quarantined | refused
    id: str | None = None
    reason: str | None = None
    warnings: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        """Give the item as plain data."""
        return {
            "file": self.file,
            "status": self.status,
            "id": self.id,
            "reason": self.reason,
            "warnings": list(self.warnings),
        }


@dataclass
class IntakeReport:
    """The outcome of one folder intake."""

    folder: str
    quarantine: str
    items: list[IntakeItem] = field(default_factory=list)

    def count(self, status: str) -> int:
        """Give how many files ended with ``status``."""
        return sum(1 for item in self.items if item.status == status)

    def to_dict(self) -> dict[str, Any]:
        """Give the report as plain data."""
        return {
            "folder": self.folder,
            "quarantine": self.quarantine,
            "added": self.count("added"),
            "duplicate": self.count("duplicate"),
            "quarantined": self.count("quarantined"),
            "refused": self.count("refused"),
            "items": [i.to_dict() for i in self.items],
        }


class _KeptIndex:
    """What one intake run knows of the catalog: built once, kept in step file by file.

    The index (an ``ActionContext``) stands for the catalog at one chain head. Each file's
    transaction compares the head first, under the write lock, so no other writer can slip in
    before it commits; when another writer moved the head since, the index is built afresh
    from the catalog. A logged file joins the index only after its transaction committed, and
    only when it wrote the one event an add writes (a file that supersedes another writes a
    second version, which a fresh build reads whole); a file that fails or is quarantined
    leaves it as it was, and one that failed after its plan was made (which moves the id
    cursor) has it built afresh for the next file.
    """

    def __init__(self, catalog: Ledger) -> None:
        self._catalog = catalog
        self._context: ActionContext | None = None
        self._head: tuple[int, str] | None = None
        self.builds = 0  # how often the index was read from the catalog (tests count them)

    def for_this_file(self) -> ActionContext:
        """Give the index as the catalog stands now (call inside the file's transaction)."""
        head = self._catalog.head()
        if self._context is None or head != self._head:
            self._context = ActionContext(self._catalog.store)
            self._head = head
            self.builds += 1
        return self._context

    def log(self, draft: Draft) -> AddResult:
        """Log one draft in its own transaction; bring the index to the new head after it."""
        planned = False
        joined: DatasetVersion | None = None
        try:
            with self._catalog.transaction():
                context = self.for_this_file()
                before = self._head
                plan = self._catalog.plan_add(draft, context)
                planned = True
                result = self._catalog.apply(plan)
                after = self._catalog.head()
                if result.added:
                    one_event = before is not None and after[0] == before[0] + 1
                    if one_event and plan.record.supersedes is None:
                        joined = self._catalog.show(result.id)
                    else:  # more than one add wrote: the next file reads the catalog afresh
                        self._context = None
        except BaseException:
            if planned:
                self._context = None
            raise
        if joined is not None and self._context is not None:
            self._context.remember(joined)
            self._head = after
        return result


def _inside(folder: Path, path: Path) -> bool:
    return path.resolve().is_relative_to(folder.resolve())


def _free_name(target: Path) -> Path:
    if not target.exists():
        return target
    stem, suffix = target.stem, target.suffix
    for k in range(1, 10_000):
        candidate = target.with_name(f"{stem}.{k}{suffix}")
        if not candidate.exists():
            return candidate
    raise InputError(f"{target.parent}: too many quarantined files named {target.name}")


def _quarantine(files: list[Path], reason: str, quarantine: Path) -> None:
    quarantine.mkdir(parents=True, exist_ok=True)
    main = files[0]
    note = _free_name(quarantine / f"{main.name}.reason.txt")
    temporary = note.with_name(note.name + ".part")
    stamp = dt.datetime.now(dt.UTC).isoformat(timespec="seconds")
    temporary.write_text(f"{main.name}\n{stamp}\n{reason}\n", encoding="utf-8")
    os.replace(temporary, note)
    for path in files:
        if path.exists() or path.is_symlink():
            os.replace(path, _free_name(quarantine / path.name))


def _resolve_quarantined(name: str, dataset_id: str, quarantine: Path) -> None:
    """Rename the reason notes of an earlier bad ``name`` to ``.resolved.txt``, saying why."""
    if not quarantine.is_dir():
        return
    pattern = re.compile(re.escape(name) + r"\.reason(?:\.\d+)?\.txt")
    stamp = dt.datetime.now(dt.UTC).isoformat(timespec="seconds")
    for note in sorted(quarantine.iterdir()):
        if not pattern.fullmatch(note.name) or not note.is_file():
            continue
        resolved = _free_name(quarantine / f"{name}.resolved.txt")
        with note.open("a", encoding="utf-8") as stream:
            stream.write(f"resolved {stamp}: {name} was logged later as {dataset_id}\n")
        os.replace(note, resolved)


def _default_lab(sidecar: Path | None, lab: str | None) -> dict[str, Any]:
    """Give the options that set ``lab`` where the sidecar names no lab (else nothing)."""
    if not lab or not lab.strip():
        return {}
    content = load_sidecar(sidecar) if sidecar is not None else {}
    source = content.get("source")
    if source is not None and not isinstance(source, dict):
        return {}  # a malformed [source] is the sidecar's error to report, not to paper over
    named = (source or {}).get("lab")
    if named is None or (isinstance(named, str) and not named.strip()):
        return {"source": {"lab": lab.strip()}}
    return {}


def intake_folder(
    catalog: Ledger,
    folder: str | Path,
    *,
    quarantine: str | Path | None = None,
    lab: str | None = None,
    progress: Callable[[int, int, str], None] | None = None,
) -> IntakeReport:
    """Log every data file in ``folder``; give what happened to each.

    ``lab`` is the source lab of every file whose sidecar names none (a sidecar's own lab
    always wins).
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"{folder}: not a folder")
    jail = Path(quarantine) if quarantine is not None else folder / QUARANTINE
    report = IntakeReport(folder=str(folder), quarantine=str(jail))

    entries = sorted(
        p for p in folder.iterdir() if p.name != jail.name and not p.name.startswith(".")
    )
    sidecar_for: dict[Path, Path] = {}
    sidecars = [p for p in entries if p.suffix.lower() == ".toml"]
    data_files = [p for p in entries if p.suffix.lower() in DATA_SUFFIXES]
    jobs: list[tuple[Path, Path | None, str | None]] = []  # data, sidecar, error before reading
    refused: list[IntakeItem] = []
    for path in entries:
        if path.is_symlink() and not _inside(folder, path):
            refused.append(
                IntakeItem(
                    file=path.name,
                    status="refused",
                    reason="a symbolic link leading outside the folder",
                )
            )
    outside = {folder / item.file for item in refused}
    for sidecar in sidecars:
        if sidecar in outside:
            continue
        try:
            name = load_sidecar(sidecar).get("data_file")
        except CurateError as err:
            jobs.append((sidecar, None, str(err)))
            continue
        if isinstance(name, str) and name:
            target = folder / name
            if Path(name).is_absolute() or ".." in Path(name).parts or not _inside(folder, target):
                jobs.append(
                    (sidecar, None, f"{sidecar}, field 'data_file': '{name}' is outside the folder")
                )
            elif not target.is_file():
                jobs.append(
                    (
                        sidecar,
                        None,
                        f"{sidecar}, field 'data_file': the data file '{name}' does not exist",
                    )
                )
            else:
                sidecar_for[target] = sidecar
    for data in data_files:
        if data in outside:
            continue
        paired = sidecar_for.get(data)
        if paired is None and data.with_suffix(".toml").is_file():
            paired = data.with_suffix(".toml")
        jobs.append((data, paired, None))
    jobs.sort(key=lambda job: job[0].name)

    report.items.extend(refused)
    kept = _KeptIndex(catalog)
    total = len(jobs)
    for done, (data, job_sidecar, early_error) in enumerate(jobs):
        if progress is not None:
            progress(done, total, data.name)
        companions = [data] + ([job_sidecar] if job_sidecar is not None else [])
        try:
            if early_error is not None:
                raise InputError(early_error)
            options = _default_lab(job_sidecar, lab)
            draft = build_draft(data, sidecar=job_sidecar, options=options, actor=catalog.actor)
            result = kept.log(draft)
        except CurateError as err:
            _quarantine(companions, str(err), jail)
            report.items.append(IntakeItem(file=data.name, status="quarantined", reason=str(err)))
            continue
        _resolve_quarantined(data.name, result.id, jail)
        report.items.append(
            IntakeItem(
                file=data.name,
                status="added" if result.added else "duplicate",
                id=result.id,
                reason=None if result.added else f"identical to {result.duplicate_of}",
                warnings=result.warnings,
            )
        )
    if progress is not None:
        progress(total, total, "")
    return report
