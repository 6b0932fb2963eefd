"""Build the dossier of a case: hand-over material, figures, data, PDF, HTML, manifest.

Order matters, because each step may only read what the bundle will hold:

1. ``handover/``: the owner's public key, the public evidence of every work
   the exhibits matched (signed record, timestamps; key material only with
   ``disclose=True``), the software versions, then the custody excerpt (taken
   last, so it holds the disclosures just logged): the entries of this case
   and its works in full, every other entry by its hash only;
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
from claimkit.case.documents import DossierDataDoc, ManifestDoc
from claimkit.case.layout import DATA, HANDOVER, HTML, MANIFEST, MANIFEST_SIG, PDF, PUBLIC_KEY
from claimkit.case.reference import scale_of
from claimkit.case.store import Case, checked_exhibit_path
from claimkit.dossier import figures
from claimkit.dossier.data import build_data
from claimkit.dossier.pdfsign import sign_pdf
from claimkit.dossier.render import render_html, render_pdf
from claimkit.errors import CheckFailed, InputError
from claimkit.evidence.canonical import canonical_json
from claimkit.evidence.custodylog import utc_now
from claimkit.evidence.excerpt import build_excerpt
from claimkit.evidence.storage import atomic_write, sha256_file, sha256_hex
from claimkit.imageio import read_picture, to_luma
from claimkit.software import versions

__all__ = [
    "build_report",
    "draw_figures",
    "message_arrays",
    "write_manifest",
]

MANIFEST_TYPE = ManifestDoc.type_name()


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
        if "message" in names:      # drawn only where key material is disclosed
            a.update(message_arrays(root, finding) or {})
            out[names["message"]] = figures.png_bytes(figures.message_figure(a["recovered"],
                                                                             a["reference"]))
        out[names["surface"]] = figures.png_bytes(figures.surface_figure(a["surface"]))
        out[names["decoys"]] = figures.png_bytes(figures.decoy_figure(finding["decoy_scores"],
                                                                      r["score_pilot"]))
        if "registered" in names and (root / r["reference"]["file"]).is_file():
            reg = read_picture(root / r["reference"]["file"]).pixels
            out[names["registered"]] = figures.png_bytes(figures.thumbnail(reg))
        # A withheld master cannot be drawn from in a bundle; the figure stays as signed.
        if "aligned" in names and (root / r["reference"]["file"]).is_file():
            al = r["alignment"]
            ref = to_luma(read_picture(root / r["reference"]["file"]).pixels).astype(np.float64)
            s = al["work_scale"]
            # work_scale is per registered-picture pixel; the file may be a reduced reference.
            k = s / scale_of(r["reference"])
            ref = rescale(ref, k, anti_aliasing=True, preserve_range=True) if k < 1 - 1e-9 else ref
            box = [v * s for v in al["crop_box_px"]]
            out[names["aligned"]] = figures.png_bytes(figures.aligned_figure(
                ref, a["aligned"], a["difference"], a["mask"], box))
    return out


def message_arrays(root: Path, finding: dict) -> dict | None:
    """A finding's recovered and prescribed message, where they are at hand (None if not).

    Findings store them apart (``message_arrays``), left out of a bundle without key
    material; findings of claimkit 0.3.0.dev0 and before kept them with the other arrays.
    """
    m = finding.get("message_arrays")
    p = root / m["file"] if isinstance(m, dict) and isinstance(m.get("file"), str) else \
        root / finding["arrays"]["file"]
    if not p.is_file():
        return None
    with np.load(p) as arr:
        got = {k: arr[k] for k in ("recovered", "reference") if k in arr.files}
    return got if len(got) == 2 else None


def withheld_references(root: Path, listed: list[str]) -> list[dict]:
    """Files the bundle leaves out, by hash, with why: masters and message arrays."""
    out = [{"path": rel, "sha256": sha256_file(root / rel),
            "why": "drawn from the owner's key (the prescribed message); in the bundle only "
                   "with the key disclosure: claimkit report --disclose"}
           for rel in sorted(layout.message_arrays(root))
           if rel not in listed and (root / rel).is_file()]
    used = layout.references_used(root)
    folder = root / layout.REFERENCES
    for p in sorted(folder.iterdir()) if folder.is_dir() else []:
        rel = f"{layout.REFERENCES}/{p.name}"
        if rel in listed or not p.is_file() or p.is_symlink() or p.name.startswith("."):
            continue
        why = ("an unmarked master; the findings compare with a reduced-resolution reference "
               "made from it, and claimkit report --include-original adds it" if rel in used
               else "no finding uses it")
        out.append({"path": rel, "sha256": sha256_file(p), "why": why})
    return out


def write_manifest(root: Path, profile, case_id: str, *, key_material: str = "withheld",
                   include_original: bool = False) -> dict:
    """``manifest.json`` (every bundle file with SHA-256 and size) and its signature."""
    names = layout.bundle_files(root, include_original=include_original,
                                include_message=key_material == "disclosed")
    files = [{"path": rel, "sha256": sha256_file(root / rel), "size": (root / rel).stat().st_size}
             for rel in names]
    doc = {"type": MANIFEST_TYPE, "case_id": case_id, "created": {"time": utc_now(),
           "time_source": "system clock"}, "software": f"claimkit {__version__}",
           "signer": {"name": profile.owner, "public_key_sha256": profile.public_key_fingerprint},
           "signature": {"algorithm": "Ed25519 (RFC 8032) over the exact bytes of manifest.json",
                         "file": MANIFEST_SIG, "public_key": PUBLIC_KEY},
           "key_material": key_material, "include_original": include_original,
           "withheld": withheld_references(root, names), "files": files}
    data = ManifestDoc.from_json(doc).write(root / MANIFEST)
    atomic_write(root / MANIFEST_SIG, profile.sign(data))
    return doc


def _check_examined(case: Case, *, disclose: bool = False) -> None:
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
        if not disclose and not f.get("message_arrays"):
            # Examined by claimkit 0.3.0.dev0 or before: the key's message pattern is in the
            # arrays that travel; a bundle without key material must not carry it.
            with np.load(arrays) as a:
                if "reference" in a.files:
                    raise InputError(f"the arrays of {ex.exhibit_id} hold the key's message "
                                     "pattern (examined by an earlier claimkit): run claimkit "
                                     "case examine again, or report with --disclose", path=arrays)


def matched_works(case: Case) -> list[str]:
    """The works the case's exhibits matched, in exhibit order."""
    work_ids: list[str] = []
    for ex in case.exhibits():
        if ex.withdrawal is not None:
            continue     # no claim rests on a withdrawn exhibit: disclose nothing for it
        m = (case.finding(ex.exhibit_id) or {}).get("match")
        if m and m.get("work_id") and m["work_id"] not in work_ids:
            work_ids.append(m["work_id"])
    return work_ids


def _stamp_requests(profile, work_ids: list[str]) -> set[str]:
    """Stamp requests whose Merkle trees hold one of the works (their log entries concern them)."""
    return profile.registry.requests_holding(work_ids)


def _handover(case: Case, profile, *, disclose: bool) -> None:
    root = case.root
    work_ids = matched_works(case)
    tmp = root / f".{HANDOVER}.part"
    shutil.rmtree(tmp, ignore_errors=True)
    # Built under a hidden name beside handover/, then swapped in: the layout's paths
    # below handover/ are taken relative to it.
    def part(rel: str) -> Path:
        return tmp / Path(rel).relative_to(HANDOVER)

    part(layout.DISCLOSURES).mkdir(parents=True)
    atomic_write(part(PUBLIC_KEY), profile.public_key_pem())
    for wid in work_ids:
        profile.disclose(wid, part(layout.DISCLOSURES) / wid, keys=disclose)
    atomic_write(part(layout.SOFTWARE), canonical_json(versions()) + b"\n")
    # The excerpt is taken last, so it holds the disclosures just logged.
    excerpt = build_excerpt(profile.log_path.read_bytes(), case_id=case.case_id,
                            work_ids=work_ids, request_ids=_stamp_requests(profile, work_ids))
    atomic_write(part(layout.CUSTODY_COPY), excerpt)
    old = root / HANDOVER
    if old.exists():
        shutil.rmtree(old)
    os.replace(tmp, old)


def build_report(case: Case, profile, *, out_pdf: Path | None = None,
                 disclose: bool = False, include_original: bool = False) -> dict:
    """Build the whole dossier of ``case``; returns paths and hashes.

    Parameters
    ----------
    disclose : bool
        Put each matched work's key material in the bundle (the caller has said
        what it reveals: :func:`claimkit.evidence.disclose.what_it_reveals`).
        Without it the bundle holds no key material, and the other side's
        expert re-runs with a disclosure delivered separately.
    include_original : bool
        Put an unmarked master that a finding aligns to in the bundle (default:
        it is withheld, named by its hash only).

    Raises
    ------
    InputError
        When an exhibit is not examined yet.
    CheckFailed
        When an exhibit or finding changed since it was stored.
    """
    _check_examined(case, disclose=disclose)
    root = case.root
    _handover(case, profile, disclose=disclose)
    shutil.rmtree(root / layout.REPORT, ignore_errors=True)
    (root / layout.FIGURES).mkdir(parents=True)
    data = build_data(root)
    for rel, png in draw_figures(root, data).items():
        atomic_write(root / rel, png)
    data_bytes = canonical_json(data)
    DossierDataDoc.from_json(data).write(root / DATA)
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
                                "detected": data["summary"]["detected"],
                                "key_material": "disclosed" if disclose else "withheld"})
    manifest = write_manifest(root, profile, case.case_id,
                              key_material="disclosed" if disclose else "withheld",
                              include_original=include_original)
    return {"case_id": case.case_id, "pdf": str(root / PDF), "html": str(root / HTML),
            "data": str(root / DATA), "pdf_sha256": sha256_hex(signed),
            "manifest_sha256": sha256_file(root / MANIFEST), "files": len(manifest["files"]),
            "summary": data["summary"], "warnings": data["warnings"],
            "output": None if out_pdf is None else str(out_pdf),
            "key_material": "disclosed" if disclose else "withheld"}
