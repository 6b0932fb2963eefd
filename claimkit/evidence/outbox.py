"""The custody-log outbox: entries queued in the registry, then appended to the log.

A custody-log entry is first written to the registry's outbox table in the
same transaction as the change it records, then appended to the log and
removed from the outbox. If the process dies in between, the next use of the
profile appends what is left (and adopts lines that reached the log before
the crash), so the registry and the log never disagree for long and never
silently. A file lock beside the log keeps two processes from appending at once.
"""

from __future__ import annotations

import contextlib
import fcntl
import json
import os
from collections.abc import Iterator
from pathlib import Path

from claimkit.errors import CheckFailed, ProfileError
from claimkit.evidence import custodylog
from claimkit.evidence.canonical import canonical_json
from claimkit.evidence.registry import Registry

__all__ = ["entry_from_log", "flush", "log_lock", "queue"]


def queue(registry: Registry, action: str, *, items: dict, details: dict | None, actor: str,
          time: str | None = None) -> str:
    """Queue an entry (inside the caller's transaction); returns its id."""
    entry_id = os.urandom(16).hex()
    registry.queue_entry(entry_id=entry_id, time=time or custodylog.utc_now(), actor=actor,
                         action=action, items=canonical_json(items).decode(),
                         details=canonical_json(details or {}).decode())
    return entry_id


@contextlib.contextmanager
def log_lock(lock_path: Path) -> Iterator[None]:
    """An exclusive lock on the log (``flock``), for appending."""
    fd = os.open(lock_path, os.O_RDWR | os.O_CREAT, 0o600)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield
    finally:
        fcntl.flock(fd, fcntl.LOCK_UN)
        os.close(fd)


def flush(registry: Registry, log_path: Path, lock_path: Path, signer,
          fingerprint: str) -> dict[str, dict]:
    """Append queued entries to the log; returns entry id -> entry for those written."""
    written: dict[str, dict] = {}
    with registry.lock, log_lock(lock_path):
        seq, head = int(registry.meta("log_seq")), registry.meta("log_hash")
        size = int(registry.meta("log_size"))
        try:
            actual = log_path.stat().st_size
        except FileNotFoundError:
            raise ProfileError("custody log missing", path=log_path) from None
        if actual < size:
            raise CheckFailed(f"custody log is shorter than the registry recorded "
                              f"({actual} < {size} bytes): run claimkit log verify",
                              path=log_path)
        adopted: list[str] = []
        if actual > size:
            # Lines appended by a run that died before it could note them.
            parts = custodylog.read_tail(log_path, size)
            complete, torn = parts[:-1], parts[-1]
            if torn:  # a torn last line from a crash: ours, never confirmed
                os.truncate(log_path, actual - len(torn))
            queued = registry.queued_ids()
            for raw in complete:
                try:
                    entry = json.loads(raw)
                    entry_id, entry_seq = entry["id"], int(entry["seq"])
                except (ValueError, KeyError, TypeError):
                    entry_id, entry_seq = None, 0
                if entry_id not in queued or entry_seq != seq + 1:
                    raise CheckFailed(
                        f"custody log has lines after entry #{seq} that this registry did "
                        "not write: run claimkit log verify", path=log_path)
                seq, head = entry_seq, custodylog.entry_hash(raw)
                size += len(raw) + 1
                adopted.append(entry_id)
        rows = registry.queued_entries()
        lines = []
        for entry_id, time, actor, action, items, details in rows:
            if entry_id in adopted:
                continue
            seq += 1
            entry, line = custodylog.build_entry(
                signer, fingerprint, seq=seq, prev=head, entry_id=entry_id, time=time,
                action=action, actor=actor, items=json.loads(items), details=json.loads(details))
            head = custodylog.entry_hash(line)
            lines.append(line)
            written[entry_id] = entry
        if lines:
            size = custodylog.append_lines(log_path, lines)
        if rows or adopted:
            with registry.transaction():
                registry.dequeue([r[0] for r in rows])
                for k, v in (("log_seq", str(seq)), ("log_hash", head), ("log_size", str(size))):
                    registry.set_meta(k, v)
    return written


def entry_from_log(log_path: Path, entry_id: str) -> dict:
    """An entry another process flushed first, read back from the log."""
    needle = f'"id":"{entry_id}"'.encode()
    for raw in reversed(log_path.read_bytes().splitlines()):
        if needle in raw:
            return json.loads(raw)
    raise CheckFailed(f"custody-log entry {entry_id} was queued but is not in the log",
                      path=log_path)
