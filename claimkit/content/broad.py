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
           "faint_share", "masked_ncc", "onto_grid"]

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
#: :func:`faint_share` measures local contrast on the registered picture reduced to this longer
#: side, over windows of :data:`CONTRAST_WINDOW` pixels: one window spans one pixel of the
#: broad grid.
CONTRAST_SIDE = 256
CONTRAST_WINDOW = 4
#: A window of the work whose luma spreads at least this much (standard deviation, 0..1; 12
#: grey levels) holds an edge or a texture that a copy keeps at this scale ...
STRONG_CONTRAST = 12 / 255
#: ... and a window of the exhibit below this (3 grey levels) is faint: four times less.
FAINT_CONTRAST = 3 / 255
#: Where some placement puts fewer of the work's strong windows under the exhibit, the
#: exhibit could be a copy of a plain part of the work, and nothing is said.
MIN_STRONG = 200


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


def _place(reference_luma: np.ndarray, exhibit_luma: np.ndarray, linear,
           side: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, float]:
    """Both pictures on the reference's grid of ``side`` pixels (reduced, smoothed): the
    exhibit turned, scaled and mirrored by ``linear``, its shift left to be searched.

    Returns the reference, the warped exhibit, where the exhibit is defined, the grid
    position of the warped exhibit's corner and the reference's reduction factor.
    """
    lin = np.asarray(linear, dtype=np.float64).reshape(2, 2)
    s_ref = side / max(np.shape(reference_luma)[:2])
    ref = _reduce(reference_luma, s_ref)
    scale = float(np.sqrt(abs(np.linalg.det(lin))))
    if not np.isfinite(scale) or scale <= 0:
        raise ValueError("the linear map must be invertible")
    # The exhibit reduced so that one of its pixels spans about one reference grid pixel,
    # then turned and mirrored into the reference grid's orientation.
    exh = _reduce(exhibit_luma, s_ref / scale)
    # reference grid (x, y) -> reduced exhibit (x, y)
    warped, inside, lo = onto_grid(exh, lin / scale, mode="constant")
    return ref, warped, inside, lo, s_ref


def onto_grid(exh: np.ndarray, g: np.ndarray, *,
              mode: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A reduced exhibit turned, scaled and mirrored onto a reference grid (bilinear).

    ``g`` maps grid (x, y) to reduced-exhibit (x, y); ``mode`` is how
    ``ndimage.affine_transform`` fills outside the exhibit. Returns the warped
    exhibit, where it is defined (bool), and the grid position of its corner.
    """
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
                                      mode=mode, cval=0.0)
    inside = ndimage.affine_transform(np.ones_like(exh), g_rc, offset=offset,
                                      output_shape=(ch, cw), order=0, mode="constant",
                                      cval=0.0) > 0.5
    return warped, inside, lo


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
    ref, warped, inside, lo, s_ref = _place(reference_luma, exhibit_luma, linear, BROAD_SIDE)
    ch, cw = warped.shape
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


def _local_contrast(a: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """Standard deviation of ``a`` over each :data:`CONTRAST_WINDOW`-pixel window, within ``mask``."""
    m = mask.astype(np.float64)
    w = ndimage.uniform_filter(m, CONTRAST_WINDOW, mode="constant")
    s1 = ndimage.uniform_filter(a * m, CONTRAST_WINDOW, mode="constant")
    s2 = ndimage.uniform_filter(a * a * m, CONTRAST_WINDOW, mode="constant")
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(w > 0, s1 / np.where(w > 0, w, 1.0), 0.0)
        var = np.where(w > 0, s2 / np.where(w > 0, w, 1.0), 0.0) - mean * mean
    return np.sqrt(np.clip(var, 0.0, None))


def faint_share(reference_luma: np.ndarray, exhibit_luma: np.ndarray,
                linear: np.ndarray | list, *, min_overlap: float = FALLBACK_OVERLAP) -> dict:
    """Where the work has strong local contrast, how much of it the exhibit shows faint.

    The exhibit is placed on the registered picture's grid by ``linear`` (the
    turn, scale and mirroring), and every shift covering at least
    ``min_overlap`` of the smaller picture is tried; where one of them puts
    fewer than :data:`MIN_STRONG` of the work's strong windows under the
    exhibit, it could be a copy of a plain part of the work, and nothing is
    said. At each shift, the share of the work's strong windows (local
    contrast :data:`STRONG_CONTRAST` or more) under the exhibit where the
    exhibit is faint (below :data:`FAINT_CONTRAST`) is counted; the statistic
    is the lowest share over the shifts, the placement most favourable to the
    exhibit. A copy keeps edges and textures at this scale through
    compression, noise, blur and tone changes; a flat picture (a ramp, a soft
    texture) that carries a transplanted mark does not have them where the
    work has. Unlike a correlation it is defined on flat pictures.

    Parameters
    ----------
    reference_luma, exhibit_luma : ndarray
        The registered picture and the exhibit (luma, 0..255 or 0..1).
    linear : array_like
        2 x 2 map from reference pixels to exhibit pixels in (x, y), y down.
    min_overlap : float
        Share of the smaller picture a shift must cover.

    Returns
    -------
    dict
        ``value`` (the lowest share, 0..1; None, with ``reason``, where some
        shift puts fewer than :data:`MIN_STRONG` strong windows under the
        exhibit, or where no shift overlaps enough), ``strong_windows`` (of the
        work, at the shift chosen), the settings.
    """
    from scipy import fft as sp_fft

    # Smoothed as the broad layout is (SMOOTH): the finest detail, where a transplanted mark
    # lives, does not count as contrast.
    ref, warped, inside, _, _ = _place(reference_luma, exhibit_luma, linear, CONTRAST_SIDE)
    # Windows wholly inside the exhibit only: its border is not a loss of contrast.
    inner = ndimage.binary_erosion(inside, iterations=CONTRAST_WINDOW)
    strong = (_local_contrast(ref, np.ones(ref.shape, bool)) >= STRONG_CONTRAST).astype(np.float64)
    faint = ((_local_contrast(warped, inside) < FAINT_CONTRAST) & inner).astype(np.float64)
    ins = inner.astype(np.float64)
    out: dict = {"side_px": CONTRAST_SIDE, "window_px": CONTRAST_WINDOW,
                 "strong": round(STRONG_CONTRAST * 255, 1), "faint": round(FAINT_CONTRAST * 255, 1),
                 "min_overlap": min_overlap, "value": None, "strong_windows": None}
    smaller = min(ref.size, int(ins.sum()))
    if smaller == 0:
        out["reason"] = "no placement overlaps enough"
        return out
    # Three correlations sharing their transforms (the counts are integers: rounded).
    shape = (ref.shape[0] + ins.shape[0] - 1, ref.shape[1] + ins.shape[1] - 1)
    fast = (sp_fft.next_fast_len(shape[0], real=True), sp_fft.next_fast_len(shape[1], real=True))

    def spectrum(a: np.ndarray, flip: bool) -> np.ndarray:
        return sp_fft.rfft2(a[::-1, ::-1] if flip else a, fast)

    f_ins, f_faint = spectrum(ins, True), spectrum(faint, True)
    f_ones, f_strong = spectrum(np.ones_like(ref), False), spectrum(strong, False)
    n, under, lost = (np.rint(sp_fft.irfft2(x * y, fast)[:shape[0], :shape[1]])
                      for x, y in ((f_ones, f_ins), (f_strong, f_ins), (f_strong, f_faint)))
    ok = n >= min_overlap * smaller
    if not ok.any():
        out["reason"] = "no placement overlaps enough"
        return out
    if (under[ok] < MIN_STRONG).any():
        # The exhibit could lie over a part of the work with little strong contrast (a crop
        # of its sky): nothing is said.
        out["reason"] = (f"some placement puts fewer than {MIN_STRONG} of the work's strong "
                         "windows under the exhibit")
        return out
    share = np.where(ok, lost / np.maximum(under, 1.0), np.inf)
    i, j = np.unravel_index(int(np.argmin(share)), share.shape)
    out.update(value=round(max(0.0, float(share[i, j])), 4), strong_windows=int(under[i, j]))
    return out
