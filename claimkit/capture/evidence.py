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

__all__ = ["CAPTURES", "capture_files", "capture_records", "collection_data"]


def capture_files(root: Path) -> list[tuple[Path, dict]]:
    """Every capture record of a case or bundle, with its file (``captures/cap-*.json``)."""
    out = []
    folder = Path(root) / CAPTURES
    if folder.is_dir():
        for p in sorted(folder.glob("cap-*.json")):
            try:
                rec = json.loads(p.read_bytes())
            except ValueError:
                continue
            if isinstance(rec, dict) and rec.get("capture_id"):
                out.append((p, rec))
    return out


def capture_records(root: Path) -> dict[str, dict]:
    """Capture records by capture ID."""
    return {rec["capture_id"]: rec for _, rec in capture_files(root)}


def _gap(last: str | None, stamp: dict | None) -> float | None:
    """Seconds from the last WARC-Date (capturing clock) to the token's time (the TSA's).

    Positive: the token came after the last record, as it must; a negative
    value means the capturing clock ran ahead of the authority's by at least
    that much (less the TSA's stated accuracy)."""
    from datetime import datetime

    if not last or not stamp or not stamp.get("gen_time"):
        return None
    try:
        a = datetime.fromisoformat(last.replace("Z", "+00:00"))
        b = datetime.fromisoformat(stamp["gen_time"].replace("Z", "+00:00"))
    except ValueError:
        return None
    return round((b - a).total_seconds(), 3)


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
        dates = sorted(x.get("date") for x in c.get("exchanges") or [] if x.get("date"))
        captures.append({
            "first_record": dates[0] if dates else None,
            "last_record": dates[-1] if dates else None,
            "clock_vs_token_s": _gap(dates[-1] if dates else None, c.get("timestamp")),
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


