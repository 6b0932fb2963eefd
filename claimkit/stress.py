"""The attack battery: how much abuse does a marked photo survive?

Before publishing, a photographer runs the marked photo through the things
copiers do (recompression, resizing, rotation and re-framing, mirroring,
filtering, a social-media upload) and examines every copy blind, as an
examiner would. The same battery serves the test suite and the robustness
section of the dossier.

Every attack is made with other people's code, never with the project's own
warping: Pillow's resampling, rotation, filters and JPEG codec, and
scikit-image's ``rescale``. That way the battery checks the engine against
an independent implementation of each transform, and the true geometry of
each copy is known from the attack's parameters alone.

The true geometry uses the conventions of ``examine``: ``rotation_deg`` is
counter-clockwise on screen (Pillow's ``rotate(+17)`` is +17), ``scale`` the
linear size of the copy over the original (geometric mean of both axes),
``aspect`` the horizontal over the vertical scale, ``flipped`` a left-right
mirror.
"""

from __future__ import annotations

import io
import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from PIL import Image, ImageEnhance, ImageFilter

from claimkit import words
from claimkit.imageio import to_luma
from claimkit.mark import detect, payload, scales

ROTATION_TOLERANCE_DEG = 0.5   # issue 3: estimated rotation within 0.5 degrees
SCALE_TOLERANCE = 0.02         # issue 3: estimated scale within 2 %
DOWNSCALES = (50, 35, 25, 15, 10)   # per cent of the width: web sizes of a large master
NOISE_SEED = 20240611          # fixed, so that a battery run can be repeated exactly


@dataclass(frozen=True)
class Attack:
    """One attack of the battery: what a copier does, with its parameters and true geometry."""

    name: str
    family: str
    params: dict
    apply: Callable[[np.ndarray], np.ndarray] = field(repr=False, compare=False)
    rotation_deg: float = 0.0
    scale: float | None = 1.0      # None: depends on the picture's size (filled in when applied)
    aspect: float = 1.0
    flipped: bool = False

    def truth(self, before: tuple[int, int], after: tuple[int, int]) -> dict:
        """True geometry, given the picture's (height, width) before and after the attack."""
        scale = self.scale
        if scale is None:
            scale = _size_scale(self, before)
        return {"rotation_deg": float(self.rotation_deg), "scale": float(scale),
                "aspect": float(self.aspect), "flipped": bool(self.flipped)}


# ---------------------------------------------------------------- attacks (Pillow / scikit-image)

def _image(pixels: np.ndarray) -> Image.Image:
    return Image.fromarray(pixels)


def _array(im: Image.Image) -> np.ndarray:
    return np.asarray(im).copy()


def jpeg(pixels: np.ndarray, quality: int, subsampling: int = 2) -> np.ndarray:
    """Re-encode with Pillow's JPEG codec (4:2:0 chroma by default, as a web upload would)."""
    buf = io.BytesIO()
    _image(pixels).save(buf, "JPEG", quality=int(quality), subsampling=int(subsampling))
    buf.seek(0)
    return _array(Image.open(buf))


def recompress(pixels: np.ndarray, fmt: str, quality: int) -> np.ndarray:
    """Re-encode with Pillow's WebP or AVIF codec (what image hosts serve)."""
    buf = io.BytesIO()
    _image(pixels).save(buf, fmt, quality=int(quality))
    buf.seek(0)
    return _array(Image.open(buf).convert("RGB"))


def avif_available() -> bool:
    """Whether this Pillow was built with AVIF (Pillow 11.3+ with libavif)."""
    from PIL import features

    return bool(features.check("avif"))


def resize(pixels: np.ndarray, sx: float, sy: float | None = None) -> np.ndarray:
    """Pillow Lanczos resize by ``sx`` horizontally and ``sy`` vertically (default ``sx``)."""
    sy = sx if sy is None else sy
    h, w = pixels.shape[:2]
    size = (max(1, round(w * sx)), max(1, round(h * sy)))
    return _array(_image(pixels).resize(size, Image.Resampling.LANCZOS))


def rescale_skimage(pixels: np.ndarray, factor: float) -> np.ndarray:
    """scikit-image's ``rescale`` (with its anti-aliasing), back to 8 bits."""
    from skimage.transform import rescale

    axis = -1 if pixels.ndim == 3 else None
    out = rescale(pixels.astype(np.float64) / 255.0, factor, anti_aliasing=True,
                  channel_axis=axis, order=3)
    return np.clip(np.rint(out * 255.0), 0, 255).astype(np.uint8)


def inner_size(h: int, w: int, deg: float) -> tuple[int, int]:
    """Largest centred rectangle of the picture's aspect that stays inside it after turning by ``deg``."""
    t = math.radians(deg)
    c, s = abs(math.cos(t)), abs(math.sin(t))
    k = min(w / (w * c + h * s), h / (w * s + h * c))
    return max(1, int(h * k) - 2), max(1, int(w * k) - 2)


def rotate_crop(pixels: np.ndarray, deg: float) -> np.ndarray:
    """Pillow bicubic rotation, counter-clockwise by ``deg``, cropped so that no border shows."""
    h, w = pixels.shape[:2]
    if deg % 90 == 0:
        turns = {90: Image.Transpose.ROTATE_90, 180: Image.Transpose.ROTATE_180,
                 270: Image.Transpose.ROTATE_270}
        k = int(deg % 360)
        return pixels.copy() if k == 0 else _array(_image(pixels).transpose(turns[k]))
    out = _array(_image(pixels).rotate(deg, resample=Image.Resampling.BICUBIC, expand=True))
    ih, iw = inner_size(h, w, deg)
    hh, ww = out.shape[:2]
    r0, c0 = (hh - ih) // 2, (ww - iw) // 2
    return out[r0:r0 + ih, c0:c0 + iw].copy()


def mirror(pixels: np.ndarray) -> np.ndarray:
    return _array(_image(pixels).transpose(Image.Transpose.FLIP_LEFT_RIGHT))


def crop_fraction(pixels: np.ndarray, keep_area: float, at: tuple[float, float] = (0.37, 0.21)) -> np.ndarray:
    """Keep ``keep_area`` of the area (same aspect) with its top-left corner at a fraction ``at``."""
    h, w = pixels.shape[:2]
    k = math.sqrt(keep_area)
    ch, cw = max(1, int(h * k)), max(1, int(w * k))
    r0 = min(int(at[0] * h), h - ch)
    c0 = min(int(at[1] * w), w - cw)
    return pixels[r0:r0 + ch, c0:c0 + cw].copy()


def gaussian_blur(pixels: np.ndarray, radius: float) -> np.ndarray:
    return _array(_image(pixels).filter(ImageFilter.GaussianBlur(radius)))


def median(pixels: np.ndarray, size: int) -> np.ndarray:
    return _array(_image(pixels).filter(ImageFilter.MedianFilter(size)))


def add_noise(pixels: np.ndarray, sigma: float) -> np.ndarray:
    rng = np.random.default_rng(NOISE_SEED)
    noisy = pixels.astype(np.float32) + rng.normal(0.0, sigma, pixels.shape).astype(np.float32)
    return np.clip(np.rint(noisy), 0, 255).astype(np.uint8)


def contrast(pixels: np.ndarray, factor: float) -> np.ndarray:
    return _array(ImageEnhance.Contrast(_image(pixels)).enhance(factor))


def gamma(pixels: np.ndarray, g: float) -> np.ndarray:
    lut = [min(255, round(255.0 * (i / 255.0) ** (1.0 / g))) for i in range(256)]
    im = _image(pixels)
    return _array(im.point(lut * len(im.getbands())))


def social(pixels: np.ndarray, width: int = 1080, quality: int = 80) -> np.ndarray:
    """A social-media upload: resize to ``width`` wide, crop to 4:5 portrait, JPEG (4:2:0)."""
    w = pixels.shape[1]
    s = width / w
    out = resize(pixels, s)
    hh, ww = out.shape[:2]
    if hh >= ww * 5 / 4:
        ch, cw = round(ww * 5 / 4), ww
    else:
        ch, cw = hh, round(hh * 4 / 5)
    r0, c0 = (hh - ch) // 2, (ww - cw) // 2
    return jpeg(out[r0:r0 + ch, c0:c0 + cw].copy(), quality)


def downscale_jpeg(pixels: np.ndarray, factor: float, quality: int = 85) -> np.ndarray:
    """A web copy: Pillow Lanczos to ``factor`` of the width and height, JPEG ``quality``."""
    return jpeg(resize(pixels, factor), quality)


def shrink_turn_jpeg(pixels: np.ndarray, factor: float = 0.6, deg: float = 2.0,
                     quality: int = 70) -> np.ndarray:
    """Downscale, straighten by a few degrees, crop the borders, JPEG: a re-posted print scan."""
    return jpeg(rotate_crop(resize(pixels, factor), deg), quality)


def _size_scale(attack: Attack, before: tuple[int, int]) -> float:
    if attack.family == "pipeline" and "width" in attack.params:
        return attack.params["width"] / before[1]
    raise ValueError(f"no size-dependent scale for {attack.name}")


def battery(*, quick: bool = False) -> list[Attack]:
    """The attacks, in the order they are reported. ``quick`` keeps one of each kind."""
    a: list[Attack] = [Attack("none", "reference", {}, lambda p: p.copy())]
    for q in ((75, 30) if quick else (90, 75, 50, 30)):
        a.append(Attack(f"jpeg {q}", "jpeg", {"quality": q}, lambda p, q=q: jpeg(p, q)))
    for s in ((0.7,) if quick else (0.5, 0.7, 1.6)):
        a.append(Attack(f"resize {s:g}", "resize", {"factor": s}, lambda p, s=s: resize(p, s), scale=s))
    if not quick:
        a.append(Attack("rescale 0.8 (skimage)", "resize", {"factor": 0.8},
                        lambda p: rescale_skimage(p, 0.8), scale=0.8))
    a.append(Attack("aspect 0.9", "resize", {"horizontal": 0.9},
                    lambda p: resize(p, 0.9, 1.0), scale=math.sqrt(0.9), aspect=0.9))
    for d in ((17, 90) if quick else (3, 17, 45, 90, -128)):
        a.append(Attack(f"rotate {d:g}", "rotate", {"degrees": d, "crop": "no border"},
                        lambda p, d=d: rotate_crop(p, d), rotation_deg=float(d)))
    a.append(Attack("mirror", "mirror", {}, mirror, flipped=True))
    a.append(Attack("crop 25 %", "crop", {"keep_area": 0.25}, lambda p: crop_fraction(p, 0.25)))
    if not quick:
        a += [
            Attack("blur 1", "filter", {"gaussian_radius": 1}, lambda p: gaussian_blur(p, 1)),
            Attack("blur 2", "filter", {"gaussian_radius": 2}, lambda p: gaussian_blur(p, 2)),
            Attack("median 3", "filter", {"size": 3}, lambda p: median(p, 3)),
            Attack("noise 8", "noise", {"sigma": 8}, lambda p: add_noise(p, 8)),
            Attack("contrast 0.6", "tone", {"factor": 0.6}, lambda p: contrast(p, 0.6)),
            Attack("gamma 1.5", "tone", {"gamma": 1.5}, lambda p: gamma(p, 1.5)),
            Attack("webp 75", "recompress", {"format": "WEBP", "quality": 75},
                   lambda p: recompress(p, "WEBP", 75)),
        ]
        if avif_available():
            a.append(Attack("avif 60", "recompress", {"format": "AVIF", "quality": 60},
                            lambda p: recompress(p, "AVIF", 60)))
    a.append(Attack("social 1080 4:5 jpeg 80", "pipeline", {"width": 1080, "crop": "4:5", "quality": 80},
                    social, scale=None))
    if not quick:
        # Web copies of a large master: a 24-megapixel photo posted 1080 px wide
        # is an 18 % copy (the mark's coarse component, claimkit.mark.scales).
        for pct in DOWNSCALES:
            a.append(Attack(f"downscale {pct} % jpeg 85", "downscale",
                            {"factor": pct / 100, "quality": 85},
                            lambda p, f=pct / 100: downscale_jpeg(p, f), scale=pct / 100))
        a.append(Attack("master to 1080 4:5 jpeg 75", "pipeline",
                        {"width": 1080, "crop": "4:5", "quality": 75, "chroma": "4:2:0"},
                        lambda p: social(p, 1080, 75), scale=None))
    a.append(Attack("shrink 0.6 rotate 2 jpeg 70", "pipeline",
                    {"factor": 0.6, "degrees": 2, "crop": "no border", "quality": 70},
                    shrink_turn_jpeg, rotation_deg=2.0, scale=0.6))
    return a


# ---------------------------------------------------------------- running

def to_8bit(pixels: np.ndarray) -> np.ndarray:
    """The attacks work on 8-bit pictures, as the copies copiers make do."""
    pixels = np.asarray(pixels)
    if pixels.dtype == np.uint8:
        return pixels
    if pixels.dtype == np.uint16:
        return np.clip(np.rint(pixels / 257.0), 0, 255).astype(np.uint8)
    raise ValueError(f"pixels must be uint8 or uint16, got {pixels.dtype}")


def geometry_errors(truth: dict, est: dict) -> tuple[float | None, float | None, bool]:
    """Rotation error (degrees, wrapped), relative scale error, and whether both are within tolerance."""
    if not est:
        return None, None, False
    rot = (est["rotation_deg"] - truth["rotation_deg"] + 180.0) % 360.0 - 180.0
    scl = est["scale"] / truth["scale"] - 1.0
    ok = (abs(rot) <= ROTATION_TOLERANCE_DEG and abs(scl) <= SCALE_TOLERANCE
          and bool(est["flipped"]) == bool(truth["flipped"]))
    return round(rot, 3), round(scl, 5), ok


def run_attack(attack: Attack, pixels: np.ndarray, seed: bytes, payload_check, *,
               reference_bits: list[int] | None = None, threshold: float = detect.DEFAULT_THRESHOLD,
               workers: int = 1) -> dict:
    """Apply one attack and examine the copy blind; one row of the battery's table."""
    start = time.perf_counter()
    copy = attack.apply(pixels)
    truth = attack.truth(pixels.shape[:2], copy.shape[:2])
    if min(copy.shape[:2]) < detect.MIN_SIDE:
        return _too_small(attack, copy, truth)
    finding = scales.examine(to_luma(copy), seed, payload_check=payload_check,
                             payload_space=payload.PAYLOAD_SPACE, threshold=threshold,
                             payload_candidates=getattr(payload_check, "candidates", None),
                             workers=workers)
    seconds = time.perf_counter() - start
    # A finding at a coarse view is stated against the original's coarse level;
    # the battery knows the original's size, so it is compared as any other.
    geom = scales.relative_to_original(finding.geometry, pixels.shape[:2])
    est = {k: geom[k] for k in ("rotation_deg", "scale", "aspect", "flipped")} \
        if finding.detected else None
    rot_err, scale_err, geom_ok = geometry_errors(truth, est or {})
    same = None
    if reference_bits is not None:
        same = bool(finding.payload_bits is not None and finding.payload_bits == reference_bits)
    return {
        "attack": attack.name,
        "family": attack.family,
        "params": attack.params,
        "width": int(copy.shape[1]),
        "height": int(copy.shape[0]),
        "true_geometry": truth,
        "detected": bool(finding.detected),
        "payload_valid": bool(finding.payload_valid),
        "same_payload": same,
        "false_alarm_probability": finding.false_alarm_probability,
        "log10_false_alarm_probability": round(finding.log10_false_alarm, 3),
        "message_psnr_db": None if finding.message_psnr_db is None else round(finding.message_psnr_db, 2),
        "scale_examined": (geom.get("level") or {}).get("view", "native") if finding.detected else None,
        "estimated_geometry": est,
        "rotation_error_deg": rot_err,
        "scale_error": scale_err,
        "geometry_ok": geom_ok,
        "seconds": round(seconds, 3),
        "payload_bits": finding.payload_bits,
    }


def _too_small(attack: Attack, copy: np.ndarray, truth: dict) -> dict:
    """The row of a copy too small to examine at all: not found."""
    return {
        "attack": attack.name, "family": attack.family, "params": attack.params,
        "width": int(copy.shape[1]), "height": int(copy.shape[0]), "true_geometry": truth,
        "detected": False, "payload_valid": False, "same_payload": False,
        "false_alarm_probability": 1.0, "log10_false_alarm_probability": 0.0,
        "message_psnr_db": None, "scale_examined": None, "estimated_geometry": None,
        "rotation_error_deg": None, "scale_error": None, "geometry_ok": False, "seconds": 0.0,
        "payload_bits": None, "note": f"copy below {detect.MIN_SIDE} px a side: not examined",
    }


def run_battery(marked_pixels: np.ndarray, seed: bytes, payload_check, *, quick: bool = False,
                threshold: float = detect.DEFAULT_THRESHOLD, workers: int = 1,
                progress: Callable[[dict], None] | None = None) -> list[dict]:
    """Run every attack of the battery on a marked picture and examine each copy.

    Parameters
    ----------
    marked_pixels : ndarray
        ``(H, W)`` or ``(H, W, 3)``, ``uint8`` or ``uint16`` (attacked as 8-bit).
    seed : bytes
        The owner's 32-byte detection seed.
    payload_check : callable
        Says whether decoded bits are a valid payload of this owner.
    quick : bool
        A shorter battery (one or two of each kind).
    progress : callable, optional
        Called with each row as soon as it is done.

    Returns
    -------
    list of dict
        One row per attack, the unattacked picture first: ``attack``,
        ``params``, ``true_geometry``, ``detected``, ``same_payload`` (the
        payload equals the one read from the unattacked picture),
        ``false_alarm_probability``, ``message_psnr_db``,
        ``estimated_geometry``, ``rotation_error_deg``, ``scale_error``,
        ``geometry_ok`` and more.
    """
    pixels = to_8bit(marked_pixels)
    rows = []
    reference = None
    for attack in battery(quick=quick):
        row = run_attack(attack, pixels, seed, payload_check, reference_bits=reference,
                         threshold=threshold, workers=workers)
        if attack.name == "none":
            reference = row["payload_bits"] if row["detected"] else None
            row["same_payload"] = None if reference is None else True
        rows.append(row)
        if progress is not None:
            progress(row)
    for row in rows:
        row.pop("payload_bits", None)
    return rows


def summary(rows: list[dict]) -> dict:
    """Counts for a one-line verdict.

    ``detected`` counts copies found with the payload read from the
    unattacked picture (or any valid payload when there is no reference);
    ``other_payload`` those found with a different one; ``missed`` names the
    copies not found at all.
    """
    same = [r for r in rows if r["detected"] and r["same_payload"] is not False]
    other = [r for r in rows if r["detected"] and r["same_payload"] is False]
    return {"attacks": len(rows), "detected": len(same),
            "other_payload": [r["attack"] for r in other],
            "geometry_ok": sum(1 for r in rows if r["geometry_ok"]),
            "missed": [r["attack"] for r in rows if not r["detected"]]}


# ---------------------------------------------------------------- picture of the results

_OK = (38, 122, 110)        # found, geometry right
_WARN = (214, 146, 36)      # found, geometry off or payload differs
_MISS = (178, 58, 50)       # not found
_INK = (30, 30, 30)
_FAINT = (150, 150, 150)
PLOT_CAP = 60.0             # -log10 of the bound shown at full length


def plot_png(rows: list[dict], *, title: str = "", threshold: float = detect.DEFAULT_THRESHOLD) -> bytes:
    """One bar per attack: strength of the evidence (-log10 of the false-alarm bound), PNG bytes.

    The bar's colour says whether the copy was found with the right payload
    and geometry; the dashed line marks the detection threshold; the text on
    the right gives the true and the estimated geometry.
    """
    from PIL import ImageDraw, ImageFont

    font = ImageFont.load_default(size=13)
    small = ImageFont.load_default(size=11)
    row_h, left, bar_w, right = 22, 200, 360, 330
    top = 52 if title else 30
    width = left + bar_w + right
    height = top + row_h * len(rows) + 66
    im = Image.new("RGB", (width, height), (255, 255, 255))
    d = ImageDraw.Draw(im)
    if title:
        d.text((12, 10), title, fill=_INK, font=font)
    d.text((left, top - 20), "evidence: -log10 of the false-alarm bound", fill=_FAINT, font=small)
    d.text((left + bar_w + 12, top - 20), "geometry: true -> estimated", fill=_FAINT, font=small)
    for i, r in enumerate(rows):
        y = top + i * row_h
        d.text((12, y + 4), r["attack"], fill=_INK, font=font)
        strength = min(PLOT_CAP, max(0.0, -float(r["log10_false_alarm_probability"])))
        if not r["detected"]:
            colour = _MISS
        elif r.get("same_payload") is False or not r["geometry_ok"]:
            colour = _WARN
        else:
            colour = _OK
        length = int(bar_w * strength / PLOT_CAP)
        d.rectangle([left, y + 4, left + max(length, 1), y + row_h - 4], fill=colour)
        d.text((left + bar_w + 12, y + 4), geometry_text(r), fill=_INK, font=small)
    # Threshold line and axis.
    x_thr = left + int(bar_w * min(PLOT_CAP, -math.log10(threshold)) / PLOT_CAP)
    y0, y1 = top, top + row_h * len(rows)
    for yy in range(y0, y1, 6):
        d.line([x_thr, yy, x_thr, min(yy + 3, y1)], fill=_INK)
    d.line([left, y1 + 2, left + bar_w, y1 + 2], fill=_FAINT)
    for v in (0, 20, 40, 60):
        x = left + int(bar_w * v / PLOT_CAP)
        d.line([x, y1 + 2, x, y1 + 6], fill=_FAINT)
        d.text((x - 6, y1 + 8), f"{v:g}" + ("+" if v == PLOT_CAP else ""), fill=_FAINT, font=small)
    d.text((x_thr + 4, y1 + 24), f"threshold {threshold:g}", fill=_INK, font=small)
    legend = [(_OK, "found, geometry right"), (_WARN, "found, geometry off or other payload"),
              (_MISS, "not found")]
    x = 12
    for colour, text in legend:
        d.rectangle([x, y1 + 46, x + 10, y1 + 56], fill=colour)
        d.text((x + 14, y1 + 44), text, fill=_INK, font=small)
        x += 170 if colour != _WARN else 230
    buf = io.BytesIO()
    im.save(buf, "PNG")
    return buf.getvalue()


def geometry_text(row: dict) -> str:
    """'true -> estimated' geometry of a battery row, in the short words of :mod:`claimkit.words`."""
    return (f"{words.geometry(row['true_geometry'], short=True)} -> "
            f"{words.geometry(row.get('estimated_geometry'), short=True)}")
