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

from dataclasses import dataclass

import numpy as np

SAMPLE_ABOVE = 6_000_000     # beyond this many pixels, SSIM is computed on sampled patches
PATCH = 64


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
# Squares of 8-bit differences (each < 2**16) sum exactly in uint32 over this many samples.
U32_SQUARES = (2 ** 32 - 1) // 255 ** 2


def sum_of_squares_u8(sq: np.ndarray) -> int:
    """The exact sum of a contiguous ``uint16`` array of squared 8-bit differences.

    Summed per row (the first axis) in uint32 where a row's sum cannot reach
    2**32 (:data:`U32_SQUARES`), else in uint64 (~3x fewer bytes moved than
    int16 differences in int64).
    """
    row = sq.size // max(1, sq.shape[0])
    if row <= U32_SQUARES:
        return int(np.add.reduce(sq.reshape(sq.shape[0], row), axis=1,
                                 dtype=np.uint32).sum(dtype=np.uint64))
    return int(np.add.reduce(sq, axis=None, dtype=np.uint64))


def squared_error_sum(a: np.ndarray, b: np.ndarray) -> int:
    """Exact sum of ``(a - b)**2`` over two unsigned-integer arrays of one shape.

    For 8-bit arrays the absolute difference (``max - min``, 8 bits) is
    squared into 16 bits and summed in uint64; wider ones are differenced in
    int64 and multiplied and summed by ``einsum``. Either way a piece of rows
    at a time, so that no full-size temporary is made; every partial sum is
    far below 2**63 for photos.
    """
    a, b = np.asarray(a), np.asarray(b)
    if a.shape != b.shape or a.dtype != b.dtype or a.dtype.kind != "u":
        raise ValueError(f"need two unsigned arrays of one shape, got {a.dtype} {a.shape} "
                         f"and {b.dtype} {b.shape}")
    if a.ndim == 0 or a.size == 0:
        return int(np.sum((a.astype(np.int64) - b) ** 2))
    rows = max(1, _PIECE_SAMPLES // max(1, a[0].size))
    total = 0
    if a.dtype == np.uint8:
        # |a - b| fits in 8 bits and its square in 16: max - min, squared into uint16 and
        # summed exactly (sum_of_squares_u8).
        for r in range(0, a.shape[0], rows):
            pa, pb = a[r:r + rows], b[r:r + rows]
            d = np.maximum(pa, pb)
            d -= np.minimum(pa, pb)
            total += sum_of_squares_u8(np.multiply(d, d, dtype=np.uint16))
        return total
    for r in range(0, a.shape[0], rows):
        d = np.subtract(a[r:r + rows], b[r:r + rows], dtype=np.int64).ravel()
        total += int(np.einsum("i,i->", d, d, dtype=np.int64))
    return total


# The Gaussian window: sigma 1.5, truncated at 3.5 sigma (radius 5, 11 taps), as
# scipy.ndimage.gaussian_filter(..., 1.5, truncate=3.5) builds it, normalised to sum 1.
_RADIUS = 5
_TAPS = np.exp(-0.5 * (np.arange(-_RADIUS, _RADIUS + 1) / 1.5) ** 2)
_TAPS = (_TAPS / _TAPS.sum()).astype(np.float32)


def _window_mean_valid(z: np.ndarray) -> np.ndarray:
    """Gaussian-weighted local means over the last two axes, where the whole window lies inside.

    The mean SSIM leaves out ``_RADIUS`` pixels at each border (as
    scikit-image does), and there a filter with reflected borders and this one
    agree: no reflected sample reaches the kept pixels. So only the kept
    part is computed, separably, pairing the symmetric taps; sums in float32
    (scipy's filters sum in float64: the mean SSIM moves by about 1e-9).
    Leading axes (a stack of patches) are filtered each on its own.
    """
    for axis in (-2, -1):
        n = z.shape[axis] - 2 * _RADIUS

        def part(k: int, z=z, axis=axis, n=n) -> np.ndarray:
            return z[..., k:k + n, :] if axis == -2 else z[..., k:k + n]

        out = part(_RADIUS) * _TAPS[_RADIUS]
        pair = np.empty_like(out)
        for k in range(_RADIUS):
            np.add(part(k), part(2 * _RADIUS - k), out=pair)
            pair *= _TAPS[k]
            out += pair
        z = out
    return z


def _ssim_map(x: np.ndarray, y: np.ndarray, data_range: float) -> np.ndarray:
    """The SSIM map over the last two axes, without the ``_RADIUS`` border (float32).

    The five local moments are filtered as one stack (one pass of Python
    calls for a whole stack of patches); each is the same float32
    arithmetic as filtering it alone.
    """
    x, y = np.asarray(x, dtype=np.float32), np.asarray(y, dtype=np.float32)
    if min(x.shape[-2:]) <= 2 * _RADIUS:
        raise ValueError(f"SSIM needs more than {2 * _RADIUS} pixels a side, got {x.shape}")
    c1, c2 = (0.01 * data_range) ** 2, (0.03 * data_range) ** 2
    z = np.empty((5,) + x.shape, dtype=np.float32)
    z[0], z[1] = x, y
    np.multiply(x, x, out=z[2])
    np.multiply(y, y, out=z[3])
    np.multiply(x, y, out=z[4])
    mx, my, exx, eyy, exy = _window_mean_valid(z)
    vx = exx - mx * mx
    vy = eyy - my * my
    cxy = exy - mx * my
    return ((2 * mx * my + c1) * (2 * cxy + c2)) / ((mx * mx + my * my + c1) * (vx + vy + c2))


def _ssim_map_mean(x: np.ndarray, y: np.ndarray, data_range: float) -> float:
    return float(_ssim_map(x, y, data_range).astype(np.float64).mean())


# Sampled SSIM: one PATCH x PATCH patch in each cell of a grid of SAMPLE_GRID cells
# (long side x short side), at a seeded random place inside its cell: 192 patches of
# 64 x 64, 0.79 MP. Measured on five marked 24 MP pictures against their whole-picture
# SSIM, 60 placements each: rms error 3.8e-5 to 1.0e-4, the stated standard error on
# average 0.9 to 1.6 times the rms error, more than three of them off in 0 to 8 % of
# placements; the earlier 8 patches of 512 x 512 (2.1 MP): 4.5e-5 to 2.0e-4, 0.86 to 1.7,
# 0 to 22 %, at 2 to 2.5 times the CPU. A marked picture's SSIM has a long lower tail (a
# few small areas lose far more than the rest), which a sample may miss.
SAMPLE_GRID = (16, 12)
# Patches per stack filtered at once: five float32 moments of 16 patches stay in cache.
_STACK = 16


@dataclass(frozen=True)
class SsimEstimate:
    """Mean SSIM and how it was obtained.

    Attributes
    ----------
    value : float
        Mean SSIM (of the whole picture, or of the sampled patches).
    sampled : bool
        Whether ``value`` is the mean of sampled patches.
    standard_error : float or None
        With sampling, the standard error of ``value`` as an estimate of the
        whole picture's mean: the patches' sample standard deviation over
        the square root of their number (one patch per cell of a grid, so
        the spread between the picture's parts is counted too); None when
        the whole picture was measured.
    patches : tuple of tuple of int
        ``(row, col)`` of each patch's top-left corner (empty when whole).
    """

    value: float
    sampled: bool
    standard_error: float | None = None
    patches: tuple[tuple[int, int], ...] = ()


def ssim(a: np.ndarray, b: np.ndarray, *, data_range: float = 255.0, grey=None,
         rng: np.random.Generator | None = None) -> tuple[float, bool]:
    """Mean SSIM of two images and whether it was estimated from sampled patches.

    See :func:`ssim_estimate`, which also gives the sampling error.
    """
    est = ssim_estimate(a, b, data_range=data_range, grey=grey, rng=rng)
    return est.value, est.sampled


def sample_patches(shape: tuple[int, int], rng: np.random.Generator | None = None,
                   ) -> list[tuple[int, int]]:
    """Top-left corners of the sampled SSIM patches of a picture of ``shape``.

    One ``PATCH x PATCH`` patch per cell of a :data:`SAMPLE_GRID` grid (more
    cells along the longer side), row by row, each placed by ``rng``
    (default ``np.random.default_rng(0)``, so the sample repeats) anywhere
    inside its cell. Empty when a cell is smaller than a patch.
    """
    rng = rng or np.random.default_rng(0)
    h, w = shape
    long_cells, short_cells = SAMPLE_GRID
    rows, cols = (short_cells, long_cells) if w >= h else (long_cells, short_cells)
    if h // rows < PATCH or w // cols < PATCH:
        return []
    corners = []
    for i in range(rows):
        for j in range(cols):
            r_lo, r_hi = i * h // rows, (i + 1) * h // rows
            c_lo, c_hi = j * w // cols, (j + 1) * w // cols
            corners.append((int(rng.integers(r_lo, r_hi - PATCH + 1)),
                            int(rng.integers(c_lo, c_hi - PATCH + 1))))
    return corners


def ssim_estimate(a: np.ndarray, b: np.ndarray, *, data_range: float = 255.0, grey=None,
                  rng: np.random.Generator | None = None) -> SsimEstimate:
    """Mean SSIM of two images, from sampled patches on large pictures, with its error.

    ``grey`` (optional) turns a picture or a part of it into a grey float
    image (e.g. luma of RGB); when sampling it is applied to the patches only
    (stacked), so large photos are never converted whole. Pictures above
    ``SAMPLE_ABOVE`` pixels are measured on the patches of
    :func:`sample_patches` (each patch's mean SSIM, the mean of those) and
    the standard error of that estimate is given.
    """
    grey = grey or (lambda z: np.asarray(z, dtype=np.float32))
    h, w = np.shape(a)[:2]
    corners = sample_patches((h, w), rng) if h * w > SAMPLE_ABOVE else []
    if not corners:
        return SsimEstimate(_ssim_map_mean(grey(a), grey(b), data_range), False)
    vals = []
    for k in range(0, len(corners), _STACK):
        part = corners[k:k + _STACK]
        ga, gb = (grey(np.concatenate([z[r:r + PATCH, c:c + PATCH] for r, c in part]))
                  .reshape(len(part), PATCH, PATCH) for z in (a, b))
        vals.append(_ssim_map(ga, gb, data_range).astype(np.float64).mean(axis=(1, 2)))
    per_patch = np.concatenate(vals)
    se = float(np.std(per_patch, ddof=1) / np.sqrt(per_patch.size))
    return SsimEstimate(float(np.mean(per_patch)), True, se, tuple(corners))
