"""The outcome of a verification: every check, its status, and what the user must still compare."""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["FAILED", "NOT_DONE", "PASSED", "SKIPPED", "UNPINNED", "VerifyReport"]

#: Outcomes of a check. ``unpinned``: it held, but rests on an anchor the bundle brought
#: (the user pinned none); ``skipped``: left out on request; ``not-done``: could not be
#: done (no key disclosure), which fails the verification like ``failed``.
PASSED, FAILED, UNPINNED, SKIPPED, NOT_DONE = "ok", "failed", "unpinned", "skipped", "not-done"


@dataclass
class VerifyReport:
    """Every check and its outcome, in the order run; ``out_of_band`` lists what the user
    must compare through another channel before relying on an ``unpinned`` check."""

    bundle: str
    checks: list[dict] = field(default_factory=list)
    out_of_band: list[str] = field(default_factory=list)

    def add(self, name: str, ok: bool, detail: str = "", *, status: str | None = None) -> bool:
        status = status or (PASSED if ok else FAILED)
        # "ok" is true or false only for a check decided on the user's terms; an unpinned,
        # skipped or undone check is never reported as ok (JSON null).
        self.checks.append({"check": name, "ok": bool(ok) if status in (PASSED, FAILED)
                            else None, "status": status, "detail": detail})
        return ok

    @property
    def ok(self) -> bool:
        return bool(self.checks) and not self.failures

    @property
    def failures(self) -> list[dict]:
        return [c for c in self.checks if c["status"] in (FAILED, NOT_DONE)]

    @property
    def unpinned(self) -> list[dict]:
        return [c for c in self.checks if c["status"] == UNPINNED]

    @property
    def verdict(self) -> str:
        return "failed" if not self.ok else "passed, unpinned" if self.unpinned else "passed"
