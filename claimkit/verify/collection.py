"""Collection checks: captured exhibits against their WARC records, WARCs against their tokens.

Each exhibit whose intake record has an ``acquisition`` (``case capture``,
``scan --case`` on a WARC file) is compared, byte for byte, with the content
of the WARC record it names, read with warcio with block and payload digests
and record lengths checked (:mod:`claimkit.capture.warc`). Each WARC file is
checked against the SHA-256 its capture or intake record gives; each
snapshot against its ``resource`` record; each RFC 3161 token against the
WARC file's digest and the nonce of the stored request
(:func:`claimkit.evidence.timestamp.check_token`), against the roots the user
pinned with ``--tsa-roots``; without them, against the TSA certificates the
bundle carries, and the check is reported ``unpinned``.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

from claimkit.capture.evidence import capture_files
from claimkit.capture.warc import record_payload
from claimkit.case.layout import CAPTURES, CASE_FILE, CUSTODY_COPY, EXHIBITS, inside
from claimkit.errors import CheckFailed, InputError
from claimkit.evidence import timestamp
from claimkit.evidence.storage import sha256_file
from claimkit.verify.report import UNPINNED

__all__ = ["check_collection"]


def _safe(root: Path, rel: object, folder: str = CAPTURES) -> str | None:
    return rel if isinstance(rel, str) and inside(root, rel, folder) is None else None


def _log_entries(root: Path) -> list[dict]:
    """The full entries of the custody copy: a custody excerpt (canonical JSON, its lines
    verbatim) or, in older bundles, the log itself (JSON Lines)."""
    try:
        raw = (root / CUSTODY_COPY).read_bytes()
    except OSError:
        return []
    try:
        doc = json.loads(raw)
        lines = [x["line"] for x in doc.get("entries", []) if isinstance(x, dict) and "line" in x]
    except (ValueError, AttributeError):
        lines = raw.splitlines()
    out = []
    for line in lines:
        try:
            e = json.loads(line)
        except ValueError:
            continue
        if isinstance(e, dict):
            out.append(e)
    return out


def _logged(root: Path) -> dict[str, set[str]]:
    """Hashes the custody copy records for captures: capture records, WARC files.

    The copy's signatures and chain are checked by the custody check; here only
    its entries for this case are read, so that a capture record or WARC file
    that was never logged (added to the bundle afterwards) is named.
    """
    out: dict[str, set[str]] = {"capture_record": set(), "warc": set()}
    try:
        case_id = json.loads((root / CASE_FILE).read_bytes()).get("case_id")
    except (OSError, ValueError):
        return out
    for e in _log_entries(root):
        if (e.get("details") or {}).get("case_id") != case_id:
            continue
        if e.get("action") in ("web pages captured", "web archive taken in"):
            for k, seen in out.items():
                v = (e.get("items") or {}).get(k)
                if isinstance(v, str):
                    seen.add(v)
    return out


def _sha(path: Path) -> str:

    return sha256_file(path)


def check_collection(root: str | Path, exhibits: list[dict], rep, *,
                     tsa_roots: tuple | None = None) -> None:
    """Add every collection check to ``rep`` (none when nothing was captured)."""

    root = Path(root)
    out: list[tuple[str, bool, str]] = []
    warc_ok: dict[str, bool] = {}

    def warc_file(rel: object, expected: object, label: str) -> Path | None:
        rel_s = _safe(root, rel)
        if rel_s is None:
            out.append((label, False, f"names an unsafe or missing WARC path {rel!r}"))
            return None
        p = root / rel_s
        if rel_s not in warc_ok:
            if p.is_symlink() or not p.is_file():
                warc_ok[rel_s] = False
                out.append((f"WARC {rel_s}", False, "missing from the bundle"))
            else:
                got = _sha(p)
                warc_ok[rel_s] = got == expected
                out.append((f"WARC {rel_s}", got == expected,
                            f"SHA-256 {got} as recorded" if got == expected else
                            f"SHA-256 {got} is not the recorded {expected}"))
        return p if warc_ok[rel_s] else None

    logged = _logged(root)
    for path, cap in capture_files(root):
        cid = cap["capture_id"]
        w = cap.get("warc") or {}
        ok = (path.name == f"{cid}.json" and _sha(path) in logged["capture_record"]
              and w.get("sha256") in logged["warc"])
        out.append((f"capture {cid} custody", ok,
                    "the capture record and its WARC file are those the custody log recorded"
                    if ok else "the custody log has no capture entry with this record and "
                    "WARC file (added or changed after the capture)"))
        p = warc_file(w.get("file"), w.get("sha256"), f"capture {cid}")
        stamp = cap.get("timestamp")
        if stamp:
            out.append(_check_token(root, cid, stamp, w.get("sha256"), tsa_roots))
        if p is None:
            continue
        for page in cap.get("pages") or []:
            snap = page.get("snapshot")
            if snap:
                out.append(_check_snapshot(root, p, snap))
    _exhibits(root, exhibits, out, warc_file)
    scanned = {a.get("warc_sha256") for a in (ex.get("acquisition") for ex in exhibits)
               if isinstance(a, dict) and a.get("method") == "image response in a WARC file"}
    for sha in sorted(x for x in scanned if isinstance(x, str)):
        out.append((f"web archive {sha[:16]} custody", sha in logged["warc"],
                    "taken into the case with a custody entry" if sha in logged["warc"] else
                    "no custody entry takes this WARC file in"))
    for name, ok, detail in out:
        # A token that holds only against the certificate the bundle brings is unpinned.
        unpinned = ok and tsa_roots is None and name.endswith(" timestamp")
        rep.add(name, ok, detail, status=UNPINNED if unpinned else None)


def _exhibits(root: Path, exhibits: list[dict], out: list, warc_file) -> None:

    for ex in exhibits:
        a = ex.get("acquisition")
        if not isinstance(a, dict):
            continue
        i = ex.get("exhibit_id")
        p = warc_file(a.get("warc"), a.get("warc_sha256"), f"{i} acquisition")
        if p is None:
            out.append((f"{i} WARC payload", False, ("its WARC file does not check, so the "
                                                     "exhibit cannot be compared with it")))
            continue
        exf = _safe(root, ex.get("file"), EXHIBITS)
        try:
            _, payload = record_payload(p, a.get("warc_record_id") or "")
        except (InputError, CheckFailed) as exc:
            out.append((f"{i} WARC payload", False, exc.message))
            continue
        have = (root / exf).read_bytes() if exf and (root / exf).is_file() else None
        same = have is not None and have == payload
        out.append((f"{i} WARC payload", same,
                    f"the exhibit's bytes equal the payload of record {a.get('warc_record_id')} "
                    f"({a.get('url')})" if same else
                    f"the exhibit's bytes differ from the payload of record "
                    f"{a.get('warc_record_id')} (SHA-256 "
                    f"{hashlib.sha256(payload).hexdigest()[:16]}...)"))



def _check_snapshot(root: Path, warc: Path, snap: dict) -> tuple[str, bool, str]:

    rel = _safe(root, snap.get("file"))
    name = f"snapshot {rel}"
    try:
        _, payload = record_payload(warc, snap.get("record_id") or "")
    except (InputError, CheckFailed) as exc:
        return name, False, exc.message
    have = (root / rel).read_bytes() if rel and (root / rel).is_file() else None
    ok = have == payload and hashlib.sha256(payload).hexdigest() == snap.get("sha256")
    return name, ok, ("equals its resource record in the WARC" if ok else
                      "differs from its resource record in the WARC, or is missing")


def _check_token(root: Path, cid: str, stamp: dict, warc_sha: object,
                 tsa_roots: tuple | None = None) -> tuple[str, bool, str]:

    name = f"capture {cid} timestamp"
    rels = [r for r in (_safe(root, stamp.get(k)) for k in
                        ("token_file", "request_file", "tsa_certificates_file")) if r]
    if len(rels) != 3 or not all((root / r).is_file() for r in rels):
        return name, False, "token, request or TSA certificate file missing or unsafe"
    token, tsq, pem = ((root / r).read_bytes() for r in rels)
    try:
        digest, _alg, nonce = timestamp.parse_request(tsq)
        if not isinstance(warc_sha, str) or digest != bytes.fromhex(warc_sha):
            return name, False, "the stored request is for another digest than the WARC's"
        trusted = list(tsa_roots) if tsa_roots is not None else timestamp.load_certificates(pem)
        info = timestamp.check_token(token, digest=digest, nonce=nonce, trusted=trusted)
    except (CheckFailed, InputError) as exc:
        return name, False, exc.message
    except ValueError as exc:
        return name, False, f"damaged request or token ({exc})"
    if info.gen_time_iso != stamp.get("gen_time"):
        return name, False, (f"the token says {info.gen_time_iso}, the capture record "
                             f"{stamp.get('gen_time')}")
    return name, True, (f"RFC 3161 token over the WARC's SHA-256, made {info.gen_time_iso} by "
                        f"{info.tsa_name or info.signer_subject}; trust anchor: "
                        + ("a root you pinned" if tsa_roots is not None else
                           "the TSA certificate carried in the bundle (not pinned by you)"))
