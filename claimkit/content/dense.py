"""The dense reading: the two pictures' broad layouts registered to each other, every placement tried.

The keypoint readings (:mod:`claimkit.content.register`) need corners that
repeat; a soft texture, smoothed noise without edges, has none once the mark is
kept out of them, yet its light and dark patches, tens of pixels across, are
plain to see and survive every edit a copy undergoes. This reading compares
those patches directly:

* both pictures are reduced so that the registered picture's longer side is
  :data:`COARSE_GRID` (then :data:`FINE_GRID`) pixels, and smoothed by a
  Gaussian of :data:`SMOOTH` of that side;
* what is compared is the luma's gradient there (two components per pixel):
  a uniform ramp (a sky's fall-off, a vignette) becomes a constant, which the
  correlation's mean removes, so two ramps do not correlate;
* every hypothesis of a similarity with or without mirroring is tried: the
  turn in steps of :data:`COARSE_STEP_DEG`, the scale in steps of
  :data:`SCALE_STEP` over the range where the exhibit shows between
  :data:`MIN_AREA` and :data:`MAX_AREA` of the registered picture's area, and
  for each every shift, by the masked normalised cross-correlation of Padfield
  [1]_ computed with FFTs; a shift counts only where :data:`INSIDE` of the
  exhibit lies on the picture (a copy shows a part of the work, not a sliver of
  it) and where the work under the exhibit, and the exhibit at the size the
  placement gives it, each hold :data:`MIN_PATCHES` light or dark patches;
* the :data:`KEEP` best hypotheses are searched again at :data:`FINE_GRID`
  around their turn and scale; the statistic is the highest correlation found,
  the same maximum over the same search for every pair of pictures, which is
  what the calibration's null counts (``calibration.json``, ``dense``).

What it does not use: the mark's key, payload or geometry. And what the mark
leaves in the pixels does not reach it: the mark's tile repeats every 128
pixels of the registered picture and spreads its power over every frequency of
that tile, about one grey level in all on a plain picture; after the reduction
and the Gaussian of :data:`SMOOTH` of the side (10 pixels on a 640-pixel
picture) a plain grey picture, marked, varies by 0.077 grey levels. Where a
picture's broad layout varies by less than :data:`MIN_STRUCTURE` grey levels
about its best-fitting plane (:func:`structure`), the reading says nothing: a
clear sky (0.08; 0.11 marked), a plain or a ramp host.

It only ever supports correspondence: below its threshold the content line
still cannot decide. Cost: about 1400 hypotheses at :data:`COARSE_GRID` and 90
at :data:`FINE_GRID`, 2 to 3 seconds per pair on one core of a shared machine
(``benchmarks/bench_content.py --dense-only`` records the whole run's time).

References
----------
.. [1] D. Padfield, "Masked object registration in the Fourier domain",
   IEEE Trans. Image Process. 21(5), 2706-2718, 2012. doi:10.1109/TIP.2011.2181402
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from claimkit.content import register as reg
from claimkit.content.broad import onto_grid

__all__ = ["COARSE_GRID", "FINE_GRID", "dense_register", "structure"]

#: Longer side (pixels) of the registered picture in the exhaustive search, and in the refinement.
COARSE_GRID = 32
FINE_GRID = 64
#: Gaussian smoothing, as a share of the registered picture's longer side (1/64: one pixel of
#: :data:`FINE_GRID`, 10 pixels of a 640-pixel picture).
SMOOTH = 1.0 / 64
#: Turn steps (degrees) of the exhaustive search and of the refinement around its best.
COARSE_STEP_DEG = 6.0
FINE_STEPS_DEG = (-4.0, -2.0, 0.0, 2.0, 4.0)
#: Scale steps (ratio) of the exhaustive search and of the refinement.
SCALE_STEP = 1.1
FINE_SCALES = (1 / 1.05, 1.0, 1.05)
#: The exhibit placed on the registered picture covers between these shares of its area.
MIN_AREA = 0.2
MAX_AREA = 1.25
#: Share of the exhibit that must lie on the registered picture at a shift counted.
INSIDE = 0.8
#: Least pixels of :data:`COARSE_GRID` / :data:`FINE_GRID` shared at a shift counted.
MIN_SHARED = (60, 240)
#: Hypotheses carried from the exhaustive search into the refinement.
KEEP = 6
#: Hypotheses transformed together (small enough to stay in the processor's cache).
BATCH = 8
#: A placement counts only where the part of the work under the exhibit, and the exhibit at the
#: size the placement gives it, each hold at least this many light or dark patches
#: (:func:`_patch_map`, counted at :data:`FINE_GRID`): a smooth bump or two matches almost
#: anything once turn, scale and shift are free (measured before the rule: a quarter of a
#: 160 x 120 soft texture, two patches, reached 0.99 against another soft texture; scikit-image's
#: clock, six patches, 0.89 against its cell).
MIN_PATCHES = 8
#: Least span (grey levels over 5 x 5 pixels of :data:`FINE_GRID`) around an extreme for it to be
#: a patch: what :data:`MIN_STRUCTURE` asks of a whole picture.
PATCH_CONTRAST = 0.25
#: Longer side (pixels) both pictures are first reduced to: four times :data:`FINE_GRID`, so
#: every grid is still reduced from a sharper picture.
WORKING = 256
#: Least structure (:func:`structure`: grey levels about the best-fitting plane, at
#: :data:`FINE_GRID`) a picture needs for the reading to say anything; three times what the mark
#: alone leaves on a plain grey picture (0.077), above a clear sky (0.08, marked 0.11).
MIN_STRUCTURE = 0.25


@dataclass(frozen=True)
class _Fixed:
    """The registered picture on one grid: gradient, mask, and their transforms at one size."""

    grad: np.ndarray      # (2, H, W)
    mask: np.ndarray      # (H, W) float
    shape: tuple[int, int]
    fft_shape: tuple[int, int]
    f_mask: np.ndarray
    f_grad: np.ndarray    # (2, ...)
    f_sq: np.ndarray
    f_patch: np.ndarray   # transform of the work's patch map (:func:`_patches`)


def _luma01(a: np.ndarray) -> tuple[np.ndarray, float]:
    """Luma on a 0..255 scale, reduced (anti-aliased) to at most :data:`WORKING` pixels on its
    longer side, and the reduction's factor: every grid is reduced from this."""
    a = np.asarray(a, dtype=np.float64)
    if a.ndim != 2 or min(a.shape) < 16:
        raise ValueError(f"luma must be 2-D and at least 16 px a side, got {a.shape}")
    a = a if float(a.max(initial=0.0)) > 1.0 else a * 255.0
    f = min(1.0, WORKING / max(a.shape))
    if f < 1.0:
        from skimage.transform import rescale

        a = rescale(a, f, anti_aliasing=True, preserve_range=True, order=1)
    return a, f


def _reduce(a: np.ndarray, factor: float, grid: int) -> np.ndarray:
    """``a`` reduced by ``factor`` (anti-aliased) and smoothed by :data:`SMOOTH` of ``grid``."""
    from skimage.transform import rescale

    if factor != 1.0:
        a = rescale(a, factor, anti_aliasing=factor < 1.0, preserve_range=True, order=1)
    return ndimage.gaussian_filter(a, SMOOTH * grid, mode="nearest")


def _gradient(a: np.ndarray) -> np.ndarray:
    gy, gx = np.gradient(a)
    return np.stack([gx, gy])


def structure(luma: np.ndarray) -> float:
    """Root-mean-square deviation (grey levels) of the broad layout from its best-fitting plane.

    The picture reduced to a longer side of :data:`FINE_GRID` pixels and smoothed
    as the reading smooths it; a ramp or a uniform fall-off of light (the plane)
    is not structure the reading can register.
    """
    return _structure(_luma01(luma)[0])


def _structure(a: np.ndarray) -> float:
    r = _reduce(a, FINE_GRID / max(a.shape), FINE_GRID)
    yy, xx = np.mgrid[0:r.shape[0], 0:r.shape[1]]
    design = np.stack([np.ones(r.size), xx.ravel(), yy.ravel()], axis=1)
    coef, *_ = np.linalg.lstsq(design, r.ravel(), rcond=None)
    return float(np.sqrt(np.mean((r.ravel() - design @ coef) ** 2)))


def _patches(ref: np.ndarray) -> np.ndarray:
    """The work's light and dark patches at :data:`FINE_GRID` (:func:`_patch_map`)."""
    return _patch_map(_reduce(ref, FINE_GRID / max(ref.shape), FINE_GRID))


def _patch_map(r: np.ndarray) -> np.ndarray:
    """Light and dark patches of a reduced, smoothed picture: local extremes (3 x 3) that stand
    :data:`PATCH_CONTRAST` grey levels or more from the other end of their 5 x 5 surroundings,
    the border pixels left out."""
    top, low = (ndimage.maximum_filter(r, 3, mode="nearest"),
                ndimage.minimum_filter(r, 3, mode="nearest"))
    span = ndimage.maximum_filter(r, 5, mode="nearest") - ndimage.minimum_filter(r, 5, mode="nearest")
    out = ((r == top) | (r == low)) & (span >= PATCH_CONTRAST)
    out[[0, -1], :] = False
    out[:, [0, -1]] = False
    return out


def _fixed(ref: np.ndarray, grid: int, pad: int) -> _Fixed:
    from scipy import fft as sp_fft

    r = _reduce(ref, grid / max(ref.shape), grid)
    k = FINE_GRID // grid
    fine = _patches(ref).astype(np.float64)
    fine = np.pad(fine, ((0, (-fine.shape[0]) % k), (0, (-fine.shape[1]) % k)))
    # Counted on the fine grid and summed over its k x k blocks on a coarser one.
    patch = fine.reshape(fine.shape[0] // k, k, fine.shape[1] // k, k).sum(axis=(1, 3))
    patch = np.pad(patch, ((0, max(0, r.shape[0] - patch.shape[0])),
                           (0, max(0, r.shape[1] - patch.shape[1]))))[:r.shape[0], :r.shape[1]]
    grad = _gradient(r)
    mask = np.zeros(r.shape)
    mask[1:-1, 1:-1] = 1.0
    grad = grad * mask
    shape = (r.shape[0] + pad, r.shape[1] + pad)
    fs = (sp_fft.next_fast_len(shape[0], real=True), sp_fft.next_fast_len(shape[1], real=True))
    return _Fixed(grad, mask, r.shape, fs, sp_fft.rfft2(mask, fs), sp_fft.rfft2(grad, fs),
                  sp_fft.rfft2(np.sum(grad * grad, axis=0), fs), sp_fft.rfft2(patch, fs))


def _turn(deg: float, mirrored: bool) -> np.ndarray:
    """2 x 2 map (x, y; y down) of a turn by ``deg`` counter-clockwise on screen, after a mirror."""
    t = np.radians(deg)
    rot = np.array([[np.cos(t), np.sin(t)], [-np.sin(t), np.cos(t)]])
    return rot @ np.diag([-1.0 if mirrored else 1.0, 1.0])


def _warp(exh: np.ndarray, g: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The reduced exhibit turned (and mirrored) into the registered picture's orientation.

    ``g`` maps grid (x, y) to reduced-exhibit (x, y). Returns the gradient of the warped
    exhibit, where it is defined (one pixel in from its border), and the grid position of
    the warped array's corner.
    """
    warped, inside, lo = onto_grid(exh, g, mode="nearest")
    inside = ndimage.binary_erosion(inside, iterations=2).astype(np.float64)
    return _gradient(warped) * inside, inside, lo


def _scores(fixed: _Fixed, moving: list[tuple[np.ndarray, np.ndarray]],
            min_shared: int) -> list[tuple[float, tuple[int, int], int]]:
    return [r for i in range(0, len(moving), BATCH)
            for r in _batch(fixed, moving[i:i + BATCH], min_shared)]


def _batch(fixed: _Fixed, moving: list[tuple[np.ndarray, np.ndarray]],
           min_shared: int) -> list[tuple[float, tuple[int, int], int]]:
    """Highest masked correlation over the shifts for each moving (gradient, mask) pair.

    Returns, for each, the value (-1 where no shift qualifies), the shift ``(dy, dx)`` of the
    moving array's corner on the fixed grid, and the pixels shared there. Padfield's sums
    [1]_ for a two-component field: every sum over the overlap is one FFT correlation, all
    hypotheses of a batch transformed together.
    """
    from scipy import fft as sp_fft

    fs = fixed.fft_shape
    k = len(moving)
    grad = np.zeros((k, 2, *fs))
    mask = np.zeros((k, *fs))
    for i, (g, m) in enumerate(moving):
        grad[i, :, :g.shape[1], :g.shape[2]] = g
        mask[i, :m.shape[0], :m.shape[1]] = m
    fm = sp_fft.rfft2(mask)
    fg = sp_fft.rfft2(grad)
    fq = sp_fft.rfft2(np.sum(grad * grad, axis=1))
    cm, cg, cq = np.conj(fm), np.conj(fg), np.conj(fq)

    def inv(x: np.ndarray) -> np.ndarray:
        return sp_fft.irfft2(x, fs)

    n = np.rint(inv(fixed.f_mask * cm))
    patches = np.rint(inv(fixed.f_patch * cm))
    sf = inv(fixed.f_grad[None] * cm[:, None])             # (k, 2, ...)
    sm = inv(fixed.f_mask * cg)                            # (k, 2, ...)
    sff = inv(fixed.f_sq * cm)
    smm = inv(fixed.f_mask * cq)
    sfm = inv(np.sum(fixed.f_grad[None] * cg, axis=1))
    area = mask.sum(axis=(1, 2))[:, None, None]
    with np.errstate(invalid="ignore", divide="ignore"):
        vf = sff - np.sum(sf * sf, axis=1) / n
        vm = smm - np.sum(sm * sm, axis=1) / n
        ok = (n >= np.maximum(min_shared, INSIDE * area)) & (patches >= MIN_PATCHES) & \
            (vf > 1e-9) & (vm > 1e-9)
        ncc = np.where(ok, (sfm - np.sum(sf * sm, axis=1) / n)
                       / np.sqrt(np.where(ok, vf * vm, 1.0)), -1.0)
    out = []
    for h in range(k):
        i, j = (int(v) for v in np.unravel_index(int(np.argmax(ncc[h])), fs))
        dy = i if i < fs[0] // 2 else i - fs[0]
        dx = j if j < fs[1] // 2 else j - fs[1]
        out.append((float(ncc[h, i, j]), (int(dy), int(dx)), int(n[h, i, j])))
    return out


def _scales(ref_shape: tuple[int, int], exh_shape: tuple[int, int]) -> np.ndarray:
    """Exhibit pixels per registered-picture pixel: the powers of :data:`SCALE_STEP` (1 among
    them) over the range where the exhibit covers :data:`MIN_AREA` to :data:`MAX_AREA` of it."""
    ratio = (exh_shape[0] * exh_shape[1]) / (ref_shape[0] * ref_shape[1])
    lo, hi = np.log(np.sqrt(ratio / MAX_AREA)), np.log(np.sqrt(ratio / MIN_AREA))
    step = np.log(SCALE_STEP)
    return SCALE_STEP ** np.arange(np.floor(lo / step), np.ceil(hi / step) + 1)


def _search(ref: np.ndarray, exh: np.ndarray, grid: int,
            hypotheses: list[tuple[float, float, bool]], min_shared: int,
            rel: float) -> list[dict]:
    """Every (scale, turn, mirrored) hypothesis on one grid; the best shift of each.

    ``rel``: pixels of ``exh`` per exhibit pixel over pixels of ``ref`` per registered-picture
    pixel (both were reduced first), so that a hypothesis's scale is in the pictures' own pixels.
    """
    g = grid / max(ref.shape)
    diag = np.hypot(*ref.shape) * g * np.sqrt(MAX_AREA) + 4
    fixed = _fixed(ref, grid, int(np.ceil(diag)))
    rows = []
    by_scale: dict[float, list[tuple[float, bool]]] = {}
    for s, deg, mir in hypotheses:
        by_scale.setdefault(s, []).append((deg, mir))
    g_fine = FINE_GRID / max(ref.shape)
    for s, turns in by_scale.items():
        # The exhibit at the size this scale gives it on the work's finer grid must hold
        # MIN_PATCHES patches of its own, as the work under it must.
        at_fine = _reduce(exh, g_fine / (s * rel), FINE_GRID)
        if int(_patch_map(at_fine).sum()) < MIN_PATCHES:
            rows += [{"scale": s, "rotation_deg": deg, "mirrored": mir, "value": -1.0,
                      "origin_grid": (0.0, 0.0), "shared": 0, "grid": g} for deg, mir in turns]
            continue
        small = at_fine if grid == FINE_GRID else _reduce(exh, g / (s * rel), grid)
        warped = [_warp(small, _turn(deg, mir)) for deg, mir in turns]
        for (deg, mir), (_, _, lo), (v, (dy, dx), n) in zip(
                turns, warped, _scores(fixed, [(gr, m) for gr, m, _ in warped], min_shared),
                strict=True):
            rows.append({"scale": s, "rotation_deg": deg, "mirrored": mir, "value": v,
                         "origin_grid": (dx - lo[0], dy - lo[1]), "shared": n, "grid": g})
    return rows


def dense_register(reference_luma: np.ndarray, exhibit_luma: np.ndarray) -> dict:
    """The dense reading of one pair: JSON-ready numbers.

    Returns
    -------
    dict
        ``value`` (the highest correlation; None where either picture has less
        structure than :data:`MIN_STRUCTURE`, or, with ``reason``, where no placement
        holds :data:`MIN_PATCHES` patches of each), ``structure`` of each picture,
        and where a value was found ``geometry`` (reference-to-exhibit
        ``rotation_deg``, ``scale``, ``flipped``, ``matrix``, ``translation_px``),
        ``hypotheses`` (how many the exhaustive search tried) and the settings.
    """
    (ref, fr), (exh, fe) = _luma01(reference_luma), _luma01(exhibit_luma)
    ref_shape, exh_shape = np.shape(reference_luma)[:2], np.shape(exhibit_luma)[:2]
    out: dict = {"method": "gradient of the broad layout, exhaustive similarity search, "
                           "masked normalised cross-correlation",
                 "grids_px": [COARSE_GRID, FINE_GRID], "smooth": SMOOTH,
                 "min_structure": MIN_STRUCTURE,
                 "structure": {"work": round(_structure(ref), 3),
                               "exhibit": round(_structure(exh), 3)},
                 "matched": False, "value": None}
    if min(out["structure"].values()) < MIN_STRUCTURE:
        return out
    turns = np.arange(0.0, 360.0, COARSE_STEP_DEG)
    coarse = [(float(s), float(d), m) for s in _scales(ref_shape, exh_shape) for d in turns
              for m in (False, True)]
    rows = _search(ref, exh, COARSE_GRID, coarse, MIN_SHARED[0], fe / fr)
    rows.sort(key=lambda r: -r["value"])
    keep: list[dict] = []
    for r in rows:
        if len(keep) == KEEP or r["value"] <= -1:
            break
        if not any(k["mirrored"] == r["mirrored"]
                   and abs((k["rotation_deg"] - r["rotation_deg"] + 180) % 360 - 180) < 10
                   and abs(np.log(k["scale"] / r["scale"])) < 0.15 for k in keep):
            keep.append(r)
    fine = [(k["scale"] * f, k["rotation_deg"] + d, k["mirrored"]) for k in keep
            for f in FINE_SCALES for d in FINE_STEPS_DEG]
    out["hypotheses"] = len(coarse)
    best = max(_search(ref, exh, FINE_GRID, fine, MIN_SHARED[1], fe / fr),
               key=lambda r: r["value"], default=None)
    if best is None or best["value"] <= -1:
        out["reason"] = (f"no placement puts {MIN_PATCHES} light or dark patches of each picture "
                         f"together, with {100 * INSIDE:g} % of the exhibit on the work")
        return out
    lin = best["scale"] * _turn(best["rotation_deg"], best["mirrored"])
    geom = reg.describe_linear(lin)
    geom["matrix"] = [[round(float(v), 6) for v in row] for row in lin]
    origin = np.asarray(best["origin_grid"], dtype=np.float64) / best["grid"] / fr
    geom["translation_px"] = [round(float(v), 1) for v in -(lin @ origin)]
    # exhibit (x, y, 1) -> registered picture: the areas each shows of the other
    to_ref = np.eye(3)
    to_ref[:2, :2] = np.linalg.inv(lin)
    to_ref[:2, 2] = origin
    out.update(matched=True, value=round(best["value"], 4), geometry=geom,
               shared_grid_px=best["shared"],
               work_area_fraction=round(float(reg._footprint(
                   to_ref, exh_shape, ref_shape, FINE_GRID / max(ref_shape)).mean()), 4),
               exhibit_area_fraction=round(float(reg._footprint(
                   np.linalg.inv(to_ref), ref_shape, exh_shape, FINE_GRID / max(exh_shape))
                   .mean()), 4))
    return out
