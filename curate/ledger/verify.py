"""Verification: recompute every content hash, record hash, policy text and the event chain.

Tells an edited point, edited metadata, a deleted, reordered or edited event, a deleted version
and an edited or missing policy apart, and names the first broken link of each kind. Given a
head kept outside the catalog (``verify --head``/``--against``), it also tells a cut tail,
which no chain can see from the inside.

Policies: a policy's own sha256 covers its normalised settings (what it does), so it cannot
tell an edited text whose settings still parse the same, and recomputing it would need the
weighting rules, which sit above the ledger (and may change between releases). Instead every
run event that names a policy also seals ``policy_text_sha256``, the sha256 of the exact text
the catalog keeps for it (:func:`curate.ledger.provenance.text_sha256`); verify recomputes
that hash of each stored text and names the policy whose text no longer matches, a run event
naming a policy the catalog no longer holds, and a stored policy no event names. Events
written before the text was sealed name only ``policy_sha256``; a policy named only by such
events is counted in ``unsealed_policies`` (its presence is still checked, its text cannot be).

Stored PEtab problems (:mod:`curate.ledger.problems`): each version's record hash is
recomputed from its id, number, source and manifest and compared with the ``problem`` event
that wrote it; each file the manifest names must be stored, and its bytes must still have the
sha256 they are stored under. So an edited byte of a stored SBML file or table, an edited
manifest, a deleted problem row or file, and a problem row no event wrote are each named.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from typing import Any

from curate.ledger.problems import EVENT_KIND as PROBLEM_EVENT
from curate.ledger.problems import problem_content_hash, problem_record_hash
from curate.ledger.provenance import (
    GENESIS,
    ChainHead,
    Event,
    batch_entries,
    head_problem,
    text_sha256,
    verify_chain,
)
from curate.ledger.store import Store
from curate.records import DatasetRecord, as_given_hash, content_hash, record_hash

__all__ = ["VerifyReport", "verify_store"]


@dataclass
class VerifyReport:
    """What ``verify`` recomputed and the first thing that did not hold."""

    datasets: int = 0
    versions: int = 0
    events: int = 0
    series: int = 0
    policies: int = 0
    stored_problems: int = 0  # PEtab problem versions
    problem_files: int = 0
    sqlite: str = "ok"
    problems: list[str] = field(default_factory=list)
    head_seq: int = 0
    head_hash: str = ""
    anchor: ChainHead | None = None  # the head kept elsewhere that was checked, if any
    unsealed_policies: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        """Tell whether everything held."""
        return not self.problems and self.sqlite == "ok"

    def to_dict(self) -> dict[str, Any]:
        """Give the report as plain data."""
        return {
            "ok": self.ok,
            "datasets": self.datasets,
            "versions": self.versions,
            "events": self.events,
            "series": self.series,
            "sqlite": self.sqlite,
            "problems": self.problems,
            "policies": self.policies,
            "stored_problems": self.stored_problems,
            "problem_files": self.problem_files,
            "unsealed_policies": self.unsealed_policies,
            "head": {"seq": self.head_seq, "hash": self.head_hash},
            "anchor": None if self.anchor is None else self.anchor.to_dict(),
        }


def verify_store(store: Store, head: ChainHead | None = None) -> VerifyReport:
    """Give the result of recomputing every content hash, record hash, policy text and the
    event chain; with ``head``, also whether the catalog still extends that head."""
    report = VerifyReport(sqlite=store.integrity_check(), anchor=head)
    rows = store.all_versions()
    report.versions = len(rows)
    report.datasets = len({r.dataset_id for r in rows})
    sealed_by_version: dict[tuple[str, int], str] = {}
    checked: dict[tuple[str, str], bool] = {}
    checked_given: dict[str, bool] = {}
    for row in rows:
        name = f"dataset {row.dataset_id} version {row.version}"
        if record_hash(row.dataset_id, row.version, row.record_json) != row.record_hash:
            report.problems.append(
                f"{name}: its metadata no longer match their record hash (edited in the file)"
            )
            continue
        try:
            record = DatasetRecord.model_validate_json(row.record_json)
        except Exception as err:
            report.problems.append(f"{name}: its record does not validate ({err})")
            continue
        if (
            record.content_hash != row.content_hash
            or record.observable.id != row.observable
            or record.source.lab != row.lab
            or bool(record.retired) != row.retired
            or (record.trust.grade if record.trust else None) != row.grade
        ):
            report.problems.append(
                f"{name}: the searchable columns disagree with its record (edited in the file)"
            )
            continue
        key = (row.content_hash, record.observable.unit)
        if key not in checked:
            try:
                arrays = store.series(row.content_hash)
                checked[key] = (
                    content_hash(arrays, value_unit=record.observable.unit) == row.content_hash
                    and len(arrays) == record.n_points
                )
            except Exception:
                checked[key] = False
        if not checked[key]:
            report.problems.append(
                f"{name}: its measured values no longer match content hash "
                f"{row.content_hash[:12]} (a value was changed or removed)"
            )
        given = record.as_given
        if given is not None and given != row.content_hash:
            if given not in checked_given:
                try:
                    checked_given[given] = as_given_hash(store.series(given)) == given
                except Exception:
                    checked_given[given] = False
            if not checked_given[given]:
                report.problems.append(
                    f"{name}: the numbers as the file gave them no longer match hash "
                    f"{given[:12]} (a value was changed or removed)"
                )
        sealed_by_version[(row.dataset_id, row.version)] = row.record_hash
    report.series = len({k[0] for k in checked})
    events = store.events()
    report.events = len(events)
    # from the events read, not a second query: a writer may append in between
    report.head_seq, report.head_hash = (
        (events[-1].seq, events[-1].hash) if events else (0, GENESIS)
    )
    problem = verify_chain(events)
    if problem is not None:
        report.problems.append(f"event log: {problem.message}")
    logged: dict[tuple[str, int], str] = {}
    for event in events:
        if event.dataset_id is not None and event.version is not None:
            logged[(event.dataset_id, event.version)] = str(event.payload.get("record_hash"))
        for entry in batch_entries(event):  # a batch: one event names many versions
            version = entry.get("version")
            written = (str(entry.get("dataset_id")), version if isinstance(version, int) else 0)
            logged[written] = str(entry.get("record_hash"))
    for version_key, sealed in sealed_by_version.items():
        if logged.get(version_key) != sealed:
            report.problems.append(
                f"dataset {version_key[0]} version {version_key[1]}: no event in the log "
                "records this version as written"
            )
    for logged_key in logged:
        if logged_key not in sealed_by_version and not any(
            p.startswith(f"dataset {logged_key[0]} version {logged_key[1]}:")
            for p in report.problems
        ):
            report.problems.append(
                f"dataset {logged_key[0]} version {logged_key[1]}: logged as written "
                "but missing from the file (deleted?)"
            )
    _verify_policies(store, events, report)
    _verify_problems(store, events, report)
    if head is not None:
        cut = head_problem(events, head)
        if cut is not None:
            report.problems.append(cut)
    return report


def _verify_policies(store: Store, events: list[Event], report: VerifyReport) -> None:
    stored = store.policies()
    report.policies = len(stored)
    held = {p.sha256 for p in stored}
    naming: dict[str, list[Event]] = {}
    for event in events:
        named = event.payload.get("policy_sha256")
        if isinstance(named, str):
            naming.setdefault(named, []).append(event)
    for named, by in naming.items():
        if named not in held:
            report.problems.append(
                f"event {by[0].seq} ({by[0].kind}) names policy {named[:12]}, which the "
                "catalog no longer holds (deleted from the file?)"
            )
    for policy in stored:
        name = f"policy '{policy.name}' ({policy.sha256[:12]})"
        by = naming.get(policy.sha256, [])
        if not by:
            report.problems.append(f"{name}: stored, but no event names it (inserted in the file?)")
            continue
        sealed = [e for e in by if "policy_text_sha256" in e.payload]
        if not sealed:
            report.unsealed_policies.append(policy.name)
            continue
        actual = text_sha256(policy.text)
        broken = next((e for e in sealed if e.payload["policy_text_sha256"] != actual), None)
        if broken is not None:
            report.problems.append(
                f"{name}: its stored text no longer matches the hash sealed in event "
                f"{broken.seq} (edited in the file)"
            )


def _verify_problems(store: Store, events: list[Event], report: VerifyReport) -> None:
    rows = store.problem_rows()
    report.stored_problems = len(rows)
    logged: dict[tuple[str, int], str] = {}
    sealed_files: set[str] = set()  # every file a problem event names
    for event in events:
        if event.kind == PROBLEM_EVENT:
            payload = event.payload
            version = payload.get("problem_version")
            key = (str(payload.get("problem_id")), version if isinstance(version, int) else 0)
            logged[key] = str(payload.get("record_hash"))
            files = payload.get("files")
            sealed_files |= set(files.values()) if isinstance(files, dict) else set()
    named: set[str] = set()
    intact: dict[str, bool] = {}
    for sha, content in store.iter_problem_files():
        intact[sha] = hashlib.sha256(content).hexdigest() == sha
    report.problem_files = len(intact)
    for row in rows:
        name = f"problem {row.problem_id} version {row.version}"
        logged_hash = logged.pop((row.problem_id, row.version), None)
        try:
            manifest = json.loads(row.manifest_json)
            ok = isinstance(manifest, dict) and all(isinstance(v, str) for v in manifest.values())
        except json.JSONDecodeError:
            ok = False
        if (
            not ok
            or problem_record_hash(row.problem_id, row.version, row.source, row.manifest_json)
            != row.record_hash
            or problem_content_hash(manifest) != row.content_sha256
        ):
            report.problems.append(
                f"{name}: its id, source or manifest no longer match its record hash "
                "(edited in the file)"
            )
            continue
        if logged_hash != row.record_hash:
            report.problems.append(f"{name}: no event in the log records this version as written")
        for file_name, sha in manifest.items():
            named.add(sha)
            if sha not in intact:
                report.problems.append(
                    f"{name}: file '{file_name}' ({sha[:12]}) is missing from the catalog "
                    "(deleted?)"
                )
            elif not intact[sha]:
                report.problems.append(
                    f"{name}: file '{file_name}' no longer matches its sha256 {sha[:12]} "
                    "(edited in the file)"
                )
    for problem_id, version in logged:
        report.problems.append(
            f"problem {problem_id} version {version}: logged as written but missing from the "
            "file (deleted?)"
        )
    # a file of a deleted problem row is explained by that row's line above
    for sha in sorted(set(intact) - named - sealed_files):
        report.problems.append(
            f"problem file {sha[:12]}: stored, but no stored problem names it "
            "(inserted in the file, or its problem deleted?)"
        )
