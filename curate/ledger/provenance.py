"""The event chain: every change to the catalog as an append-only, hash-linked event.

Event k stores ``prev_hash`` = hash of event k-1 (``GENESIS`` for the first) and its own
``hash`` = sha256 over the canonical JSON of (seq, at, actor, kind, dataset_id, version,
payload, prev_hash). Editing, deleting or reordering any event breaks a link that
:func:`verify_chain` names.

A chain alone cannot see a cut tail: delete the newest events (and the versions they wrote)
and what remains is a shorter chain that holds. So the head, (seq, hash) of the newest event,
is kept outside the catalog (every export manifest and every backup records it, ``verify``
prints it), and :func:`head_problem` tells whether the catalog still extends a kept head: the
event at that seq must still be there with that hash. This is the anchor transparency logs
use (a published signed tree head, RFC 9162 section 2.2), without the signature: whoever
keeps the head vouches for it.
"""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass
from typing import Any

from curate.errors import InputError
from curate.records import canonical_json

__all__ = [
    "BATCH_EVENT",
    "BATCH_FIELDS",
    "GENESIS",
    "ChainHead",
    "ChainProblem",
    "Event",
    "batch_entries",
    "event_hash",
    "head_problem",
    "parse_head",
    "text_sha256",
    "verify_chain",
]

GENESIS = "0" * 64
# the event that seals a batch of new datasets at once (``Ledger.add_drafts(batch=True)``):
# its payload's "datasets" holds one list per dataset, with these fields in this order
BATCH_EVENT = "add_batch"
BATCH_FIELDS = ("dataset_id", "version", "record_hash", "content_hash", "origin", "raw_file_sha256")


@dataclass(frozen=True)
class Event:
    """One entry of the catalog's event log."""

    seq: int
    at: str
    actor: str
    kind: str
    dataset_id: str | None
    version: int | None
    payload: dict[str, Any]
    prev_hash: str
    hash: str

    def to_dict(self) -> dict[str, Any]:
        """Give the event as a plain dict."""
        return {
            "seq": self.seq,
            "at": self.at,
            "actor": self.actor,
            "kind": self.kind,
            "dataset_id": self.dataset_id,
            "version": self.version,
            "payload": self.payload,
            "prev_hash": self.prev_hash,
            "hash": self.hash,
        }


def event_hash(
    *,
    seq: int,
    at: str,
    actor: str,
    kind: str,
    dataset_id: str | None,
    version: int | None,
    payload: dict[str, Any],
    prev_hash: str,
) -> str:
    """Give the sha256 hex digest that seals one event to its predecessor."""
    body = canonical_json(
        {
            "seq": seq,
            "at": at,
            "actor": actor,
            "kind": kind,
            "dataset_id": dataset_id,
            "version": version,
            "payload": payload,
            "prev_hash": prev_hash,
        }
    )
    return hashlib.sha256(body.encode()).hexdigest()


@dataclass(frozen=True)
class ChainProblem:
    """The first place where the event chain does not hold."""

    seq: int
    message: str


def verify_chain(events: list[Event]) -> ChainProblem | None:
    """Give the first broken link of an event list ordered by seq, or None if it holds."""
    expected_prev = GENESIS
    for position, event in enumerate(events, start=1):
        if event.seq != position:
            return ChainProblem(
                event.seq,
                f"event {event.seq} stands where event {position} belongs "
                "(an event was deleted or inserted)",
            )
        if event.prev_hash != expected_prev:
            return ChainProblem(
                event.seq,
                f"event {event.seq} does not follow event {position - 1} "
                "(events were reordered, deleted or edited)",
            )
        recomputed = event_hash(
            seq=event.seq,
            at=event.at,
            actor=event.actor,
            kind=event.kind,
            dataset_id=event.dataset_id,
            version=event.version,
            payload=event.payload,
            prev_hash=event.prev_hash,
        )
        if recomputed != event.hash:
            return ChainProblem(event.seq, f"event {event.seq} was altered after it was written")
        expected_prev = event.hash
    return None


def text_sha256(text: str) -> str:
    """Give the sha256 hex digest of a text's exact UTF-8 bytes (comments and layout count)."""
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


@dataclass(frozen=True)
class ChainHead:
    """A head of the event chain kept outside the catalog: (seq, hash), and where it was kept."""

    seq: int
    hash: str
    source: str = ""  # where it was kept: "" (given by hand), "backup b.db", "this export"...

    def __str__(self) -> str:
        return f"{self.seq}:{self.hash}"

    def to_dict(self) -> dict[str, Any]:
        """Give the head as plain data."""
        return {"seq": self.seq, "hash": self.hash, "source": self.source}


_HEAD_FORM = re.compile(r"(\d+):([0-9a-fA-F]{64})")


def parse_head(text: str) -> ChainHead:
    """Give the head written as ``SEQ:HASH`` (as ``curate verify`` prints it); InputError if not."""
    found = _HEAD_FORM.fullmatch(text.strip())
    if found is None:
        raise InputError(
            f"--head '{text}': expected SEQ:HASH, an event number, a colon and that event's "
            "64 hex digits, as `curate verify` prints them after 'chain head:'"
        )
    return ChainHead(int(found.group(1)), found.group(2).lower())


def head_problem(events: list[Event], head: ChainHead) -> str | None:
    """Give why the events no longer extend ``head``, or None if the event at its seq has its hash.

    If the chain holds (:func:`verify_chain`), an unchanged event at ``head.seq`` means every
    event up to it is unchanged too, so the log is that same log, perhaps grown.
    """
    short = f"{head.seq}:{head.hash[:12]}"
    where = f" (from {head.source})" if head.source else ""
    if head.seq == 0:
        found: str | None = GENESIS
    else:
        found = next((e.hash for e in events if e.seq == head.seq), None)
    if found == head.hash:
        return None
    if found is None:
        last = events[-1].seq if events else 0
        if last < head.seq:
            return (
                f"the catalog no longer extends head {short}{where}: it ends at event {last} "
                "(events were cut off, or an older copy was put back)"
            )
        return f"the catalog no longer extends head {short}{where}: its event {head.seq} is missing"
    return (
        f"the catalog no longer extends head {short}{where}: its event {head.seq} has hash "
        f"{found[:12]} (the log was rewritten from there)"
    )


def batch_entries(event: Event) -> list[dict[str, Any]]:
    """Give the datasets a batch event wrote, one dict per dataset (fields as
    :data:`BATCH_FIELDS` name them); nothing for any other event."""
    if event.kind != BATCH_EVENT:
        return []
    entries = event.payload.get("datasets")
    if not isinstance(entries, list):
        return []
    return [
        dict(zip(BATCH_FIELDS, entry, strict=False)) for entry in entries if isinstance(entry, list)
    ]
