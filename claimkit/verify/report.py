"""The outcome of a verification: every check, whether it held, and what failed."""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["VerifyReport"]


@dataclass
class VerifyReport:
    """Every check and its outcome, in the order run."""

    bundle: str
    checks: list[dict] = field(default_factory=list)

    def add(self, name: str, ok: bool, detail: str = "") -> bool:
        self.checks.append({"check": name, "ok": bool(ok), "detail": detail})
        return ok

    @property
    def ok(self) -> bool:
        return bool(self.checks) and all(c["ok"] for c in self.checks)

    @property
    def failures(self) -> list[dict]:
        return [c for c in self.checks if not c["ok"]]
