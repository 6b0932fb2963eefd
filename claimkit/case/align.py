"""Align a disputed copy to the registered picture and measure what was changed.

The mark's geometry (the linear map from the original's grid to the copy's,
found by the examination) gives rotation, scale and mirroring; only the
translation is left, and it is found by masked normalised cross-correlation
in the Fourier domain [1]_, then refined to a tenth of a pixel [2]_. The copy
is then resampled onto the original's grid, and the two are compared by SSIM
[3]_ over the area they share, with a difference map.

All of it runs at a working resolution (the original scaled so that its
longer side is at most :data:`WORK_SIDE` pixels): enough to show what was
cropped and changed, and it keeps a 20-exhibit case quick. The working
resolution is recorded with the numbers.

References
----------
.. [1] D. Padfield, "Masked object registration in the Fourier domain",
   IEEE Trans. Image Process. 21(5), 2706-2718, 2012. doi:10.1109/TIP.2011.2181402
.. [2] M. Guizar-Sicairos, S. T. Thurman, J. R. Fienup, "Efficient subpixel
   image registration algorithms", Opt. Lett. 33(2), 156-158, 2008.
   doi:10.1364/OL.33.000156
.. [3] Z. Wang, A. C. Bovik, H. R. Sheikh, E. P. Simoncelli, "Image quality
   assessment: from error visibility to structural similarity", IEEE Trans.
   Image Process. 13(4), 600-612, 2004. doi:10.1109/TIP.2003.819861
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from claimkit.mark import scales

WORK_SIDE = 1024       # longer side of the working resolution, pixels
EDGE = 4               # pixels trimmed from the shared area's border before measuring


@dataclass
class Alignment:
    """Result of :func:`align`: numbers (JSON-ready) and the arrays the figures show."""

    numbers: dict
    aligned: np.ndarray      # uint8, the copy resampled onto the original's working grid
    difference: np.ndarray   # uint8, |original - aligned copy|, 0 outside the shared area
    mask: np.ndarray         # bool, where the copy covers the original


def _work_scale(shape) -> float:
    return min(1.0, WORK_SIDE / max(shape))


def _warp(copy: np.ndarray, lin: np.ndarray, t: np.ndarray, shape) -> tuple[np.ndarray, np.ndarray]:
    """Sample ``copy`` at ``lin @ (x, y) + t`` for every (x, y) of an array of ``shape``."""
    # ndimage works in (row, col); swap axes of the (x, y) map.
    swap = np.array([[0.0, 1.0], [1.0, 0.0]])
    m = swap @ lin @ swap
    off = swap @ t
    out = ndimage.affine_transform(copy, m, offset=off, output_shape=shape, order=1,
                                   mode="constant", cval=0.0)
    ones = ndimage.affine_transform(np.ones_like(copy), m, offset=off, output_shape=shape,
                                    order=0, mode="constant", cval=0.0)
    return out, ones > 0.5


def _translation(ref: np.ndarray, copy: np.ndarray, lin: np.ndarray) -> np.ndarray:
    """The copy position ``t`` of the working grid's origin, given the linear part."""
    h, w = copy.shape
    inv = np.linalg.inv(lin)
    corners = np.array([[0, 0], [w - 1, 0], [0, h - 1], [w - 1, h - 1]], dtype=float)
    foot = corners @ inv.T                      # copy corners in reference coordinates
    lo = np.floor(foot.min(axis=0)) - 2
    hi = np.ceil(foot.max(axis=0)) + 2
    shape = (int(hi[1] - lo[1]), int(hi[0] - lo[0]))
    # Copy de-rotated and de-scaled, on a canvas whose origin is ``lo`` in reference coordinates.
    canvas, cmask = _warp(copy, lin, lin @ lo, shape)
    H = max(shape[0], ref.shape[0])
    W = max(shape[1], ref.shape[1])
    a = np.zeros((H, W))
    am = np.zeros((H, W), bool)
    a[:ref.shape[0], :ref.shape[1]] = ref
    am[:ref.shape[0], :ref.shape[1]] = True
    b = np.zeros((H, W))
    bm = np.zeros((H, W), bool)
    b[:shape[0], :shape[1]] = canvas
    bm[:shape[0], :shape[1]] = cmask
    from skimage.registration import phase_cross_correlation

    shift = phase_cross_correlation(a, b, reference_mask=am, moving_mask=bm,
                                    overlap_ratio=0.05)[0]
    # b shifted by ``shift`` (row, col) lines up with a: canvas pixel p sits at p + shift.
    # canvas(p) = copy(lin (p + lo)) = ref(p + lo - lin^-1 t), and ref(x) = canvas(x - shift):
    # so lo - lin^-1 t = shift (as x, y), which gives t.
    return lin @ (lo - np.array([shift[1], shift[0]]))


def _measure(ref: np.ndarray, aligned: np.ndarray, mask: np.ndarray) -> tuple[float, np.ndarray]:
    inner = ndimage.binary_erosion(mask, iterations=EDGE)
    if inner.sum() < 49:
        return float("nan"), inner
    from skimage.metrics import structural_similarity

    _, smap = structural_similarity(ref, aligned, data_range=255.0, full=True)
    return float(smap[inner].mean()), inner


def align(reference_luma: np.ndarray, copy_luma: np.ndarray, geometry: dict | None, *,
          reference_scale: float = 1.0) -> Alignment:
    """Align ``copy_luma`` to ``reference_luma`` and measure their similarity.

    Parameters
    ----------
    reference_luma, copy_luma : ndarray
        Luma on a 0..255 scale (see :func:`claimkit.imageio.to_luma`).
    reference_scale : float
        Reference pixels per pixel of the registered picture: 1 for the
        registered file itself, below 1 for a reduced-resolution reference
        (:mod:`claimkit.case.reference`). Geometries come in, and the numbers go
        out (``work_scale``, ``crop_box_px``), in registered-picture pixels.
    geometry : dict or None
        A geometry (``matrix``: the original-to-copy linear map in (x, y) with
        y pointing down). With a ``source`` (the content line's registration)
        it is used as given; without one (the mark's lattice) the reading
        turned by 180 degrees is tried too. Without a geometry, the copy is
        assumed unrotated, and the scales 1, width ratio and height ratio are tried.

    Returns
    -------
    Alignment
    """
    # scikit-image is imported here, not with the module: `claimkit examine` imports the
    # case examination (for its content line) and aligns nothing.
    from skimage.registration import phase_cross_correlation
    from skimage.transform import rescale

    ref_full = np.asarray(reference_luma, dtype=np.float64)
    copy = np.asarray(copy_luma, dtype=np.float64)
    r = float(reference_scale)
    s = _work_scale(ref_full.shape)
    ref = rescale(ref_full, s, anti_aliasing=True, preserve_range=True) if s < 1 else ref_full
    registered_shape = (round(ref_full.shape[0] / r), round(ref_full.shape[1] / r))
    if geometry and geometry.get("level"):
        # Found at a coarse view: the matrix is against the original's coarse level.
        geometry = scales.relative_to_original(geometry, registered_shape)
    rw = copy.shape[1] / registered_shape[1]
    rh = copy.shape[0] / registered_shape[0]
    assumed = [(f"assumed scale {k:.4g}", np.eye(2) * k) for k in sorted({1.0, rw, rh})]
    if geometry and geometry.get("matrix") and geometry.get("source"):
        # A geometry from picture content is unambiguous, but read from smoothed keypoints it
        # can be a tenth of a degree off (a pixel at the edge of a large picture): a plain
        # resize, which the shapes suggest, is tried beside it, and the better overlay kept.
        candidates = [(str(geometry["source"]), np.asarray(geometry["matrix"], dtype=float))]
        candidates += assumed
    elif geometry and geometry.get("matrix"):
        m = np.asarray(geometry["matrix"], dtype=float)
        # A lattice looks the same turned by 180 degrees; try both readings.
        candidates = [("mark geometry", m), ("mark geometry, turned 180 degrees", -m)]
    else:
        candidates = assumed
    ref_half = rescale(ref, 0.5, anti_aliasing=True, preserve_range=True)
    copy_half = rescale(copy, 0.5, anti_aliasing=True, preserve_range=True)
    best = None
    for how, m in candidates:
        lin = m / (s * r)                # working-reference coordinates -> copy coordinates
        try:
            # Coarse translation at half the working resolution (the masked search is the
            # slow step); y = lin x + t at full scale is y/2 = lin (x/2) + t/2 at half scale.
            t = 2.0 * _translation(ref_half, copy_half, lin)
        except (ValueError, np.linalg.LinAlgError):
            continue
        aligned, mask = _warp(copy, lin, t, ref.shape)
        if mask.sum() < 64:
            continue
        # Sub-pixel refinement on the shared area (Guizar-Sicairos et al.), twice: the
        # second pass corrects what the resampling of the first left.
        for _ in range(2):
            fine = phase_cross_correlation(np.where(mask, ref, 0.0), np.where(mask, aligned, 0.0),
                                           upsample_factor=10)[0]
            if not np.all(np.abs(fine) <= 4) or not np.any(np.abs(fine) > 0.05):
                break
            t2 = t - lin @ np.array([fine[1], fine[0]])
            a2, m2 = _warp(copy, lin, t2, ref.shape)
            if m2.sum() < 64:
                break
            aligned, mask, t = a2, m2, t2
        score, inner = _measure(ref, aligned, mask)
        if np.isnan(score):
            continue
        if best is None or score > best[0]:
            best = (score, how, m, lin, t, aligned, mask, inner)
    if best is None:
        empty = np.zeros(ref.shape, np.uint8)
        return Alignment({"aligned": False, "reason": "the copy and the original share no area",
                          "work_scale": round(s * r, 6)}, empty, empty, np.zeros(ref.shape, bool))
    score, how, m, lin, t, aligned, mask, inner = best
    diff = np.where(mask, np.abs(ref - aligned), 0.0)
    # The copy's corners in original pixels: what part of the original it shows.
    h, w = copy.shape
    corners = np.array([[0, 0], [w, 0], [0, h], [w, h]], dtype=float)
    foot = (corners - t) @ np.linalg.inv(lin).T / (s * r)
    H, W = registered_shape
    x0, y0 = np.clip(foot.min(axis=0), 0, [W, H])
    x1, y1 = np.clip(foot.max(axis=0), 0, [W, H])
    shared = float(mask.mean())
    # Rotation and scale of the reading that aligned best (y points down on screen, so a
    # counter-clockwise turn of the picture has a negative angle in these coordinates).
    u, _, vt = np.linalg.svd(m)
    rot = u @ vt
    angle = float(np.degrees(np.arctan2(rot[1, 0], rot[0, 0])))
    numbers = {
        "aligned": True,
        "how": how,
        "work_scale": round(s * r, 6),      # working pixels per registered-picture pixel
        "work_size": [int(ref.shape[1]), int(ref.shape[0])],
        "rotation_deg": round(-angle, 2),
        "scale": round(float(np.sqrt(abs(np.linalg.det(m)))), 4),
        "mirrored": bool(np.linalg.det(m) < 0),
        "ssim": round(score, 4),
        "shared_area_fraction": round(shared, 4),
        "mean_abs_difference": round(float(diff[inner].mean()), 3),
        "p95_abs_difference": round(float(np.percentile(diff[inner], 95)), 3),
        "crop_box_px": [round(float(x0)), round(float(y0)), round(float(x1)), round(float(y1))],
        "translation_px": [round(float(v), 2) for v in t],
    }
    return Alignment(numbers, np.clip(aligned, 0, 255).astype(np.uint8),
                     np.clip(diff, 0, 255).astype(np.uint8), mask)
