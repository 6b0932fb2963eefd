"""``claimkit verify``: check a hand-over bundle as the other side would, trusting nothing in it.

Policy (what must hold, :mod:`.policy`) is kept apart from mechanics (how
each thing is read and checked: :mod:`.unpack`, :mod:`.checks`,
:mod:`.rerun`, :mod:`.dossier`): every check runs, each failure is named,
and the verdict is "all passed" or not. Checks, in order:

1. the bundle itself: a zip (or folder) with no absolute paths, no ``..``,
   no links, no duplicate names, within size limits;
2. the manifest: its Ed25519 signature by the key in the bundle, every file
   listed present with its SHA-256, and no file unlisted;
3. the key: the manifest, the case, the work records and the disclosures all
   name the same public key, and it is the key the user pinned
   (``--expect-key``; without a pin the signer is reported ``unpinned``);
4. each work's evidence: record signature, each timestamp token (RFC 3161,
   against the roots the user pinned with ``--tsa-roots``, else ``unpinned``)
   and its Merkle inclusion; the key disclosure (in the bundle if the owner
   chose so, else delivered apart: ``--disclosure``) against the key
   commitment;
5. the custody excerpt: every full entry's signature and the hash chain
   through every line, and that every exhibit's intake and examination are
   logged with the right hashes;
6. each exhibit against its intake record; each finding against its exhibit;
   each reduced-resolution reference against its signed work record (by the
   hash of the file it was made from, its size and its fingerprint), and made
   again where that file is in the bundle;
7. each exhibit taken from the web against the payload of its WARC record,
   each WARC file against its recorded SHA-256 and its RFC 3161 token
   (:mod:`.collection`);
8. each examination re-run from the disclosed detection key, and every stored
   number compared (the decoy control and the alignment included); the
   robustness battery re-run on the registered marked file, row by row;
9. the dossier data rebuilt from the bundle and compared byte for byte with
   ``report/dossier.json``; the figures redrawn and compared pixel for pixel;
   the HTML re-rendered and compared; the PDF's PAdES signature checked, and
   its signed content compared with the PDF re-rendered from the data.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path

from claimkit.dossier.data import case_files
from claimkit.errors import CheckFailed, InputError
from claimkit.evidence import signing
from claimkit.verify.checks import (
    check_custody,
    check_disclosures,
    check_exhibit,
    check_manifest,
    check_references,
    path_audit,
)
from claimkit.verify.collection import check_collection
from claimkit.verify.dossier import check_dossier
from claimkit.verify.policy import Policy
from claimkit.verify.report import NOT_DONE, SKIPPED, VerifyReport
from claimkit.verify.rerun import rerun_examination, rerun_robustness
from claimkit.verify.trust import check_signer
from claimkit.verify.unpack import folder_files, safe_extract

__all__ = ["verify_bundle"]


def verify_bundle(path: str | os.PathLike, *, rerun: bool = True, robustness: bool = True,
                  expect_keys: tuple[str, ...] = (), tsa_roots=None,
                  disclosure: str | os.PathLike | None = None,
                  policy: Policy | None = None) -> VerifyReport:
    """Verify a bundle zip or an unpacked bundle/case folder; never raises for a failed check.

    Parameters
    ----------
    path : path-like
        The zip, or a folder laid out like one (a case folder after ``report``).
    rerun : bool
        Re-run each examination and redraw the dossier (the slow part). Without
        it only hashes, signatures, tokens and the custody chain are checked,
        and the report says so with a "skipped" re-run check.
    robustness : bool
        Also re-run the robustness battery (with ``rerun``); skipping it is
        reported as a failed check.
    expect_keys, tsa_roots, disclosure
        The user's pins and a separately delivered disclosure: see :class:`Policy`.
    policy : Policy, optional
        The whole policy at once; when given, the other options are taken from it.
    """
    if policy is None:
        policy = Policy(rerun=rerun, robustness=robustness, expect_keys=tuple(expect_keys),
                        tsa_roots=None if tsa_roots is None else tuple(tsa_roots),
                        disclosure=None if disclosure is None else Path(disclosure))
    path = Path(path)
    rep = VerifyReport(str(path))
    if not path.exists():
        raise InputError("no such file or folder", path=path)
    tmp = None
    try:
        if path.is_dir():
            root = path
            try:
                files = folder_files(root)
            except CheckFailed as exc:
                rep.add("bundle layout", False, exc.message)
                return rep
        else:
            tmp = Path(tempfile.mkdtemp(prefix="claimkit-verify-"))
            try:
                files = safe_extract(path, tmp)
            except CheckFailed as exc:
                rep.add("bundle layout", False, exc.message)
                return rep
            root = tmp
        rep.add("bundle layout", True, f"{len(files)} files, no links, no paths leaving the bundle")
        _verify_unpacked(root, files, policy, rep)
        return rep
    finally:
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)


def _verify_unpacked(root: Path, files: list[str], policy: Policy, rep: VerifyReport) -> None:
    manifest, pub = check_manifest(root, files, rep)
    if pub is None:
        return
    fp = signing.fingerprint(signing.raw_public(pub))
    check_signer(fp, policy, rep)
    try:
        case, exhibits, findings = case_files(root)
    except (InputError, KeyError, ValueError) as exc:
        rep.add("case files", False, str(exc))
        return
    unsafe = path_audit(root, exhibits, findings)
    rep.add("paths in the bundle", not unsafe, "; ".join(unsafe) if unsafe else
            "every path named in the bundle's records stays inside it")
    if unsafe:
        return
    owner_fp = case.get("owner", {}).get("public_key_sha256")
    rep.add("case key", owner_fp == fp, "case.json names the bundle's key" if owner_fp == fp
            else "case.json names another key than the bundle's (key replaced)")
    listed = {f["path"] for f in (manifest or {}).get("files", [])}
    keys = check_disclosures(root, fp, rep, policy)
    rerun, robustness = policy.rerun, policy.robustness
    if rerun and not keys:
        rep.add("re-run", False, "not done: no key disclosure (the bundle holds no key "
                "material; give the one the owner delivered with --disclosure DIR, or ask "
                "for --no-rerun to check integrity only)", status=NOT_DONE)
        rerun = robustness = False
    check_custody(root, pub, exhibits, findings, rep)
    check_references(root, findings, rep)
    for ex in exhibits:
        i = ex["exhibit_id"]
        f = findings.get(i)
        if not check_exhibit(root, ex, f, listed, rep) or not rerun:
            continue
        try:
            rerun_examination(root, ex, f, keys, rep)
        except (InputError, OSError, KeyError, ValueError) as exc:
            rep.add(f"{i} re-run", False, f"cannot be re-run ({exc})")
    check_collection(root, exhibits, rep, tsa_roots=policy.tsa_roots)
    if rerun and robustness:
        try:
            rerun_robustness(root, findings, keys, rep)
        except (InputError, OSError, KeyError, ValueError) as exc:
            rep.add("robustness", False, f"cannot be re-run ({exc})")
    elif rerun:
        rep.add("robustness re-run", False, "skipped on request")
    # Figures, HTML and PDF need no key: they are redrawn whenever a re-run was asked for.
    check_dossier(root, pub, rep, full=policy.rerun)
    if not policy.rerun:
        rep.add("re-run", True, "skipped on request (--no-rerun): the examinations, figures "
                "and PDF were not re-derived", status=SKIPPED)
