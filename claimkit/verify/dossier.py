"""The dossier rebuilt from the bundle: data byte for byte, figures pixel for pixel, HTML, PDF."""

from __future__ import annotations

import io
import json
from pathlib import Path

import numpy as np
from PIL import Image

from claimkit.case.layout import DATA, HTML, PDF
from claimkit.dossier.build import draw_figures
from claimkit.dossier.data import build_data
from claimkit.dossier.pdfsign import check_pdf_signature
from claimkit.dossier.render import render_html, render_pdf
from claimkit.errors import CheckFailed, InputError
from claimkit.evidence.canonical import canonical_json, canonicalize
from claimkit.verify.compare import differences
from claimkit.verify.report import VerifyReport

__all__ = ["check_dossier"]


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
    if rebuilt == stored:
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
            if a.size != b.size or not np.array_equal(np.asarray(a), np.asarray(b.convert(a.mode))):
                bad.append(f"{rel}: does not show the stored data")
    rep.add("figures", not bad, "; ".join(bad) if bad else
            f"{len(figs)} figures redrawn from the stored data, pixel for pixel equal")
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
    unsigned = render_pdf(data, root, root / PDF)
    same = pdf.startswith(unsigned)
    rep.add("PDF content", same, "the signed PDF is exactly the dossier the data renders to"
            if same else "the signed PDF's content is not what the data renders to "
                         "(edited, or rendered with another version of reportlab)")
