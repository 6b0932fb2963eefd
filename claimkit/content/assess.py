"""The content line's result for one exhibit: registration, decision, likelihood ratio.

Two bases, said in the result:

* a **reference picture** (the registered marked file as published, or a
  reduced-resolution reference): :func:`claimkit.content.register.register`,
  whose statistic (RANSAC inliers) is set against the measured distributions
  in ``calibration.json``;
* the **perceptual fingerprint** in the work record only
  (:mod:`claimkit.mark.fingerprint`), when no reference picture is at hand:
  a 128-bit summary of the whole picture, so a crop or a heavy edit moves it
  as much as a different picture does; the result says the line was limited
  to it.

Either way nothing here reads the mark's key, payload or geometry.
:func:`agreement` compares the content geometry with the mark's afterwards.
"""

from __future__ import annotations

import json
from functools import lru_cache
from importlib import resources

import numpy as np

from claimkit.content import broad, dense
from claimkit.content import register as reg
from claimkit.evaluation import lr
from claimkit.mark import fingerprint as fp

__all__ = [
    "ROTATION_TOLERANCE_DEG",
    "SCALE_TOLERANCE",
    "agreement",
    "calibration",
    "content_line",
    "layout_check",
]

#: The two geometries agree when the turns differ by at most this (degrees) ...
ROTATION_TOLERANCE_DEG = 5.0
#: ... the scales by at most this fraction, and both read the same mirroring.
#: Both limits lie above the largest difference measured between the lines on
#: genuine copies (the content line alone: calibration.json,
#: ``geometry_error_when_matched``, 2.9 degrees and 1.7 %; the mark: 0.5 degrees
#: and 2 %, the stress battery's tolerance; the two lines on the held-out
#: copies of benchmarks/bench_content_heldout.py: at most 3.2 degrees, a 25 %
#: crop registered by the coarse reading, and 5.5 %, the same crop, and 5.4 %
#: for an aspect change of 0.9, which a similarity cannot fit), so genuine
#: copies agree and a 180 degree or mirrored misreading does not. They were 3
#: degrees and 5 % until the reading at 640 px was smoothed.
SCALE_TOLERANCE = 0.08
#: Before "does not correspond" is said, each picture must register to an edited copy of
#: itself (scaled to 70 % and turned 10 degrees) with at least this many times the
#: threshold. A featureless work (a clear sky) gives no keypoints that repeat, nor does a
#: copy too small, blurred or noisy for them; then a failure to register says nothing.
ABLE_FACTOR = 3


def self_check(luma: np.ndarray, *, stretch: bool = True) -> int:
    """Inliers of a picture against an edited copy of itself (70 %, turned 10 degrees).

    The turned copy is cut to its inner part (13 % off each side), so no filled
    corner adds edges of its own or dilutes the contrast the keypoints see.
    """
    from skimage.transform import rescale, rotate

    pic = np.asarray(luma, dtype=np.float64)
    edited = rotate(rescale(pic, 0.7, anti_aliasing=True, preserve_range=True), 10.0,
                    resize=False, preserve_range=True, order=1)
    h, w = edited.shape
    edited = edited[round(0.13 * h): h - round(0.13 * h), round(0.13 * w): w - round(0.13 * w)]
    if min(edited.shape) < 16:
        return 0
    return int(reg.register(reg.features(pic, stretch=stretch), reg.features(edited, stretch=stretch),
                            reg.features(edited, mirrored=True, stretch=stretch))["inliers"])


def _decide(hit: bool, threshold: int, reference_luma: np.ndarray,
            exhibit_luma: np.ndarray) -> tuple[bool | None, dict | None, str | None]:
    """``corresponds``, the self-checks made and, where undecided or asymmetric, the reason.

    Where a reading reached its threshold (``hit``) the exhibit corresponds.
    Otherwise "does not correspond" is said only where a failure to register means something:
    both pictures have structure that registers to itself as the reading sees
    it (smoothed, the stretch capped: :func:`claimkit.content.register.features`),
    or the exhibit has such structure
    and the work has none (a copy does not gain edges the work lacks, unless something
    was drawn over it). Otherwise the line cannot decide, and says which
    picture lacks the structure.
    """
    if hit:
        return True, None, None
    need = ABLE_FACTOR * threshold
    # As the reading sees the pictures (smoothed, the stretch capped). With the full stretch and
    # no smoothing the blocks and noise of a compressed copy of a smooth picture registered to
    # themselves, and a genuine copy would have been called another picture (7 of 31 copies of
    # a soft texture); that is why this check once used absolute contrast. Now the stress
    # battery's copies of two soft textures and of a clear sky, marked, reach at most 3 points
    # (39 needed), and the check measures what the reading can do.
    work_able = self_check(reference_luma)
    exhibit_able = self_check(exhibit_luma)
    checks = {"work_inliers": work_able, "exhibit_inliers": exhibit_able, "needed": need,
              "edit": "scaled to 70 %, turned 10 degrees, 13 % cut from each side",
              "contrast": "as the reading sees it (smoothed, stretched at most "
                          f"{reg.MAX_STRETCH_GAIN:g} times)"}
    against = (f"against an edited copy of itself the registered work reached {work_able} "
               f"matching points and the exhibit {exhibit_able}, {need} needed")
    if work_able >= need and exhibit_able >= need:
        return False, checks, None
    if work_able >= need:
        return None, checks, ("the content line cannot decide: the exhibit has too little usable "
                              "structure (too small, blurred or noisy; " + against + "), so a "
                              "failure to register it says nothing about it")
    if exhibit_able >= need:
        return False, checks, (
            "the exhibit has structure (corners, edges) that the registered work lacks ("
            + against + "); a copy of the work would not, unless something was drawn over it")
    return None, checks, ("the content line cannot decide: the work has too little texture ("
                          + against + "), so a failure to register the exhibit says nothing "
                          "about it")


@lru_cache(maxsize=1)
def calibration() -> dict:
    """The measured distributions (``calibration.json``, written by benchmarks/bench_content.py)."""
    return json.loads(resources.files("claimkit.content").joinpath("calibration.json").read_text())


def _null_summary(samples: list, threshold: float, *, higher_is_closer: bool) -> dict:
    n = len(samples)
    k = sum(1 for v in samples if (v >= threshold if higher_is_closer else v <= threshold))
    return {"count": n, "reaching_threshold": k,
            "rate_upper_95": round(lr.binomial_upper(k, n), 6)}


def _either(cal: dict) -> dict:
    """Counts of the event the content line decides by: a reading at or above its threshold.

    Without a coarse reading in the calibration, the fine reading's own counts. With it, the
    null count is at most the sum of the pairs each reading took over its threshold (stated
    as such, which moves the ratio towards 1), and the genuine count is exact (``either``).
    """
    t = int(cal["threshold"])
    c = cal.get("coarse")
    if not c:
        return {"null": {"count": cal["null"]["count"],
                         "reaching_threshold": sum(1 for v in cal["null"]["samples"] if v >= t)},
                "genuine": {"count": cal["genuine"]["count"],
                            "reaching_threshold": sum(1 for v in cal["genuine"]["samples"]
                                                      if v >= t)}}
    e = c["either"]
    return {"null": {"count": e["null_count"], "reaching_threshold": e["null_reaching_at_most"],
                     "counted": "at most: " + e["null_bound"]},
            "genuine": {"count": e["genuine_count"], "reaching_threshold": e["genuine_reaching"]}}


def _dense_reading(reference_luma: np.ndarray, exhibit_luma: np.ndarray, res: dict,
                   statistic: dict, reason: str | None,
                   cal: dict) -> tuple[dict, dict, bool | None, str | None]:
    """The dense reading (:func:`claimkit.content.dense.dense_register`) where the keypoint
    readings cannot decide: it corresponds at or above its own threshold; otherwise the line
    still cannot decide, and the reason says what the dense reading found."""
    d = dense.dense_register(reference_luma, exhibit_luma)
    threshold = float(cal["threshold"])
    v = d["value"]
    statistic = {**statistic, "dense": {"value": v, "threshold": threshold,
                                        "structure": d["structure"],
                                        "min_structure": d["min_structure"]}}
    if v is not None and v >= threshold:
        keypoints = {k: statistic[k] for k in ("name", "value", "threshold")}
        keypoints.update({k: statistic[k] for k in ("coarse",) if k in statistic})
        stat = {"name": "dense correlation of the broad layouts", "value": v,
                "threshold": threshold, "higher_means": "closer correspondence",
                "reading": "dense", "keypoints": keypoints}
        return d, stat, True, None
    if v is None and d.get("reason"):
        said = f"the dense reading of the broad layouts cannot compare them: {d['reason']}"
    elif v is None:
        which = "the work" if d["structure"]["work"] < d["min_structure"] else "the exhibit"
        said = (f"the dense reading of the broad layouts has nothing to read either: {which} "
                f"varies by {d['structure'][which.split()[1]]:.2f} grey levels about a plane "
                f"({d['min_structure']:g} needed)")
    else:
        said = (f"the dense reading of the broad layouts reached {v:.2f}, under its threshold "
                f"{threshold:g}")
    return res, statistic, None, f"{reason}; {said}" if reason else said


def _with_dense(either: dict, cal: dict) -> dict:
    """The counts and ratio of the event "a keypoint reading or the dense reading reached its
    threshold", where the dense reading decided.

    Under Hp, the dense reading's own genuine copies (mostly of smooth pictures, where it is
    the reading that decides). Under Hd, the rate is bounded by the sum of the two bounds: the
    keypoint readings' (on their null) and the dense reading's (on its own null, which adds
    smooth and flat pictures); stated as such, which moves the ratio towards 1.
    """
    null = cal["null"]
    k_dense = sum(1 for v in null["samples"] if v >= float(cal["threshold"]))
    bound = lr.binomial_upper(either["null"]["reaching_threshold"], either["null"]["count"]) + \
        lr.binomial_upper(k_dense, null["count"])
    gen = cal["genuine"]
    num = lr.binomial_lower(gen["reaching"], gen["count"])
    ratio = 0.0 if num <= bound else lr.cap(float(np.log10(num) - np.log10(bound)))
    return {"null": {"count": either["null"]["count"] + null["count"],
                     "reaching_threshold": either["null"]["reaching_threshold"] + k_dense,
                     "counted": (f"at most the keypoint readings' rate on their "
                                 f"{either['null']['count']} pairs plus the dense reading's on "
                                 f"its {null['count']} pairs, each bounded"),
                     "rate_upper_95": round(min(1.0, bound), 6)},
            "genuine": {"count": gen["count"], "reaching_threshold": gen["reaching"],
                        "counted": "the dense reading's genuine copies"},
            "log10_lr": round(ratio, 3)}


def content_line(exhibit_luma: np.ndarray, *, reference_luma: np.ndarray | None = None,
                 reference: str = "registered marked file", reference_scale: float = 1.0,
                 work_fingerprint: str | None = None) -> dict:
    """Judge whether the exhibit shows the registered picture, by content alone.

    Parameters
    ----------
    exhibit_luma : ndarray
        The exhibit's luma.
    reference_luma : ndarray, optional
        The registered picture (or a reduced-resolution reference of it).
    reference : str
        What ``reference_luma`` is, in words (kept in the result).
    reference_scale : float
        Reference pixels per pixel of the registered picture (1 for the
        published file; 0.25 for a reference at a quarter of its width), so
        that the scale reported is the exhibit's against the registered picture.
    work_fingerprint : str, optional
        The work record's perceptual fingerprint, used when no reference picture
        is given.

    Returns
    -------
    dict
        ``basis``, ``limited_to_fingerprint``, ``statistic`` (name, value,
        threshold), ``corresponds`` (True, False, or None when nothing could be
        compared), ``registration`` (the numbers of the registration), ``null``
        (how often the measured unrelated pictures reached the threshold) and
        ``log10_lr`` (Hp: the exhibit shows the registered picture).
    """
    cal = calibration()
    if reference_luma is not None:
        ref = reg.features(reference_luma, registered_scale=reference_scale)
        ex = reg.features(exhibit_luma)
        exm = reg.features(exhibit_luma, mirrored=True)
        res = reg.register(ref, ex, exm)
        threshold = int(cal["threshold"])
        value = int(res["inliers"])
        statistic: dict = {"name": "RANSAC inliers", "value": value, "threshold": threshold,
                             "higher_means": "closer correspondence", "reading": "fine"}
        coarse_cal = cal.get("coarse")
        if value < threshold and coarse_cal:
            # The coarse reading, with its own measured null and threshold (register_coarse).
            coarse = reg.register_coarse(reference_luma, exhibit_luma, reference_scale)
            reached = int(coarse["inliers"]) >= int(coarse_cal["threshold"])
            statistic["coarse"] = {"value": int(coarse["inliers"]),
                                   "threshold": int(coarse_cal["threshold"]),
                                   "side_px": reg.COARSE_SIDE}
            if reached:
                res = coarse
                statistic = {"name": f"RANSAC inliers, coarse reading ({reg.COARSE_SIDE} px)",
                             "value": int(coarse["inliers"]),
                             "threshold": int(coarse_cal["threshold"]),
                             "higher_means": "closer correspondence", "reading": "coarse",
                             "fine": {"value": value, "threshold": threshold}}
        hit = statistic["value"] >= statistic["threshold"]
        corresponds, checks, reason = _decide(hit, threshold, reference_luma, exhibit_luma)
        if corresponds is None and cal.get("dense"):
            # Neither keypoint reading can decide: the dense reading of the broad layouts, with
            # its own measured null and threshold (content.dense).
            res, statistic, corresponds, reason = _dense_reading(
                reference_luma, exhibit_luma, res, statistic, reason, cal["dense"])
        if res.get("matched") and reference_scale != 1.0:
            g = res["geometry"]
            g["scale"] = round(g["scale"] * reference_scale, 5)
            g["matrix"] = [[round(v * reference_scale, 6) for v in row] for row in g["matrix"]]
        layout = None
        if corresponds:
            # Points can match the work's fine detail alone (its residual lifted from a published
            # copy and added to another picture, mark included): the layout must match too.
            g = res["geometry"]
            layout = layout_check(reference_luma, exhibit_luma,
                                  np.asarray(g["matrix"]) / reference_scale,
                                  uses_mark_geometry=False)
            if layout["refutes"]:
                corresponds = False
                found = (f"the dense reading placed it with correlation {statistic['value']:.2f}"
                         if statistic["reading"] == "dense" else
                         f"{statistic['value']} matching points fit one transformation")
                reason = (found + ", but " + layout["reason"] + "; the work's fine detail "
                          "without its layout is what a picture carrying a lifted residual of the work, mark "
                          "included, shows")
        either = _either(cal)
        if statistic["reading"] == "dense":
            either = _with_dense(either, cal["dense"])
        out = {
            "basis": reference, "limited_to_fingerprint": False,
            "statistic": statistic,
            "corresponds": corresponds,
            "registration": res,
            "null": {**either["null"],
                     "rate_upper_95": round(lr.binomial_upper(either["null"]["reaching_threshold"],
                                                              either["null"]["count"]), 6),
                     "highest": {"fine": max(cal["null"]["samples"]),
                                 "coarse": max((cal.get("coarse") or {}).get("null", {}).get(
                                     "samples", [0])),
                                 "dense": max((cal.get("dense") or {}).get("null", {}).get(
                                     "samples", [0]))}[statistic["reading"]]},
            "genuine": either["genuine"],
            "log10_lr": round(lr.log10_lr_counts(hit,
                                                 either["genuine"]["reaching_threshold"],
                                                 either["genuine"]["count"],
                                                 either["null"]["reaching_threshold"],
                                                 either["null"]["count"]), 3),
        }
        if "rate_upper_95" in either["null"]:     # the dense reading: the bound is a sum
            out["null"]["rate_upper_95"] = either["null"]["rate_upper_95"]
            out["log10_lr"] = either["log10_lr"]
        if layout is not None:
            out["layout"] = layout
            if layout["refutes"]:
                out["log10_lr"] = layout["log10_lr"]
        if checks is not None:
            out["self_checks"] = checks
        if reason is not None:
            out["reason"] = reason
        if corresponds is None:
            out["log10_lr"] = 0.0
            out["cannot_decide"] = ("the work has too little texture"
                                    if checks["work_inliers"] < checks["needed"] else
                                    "the exhibit has too little usable structure "
                                    "(too small, blurred or noisy)")
        return out
    if work_fingerprint:
        fcal = cal["fingerprint"]
        d = fp.fingerprint_distance(fp.perceptual_fingerprint(exhibit_luma), work_fingerprint)
        limit = int(fp.MATCH_DISTANCE)
        widest = max(fcal["genuine"]["samples"])
        # Closer is a smaller distance: the tail arithmetic takes the negated distance.
        log10_lr = lr.log10_lr_decision(-d, [-v for v in fcal["genuine"]["samples"]],
                                    [-v for v in fcal["null"]["samples"]], threshold=-limit)
        # A 128-bit summary of the whole picture moves as much under a turn or a crop as
        # under a change of picture: genuine copies reached ``widest`` bits, unrelated
        # pictures came closer than that. Between the limit and ``widest`` it cannot decide.
        fp_corresponds: bool | None = True if d <= limit else (False if d > widest else None)
        out = {
            "basis": "perceptual fingerprint of the work record",
            "limited_to_fingerprint": True,
            "statistic": {"name": "fingerprint distance (bits of 128)", "value": int(d),
                          "threshold": limit, "higher_means": "less alike",
                          "genuine_copies_reached": widest},
            "corresponds": fp_corresponds,
            "registration": None,
            "null": _null_summary(fcal["null"]["samples"], limit, higher_is_closer=False),
            "genuine": {"count": len(fcal["genuine"]["samples"]),
                        "reaching_threshold": sum(1 for v in fcal["genuine"]["samples"]
                                                  if v <= limit)},
            "log10_lr": round(log10_lr, 3) if fp_corresponds is not None else 0.0,
        }
        if fp_corresponds is None:
            out["cannot_decide"] = ("the registered picture was not at hand and the work "
                                    "record's fingerprint alone cannot tell a turned or cropped "
                                    "copy from another picture")
            out["reason"] = (f"the content line cannot decide: the exhibit's fingerprint is {d} "
                             f"bits from the work's, above the match limit {limit} but within "
                             f"the {widest} bits genuine copies reached in the calibration")
        return out
    return {"basis": "none", "limited_to_fingerprint": False, "corresponds": None,
            "statistic": None, "registration": None, "null": None, "log10_lr": 0.0,
            "reason": "neither the registered picture nor its fingerprint was at hand"}


def agreement(content: dict, mark_geometry: dict | None) -> dict:
    """Whether the content line's geometry and the mark's agree, within the stated tolerances.

    Returns ``{"compared": False, ...}`` when either geometry is missing.
    """
    reg_ = (content or {}).get("registration") or {}
    g = reg_.get("geometry")
    if not g or not mark_geometry or not content.get("corresponds"):
        return {"compared": False,
                "reason": "the content line did not register the exhibit" if not g or not
                content.get("corresponds") else "the mark gave no geometry"}
    rot = abs((g["rotation_deg"] - mark_geometry["rotation_deg"] + 180.0) % 360.0 - 180.0)
    scale = abs(g["scale"] / mark_geometry["scale"] - 1.0) if mark_geometry.get("scale") else None
    same_flip = bool(g["flipped"]) == bool(mark_geometry.get("flipped"))
    ok = rot <= ROTATION_TOLERANCE_DEG and scale is not None and scale <= SCALE_TOLERANCE \
        and same_flip
    return {"compared": True, "agree": bool(ok), "rotation_difference_deg": round(rot, 3),
            "scale_difference": None if scale is None else round(scale, 4),
            "same_mirroring": same_flip,
            "tolerances": {"rotation_deg": ROTATION_TOLERANCE_DEG, "scale": SCALE_TOLERANCE}}


def layout_check(reference_luma: np.ndarray, exhibit_luma: np.ndarray, linear, *,
                 uses_mark_geometry: bool) -> dict:
    """The exhibit's broad layout against the work's, placed by a given turn, scale and mirroring.

    Two uses, said in the result:

    * with the content line's own geometry (``uses_mark_geometry=False``),
      before "corresponds" is said: matching points can come from the work's
      fine detail alone, lifted from a published copy and added to another
      picture together with the mark (the strongest copy attack); such a
      picture keeps the points but not the work's broad layout;
    * with the mark's geometry, where the content line cannot decide (too few
      corners in the work or the exhibit): then it is a consistency check
      between the lines, not the content line's independent statistic, and it
      is never combined with the mark line.

    Either way it only refutes (``refutes``: the correlation lies below every
    genuine copy measured, by the calibration's margin); a high value does not
    show that the exhibit is the work (two skies share a layout).

    Parameters
    ----------
    reference_luma, exhibit_luma : ndarray
        The registered picture (or its reduced reference) and the exhibit.
    linear : array_like
        2 x 2 map from ``reference_luma`` pixels to exhibit pixels, (x, y).
    uses_mark_geometry : bool
        Whether ``linear`` is the mark's reading.

    Returns
    -------
    dict
        ``uses_mark_geometry``, ``value``, ``refute_below``, ``refutes``,
        ``genuine`` and ``null`` (counts from the calibration), ``log10_lr``
        (of the event "below" or "not below"; 0 where nothing was compared)
        and ``reason`` in words.
    """
    cal = calibration()["broad"]
    lin = np.asarray(linear, dtype=np.float64)
    res = broad.broad_correlation(reference_luma, exhibit_luma, lin)
    if uses_mark_geometry and res["value"] is None and not res["work_flat"] \
            and not res["exhibit_flat"]:
        # No shift covers 90 % of the smaller picture (the shapes differ): the shifts covering
        # half of it are searched, which can only raise the highest correlation.
        res = broad.broad_correlation(reference_luma, exhibit_luma, lin,
                                      min_overlap=broad.FALLBACK_OVERLAP)
    below = float(cal["refute_below"])
    gen, nul = cal["genuine"]["samples"], cal["null"]["samples"]
    placed = "placed as the mark reads it" if uses_mark_geometry else \
        "placed as the matching points place it"
    if res["min_overlap"] != broad.MIN_OVERLAP:
        placed += (f" (no placement covers {100 * broad.MIN_OVERLAP:g} % of the smaller picture, "
                   f"so placements covering {100 * res['min_overlap']:g} % were searched)")
    out = {"what": ("the exhibit placed by the mark's turn, scale and mirroring (the shift "
                    "searched), its broad layout compared with the work's: a consistency check "
                    "between the lines, not the content line's own statistic")
           if uses_mark_geometry else
           ("the exhibit placed by the content line's own turn, scale and mirroring (the shift "
            "searched), its broad layout compared with the work's"),
           "uses_mark_geometry": uses_mark_geometry, **res, "refute_below": below,
           "genuine": {"count": len(gen), "lowest": min(gen),
                       "below": sum(1 for v in gen if v < below)},
           "null": {"count": len(nul), "below": sum(1 for v in nul if v < below),
                    "highest": max(nul)},
           "refutes": False, "log10_lr": 0.0}
    v = res["value"]
    if v is not None:
        out["refutes"] = bool(v < below)
        out["log10_lr"] = round(lr.log10_lr_decision(v, gen, nul, threshold=below), 3)
    if v is None:
        which = ("the work has no broad structure to compare" if res["work_flat"] else
                 "the exhibit has no broad structure to compare" if res["exhibit_flat"]
                 else "no placement overlaps enough")
        out["reason"] = f"{placed}, the broad layouts could not be compared ({which})"
    elif out["refutes"] and res["exhibit_flat"]:
        out["reason"] = (f"{placed}, the exhibit is flat (less than a grey level of broad "
                         "variation) where the work's broad layout spreads over ten grey levels "
                         "or more, which no genuine copy measured lost")
    elif out["refutes"]:
        out["reason"] = (f"{placed}, the exhibit shares none of the work's broad layout: "
                         f"correlation {v:.2f}, where every one of the {len(gen)} genuine copies "
                         f"measured reached {min(gen):.2f} or more (limit {below:.2f})")
    else:
        out["reason"] = (f"{placed}, the exhibit's broad layout correlates {v:.2f} with the "
                         f"work's (limit {below:.2f}); unrelated pictures reached up to "
                         f"{max(nul):.2f}, so this alone does not show that the exhibit is the work")
    if uses_mark_geometry and not out["refutes"] and "faint" in calibration():
        _faint_check(out, reference_luma, exhibit_luma, lin, placed)
    return out


def _faint_check(out: dict, reference_luma: np.ndarray, exhibit_luma: np.ndarray,
                 lin: np.ndarray, placed: str) -> None:
    """Where the correlation does not refute, the local contrast may (:func:`broad.faint_share`).

    A correlation says little between two smooth pictures (two ramps correlate) and nothing
    on a flat one; an exhibit that is faint over most of the places where the work has strong
    edges or texture is what a flat picture carrying a transplanted mark shows. The check runs
    only where the mark was found and places the exhibit by the mark's geometry, so its limit
    comes from genuine copies on which the mark was found, each placed by the mark's own
    reading (``calibration.json``, ``faint``). It may only refute, never support.
    """
    cal = calibration()["faint"]
    above = float(cal["refute_above"])
    gen, nul = cal["genuine"]["samples"], cal["null"]["samples"]
    f = broad.faint_share(reference_luma, exhibit_luma, lin)
    out["faint"] = {**f, "refute_above": above,
                    "genuine": {"count": len(gen), "highest": max(gen),
                                "above": sum(1 for x in gen if x > above),
                                "what": "genuine copies on which the mark was found"},
                    "null": {"count": len(nul), "above": sum(1 for x in nul if x > above)},
                    "refutes": False}
    v = f["value"]
    if v is None or v <= above:
        return
    # Closer is a smaller share: the tail arithmetic takes the negated share.
    out["faint"]["refutes"] = out["refutes"] = True
    out["log10_lr"] = round(lr.log10_lr_decision(-v, [-x for x in gen], [-x for x in nul],
                                                 threshold=-above), 3)
    out["event"] = ("placed by the mark's geometry, the picture is faint where the work has "
                    "strong edges or texture")
    out["reason"] = (f"{placed}, the exhibit is faint (local contrast under "
                     f"{f['faint']:g} grey levels) over {100 * v:.0f} % of the places where the "
                     f"work has strong edges or texture ({f['strong']:g} grey levels or more, in "
                     f"windows of 1/{f['side_px'] // f['window_px']} of its longer side), at the "
                     "placement most favourable to it among those covering half of the smaller "
                     f"picture or more; none of the {len(gen)} genuine copies on which the mark "
                     f"was found showed more than {100 * max(gen):.1f} % (limit "
                     f"{100 * above:.0f} %)")
