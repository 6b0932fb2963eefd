"""What the person verifying asks for: which checks run, and (later) which anchors they pin.

Policy is kept apart from mechanics: the modules beside this one say *how*
each item is checked; this record says *what* must hold for a pass. A check
that the policy leaves out is still reported (as a failed "skipped" check),
so a quick verification can never pass for a full one.

Anchors the user pins (an expected owner key, the time-stamping authorities
they trust, a disclosure received out of band) belong here as fields, and
the checks read them from here.
"""

from __future__ import annotations

from dataclasses import dataclass

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
    """

    rerun: bool = True
    robustness: bool = True
