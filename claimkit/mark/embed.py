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

from concurrent.futures import Executor
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from claimkit.mark.format3 import EmbedKeys, macro_tile
from claimkit.mark.pattern import KeyPattern, key_pattern, mark_tile

SSIM_C2 = (0.03 * 255.0) ** 2       # the SSIM stabiliser for 8-bit data (Wang et al. 2004)
DEFAULT_LOCAL_SSIM = 0.988          # local SSIM the mask aims at
# Cap on the mean squared change (40 dB and more is usual for invisible marks: common practice,
# no single source).
DEFAULT_PSNR_DB = 42.4
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
    amp, step = mask_samples(luma, local_ssim=local_ssim, psnr_db=psnr_db)
    if step > 1:
        amp = np.repeat(np.repeat(amp, step, axis=0), step, axis=1)
    h, w = np.shape(luma)
    return amp[:h, :w]


def mask_step(shape: tuple[int, int]) -> int:
    """Sampling step of the mask: 2 above 4 megapixels (the mask is smooth), else 1."""
    return 2 if shape[0] * shape[1] > 4_000_000 else 1


def mask_samples(luma: np.ndarray, *, local_ssim: float = DEFAULT_LOCAL_SSIM,
                 psnr_db: float = DEFAULT_PSNR_DB,
                 executor: Executor | None = None) -> tuple[np.ndarray, int]:
    """The mask at its own resolution: amplitude at every ``step``-th row and column.

    Returns ``(amp, step)``; pixel ``(i, j)`` of the picture gets
    ``amp[i // step, j // step]``. :func:`perceptual_mask` is this, upsampled.
    With an ``executor`` the local mean is filtered on one of its threads
    while this one filters the local mean square (scipy's filters release
    the interpreter lock); the result is the same.
    """
    x = np.asarray(luma, dtype=np.float32)
    # Work at half resolution for large pictures: the mask is smooth anyway.
    step = mask_step(x.shape)
    xs = x[::step, ::step]
    size = MASK_WINDOW // step or 1
    # The mean square is filtered in place (each line of the filter is read before it is
    # written: the same numbers, one array fewer).
    mean_job = executor.submit(ndimage.uniform_filter, xs, size) if executor is not None else None
    m2 = np.square(xs)
    ndimage.uniform_filter(m2, size, output=m2)
    m = mean_job.result() if mean_job is not None else ndimage.uniform_filter(xs, size)
    # amp2 = (1/q - 1) (2 var + C2), var = max(m2 - m^2, 0), computed in place
    # (the same float32 operations as the out-of-place form, so the same bits).
    np.multiply(m, m, out=m)
    np.subtract(m2, m, out=m2)
    del m
    amp2 = np.maximum(m2, 0.0, out=m2)
    amp2 *= 2.0
    amp2 += SSIM_C2
    amp2 *= 1.0 / local_ssim - 1.0
    budget = psnr_budget(psnr_db)
    if float(amp2.mean()) > budget:
        if MASK_MODE == "scale":
            amp2 *= budget / float(amp2.mean())
        else:
            np.minimum(amp2, _water_level(amp2, budget), out=amp2)
    return np.sqrt(amp2, out=amp2), step


def psnr_budget(psnr_db: float, share: float = 1.0) -> float:
    """``share`` of the mean square change (grey levels squared) that ``psnr_db`` allows."""
    return share * 255.0 ** 2 / 10 ** (psnr_db / 10.0)


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


def apply_tiled(amp: np.ndarray, tile: np.ndarray) -> np.ndarray:
    """``amp * tiled(tile)`` computed in place on ``amp`` without building the tiled array.

    For a full-size mask (e.g. from :func:`perceptual_mask`); marking itself
    uses :class:`MarkPlan`, which gives the same products band by band.
    """
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


@dataclass(frozen=True)
class MarkPlan:
    """Everything needed to produce the mark's change, row band by row band.

    ``delta[i, j] = amp[i // step, j // step] * tile[i % T, j % T]``: the mask
    at its own resolution times the tiled period. Each of the ``step**2``
    sub-grids of a band (rows ``i = q mod step``, columns ``j = c mod
    step``) is one multiplication of whole mask rows by whole rows of the
    period repeated across the width, so neither the full-size mask nor the
    tiled pattern is ever built. A caller can add the change to a large photo
    band by band (see :func:`claimkit.workflow.mark_picture`);
    :func:`mark_delta` is the whole picture at once.

    Attributes
    ----------
    shape : (H, W)
        The picture's size.
    step : int
        Sampling step of the mask (:func:`mask_step`).
    amp : ndarray, (ceil(H/step), ceil(W/step)) float32
        The mask at its own resolution (:func:`mask_samples`).
    tile : ndarray, (T, T) float32
        One period of the mark, strength included.
    tile_rows : ndarray, (T, ceil(W/T)*T) float32
        The period repeated across the picture's width.
    """

    shape: tuple[int, int]
    step: int
    amp: np.ndarray
    tile: np.ndarray
    tile_rows: np.ndarray

    def rows(self, r0: int, r1: int, *, out: np.ndarray | None = None) -> np.ndarray:
        """Rows ``r0:r1`` of the change, ``(r1 - r0, W)`` float32."""
        h, w = self.shape
        if not 0 <= r0 <= r1 <= h:
            raise ValueError(f"rows {r0}:{r1} outside 0:{h}")
        if out is None:
            out = np.empty((r1 - r0, w), dtype=np.float32)
        period = self.tile.shape[0]
        c0 = r0
        while c0 < r1:  # pieces that stay within one period of rows
            c1 = min(r1, (c0 // period + 1) * period)
            self._fill(c0, c1, out[c0 - r0:c1 - r0])
            c0 = c1
        return out

    def _fill(self, c0: int, c1: int, dst: np.ndarray) -> None:
        # Rows c0..c1 lie within one period. Sub-grid (q, c) holds the rows
        # i = q (mod step) and columns j = c (mod step); there the mask row
        # is i // step and the mask column j // step, one per element.
        s, period = self.step, self.tile.shape[0]
        t0 = c0 % period
        for q in range(s):
            first = c0 + (-(c0 - q) % s)  # first row i >= c0 with i = q (mod s)
            if first >= c1:
                continue
            n = len(range(first, c1, s))
            amp = self.amp[first // s:first // s + n]
            for c in range(s):
                sub = dst[first - c0::s, c::s]
                np.multiply(amp[:, :sub.shape[1]],
                            self.tile_rows[t0 + first - c0:t0 + c1 - c0:s, c::s][:, :sub.shape[1]],
                            out=sub)


def period(keys: bytes | EmbedKeys, payload_bits: np.ndarray, *,
           sync_share: float | None = None) -> np.ndarray:
    """One period of the mark at unit RMS, float32.

    ``keys`` is a format-3 :class:`~claimkit.mark.format3.EmbedKeys` (the
    ``MACRO * TILE`` macro-cell, its synchronisation at ``sync_share`` of the
    energy, default the format's) or, for format 2, the 32-byte seed (one tile).
    """
    if isinstance(keys, EmbedKeys):
        if sync_share is not None:
            return macro_tile(keys, payload_bits, sync_share=sync_share)
        return macro_tile(keys, payload_bits)
    pattern: KeyPattern = key_pattern(keys)
    return np.asarray(mark_tile(pattern, pattern.codeword(payload_bits)), dtype=np.float32)


def mark_plan(luma: np.ndarray, seed: bytes | EmbedKeys, payload_bits: np.ndarray, *,
              strength: float = 1.0, local_ssim: float = DEFAULT_LOCAL_SSIM,
              psnr_db: float = DEFAULT_PSNR_DB, executor: Executor | None = None,
              mask: tuple[np.ndarray, int] | None = None,
              sync_share: float | None = None) -> MarkPlan:
    """The mask and the period for ``payload_bits`` under ``seed`` (see :class:`MarkPlan`).

    Parameters are those of :func:`mark_delta`; ``executor`` (optional) lends
    a thread to :func:`mask_samples`; ``mask`` is its result for ``luma``
    when the caller has it already; ``sync_share`` is given to :func:`period`.
    """
    e0 = period(seed, payload_bits, sync_share=sync_share)
    if strength != 1.0:
        e0 = e0 * np.float32(strength)
    amp, step = mask if mask is not None else mask_samples(
        luma, local_ssim=local_ssim, psnr_db=psnr_db, executor=executor)
    h, w = np.shape(luma)
    t0, t1 = e0.shape
    if t0 != t1 or t0 % step:
        raise ValueError(f"period {e0.shape} must be square and a multiple of the mask step {step}")
    return MarkPlan(shape=(h, w), step=step, amp=amp, tile=e0,
                    tile_rows=np.tile(e0, (1, -(-w // t0))))


def mark_delta(luma: np.ndarray, seed: bytes | EmbedKeys, payload_bits: np.ndarray, *,
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
    plan = mark_plan(luma, seed, payload_bits, strength=strength, local_ssim=local_ssim,
                     psnr_db=psnr_db)
    return plan.rows(0, plan.shape[0])


def embed_component(luma: np.ndarray, keys: bytes | EmbedKeys, payload_bits: np.ndarray, *,
                    strength: float = 1.0, psnr_db: float = DEFAULT_PSNR_DB) -> np.ndarray:
    """The change one level of the picture carries, for any luma array (a per-level entry point).

    Parameters
    ----------
    luma : ndarray, (H, W), 0..255 scale
        The level's luma (the picture itself, or a reduced copy of it).
    keys : EmbedKeys or bytes
        Format-3 keys of the work, or a format-2 seed.
    payload_bits : ndarray of 0/1, length 64
    strength : float
        Multiplies the masked amplitude.
    psnr_db : float
        The level's share of the energy budget, as a PSNR cap (:func:`perceptual_mask`).

    Returns
    -------
    ndarray, (H, W) float32
        The change in luma units. A multi-level mark splits ``psnr_db`` between its levels.
    """
    return mark_delta(luma, keys, payload_bits, strength=strength, psnr_db=psnr_db)
