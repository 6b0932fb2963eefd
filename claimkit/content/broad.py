"""Broad structure: does the exhibit, at a given geometry, share the work's low-frequency layout?

Keypoints (:mod:`claimkit.content.register`) need corners that repeat; a sky, a
soft texture or a heavily compressed copy has few, and then the content line
cannot decide. What such a picture still has is its broad layout: where it is
bright and where dark, at a few dozen pixels across. A copy keeps that layout
through compression, noise, blur and tone changes; an unrelated picture that
carries a transplanted mark shows its own.

:func:`broad_correlation` compares the two layouts once the exhibit's turn,
scale and mirroring are known (from the mark's geometry, or from the content
line's own registration), searching only the translation: both pictures are
reduced to :data:`BROAD_SIDE` pixels on the registered picture's longer side,
smoothed, and compared by the masked normalised cross-correlation of Padfield
[1]_ (the Pearson correlation over the pixels both pictures cover, at every
shift where they overlap by at least :data:`MIN_OVERLAP` of the smaller one).
The statistic is the highest such correlation.

What it can and cannot say. A low value means the exhibit, placed as the given
geometry places it, has nothing of the work's layout: genuine copies were
never measured that low (``calibration.json``, ``broad``). A high value does
not mean the exhibit shows the work: two skies, or any two pictures lit from
the top, share a layout. So the content line uses it to refute, and to confirm
only beside keypoint evidence above every unrelated pair measured.

References
----------
.. [1] D. Padfield, "Masked object registration in the Fourier domain",
   IEEE Trans. Image Process. 21(5), 2706-2718, 2012. doi:10.1109/TIP.2011.2181402
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

__all__ = ["BROAD_SIDE", "FALLBACK_OVERLAP", "MIN_OVERLAP", "MIN_PIXELS", "broad_correlation",
           "masked_ncc"]

#: Longer side, in pixels, the registered picture is reduced to; one pixel there spans
#: 1/64 of the picture, far coarser than JPEG blocks, noise or a 2-pixel blur.
BROAD_SIDE = 64
#: Gaussian smoothing at that size (pixels): removes the aliasing of the reduction and
#: the half-pixel error of searching whole-pixel shifts only.
SMOOTH = 1.0
#: Shifts where the two pictures overlap by less than this share of the smaller one are
#: not considered: a correlation over a sliver rests on a handful of pixels.
MIN_OVERLAP = 0.9
#: Where no shift reaches :data:`MIN_OVERLAP` (the two pictures' shapes differ, as a 500 x 500
#: work and a 600 x 450 exhibit at the same scale do), the caller may search the shifts covering
#: at least this share instead (``layout_check`` does at the mark's geometry, and says so).
#: Searching more shifts can only raise the highest correlation: it refutes less readily.
FALLBACK_OVERLAP = 0.5
#: ... and by less than this many grid pixels (a quarter of the picture at 64 x 48 is 768):
#: a web-sized exhibit placed as a tiny part of the work would otherwise be compared over a
#: few dozen pixels, where a high correlation is cheap.
MIN_PIXELS = 200
#: Luma spread (0..1) below which a picture has no broad structure to compare (about
#: one grey level in 255).
FLAT = 0.004
#: A work whose broad layout spreads at least this much (ten grey levels) has a layout no
#: copy loses: an exhibit flat where such a work is not shares nothing of it (value 0).
STRUCTURED = 10 * FLAT


def _xcorr(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Full 2-D cross-correlation sum_x a(x) b(x - d) for every shift d (by FFT)."""
    from scipy.signal import fftconvolve  # here: scipy.signal takes ~0.3 s to import
    return fftconvolve(a, b[::-1, ::-1], mode="full")


def masked_ncc(fixed: np.ndarray, fixed_mask: np.ndarray, moving: np.ndarray,
               moving_mask: np.ndarray, *, min_overlap: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """Pearson correlation over the shared pixels at every shift, and the shared count.

    Parameters
    ----------
    fixed, moving : ndarray
        2-D pictures.
    fixed_mask, moving_mask : ndarray of bool
        Where each picture is defined.
    min_overlap : int
        Shifts sharing fewer pixels get NaN.

    Returns
    -------
    ncc, overlap : ndarray
        Arrays of shape ``(Hf + Hm - 1, Wf + Wm - 1)``; index ``(i, j)`` is the
        moving picture shifted by ``(i - Hm + 1, j - Wm + 1)`` over the fixed one.
        Where either picture is flat over the shared pixels the correlation is
        NaN.

    Notes
    -----
    Padfield's formulation [1]_: every sum over the overlap is one FFT
    correlation of masked pictures.
    """
    mf = np.asarray(fixed_mask, dtype=np.float64)
    mm = np.asarray(moving_mask, dtype=np.float64)
    f = np.asarray(fixed, dtype=np.float64) * mf
    m = np.asarray(moving, dtype=np.float64) * mm
    n = np.rint(_xcorr(mf, mm))
    sf, sm = _xcorr(f, mm), _xcorr(mf, m)
    sff, smm = _xcorr(f * f, mm), _xcorr(mf, m * m)
    sfm = _xcorr(f, m)
    with np.errstate(invalid="ignore", divide="ignore"):
        vf = sff - sf * sf / n
        vm = smm - sm * sm / n
        ok = (n >= max(min_overlap, 2)) & (vf > (FLAT ** 2) * n) & (vm > (FLAT ** 2) * n)
        ncc = np.where(ok, (sfm - sf * sm / n) / np.sqrt(np.where(ok, vf * vm, 1.0)), np.nan)
    return np.clip(ncc, -1.0, 1.0), n


def _reduce(luma: np.ndarray, factor: float) -> np.ndarray:
    a = np.asarray(luma, dtype=np.float64)
    a = a / (255.0 if float(a.max(initial=0.0)) > 1.0 else 1.0)
    if factor != 1.0:
        from skimage.transform import rescale

        a = rescale(a, factor, anti_aliasing=factor < 1.0, preserve_range=True, order=1)
    return ndimage.gaussian_filter(a, SMOOTH)


def broad_correlation(reference_luma: np.ndarray, exhibit_luma: np.ndarray,
                      linear: np.ndarray | list, *, min_overlap: float = MIN_OVERLAP) -> dict:
    """Highest correlation of the two broad layouts over translations, at a given linear map.

    Parameters
    ----------
    reference_luma, exhibit_luma : ndarray
        The registered picture and the exhibit (luma, 0..255 or 0..1).
    linear : array_like
        2 x 2 map from reference pixels to exhibit pixels in (x, y), y down:
        the turn, scale, aspect and mirroring; the translation is searched.
    min_overlap : float
        Share of the smaller picture a searched shift must cover
        (:data:`MIN_OVERLAP`, or :data:`FALLBACK_OVERLAP` where no shift reaches it).

    Returns
    -------
    dict
        ``value`` (the highest correlation; 0 where the exhibit is flat and
        the work spreads over :data:`STRUCTURED` or more; None where the work
        is flat, the exhibit flat beside a faint work, or no placement keeps
        the overlap), ``shift_px`` (where
        the exhibit's top-left pixel lies on the registered picture at that
        value, in its pixels, to a grid pixel), ``overlap`` (share
        of the smaller picture covered there), ``work_flat`` and ``exhibit_flat``.
    """
    lin = np.asarray(linear, dtype=np.float64).reshape(2, 2)
    ref_shape = np.shape(reference_luma)[:2]
    s_ref = BROAD_SIDE / max(ref_shape)
    ref = _reduce(reference_luma, s_ref)
    scale = float(np.sqrt(abs(np.linalg.det(lin))))
    if not np.isfinite(scale) or scale <= 0:
        raise ValueError("the linear map must be invertible")
    # The exhibit reduced so that one of its pixels spans about one reference grid pixel,
    # then turned and mirrored into the reference grid's orientation.
    f_exh = s_ref / scale
    exh = _reduce(exhibit_luma, f_exh)
    # reference grid (x, y) -> reduced exhibit (x, y)
    g = lin / scale
    eh, ew = exh.shape
    corners = np.array([[0, 0], [ew - 1, 0], [0, eh - 1], [ew - 1, eh - 1]], dtype=np.float64)
    back = corners @ np.linalg.inv(g).T            # the exhibit's corners on the reference grid
    lo = np.floor(back.min(axis=0))
    hi = np.ceil(back.max(axis=0))
    cw, ch = int(hi[0] - lo[0]) + 1, int(hi[1] - lo[1]) + 1
    # ndimage works in (row, col): output (r, c) -> input (row, col) = G_rc @ (r, c) + offset
    swap = np.array([[0.0, 1.0], [1.0, 0.0]])
    g_rc = swap @ g @ swap
    offset = g_rc @ lo[::-1]
    warped = ndimage.affine_transform(exh, g_rc, offset=offset, output_shape=(ch, cw), order=1,
                                      mode="constant", cval=0.0)
    inside = ndimage.affine_transform(np.ones_like(exh), g_rc, offset=offset,
                                      output_shape=(ch, cw), order=0, mode="constant",
                                      cval=0.0) > 0.5
    inside = ndimage.binary_erosion(inside, iterations=1)
    ref_mask = np.ones(ref.shape, dtype=bool)
    smaller = min(int(ref_mask.sum()), int(inside.sum()))
    work_flat = bool(np.std(ref) < FLAT)
    exhibit_flat = bool(inside.sum() < 2 or np.std(warped[inside]) < FLAT)
    out = {"side_px": BROAD_SIDE, "min_overlap": min_overlap, "work_flat": work_flat,
           "exhibit_flat": exhibit_flat, "value": None, "shift_px": None, "overlap": None}
    if smaller < MIN_PIXELS or work_flat:
        return out
    if exhibit_flat:
        if float(np.std(ref)) >= STRUCTURED:
            out.update(value=0.0, overlap=None)
        return out
    ncc, n = masked_ncc(ref, ref_mask, warped, inside,
                        min_overlap=max(MIN_PIXELS, int(np.ceil(min_overlap * smaller))))
    if not np.isfinite(ncc).any():
        return out
    i, j = np.unravel_index(int(np.nanargmax(ncc)), ncc.shape)
    dy, dx = i - (ch - 1), j - (cw - 1)
    out.update(value=round(float(ncc[i, j]), 4),
               shift_px=[round(float((dx - lo[0]) / s_ref), 1), round(float((dy - lo[1]) / s_ref), 1)],
               overlap=round(float(n[i, j]) / smaller, 3))
    return out
