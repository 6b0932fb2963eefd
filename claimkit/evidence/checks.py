"""Checks that re-derive everything from what is stored: one work, or the whole profile.

A check never stops at the first failure: it lists every problem it finds,
each naming the work, token or log line, so that a reader sees the whole
picture (as a verifier for evidence should).
"""

from __future__ import annotations

from dataclasses import dataclass, field

from claimkit.errors import Outcome
from claimkit.evidence import custodylog
from claimkit.evidence.stamping import StampStatus, stamps_of
from claimkit.evidence.storage import sha256_hex

__all__ = ["AuditReport", "WorkStatus", "audit_profile", "check_work"]


@dataclass
class WorkStatus(Outcome):
    """The standing of one work record (its own problems; its stamps have theirs)."""

    work_id: str
    signature_ok: bool
    stamps: list[StampStatus] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.problems and all(s.ok for s in self.stamps)

    def all_problems(self) -> list[str]:
        out = list(self.problems)
        for s in self.stamps:
            out += [f"{s.token_id}: {p}" for p in s.problems]
        return out


def check_work(profile, work) -> WorkStatus:
    """Signature, agreement of the registry's index columns with the record, and tokens."""
    sig_ok = work.verify()
    status = WorkStatus(work.work_id, sig_ok)
    if not sig_ok:
        status.problems.append("record signature does not verify (record altered)")
    row = profile.registry.index_columns(work.work_id)
    rec = work.record
    expected = (rec.get("serial"), rec.get("original", {}).get("sha256"),
                rec.get("marked", {}).get("sha256"), rec.get("fingerprint"))
    if row is not None and row != expected:
        status.problems.append("registry index columns disagree with the signed record")
    status.stamps = stamps_of(profile, work)
    return status


@dataclass
class AuditReport(Outcome):
    """The custody log check plus the registry cross-checks (``problems``: the registry's,
    each naming its item; the log's are in ``log``)."""

    log: custodylog.LogReport
    works: int = 0
    tokens: int = 0
    pending_entries: int = 0

    @property
    def ok(self) -> bool:
        return self.log.ok and not self.problems

    def lines(self) -> list[str]:
        return [str(p) for p in self.log.problems] + self.problems

    def as_dict(self) -> dict:
        return {"ok": self.ok, "log": str(self.log.path), "entries": self.log.lines,
                "works": self.works, "tokens": self.tokens,
                "pending_entries": self.pending_entries,
                "problems": [{"line": p.line, "problem": p.problem} for p in self.log.problems]
                + [{"line": None, "problem": p} for p in self.problems]}


def audit_profile(profile) -> AuditReport:
    """Verify the custody log, every record, every token, and that the log accounts for them.

    Registry problems name the work or token; log problems name the line.
    """
    pending = profile.pending_log_entries()
    head = profile.log_head()
    report = AuditReport(custodylog.verify_log(profile.log_path, profile.public_key,
                                               expected_head=head),
                         pending_entries=pending)
    logged: dict[str, set[str]] = {}
    for entry in report.log.entries:
        logged.setdefault(entry["action"], set()).update(entry["items"].values())
    registered = logged.get("work registered", set())
    stamped = logged.get("works stamped", set())
    pending_items: set[str] = set()
    for items in profile.registry.queued_items():
        pending_items.update(items.values())
    for work in profile.works():
        report.works += 1
        status = check_work(profile, work)
        for p in status.all_problems():
            report.problems.append(f"registry: {work.work_id}: {p}")
        digest = sha256_hex(work.canonical)
        if digest not in registered and digest not in pending_items:
            report.problems.append(f"registry: {work.work_id}: no intact custody-log entry "
                                   "registers this record")
    for token_id, token_sha in profile.registry.tokens():
        report.tokens += 1
        if token_sha not in stamped and token_sha not in pending_items:
            report.problems.append(f"registry: {token_id}: no intact custody-log entry "
                                   "records this token")
    return report
