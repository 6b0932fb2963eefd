"""Embedding: the tiled mark, shaped by a perceptual mask derived from SSIM.

The mark added to the luma is ``delta(x) = a(x) * E0(x mod T)`` where ``E0`` is
one period of ``zero-mean(M * C)`` (see :mod:`claimkit.mark.pattern`) and
``a(x)`` the local strength.

Why the mask has this form: for a noise-like mark of local variance ``a^2``
that is independent of the picture, the structure term of SSIM in a window
with picture variance ``s^2`` is about ``(2 s^2 + C2) / (2 s^2 + a^2 + C2)``
(the luminance term stays near 1). Asking that this be at least ``q`` gives
``a^2 <= (1/q - 1) (2 s^2 + C2)``: smooth skies get a faint mark, textured
areas a stronger one, and the global SSIM stays near ``q``. A global factor
then caps the mean squared change at the PSNR target.

References
----------
.. [1] Z. Wang, A. C. Bovik, H. R. Sheikh, E. P. Simoncelli, "Image quality
   assessment: from error visibility to structural similarity", IEEE Trans.
   Image Process. 13(4), 600-612, 2004. doi:10.1109/TIP.2003.819861
.. [2] S. Voloshynovskiy, A. Herrigel, N. Baumgaertner, T. Pun, "A stochastic
   approach to content adaptive digital image watermarking", Information
   Hiding 1999, LNCS 1768, 211-236. doi:10.1007/10719724_16
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from claimkit.mark.pattern import KeyPattern, key_pattern, mark_tile

SSIM_C2 = (0.03 * 255.0) ** 2       # the SSIM stabiliser for 8-bit data (Wang et al. 2004)
DEFAULT_LOCAL_SSIM = 0.988          # local SSIM the mask aims at
DEFAULT_PSNR_DB = 42.4              # cap on the mean squared change (40 dB+ is usual for invisible marks; common practice, no source)
MASK_WINDOW = 7
MASK_MODE = "level"     # "level": flat areas keep their full SSIM allowance; "scale": uniform scaling


def perceptual_mask(luma: np.ndarray, *, local_ssim: float = DEFAULT_LOCAL_SSIM,
                    psnr_db: float = DEFAULT_PSNR_DB) -> np.ndarray:
    """Local mark amplitude (0..255 units) for a luma image.

    Parameters
    ----------
    luma : ndarray, (H, W) float32, 0..255 scale
    local_ssim : float
        Target structural similarity in each 7x7 window.
    psnr_db : float
        Upper bound on the strength: the mean squared change never exceeds
        ``255**2 / 10**(psnr_db/10)``.

    Returns
    -------
    ndarray, (H, W) float32
    """
    x = np.asarray(luma, dtype=np.float32)
    # Work at half resolution for large pictures: the mask is smooth anyway.
    step = 2 if x.size > 4_000_000 else 1
    xs = x[::step, ::step]
    m = ndimage.uniform_filter(xs, MASK_WINDOW // step or 1)
    m2 = ndimage.uniform_filter(xs * xs, MASK_WINDOW // step or 1)
    var = np.maximum(m2 - m * m, 0.0)
    amp2 = (1.0 / local_ssim - 1.0) * (2.0 * var + SSIM_C2)
    budget = 255.0 ** 2 / 10 ** (psnr_db / 10.0)
    if float(amp2.mean()) > budget:
        if MASK_MODE == "scale":
            amp2 *= budget / float(amp2.mean())
        else:
            amp2 = np.minimum(amp2, _water_level(amp2, budget))
    amp = np.sqrt(amp2, dtype=np.float32)
    if step > 1:
        amp = np.repeat(np.repeat(amp, step, axis=0), step, axis=1)[: x.shape[0], : x.shape[1]]
    return amp


def _water_level(amp2: np.ndarray, budget: float) -> float:
    """The level A with mean(min(amp2, A)) == budget (bisection on a sample)."""
    sample = np.sort(amp2.ravel()[:: max(1, amp2.size // 200_000)])
    csum = np.cumsum(sample, dtype=np.float64)
    n = sample.size
    # mean(min(a, A)) for A = sample[i] is (csum[i] + sample[i] * (n - 1 - i)) / n
    means = (csum + sample * (n - 1 - np.arange(n))) / n
    i = int(np.searchsorted(means, budget))
    if i >= n:
        return float(sample[-1])
    lo_sum = csum[i - 1] if i > 0 else 0.0
    return float((budget * n - lo_sum) / (n - i))


def tiled(tile: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    """Repeat one period over ``shape`` with the period's origin at pixel (0, 0)."""
    n0, n1 = tile.shape
    reps = (-(-shape[0] // n0), -(-shape[1] // n1))
    return np.tile(tile, reps)[: shape[0], : shape[1]]


def mark_delta(luma: np.ndarray, seed: bytes, payload_bits: np.ndarray, *,
               strength: float = 1.0, local_ssim: float = DEFAULT_LOCAL_SSIM,
               psnr_db: float = DEFAULT_PSNR_DB) -> np.ndarray:
    """The change to add to the luma to carry ``payload_bits`` under ``seed``.

    Parameters
    ----------
    luma : ndarray, (H, W), 0..255 scale
    seed : bytes
        32-byte detection seed.
    payload_bits : ndarray of 0/1, length 64
    strength : float
        Multiplies the masked amplitude (1.0 is the default strength).

    Returns
    -------
    ndarray, (H, W) float32, in luma units (0..255 scale)
    """
    pattern: KeyPattern = key_pattern(seed)
    codeword = pattern.codeword(payload_bits)
    e0 = mark_tile(pattern, codeword)
    amp = perceptual_mask(luma, local_ssim=local_ssim, psnr_db=psnr_db)
    if strength != 1.0:
        e0 = e0 * np.float32(strength)
    return apply_tiled(amp, e0)


def apply_tiled(amp: np.ndarray, tile: np.ndarray) -> np.ndarray:
    """``amp * tiled(tile)`` computed in place on ``amp`` without building the tiled array."""
    n0, n1 = tile.shape
    h, w = amp.shape
    bh, bw = h - h % n0, w - w % n1
    if bh and bw:
        blocks = amp[:bh, :bw].reshape(bh // n0, n0, bw // n1, n1)
        blocks *= tile[None, :, None, :]
    if bh < h:
        amp[bh:, :] *= tiled(tile, (h, w))[bh:, :]
    if bw < w:
        amp[:bh, bw:] *= tiled(tile, (bh, w))[:, bw:]
    return amp
