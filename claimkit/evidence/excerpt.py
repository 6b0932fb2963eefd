"""A custody excerpt: the entries of one case and its works, proven to belong to the whole log.

The bundle handed to the other side must not carry the owner's whole custody
log (other disputes, their sources, names and results). It carries this
instead, as canonical JSON::

    {"type": "claimkit/custody-excerpt/v1", "case_id": ..., "works": [...],
     "head": {"seq": N, "sha256": hash of line N},
     "entries": [{"seq": 1, "line": "<the line, verbatim>"},
                 {"seq": 2, "sha256": "<hash of a line left out>"}, ...]}

Every line of the log up to the head is there, in order: in full where it
concerns this case or its works, by its SHA-256 only otherwise. A checker
then needs nothing else to recompute the chain: each full line must verify
with the owner's key (its own signature), and its ``prev`` must equal the
hash of the line before it (computed from that line, or given). The lines
left out cannot be read back from their hashes (each holds a random entry id
and a signature), yet whoever later sees the whole log can check it hashes to
exactly this excerpt: the excerpt commits to the whole log up to its head.

What a hash-only entry does not prove is its own content; a hash given for a
line left out is the owner's statement, bound by the next full line's signed
``prev``. The number of lines and the head are in the excerpt (which the
signed manifest covers).
"""

from __future__ import annotations

import json
from collections.abc import Iterable
from pathlib import Path

from claimkit.evidence import signing
from claimkit.evidence.canonical import canonical_json
from claimkit.evidence.custodylog import GENESIS, LogProblem, LogReport, _parse_line, entry_hash

__all__ = ["EXCERPT_TYPE", "build_excerpt", "concerns", "verify_excerpt"]

EXCERPT_TYPE = "claimkit/custody-excerpt/v1"
_OWNER_ACTIONS = {"profile created"}   # the key's own birth: binds the owner to the key


def concerns(entry: dict, *, case_id: str, work_ids: set[str], request_ids: set[str]) -> bool:
    """Whether an entry is about this case, one of its works, or a stamp over one of them."""
    d = entry.get("details") or {}
    return (d.get("case_id") == case_id or d.get("work_id") in work_ids
            or d.get("request_id") in request_ids or entry.get("action") in _OWNER_ACTIONS)


def build_excerpt(log: bytes, *, case_id: str, work_ids: Iterable[str],
                  request_ids: Iterable[str] = ()) -> bytes:
    """The excerpt (canonical JSON bytes) of the complete lines of ``log``.

    Parameters
    ----------
    log : bytes
        The custody log file's bytes; an incomplete last line is left out.
    case_id : str
        The case whose entries are given in full.
    work_ids, request_ids : iterable of str
        The works the case involves, and the stamp requests that covered them.
    """
    works, requests = set(work_ids), set(request_ids)
    lines = log[: log.rfind(b"\n") + 1].split(b"\n")[:-1] if b"\n" in log else []
    items = []
    for n, raw in enumerate(lines, start=1):
        try:
            entry = json.loads(raw)
        except ValueError:
            entry = {}
        if isinstance(entry, dict) and concerns(entry, case_id=case_id, work_ids=works,
                                                request_ids=requests):
            items.append({"seq": n, "line": raw.decode("utf-8")})
        else:
            items.append({"seq": n, "sha256": entry_hash(raw)})
    head = {"seq": len(lines), "sha256": entry_hash(lines[-1]) if lines else GENESIS}
    return canonical_json({"type": EXCERPT_TYPE, "case_id": case_id, "works": sorted(works),
                           "head": head, "entries": items})


def verify_excerpt(path: Path, public_key: signing.Ed25519PublicKey) -> LogReport:
    """Check an excerpt: each full entry's signature, and the chain through every line.

    Returns
    -------
    LogReport
        ``entries`` holds the full entries whose signatures verified; each
        problem names the line (its ``seq``).
    """
    report = LogReport(path=Path(path))
    try:
        doc = json.loads(Path(path).read_bytes())
        items = doc["entries"]
        head = doc["head"]
        if doc.get("type") != EXCERPT_TYPE or not isinstance(items, list):
            raise ValueError
    except FileNotFoundError:
        report.problems.append(LogProblem(0, f"{Path(path).name}: custody excerpt missing"))
        return report
    except (ValueError, KeyError, TypeError):
        report.problems.append(LogProblem(0, "not a custody excerpt"))
        return report
    prev = GENESIS
    for n, item in enumerate(items, start=1):
        if not isinstance(item, dict) or item.get("seq") != n:
            report.problems.append(LogProblem(n, f"line {n} missing or out of order "
                                                 "(excerpt altered)"))
            return report
        if "line" in item:
            raw = str(item["line"]).encode("utf-8")
            entry, why = _parse_line(raw, public_key)
            if why or entry is None:
                report.problems.append(LogProblem(n, why or "unreadable entry"))
            elif entry["seq"] != n:
                report.problems.append(LogProblem(n, f"entry #{entry['seq']} stands at line {n}"))
            elif entry.get("prev") != prev:
                report.problems.append(LogProblem(n, f"entry #{n} does not chain to the line "
                                                     "before it (a line's hash was altered)"))
            else:
                report.entries.append(entry)
            prev = entry_hash(raw)
        else:
            h = item.get("sha256")
            if not isinstance(h, str) or len(h) != 64:
                report.problems.append(LogProblem(n, "neither an entry nor a hash"))
            prev = str(h)
    report.lines = len(items)
    report.head_seq, report.head_hash = len(items), prev
    if head != {"seq": len(items), "sha256": prev}:
        report.problems.append(LogProblem(0, "the excerpt's head is not its last line "
                                             "(lines removed or added)"))
    return report
