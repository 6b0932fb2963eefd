"""Reading and writing photos: bit depth, colour, metadata, orientation, limits.

Everything that touches an image file goes through this module, so that the
numeric core (:mod:`claimkit.mark`) only ever sees arrays and the rest of the
tool gets one consistent answer to "what is in this file". Pillow does the
decoding and encoding; ``tifffile`` (a dependency of scikit-image) is used
only for 16-bit colour TIFF, which Pillow cannot hold in memory.

What is supported
-----------------
* Read: anything Pillow opens. 8-bit grey and colour; 16-bit grey PNG/TIFF;
  16-bit colour TIFF at full precision (through ``tifffile``) and 16-bit
  colour PNG at full precision (through ``imagecodecs``, the codec library
  of tifffile's author, because Pillow holds 16-bit colour only at 8 bits).
  CMYK is converted to RGB through the embedded ICC profile with Pillow's
  LittleCMS binding (``ImageCms``, perceptual intent, to sRGB, whose profile
  the output then carries); CMYK without a profile is converted by Pillow's
  plain formula and a note says so. YCbCr, palette and 1-bit images are
  converted to RGB or grey; an alpha channel is kept apart; of an animated
  or multi-page file the first frame is used and a note says so.
* Write, by the extension of the output path: JPEG, PNG, TIFF, WebP. 16-bit
  pixels go to PNG and TIFF at 16 bits; JPEG and WebP cannot hold 16 bits,
  so they get the pixels rounded to 8 bits.
* EXIF, ICC profile, XMP and the resolution are carried over where the
  output format holds them; :mod:`claimkit.filemeta` then copies the rest
  with exiftool (``write_picture(finish=...)``). The EXIF Orientation tag is
  applied to the pixels on reading and set to 1 in the carried EXIF, so a
  reader never rotates twice.
* Every picture read carries the SHA-256 of the very bytes decoded, so a
  file is hashed without being read a second time.
"""

from __future__ import annotations

import hashlib
import io
import os
import sys
import tempfile
import threading
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TypeVar

import numpy as np
from PIL import Image, UnidentifiedImageError
from PIL.PngImagePlugin import PngInfo

from claimkit.errors import AlreadyExists, InputError
from claimkit.evidence.storage import atomic_write
from claimkit.mark import quality

__all__ = [
    "CURRENT_EXAMINATION_METHOD",
    "DEFAULT_MAX_PIXELS",
    "EXAMINATION_METHODS",
    "LUMA_FROM_JPEG_Y",
    "LUMA_FROM_RGB",
    "MIN_SIDE",
    "Picture",
    "add_luma_delta",
    "add_luma_delta_sse",
    "canvas_like",
    "read_picture",
    "resolve_max_pixels",
    "to_luma",
    "write_picture",
    "write_picture_keeping_bytes",
]

#: Default limit on width × height, a guard against decompression bombs
#: (a small file that decodes to a huge image). 200 megapixels is well above
#: any camera sold today; common practice, no source.
DEFAULT_MAX_PIXELS = 200_000_000
#: Environment variable that overrides :data:`DEFAULT_MAX_PIXELS`.
MAX_PIXELS_ENV = "CLAIMKIT_MAX_PIXELS"
#: Smallest side the engine accepts; enforced by the engine, not here.
MIN_SIDE = 64

# EXIF tag numbers (EXIF 2.32, CIPA DC-008).
_ORIENTATION = 0x0112
_EXIF_IFD = 0x8769
_GPS_IFD = 0x8825
_MAKE = 0x010F
_MODEL = 0x0110
_DATETIME_ORIGINAL = 0x9003
_BODY_SERIAL = 0xA431
# Descriptive IFD0 tags kept when the source is a TIFF, whose IFD0 also holds
# the image-structure tags (strip offsets, sizes, compression) that would be
# stale in any other file.
_DESCRIPTIVE_IFD0 = {
    0x010E,  # ImageDescription
    _MAKE,
    _MODEL,
    _ORIENTATION,
    0x011A,  # XResolution
    0x011B,  # YResolution
    0x0128,  # ResolutionUnit
    0x0131,  # Software
    0x0132,  # DateTime
    0x013B,  # Artist
    0x8298,  # Copyright
    _EXIF_IFD,
    _GPS_IFD,
}
# TIFF tags for what tifffile writes itself (TIFF 6.0; XMP: Adobe XMP part 3;
# ICC: ICC.1 annex B).
_TIFF_XMP = 700
_TIFF_ICC = 34675
# (Software, 0x0131, is tifffile's own tag; exiftool copies the original's.)
_TIFF_ASCII_TAGS = (0x010E, _MAKE, _MODEL, 0x0132, 0x013B, 0x8298)

_FORMAT_BY_SUFFIX = {
    ".jpg": "JPEG",
    ".jpeg": "JPEG",
    ".png": "PNG",
    ".tif": "TIFF",
    ".tiff": "TIFF",
    ".webp": "WEBP",
}

# File signatures, used only to tell "damaged image" from "not an image".
_MAGIC = (b"\xff\xd8\xff", b"\x89PNG\r\n\x1a\n", b"II*\x00", b"MM\x00*", b"GIF8", b"RIFF")

# Examination methods: how a file's pixels become the luma the detector reads. Each finding
# records its method and ``verify`` re-runs it by that method; a finding that records none
# was made by the first. A new way of reading is a new name, never a change to an old one.
LUMA_FROM_RGB = "rgb-luma-1"
"""Decode to RGB (or grey), then BT.601 luma in float32 (:func:`to_luma`)."""
LUMA_FROM_JPEG_Y = "jpeg-y-1"
"""A colour JPEG is decoded straight to its luma plane (libjpeg's Y of YCbCr, read without
the chroma planes); every other file as :data:`LUMA_FROM_RGB`."""
EXAMINATION_METHODS = (LUMA_FROM_RGB, LUMA_FROM_JPEG_Y)
CURRENT_EXAMINATION_METHOD = LUMA_FROM_JPEG_Y


# Pillow's own bomb check reads a process-wide setting during Image.open; we
# apply our own (configurable) limit instead, so the setting is lifted for
# the duration of the open, under a lock so that threads do not race on it.
_PIL_LIMIT_LOCK = threading.Lock()

T = TypeVar("T")


@dataclass
class Picture:
    """A decoded photo, upright, with the metadata to carry over.

    Attributes
    ----------
    path : Path
        The file it was read from.
    pixels : ndarray
        ``(H, W)`` grey or ``(H, W, 3)`` RGB, ``uint8`` or ``uint16``, with the
        EXIF orientation already applied.
    bit_depth : int
        8 or 16, matching ``pixels.dtype``.
    format : str
        Pillow's format name of the source, e.g. ``"JPEG"``.
    exif : bytes or None
        Raw EXIF (``Exif\\0\\0`` header included) with Orientation set to 1.
    icc_profile, xmp : bytes or None
        The embedded ICC profile and XMP packet, unchanged.
    alpha : ndarray or None
        ``(H, W)`` alpha of the same dtype as ``pixels``, upright.
    capture : dict
        ``DateTimeOriginal``, ``Make``, ``Model``, ``BodySerialNumber`` from
        EXIF where present, as strings.
    notes : list of str
        What was done to make the file usable (first frame taken, CMYK
        converted, precision reduced); empty for an ordinary photo.
    sha256 : str
        SHA-256 (hex) of the file's bytes as read, the very bytes decoded
        (so a caller that needs the file's hash need not read it again).
    region : tuple of int or None
        ``(row, col, height, width)`` of the part of the upright picture that
        ``pixels`` and ``alpha`` hold, when only a part was asked for
        (``read_picture(region=...)``); None when they hold the whole picture.
        ``height`` and ``width`` are always the whole picture's.
    overview, overview_step : ndarray or None, int
        With a region: the whole upright picture reduced by Pillow's box
        filter (``Image.reduce``), ``overview_step`` pixels to one, when asked
        for (``read_picture(overview=...)``); the examination of a large copy
        looks for the mark's coarse component there.
    whole : ndarray or None
        With a region and ``read_picture(keep_whole=True)``: the whole upright
        picture as decoded, the pixels ``read_picture`` without a region gives
        (None where the decoder's own memory was not used: read it again).
    dpi : tuple of float or None
        Resolution in pixels per inch as Pillow reads it (JFIF, PNG pHYs,
        TIFF or EXIF), None where the file states none.
    examination_method : str or None
        The examination method the pixels were read for
        (:data:`EXAMINATION_METHODS`); None for a picture read whole, as is.
    """

    path: Path
    pixels: np.ndarray
    bit_depth: int
    format: str
    exif: bytes | None = None
    icc_profile: bytes | None = None
    xmp: bytes | None = None
    alpha: np.ndarray | None = None
    capture: dict = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    sha256: str = ""
    region: tuple[int, int, int, int] | None = None
    dpi: tuple[float, float] | None = None
    full_size: tuple[int, int] | None = field(default=None, repr=False)   # (height, width) with a region
    examination_method: str | None = None
    overview: np.ndarray | None = field(default=None, repr=False)   # whole picture, box-reduced
    overview_step: int = 1
    whole: np.ndarray | None = field(default=None, repr=False)   # with a region, when kept

    @property
    def height(self) -> int:
        return int(self.full_size[0] if self.full_size else self.pixels.shape[0])

    @property
    def width(self) -> int:
        return int(self.full_size[1] if self.full_size else self.pixels.shape[1])


def resolve_max_pixels(max_pixels: int | None = None) -> int:
    """Pixel limit: the argument, else ``$CLAIMKIT_MAX_PIXELS``, else the default."""
    if max_pixels is None:
        raw = os.environ.get(MAX_PIXELS_ENV, "").strip()
        if not raw:
            return DEFAULT_MAX_PIXELS
        try:
            max_pixels = int(raw.replace("_", ""))
        except ValueError:
            raise InputError(
                f"{MAX_PIXELS_ENV}={raw!r} is not a whole number of pixels"
            ) from None
    if max_pixels <= 0:
        raise InputError(f"the pixel limit must be positive, not {max_pixels}")
    return int(max_pixels)


# ---------------------------------------------------------------- reading


def read_picture(path: str | os.PathLike, *, max_pixels: int | None = None,
                 region: Callable[[tuple[int, int]], tuple[int, int, int, int]] | None = None,
                 overview: Callable[[tuple[int, int]], int] | None = None,
                 method: str | None = None, data: bytes | None = None,
                 keep_whole: bool = False) -> Picture:
    """Decode a photo into an upright array plus the metadata to carry over.

    Parameters
    ----------
    path : str or path-like
        The file to read. It is opened read-only and never modified.
    max_pixels : int, optional
        Refuse images with more than this many pixels (width × height),
        checked from the header before any pixel is decoded. Default:
        ``$CLAIMKIT_MAX_PIXELS`` or :data:`DEFAULT_MAX_PIXELS`.
    region : callable, optional
        Given the upright picture's ``(height, width)``, the ``(row, col,
        height, width)`` of the only part wanted (an examination of a large
        photo reads a central window). The whole file is still decoded, but
        only that part is copied out of the decoder into the array: at
        24 megapixels the copy of the whole picture costs about as much as
        half the decoding. ``Picture.region`` records the part.
    overview : callable, optional
        With ``region``: given the upright ``(height, width)``, a whole-number
        step; the whole picture, box-reduced by that step from the same
        decoded image, goes to ``Picture.overview`` (grey, like ``pixels``,
        when ``method`` decodes luma only).
    method : str, optional
        Read the pixels an examination method reads (:data:`EXAMINATION_METHODS`):
        with :data:`LUMA_FROM_JPEG_Y` a colour JPEG is decoded to its luma
        plane only (grey ``uint8``; EXIF orientation applied as always), which
        skips the chroma planes, their upsampling and the colour conversion.
        ``Picture.examination_method`` records it.
    data : bytes, optional
        The file's bytes when the caller holds them already (a file it has just
        written): they are decoded and hashed instead of reading ``path`` again.
    keep_whole : bool
        With ``region``: keep the whole decoded picture too (``Picture.whole``),
        for a caller that needs it after the examination (``examine``'s content
        line) without decoding the file a second time.

    Returns
    -------
    Picture

    Raises
    ------
    claimkit.errors.InputError
        Missing, unreadable, empty, truncated or non-image file; too many
        pixels; a pixel layout that cannot be represented (e.g. floating
        point). The message names the cause; ``.path`` names the file.
    """
    path = Path(path)
    if method is not None and method not in EXAMINATION_METHODS:
        raise InputError(f"unknown examination method {method!r}; this version knows "
                         f"{', '.join(EXAMINATION_METHODS)}", path=path)
    limit = resolve_max_pixels(max_pixels)
    if data is None:
        data = _read_bytes(path)
    digest = hashlib.sha256(data).hexdigest()
    try:
        with _PIL_LIMIT_LOCK, warnings.catch_warnings():
            warnings.simplefilter("ignore", Image.DecompressionBombWarning)
            saved = Image.MAX_IMAGE_PIXELS
            Image.MAX_IMAGE_PIXELS = None
            try:
                im = Image.open(io.BytesIO(data))
            finally:
                Image.MAX_IMAGE_PIXELS = saved
    except UnidentifiedImageError:
        if data.startswith(_MAGIC):
            raise InputError("damaged or truncated image data (header)", path=path) from None
        raise InputError("not an image Pillow can read", path=path) from None
    except (OSError, SyntaxError, ValueError, EOFError) as exc:
        raise InputError(f"damaged or truncated image data ({exc})", path=path) from None

    with im:
        width, height = im.size
        if width * height > limit:
            raise InputError(
                f"{width}×{height} = {width * height} pixels exceeds the limit of {limit}; "
                "raise it with --max-pixels",
                path=path,
            )
        notes: list[str] = []
        small, step = None, 1   # the overview, when asked for
        whole = None            # the whole decoded picture, when a region is read and it is kept
        frames = int(getattr(im, "n_frames", 1) or 1)
        if frames > 1:
            # Image.open leaves the first frame selected.
            notes.append(f"{frames} frames; the first frame was used")
        fmt = im.format or "unknown"
        if method == LUMA_FROM_JPEG_Y and fmt == "JPEG":
            # libjpeg then emits the Y plane of a YCbCr file (ITU-T T.871: the same BT.601
            # weights as to_luma, taken before chroma subsampling) and never decodes
            # chroma. Pillow changes only a colour ("RGB" raw mode) file; CMYK stays.
            im.draft("L", None)
        rawmode = _rawmode(im)  # the tile list is gone once the pixels are loaded
        # Pillow holds 16-bit colour only at 8 bits; tifffile reads it whole.
        full = None
        if fmt == "TIFF" and _is_16bit_multichannel_tiff(im):
            full = _read_tiff16(data)
        elif fmt == "PNG" and im.mode in ("RGB", "RGBA") and ";16" in rawmode:
            full = _read_png16(data)
        icc_ok: bool | str = True
        converted_icc = None
        if full is not None:
            (pixels, alpha), bit_depth = full, 16
        else:
            try:
                with warnings.catch_warnings():
                    # "XMP data cannot be read without defusedxml": XMP is kept raw.
                    warnings.simplefilter("ignore", UserWarning)
                    own = _own_memory(im, fmt)
                    im.load()
                    part, box = im, None
                    if region is not None:
                        oriented = int(im.getexif().get(_ORIENTATION, 1) or 1)
                        upright_size = (width, height) if oriented in (5, 6, 7, 8) else (height, width)
                        box = region(upright_size)
                        stored = _stored_box(oriented, (height, width), box)
                        if own is not None:
                            whole = own if keep_whole else None
                            own = own[stored[1]:stored[3], stored[0]:stored[2]]
                        else:
                            part = im.crop(stored)
                        if overview is not None:
                            small, step = _overview(im, overview(upright_size), rawmode, path)
                    if own is not None:
                        pixels, alpha, bit_depth = own, None, 8
                    else:
                        pixels, alpha, bit_depth, icc_ok = _pixels_from_pillow(
                            part, rawmode, notes, path
                        )
                    if icc_ok == "converted":
                        icc_ok, converted_icc = True, _srgb_profile()
            except InputError:
                raise
            except (OSError, SyntaxError, ValueError, EOFError) as exc:
                raise InputError(
                    f"damaged or truncated image data ({exc})", path=path
                ) from None

        exif_obj = im.getexif()
        orientation = int(exif_obj.get(_ORIENTATION, 1) or 1)
        exif_bytes, capture = _exif_for_copy(exif_obj, source_is_tiff=(fmt == "TIFF"))
        icc = im.info.get("icc_profile") if icc_ok else None
        if full is None and converted_icc is not None:
            icc = converted_icc
        dpi = _dpi_of(im)
        if not icc_ok and im.info.get("icc_profile"):
            notes.append("the embedded ICC profile was for another colour space and was dropped")
        xmp = im.info.get("xmp")
        if xmp is None and fmt == "TIFF":
            xmp = im.tag_v2.get(_TIFF_XMP) if hasattr(im, "tag_v2") else None
        if isinstance(xmp, str):
            xmp = xmp.encode("utf-8")

    pixels = _upright(pixels, orientation)
    if small is not None:
        small = np.ascontiguousarray(_upright(small, orientation))
    if alpha is not None:
        alpha = _upright(alpha, orientation)
    if whole is not None:
        whole = _compact(_upright(whole, orientation))
    if orientation in _TRANSPOSES:
        notes.append(f"EXIF orientation {orientation} applied to the pixels")
    full_size = None
    if region is not None:
        full_size = (width, height) if orientation in (5, 6, 7, 8) else (height, width)
        if full is not None:          # read whole by tifffile: cut the part out now
            box = region(full_size)
            r0, c0, rh, rw = box
            pixels = pixels[r0:r0 + rh, c0:c0 + rw]
            alpha = None if alpha is None else alpha[r0:r0 + rh, c0:c0 + rw]
    return Picture(
        path=path,
        pixels=_compact(pixels),
        bit_depth=bit_depth,
        format=fmt,
        exif=exif_bytes,
        icc_profile=icc or None,
        xmp=bytes(xmp) if xmp else None,
        alpha=None if alpha is None else np.ascontiguousarray(alpha),
        capture=capture,
        notes=notes,
        sha256=digest,
        region=None if region is None else tuple(int(v) for v in box),
        dpi=dpi,
        full_size=full_size,
        examination_method=method,
        overview=small,
        overview_step=step,
        whole=whole,
    )


def _own_memory(im: Image.Image, fmt: str) -> np.ndarray | None:
    """Make Pillow decode a JPEG into NumPy memory; that memory, else None (Pillow's own then).

    Pillow keeps 8-bit colour as 4 bytes a pixel (RGBX, the fourth byte 255)
    and grey as 1. Mapping an ``(H, W, 4)`` (or ``(H, W)``) NumPy array as
    the image's memory before ``load()`` lets the decoder write the pixels
    there: no copy out of Pillow afterwards (about a third of the decode for
    colour), and NumPy's large allocations come as huge pages where the
    kernel offers them, where Pillow's own touch every 4 KiB page (measured
    at 24 megapixels: 65 ms against 128 ms for the decode, 43 ms more for the
    copy; ``benchmarks/bench_engine.py``). The pixels are the decoder's, the
    same bytes ``np.asarray(im)`` gives (``tests/test_marking_buffers.py``).
    ``Image.core.map_buffer`` is what ``Image.frombuffer`` maps memory with;
    if a Pillow lacks it or refuses, the image is loaded the usual way.
    """
    if fmt not in ("JPEG", "MPO") or im.mode not in ("RGB", "L") or len(im.tile) != 1:
        return None
    w, h = im.size
    # Zeroed, as Pillow's own new image memory is: a decode that stops early without an
    # error (ImageFile.LOAD_TRUNCATED_IMAGES set by a program using claimkit) leaves the
    # same zeros, never leftover memory. Fresh pages come zeroed anyway, so it costs nothing.
    buf = np.zeros((h, w, 4) if im.mode == "RGB" else (h, w), dtype=np.uint8)
    try:
        im.im = Image.core.map_buffer(buf, im.size, "raw", 0, (im.mode, 0, 1))
    except (AttributeError, TypeError, ValueError):
        return None
    return buf[..., :3] if im.mode == "RGB" else buf


def _compact(pixels: np.ndarray) -> np.ndarray:
    """``pixels`` in one block: RGB views of an RGBX array stay on 4 bytes a pixel.

    A turned or cut-out part of such an array is copied with its fourth byte,
    so what :func:`padded_rows` and the encoder (:func:`_rgbx_image`) rely on
    holds for every colour picture read from a JPEG.
    """
    wide = padded_rows(pixels)
    if wide is not None:
        return pixels
    base = pixels.base
    if (isinstance(base, np.ndarray) and pixels.dtype == np.uint8 and pixels.ndim == 3
            and pixels.shape[2] == 3 and base.ndim == 3 and base.shape[2] == 4
            and pixels.strides[2] == 1
            and all(abs(st) in (4, base.strides[0]) for st in pixels.strides[:2])
            and (pixels.__array_interface__["data"][0] - base.__array_interface__["data"][0]) % 4 == 0):
        # a turned or cut part of an RGBX array: the same turn of its four bytes a pixel
        full = np.lib.stride_tricks.as_strided(
            pixels, shape=pixels.shape[:2] + (4,), strides=pixels.strides, writeable=False)
        return np.ascontiguousarray(full)[..., :3]
    return np.ascontiguousarray(pixels)


def padded_rows(pixels: np.ndarray) -> np.ndarray | None:
    """The ``(n, W, 4)`` rows behind an ``(n, W, 3)`` 8-bit view of an RGBX array, else None.

    For rows of a :func:`canvas_like` array or of a colour JPEG as
    :func:`read_picture` decodes it, whose fourth byte the caller knows:
    operations on whole contiguous rows run about twice as fast as on the
    strided three-byte view.
    """
    base = pixels.base
    if not (isinstance(base, np.ndarray) and pixels.dtype == np.uint8 and pixels.ndim == 3
            and pixels.shape[2] == 3 and base.dtype == np.uint8 and base.ndim == 3
            and base.shape[1:] == (pixels.shape[1], 4) and base.flags.c_contiguous
            and pixels.strides == base.strides):
        return None
    offset = pixels.__array_interface__["data"][0] - base.__array_interface__["data"][0]
    r0, rest = divmod(offset, base.strides[0])
    if rest or r0 < 0 or r0 + pixels.shape[0] > base.shape[0]:
        return None
    return base[r0:r0 + pixels.shape[0]]


def _overview(im: Image.Image, step: int, rawmode: str, path: Path) -> tuple[np.ndarray | None, int]:
    """The whole picture box-reduced by ``step`` (Pillow's ``reduce``), as stored (not yet upright)."""
    step = max(1, int(step))
    try:
        small = im.reduce(step) if step > 1 else im
    except (ValueError, NotImplementedError):  # a mode reduce does not handle
        return None, 1
    return _pixels_from_pillow(small, rawmode, [], path)[0], step


def _stored_box(orientation: int, stored: tuple[int, int],
                part: tuple[int, int, int, int]) -> tuple[int, int, int, int]:
    """Pillow crop box (left, upper, right, lower) in the stored picture of an upright part.

    ``part`` is (row, col, height, width) in the upright picture, ``stored``
    the stored (height, width); the box is where :data:`_TRANSPOSES` takes
    that part from (EXIF 2.32 tag 0x0112, as for the whole picture).
    """
    r0, c0, h, w = part
    hs, ws = stored
    rows, cols = {
        1: ((r0, r0 + h), (c0, c0 + w)),
        2: ((r0, r0 + h), (ws - c0 - w, ws - c0)),
        3: ((hs - r0 - h, hs - r0), (ws - c0 - w, ws - c0)),
        4: ((hs - r0 - h, hs - r0), (c0, c0 + w)),
        5: ((c0, c0 + w), (r0, r0 + h)),
        6: ((hs - c0 - w, hs - c0), (r0, r0 + h)),
        7: ((hs - c0 - w, hs - c0), (ws - r0 - h, ws - r0)),
        8: ((c0, c0 + w), (ws - r0 - h, ws - r0)),
    }.get(orientation, ((r0, r0 + h), (c0, c0 + w)))
    return cols[0], rows[0], cols[1], rows[1]


def _read_bytes(path: Path) -> bytes:
    """Read the whole file once, mapping OS errors to one-line causes."""
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise InputError("no such file", path=path) from None
    except IsADirectoryError:
        raise InputError("is a folder, not an image file", path=path) from None
    except PermissionError:
        raise InputError("cannot read the file: permission denied", path=path) from None
    except OSError as exc:
        raise InputError(f"cannot read the file: {exc.strerror or exc}", path=path) from None
    if not data:
        raise InputError("empty file (0 bytes); truncated image data", path=path)
    return data


def _pixels_from_pillow(
    im: Image.Image, rawmode: str, notes: list[str], path: Path
) -> tuple[np.ndarray, np.ndarray | None, int, bool | str]:
    """Pixels, alpha, bit depth, and whether the embedded ICC still applies.

    ``"converted"`` in place of the last: the pixels were converted to sRGB
    through the embedded profile, whose place an sRGB profile takes.
    """
    mode = im.mode
    if rawmode and ";16" in rawmode and not mode.startswith("I;16"):
        notes.append(f"{rawmode} data read at 8 bits per channel (Pillow's limit)")
    if mode in ("I;16", "I;16L", "I;16B", "I;16N"):
        return np.asarray(im).astype(np.uint16, copy=False), None, 16, True
    if mode == "I":
        arr = np.asarray(im)
        if arr.size and (arr.min() < 0 or arr.max() > 65535):
            raise InputError("32-bit integer pixels are not supported", path=path)
        return arr.astype(np.uint16), None, 16, True
    if mode == "F":
        raise InputError("floating-point pixels are not supported", path=path)
    if mode == "1":
        return np.asarray(im.convert("L")), None, 8, True
    if mode == "L":
        return np.asarray(im), None, 8, True
    if mode == "LA":
        arr = np.asarray(im)
        return arr[..., 0], arr[..., 1], 8, True
    if mode == "RGB":
        return _rgb_array(im), None, 8, True
    if mode in ("RGBA", "RGBa"):
        arr = np.asarray(im.convert("RGBA") if mode == "RGBa" else im)
        return arr[..., :3], arr[..., 3], 8, True
    if mode in ("P", "PA"):
        has_alpha = mode == "PA" or "transparency" in im.info
        arr = np.asarray(im.convert("RGBA" if has_alpha else "RGB"))
        if has_alpha:
            return arr[..., :3], arr[..., 3], 8, True
        return arr, None, 8, True
    if mode == "CMYK":
        icc = im.info.get("icc_profile")
        if icc:
            from PIL import ImageCms

            try:
                src = ImageCms.ImageCmsProfile(io.BytesIO(icc))
                rgb = ImageCms.profileToProfile(
                    im, src, ImageCms.createProfile("sRGB"),
                    renderingIntent=ImageCms.Intent.PERCEPTUAL, outputMode="RGB")
            except (ImageCms.PyCMSError, OSError, ValueError) as exc:
                raise InputError(f"CMYK picture whose embedded ICC profile cannot be used ({exc}); "
                                 "convert it to RGB first", path=path) from None
            notes.append("CMYK converted to sRGB through the embedded ICC profile "
                         "(LittleCMS, perceptual intent); the output carries an sRGB profile")
            return np.asarray(rgb), None, 8, "converted"
        notes.append("CMYK without an embedded ICC profile: converted to RGB by Pillow's "
                     "plain formula, without colour management")
        return np.asarray(im.convert("RGB")), None, 8, False
    if mode == "YCbCr":
        return np.asarray(im.convert("RGB")), None, 8, True
    raise InputError(f"pixel mode {mode} is not supported", path=path)


def _srgb_profile() -> bytes:
    """The sRGB profile LittleCMS builds (the target of a CMYK conversion)."""
    from PIL import ImageCms

    return ImageCms.ImageCmsProfile(ImageCms.createProfile("sRGB")).tobytes()


def _dpi_of(im: Image.Image) -> tuple[float, float] | None:
    dpi = im.info.get("dpi")
    try:
        x, y = (float(v) for v in dpi)
    except (TypeError, ValueError):
        return None
    return (x, y) if x > 1 and y > 1 else None


def _read_png16(data: bytes) -> tuple[np.ndarray, np.ndarray | None] | None:
    """Full-precision 16-bit colour PNG through imagecodecs; None if it cannot."""
    try:
        import imagecodecs
    except ImportError:  # pragma: no cover - a dependency; Pillow's 8 bits then
        return None
    try:
        arr = imagecodecs.png_decode(data)
    except Exception:  # noqa: BLE001 - any codec gap falls back to Pillow's 8 bits
        return None
    if arr.dtype != np.uint16 or arr.ndim != 3 or arr.shape[-1] not in (3, 4):
        return None
    if arr.shape[-1] == 4:
        return arr[..., :3], arr[..., 3]
    return arr, None


def _rgb_array(im: Image.Image) -> np.ndarray:
    """``np.asarray(im)`` for an 8-bit RGB image, with one unpacking call.

    ``np.asarray`` goes through ``Image.tobytes``, which unpacks Pillow's
    4-byte pixels in 64 KiB pieces and then joins them (a second copy); for a
    24-megapixel photo that is about a thousand calls. Asking the same "raw"
    unpacker for the whole image at once gives the same bytes in one call
    and one copy, which also keeps a marking writer thread from queueing for
    the interpreter lock. ``Image._getencoder`` is the lookup ``tobytes``
    itself uses; if a future Pillow changes it, the plain route is taken.
    """
    w, h = im.size
    try:
        encoder = Image._getencoder("RGB", "raw", "RGB")
        encoder.setimage(im.im, (0, 0, w, h))
        try:
            # One spare byte: the unpacker reports completion only once the
            # whole image fitted in the buffer.
            _, status, data = encoder.encode(3 * w * h + 1)
        finally:
            encoder.cleanup()
        if status == 1 and len(data) == 3 * w * h:
            return np.frombuffer(data, dtype=np.uint8).reshape(h, w, 3)
    except (AttributeError, TypeError, ValueError, OSError):
        pass
    return np.asarray(im)


def _rawmode(im: Image.Image) -> str:
    """Pillow's raw (on-disk) pixel layout of the first tile, if known."""
    tile = getattr(im, "tile", None) or []
    if not tile:
        return ""
    args = tile[0][3]
    if isinstance(args, tuple):
        args = args[0] if args else ""
    return args if isinstance(args, str) else ""


def _is_16bit_multichannel_tiff(im: Image.Image) -> bool:
    tags = getattr(im, "tag_v2", None)
    if tags is None:
        return False
    bits = tags.get(258)
    bits = tuple(bits) if isinstance(bits, (tuple, list)) else (bits,)
    return len(bits) >= 2 and all(b == 16 for b in bits)


def _read_tiff16(data: bytes) -> tuple[np.ndarray, np.ndarray | None] | None:
    """Full-precision 16-bit colour TIFF through tifffile; None if it cannot."""
    import tifffile  # loaded only for such files: most commands never need it

    try:
        with tifffile.TiffFile(io.BytesIO(data)) as tif:
            page = tif.pages[0]
            arr = page.asarray()
            planar_separate = page.planarconfig == 2
    except Exception:  # noqa: BLE001 - any codec gap falls back to Pillow's 8 bits
        return None
    if arr.dtype != np.uint16:
        return None
    if arr.ndim == 3 and planar_separate and arr.shape[0] in (2, 3, 4):
        arr = np.moveaxis(arr, 0, -1)
    if arr.ndim != 3 or arr.shape[-1] not in (2, 3, 4):
        return None
    if arr.shape[-1] == 2:
        return arr[..., 0], arr[..., 1]
    if arr.shape[-1] == 4:
        return arr[..., :3], arr[..., 3]
    return arr, None


# EXIF orientation -> array operation producing the upright picture; the
# meaning of each value is EXIF 2.32 (CIPA DC-008) §4.6.4, tag 0x0112.
_TRANSPOSES = {
    2: lambda a: a[:, ::-1],
    3: lambda a: a[::-1, ::-1],
    4: lambda a: a[::-1],
    5: lambda a: a.swapaxes(0, 1),
    6: lambda a: np.rot90(a, -1),
    7: lambda a: np.rot90(a, 2).swapaxes(0, 1),
    8: lambda a: np.rot90(a, 1),
}


def _upright(arr: np.ndarray, orientation: int) -> np.ndarray:
    op = _TRANSPOSES.get(orientation)
    return arr if op is None else op(arr)


def _exif_for_copy(exif: Image.Exif, *, source_is_tiff: bool) -> tuple[bytes | None, dict]:
    """EXIF bytes to write (Orientation 1) and the capture facts."""
    capture: dict[str, str] = {}
    if not len(exif):
        return None, capture
    try:
        sub = dict(exif.get_ifd(_EXIF_IFD))
    except Exception:  # noqa: BLE001 - a broken sub-IFD loses only the capture facts
        sub = {}
    for name, tag, src in (
        ("Make", _MAKE, exif),
        ("Model", _MODEL, exif),
        ("DateTimeOriginal", _DATETIME_ORIGINAL, sub),
        ("BodySerialNumber", _BODY_SERIAL, sub),
    ):
        value = src.get(tag)
        if isinstance(value, bytes):
            value = value.decode("utf-8", "replace")
        if value is not None:
            text = str(value).strip("\x00 ").strip()
            if text:
                capture[name] = text

    out = Image.Exif()
    for tag, value in exif.items():
        if source_is_tiff and tag not in _DESCRIPTIVE_IFD0:
            continue
        if tag in (_EXIF_IFD, _GPS_IFD):
            try:
                value = dict(exif.get_ifd(tag))
            except Exception:  # noqa: BLE001
                continue
            if not value:
                continue
        out[tag] = value
    if not len(out):
        return None, capture
    if _ORIENTATION in out:
        out[_ORIENTATION] = 1  # the pixels are upright now
    try:
        return out.tobytes(), capture
    except Exception:  # noqa: BLE001 - unserialisable maker tags: carry none rather than fail
        return None, capture


# ---------------------------------------------------------------- writing


def write_picture(
    path: str | os.PathLike,
    pixels: np.ndarray,
    *,
    like: Picture,
    quality: int = 95,
    force: bool = False,
    finish: Callable[[Path, Staged], T] | None = None,
) -> T | None:
    """Encode ``pixels`` to ``path`` atomically, with ``like``'s metadata.

    As :func:`write_picture_keeping_bytes`, without keeping the bytes.
    """
    return write_picture_keeping_bytes(path, pixels, like=like, quality=quality, force=force,
                                       finish=finish)[0]


def write_picture_keeping_bytes(
    path: str | os.PathLike,
    pixels: np.ndarray,
    *,
    like: Picture,
    quality: int = 95,
    force: bool = False,
    finish: Callable[[Path, Staged], T] | None = None,
) -> tuple[T | None, bytes]:
    """Encode ``pixels`` to ``path`` atomically, with ``like``'s metadata; keep the bytes.

    Returns ``finish``'s result and the exact bytes now in ``path`` (after
    ``finish``), so that a caller can hash or decode them without reading
    the file again.

    Parameters
    ----------
    path : str or path-like
        Output file; its extension picks the format (``.jpg``, ``.jpeg``,
        ``.png``, ``.tif``, ``.tiff``, ``.webp``).
    pixels : ndarray
        ``(H, W)`` or ``(H, W, 3)``, ``uint8`` or ``uint16``, upright.
    like : Picture
        The picture these pixels derive from: its EXIF (Orientation 1), ICC
        profile, XMP and alpha are written where the format holds them.
    quality : int, default 95
        JPEG/WebP quality. At 90 and above JPEG uses 4:4:4 chroma (no
        subsampling), below it 4:2:0.
    force : bool, default False
        Replace an existing file. The original (``like.path``) is never
        replaced, even with ``force``.
    finish : callable, optional
        Called as ``finish(staged_path, staged)`` on the encoded file in a
        private temporary folder before it is put in place (exiftool's
        metadata copy, :func:`claimkit.filemeta.carry_metadata`); the file as
        it leaves ``finish`` is what is written. Its result is returned.

    Raises
    ------
    claimkit.errors.InputError
        Existing output without ``force``; the output is the original;
        unknown extension; missing folder; no permission; a pixel layout the
        format cannot hold (16-bit colour PNG).

    Notes
    -----
    The file is written under a temporary name in the same folder, flushed to
    disk (``fsync``) and renamed into place, so a crash or an error leaves
    either no file or the complete one, never a partial file.
    """
    path = Path(path)
    fmt = check_output_path(path, like=like, force=force)
    pixels = np.asarray(pixels)
    if pixels.dtype not in (np.uint8, np.uint16) or pixels.ndim not in (2, 3):
        raise ValueError(f"pixels must be uint8/uint16 (H,W) or (H,W,3), got {pixels.dtype} "
                         f"{pixels.shape}")
    if pixels.ndim == 3 and pixels.shape[2] != 3:
        raise ValueError(f"colour pixels must have 3 channels, got {pixels.shape[2]}")
    alpha = like.alpha
    if alpha is not None and alpha.shape != pixels.shape[:2]:
        alpha = None  # pixels were resized or cropped; the old alpha no longer fits
    staged = Staged(format=fmt)
    try:
        payload = _encode(path, fmt, pixels, alpha, like, quality, staged)
    except OSError as exc:  # an encoder failure (e.g. a WebP side over 16383 px)
        raise InputError(f"cannot encode as {fmt}: {exc}", path=path) from None
    result = None
    if finish is not None:
        with tempfile.TemporaryDirectory(prefix="claimkit-stage-") as tmp:
            file = Path(tmp) / f"staged{path.suffix.lower()}"
            file.write_bytes(payload)
            result = finish(file, staged)
            payload = file.read_bytes()
    _atomic_write(path, payload, force=force)
    return result, payload


@dataclass
class Staged:
    """What the encoder put into a staged file, for the metadata step that follows.

    ``icc_embedded``: the encoder embedded the ICC profile; ``icc_fits``: the
    source's profile describes the output's colour space (so a copy of it is
    right); ``reasons``: why a block of the source cannot be in this output.
    """

    format: str
    icc_embedded: bool = False
    icc_fits: bool = False
    reasons: dict = field(default_factory=dict)


def output_format(path: Path) -> str:
    """Pillow's format name for an output path's extension; refuses an unknown one."""
    fmt = _FORMAT_BY_SUFFIX.get(Path(path).suffix.lower())
    if fmt is None:
        known = ", ".join(sorted(_FORMAT_BY_SUFFIX))
        raise InputError(
            f"unknown output extension {Path(path).suffix or '(none)'!r}; use one of {known}",
            path=path,
        )
    return fmt


def check_output_path(path: Path, *, like: Picture | None = None, force: bool = False) -> str:
    """The output format of ``path``; refuses what cannot be written there (exit 2).

    Checked before any pixel work, so that a bad output costs nothing (no
    serial, no marking): a known extension, not the original, no existing
    file without ``force``, a folder that exists.
    """
    fmt = output_format(path)
    if like is not None and _same_file(path, like.path):
        raise InputError("is the original; refusing to write over it", path=path)
    if path.is_dir():
        raise InputError("is a folder, not a file name", path=path)
    if path.exists() and not force:
        raise InputError("already exists; use --force to replace it", path=path)
    if not path.parent.is_dir():
        raise InputError(f"folder {path.parent} does not exist", path=path)
    return fmt


def _same_file(a: Path, b: Path) -> bool:
    try:
        if a.exists() and b.exists():
            return os.path.samefile(a, b)
    except OSError:
        pass
    return a.resolve() == Path(b).resolve()


def _to8(arr: np.ndarray) -> np.ndarray:
    if arr.dtype == np.uint8:
        return arr
    return np.rint(arr.astype(np.float32) / 257.0).clip(0, 255).astype(np.uint8)


def _encode(
    path: Path,
    fmt: str,
    pixels: np.ndarray,
    alpha: np.ndarray | None,
    like: Picture,
    quality: int,
    staged: Staged | None = None,
) -> bytes:
    """The complete file contents, built in memory before anything touches disk."""
    staged = staged if staged is not None else Staged(format=fmt)
    sixteen = pixels.dtype == np.uint16
    colour = pixels.ndim == 3
    grey_out = not colour and fmt != "WEBP"
    staged.icc_fits = bool(like.icc_profile) and _icc_fits(like.icc_profile, grey=grey_out)
    if sixteen and fmt == "TIFF" and (colour or alpha is not None):
        staged.icc_embedded = staged.icc_fits
        return _encode_tiff16(pixels, alpha, like)
    if sixteen and fmt == "PNG" and (colour or alpha is not None):
        # Pillow cannot write 16-bit colour (or grey+alpha) PNG; imagecodecs can. Its
        # encoder takes no metadata: the ICC profile, EXIF, XMP and resolution follow
        # in the metadata step (exiftool).
        import imagecodecs

        data = pixels if alpha is None else np.dstack([pixels, alpha.astype(np.uint16)])
        return bytes(imagecodecs.png_encode(np.ascontiguousarray(data), level=6))
    if sixteen and (fmt in ("JPEG", "WEBP")):
        pixels = _to8(pixels)  # these formats hold 8 bits per channel only
        sixteen = False
    if alpha is not None:
        alpha = _to8(alpha)

    if sixteen:
        im = Image.fromarray(pixels.astype("<u2"), mode=None)  # I;16
    elif alpha is not None and fmt != "JPEG":
        stacked = np.dstack([pixels, alpha])
        im = Image.fromarray(np.ascontiguousarray(stacked), "RGBA" if colour else "LA")
    else:
        shared = _rgbx_image(pixels) if fmt == "JPEG" else None
        im = shared or Image.fromarray(np.ascontiguousarray(pixels), "RGB" if colour else "L")
    if fmt == "WEBP" and im.mode == "L":
        im = im.convert("RGB")  # WebP has no grey mode
    if fmt == "WEBP" and im.mode == "LA":
        im = im.convert("RGBA")

    kw: dict = {}
    if like.icc_profile and _icc_fits(like.icc_profile, grey=im.mode in ("L", "LA", "I;16")):
        kw["icc_profile"] = like.icc_profile
        staged.icc_embedded = True
    if like.dpi and fmt in ("JPEG", "PNG", "TIFF"):
        kw["dpi"] = like.dpi
    if like.exif:
        kw["exif"] = like.exif
    if fmt == "JPEG":
        kw.update(quality=int(quality), subsampling=0 if quality >= 90 else 2)
        if like.xmp:
            kw["xmp"] = like.xmp
    elif fmt == "PNG":
        if like.xmp:
            info = PngInfo()
            info.add_itxt("XML:com.adobe.xmp", like.xmp.decode("utf-8", "replace"), zip=False)
            kw["pnginfo"] = info
    elif fmt == "TIFF":
        # Uncompressed on purpose: Pillow's libtiff path (used for any
        # compression) cannot write the EXIF sub-IFD, its own writer can.
        if like.xmp:
            # Pillow writes either ``tiffinfo`` or ``exif``, not both, so the
            # XMP tag goes into the same tag set as the EXIF.
            tags = Image.Exif()
            if like.exif:
                tags.load(like.exif)
            tags[_TIFF_XMP] = like.xmp
            kw["exif"] = tags
    elif fmt == "WEBP":
        kw.update(quality=int(quality), method=4)
        if like.xmp:
            kw["xmp"] = like.xmp
    buf = io.BytesIO()
    im.save(buf, format=fmt, **kw)
    return buf.getvalue()


def canvas_like(pixels: np.ndarray) -> np.ndarray:
    """An empty array for pixels like ``pixels``; for 8-bit colour, laid out as Pillow holds RGB.

    Pillow keeps an RGB picture as 4 bytes a pixel (RGBX). An ``(H, W, 3)``
    view of an ``(H, W, 4)`` buffer is that layout, so the JPEG encoder reads
    it in place (:func:`_rgbx_image`) instead of copying the whole picture
    into Pillow first; NumPy works on the view as on any array.
    """
    if pixels.ndim == 3 and pixels.shape[2] == 3 and pixels.dtype == np.uint8:
        return np.empty(pixels.shape[:2] + (4,), dtype=np.uint8)[..., :3]
    return np.empty_like(pixels)


def _rgbx_image(pixels: np.ndarray) -> Image.Image | None:
    """A Pillow RGBX image on the memory of a :func:`canvas_like` view, else None.

    ``Image.frombuffer`` maps an RGBX buffer without copying; the JPEG
    encoder ignores the fourth byte, and the file is byte for byte the one
    written from an RGB copy (checked in ``tests/test_marking_buffers.py``).
    """
    base = pixels.base
    if not (pixels.dtype == np.uint8 and pixels.ndim == 3 and isinstance(base, np.ndarray)):
        return None
    h, w = pixels.shape[:2]
    if (base.shape != (h, w, 4) or base.dtype != np.uint8 or not base.flags.c_contiguous
            or pixels.strides != base.strides
            or pixels.__array_interface__["data"][0] != base.__array_interface__["data"][0]):
        return None
    return Image.frombuffer("RGBX", (w, h), base, "raw", "RGBX", 0, 1)


def _icc_fits(icc: bytes, *, grey: bool) -> bool:
    """Whether a profile describes grey or RGB data as the image holds.

    ICC.1:2022 §7.2.6: bytes 16..19 of the header name the data colour space.
    A grey profile on RGB pixels (or the reverse) makes readers misrender or
    reject the file, so such a profile is left out.
    """
    space = icc[16:20] if len(icc) >= 20 else b""
    return space == (b"GRAY" if grey else b"RGB ")


def _encode_tiff16(pixels: np.ndarray, alpha: np.ndarray | None, like: Picture) -> bytes:
    """16-bit TIFF with alpha or colour, which Pillow cannot build, via tifffile.

    ICC and XMP are written as TIFF tags, and the descriptive EXIF fields of
    IFD0 (Make, Model, Artist, Copyright, ...) as plain TIFF tags. The EXIF
    sub-IFD (e.g. DateTimeOriginal) is not written: tifffile has no way to
    add one.
    """
    data = pixels
    extrasamples = None
    if alpha is not None:
        data = np.dstack([pixels, alpha.astype(np.uint16)])
        extrasamples = [2]  # unassociated alpha (TIFF 6.0, ExtraSamples)
    extratags = []
    if like.icc_profile and _icc_fits(like.icc_profile, grey=pixels.ndim == 2):
        extratags.append((_TIFF_ICC, "B", len(like.icc_profile), like.icc_profile, True))
    if like.xmp:
        extratags.append((_TIFF_XMP, "B", len(like.xmp), like.xmp, True))
    if like.exif:
        exif = Image.Exif()
        exif.load(like.exif)
        for tag in _TIFF_ASCII_TAGS:
            value = exif.get(tag)
            if isinstance(value, str) and value:
                extratags.append((tag, "s", 0, value, True))
    import tifffile

    buf = io.BytesIO()
    tifffile.imwrite(
        buf,
        np.ascontiguousarray(data),
        photometric="rgb" if pixels.ndim == 3 else "minisblack",
        planarconfig="contig",
        extrasamples=extrasamples,
        compression="zlib",
        extratags=extratags,
        resolution=like.dpi,
        resolutionunit="INCH" if like.dpi else None,
        metadata=None,
    )
    return buf.getvalue()


def _atomic_write(path: Path, payload: bytes, *, force: bool) -> None:
    """Temp file in the same folder, fsync, rename; without ``force`` never replace a file."""
    try:
        atomic_write(path, payload, replace=force)
    except AlreadyExists:
        raise AlreadyExists("already exists; use --force to replace it", path=path) from None


# ---------------------------------------------------------------- pixel helpers

# ITU-R BT.601-7, §2.5.1: E'Y = 0.299 E'R + 0.587 E'G + 0.114 E'B.
_BT601 = (0.299, 0.587, 0.114)


def _scale_of(dtype: np.dtype) -> float:
    if dtype == np.uint8:
        return 1.0
    if dtype == np.uint16:
        return 257.0  # 65535 / 255: maps 16-bit full scale onto 0..255 exactly
    raise ValueError(f"pixels must be uint8 or uint16, got {dtype}")


def to_luma(pixels: np.ndarray, *, out: np.ndarray | None = None) -> np.ndarray:
    """Luma on a 0..255 scale, whatever the bit depth.

    Parameters
    ----------
    pixels : ndarray
        ``(H, W)`` grey or ``(H, W, 3)`` RGB, ``uint8`` or ``uint16``.
    out : ndarray, optional
        ``float32 (H, W)`` to write the luma into (a band of a larger array).

    Returns
    -------
    ndarray
        ``float32 (H, W)``; 16-bit values are divided by 257, colour is
        weighted 0.299 R + 0.587 G + 0.114 B.

    Notes
    -----
    Colour is converted in bands of rows that stay in the processor cache,
    each sample as ``((w_R R + w_G G) + w_B B)`` in float32. That is the
    same arithmetic, in the same order, as the one-pass
    ``np.einsum("ijk,k->ij", ..., dtype=float32)`` earlier versions used,
    so the luma (and every mark derived from it) is bit-for-bit unchanged;
    ``tests/test_mark_pipeline.py`` checks this over all 2**24 8-bit colours.

    References
    ----------
    .. [1] ITU-R Recommendation BT.601-7, "Studio encoding parameters of
       digital television for standard 4:3 and wide-screen 16:9 aspect
       ratios", 2011, §2.5.1.
    """
    pixels = np.asarray(pixels)
    scale = _scale_of(pixels.dtype)
    if pixels.ndim not in (2, 3) or (pixels.ndim == 3 and pixels.shape[2] != 3):
        raise ValueError(f"expected (H, W) or (H, W, 3) pixels, got shape {pixels.shape}")
    if out is None:
        out = np.empty(pixels.shape[:2], dtype=np.float32)
    elif out.shape != pixels.shape[:2] or out.dtype != np.float32:
        raise ValueError(f"out must be float32 {pixels.shape[:2]}, got {out.dtype} {out.shape}")
    if pixels.ndim == 2:
        luma = out
        luma[...] = pixels
    else:
        luma = _rgb_luma(pixels, out)
    if scale != 1.0:
        luma /= np.float32(scale)
    return luma


# Rows per band for the colour helpers below: 16 rows of a 6000-pixel-wide
# photo are ~1 MB of float32 samples, which stays in a core's cache.
_BAND_SAMPLES = 288_000


def _band_rows(width: int, channels: int = 3) -> int:
    return max(1, _BAND_SAMPLES // max(1, width * channels))


# _add_padded: a change within this of a half is added the float way (see there).
_NEAR_HALF = np.float32(0.5 - 2.0 ** -15)
# One 16-bit value times this, as four 16-bit lanes (little-endian): the value in R, G, B; 0 in X.
_RGB_LANES = np.uint64(0x0000_0001_0001_0001)


def _add_padded(pixels: np.ndarray, delta: np.ndarray, out: np.ndarray, *,
                sse: bool) -> int | None:
    """:func:`add_luma_delta` on whole 8-bit RGBX rows; with ``sse``, the squared changes' sum.

    Each sample is ``clip(p + rint(d))`` in 16-bit integers, the change rounded
    once per pixel: that is ``clip(rint(float32(p) + d))`` exactly for every
    ``p`` in 0..255 unless ``d`` is within 2**-15 of a half. (For ``|d| <=
    255.5``, ``p + d`` is below 512, where float32 rounds by at most 2**-16, so
    its rounding cannot reach or cross a half; beyond, both saturate; and
    ``d - rint(d)`` is exact in float32.) The pixels whose change is that close
    to a half (a tie of ``rint``, whose result depends on ``p``'s parity) or
    not finite are computed the float way. The padding byte gets no change.
    The same bytes as the float path (the reference the tests compare with),
    without a float copy of four channels and without the inner loop of four
    that broadcasting one change over them costs.
    """
    h, w = pixels.shape[:2]
    rows = _band_rows(w, 4)
    n0 = min(rows, h)
    rounded, frac = np.empty((n0, w), np.float32), np.empty((n0, w), np.float32)
    whole, lanes = np.empty((n0, w), np.int16), np.empty((n0, w), np.uint64)
    before, after = np.empty((n0, w, 4), np.int16), np.empty((n0, w, 4), np.int16)
    total = 0
    for r0 in range(0, h, rows):
        n = min(rows, h - r0)
        d, r, f, b, a = delta[r0:r0 + n], rounded[:n], frac[:n], before[:n], after[:n]
        np.rint(d, out=r)
        with np.errstate(invalid="ignore"):         # inf - inf
            np.subtract(d, r, out=f)
        np.abs(f, out=f)
        near = ~(f < _NEAR_HALF)                    # NaN and infinities too
        np.clip(r, -255, 255, out=r)                # beyond, every sample saturates anyway
        np.copyto(whole[:n], r, casting="unsafe")   # whole numbers in range: exact
        np.copyto(lanes[:n], whole[:n].view(np.uint16))
        lanes[:n] *= _RGB_LANES
        b[...] = pixels[r0:r0 + n]
        np.add(b, lanes[:n].view(np.int16).reshape(n, w, 4), out=a)
        np.clip(a, 0, 255, out=a)
        if near.any():
            k = np.flatnonzero(near)
            g = b.reshape(-1, 4)[k, :3].astype(np.float32)
            g += d.reshape(-1)[k, None]
            np.rint(g, out=g)
            np.clip(g, 0, 255, out=g)
            a.reshape(-1, 4)[k, :3] = g
        out[r0:r0 + n] = a
        if sse:
            np.subtract(a, b, out=a)
            sq = a.view(np.uint16)                  # |change| < 2**8: its square is exact mod 2**16
            np.multiply(sq, sq, out=sq)
            total += quality.sum_of_squares_u8(sq)
    return total if sse else None


def _rgb_luma(pixels: np.ndarray, luma: np.ndarray) -> np.ndarray:
    """BT.601 luma of ``(H, W, 3)`` integer pixels in float32 into ``luma``, band by band."""
    h, w = pixels.shape[:2]
    weights = np.asarray(_BT601, dtype=np.float32)
    # Whole RGBX rows convert as one contiguous block (the padding byte is converted and
    # not used); a strided three-byte view converts about three times slower.
    wide = padded_rows(pixels)
    if wide is not None:
        pixels = wide
    rows = _band_rows(w, pixels.shape[2])
    band = np.empty((min(rows, h), w, pixels.shape[2]), dtype=np.float32)
    term = np.empty((min(rows, h), w), dtype=np.float32)
    for r0 in range(0, h, rows):
        src = pixels[r0:r0 + rows]
        n = src.shape[0]
        f, t, out = band[:n], term[:n], luma[r0:r0 + n]
        f[...] = src  # one contiguous conversion; the channels are then strided views
        np.multiply(f[..., 0], weights[0], out=out)
        np.multiply(f[..., 1], weights[1], out=t)
        out += t
        np.multiply(f[..., 2], weights[2], out=t)
        out += t
    return luma


def add_luma_delta(pixels: np.ndarray, delta: np.ndarray, *,
                   out: np.ndarray | None = None) -> np.ndarray:
    """Add a luma change to every channel, keeping dtype.

    Parameters
    ----------
    pixels : ndarray
        ``(H, W)`` or ``(H, W, 3)``, ``uint8`` or ``uint16``.
    delta : ndarray
        ``(H, W)`` change in 0..255 units (scaled by 257 for 16-bit).
    out : ndarray, optional
        Where to write the result (same shape and dtype as ``pixels``), so a
        caller working band by band can fill one output array.

    Returns
    -------
    ndarray
        Same shape and dtype as ``pixels``: rounded to the nearest level and
        clipped to the valid range.

    Notes
    -----
    Because the BT.601 weights sum to 1, adding the same amount to R, G and B
    changes luma by exactly that amount and leaves the colour-difference
    signals unchanged, so hue and saturation are kept. Where a channel is
    clipped at 0 or full scale the change there is smaller than asked.

    Each sample is ``clip(rint(float32(p) + float32(d)))``, computed in bands
    of rows that stay in cache (so peak memory is one band of floats, not one
    plane per channel). On 8-bit RGBX rows (:func:`canvas_like`, a decoded
    colour JPEG) the same bytes come from 16-bit integers (:func:`_add_padded`).
    """
    if out is None:
        out = np.empty_like(np.asarray(pixels))
    _add_luma_delta(pixels, delta, out, sse=False)
    return out


def add_luma_delta_sse(pixels: np.ndarray, delta: np.ndarray, *, out: np.ndarray) -> int:
    """:func:`add_luma_delta` into ``out``; the exact sum of the squared changes of all samples.

    The sum is ``claimkit.mark.quality.squared_error_sum(pixels, out)``; on
    8-bit RGBX rows it is taken from each band as it is written, while it is
    in cache, instead of in a second pass over both pictures.
    """
    sse = _add_luma_delta(pixels, delta, out, sse=True)
    return quality.squared_error_sum(pixels, out) if sse is None else sse


def _add_luma_delta(pixels: np.ndarray, delta: np.ndarray, out: np.ndarray, *,
                    sse: bool) -> int | None:
    """:func:`add_luma_delta` into ``out``; the sum of squared changes when asked and at hand."""
    pixels = np.asarray(pixels)
    scale = _scale_of(pixels.dtype)
    delta = np.asarray(delta, dtype=np.float32)
    if delta.shape != pixels.shape[:2]:
        raise ValueError(f"delta shape {delta.shape} does not match pixels {pixels.shape[:2]}")
    if out.shape != pixels.shape or out.dtype != pixels.dtype:
        raise ValueError(f"out must be {pixels.dtype} {pixels.shape}, got {out.dtype} {out.shape}")
    top = np.float32(np.iinfo(pixels.dtype).max)
    h, w = pixels.shape[:2]
    colour = pixels.ndim == 3
    wide_in, wide_out = padded_rows(pixels), padded_rows(out)
    if wide_in is not None and wide_out is not None and sys.byteorder == "little":
        return _add_padded(wide_in, delta, wide_out, sse=sse)
    rows = _band_rows(w, pixels.shape[2] if colour else 1)
    buf = np.empty((min(rows, h),) + pixels.shape[1:], dtype=np.float32)
    step = np.empty((min(rows, h), w), dtype=np.float32) if scale != 1.0 else None
    for r0 in range(0, h, rows):
        n = min(rows, h - r0)
        f = buf[:n]
        f[...] = pixels[r0:r0 + n]
        d = delta[r0:r0 + n]
        if step is not None:
            d = np.multiply(d, np.float32(scale), out=step[:n])
        f += d[..., None] if colour else d
        np.rint(f, out=f)
        np.clip(f, 0, top, out=f)
        out[r0:r0 + n] = f  # exact: whole numbers within the dtype's range
    return None
