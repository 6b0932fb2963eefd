"""The registry of works (SQLite, WAL): its schema and every SQL statement claimkit runs.

Nothing outside this module writes SQL. Callers get rows as plain tuples or
small values; the meaning (signed records, tokens, log entries) is given to
them by :mod:`.records`, :mod:`.stamping` and :mod:`.outbox`.

Writes happen inside :meth:`Registry.transaction` (``BEGIN IMMEDIATE`` ...
``COMMIT``), so that a change and the custody-log entry queued for it in the
outbox table commit together or not at all.
"""

from __future__ import annotations

import contextlib
import json
import sqlite3
import threading
from collections.abc import Iterable, Iterator
from pathlib import Path

from claimkit.errors import InputError, ProfileError

__all__ = ["SCHEMA_VERSION", "Registry"]

#: Stored in ``meta`` as "schema"; a new column or table raises it (CHANGELOG.md).
SCHEMA_VERSION = "1"

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS works (
    work_id TEXT PRIMARY KEY,
    serial INTEGER UNIQUE NOT NULL,
    sha256_original TEXT NOT NULL,
    sha256_marked TEXT NOT NULL,
    fingerprint TEXT NOT NULL,
    canonical BLOB NOT NULL,
    signature BLOB NOT NULL,
    commitment_nonce TEXT NOT NULL,
    registered_at TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS works_by_original ON works (sha256_original);
CREATE INDEX IF NOT EXISTS works_by_marked ON works (sha256_marked);
CREATE TABLE IF NOT EXISTS log_outbox (
    ord INTEGER PRIMARY KEY AUTOINCREMENT,
    entry_id TEXT UNIQUE NOT NULL,
    time TEXT NOT NULL, actor TEXT NOT NULL, action TEXT NOT NULL,
    items TEXT NOT NULL, details TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS stamp_requests (
    request_id TEXT PRIMARY KEY,
    created TEXT NOT NULL,
    nonce TEXT NOT NULL,
    root TEXT NOT NULL,
    work_ids TEXT NOT NULL,
    tsq BLOB NOT NULL,
    state TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS tokens (
    token_id TEXT PRIMARY KEY,
    request_id TEXT NOT NULL REFERENCES stamp_requests (request_id),
    token BLOB NOT NULL,
    token_sha256 TEXT NOT NULL,
    tsa_cert BLOB NOT NULL,
    gen_time TEXT NOT NULL,
    tsa_name TEXT,
    tsa_serial TEXT NOT NULL,
    attached_at TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS work_stamps (
    work_id TEXT NOT NULL REFERENCES works (work_id),
    token_id TEXT NOT NULL REFERENCES tokens (token_id),
    leaf_index INTEGER NOT NULL,
    tree_size INTEGER NOT NULL,
    proof TEXT NOT NULL,
    PRIMARY KEY (work_id, token_id)
);
"""

_WORK_COLS = "work_id, serial, canonical, signature"
_REQUEST_COLS = "request_id, nonce, root, work_ids, tsq, state"

#: A work row: (work_id, serial, canonical record bytes, signature bytes).
WorkRow = tuple[str, int, bytes, bytes]


class _Connection(sqlite3.Connection):
    """A registry connection that threads may share: transactions take ``lock`` in turn."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.lock = threading.RLock()


def _work_row(row) -> WorkRow | None:
    if row is None:
        return None
    return row[0], int(row[1]), bytes(row[2]), bytes(row[3])


class Registry:
    """One open registry file."""

    def __init__(self, path: Path):
        self.path = Path(path)
        try:
            db = sqlite3.connect(str(path), isolation_level=None, timeout=30,
                                 check_same_thread=False, factory=_Connection)
            db.execute("PRAGMA busy_timeout = 30000")
            db.execute("PRAGMA journal_mode = WAL")
            # FULL: a committed registry change survives a power cut, not just a crash.
            db.execute("PRAGMA synchronous = FULL")
            db.execute("PRAGMA foreign_keys = ON")
            db.executescript(_SCHEMA)
        except sqlite3.DatabaseError as exc:
            raise ProfileError(f"registry unreadable: {exc}", path=path) from None
        self.db: _Connection = db

    def close(self) -> None:
        self.db.close()

    @property
    def lock(self) -> threading.RLock:
        """Held by a transaction; the outbox flush holds it across its read and delete."""
        return self.db.lock

    @contextlib.contextmanager
    def transaction(self) -> Iterator[Registry]:
        """A write transaction (``BEGIN IMMEDIATE`` ... ``COMMIT``; rolled back on error)."""
        with self.db.lock:
            self.db.execute("BEGIN IMMEDIATE")
            try:
                yield self
            except BaseException:
                self.db.execute("ROLLBACK")
                raise
            else:
                self.db.execute("COMMIT")

    # ----------------------------------------------------------------- meta
    def init_meta(self, values: dict[str, str]) -> None:
        """A new registry's settings, the schema version with them (in a transaction)."""
        for k, v in {"schema": SCHEMA_VERSION, **values}.items():
            self.db.execute("INSERT INTO meta VALUES (?, ?)", (k, v))

    def meta(self, key: str) -> str:
        row = self.db.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        if row is None:
            raise ProfileError(f"registry damaged: no {key}", path=self.path)
        return row[0]

    def set_meta(self, key: str, value: str) -> None:
        self.db.execute("UPDATE meta SET value = ? WHERE key = ?", (value, key))

    # ----------------------------------------------------------------- works
    def insert_work(self, *, work_id: str, serial: int, sha256_original: str,
                    sha256_marked: str, fingerprint: str, canonical: bytes, signature: bytes,
                    nonce: str, registered_at: str) -> None:
        """Store a signed record; refuses a serial never allocated or already registered."""
        if serial >= int(self.meta("next_serial")):
            raise InputError(f"serial {serial} was never allocated (use allocate_serials)")
        row = self.db.execute("SELECT work_id FROM works WHERE serial = ?", (serial,)).fetchone()
        if row:
            raise InputError(f"serial {serial} is already registered as {row[0]}")
        self.db.execute(
            "INSERT INTO works VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (work_id, serial, sha256_original, sha256_marked, fingerprint, canonical,
             signature, nonce, registered_at))

    def any_serial_between(self, lo: int, hi: int) -> bool:
        """Whether a work is registered with a serial in ``lo..hi``."""
        return self.db.execute("SELECT 1 FROM works WHERE serial BETWEEN ? AND ?",
                               (lo, hi)).fetchone() is not None

    def work(self, work_id: str) -> WorkRow | None:
        return _work_row(self.db.execute(
            f"SELECT {_WORK_COLS} FROM works WHERE work_id = ?", (work_id,)).fetchone())

    def work_by_serial(self, serial: int) -> WorkRow | None:
        return _work_row(self.db.execute(
            f"SELECT {_WORK_COLS} FROM works WHERE serial = ?", (serial,)).fetchone())

    def work_by_hash(self, sha256: str) -> WorkRow | None:
        """The work whose original or marked file has this SHA-256 (lowest serial)."""
        return _work_row(self.db.execute(
            f"SELECT {_WORK_COLS} FROM works WHERE sha256_original = ? "
            "OR sha256_marked = ? ORDER BY serial LIMIT 1", (sha256, sha256)).fetchone())

    def works(self) -> list[WorkRow]:
        """Every work, by serial."""
        return [_work_row(r) for r in  # type: ignore[misc]
                self.db.execute(f"SELECT {_WORK_COLS} FROM works ORDER BY serial")]

    def works_in(self, work_ids: list[str]) -> dict[str, tuple[bytes, bytes]]:
        """work_id -> (canonical, signature) for these works (any number of them)."""
        rows: dict[str, tuple[bytes, bytes]] = {}
        for i in range(0, len(work_ids), 500):     # SQLite's limit on bound parameters
            part = work_ids[i:i + 500]
            q = ",".join("?" * len(part))
            for work_id, canonical, signature in self.db.execute(
                    f"SELECT work_id, canonical, signature FROM works WHERE work_id IN ({q})",
                    part):
                rows[work_id] = (bytes(canonical), bytes(signature))
        return rows

    def fingerprints(self) -> Iterable[tuple[str, str]]:
        """(work_id, fingerprint hex) of every work."""
        return self.db.execute("SELECT work_id, fingerprint FROM works")

    def index_columns(self, work_id: str) -> tuple | None:
        """(serial, sha256_original, sha256_marked, fingerprint) as indexed, or None."""
        row = self.db.execute("SELECT serial, sha256_original, sha256_marked, fingerprint "
                              "FROM works WHERE work_id = ?", (work_id,)).fetchone()
        return None if row is None else tuple(row)

    def commitment_nonce(self, work_id: str) -> tuple[int, str] | None:
        """(serial, commitment nonce) of a work, or None."""
        row = self.db.execute("SELECT serial, commitment_nonce FROM works WHERE work_id = ?",
                              (work_id,)).fetchone()
        return None if row is None else (int(row[0]), row[1])

    def unstamped(self) -> list[str]:
        """Works without any token, by serial."""
        return [r[0] for r in self.db.execute(
            "SELECT work_id FROM works WHERE work_id NOT IN (SELECT work_id FROM work_stamps) "
            "ORDER BY serial")]

    # ----------------------------------------------------------------- outbox
    def queue_entry(self, *, entry_id: str, time: str, actor: str, action: str, items: str,
                    details: str) -> None:
        """Queue a custody-log entry (canonical JSON text for items and details)."""
        self.db.execute(
            "INSERT INTO log_outbox (entry_id, time, actor, action, items, details) "
            "VALUES (?, ?, ?, ?, ?, ?)", (entry_id, time, actor, action, items, details))

    def queued_count(self) -> int:
        return self.db.execute("SELECT COUNT(*) FROM log_outbox").fetchone()[0]

    def queued_ids(self) -> set[str]:
        return {r[0] for r in self.db.execute("SELECT entry_id FROM log_outbox")}

    def queued_entries(self) -> list[tuple[str, str, str, str, str, str]]:
        """(entry_id, time, actor, action, items, details), in the order queued."""
        return self.db.execute(
            "SELECT entry_id, time, actor, action, items, details FROM log_outbox "
            "ORDER BY ord").fetchall()

    def queued_items(self) -> list[dict]:
        """The items of every queued entry (decoded)."""
        return [json.loads(items) for (items,) in
                self.db.execute("SELECT items FROM log_outbox")]

    def dequeue(self, entry_ids: list[str]) -> None:
        self.db.executemany("DELETE FROM log_outbox WHERE entry_id = ?",
                            [(e,) for e in entry_ids])

    # ----------------------------------------------------------------- stamps
    def insert_stamp_request(self, *, request_id: str, created: str, nonce: int, root: str,
                             work_ids: list[str], tsq: bytes) -> None:
        self.db.execute("INSERT INTO stamp_requests VALUES (?, ?, ?, ?, ?, ?, 'pending')",
                        (request_id, created, str(nonce), root, json.dumps(work_ids), tsq))

    def pending_requests(self) -> list[tuple[str, str, str, str]]:
        """(request_id, created, root, work_ids JSON) of pending requests, oldest first."""
        return self.db.execute(
            "SELECT request_id, created, root, work_ids FROM stamp_requests "
            "WHERE state = 'pending' ORDER BY created").fetchall()

    def request_by_tsq(self, tsq: bytes) -> tuple | None:
        """(request_id, nonce, root, work_ids, tsq, state) of the request with these bytes."""
        return self.db.execute(f"SELECT {_REQUEST_COLS} FROM stamp_requests WHERE tsq = ?",
                               (tsq,)).fetchone()

    def requests_by_root(self, root_hex: str) -> list[tuple]:
        """Requests over this Merkle root, pending first, newest first."""
        return self.db.execute(
            f"SELECT {_REQUEST_COLS} FROM stamp_requests "
            "WHERE root = ? ORDER BY (state = 'pending') DESC, created DESC",
            (root_hex,)).fetchall()

    def requests_holding(self, work_ids: list[str]) -> set[str]:
        """Stamp requests whose Merkle trees hold one of these works."""
        wanted = set(work_ids)
        return {request_id for request_id, listed in
                self.db.execute("SELECT request_id, work_ids FROM stamp_requests")
                if set(json.loads(listed)) & wanted}

    def latest_pending_tsq(self) -> bytes | None:
        row = self.db.execute("SELECT tsq FROM stamp_requests WHERE state = 'pending' "
                              "ORDER BY created DESC LIMIT 1").fetchone()
        return None if row is None else bytes(row[0])

    def has_token(self, token_id: str) -> bool:
        return self.db.execute("SELECT 1 FROM tokens WHERE token_id = ?",
                               (token_id,)).fetchone() is not None

    def insert_token(self, *, token_id: str, request_id: str, token: bytes, token_sha256: str,
                     tsa_cert: bytes, gen_time: str, tsa_name: str | None, tsa_serial: str,
                     attached_at: str, leaves: list[tuple[str, int, int, str]]) -> None:
        """Store a token, each work's leaf (work_id, index, tree size, proof JSON), and mark
        its request attached."""
        self.db.execute("INSERT INTO tokens VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                        (token_id, request_id, token, token_sha256, tsa_cert, gen_time,
                         tsa_name, tsa_serial, attached_at))
        self.db.executemany("INSERT INTO work_stamps VALUES (?, ?, ?, ?, ?)",
                            [(w, token_id, i, size, proof) for w, i, size, proof in leaves])
        self.db.execute("UPDATE stamp_requests SET state = 'attached' WHERE request_id = ?",
                        (request_id,))

    def stamp_of(self, work_id: str, token_id: str) -> tuple | None:
        """(token, token_sha256, tsa_cert, gen_time, tsa_name, root, nonce, leaf_index,
        tree_size, proof JSON, tsq) of one work under one token."""
        return self.db.execute(
            "SELECT t.token, t.token_sha256, t.tsa_cert, t.gen_time, t.tsa_name, r.root, "
            "r.nonce, s.leaf_index, s.tree_size, s.proof, r.tsq FROM work_stamps s "
            "JOIN tokens t ON t.token_id = s.token_id "
            "JOIN stamp_requests r ON r.request_id = t.request_id "
            "WHERE s.work_id = ? AND s.token_id = ?", (work_id, token_id)).fetchone()

    def token_ids_of(self, work_id: str, *, by_time: bool = True) -> list[str]:
        """The tokens covering a work, oldest first (or by token ID)."""
        order = "t.gen_time" if by_time else "s.token_id"
        return [r[0] for r in self.db.execute(
            "SELECT s.token_id FROM work_stamps s JOIN tokens t ON t.token_id = s.token_id "
            f"WHERE s.work_id = ? ORDER BY {order}", (work_id,))]

    def tokens(self) -> list[tuple[str, str]]:
        """(token_id, token_sha256) of every token."""
        return self.db.execute("SELECT token_id, token_sha256 FROM tokens").fetchall()

    def first_stamp_times(self) -> dict[str, str]:
        """work_id -> time of its earliest token, for every stamped work."""
        return dict(self.db.execute(
            "SELECT s.work_id, MIN(t.gen_time) FROM work_stamps s "
            "JOIN tokens t ON t.token_id = s.token_id GROUP BY s.work_id").fetchall())
