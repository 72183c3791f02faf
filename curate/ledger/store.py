"""The catalog file: SQLite through sqlite-utils. The only module that speaks SQL.

Layout (one SQLite file any tool can open):

- ``meta``       key/value facts about the catalog (its id, when it was made)
- ``migrations`` the named schema steps applied, each recorded in its own transaction
- ``series``     the measured arrays, one row per distinct content hash, arrays as BLOBs
                 (immutable versions make content-addressed BLOBs natural; one row per series
                 writes ~10x faster than one row per point on this machine class)
- ``versions``   one row per dataset version: the record JSON, its hash, and copies of the
                 fields people filter by (observable, lab, grade, retired)
- ``events``     the append-only, hash-chained log of every change
- ``policies``   each weighting policy a run used, under its settings hash, with its exact text
- ``problems``   one row per stored PEtab problem version: its manifest (file name -> sha256),
                 the manifest's hash (the content address) and its record hash
- ``problem_files`` the files of stored problems byte for byte, one row per distinct sha256

Writes go through :meth:`Store.transaction` (``BEGIN IMMEDIATE``, one per user action), so
concurrent writers queue on SQLite's lock instead of failing, and a killed process leaves
either the whole action or none of it. sqlite-utils creates and migrates the tables and runs
the reads; row writes are plain ``execute`` calls inside our own transaction because
sqlite-utils' insert helpers commit on their own.
"""

from __future__ import annotations

import datetime as dt
import json
import sqlite3
import time
import uuid
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import sqlite_utils

from curate.errors import CatalogError
from curate.ledger.provenance import BATCH_EVENT, GENESIS, Event, event_hash
from curate.records import SeriesArrays, array_bytes, canonical_json

__all__ = ["PolicyRow", "ProblemRow", "Store", "VersionRow", "read_chain"]

_BUSY_TIMEOUT_S = 120.0


@dataclass(frozen=True)
class VersionRow:
    """A row of the versions table."""

    dataset_id: str
    version: int
    created_at: str
    record_json: str
    record_hash: str
    content_hash: str
    observable: str
    lab: str
    grade: str | None
    retired: bool


@dataclass(frozen=True)
class PolicyRow:
    """A row of the policies table."""

    sha256: str
    name: str
    text: str


@dataclass(frozen=True)
class ProblemRow:
    """A row of the problems table (one stored PEtab problem version)."""

    problem_id: str
    version: int
    created_at: str
    source: str
    content_sha256: str
    manifest_json: str
    record_hash: str


def _initial_schema(db: sqlite_utils.Database) -> None:
    db.table("meta").create({"key": str, "value": str}, pk="key")
    db.table("series").create(
        {
            "content_hash": str,
            "n_points": int,
            "time": bytes,
            "value": bytes,
            "sd": bytes,
            "replicate": bytes,
            "n": bytes,
        },
        pk="content_hash",
        not_null={"n_points", "time", "value"},
    )
    db.table("versions").create(
        {
            "dataset_id": str,
            "version": int,
            "created_at": str,
            "observable": str,
            "lab": str,
            "grade": str,
            "retired": int,
            "content_hash": str,
            "record_json": str,
            "record_hash": str,
        },
        pk=("dataset_id", "version"),
        not_null={
            "created_at",
            "observable",
            "lab",
            "retired",
            "content_hash",
            "record_json",
            "record_hash",
        },
        foreign_keys=[("content_hash", "series", "content_hash")],
    )
    db.table("versions").create_index(["content_hash"])
    db.table("versions").create_index(["observable"])
    db.table("events").create(
        {
            "seq": int,
            "at": str,
            "actor": str,
            "kind": str,
            "dataset_id": str,
            "version": int,
            "payload": str,
            "prev_hash": str,
            "hash": str,
        },
        pk="seq",
        not_null={"at", "actor", "kind", "payload", "prev_hash", "hash"},
    )
    db.table("events").create_index(["dataset_id"])
    db.execute(
        "INSERT INTO meta(key, value) VALUES ('catalog_id', ?), ('created_at', ?)",
        [str(uuid.uuid4()), dt.datetime.now(dt.UTC).isoformat(timespec="seconds")],
    )


def _policies(db: sqlite_utils.Database) -> None:
    db.table("policies").create(
        {"sha256": str, "name": str, "origin": str, "text": str, "first_used": str},
        pk="sha256",
        not_null={"name", "text", "first_used"},
    )


def _problems(db: sqlite_utils.Database) -> None:
    db.table("problems").create(
        {
            "problem_id": str,
            "version": int,
            "created_at": str,
            "source": str,
            "content_sha256": str,
            "manifest_json": str,
            "record_hash": str,
        },
        pk=("problem_id", "version"),
        not_null={"created_at", "source", "content_sha256", "manifest_json", "record_hash"},
    )
    db.table("problems").create_index(["content_sha256"])
    db.table("problem_files").create(
        {"sha256": str, "n_bytes": int, "content": bytes},
        pk="sha256",
        not_null={"n_bytes", "content"},
    )


def _censored(db: sqlite_utils.Database) -> None:
    # int8 codes per point (0 observed, 1 below its limit, 2 above); NULL: nothing censored
    db.execute("ALTER TABLE series ADD COLUMN censored BLOB")


# Named, ordered schema steps. Append only: a released step is never edited.
MIGRATIONS: list[tuple[str, Callable[[sqlite_utils.Database], None]]] = [
    ("0001_initial", _initial_schema),
    ("0002_policies", _policies),
    ("0003_problems", _problems),
    ("0004_censored", _censored),
]


class Store:
    """An open catalog file."""

    def __init__(self, path: str | Path) -> None:
        self.path = str(path)
        try:
            if self.path != ":memory:":
                parent = Path(self.path).resolve().parent
                if not parent.is_dir():
                    raise CatalogError(
                        f"{self.path}: the folder {parent} does not exist; create it first"
                    )
            conn = sqlite3.connect(
                self.path, isolation_level=None, timeout=_BUSY_TIMEOUT_S, check_same_thread=False
            )
            conn.execute(f"PRAGMA busy_timeout = {int(_BUSY_TIMEOUT_S * 1000)}")
            self._set_wal(conn)
            conn.execute("PRAGMA foreign_keys = ON")
            conn.execute("PRAGMA synchronous = NORMAL")
            self.db = sqlite_utils.Database(conn)
            self._migrate()
        except sqlite3.DatabaseError as err:
            raise CatalogError(f"{self.path}: not a usable catalog file ({err})") from None

    @staticmethod
    def _set_wal(conn: sqlite3.Connection) -> None:
        # Switching the journal mode needs a moment alone with the file; other processes
        # opening the same new catalog may hold it briefly.
        deadline = time.monotonic() + _BUSY_TIMEOUT_S
        while True:
            try:
                conn.execute("PRAGMA journal_mode = WAL")
                return
            except sqlite3.OperationalError as err:
                if "locked" not in str(err) or time.monotonic() > deadline:
                    raise
                time.sleep(0.05)

    def close(self) -> None:
        """Close the connection."""
        self.db.conn.close()

    # -- transactions and migrations -------------------------------------------------------

    @contextmanager
    def transaction(self) -> Iterator[None]:
        """Run the block as one write transaction that takes the write lock at once.

        Inside an open transaction the block simply joins it (one user action, one commit).
        """
        conn = self.db.conn
        if conn.in_transaction:
            yield
            return
        conn.execute("BEGIN IMMEDIATE")
        try:
            yield
        except BaseException:
            conn.execute("ROLLBACK")
            raise
        conn.execute("COMMIT")

    def _migrate(self) -> None:
        with self.transaction():
            self.db.execute(
                "CREATE TABLE IF NOT EXISTS migrations (name TEXT PRIMARY KEY, applied_at TEXT)"
            )
            applied = {row[0] for row in self.db.execute("SELECT name FROM migrations")}
            for name, step in MIGRATIONS:
                if name in applied:
                    continue
                step(self.db)
                self.db.execute(
                    "INSERT INTO migrations(name, applied_at) VALUES (?, ?)",
                    [name, dt.datetime.now(dt.UTC).isoformat(timespec="seconds")],
                )

    def applied_migrations(self) -> list[str]:
        """Give the names of the applied schema steps in order."""
        return [row[0] for row in self.db.execute("SELECT name FROM migrations ORDER BY name")]

    # -- meta ------------------------------------------------------------------------------

    def meta(self, key: str) -> str:
        """Give one catalog fact (``catalog_id``, ``created_at``)."""
        row = self.db.execute("SELECT value FROM meta WHERE key = ?", [key]).fetchone()
        if row is None:
            raise CatalogError(f"{self.path}: catalog fact '{key}' is missing")
        return str(row[0])

    # -- events ----------------------------------------------------------------------------

    def head(self) -> tuple[int, str]:
        """Give (seq, hash) of the newest event, (0, GENESIS) for an empty log."""
        row = self.db.execute("SELECT seq, hash FROM events ORDER BY seq DESC LIMIT 1").fetchone()
        return (0, GENESIS) if row is None else (int(row[0]), str(row[1]))

    def append_event(
        self,
        kind: str,
        payload: dict[str, Any],
        *,
        actor: str,
        dataset_id: str | None = None,
        version: int | None = None,
        at: str | None = None,
    ) -> Event:
        """Append one sealed event; call inside :meth:`transaction`."""
        seq, prev = self.head()
        at = at or dt.datetime.now(dt.UTC).isoformat(timespec="microseconds")
        sealed = event_hash(
            seq=seq + 1,
            at=at,
            actor=actor,
            kind=kind,
            dataset_id=dataset_id,
            version=version,
            payload=payload,
            prev_hash=prev,
        )
        self.db.execute(
            "INSERT INTO events(seq, at, actor, kind, dataset_id, version, payload, prev_hash,"
            " hash) VALUES (?,?,?,?,?,?,?,?,?)",
            [seq + 1, at, actor, kind, dataset_id, version, canonical_json(payload), prev, sealed],
        )
        return Event(seq + 1, at, actor, kind, dataset_id, version, payload, prev, sealed)

    def events(self, dataset_id: str | None = None) -> list[Event]:
        """Give the events in order, all or those of one dataset (with the batch events that
        name it among the datasets they wrote)."""
        return _read_events(self.db.conn, dataset_id)

    # -- series ----------------------------------------------------------------------------

    def put_series(self, content_hash: str, arrays: SeriesArrays) -> None:
        """Store the arrays under their content hash (a no-op if already there)."""
        blobs = {
            name: (
                None if a is None or (name == "censored" and not a.any()) else array_bytes(name, a)
            )
            for name, a in arrays.named().items()
        }
        names = ["time", "value", "sd", "replicate", "n"]
        if blobs["censored"] is not None:  # the column is named only when something is censored
            names.append("censored")
        self.db.execute(
            f"INSERT OR IGNORE INTO series(content_hash, n_points, {', '.join(names)})"
            f" VALUES (?,?,{','.join('?' * len(names))})",
            [content_hash, len(arrays), *(blobs[name] for name in names)],
        )

    def put_series_many(self, arrays_by_hash: dict[str, SeriesArrays]) -> None:
        """Store many series under their content hashes in one statement per column layout
        (those already there are left as they are)."""
        plain, censored = [], []
        for content_hash, arrays in arrays_by_hash.items():
            blobs = [
                None if a is None else array_bytes(name, a)
                for name, a in arrays.named().items()
                if name != "censored"
            ]
            codes = arrays.censored
            if codes is not None and codes.any():
                censored.append([content_hash, len(arrays), *blobs, array_bytes("censored", codes)])
            else:
                plain.append([content_hash, len(arrays), *blobs])
        names = "content_hash, n_points, time, value, sd, replicate, n"
        if plain:
            self.db.conn.executemany(
                f"INSERT OR IGNORE INTO series({names}) VALUES (?,?,?,?,?,?,?)", plain
            )
        if censored:
            self.db.conn.executemany(
                f"INSERT OR IGNORE INTO series({names}, censored) VALUES (?,?,?,?,?,?,?,?)",
                censored,
            )

    def series(self, content_hash: str) -> SeriesArrays:
        """Give the arrays stored under a content hash."""
        row = self.db.execute(
            "SELECT time, value, sd, replicate, n, censored FROM series WHERE content_hash = ?",
            [content_hash],
        ).fetchone()
        if row is None:
            raise CatalogError(
                f"{self.path}: the arrays of content {content_hash[:12]} are missing"
            )
        return _decode_series(row)

    def series_many(
        self, content_hashes: list[str], *, views: bool = False
    ) -> dict[str, SeriesArrays]:
        """Give the arrays of many content hashes, read in a few queries; ``views``: read-only
        arrays over the stored bytes (no copy), for readers that only read."""
        found: dict[str, SeriesArrays] = {}
        wanted = list(dict.fromkeys(content_hashes))
        for start in range(0, len(wanted), 500):
            chunk = wanted[start : start + 500]
            marks = ",".join("?" * len(chunk))
            rows = self.db.execute(
                f"SELECT content_hash, time, value, sd, replicate, n, censored FROM series WHERE content_hash IN ({marks})",
                chunk,
            ).fetchall()
            for row in rows:
                found[str(row[0])] = _decode_series(row[1:])
        missing = [h for h in wanted if h not in found]
        if missing:
            raise CatalogError(f"{self.path}: the arrays of content {missing[0][:12]} are missing")
        return found

    def series_bytes(self, content_hashes: list[str]) -> dict[str, tuple[Any, ...]]:
        """Give the stored bytes of many content hashes: (time, value, sd, replicate, n,
        censored), little-endian as :func:`curate.records.array_bytes` writes them, None where
        a column is empty; for readers that join many series into one array."""
        found: dict[str, tuple[Any, ...]] = {}
        wanted = list(dict.fromkeys(content_hashes))
        for start in range(0, len(wanted), 500):
            chunk = wanted[start : start + 500]
            marks = ",".join("?" * len(chunk))
            for row in self.db.execute(
                f"SELECT content_hash, time, value, sd, replicate, n, censored FROM series WHERE content_hash IN ({marks})",
                chunk,
            ).fetchall():
                found[str(row[0])] = tuple(row[1:])
        missing = [h for h in wanted if h not in found]
        if missing:
            raise CatalogError(f"{self.path}: the arrays of content {missing[0][:12]} are missing")
        return found

    def iter_series(self) -> Iterator[tuple[str, int, SeriesArrays]]:
        """Give every stored (content_hash, n_points, arrays)."""
        cursor = self.db.execute(
            "SELECT content_hash, n_points, time, value, sd, replicate, n, censored FROM series"
        )
        for row in cursor:
            yield str(row[0]), int(row[1]), _decode_series(row[2:])

    # -- versions --------------------------------------------------------------------------

    _VERSION_COLUMNS = (
        "dataset_id, version, created_at, record_json, record_hash, content_hash,"
        " observable, lab, grade, retired"
    )

    def put_version(self, row: VersionRow) -> None:
        """Insert one new version row (never replaces one)."""
        self.db.execute(
            f"INSERT INTO versions({self._VERSION_COLUMNS}) VALUES (?,?,?,?,?,?,?,?,?,?)",
            [
                row.dataset_id,
                row.version,
                row.created_at,
                row.record_json,
                row.record_hash,
                row.content_hash,
                row.observable,
                row.lab,
                row.grade,
                int(row.retired),
            ],
        )

    def put_versions(self, rows: list[VersionRow]) -> None:
        """Insert many new version rows in one statement (never replaces one)."""
        self.db.conn.executemany(
            f"INSERT INTO versions({self._VERSION_COLUMNS}) VALUES (?,?,?,?,?,?,?,?,?,?)",
            [
                [r.dataset_id, r.version, r.created_at, r.record_json, r.record_hash,
                 r.content_hash, r.observable, r.lab, r.grade, int(r.retired)]
                for r in rows
            ],
        )  # fmt: skip

    def _versions(self, where: str = "", args: list[Any] | None = None) -> list[VersionRow]:
        sql = f"SELECT {self._VERSION_COLUMNS} FROM versions {where}"
        rows = self.db.execute(sql, args or []).fetchall()
        return [
            VersionRow(r[0], int(r[1]), r[2], r[3], r[4], r[5], r[6], r[7], r[8], bool(r[9]))
            for r in rows
        ]

    def latest_versions(self) -> list[VersionRow]:
        """Give the newest version of every dataset, ordered by dataset id."""
        return self._versions(
            "WHERE (dataset_id, version) IN (SELECT dataset_id, MAX(version) FROM versions"
            " GROUP BY dataset_id) ORDER BY dataset_id"
        )

    def latest_version_fields(self, paths: tuple[str, ...]) -> Iterator[tuple[Any, ...]]:
        """Give (dataset id, version, record hash, content hash, then the record's value at each
        of ``paths``) of the newest version of every dataset, ordered by dataset id, one row at
        a time: SQLite reads the record JSON, so no whole record is parsed in Python. A number,
        text or null comes as that SQL value (true and false as 1 and 0), an object or array as
        its JSON text."""
        columns = ", ".join(["json_extract(record_json, ?)"] * len(paths))
        cursor = self.db.execute(
            f"SELECT dataset_id, version, record_hash, content_hash, {columns}"
            " FROM versions WHERE (dataset_id, version) IN (SELECT dataset_id, MAX(version)"
            " FROM versions GROUP BY dataset_id) ORDER BY dataset_id",
            list(paths),
        )
        yield from cursor

    def first_versions_of_revised(self) -> list[VersionRow]:
        """Give version 1 of every dataset that has later versions (what it was logged as)."""
        return self._versions(
            "WHERE version = 1 AND dataset_id IN (SELECT dataset_id FROM versions WHERE version > 1)"
            " ORDER BY dataset_id"
        )

    def all_versions(self) -> list[VersionRow]:
        """Give every version row, ordered by dataset id and version."""
        return self._versions("ORDER BY dataset_id, version")

    def versions_of(self, dataset_id: str) -> list[VersionRow]:
        """Give the versions of one dataset, oldest first."""
        return self._versions("WHERE dataset_id = ? ORDER BY version", [dataset_id])

    def versions_with_content(self, content_hash: str) -> list[VersionRow]:
        """Give every version whose arrays have this content hash."""
        return self._versions("WHERE content_hash = ? ORDER BY dataset_id, version", [content_hash])

    def dataset_ids_like(self, prefix: str) -> set[str]:
        """Give the dataset ids that start with ``prefix`` (for numbering new ids)."""
        escaped = prefix.replace("\\", "\\\\").replace("%", "\\%").replace("_", "\\_")
        rows = self.db.execute(
            "SELECT DISTINCT dataset_id FROM versions WHERE dataset_id LIKE ? ESCAPE '\\'",
            [escaped + "%"],
        ).fetchall()
        return {str(r[0]) for r in rows}

    def put_policy(self, sha256: str, name: str, origin: str, text: str) -> bool:
        """Store a weighting policy under its hash; give True if it was new."""
        cursor = self.db.execute(
            "INSERT OR IGNORE INTO policies(sha256, name, origin, text, first_used) VALUES (?,?,?,?,?)",
            [sha256, name, origin, text, dt.datetime.now(dt.UTC).isoformat(timespec="seconds")],
        )
        return bool(cursor.rowcount)

    def policy_text(self, sha256: str) -> str | None:
        """Give the stored text of a policy, or None."""
        row = self.db.execute("SELECT text FROM policies WHERE sha256 = ?", [sha256]).fetchone()
        return None if row is None else str(row[0])

    def policies(self) -> list[PolicyRow]:
        """Give every stored policy, ordered by hash."""
        rows = self.db.execute("SELECT sha256, name, text FROM policies ORDER BY sha256")
        return [PolicyRow(str(r[0]), str(r[1]), str(r[2])) for r in rows]

    # -- stored PEtab problems ----------------------------------------------------------------

    _PROBLEM_COLUMNS = (
        "problem_id, version, created_at, source, content_sha256, manifest_json, record_hash"
    )

    def put_problem_file(self, sha256: str, content: bytes) -> None:
        """Store one problem file's bytes under their sha256 (a no-op if already there)."""
        self.db.execute(
            "INSERT OR IGNORE INTO problem_files(sha256, n_bytes, content) VALUES (?,?,?)",
            [sha256, len(content), content],
        )

    def put_problem(self, row: ProblemRow) -> None:
        """Insert one new problem version row (never replaces one)."""
        self.db.execute(
            f"INSERT INTO problems({self._PROBLEM_COLUMNS}) VALUES (?,?,?,?,?,?,?)",
            [
                row.problem_id,
                row.version,
                row.created_at,
                row.source,
                row.content_sha256,
                row.manifest_json,
                row.record_hash,
            ],
        )

    def problem_rows(self, problem_id: str | None = None) -> list[ProblemRow]:
        """Give the problem version rows, all or one problem's, ordered by id and version."""
        where, args = ("WHERE problem_id = ?", [problem_id]) if problem_id is not None else ("", [])
        rows = self.db.execute(
            f"SELECT {self._PROBLEM_COLUMNS} FROM problems {where} ORDER BY problem_id, version",
            args,
        ).fetchall()
        return [ProblemRow(r[0], int(r[1]), r[2], r[3], r[4], r[5], r[6]) for r in rows]

    def problems_with_content(self, content_sha256: str) -> list[ProblemRow]:
        """Give the problem versions whose manifest has this hash, oldest first."""
        rows = self.db.execute(
            f"SELECT {self._PROBLEM_COLUMNS} FROM problems WHERE content_sha256 = ?"
            " ORDER BY created_at, problem_id, version",
            [content_sha256],
        ).fetchall()
        return [ProblemRow(r[0], int(r[1]), r[2], r[3], r[4], r[5], r[6]) for r in rows]

    def problem_files(self, sha256s: list[str]) -> dict[str, bytes]:
        """Give the stored bytes of these sha256s (those missing are left out)."""
        found: dict[str, bytes] = {}
        wanted = list(dict.fromkeys(sha256s))
        for start in range(0, len(wanted), 500):
            chunk = wanted[start : start + 500]
            marks = ",".join("?" * len(chunk))
            for row in self.db.execute(
                f"SELECT sha256, content FROM problem_files WHERE sha256 IN ({marks})", chunk
            ):
                found[str(row[0])] = bytes(row[1])
        return found

    def iter_problem_files(self) -> Iterator[tuple[str, bytes]]:
        """Give every stored (sha256 key, bytes) of problem files."""
        for row in self.db.execute("SELECT sha256, content FROM problem_files"):
            yield str(row[0]), bytes(row[1])

    def backup_to(self, destination: Path) -> None:
        """Copy the whole catalog into a new SQLite file with SQLite's online backup.

        One backup step reads a consistent snapshot; in WAL mode writers go on meanwhile.
        """
        target = sqlite3.connect(str(destination))
        try:
            self.db.conn.backup(target, pages=-1)
            target.execute("PRAGMA journal_mode = DELETE")  # a self-contained single file
        finally:
            target.close()

    def checkpoint(self) -> None:
        """Fold the write-ahead log into the main file (before the file is moved or copied)."""
        self.db.execute("PRAGMA wal_checkpoint(TRUNCATE)")

    def integrity_check(self) -> str:
        """Give SQLite's own ``PRAGMA integrity_check`` answer ('ok' when sound)."""
        return str(self.db.execute("PRAGMA integrity_check").fetchone()[0])


def _read_events(conn: sqlite3.Connection, dataset_id: str | None = None) -> list[Event]:
    sql = "SELECT seq, at, actor, kind, dataset_id, version, payload, prev_hash, hash FROM events"
    args: list[Any] = []
    if dataset_id is not None:
        sql += (
            " WHERE dataset_id = ? OR (kind = ? AND dataset_id IS NULL AND EXISTS (SELECT 1"
            " FROM json_each(payload, '$.datasets') WHERE json_extract(value, '$[0]') = ?))"
        )
        args.extend([dataset_id, BATCH_EVENT, dataset_id])
    rows = conn.execute(sql + " ORDER BY seq", args).fetchall()
    return [
        Event(int(r[0]), r[1], r[2], r[3], r[4], r[5], json.loads(r[6]), r[7], r[8]) for r in rows
    ]


def read_chain(path: str | Path) -> tuple[str, list[Event]]:
    """Give (catalog id, events) of a catalog file opened read-only (a backup: nothing written).

    Opening it as a :class:`Store` would migrate it and switch it to WAL mode.
    """
    file = Path(path)
    try:
        conn = sqlite3.connect(file.resolve().as_uri() + "?mode=ro", uri=True)
    except sqlite3.DatabaseError as err:
        raise CatalogError(f"{file}: not a usable catalog file ({err})") from None
    try:
        row = conn.execute("SELECT value FROM meta WHERE key = 'catalog_id'").fetchone()
        if row is None:
            raise CatalogError(f"{file}: catalog fact 'catalog_id' is missing")
        return str(row[0]), _read_events(conn)
    except (sqlite3.DatabaseError, json.JSONDecodeError) as err:
        raise CatalogError(f"{file}: not a usable catalog file ({err})") from None
    finally:
        conn.close()


def _decode_series(row: Any) -> SeriesArrays:
    def floats(blob: bytes | None) -> np.ndarray | None:
        return None if blob is None else np.frombuffer(blob, dtype="<f8").astype(np.float64)

    def ints(blob: bytes | None) -> np.ndarray | None:
        return None if blob is None else np.frombuffer(blob, dtype="<i8").astype(np.int64)

    time_, value = floats(row[0]), floats(row[1])
    assert time_ is not None and value is not None  # NOT NULL columns
    censored = None if row[5] is None else np.frombuffer(row[5], dtype="<i1").astype(np.int8)
    return SeriesArrays(
        time=time_, value=value, sd=floats(row[2]), replicate=ints(row[3]), n=ints(row[4]),
        censored=censored,
    )  # fmt: skip
