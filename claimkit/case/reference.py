"""The reduced-resolution reference of a registered work: what exhibits are compared with.

The content line, the alignment and the dossier's figures compare an exhibit
with the registered picture. They do not need its full resolution (the content
line registers at 640 px, the alignment measures at 1024 px on the long side),
and the hand-over should not carry more of the owner's files than the dispute
needs. So the examination makes, once per work, a reduced copy:

* from the registered **marked** file (the one published) when it is at hand,
  with a long side of :data:`LONG_SIDE` pixels (never enlarged);
* else, only when the owner asks for it (``case examine --reference-from-master``),
  from the unmarked **master**, with a long side of at most :data:`LONG_SIDE` and
  at most :data:`MASTER_SHARE` of the master's own, so that a small master is never
  handed over at (or near) its full resolution. Not by default: the published
  marked file less a reduced master is the mark at that resolution (on the demo's
  photo at half size, an estimate correlated 0.85 with the true mark; subtracting
  it took the examination's score from z = 27.3 to 12.2);

resampled by Pillow's Lanczos filter, rounded to 8 bits, and written as PNG
without any metadata (no EXIF, ICC, XMP or text chunk of the source: they can
hold camera serials and paths). It is kept as ``references/reduced-SHA256.png``
and described in the finding (:func:`make_reduced`): its SHA-256, its size, the
scale to the registered picture, and which registered file it was made from,
by the SHA-256 that the signed and timestamped work record holds. ``verify``
ties it to the record (:func:`tie_problems`) and, where the file it was made
from is in the bundle, makes it again and compares.

The unmarked master goes into a bundle only with ``report --include-original``.
"""

from __future__ import annotations

import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image

from claimkit.case import layout
from claimkit.evidence.storage import atomic_write, sha256_hex
from claimkit.imageio import read_picture, to_luma
from claimkit.mark.fingerprint import MATCH_DISTANCE, fingerprint_distance, perceptual_fingerprint

__all__ = [
    "LONG_SIDE",
    "MASTER_SHARE",
    "METHOD",
    "REDUCED",
    "Reduced",
    "describe",
    "make_reduced",
    "reduce_pixels",
    "reduced_size",
    "registered_file",
    "scale_of",
    "tie_problems",
]

#: Long side of the reduced reference, pixels: the alignment's working resolution
#: (:data:`claimkit.case.align.WORK_SIDE`), above the content line's (640 px).
LONG_SIDE = 1024
#: A reference made from the master keeps at most this share of its long side.
MASTER_SHARE = 0.5
#: The finding's ``reference.kind`` of a reduced reference.
REDUCED = "reduced"
METHOD = ("Pillow Lanczos resampling (Image.resize, Resampling.LANCZOS) of the 8-bit picture; "
          "PNG without metadata")

_WORDS = {"marked": "registered marked file (as published)",
          "original": "registered original file"}


@dataclass(frozen=True)
class Reduced:
    """A reduced picture and how it relates to the registered one."""

    pixels: np.ndarray             # uint8, (h, w) or (h, w, 3)
    scale: float                   # reference pixels per registered-picture pixel
    registered_size: tuple[int, int]   # (width, height) of the file it was made from

    def png(self) -> bytes:
        """The PNG bytes (Pillow's encoder, no metadata: same bytes for the same pixels)."""
        buf = io.BytesIO()
        Image.fromarray(self.pixels).save(buf, format="PNG")
        return buf.getvalue()


def reduced_size(width: int, height: int, made_from: str) -> tuple[tuple[int, int], float]:
    """((w, h), scale) of the reduced reference of a ``width`` x ``height`` picture."""
    long = max(int(width), int(height))
    target = LONG_SIDE if made_from == "marked" else min(LONG_SIDE, int(long * MASTER_SHARE))
    target = max(1, min(target, long))
    s = target / long
    return (max(1, round(width * s)), max(1, round(height * s))), s


def reduce_pixels(pixels: np.ndarray, made_from: str) -> Reduced:
    """The reduced reference of a registered picture's pixels (uint8 or uint16)."""
    a = np.asarray(pixels)
    if a.dtype == np.uint16:
        # 16 -> 8 bits by rounding (65535 maps to 255), as a viewer would show it.
        a = ((a.astype(np.uint32) * 255 + 32767) // 65535).astype(np.uint8)
    h, w = a.shape[:2]
    size, s = reduced_size(w, h, made_from)
    im = Image.fromarray(a)
    if size != im.size:
        im = im.resize(size, Image.Resampling.LANCZOS)
    return Reduced(np.asarray(im), s, (int(w), int(h)))


def make_reduced(root: Path, work_id: str, source: Path, made_from: str) -> tuple[dict, np.ndarray]:
    """Write the reduced reference of ``source`` into the case; its description and luma.

    ``source`` is the registered marked file or the master, inside the case's
    ``references/`` (where :func:`claimkit.case.examine.find_reference` keeps them).
    """
    pic = read_picture(source)
    red = reduce_pixels(pic.pixels, made_from)
    data = red.png()
    digest = sha256_hex(data)
    rel = f"{layout.REFERENCES}/{REDUCED}-{digest}.png"
    if not (root / rel).is_file():
        atomic_write(root / rel, data, mode=0o444)
    h, w = red.pixels.shape[:2]
    doc = {"file": rel, "kind": REDUCED, "sha256": digest, "work_id": work_id,
           "size": [int(w), int(h)], "registered_size": list(red.registered_size),
           "scale": round(red.scale, 9), "long_side_px": LONG_SIDE, "method": METHOD,
           "made_from": {"kind": made_from, "sha256": pic.sha256,
                         "file": source.relative_to(root).as_posix()}}
    return doc, to_luma(red.pixels)


def scale_of(ref: dict | None) -> float:
    """Reference pixels per registered-picture pixel (1 for a full-resolution reference)."""
    return float((ref or {}).get("scale") or 1.0)


def registered_file(ref: dict | None) -> str | None:
    """The registered file itself (relative path) behind a finding's reference."""
    if not ref:
        return None
    if ref.get("kind") == REDUCED:
        return (ref.get("made_from") or {}).get("file")
    return ref.get("file")


def describe(ref: dict | None) -> str:
    """The reference in words, as the content line and the dossier name it."""
    if not ref:
        return "reference"
    if ref.get("kind") == REDUCED:
        src = (ref.get("made_from") or {}).get("kind", "")
        w, h = ref.get("size") or ("?", "?")
        return (f"reduced-resolution reference ({w} x {h} px) of the "
                f"{_WORDS.get(src, 'registered file')}")
    return _WORDS.get(ref.get("kind", ""), "reference")


def tie_problems(root: Path, ref: dict, record: dict | None, *, tolerance_levels: int = 2,
                 tolerance_mean: float = 0.5) -> list[str]:
    """What ties a reduced reference to the signed work record, and what fails to.

    Checks, each independent of what the owner says about the reference:

    1. the file is the one the finding names (SHA-256);
    2. it was made from a file of the work: its ``made_from`` SHA-256 is the
       record's marked or original file (the record's signature and timestamps
       are checked apart);
    3. its size is what :func:`reduced_size` gives for the registered size;
    4. it shows the registered picture: its perceptual fingerprint is within
       :data:`~claimkit.mark.fingerprint.MATCH_DISTANCE` of the record's
       (computed from the master when the work was registered);
    5. when the file it was made from is in the bundle, it is made again and
       compared: no pixel more than ``tolerance_levels`` apart and a mean
       absolute difference of at most ``tolerance_mean`` (another Pillow may
       round a resampled value to the next level; the same Pillow gives the
       same pixels).

    Returns the problems (empty when every check that could run held).
    """
    probs = []
    p = root / ref.get("file", "")
    if not p.is_file():
        return [f"{ref.get('file')}: missing from the bundle"]
    data = p.read_bytes()
    if sha256_hex(data) != ref.get("sha256"):
        return [f"{ref.get('file')}: SHA-256 differs from the one the finding names (altered)"]
    src = ref.get("made_from") or {}
    if record is None:
        probs.append(f"no signed work record of {ref.get('work_id')} in the bundle to tie it to")
    else:
        want = (record.get(src.get("kind", "")) or {}).get("sha256")
        if src.get("kind") not in ("marked", "original") or want != src.get("sha256"):
            probs.append(f"made from a file that is not the work record's {src.get('kind')} file")
    pic = read_picture(p)
    px = pic.pixels
    reg = ref.get("registered_size") or [0, 0]
    size, s = reduced_size(int(reg[0]), int(reg[1]), src.get("kind", ""))
    if [px.shape[1], px.shape[0]] != list(size) or list(size) != ref.get("size") \
            or abs(s - scale_of(ref)) > 1e-8:
        probs.append(f"its size {px.shape[1]} x {px.shape[0]} (scale {scale_of(ref):.6g}) is not "
                     f"the reduction of a {reg[0]} x {reg[1]} picture")
    if record is not None and record.get("fingerprint"):
        d = fingerprint_distance(perceptual_fingerprint(to_luma(px)), record["fingerprint"])
        if d > MATCH_DISTANCE:
            probs.append(f"it does not show the registered picture (fingerprint {d} bits from the "
                         f"record's, limit {MATCH_DISTANCE})")
    made = root / src.get("file", "") if src.get("file") else None
    if made is not None and made.is_file() and not probs:
        again = reduce_pixels(read_picture(made).pixels, src.get("kind", "")).pixels
        diff = np.abs(again.astype(np.int16) - np.asarray(px).astype(np.int16)) \
            if again.shape == px.shape else None
        if diff is None or diff.max() > tolerance_levels or diff.mean() > tolerance_mean:
            probs.append(f"made again from {src['file']} it differs (beyond "
                         f"{tolerance_levels} levels per pixel, {tolerance_mean} on average)")
    return probs
