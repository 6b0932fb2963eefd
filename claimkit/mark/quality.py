"""Image-quality measures for reporting what marking did to a picture.

``ssim`` follows Wang et al. (2004) with an 11-tap Gaussian window of sigma
1.5 and population covariances, the same definition as
``skimage.metrics.structural_similarity(..., gaussian_weights=True,
sigma=1.5, use_sample_covariance=False)``, against which it is tested; it
is written here in float32 with separable filtering so that large photos are
affordable.

References
----------
.. [1] Z. Wang, A. C. Bovik, H. R. Sheikh, E. P. Simoncelli, "Image quality
   assessment: from error visibility to structural similarity", IEEE Trans.
   Image Process. 13(4), 600-612, 2004. doi:10.1109/TIP.2003.819861
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

SAMPLE_ABOVE = 6_000_000     # beyond this many pixels, SSIM is computed on sampled patches
PATCH = 512


def psnr(a: np.ndarray, b: np.ndarray, *, peak: float) -> float:
    """Peak signal-to-noise ratio in dB (inf for identical inputs).

    Integer images are differenced with exact arithmetic (see
    :func:`squared_error_sum`), so a 24-megapixel photo needs no float64
    copies.
    """
    a, b = np.asarray(a), np.asarray(b)
    if a.dtype.kind == "u" and b.dtype == a.dtype:
        return psnr_from_sse(squared_error_sum(a, b), a.size, peak=peak)
    mse = float(np.mean((a.astype(np.float64) - b.astype(np.float64)) ** 2))
    return float("inf") if mse == 0 else 10.0 * np.log10(peak * peak / mse)


def psnr_from_sse(sse: int, count: int, *, peak: float) -> float:
    """PSNR in dB from an exact sum of squared errors over ``count`` samples."""
    mse = sse / count
    return float("inf") if mse == 0 else 10.0 * np.log10(peak * peak / mse)


# Rows per piece below: ~256k samples, so the float copies stay in cache.
_PIECE_SAMPLES = 262_144


def squared_error_sum(a: np.ndarray, b: np.ndarray) -> int:
    """Exact sum of ``(a - b)**2`` over two unsigned-integer arrays of one shape.

    Differences are taken in a signed type wide enough to hold them (int16
    for 8-bit, else int64) and multiplied and summed in int64 by ``einsum``,
    a piece of rows at a time so that no full-size temporary is made; every
    partial sum is far below 2**63 for photos.
    """
    a, b = np.asarray(a), np.asarray(b)
    if a.shape != b.shape or a.dtype != b.dtype or a.dtype.kind != "u":
        raise ValueError(f"need two unsigned arrays of one shape, got {a.dtype} {a.shape} "
                         f"and {b.dtype} {b.shape}")
    if a.ndim == 0 or a.size == 0:
        return int(np.sum((a.astype(np.int64) - b) ** 2))
    rows = max(1, _PIECE_SAMPLES // max(1, a[0].size))
    diff_type = np.int16 if a.dtype.itemsize == 1 else np.int64
    total = 0
    for r in range(0, a.shape[0], rows):
        d = np.subtract(a[r:r + rows], b[r:r + rows], dtype=diff_type).ravel()
        total += int(np.einsum("i,i->", d, d, dtype=np.int64))
    return total


def _ssim_map_mean(x: np.ndarray, y: np.ndarray, data_range: float) -> float:
    def f(z):
        return ndimage.gaussian_filter(z, 1.5, truncate=3.5, mode="reflect")

    c1, c2 = (0.01 * data_range) ** 2, (0.03 * data_range) ** 2
    mx, my = f(x), f(y)
    vx = f(x * x) - mx * mx
    vy = f(y * y) - my * my
    cxy = f(x * y) - mx * my
    s = ((2 * mx * my + c1) * (2 * cxy + c2)) / ((mx * mx + my * my + c1) * (vx + vy + c2))
    pad = 5  # skimage crops (win_size - 1) // 2 from each border before averaging
    return float(s[pad:-pad, pad:-pad].astype(np.float64).mean())


def ssim(a: np.ndarray, b: np.ndarray, *, data_range: float = 255.0, grey=None,
         rng: np.random.Generator | None = None) -> tuple[float, bool]:
    """Mean SSIM of two images and whether it was estimated from sampled patches.

    ``grey`` (optional) turns a picture or a patch of it into a grey float
    image (e.g. luma of RGB); it is applied to patches only when sampling, so
    large photos are never converted whole. Pictures above ``SAMPLE_ABOVE``
    pixels are measured on 24 random ``PATCH x PATCH`` patches (a seeded
    generator, so the result repeats).
    """
    grey = grey or (lambda z: np.asarray(z, dtype=np.float32))
    h, w = np.shape(a)[:2]
    if h * w <= SAMPLE_ABOVE or min(h, w) < 2 * PATCH:
        return _ssim_map_mean(grey(a), grey(b), data_range), False
    rng = rng or np.random.default_rng(0)
    vals = []
    for _ in range(24):
        r = int(rng.integers(0, h - PATCH))
        c = int(rng.integers(0, w - PATCH))
        win = (slice(r, r + PATCH), slice(c, c + PATCH))
        vals.append(_ssim_map_mean(grey(a[win]), grey(b[win]), data_range))
    return float(np.mean(vals)), True
