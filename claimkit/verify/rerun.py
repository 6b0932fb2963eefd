"""Re-running each examination, its decoy control, alignment and robustness rows from the key.

The detection seed comes from a verified key disclosure; every stored number
is compared with the re-run (:func:`claimkit.verify.compare.differences`).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from claimkit import __version__
from claimkit.case import layout
from claimkit.case import reference as reduced_reference
from claimkit.case.align import align
from claimkit.case.examine import alignment_geometry, decoy_summary, jsonable, weigh_lines
from claimkit.dossier.build import message_arrays
from claimkit.imageio import LUMA_FROM_RGB, read_picture, to_luma
from claimkit.mark import payload
from claimkit.mark.format3 import FAMILIES, MarkKeys
from claimkit.stress import run_battery
from claimkit.verify.compare import differences
from claimkit.verify.report import SKIPPED, VerifyReport
from claimkit.workflow import examine_picture, expected_payload_check, finding_words

__all__ = ["rerun_examination", "rerun_robustness", "work_record"]


def _merged_keys(all_keys: list):
    """One key set from several disclosures of one owner.

    The legacy seed, the sync seed and every family disclosed.
    """
    first = all_keys[0]
    if not isinstance(first, MarkKeys):
        return first
    families: dict = {}
    for k in all_keys:
        families.update(k.families)
    return MarkKeys(legacy=first.legacy, sync=first.sync, families=families)


def _partial(keys) -> bool:
    """Whether the keys hold format 3 but not every family (nor, then, what the owner used)."""
    return isinstance(keys, MarkKeys) and keys.sync is not None and len(keys.families) < FAMILIES


def _name_versions(diffs: list[str], made_with: str | None) -> None:
    """Put first, when numbers differ, which claimkit made them and which re-ran them."""
    this = f"claimkit {__version__}"
    if diffs and made_with and made_with != this:
        diffs.insert(0, f"examined with {made_with} and re-run with {this} (install {made_with} "
                        "to reproduce its numbers to the digit)")


def rerun_examination(root: Path, ex: dict, finding: dict, keys: dict,
                      rep: VerifyReport) -> None:
    """Re-run one exhibit's examination and compare every stored number and array."""
    i = ex["exhibit_id"]
    if not keys:
        rep.add(f"{i} re-run", False, "no verified disclosure, so no key to re-run with")
        return
    seed = _merged_keys([k for k, _, _ in keys.values()])
    wanted = [bits for _, bits, _ in keys.values()]
    # The disclosed payloads are the check and the list the decoder may pick from
    # (the owner's examination listed every allocated serial; a pick from a list
    # counts only where it makes a claim, so both re-run to the same numbers).
    check = expected_payload_check(*wanted)
    params = finding["examined"]
    # By the method the finding records; one made before methods were recorded read RGB.
    pic = read_picture(root / ex["file"], method=params.get("examination_method") or LUMA_FROM_RGB)
    owner_tag = payload.unpack(wanted[0])["owner_tag"]   # the same for all of one owner's works
    f = examine_picture(pic, seed, owner_tag=owner_tag, payload_check=check,
                        threshold=params["threshold"], decoys=params["decoys"])
    stored = finding["result"]
    got = {**f.to_json(), **finding_words(f)}
    if not (isinstance(seed, MarkKeys) and seed.sync is not None):
        # A disclosure of a format-1/2 work holds no format-3 sync seed, which the
        # owner's examination also read: its score cannot be re-derived here.
        got.pop("score_sync", None)
    diffs = []
    if _partial(seed) and not stored.get("detected") and not f.detected:
        # Nothing claimed, and the disclosure holds some of format 3's families only:
        # the best scores of the owner's examination ran over every family and the
        # seeds of formats 1-2, which this re-run does not hold. What it can check is
        # that no claim is found, and the synchronisation findings.
        for k in ("detected", "removal_suspected", "score_sync", "false_alarm_counting"):
            diffs += differences(stored.get(k), got.get(k), k)
        rep.add(f"{i} re-run", not diffs, "; ".join(diffs) if diffs else
                "not detected, as stored; the best scores of an exhibit without a claim depend "
                f"on the keys held (this disclosure holds {len(seed.families)} of "
                f"{FAMILIES} format-3 families), so they were not compared")
        return
    for k, v in got.items():
        diffs += differences(stored.get(k), v, k)
    want_work = stored.get("work_id") if stored.get("detected") else None
    if stored.get("detected"):
        match = [w for w, (_, bits, _) in keys.items()
                 if f.payload_bits is not None and np.array_equal(np.asarray(f.payload_bits,
                                                                             np.uint8), bits)]
        if want_work and match != [want_work]:
            diffs.append(f"work_id: stored {want_work}, the re-run payload names {match or 'none'}")
    diffs += differences(finding["decoy_scores"], [round(float(v), 4) for v in f.decoy_scores],
                         "decoy_scores")
    diffs += differences(finding["decoy_summary"], decoy_summary(f.decoy_scores, f.z_pilot),
                         "decoy_summary")
    with np.load(root / finding["arrays"]["file"]) as arr:
        stored_arrays = {k: arr[k] for k in arr.files}
    # The message arrays travel only with key material; without them their numbers
    # (message PSNR) are still compared above.
    stored_arrays.update(message_arrays(root, finding) or {})
    for name in ("surface", "recovered", "reference"):
        if name not in stored_arrays:
            continue
        a = stored_arrays[name]
        b = getattr(f, name)
        if a.shape != b.shape or not np.allclose(a, b, rtol=1e-4, atol=1e-4):
            diffs.append(f"arrays.{name}: differs from the re-run")
    luma = to_luma(pic.pixels)
    reference = finding.get("reference") or {}
    ref = root / reference.get("file", "")
    # Findings compare with a reduced-resolution reference, always in the bundle. Older ones
    # compared with the registered file itself: the published marked file is in the bundle,
    # the unmarked master only with report --include-original.
    withheld = bool(reference) and not ref.is_file() and reference.get("kind") != "marked"
    ref_luma = to_luma(read_picture(ref).pixels) if reference and not withheld else None
    lines = None
    if "evaluation" in finding and withheld:
        rep.add(f"{i} content line", True, "not re-run: it compared the exhibit with the "
                "unmarked master, withheld from the bundle (report --include-original adds it)",
                status=SKIPPED)
    elif "evaluation" in finding:
        # The content line and the evaluation, from the exhibit, the reference in the bundle,
        # the signed work record of the disclosure and the stored robustness rows.
        mark = {**got, "work_id": stored.get("work_id"), "registered": stored.get("registered")}
        lines = weigh_lines(luma, exhibit_id=i, rep=mark, threshold=params["threshold"],
                            match=finding.get("match"),
                            work_record=work_record(root, (finding.get("match") or {}).get("work_id")),
                            owner=_owner(root), reference_luma=ref_luma,
                            reference=finding.get("reference"),
                            robustness=finding.get("robustness"))
        for k in ("content", "content_mismatch", "evaluation"):
            diffs += differences(finding.get(k), lines[k], k)
    al = finding.get("alignment")
    if al and al.get("aligned") and withheld:
        rep.add(f"{i} alignment", True, "not re-run: the file it aligns to is the unmarked "
                "master, withheld from the bundle (report --include-original adds it)",
                status=SKIPPED)
    elif al and al.get("aligned") and ref_luma is not None:
        geom = alignment_geometry(lines["content"]) if lines else (f.geometry or None)
        again = align(ref_luma, luma, geom,
                      reference_scale=reduced_reference.scale_of(finding.get("reference")))
        diffs += differences(al, again.numbers, "alignment")
        if "difference" in stored_arrays and not np.array_equal(stored_arrays["difference"],
                                                               again.difference):
            diffs.append("arrays.difference: the difference map differs from the re-run")
    _name_versions(diffs, params.get("software"))
    rep.add(f"{i} re-run", not diffs, "; ".join(diffs[:8]) if diffs else
            f"{'detected' if f.detected else 'not detected'}, log10 P_fa "
            f"{round(f.log10_false_alarm, 4)}, {len(f.decoy_scores)} decoys and every stored "
            "number reproduced")


def work_record(root: Path, work_id: str | None) -> dict | None:
    """The signed work record from the bundle's disclosure of ``work_id`` (checked earlier)."""
    if not work_id:
        return None
    folder = root / layout.DISCLOSURES
    for p in sorted(folder.glob("*/work-record.json")) if folder.is_dir() else []:
        try:
            record = json.loads(p.read_bytes())
        except (OSError, ValueError):
            continue
        if isinstance(record, dict) and record.get("work_id") == work_id:
            return record
    return None


def _owner(root: Path) -> str | None:
    try:
        return json.loads((root / layout.CASE_FILE).read_bytes()).get("owner", {}).get("name")
    except (OSError, ValueError):
        return None


def rerun_robustness(root: Path, findings: dict, keys: dict, rep: VerifyReport) -> None:
    """Re-run the robustness battery once per work and compare its table."""
    done = set()
    for _i, f in sorted(findings.items()):
        rob = f.get("robustness") or {}
        wid = (f.get("match") or {}).get("work_id")
        if rob.get("status") != "run" or wid in done:
            continue
        done.add(wid)
        if wid not in keys:
            rep.add(f"robustness {wid}", False, "no verified disclosure of this work")
            continue
        seed, bits, _ = keys[wid]
        pic = read_picture(root / str(reduced_reference.registered_file(f["reference"])))
        rows = run_battery(pic.pixels, seed, expected_payload_check(bits), quick=True)
        again = jsonable(rows)
        stored = rob.get("rows") or []
        strip = [{k: v for k, v in r.items() if k != "seconds"} for r in stored]
        fresh = [{k: v for k, v in r.items() if k != "seconds"} for r in again]
        diffs = differences(strip, fresh, "rows")
        _name_versions(diffs, (f.get("examined") or {}).get("software"))
        rep.add(f"robustness {wid}", not diffs, "; ".join(diffs[:6]) if diffs else
                f"{len(fresh)} edits of the registered file re-run, every row reproduced")
