"""The event chain: every change to the catalog as an append-only, hash-linked event.

Event k stores ``prev_hash`` = hash of event k-1 (``GENESIS`` for the first) and its own
``hash`` = sha256 over the canonical JSON of (seq, at, actor, kind, dataset_id, version,
payload, prev_hash). Editing, deleting or reordering any event breaks a link that
:func:`verify_chain` names.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from typing import Any

from curate.records import canonical_json

__all__ = ["GENESIS", "ChainProblem", "Event", "event_hash", "text_sha256", "verify_chain"]

GENESIS = "0" * 64


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
