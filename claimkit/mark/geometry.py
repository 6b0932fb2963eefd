"""Blind geometric resynchronisation from the lattice of the tiled mark.

The mark repeats with period ``TILE`` in the original, so the copy's
autocorrelation has peaks on a lattice ``L = A Z^2`` whose basis ``A`` is the
copy's linear distortion times ``TILE``. A single peak of that lattice is
often too weak to see (a dark, noisy picture; a copy shrunk, rotated and
recompressed), but the lattice has many points, and their evidence adds up.
So instead of picking peaks we score whole lattice hypotheses:

1. **Autocorrelation.** The pre-whitened copy (a central window, zero-padded
   so that lags do not wrap) is transformed; its power spectrum is divided by
   a local average of itself (the picture's own spectrum becomes nearly flat,
   the mark's comb of spectral lines survives) and clipped, so that a few
   strong lines of a periodic texture (brick, a tiled floor, text) cannot
   outweigh the mark's thousands of weak ones. Each lag is then expressed in
   units of its own noise level.
2. **Coarse search in log-polar coordinates.** A square lattice turned by
   ``theta`` and scaled by ``s`` puts its points at ``log r = log s +
   log(TILE |n|)`` and ``phi = theta + arg n``: in log-polar coordinates every
   similarity is a shift of one fixed comb, so all (scale, angle) hypotheses
   of a grid are scored by summing shifted copies of one resampled array
   (the idea of Fourier-Mellin registration [1]_, [2]_, applied to the
   lattice rather than to an image). A few aspect ratios along the picture's
   axes (a copy squeezed to fit a box) are tried by resampling the same
   autocorrelation.
3. **Refinement.** Each basis vector of the best few hypotheses is moved in
   turn, on a pixel grid within the aspect range, to where the near lattice
   points score best (this catches squeezes and shears the grids do not
   model); then the sub-pixel peak near each predicted lattice point is
   located and the basis (a general linear map, four parameters) is fitted to
   them by weighted least squares, widening the radius as the estimate
   sharpens, so that the far lattice points, which fix the basis most
   precisely, are used last. Lattices that are aliases of a better one (every
   other point, or points halfway between) are dropped, and so are lattices
   not worth resampling (the original grid itself, which the detector's
   unwarped hypothesis covers exactly, and runners-up far weaker than a
   clear winner).

The key is never used here (format 3's keyed search, :mod:`claimkit.mark.detect`, scores the
coarse hypotheses of :func:`similarities` with its synchronisation key and counts them all),
and the number of hypotheses the detector counts
is fixed in advance (at most ``LATTICE_CANDIDATES`` lattices, counted whether
or not they are found), so the statistics of :mod:`claimkit.mark.stats` stay
valid whatever the search finds. The eight symmetries of the square
lattice (quarter turns and mirror) are not estimated: the detector tries all
eight on the folded tile, where they are exact permutations.

References
----------
.. [1] B. S. Reddy, B. N. Chatterji, "An FFT-based technique for translation,
   rotation, and scale-invariant image registration", IEEE Trans. Image
   Process. 5(8), 1266-1271, 1996. doi:10.1109/83.506761
.. [2] J. J. K. O Ruanaidh, T. Pun, "Rotation, scale and translation invariant
   spread spectrum digital image watermarking", Signal Processing 66(3),
   303-317, 1998. doi:10.1016/S0165-1684(98)00012-7
.. [3] M. Kutter, "Watermarking resisting to translation, rotation, and
   scaling", Proc. SPIE 3528, Multimedia Systems and Applications, 1999.
   doi:10.1117/12.337432
.. [4] J. L. Lagrange / C. F. Gauss lattice basis reduction, as in
   H. Cohen, *A Course in Computational Algebraic Number Theory*, Springer,
   1993, alg. 1.3.14.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import fft as sfft
from scipy import ndimage

ACF_WINDOW = 1024          # largest side of the central window whose autocorrelation is taken
LAG_MAX = 512              # largest lag used (the zero padding is this wide)
# Copy/original scale the search covers: 0.5x..2x, and a 400 px photo posted 1080 wide.
SCALE_RANGE = (0.45, 2.8)
ASPECT_RANGE = 0.1         # aspect changes along the picture's axes: up to +-10 %
LATTICE_CANDIDATES = 2     # fixed number of lattice hypotheses (counted in the statistics)
# Similarity hypotheses of the coarse grid handed to a keyed search (format 3's
# synchronisation, see claimkit.mark.detect): on small, busy copies the mark's lattice is too
# faint to win the keyless ranking, but it stayed among the 320 best coarse maxima on every
# copy measured, where a correlation with the known pattern picks it out.
SIMILARITY_CANDIDATES = 384
ASPECT_CANDIDATES = 64     # ... and of the grid of squeezed copies

MIN_OVERLAP = 0.05         # lags where the window overlaps itself less than this are not used
FLATTEN_WINDOW = 15        # frequencies averaged to estimate the picture's own power
FLATTEN_CLIP = 6.0         # cap on the flattened power: no single spectral line dominates
COARSE_BLUR = 1.0          # smoothing of the autocorrelation for the coarse grids (pixels)
FINE_BLUR = 0.7            # smoothing for refinement and final scores (pixels)
# Coarse grids: (largest lag used, log-radius and angle step in radians,
# aspects along the picture's axes, aspects along the original's axes, kept).
# Similarities get a fine grid over many lattice points; squeezed copies a
# coarser one over the nearer points (3-4 % steps: the wide search of the
# refinement takes over from there).
COARSE_LAG = 420           # largest lag of the coarse grids
SIMILARITY_GRID = (COARSE_LAG, 0.004, (1.0,), (), 6)
ASPECT_GRID = (192, 0.008, (0.90, 0.93, 0.96, 1 / 0.96, 1 / 0.93, 1 / 0.90),
               (0.92, 0.96, 1 / 0.96, 1 / 0.92), 4)
REFINE_RADII = (200, 360, LAG_MAX)   # growing radii of the refinement passes
GRID_SNAP = 0.01           # a fit this close to the copy's own grid (per tile) is compared with it
CLEAR_SCORE = 15.0         # a lattice scoring this much stands out clearly from noise (~5 at most)
RUNNER_UP = 0.25           # ... and then lattices below this fraction of it are not resampled
DEN_STEP = 8               # angle subsampling of the coarse scores' variance
# Sanity limits on any basis the search builds (see degenerate()): the shortest
# plausible vector is SCALE_RANGE[0] * TILE * (1 - ASPECT_RANGE), about 52 px;
# these limits only reject bases that no plausible refinement can reach.
MIN_BASIS_PX = 8.0         # smallest singular value of a usable basis, pixels
MAX_CONDITION = 8.0        # largest ratio of its singular values
MAX_GRID_SIDE = 4 * LAG_MAX // 8   # half-side of the lattice-point enumeration grid (256)
MIN_SUPPORT = 0.25         # least summed squared weight of a coarse hypothesis


@dataclass(frozen=True)
class Lattice:
    """A lattice found in the copy: basis columns in (row, col) pixels and how well it is supported.

    ``score`` is the lattice's weighted sum of autocorrelation in
    standard-normal units: about 0 for a lattice that is not there, up to
    about 5 for the best of the search's many hypotheses on a picture
    without the mark, tens to hundreds when the mark is plainly present.
    ``inliers`` counts the lattice points whose own peak stands out.
    """

    basis: np.ndarray   # 2x2, columns are the two basis vectors
    score: float
    inliers: int
    points: int = 0     # lattice points inside the lags searched

    def transform(self, tile: int) -> np.ndarray:
        """Linear map from original (row, col) to copy (row, col)."""
        return self.basis / float(tile)


# ---------------------------------------------------------------- autocorrelation

@dataclass
class _Acf:
    z: np.ndarray        # lag map in noise units, lag (0, 0) at [c, c]
    weight: np.ndarray   # expected relative signal at each lag (overlap of the window with itself)
    zw: np.ndarray       # z * weight: what the lattice scores sum
    coarse: np.ndarray   # z * weight smoothed more, central lags only, lag (0, 0) at [cc, cc]
    c: int               # index of lag zero in z
    cc: int              # index of lag zero in coarse
    window: tuple[int, int]   # height and width of the window


def _fast(n: int) -> int:
    return sfft.next_fast_len(n, real=True)


def lag_map(x: np.ndarray, *, window: int = ACF_WINDOW, lag_max: int = LAG_MAX,
            coarse_lag: int = COARSE_LAG, workers: int = 1) -> _Acf:
    """Spectrally flattened, clipped autocorrelation of a central window, in noise units.

    Parameters
    ----------
    x : ndarray, (H, W)
        The pre-whitened copy.
    window : int
        Largest side of the central window used.
    lag_max : int
        Largest lag kept (the window is zero-padded by this much, so lags up
        to ``lag_max`` do not wrap around).
    coarse_lag : int
        Largest lag of the more smoothed copy used by the coarse search.

    Returns
    -------
    _Acf
    """
    h, w = x.shape
    sh, sw = min(h, window), min(w, window)
    r0, c0 = (h - sh) // 2, (w - sw) // 2
    win = np.asarray(x[r0:r0 + sh, c0:c0 + sw], dtype=np.float32)
    win = win - np.float32(win.mean())
    lag = min(lag_max, max(sh, sw))
    fh, fw = _fast(sh + lag), _fast(sw + lag)
    # The zero rows of the padding need no transform along the columns' axis:
    # rows first (sh of them), then the columns at full length.
    spec = sfft.rfft(win, n=fw, axis=1, workers=workers)
    spec = sfft.fft(spec, n=fh, axis=0, overwrite_x=True, workers=workers)
    power = spec.real * spec.real
    power += spec.imag * spec.imag
    del spec
    local = _box_wrap(power, FLATTEN_WINDOW)
    local += np.float32(1e-20 + 1e-9 * float(local.mean()))
    flat = np.divide(power, local, out=local)          # in place: fresh arrays cost page faults
    np.minimum(flat, np.float32(FLATTEN_CLIP), out=flat)
    del power
    flat[0, 0] = 0.0
    # Light smoothing of the lags (so that bilinear sampling between pixels
    # loses little of a one-pixel-wide peak) is free in the frequency domain.
    flat *= _blur_transfer(fh, fw)
    # Inverse transform, keeping lags -lag..lag in both directions, lag zero
    # at the centre. ``flat`` is real, so along the columns its inverse
    # transform is Hermitian: ihfft gives rows 0..fh/2 for half the work of a
    # complex transform, and rows -lag..-1 are the conjugates of rows lag..1
    # (lag <= sh keeps lag <= fh / 2, since fh >= sh + lag).
    # The rows not kept are dropped before the second pass (two thirds of
    # the work of a full irfft2).
    if lag <= sh:
        half = sfft.ihfft(flat, axis=0, workers=workers)[:lag + 1]
        rows = np.concatenate([np.conj(half[lag:0:-1]), half], axis=0)
        del half
    else:                # a window lower than the lags kept (those lags are not used)
        acf = sfft.ifft(flat, axis=0, workers=workers)
        rows = np.concatenate([acf[fh - lag:], acf[:lag + 1]], axis=0)
        del acf
    rows = sfft.irfft(rows, n=fw, axis=1, overwrite_x=True, workers=workers)
    a = np.concatenate([rows[:, fw - lag:], rows[:, :lag + 1]], axis=1).astype(np.float32, copy=False)
    weight, inv_noise, valid = _lag_weights(lag, sh, sw)
    a *= inv_noise
    z = _ring_normalise(a, lag, valid)
    zw = z * weight
    cl = min(coarse_lag, lag - 5)
    extra = float(np.sqrt(COARSE_BLUR ** 2 - FINE_BLUR ** 2))
    region = zw[lag - cl - 4:lag + cl + 5, lag - cl - 4:lag + cl + 5]
    coarse = ndimage.gaussian_filter(region, extra)
    return _Acf(z=z, weight=weight, zw=zw, coarse=coarse, c=lag, cc=cl + 4, window=(sh, sw))


def _box_wrap(a: np.ndarray, size: int, rows: int = 256) -> np.ndarray:
    """``ndimage.uniform_filter(a, size, mode="wrap")``, in strips of rows that stay in cache.

    The rows are wrapped by hand and each strip reads the ``size // 2`` rows
    beyond it, so every value averages the same neighbours (to float32
    rounding: the running sums start at other rows); 10 -> 7 ms on the
    1536 x 769 power spectrum of a 1-megapixel window.
    """
    h, r = a.shape[0], size // 2
    if h <= rows:
        return ndimage.uniform_filter(a, size, mode="wrap")
    padded = np.concatenate([a[h - r:], a, a[:r]])
    out = np.empty_like(a)
    for r0 in range(0, h, rows):
        n = min(rows, h - r0)
        out[r0:r0 + n] = ndimage.uniform_filter(padded[r0:r0 + n + 2 * r], size, mode="wrap")[r:r + n]
    return out


@lru_cache(maxsize=2)
def _blur_transfer(fh: int, fw: int) -> np.ndarray:
    """Transfer function of a Gaussian of ``FINE_BLUR`` pixels on an ``fh x fw`` real-FFT grid."""
    g = -2.0 * (np.pi * FINE_BLUR) ** 2
    fy = np.fft.fftfreq(fh)
    fx = np.fft.rfftfreq(fw)
    return np.outer(np.exp(g * fy * fy), np.exp(g * fx * fx)).astype(np.float32)


@lru_cache(maxsize=2)
def _lag_weights(lag: int, sh: int, sw: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Weight, inverse noise level and usable mask of each lag, for an ``sh x sw`` window.

    The raw autocorrelation at lag L sums over the overlap of the window with
    its shifted self: the mark's contribution grows with the overlap, the
    noise with its square root. Dividing by the square root puts every lag in
    the same noise units; the expected signal there is then proportional to
    the square root of the overlap, the weight that makes sums of lags
    matched filters.
    """
    d = np.arange(-lag, lag + 1, dtype=np.float32)
    ov_r = np.clip(1.0 - np.abs(d) / sh, 0.0, None)
    ov_c = np.clip(1.0 - np.abs(d) / sw, 0.0, None)
    overlap = np.outer(ov_r, ov_c)
    valid = overlap >= MIN_OVERLAP
    root = np.sqrt(overlap)
    weight = np.where(valid, root, 0.0).astype(np.float32)
    inv_noise = np.where(valid, 1.0 / np.maximum(root, 1e-3), 0.0).astype(np.float32)
    for arr in (weight, inv_noise, valid):
        arr.setflags(write=False)
    return weight, inv_noise, valid


@lru_cache(maxsize=4)
def _rings(c: int, width: float = 4.0, step: int = 3) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Ring index of every lag of a (2c+1)^2 map, the same on a sparse subgrid, and counts there."""
    d = np.arange(-c, c + 1, dtype=np.float32)
    ring = (np.sqrt(d[:, None] ** 2 + d[None, :] ** 2) / np.float32(width)).astype(np.int32)
    sub = ring[::step, ::step].ravel()
    return ring, sub, np.bincount(sub, minlength=ring.max() + 1).astype(np.float64)


def _ring_normalise(z: np.ndarray, c: int, valid: np.ndarray) -> np.ndarray:
    """Divide each ring of lags by its own robust spread (in place; picture structure left at short lags).

    Only lags with enough overlap (``valid``) count. The spread is estimated
    on every third lag in each direction: it varies slowly with the radius,
    and the full map would cost more than the search.
    """
    ring, sub, _ = _rings(c)
    ok = valid[::3, ::3].ravel()
    v = z[::3, ::3].ravel()[ok]
    sub = sub[ok]
    size = int(ring.max()) + 1
    v2 = v * v
    n = np.bincount(sub, minlength=size).astype(np.float64)
    s2 = np.bincount(sub, v2, minlength=size) / np.maximum(n, 1)
    # Second pass without the outliers (the mark's own peaks would inflate the spread);
    # a Gaussian clipped at 4 sigma keeps 99.99 % of its variance, so no correction.
    keep = v2 <= 16.0 * s2[sub]
    n2 = np.bincount(sub, keep, minlength=size)
    s2 = np.bincount(sub, np.where(keep, v2, 0.0), minlength=size) / np.maximum(n2, 1)
    # Rings with too few valid lags to estimate a spread are left out.
    inv = np.where((s2 > 0) & (n2 >= 8), 1.0 / np.sqrt(np.maximum(s2, 1e-30)), 0.0).astype(np.float32)
    z *= np.take(inv, ring)      # take: the same gather, 40 % faster than indexing
    return z


# ---------------------------------------------------------------- coarse search

def _comb(max_norm: float) -> tuple[np.ndarray, np.ndarray]:
    """Lattice vectors n != 0 with |n| <= max_norm, one per orbit of the quarter turn.

    Returns log|n| and arg n in [0, pi/2) (angle measured from +col towards +row).
    """
    m = int(np.ceil(max_norm))
    i2, j2 = np.meshgrid(np.arange(-m, m + 1), np.arange(-m, m + 1), indexing="ij")
    i, j = i2.ravel(), j2.ravel()
    nrm = np.hypot(i, j)
    keep = (nrm > 0) & (nrm <= max_norm)
    ang = np.arctan2(i[keep], j[keep])
    rep = (ang >= 0) & (ang < np.pi / 2 - 1e-9)     # one of the four quarter-turn copies
    return np.log(nrm[keep][rep]), ang[rep]


def _coarse(acf: _Acf, tile: int, grid) -> list[tuple[float, np.ndarray]]:
    """Score a log-polar grid of (scale, angle, aspect) hypotheses; return the best few.

    ``grid`` is (largest lag, step, picture aspects, lattice aspects, kept).
    A *picture* aspect squeezes the copy along its own axes after any turn
    (the lags are resampled for it); a *lattice* aspect squeezes it along the
    original's axes before the turn (the same samples serve, with a
    rectangular comb).
    """
    radius, d, aspects, lattice_aspects, keep = grid
    lo, hi = SCALE_RANGE
    r_lo = lo * tile * (1 - ASPECT_RANGE)
    r_hi = min(radius, acf.cc - 6)
    if r_hi <= r_lo * 1.2:
        return []
    n_phi = round((np.pi / 2) / d)
    dphi = (np.pi / 2) / n_phi
    n_rho = int(np.ceil(np.log(r_hi / r_lo) / d)) + 1
    rho = np.log(r_lo) + d * np.arange(n_rho)
    phi = dphi * np.arange(n_phi)
    cc = acf.cc
    max_norm = r_hi / (lo * tile * (1 - ASPECT_RANGE))
    # Scale index k: log s = rho[k] - log(tile), so lattice point n sits at row k + log|n| / d.
    k_lo = int(np.ceil((np.log(lo * tile) - rho[0]) / d))
    k_hi = min(n_rho - 1, int(np.floor((np.log(hi * tile) - rho[0]) / d)))
    if k_hi < k_lo:
        return []
    ks = np.arange(k_lo, k_hi + 1)
    best = []
    lo_rho = float(np.log(r_lo))

    def sample(a):
        # Lags (row, col) = (r sin phi, a r cos phi) and their quarter turns:
        # scores (n_rho, 2, n_phi), and the variance of each score (its summed
        # squared weights; it varies slowly with the angle, so every
        # DEN_STEP-th angle is enough). The sampling is a fixed linear map of
        # the lag map for a given grid, so it is built once per process: the
        # grid is the same for every window at least COARSE_LAG + 5 px wide.
        # Smaller windows each have their own grid, where building the map
        # would cost more than sampling directly.
        if cc == COARSE_LAG + 4:
            m = _polar_sampler(acf.coarse.shape, cc, lo_rho, d, n_rho, n_phi, a)
            g = (m @ acf.coarse.ravel()).reshape(n_rho, 2, n_phi)
        else:
            coords = _polar_coords(cc, lo_rho, d, n_rho, n_phi, a).reshape(2, -1)
            g = ndimage.map_coordinates(acf.coarse, coords, order=1).reshape(n_rho, 2, n_phi)
        v = _polar_support(acf.window, cc, lo_rho, d, n_rho, n_phi, a)
        return g, v

    def peaks(score, a, lattice_aspect):
        # Hypotheses with almost no lags inside the window say nothing; keep
        # the local maxima of the score surface (the angle is circular).
        found = _top_maxima(score, keep)
        if not found:
            return
        ki, pj, val = (np.array(v) for v in zip(*found, strict=True))
        bases = _bases(np.exp(rho[ki + k_lo]), phi[pj], a, lattice_aspect)
        best.extend(zip(val.tolist(), bases, strict=True))

    def comb_sum(g, v, log_n, arg_n, period):
        """Sum of shifted rows and columns of ``g`` (scores) and ``v`` (variances) over a comb.

        Each comb point adds the rows ``ks + offset`` (those inside the grid)
        turned circularly by its angle; the turn is a slice of the array
        written twice side by side, so every term is a view, not a copy. The
        scores are summed in float32 (a few dozen terms of order one; 2.7x
        faster than float64), the variances in float64.
        """
        num = np.zeros((ks.size, g.shape[1]), dtype=np.float32)
        den = np.zeros((ks.size, v.shape[1]))
        g2, v2 = np.concatenate([g, g], axis=1), np.concatenate([v, v], axis=1)
        for lr, ar in zip(log_n, arg_n, strict=True):
            first = ks[0] + int(np.rint(lr / d))
            rows = min(ks.size, n_rho - first)
            if rows <= 0:
                continue
            shift = int(np.rint(ar / dphi))
            sg, sv = shift % g.shape[1], round(shift / DEN_STEP) % v.shape[1]
            num[:rows] += g2[first:first + rows, sg:sg + g.shape[1]]
            den[:rows] += v2[first:first + rows, sv:sv + v.shape[1]]
        den = np.repeat(den, DEN_STEP, axis=1)[:, :period]
        score = np.where(den[:, :n_phi] >= MIN_SUPPORT,
                         num[:, :n_phi] / np.sqrt(np.maximum(den[:, :n_phi], 1e-12)), 0.0)
        return score

    log_sq, arg_sq = _comb(max_norm)
    for a in aspects:
        g, v = sample(a)
        # Square comb: both quarter-turn copies of a lag are the same lattice point's.
        peaks(comb_sum(g.sum(axis=1), v.sum(axis=1), log_sq, arg_sq, n_phi), a, 1.0)
    if lattice_aspects:
        g, v = sample(1.0)
        # Directions 0..pi (the lag map is symmetric): a rectangle has no quarter-turn symmetry.
        g_half, v_half = g.reshape(n_rho, -1), v.reshape(n_rho, -1)
        for b in lattice_aspects:
            log_n, arg_n = _comb_rect(max_norm, b)
            peaks(comb_sum(g_half, v_half, log_n, arg_n, 2 * n_phi), 1.0, b)
    best.sort(key=lambda t: -t[0])
    return best[:keep]


def _top_maxima(score: np.ndarray, keep: int, size: int = 7) -> list[tuple[int, int, float]]:
    """The ``keep`` highest positive local maxima of ``score``, best first: (row, col, value).

    A local maximum is at least every value of the ``size x size`` block
    around it, rows clamped at the edges and columns circular: what comparing
    with ``ndimage.maximum_filter(mode=("nearest", "wrap"))`` finds, but only
    the highest values are looked at (the filter over the whole surface cost
    more than the comb sums).
    """
    w = score.shape[1]
    flat = score.ravel()
    r = size // 2
    # Every value's block, read from one copy padded with the edge rows and wrapped columns
    # (the candidates' blocks are then one gather, not a NumPy call each: ~8000 calls per
    # 24 MP examination before). The same comparisons of the same values, so the same peaks.
    padded = np.pad(np.pad(score, ((r, r), (0, 0)), mode="edge"), ((0, 0), (r, r)), mode="wrap")
    blocks = np.lib.stride_tricks.sliding_window_view(padded, (size, size))
    count = min(flat.size, 32 * keep)
    while True:
        cand = np.argpartition(flat, flat.size - count)[flat.size - count:]
        cand = cand[np.argsort(flat[cand])[::-1]]
        vals = flat[cand]
        low = np.flatnonzero(vals <= 0)     # best first: from the first one on, none is positive
        stop = int(low[0]) if low.size else cand.size
        i, j = np.divmod(cand[:stop], w)
        hits = np.flatnonzero(vals[:stop] >= blocks[i, j].max(axis=(1, 2)))[:keep]
        out = [(int(i[k]), int(j[k]), float(vals[k])) for k in hits]
        if len(out) == keep or stop < cand.size or count == flat.size:
            return out
        count = min(flat.size, 8 * count)


def _polar_coords(cc: int, lo_rho: float, d: float, n_rho: int, n_phi: int, a: float,
                  step: int = 1) -> np.ndarray:
    """Lag coordinates (2, n_rho, 2, n_phi // step) of a log-polar grid and its quarter turn.

    Row and column of lag ``(r sin phi, a r cos phi)`` and of its quarter
    turn ``(r cos phi, -a r sin phi)``, about the centre ``cc``.
    """
    rr = np.exp(lo_rho + d * np.arange(n_rho))[:, None]
    phi = ((np.pi / 2) / n_phi) * np.arange(n_phi)[::step]
    sp, cp = np.sin(phi)[None, :], np.cos(phi)[None, :]
    return np.stack([np.stack([cc + rr * sp, cc + rr * cp], axis=1),
                     np.stack([cc + a * rr * cp, cc - a * rr * sp], axis=1)])


@lru_cache(maxsize=32)
def _polar_sampler(shape: tuple[int, int], cc: int, lo_rho: float, d: float, n_rho: int,
                   n_phi: int, a: float):
    """Bilinear interpolation at the grid's lags, as a sparse matrix (four weights a row).

    The same numbers as ``ndimage.map_coordinates(order=1)`` at these points
    (all lie inside the map) to float32 rounding of the weights, in about a
    fifth of the time once built; a scan meets the same few grids on every
    picture.
    """
    from scipy import sparse

    y, x = _polar_coords(cc, lo_rho, d, n_rho, n_phi, a).reshape(2, -1)
    y0, x0 = np.floor(y), np.floor(x)
    fy, fx = y - y0, x - x0
    i = (y0 * shape[1] + x0).astype(np.int32)
    cols = np.empty((y.size, 4), dtype=np.int32)
    vals = np.empty((y.size, 4), dtype=np.float32)
    for k, (dy, dx) in enumerate(((0, 0), (0, 1), (1, 0), (1, 1))):
        cols[:, k] = i + (dy * shape[1] + dx)
        vals[:, k] = (fy if dy else 1 - fy) * (fx if dx else 1 - fx)
    return sparse.csr_matrix((vals.ravel(), cols.ravel(), np.arange(0, 4 * y.size + 1, 4)),
                             shape=(y.size, shape[0] * shape[1]))


@lru_cache(maxsize=32)
def _polar_support(window: tuple[int, int], cc: int, lo_rho: float, d: float, n_rho: int,
                   n_phi: int, a: float) -> np.ndarray:
    """Squared weights (overlap) of the grid's lags, every ``DEN_STEP``-th angle, (n_rho, 2, k)."""
    dy, dx = _polar_coords(cc, lo_rho, d, n_rho, n_phi, a, DEN_STEP) - cc
    out = _overlap(window, dy, dx)
    out.setflags(write=False)
    return out


def _overlap(window: tuple[int, int], dy: np.ndarray, dx: np.ndarray) -> np.ndarray:
    """Squared weight (overlap fraction of the window with itself) at lags (dy, dx).

    Zero where the overlap is too small to use.
    """
    sh, sw = window
    ov = np.clip(1.0 - np.abs(dy) / sh, 0.0, None) * np.clip(1.0 - np.abs(dx) / sw, 0.0, None)
    return np.where(ov >= MIN_OVERLAP, ov, 0.0)


def _comb_rect(max_norm: float, aspect: float) -> tuple[np.ndarray, np.ndarray]:
    """Points of a rectangular lattice (columns scaled by ``aspect``), one of each +-pair.

    Returns log|n'| and arg n' in [0, pi) for n' = (n_row, aspect n_col).
    """
    m = int(np.ceil(max_norm / min(1.0, aspect)))
    i, j = np.meshgrid(np.arange(-m, m + 1), np.arange(-m, m + 1), indexing="ij")
    y, x = i.ravel().astype(float), aspect * j.ravel()
    nrm = np.hypot(y, x)
    ang = np.arctan2(y, x)
    keep = (nrm > 0) & (nrm <= max_norm) & (ang >= 0) & (ang < np.pi - 1e-9)
    return np.log(nrm[keep]), ang[keep]


def _basis(period: float, theta: float, aspect: float = 1.0, lattice_aspect: float = 1.0) -> np.ndarray:
    """Basis of a square lattice, squeezed, turned and squeezed again.

    Squeezed along its own columns, turned by theta, squeezed along the picture's.
    Columns, in (row, col) pixels: the images of the original's +row step and
    +col step.
    """
    return _bases(np.array([period]), np.array([theta]), aspect, lattice_aspect)[0]


def _bases(period: np.ndarray, theta: np.ndarray, aspect: float = 1.0,
           lattice_aspect: float = 1.0) -> np.ndarray:
    """:func:`_basis` of many (period, theta) pairs at once, (K, 2, 2)."""
    c, s = np.cos(theta), np.sin(theta)
    out = np.empty((len(theta), 2, 2))
    out[:, 0, 0] = c * period
    out[:, 1, 0] = aspect * -s * period
    out[:, 0, 1] = s * period * lattice_aspect
    out[:, 1, 1] = aspect * c * period * lattice_aspect
    return out


# ---------------------------------------------------------------- refinement and scoring

def degenerate(basis: np.ndarray) -> bool:
    """True for a basis no lattice of the mark can have: not finite, nearly singular or far from square.

    The search only ever looks for lattices within ``SCALE_RANGE`` and
    ``ASPECT_RANGE`` of the original grid, whose shortest basis vector is
    tens of pixels and whose basis is nearly orthogonal once reduced. A
    least-squares fit to collinear peaks can produce a basis with one
    vector a fraction of a pixel long; enumerating its lattice points would
    need a grid millions of points wide (a 94.9 TiB allocation was seen on
    a copy resized to aspect 0.9). Such bases are discarded before any
    grid is built.
    """
    b = np.asarray(basis, dtype=float)
    if b.shape != (2, 2) or not np.all(np.isfinite(b)):
        return True
    sv = np.linalg.svd(b, compute_uv=False)
    return bool(sv[1] < MIN_BASIS_PX or sv[0] > MAX_CONDITION * sv[1])


def _points(basis: np.ndarray, r_min: float, r_max: float) -> np.ndarray:
    """Integer vectors n (one of each +-pair) with r_min <= |basis n| <= r_max.

    Empty for a :func:`degenerate` basis, and whenever the enumeration grid
    would exceed ``MAX_GRID_SIDE`` (every lag the search reads lies within
    ``LAG_MAX`` of the origin, so a sound basis never needs more).
    """
    if degenerate(basis) or not np.isfinite(r_max):
        return _NO_POINTS
    inv = np.linalg.inv(basis)
    m = int(np.ceil(r_max * np.max(np.abs(inv)) * 2)) + 1
    if m > MAX_GRID_SIDE:
        return _NO_POINTS
    n = _half_plane(m)
    p = basis @ n
    r = np.sqrt(p[0] * p[0] + p[1] * p[1])
    return n[:, (r >= r_min) & (r <= r_max)]


_NO_POINTS = np.zeros((2, 0))
_NO_POINTS.setflags(write=False)


@lru_cache(maxsize=64)
def _half_plane(m: int) -> np.ndarray:
    """Integer vectors (as floats) with |n_row| <= m, 0 <= n_col <= m, one of each +-pair (read-only)."""
    i, j = np.meshgrid(np.arange(-m, m + 1), np.arange(0, m + 1), indexing="ij")
    n = np.stack([i.ravel(), j.ravel()])
    half = (n[1] > 0) | ((n[1] == 0) & (n[0] > 0))
    n = n[:, half].astype(float)
    n.setflags(write=False)
    return n


def lattice_score(acf: _Acf, basis: np.ndarray, r_min: float, r_max: float) -> tuple[float, int]:
    """Summed weighted autocorrelation over the lattice points, in standard-normal units."""
    n = _points(basis, r_min, min(r_max, acf.c - 2))
    if n.shape[1] == 0:
        return 0.0, 0
    p = basis @ n + acf.c
    zw = ndimage.map_coordinates(acf.zw, p, order=1)
    w = ndimage.map_coordinates(acf.weight, p, order=1)
    return float(np.sum(zw) / np.sqrt(np.sum(w * w) + 1e-12)), int(n.shape[1])


def _widen(acf: _Acf, basis: np.ndarray, r_min: float) -> np.ndarray:
    """Move each basis vector in turn to where the near lattice points score best.

    The coarse grids model similarities and squeezes along the picture's
    axes; a copy squeezed along other axes (or sheared) leaves one or both
    basis vectors several pixels off, beyond the reach of :func:`_refine`.
    Each vector is searched on a pixel grid within ``ASPECT_RANGE`` of its
    length, the other held fixed, scoring the lattice points up to twice the
    longer vector (the coarse smoothing makes the score forgiving).
    """
    cc = acf.cc
    for _ in range(2):
        for k in (0, 1):
            b = basis.copy()
            reach = int(np.ceil(ASPECT_RANGE * np.linalg.norm(b[:, k]))) + 1
            n = _points(b, r_min, min(2.05 * float(np.max(np.linalg.norm(b, axis=0))), cc - reach - 6))
            n = n[:, n[k] != 0]                    # only the points this vector moves
            if n.shape[1] == 0:
                return basis
            off = np.arange(-reach, reach + 1, dtype=float)
            dy, dx = np.meshgrid(off, off, indexing="ij")
            delta = np.stack([dy.ravel(), dx.ravel()])          # 2 x m candidate shifts
            p = (b @ n)[:, None, :] + delta[:, :, None] * n[k][None, None, :] + cc
            vals = ndimage.map_coordinates(acf.coarse, p.reshape(2, -1), order=1)
            best = int(np.argmax(vals.reshape(delta.shape[1], -1).sum(axis=1)))
            basis = b
            basis[:, k] = b[:, k] + delta[:, best]
    return basis


def _refine(acf: _Acf, basis: np.ndarray, r_min: float) -> tuple[np.ndarray, int]:
    """Weighted least-squares fit of the basis to sub-pixel peaks near the predicted lattice points."""
    size = acf.z.shape[0]
    z = acf.z.ravel()              # flat indices: one gather per look-up (the map is square)
    offs = np.arange(-2, 3)
    block = (offs[:, None] * size + offs[None, :]).ravel()   # 5x5 neighbourhood, row by row
    inliers = 0
    shortest = float(np.min(np.linalg.norm(basis, axis=0)))
    for refine_radius in REFINE_RADII:
        radius = min(max(refine_radius, 1.6 * shortest), acf.c - 4)
        for _ in range(2):
            n = _points(basis, r_min, radius)
            if n.shape[1] < 2:
                return basis, inliers
            p = basis @ n + acf.c
            ip = np.rint(p).astype(int)
            ok = np.all((ip >= 3) & (ip < size - 3), axis=0)
            n, p, ip = n[:, ok], p[:, ok], ip[:, ok]
            # Best integer position in a 5x5 neighbourhood of each prediction.
            k = np.argmax(z[(ip[0] * size + ip[1])[:, None] + block], axis=1)
            pr = ip[0] + offs[k // 5]
            pc = ip[1] + offs[k % 5]
            at = pr * size + pc
            peak = z[at]
            # Parabolic sub-pixel offsets along each axis.
            dr = _parabola(z[at - size], peak, z[at + size])
            dc = _parabola(z[at - 1], peak, z[at + 1])
            obs = np.stack([pr + dr, pc + dc]).astype(float)
            # Only peaks that stand out carry weight; stronger peaks count more.
            wgt = np.clip(peak - 2.5, 0.0, None) ** 2
            inliers = int(np.count_nonzero(wgt))
            if inliers < 3:
                return basis, inliers
            # Residuals far beyond the prediction error are noise peaks.
            wgt = np.where(np.linalg.norm(obs - p, axis=0) <= 2.2, wgt, 0.0)
            nn = (n * wgt) @ n.T
            # Peaks along one line of the lattice fix only one direction: the
            # normal matrix is then (nearly) singular and the fit would be a
            # degenerate basis (see degenerate()). Keep the last sound one.
            if abs(np.linalg.det(nn)) < 1e-9 or np.linalg.cond(nn) > 1e6:
                return basis, inliers
            fitted = ((obs - acf.c) * wgt) @ n.T @ np.linalg.inv(nn)
            if degenerate(fitted):
                return basis, inliers
            basis = fitted
    return basis, inliers


def _parabola(a: np.ndarray, b: np.ndarray, c: np.ndarray) -> np.ndarray:
    den = a - 2 * b + c
    safe = np.where(den < 0, den, -1.0)
    return np.where(den < 0, np.clip(0.5 * (a - c) / safe, -0.5, 0.5), 0.0)


def _reduce(basis: np.ndarray) -> np.ndarray:
    """Lagrange-Gauss reduction: the shortest, most nearly orthogonal basis of the same lattice."""
    u, v = basis[:, 0].copy(), basis[:, 1].copy()
    if u @ u > v @ v:
        u, v = v, u
    for _ in range(32):
        m = round(float(u @ v) / float(u @ u))
        v = v - m * u
        if v @ v >= u @ u:
            break
        u, v = v, u
    return np.stack([u, v], axis=1)


def _same_lattice(a: np.ndarray, b: np.ndarray, tol: float = 0.02) -> bool:
    m = np.linalg.solve(a, b)
    return bool(np.allclose(m, np.rint(m), atol=tol) and round(abs(np.linalg.det(m))) == 1)


def _plausible(basis: np.ndarray, tile: int) -> bool:
    lo, hi = SCALE_RANGE
    s = np.sqrt(abs(np.linalg.det(basis))) / tile
    sv = np.linalg.svd(basis, compute_uv=False)
    squeeze = (1 + ASPECT_RANGE) / (1 - ASPECT_RANGE) * 1.02
    return bool(lo * 0.97 <= s <= hi * 1.03 and sv[0] / sv[1] <= squeeze)


@dataclass(frozen=True)
class Coarse:
    """The best hypotheses of the coarse grids, best first: (score, basis) pairs.

    ``similar`` from the grid of similarities, ``squeezed`` from the grid of
    squeezed copies. :func:`find_lattices` refines the first few of each,
    :func:`similarities` hands more of them to a keyed search: one pass over
    the grids serves both.
    """

    similar: list[tuple[float, np.ndarray]]
    squeezed: list[tuple[float, np.ndarray]]


def coarse_search(acf: _Acf, tile: int, similar: int = 0, squeezed: int = 0) -> Coarse:
    """Score the coarse grids once, keeping at least ``similar`` and ``squeezed`` hypotheses of each.

    The lattice search keeps the best ``SIMILARITY_GRID[4]`` and
    ``ASPECT_GRID[4]``; a keyed search asks for more. The best few are the
    same whatever is kept (the local maxima of each score surface, best
    first).
    """
    return Coarse(_coarse(acf, tile, SIMILARITY_GRID[:4] + (max(similar, SIMILARITY_GRID[4]),)),
                  _coarse(acf, tile, ASPECT_GRID[:4] + (max(squeezed, ASPECT_GRID[4]),)))


def find_lattices(x: np.ndarray, tile: int, *, workers: int = 1,
                  candidates: int = LATTICE_CANDIDATES, acf: _Acf | None = None,
                  coarse: Coarse | None = None) -> list[Lattice]:
    """The ``candidates`` lattices most likely to be the mark's, best first.

    Parameters
    ----------
    x : ndarray, (H, W)
        The pre-whitened copy (see :func:`claimkit.mark.detect.whiten`).
    tile : int
        Period of the mark in the original, pixels.
    workers : int
        Threads for the Fourier transforms.
    candidates : int
        How many lattices to return at most; the detector counts exactly
        this many geometric hypotheses, found or not.
    acf : _Acf, optional
        :func:`lag_map` of ``x``, when the caller has it already.
    coarse : Coarse, optional
        :func:`coarse_search` of ``acf``, when the caller has it already.

    Returns
    -------
    list of Lattice
        Best first (highest ``score``); may be shorter than ``candidates``:
        for a copy too small to hold two periods, when the best lattice is
        the original grid itself (the detector's unwarped hypothesis covers
        it), and when the others are far weaker than the best.
    """
    if not searchable(x.shape, tile):
        return []
    if acf is None:
        acf = lag_map(x, workers=workers)
    r_min = SCALE_RANGE[0] * tile * (1 - ASPECT_RANGE) * 0.9
    if coarse is None:
        coarse = coarse_search(acf, tile)
    rough: list[Lattice] = []
    for _, basis in coarse.similar[:SIMILARITY_GRID[4]] + coarse.squeezed[:ASPECT_GRID[4]]:
        # Where the lattice is faint the wide search can land on noise: refine
        # both starting points and keep the one whose lattice scores better.
        best = None
        widened = _widen(acf, basis, r_min)
        # When the wide search leaves the basis where it was (most starts on a
        # plainly marked copy), the second refinement would repeat the first.
        starts = (basis,) if np.array_equal(widened, basis) else (basis, widened)
        for start in starts:
            if degenerate(start):
                continue
            refined, inliers = _refine(acf, start, r_min)
            refined = _reduce(refined)
            if not degenerate(refined) and _plausible(refined, tile):
                score, points = lattice_score(acf, refined, r_min, acf.c)
                if best is None or score > best.score:
                    best = Lattice(basis=refined, score=score, inliers=inliers, points=points)
        if best is not None:
            rough.append(_on_grid(acf, best, r_min, tile))
    return [_canonical(lat, tile) for lat in _worth_trying(_distinct(rough), x.shape, tile)[:candidates]]


def searchable(shape: tuple[int, int], tile: int) -> bool:
    """Whether a copy this size can hold two periods at the smallest scale searched."""
    return min(shape) >= 2 * SCALE_RANGE[0] * tile


def similarities(acf: _Acf, tile: int, count: int = SIMILARITY_CANDIDATES,
                 squeezed: int = ASPECT_CANDIDATES, coarse: Coarse | None = None) -> np.ndarray:
    """The best hypotheses of the coarse grids, as maps original -> copy (K, 2, 2).

    ``count`` similarities and ``squeezed`` squeezed lattices (at most
    ``count + squeezed`` in all).

    No refinement: the grid's steps (0.4 % in scale, 0.23 degrees) are
    within what a correlation with the mark's own pattern tolerates on the
    copies where this matters (small ones), and refining faint lattices on
    the autocorrelation moves them off as often as on. Best first; fewer
    when the copy is too small for the grid. ``coarse``: the
    :func:`coarse_search` of ``acf`` (keeping at least ``count`` and
    ``squeezed``), when the caller has it already.
    """
    if coarse is None:
        coarse = coarse_search(acf, tile, count, squeezed)
    found = coarse.similar[:count] + coarse.squeezed[:squeezed]
    if not found:
        return np.zeros((0, 2, 2))
    return np.stack([basis / float(tile) for _, basis in found])


def _signed_permutations() -> tuple[np.ndarray, ...]:
    out = []
    for perm in (np.eye(2), np.array([[0.0, 1.0], [1.0, 0.0]])):
        for sr in (1.0, -1.0):
            for sc in (1.0, -1.0):
                out.append(perm @ np.diag([sr, sc]))
    return tuple(out)


_DIHEDRAL = _signed_permutations()


def _canonical(lat: Lattice, tile: int) -> Lattice:
    """The same lattice with the basis (of the eight quarter-turn/mirror variants) nearest ``tile * I``.

    ``basis @ D`` for a signed permutation ``D`` spans the same points, and
    the detector tries all eight variants of the fold, so the hypotheses do
    not change. What does change is the drift check of
    :func:`claimkit.mark.detect.prepare`: an untouched copy whose basis came
    out with its vectors swapped or negated is recognised as the mark's own
    grid and is not resampled.
    """
    target = tile * np.eye(2)
    best = min(_DIHEDRAL, key=lambda d: float(np.abs(lat.basis @ d - target).sum()))
    return Lattice(basis=lat.basis @ best, score=lat.score, inliers=lat.inliers, points=lat.points)


def _on_grid(acf: _Acf, lat: Lattice, r_min: float, tile: int) -> Lattice:
    """The mark's own grid in place of a fitted basis that it explains at least as well.

    On an untouched copy the least-squares fit of :func:`_refine` lands a few
    1e-4 off the copy's own grid (sub-pixel peak positions are biased), which
    is up to a pixel of drift across a large window: enough for the copy to
    be resampled for nothing (issue 16). When the grid itself (the nearest of
    its quarter-turn/mirror variants, within ``GRID_SNAP`` of the fit) scores
    at least as high on the autocorrelation, the fit's departure from it is
    not in the data, and the grid is returned, which :func:`_worth_trying`
    leaves to the detector's unwarped hypothesis. The count of hypotheses is
    fixed, so trying fewer stays conservative.
    """
    grid = tile * min(_DIHEDRAL, key=lambda d: float(np.abs(lat.basis - tile * d).sum()))
    if np.abs(lat.basis - grid).max() > GRID_SNAP * tile:
        return lat
    score, points = lattice_score(acf, grid, r_min, acf.c)
    if score < lat.score:
        return lat
    return Lattice(basis=grid, score=score, inliers=lat.inliers, points=points)


def _worth_trying(ranked: list[Lattice], shape: tuple[int, int], tile: int) -> list[Lattice]:
    """Drop lattices whose resampling would be wasted work (never the key's business).

    * A lattice that is the original grid up to a quarter turn or mirror, to
      within a third of a pixel across the copy, is tried exactly by the
      detector's unwarped hypothesis.
    * Once one lattice stands out clearly, lattices far weaker than it are
      noise: resampling and folding a copy costs more than the search.

    The detector counts every hypothesis it could have tried, so trying
    fewer keeps its false-alarm bound valid (conservative).
    """
    if not ranked:
        return []
    best = ranked[0].score
    out = []
    for lat in ranked:
        if best >= CLEAR_SCORE and lat.score < RUNNER_UP * best:
            break
        m = lat.basis / tile
        d = np.rint(m)
        exact = abs(abs(np.linalg.det(d)) - 1) < 1e-9 and np.all(np.abs(d).sum(axis=0) == 1)
        if exact and np.abs(m - d).sum(axis=0).max() * max(shape) <= 0.33:
            continue
        out.append(lat)
    return out


def _distinct(lattices: list[Lattice]) -> list[Lattice]:
    """Best first, dropping aliases.

    A lattice that contains, or is contained in, a better one is its alias
    (every other point, or points halfway between): only the best is kept.
    """
    kept: list[Lattice] = []
    for lat in sorted(lattices, key=lambda item: -item.score):
        if not any(_related(lat.basis, k.basis) for k in kept):
            kept.append(lat)
    return kept


def _related(a: np.ndarray, b: np.ndarray, tol: float = 0.03) -> bool:
    """True when one lattice is (nearly) a sublattice of the other, the same lattice included."""
    for m in (np.linalg.solve(a, b), np.linalg.solve(b, a)):
        if np.allclose(m, np.rint(m), atol=tol) and abs(np.linalg.det(np.rint(m))) >= 1:
            return True
    return False
