"""Every date of a case in order, each with its source, and the warnings the order calls for.

Sources, from strongest to weakest: a **timestamp authority** (an RFC 3161
token: the record existed no later than this), **file metadata** (EXIF and
the like: anyone can write it), the **system clock** of the owner's computer
(proves nothing by itself) and **stated by a person** (the found date of an
exhibit). The checks compare days, because a stated date has no time of day.

Warnings (``code``, ``exhibit``, ``text``):

* ``registered-after-found``: the work an exhibit points to was registered
  (or first timestamped) on a later day than the exhibit was found or taken
  in. A copy found before the registration cannot show that the mark was put
  in before publication; it may even be the other way round.
* ``not-timestamped``: the work has no timestamp token, so nothing independent
  fixes when its record existed.
"""

from __future__ import annotations

import re
from datetime import date

__all__ = ["PRIORITY_STATEMENT", "build_timeline", "day_of"]

_DAY = re.compile(r"(\d{4})-(\d{2})-(\d{2})")

PRIORITY_STATEMENT = (
    "What the owner's timestamped record proves about priority: that the record, with the "
    "SHA-256 of the original and of the marked file, existed no later than the time in the "
    "token. If another party shows a mark or a record of its own for the same picture, the "
    "earlier independently timestamped record shows who held the picture first, as far as the "
    "authorities are trusted; neither a mark nor a timestamp shows who took the photograph or "
    "who owns the rights. claimkit reads only this owner's marks: a second party's mark, if any, "
    "would not be seen by this examination.")


def day_of(text: str | None) -> date | None:
    """The first ISO date (YYYY-MM-DD) in ``text``, or None."""
    m = _DAY.search(text or "")
    if not m:
        return None
    try:
        return date(int(m.group(1)), int(m.group(2)), int(m.group(3)))
    except ValueError:
        return None


def build_timeline(works: list[dict], exhibits: list[dict], matches: dict[str, str | None],
                   mismatches: dict[str, bool] | None = None) -> dict:
    """The ordered events and the warnings.

    Parameters
    ----------
    works : list of dict
        Each with ``work_id``, ``registered`` (``time``, ``time_source``),
        ``timestamps`` (each with ``gen_time``, ``tsa``, ``token_id``) and
        ``capture`` (file metadata, e.g. ``DateTimeOriginal``).
    exhibits : list of dict
        Each with ``exhibit_id``, ``label`` (how the dossier names it),
        ``found`` (``when``, ``time_source``) and ``taken_in`` (``time``,
        ``time_source``).
    matches : dict
        Exhibit id -> the work it points to (by mark or by content), or None.
    mismatches : dict, optional
        Exhibit id -> whether the content line found the picture does not
        correspond to the work the mark names (gives ``content-mismatch``).

    Returns
    -------
    dict
        ``events`` (time, day, source, what; in order, undated ones last),
        ``warnings`` (list of ``{code, exhibit, text}``) and ``priority``.
    """
    events: list[dict] = []
    by_work = {w["work_id"]: w for w in works}
    first_fix: dict[str, tuple[date | None, str]] = {}
    for w in works:
        wid = w["work_id"]
        for key in ("DateTimeOriginal", "CreateDate", "DateTime"):
            v = (w.get("capture") or {}).get(key)
            if v:
                txt = str(v).replace(":", "-", 2)
                events.append({"time": txt, "day": _iso(day_of(txt)), "source": "file metadata",
                               "what": f"work {wid}: {key} in the original file"})
                break
        reg = w.get("registered") or {}
        events.append({"time": reg.get("time"), "day": _iso(day_of(reg.get("time"))),
                       "source": reg.get("time_source") or "system clock",
                       "what": f"work {wid} registered (record signed)"})
        stamps = sorted(w.get("timestamps") or [], key=lambda t: t.get("gen_time") or "")
        for t in stamps:
            events.append({"time": t.get("gen_time"), "day": _iso(day_of(t.get("gen_time"))),
                           "source": "timestamp authority"
                           + (f" ({t['tsa']})" if t.get("tsa") else ""),
                           "what": f"work {wid}: record covered by timestamp token "
                                   f"{t.get('token_id', '')}".rstrip()})
        days = [d for d in (day_of(reg.get("time")),
                            day_of(stamps[0].get("gen_time")) if stamps else None) if d]
        first_fix[wid] = (max(days) if days else None,
                          "timestamped" if stamps else "registered")
    warnings: list[dict] = []
    for ex in exhibits:
        eid = ex["exhibit_id"]
        label = ex.get("label") or eid
        found = ex.get("found") or {}
        fday = day_of(found.get("when"))
        events.append({"time": found.get("when"), "day": _iso(fday),
                       "source": found.get("time_source") or "stated by a person",
                       "what": f"{label} found"})
        taken = ex.get("taken_in") or {}
        tday = day_of(taken.get("time"))
        events.append({"time": taken.get("time"), "day": _iso(tday),
                       "source": taken.get("time_source") or "system clock",
                       "what": f"{label} taken into the case"})
        wid = matches.get(eid)
        if (mismatches or {}).get(eid):
            warnings.append({"code": "content-mismatch", "exhibit": eid, "text": (
                f"{label}: the owner's mark naming work {wid} was found, but the picture does "
                "not correspond to the registered work, consistent with a transplanted mark. "
                "No derivation from the work is claimed.")})
        if not wid or wid not in by_work:
            continue
        wday, how = first_fix[wid]
        seen = min([d for d in (fday, tday) if d] or [None]) if (fday or tday) else None
        if wday and seen and wday > seen:
            warnings.append({"code": "registered-after-found", "exhibit": eid, "text": (
                f"{label} was {'found' if fday == seen else 'taken in'} on {seen.isoformat()}, "
                f"before work {wid} was {how} on {wday.isoformat()}. The record cannot show that "
                "the mark was in the picture before this copy existed.")})
        if not by_work[wid].get("timestamps"):
            warnings.append({"code": "not-timestamped", "exhibit": eid, "text": (
                f"{label}: work {wid} has no timestamp token; nothing independent fixes when its "
                "record existed (its registration time is from the owner's system clock).")})
    events.sort(key=lambda e: (e["day"] is None, e["day"] or "", e["time"] or ""))
    return {"events": events, "warnings": warnings, "priority": PRIORITY_STATEMENT,
            "notes": _same_day_notes(events)}


_CLOCK = re.compile(r"\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}")


def _same_day_notes(events: list[dict]) -> list[str]:
    """Where an event dated to the day only shares its day with timed events: order unknown."""
    notes = []
    for day in sorted({e["day"] for e in events if e["day"]}):
        same = [e for e in events if e["day"] == day]
        loose = [e["what"] for e in same if not _CLOCK.search(e["time"] or "")]
        timed = [e["what"] for e in same if _CLOCK.search(e["time"] or "")]
        if loose and timed:
            notes.append(f"{' and '.join(loose)} {'is' if len(loose) == 1 else 'are'} dated to the "
                         f"day only ({day}). How {'it falls' if len(loose) == 1 else 'they fall'} "
                         f"on that day against these timed events is not known: "
                         f"{'; '.join(timed)}. The table lists the day-only dates first.")
    return notes


def _iso(d: date | None) -> str | None:
    return None if d is None else d.isoformat()
