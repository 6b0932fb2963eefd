"""Typed errors shared by every layer.

Each error carries the file it concerns and the exit code the command line
uses, so that the CLI can print one line, ``claimkit: error: FILE: cause``,
and exit without a traceback.
"""

from __future__ import annotations

from dataclasses import dataclass, field


class ClaimkitError(Exception):
    """Base class. ``exit_code`` 2 is bad input or usage, 1 a failed check."""

    exit_code = 2

    def __init__(self, message: str, *, path: object | None = None, hint: str | None = None):
        super().__init__(message)
        self.message = message
        self.path = None if path is None else str(path)
        self.hint = hint

    def line(self) -> str:
        where = f"{self.path}: " if self.path else ""
        return f"{where}{self.message}"


class InputError(ClaimkitError):
    """A file or argument the user gave cannot be used (exit 2)."""


class ProfileError(InputError):
    """No profile, a damaged profile, or a wrong passphrase (exit 2)."""


class AlreadyExists(InputError):
    """The output exists and claimkit was not asked to replace it (exit 2)."""


class DiskFull(InputError):
    """A write failed for want of space or quota (exit 2): free space and run again."""


class CheckFailed(ClaimkitError):
    """A verification found something wrong (exit 1)."""

    exit_code = 1


@dataclass(kw_only=True)
class Outcome:
    """The result of a check that can fail and says what failed (the one such type).

    ``problems`` empty means the check held; each entry names one failure.
    Results whose verdict also rests on parts (a work on its timestamps, an
    audit on its log) extend :attr:`ok` and still name every failure.
    """

    problems: list = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.problems
