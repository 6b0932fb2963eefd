"""A case folder: the disputed copies taken in as exhibits, and what was found in them.

Layout (every name relative to the case folder, so a bundle can be checked
anywhere)::

    case.json                 title, case ID, when it was opened (canonical JSON)
    exhibits/E01-NAME.EXT     the disputed file, byte for byte, read-only (0444)
    exhibits/E01.json         the intake record: SHA-256, size, type, pixels, source, who, when
    references/SHA256.EXT     the registered file a copy is aligned to (copied by hash)
    findings/E01.json         the examination, numbers only (canonical JSON)
    findings/E01.npz          its arrays: correlation surface, recovered and reference message,
                              difference map
    report/                   the dossier (PDF, HTML, the data they were built from, figures)

An exhibit is never written after intake; every later step re-reads it only
after checking its SHA-256 against the intake record
(:func:`checked_exhibit_path`), as ISO/IEC 27037 asks of acquired evidence.
"""

from __future__ import annotations

import os
import re
import shutil
import stat
import tempfile
from dataclasses import dataclass
from pathlib import Path

from PIL import Image, UnidentifiedImageError

from claimkit import __version__
from claimkit.case import layout
from claimkit.case.documents import CaseDoc, ExhibitDoc, FindingDoc, WithdrawalDoc
from claimkit.case.layout import CASE_FILE
from claimkit.errors import CheckFailed, InputError
from claimkit.evidence.custodylog import utc_now
from claimkit.evidence.storage import fsync_dir, sha256_file, sha256_hex
from claimkit.imageio import read_picture
from claimkit.workflow import MIN_EXAMINE_SIDE

__all__ = [
    "CASE_FILE",
    "Case",
    "Exhibit",
    "add_exhibit",
    "checked_exhibit_path",
    "new_case",
    "open_case",
    "withdraw_exhibit",
]

CASE_TYPE = CaseDoc.type_name()
EXHIBIT_TYPE = ExhibitDoc.type_name()
_SAFE = re.compile(r"[^A-Za-z0-9._-]+")


@dataclass
class Exhibit:
    """One disputed copy as taken in (the intake record, read from ``exhibits/EXX.json``)."""

    exhibit_id: str
    record: dict
    withdrawal: dict | None = None

    @property
    def label(self) -> str:
        """How people read the id: "Exhibit 3"."""
        return layout.exhibit_label(self.exhibit_id)

    @property
    def file(self) -> str:
        """Path of the stored copy, relative to the case folder."""
        return self.record["file"]

    @property
    def sha256(self) -> str:
        return self.record["sha256"]


@dataclass
class Case:
    """An opened case folder."""

    root: Path
    info: dict

    @property
    def title(self) -> str:
        return self.info["title"]

    @property
    def case_id(self) -> str:
        return self.info["case_id"]

    def exhibits(self) -> list[Exhibit]:
        """Every exhibit, in intake order (exhibit-1, exhibit-2, ...; E01, ... in older cases)."""
        folder = self.root / layout.EXHIBITS
        out = []
        if folder.is_dir():
            for p in sorted(q for g in layout.INTAKE_GLOBS for q in folder.glob(g)):
                rec = ExhibitDoc.read(p).to_json()
                w = self.root / layout.withdrawal_record(rec["exhibit_id"])
                out.append(Exhibit(rec["exhibit_id"], rec,
                                   WithdrawalDoc.read(w).to_json() if w.is_file() else None))
        out.sort(key=lambda e: layout.exhibit_number(e.exhibit_id) or 0)
        return out

    def exhibit(self, exhibit_id: str) -> Exhibit:
        for ex in self.exhibits():
            if ex.exhibit_id == exhibit_id:
                return ex
        raise InputError(f"no exhibit {exhibit_id} in this case", path=self.root)

    def finding_path(self, exhibit_id: str) -> Path:
        return self.root / layout.finding_file(exhibit_id)

    def arrays_path(self, exhibit_id: str) -> Path:
        return self.root / layout.arrays_file(exhibit_id)

    def finding(self, exhibit_id: str) -> dict | None:
        p = self.finding_path(exhibit_id)
        if not p.is_file():
            return None
        return FindingDoc.read(p).to_json()


def new_case(folder: str | os.PathLike, title: str, profile=None) -> Case:
    """Open a new case in ``folder`` (created; must be missing or empty).

    Parameters
    ----------
    folder : path-like
    title : str
        A short title, e.g. "Harbour at dawn on Tidewater Home Goods".
    profile : Profile, optional
        When given (opened with the passphrase), "case opened" is logged.
    """
    root = Path(folder)
    title = (title or "").strip()
    if not title:
        raise InputError("the case title is empty")
    if root.exists() and (not root.is_dir() or any(root.iterdir())):
        raise InputError("already exists and is not an empty folder", path=root)
    root.mkdir(parents=True, exist_ok=True)
    for sub in (layout.EXHIBITS, layout.FINDINGS, layout.REFERENCES):
        (root / sub).mkdir(exist_ok=True)
    now = utc_now()
    doc = CaseDoc(
        title=title, case_id=f"C-{now[:10].replace('-', '')}-{os.urandom(3).hex().upper()}",
        opened={"time": now, "time_source": "system clock"},
        software=f"claimkit {__version__}",
        owner=None if profile is None else {"name": profile.owner,
                                            "public_key_sha256": profile.public_key_fingerprint})
    data = doc.write(root / CASE_FILE)
    if profile is not None:
        profile.log_action("case opened", items={"case": sha256_hex(data)},
                           details={"case_id": doc.case_id, "title": title})
    return Case(root, doc.to_json())


def open_case(folder: str | os.PathLike) -> Case:
    """Open an existing case folder (read ``case.json``)."""
    root = Path(folder)
    p = root / CASE_FILE
    if not p.is_file():
        raise InputError("not a case folder (no case.json); make one with claimkit case new",
                         path=root)
    return Case(root, CaseDoc.read(p).to_json())


def _sniff(path: Path) -> tuple[str, int | None, int | None, str | None]:
    """Media type, width, height and a reason it is not an image (or None)."""
    try:
        with Image.open(path) as im:
            return (Image.MIME.get(im.format, f"image/{(im.format or 'unknown').lower()}"),
                    int(im.width), int(im.height), None)
    except (UnidentifiedImageError, OSError, ValueError) as exc:
        return "application/octet-stream", None, None, str(exc) or type(exc).__name__


def _check_examinable(src: Path) -> None:
    """Refuse at intake what no examination could read (exit 2): a copy taken in must be
    examinable, or the case would be stuck with an exhibit that every later step fails on.

    The whole picture is decoded (a truncated file fails here), under the pixel limit
    (a decompression bomb fails here), and must be large enough to examine.
    """
    pic = read_picture(src)
    if min(pic.width, pic.height) < MIN_EXAMINE_SIDE:
        raise InputError(f"image is {pic.width}x{pic.height} pixels; an examination needs at "
                         f"least {MIN_EXAMINE_SIDE} pixels on each side", path=src)


def add_exhibit(case: Case, src: str | os.PathLike, *, source: str, found: str | None = None,
                by: str | None = None, note: str | None = None, profile=None,
                acquisition: dict | None = None) -> Exhibit:
    """Take a disputed file into the case: copy it byte for byte, hash it, log it.

    The copy is read once into a temporary file in ``exhibits/`` while its
    SHA-256 is computed; the source is hashed again afterwards, and a
    difference (the file changed while it was read) refuses the intake. The
    stored copy is made read-only; the source is never written.

    Parameters
    ----------
    case : Case
    src : path-like
        The disputed file as saved from where it was found.
    source : str
        Where it was found (a URL, a shop, a printed catalogue page).
    found : str, optional
        When it was found, as the person states it (kept as text with its source).
    by : str, optional
        Who took it in; default the profile owner.
    note : str, optional
    profile : Profile
        Opened with the passphrase: the intake is logged in the custody log.
    acquisition : dict, optional
        How the copy was acquired when claimkit itself took it from the web or
        from a WARC file (:mod:`claimkit.capture`): URL, page, WARC file and
        record, capture time and its clock. Its ``captured`` time becomes the
        found time, with the clock it came from.

    Returns
    -------
    Exhibit
    """
    src = Path(src)
    if not (source or "").strip():
        raise InputError("--source is empty: say where the copy was found", path=src)
    if not src.exists():
        raise InputError("no such file", path=src)
    if not src.is_file():
        raise InputError("is not a regular file", path=src)
    before = sha256_file(src)
    for ex in case.exhibits():
        if ex.sha256 == before:
            raise InputError(f"this file is already exhibit {ex.exhibit_id} "
                             f"(same SHA-256 {before[:16]}...)", path=src)
    media, width, height, why = _sniff(src)
    if why is not None:
        raise InputError(f"not an image claimkit can read ({why})", path=src)
    _check_examinable(src)
    number = 1 + max([layout.exhibit_number(e.exhibit_id) or 0 for e in case.exhibits()] or [0])
    exhibit_id = layout.exhibit_id_for(number)
    folder = case.root / layout.EXHIBITS
    folder.mkdir(exist_ok=True)
    stored = layout.exhibit_file(exhibit_id, _SAFE.sub('_', src.name)[-80:] or 'file')
    dest = case.root / stored
    fd, tmp = tempfile.mkstemp(dir=folder, prefix=f".{exhibit_id}.", suffix=".part")
    try:
        with os.fdopen(fd, "wb") as out, open(src, "rb") as inp:
            shutil.copyfileobj(inp, out, 1 << 20)
            out.flush()
            os.fsync(out.fileno())
        copied = sha256_file(tmp)
        after = sha256_file(src)
        if not (before == copied == after):
            raise CheckFailed("the file changed while it was copied; take it in again", path=src)
        os.chmod(tmp, stat.S_IRUSR | stat.S_IRGRP | stat.S_IROTH)
        os.replace(tmp, dest)
    except BaseException:
        try:
            os.chmod(tmp, 0o600)
            os.unlink(tmp)
        except OSError:
            pass
        raise
    fsync_dir(folder)
    who = (by or "").strip() or (profile.owner if profile is not None else "unknown")
    if acquisition is not None and not found:
        found = acquisition["captured"]
        stated = acquisition["time_source"]
    else:
        stated = f"stated by {who}"
    doc = ExhibitDoc(
        exhibit_id=exhibit_id, case_id=case.case_id, file=stored, original_name=src.name,
        sha256=copied, size=dest.stat().st_size, media_type=media, width=width, height=height,
        source=source.strip(),
        found={"when": found.strip(), "time_source": stated} if found else None,
        taken_in={"time": utc_now(), "time_source": "system clock", "by": who},
        note=(note or "").strip() or None,
        extra={} if acquisition is None else {"acquisition": acquisition})
    data = doc.write(case.root / layout.intake_record(exhibit_id))
    record = doc.to_json()
    if profile is not None:
        profile.log_action("disputed file taken in",
                           items={"exhibit": copied, "intake_record": sha256_hex(data)},
                           details={"case_id": case.case_id, "exhibit_id": exhibit_id,
                                    "source": record["source"], "by": who,
                                    "original_name": src.name},
                           actor=who)
    return Exhibit(exhibit_id, record)


def withdraw_exhibit(case: Case, exhibit_id: str, *, reason: str, by: str | None = None,
                     profile=None) -> dict:
    """Take an exhibit out of the claims, keeping it and the withdrawal in the record.

    The stored copy, its intake record and any finding stay as they are; a
    withdrawal record (``exhibits/withdrawn/ID.json``: who, when, why) is
    added and the withdrawal is entered in the custody log. Later
    examinations pass the exhibit over, and the dossier shows it as
    withdrawn, resting nothing on it. A withdrawal is not undone.
    """
    reason = (reason or "").strip()
    if not reason:
        raise InputError("--reason is empty: say why the exhibit is withdrawn")
    ex = case.exhibit(_exhibit_id_given(case, exhibit_id))
    if ex.withdrawal is not None:
        raise InputError(f"{ex.exhibit_id} was already withdrawn on {ex.withdrawal['time']}",
                         path=case.root)
    who = (by or "").strip() or (profile.owner if profile is not None else "unknown")
    doc = WithdrawalDoc(exhibit_id=ex.exhibit_id, case_id=case.case_id, exhibit_sha256=ex.sha256,
                        reason=reason, by=who, time=utc_now(), time_source="system clock")
    path = case.root / layout.withdrawal_record(ex.exhibit_id)
    path.parent.mkdir(parents=True, exist_ok=True)
    data = doc.write(path, replace=False)
    record = doc.to_json()
    if profile is not None:
        profile.log_action("exhibit withdrawn",
                           items={"exhibit": ex.sha256, "withdrawal": sha256_hex(data)},
                           details={"case_id": case.case_id, "exhibit_id": ex.exhibit_id,
                                    "reason": reason, "by": who},
                           actor=who)
    return record


def _exhibit_id_given(case: Case, text: str) -> str:
    """An exhibit named as the user may write it: ``exhibit-3``, ``3``, ``Exhibit 3``, ``E03``."""
    t = str(text).strip()
    if t.lower().startswith("exhibit"):
        t = t[7:].strip(" -")
    if t.isdigit():
        for ex in case.exhibits():
            if layout.exhibit_number(ex.exhibit_id) == int(t):
                return ex.exhibit_id
    return str(text).strip()


def checked_exhibit_path(case: Case, ex: Exhibit) -> Path:
    """The stored copy's path, after re-checking its SHA-256 against the intake record.

    Raises
    ------
    CheckFailed
        When the stored copy is missing or its bytes changed since intake.
    """
    rel = ex.file
    if layout.unsafe_name(rel):
        raise CheckFailed(f"{ex.exhibit_id}: intake record names an unsafe path {rel!r}",
                          path=case.root)
    p = case.root / rel
    if p.is_symlink() or not p.is_file():
        raise CheckFailed(f"{ex.exhibit_id}: stored copy missing", path=p)
    got = sha256_file(p)
    if got != ex.sha256:
        raise CheckFailed(f"{ex.exhibit_id}: stored copy altered since intake "
                          f"(SHA-256 {got[:16]}... is not {ex.sha256[:16]}...)", path=p)
    return p
