"""The dossier's figures, drawn with NumPy and Pillow from the stored findings.

Each figure is a pure function of stored data (the finding's arrays, the
exhibit, the registered file), so ``verify`` can draw it again and compare.
Text in figures uses the Bitstream Vera font that reportlab ships.
"""

from __future__ import annotations

import io
from functools import lru_cache
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFont

__all__ = [
    "aligned_figure",
    "colour_map",
    "decoy_figure",
    "message_figure",
    "png_bytes",
    "surface_figure",
    "thumbnail",
]

INK = (20, 24, 32)
GRID = (200, 204, 210)
ACCENT = (196, 64, 32)      # the observed score, the peak marker
BAR = (70, 110, 160)


@lru_cache(maxsize=8)
def _font(size: int, bold: bool = False) -> ImageFont.FreeTypeFont:
    import reportlab

    name = "VeraBd.ttf" if bold else "Vera.ttf"
    return ImageFont.truetype(str(Path(reportlab.__file__).parent / "fonts" / name), size)


def png_bytes(img: Image.Image) -> bytes:
    """PNG bytes, without time or software chunks (the same pixels give the same bytes)."""
    buf = io.BytesIO()
    img.save(buf, format="PNG", optimize=False, compress_level=6)
    return buf.getvalue()


def colour_map(values: np.ndarray, lo: float, hi: float) -> np.ndarray:
    """A dark-blue -> white -> orange ramp (our own), uint8 RGB."""
    t = np.clip((np.asarray(values, float) - lo) / max(hi - lo, 1e-12), 0, 1)
    stops = np.array([[18, 30, 72], [70, 110, 160], [240, 240, 236], [236, 150, 60],
                      [150, 40, 20]], float)
    pos = t * (len(stops) - 1)
    i = np.minimum(pos.astype(int), len(stops) - 2)
    f = (pos - i)[..., None]
    return (stops[i] * (1 - f) + stops[i + 1] * f).astype(np.uint8)


def _grey(arr: np.ndarray, lo: float | None = None, hi: float | None = None) -> np.ndarray:
    a = np.asarray(arr, float)
    lo = float(np.percentile(a, 0.5)) if lo is None else lo
    hi = float(np.percentile(a, 99.5)) if hi is None else hi
    return (np.clip((a - lo) / max(hi - lo, 1e-12), 0, 1) * 255).astype(np.uint8)


def _canvas(w: int, h: int) -> tuple[Image.Image, ImageDraw.ImageDraw]:
    img = Image.new("RGB", (w, h), (255, 255, 255))
    return img, ImageDraw.Draw(img)


def thumbnail(pixels: np.ndarray, side: int = 320) -> Image.Image:
    """The exhibit as a reader sees it, longer side ``side`` pixels."""
    a = np.asarray(pixels)
    if a.dtype == np.uint16:
        a = (a // 257).astype(np.uint8)
    img = Image.fromarray(a).convert("RGB")
    img.thumbnail((side, side), Image.Resampling.LANCZOS)
    return img


def message_figure(recovered: np.ndarray, reference: np.ndarray) -> Image.Image:
    """Recovered message beside the reference message template, same scale, 2x enlarged."""
    z = 2
    n = reference.shape[0] * z
    img, d = _canvas(2 * n + 60, n + 50)
    lo, hi = float(reference.min()), float(reference.max())
    for k, (arr, title) in enumerate(((recovered, "recovered from the copy"),
                                      (reference, "reference (from the key)"))):
        g = _grey(arr, lo, hi)
        tile = Image.fromarray(g).resize((n, n), Image.Resampling.NEAREST).convert("RGB")
        x = 20 + k * (n + 20)
        img.paste(tile, (x, 30))
        d.rectangle([x - 1, 29, x + n, 30 + n], outline=GRID)
        d.text((x, 8), title, fill=INK, font=_font(17))
    return img


def surface_figure(surface: np.ndarray) -> Image.Image:
    """Pilot score (z units) over every cyclic shift, with the peak marked and a colour scale."""
    s = np.asarray(surface, float)
    z = 3
    n = s.shape[0] * z
    hi = max(float(s.max()), 6.0)
    lo = min(float(s.min()), -hi / 2)
    img, d = _canvas(n + 150, n + 60)
    rgb = colour_map(s, lo, hi)
    img.paste(Image.fromarray(rgb).resize((n, n), Image.Resampling.NEAREST), (20, 40))
    r, c = np.unravel_index(int(np.argmax(s)), s.shape)
    cx, cy = 20 + c * z + z // 2, 40 + r * z + z // 2
    d.ellipse([cx - 9, cy - 9, cx + 9, cy + 9], outline=ACCENT, width=2)
    d.text((20, 10), f"peak z = {s.max():.1f}", fill=INK, font=_font(18))
    # Colour scale.
    bx = n + 50
    ramp = np.linspace(hi, lo, n)[:, None].repeat(20, axis=1)
    img.paste(Image.fromarray(colour_map(ramp, lo, hi)), (bx, 40))
    for v in np.linspace(lo, hi, 5):
        y = 40 + round(float((hi - v) / (hi - lo) * (n - 1)))
        d.line([bx + 20, y, bx + 26, y], fill=INK)
        d.text((bx + 30, y - 7), f"{v:.0f}", fill=INK, font=_font(16))
    d.text((bx - 10, 18), "z", fill=INK, font=_font(17, True))
    return img


def decoy_figure(decoy_scores: list[float], observed: float) -> Image.Image:
    """Histogram of the best score under each decoy key, with the observed score marked."""
    w, h = 640, 300
    img, d = _canvas(w, h)
    left, right, top, bottom = 60, w - 20, 30, h - 50
    scores = np.asarray(decoy_scores, float)
    xmax = max(observed, float(scores.max()) if scores.size else 0.0) * 1.08 + 0.5
    xmin = 0.0
    bins = np.linspace(xmin, xmax, 41)
    counts, _ = np.histogram(scores, bins=bins)
    cmax = max(int(counts.max()) if counts.size else 1, 1)

    def xpix(v: float) -> float:
        return left + (v - xmin) / (xmax - xmin) * (right - left)

    for i, cnt in enumerate(counts):
        if cnt:
            y = bottom - cnt / cmax * (bottom - top)
            d.rectangle([xpix(bins[i]) + 1, y, xpix(bins[i + 1]) - 1, bottom], fill=BAR)
    d.line([left, bottom, right, bottom], fill=INK)
    d.line([left, top, left, bottom], fill=INK)
    for v in np.linspace(xmin, xmax, 7):
        x = xpix(v)
        d.line([x, bottom, x, bottom + 5], fill=INK)
        d.text((x - 10, bottom + 8), f"{v:.0f}", fill=INK, font=_font(16))
    for v in (0, cmax):
        y = bottom - v / cmax * (bottom - top)
        d.text((left - 30, y - 7), f"{v}", fill=INK, font=_font(16))
    ox = xpix(observed)
    d.line([ox, top - 5, ox, bottom], fill=ACCENT, width=3)
    label = f"observed {observed:.1f}"
    tw = d.textlength(label, font=_font(17, True))
    d.text((min(ox + 6, right - tw), top - 22), label, fill=ACCENT, font=_font(17, True))
    d.text((left, h - 22), f"best score (z) under each of {scores.size} decoy keys",
           fill=INK, font=_font(17))
    return img


def aligned_figure(original: np.ndarray, aligned: np.ndarray, difference: np.ndarray,
                   mask: np.ndarray, crop_box_work: tuple[int, int, int, int] | None = None
                   ) -> Image.Image:
    """Original (working resolution), the copy aligned onto it, and the difference map."""
    panel = 300
    o = np.asarray(original, float)
    scale = panel / max(o.shape)
    size = (max(1, round(o.shape[1] * scale)), max(1, round(o.shape[0] * scale)))
    img, d = _canvas(3 * size[0] + 80, size[1] + 50)
    diff = np.asarray(difference, float)
    vmax = max(float(np.percentile(diff[mask], 99)) if mask.any() else 1.0, 8.0)
    panels = [
        (Image.fromarray(_grey(o, 0, 255)), "registered picture"),
        (Image.fromarray(np.where(mask, aligned, 235).astype(np.uint8)), "copy, aligned onto it"),
        (Image.fromarray(colour_map(np.where(mask, diff, 0), 0, vmax)),
         f"difference (0 to {vmax:.0f} grey levels)"),
    ]
    for k, (p, title) in enumerate(panels):
        x = 20 + k * (size[0] + 20)
        img.paste(p.convert("RGB").resize(size, Image.Resampling.LANCZOS), (x, 36))
        d.rectangle([x - 1, 35, x + size[0], 36 + size[1]], outline=GRID)
        d.text((x, 10), title, fill=INK, font=_font(17))
    if crop_box_work is not None:
        x0, y0, x1, y1 = (v * scale for v in crop_box_work)
        d.rectangle([20 + x0, 36 + y0, 20 + x1, 36 + y1], outline=ACCENT, width=2)
    return img
