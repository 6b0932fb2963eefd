"""Examine every exhibit of a case and keep the full result in the case folder.

For each exhibit (after re-checking its SHA-256): the blind examination with
the owner's key and a decoy-key control (the same search under
:data:`DEFAULT_DECOYS` random keys, the null distribution the observed score
is set against); the registered work it names (by the payload's work ID, or
else by the perceptual fingerprint); where the registered file is at hand, a
reduced-resolution reference of it (:mod:`claimkit.case.reference`), which the
content line and the alignment of the copy (SSIM after alignment, crop box,
difference map) use; and the robustness battery of the registered marked file,
once per work.

Numbers go to ``findings/EXX.json`` (canonical JSON) and arrays to
``findings/EXX.npz``; the dossier reads both and computes nothing of its own.
"""

from __future__ import annotations

import os
import shutil
import stat
from dataclasses import asdict, is_dataclass
from pathlib import Path

import numpy as np

from claimkit import __version__, workflow
from claimkit.case import layout
from claimkit.case import reference as reduced_reference
from claimkit.case.align import align
from claimkit.case.documents import FindingDoc
from claimkit.case.store import Case, Exhibit, checked_exhibit_path
from claimkit.errors import CheckFailed, InputError
from claimkit.evaluation.lines import weigh
from claimkit.evidence.custodylog import utc_now
from claimkit.evidence.storage import sha256_file, sha256_hex
from claimkit.imageio import CURRENT_EXAMINATION_METHOD, read_picture, to_luma
from claimkit.mark import detect, payload
from claimkit.mark.fingerprint import MATCH_DISTANCE, perceptual_fingerprint
from claimkit.stress import run_battery

__all__ = [
    "DECOY_SEED",
    "DEFAULT_DECOYS",
    "FINDING_TYPE",
    "MASTER_ONLY",
    "decoy_summary",
    "examine_case",
    "examine_exhibit",
    "find_reference",
    "jsonable",
    "match_work",
    "weigh_lines",
]

FINDING_TYPE = FindingDoc.type_name()
#: Why nothing was aligned when only the unmarked master was at hand.
MASTER_ONLY = ("only the unmarked master was at hand: a reference made from it would, beside "
               "the published marked file, give away the mark; give the published marked file "
               "with --originals (or examine with --reference-from-master)")
DEFAULT_DECOYS = 64     # random keys in the decoy control; each costs about one pilot search
DECOY_SEED = 0          # fixed, so that anyone re-running the control gets the same keys


def decoy_summary(scores: list[float], observed: float) -> dict:
    """How the observed score stands against the decoy keys' best scores.

    The empirical p-value ``(k + 1) / (n + 1)``, with ``k`` decoys scoring at
    least the observed score, is the standard Monte Carlo estimate (Davison &
    Hinkley, *Bootstrap Methods and their Application*, 1997, eq. 4.11); it
    can never be below ``1 / (n + 1)``, which is why the dossier's bound
    comes from the statistics, and the decoys are a control of it.
    """
    arr = np.asarray(scores, dtype=float)
    if arr.size == 0:
        return {"count": 0}
    k = int(np.sum(arr >= observed))
    return {
        "count": int(arr.size),
        "seed": DECOY_SEED,
        "max": round(float(arr.max()), 4),
        "mean": round(float(arr.mean()), 4),
        "std": round(float(arr.std()), 4),
        "at_or_above_observed": k,
        "empirical_p": round((k + 1) / (arr.size + 1), 6),
    }


def alignment_geometry(content: dict) -> dict | None:
    """The content line's reference-to-exhibit map, for :func:`claimkit.case.align.align`.

    The alignment uses the content line's geometry, never the mark's, so that
    what the figures show does not borrow from the line it is set against.
    """
    g = ((content or {}).get("registration") or {}).get("geometry")
    if not content.get("corresponds") or not g:
        return None
    return {"matrix": g["matrix"], "source": "content line"}


def weigh_lines(luma: np.ndarray, *, exhibit_id: str, rep: dict, threshold: float,
                match: dict | None, work_record: dict | None, owner: str | None,
                reference_luma: np.ndarray | None, reference: dict | None,
                robustness: dict | None, label: str | None = None) -> dict:
    """The content line and the evaluation of one exhibit (shared with ``verify``'s re-run).

    ``reference`` is the finding's description of ``reference_luma`` (its kind, and
    for a reduced reference its scale to the registered picture).
    """
    return jsonable(weigh(luma, label=label or layout.exhibit_label(exhibit_id), mark=rep,
                          threshold=threshold,
                          work_id=(match or {}).get("work_id"), work_record=work_record,
                          owner=owner, reference_luma=reference_luma,
                          reference=reduced_reference.describe(reference),
                          reference_scale=reduced_reference.scale_of(reference),
                          robustness=robustness))


def match_work(profile, rep: dict, luma: np.ndarray) -> dict | None:
    """The registered work this copy derives from: by the payload, else by the fingerprint."""
    if rep.get("registered") and rep.get("work_id"):
        return {"work_id": rep["work_id"], "by": "payload"}
    fp = perceptual_fingerprint(luma)
    hits = profile.works_by_fingerprint(fp, MATCH_DISTANCE)
    if not hits:
        return None
    work, dist = hits[0]
    return {"work_id": work.work_id, "by": "perceptual fingerprint",
            "fingerprint_distance_bits": int(dist), "fingerprint_bits": len(fp) * 4}


def find_reference(case: Case, work_record: dict, search: list[Path]) -> tuple[Path, str] | None:
    """The registered marked (preferred) or original file, found by its SHA-256.

    Looks in the case's ``references/`` first, then in the folders in
    ``search`` (not recursively into hidden folders). A file found outside
    is copied into ``references/`` (read-only), so the case and its bundle
    hold it. Returns the path and which file it is ("marked" or "original").
    """
    wanted = {work_record.get("marked", {}).get("sha256"): "marked",
              work_record.get("original", {}).get("sha256"): "original"}
    wanted.pop(None, None)
    refs = case.root / layout.REFERENCES
    found: dict[str, Path] = {}
    if refs.is_dir():
        for p in sorted(refs.iterdir()):
            stem = p.name.split(".")[0]
            if p.is_file() and not p.is_symlink() and stem in wanted and sha256_file(p) == stem:
                found[wanted[stem]] = p
    if "marked" not in found:
        for folder in search:
            for p in sorted(Path(folder).rglob("*")):
                if not p.is_file() or p.is_symlink() or any(x.startswith(".") for x in p.parts[-3:]):
                    continue
                if p.stat().st_size > 512 << 20:
                    continue
                digest = sha256_file(p)
                if digest in wanted and wanted[digest] not in found and not (
                        wanted[digest] == "original" and "marked" in found):
                    refs.mkdir(exist_ok=True)
                    dest = case.root / layout.reference_file(digest, p.suffix)
                    if not dest.exists():
                        tmp = refs / f".{dest.name}.part"
                        shutil.copyfile(p, tmp)
                        if sha256_file(tmp) != digest:
                            tmp.unlink()
                            raise CheckFailed("changed while it was copied", path=p)
                        os.chmod(tmp, stat.S_IRUSR | stat.S_IRGRP | stat.S_IROTH)
                        os.replace(tmp, dest)
                    found[wanted[digest]] = dest
            if "marked" in found:
                break
    for kind in ("marked", "original"):
        if kind in found:
            return found[kind], kind
    return None


def _robustness(profile, work_id: str, ref_path: Path) -> dict:
    """The stress battery on the registered marked file, with the keys its disclosure carries.

    ``verify`` re-runs it from the disclosure: every number of a row, also the bound of a
    copy where the mark is missed, must come from the keys the other side will hold.
    """
    work = profile.work(work_id)
    bits = payload.pack(profile.owner_tag, work.serial, profile.payload_tag(work.serial))
    pic = read_picture(ref_path)
    rows = run_battery(pic.pixels, workflow.work_mark_keys(profile, work),
                       workflow.expected_payload_check(bits), quick=True)
    return {"status": "run", "on": "registered marked file", "rows": jsonable(rows)}


def jsonable(obj):
    """``obj`` with dataclasses, tuples and NumPy scalars made plain JSON values (NaN -> None)."""
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if is_dataclass(obj) and not isinstance(obj, type):
        return jsonable(asdict(obj))
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, float) and not np.isfinite(obj):
        return None
    return obj


def examine_exhibit(case: Case, ex: Exhibit, profile, *, decoys: int = DEFAULT_DECOYS,
                    search: list[Path] | None = None, threshold: float = detect.DEFAULT_THRESHOLD,
                    robustness_cache: dict | None = None, workers: int = 1,
                    robustness: bool = True, reference_from_master: bool = False) -> dict:
    """Examine one exhibit; write ``findings/EXX.json`` and ``.npz``; return the finding.

    The content line and the alignment compare the exhibit with a reduced-resolution
    reference of the registered marked file. When only the unmarked master is at hand,
    no reference is made unless ``reference_from_master``: the published marked file
    less a reduced master is the mark itself at that resolution (measured on the demo's
    photo: an estimate correlated 0.85 with the true mark, and subtracting it halved the
    examination's score), so such a reference helps whoever holds the bundle strip or
    copy the mark. The content line then falls back to the record's fingerprint.
    """
    robustness_wanted = robustness
    path = checked_exhibit_path(case, ex)
    pic = read_picture(path, method=CURRENT_EXAMINATION_METHOD)
    luma = to_luma(pic.pixels)
    finding = workflow.examine_picture(pic, workflow.mark_keys(profile), owner_tag=profile.owner_tag,
                                       payload_check=workflow.owner_payload_check(profile),
                                       threshold=threshold, decoys=decoys, workers=workers)
    rep = workflow.report_for(path, pic, finding, profile)
    rep["file"] = ex.file
    if rep["sha256"] != ex.sha256:
        raise CheckFailed(f"{ex.exhibit_id}: stored copy changed during the examination", path=path)
    match = match_work(profile, rep, luma)
    arrays = {"surface": finding.surface.astype(np.float32)}
    # The prescribed message is the key's spot pattern and the recovered one shows it too:
    # kept apart, so that a bundle without key material leaves them out.
    message = {"recovered": finding.recovered.astype(np.float32),
               "reference": finding.reference.astype(np.float32)}
    alignment = None
    robustness = None
    reference = None
    ref_luma = None
    kind = None
    work = None
    if match is not None:
        work = profile.work(match["work_id"])
        found = find_reference(case, work.record, list(search or []))
        if found is not None and found[1] == "original" and not reference_from_master:
            found = None
            alignment = {"aligned": False, "reason": MASTER_ONLY}
        elif found is None:
            alignment = {"aligned": False,
                         "reason": "the registered file was not at hand (give --originals)"}
        if found is not None:
            ref_path, kind = found
            # Copies are compared with a reduced-resolution reference, never the master
            # itself, so that the bundle can re-run the comparison without the master.
            reference, ref_luma = reduced_reference.make_reduced(case.root, work.work_id,
                                                                 ref_path, kind)
            if kind == "marked" and not robustness_wanted:
                robustness = {"status": "not run", "reason": "skipped at the examiner's request"}
            elif kind == "marked":
                cache = robustness_cache if robustness_cache is not None else {}
                if match["work_id"] not in cache:
                    cache[match["work_id"]] = _robustness(profile, match["work_id"], ref_path)
                robustness = cache[match["work_id"]]
    lines = weigh_lines(luma, exhibit_id=ex.exhibit_id, rep=rep, threshold=threshold, match=match,
                        work_record=None if work is None else work.record, owner=profile.owner,
                        reference_luma=ref_luma, reference=reference, robustness=robustness)
    if ref_luma is not None:
        geom = alignment_geometry(lines["content"])
        if geom is None:
            alignment = {"aligned": False, "reason": "the content line did not find the registered "
                         "picture in the copy, so there is nothing to lay over it"}
        else:
            al = align(ref_luma, luma, geom,
                       reference_scale=reduced_reference.scale_of(reference))
            alignment = al.numbers
            arrays.update(aligned=al.aligned, difference=al.difference, mask=al.mask)
    npz = case.arrays_path(ex.exhibit_id)
    keyed = case.root / layout.message_arrays_file(ex.exhibit_id)
    for dest, content in ((npz, arrays), (keyed, message)):
        tmp = dest.with_name(f".{dest.name}.part.npz")
        np.savez_compressed(tmp, **content)
        os.replace(tmp, dest)
    doc = {
        "type": FINDING_TYPE,
        "exhibit_id": ex.exhibit_id,
        "exhibit_sha256": ex.sha256,
        "examined": {"time": utc_now(), "time_source": "system clock",
                     "software": f"claimkit {__version__}", "threshold": threshold,
                     "decoys": decoys, "decoy_seed": DECOY_SEED,
                     "examination_method": pic.examination_method},
        "result": jsonable(rep),
        "decoy_scores": [round(float(v), 4) for v in finding.decoy_scores],
        "decoy_summary": decoy_summary(finding.decoy_scores, finding.z_pilot),
        "match": match,
        "reference": reference,
        "alignment": alignment,
        "robustness": robustness,
        **lines,
        "arrays": {"file": npz.relative_to(case.root).as_posix(), "sha256": sha256_file(npz)},
        "message_arrays": {"file": layout.message_arrays_file(ex.exhibit_id),
                           "sha256": sha256_file(keyed)},
    }
    data = FindingDoc.from_json(doc).write(case.finding_path(ex.exhibit_id))
    profile.log_action("exhibit examined",
                       items={"exhibit": ex.sha256, "finding": sha256_hex(data)},
                       details={"case_id": case.case_id, "exhibit_id": ex.exhibit_id,
                                "detected": rep["detected"], "work_id": rep.get("work_id"),
                                "content_mismatch": lines["content_mismatch"],
                                "log10_false_alarm": rep["log10_false_alarm_probability"]})
    return doc


def examine_case(case: Case, profile, *, decoys: int = DEFAULT_DECOYS,
                 search: list[Path] | None = None, threshold: float = detect.DEFAULT_THRESHOLD,
                 workers: int = 1, progress=None, robustness: bool = True,
                 reference_from_master: bool = False) -> list[dict]:
    """Examine every exhibit of the case (in order); returns the findings."""
    exhibits = case.exhibits()
    if not exhibits:
        raise InputError("the case has no exhibits yet (claimkit case add)", path=case.root)
    workflow.check_decoys(decoys)
    cache: dict = {}
    out = []
    for ex in exhibits:
        if ex.withdrawal is not None:
            continue     # withdrawn from the claims: kept in the record, not examined again
        doc = examine_exhibit(case, ex, profile, decoys=decoys, search=search,
                              threshold=threshold, robustness_cache=cache, workers=workers,
                              robustness=robustness,
                              reference_from_master=reference_from_master)
        if progress is not None:
            progress(ex, doc)
        out.append(doc)
    return out
