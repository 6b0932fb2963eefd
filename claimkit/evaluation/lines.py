"""Both lines for one exhibit: the content line, its consistency with the mark, the opinion.

Pure: pictures come in as luma arrays and records as dicts, so the case
examination, ``examine --json`` and ``verify`` (which re-runs it) share one
computation.
"""

from __future__ import annotations

import numpy as np

from claimkit.content.assess import agreement, content_line, layout_check
from claimkit.evaluation import opinion
from claimkit.mark import scales

__all__ = ["content_warnings", "weigh"]


def weigh(exhibit_luma: np.ndarray, *, label: str, mark: dict, threshold: float,
          work_id: str | None, work_record: dict | None, owner: str | None,
          reference_luma: np.ndarray | None = None, reference: str = "registered marked file",
          reference_scale: float = 1.0, robustness: dict | None = None) -> dict:
    """``content``, ``content_mismatch`` and ``evaluation`` for one exhibit.

    Parameters
    ----------
    exhibit_luma : ndarray
        The whole exhibit's luma.
    label : str
        The exhibit's name in the propositions ("Exhibit 1", a file name).
    mark : dict
        The examination's report (``detected``, ``registered``, ``geometry``).
    threshold : float
        The examination's false-alarm threshold.
    work_id, work_record : str, dict or None
        The work the exhibit is compared with (named by the mark's payload,
        else matched by fingerprint) and its signed record (for the fingerprint).
    owner : str or None
        The owner's name, for the propositions.
    reference_luma : ndarray, optional
        The registered picture (the published marked file or a reduced
        reference); without it the record's fingerprint is used.
    reference : str
        What ``reference_luma`` is.
    reference_scale : float
        Reference pixels per registered-picture pixel (below 1 for a reduced reference).
    robustness : dict, optional
        The case's robustness battery of the registered file.
    """
    if work_id is None:
        content = {"basis": "none", "limited_to_fingerprint": False, "corresponds": None,
                   "statistic": None, "registration": None, "null": None, "log10_lr": 0.0,
                   "reason": "no registered work is named by a mark or matched by fingerprint"}
    else:
        content = content_line(exhibit_luma, reference_luma=reference_luma, reference=reference,
                               reference_scale=reference_scale,
                               work_fingerprint=(work_record or {}).get("fingerprint"))
    detected = bool(mark.get("detected"))
    geometry = mark.get("geometry") if detected else None
    if geometry and "level" in geometry and reference_luma is not None:
        # Found at a coarse view: its scale is against the registered picture's coarse level;
        # the content line's is against the picture itself.
        h, w = np.shape(reference_luma)[:2]
        geometry = scales.relative_to_original(
            geometry, (round(h / reference_scale), round(w / reference_scale)))
    content["agreement_with_mark"] = agreement(content, geometry)
    if detected and content.get("corresponds") is None and reference_luma is not None \
            and geometry and geometry.get("matrix"):
        # The content line cannot decide alone; the mark's geometry can still be checked
        # against the work's broad layout (a consistency check, refuting only).
        content["layout_with_mark"] = layout_check(
            reference_luma, exhibit_luma, np.asarray(geometry["matrix"]) / reference_scale,
            uses_mark_geometry=True)
    refuted = bool((content.get("layout_with_mark") or {}).get("refutes"))
    mismatch = bool(detected and (content.get("corresponds") is False or refuted))
    # The format the mark line rests on: the one read where the mark was found, else the work's.
    mark_format = (mark.get("mark_format") if detected else None) or \
        ((work_record or {}).get("mark_params") or {}).get("format")
    evaluation = opinion.evaluate(exhibit=label, work_id=work_id, owner=owner, detected=detected,
                                  threshold=threshold, content=content,
                                  agreement=content["agreement_with_mark"], robustness=robustness,
                                  mark_format=mark_format)
    evaluation["finding"] = opinion.finding_words(
        detected=detected, work_id=mark.get("work_id") if detected else None,
        content_mismatch=mismatch, limited=bool(content.get("limited_to_fingerprint")),
        inconclusive=content.get("basis") not in (None, "none") and content.get("corresponds") is None
        and not refuted,
        cannot_decide=content.get("cannot_decide"),
        layout_reason=content["layout_with_mark"]["reason"] if refuted else None)
    return {"content": content, "content_mismatch": mismatch, "evaluation": evaluation}


def content_warnings(*, detected: bool, content: dict | None, content_mismatch: bool) -> list[str]:
    """Codes of the warnings the report shows for one exhibit's content line.

    ``content-mismatch`` (the mark found in a picture that does not correspond to the work),
    ``content-inconclusive`` (the mark found, the content line could not decide) and
    ``lines-disagree`` (the two lines read different geometries; the weaker line is reported).
    The dossier writes their text (``claimkit.dossier.data``); ``bench_content_heldout.py``
    counts a disagreement as shown when one of them is.
    """
    c = content or {}
    codes = ["content-mismatch"] if content_mismatch else []
    if detected and c.get("basis") not in (None, "none") and c.get("corresponds") is None \
            and not content_mismatch:
        codes.append("content-inconclusive")
    ag = c.get("agreement_with_mark") or {}
    if ag.get("compared") and not ag.get("agree"):
        codes.append("lines-disagree")
    return codes
