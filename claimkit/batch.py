"""Marking many photos at once: files and folders, in parallel, resumable.

:func:`mark_many` is what ``claimkit mark`` runs when it is given several
inputs or a folder. It keeps the folder tree under ``--out DIR``, runs the
numerics on several cores (or on a Dask cluster), and keeps the registry and
the output folder in step whatever happens to the run.

How a file is marked, and why in this order
-------------------------------------------
1. The parent hashes the original (SHA-256). If the registry already holds
   it, the file is done (or its marked copy is restored, see below): a batch
   run twice marks nothing twice.
2. The parent reserves a serial and computes the payload bits (they need the
   owner's secrets, which never leave the parent process); a worker reads
   the photo, embeds the mark and writes the marked copy under a hidden
   *staged* name beside the final one (``.NAME.claimkit-staged.EXT``).
3. Back in the parent, the work is registered (one SQLite transaction, which
   also queues the custody-log entry), and only then is the staged file
   renamed to its final name.

So an output file under its final name is always registered. A run cut
short between 3's two steps leaves a registered work and a staged file; the
next run sees the original's hash in the registry and finishes the rename.
If the marked copy of a registered original is missing altogether, the next
run makes it again with the same serial (marking is deterministic) and
accepts it only if its SHA-256 is the registered one.

Results
-------
:func:`mark_many` hands each file's result row to the caller as it comes
(``on_row``) and returns a :class:`BatchSummary`; the command line
(:mod:`claimkit.cli.scale`) prints them and chooses the exit status.
"""

from __future__ import annotations

import errno
import os
import sqlite3
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from claimkit import workflow
from claimkit.errors import ClaimkitError, DiskFull, InputError
from claimkit.evidence.keys import work_id_for
from claimkit.evidence.rights import load_rights
from claimkit.evidence.storage import sha256_file, unfinished_writes
from claimkit.filemeta import INSTALL_HINT, exiftool_available
from claimkit.mark import payload
from claimkit.runner import (
    Outcome,
    Progress,
    StopGuard,
    make_engine,
    remote_path_hint,
    run_ordered,
    tune_memory,
)
from claimkit.workflow import FileMetadata, place_staged, registry_name, staged_path

__all__ = [
    "IMAGE_SUFFIXES",
    "MARK_SUFFIXES",
    "BatchSummary",
    "find_images",
    "mark_many",
    "plan_outputs",
]

#: Extensions claimkit can write a marked copy in (imageio's writers).
MARK_SUFFIXES = (".jpg", ".jpeg", ".png", ".tif", ".tiff", ".webp")
#: Extensions examined by ``scan`` (what Pillow reads that photos come as).
IMAGE_SUFFIXES = MARK_SUFFIXES + (".gif", ".bmp")


# --------------------------------------------------------------------------- finding files

def find_images(inputs: list[Path], suffixes: tuple[str, ...], *,
                exclude: Path | None = None, passed_over: list[Path] | None = None
                ) -> tuple[list[tuple[Path, Path, Path]], list]:
    """Files to work on, in a stable order.

    Parameters
    ----------
    inputs : list of Path
        Files and folders. Folders are walked recursively; hidden files and
        folders (name starting with ``.``) and files whose extension is not in
        ``suffixes`` are passed over.
    suffixes : tuple of str
        Lower-case extensions, with the dot.
    exclude : Path, optional
        A folder not to walk into (the output folder, when it sits inside an
        input folder).
    passed_over : list, optional
        Receives the files found in folders and left out for their extension.

    Returns
    -------
    files : list of (path, root, relative)
        ``relative`` is the path under the folder given (the file name for a
        file given directly).
    problems : list of InputError
        Inputs that do not exist or are given directly with an unknown extension.
    """
    files, problems = [], []
    excl = exclude.resolve() if exclude is not None else None
    for raw in inputs:
        p = Path(raw)
        if p.is_dir():
            root = p
            found = []
            for dirpath, dirnames, filenames in os.walk(p):
                here = Path(dirpath)
                dirnames[:] = sorted(d for d in dirnames if not d.startswith(".")
                                     and (excl is None or (here / d).resolve() != excl))
                for name in sorted(filenames):
                    if name.startswith("."):
                        continue
                    if Path(name).suffix.lower() not in suffixes:
                        if passed_over is not None:
                            passed_over.append(here / name)
                        continue
                    f = here / name
                    found.append((f, root, f.relative_to(root)))
            # Sorted by path parts, as a listing shows them (not os.walk's order).
            files.extend(sorted(found, key=lambda t: t[2].parts))
        elif p.is_file():
            if p.suffix.lower() not in suffixes:
                problems.append(InputError(
                    f"extension {p.suffix or '(none)'!r} is not one of {', '.join(suffixes)}",
                    path=p))
            else:
                files.append((p, p.parent, Path(p.name)))
        else:
            problems.append(InputError("no such file or folder", path=p))
    return files, problems


def plan_outputs(files: list[tuple[Path, Path, Path]], out: Path
                 ) -> tuple[list[tuple[Path, Path]], list]:
    """Pair each input with ``out / relative``; two inputs for one output is an error."""
    seen: dict[Path, Path] = {}
    pairs, problems = [], []
    for src, _root, rel in files:
        dst = out / rel
        key = Path(os.path.normcase(os.path.abspath(dst)))
        if key in seen:
            problems.append(InputError(f"would be written to {dst} like {seen[key]}; "
                                       "rename one of them", path=src))
            continue
        seen[key] = src
        pairs.append((src, dst))
    return pairs, problems


# --------------------------------------------------------------------------- the worker

def _disk_full(exc: BaseException | None) -> bool:
    """Whether an error (or one it was raised from) is a full disk or quota."""
    seen = 0
    while exc is not None and seen < 8:
        if isinstance(exc, DiskFull):
            return True
        if isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, errno.EDQUOT):
            return True
        # SQLITE_FULL (13): "database or disk is full" (sqlite.org/rescode.html#full).
        if isinstance(exc, sqlite3.OperationalError) and \
                getattr(exc, "sqlite_errorcode", None) == 13:
            return True
        exc = exc.__cause__ or exc.__context__
        seen += 1
    return False


def mark_task(src: str, staged: str, seed: bytes, bits: list[int], strength: float,
              jpeg_quality: int, max_pixels: int | None, metadata=None) -> dict:
    """Mark one photo and write it to ``staged`` (runs in a worker; no profile, no registry).

    Returns a dictionary: on success the facts the parent registers
    (hashes, fingerprint, quality measures, capture facts); on failure
    ``{"error": line, "kind": "input" | "disk-full" | "internal"}``.
    """
    tune_memory()
    src_p, staged_p = Path(src), Path(staged)
    try:
        # The same pixel work as workflow.mark_file, minus the registry, which
        # stays in the parent.
        pic, sha_orig = workflow.load_original(src_p, max_pixels=max_pixels)
        facts = workflow.mark_picture(pic, staged_p, seed, np.asarray(bits, dtype=np.uint8),
                                      strength=strength, jpeg_quality=jpeg_quality,
                                      force=True, max_pixels=max_pixels, metadata=metadata)
    except ClaimkitError as exc:
        staged_p.unlink(missing_ok=True)
        kind = "disk-full" if _disk_full(exc) else "input"
        return {"error": exc.line(), "kind": kind}
    except MemoryError:
        staged_p.unlink(missing_ok=True)
        return {"error": f"{src}: not enough memory to mark this picture", "kind": "internal"}
    except OSError as exc:
        staged_p.unlink(missing_ok=True)
        kind = "disk-full" if _disk_full(exc) else "input"
        return {"error": f"{exc.filename or src}: {exc.strerror or exc}", "kind": kind}
    return {"sha256_original": sha_orig, **facts}


# --------------------------------------------------------------------------- the parent

@dataclass
class _Job:
    src: Path
    out: Path
    sha256: str | None = None
    serial: int | None = None
    restore_of: object | None = None     # WorkRecord whose marked copy is being re-made
    early: dict | None = None            # result decided without a worker (skip, failure)


@dataclass
class BatchSummary:
    """Counts of one batch run (also what the last line says)."""

    marked: int = 0
    skipped: int = 0
    restored: int = 0
    failures: list[str] = field(default_factory=list)
    failure_kinds: list[str] = field(default_factory=list)
    not_started: int = 0
    stopped: str | None = None
    seconds: float = 0.0
    total: int = 0          # inputs: files to mark plus inputs refused before marking

    def as_dict(self) -> dict:
        return {"marked": self.marked, "already_done": self.skipped, "restored": self.restored,
                "files_failed": len(self.failures), "not_started": self.not_started,
                "stopped": self.stopped, "seconds": round(self.seconds, 2)}


class _MarkBatch:
    def __init__(self, profile, *, force: bool, jpeg_quality: int, strength: float,
                 max_pixels: int | None, on_row: Callable[[dict], None] | None,
                 progress: Progress, guard: StopGuard, rights=None):
        self.rights = rights if rights is not None else load_rights(profile.home, profile.owner)
        self.profile = profile
        self.force = force
        self.jpeg_quality = jpeg_quality
        self.strength = strength
        self.max_pixels = max_pixels
        self.on_row = on_row
        self.progress = progress
        self.guard = guard
        self.seed = profile.detection_seed
        self.params = workflow.mark_parameters(strength)
        self.summary = BatchSummary()
        self.handed_back = 0
        self.in_flight: set[Path] = set()   # staged names a worker may be writing
        self.engine = None                  # set once the engine is up (for error hints)

    # ---------------------------------------------------------------- planning
    def jobs(self, pairs: list[tuple[Path, Path]]):
        """Yield ``(job, args)``; args is None when no worker is needed."""
        for src, out in pairs:
            job = _Job(src, out)
            try:
                args = self._prepare(job)
            except ClaimkitError as exc:
                job.early = {"status": "failed", "error": exc.line(),
                             "kind": "disk-full" if _disk_full(exc) else "input"}
                args = None
            except (OSError, sqlite3.Error) as exc:     # e.g. the registry's disk is full
                job.early = {"status": "failed", "error": f"{src}: {exc}",
                             "kind": "disk-full" if _disk_full(exc) else "internal"}
                args = None
            yield job, args

    def _prepare(self, job: _Job):
        src, out = job.src, job.out
        if out.exists() and os.path.samefile(src, out):
            raise InputError("the output would overwrite the original; choose another --out",
                             path=out)
        job.sha256 = sha256_file(src)
        work = self.profile.work_by_hash(job.sha256)
        staged = staged_path(out)
        if work is not None:
            rec = work.record
            marked_name = rec.get("marked", {}).get("name")
            if rec.get("marked", {}).get("sha256") == job.sha256:
                job.early = {"status": "skipped", "work_id": work.work_id,
                             "reason": "is itself a marked copy"}
                return None
            want = rec.get("marked", {}).get("sha256")
            if _hash_or_none(out) == want:
                job.early = {"status": "skipped", "work_id": work.work_id,
                             "reason": "already marked and registered", "sha256_marked": want}
                return None
            if _hash_or_none(staged) == want:
                # A run stopped between registering and renaming: finish the rename.
                with self.guard.critical():
                    place_staged(staged, out, force=self.force)
                job.early = {"status": "restored", "work_id": work.work_id,
                             "reason": "registered copy moved into place", "sha256_marked": want}
                return None
            if marked_name and marked_name != out.name:
                # Marked earlier to another name or format (say a single-file mark to
                # .jpg): that copy is the registered one; another would be a new work.
                job.early = {"status": "skipped", "work_id": work.work_id,
                             "reason": f"already marked and registered; its marked copy is "
                                       f"{marked_name}", "sha256_marked": want}
                return None
            if out.exists() and not self.force:
                raise InputError(f"already exists and is not the registered marked copy of "
                                 f"{work.work_id}; use --force to replace it", path=out)
            # Re-make the registered copy with its own serial (deterministic marking).
            job.restore_of = work
            job.serial = work.serial
            strength = float(rec.get("mark_params", {}).get("strength", self.strength))
        else:
            if out.exists() and not self.force:
                raise InputError("already exists; use --force to replace it", path=out)
            job.serial = self.profile.allocate_serials(1)[0]
            strength = self.strength
        try:
            out.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise InputError(f"cannot create folder {out.parent}: {exc.strerror or exc}",
                             path=out) from exc
        bits = payload.pack(self.profile.owner_tag, job.serial,
                            self.profile.payload_tag(job.serial))
        self.in_flight.add(staged)
        metadata = FileMetadata(rights=self.rights,
                                work_id=work_id_for(self.profile.owner_tag, job.serial),
                                registry=registry_name(self.profile))
        return (str(src), str(staged), self.seed, [int(b) for b in bits], strength,
                self.jpeg_quality, self.max_pixels, metadata)

    # ---------------------------------------------------------------- results
    def handle(self, outcome: Outcome) -> None:
        job: _Job = outcome.item
        self.in_flight.discard(staged_path(job.out))
        if job.early is not None:
            result = job.early
        elif outcome.error is not None:
            staged_path(job.out).unlink(missing_ok=True)
            result = {"status": "failed", "error": f"{job.src}: {outcome.error}",
                      "kind": "internal"}
        elif "error" in outcome.value:
            result = {"status": "failed",
                      "error": remote_path_hint(self.engine, job.src, outcome.value["error"]),
                      "kind": outcome.value.get("kind", "input")}
        else:
            # A work registered is a row reported: a second Ctrl-C waits for both.
            with self.guard.critical():
                self._report(job, self._finish(job, outcome.value))
            return
        self._report(job, result)

    def _finish(self, job: _Job, value: dict) -> dict:
        staged = staged_path(job.out)
        if value["sha256_original"] != job.sha256:
            staged.unlink(missing_ok=True)
            return {"status": "failed", "kind": "input",
                    "error": f"{job.src}: the file changed while it was being marked"}
        if job.restore_of is not None:
            want = job.restore_of.record.get("marked", {}).get("sha256")
            if value["sha256_marked"] != want:
                staged.unlink(missing_ok=True)
                name = job.restore_of.record.get("marked", {}).get("name", "?")
                return {"status": "failed", "kind": "input", "error": (
                    f"{job.src}: already registered as {job.restore_of.work_id}, whose marked "
                    f"copy ({name}) is not in {job.out.parent} and could not be re-made bit "
                    "for bit (made by another software version?); use that copy, or mark "
                    "this file on its own (claimkit mark FILE --out OUT) to register it as "
                    "a new work")}
            with self.guard.critical():
                place_staged(staged, job.out, force=self.force)
            return {"status": "restored", "work_id": job.restore_of.work_id,
                    "reason": "registered copy re-made", "sha256_marked": want}
        try:
            with self.guard.critical():
                record = self.profile.register_work(
                    job.serial, sha256_original=job.sha256,
                    sha256_marked=value["sha256_marked"], original_name=job.src.name,
                    marked_name=job.out.name, fingerprint=value["fingerprint"],
                    mark_params=self.params, capture=value["capture"],
                    quality=value["quality"])
                place_staged(staged, job.out, force=self.force)
        except (ClaimkitError, sqlite3.Error, OSError) as exc:
            staged.unlink(missing_ok=True)
            line = exc.line() if isinstance(exc, ClaimkitError) else f"{job.out}: {exc}"
            return {"status": "failed", "error": line,
                    "kind": "disk-full" if _disk_full(exc) else "input"}
        return {"status": "marked", "work_id": record.work_id, "serial": job.serial,
                "sha256_marked": value["sha256_marked"], "width": value["width"],
                "height": value["height"], "bit_depth": value["bit_depth"], **value["quality"],
                "metadata_dropped": value.get("metadata_dropped", []),
                "rights_written": value.get("rights_written", []),
                "rights_kept": value.get("rights_kept", []), "notes": value.get("notes", [])}

    def _report(self, job: _Job, result: dict) -> None:
        s = self.summary
        status = result["status"]
        if status == "marked":
            s.marked += 1
        elif status == "skipped":
            s.skipped += 1
        elif status == "restored":
            s.restored += 1
        else:
            s.failures.append(result["error"])
            s.failure_kinds.append(result.get("kind", "input"))
            if result.get("kind") == "disk-full":
                self.guard.request("the disk is full")
        self.handed_back += 1
        row = {"file": str(job.src), "output": str(job.out), "sha256_original": job.sha256,
               **result}
        if self.on_row is not None:
            self.progress.clear()
            self.on_row(row)
            self.progress.draw(force=True)
        self.progress.advance()


def _hash_or_none(path: Path) -> str | None:
    if not path.is_file():
        return None
    try:
        return sha256_file(path)
    except ClaimkitError:
        return None


def mark_many(profile, inputs: list[Path], out: Path, *, force: bool = False,
              jpeg_quality: int = 95, strength: float = 1.0, workers: int | None = None,
              engine: str = "local", scheduler: str | None = None,
              on_row: Callable[[dict], None] | None = None, progress: bool | None = None,
              max_pixels: int | None = None, rights=None) -> BatchSummary:
    """Mark every photo in ``inputs`` (files and folders) into the folder ``out``.

    Parameters
    ----------
    profile : claimkit.evidence.profile.Profile
        Opened with its passphrase; used only in this process.
    inputs : list of Path
        Files and folders; folders are walked recursively and their tree is
        kept under ``out`` (``shoot/day1/a.jpg`` -> ``OUT/day1/a.jpg`` for
        the input ``shoot``; a file given directly goes to ``OUT/NAME``).
    out : Path
        The output folder (created if missing).
    force : bool
        Replace existing output files.
    jpeg_quality, strength : see :func:`claimkit.workflow.mark_file`.
    workers : int, optional
        Worker processes (default: the usable cores); 1 runs in this process.
    engine : {"local", "dask"}
    scheduler : str, optional
        Dask scheduler address; without it ``dask`` starts a local cluster.
    on_row : callable, optional
        Called with each file's result row (``original``, ``output``,
        ``status``: marked, skipped, restored or failed, and the facts), in
        input order, as soon as it is known.
    progress : bool, optional
        Draw a progress bar on stderr (default: when stderr is a terminal).

    Returns
    -------
    BatchSummary
        The counts, the failures (each one line) and why the run stopped, if it did.
    """
    out = Path(out)
    workflow.check_strength(strength)
    workflow.check_jpeg_quality(jpeg_quality)
    for p in inputs:
        if Path(p).is_dir() and out.exists() and os.path.samefile(p, out):
            raise InputError("the output folder is an input folder; choose another --out",
                             path=out)
    if out.exists() and not out.is_dir():
        raise InputError("is a file; with several inputs or a folder, --out must be a folder",
                         path=out)
    if not exiftool_available():
        raise InputError("exiftool is needed to keep the photos' metadata and write the rights "
                         "fields, and was not found", hint=INSTALL_HINT)
    files, problems = find_images([Path(p) for p in inputs], MARK_SUFFIXES, exclude=out)
    pairs, clashes = plan_outputs(files, out)
    problems += clashes
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create the output folder: {exc.strerror or exc}",
                         path=out) from None
    bar = Progress(len(pairs), enabled=progress, label="marking ")
    with StopGuard() as guard:
        batch = _MarkBatch(profile, force=force, jpeg_quality=jpeg_quality, strength=strength,
                           max_pixels=max_pixels, on_row=on_row, progress=bar,
                           guard=guard, rights=rights)
        for p in problems:
            batch.summary.failures.append(p.line())
            batch.summary.failure_kinds.append("input")
        start = time.monotonic()
        eng = make_engine(engine, workers=workers, scheduler=scheduler) if pairs else None
        batch.engine = eng
        if eng is not None:
            run_ordered(eng, mark_task, batch.jobs(pairs), batch.handle, guard=guard,
                        tick=bar.draw)
        bar.close()
        batch.summary.seconds = time.monotonic() - start
        batch.summary.not_started = len(pairs) - batch.handed_back
        batch.summary.stopped = guard.reason if guard.requested else None
    # Staged copies of tasks abandoned by a second Ctrl-C were never registered.
    for staged in batch.in_flight:
        staged.unlink(missing_ok=True)
        # A worker stopped mid-write may leave the writer's temporary file too.
        for tmp in unfinished_writes(staged):
            tmp.unlink(missing_ok=True)
    batch.summary.total = len(pairs) + len(problems)
    return batch.summary
