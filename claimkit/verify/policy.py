"""What the person verifying asks for and pins: which checks run, which anchors are trusted.

Policy is kept apart from mechanics: the modules beside this one say *how*
each item is checked; this record says *what* must hold for a pass, and
:mod:`.trust` applies its pins. A check that the policy leaves out is still
reported (as "skipped"), and a check that rests on an anchor the user did not
pin is reported "unpinned", never "ok".
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

__all__ = ["Policy"]


@dataclass(frozen=True)
class Policy:
    """What a verification must establish.

    Attributes
    ----------
    rerun : bool
        Re-run each examination and redraw the dossier (the slow part).
    robustness : bool
        Also re-run the robustness battery (with ``rerun``).
    expect_keys : tuple of str
        Owner key fingerprints (hex SHA-256 of the raw Ed25519 key) the user
        obtained from the owner through another channel; empty: not pinned.
    tsa_roots : tuple of Certificate, optional
        The timestamp authorities' certificates the user trusts; None: not pinned
        (tokens are then checked against the certificate the bundle brings).
    disclosure : Path, optional
        A key disclosure delivered apart from the bundle.
    """

    rerun: bool = True
    robustness: bool = True
    expect_keys: tuple[str, ...] = ()
    tsa_roots: tuple | None = None
    disclosure: Path | None = None

    @property
    def pinned_keys(self) -> set[str]:
        return {k.strip().lower().removeprefix("sha256:") for k in self.expect_keys}
