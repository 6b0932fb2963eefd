"""A mark at more than one scale: the fine tiled mark plus a coarse one tied to the picture's size.

The tiled mark of :mod:`claimkit.mark.embed` has a 128-pixel period and spots
of one pixel: a copy scaled below about 0.45 of the marked picture has lost
or aliased the band it lives in, and the lattice search stops there. A
24-megapixel master posted 1080 px wide is a 0.18 copy.

So the mark has a second, *coarse* component whose period is tied to the
picture's size rather than to its pixels. The picture is reduced (in
thought) to a *level* whose short side is ``COARSE_SIDE`` pixels (or whose
long side is ``COARSE_LONG``, for a picture wider than 13:8); the same
kind of mark is computed on that level (its own SSIM-derived mask, a full
period of ``TILE`` level pixels); the level's change is interpolated back to
the picture's size with a smooth kernel and added to the fine change. Any
downscale of the whole picture, to whatever web size, carries the coarse
component at the same place relative to its own size: reduced to the level
again, the copy shows the coarse period at ``TILE`` pixels, at the original
grid origin, whatever the copy's size was. The detector therefore examines
a copy at three scales (``SCALES``): at its own resolution (the fine
component, the lattice search covering scales 0.45 to 2.8), and reduced (or
enlarged) to its level, or so that its long side is ``COARSE_SIDE`` (the
coarse component; the level view is also read at two neighbouring sizes,
:func:`stretched_shapes`, since a copy's rounded size gives the level's only
to a pixel or two; the long side serves a copy cropped across the original's
long side, such as a 4:5 portrait of a landscape; the same lattice search
covers other crops and turns). The bound counts all three: ``hypotheses`` is
three times a single examination's, and ``scales_searched`` says so.

Both components share one energy budget at the picture's size. The fine
component is the mark of :mod:`claimkit.mark.embed` at ``sqrt(1 - share)`` of
its strength; the coarse component gets ``share`` of the mean squared change
(a water level per component, so the PSNR cap holds for the sum) and
``share`` of each window's SSIM allowance, counting only the part of the coarse
change that varies within a window (:func:`window_fraction`) and SSIM's
luminance term, which a slowly varying change moves in dark areas. At the level
itself, where a downscaled copy shows it and the fine component is gone, it may
use the SSIM rule's allowance for a local SSIM of ``LEVEL_SSIM`` on textured
areas, and the rule of the fine mark's target on smooth ones, less still
(:func:`flat_weight`): the coarse change of a large master varies over ten
pixels or more, where the eye is more sensitive than to the one-pixel spots of
the fine mark, and near edges the weakest variance around is used, so that no
pale halo follows a horizon into the sky.

The coarse component has its own seed (:func:`coarse_seed`): its carrier and
spot positions differ from the fine component's, so that neither can be
mistaken for the other at some scale, and an estimate of one tells nothing
about the other.

References
----------
.. [1] R. G. Keys, "Cubic convolution interpolation for digital image
   processing", IEEE Trans. Acoust., Speech, Signal Process. 29(6),
   1153-1160, 1981. doi:10.1109/TASSP.1981.1163711
.. [2] P. J. Burt, E. H. Adelson, "The Laplacian pyramid as a compact image
   code", IEEE Trans. Commun. 31(4), 532-540, 1983.
   doi:10.1109/TCOM.1983.1095851
.. [3] P. G. J. Barten, *Contrast Sensitivity of the Human Eye and Its
   Effects on Image Quality*, SPIE Press, 1999 (the eye is most sensitive
   at a few cycles per degree, far less at the finest detail).
"""

from __future__ import annotations

import dataclasses
import hashlib
import hmac
import math
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Any

import numpy as np

from claimkit.mark import detect, embed, format3, pattern

if TYPE_CHECKING:   # scipy.sparse loads when a resampling matrix is first built
    from scipy import sparse

COARSE_SIDE = 384        # short side of the coarse level, level pixels (three periods of TILE)
COARSE_LONG = 624        # the level's long side at most (a picture wider than 13:8 is fitted to it)
# Fraction of the mean squared change (and of each window's SSIM allowance at full size) given
# to the coarse component. 0.7 (from 0.5), with LEVEL_SSIM 0.97 (from 0.988), the level of wide
# pictures (COARSE_LONG) and the stretched views, took the 25 % JPEG copies of the tuning pictures
# from 33 to 45 of 48 claimed (bench_scales --tuning); 0.8 lost two full-size attacks on the
# 1-2 MP pictures of the stress battery (a 0.9 aspect change, shrink + turn + JPEG 70), 0.7 none.
COARSE_SHARE = 0.7
# A picture whose coarse component wants more than its share of the PSNR budget (a busy
# texture from edge to edge: grass, gravel) gives it more, up to COARSE_SHARE_BUSY, reached
# where it wants BUSY_RATIO times what it gets (busy_share). There the fine component has
# a wide margin at full size, and a downscale keeps the coarse one only.
COARSE_SHARE_BUSY = 0.85
BUSY_RATIO = 2.0
# ... and only where the fine mask is at the PSNR cap too (its mean square at least this share
# of the budget): a 24 MP master with a third of sky has a coarse component that wants more
# than it gets, but a fine one well below the cap, whose full-size crops (600 x 600, JPEG 60:
# 1e-97 at 0.7) were lost at 0.85 with no gain on its web copies.
FINE_AT_CAP = 0.98
# Weight of the SSIM constant in the coarse mask, i.e. how strong the coarse
# change may be on smooth areas, by the level's factor: the coarse spots span
# 1 / factor pixels of the picture, and the larger they are, the more visible
# (Barten 1999). At 0.1 (a 24 MP master) 0.15 left no mottling on a plain sky
# when looked at (0.5 did); at 0.5 (spots of two pixels) the fine mask's rule.
COARSE_FLAT = ((0.1, 0.15), (1.0, 1.0))
SSIM_C1 = (0.01 * 255.0) ** 2   # SSIM's luminance constant for 8-bit data (Wang et al. 2004)
COARSE_LABEL = b"claimkit/mark/coarse-level/v1"   # derivation label of the coarse seed
COARSE_GUARD = 11         # level pixels over which the coarse mask takes the weakest variance
MIN_COARSE_FACTOR = 1.6  # a picture gets a coarse component when it is this times its level or larger
COARSE_SYNC_SHARE = 0.15  # share of the format-3 coarse period in its synchronisation (see _period)
# Local SSIM the coarse change may cost the level (a downscaled copy) on textured areas; smooth
# areas keep the fine mark's target (embed.DEFAULT_LOCAL_SSIM) times flat_weight, so a plain sky
# gets no more than before (raising that too showed a soft mottling on the tests' sky).
LEVEL_SSIM = 0.97


# ---------------------------------------------------------------- levels

@dataclass(frozen=True)
class Level:
    """The coarse level of a picture: its size and the factor from picture to level pixels.

    Attributes
    ----------
    shape : (rows, cols)
        Size of the level; the short side is ``COARSE_SIDE``.
    factor : float
        Level pixels per picture pixel (below 1 for a large picture).
    """

    shape: tuple[int, int]
    factor: float


def coarse_level(shape: tuple[int, int]) -> Level:
    """The coarse level of a picture of ``shape``: fitted in ``COARSE_SIDE x COARSE_LONG``, the aspect kept.

    The short side is ``COARSE_SIDE`` unless the picture is wider than
    ``COARSE_LONG / COARSE_SIDE`` (13:8), when the long side is ``COARSE_LONG``:
    a wide picture's level is then no longer than that, so that its small
    copies (25 % of a 700 x 1700 picture is 175 px high) still hold most of the
    level's band. The ratio 13:8 lies between the usual aspects (3:2 and 16:10
    below it, 5:3 and 16:9 above), so that the rounding of a copy's size does
    not move it to the other rule. The same rule serves embedding (on the original) and
    examination (on a copy): a copy that is the whole original, scaled, reduces
    to the same level, so its coarse period falls on the level's grid again.
    """
    h, w = int(shape[0]), int(shape[1])
    f = min(COARSE_SIDE / min(h, w), COARSE_LONG / max(h, w))
    return Level((max(1, round(h * f)), max(1, round(w * f))), f)


def has_coarse(shape: tuple[int, int]) -> bool:
    """Whether a picture of ``shape`` gets a coarse component when marked (``MIN_COARSE_FACTOR``)."""
    return coarse_level(shape).factor * MIN_COARSE_FACTOR <= 1.0


def coarse_seed(seed: bytes) -> bytes:
    """The coarse component's own 32-byte seed, derived from the detection seed (HMAC-SHA256).

    Its own carrier and spot positions keep the two components apart: a
    lattice of the fine pattern is never mistaken for the coarse one (the
    same tile at two sizes would leave the copy's scale ambiguous), and an
    estimate of one component says nothing about the other.
    """
    if len(seed) != 32:
        raise ValueError("detection seed must be 32 bytes")
    return hmac.new(seed, COARSE_LABEL, hashlib.sha256).digest()


def coarse_keys(keys):
    """The coarse component's keys: every seed of ``keys`` through :func:`coarse_seed`.

    ``keys`` is a 32-byte seed, or a record of seeds (a format's marking or
    detection keys: a dataclass whose fields are seeds, mappings of seeds, or
    other values kept as they are, such as a family number).
    """
    if isinstance(keys, (bytes, bytearray)):
        return coarse_seed(bytes(keys))
    if keys is None:
        return None
    if isinstance(keys, dict):
        return {k: coarse_keys(v) for k, v in keys.items()}
    if dataclasses.is_dataclass(keys) and not isinstance(keys, type):
        return dataclasses.replace(keys, **{
            f.name: coarse_keys(getattr(keys, f.name)) for f in dataclasses.fields(keys)
            if f.init and isinstance(getattr(keys, f.name), (bytes, bytearray, dict))})
    return keys


def _period(keys, payload_bits: np.ndarray) -> np.ndarray:
    """One period of the mark for ``keys`` at unit RMS (float32): a tile, or a format's larger cell."""
    if isinstance(keys, (bytes, bytearray)):
        pat = pattern.key_pattern(bytes(keys))
        return pattern.mark_tile(pat, pat.codeword(np.asarray(payload_bits, dtype=np.uint8)))
    # Format 3: the macro-cell of its synchronisation and claim components, the synchronisation
    # with the coarse component's own (smaller) share.
    return format3.macro_tile(keys, np.asarray(payload_bits, dtype=np.uint8),
                              sync_share=COARSE_SYNC_SHARE)


# ---------------------------------------------------------------- resampling

def _keys(t: np.ndarray, a: float = -0.5) -> np.ndarray:
    """Keys' cubic convolution kernel ([1]_), ``a = -0.5``."""
    t = np.abs(t)
    out = np.where(t <= 1, (a + 2) * t ** 3 - (a + 3) * t ** 2 + 1,
                   np.where(t < 2, a * t ** 3 - 5 * a * t ** 2 + 8 * a * t - 4 * a, 0.0))
    return out


def resample_matrix(n_out: int, n_in: int, span: float | None = None) -> sparse.csr_matrix:
    """Sparse ``(n_out, n_in)`` matrix resampling one axis with Keys' cubic kernel.

    Pixel centres are matched (output pixel ``i`` sits at input position
    ``(i + 0.5) n_in / n_out - 0.5``, the convention of Pillow and
    scikit-image). When reducing, the kernel is stretched by the reduction
    factor so that it also filters out what the smaller grid cannot hold
    (anti-aliasing); edges are mirrored. Each row sums to one. ``span``
    (default ``n_in``) is the length, in input pixels, that the output
    covers: an input decimated from a length not divisible by the step
    covers a fraction of its last pixel.
    """
    # Imported here: scipy.sparse adds tens of milliseconds to every command's start-up,
    # and an examination that claims at full size never builds a coarse view.
    from scipy import sparse

    scale = (n_in if span is None else span) / n_out
    support = 2.0 * max(1.0, scale)
    centre = (np.arange(n_out) + 0.5) * scale - 0.5
    taps = math.ceil(2 * support) + 1
    first = np.floor(centre - support).astype(np.int64) + 1
    idx = first[:, None] + np.arange(taps)[None, :]
    wts = _keys((idx - centre[:, None]) / max(1.0, scale))
    wts /= wts.sum(axis=1, keepdims=True)
    # Mirror indices outside the axis (half-sample symmetric, as scipy's "reflect").
    period = 2 * n_in
    idx = np.mod(idx, period)
    idx = np.where(idx >= n_in, period - 1 - idx, idx)
    rows = np.repeat(np.arange(n_out), taps)
    m = sparse.csr_matrix((wts.ravel(), (rows, idx.ravel())), shape=(n_out, n_in))
    m.sum_duplicates()
    return m


def resample(x: np.ndarray, shape: tuple[int, int],
             span: tuple[float, float] | None = None) -> np.ndarray:
    """``x`` resampled to ``shape`` (separable Keys cubic, anti-aliased when reducing), float32.

    ``span`` is the (rows, cols) extent the output covers, in input pixels
    (default: the whole input; see :func:`resample_matrix`).
    """
    x = np.asarray(x, dtype=np.float32)
    sr, sc = (None, None) if span is None else span
    rows = resample_matrix(shape[0], x.shape[0], sr).astype(np.float32)
    cols = resample_matrix(shape[1], x.shape[1], sc).astype(np.float32)
    # The axis that shrinks more first, so the second product is the smaller.
    if shape[0] / x.shape[0] <= shape[1] / x.shape[1]:
        y = rows @ x
        return np.ascontiguousarray((cols @ y.T).T, dtype=np.float32)
    y = (cols @ x.T).T
    return np.ascontiguousarray(rows @ y, dtype=np.float32)


# ---------------------------------------------------------------- embedding

@dataclass(frozen=True)
class CoarsePlan:
    """The coarse component of the change, produced row band by row band at the picture's size.

    ``delta = R @ level_delta @ C.T``, with ``R`` and ``C`` the cubic
    interpolation matrices of :func:`resample_matrix`; the columns are
    interpolated once (``wide``: level rows by picture columns), and each
    band of rows is a few weighted sums of those.

    Attributes
    ----------
    shape : (H, W)
        The picture's size.
    level : Level
    level_delta : ndarray, level shape, float32
        The coarse change at the level (strength and mask included).
    """

    shape: tuple[int, int]
    level: Level
    level_delta: np.ndarray = field(repr=False)
    wide: np.ndarray = field(repr=False)
    rows_matrix: sparse.csr_matrix = field(repr=False)

    def rows(self, r0: int, r1: int) -> np.ndarray:
        """Rows ``r0:r1`` of the coarse change at the picture's size, float32."""
        return np.asarray(self.rows_matrix[r0:r1] @ self.wide, dtype=np.float32)


@dataclass(frozen=True)
class ScalesPlan:
    """Fine and coarse components together, row band by row band (as :class:`embed.MarkPlan`)."""

    fine: embed.MarkPlan
    coarse: CoarsePlan | None
    share: float = 0.0     # the coarse component's share of the budget (0: none)

    @property
    def shape(self) -> tuple[int, int]:
        """The marked picture's (height, width)."""
        return self.fine.shape

    def rows(self, r0: int, r1: int, *, out: np.ndarray | None = None) -> np.ndarray:
        """Rows ``r0:r1`` of the whole change, ``(r1 - r0, W)`` float32."""
        out = self.fine.rows(r0, r1, out=out)
        if self.coarse is not None:
            out += self.coarse.rows(r0, r1)
        return out


def window_fraction(factor: float, window: int = embed.MASK_WINDOW) -> float:
    """Share of the coarse change's power that varies within one mask window of the picture.

    The coarse change, seen at the picture's size, is the level's white
    carrier shaped by a Gaussian spot of ``1 / factor`` pixels, band-limited
    to the level's grid; SSIM's structure term sees only what varies inside
    its ``window``-pixel window, i.e. the power the window's box average does
    not keep: ``sum P(f) (1 - |B(f)|^2) / sum P(f)``.
    """
    n = 256
    f = np.fft.fftfreq(n) * min(1.0, factor)     # picture frequencies the level can hold
    fy, fx = f[:, None], f[None, :]
    sigma = 1.0 / factor
    p = np.exp(-4 * np.pi ** 2 * sigma ** 2 * (fy ** 2 + fx ** 2))
    box = np.sinc(window * fy) / np.sinc(fy) * np.sinc(window * fx) / np.sinc(fx)
    return float(np.sum(p * (1 - box ** 2)) / np.sum(p))


def coarse_plan(luma: np.ndarray, seed: bytes, payload_bits: np.ndarray, *,
                fine_allowance: tuple[np.ndarray, int] | None = None,
                share: float = COARSE_SHARE, strength: float = 1.0,
                local_ssim: float = embed.DEFAULT_LOCAL_SSIM,
                psnr_db: float = embed.DEFAULT_PSNR_DB,
                budget: float | None = None,
                allowance: LevelAllowance | None = None) -> CoarsePlan | None:
    """The coarse component for a picture, or None when the picture is too small to need one.

    Parameters
    ----------
    luma : ndarray, (H, W), 0..255 scale
    seed : bytes
        32-byte detection seed.
    payload_bits : ndarray of 0/1, length 64
    fine_allowance : (amp, step), optional
        The fine mask at full strength (:func:`claimkit.mark.embed.mask_samples`);
        computed when not given.
    share : float
        Fraction of the energy budget (mean squared change and each window's
        SSIM allowance) the coarse component gets.
    strength, local_ssim, psnr_db
        As for :func:`claimkit.mark.embed.mark_delta`.
    budget : float, optional
        Cap on the coarse change's mean square (default: ``share`` of what
        ``psnr_db`` allows; :func:`scales_plan` gives it what the fine
        component leaves).
    allowance : LevelAllowance, optional
        :func:`level_allowance` for this picture, when the caller has it already.
    """
    shape = (int(np.shape(luma)[0]), int(np.shape(luma)[1]))
    if not has_coarse(shape) or share <= 0:
        return None
    if allowance is None:
        if fine_allowance is None:
            fine_allowance = embed.mask_samples(luma, local_ssim=local_ssim, psnr_db=psnr_db)
        allowance = level_allowance(luma, fine_allowance, local_ssim=local_ssim)
    level = allowance.level
    if budget is None:
        budget = embed.psnr_budget(psnr_db, share)
    amp_c = allowance.amplitude(share, budget)
    tile = _period(coarse_keys(seed), payload_bits)
    delta = embed.apply_tiled(amp_c, tile * np.float32(strength))
    cols = resample_matrix(shape[1], level.shape[1]).astype(np.float32)
    wide = np.ascontiguousarray((cols @ delta.T).T, dtype=np.float32)
    return CoarsePlan(shape=shape, level=level, level_delta=delta, wide=wide,
                      rows_matrix=resample_matrix(shape[0], level.shape[0]).astype(np.float32))


def flat_weight(factor: float) -> float:
    """Weight of SSIM's constant in the coarse mask for a level ``factor`` (``COARSE_FLAT``)."""
    (f0, w0), (f1, w1) = COARSE_FLAT
    return float(np.interp(factor, (f0, f1), (w0, w1)))


@dataclass(frozen=True)
class LevelAllowance:
    """What the coarse component may change at each level pixel, before the PSNR budget.

    Attributes
    ----------
    level : Level
    level2 : ndarray, level shape
        Squared amplitude the level itself allows (what a downscaled copy shows).
    native2 : ndarray, level shape
        Squared amplitude the picture's size allows to the whole mark (SSIM's
        structure and luminance terms); the coarse component gets ``share`` of it.
    """

    level: Level
    level2: np.ndarray = field(repr=False)
    native2: np.ndarray = field(repr=False)

    def wanted(self, share: float) -> np.ndarray:
        """Squared amplitude at ``share``, before the budget."""
        return np.minimum(self.level2, share * self.native2)

    def amplitude(self, share: float, budget: float) -> np.ndarray:
        """The coarse amplitude at the level (float32): :meth:`wanted`, water-levelled to ``budget``."""
        amp2 = self.wanted(share)
        if float(amp2.mean()) > budget:
            np.minimum(amp2, embed._water_level(amp2, budget), out=amp2)
        return np.sqrt(amp2).astype(np.float32)


def level_allowance(luma: np.ndarray, fine_allowance: tuple[np.ndarray, int], *,
                    local_ssim: float = embed.DEFAULT_LOCAL_SSIM) -> LevelAllowance:
    """The coarse component's allowances for a picture (see :func:`coarse_mask`).

    ``fine_allowance`` is the fine mask at full strength (:func:`claimkit.mark.embed.mask_samples`).
    """
    level = coarse_level(np.shape(luma))
    small = resample(luma, level.shape)
    amp, _step = fine_allowance   # resampled whole: the step does not matter
    # The picture's own SSIM allowance, averaged over each level pixel's footprint.
    native2 = np.maximum(resample(amp * amp, level.shape), 0.0)   # cubic kernels overshoot
    return _allowance(small, native2, level, local_ssim)


def _allowance(small: np.ndarray, native2: np.ndarray, level: Level,
               local_ssim: float) -> LevelAllowance:
    from scipy import ndimage

    x = np.asarray(small, dtype=np.float32)
    m = ndimage.uniform_filter(x, embed.MASK_WINDOW)
    var = np.maximum(ndimage.uniform_filter(x * x, embed.MASK_WINDOW) - m * m, 0.0)
    # The weakest variance nearby: a window that straddles an edge (a horizon
    # against the sky) is busy, but the smooth side of it is not, and there a
    # coarse change of the busy side's strength shows as a pale halo (seen on a
    # marked 24-megapixel landscape). The guard reaches past the window and the
    # spread of one spot after interpolation.
    var = ndimage.minimum_filter(var, size=COARSE_GUARD)
    k = 1.0 / local_ssim - 1.0
    level2 = (1.0 / LEVEL_SSIM - 1.0) * 2.0 * var + k * flat_weight(level.factor) * embed.SSIM_C2
    structure2 = native2 / max(window_fraction(level.factor), 1e-3)
    luminance2 = k * (2.0 * m * m + SSIM_C1)
    return LevelAllowance(level, level2, np.minimum(structure2, luminance2))


def coarse_mask(small: np.ndarray, native2: np.ndarray, factor: float, *, share: float = COARSE_SHARE,
                local_ssim: float = embed.DEFAULT_LOCAL_SSIM,
                psnr_db: float = embed.DEFAULT_PSNR_DB,
                budget: float | None = None) -> np.ndarray:
    """Amplitude of the coarse component at the level (float32).

    The least of three allowances:

    * at the level (what a downscaled copy shows, where the fine component
      is gone): the SSIM rule of :func:`claimkit.mark.embed.perceptual_mask`,
      ``a^2 <= (1/LEVEL_SSIM - 1) 2 s^2 + (1/q - 1) w C2`` with ``q`` the
      fine mark's target and ``w`` :func:`flat_weight` (smooth areas fainter:
      there the coarse change would show as a soft mottling);
    * at the picture's size, structure, ``share`` of the fine allowance:
      ``native2`` (the fine allowance squared, averaged per level pixel) over
      :func:`window_fraction`;
    * at the picture's size, luminance, ``share`` of it: the coarse change
      moves the local mean, and SSIM's luminance term ``(2 mu1 mu2 + C1) /
      (mu1^2 + mu2^2 + C1)`` loses about ``d^2 / (2 mu^2 + C1)``, which
      matters in dark areas.

    A water level then caps the mean square at ``budget`` (default ``share``
    of what ``psnr_db`` allows).
    """
    level = Level(tuple(np.shape(small)), factor)
    if budget is None:
        budget = embed.psnr_budget(psnr_db, share)
    return _allowance(small, native2, level, local_ssim).amplitude(share, budget)


def fine_sync_share(share: float) -> float | None:
    """Format 3's synchronisation share in the fine component when the coarse one has ``share``.

    None (the format's own, ``format3.SYNC_SHARE``) at ``COARSE_SHARE`` or
    below; above it the fine component is fainter, and its synchronisation
    keeps the energy it has at ``COARSE_SHARE``, the claim taking the cut:
    the lattice search that finds a turned or stretched copy at full size
    reads the synchronisation alone, and failed on busy textures given 0.9
    with the usual split (aspect 0.9: bound 1e-461 at 0.7, nothing at 0.9),
    while their claim has a wide margin.
    """
    if share <= COARSE_SHARE:
        return None
    return min(1.0, format3.SYNC_SHARE * (1.0 - COARSE_SHARE) / (1.0 - share))


def busy_share(allowance: LevelAllowance, fine_ms: float, total: float) -> float:
    """The coarse component's share for a picture: ``COARSE_SHARE``, more where it is budget-bound.

    At ``COARSE_SHARE`` the coarse component would take ``want`` (the mean of
    its allowance) and gets ``have`` (the PSNR budget ``total`` less the
    fine component's part of its mean square ``fine_ms``). Where ``want /
    have`` exceeds 1 (a busy texture from edge to edge, whose mask is at the
    PSNR cap everywhere) the share rises linearly to ``COARSE_SHARE_BUSY``,
    reached at ``BUSY_RATIO``. Such a picture's fine component keeps a wide
    margin at full size (grass: a bound of 1e-274), while its coarse one,
    all a 25 % copy keeps, is drowned by the texture at the level. A picture
    with smooth areas is left as it was (its coarse component is held by
    the level's own allowance, not by the budget), and so is one whose fine
    mask is below the PSNR cap (``FINE_AT_CAP``): a large master whose fine
    component reads full-size crops.
    """
    if fine_ms < FINE_AT_CAP * total:
        return COARSE_SHARE
    want = float(allowance.wanted(COARSE_SHARE).mean())
    have = total - (1.0 - COARSE_SHARE) * fine_ms
    t = min(1.0, max(0.0, (want / max(have, 1e-12) - 1.0) / (BUSY_RATIO - 1.0)))
    return COARSE_SHARE + (COARSE_SHARE_BUSY - COARSE_SHARE) * t


def scales_plan(luma: np.ndarray, seed: bytes, payload_bits: np.ndarray, *,
                share: float | None = None, strength: float = 1.0,
                local_ssim: float = embed.DEFAULT_LOCAL_SSIM,
                psnr_db: float = embed.DEFAULT_PSNR_DB, executor=None) -> ScalesPlan:
    """The fine and coarse components of a picture's mark, sharing one budget.

    The fine component gets ``1 - share`` of the mean squared change and of
    each window's SSIM allowance, the coarse one ``share`` of each window's
    allowance and whatever part of the mean squared change the fine one
    leaves (at least ``share``: on a picture with large smooth areas the fine
    mask stays below its cap, and the sum keeps to ``psnr_db``); a picture too
    small for a coarse level gets the fine mark alone at full strength.
    ``share`` defaults to :func:`busy_share` (``COARSE_SHARE``, more on a
    budget-bound busy picture); the plan records the share it used.
    """
    shape = np.shape(luma)
    if not has_coarse(shape) or (share is not None and share <= 0):
        return ScalesPlan(embed.mark_plan(luma, seed, payload_bits, strength=strength,
                                          local_ssim=local_ssim, psnr_db=psnr_db,
                                          executor=executor), None)
    mask = embed.mask_samples(luma, local_ssim=local_ssim, psnr_db=psnr_db, executor=executor)
    allowance = level_allowance(luma, mask, local_ssim=local_ssim)
    # The fine plan's mask is at full allowance (the strength scales its period), so the
    # fine change's mean square is (1 - share) mean(amp^2); the coarse gets the rest.
    total = embed.psnr_budget(psnr_db)
    fine_ms = float(np.mean(np.square(mask[0])))
    if share is None:
        share = busy_share(allowance, fine_ms, total)
    fine = embed.mark_plan(luma, seed, payload_bits, strength=strength * math.sqrt(1.0 - share),
                           local_ssim=local_ssim, psnr_db=psnr_db, mask=mask,
                           sync_share=fine_sync_share(share))
    coarse = coarse_plan(luma, seed, payload_bits, share=share, strength=strength,
                         local_ssim=local_ssim, psnr_db=psnr_db,
                         budget=total - (1.0 - share) * fine_ms, allowance=allowance)
    return ScalesPlan(fine, coarse, share)


def multiscale_delta(luma: np.ndarray, seed: bytes, payload_bits: np.ndarray, *,
                     share: float | None = None, strength: float = 1.0) -> np.ndarray:
    """The whole change (fine plus coarse) for a picture, at its size (float32)."""
    plan = scales_plan(luma, seed, payload_bits, share=share, strength=strength)
    return plan.rows(0, plan.shape[0])


# ---------------------------------------------------------------- examination

# Every scale a copy is examined at, all counted in the bound: the copy as it is,
# and the copy reduced (or enlarged) so that its short side, or its long side, is
# COARSE_SIDE. The first finds the coarse period of an uncropped copy at the
# level's own grid whatever its size; the second that of a copy cropped to
# another aspect across the original's long side (a landscape master posted
# as a 4:5 portrait keeps the master's full height, which is the copy's long side).
SCALES = ("native", "short side", "long side")


def view_shape(shape: tuple[int, int], view: str) -> tuple[int, int]:
    """Size of a copy of ``shape`` reduced to one coarse view.

    ``short side``: the copy fitted to its coarse level (:func:`coarse_level`:
    short side ``COARSE_SIDE``, or long side ``COARSE_LONG`` for a copy wider
    than 3:2); ``long side``: the long side ``COARSE_SIDE``.
    """
    if view == "short side":
        return coarse_level(shape).shape
    h, w = int(shape[0]), int(shape[1])
    f = COARSE_SIDE / max(h, w)
    return max(1, round(h * f)), max(1, round(w * f))


def overview_step(shape: tuple[int, int]) -> int:
    """Integer decimation that keeps at least twice the largest coarse view (1: none)."""
    return max(1, int(min(shape) // (2 * COARSE_SIDE)))


def decimate(x: np.ndarray, step: int) -> np.ndarray:
    """Mean of each ``step x step`` block (the last partial blocks included), float32.

    Block ``j`` is centred on pixel ``j step + (step - 1) / 2``, as a
    ``1 / step`` resampling with matched pixel centres would place it.
    """
    x = np.asarray(x, dtype=np.float32)
    if step <= 1:
        return x
    h, w = x.shape
    ph, pw = -h % step, -w % step
    if ph or pw:
        x = np.pad(x, ((0, ph), (0, pw)), mode="edge")
    return x.reshape(x.shape[0] // step, step, x.shape[1] // step, step).mean(axis=(1, 3))


class PreparedScales:
    """The key-independent part of an examination at every scale, each view made when first asked for.

    ``get(scale)`` is the :func:`claimkit.mark.detect.prepare` result of that
    scale's view, or None for a view too small to examine. The coarse views
    come from one overview of the copy (decimated once), and only the native
    view gets the lattice search: a coarse view puts the coarse period of a
    whole or cross-cropped downscale on the level's grid exactly, and the
    search would cost about as much as the native examination again. (Each
    view is still counted with every hypothesis of a full examination.)
    """

    def __init__(self, luma: np.ndarray, *, overview: np.ndarray | None = None, step: int = 1,
                 shape: tuple[int, int] | None = None, workers: int = 1) -> None:
        if min(np.shape(luma)) < detect.MIN_SIDE:
            raise ValueError(f"image side below {detect.MIN_SIDE} pixels")
        self.shape = tuple(np.shape(luma)) if shape is None else (int(shape[0]), int(shape[1]))
        self.luma, self.overview, self.step, self.workers = luma, overview, step, workers
        self.view_shapes = {"native": tuple(np.shape(luma))}
        self.view_shapes.update({v: view_shape(self.shape, v) for v in SCALES[1:]})
        self._done: dict = {}

    def _reduced(self, shape: tuple[int, int]) -> np.ndarray:
        """The whole copy resampled to ``shape`` (from its overview, made once)."""
        if self.overview is None:
            self.step = overview_step(self.shape)
            self.overview = decimate(self.luma, self.step)
        return resample(self.overview, shape, span=(self.shape[0] / self.step, self.shape[1] / self.step))

    def get(self, name: str):
        """The prepared view ``name`` (computed once), or None when too small to examine."""
        if name not in self._done:
            x = self.luma if name == "native" else self._reduced(self.view_shapes[name])
            if min(x.shape) < detect.MIN_SIDE:
                self._done[name] = None
            else:
                prep = detect.prepare(x, workers=self.workers, lattices=name == "native")
                if name == "short side":
                    # The view at its two other sizes (stretched_shapes): each one's fold is
                    # at the level's grid if the level has its size, and the level maps onto
                    # this view by the ratio of the sizes. Format 3 tries its claim on each
                    # at the file's own grid.
                    shapes = stretched_shapes(self.shape)
                    maps = [np.diag([x.shape[0] / s[0], x.shape[1] / s[1]]) for s in shapes]
                    prep = detect.with_views(prep, [self._reduced(s) for s in shapes], maps)
                    prep = replace(prep, own=tuple(range(len(prep.spectra))))
                self._done[name] = prep
        return self._done[name]


def stretched_shapes(shape: tuple[int, int]) -> list[tuple[int, int]]:
    """The two other sizes of the ``short side`` view read beside it (for a copy of ``shape``).

    A whole copy reduces to its level exactly only if the view has the level's
    size, and the view's size is the copy's, rounded: one side of the view is
    the level's (``COARSE_SIDE`` or ``COARSE_LONG``), the other is known only to
    within the rounding of the copy's aspect, a relative error up to ``e =
    0.5 / h + 0.5 / w`` (0.4 %, two level pixels across a 25 % copy of a
    1.5-megapixel photo: the coarse spots, one level pixel wide, are then
    misplaced by up to two at the far edge; reading the view at the level's
    size raised the bound of such copies from 1e-27 to 1e-36). That side is
    therefore also read ``max(1, round(2 e L / 3))`` pixels shorter and longer.
    Each is a geometry of the view, within the count of geometries
    (``detect.GEOMETRIES``), and format 3's claim is tried on each at the
    file's own grid (``detect.OWN_PLACEMENTS``).
    """
    h, w = int(shape[0]), int(shape[1])
    vh, vw = coarse_level(shape).shape
    # The side fitted to COARSE_SIDE (the short one) or to COARSE_LONG is exact.
    short = 0 if h <= w else 1
    axis = 1 - short if min(vh, vw) == COARSE_SIDE else short
    side = (vh, vw)[axis]
    k = max(1, round(2.0 * (0.5 / h + 0.5 / w) * side / 3.0))
    out = []
    for d in (-k, k):
        s = [vh, vw]
        s[axis] = side + d
        out.append((s[0], s[1]))
    return out


def prepare(luma: np.ndarray, *, overview: np.ndarray | None = None, step: int = 1,
            shape: tuple[int, int] | None = None, workers: int = 1) -> PreparedScales:
    """Every scale's view prepared at once (for examining one copy under many keys)."""
    prep = PreparedScales(luma, overview=overview, step=step, shape=shape, workers=workers)
    for name in SCALES:
        prep.get(name)
    return prep


def examine(luma: np.ndarray, seed: bytes | format3.MarkKeys, *,
            overview: np.ndarray | None = None, step: int = 1,
            shape: tuple[int, int] | None = None,
            threshold: float = detect.DEFAULT_THRESHOLD, workers: int = 1,
            prepared: PreparedScales | None = None, offset: tuple[int, int] | None = None,
            **kwargs) -> detect.Finding:
    """Examine a copy at its own resolution and at each coarse view; the strongest finding wins.

    Parameters
    ----------
    luma : ndarray, (H, W)
        The copy's luma, or the central window of it that
        :func:`claimkit.mark.detect.examine_luma` reads at native resolution.
    seed : bytes
    overview : ndarray, optional
        The whole copy's luma decimated by ``step`` (:func:`decimate`, or a
        decoder's own box reduction); made from ``luma`` when not given (then
        ``luma`` must be the whole copy).
    shape : (H, W), optional
        The whole copy's size (default: ``luma``'s).
    threshold : float
        ``detected`` means the bound, counting every scale, is at most this.
    prepared : PreparedScales, optional
        From :func:`prepare` for this copy (then ``luma`` is not read again).
    offset : (row, col), optional
        Where ``luma`` (a window) sits in the copy, for a format whose cells are
        larger than its tile; given to the native examination only.
    **kwargs
        Passed to :func:`claimkit.mark.detect.examine_luma`.

    Returns
    -------
    Finding
        ``hypotheses`` counts the placements of every scale searched,
        ``scales_searched`` says how many scales; a finding made at a coarse
        view has ``geometry["level"]`` (see :func:`relative_to_original`).
        Without a claim, the bound is the lowest view's and the rest is the
        native view's (or a view whose synchronisation suspects a removal):
        what every holder of the sync seed re-runs alike.
    """
    if prepared is None:
        prepared = PreparedScales(luma, overview=overview, step=step, shape=shape, workers=workers)
    shape = prepared.shape
    n = len(SCALES)
    best = None
    seen = []
    for name in SCALES:
        prep = prepared.get(name)
        if prep is None:     # a view too small to examine (still counted in n)
            continue
        # The coarse views look for the coarse component, under its own keys; a view
        # is the whole copy, so a window's offset applies at native resolution only.
        extra: dict[str, Any] = {} if offset is None or name != "native" else {"offset": offset}
        key = seed if name == "native" else coarse_keys(seed)
        # Each scale is tested at threshold / n: the union bound over the n scales.
        f = detect.examine_luma(luma, key, threshold=threshold / n, workers=workers,
                                prepared=prep, **extra, **kwargs)
        seen.append((name, f))
        if best is None or f.log10_false_alarm < best[1].log10_false_alarm:
            best = (name, f)
        if f.detected:
            # A claim at one scale is a claim: the other scales need not be looked at,
            # and the bound still counts them (the count is fixed in advance).
            break
    assert best is not None, "the native view is always examined"
    name, f = best
    lp = f.log10_false_alarm
    if not f.detected:
        # Nothing claimed: which view's bound is lowest depends on keys a disclosure
        # holder may not hold (format 3's other families, the seed of formats 1-2). The
        # view reported is chosen by the sync seed alone, so that every holder of it
        # re-runs the same synchronisation findings: the one whose synchronisation
        # suspects a removal (the highest score of those), else the native view.
        # The bound is still the lowest view's.
        flagged = [v for v in seen if v[1].removal_suspected]
        name, f = max(flagged, key=lambda v: v[1].z_sync or 0.0) if flagged else seen[0]
    geom = dict(f.geometry)
    if geom and name != "native":
        geom = _view_geometry(geom, shape, prepared.view_shapes[name], name)
    return replace(f, log10_false_alarm=min(0.0, lp + math.log10(n)),
                   hypotheses=f.hypotheses * n, scales_searched=n, geometry=geom,
                   counting={**f.counting, "scales": n} if f.counting else {})


def _view_geometry(geom: dict, shape: tuple[int, int], vshape: tuple[int, int], view: str) -> dict:
    """A coarse view's geometry in the copy's pixels; the original side is its coarse level.

    At a view, the geometry maps the original's coarse level to the view. In
    the copy's pixels that is the matrix divided by the view's factor
    ``g``; the scale, matrix and grid offset are therefore those of the copy
    against the original *reduced to its coarse level* (short side
    ``COARSE_SIDE``): :func:`relative_to_original` turns them into the usual
    copy-against-original figures once the original's size is known.
    """
    gy, gx = vshape[0] / shape[0], vshape[1] / shape[1]
    g = math.sqrt(gy * gx)
    out = dict(geom)
    out["scale"] = round(geom["scale"] / g, 5)
    out["matrix"] = [[round(geom["matrix"][0][0] / gx, 6), round(geom["matrix"][0][1] / gx, 6)],
                     [round(geom["matrix"][1][0] / gy, 6), round(geom["matrix"][1][1] / gy, 6)]]
    out["shift_px"] = [round(geom["shift_px"][0] / gx, 2), round(geom["shift_px"][1] / gy, 2)]
    out["examined_window"] = [0, 0, int(shape[1]), int(shape[0])]
    out["level"] = {"view": view, "side_px": COARSE_SIDE,
                    "view_size": [int(vshape[1]), int(vshape[0])],
                    "reference": "the original reduced to its coarse level"}
    return out


def relative_to_original(geom: dict, original_shape: tuple[int, int]) -> dict:
    """A coarse finding's geometry against the original itself, given its (height, width).

    Unchanged for a finding made at native resolution.
    """
    if not geom or "level" not in geom:
        return geom
    f = coarse_level(original_shape).factor
    out = dict(geom)
    out["scale"] = round(geom["scale"] * f, 5)
    out["matrix"] = [[round(v * f, 6) for v in row] for row in geom["matrix"]]
    out["level"] = {**geom["level"], "reference": "the original",
                    "original_level_factor": round(f, 6)}
    return out


def reduce_copy(luma: np.ndarray, view: str = "short side") -> np.ndarray:
    """A whole copy's luma resampled to one coarse view."""
    shape = np.shape(luma)
    return resample(luma, view_shape(shape, view))
