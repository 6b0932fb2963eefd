"""Scanning folders of found images for the owner's mark: ``claimkit scan``.

A rights desk gets folders of candidate images (saved from shops, social
media, search results). :func:`scan_folders` examines every image under them
with the owner's key, in parallel, and says for each which work it is, how
sure, and what was done to it; a summary closes the run. Web archives (WARC
files, plain or gzip, given or found in the folders) are read as folders
are: every image response in them is examined, and its line names the
record's target URL and capture date (:mod:`claimkit.capture.warcintake`).

Why the cost per file does not depend on the size of the registry: the mark
carries its own work serial in the payload, checked by a keyed payload tag,
so the examination under the owner's one key names the work; the registry is
asked once per file with a mark found, by serial (an indexed look-up). Nothing is
compared against every registered work.

What travels to the workers: the 32-byte detection seed and a payload
checker (the owner tag and the payload-tag key). Both are secret; local
workers are processes of this user on this machine. With ``--engine dask``
they go to the cluster's workers: use only a cluster you trust, over TLS
(``tls://`` scheduler addresses) when it leaves the machine.

:func:`scan_folders` hands each file's result to the caller as it comes
(``on_row``) and returns a :class:`ScanSummary`; the command line
(:mod:`claimkit.cli.scale`) prints them and chooses the exit status.
"""

from __future__ import annotations

import csv
import io
import os
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from claimkit import workflow
from claimkit.batch import IMAGE_SUFFIXES, find_images
from claimkit.capture.warc import is_warc
from claimkit.capture.warcintake import take_in, unpack_images
from claimkit.case.store import add_exhibit, open_case
from claimkit.errors import ClaimkitError, InputError
from claimkit.mark import detect
from claimkit.runner import (
    Outcome,
    Progress,
    StopGuard,
    make_engine,
    remote_path_hint,
    run_ordered,
    tune_memory,
)

__all__ = ["CSV_COLUMNS", "ScanSummary", "scan_folders", "scan_task"]

CSV_COLUMNS = ("file", "status", "detected", "work_id", "registered",
               "false_alarm_probability", "message_psnr_db", "rotation_deg", "scale",
               "flipped", "shift_x_px", "shift_y_px", "width", "height", "sha256", "error",
               "url", "capture_date", "warc_record_id")


def scan_task(path: str, seed, checker, threshold: float,
              max_pixels: int | None) -> dict:
    """Examine one file (runs in a worker; no registry). Returns the report or ``{"error": ...}``."""
    tune_memory()
    p = Path(path)
    try:
        pic = workflow.read_for_examination(p, max_pixels=max_pixels)
        finding = workflow.examine_picture(pic, seed, owner_tag=checker.owner_tag,
                                           payload_check=checker, threshold=threshold)
        rep = workflow.report_for(p, pic, finding, None)
    except ClaimkitError as exc:
        return {"file": path, "error": exc.line()}
    except MemoryError:
        return {"file": path, "error": f"{path}: not enough memory to examine this picture"}
    except (OSError, ValueError) as exc:
        return {"file": path, "error": f"{path}: {exc}"}
    return rep


@dataclass
class ScanSummary:
    read: int = 0
    marks_found: int = 0
    registered: int = 0
    unreadable: list[str] = field(default_factory=list)
    added_to_case: int = 0
    passed_over: int = 0
    seconds: float = 0.0
    not_started: int = 0
    stopped: str | None = None
    total: int = 0          # files found plus inputs that could not be used
    report: str | None = None

    def as_dict(self) -> dict:
        return {"files_read": self.read, "marks_found": self.marks_found,
                "marks_found_registered": self.registered, "files_unreadable": len(self.unreadable),
                "added_to_case": self.added_to_case, "not_started": self.not_started,
                "passed_over": self.passed_over,
                "seconds": round(self.seconds, 2),
                "files_per_second": round(self.read / self.seconds, 2) if self.seconds else None,
                "stopped": self.stopped}


class _CaseAdder:
    """Puts copies with a mark found into a case through the case layer."""

    def __init__(self, case_dir: Path, profile, notice, origins: dict | None = None):
        self.origins = origins or {}
        self.profile = profile
        self.notice = notice
        self.case = open_case(case_dir)       # a missing case is bad input: raise before scanning

    def __call__(self, path: Path, rep: dict) -> str | None:
        """Take ``path`` in; returns the exhibit id, or None (with a note) when it was not."""
        note = f"claimkit scan found the mark naming {rep.get('work_id')}"
        try:
            origin = self.origins.get(path)
            if origin is not None:
                ex = take_in(self.case, path, origin, self.profile, note=note)
            else:
                ex = add_exhibit(self.case, path, source=f"file found by claimkit scan: {path}",
                                 note=note, profile=self.profile)
        except ClaimkitError as exc:
            self.notice(f"claimkit: note: not added to the case: {exc.line()}")
            return None
        return ex.exhibit_id


def _csv_row(rep: dict) -> dict:
    geom = rep.get("geometry") or {}
    shift = geom.get("shift_px") or [None, None]
    return {
        "file": rep.get("file"),
        "status": rep.get("status"),
        "detected": rep.get("detected"), "work_id": rep.get("work_id"),
        "registered": rep.get("registered"),
        "false_alarm_probability": rep.get("false_alarm_probability"),
        "message_psnr_db": rep.get("message_psnr_db"),
        "rotation_deg": geom.get("rotation_deg"), "scale": geom.get("scale"),
        "flipped": geom.get("flipped"), "shift_x_px": shift[0], "shift_y_px": shift[1],
        "width": rep.get("width"), "height": rep.get("height"), "sha256": rep.get("sha256"),
        "error": rep.get("error"),
        "url": rep.get("url"), "capture_date": rep.get("capture_date"),
        "warc_record_id": rep.get("warc_record_id"),
    }


class _CsvReport:
    """The ``--report`` file: written under a temporary name, renamed when the scan ends."""

    def __init__(self, path: Path, *, force: bool = False):
        self.path = path
        if path.exists() and path.is_dir():
            raise InputError("is a folder; --report names a CSV file", path=path)
        if path.exists() and not force:
            raise InputError("already exists; use --force to replace it", path=path)
        if not path.parent.is_dir():
            raise InputError(f"folder {path.parent} does not exist", path=path)
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".partial")
        self.tmp = Path(tmp)
        self.fh = io.TextIOWrapper(os.fdopen(fd, "wb"), encoding="utf-8", newline="")
        self.writer = csv.DictWriter(self.fh, fieldnames=CSV_COLUMNS)
        self.writer.writeheader()

    def add(self, rep: dict) -> None:
        self.writer.writerow(_csv_row(rep))

    def close(self) -> None:
        self.fh.flush()
        os.fsync(self.fh.fileno())
        self.fh.close()
        os.replace(self.tmp, self.path)

    def discard(self) -> None:
        self.fh.close()
        self.tmp.unlink(missing_ok=True)


def scan_folders(profile, folders: list[Path], *,
                 on_row: Callable[[dict], None] | None = None,
                 on_notice: Callable[[str], None] | None = None,
                 report: Path | None = None, case_dir: Path | None = None,
                 engine: str = "local", scheduler: str | None = None,
                 workers: int | None = None, progress: bool | None = None,
                 threshold: float | None = None, max_pixels: int | None = None,
                 force: bool = False) -> ScanSummary:
    """Examine every image under ``folders`` with the owner's key.

    Parameters
    ----------
    profile : Profile
        Opened with its passphrase (the detection seed and payload check come from it).
    folders : list of Path
        Folders (walked recursively) or single files.
    on_row : callable, optional
        Called with each file's result, in a stable order: the ``examine
        --json`` fields plus ``status`` (``mark-found``, ``not-found`` or
        ``unreadable``, the last with ``error``).
    on_notice : callable, optional
        Called with a one-line note (a copy not added to the case, a stop
        request); default: not shown.
    report : Path, optional
        Also write a CSV with one row per file (columns :data:`CSV_COLUMNS`).
    case_dir : Path, optional
        Take every copy with a mark found into this case (``claimkit case add``).
    engine, scheduler, workers : see :func:`claimkit.runner.make_engine`.
    progress : bool, optional
        Progress bar on stderr (default: when stderr is a terminal).
    threshold : float, optional
        False-alarm bound at or below which a mark is found (default 1e-9).

    Returns
    -------
    ScanSummary
    """
    threshold = workflow.check_threshold(detect.DEFAULT_THRESHOLD if threshold is None
                                         else float(threshold))
    passed_over: list[Path] = []
    inputs = [Path(f) for f in folders]
    warcs = [f for f in inputs if is_warc(f) and f.is_file()]
    files, problems = find_images([f for f in inputs if f not in warcs], IMAGE_SUFFIXES,
                                  passed_over=passed_over)
    for p in problems:
        if not Path(p.path or "").exists():
            raise p                      # a folder that is not there is a usage error
    # WARC files (given, or found in the folders) are read as folders of images are.
    warcs += [f for f in passed_over if is_warc(f)]
    passed_over = [f for f in passed_over if not is_warc(f)]
    unpacked = tempfile.TemporaryDirectory(prefix="claimkit-warc-") if warcs else None
    origins = {}
    small: list[str] = []
    if unpacked is not None:
        try:
            origins = unpack_images(warcs, Path(unpacked.name), small)
        except BaseException:
            unpacked.cleanup()
            raise
        files += [(f, None, None) for f in origins]
        if small and on_notice is not None:
            on_notice(f"claimkit: note: {len(small)} image(s) in the WARC file(s) are smaller "
                      "than an examination needs (icons, spacers) and were not examined")
    seed = workflow.mark_keys(profile)
    checker = workflow.owner_payload_check(profile)

    def notice(msg: str) -> None:
        bar.clear()
        if on_notice is not None:
            on_notice(msg)
        bar.draw(force=True)

    bar = Progress(len(files), enabled=progress, label="scanning ")
    adder = (_CaseAdder(Path(case_dir), profile, notice, origins)
             if case_dir is not None else None)
    csv_out = _CsvReport(Path(report), force=force) if report is not None else None
    s = ScanSummary(passed_over=len(passed_over))
    for p in problems:
        s.unreadable.append(p.line())
    handed = 0
    eng = None

    def handle(o: Outcome) -> None:
        nonlocal handed
        handed += 1
        path = o.item
        rep = o.value if o.error is None else {"file": str(path), "error": f"{path}: {o.error}"}
        origin = origins.get(path)
        if origin is not None:
            # The line names the record's URL and capture date, not the unpacked copy.
            rep.update(file=str(origin.warc), url=origin.url, capture_date=origin.date,
                       warc_record_id=origin.record_id)
            if "error" in rep:
                rep["error"] = rep["error"].replace(str(path), origin.label())
        if "error" in rep:
            rep["error"] = remote_path_hint(eng, path, rep["error"])
            rep.update(status="unreadable", detected=None, work_id=None)
            s.unreadable.append(rep["error"])
        else:
            s.read += 1
            if rep.get("detected"):
                s.marks_found += 1
                serial = rep.get("serial")
                work = profile.work_by_payload(profile.owner_tag, serial) if serial else None
                if work is not None:
                    rep["work_id"], rep["registered"] = work.work_id, True
                    s.registered += 1
                if adder is not None:
                    with guard.critical():
                        ex = adder(path, rep)
                    if ex:
                        rep["exhibit_id"] = ex
                        s.added_to_case += 1
        if "status" not in rep:
            rep["status"] = "mark-found" if rep.get("detected") else "not-found"
        if csv_out is not None:
            csv_out.add(rep)
        if on_row is not None:
            bar.clear()
            on_row(rep)
            bar.draw(force=True)
        bar.advance()

    start = time.monotonic()
    try:
        with StopGuard(notice) as guard:
            if files:
                eng = make_engine(engine, workers=workers, scheduler=scheduler)
                run_ordered(eng, scan_task,
                            ((f, (str(f), seed, checker, threshold, max_pixels))
                             for f, _root, _rel in files),
                            handle, guard=guard, tick=bar.draw)
            s.stopped = guard.reason if guard.requested else None
    except BaseException:
        if csv_out is not None:
            csv_out.discard()
        raise
    finally:
        bar.close()
        if unpacked is not None:
            unpacked.cleanup()
    s.seconds = time.monotonic() - start
    s.not_started = len(files) - handed
    if csv_out is not None:
        csv_out.close()
    s.total = len(files) + len(problems)
    s.report = None if report is None else str(report)
    return s
