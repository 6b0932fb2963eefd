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

    Integer images are differenced in chunks of rows with exact integer
    arithmetic, so a 24-megapixel photo needs no float64 copies.
    """
    a, b = np.asarray(a), np.asarray(b)
    if a.dtype.kind == "u" and b.dtype == a.dtype:
        total = 0
        for r in range(0, a.shape[0], 256):
            d = (a[r:r + 256].astype(np.int64) - b[r:r + 256]).ravel()
            total += int(d @ d)
        mse = total / a.size
    else:
        mse = float(np.mean((a.astype(np.float64) - b.astype(np.float64)) ** 2))
    return float("inf") if mse == 0 else 10.0 * np.log10(peak * peak / mse)


def _ssim_map_mean(x: np.ndarray, y: np.ndarray, data_range: float) -> float:
    f = lambda z: ndimage.gaussian_filter(z, 1.5, truncate=3.5, mode="reflect")
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
