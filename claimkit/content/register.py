"""Register an exhibit to a registered picture by its content alone.

The content line is the second, independent line of evidence beside the mark.
It asks whether the exhibit shows the registered picture (or a part of it),
using only the two pictures: oriented FAST keypoints with rotated BRIEF
descriptors (ORB) [1]_ on both, mutual nearest-neighbour matching in Hamming
distance, and a similarity transform (rotation, uniform scale, translation)
fitted to the matches by RANSAC [2]_. ORB's descriptors are not mirror
invariant, so the mirrored exhibit is registered as well; a copy of half the
reference's working size or less (a web copy) is also matched against the
reference reduced to its size, and the best reading is kept. The statistic is
therefore the same maximum over the same readings for every pair of pictures,
related or not, which is what the measured null (``calibration.json``,
written by ``benchmarks/bench_content.py``) counts. Before keypoints are
found, a picture under 256 pixels is enlarged, the luma is smoothed (Gaussian,
3 pixels) and stretched between its 1st and 99th percentiles (FAST's threshold
is absolute) by at most a factor of 3: the mark's faint, fine pattern would
otherwise be stretched into corners of its own on a plain picture, and the two
lines would not be independent (:data:`FINE_SMOOTH`). The coarse reading
(:func:`register_coarse`, 128 pixels) is smoothed and capped the same way.

The statistic is the number of RANSAC inliers: matched keypoint pairs that the
fitted transform maps to within :data:`RESIDUAL_PX` working pixels of each
other. Unrelated pictures leave a handful of chance inliers; a copy keeps tens
to hundreds. Nothing here reads the mark: neither its key nor the geometry the
mark's examination found, so the two lines can be set against each other.

Every random choice (RANSAC's samples) comes from a fixed seed, so a re-run
gives the same numbers to the bit on the same software versions.

References
----------
.. [1] E. Rublee, V. Rabaud, K. Konolige, G. Bradski, "ORB: an efficient
   alternative to SIFT or SURF", Proc. IEEE ICCV 2011, 2564-2571.
   doi:10.1109/ICCV.2011.6126544
.. [2] M. A. Fischler, R. C. Bolles, "Random sample consensus: a paradigm for
   model fitting with applications to image analysis and automated
   cartography", Commun. ACM 24(6), 381-395, 1981. doi:10.1145/358669.358692
.. [3] Z. Wang, A. C. Bovik, H. R. Sheikh, E. P. Simoncelli, "Image quality
   assessment: from error visibility to structural similarity", IEEE Trans.
   Image Process. 13(4), 600-612, 2004. doi:10.1109/TIP.2003.819861
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

# scikit-image's feature, measure, metrics and transform modules are imported where they
# are used: `claimkit examine` imports this module for the content line, and without a
# reference picture (the record's fingerprint alone) uses none of them.

__all__ = [
    "COARSE_SIDE",
    "FINE_SMOOTH",
    "KEYPOINTS",
    "MAX_STRETCH_GAIN",
    "RANSAC_SEED",
    "RESIDUAL_PX",
    "WORK_SIDE",
    "Features",
    "describe_linear",
    "features",
    "match",
    "reduced",
    "register",
    "register_coarse",
]

#: Longer side, in pixels, each picture is reduced to before keypoints are found.
WORK_SIDE = 640
#: Longer side of the coarse reading (:func:`register_coarse`), consulted where the reading at
#: :data:`WORK_SIDE` falls short: a small web copy's structure is a few pixels across at 128
#: and compression is averaged away (measured: a 10 % copy of scikit-image's Hubble deep field
#: against a half-size reference, 12 points at 640 px, 33 at 128).
COARSE_SIDE = 128
#: Least Gaussian smoothing (pixels at :data:`COARSE_SIDE`) before the coarse reading's stretch,
#: which is capped at :data:`MAX_STRETCH_GAIN` as at 640 px; a picture is smoothed by this or by
#: :data:`FINE_SMOOTH` pixels of the registered work, whichever is more. Before the cap, the
#: stretch turned a soft texture's mark into corners its copies shared (a soft texture against
#: its JPEG 90 copy: 106 points marked, 34 unmarked; contrast 0.6: 360 and 21; now 0 and 0),
#: and such a copy "corresponded" on the mark: a soft texture is now one the content line
#: cannot decide. Without the smoothing a marked clear sky matched its JPEG 75 copy on 19
#: points.
COARSE_SMOOTH = 1.0
#: Gaussian smoothing (pixels at :data:`WORK_SIDE`) before the stretch, and the most the
#: stretch may multiply contrast by: together they keep the mark out of the reading. The mark
#: lives at 0.05 to 0.25 cycles per pixel (periods of 4 to 20 pixels) with about one grey level
#: of amplitude on a plain picture; the smoothing passes under a fifth of it above 0.1 cycles
#: per pixel, and the capped stretch leaves what is left under FAST's threshold. Measured on a
#: clear sky marked and unmarked against its JPEG 90 copy: 112 and 0 points before, 0 and 0
#: after (blur 2: 23 and 0 before; rotate 17: 544 and 352 before, 0 and 0 after); on a
#: generated texture with shapes (JPEG 90) 631 and 320 before, 324 and 310 after.
#: The smoothing is in pixels of the registered work (a picture reduced to the working size
#: is smoothed by ``FINE_SMOOTH`` times the reduction; a reduced-resolution reference by its
#: scale as well; an exhibit is taken at the work's scale), since the mark is tied to those:
#: a copy cropped from a large picture and the picture itself are then smoothed alike, and
#: ORB's pyramid can match them (measured: a 25 % crop of scikit-image's retina, 5 points
#: with the smoothing in working pixels, 73 with it in the picture's). A picture enlarged to
#: :data:`MIN_WORK_SIDE`, and the reference :func:`reduced` to its size, are smoothed by
#: ``FINE_SMOOTH`` working pixels.
FINE_SMOOTH = 3.0
MAX_STRETCH_GAIN = 3.0
#: A smaller picture is enlarged to this longer side first: ORB's 31-pixel patches and its
#: eight-level pyramid leave no keypoints in a picture of 100 pixels (a 10 % web copy).
MIN_WORK_SIDE = 256
#: Luma is stretched so that these percentiles span 0..1 before keypoints are found: FAST's
#: threshold is absolute, so a low-contrast picture (haze, a soft texture) otherwise keeps
#: a few dozen keypoints; measured on generated soft textures, 70 -> 2000 keypoints.
STRETCH_PERCENTILES = (1.0, 99.0)
#: Keypoints kept per picture (the strongest by Harris response).
KEYPOINTS = 2000
#: FAST threshold (luma on a 0..1 scale); lower finds keypoints in flat pictures.
FAST_THRESHOLD = 0.02
#: RANSAC inlier distance, in pixels of the reference's working resolution.
RESIDUAL_PX = 3.0
#: RANSAC samples drawn; with 2-point samples this finds a 5 % inlier set with
#: probability 1 - (1 - 0.05**2)**2000 > 0.99.
RANSAC_TRIALS = 2000
RANSAC_SEED = 20261
#: Lowe's ratio test [1]_ on Hamming distances (best / second best).
MAX_RATIO = 0.85
#: A fitted scale outside this range (exhibit pixels per reference pixel) is not a copy.
SCALE_RANGE = (1 / 12, 12.0)
#: Pixels trimmed from the shared area's border before the similarity is measured.
EDGE = 3


@dataclass(frozen=True)
class Features:
    """Keypoints (x, y in full-resolution pixels of the picture) and binary descriptors."""

    xy: np.ndarray            # (n, 2) float64
    descriptors: np.ndarray   # (n, 256) bool
    shape: tuple[int, int]    # (height, width) of the full-resolution picture
    scale: float              # working size / full size
    work: np.ndarray          # the luma at working size, 0..1, for the similarity measure


def _work(luma: np.ndarray, side: int = WORK_SIDE,
          min_side: int = MIN_WORK_SIDE) -> tuple[np.ndarray, float]:
    a = np.asarray(luma, dtype=np.float64)
    if a.ndim != 2 or min(a.shape) < 16:
        raise ValueError(f"luma must be 2-D and at least 16 px a side, got {a.shape}")
    top = float(a.max()) if a.size else 1.0
    a = a / (255.0 if top > 1.0 else 1.0)
    s = min(1.0, side / max(a.shape))
    if max(a.shape) < min_side:
        s = min_side / max(a.shape)
    if s != 1.0:
        from skimage.transform import rescale

        a = rescale(a, s, anti_aliasing=s < 1.0, preserve_range=True, order=1)
    return np.clip(a, 0.0, 1.0), s


def _stretch(a: np.ndarray, max_gain: float | None = None) -> np.ndarray:
    lo, hi = np.percentile(a, STRETCH_PERCENTILES)
    span = max(float(hi - lo), 1e-3 if max_gain is None else 1.0 / max_gain)
    return np.clip((a - lo) / span, 0.0, 1.0)


def features(luma: np.ndarray, *, mirrored: bool = False, stretch: bool = True,
             coarse: bool = False, registered_scale: float = 1.0) -> Features:
    """ORB keypoints and descriptors of a picture (or of its left-right mirror image).

    Parameters
    ----------
    luma : ndarray
        ``(H, W)`` luma, 0..255 (or 0..1).
    mirrored : bool
        Describe the mirrored picture; the keypoints are returned in the
        coordinates of the picture as given (``x -> W - 1 - x``), so that a
        transform fitted to them includes the mirroring.
    stretch : bool
        Stretch the luma's contrast first (:data:`STRETCH_PERCENTILES`), as
        the registration does; False keeps FAST's threshold absolute (about 5
        grey levels), which compression blocks and noise in a flat picture do
        not reach.
    coarse : bool
        Describe the picture at :data:`COARSE_SIDE` pixels on its longer side
        (reduced, or enlarged if smaller) and smoothed by :data:`COARSE_SMOOTH`,
        for :func:`register_coarse`; otherwise at :data:`WORK_SIDE`, smoothed
        by :data:`FINE_SMOOTH`, the stretch's gain capped at :data:`MAX_STRETCH_GAIN`.
    registered_scale : float
        Pixels of this picture per pixel of the registered work: 1 for an
        exhibit (its scale is not known) and for the registered file, less for
        a reduced-resolution reference. The fine reading's smoothing is
        :data:`FINE_SMOOTH` pixels of the registered work.

    Returns
    -------
    Features
    """
    shape = (int(np.asarray(luma).shape[0]), int(np.asarray(luma).shape[1]))
    if coarse:
        work, s = _work(luma, COARSE_SIDE, COARSE_SIDE)
        return _describe(work, s, shape, mirrored, stretch,
                         smooth=max(COARSE_SMOOTH, FINE_SMOOTH * min(s * registered_scale, 1.0)))
    work, s = _work(luma)
    return _describe(work, s, shape, mirrored, stretch,
                     smooth=FINE_SMOOTH * min(s * registered_scale, 1.0))


def _describe(work: np.ndarray, s: float, shape: tuple[int, int], mirrored: bool,
              stretch: bool = True, smooth: float = FINE_SMOOTH) -> Features:
    """Keypoints of ``work``, smoothed (``smooth`` working pixels) and stretched with the
    gain capped first; ``work`` itself (unsmoothed) is kept for the similarity measure
    and :func:`reduced`."""
    img = work[:, ::-1] if mirrored else work
    img = ndimage.gaussian_filter(img, smooth)
    if stretch:
        img = _stretch(img, MAX_STRETCH_GAIN)
    from skimage.feature import ORB

    orb = ORB(n_keypoints=KEYPOINTS, fast_threshold=FAST_THRESHOLD)
    try:
        orb.detect_and_extract(img)
        rc = np.asarray(orb.keypoints, dtype=np.float64)
        desc = np.asarray(orb.descriptors, dtype=bool)
    except RuntimeError:       # no keypoints at all (a flat picture)
        rc = np.zeros((0, 2))
        desc = np.zeros((0, 256), bool)
    x = rc[:, 1]
    if mirrored:
        x = (img.shape[1] - 1) - x
    xy = np.stack([x, rc[:, 0]], axis=1) / s if len(rc) else np.zeros((0, 2))
    return Features(xy, desc, shape, s, work)


def reduced(reference: Features, side: int) -> Features:
    """The reference described again at a longer side of ``side`` working pixels.

    A copy much smaller than the reference's working size (a web copy at 10 to
    25 %) is matched against the reference at its own size as well: ORB's
    pyramid spans a factor of 3.6, not of 10.
    """
    from skimage.transform import rescale

    f = side / max(reference.work.shape)
    work = np.clip(rescale(reference.work, f, anti_aliasing=True, preserve_range=True), 0.0, 1.0)
    return _describe(work, reference.scale * f, reference.shape, False)


def describe_linear(m: np.ndarray) -> dict:
    """Rotation, scale and mirroring of a 2 x 2 map in (x, y) with y pointing down.

    The convention is the mark examination's (:func:`claimkit.mark.detect.describe_geometry`):
    a positive angle is a counter-clockwise turn on screen, and a mirror image
    is read as a left-right flip followed by the turn.
    """
    m = np.asarray(m, dtype=np.float64)
    u, _, vt = np.linalg.svd(m)
    rot = u @ vt
    flipped = bool(np.linalg.det(rot) < 0)
    if flipped:
        rot = rot @ np.diag([-1.0, 1.0])
    angle = float(np.degrees(np.arctan2(rot[0, 1], rot[0, 0])))
    return {"rotation_deg": round((angle + 180.0) % 360.0 - 180.0, 3),
            "scale": round(float(np.sqrt(abs(np.linalg.det(m)))), 5),
            "flipped": flipped}


def _hamming(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Hamming distances between every row of two boolean descriptor sets (bits packed, popcount)."""
    pa = np.packbits(a, axis=1).view(np.uint64) if a.shape[1] % 64 == 0 else None
    pb = np.packbits(b, axis=1).view(np.uint64) if b.shape[1] % 64 == 0 else None
    if pa is None or pb is None:
        pa, pb = np.packbits(a, axis=1), np.packbits(b, axis=1)
    out = np.zeros((len(a), len(b)), dtype=np.int32)
    for k in range(pa.shape[1]):
        out += np.bitwise_count(pa[:, k, None] ^ pb[None, :, k])
    return out


def match(d1: np.ndarray, d2: np.ndarray) -> np.ndarray:
    """Mutual nearest neighbours in Hamming distance that pass the ratio test; ``(k, 2)`` indices.

    The same rule, ties and order as scikit-image's ``match_descriptors(metric="hamming",
    cross_check=True, max_ratio=MAX_RATIO)`` (tests/test_content.py checks that both give
    the same pairs), computed on packed bits, about six times faster.
    """
    if len(d1) == 0 or len(d2) == 0:
        return np.zeros((0, 2), dtype=np.intp)
    dist = _hamming(d1, d2).astype(np.float64)
    i1 = np.arange(len(d1))
    i2 = np.argmin(dist, axis=1)
    back = np.argmin(dist, axis=0)
    keep = i1 == back[i2]
    i1, i2 = i1[keep], i2[keep]
    if MAX_RATIO < 1.0 and len(d2) > 1:
        best = dist[i1, i2].copy()
        dist[i1, i2] = np.inf
        second = dist[i1, np.argmin(dist[i1], axis=1)]
        second[second == 0] = np.finfo(np.float64).eps
        ok = best / second < MAX_RATIO
        i1, i2 = i1[ok], i2[ok]
    return np.column_stack((i1, i2))


def _fit(ref: Features, exh: Features, mirrored: bool) -> tuple[np.ndarray | None, int, np.ndarray]:
    """Best map from exhibit to reference (3 x 3, full-resolution pixels), inlier count.

    A similarity transform cannot mirror, so for the mirrored reading it is
    fitted to the mirrored exhibit's coordinates and composed with the flip.
    """
    if len(ref.xy) < 3 or len(exh.xy) < 3:
        return None, 0, np.zeros(0, bool)
    pairs = match(exh.descriptors, ref.descriptors)
    if len(pairs) < 3:
        return None, 0, np.zeros(0, bool)
    flip = np.eye(3)
    if mirrored:
        flip = np.array([[-1.0, 0.0, exh.shape[1] - 1.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    src = (exh.xy[pairs[:, 0]] @ flip[:2, :2].T) + flip[:2, 2]
    dst = ref.xy[pairs[:, 1]]
    from skimage.measure import ransac
    from skimage.transform import SimilarityTransform

    threshold = RESIDUAL_PX / ref.scale

    def plausible(model, *_):
        return SCALE_RANGE[0] <= 1.0 / max(float(model.scale), 1e-12) <= SCALE_RANGE[1]

    with warnings.catch_warnings():
        # "Estimated model is not valid": no plausible model, the usual case for unrelated
        # pictures, reported below as no match.
        warnings.simplefilter("ignore", UserWarning)
        model, inliers = ransac((src, dst), SimilarityTransform, min_samples=2,
                                residual_threshold=threshold, max_trials=RANSAC_TRIALS,
                                is_model_valid=plausible, stop_probability=0.9999,
                                rng=RANSAC_SEED)
    if model is None or inliers is None:
        return None, 0, np.zeros(0, bool)
    n = int(inliers.sum())
    if n >= 3:  # final least-squares fit on the inliers only
        refit = SimilarityTransform.from_estimate(src[inliers], dst[inliers])
        if refit and plausible(refit):
            model = refit
    residual = np.sqrt(np.mean(np.sum((model(src[inliers]) - dst[inliers]) ** 2, axis=1)))
    return np.asarray(model.params, dtype=np.float64) @ flip, n, np.array([residual])


def _footprint(mat: np.ndarray, src_shape: tuple[int, int], dst_shape: tuple[int, int],
               dst_scale: float) -> np.ndarray:
    """Mask, at ``dst``'s working size, of where a picture of ``src_shape`` lands under ``mat``."""
    h = max(1, round(dst_shape[0] * dst_scale))
    w = max(1, round(dst_shape[1] * dst_scale))
    inv = np.linalg.inv(mat)
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float64)
    pts = np.stack([xx.ravel() / dst_scale, yy.ravel() / dst_scale, np.ones(h * w)])
    sx, sy, _ = inv @ pts
    inside = (sx >= -0.5) & (sx <= src_shape[1] - 0.5) & (sy >= -0.5) & (sy <= src_shape[0] - 0.5)
    return inside.reshape(h, w)


def _similarity(ref: Features, exh: Features, mat: np.ndarray) -> tuple[float, np.ndarray]:
    """SSIM [3]_ of the exhibit resampled onto the reference's working grid, on the shared area."""
    h, w = ref.work.shape
    # reference working (x, y) -> exhibit working (x, y)
    to_full = np.diag([1 / ref.scale, 1 / ref.scale, 1.0])
    to_exh = np.diag([exh.scale, exh.scale, 1.0])
    m = to_exh @ np.linalg.inv(mat) @ to_full
    swap = np.array([[0.0, 1.0, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, 1.0]])
    mrc = swap @ m @ swap      # (row, col) form for ndimage
    aligned = ndimage.affine_transform(exh.work, mrc[:2, :2], offset=mrc[:2, 2],
                                       output_shape=(h, w), order=1, mode="constant", cval=0.0)
    mask = ndimage.affine_transform(np.ones_like(exh.work), mrc[:2, :2], offset=mrc[:2, 2],
                                    output_shape=(h, w), order=0, mode="constant", cval=0.0) > 0.5
    inner = ndimage.binary_erosion(mask, iterations=EDGE)
    if inner.sum() < 49 or min(h, w) < 7:
        return float("nan"), inner
    from skimage.metrics import structural_similarity

    _, smap = structural_similarity(ref.work, aligned, data_range=1.0, full=True)
    return float(smap[inner].mean()), inner


def register(reference: Features, exhibit: Features, exhibit_mirrored: Features) -> dict:
    """Register the exhibit to the reference by content; JSON-ready numbers.

    Parameters
    ----------
    reference : Features
        :func:`features` of the registered picture (the published marked
        file or a reduced-resolution reference).
    exhibit, exhibit_mirrored : Features
        :func:`features` of the exhibit, plain and ``mirrored=True``.

    Returns
    -------
    dict
        ``inliers`` (the statistic), ``matched`` (whether a transform was
        found at all), and where it was: ``geometry`` (reference-to-exhibit
        ``rotation_deg``, ``scale``, ``flipped``, ``matrix``),
        ``residual_px`` (RMS distance of the inliers under the transform, in
        reference pixels), ``work_area_fraction`` (share of the registered
        picture's area the exhibit shows), ``exhibit_area_fraction`` (share of
        the exhibit's area that lies inside the registered picture) and
        ``ssim`` (structural similarity over the shared area after alignment,
        at working resolution).

    Notes
    -----
    The map found is exhibit -> reference; the geometry reported is its
    inverse, reference -> exhibit, the direction the mark's examination
    reports, so the two can be compared directly.
    """
    refs = [reference]
    side = max(exhibit.work.shape)
    if 2 * side <= max(reference.work.shape):
        refs.append(reduced(reference, side))
    return _result(refs, exhibit, exhibit_mirrored, "ORB keypoints, RANSAC similarity",
                   WORK_SIDE)


def register_coarse(reference_luma: np.ndarray, exhibit_luma: np.ndarray,
                    reference_scale: float = 1.0) -> dict:
    """The coarse reading: both pictures at :data:`COARSE_SIDE` pixels, otherwise as :func:`register`.

    Its statistic has its own measured null and threshold (``calibration.json``,
    ``coarse``); the content line consults it where :func:`register` falls short.
    ``reference_scale``: pixels of the reference per pixel of the registered work
    (:func:`features`' ``registered_scale``).
    """
    exh = np.asarray(exhibit_luma)
    return _result([features(reference_luma, coarse=True, registered_scale=reference_scale)],
                   features(exh, coarse=True),
                   features(exh, mirrored=True, coarse=True),
                   f"ORB keypoints at {COARSE_SIDE} px, RANSAC similarity", COARSE_SIDE)


def _result(refs: list[Features], exhibit: Features, exhibit_mirrored: Features, method: str,
            side: int) -> dict:
    reference = refs[0]
    best = None
    for rf in refs:
        for feats, how in ((exhibit, "as is"), (exhibit_mirrored, "mirrored")):
            mat, n, res = _fit(rf, feats, how == "mirrored")
            if mat is not None and (best is None or n > best[1]):
                best = (mat, n, res, how)
    out: dict = {"method": method, "work_side_px": side,
                 "residual_limit_px": RESIDUAL_PX, "ransac_seed": RANSAC_SEED,
                 "reference_keypoints": len(reference.xy),
                 "exhibit_keypoints": len(exhibit.xy)}
    if best is None:
        out.update(matched=False, inliers=0)
        return out
    mat, n, res, how = best
    lin = np.linalg.inv(mat)[:2, :2]          # reference -> exhibit
    geom = describe_linear(lin)
    geom["matrix"] = [[round(float(v), 6) for v in row] for row in lin]
    geom["translation_px"] = [round(float(v), 2) for v in np.linalg.inv(mat)[:2, 2]]
    work_mask = _footprint(mat, exhibit.shape, reference.shape, reference.scale)
    exh_mask = _footprint(np.linalg.inv(mat), reference.shape, exhibit.shape, exhibit.scale)
    ssim, _ = _similarity(reference, exhibit, mat)
    out.update(matched=True, inliers=n, reading=how, geometry=geom,
               residual_px=round(float(res[0]) / 1.0, 3),
               work_area_fraction=round(float(work_mask.mean()), 4),
               exhibit_area_fraction=round(float(exh_mask.mean()), 4),
               ssim=None if not np.isfinite(ssim) else round(ssim, 4))
    return out
