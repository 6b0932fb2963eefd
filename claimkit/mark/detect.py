"""Blind examination: whiten, fold, correlate with the carrier, search, decode, score.

Steps, for a copy with no original at hand:

1. Pre-whiten the luma (subtract a local mean) and divide by the local
   standard deviation, so that no busy area dominates.
2. Estimate the mark's lattice in the copy (:mod:`claimkit.mark.geometry`).
3. Fold: sum all periods into one ``TILE x TILE`` array; for a distorted
   copy, each pixel goes to its place on the original's grid (bilinear
   splatting, :func:`fold_resampled`). The unwarped fold is always tried too.
4. In the frequency domain, keep only the phase of the fold (symmetric
   phase-only matched filtering), weight by the spot spectrum, multiply by the
   conjugate carrier: the inverse transform is the recovered message.
5. Correlate with the pilot spots for every cyclic shift (the crop offset),
   for each of the eight quarter-turn/mirror variants and four half-pixel
   phases; the best few placements are decoded with soft Viterbi decoding.
6. Score with the exact null variance and the bound of :mod:`claimkit.mark.stats`.

References
----------
.. [1] J. J. K. Ó Ruanaidh, T. Pun, "Rotation, scale and translation invariant
   spread spectrum digital image watermarking", Signal Processing 66(3),
   303-317, 1998. doi:10.1016/S0165-1684(98)00012-7
.. [2] Q. Chen, M. Defrise, F. Deconinck, "Symmetric phase-only matched
   filtering of Fourier-Mellin transforms for image registration and
   recognition", IEEE Trans. PAMI 16(12), 1156-1168, 1994.
   doi:10.1109/34.387491
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from functools import lru_cache

import numpy as np
from scipy import fft as sfft
from scipy import ndimage

from claimkit.mark import format3, geometry, stats
from claimkit.mark.pattern import (
    PAYLOAD_BITS,
    READABLE,
    TILE,
    KeyPattern,
    key_pattern,
    message_template,
    spot_signs,
)
from claimkit.mark.payload import PayloadList

PREFILTER = 9                 # local-mean window of the whitening prefilter, pixels
NORM_WINDOW = 9               # window of the local standard-deviation normalisation
WHITEN_ROWS = 256             # rows whitened at a time (a strip's working set stays in cache)
PHASES = ((0.0, 0.0), (0.0, 0.5), (0.5, 0.0), (0.5, 0.5))   # sub-pixel phases tried
GEOMETRIES = 1 + geometry.LATTICE_CANDIDATES                  # unwarped + lattice fits
DIHEDRAL = 8
DEFAULT_THRESHOLD = stats.DEFAULT_THRESHOLD
DEFAULT_PAYLOAD_SPACE = 2 ** 24   # valid payloads per owner: one per work serial
DECODE_TRIES = 3
# Format 3's claim is also tried on the file's own grid, at most at this many geometries:
# the unwarped fold, and the two stretches of a coarse view (claimkit.mark.scales: the
# level's size is known only to the rounding of the copy's). All counted in its bound.
OWN_PLACEMENTS = 3
# Format 3's claim is decoded (soft Viterbi) only where its best pilot score reaches this.
# Below it no payload can bring the bound near any usable threshold (a claim at 1e-9
# needs a full-template score near 9.7, about 6 on the 96 pilots), and on unmarked
# copies the decoder was a third of format 3's cost. Skipping it only removes chances
# to claim, and the count of hypotheses stays fixed, so the bound stays conservative.
DECODE_MIN_Z3 = 3.5
TESTS = 2                 # formats 1-2 (one pilot search) and format 3: both counted, keys held or not
MIN_SIDE = 32
MAX_EXAMINE_PIXELS = 4_000_000   # larger copies are examined on a central window this big


def hypotheses(tile: int = TILE) -> int:
    """Placements the search tries, all counted in the false-alarm bound."""
    return GEOMETRIES * DIHEDRAL * len(PHASES) * tile * tile


def payloads_counted(payload_space: int) -> int:
    """Payloads the decoder could accept: every valid payload in every readable format."""
    return payload_space * len(READABLE)


@dataclass
class Finding:
    """The result of examining one copy under one key (pure data, JSON-ready via ``to_json``)."""

    detected: bool
    log10_false_alarm: float
    z_pilot: float
    z_full: float | None
    hypotheses: int
    payload_space: int                   # payloads counted in the bound (all readable formats)
    payload_bits: list[int] | None
    payload_valid: bool
    mark_format: str | None              # format whose code decoded a valid payload
    message_psnr_db: float | None        # spot estimate vs reference (see _message)
    message_psnr_raw_db: float | None    # raw correlation map vs reference
    message_psnr_flat_db: float          # an all-flat guess, for scale
    geometry: dict
    surface: np.ndarray = field(repr=False)      # pilot score (z units) over shifts, best variant
    recovered: np.ndarray = field(repr=False)    # recovered message (spot estimate), aligned
    recovered_raw: np.ndarray = field(repr=False)  # raw correlation map, aligned
    reference: np.ndarray = field(repr=False)    # reference message template
    decoy_scores: list[float] = field(default_factory=list)
    removal_suspected: bool = False       # format 3's sync present, no claim (see examine_luma)
    z_sync: float | None = None           # best synchronisation score (no claim rests on it)
    mark_family: int | None = None        # format 3 family of the claimed work
    counting: dict = field(default_factory=dict)   # the factors of the bound, test by test
    # Scales the copy was examined at (mark.scales), all counted in ``hypotheses``.
    scales_searched: int = 1

    @property
    def false_alarm_probability(self) -> float:
        """The bound as a probability (never rounded to zero)."""
        return stats.as_probability(self.log10_false_alarm)

    def to_json(self) -> dict:
        """The finding as JSON values (the ``examine --json`` fields)."""
        return {
            "detected": self.detected,
            "false_alarm_probability": self.false_alarm_probability,
            "log10_false_alarm_probability": round(self.log10_false_alarm, 4),
            "false_alarm_text": stats.describe(self.log10_false_alarm),
            "score_pilot": round(self.z_pilot, 4),
            "score_full": None if self.z_full is None else round(self.z_full, 4),
            "hypotheses": self.hypotheses,
            "scales_searched": self.scales_searched,
            "payload_space": self.payload_space,
            "payload_valid": self.payload_valid,
            "mark_format": self.mark_format,
            "message_psnr_db": _r2(self.message_psnr_db),
            "message_psnr_raw_db": _r2(self.message_psnr_raw_db),
            "message_psnr_flat_db": _r2(self.message_psnr_flat_db),
            "geometry": self.geometry,
            "removal_suspected": self.removal_suspected,
            "score_sync": None if self.z_sync is None else round(self.z_sync, 4),
            "mark_family": self.mark_family,
            "false_alarm_counting": self.counting,
        }


def _r2(v: float | None) -> float | None:
    return None if v is None else round(float(v), 2)


# ---------------------------------------------------------------- preparation

def whiten(luma: np.ndarray) -> np.ndarray:
    """Local-mean prefilter, then division by the local standard deviation (float32).

    The local normalisation (a 9 x 9 window) keeps busy areas, where the
    picture itself is the loudest noise, from drowning the quiet ones; it
    measured better than block-wise normalisation (64, 32, 16 or 8 px) and
    than a mask-matched weighting on JPEG, blur, crop and noise attacks.
    """
    x = np.asarray(luma, dtype=np.float32)
    h = x.shape[0]
    out = np.empty(x.shape, dtype=np.float32)
    # In strips of rows that stay in cache (the column pass of a filter over a
    # whole 4-megapixel picture is memory-bound): 69 -> 48 ms at 4 MP. Each
    # strip reads the rows both filters reach beyond it, so every output pixel
    # sees the same neighbours as with one filter over the whole picture (the
    # edges of the picture are still reflected); bit-identical on the
    # pictures checked. The strips' three buffers are made once and every step
    # writes into one of them; the quotient goes straight to ``out`` (the same
    # operations on the same values: 24 -> 18 ms at 1.2 MP).
    halo = PREFILTER // 2 + NORM_WINDOW // 2
    y, sq, var = (np.empty((min(h, WHITEN_ROWS + 2 * halo),) + x.shape[1:], dtype=np.float32)
                  for _ in range(3))
    for r0 in range(0, h, WHITEN_ROWS):
        a0, a1 = max(0, r0 - halo), min(h, r0 + WHITEN_ROWS + halo)
        blk, yb, sb, vb = x[a0:a1], y[:a1 - a0], sq[:a1 - a0], var[:a1 - a0]
        ndimage.uniform_filter(blk, PREFILTER, output=yb, mode="reflect")
        np.subtract(blk, yb, out=yb)
        np.multiply(yb, yb, out=sb)
        ndimage.uniform_filter(sb, NORM_WINDOW, output=vb, mode="reflect")
        vb += 1e-3
        np.sqrt(vb, out=vb)
        rows = min(WHITEN_ROWS, h - r0)
        np.divide(yb[r0 - a0:r0 - a0 + rows], vb[r0 - a0:r0 - a0 + rows], out=out[r0:r0 + rows])
    return out


def fold(x: np.ndarray, tile: int = TILE) -> np.ndarray:
    """Sum of all ``tile x tile`` periods (the origin at pixel (0, 0)), float64."""
    # Period by period into one float64 tile: no zero-padded float64 copy of
    # the whole picture (7 -> 2 ms at 4 MP).
    h, w = x.shape
    out = np.zeros((tile, tile))
    for r0 in range(0, h, tile):
        for c0 in range(0, w, tile):
            blk = x[r0:r0 + tile, c0:c0 + tile]
            out[:blk.shape[0], :blk.shape[1]] += blk
    return out


def fold_resampled(x: np.ndarray, transform: np.ndarray, tile: int = TILE, *,
                   macro: int = 1) -> np.ndarray:
    """Fold a geometrically distorted copy straight onto the original's period grid.

    Each copy pixel ``y`` belongs at original position ``u = transform^-1 y``.
    Its value is binned at half-pixel resolution onto a ``2 tile x 2 tile``
    torus (sums and counts), both are smoothed with the tent ``[1, 2, 1]/4``
    and sampled at the whole pixels, and the sums are divided by the counts:
    a cell holds a distance-weighted average of the copy samples that fell
    near it (normalised convolution). This is the fold of the resampled
    picture without building the resampled picture; cost is two histograms
    of the copy's pixels whatever the scale.

    With ``macro > 1`` the pixels are binned on the ``macro * tile`` torus
    (format 3's macro-cell) and the macro fold is returned.
    """
    h, w = x.shape
    inv = np.linalg.inv(transform).astype(np.float32) * 2   # half-pixel bins
    fine = 2 * tile * macro
    cols = np.arange(w, dtype=np.float32)
    # Rows in chunks of about 128k pixels: the chunk's bincounts stay in cache
    # (13.8 -> 10.5 ms at 1.6 MP against 1M-pixel chunks). On the macro torus
    # (1M bins) each chunk's two bincounts cost as much as the bins, so chunks
    # hold twice as many pixels as bins there (46 -> 29 ms at 1.6 MP).
    step = max(1, max(131_072, fine * fine // 4 if macro == 1 else 2 * fine * fine) // max(w, 1))
    # The bin indices of a chunk are built a few rows at a time (their float32
    # temporaries stay in cache: 11 -> 4 ms for a 1.6 MP chunk), into one array
    # that both bincounts read.
    part = max(1, 65_536 // max(w, 1))
    idx_buf = np.empty(min(h, step) * w, dtype=np.intp)
    # The wrap onto the torus is a bit mask when the side is a power of two
    # (two's complement makes it right for negative bins too); the bin
    # indices are built in place in int32 and converted once to the intp that
    # both bincounts take without a copy of their own: about 30 -> 18 ms at 1.6 MP
    # against int64 modulo, the same bins.
    mask = fine - 1 if (fine & (fine - 1)) == 0 else None
    acc = cnt = None
    for r0 in range(0, h, step):
        r1 = min(h, r0 + step)
        idx = idx_buf[:(r1 - r0) * w]
        for s0 in range(r0, r1, part):
            rr = np.arange(s0, min(r1, s0 + part), dtype=np.float32)[:, None]
            t = inv[0, 0] * rr + inv[0, 1] * cols
            b0 = np.rint(t, out=t).astype(np.int32)
            t = inv[1, 0] * rr + inv[1, 1] * cols
            b1 = np.rint(t, out=t).astype(np.int32)
            if mask is not None:
                b0 &= mask
                b1 &= mask
            else:
                b0 %= fine
                b1 %= fine
            b0 *= fine
            b0 += b1
            idx[(s0 - r0) * w:(s0 - r0) * w + b0.size] = b0.ravel()
        a = np.bincount(idx, weights=x[r0:r1].ravel(), minlength=fine * fine)
        c = np.bincount(idx, minlength=fine * fine)
        if acc is None or cnt is None:
            acc, cnt = a, c.astype(np.float64)
        else:
            acc += a
            cnt += c

    assert acc is not None and cnt is not None     # the copy has at least one row
    acc2, cnt2 = acc.reshape(fine, fine), cnt.reshape(fine, fine)
    return _tent_even(acc2) / np.maximum(_tent_even(cnt2), 1e-9)


def _tent_even(a: np.ndarray) -> np.ndarray:
    """The tent ``[1, 2, 1]/4`` along each axis of a torus, kept at the even samples only.

    Each even sample's neighbours are the odd samples on either side, so the
    odd rows (then columns) are never smoothed: the same sums in the same
    order as smoothing everything and then subsampling, at a quarter of the
    work (the macro-cell's 1024 x 1024 torus made the full version costly).
    """
    odd = a[1::2]
    a = 0.5 * a[0::2] + 0.25 * (odd + np.roll(odd, 1, 0))
    odd = a[:, 1::2]
    return 0.5 * a[:, 0::2] + 0.25 * (odd + np.roll(odd, 1, 1))


def _variants(f: np.ndarray) -> np.ndarray:
    """The eight quarter-turn/mirror variants of a square array."""
    out = [np.rot90(f, k) for k in range(4)]
    out += [np.rot90(f.T, k) for k in range(4)]
    return np.stack(out)


def _variant_maps(tile: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """For each variant v, the integer matrix D and offset c with v(F)[u] = F[(D u + c) mod T]."""
    r, c = np.meshgrid(np.arange(tile), np.arange(tile), indexing="ij")
    vr, vc = _variants(r), _variants(c)
    maps = []
    for i in range(DIHEDRAL):
        o = np.array([vr[i, 0, 0], vc[i, 0, 0]])
        d0 = (np.array([vr[i, 1, 0], vc[i, 1, 0]]) - o + 1) % tile - 1
        d1 = (np.array([vr[i, 0, 1], vc[i, 0, 1]]) - o + 1) % tile - 1
        maps.append((np.stack([d0, d1], axis=1).astype(float), o.astype(float)))
    return maps


@lru_cache(maxsize=4)
def _variant_spectra(tile: int) -> tuple[np.ndarray, np.ndarray]:
    """How each variant's spectrum follows from the fold's: ``S_v[k] = phase_v[k] S[D k mod T]``.

    With ``v(F)[u] = F[(D u + c) mod T]`` (:func:`_variant_maps`), the
    transform is ``exp(2 pi i (D k).c / T) S[D k]``. Returns the flat indices
    ``D k mod T`` and the phases, both (8, T, T), read-only.
    """
    k = np.stack(np.meshgrid(np.arange(tile), np.arange(tile), indexing="ij")).reshape(2, -1)
    idx, phase = [], []
    for d, c in _variant_maps(tile):
        dk = np.rint(d @ k).astype(np.int64)
        idx.append(((dk[0] % tile) * tile + dk[1] % tile).reshape(tile, tile))
        phase.append(np.exp(2j * np.pi * (c @ dk) / tile).reshape(tile, tile))
    out = np.stack(idx), np.stack(phase).astype(np.complex64)
    for arr in out:
        arr.setflags(write=False)
    return out


@lru_cache(maxsize=4)
def _ramps(tile: int) -> np.ndarray:
    """Phase ramps of the sub-pixel shifts in ``PHASES`` (read-only, cached)."""
    f = np.fft.fftfreq(tile) * tile
    out = np.stack([np.exp(2j * np.pi * (dy * f[:, None] + dx * f[None, :]) / tile)
                    for dy, dx in PHASES])
    out.setflags(write=False)
    return out


def _delta_ft(pos: np.ndarray, sign: np.ndarray, tile: int) -> np.ndarray:
    d = np.zeros((tile, tile))
    d[pos[:, 0], pos[:, 1]] = sign
    return np.fft.fft2(d)


# ---------------------------------------------------------------- search

SMOOTH = 5          # neighbourhood (frequencies) over which the host's power is averaged
POWER_FLOOR_Q = 0.8  # no frequency is trusted more than the 80th percentile of host power allows


def spectral_weight(s: np.ndarray) -> np.ndarray:
    """Per-frequency weight of the folded spectra (key-independent).

    Matched filtering in coloured noise divides by the noise power. The host's
    power at each frequency is estimated from ``|S|^2`` averaged over
    neighbouring frequencies, never below the frequency's own power (so that
    isolated strong lines of the picture, a JPEG block grid or a woven
    texture, are damped instead of dominating the score) and never below the
    80th percentile of the averaged power (so that frequencies an attack has
    emptied, the high ones after JPEG, blur or downscaling, are not trusted as
    if they were clean). The floor was measured on JPEG 30, blur 2, 25 % crop,
    noise and downscale+rotate+JPEG copies: it raised the weak scores by 10 to
    40 % at the cost of a few per cent on untouched copies.
    """
    p = np.abs(s) ** 2
    pbar = np.stack([ndimage.uniform_filter(pi, SMOOTH, mode="wrap") for pi in p])
    est = np.maximum(pbar, p)
    est = np.maximum(est, np.quantile(pbar, POWER_FLOOR_Q, axis=(1, 2), keepdims=True))
    w = 1.0 / (est + 1e-12)
    # Scale so the weighted spectrum has unit mean magnitude (numbers stay O(1)). A fold with
    # no energy at all (a perfectly flat picture, whitened to zeros) has nothing to weigh.
    scale = float(np.mean(np.abs(s) * w))
    return w / scale if scale > 0 else np.zeros_like(w)


@dataclass
class _Prepared:
    """Key-independent part of an examination: folds for every geometric hypothesis."""

    spectra: list[np.ndarray]   # per geometry: (8, T, T) weighted spectra of the variants (complex64)
    transforms: list[np.ndarray | None]   # original -> copy (row, col); None = unwarped
    lattices: list[geometry.Lattice | None]
    window: tuple[int, int, int, int]   # row, col, height, width of the examined window
    # Format 3's macro-period folds, made when a placement first reads them (see
    # macro_fold), by transform (b"" the unwarped one); shared by the copies
    # ``replace`` makes, so that every key examined reads one fold.
    macro_folds: dict[bytes, np.ndarray] = field(default_factory=dict)
    # For format 3's keyed synchronisation search (see _keyed_geometries): the
    # whitened window, the best similarity hypotheses of the coarse lattice
    # grid and the window reduced by two. None where no lattice is searched.
    whitened: np.ndarray | None = None
    similarities: np.ndarray | None = None
    reduced: tuple[np.ndarray, ...] = ()    # the central window reduced by each of KEYED_REDUCTIONS
    macro: int = 1
    # Geometries at which format 3's claim is also tried on the file's own grid (at most
    # OWN_PLACEMENTS): the unwarped fold, and a coarse view's stretches (mark.scales).
    own: tuple[int, ...] = (0,)

    def macro_fold(self, g: int) -> np.ndarray:
        """Geometry ``g`` folded at format 3's macro-period (float32), folded on first need.

        A resampled geometry's macro fold costs four times its tile fold (a
        torus of a million bins); on a copy without format 3's claim most of
        them are never read.
        """
        t = self.transforms[g]
        key = b"" if t is None else np.asarray(t, dtype=float).tobytes()
        if key not in self.macro_folds:
            assert t is not None and self.whitened is not None
            mf = fold_resampled(self.whitened, t, self.spectra[g].shape[-1], macro=self.macro)
            self.macro_folds[key] = np.asarray(mf, dtype=np.float32)
        return self.macro_folds[key]


def central_window(shape: tuple[int, int], max_pixels: int = MAX_EXAMINE_PIXELS):
    """Row, col, height, width of a central window of at most ``max_pixels`` (same aspect)."""
    h, w = shape
    if h * w <= max_pixels:
        return 0, 0, h, w
    f = (max_pixels / (h * w)) ** 0.5
    wh, ww = int(h * f), int(w * f)
    return (h - wh) // 2, (w - ww) // 2, wh, ww


def prepare(luma: np.ndarray, *, tile: int = TILE, workers: int = 1,
            macro: int = format3.MACRO, lattices: bool = True) -> _Prepared:
    """Whiten, estimate the lattice, resample and fold: everything that needs no key.

    Each geometry is folded at the tile, which formats 1 and 2 and the
    synchronisation search read; format 3's claim reads a geometry's fold at
    the macro-period (``macro * tile``), made when first read
    (:meth:`_Prepared.macro_fold`; the unwarped one here, the tile fold being
    its sum block by block). ``macro=1`` prepares for formats 1 and 2 alone
    (nothing for format 3's keyed search either). ``lattices=False`` keeps
    the unwarped fold only (a view whose geometry is known in advance,
    :mod:`claimkit.mark.scales`); the count of hypotheses is unchanged, so
    that is conservative.
    """
    if min(luma.shape) < MIN_SIDE:
        raise ValueError(f"image side below {MIN_SIDE} pixels")
    # A 4-megapixel window holds far more than enough of a tiled mark; beyond
    # it, cost would grow with size for no gain in evidence.
    win = central_window(luma.shape)
    r0, c0, wh, ww = win
    x = whiten(luma[r0:r0 + wh, c0:c0 + ww])
    spectra: list = []
    transforms: list = []
    found: list[geometry.Lattice | None] = []

    def add(f, transform, lattice):
        spectra.append(_fold_spectra(f, tile, workers))
        transforms.append(transform)
        found.append(lattice)

    mf = fold(x, tile * macro)
    add(mf.reshape(macro, tile, macro, tile).sum(axis=(0, 2)), None, None)
    macro_folds = {b"": np.asarray(mf, dtype=np.float32)}
    half = np.array([wh, ww], dtype=float) / 2
    acf = geometry.lag_map(x, workers=workers) if lattices and geometry.searchable(x.shape, tile) else None
    # Format 3's keyed search (macro > 1) reads many more of the coarse grid's
    # hypotheses than the lattice search refines (on copies up to KEYED_MAX_PIXELS):
    # one pass over the grid keeps both.
    keyed = acf is not None and macro > 1
    counts = KEYED_LARGE if _keyed_large(win) else KEYED_CANDIDATES
    coarse = None if acf is None else geometry.coarse_search(acf, tile, *(counts if keyed else ()))
    found_lattices = [] if acf is None else geometry.find_lattices(x, tile, workers=workers, acf=acf,
                                                                   coarse=coarse)
    for lat in found_lattices:
        t = lat.transform(tile)
        # A lattice that is the identity to within a fifth of a pixel across the
        # window adds nothing to the unwarped fold: skip the costly resampling.
        # (The hypothesis count stays fixed, so skipping is conservative.)
        drift = np.abs(t - np.eye(2)) @ half
        if drift.max() < 0.2:
            continue
        # At the tile only: the macro-period fold is made if format 3 reads it (_Prepared.macro_fold).
        add(fold_resampled(x, t, tile), t, lat)
    sims: np.ndarray | None = None
    reduced: tuple[np.ndarray, ...] = ()
    if keyed:
        assert acf is not None
        sims = geometry.similarities(acf, tile, *counts, coarse=coarse)
        reduced = tuple(_reduce(_central(x, KEYED_WINDOW * r), r) for r in KEYED_REDUCTIONS)
    return _Prepared(spectra, transforms, found, win, macro_folds, whitened=x, similarities=sims,
                     reduced=reduced, macro=macro)


def _fold_spectra(f: np.ndarray, tile: int, workers: int = 1) -> np.ndarray:
    """The weighted spectra (8, T, T) complex64 of a fold's eight quarter-turn/mirror variants."""
    # Single precision from here on: the folds sum thousands of pixels, and
    # float32 keeps ~7 digits of scores read to 4 (half the memory traffic of
    # complex128 in every transform and product of the search).
    s = sfft.fft2(np.asarray(f, dtype=np.float32), workers=workers)
    # The eight variants' spectra are the fold's, permuted and turned in
    # phase (_variant_spectra), and so are their weights: |S| is all the
    # weight reads, and the 5 x 5 average and the quantile do not change
    # under those permutations. One transform and one weight instead of
    # eight: the same spectra to float32 rounding.
    s *= spectral_weight(s[None])[0]
    idx, phase = _variant_spectra(tile)
    return s.ravel()[idx] * phase


def _central(x: np.ndarray, side: int) -> np.ndarray:
    """The central part of ``x``, at most ``side`` pixels each way."""
    h, w = x.shape
    sh, sw = min(h, side), min(w, side)
    return x[(h - sh) // 2:(h - sh) // 2 + sh, (w - sw) // 2:(w - sw) // 2 + sw]


def _reduce(x: np.ndarray, r: int) -> np.ndarray:
    """Mean of each ``r x r`` block (float32)."""
    h, w = (x.shape[0] // r) * r, (x.shape[1] // r) * r
    return np.asarray(x[:h, :w], dtype=np.float32).reshape(h // r, r, w // r, r).mean(axis=(1, 3))


# The pilot kernels of the last few patterns searched (see _pilot_filter), by id: each
# entry holds its pattern, so no other object can take that id while it is kept.
_FILTERS: dict[int, tuple[KeyPattern, np.ndarray, np.ndarray]] = {}
_FILTERS_LOCK = threading.Lock()


def _pilot_filter(pattern: KeyPattern) -> tuple[np.ndarray, np.ndarray]:
    """The pilot search's kernel (T, T) complex64 and key power (T*T,) of ``pattern``, kept for reuse.

    An examination searches the same few patterns (formats 1-2, the
    synchronisation) at several views and picks: made once, not each time
    (a transform of the pilots and products over the tile, ~0.5 ms).
    """
    with _FILTERS_LOCK:
        hit = _FILTERS.get(id(pattern))
    if hit is not None and hit[0] is pattern:
        return hit[1], hit[2]
    n = pattern.tile
    weight = pattern.spot_ft * pattern.band
    pilot_ft = _delta_ft(*spot_signs(pattern, None), n)
    kern = (weight * np.conj(pattern.carrier_phase) * np.conj(pilot_ft)).astype(np.complex64)
    key_power = (np.abs(weight * pilot_ft) ** 2).ravel()
    for arr in (kern, key_power):
        arr.setflags(write=False)
    with _FILTERS_LOCK:
        if len(_FILTERS) >= 8:
            del _FILTERS[next(iter(_FILTERS))]
        _FILTERS[id(pattern)] = (pattern, kern, key_power)
    return kern, key_power


def _surfaces(prep: _Prepared, pattern: KeyPattern, ramps: np.ndarray):
    """Standardised pilot scores: array (G, 8, phases, T, T), float32."""
    n = pattern.tile
    kern, key_power = _pilot_filter(pattern)
    ramps = np.asarray(ramps, dtype=np.complex64)
    out = np.empty((len(prep.spectra), DIHEDRAL, len(ramps), n, n), dtype=np.float32)
    half = n // 2 + 1
    for g, s in enumerate(prep.spectra):
        # Exact standard deviation over the key (stats module): one per variant,
        # sum |S|^2 |weight pilot|^2, accumulated in double precision.
        s2 = s.real * s.real + s.imag * s.imag
        # (einsum's own loop, not a BLAS call that could start threads in a worker)
        sigma = np.sqrt(np.einsum("vk,k->v", s2.reshape(len(s2), -1), key_power)) / n ** 2
        # The product is Hermitian (a real fold, a real pattern, the ramps odd in the
        # frequency; the kernel is zero on the Nyquist row and column where they are
        # not): its real inverse transform reads half of it, at half the cost of the
        # complex one whose real part it is (to float32 rounding).
        prod = (s[:, :, :half] * kern[:, :half])[:, None] * ramps[None, :, :, :half]
        # complex64 transforms: 3x faster than numpy's complex128 ones here.
        out[g] = _irfft2(prod, n)
        # (a fold with no energy, a flat picture, scores 0, not 0 / 0)
        out[g] /= np.maximum(sigma, 1e-30)[:, None, None, None].astype(np.float32)
    return out


def _recovered(prep, pattern, ramps, g, d, ph) -> np.ndarray:
    """The recovered-message map of one placement (before the cyclic shift is undone)."""
    weight = pattern.spot_ft * pattern.band
    rec_ft = prep.spectra[g][d] * weight * np.conj(pattern.carrier_phase) * ramps[ph]
    return np.real(np.fft.ifft2(rec_ft))


def _decode_at(prep, patterns, ramps, g, d, ph, shift, payload_check, known_bits, candidates=None,
               accept_listed=None):
    """Decode one placement with each readable format's code in turn; the first valid payload wins.

    All formats share the carrier and the spot shape, so the recovered map is
    the same for each; only the code spots' positions and the code differ.
    A payload the decoder does not find may still be the best match in
    ``candidates`` (:class:`claimkit.mark.payload.PayloadList`); such a pick is
    kept only where ``accept_listed(z_full)`` holds (see :func:`_read_legacy`).
    """
    n = patterns[0].tile
    weight = patterns[0].spot_ft * patterns[0].band
    rec = _recovered(prep, patterns[0], ramps, g, d, ph)

    def z_full_of(pattern, bits, shift):
        allpos, allsign = spot_signs(pattern, pattern.codeword(bits))
        q_ft = _delta_ft(allpos, allsign, n)
        sigma = np.sqrt(np.sum(np.abs(prep.spectra[g][d] * weight * q_ft) ** 2)) / n ** 2
        p = (allpos + shift) % n
        return float(np.sum(allsign * rec[p[:, 0], p[:, 1]]) / max(sigma, 1e-30))

    first = None
    for pattern in patterns:
        pos = (pattern.code_pos + shift) % n
        soft = rec[pos[:, 0], pos[:, 1]]
        bits = pattern.fmt.code.decode(soft, PAYLOAD_BITS, known=known_bits)
        if payload_check is not None and payload_check(bits):
            return pattern, bits, True, z_full_of(pattern, bits, shift), rec
        if payload_check is not None and candidates is not None:
            pp = (pattern.pilot_pos + shift) % n
            listed = candidates.best(soft, pattern.fmt.code, rec[pp[:, 0], pp[:, 1]] * pattern.pilot_sign)
            if listed is not None and payload_check(listed):
                z_full = z_full_of(pattern, listed, shift)
                if accept_listed is None or accept_listed(z_full):
                    return pattern, listed, True, z_full, rec
        first = first or (pattern, bits)
    return first[0], first[1], False, None, rec


def _fit_psnr(rec: np.ndarray, ref: np.ndarray) -> tuple[float, np.ndarray]:
    """PSNR (peak 1) of ``rec`` against ``ref`` after a least-squares gain and offset."""
    a = np.stack([rec.ravel(), np.ones(rec.size)], axis=1)
    coef, *_ = np.linalg.lstsq(a, ref.ravel(), rcond=None)
    fit = (a @ coef).reshape(ref.shape)
    mse = float(np.mean((fit - ref) ** 2))
    return 10.0 * np.log10(1.0 / max(mse, 1e-12)), fit


def _message(pattern, rec, shift, bits):
    """Recovered messages (spot estimate and raw correlation map) against the reference.

    The raw map is the inverse transform of the weighted, carrier-correlated
    fold, aligned to the reference. The spot estimate keeps what the key says
    carries the message: the measured amplitude at each spot position,
    rendered as a spot. Both are compared with the reference (pilot spots plus
    the spots of the decoded payload re-encoded) after a gain/offset fit.
    """
    raw = np.roll(rec, (-shift[0], -shift[1]), axis=(0, 1))
    codeword = pattern.codeword(bits)
    pos, _ = spot_signs(pattern, codeword)
    return _message_fit(raw, pos, message_template(pattern, codeword), pattern.spot_ft)


def _message_fit(raw: np.ndarray, pos: np.ndarray, ref: np.ndarray, spot_ft: np.ndarray):
    n = raw.shape[0]
    d_meas = np.zeros((n, n))
    d_meas[pos[:, 0], pos[:, 1]] = raw[pos[:, 0], pos[:, 1]]
    spots = np.real(np.fft.ifft2(np.fft.fft2(d_meas) * spot_ft))
    psnr_spots, fit_spots = _fit_psnr(spots, ref)
    psnr_raw, fit_raw = _fit_psnr(raw, ref)
    zero = 10.0 * np.log10(1.0 / float(np.var(ref)))   # what an all-flat guess scores
    return psnr_spots, psnr_raw, zero, fit_spots, fit_raw, ref


@dataclass
class _Outcome:
    """The best reading of one test (formats 1-2, or format 3) before the tests are combined."""

    lp: float
    z_pilot: float
    z_full: float | None
    bits: np.ndarray
    valid: bool
    fmt: str
    placement: tuple            # (g, d, ph, shift)
    surface: np.ndarray
    # What _message / _message_fit return, made when the outcome is reported (the
    # examination reports one outcome of its two tests, and format 3's is mostly not it).
    message_of: Callable[[], tuple]
    hypotheses: int
    payloads: int
    family: int | None = None
    prep: _Prepared | None = None   # the geometries ``placement`` indexes, when not the examination's

    @property
    def message(self) -> tuple:
        """The recovered message against the reference (see :func:`_message_fit`)."""
        return self.message_of()


def _top(surf: np.ndarray, count: int) -> list[tuple[float, tuple]]:
    """The ``count`` best placements of ``surf``, best first: (score, (g, d, ph, shift)).

    One argmax per placement, each best masked out before the next (0.5 ms
    for three of 1.5M scores, where an argpartition took 12); the masked
    scores are put back, so ``surf`` is left as it was (no copy of it, a few
    MB per view, is made).
    """
    flat = surf.reshape(-1)
    out: list[tuple[float, tuple]] = []
    masked: list[tuple[int, float]] = []
    try:
        for i in range(min(count, flat.size)):
            idx = int(np.argmax(flat))
            g, d, ph, r, c = np.unravel_index(idx, surf.shape)
            out.append((float(flat[idx]), (int(g), int(d), int(ph), np.array([r, c]))))
            if i + 1 < count:
                masked.append((idx, flat[idx]))
                flat[idx] = -np.inf
    finally:
        for idx, value in reversed(masked):
            flat[idx] = value
    return out


def _listed_level(threshold: float) -> float:
    """The log10 bound a payload picked from a list must reach to be kept: a claim's.

    Which payloads an examiner lists depends on who examines (the owner lists
    every allocated serial, a disclosure holder the disclosed works), so a
    listed pick is kept only where it makes a claim on its own (counted as the
    best of the ``TESTS`` tests). Below that nothing read through a list is
    reported, and every holder of the keys re-runs an examination without a
    claim to the same numbers.
    """
    return float(np.log10(threshold)) - float(np.log10(TESTS))


def _read_legacy(prep, seed, ramps, payload_check, known_bits, payload_space,
                 candidates=None, threshold: float = 1.0) -> _Outcome:
    """Formats 1 and 2: pilot search over every placement, decode the best few."""
    patterns = [key_pattern(seed, fmt=f) for f in READABLE]
    n = patterns[0].tile
    # The current format's pilots are a prefix of every older format's, so one
    # pilot search serves all of them.
    surf = _surfaces(prep, patterns[0], ramps)
    counted = payloads_counted(payload_space)
    h = hypotheses(n)
    best = None
    level = _listed_level(threshold)
    for z_pilot, (g, d, ph, shift) in _top(surf, DECODE_TRIES):
        def bound(z_full, z_pilot=z_pilot):
            return stats.log10_false_alarm(z_pilot=z_pilot, z_full=z_full, hypotheses=h,
                                           payload_space=counted)
        pattern, bits, valid, z_full, rec = _decode_at(
            prep, patterns, ramps, g, d, ph, shift, payload_check, known_bits, candidates,
            accept_listed=lambda z: bound(z) <= level)
        lp = bound(z_full)
        if best is None or lp < best[0]:
            best = (lp, (g, d, ph, shift), pattern, bits, valid, z_full, z_pilot, rec)
    assert best is not None     # ``_top`` yields at least one placement
    lp, (g, d, ph, shift), pattern, bits, valid, z_full, z_pilot, rec = best
    return _Outcome(lp=lp, z_pilot=z_pilot, z_full=z_full, bits=bits, valid=valid,
                    fmt=pattern.fmt.name, placement=(g, d, ph, shift),
                    surface=surf[g, d, ph],
                    message_of=lambda: _message(pattern, rec, shift, bits),
                    hypotheses=h, payloads=counted)


def sync_hypotheses(tile: int = TILE) -> int:
    """Placements of the synchronisation search: the pilot search of formats 1 and 2, over more geometries.

    Besides the unwarped fold and the lattices, the keyed search
    (:func:`_keyed_geometries`) chooses among ``SIMILARITY_CANDIDATES``
    similarities with the synchronisation key: all of them are counted, as
    if each had been searched in full.
    """
    return SYNC_GEOMETRIES * DIHEDRAL * len(PHASES) * tile * tile


# Format 3's keyed synchronisation search. The lattice search reads the autocorrelation,
# which is quadratic in the mark's periodic part; format 3 keeps only its synchronisation
# component periodic (35 % of the energy), and on small, busy copies (a 450 x 300 photo
# turned 45 degrees, a 512-px microscope slide shrunk and turned) its lattice sank among
# the noise maxima of the coarse grid. Correlating with the known synchronisation
# pattern is linear in its amplitude: at the right similarity it scored 10 to 20 on those
# copies. So the best SIMILARITY_CANDIDATES similarities of the coarse grid are each
# scored by that correlation on a cheap fold (the central KEYED_WINDOW px, reduced by two,
# folded at half the tile: the synchronisation keeps 90 % of its power below a quarter of
# the sampling rate), and the best KEYED_PICKS become geometries of format 3's search.
# The choice uses the sync key only: the claim (family keys, independent of it) is still
# tested at DECODE_TRIES + OWN_PLACEMENTS placements, so its bound does not change; the sync's own bound
# (removal_suspected) counts every candidate (sync_hypotheses).
KEYED_WINDOW = 192      # side of the reduced window the keyed search reads
KEYED_CANDIDATES = (geometry.SIMILARITY_CANDIDATES, geometry.ASPECT_CANDIDATES)
# On a copy whose examined window is larger than KEYED_MAX_PIXELS, only the coarse
# hypotheses the lattice search refines itself are scored (KEYED_LARGE: 6 similarities,
# 4 squeezes), and a pick is tried only where its keyed score reaches KEYED_LARGE_Z. The
# keyed search reads the central KEYED_WINDOW * 2 (or * 4) px whatever the copy's size,
# the lattice search the whole window: above a megapixel (60 periods and more) the true
# lattice ranked 1st and 3rd of the coarse grid on the two copies measured where the
# keyed search made the claim (a 2.2 MP copy enlarged 1.3, turned 11 degrees, JPEG 50:
# keyed score 9.0; a 1.1 MP copy turned 23 degrees with noise 12: 6.4), while the best
# of these 10 scored 4.2 to 5.7 on 40 copies of 6 unmarked pictures (1.1 to 5.6 MP).
# Scoring all 448 cost about 100 ms per examination there, and the full-size folds of
# two picks 20 to 40 ms more. The synchronisation's bound still counts all 448
# (sync_hypotheses).
KEYED_MAX_PIXELS = 1_000_000
KEYED_LARGE = (geometry.SIMILARITY_GRID[4], geometry.ASPECT_GRID[4])
KEYED_LARGE_Z = 6.0


def _keyed_large(window: tuple[int, int, int, int]) -> bool:
    """Whether the examined window (row, col, height, width) is above :data:`KEYED_MAX_PIXELS`."""
    return window[2] * window[3] > KEYED_MAX_PIXELS


# Copies enlarged by more than KEYED_ENLARGED are read reduced by 4 (their synchronisation sits at
# low frequencies, and a period spans more pixels), the others by 2.
KEYED_REDUCTIONS = (2, 4)
KEYED_ENLARGED = 1.4
KEYED_BATCH = 32
KEYED_OVERSAMPLE = 4
KEYED_PICKS = 2
KEYED_SKIP_Z = 8.0     # a synchronisation this clear is found already: no keyed search
# A pick is kept only where its synchronisation scores this much on the full fold: on
# unmarked pictures (textures, text, a slide; 42 picks under random keys) the picks scored
# 4.1 to 5.2, on marked copies that needed the search 7.2 to 27. (Dropping a pick never
# touches a bound: the claim's placements are counted whether tried or not.)
KEYED_ACCEPT_Z = 5.5
# A claim placement on a resampled geometry (a lattice or a keyed pick; not the file's own
# grid) is read only where the synchronisation scores this much there: the 512-px fold it
# needs costs 20 to 40 ms per geometry at 1.6 to 2.2 MP, and on an unmarked copy the three
# best placements mostly fall on lattices its texture gave. In the stress battery of the 8
# pictures and the quick one of their unmarked originals (351 examinations), the 295 claims
# made at such placements had synchronisation scores of 7.0 and more; on the 118 copies
# without a claim, 186 of 199 such placements scored below 5.5 (4.2 to 6.2). (The claim's
# count is unchanged: every placement is counted whether read or not.)
RESAMPLED_MIN_Z = 5.5
SYNC_GEOMETRIES = GEOMETRIES + geometry.SIMILARITY_CANDIDATES + geometry.ASPECT_CANDIDATES


@lru_cache(maxsize=8)
def _half_kernel(seed: bytes) -> tuple[np.ndarray, np.ndarray]:
    """The synchronisation's pilot kernel on the half-size tile (frequencies below n/4) and its power."""
    sp = format3.sync_pattern(seed)
    n, h = sp.tile, sp.tile // 2
    full = (sp.spot_ft * sp.band * sp.carrier_phase * _delta_ft(*spot_signs(sp, None), n))
    k = np.fft.fftfreq(h, 1.0 / h).astype(int)          # -h/2 .. h/2-1
    keep = np.abs(k) < h // 2
    sub = np.zeros((h, h), dtype=np.complex128)
    rows, cols = np.ix_(np.flatnonzero(keep), np.flatnonzero(keep))
    sub[rows, cols] = full[np.ix_(k[keep] % n, k[keep] % n)]
    kern = np.conj(sub).astype(np.complex64)
    power = (np.abs(sub) ** 2).ravel()
    for arr in (kern, power):
        arr.setflags(write=False)
    return kern, power


def _keyed_geometries(prep: _Prepared, seed: bytes) -> list[np.ndarray]:
    """The similarities (original -> copy) that best match the synchronisation pattern, best first.

    A candidate ``t``'s fold on the half-size tile (``h`` = T/2 bins of two
    original pixels) of the window reduced by ``r`` has the transform
    ``F(k) = sum_y x(y) exp(-2 pi i (r/2) (t^-T k / h) . y)`` over the
    reduced window's pixels ``y``: the window's own spectrum at those
    frequencies. It is read off one transform of the window, zero-padded
    ``KEYED_OVERSAMPLE`` times, at the nearest frequency (a phase error of
    at most pi / 4 at the window's edge: this chooses among candidates, no
    score rests on it). Each is weighted by its smoothed power (as
    :func:`spectral_weight`, without the floor) and correlated with the
    synchronisation's pilots in all eight quarter-turn/mirror variants at
    every shift.
    """
    if prep.similarities is None or not len(prep.similarities) or not prep.reduced:
        return []
    sims = prep.similarities
    scale = np.sqrt(np.abs(np.linalg.det(sims)))
    z = np.full(len(sims), -np.inf, dtype=np.float32)
    for r, x in zip(KEYED_REDUCTIONS, prep.reduced, strict=True):
        sel = np.flatnonzero((scale > KEYED_ENLARGED) == (r == KEYED_REDUCTIONS[-1]))
        if len(sel) and min(x.shape) >= 16:
            z[sel] = _keyed_scores(x, sims[sel] * (2.0 / r), seed)
    best = np.argsort(z)[::-1][:KEYED_PICKS]
    least = KEYED_LARGE_Z if _keyed_large(prep.window) else -np.inf
    return [sims[i] for i in best if np.isfinite(z[i]) and z[i] >= least]


def _keyed_scores(x: np.ndarray, transforms: np.ndarray, seed: bytes) -> np.ndarray:
    """Best synchronisation score of each transform (original/2 -> ``x``) on the half-size tile."""
    h = TILE // 2
    kern_v, idx_half, power_v = _keyed_tables(seed)
    pad = sfft.next_fast_len(KEYED_OVERSAMPLE * max(x.shape))
    spec_x = sfft.fft2(x - np.float32(x.mean()), s=(pad, pad)).astype(np.complex64, copy=False).ravel()
    k = np.fft.fftfreq(h, 1.0 / h)
    kk = np.stack(np.meshgrid(k, k, indexing="ij")).reshape(2, -1).astype(np.float32)   # (2, h*h)
    inv_t = np.transpose(np.linalg.inv(transforms), (0, 2, 1)).astype(np.float32)      # t^-T
    inv_t *= np.float32(pad / h)
    fpad = np.float32(pad)
    z = np.empty(len(inv_t), dtype=np.float32)
    for start in range(0, len(inv_t), KEYED_BATCH):
        part = inv_t[start:start + KEYED_BATCH]
        c = len(part)
        # The bins (c, 2, h*h), wrapped onto the padded grid in float32 (whole numbers
        # far below 2^24: exact, the same bins as integer modulo at a third of its cost).
        b = part @ kk
        np.rint(b, out=b)
        q = np.floor(b / fpad)
        q *= fpad
        b -= q
        b[:, 0] *= fpad
        b[:, 0] += b[:, 1]
        spec = spec_x.take(b[:, 0].astype(np.intp)).reshape(c, h, h)
        p2 = spec.real * spec.real + spec.imag * spec.imag
        w = np.maximum(_box_mean(p2, SMOOTH), p2)
        w += 1e-12
        np.reciprocal(w, out=w)
        spec *= w                                                        # spectrum / w
        p2 *= w
        p2 *= w                                                          # |weighted spectrum|^2
        # Each variant's sigma: its squared spectrum is a permutation of this one's.
        # (vecdot's own loop, 8x faster than einsum's here, and no BLAS threads)
        sigma = np.sqrt(np.vecdot(p2.reshape(c, 1, -1), power_v)) / h ** 2   # (c, 8)
        # (take: the same gather as indexing, seven times faster here)
        v = np.take(spec.reshape(c, -1), idx_half, axis=1)               # (c, 8, h, h/2+1)
        v *= kern_v
        z[start:start + c] = (_irfft2_max(v, h) / np.maximum(sigma, 1e-30)).max(axis=1)
    return z


def _box_mean(a: np.ndarray, size: int) -> np.ndarray:
    """Mean over a ``size x size`` square of axes 1 and 2 of ``a`` (C, H, W), wrapped around (float32).

    ``ndimage.uniform_filter(a, (1, size, size), mode="wrap")`` to float32
    rounding, as sums of shifted slices: 0.3 against 0.6 ms for 32 squares of
    64 x 64 (the filter runs along each short line on its own).
    """
    r = size // 2
    n = a.shape[1]
    ext = np.concatenate([a[:, n - r:], a, a[:, :r]], axis=1)
    rows = ext[:, :n].copy()
    for i in range(1, size):
        rows += ext[:, i:i + n]
    n = a.shape[2]
    ext = np.concatenate([rows[:, :, n - r:], rows, rows[:, :, :r]], axis=2)
    out = ext[:, :, :n].copy()
    for i in range(1, size):
        out += ext[:, :, i:i + n]
    out *= np.float32(1.0 / (size * size))
    return out


def _irfft2(v: np.ndarray, n: int) -> np.ndarray:
    """``irfft2(v, s=(n, n))`` over the last two axes, overwriting ``v``.

    Its two passes written out, the first one in place: the same values,
    10 to 20 % faster on these stacks of small transforms than ``irfft2``,
    which copies its input first.
    """
    return sfft.irfft(sfft.ifft(v, axis=-2, overwrite_x=True), n=n, axis=-1, overwrite_x=True)


def _irfft2_max(v: np.ndarray, n: int) -> np.ndarray:
    """Largest value of each :func:`_irfft2` of ``v`` (overwritten) over the last two axes."""
    out = _irfft2(v, n)
    return out.reshape(*out.shape[:-2], -1).max(axis=-1)


@lru_cache(maxsize=8)
def _keyed_tables(seed: bytes):
    """The keyed search's fixed arrays on the half-spectrum: variant kernels and maps, key powers.

    Returns each variant's phase times the pilot kernel (8, h, h/2+1), the
    flat indices of the eight variants (8, h, h/2+1), and the key power
    seen through each variant's permutation (8, h*h).
    """
    h = TILE // 2
    kern, power = _half_kernel(seed)
    idx, phase = _variant_spectra(h)
    half = h // 2 + 1
    power_v = np.zeros((DIHEDRAL, h * h), dtype=np.float32)
    for v in range(DIHEDRAL):
        np.add.at(power_v[v], idx[v].ravel(), power)      # sum_k |S[D k]|^2 P[k]
    out = ((phase[:, :, :half] * kern[:, :half]).astype(np.complex64),
           np.ascontiguousarray(idx[:, :, :half]), power_v)
    for arr in out:
        arr.setflags(write=False)
    return out


def with_views(prep: _Prepared, views: list[np.ndarray], transforms: list[np.ndarray]) -> _Prepared:
    """``prep`` with more geometries, each the unwarped fold of another resampling of the same copy.

    ``views[i]`` is the copy resampled so that ``transforms[i]`` maps it to
    ``prep``'s own view (reported as that geometry's transform); each is
    whitened and folded as :func:`prepare` folds the unwarped view. Its
    grid origin is the view's (pixel (0, 0)). Its macro fold is stored under
    its transform (a new dict: ``prep``'s own folds stay those of its window).
    """
    spectra, folds = list(prep.spectra), dict(prep.macro_folds)
    n = prep.spectra[0].shape[-1]
    for v, t in zip(views, transforms, strict=True):
        mf = fold(whiten(v), n * prep.macro)
        spectra.append(_fold_spectra(mf.reshape(prep.macro, n, prep.macro, n).sum(axis=(0, 2)), n))
        folds[np.asarray(t, dtype=float).tobytes()] = np.asarray(mf, dtype=np.float32)
    return replace(prep, spectra=spectra, macro_folds=folds,
                   transforms=list(prep.transforms) + list(transforms),
                   lattices=list(prep.lattices) + [None] * len(views))


def format3_hypotheses() -> int:
    """Hypotheses of format 3's claim test (see :func:`claimkit.mark.stats.format3_hypotheses`)."""
    return stats.format3_hypotheses(placements=DECODE_TRIES + OWN_PLACEMENTS, families=format3.FAMILIES,
                                    macro=format3.MACRO)


def _read_format3(prep, keys: format3.MarkKeys, ramps, payload_check, known_bits,
                  payload_space, origin, candidates=None,
                  threshold: float = 1.0) -> tuple[_Outcome | None, float, _Prepared]:
    """Format 3: align with the sync pattern, then score every family at every macro offset.

    Returns the claim's outcome (None without family seeds), the best
    synchronisation score and ``prep`` with the geometries the keyed search
    added (placements index them).
    """
    assert keys.sync is not None
    sp = format3.sync_pattern(keys.sync)
    n = sp.tile
    surf = _surfaces(prep, sp, ramps)
    if float(surf.max()) < KEYED_SKIP_Z and prep.whitened is not None:
        # Each pick is folded at the tile; only a pick whose synchronisation stands out
        # is offered to the claim's placements (and folded at the macro-period if one
        # of them reads it).
        picks = []
        for t in _keyed_geometries(prep, keys.sync):
            spec = _fold_spectra(fold_resampled(prep.whitened, t, n), n)
            more = _surfaces(replace(prep, spectra=[spec]), sp, ramps)
            if float(more.max()) >= KEYED_ACCEPT_Z:
                picks.append((t, spec, more))
        if picks:
            prep = replace(prep, spectra=list(prep.spectra) + [p[1] for p in picks],
                           transforms=list(prep.transforms) + [p[0] for p in picks],
                           lattices=list(prep.lattices) + [None] * len(picks))
            surf = np.concatenate([surf] + [p[2] for p in picks])
    h = format3_hypotheses()
    level = _listed_level(threshold)
    best = None
    z_sync = float(surf.max())
    if not keys.families:
        return None, z_sync, prep
    # A resampled geometry (a lattice or a keyed pick) is read only where the synchronisation
    # confirms it (RESAMPLED_MIN_Z); the file's own grid always is (below).
    placements = [p for z, p in _top(surf, DECODE_TRIES)
                  if prep.transforms[p[0]] is None or p[0] in prep.own or z >= RESAMPLED_MIN_Z]
    # The file's own grid (unwarped, as is, origin where the picture's is):
    # tried too, so that stripping the synchronisation component (an
    # adversary can estimate it) does not take the claim with it.
    assert len(prep.own) <= OWN_PLACEMENTS
    for g_own in prep.own:
        own = (g_own, 0, 0, np.asarray(origin, dtype=int) % n)
        if not any(q[:3] == own[:3] and np.array_equal(q[3], own[3]) for q in placements):
            placements.append(own)
    # The spectral weight of a placement reads |S| of its aligned tiles' sum only: the
    # same for every shift and half-pixel phase of a geometry, and permuted with the
    # variant (as in _fold_spectra). One per geometry, to float32 rounding the same.
    weights: dict[int, np.ndarray] = {}
    variant_idx, _ = _variant_spectra(n)
    for g, d, ph, shift in placements:
        mf = prep.macro_fold(g)
        if g not in weights:
            tiles = mf.reshape(prep.macro, n, prep.macro, n).sum(axis=(0, 2))
            weights[g] = spectral_weight(sfft.fft2(tiles)[None])[0].astype(np.float32).ravel()
        y = format3.aligned_spectra(mf, d, shift, ramps[ph], n)
        y *= format3.at_claim_frequencies(weights[g][variant_idx[d]], n)
        scores = format3.score_families(y, keys.families, n)
        fam, z = max(((f, v) for f, v in scores.items()), key=lambda fv: float(fv[1].max()))
        k = int(np.argmax(z))
        offset = format3.OFFSETS[k]
        def bound(z_full, z_pilot=float(z[k])):
            return stats.log10_false_alarm(z_pilot=z_pilot, z_full=z_full, hypotheses=h,
                                           payload_space=payload_space)
        bits: np.ndarray | None = None
        valid, z_full, rec = False, None, None
        if float(z[k]) >= DECODE_MIN_Z3:
            bits, valid, z_full, rec = format3.decode_family(
                y, keys.families[fam], offset, tile=n, payload_check=payload_check,
                known_bits=known_bits, candidates=candidates,
                accept_listed=lambda zf: bound(zf) <= level)
        lp = bound(z_full)
        if best is None or lp < best.lp:
            # The recovered message is made when the outcome is reported (mostly
            # it is not: see _Outcome.message_of).
            def message_of(seed=keys.families[fam], bits=bits, rec=rec, y=y, offset=offset):
                pos, _, ref = format3.reference_message(seed, bits, n)
                if rec is None:
                    rec = format3.recovered(y, seed, offset, n)
                return _message_fit(rec, pos, ref, sp.spot_ft)
            best = _Outcome(lp=lp, z_pilot=float(z[k]), z_full=z_full,
                            bits=np.zeros(PAYLOAD_BITS, dtype=np.uint8) if bits is None else bits,
                            valid=valid,
                            fmt=format3.NAME, placement=(g, d, ph, shift), surface=surf[g, d, ph],
                            message_of=message_of, hypotheses=h,
                            payloads=payload_space, family=fam)
    return best, z_sync, prep


def examine_luma(luma: np.ndarray, seed: bytes | format3.MarkKeys, *,
                 payload_check: Callable[[np.ndarray], bool] | None = None,
                 payload_space: int = DEFAULT_PAYLOAD_SPACE,
                 known_bits: np.ndarray | None = None,
                 threshold: float = DEFAULT_THRESHOLD, decoys: int = 0,
                 decoy_seed: int = 0, workers: int = 1,
                 prepared: _Prepared | None = None,
                 offset: tuple[int, int] = (0, 0),
                 payload_candidates: PayloadList | None = None) -> Finding:
    """Examine one copy's luma for the mark of ``seed``.

    Parameters
    ----------
    luma : ndarray, (H, W), 0..255 scale
    seed : bytes or MarkKeys
        32-byte detection seed of formats 1 and 2, or the keys of every
        format (:class:`claimkit.mark.format3.MarkKeys`).
    payload_check : callable, optional
        Says whether decoded payload bits name a real work (e.g. the owner's
        payload tag matches). Only a valid payload earns the full-template score.
    payload_space : int
        How many valid payloads ``payload_check`` could accept; counted in the bound.
    known_bits : ndarray, optional
        Payload bits the examiner already knows (0/1, -1 for unknown), such as
        the owner tag; decoding keeps to them. This narrows nothing in the
        bound: every valid payload already agrees with them.
    threshold : float
        ``detected`` means the false-alarm bound is at most this.
    decoys : int
        Number of random decoy keys to examine as a control (scores only).
    offset : (int, int)
        Row and column of ``luma[0, 0]`` in the file (when ``luma`` is a
        window of it): format 3 also tries the file's own grid.
    payload_candidates : PayloadList, optional
        Payloads the examiner knows to be valid (the owner's allocated
        serials, or a disclosed work's payload): where the decoder finds no
        valid payload, the listed one that matches best is scored. Each must
        pass ``payload_check``; the bound counts ``payload_space`` as before.

    Returns
    -------
    Finding

    Notes
    -----
    Formats 1 and 2 (the legacy seed) and format 3 (sync and family seeds)
    are separate tests; the finding reports the better one and its bound
    counts both (:func:`claimkit.mark.stats.log10_best_of`). Format 3's
    synchronisation found on its own is no claim: it sets
    ``removal_suspected``.
    """
    keys = seed if isinstance(seed, format3.MarkKeys) else format3.MarkKeys(legacy=seed)
    prep = prepared or prepare(luma, workers=workers)
    n = TILE
    ramps = _ramps(n)
    outcomes: list[_Outcome] = []
    z_sync = None
    if keys.legacy is not None:
        outcomes.append(_read_legacy(prep, keys.legacy, ramps, payload_check, known_bits,
                                     payload_space, payload_candidates, threshold))
    # A claim in formats 1-2 that stands with the format-3 test counted at its worst
    # (bound 1) needs no format-3 reading: the count of tests is the same either way.
    legacy_claims = bool(outcomes) and stats.log10_best_of(
        bounds=[outcomes[0].lp] + [0.0] * (TESTS - 1)) <= np.log10(threshold)
    if keys.sync is not None and not legacy_claims:
        # Where the picture's pixel (0, 0) falls in the examined window's frame.
        origin = (-(offset[0] + prep.window[0]), -(offset[1] + prep.window[1]))
        claim, z_sync, grown = _read_format3(prep, keys, ramps, payload_check, known_bits,
                                             payload_space, origin, payload_candidates,
                                             threshold)
        if claim is not None:
            claim.prep = grown
            outcomes.append(claim)
    if not outcomes:
        raise ValueError("no detection key given")
    best = min(outcomes, key=lambda o: o.lp)
    # The bound counts both tests whichever keys are held (a disclosure holder may
    # hold one format's keys only), so that every holder computes the same bound.
    lp = stats.log10_best_of(bounds=[o.lp for o in outcomes] + [0.0] * (TESTS - len(outcomes)))
    detected = lp <= np.log10(threshold)
    if not detected and len(outcomes) > 1:
        # Nothing claimed: report the test that every holder of a disclosure
        # can re-run (formats 1-2; format 3's best family depends on which
        # family seeds the examiner holds, and a re-run with a disclosure
        # holds one). The format-3 test is still counted in the bound.
        best = outcomes[0]
    sync_lp = None if z_sync is None else stats.log10_false_alarm(
        z_pilot=z_sync, z_full=None, hypotheses=sync_hypotheses(n), payload_space=1)
    removal = bool(sync_lp is not None and sync_lp <= np.log10(threshold) and not detected)
    g, d, ph, shift = best.placement
    psnr, psnr_raw, psnr_zero, rec, rec_raw, ref = best.message
    geom = describe_geometry(best.prep or prep, g, d, PHASES[ph], shift, n) if detected else {}
    decoy_scores = decoy_control(prep, decoys, decoy_seed) if decoys else []
    counting = {
        "tests": TESTS,
        "formats_1_2": {
            "hypotheses": hypotheses(n), "geometries": GEOMETRIES, "dihedral": DIHEDRAL,
            "phases": len(PHASES), "shifts": n * n, "payloads": payloads_counted(payload_space)},
        "format_3": {
            "hypotheses": format3_hypotheses(), "placements": DECODE_TRIES + OWN_PLACEMENTS,
            "sync_hypotheses": sync_hypotheses(n), "sync_geometries": SYNC_GEOMETRIES,
            "families": format3.FAMILIES, "macro_offsets": format3.MACRO ** 2,
            "payloads": payload_space},
    }
    return Finding(
        detected=bool(detected), log10_false_alarm=lp, z_pilot=best.z_pilot, z_full=best.z_full,
        hypotheses=best.hypotheses, payload_space=best.payloads,
        payload_bits=[int(b) for b in best.bits] if detected else None,
        payload_valid=best.valid and bool(detected),
        mark_format=best.fmt if best.valid and detected else None,
        message_psnr_db=float(psnr) if detected else None,
        message_psnr_raw_db=float(psnr_raw) if detected else None,
        message_psnr_flat_db=float(psnr_zero),
        geometry=geom, surface=best.surface.astype(np.float32),
        recovered=rec.astype(np.float32), recovered_raw=rec_raw.astype(np.float32),
        reference=ref.astype(np.float32),
        decoy_scores=decoy_scores, removal_suspected=removal,
        # The sync score matters where nothing is claimed (removal_suspected); with a
        # claim it is left out, so that a disclosure holder without the sync seed (a
        # format-1/2 work) re-runs the finding to the same fields.
        z_sync=None if detected else z_sync, mark_family=best.family if detected else None,
        counting=counting,
    )


def decoy_control(prep: _Prepared, count: int, seed: int = 0) -> list[float]:
    """Best pilot score under ``count`` random keys: the null the observed score is set against."""
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(count):
        pattern = key_pattern(rng.bytes(32))
        out.append(float(_surfaces(prep, pattern, _ramps(pattern.tile)).max()))
    key_pattern.cache_clear()
    return out


# ---------------------------------------------------------------- geometry report

_SWAP = np.array([[0.0, 1.0], [1.0, 0.0]])


def describe_geometry(prep: _Prepared, g: int, d: int, phase, shift, tile: int) -> dict:
    """Rotation (counter-clockwise on screen), scale, aspect, mirror and grid offset."""
    # The canonical picture is the original under some lattice symmetry S; the
    # variant that matched undoes it (S D = I), so original -> copy is T D.
    dmat, dofs = _variant_maps(tile)[d]
    t = prep.transforms[g]
    lin = (np.eye(2) if t is None else t) @ dmat
    m = _SWAP @ lin @ _SWAP            # (x, y) with y pointing down
    u, s, vt = np.linalg.svd(m)
    rot = u @ vt
    stretch = vt.T @ np.diag(s) @ vt
    flipped = bool(np.linalg.det(rot) < 0)
    if flipped:
        rot = rot @ np.diag([-1.0, 1.0])
        stretch = np.diag([-1.0, 1.0]) @ stretch @ np.diag([-1.0, 1.0])
    # With y pointing down, a counter-clockwise turn on screen maps original
    # offsets to copy offsets by [[c, s], [-s, c]].
    angle = float(np.degrees(np.arctan2(rot[0, 1], rot[0, 0])))
    lat = prep.lattices[g]
    # Grid origin: where the original's period origin falls in the copy (modulo one period).
    origin = (dmat @ (np.asarray(shift, dtype=float) + np.asarray(phase)) + dofs) % tile
    if t is None:
        oy, ox = origin
    else:
        oy, ox = t @ origin
    oy, ox = oy + prep.window[0], ox + prep.window[1]
    return {
        "rotation_deg": round((angle + 180.0) % 360.0 - 180.0, 3),
        "scale": round(float(np.sqrt(abs(np.linalg.det(m)))), 5),
        "aspect": round(float(stretch[0, 0] / stretch[1, 1]), 5),
        "flipped": flipped,
        "shift_px": [round(float(ox), 2), round(float(oy), 2)],
        "resampled": t is not None,
        "lattice_peaks": None if lat is None else lat.inliers,
        # How sure the geometry is: the lattice's support in standard-normal
        # units (about 5 at most on pictures without the mark).
        "lattice_score": None if lat is None else round(float(lat.score), 2),
        "matrix": [[round(float(v), 6) for v in row] for row in m],
        "examined_window": [int(v) for v in (prep.window[1], prep.window[0], prep.window[3], prep.window[2])],
    }


def describe_in_words(geom: dict) -> str:
    """'rotated 17.0°, scaled to 64 %, mirrored' style summary."""
    if not geom:
        return "no geometry (mark not found)"
    parts = []
    if abs(geom["rotation_deg"]) >= 0.05:
        parts.append(f"rotated {geom['rotation_deg']:.1f}°")
    if abs(geom["scale"] - 1) >= 0.005:
        parts.append(f"scaled to {100 * geom['scale']:.0f} %")
    if abs(geom["aspect"] - 1) >= 0.005:
        parts.append(f"aspect changed to {geom['aspect']:.2f}")
    if geom["flipped"]:
        parts.append("mirrored")
    return ", ".join(parts) if parts else "no rotation, scaling or mirroring"


def detect_component(luma: np.ndarray, keys: bytes | format3.MarkKeys, **kwargs) -> Finding:
    """Examine one level (any luma array) for every readable format: :func:`examine_luma`.

    A multi-level examiner calls this per level and must count the levels in
    its bound (``stats.log10_best_of`` over the levels' ``log10_false_alarm``).
    """
    return examine_luma(luma, keys, **kwargs)
