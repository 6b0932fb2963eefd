"""How each item of a bundle is checked: paths, manifest, disclosures, custody, exhibits.

Each function adds its outcome to a :class:`~claimkit.verify.report.VerifyReport`
and never raises for a failed check; a failure names what failed.
"""

from __future__ import annotations

import json
from pathlib import Path

from claimkit.case import layout, reference
from claimkit.case.documents import ManifestDoc
from claimkit.case.layout import (
    CUSTODY_COPY,
    CUSTODY_COPY_V1,
    DISCLOSURES,
    MANIFEST,
    MANIFEST_SIG,
    PUBLIC_KEY,
)
from claimkit.errors import InputError
from claimkit.evidence import signing
from claimkit.evidence.custodylog import verify_log
from claimkit.evidence.disclose import check_disclosure
from claimkit.evidence.excerpt import verify_excerpt
from claimkit.evidence.storage import sha256_file
from claimkit.mark import payload
from claimkit.verify.policy import Policy
from claimkit.verify.report import VerifyReport
from claimkit.verify.rerun import work_record
from claimkit.verify.trust import check_tsa

__all__ = [
    "check_custody",
    "check_references",
    "check_disclosures",
    "check_exhibit",
    "check_manifest",
    "path_audit",
]


def path_audit(root: Path, exhibits: list[dict], findings: dict) -> list[str]:
    """Every path that a JSON file of the bundle names, checked before anything is read."""
    bad = []
    for ex in exhibits:
        i = ex.get("exhibit_id")
        if not isinstance(i, str) or layout.exhibit_number(i) is None:
            bad.append(f"intake record names the exhibit {i!r}")
            continue
        why = layout.inside(root, ex.get("file"), layout.EXHIBITS)
        if why:
            bad.append(f"{i}: intake record path {why}")
        f = findings.get(i)
        if f is None:
            continue
        why = layout.inside(root, (f.get("arrays") or {}).get("file"), layout.FINDINGS)
        if why:
            bad.append(f"{i}: finding arrays path {why}")
        if f.get("message_arrays") is not None:
            why = layout.inside(root, (f["message_arrays"] or {}).get("file"), layout.FINDINGS)
            if why:
                bad.append(f"{i}: finding message arrays path {why}")
        ref = f.get("reference")
        if ref:
            made = ref.get("made_from") if isinstance(ref.get("made_from"), dict) else {}
            for what, rel in (("reference", ref.get("file")),
                              ("reference source", made.get("file", ""))):
                why = layout.inside(root, rel, layout.REFERENCES) if rel != "" else None
                if why:
                    bad.append(f"{i}: finding {what} path {why}")
    folder = root / DISCLOSURES
    if folder.is_dir():
        for d in sorted(folder.iterdir()):
            try:
                doc = json.loads((d / "disclosure.json").read_bytes())
                stamps = doc.get("timestamps", [])
            except (OSError, ValueError, AttributeError):
                continue
            for st in stamps if isinstance(stamps, list) else []:
                for key in ("token_file", "tsa_cert_file"):
                    rel = st.get(key) if isinstance(st, dict) else None
                    why = layout.inside(d, rel, "timestamps") if rel is not None else None
                    if why:
                        bad.append(f"{d.name}: disclosure {key} {why}")
    return bad


def check_manifest(root: Path, files: list[str], rep: VerifyReport):
    """The manifest's signature, signer and every listed hash; returns (manifest, public key)."""
    try:
        body = (root / MANIFEST).read_bytes()
        sig = (root / MANIFEST_SIG).read_bytes()
        pub = signing.load_public_pem((root / PUBLIC_KEY).read_bytes())
    except FileNotFoundError as exc:
        rep.add("manifest", False, f"{Path(exc.filename).name} missing from the bundle")
        return None, None
    except ValueError:
        rep.add("manifest", False, f"{PUBLIC_KEY} is not an Ed25519 public key")
        return None, None
    signed = signing.verify(pub, body, sig)
    rep.add("manifest signature", signed,
            "manifest.json is signed by the key in the bundle" if signed
            else "manifest.json: the Ed25519 signature does not verify (manifest altered or "
                 "signed by another key)")
    try:
        doc = ManifestDoc.from_json(json.loads(body), path=MANIFEST)
        listed = doc.listed()
        manifest = doc.to_json()
    except ValueError:
        rep.add("manifest", False, "manifest.json is not JSON")
        return None, pub
    except InputError as exc:
        rep.add("manifest", False, exc.line())
        return None, pub
    fp = signing.fingerprint(signing.raw_public(pub))
    rep.add("manifest signer", manifest.get("signer", {}).get("public_key_sha256") == fp,
            f"signer key SHA-256 {fp}")
    bad = []
    for rel, f in sorted(listed.items()):
        if layout.unsafe_name(rel):
            bad.append(f"{rel}: unsafe path in the manifest")
            continue
        p = root / rel
        if not p.is_file():
            bad.append(f"{rel}: listed but missing")
        elif sha256_file(p) != f["sha256"]:
            bad.append(f"{rel}: SHA-256 differs from the manifest (file altered)")
    # A case folder still holds the masters its bundle withholds: named in the manifest by
    # hash, they are left alone when the bytes are the ones named.
    withheld = {w.get("path"): w.get("sha256") for w in manifest.get("withheld", [])
                if isinstance(w, dict)}
    extra = sorted(rel for rel in set(files) - set(listed) - {MANIFEST, MANIFEST_SIG}
                   if not (rel in withheld and sha256_file(root / rel) == withheld[rel]))
    bad += [f"{rel}: in the bundle but not in the manifest" for rel in extra]
    rep.add("file hashes", not bad,
            "; ".join(bad) if bad else f"{len(listed)} files, every SHA-256 matches")
    return manifest, pub


def _keys_of(chk) -> tuple:
    bits = payload.pack(chk.owner_tag, chk.serial, chk.payload_tag)
    return (chk.detection_seed, bits, chk)


def _disclosure_row(d: Path, name: str, fp: str, roots, rep: VerifyReport, *, foreign: str,
                    passed, more=None) -> tuple:
    """Check one disclosure folder, compare its key with the bundle's, add one row.

    ``more(chk, d)`` adds problems particular to the caller; ``passed(chk)`` words a
    pass. Returns (the check or None when unreadable, whether it passed).
    """
    try:
        chk = check_disclosure(d, tsa_roots=roots)
    except InputError as exc:
        rep.add(name, False, exc.message)
        return None, False
    probs = list(chk.problems)
    if chk.public_key_sha256 != fp:
        probs.append(foreign)
    probs += more(chk, d) if more is not None else []
    rep.add(name, not probs, "; ".join(probs) if probs else passed(chk))
    return chk, not probs


def check_disclosures(root: Path, fp: str, rep: VerifyReport,
                      policy: Policy | None = None) -> dict:
    """Each work's evidence in the bundle, and the key disclosures wherever they came from.

    Returns work_id -> (seed, payload bits, check) for the works whose key material
    verified (from the bundle, when the owner disclosed it there, or from
    ``policy.disclosure``).
    """
    policy = policy or Policy()
    roots = list(policy.tsa_roots) if policy.tsa_roots is not None else None
    out: dict = {}
    records: dict[str, bytes] = {}
    tsas: set[str] = set()
    folder = root / DISCLOSURES
    for d in sorted(folder.iterdir()) if folder.is_dir() else []:
        chk, ok = _disclosure_row(
            d, f"work {d.name}", fp, roots, rep,
            foreign="its public key is not the bundle's (key replaced)",
            passed=lambda c: f"record signature{', key commitment' if c.keys_included else ''} "
            f"and {len(c.timestamps)} timestamp token(s) verified"
            + ("" if roots is not None else " (against the TSA certificate in the bundle)"))
        if chk is None:
            continue
        tsas.update(t.get("tsa") or "?" for t in chk.timestamps)
        records[chk.work_id or d.name] = (d / "work-record.json").read_bytes()
        if ok and chk.keys_included:
            out[chk.work_id] = _keys_of(chk)
    check_tsa(tsas, policy, rep)
    if policy.disclosure is not None:
        _check_delivered(Path(policy.disclosure), fp, records, roots, out, rep)
    return out


def _check_delivered(path: Path, fp: str, records: dict, roots, out: dict,
                     rep: VerifyReport) -> None:
    """A disclosure delivered apart from the bundle: one folder, or a folder of them."""
    if not path.is_dir():
        raise InputError("not a disclosure folder", path=path)
    folders = [path] if (path / "disclosure.json").is_file() else \
        sorted(d for d in path.iterdir() if d.is_dir() and (d / "disclosure.json").is_file())
    if not folders:
        raise InputError("holds no disclosure.json", path=path)
    def against_bundle(chk, d: Path) -> list[str]:
        probs = [] if chk.keys_included else ["holds no key material"]
        if chk.work_id not in records:
            probs.append(f"its work {chk.work_id} is not in the bundle")
        elif (d / "work-record.json").read_bytes() != records[chk.work_id]:
            probs.append("its work record differs from the bundle's")
        return probs

    for d in folders:
        chk, ok = _disclosure_row(
            d, f"disclosure {d.name}", fp, roots, rep,
            foreign="signed by another key than the bundle's", more=against_bundle,
            passed=lambda c: f"delivered separately; key material for {c.work_id} "
            f"({c.mark_format}) matches the record's key commitment")
        if ok:
            out[chk.work_id] = _keys_of(chk)


def check_custody(root: Path, pub, exhibits: list[dict], findings: dict,
                  rep: VerifyReport) -> None:
    """The custody excerpt, and that every intake and examination is logged with its hashes."""
    if (root / CUSTODY_COPY_V1).is_file() and not (root / CUSTODY_COPY).is_file():
        log = verify_log(root / CUSTODY_COPY_V1, pub)     # a claimkit 0.2 bundle: whole log
        rep.add("custody log", log.ok, "; ".join(str(p) for p in log.problems)
                if log.problems else f"{log.lines} entries, signatures and hash chain intact")
    else:
        log = verify_excerpt(root / CUSTODY_COPY, pub)
        rep.add("custody log", log.ok, "; ".join(str(p) for p in log.problems)
                if log.problems else
                f"excerpt of {log.lines} entries: {len(log.entries)} of this case and its works "
                "in full and signed, the others by hash; the chain recomputes")
    intake = {}
    examined: dict[str, set] = {}     # every finding logged for an exhibit (re-examinations)
    case_id = None
    try:
        case_id = json.loads((root / layout.CASE_FILE).read_bytes()).get("case_id")
    except (OSError, ValueError):
        pass
    for e in log.entries:
        d = e.get("details", {})
        if d.get("case_id") != case_id:
            continue
        if e["action"] == "disputed file taken in":
            intake[d.get("exhibit_id")] = e["items"]
        elif e["action"] == "exhibit examined":
            examined.setdefault(d.get("exhibit_id"), set()).add(e["items"].get("finding"))
    probs = []
    for ex in exhibits:
        i = ex["exhibit_id"]
        rec = root / layout.intake_record(i)
        # .get: a tampered intake record may lack the field; that is a finding, not a crash.
        if intake.get(i, {}).get("exhibit") != ex.get("sha256"):
            probs.append(f"{i}: no custody entry takes in these bytes")
        elif rec.is_file() and intake[i].get("intake_record") != sha256_file(rec):
            probs.append(f"{i}: the intake record differs from the one logged")
        if i in findings:
            fpath = root / layout.finding_file(i)
            if sha256_file(fpath) not in examined.get(i, set()):
                probs.append(f"{i}: the stored finding is not the one logged at examination")
    present = {ex["exhibit_id"] for ex in exhibits}
    for i in sorted(set(intake) - present):
        probs.append(f"{i}: taken in according to the custody log, but not in the bundle "
                     "(exhibit removed)")
    rep.add("custody of exhibits", not probs,
            "; ".join(probs) if probs else "every intake and examination is logged with its hashes")


def check_exhibit(root: Path, ex: dict, finding: dict | None, listed: set[str],
                  rep: VerifyReport) -> bool:
    """The exhibit's bytes against its intake record, and the finding against the exhibit.

    Returns True when the finding may be re-run.
    """
    i = ex["exhibit_id"]
    rel = ex.get("file", "")
    p = root / rel
    if layout.unsafe_name(rel) or not p.is_file():
        rep.add(f"{i} exhibit", False, f"{rel}: missing (exhibit removed)")
        return False
    if rel not in listed:
        rep.add(f"{i} exhibit", False, f"{rel}: not in the manifest")
    got = sha256_file(p)
    want = ex.get("sha256")      # a tampered intake record may lack it: a failure, not a crash
    rep.add(f"{i} exhibit", got == want,
            f"{rel}: SHA-256 as at intake" if got == want else
            f"{rel}: SHA-256 {got[:16]}... differs from the intake record")
    if finding is None:
        rep.add(f"{i} finding", False, "not examined (no finding in the bundle)")
        return False
    if finding.get("exhibit_sha256") != ex.get("sha256"):
        rep.add(f"{i} finding", False, "the finding is for other bytes than the exhibit")
        return False
    return True


def check_references(root: Path, findings: dict, rep: VerifyReport) -> None:
    """Each reduced-resolution reference the findings use, tied to its signed work record.

    Needs no key: see :func:`claimkit.case.reference.tie_problems` for what is checked.
    A finding made before reduced references compared with the registered file itself;
    the manifest's hashes cover it.
    """
    seen: dict[str, list[str]] = {}
    for i, f in sorted(findings.items()):
        ref = f.get("reference")
        if not isinstance(ref, dict) or ref.get("kind") != reference.REDUCED:
            continue
        seen.setdefault(str(ref.get("file")), []).append(i)
        if len(seen[str(ref.get("file"))]) > 1:
            continue
        probs = reference.tie_problems(root, ref, work_record(root, ref.get("work_id")))
        rep.add(f"reference {ref.get('work_id')}", not probs, "; ".join(probs) if probs else
                f"{ref['file']}: {reference.describe(ref)}, made from the file whose SHA-256 "
                "the signed work record holds, and it shows the registered picture "
                "(fingerprint)" + (", made again from it and equal within the tolerance"
                                   if (root / str(reference.registered_file(ref))).is_file()
                                   else ""))
