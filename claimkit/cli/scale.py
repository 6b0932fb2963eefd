"""Commands for work at scale: ``scan``, and the batch form of ``mark``.

The library (:func:`claimkit.batch.mark_many`, :func:`claimkit.scan.scan_folders`)
hands back each file's row and a summary; this module prints them and picks
the exit status.

Exit status of a batch ``mark``: 0 every input marked or already done; 1 some
inputs failed (each listed at the end) or the run stopped early for lack of
disk space; 2 nothing could be marked because every input was bad input (or
no image was found); 130 the run was interrupted (Ctrl-C): run the same
command again to finish.

Exit status of ``scan``: 0 when every file was read (mark found or not); 1 when
some files could not be read (each listed); 2 when no file could be read or
none was found; 130 when interrupted (the lines and report cover the files done).
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

from claimkit import words
from claimkit.cli.common import open_profile, print_json
from claimkit.mark.stats import DEFAULT_THRESHOLD

EXIT_OK, EXIT_SOME_FAILED, EXIT_BAD_INPUT, EXIT_INTERRUPTED = 0, 1, 2, 130


def add_scale_options(p) -> None:
    """``--workers``, ``--engine``, ``--scheduler`` (shared by ``scan`` and the batch ``mark``)."""
    p.add_argument("--workers", type=int, default=None, metavar="N",
                   help="worker processes on this machine (default: all cores; 1 runs in "
                        "this process)")
    p.add_argument("--engine", choices=("local", "dask"), default="local",
                   help="local processes (default) or a Dask cluster")
    p.add_argument("--scheduler", metavar="ADDR",
                   help="Dask scheduler address, e.g. tcp://10.0.0.5:8786 (with --engine "
                        "dask; without it a cluster is started on this machine)")


def _json_row(row: dict) -> None:
    """One JSON line; an error is an object in every command's JSON (examine's too)."""
    if isinstance(row.get("error"), str):
        row = {**row, "error": {"message": row["error"], "exit_code": 2}}
    print_json(row)


def _notice(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


# --------------------------------------------------------------------------- batch mark

def _mark_line(row: dict) -> str:
    status = row["status"]
    if status == "marked":
        return (f"marked    {row['file']} -> {row['output']}  {row['work_id']}  "
                f"PSNR {row.get('psnr_db', float('nan')):.1f} dB  {words.ssim(row)}")
    if status == "skipped":
        return f"done      {row['file']}: {row['reason']} ({row['work_id']})"
    if status == "restored":
        return f"restored  {row['output']}: {row['reason']} ({row['work_id']})"
    return f"failed    {row['error']}"


def mark_many(profile, inputs: list[Path], out: Path, *, json_lines: bool = False,
              progress: bool | None = None, **kw) -> int:
    """Run :func:`claimkit.batch.mark_many`, print each row and the summary; the exit status."""
    # Imported when used: the batch machinery is not needed for --help (start-up time).
    from claimkit.batch import mark_many as run

    s = run(profile, inputs, out, progress=progress,
            on_row=_json_row if json_lines else (lambda row: print(_mark_line(row),
                                                                    flush=True)),
            **kw)
    err = sys.stderr
    done = s.marked + s.skipped + s.restored
    rate = (s.marked + s.restored) / s.seconds if s.seconds > 0 else 0.0
    line = (f"claimkit: {s.marked} marked, {s.skipped} already done, {s.restored} restored, "
            f"{len(s.failures)} failed")
    if s.not_started:
        line += f", {s.not_started} not started"
    line += f" ({s.total} inputs, {s.seconds:.1f} s, {rate:.2f} files/s)"
    if json_lines:    # stdout stays one object per file; the summary goes to stderr
        print(json.dumps({"summary": {"inputs": s.total, **s.as_dict()}}, sort_keys=True),
              file=err, flush=True)
    else:
        print(line, flush=True)
    if s.failures:
        print(f"claimkit: {len(s.failures)} file(s) failed:", file=err)
        for f in s.failures:
            print(f"claimkit: error: {f}", file=err)
    if s.stopped == "interrupted":
        print("claimkit: interrupted; everything listed above as marked is registered and "
              "in place; run the same command again to finish the rest", file=err, flush=True)
        return EXIT_INTERRUPTED
    if s.stopped:
        print(f"claimkit: stopped early: {s.stopped}; what was marked is registered and in "
              "place; free space and run the same command again to finish the rest",
              file=err, flush=True)
        return EXIT_SOME_FAILED
    if s.total == 0:
        print("claimkit: error: no image files found in the inputs", file=err)
        return EXIT_BAD_INPUT
    if s.failures:
        if done == 0 and all(k == "input" for k in s.failure_kinds):
            return EXIT_BAD_INPUT
        return EXIT_SOME_FAILED
    return EXIT_OK


# --------------------------------------------------------------------------- scan

def _where(rep: dict) -> str:
    """Where a scanned picture was found: its file, or its URL and capture in a WARC."""
    if rep.get("url"):
        return f"{rep['url']} (captured {rep.get('capture_date')}, in {rep['file']})"
    return str(rep["file"])


def _scan_line(rep: dict) -> str:
    """One line per file, its verdict in a first column (the words of :func:`words.verdict`)."""
    from claimkit.words import MARK_FOUND, verdict

    if "error" in rep:
        return f"{'unreadable':<12}{rep['error']}"
    if not rep.get("detected"):
        return f"{'-':<12}{_where(rep)}"
    said = verdict(rep).removeprefix(MARK_FOUND + ", ")
    geom = rep.get("geometry_text") or ""
    return (f"{MARK_FOUND:<12}{_where(rep)}: {said}; false-alarm bound "
            f"{rep.get('false_alarm_text', rep.get('false_alarm_probability'))}; {geom}")


def scan_folders(profile, folders: list[Path], *, json_lines: bool = False, **kw) -> int:
    """Run :func:`claimkit.scan.scan_folders`, print each row and the summary; the exit status."""
    # Imported when used: the examination engine is not needed for --help (start-up time).
    from claimkit.batch import IMAGE_SUFFIXES
    from claimkit.scan import scan_folders as run

    s = run(profile, folders, on_notice=_notice,
            on_row=_json_row if json_lines else (lambda rep: print(_scan_line(rep),
                                                                    flush=True)),
            **kw)
    err = sys.stderr
    if json_lines:
        print(json.dumps({"summary": s.as_dict()}, sort_keys=True), file=err, flush=True)
    else:
        rate = s.read / s.seconds if s.seconds > 0 else 0.0
        line = (f"{s.read} files read, mark found in {s.marks_found} ({s.registered} in this "
                f"registry), "
                f"{len(s.unreadable)} unreadable")
        if s.added_to_case:
            line += f", {s.added_to_case} added to the case"
        if s.not_started:
            line += f", {s.not_started} not examined"
        if s.passed_over:
            line += (f", {s.passed_over} other files passed over (not "
                     f"{'/'.join(x.lstrip('.') for x in IMAGE_SUFFIXES)})")
        print(f"{line}; {s.seconds:.1f} s, {rate:.1f} files/s", flush=True)
        if s.report is not None:
            print(f"report: {s.report}", flush=True)
        if s.marks_found:
            print("A mark found is a lead, not yet a finding that the copy derives from the work: "
                  "take it into a case, where the picture is compared with the registered work. "
                  "Technical evidence, not legal advice; consult counsel before acting on it.",
                  flush=True)
    if s.unreadable:
        print(f"claimkit: {len(s.unreadable)} file(s) could not be read:", file=err)
        for line in s.unreadable:
            print(f"claimkit: error: {line}", file=err)
    if s.stopped == "interrupted":
        print("claimkit: interrupted; the lines above cover the files examined so far",
              file=err, flush=True)
        return EXIT_INTERRUPTED
    if s.total == 0:
        print("claimkit: error: no image files found", file=err)
        return EXIT_BAD_INPUT
    if s.read == 0:
        return EXIT_BAD_INPUT
    return EXIT_SOME_FAILED if s.unreadable else EXIT_OK


def cmd_scan(args) -> int:

    with open_profile(args) as profile:
        return scan_folders(
            profile, [Path(d) for d in args.folders], json_lines=args.json,
            report=Path(args.report) if args.report else None,
            case_dir=Path(args.case) if args.case else None,
            engine=args.engine, scheduler=args.scheduler, workers=args.workers,
            progress=False if (args.no_progress or getattr(args, "quiet", False)) else None,
            threshold=args.threshold, max_pixels=args.max_pixels, force=args.force)


def register(sub, common) -> None:
    p = sub.add_parser(
        "scan", parents=[common], help="look for the owner's mark in every image under folders",
        description="Examine every image under the folders with the owner's key: which are "
                    "marked, which work each is, how sure, and what was done to it. One line "
                    "per file, a summary at the end. Exit 0 when every file was read, 1 when "
                    "some could not be read, 2 when none could. Technical evidence, not legal "
                    "advice.")
    p.add_argument("folders", nargs="+", metavar="DIR",
                   help="folders (recursive), image files, or WARC files (.warc, .warc.gz): "
                        "every image response in a WARC is examined")
    p.add_argument("--json", action="store_true",
                   help="one JSON object per file on stdout; the summary as JSON on stderr")
    p.add_argument("--report", metavar="FILE.csv", help="also write a CSV, one row per file")
    p.add_argument("--force", action="store_true", help="replace an existing --report file")
    p.add_argument("--case", metavar="DIR", help="take every copy with a mark found into this case")
    p.add_argument("--threshold", type=float, default=DEFAULT_THRESHOLD,
                   help="largest false-alarm bound that counts as a claim (default 1e-9)")
    p.add_argument("--max-pixels", type=int, default=None, metavar="N",
                   help="refuse images with more pixels (decompression-bomb guard)")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    add_scale_options(p)
    p.set_defaults(func=cmd_scan)
