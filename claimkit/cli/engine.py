"""Commands of the engine: mark and examine."""

from __future__ import annotations

import os
import sys
from pathlib import Path

from claimkit import words
from claimkit.cli.common import open_profile, print_json
from claimkit.cli.rights import add_rights_options
from claimkit.cli.scale import mark_many
from claimkit.errors import InputError
from claimkit.mark.stats import DEFAULT_THRESHOLD

# Each command imports the library modules it runs when it runs, so that `claimkit --help`
# starts in about 0.2 s rather than the 3 s that importing the whole library takes.

def cmd_mark(args) -> int:
    from claimkit import workflow
    from claimkit.cli.rights import rights_from_args
    from claimkit.evidence.rights import load_rights

    inputs = [Path(p) for p in args.inputs]
    out = Path(args.out)
    batch = len(inputs) > 1 or any(p.is_dir() for p in inputs)
    with open_profile(args) as profile:
        rights = rights_from_args(args, load_rights(profile.home, profile.owner))
        if batch:
            return mark_many(profile, inputs, out, force=args.force, jpeg_quality=args.quality,
                             strength=args.strength, workers=args.workers, engine=args.engine,
                             scheduler=args.scheduler, json_lines=args.json,
                             progress=not (args.json or getattr(args, "quiet", False)),
                             max_pixels=args.max_pixels,
                             rights=rights, mark_format=args.mark_format)
        if out.is_dir() or args.out.endswith(("/", os.sep)):
            raise InputError("is a folder; with one input, --out names the marked file", path=out)
        rep = workflow.mark_file(profile, inputs[0], out, force=args.force, strength=args.strength,
                                 jpeg_quality=args.quality, max_pixels=args.max_pixels,
                                 rights=rights, mark_format=args.mark_format)
    if args.json:
        print_json(rep)
    else:
        extra = f", {rep['psnr_db_file']:.1f} dB as saved" if "psnr_db_file" in rep else ""
        print(f"{rep['output']}: marked as {rep['work_id']} "
              f"(PSNR {rep['psnr_db']:.1f} dB{extra}, {words.ssim(rep)})")
        _metadata_lines(rep)
    return 0


def _metadata_lines(rep: dict) -> None:
    """In words: what metadata the output could not keep, and what was noted on reading."""
    from claimkit.filemeta import describe_dropped

    if rep.get("metadata_dropped"):
        print(f"{rep['output']}: metadata not kept: {describe_dropped(rep['metadata_dropped'])}")
    for note in rep.get("notes") or []:
        print(f"{rep['output']}: note: {note}")


def _verdict_line(rep: dict) -> str:
    from claimkit.mark.formats import CURRENT, READABLE
    from claimkit.words import verdict

    if not rep["detected"]:
        line = (f"{rep['file']}: {verdict(rep)} "
                f"(best score {rep['score_pilot']:.1f}; false-alarm bound {rep['false_alarm_text']})")
        if rep.get("removal_suspected"):
            line += f". REMOVAL SUSPECTED: {rep.get('removal_text', '')}"
        return line
    older = ""
    fmt = rep.get("mark_format")
    if fmt not in (None, CURRENT.name):
        # READABLE lists the newest first: a format after the one written now is older.
        names = [f.name for f in READABLE]
        word = "older " if fmt in names and names.index(fmt) > names.index(CURRENT.name) else ""
        older = f" (marked in the {word}format {fmt})"
    return (f"{rep['file']}: {verdict(rep)}{older}; false-alarm bound "
            f"{rep['false_alarm_text']}; {rep['geometry_text']}; "
            f"message PSNR {rep['message_psnr_db']:.1f} dB")


def _registered_file(record: dict, folders: list[Path]) -> tuple[Path, str] | None:
    """The registered marked (preferred) or original file in ``folders``, found by SHA-256."""
    from claimkit.evidence.storage import sha256_file

    wanted = {(record.get("marked") or {}).get("sha256"): "marked",
              (record.get("original") or {}).get("sha256"): "original"}
    wanted.pop(None, None)
    found: dict[str, Path] = {}
    for folder in folders:
        for p in sorted(folder.rglob("*")):
            if p.is_file() and not p.is_symlink() and p.stat().st_size <= 512 << 20:
                kind = wanted.get(sha256_file(p))
                if kind and kind not in found:
                    found[kind] = p
    for kind in ("marked", "original"):
        if kind in found:
            return found[kind], kind
    return None


def _with_lines(profile, rep: dict, path: Path, threshold: float, folders: list[Path],
                whole=None) -> dict:
    """Add ``content``, ``content_mismatch`` and ``evaluation`` to an ``examine --json`` line.

    ``whole``: the whole copy as the examination decoded it, when it was kept.
    """
    from claimkit.case.examine import match_work, weigh_lines
    from claimkit.imageio import read_picture, to_luma

    # The copy read as the examination read it (the luma plane of a colour JPEG), as
    # `case examine` and `verify` read an exhibit for these lines: one reading for all three
    # (the examination's own decoding where it kept it: the same pixels).
    if whole is None:
        whole = read_picture(path, method=rep.get("examination_method")).pixels
    # Without a reference picture only the perceptual fingerprint reads the copy, and it
    # reads any real dtype (its cell sums are exact in float64 either way): a JPEG's 8-bit
    # luma plane goes to it as it is, with no full-size float copy.
    grey = whole if whole.ndim == 2 and str(whole.dtype) == "uint8" else to_luma(whole)
    match = match_work(profile, rep, grey)
    record = None if match is None else profile.work(match["work_id"]).record
    ref_luma, reference = None, None
    if record is not None and folders:
        found = _registered_file(record, folders)
        if found is not None:
            ref_luma = to_luma(read_picture(found[0]).pixels)
            reference = rep["reference"] = {"file": str(found[0]), "kind": found[1]}
    luma = grey if ref_luma is None else to_luma(whole)
    lines = weigh_lines(luma, exhibit_id=path.name, rep=rep, threshold=threshold, match=match,
                        work_record=record, owner=profile.owner, reference_luma=ref_luma,
                        reference=reference, robustness=None, label=f"The file {path.name}")
    rep["match"] = match
    rep.update(lines)
    return rep


def cmd_examine(args) -> int:
    from claimkit import workflow

    threshold = workflow.check_threshold(args.threshold)
    bad = 0
    with open_profile(args) as profile:
        for f in args.files:
            try:
                pic = workflow.read_for_examination(f, max_pixels=args.max_pixels,
                                                    keep_whole=True)
                rep, finding = workflow.examine_read(profile, pic, threshold=threshold,
                                                     decoys=args.decoys)
            except InputError as exc:
                # One bad file does not stop the others: a line now, exit 2 at the end.
                bad += 1
                print(f"claimkit: error: {exc.line()}", file=sys.stderr)
                if args.json:
                    print_json({"file": str(f), "error": {"message": exc.message,
                                                          "exit_code": exc.exit_code}})
                continue
            if args.decoys:
                rep["decoy_scores"] = [round(v, 3) for v in finding.decoy_scores]
            if args.json or rep["detected"]:
                # The content line and the evaluation: against the registered file where
                # --originals holds it, else against the work record's fingerprint. The words
                # need them too: a found mark whose derivation is not claimed says so.
                rep = _with_lines(profile, rep, Path(f), threshold,
                                  [Path(d) for d in args.originals or []], pic.whole)
            del pic
            if args.json:
                print_json(rep)
            else:
                print(_verdict_line(rep))
    if not args.json:
        print("claimkit gives technical evidence, not legal advice.")
    return 2 if bad else 0


def register(sub, common) -> None:
    p = sub.add_parser("mark", parents=[common], help="mark photos invisibly and register them",
                       description="Embed the owner's invisible mark and register each work "
                                   "(signed record in the profile). Originals are never changed.",
                       epilog="Exit codes: 0 all marked (or already registered); 1 some files failed "
                              "or the disk filled (the rest are done and registered; run again to "
                              "finish); 2 bad input (every input bad, or no images found); "
                              "130 interrupted (what was done is kept).")
    p.add_argument("inputs", nargs="+", metavar="IN", help="photo(s) or folder(s)")
    p.add_argument("--out", required=True, metavar="OUT",
                   help="marked file (one input) or folder (several inputs or a folder)")
    p.add_argument("--force", action="store_true", help="replace existing outputs")
    p.add_argument("--json", action="store_true", help="one JSON object per file")
    p.add_argument("--quality", type=int, default=95, metavar="Q", help="JPEG quality (default 95)")
    p.add_argument("--strength", type=float, default=1.0,
                   help="multiplier on the default strength (default 1.0)")
    p.add_argument("--format", dest="mark_format", type=int, choices=(2, 3), default=None,
                   metavar="N", help="mark format written: 3 (the default: keyed per tile and family, "
                                     "resists estimation and copy attacks) or 2 (one tiled pattern "
                                     "per owner: a little more robust to heavy attacks, but a "
                                     "keyless fold removes and transplants it); every format is read")
    p.add_argument("--max-pixels", type=int, default=None, metavar="N",
                   help="refuse images with more pixels (decompression-bomb guard)")
    p.add_argument("--workers", type=int, default=None, help="parallel workers for batches")
    p.add_argument("--engine", choices=("local", "dask"), default="local",
                   help="local processes (default) or a Dask cluster")
    p.add_argument("--scheduler", metavar="ADDR", help="Dask scheduler address (--engine dask)")
    add_rights_options(p, for_mark=True)
    p.set_defaults(func=cmd_mark)

    e = sub.add_parser("examine", parents=[common], help="look for the owner's mark in copies",
                       description="Blind examination with the owner's key (no original needed): "
                                   "geometry, payload, and a conservative false-alarm bound.")
    e.add_argument("files", nargs="+", metavar="FILE", help="copies to examine (a bad one is "
                   "reported and the others examined; exit 2 at the end)")
    e.add_argument("--json", action="store_true", help="one JSON object per line, per file, in order")
    e.add_argument("--threshold", type=float, default=DEFAULT_THRESHOLD,
                   help="largest false-alarm bound called 'detected' (default 1e-9)")
    e.add_argument("--decoys", type=int, default=0, metavar="N",
                   help="also examine under N random decoy keys (control)")
    e.add_argument("--max-pixels", type=int, default=None, metavar="N",
                   help="refuse images with more pixels (decompression-bomb guard)")
    e.add_argument("--originals", action="append", metavar="DIR",
                   help="folder holding the registered files (found by SHA-256), for the "
                        "content line; without it the work record's fingerprint is used")
    e.set_defaults(func=cmd_examine)
