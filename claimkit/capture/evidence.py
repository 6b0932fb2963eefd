"""What the case holds about collection, read back for the dossier and checked for ``verify``.

:func:`collection_data` gathers, from the files of a case or an unpacked
bundle only (the intake records' ``acquisition`` and ``captures/*.json``),
the facts the dossier's collection section shows. :func:`check_collection`
re-checks them as the other side would: each WARC file against the SHA-256
recorded for it, each exhibit's bytes against the payload of the WARC record
its intake record names (read with warcio, digests checked), each snapshot
against its ``resource`` record, and each timestamp token against the WARC
file's digest (RFC 3161, :mod:`claimkit.evidence.timestamp`).
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path, PurePosixPath

from claimkit.errors import CheckFailed, InputError

__all__ = ["CAPTURES", "check_collection", "collection_data"]

CAPTURES = "captures"


def _safe(rel: object) -> str | None:
    """``rel`` when it is a plain relative path inside the bundle, else None."""
    if not isinstance(rel, str) or not rel or "\\" in rel:
        return None
    p = PurePosixPath(rel)
    if p.is_absolute() or ".." in p.parts:
        return None
    return rel


def _captures(root: Path) -> dict[str, dict]:
    out = {}
    folder = root / CAPTURES
    if folder.is_dir():
        for p in sorted(folder.glob("cap-*.json")):
            try:
                rec = json.loads(p.read_bytes())
            except ValueError:
                continue
            if isinstance(rec, dict) and rec.get("capture_id"):
                out[rec["capture_id"]] = rec
    return out


def collection_data(root: str | Path, exhibits: list[dict]) -> dict:
    """The dossier's collection facts: one row per exhibit, one entry per capture."""
    root = Path(root)
    caps = _captures(root)
    rows = []
    for ex in exhibits:
        a = ex.get("acquisition")
        if not isinstance(a, dict):
            rows.append({"exhibit_id": ex.get("exhibit_id"), "method": "taken in from a file",
                         "source": ex.get("source"), "found": ex.get("found")})
            continue
        tls = a.get("tls") or None
        rows.append({
            "exhibit_id": ex.get("exhibit_id"), "method": a.get("method"),
            "url": a.get("url"), "final_url": a.get("final_url"), "page": a.get("page"),
            "captured": a.get("captured"), "time_source": a.get("time_source"),
            "http_status": a.get("http_status"), "server_date": a.get("server_date"),
            "last_modified": a.get("last_modified"), "etag": a.get("etag"),
            "content_type": a.get("content_type"), "ip": a.get("ip"),
            "tls": None if tls is None else {k: tls.get(k) for k in (
                "protocol", "subject", "issuer", "not_before", "not_after",
                "chain_verified", "verify_error")},
            "warc": a.get("warc"), "warc_sha256": a.get("warc_sha256"),
            "warc_record_id": a.get("warc_record_id"),
            "capture_id": a.get("capture_id"), "timestamp": a.get("timestamp"),
        })
    captures = []
    for cid, c in caps.items():
        captures.append({
            "capture_id": cid, "started": c.get("started"), "finished": c.get("finished"),
            "operator": c.get("operator"), "software": c.get("software"),
            "warc": c.get("warc"), "timestamp": c.get("timestamp"),
            "pages": [{"url": p.get("url"), "final_url": p.get("final_url"),
                       "http_status": p.get("http_status"), "tls": bool(p.get("tls")),
                       "images": len(p.get("images") or []),
                       "snapshot": (p.get("snapshot") or {}).get("file"),
                       "snapshot_note": p.get("snapshot_note")}
                      for p in c.get("pages") or []],
            "notes": c.get("notes") or [],
        })
    return {"exhibits": rows, "captures": captures,
            "captured": sum(1 for r in rows if r.get("warc"))}


def _sha(path: Path) -> str:
    from claimkit.evidence.storage import sha256_file

    return sha256_file(path)


def check_collection(root: str | Path, exhibits: list[dict]) -> list[tuple[str, bool, str]]:
    """Every collection check as (name, passed, detail); empty when nothing was captured."""
    from claimkit.capture.warc import record_payload

    root = Path(root)
    out: list[tuple[str, bool, str]] = []
    warc_ok: dict[str, bool] = {}

    def warc_file(rel: object, expected: object, label: str) -> Path | None:
        rel_s = _safe(rel)
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

    for cid, cap in _captures(root).items():
        w = cap.get("warc") or {}
        p = warc_file(w.get("file"), w.get("sha256"), f"capture {cid}")
        stamp = cap.get("timestamp")
        if stamp:
            out.append(_check_token(root, cid, stamp, w.get("sha256")))
        if p is None:
            continue
        for page in cap.get("pages") or []:
            snap = page.get("snapshot")
            if snap:
                out.append(_check_snapshot(root, p, snap))
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
        exf = _safe(ex.get("file"))
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
    return out


def _check_snapshot(root: Path, warc: Path, snap: dict) -> tuple[str, bool, str]:
    from claimkit.capture.warc import record_payload

    rel = _safe(snap.get("file"))
    name = f"snapshot {rel}"
    try:
        _, payload = record_payload(warc, snap.get("record_id") or "")
    except (InputError, CheckFailed) as exc:
        return name, False, exc.message
    have = (root / rel).read_bytes() if rel and (root / rel).is_file() else None
    ok = have == payload and hashlib.sha256(payload).hexdigest() == snap.get("sha256")
    return name, ok, ("equals its resource record in the WARC" if ok else
                      "differs from its resource record in the WARC, or is missing")


def _check_token(root: Path, cid: str, stamp: dict, warc_sha: object) -> tuple[str, bool, str]:
    from claimkit.evidence import timestamp

    name = f"capture {cid} timestamp"
    rels = [_safe(stamp.get(k)) for k in ("token_file", "request_file",
                                           "tsa_certificates_file")]
    if None in rels or not all((root / r).is_file() for r in rels):
        return name, False, "token, request or TSA certificate file missing or unsafe"
    token, tsq, pem = ((root / r).read_bytes() for r in rels)
    try:
        digest, _alg, nonce = timestamp.parse_request(tsq)
        if not isinstance(warc_sha, str) or digest != bytes.fromhex(warc_sha):
            return name, False, "the stored request is for another digest than the WARC's"
        info = timestamp.check_token(token, digest=digest, nonce=nonce,
                                     trusted=timestamp.load_certificates(pem))
    except (CheckFailed, InputError) as exc:
        return name, False, exc.message
    except ValueError as exc:
        return name, False, f"damaged request or token ({exc})"
    if info.gen_time_iso != stamp.get("gen_time"):
        return name, False, (f"the token says {info.gen_time_iso}, the capture record "
                             f"{stamp.get('gen_time')}")
    return name, True, (f"RFC 3161 token over the WARC's SHA-256, made {info.gen_time_iso} by "
                        f"{info.tsa_name or info.signer_subject}; trust anchor: the TSA "
                        "certificate carried in the bundle (not pinned by you)")
