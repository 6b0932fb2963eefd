"""The custody log: append-only JSON Lines, hash-chained, every entry signed.

Each line is the canonical JSON (see :mod:`.canonical`) of one entry::

    {"action": ..., "actor": ..., "details": {...}, "id": hex, "items": {name: sha256},
     "prev": sha256 of the previous line, "seq": n, "sig": base64 Ed25519,
     "signer": public-key fingerprint, "time": "YYYY-MM-DDTHH:MM:SS.ffffffZ",
     "time_source": "system clock", "v": 1}

``sig`` signs the canonical JSON of the entry without ``sig``; ``prev`` is the
SHA-256 of the previous line's bytes (without its newline), 64 zeros for the
first. ``seq`` counts from 1. Together they let :func:`verify_log` name the
line where something was edited (signature or encoding fails), deleted (a gap
in ``seq``), reordered or inserted (``seq`` goes back or repeats; the chain
breaks). A deletion at the very end is found against the head (last ``seq``
and hash) that the registry keeps in SQLite.

The log is evidence of what the owner's software recorded, with times from the
system clock; a system-clock time proves nothing by itself. Timestamp tokens
(RFC 3161) are what fix a time independently.
"""

from __future__ import annotations

import base64
import hashlib
import json
import os
import re
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

from claimkit.errors import Outcome
from claimkit.evidence import signing
from claimkit.evidence.canonical import canonical_json

__all__ = [
    "GENESIS",
    "LogProblem",
    "LogReport",
    "build_entry",
    "entry_hash",
    "utc_now",
    "verify_log",
]

GENESIS = "0" * 64
_HEX64 = re.compile(r"[0-9a-f]{64}\Z")


def utc_now() -> str:
    """Current UTC time, ISO 8601 with microseconds and ``Z``."""
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def entry_hash(line: bytes) -> str:
    """Hex SHA-256 of one log line (without its newline): the next entry's ``prev``."""
    return hashlib.sha256(line).hexdigest()


def check_items(items: dict) -> dict[str, str]:
    """Items are ``name -> lower-case hex SHA-256``; anything else is a programming error."""
    out = {}
    for name, digest in items.items():
        if not isinstance(name, str) or not isinstance(digest, str) or not _HEX64.match(digest):
            raise ValueError(f"custody-log item {name!r} must map to a hex SHA-256")
        out[name] = digest
    return out


def build_entry(key: signing.Ed25519PrivateKey, signer_fp: str, *, seq: int, prev: str,
                entry_id: str, time: str, action: str, actor: str, items: dict,
                details: dict | None) -> tuple[dict, bytes]:
    """Make and sign one entry; returns the entry and its line bytes (no newline)."""
    body = {
        "v": 1, "seq": seq, "id": entry_id, "time": time, "time_source": "system clock",
        "actor": actor, "action": action, "items": check_items(items),
        "details": details or {}, "prev": prev, "signer": signer_fp,
    }
    sig = signing.sign(key, canonical_json(body))
    entry = {**body, "sig": base64.b64encode(sig).decode("ascii")}
    return entry, canonical_json(entry)


@dataclass
class LogProblem:
    """One thing wrong in the log, at a 1-based line number (0: the log as a whole)."""

    line: int
    problem: str

    def __str__(self) -> str:
        return f"line {self.line}: {self.problem}" if self.line else self.problem


@dataclass
class LogReport(Outcome):
    """Result of :func:`verify_log` (``problems``: :class:`LogProblem`, each naming its line)."""

    path: Path
    lines: int = 0
    entries: list[dict] = field(default_factory=list)  # entries whose signature verified
    head_seq: int = 0
    head_hash: str = GENESIS


def _parse_line(raw: bytes, pub: signing.Ed25519PublicKey) -> tuple[dict | None, str | None]:
    """Parse and check one line alone: (entry, None) or (entry-or-None, why it fails)."""
    try:
        entry = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, ValueError):
        return None, "not a readable entry (bytes altered, or two lines merged)"
    if not isinstance(entry, dict) or not isinstance(entry.get("seq"), int) \
            or not isinstance(entry.get("sig"), str):
        return None, "not a custody-log entry (fields missing)"
    try:
        if canonical_json(entry) != raw:
            return entry, f"entry #{entry['seq']} altered: not in canonical form"
        sig = base64.b64decode(entry["sig"], validate=True)
    except (ValueError, TypeError):
        return entry, f"entry #{entry['seq']} altered: signature field unreadable"
    body = {k: v for k, v in entry.items() if k != "sig"}
    if not signing.verify(pub, canonical_json(body), sig):
        return entry, f"entry #{entry['seq']} altered: signature does not verify"
    return entry, None


def verify_log(path: Path, public_key: signing.Ed25519PublicKey, *,
               expected_head: tuple[int, str] | None = None) -> LogReport:
    """Check every line of the log and the chain between them.

    Parameters
    ----------
    path : Path
        The JSON Lines file.
    public_key : Ed25519PublicKey
        The owner's key; every entry must be signed by it.
    expected_head : (int, str), optional
        The last ``seq`` and line hash the registry recorded; a shorter log
        means lines were removed from the end.

    Returns
    -------
    LogReport
        Each problem names its line. An empty problem list means every entry
        verified and the chain is whole.
    """
    report = LogReport(path=Path(path))
    try:
        data = Path(path).read_bytes()
    except FileNotFoundError:
        report.problems.append(LogProblem(0, f"{path}: custody log missing"))
        return report
    if data and not data.endswith(b"\n"):
        report.problems.append(LogProblem(0, "last line is incomplete (no newline at the end)"))
    lines = data.split(b"\n")
    if lines and lines[-1] == b"":
        lines.pop()
    report.lines = len(lines)
    expected_seq, prev = 1, GENESIS
    seen: dict[int, int] = {}
    for number, raw in enumerate(lines, start=1):
        entry, why = _parse_line(raw, public_key)
        this_hash = entry_hash(raw)
        if entry is None:
            report.problems.append(LogProblem(number, why or "the line cannot be read"))
            report.head_seq, report.head_hash = expected_seq, this_hash
            expected_seq, prev = expected_seq + 1, this_hash
            continue
        seq = entry["seq"]
        if why:
            # An altered entry's own seq cannot be trusted: assume it stood in its place.
            report.problems.append(LogProblem(number, why or "the line cannot be read"))
            report.head_seq, report.head_hash = expected_seq, this_hash
            expected_seq, prev = expected_seq + 1, this_hash
            continue
        # Signed by the owner's key: counts for cross-checks even where the chain around
        # it is broken (that break is reported on its own line).
        report.entries.append(entry)
        if seq in seen:
            report.problems.append(LogProblem(
                number, f"entry #{seq} appears again (first at line {seen[seq]}): "
                        "inserted or duplicated"))
        elif seq < expected_seq:
            report.problems.append(LogProblem(
                number, f"entry #{seq} is out of order (expected #{expected_seq}): "
                        "lines reordered or inserted"))
        elif seq > expected_seq:
            gap = f"#{expected_seq}" if seq == expected_seq + 1 else \
                f"#{expected_seq}..#{seq - 1}"
            report.problems.append(LogProblem(
                number, f"entry {gap} missing before this line: deleted, or lines reordered"))
        elif entry.get("prev") != prev:
            report.problems.append(LogProblem(
                number, f"entry #{seq} does not chain to line {number - 1}: "
                        "the line before it was altered or replaced"))
        seen.setdefault(seq, number)
        expected_seq, prev = max(expected_seq, seq + 1), this_hash
        report.head_seq, report.head_hash = seq, this_hash
    if expected_head is not None:
        want_seq, want_hash = expected_head
        if want_seq > report.head_seq:
            report.problems.append(LogProblem(
                len(lines) + 1 if lines else 0,
                f"log ends at entry #{report.head_seq} but the registry recorded #{want_seq}: "
                "lines deleted from the end"))
        elif want_seq == report.head_seq and want_hash != report.head_hash and lines:
            report.problems.append(LogProblem(
                len(lines), f"last entry #{want_seq} differs from the one the registry recorded"))
    return report


def read_tail(path: Path, offset: int) -> list[bytes]:
    """Complete lines after byte ``offset`` (used to adopt entries written before a crash)."""
    with open(path, "rb") as fh:
        fh.seek(offset)
        data = fh.read()
    return data.split(b"\n")


def append_lines(path: Path, lines: list[bytes]) -> int:
    """Append lines and fsync; returns the new size of the file in bytes."""
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o600)
    try:
        payload = b"".join(line + b"\n" for line in lines)
        view = memoryview(payload)
        while view:
            n = os.write(fd, view)
            view = view[n:]
        os.fsync(fd)
        return os.fstat(fd).st_size
    finally:
        os.close(fd)
