"""The dossier's data: every number and fact the report shows, gathered from stored files.

One source of truth: :func:`build_data` reads only files of the hand-over
bundle (``case.json``, the intake records, the stored findings, the key
disclosures and the custody-log copy) and never computes a result of its
own. ``claimkit verify`` calls the same function on the bundle it was given
and compares the outcome, byte for byte, with the stored ``dossier.json``;
then it re-runs each examination and compares the findings.
"""

from __future__ import annotations

import json
from pathlib import Path

from claimkit import __version__
from claimkit.capture.evidence import collection_data
from claimkit.case import layout
from claimkit.case.documents import CaseDoc, DossierDataDoc, ExhibitDoc, FindingDoc, WithdrawalDoc
from claimkit.case.layout import CUSTODY_COPY, CUSTODY_COPY_V1, DISCLOSURES, PUBLIC_KEY, SOFTWARE
from claimkit.content import assess, broad, dense, register
from claimkit.evaluation import lr
from claimkit.evaluation.lines import content_warnings
from claimkit.evaluation.timeline import build_timeline
from claimkit.evidence import signing
from claimkit.evidence.canonical import canonical_json
from claimkit.evidence.custodylog import verify_log
from claimkit.evidence.disclose import check_disclosure
from claimkit.evidence.excerpt import verify_excerpt
from claimkit.evidence.storage import sha256_file
from claimkit.mark import detect, formats

__all__ = [
    "DOSSIER_TYPE",
    "REFERENCES_CITED",
    "build_data",
    "case_files",
]

#: v2: the method's parameters come from explicit per-format records
#: (``method.engine.format_records``, ``method.engine.examination``), not ``settings``.
DOSSIER_TYPE = DossierDataDoc.type_name()

#: The published methods the analysis rests on (the method section lists them).
REFERENCES_CITED = [
    ("J. J. K. O Ruanaidh, T. Pun, \"Rotation, scale and translation invariant spread spectrum digital "
    "image watermarking\", Signal Processing 66(3), 303-317, 1998. doi:10.1016/S0165-1684(98)00012-7 "
    "(the mark's tiling and resynchronisation)"),
    ("Q. Chen, M. Defrise, F. Deconinck, \"Symmetric phase-only matched filtering of "
    "Fourier-Mellin transforms for image registration and recognition\", IEEE Trans. PAMI "
    "16(12), 1156-1168, 1994. doi:10.1109/34.387491 (the carrier correlation)"),
    ("I. J. Cox, M. L. Miller, J. A. Bloom, J. Fridrich, T. Kalker, Digital Watermarking and "
    "Steganography, 2nd ed., Morgan Kaufmann, 2008 (watermark detection, and the copy attack "
    "that estimates a mark and adds it to another picture)"),
    ("M. Abramowitz, I. A. Stegun, Handbook of Mathematical Functions, 1964, eq. 9.6.10, the "
    "series of the Bessel function I0; term by term it gives I0(x) <= exp(x^2/4), hence the "
    "tail bound exp(-z^2/2) for a sum of cosines with independent uniform phases"),
    ("R. Vershynin, High-Dimensional Probability, Cambridge University Press, 2018, sec. 2.5 "
    "(sub-Gaussian variables: a variance proxy gives the tail exp(-t^2/2) after "
    "standardisation)"),
    ("A. J. Viterbi, \"Error bounds for convolutional codes and an asymptotically optimum "
    "decoding algorithm\", IEEE Trans. Inf. Theory 13(2), 260-269, 1967. doi:10.1109/TIT.1967.1054010"),
    ("K. J. Larsen, \"Short convolutional codes with maximal free distance for rates 1/2, 1/3, "
    "and 1/4\", IEEE Trans. Inf. Theory 19(3), 371-372, 1973. doi:10.1109/TIT.1973.1055014"),
    ("E. Rublee, V. Rabaud, K. Konolige, G. Bradski, \"ORB: an efficient alternative to SIFT or "
    "SURF\", Proc. IEEE ICCV 2011, 2564-2571. doi:10.1109/ICCV.2011.6126544 (the content line's "
    "keypoints)"),
    ("M. A. Fischler, R. C. Bolles, \"Random sample consensus\", Commun. ACM 24(6), 381-395, "
    "1981. doi:10.1145/358669.358692 (the content line's robust fit)"),
    ("C. J. Clopper, E. S. Pearson, \"The use of confidence or fiducial limits illustrated in "
    "the case of the binomial\", Biometrika 26(4), 404-413, 1934 (bounds on measured rates)"),
    ("European Network of Forensic Science Institutes, ENFSI Guideline for Evaluative Reporting "
    "in Forensic Science, 2015 (propositions, likelihood ratios, the verbal scale)"),
    ("Z. Wang, A. C. Bovik, H. R. Sheikh, E. P. Simoncelli, \"Image quality assessment: from "
    "error visibility to structural similarity\", IEEE Trans. Image Process. 13(4), 600-612, "
    "2004. doi:10.1109/TIP.2003.819861"),
    ("D. Padfield, \"Masked object registration in the Fourier domain\", IEEE Trans. Image "
    "Process. 21(5), 2706-2718, 2012. doi:10.1109/TIP.2011.2181402"),
    ("C. Adams, P. Cain, D. Pinkas, R. Zuccherato, \"Time-Stamp Protocol (TSP)\", RFC 3161, "
    "2001; B. Laurie, A. Langley, E. Kasper, \"Certificate Transparency\", RFC 6962, 2013 "
    "(Merkle trees); S. Josefsson, I. Liusvaara, \"Edwards-Curve Digital Signature Algorithm "
    "(EdDSA)\", RFC 8032, 2017."),
]


def case_files(root: Path) -> tuple[dict, list[dict], dict[str, dict]]:
    """``case.json``, the intake records in order, and findings by exhibit ID (JSON values,
    each read and checked by its document type)."""
    case = CaseDoc.read(root / layout.CASE_FILE).to_json()
    exhibits = [ExhibitDoc.read(p).to_json() for glob in layout.INTAKE_GLOBS
                for p in sorted((root / layout.EXHIBITS).glob(glob))]
    def order(r: dict):
        n = layout.exhibit_number(r.get("exhibit_id"))
        return (0, n, "") if n is not None else (1, 0, str(r.get("exhibit_id")))

    exhibits.sort(key=order)
    findings = {}
    for ex in exhibits:
        i = ex.get("exhibit_id")
        if layout.exhibit_number(i) is None:
            continue     # never used to build a path; verify names it
        w = root / layout.withdrawal_record(i)
        if w.is_file():
            ex["withdrawn"] = WithdrawalDoc.read(w).to_json()
        p = root / layout.finding_file(i)
        if p.is_file():
            findings[ex["exhibit_id"]] = FindingDoc.read(p).to_json()
    return case, exhibits, findings


def _works(root: Path) -> list[dict]:
    out = []
    folder = root / DISCLOSURES
    if not folder.is_dir():
        return out
    for d in sorted(folder.iterdir()):
        if not d.is_dir() or d.is_symlink():
            continue
        chk = check_disclosure(d)
        try:
            record = json.loads((d / "work-record.json").read_bytes())
        except (OSError, ValueError):
            record = {}
        out.append({
            "work_id": chk.work_id or d.name,
            "folder": d.relative_to(root).as_posix(),
            "checks_passed": chk.ok,
            "key_material": {"disclosed": chk.keys_included, "scope": chk.scope},
            "problems": list(chk.problems),
            "serial": chk.serial,
            "original": record.get("original", {}),
            "marked": record.get("marked", {}),
            "registered": record.get("registered", {}),
            "capture": record.get("capture", {}),
            "quality": record.get("quality", {}),
            "mark_params": record.get("mark_params", {}),
            "fingerprint": record.get("fingerprint"),
            "key_commitment": record.get("key_commitment", {}),
            "record_software": record.get("software"),
            "timestamps": chk.timestamps,
        })
    return out


def _custody(root: Path, case_id: str, work_ids: set[str]) -> dict:
    """The custody-log copy: its check, and the entries that concern this case and its works."""
    log = root / CUSTODY_COPY
    try:
        pub = signing.load_public_pem((root / PUBLIC_KEY).read_bytes())
    except (OSError, ValueError):
        return {"checked": False, "problems": ["public key missing or unreadable"], "entries": []}
    # A bundle of claimkit 0.2 carries the whole log; later ones an excerpt.
    old = root / CUSTODY_COPY_V1
    rep = verify_log(old, pub) if old.is_file() and not log.is_file() else \
        verify_excerpt(log, pub)
    rows = []
    for e in rep.entries:
        d = e.get("details", {})
        if (d.get("case_id") == case_id or d.get("work_id") in work_ids
                or e["action"] in ("profile created", "works stamped")):
            rows.append({"seq": e["seq"], "time": e["time"], "actor": e["actor"],
                         "action": e["action"],
                         "what": d.get("exhibit_id") or d.get("work_id") or d.get("token_id")
                         or d.get("title") or "",
                         "items": {k: v[:16] for k, v in sorted(e["items"].items())}})
    return {"checked": True, "lines": rep.lines, "ok": rep.ok,
            "problems": [str(p) for p in rep.problems], "entries": rows,
            "head_seq": rep.head_seq, "head_sha256": rep.head_hash}


def _software(root: Path) -> dict | None:
    """The versions ``report`` recorded (``handover/software.json``), or None in an old bundle."""
    try:
        return json.loads((root / SOFTWARE).read_bytes())
    except (OSError, ValueError):
        return None


def _examination() -> dict:
    """How every copy is examined, named one by one (not gathered from module constants, so
    that renaming a setting or adding a speed knob cannot change what a dossier states)."""
    return {
        "prefilter_px": detect.PREFILTER, "norm_window_px": detect.NORM_WINDOW,
        "geometries_tried": detect.GEOMETRIES, "quarter_turns_and_mirrors": detect.DIHEDRAL,
        "subpixel_phases": len(detect.PHASES), "decode_tries": detect.DECODE_TRIES,
        "payload_space": detect.DEFAULT_PAYLOAD_SPACE,
        "default_threshold": detect.DEFAULT_THRESHOLD,
        "max_examine_pixels": detect.MAX_EXAMINE_PIXELS,
    }


def _content_parameters() -> dict:
    """What an expert needs to repeat the content line and the evaluation (no internals)."""
    cal = assess.calibration()
    return {
        "keypoints": f"ORB, {register.KEYPOINTS} per picture at {register.WORK_SIDE} px on the "
                     f"longer side (a smaller picture enlarged to {register.MIN_WORK_SIDE} px), "
                     f"luma smoothed (Gaussian, {register.FINE_SMOOTH:g} px of the registered "
                     "work) and stretched "
                     "between its 1st and 99th percentiles by at most a factor of "
                     f"{register.MAX_STRETCH_GAIN:g}, so that the mark's faint pattern makes "
                     "no keypoints of its own; the exhibit also "
                     "mirrored, and a copy of half the working size or less also matched "
                     "against the work reduced to its size",
        "fit": f"RANSAC similarity, inliers within {register.RESIDUAL_PX} px, "
               f"{register.RANSAC_TRIALS} samples, seed {register.RANSAC_SEED}",
        "threshold_inliers": cal["threshold"],
        "threshold_rule": cal["threshold_rule"],
        "null_pairs": cal["null"]["count"], "null_max_inliers": max(cal["null"]["samples"]),
        "calibration_pictures": len(cal["pictures"]),
        "genuine_copies": cal["genuine"]["count"],
        "genuine_below_threshold": sum(1 for v in cal["genuine"]["samples"] if v < cal["threshold"]),
        "genuine_below_attacks": sorted({r["attack"] for r in cal.get("genuine_below_threshold", [])}),
        "able_inliers": assess.ABLE_FACTOR * cal["threshold"],
        "coarse": None if "coarse" not in cal else {
            "side_px": register.COARSE_SIDE, "threshold_inliers": cal["coarse"]["threshold"],
            "smooth": f"{register.COARSE_SMOOTH:g} px there or {register.FINE_SMOOTH:g} px of "
                      "the registered work, whichever is more",
            "max_gain": f"{register.MAX_STRETCH_GAIN:g}",
            "null_pairs": cal["coarse"]["null"]["count"],
            "null_max_inliers": max(cal["coarse"]["null"]["samples"]),
            "either_null_at_most": cal["coarse"]["either"]["null_reaching_at_most"],
            "either_genuine": cal["coarse"]["either"]["genuine_reaching"],
            "genuine_copies": cal["coarse"]["either"]["genuine_count"]},
        "dense": None if "dense" not in cal else {
            "grids": f"{dense.COARSE_GRID} and then {dense.FINE_GRID}",
            "smooth": f"1/{round(1 / dense.SMOOTH)}", "step_deg": f"{dense.COARSE_STEP_DEG:g}",
            "scale_step": f"{dense.SCALE_STEP:g}",
            "area": f"{100 * dense.MIN_AREA:g} to {100 * dense.MAX_AREA:g} %",
            "keep": dense.KEEP, "inside": f"{100 * dense.INSIDE:g} %",
            "min_patches": dense.MIN_PATCHES, "min_structure": f"{dense.MIN_STRUCTURE:g}",
            "threshold": cal["dense"]["threshold"], "rule": cal["dense"]["threshold_rule"],
            "null_pairs": cal["dense"]["null"]["count"],
            "null_max": max(cal["dense"]["null"]["samples"]),
            "genuine": cal["dense"]["genuine"]["count"],
            "genuine_reaching": cal["dense"]["genuine"]["reaching"]},
        "fingerprint_genuine_max_bits": max(cal["fingerprint"]["genuine"]["samples"]),
        "second_view_inliers": cal["same_scene_second_view"]["inliers"],
        "fingerprint_null_min_bits": min(cal["fingerprint"]["null"]["samples"]),
        "calibration": cal["measured"]["by"],
        "geometry_tolerance": f"turn {assess.ROTATION_TOLERANCE_DEG} degrees, scale "
                              f"{100 * assess.SCALE_TOLERANCE:g} %, same mirroring",
        "layout_side_px": broad.BROAD_SIDE,
        "layout_min_overlap": f"{100 * broad.MIN_OVERLAP:g} %",
        "layout_refute_below": cal["broad"]["refute_below"],
        "layout_rule": cal["broad"]["refute_rule"],
        "layout_genuine": cal["broad"]["genuine"]["count"],
        "layout_genuine_lowest": min(cal["broad"]["genuine"]["samples"]),
        "layout_null": cal["broad"]["null"]["count"],
        "layout_null_below": cal["broad"]["null"]["below_refute"],
        "faint": None if "faint" not in cal else {
            "side_px": broad.CONTRAST_SIDE, "window_px": broad.CONTRAST_WINDOW,
            "strong": f"{broad.STRONG_CONTRAST * 255:g}", "faint": f"{broad.FAINT_CONTRAST * 255:g}",
            "min_strong": broad.MIN_STRONG, "refute_above": cal["faint"]["refute_above"],
            "rule": cal["faint"]["refute_rule"], "genuine": cal["faint"]["genuine"]["count"],
            "genuine_highest": max(cal["faint"]["genuine"]["samples"]),
            "null": cal["faint"]["null"]["count"], "null_above": cal["faint"]["null"]["above_refute"]},
        "lr_cap": f"10^{lr.CAP_LOG10:g} either way",
        "rate_bounds": f"one-sided {100 * lr.CONFIDENCE:g} % Clopper-Pearson",
    }


def _engine_parameters() -> dict:
    """The method's numbers: the record of each mark format read, and of the examination."""
    return {
        "tile_px": formats.CURRENT.tile_px, "payload_bits": formats.CURRENT.payload_bits,
        "pilot_spots": formats.CURRENT.pilot_spots, "code_spots": formats.CURRENT.code_spots,
        # The format that marks now, for the method's words (its record is in format_records).
        "current": formats.CURRENT.as_record(),
        "formats_read": "; ".join(f.describe() for f in formats.READABLE),
        "format_records": [f.as_record() for f in formats.READABLE],
        "prefilter_px": detect.PREFILTER,
        "geometries_tried": detect.GEOMETRIES, "quarter_turns_and_mirrors": detect.DIHEDRAL,
        "subpixel_phases": len(detect.PHASES), "hypotheses": detect.hypotheses(),
        "format3_hypotheses": detect.format3_hypotheses(),
        "format3_placements": detect.DECODE_TRIES + detect.OWN_PLACEMENTS,
        "format3_best": detect.DECODE_TRIES, "format3_own": detect.OWN_PLACEMENTS,
        # The synchronisation's own count (removal_suspected only): every geometry format 3's
        # keyed search chose among.
        "format3_sync_hypotheses": detect.sync_hypotheses(),
        "bound": "P_fa <= 2 x H x exp(-z^2/2) (sub-Gaussian tail, union over hypotheses)",
        "examination": _examination(),
    }


def _result(ex: dict, f: dict | None) -> dict:
    if f is None:
        return {"exhibit_id": ex["exhibit_id"], "label": layout.exhibit_label(ex["exhibit_id"]),
                "examined": False}
    r = f["result"]
    return {
        "exhibit_id": ex["exhibit_id"], "label": layout.exhibit_label(ex["exhibit_id"]), "examined": True,
        "examined_at": f["examined"]["time"], "threshold": f["examined"]["threshold"],
        "detected": r["detected"],
        "log10_false_alarm": r["log10_false_alarm_probability"],
        "false_alarm_text": r["false_alarm_text"],
        "score_pilot": r["score_pilot"], "score_full": r["score_full"],
        "hypotheses": r["hypotheses"], "payload_space": r["payload_space"],
        "scales_searched": r.get("scales_searched", 1),
        "payload_valid": r["payload_valid"], "work_id": r.get("work_id"),
        "registered": r.get("registered", False),
        "message_psnr_db": r["message_psnr_db"], "geometry": r["geometry"],
        "geometry_text": r.get("geometry_text", ""),
        "decoys": f["decoy_summary"], "match": f.get("match"),
        "reference": f.get("reference"), "alignment": f.get("alignment"),
        "robustness": f.get("robustness"),
        "content": f.get("content"), "content_mismatch": bool(f.get("content_mismatch")),
        "evaluation": f.get("evaluation"),
        "finding_sha256": None,
    }


def _timeline(works: list[dict], exhibits: list[dict], results: list[dict]) -> dict:
    """Dates in order with their sources, and the warnings (see claimkit.evaluation.timeline)."""
    labelled = [{**ex, "label": layout.exhibit_label(ex["exhibit_id"])} for ex in exhibits]
    matches = {r["exhibit_id"]: (r.get("work_id") if r.get("detected") and r.get("registered")
                                 else (r.get("match") or {}).get("work_id"))
               for r in results if r.get("examined")}
    mismatches = {r["exhibit_id"]: bool(r.get("content_mismatch")) for r in results}
    tl = build_timeline(works, labelled, matches, mismatches)
    for r in results:
        c = r.get("content") or {}
        codes = content_warnings(detected=bool(r.get("detected")), content=c,
                                 content_mismatch=bool(r.get("content_mismatch")))
        if "content-inconclusive" in codes:
            tl["warnings"].append({"code": "content-inconclusive", "exhibit": r["exhibit_id"],
                                   "text": f"{r['label']}: "
                                           f"{c.get('reason', 'the content line was inconclusive')}; "
                                           "a transplanted mark cannot be excluded, and no "
                                           "derivation is claimed."})
        ag = c.get("agreement_with_mark") or {}
        if "lines-disagree" in codes:
            tl["warnings"].append({"code": "lines-disagree", "exhibit": r["exhibit_id"], "text": (
                f"{r['label']}: the mark and the picture content read different geometries "
                f"(turn {ag['rotation_difference_deg']} degrees apart, scale {ag['scale_difference']} "
                "apart, mirroring " + ("the same" if ag["same_mirroring"] else "different")
                + "); the two lines are not combined.")})
    return tl


def build_data(root: str | Path) -> dict:
    """Gather the dossier's data from the files of a case folder or an unpacked bundle.

    Returns
    -------
    dict
        JSON-ready; its canonical JSON is stored as ``report/dossier.json``.
    """
    root = Path(root)
    case, exhibits, findings = case_files(root)
    works = _works(root)
    results = []
    for ex in exhibits:
        res = _result(ex, findings.get(ex["exhibit_id"]))
        if ex.get("withdrawn"):
            res["withdrawn"] = {k: ex["withdrawn"].get(k) for k in ("time", "by", "reason")}
        if res["examined"]:
            res["finding_sha256"] = sha256_file(root / layout.finding_file(ex["exhibit_id"]))
        results.append(res)
    work_ids = {w["work_id"] for w in works}
    try:
        pub_pem = (root / PUBLIC_KEY).read_bytes()
        fp = signing.fingerprint(signing.raw_public(signing.load_public_pem(pub_pem)))
    except (OSError, ValueError):
        fp = None
    owner = case.get("owner", {})
    detected = [r for r in results if r.get("detected") and not r.get("withdrawn")]
    tl = _timeline(works, exhibits, results)
    data = {
        "type": DOSSIER_TYPE,
        "software": f"claimkit {__version__}",
        "case": {"title": case["title"], "case_id": case["case_id"], "opened": case["opened"]},
        "claimant": {"name": owner.get("name"), "public_key_sha256": fp,
                     "case_names_key": owner.get("public_key_sha256") == fp},
        "works": works,
        "exhibits": [{k: ex.get(k) for k in ("exhibit_id", "original_name", "file", "sha256",
                                              "size", "media_type", "width", "height",
                                              "source", "found", "taken_in", "note")}
                     | ({"withdrawn": ex["withdrawn"]} if ex.get("withdrawn") else {})
                     for ex in exhibits],
        "results": results,
        "summary": {"exhibits": len(exhibits),
                    "examined": sum(1 for r in results if r["examined"]),
                    "detected": [r["exhibit_id"] for r in detected],
                    "works": sorted({r["work_id"] for r in detected if r.get("work_id")}),
                    "best_log10": min([r["log10_false_alarm"] for r in detected] or [0.0]),
                    "derived": [r["exhibit_id"] for r in results
                                if (r.get("evaluation") or {}).get("derivation_claimed")],
                    "content_mismatch": [r["exhibit_id"] for r in results
                                         if r.get("content_mismatch")]},
        "timeline": {"events": tl["events"], "priority": tl["priority"], "notes": tl["notes"]},
        "warnings": tl["warnings"],
        "method": {"engine": _engine_parameters(), "content": _content_parameters(),
                   "mark": works[0]["mark_params"] if works else {},
                   "references": REFERENCES_CITED},
        "custody": _custody(root, case["case_id"], work_ids),
        "software_made_with": _software(root),
        "collection": collection_data(root, exhibits),
        # The message figure draws the key's spot pattern: only beside disclosed key material.
        "figures": {r["exhibit_id"]: _figure_names(
            r, message=any(w["key_material"]["disclosed"] for w in works)) for r in results},
    }
    canonical_json(data)   # refuse anything that could not be stored
    return data


def _figure_names(r: dict, *, message: bool) -> dict:
    e = r["exhibit_id"]
    kinds = ["thumbnail"]
    if r.get("examined"):
        kinds += (["message"] if message else []) + ["surface", "decoys"]
        if r.get("reference"):
            kinds.append("registered")
        if (r.get("alignment") or {}).get("aligned"):
            kinds.append("aligned")
    return {k: layout.figure_file(e, k) for k in kinds}
