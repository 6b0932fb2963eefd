"""Images from crawlers' WARC files, for ``claimkit scan``: unpacked, examined, taken in.

``scan`` examines files; a WARC file holds many. :func:`unpack_images`
writes each image response's content to a private temporary folder (one
sub-folder per record, so the file keeps the name from its URL) and
remembers where each came from: the WARC file and its SHA-256, the record,
its target URL and ``WARC-Date``. A damaged or truncated WARC file is refused
before anything is examined.

:func:`take_in` makes a claimed image an exhibit: the WARC file is copied
into the case's ``captures/`` (once, checked against the hash taken when it
was first read), and the intake record's ``acquisition`` names the URL, the
record and the capture date, with its clock: the crawler's, which claimkit
cannot check.
"""

from __future__ import annotations

import os
import re
import shutil
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import unquote, urlsplit

from claimkit.capture.warc import image_responses
from claimkit.case.layout import CAPTURES
from claimkit.case.store import add_exhibit
from claimkit.errors import CheckFailed
from claimkit.evidence.storage import fsync_dir, sha256_file
from claimkit.workflow import MIN_EXAMINE_SIDE

__all__ = ["WarcOrigin", "take_in", "unpack_images"]

_SAFE = re.compile(r"[^A-Za-z0-9._-]+")
CRAWLER_CLOCK = ("WARC-Date written by the tool that made the WARC file (its clock, "
                 "not checked by claimkit)")


@dataclass
class WarcOrigin:
    warc: Path
    warc_sha256: str
    record_id: str
    url: str
    date: str
    ip: str | None
    facts: dict

    def label(self) -> str:
        return f"{self.url} (captured {self.date}, in {self.warc.name})"


def _name(url: str) -> str:
    name = unquote(Path(urlsplit(url).path).name)
    return _SAFE.sub("_", name)[-60:].strip("._") or "image"


def _too_small(data: bytes) -> bool:
    """Icons and spacers below the examination's minimum side (read from the header only)."""
    import io

    from PIL import Image, UnidentifiedImageError


    try:
        with Image.open(io.BytesIO(data)) as im:
            return min(im.size) < MIN_EXAMINE_SIDE
    except (UnidentifiedImageError, OSError, ValueError):
        return False          # unreadable: examined, and reported as such


def unpack_images(warcs: list[Path], folder: Path,
                  small: list[str] | None = None) -> dict[Path, WarcOrigin]:
    """Write every image response of ``warcs`` under ``folder``; returns file -> origin.

    ``small`` (optional) receives the URLs of images too small to carry a
    mark (below the examination's minimum side), which are not unpacked.

    Raises
    ------
    InputError
        For a WARC file that cannot be read or is damaged (naming it).
    """

    out: dict[Path, WarcOrigin] = {}
    n = 0
    for w in warcs:
        digest = sha256_file(w)
        for img in image_responses(w):
            if _too_small(img.payload):
                if small is not None:
                    small.append(img.target_uri)
                continue
            n += 1
            sub = folder / f"{n:06d}"
            sub.mkdir(parents=True)
            p = sub / _name(img.target_uri)
            p.write_bytes(img.payload)
            out[p] = WarcOrigin(Path(w), digest, img.record_id, img.target_uri, img.date,
                                img.ip, img.facts)
    return out


def _warc_in_case(case, origin: WarcOrigin, profile) -> str:
    """The WARC file's path inside the case, copying it there the first time."""

    dest_dir = case.root / CAPTURES
    dest_dir.mkdir(exist_ok=True)
    for p in dest_dir.glob("warc-*"):
        if p.name.startswith(f"warc-{origin.warc_sha256[:16]}-"):
            return f"{CAPTURES}/{p.name}"
    name = f"warc-{origin.warc_sha256[:16]}-{_SAFE.sub('_', origin.warc.name)[-80:]}"
    tmp = dest_dir / f".{name}.part"
    shutil.copyfile(origin.warc, tmp)
    got = sha256_file(tmp)
    if got != origin.warc_sha256:
        tmp.unlink(missing_ok=True)
        raise CheckFailed("the WARC file changed while it was scanned; scan it again",
                          path=origin.warc)
    os.chmod(tmp, 0o444)
    os.replace(tmp, dest_dir / name)
    fsync_dir(dest_dir)
    if profile is not None:
        profile.log_action("web archive taken in", items={"warc": got},
                           details={"case_id": case.case_id, "file": f"{CAPTURES}/{name}",
                                    "original_name": origin.warc.name})
    return f"{CAPTURES}/{name}"


def take_in(case, path: Path, origin: WarcOrigin, profile, *, note: str):
    """Make the unpacked image ``path`` an exhibit whose acquisition is its WARC record."""

    rel = _warc_in_case(case, origin, profile)
    acq = {"method": "image response in a WARC file", "url": origin.url,
           "final_url": origin.url, "page": None, "warc": rel,
           "warc_sha256": origin.warc_sha256, "warc_record_id": origin.record_id,
           "warc_original_name": origin.warc.name, "captured": origin.date,
           "time_source": CRAWLER_CLOCK, **origin.facts, "tls": None,
           "timestamp": None}
    return add_exhibit(case, path, source=f"{origin.url} (from the web archive "
                                          f"{origin.warc.name})",
                       note=note, profile=profile, acquisition=acq)
