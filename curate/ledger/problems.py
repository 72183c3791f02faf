"""Stored PEtab problems: content-addressed, versioned, sealed in the event chain.

``import-petab`` keeps the problem itself beside its measurements: the YAML and every file it
names (SBML models, condition, observable, parameter, measurement and visualization tables),
byte for byte. Each file is stored once under its sha256 (``problem_files``); a problem version
is a manifest {file name: sha256} (``problems``) whose own sha256 is the problem's content
address, and its record hash binds id, version, source and manifest. Storing a version
appends a ``problem`` event that seals the record hash and the manifest, so ``verify`` can name
an edited byte of a stored file, an edited manifest, and a problem row or file deleted from the
file (see :func:`curate.ledger.verify.verify_store`).

Identity: a problem whose manifest hash is already stored is that stored version (nothing is
written). Otherwise it is the next version of a stored problem when its YAML has the same file
name and its SBML models the same model ids as that problem's newest version (the same
problem, edited: bounds, nominal values, a corrected model); else a new problem, with an id
made like dataset ids, a readable slug of the YAML's name and a number
(``boehm_jproteomeres2014_01``).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import io
import json
import re
from dataclasses import dataclass
from typing import Any

import pandas as pd

from curate.errors import NotFoundError
from curate.ingest.petab import PetabFiles, petab_file_names, sbml_model_id
from curate.ledger.store import ProblemRow, Store
from curate.records import canonical_json

__all__ = [
    "ProblemOutcome",
    "ProblemSummary",
    "StoredProblem",
    "problem_content_hash",
    "problem_record_hash",
    "read_problem",
    "read_problems",
    "store_problem",
    "summarise_problems",
]

EVENT_KIND = "problem"


def problem_content_hash(manifest: dict[str, str]) -> str:
    """Give a problem's content address: the sha256 of its manifest's canonical JSON."""
    return hashlib.sha256(canonical_json(manifest).encode()).hexdigest()


def problem_record_hash(problem_id: str, version: int, source: str, manifest_json: str) -> str:
    """Give the sha256 binding a problem version's id, number and source to its manifest."""
    return hashlib.sha256(f"{problem_id}|{version}|{source}|{manifest_json}".encode()).hexdigest()


def _table(raw: bytes, index: str | None) -> pd.DataFrame:
    # as petab.v1's get_*_df read a table: tab-separated, round-trip floats, indexed by its id
    frame = pd.read_csv(io.BytesIO(raw), sep="\t", float_precision="round_trip")
    return frame.set_index(index) if index is not None else frame


@dataclass(frozen=True)
class StoredProblem:
    """One stored version of a PEtab problem: its files byte for byte, and readings of them.

    ``files`` maps each file name as the YAML gives it (the YAML itself under ``source``, its
    file name) to its bytes. The ``*_df`` properties read the tables as ``petab.v1``'s
    ``get_condition_df`` & co. do (several files of one kind concatenated; the id column as
    index, except for measurement and visualization tables); each call gives a fresh frame.
    """

    id: str
    version: int
    source: str
    files: dict[str, bytes]
    created_at: dt.datetime
    content_sha256: str
    record_hash: str

    @property
    def manifest(self) -> dict[str, str]:
        """Give {file name: sha256 of its bytes}."""
        return {name: hashlib.sha256(raw).hexdigest() for name, raw in self.files.items()}

    @property
    def yaml_text(self) -> str:
        """Give the problem's YAML as stored."""
        return self.files[self.source].decode("utf-8")

    def file_names(self, role: str) -> list[str]:
        """Give the names of the files of one role ('sbml', 'condition', 'observable',
        'parameter', 'measurement', 'visualization'), in the YAML's order."""
        import yaml

        return petab_file_names(yaml.safe_load(self.yaml_text), self.source)[role]

    @property
    def sbml_name(self) -> str | None:
        """Give the file name of the (first) SBML model, None for a problem without one."""
        names = self.file_names("sbml")
        return names[0] if names else None

    @property
    def sbml_bytes(self) -> bytes | None:
        """Give the SBML model's bytes as imported."""
        name = self.sbml_name
        return None if name is None else self.files[name]

    @property
    def sbml_text(self) -> str | None:
        """Give the SBML model as text (UTF-8, as SBML files are written)."""
        raw = self.sbml_bytes
        return None if raw is None else raw.decode("utf-8")

    @property
    def sbml_sha256(self) -> str | None:
        """Give the sha256 of the SBML model's bytes."""
        raw = self.sbml_bytes
        return None if raw is None else hashlib.sha256(raw).hexdigest()

    def _frame(self, role: str, index: str | None) -> pd.DataFrame | None:
        frames = [_table(self.files[name], index) for name in self.file_names(role)]
        if not frames:
            return None
        return frames[0] if len(frames) == 1 else pd.concat(frames)

    @property
    def condition_df(self) -> pd.DataFrame | None:
        """Give the condition table (index conditionId)."""
        return self._frame("condition", "conditionId")

    @property
    def observable_df(self) -> pd.DataFrame | None:
        """Give the observable table (index observableId)."""
        return self._frame("observable", "observableId")

    @property
    def parameter_df(self) -> pd.DataFrame | None:
        """Give the parameter table (index parameterId)."""
        return self._frame("parameter", "parameterId")

    @property
    def measurement_df(self) -> pd.DataFrame | None:
        """Give the measurement table as imported (the datasets hold its rows too)."""
        return self._frame("measurement", None)

    @property
    def visualization_df(self) -> pd.DataFrame | None:
        """Give the visualization table, None if the problem names none."""
        return self._frame("visualization", None)

    def ids(self, role: str) -> list[str]:
        """Give the ids of one table ('condition', 'observable', 'parameter') in file order."""
        frame = {
            "condition": self.condition_df,
            "observable": self.observable_df,
            "parameter": self.parameter_df,
        }[role]
        return [] if frame is None else [str(i) for i in frame.index]


@dataclass(frozen=True)
class ProblemOutcome:
    """What an import did with its problem: stored a new version, or recognised one."""

    id: str
    version: int
    stored: bool
    source: str

    def to_dict(self) -> dict[str, Any]:
        """Give the outcome as plain data."""
        return {"id": self.id, "version": self.version, "stored": self.stored}


@dataclass(frozen=True)
class ProblemSummary:
    """One line of ``curate models``: a stored problem's newest version and its datasets."""

    id: str
    version: int
    source: str
    sbml_sha256: str | None
    parameters: tuple[str, ...]
    observables: tuple[str, ...]
    conditions: tuple[str, ...]
    datasets: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        """Give the summary as plain data (the ``models --json`` item: ids, not counts)."""
        return {
            "id": self.id,
            "source": self.source,
            "sbml_sha256": self.sbml_sha256,
            "parameters": list(self.parameters),
            "observables": list(self.observables),
            "conditions": list(self.conditions),
            "datasets": list(self.datasets),
        }


def summarise_problems(store: Store) -> list[ProblemSummary]:
    """Give a summary of every stored problem (newest version), with the ids of the datasets
    whose newest version was imported from any version of it."""
    linked: dict[str, list[str]] = {}
    for row in store.latest_versions():
        link = json.loads(row.record_json).get("annotations", {}).get("petab_problem")
        if isinstance(link, dict) and isinstance(link.get("id"), str):
            linked.setdefault(link["id"], []).append(row.dataset_id)
    return [
        ProblemSummary(
            id=problem.id,
            version=problem.version,
            source=problem.source,
            sbml_sha256=problem.sbml_sha256,
            parameters=tuple(problem.ids("parameter")),
            observables=tuple(problem.ids("observable")),
            conditions=tuple(problem.ids("condition")),
            datasets=tuple(linked.get(problem.id, ())),
        )
        for problem in read_problems(store)
    ]


def _problem_from_row(row: ProblemRow, files: dict[str, bytes]) -> StoredProblem:
    manifest: dict[str, str] = json.loads(row.manifest_json)
    missing = [name for name, sha in manifest.items() if sha not in files]
    if missing:
        raise NotFoundError(
            f"problem {row.problem_id} version {row.version}: file '{missing[0]}' is missing "
            "from the catalog; `curate verify` tells what else"
        )
    return StoredProblem(
        id=row.problem_id,
        version=row.version,
        source=row.source,
        files={name: files[sha] for name, sha in manifest.items()},
        created_at=dt.datetime.fromisoformat(row.created_at),
        content_sha256=row.content_sha256,
        record_hash=row.record_hash,
    )


def _load(store: Store, row: ProblemRow) -> StoredProblem:
    manifest: dict[str, str] = json.loads(row.manifest_json)
    return _problem_from_row(row, store.problem_files(list(manifest.values())))


def read_problem(store: Store, problem_id: str, version: int | None = None) -> StoredProblem:
    """Give one stored problem version (the newest unless ``version`` is named)."""
    rows = store.problem_rows(problem_id)
    if not rows:
        raise NotFoundError(
            f"no stored problem '{problem_id}' in {store.path}; `curate models` shows the ids"
        )
    if version is None:
        return _load(store, rows[-1])
    for row in rows:
        if row.version == version:
            return _load(store, row)
    raise NotFoundError(
        f"stored problem '{problem_id}' has versions 1 to {rows[-1].version}, not {version}"
    )


def read_problems(store: Store) -> list[StoredProblem]:
    """Give the newest version of every stored problem, ordered by id."""
    newest: dict[str, ProblemRow] = {}
    for row in store.problem_rows():
        newest[row.problem_id] = row  # rows come ordered by id and version
    return [_load(store, row) for row in newest.values()]


def _slug(text: str) -> str:
    slug = re.sub(r"[^a-z0-9]+", "_", text.lower()).strip("_")[:40].strip("_") or "problem"
    return slug if slug[0].isalpha() else f"p_{slug}"


def _stem(source: str) -> str:
    return source.rsplit(".", 1)[0] if "." in source else source


def _same_problem(store: Store, files: PetabFiles, rows: list[ProblemRow]) -> str | None:
    """Give the id of the stored problem ``files`` is a new version of, or None."""
    if not files.model_ids:
        return None
    newest: dict[str, ProblemRow] = {}
    for row in rows:
        if row.source == files.source:
            newest[row.problem_id] = row
    for problem_id, row in newest.items():
        stored = _load(store, row)
        ids = tuple(sbml_model_id(name, stored.files[name]) for name in stored.file_names("sbml"))
        if ids == files.model_ids:
            return problem_id
    return None


def store_problem(store: Store, files: PetabFiles, *, actor: str) -> ProblemOutcome:
    """Store a problem's files and manifest as a new version, or recognise a stored version
    with the same content; call inside a transaction (the import's)."""
    manifest = files.manifest()
    content = problem_content_hash(manifest)
    known = store.problems_with_content(content)
    if known:
        return ProblemOutcome(known[0].problem_id, known[0].version, False, known[0].source)
    rows = store.problem_rows()
    problem_id = _same_problem(store, files, rows)
    if problem_id is None:
        prefix = _slug(_stem(files.source)) + "_"
        taken = {row.problem_id for row in rows}
        number = 1
        while f"{prefix}{number:02d}" in taken:
            number += 1
        problem_id, version = f"{prefix}{number:02d}", 1
    else:
        version = max(r.version for r in rows if r.problem_id == problem_id) + 1
    manifest_json = canonical_json(manifest)
    sealed = problem_record_hash(problem_id, version, files.source, manifest_json)
    for name, raw in files.files.items():
        store.put_problem_file(manifest[name], raw)
    store.put_problem(
        ProblemRow(
            problem_id=problem_id,
            version=version,
            created_at=dt.datetime.now(dt.UTC).isoformat(),
            source=files.source,
            content_sha256=content,
            manifest_json=manifest_json,
            record_hash=sealed,
        )
    )
    store.append_event(
        EVENT_KIND,
        {
            "problem_id": problem_id,
            "problem_version": version,
            "source": files.source,
            "content_sha256": content,
            "record_hash": sealed,
            "files": manifest,
        },
        actor=actor,
    )
    return ProblemOutcome(problem_id, version, True, files.source)
