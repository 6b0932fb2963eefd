"""The software a result depends on, named so that a re-run elsewhere can say what differed.

A figure, a number or a PDF re-made from the same inputs is the same only if
the software that made it behaves the same: Python, NumPy (FFTs, random
streams), SciPy (filters, FFTs), Pillow and its libjpeg (decoding the
exhibits), scikit-image (resampling, SSIM), reportlab (the PDF) and the
operating system. ``claimkit report`` records them in the bundle
(``handover/software.json``); ``verify`` records its own, shows both, and
where they differ compares figures and the PDF by their data within the
tolerances documented in :mod:`claimkit.verify.dossier` rather than byte for byte.
"""

from __future__ import annotations

import platform
from importlib import metadata

from claimkit import __version__

__all__ = ["SOFTWARE_TYPE", "differences", "versions"]

SOFTWARE_TYPE = "claimkit/software/v1"
_PACKAGES = ("numpy", "scipy", "pillow", "scikit-image", "reportlab")


def _dist(name: str) -> str | None:
    try:
        return metadata.version(name)
    except metadata.PackageNotFoundError:
        return None


def versions() -> dict:
    """Versions of the software the numbers, figures and PDF depend on (JSON-ready)."""
    from PIL import features

    out = {"type": SOFTWARE_TYPE, "claimkit": __version__,
           "python": platform.python_version(),
           "python_implementation": platform.python_implementation(),
           "os": f"{platform.system()} {platform.release()} ({platform.machine()})"}
    for name in _PACKAGES:
        out[name] = _dist(name)
    # The JPEG decoder decides every pixel of a JPEG exhibit; Pillow names its libjpeg.
    out["libjpeg"] = features.version("jpg")
    return out


def differences(made: dict, here: dict) -> list[str]:
    """Components whose versions differ, as ``name: made X, here Y`` (``os`` included)."""
    keys = sorted((set(made) | set(here)) - {"type"})
    return [f"{k}: made with {made.get(k)}, re-run with {here.get(k)}"
            for k in keys if made.get(k) != here.get(k)]
