"""The evaluative opinion for one exhibit: propositions, a likelihood ratio per line, the words.

Two lines of evidence are weighed apart and then, where that is sound, together:

* the **mark line**: the event "the owner's mark naming work W was found"
  (or not). Under Hp its probability is the rate at which marked copies in
  the robustness battery were found (the case's own battery of the registered
  file where it was run, else the project's measured battery); under Hd it is
  at most the detection threshold, the false-alarm bound's level, which holds
  over the choice of key for any picture that never carried the mark. That
  denominator assumes nobody *transplanted* the mark into another picture:
  the mark can be estimated from published copies and added to any picture,
  so on its own the mark line cannot tell derivation from a transplant.
* the **content line** (:mod:`claimkit.content`): whether the picture itself
  corresponds to the registered work, with its own measured null.

They are combined (the product of the ratios) only where they are
independent and consistent: the content line never reads the mark, their
randomness differs (keys against pictures), and their geometries agree. A mark
found in a picture that does not correspond to the work is a content mismatch:
no derivation is claimed and the reported value is the content line's.
"""

from __future__ import annotations

from claimkit.evaluation import lr

__all__ = ["MARK_BATTERY_MEASURED", "SCALE_NAME", "evaluate", "finding_words"]

SCALE_NAME = ("ENFSI Guideline for Evaluative Reporting in Forensic Science (2015), "
              "table of verbal equivalents")

#: The project's own measurement of the mark line under Hp, per mark format, used where no
#: battery was run on the registered file: copies found with the right work at P_fa <= 1e-9 by
#: benchmarks/bench_robustness.py --format N (eight pictures from 300 to 2000 px, the whole
#: stress battery of 33 attacks, examined as ``claimkit stress`` does, with the owner's payload
#: list), one run of each format on the same code (README, "Measured robustness"); format 3's
#: re-measured after its coarse component was strengthened for small web copies (232 -> 233).
MARK_BATTERY_MEASURED = {
    "claimkit-mark/3": {"detected": 233, "trials": 264,
                        "source": "benchmarks/bench_robustness.py --format 3 (mark format 3, "
                                  "eight pictures, the whole stress battery)"},
    "claimkit-mark/2": {"detected": 235, "trials": 264,
                        "source": "benchmarks/bench_robustness.py --format 2 (mark format 2, "
                                  "eight pictures, the whole stress battery)"},
}


def _inline(sentence: str) -> str:
    """``sentence`` as it reads inside another: a leading "The " in lower case."""
    return "the " + sentence[4:] if sentence.startswith("The ") else sentence


def _battery(robustness: dict | None, mark_format: str | None = None) -> dict:
    rows = [r for r in ((robustness or {}).get("rows") or []) if r.get("attack") != "none"]
    if rows:
        k = sum(1 for r in rows if r.get("detected") and r.get("same_payload") is not False)
        return {"detected": k, "trials": len(rows),
                "source": "robustness battery of the registered marked file in this case"}
    if mark_format in MARK_BATTERY_MEASURED:
        return dict(MARK_BATTERY_MEASURED[mark_format])
    # A format not measured (format 1, or none known): the lowest rate measured, which moves
    # the ratio towards 1 whether the mark was found or not.
    low = min(MARK_BATTERY_MEASURED.values(), key=lambda b: b["detected"] / b["trials"])
    return {**low, "source": low["source"] + f"; format {mark_format or 'unknown'} not "
            "measured, the lowest rate measured is used"}


def finding_words(*, detected: bool, work_id: str | None, content_mismatch: bool,
                  limited: bool, inconclusive: bool = False,
                  cannot_decide: str | None = None, layout_reason: str | None = None) -> str:
    """The investigative finding, in words (what was observed, not what it means)."""
    if not detected:
        return "No mark of this owner was found."
    named = f" naming work {work_id}" if work_id else ""
    if content_mismatch and layout_reason:
        return (f"The owner's mark{named} was found, but the picture does not correspond to the "
                f"registered work: {layout_reason}. This is consistent with a transplanted mark. "
                "The content line's keypoints could not decide alone; this check uses the "
                "mark's geometry. No derivation from the work is claimed.")
    if inconclusive:
        why = cannot_decide or "the work has too little texture"
        return (f"The owner's mark{named} was found. The content line cannot decide whether the "
                f"picture corresponds to the registered work: {why}. A transplanted mark "
                "cannot be excluded, so no derivation from the work is claimed.")
    if content_mismatch:
        return (f"The owner's mark{named} was found, but the picture does not correspond to the "
                "registered work, consistent with a transplanted mark"
                + (" (the comparison was limited to the work record's perceptual fingerprint)"
                   if limited else "") + ". No derivation from the work is claimed.")
    return f"The owner's mark{named} was found."


def evaluate(*, exhibit: str, work_id: str | None, owner: str | None, detected: bool,
             threshold: float, content: dict | None, agreement: dict | None,
             robustness: dict | None = None, mark_format: str | None = None) -> dict:
    """The evaluation block of a finding (JSON-ready).

    Parameters
    ----------
    exhibit : str
        How the exhibit is named in the propositions ("Exhibit 1", a file name).
    work_id, owner : str or None
        The work the mark or the fingerprint points to, and its owner.
    detected, threshold : bool, float
        The mark examination's outcome and its false-alarm threshold.
    content : dict or None
        :func:`claimkit.content.assess.content_line`'s result.
    agreement : dict or None
        :func:`claimkit.content.assess.agreement`'s result.
    robustness : dict or None
        The case's robustness battery of the registered file, if run.
    mark_format : str or None
        The mark format the finding rests on (``claimkit-mark/3``): the format read
        where the mark was found, else the registered work's. Without a battery of
        the registered file, the mark line's rate under Hp is that format's
        measured rate (:data:`MARK_BATTERY_MEASURED`).

    Notes
    -----
    Where the mark was found but the content line could not decide (or there was
    no content line), no opinion is given: the mark line alone cannot tell a copy
    of the work from a picture carrying a transplanted mark, so
    ``reported_log10_lr`` is None and ``verbal`` says why; the mark line's own
    ratio stays in ``log10_lr`` and ``lines``.
    """
    if work_id is None:
        # No work named by a mark or matched by appearance: nothing to state propositions about.
        return {"propositions": None,
                "log10_lr": {"mark": None, "content": None, "combined": None},
                "lines": {}, "combination": "not evaluated: no registered work is named by a "
                "mark or matched by appearance", "reported_log10_lr": None,
                "cap_log10": lr.CAP_LOG10,
                "verbal": "Not evaluated: no registered work is named by a mark or matched by "
                          "appearance, so there are no source-level propositions to weigh.",
                "scale": SCALE_NAME, "derivation_claimed": False}
    w = work_id
    who = owner or "the owner"
    hp = f"{exhibit} derives from work {w} of {who}"
    hd = f"{exhibit} derives from a picture that is not work {w}"
    bat = _battery(robustness, mark_format)
    mark_lr = lr.log10_lr_detection(detected, bat["detected"], bat["trials"], threshold)
    lines = {"mark": {
        "event": "mark found" if detected else "mark not found",
        "log10_lr": round(mark_lr, 3),
        "under_hp": bat,
        "under_hd": f"at most the threshold {threshold:g} (false-alarm bound, over the choice of key)",
        "assumes": "no mark was transplanted from a published copy into another picture",
    }}
    has_content = bool(content) and content.get("corresponds") is not None
    layout = (content or {}).get("layout_with_mark") or {}
    refuted = bool(detected and layout.get("refutes"))
    inconclusive = bool(content) and content.get("basis") not in (None, "none") \
        and content.get("corresponds") is None and not refuted
    mismatch = bool(detected and has_content and content["corresponds"] is False) or refuted
    if has_content:
        lines["content"] = {
            "event": ("picture corresponds to the work" if content["corresponds"]
                      else "picture does not correspond to the work"),
            "basis": content["basis"], "limited_to_fingerprint": content["limited_to_fingerprint"],
            "log10_lr": content["log10_lr"],
        }
    if refuted:
        lines["layout"] = {
            "event": layout.get("event") or "placed by the mark's geometry, the picture shares "
                                            "none of the work's broad layout",
            "uses_mark_geometry": True, "log10_lr": layout["log10_lr"],
        }
    agree = (agreement or {}).get("agree")
    combined = None
    if refuted:
        why = ("not combined: the content line's keypoints could not decide, and "
               + lines["layout"]["event"] + ", which a transplanted mark explains; that "
               "consistency check uses the mark's geometry, so it is reported alone and the mark "
               "line is not multiplied in")
        reported = layout["log10_lr"]
    elif mismatch:
        why = ("not combined: the mark was found in a picture that does not correspond to the "
               "work, which a transplanted mark explains; the content line is reported")
        reported = content["log10_lr"]
    elif detected and (inconclusive or not has_content):
        why = ("not combined: " + (
            "the content line cannot decide (" + (content.get("cannot_decide")
                                                  or "the work has too little texture") + ")"
            if inconclusive else "there is no content line (neither the registered picture "
            "nor its fingerprint was at hand)")
            + "; the mark line alone cannot exclude a transplanted mark, so no opinion on the "
            "propositions is given")
        reported = None
    elif inconclusive or not has_content:
        why = ("not combined: " + ("the content line cannot decide" if inconclusive else
                                   "there is no content line")
               + "; the mark line alone is reported (the mark was not found)")
        reported = mark_lr
    elif detected and agree is False:
        why = ("not combined: the two lines read different geometries; the weaker line is "
               "reported and the disagreement is shown")
        reported = min(mark_lr, content["log10_lr"])
    else:
        combined = lr.combine([mark_lr, content["log10_lr"]])
        why = ("combined: the content line does not use the mark's key, payload or geometry, "
               "the mark's chance is over keys and the content's over pictures"
               + (", and the two geometries agree" if agree else ""))
        reported = combined
    if reported is None:
        # The mark line's ratio holds only if nobody transplanted the mark, which nothing here
        # could check: it is not turned into an opinion that could be quoted without that.
        words = ("No opinion on the propositions is given: the mark was found, but "
                 + ("the content line could not decide whether the picture corresponds to the "
                    f"work ({content.get('cannot_decide') or 'the work has too little texture'})"
                    if inconclusive else "the picture could not be compared with the work")
                 + ", and the mark alone cannot tell a copy of the work from another picture "
                 "into which the mark was transplanted from a published copy. The mark line's "
                 "ratio is listed with the lines; it holds only if no mark was transplanted, "
                 "which nothing here could check.")
    else:
        reported = lr.cap(reported)
        # A label that opens a sentence ("The file x.jpg") reads in lower case inside one.
        words = lr.verbal(reported, "the proposition that " + _inline(hp),
                          "the proposition that " + _inline(hd))
    return {
        "propositions": {"Hp": hp, "Hd": hd, "level": "source"},
        "log10_lr": {"mark": lines["mark"]["log10_lr"],
                     "content": lines.get("content", {}).get("log10_lr"),
                     **({"layout": lines["layout"]["log10_lr"]} if "layout" in lines else {}),
                     "combined": None if combined is None else round(combined, 3)},
        "lines": lines,
        "combination": why,
        "reported_log10_lr": None if reported is None else round(reported, 3),
        "cap_log10": lr.CAP_LOG10,
        "verbal": words,
        "scale": SCALE_NAME,
        # Derivation is claimed only where the picture itself was found to correspond; an
        # inconclusive or missing content line claims nothing.
        "derivation_claimed": bool(detected and not mismatch and reported is not None
                                   and reported > 0 and has_content and content["corresponds"]),
    }
