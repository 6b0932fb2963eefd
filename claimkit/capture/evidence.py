"""What the case holds about collection, read back for the dossier.

:func:`collection_data` gathers, from the files of a case or an unpacked
bundle only (the intake records' ``acquisition`` and ``captures/*.json``),
the facts the dossier's collection section shows; ``verify`` re-checks them
(:mod:`claimkit.verify.collection`).
"""

from __future__ import annotations

import json
from pathlib import Path

from claimkit.case.layout import CAPTURES

__all__ = ["CAPTURES", "capture_records", "collection_data"]


def capture_records(root: Path) -> dict[str, dict]:
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
    caps = capture_records(root)
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
                "chain_verified", "verify_error", "trust_store")},
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


