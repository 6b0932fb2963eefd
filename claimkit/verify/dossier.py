"""The dossier rebuilt from the bundle: data byte for byte, figures, HTML, PDF.

The figures and the PDF are re-made by this machine's software. When it is
the software that made the bundle (the versions ``handover/software.json``
records: Python, NumPy, SciPy, Pillow and its libjpeg, scikit-image,
reportlab), they must be equal to the byte or pixel. When a version differs,
they are compared by their data, with these tolerances:

- a figure: same size and mode, no pixel more than :data:`FIGURE_MAX_LEVELS`
  (2 of 255) apart and a mean absolute difference of at most
  :data:`FIGURE_MEAN_LEVELS` (0.5 of 255): another NumPy/SciPy/Pillow may round
  an interpolated or rescaled value to the next level, never redraw a plot;
- the PDF: the words of its text, as poppler's ``pdftotext`` extracts them from
  the signed PDF and from the re-render, must be the same; numbers within one
  unit of their last printed digit (the rule :func:`.compare.differences`
  applies to stored numbers), since another reportlab may lay out a line
  differently but must print the same data.

The dossier data (``report/dossier.json``) is compared byte for byte in every
case: it is made by claimkit alone, from the bundle's stored findings.
"""

from __future__ import annotations

import io
import json
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
from PIL import Image

from claimkit import __version__, software
from claimkit.case.layout import DATA, HTML, PDF, SOFTWARE
from claimkit.dossier.build import draw_figures
from claimkit.dossier.data import DOSSIER_TYPE, build_data
from claimkit.dossier.pdfsign import check_pdf_signature
from claimkit.dossier.render import render_html, render_pdf
from claimkit.errors import CheckFailed, InputError
from claimkit.evidence.canonical import canonical_json, canonicalize
from claimkit.verify.compare import differences
from claimkit.verify.report import VerifyReport

__all__ = ["FIGURE_MAX_LEVELS", "FIGURE_MEAN_LEVELS", "check_dossier", "check_software",
           "figures_agree", "pdf_texts_agree"]

FIGURE_MAX_LEVELS = 2
FIGURE_MEAN_LEVELS = 0.5
#: Components whose versions change how a figure or the PDF is drawn.
_DRAWING = ("python", "numpy", "scipy", "pillow", "libjpeg", "scikit-image", "reportlab")


def check_software(root: Path, rep: VerifyReport) -> bool:
    """Report the versions on both sides; True when a drawing component differs."""
    here = software.versions()
    try:
        made = json.loads((root / SOFTWARE).read_bytes())
    except (OSError, ValueError):
        rep.add("software", True, f"the bundle does not name its software (made before "
                f"claimkit 0.3); re-run with claimkit {here['claimkit']}")
        return False
    diffs = software.differences(made, here)
    drawing = [d for d in diffs if d.split(":")[0] in _DRAWING]
    mine = ", ".join(f"{k} {here[k]}" for k in sorted(here) if k != "type")
    rep.add("software", True, ("same versions as the bundle's: " + mine) if not diffs else
            "versions differ from the bundle's (" + "; ".join(diffs) + ")"
            + ("; figures and PDF compared by their data, within the documented tolerances"
               if drawing else ""))
    return bool(drawing)


def figures_agree(a: np.ndarray, b: np.ndarray, *, exact: bool) -> bool:
    """Two renderings of one figure: equal, or (``exact=False``) within the tolerances."""
    if a.shape != b.shape:
        return False
    if exact:
        return bool(np.array_equal(a, b))
    d = np.abs(a.astype(np.int16) - b.astype(np.int16))
    return bool(d.max(initial=0) <= FIGURE_MAX_LEVELS and d.mean() <= FIGURE_MEAN_LEVELS)


def _pdf_words(pdf: bytes) -> list[str] | None:
    """The words of a PDF's text by poppler's pdftotext; None when poppler is missing."""
    if shutil.which("pdftotext") is None:
        return None
    proc = subprocess.run(["pdftotext", "-q", "-", "-"], input=pdf, capture_output=True,
                          check=False)
    return proc.stdout.decode("utf-8", "replace").split()


_NUMBER = re.compile(r"([-+]?\d+)(?:\.(\d+))?")


def _same_word(a: str, b: str) -> bool:
    if a == b:
        return True
    ma, mb = _NUMBER.fullmatch(a), _NUMBER.fullmatch(b)
    if not ma or not mb:
        return False
    digits = max(len(ma.group(2) or ""), len(mb.group(2) or ""))
    return abs(float(a) - float(b)) <= 1.01 * 10.0 ** -digits


def pdf_texts_agree(signed: bytes, again: bytes) -> tuple[bool, str]:
    """The PDFs' texts word for word, numbers within one unit of their last printed digit."""
    a, b = _pdf_words(signed), _pdf_words(again)
    if a is None or b is None:
        return False, "pdftotext (poppler-utils) is not installed, so the text cannot be compared"
    if len(a) != len(b):
        return False, f"{len(a)} words signed, {len(b)} re-rendered"
    bad = [f"word {i}: signed {x!r}, re-rendered {y!r}" for i, (x, y) in enumerate(zip(a, b, strict=True))
           if not _same_word(x, y)]
    return not bad, "; ".join(bad[:4])


def check_dossier(root: Path, pub, rep: VerifyReport, *, full: bool = True) -> None:
    """Rebuild the dossier data (and with ``full`` the figures, HTML and PDF) and compare."""
    try:
        stored = (root / DATA).read_bytes()
    except FileNotFoundError:
        rep.add("dossier data", False, f"{DATA} missing")
        return
    try:
        data = build_data(root)
    except (InputError, CheckFailed, KeyError, ValueError, TypeError) as exc:
        rep.add("dossier data", False, f"cannot be rebuilt from the bundle ({exc})")
        return
    rebuilt = canonical_json(data) + b"\n"
    made = _made_by(stored)
    full_render = True
    if made is not None and made[0] != DOSSIER_TYPE:
        # Another schema cannot be rebuilt to the byte; say so once, precisely, and still
        # check what does not depend on it (the figures show stored arrays; the signature).
        rep.add("dossier version", False,
                f"{DATA} is {made[0]}, made by {made[1]}; this claimkit ({__version__}) writes "
                f"{DOSSIER_TYPE} and cannot rebuild the older dossier byte for byte, so its "
                "data, HTML and PDF content are not re-derived here (the findings they show "
                f"are re-checked above); verify with {made[1]} for those")
        full_render = False
    elif rebuilt == stored:
        rep.add("dossier data", True, f"{DATA} equals the data rebuilt from the "
                                      "findings and records")
    else:
        try:
            diffs = differences(json.loads(stored), canonicalize(data), "dossier")
        except ValueError:
            diffs = ["not JSON"]
        # Settings of the verifier's own engine are not evidence; a difference there means
        # this claimkit is not the one that made the dossier, and is reported as such.
        mine = [x for x in diffs if x.startswith("dossier.method.engine")]
        rest = [x for x in diffs if x not in mine]
        if mine:
            rep.add("software settings", False, "this claimkit's engine settings differ from "
                    "the ones the dossier was made with (numbers may not reproduce): "
                    + "; ".join(mine[:4]))
        if rest or not mine:
            rep.add("dossier data", False, f"{DATA} differs from the data rebuilt "
                    "from the bundle: " + "; ".join(rest[:6] or ["(byte differences)"]))
    if not full:
        return
    lenient = check_software(root, rep)
    bad = []
    try:
        figs = draw_figures(root, data)
    except (InputError, OSError, KeyError, ValueError) as exc:
        figs = {}
        bad.append(f"cannot be redrawn ({exc})")
    for rel, png in figs.items():
        p = root / rel
        if not p.is_file():
            bad.append(f"{rel}: missing")
            continue
        with Image.open(io.BytesIO(png)) as a, Image.open(p) as b:
            if a.size != b.size or not figures_agree(np.asarray(a), np.asarray(b.convert(a.mode)),
                                                     exact=not lenient):
                bad.append(f"{rel}: does not show the stored data")
    if bad and made is not None and not full_render:
        # Figures of an older dossier schema are drawn by that claimkit: name both sides.
        bad.append(f"drawn by {made[1]}, redrawn by claimkit {__version__}")
    rep.add("figures", not bad, "; ".join(bad) if bad else
            f"{len(figs)} figures redrawn from the stored data, "
            + ("within the tolerances for other software versions" if lenient
               else "pixel for pixel equal"))
    if full_render:
        try:
            html = render_html(data, root).encode("utf-8")
            same = (root / HTML).read_bytes() == html
            rep.add("HTML dossier", same, "re-rendered from the data, identical" if same else
                    f"{HTML} is not what the data renders to (edited)")
        except FileNotFoundError:
            rep.add("HTML dossier", False, f"{HTML} missing")
    try:
        pdf = (root / PDF).read_bytes()
    except FileNotFoundError:
        rep.add("PDF signature", False, f"{PDF} missing")
        return
    chk = check_pdf_signature(pdf, pub)
    rep.add("PDF signature", chk.ok, "; ".join(chk.problems) if chk.problems else
            f"PAdES signature by {chk.signer}, certificate issued by the owner's key, "
            "whole file covered")
    if not full_render:
        return
    unsigned = render_pdf(data, root, root / PDF)
    same = pdf.startswith(unsigned)
    if same or not lenient:
        rep.add("PDF content", same, "the signed PDF is exactly the dossier the data renders "
                "to" if same else "the signed PDF's content is not what the data renders to "
                "(edited)")
        return
    agree, why = pdf_texts_agree(pdf, unsigned)
    rep.add("PDF content", agree, "rendered by other software versions: the signed PDF's text "
            "says what the data renders to, word for word, numbers within their last digit"
            if agree else f"the signed PDF's text is not what the data renders to: {why}")


def _made_by(stored: bytes) -> tuple[str, str] | None:
    """(type, software) of a stored dossier.json, or None when it cannot be read."""
    try:
        doc = json.loads(stored)
        return str(doc["type"]), str(doc.get("software", "an unknown claimkit"))
    except (ValueError, KeyError, TypeError):
        return None
