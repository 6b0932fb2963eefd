"""Blind geometric resynchronisation from the lattice of the tiled mark.

The mark repeats with period ``TILE`` in the original, so the copy's
autocorrelation has peaks on a lattice ``L = A Z^2`` whose basis ``A`` is the
copy's linear distortion times ``TILE``. We estimate ``A`` from a
spectrally-flattened autocorrelation of the pre-whitened copy (flattening the
power spectrum makes the picture's own autocorrelation nearly a delta, while
the mark's comb of spectral lines survives), pick the lattice that explains
most peaks, refine it by least squares on sub-pixel peak positions, and
resample the copy onto the mark's grid. The key is never used here, so the
number of geometric hypotheses is fixed in advance and the statistics of
:mod:`claimkit.mark.stats` stay valid. The eight symmetries of the square
lattice (quarter turns and mirror) are not estimated: the detector tries all
eight on the folded tile, where they are exact permutations.

References
----------
.. [1] M. Kutter, "Watermarking resisting to translation, rotation, and
   scaling", Proc. SPIE 3528, Multimedia Systems and Applications, 1999.
   doi:10.1117/12.337432
.. [2] S. Voloshynovskiy, F. Deguillaume, T. Pun, "Multibit digital
   watermarking robust against local nonlinear geometrical distortions",
   Proc. ICIP 2001. doi:10.1109/ICIP.2001.958473
.. [3] J. L. Lagrange / C. F. Gauss lattice basis reduction, as in
   H. Cohen, *A Course in Computational Algebraic Number Theory*, Springer,
   1993, alg. 1.3.14.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import fft as sfft
from scipy import ndimage

ACF_SIZE = 1024          # side of the central window used for the autocorrelation
SCALE_RANGE = (0.45, 2.2)  # copy/original scale the search covers (0.5x..2x with margin)
LATTICE_CANDIDATES = 2   # fixed number of lattice hypotheses (counted in the statistics)
MAX_CANON_PIXELS = 6_000_000


@dataclass(frozen=True)
class Lattice:
    """A lattice found in the copy: basis columns in (row, col) pixels and its support."""

    basis: np.ndarray   # 2x2, columns are the two basis vectors
    score: float        # summed strength of the peaks it explains (flattened ACF units)
    inliers: int

    def transform(self, tile: int) -> np.ndarray:
        """Linear map from original (row, col) to copy (row, col)."""
        return self.basis / float(tile)


def _fast_window(n: int) -> int:
    return sfft.next_fast_len(n, real=True) if n >= 64 else n


def flattened_acf(x: np.ndarray, *, size: int = ACF_SIZE, workers: int = 1) -> np.ndarray:
    """Autocorrelation of a central window after flattening its power spectrum (fft-shifted)."""
    h, w = x.shape
    sh, sw = min(h, size), min(w, size)
    r0, c0 = (h - sh) // 2, (w - sw) // 2
    win = x[r0:r0 + sh, c0:c0 + sw].astype(np.float32, copy=True)
    win -= win.mean()
    win *= np.outer(np.hanning(sh), np.hanning(sw)).astype(np.float32)
    spec = sfft.rfft2(win, workers=workers)
    power = (spec.real ** 2 + spec.imag ** 2).astype(np.float32)
    smooth = ndimage.uniform_filter(power, 9, mode="wrap") + 1e-12
    acf = sfft.irfft2(power / smooth, s=win.shape, workers=workers)
    return np.fft.fftshift(acf)


def _peaks(acf: np.ndarray, rmin: float, rmax: float, count: int) -> tuple[np.ndarray, np.ndarray]:
    """Strongest local maxima in the annulus rmin..rmax, sub-pixel refined (positions rel. to centre)."""
    h, w = acf.shape
    cy, cx = h // 2, w // 2
    yy, xx = np.ogrid[:h, :w]
    r2 = (yy - cy) ** 2 + (xx - cx) ** 2
    valid = (r2 >= rmin ** 2) & (r2 <= rmax ** 2)
    local = (acf == ndimage.maximum_filter(acf, size=5, mode="wrap")) & valid
    ys, xs = np.nonzero(local)
    if ys.size == 0:
        return np.zeros((0, 2)), np.zeros(0)
    vals = acf[ys, xs]
    order = np.argsort(vals)[::-1][:count]
    ys, xs, vals = ys[order], xs[order], vals[order]
    pos = np.empty((ys.size, 2))
    for i, (y, x) in enumerate(zip(ys, xs)):
        pos[i, 0] = y - cy + _parabolic(acf[(y - 1) % h, x], acf[y, x], acf[(y + 1) % h, x])
        pos[i, 1] = x - cx + _parabolic(acf[y, (x - 1) % w], acf[y, x], acf[y, (x + 1) % w])
    return pos, vals


def _parabolic(a: float, b: float, c: float) -> float:
    den = a - 2 * b + c
    return 0.0 if den >= 0 else float(np.clip(0.5 * (a - c) / den, -0.5, 0.5))


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


def _fit(basis, pos, vals, tol):
    coef = np.linalg.solve(basis, pos.T)          # 2 x m
    idx = np.rint(coef)
    resid = np.linalg.norm(pos.T - basis @ idx, axis=0)
    ok = (resid < tol) & np.any(idx != 0, axis=0)
    return ok, idx


def find_lattices(x: np.ndarray, tile: int, *, workers: int = 1,
                  candidates: int = LATTICE_CANDIDATES) -> list[Lattice]:
    """Up to ``candidates`` lattices that could be the mark's, best first."""
    acf = flattened_acf(x, workers=workers)
    lo, hi = SCALE_RANGE
    rmin, rmax = 0.9 * lo * tile, min(1.1 * hi * tile, 0.45 * min(acf.shape))
    if rmax <= rmin:
        return []
    pos, vals = _peaks(acf, rmin, min(2.2 * rmax, 0.48 * min(acf.shape)), 40)
    if pos.shape[0] < 2:
        return []
    # Basis candidates come from the strongest peaks inside the primitive range.
    norms = np.linalg.norm(pos, axis=1)
    short = np.nonzero(norms <= rmax)[0][:14]
    found: list[Lattice] = []
    tried = []
    for i in short:
        for j in short:
            if j <= i:
                continue
            basis = np.stack([pos[i], pos[j]], axis=1)
            det = abs(np.linalg.det(basis))
            if det < (0.9 * lo * tile) ** 2 * 0.5:
                continue
            basis = _reduce(basis)
            if np.linalg.norm(basis[:, 0]) < rmin:
                continue
            ok, idx = _fit(basis, pos, vals, tol=1.5)
            if ok.sum() < 3:
                continue
            # Least-squares refinement on the sub-pixel peaks that fit.
            n_ = idx[:, ok]
            p_ = pos[ok].T
            refined = p_ @ n_.T @ np.linalg.inv(n_ @ n_.T)
            refined = _reduce(refined)
            score = float(vals[ok].sum())
            if any(_same_lattice(refined, t) for t in tried):
                continue
            tried.append(refined)
            found.append(Lattice(basis=refined, score=score, inliers=int(ok.sum())))
    found.sort(key=lambda l: (-l.score, abs(np.linalg.det(l.basis))))
    return found[:candidates]


def _same_lattice(a: np.ndarray, b: np.ndarray) -> bool:
    m = np.linalg.solve(a, b)
    return bool(np.allclose(m, np.rint(m), atol=0.05) and abs(round(abs(np.linalg.det(m)))) == 1)


def to_canonical(x: np.ndarray, transform: np.ndarray, *,
                 max_pixels: int = MAX_CANON_PIXELS) -> tuple[np.ndarray, np.ndarray]:
    """Resample the copy onto the original's pixel grid (up to a lattice symmetry and a shift).

    ``transform`` maps original (row, col) offsets to copy offsets. The output
    covers the copy (or its central part when that would exceed
    ``max_pixels``); pixels outside the copy are 0.
    """
    h, w = x.shape
    inv = np.linalg.inv(transform)
    corners = np.array([[0, 0], [0, w - 1], [h - 1, 0], [h - 1, w - 1]], dtype=float).T
    uc = inv @ corners
    lo, hi = uc.min(axis=1), uc.max(axis=1)
    size = hi - lo + 1
    area = float(size[0] * size[1])
    if area > max_pixels:
        shrink = np.sqrt(max_pixels / area)
        centre = (lo + hi) / 2
        size = size * shrink
        lo = centre - size / 2
    shape = (int(size[0]), int(size[1]))
    offset = transform @ lo
    canon = ndimage.affine_transform(x, transform, offset=offset, output_shape=shape,
                                     order=1, mode="constant", cval=0.0, prefilter=False)
    return canon, offset
