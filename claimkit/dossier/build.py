"""Build the dossier of a case: hand-over material, figures, data, PDF, HTML, manifest.

Order matters, because each step may only read what the bundle will hold:

1. ``handover/``: the owner's public key, a key disclosure for every work the
   exhibits matched, then a copy of the custody log (so it includes them);
2. figures, drawn from the stored findings and files;
3. ``report/dossier.json`` from :func:`claimkit.dossier.data.build_data`;
4. the PDF (signed, PAdES) and the HTML page, both rendered from that data;
5. "report built" in the custody log, and the manifest: every file of the
   bundle with its SHA-256, signed with the owner's Ed25519 key.
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

import numpy as np
from skimage.transform import rescale

from claimkit import __version__
from claimkit.case import layout
from claimkit.case.layout import DATA, HANDOVER, HTML, MANIFEST, MANIFEST_SIG, PDF, PUBLIC_KEY
from claimkit.case.store import Case, checked_exhibit_path
from claimkit.dossier import figures
from claimkit.dossier.data import build_data
from claimkit.dossier.pdfsign import sign_pdf
from claimkit.dossier.render import render_html, render_pdf
from claimkit.errors import CheckFailed, InputError
from claimkit.evidence.canonical import canonical_json
from claimkit.evidence.custodylog import utc_now
from claimkit.evidence.storage import atomic_write, sha256_file, sha256_hex
from claimkit.imageio import read_picture, to_luma

__all__ = [
    "build_report",
    "draw_figures",
    "write_manifest",
]

MANIFEST_TYPE = "claimkit/bundle-manifest/v1"


def draw_figures(root: Path, data: dict) -> dict[str, bytes]:
    """Every figure the dossier shows, as PNG bytes by relative path (pure: files in, PNGs out)."""
    out: dict[str, bytes] = {}
    exhibits = {e["exhibit_id"]: e for e in data["exhibits"]}
    for r in data["results"]:
        names = data["figures"][r["exhibit_id"]]
        ex = exhibits[r["exhibit_id"]]
        pic = read_picture(root / ex["file"])
        out[names["thumbnail"]] = figures.png_bytes(figures.thumbnail(pic.pixels))
        if not r["examined"]:
            continue
        finding = json.loads((root / layout.finding_file(r["exhibit_id"])).read_bytes())
        with np.load(root / finding["arrays"]["file"]) as arr:
            a = {k: arr[k] for k in arr.files}
        out[names["message"]] = figures.png_bytes(figures.message_figure(a["recovered"],
                                                                         a["reference"]))
        out[names["surface"]] = figures.png_bytes(figures.surface_figure(a["surface"]))
        out[names["decoys"]] = figures.png_bytes(figures.decoy_figure(finding["decoy_scores"],
                                                                      r["score_pilot"]))
        if "registered" in names:
            reg = read_picture(root / r["reference"]["file"]).pixels
            out[names["registered"]] = figures.png_bytes(figures.thumbnail(reg))
        if "aligned" in names:
            al = r["alignment"]
            ref = to_luma(read_picture(root / r["reference"]["file"]).pixels).astype(np.float64)
            s = al["work_scale"]
            ref = rescale(ref, s, anti_aliasing=True, preserve_range=True) if s < 1 else ref
            box = [v * s for v in al["crop_box_px"]]
            out[names["aligned"]] = figures.png_bytes(figures.aligned_figure(
                ref, a["aligned"], a["difference"], a["mask"], box))
    return out


def write_manifest(root: Path, profile, case_id: str) -> dict:
    """``manifest.json`` (every bundle file with SHA-256 and size) and its signature."""
    files = [{"path": rel, "sha256": sha256_file(root / rel), "size": (root / rel).stat().st_size}
             for rel in layout.bundle_files(root)]
    doc = {"type": MANIFEST_TYPE, "case_id": case_id, "created": {"time": utc_now(),
           "time_source": "system clock"}, "software": f"claimkit {__version__}",
           "signer": {"name": profile.owner, "public_key_sha256": profile.public_key_fingerprint},
           "signature": {"algorithm": "Ed25519 (RFC 8032) over the exact bytes of manifest.json",
                         "file": MANIFEST_SIG, "public_key": PUBLIC_KEY},
           "files": files}
    data = canonical_json(doc)
    atomic_write(root / MANIFEST, data)
    atomic_write(root / MANIFEST_SIG, profile.sign(data))
    return doc


def _check_examined(case: Case) -> None:
    exhibits = case.exhibits()
    if not exhibits:
        raise InputError("the case has no exhibits (claimkit case add)", path=case.root)
    for ex in exhibits:
        checked_exhibit_path(case, ex)
        f = case.finding(ex.exhibit_id)
        if f is None and ex.withdrawal is not None:
            continue     # withdrawn before it was examined: shown as withdrawn, nothing more
        if f is None:
            raise InputError(f"exhibit {ex.exhibit_id} is not examined yet "
                             "(run claimkit case examine)", path=case.root)
        if f.get("exhibit_sha256") != ex.sha256:
            raise CheckFailed(f"the finding of {ex.exhibit_id} is for other bytes; "
                              "examine again", path=case.finding_path(ex.exhibit_id))
        arrays = case.root / f["arrays"]["file"]
        if not arrays.is_file() or sha256_file(arrays) != f["arrays"]["sha256"]:
            raise CheckFailed(f"the arrays of {ex.exhibit_id} are missing or altered; "
                              "examine again", path=arrays)


def _handover(case: Case, profile) -> None:
    root = case.root
    work_ids = []
    for ex in case.exhibits():
        if ex.withdrawal is not None:
            continue     # no claim rests on a withdrawn exhibit: disclose nothing for it
        m = (case.finding(ex.exhibit_id) or {}).get("match")
        if m and m.get("work_id") and m["work_id"] not in work_ids:
            work_ids.append(m["work_id"])
    tmp = root / f".{HANDOVER}.part"
    shutil.rmtree(tmp, ignore_errors=True)
    # Built under a hidden name beside handover/, then swapped in: the layout's paths
    # below handover/ are taken relative to it.
    def part(rel: str) -> Path:
        return tmp / Path(rel).relative_to(HANDOVER)

    part(layout.DISCLOSURES).mkdir(parents=True)
    atomic_write(part(PUBLIC_KEY), profile.public_key_pem())
    for wid in work_ids:
        profile.disclose(wid, part(layout.DISCLOSURES) / wid)
    # The log copy is taken last, so it holds the disclosures just logged.
    log = profile.log_path.read_bytes()
    log = log[: log.rfind(b"\n") + 1]
    atomic_write(part(layout.CUSTODY_COPY), log)
    old = root / HANDOVER
    if old.exists():
        shutil.rmtree(old)
    os.replace(tmp, old)


def build_report(case: Case, profile, *, out_pdf: Path | None = None) -> dict:
    """Build the whole dossier of ``case``; returns paths and hashes.

    Raises
    ------
    InputError
        When an exhibit is not examined yet.
    CheckFailed
        When an exhibit or finding changed since it was stored.
    """
    _check_examined(case)
    root = case.root
    _handover(case, profile)
    shutil.rmtree(root / layout.REPORT, ignore_errors=True)
    (root / layout.FIGURES).mkdir(parents=True)
    data = build_data(root)
    for rel, png in draw_figures(root, data).items():
        atomic_write(root / rel, png)
    data_bytes = canonical_json(data)
    atomic_write(root / DATA, data_bytes + b"\n")
    pdf = render_pdf(data, root, root / PDF)
    signed = sign_pdf(pdf, profile, reason=f"Evidence dossier {data['case']['case_id']}")
    atomic_write(root / PDF, signed)
    html = render_html(data, root).encode("utf-8")
    atomic_write(root / HTML, html)
    if out_pdf is not None:
        atomic_write(Path(out_pdf), signed)
    profile.log_action("report built",
                       items={"dossier_pdf": sha256_hex(signed), "dossier_data": sha256_hex(data_bytes),
                              "dossier_html": sha256_hex(html)},
                       details={"case_id": case.case_id, "exhibits": len(data["exhibits"]),
                                "detected": data["summary"]["detected"]})
    manifest = write_manifest(root, profile, case.case_id)
    return {"case_id": case.case_id, "pdf": str(root / PDF), "html": str(root / HTML),
            "data": str(root / DATA), "pdf_sha256": sha256_hex(signed),
            "manifest_sha256": sha256_file(root / MANIFEST), "files": len(manifest["files"]),
            "summary": data["summary"], "warnings": data["warnings"],
            "out": None if out_pdf is None else str(out_pdf)}
