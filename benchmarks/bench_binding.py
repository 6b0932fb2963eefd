"""Would binding format 3's claim to the picture's own content stop the whole-residual copy attack?

    python benchmarks/bench_binding.py [--quick] [--primary NAME] [--cut F] [--pairs] [--transplants-only]

Issue 10's open target: the whole high-pass residual of one marked photo (and
its 512-px fold when the photo is not much larger than 512 px) carries format
3's claim; added to an unrelated picture it makes the owner's mark be found
(the copy attack: Kutter, Voloshynovskiy and Herrigel, "The watermark copy
attack", Proc. SPIE 3971, 2000). The idea measured here: each block's claim
sign is also multiplied by a keyed bit computed from the picture's own
low-frequency content (the sign of a keyed projection of the low-passed luma
around the block), which the examiner recomputes from the exhibit. On a
transplant the host's bits are unrelated to the source's and the claim should
cancel; on a genuine copy the bits survive where the projection is not near
zero. Nothing here changes claimkit's mark or detector: the bound embedding
and its reader are a prototype built in this file, from claimkit's own parts
(the perceptual mask, format 3's synchronisation and claim macro-cells, the
whitening, the spectral weight and the family scores).

What it measures, on the robustness battery's pictures (``photos()`` of
tests/engine_helpers: five scikit-image photos and the sky, two generated
textures and a soft one):

1. **Bit agreement.** For each candidate feature (block side, projection
   window, low-pass), each picture and each copy of ``claimkit.stress.battery()``
   (the copy brought back to the original's grid by the attack's known
   geometry, found by putting coordinate images through the same Pillow
   operations): the share of blocks whose bit is the original's, the share
   that abstain, and the expected share of the claim's z kept,
   ``sum(w b) / sqrt(N sum(w^2))`` over the N blocks the copy holds (``w``
   the examiner's weights, ``b`` the embedder's bits; 1 - 2p for hard bits).
   Three weightings (``SCHEMES``): the hard sign; abstaining where
   |projection| < ``TAU`` times the feature's noise scale (the median change
   the battery's signal attacks make to it); abstaining below ``STRONG`` grey
   levels (what an attacker would have to add to force a bit). A block whose
   window the copy does not hold abstains too.
2. **Claim z.** A prototype of the bound mark (format 3's macro-cell with the
   claim component of each block multiplied by the embedder's bit; the
   synchronisation left unbound; both without their frequencies below
   ``LOW_CUT``, the feature's band) is embedded with the primary feature (the
   fine component only), and every copy is read on the original's grid: with
   the embedder's bits (the reference: the claim's statistics are format
   3's, except that the synchronisation, multiplied by the signs too, no
   longer adds up in the fold, which alone raises the z: see
   bench_sync_interference.py), and with bits recomputed from the copy
   under each weighting. Printed: the pilot z of the work's family at its
   macro offset. The first table also gives the untouched picture's z as
   format 3 is read (full band, and high-passed without bits), so that the
   high-pass's cost shows.
3. **Transplants** at 38 dB PSNR against the host (scaled before rounding),
   from each marked picture onto every other (unmarked) picture of the set
   and generated landscapes, the attacker numpy only (tests/engine_helpers'
   residual and fold): the whole residual (luma minus its 5 x 5 box mean),
   its 512-px fold tiled, and three attacks by an attacker who knows the
   claim is bound to low-frequency content and spends half the change on the
   source's band of it (added; added minus the host's own; added on the
   host's flattest half of blocks only). Read with the host's own bits (the
   examiner recomputes them from the exhibit) and compared with format 3
   today (the source marked without binding, read without bits) and with
   unmarked pictures. A random-sign sum of N blocks that each carry the
   transplanted claim has standard deviation ``sqrt(1 + z_today^2 / N)``,
   not 1: printed beside the measured z. Also: the share of the sky's bits
   equal to a source's before and after the residual of the *unmarked*
   source alone is added (where a flat host's bits come from).
4. **The embedding's own effect on the bits**: the share of blocks whose bit
   differs between the original and the marked picture, for the high-passed
   prototype and for format 3's full-band mark.

Claim levels quoted (``claim_level``, from ``claimkit.mark.stats`` over
format 3's hypotheses of one scale, P_fa <= 1e-9): the pilot z alone, and
the pilot z from which a decoded valid payload claims (its full-template z
``sqrt(240 / 96)`` times the pilot's). The examination counts more tests
and scales, so both are slightly generous to a claim. Nothing is asserted.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

import numpy as np
from scipy import fft as sfft
from scipy import ndimage

from claimkit import stress
from claimkit.imageio import add_luma_delta, to_luma
from claimkit.mark import detect, embed, format3, stats
from claimkit.mark.pattern import TILE

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from tests.engine_helpers import BENCH_BITS as BITS
from tests.engine_helpers import BENCH_EMBED3 as EMBED
from tests.engine_helpers import BENCH_KEYS as KEYS
from tests.engine_helpers import fold_estimate, generated, landscape, photos, psnr, residual, soft, tiled

BIND_KEY = 0x5EED_B1D5            # the binding key of the prototype (any integer)
MACRO_SIDE = format3.MACRO * TILE
TAU = 2.0                         # a weighting abstains where |projection| < TAU * the noise scale
STRONG = 2.0                      # another where |projection| < STRONG grey levels (dear to forge)
LOW_CUT = 0.06                    # the prototype mark has no energy below this (cycles/px)
COVERED = 0.97                    # a window counts as held by a copy from this share of its pixels
TRANSPLANT_DB = 38.0              # issue 10: a copy attack at >= 38 dB against the host


def claim_level(with_payload: bool) -> float:
    """The pilot z from which format 3's test of one scale reaches P_fa <= 1e-9 (bisection)."""
    ratio = math.sqrt((format3.CLAIM_PILOTS + format3.CODE.coded_length(len(BITS))) / format3.CLAIM_PILOTS)
    lo, hi = 0.0, 30.0
    for _ in range(60):
        z = (lo + hi) / 2
        lp = stats.log10_false_alarm(z_pilot=z, z_full=z * ratio if with_payload else None,
                                     hypotheses=detect.format3_hypotheses(),
                                     payload_space=detect.DEFAULT_PAYLOAD_SPACE)
        lo, hi = (z, hi) if lp > -9 else (lo, z)
    return hi


Z_PILOT_CLAIM = claim_level(False)
Z_PAYLOAD_CLAIM = claim_level(True)


@dataclass(frozen=True)
class Feature:
    """A binding feature: one bit per ``block`` x ``block`` block of the original's grid.

    The bit is the sign of ``<K, L>`` over a ``support`` x ``support`` window
    centred on the block, ``L`` the luma low-passed by a Gaussian of ``sigma``
    px and ``K`` a keyed white kernel of unit norm, orthogonal to every
    polynomial of degree <= 2 over the window (so that a brightness, a ramp or
    a vignette, which many unrelated pictures share, gives no bit).
    """

    block: int
    support: int
    sigma: float

    @property
    def name(self) -> str:
        return f"b{self.block}/w{self.support}/s{self.sigma:g}"


FEATURES = (Feature(128, 128, 8), Feature(128, 256, 8), Feature(128, 256, 16), Feature(64, 128, 8),
            Feature(32, 64, 8))


@lru_cache(maxsize=8)
def kernels(support: int, classes: int = 8) -> np.ndarray:
    """``classes**2`` keyed kernels (block (i, j) uses class (i mod classes, j mod classes))."""
    y, x = np.mgrid[0:support, 0:support] / (support - 1) - 0.5
    poly = np.stack([np.ones_like(x), x, y, x * x, x * y, y * y]).reshape(6, -1)
    q, _ = np.linalg.qr(poly.T)
    rng = np.random.default_rng(BIND_KEY + support)
    k = rng.standard_normal((classes * classes, support * support))
    k -= (k @ q) @ q.T
    k /= np.linalg.norm(k, axis=1, keepdims=True)
    return k.reshape(classes, classes, support, support)


def lowpass(luma: np.ndarray, cover: np.ndarray, sigma: float) -> np.ndarray:
    """Gaussian low-pass of the covered pixels (normalised convolution; 0 where nothing is covered)."""
    num = ndimage.gaussian_filter(luma * cover, sigma, mode="reflect")
    den = ndimage.gaussian_filter(cover.astype(np.float64), sigma, mode="reflect")
    return np.where(den > 1e-3, num / np.maximum(den, 1e-3), 0.0)


def projections(luma: np.ndarray, cover: np.ndarray, feat: Feature,
                shape: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """Per-block projections and whether each block's window is wholly covered.

    ``luma`` and ``cover`` are on the original's grid (``shape``); the picture's
    own borders are reflected (the embedder does the same), a copy's missing
    part is not covered.
    """
    h, w = shape
    lp = lowpass(luma, cover, feat.sigma)
    s, b = feat.support, feat.block
    pad = s
    lpp = np.pad(lp, pad, mode="reflect")
    cvp = np.pad(cover.astype(np.float64), pad, mode="reflect")
    ny, nx = -(-h // b), -(-w // b)
    k = kernels(s)
    p = np.zeros((ny, nx))
    ok = np.zeros((ny, nx), dtype=bool)
    for i in range(ny):
        for j in range(nx):
            r0 = i * b + b // 2 - s // 2 + pad
            c0 = j * b + b // 2 - s // 2 + pad
            p[i, j] = float(np.sum(lpp[r0:r0 + s, c0:c0 + s] * k[i % 8, j % 8]))
            ok[i, j] = bool(cvp[r0:r0 + s, c0:c0 + s].mean() >= COVERED)
    return p, ok


def block_map(values: np.ndarray, block: int, shape: tuple[int, int]) -> np.ndarray:
    """Per-block values spread over the pixels."""
    return np.repeat(np.repeat(values, block, axis=0), block, axis=1)[:shape[0], :shape[1]]


# ---------------------------------------------------------------- prototype mark and reader

def highpass(cell: np.ndarray, cut: float) -> np.ndarray:
    """Each tile of a macro-cell without its frequencies below ``cut`` cycles/px, at unit RMS."""
    k = cell.shape[0] // TILE
    f = np.hypot(np.fft.fftfreq(TILE)[:, None], np.fft.fftfreq(TILE)[None, :])
    blocks = cell.reshape(k, TILE, k, TILE).transpose(0, 2, 1, 3)
    out = np.real(np.fft.ifft2(np.fft.fft2(blocks, axes=(2, 3)) * (f >= cut), axes=(2, 3)))
    out = out.transpose(0, 2, 1, 3).reshape(cell.shape)
    return (out - out.mean()) / out.std()


@lru_cache(maxsize=4)
def components(cut: float) -> tuple[np.ndarray, np.ndarray]:
    """Format 3's macro-cell split in its synchronisation and claim parts (unit RMS each).

    ``cut`` > 0: both without their frequencies below ``cut`` (the binding
    feature's band), so that the mark neither moves the bits nor carries
    them into a transplant (a format 4 would leave them out of its carriers).
    """
    sync = format3.macro_tile(EMBED, BITS, sync_share=1.0).astype(np.float64)
    claim = format3.macro_tile(EMBED, BITS, sync_share=0.0).astype(np.float64)
    if cut > 0:
        sync, claim = highpass(sync, cut), highpass(claim, cut)
    return sync, claim


def bound_delta(luma: np.ndarray, signs: np.ndarray, cut: float) -> np.ndarray:
    """The fine component's change with each pixel's claim multiplied by ``signs`` (all 1: unbound)."""
    sync, claim = components(cut)
    a_s, a_c = math.sqrt(format3.SYNC_SHARE), math.sqrt(1 - format3.SYNC_SHARE)
    pattern = a_s * tiled(sync, luma.shape) + a_c * signs * tiled(claim, luma.shape)
    return embed.perceptual_mask(luma) * pattern


def claim_scores(xw: np.ndarray, weights: np.ndarray) -> tuple[float, float]:
    """Pilot z of the work's family at its macro offset, and the best z over every family and offset.

    ``xw``: the whitened exhibit on the original's grid (0 where the copy holds
    nothing); ``weights``: per-pixel weights (the bits, 0 where abstaining).
    """
    if not np.any(weights):
        return 0.0, 0.0
    mf = detect.fold(xw * weights, MACRO_SIDE).astype(np.float32)
    tiles = mf.reshape(format3.MACRO, TILE, format3.MACRO, TILE).sum(axis=(0, 2))
    wgt = detect.spectral_weight(sfft.fft2(tiles)[None])[0].astype(np.float32).ravel()
    y = format3.aligned_spectra(mf, 0, (0, 0), detect._ramps(TILE)[0], TILE)
    y *= format3.at_claim_frequencies(wgt.reshape(TILE, TILE), TILE)
    scores = format3.score_families(y, KEYS.families, TILE)
    origin = format3.family_pattern(EMBED.family_seed).origin
    own = float(scores[EMBED.family][format3.OFFSETS.index(origin)])
    return own, float(max(float(v.max()) for v in scores.values()))


# ---------------------------------------------------------------- geometry of a copy

def _identity_family(a: stress.Attack) -> bool:
    return a.family in ("reference", "jpeg", "filter", "noise", "tone", "recompress")


def copy_to_original(attack: stress.Attack, shape: tuple[int, int]) -> np.ndarray | None:
    """The affine map (2 x 3) from a copy's (row, col) to the original's, or None for the identity.

    Found by putting the original's row and column coordinates, as float
    pictures, through the attack's own Pillow operations (JPEG left out; the
    scikit-image rescale by Pillow's resize of the same size and pixel-centre
    convention) and fitting an affine map to the interior.
    """
    if _identity_family(attack):
        return None
    h, w = shape
    rr, cc = np.mgrid[0:h, 0:w].astype(np.float32)
    saved = stress.jpeg
    stress.jpeg = lambda p, q, subsampling=2: p   # type: ignore[assignment]
    try:
        if attack.name.startswith("rescale"):
            maps = [stress.resize(m, attack.params["factor"]) for m in (rr, cc)]
        else:
            maps = [np.asarray(attack.apply(m), dtype=np.float64) for m in (rr, cc)]
    finally:
        stress.jpeg = saved
    ch, cw = maps[0].shape
    yy, xx = np.mgrid[4:ch - 4:3, 4:cw - 4:3]
    a = np.stack([yy.ravel(), xx.ravel(), np.ones(yy.size)], axis=1)
    sol = np.linalg.lstsq(a, np.stack([m[yy, xx].ravel() for m in maps], axis=1), rcond=None)[0]
    return sol.T   # original (row, col) = sol.T @ (row', col', 1)


def to_original(copy_plane: np.ndarray, fit: np.ndarray | None,
                shape: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """A copy's plane resampled onto the original's grid (bilinear), and where the copy covers it."""
    if fit is None:
        return copy_plane.astype(np.float64), np.ones(shape, dtype=bool)
    m, t = fit[:, :2], fit[:, 2]
    inv = np.linalg.inv(m)
    rr, cc = np.mgrid[0:shape[0], 0:shape[1]].astype(np.float64)
    pts = np.stack([rr.ravel() - t[0], cc.ravel() - t[1]])
    src = inv @ pts
    ch, cw = copy_plane.shape
    cover = ((src[0] >= 0) & (src[0] <= ch - 1) & (src[1] >= 0) & (src[1] <= cw - 1)).reshape(shape)
    vals = ndimage.map_coordinates(copy_plane.astype(np.float64), src, order=1, mode="nearest")
    return np.where(cover, vals.reshape(shape), 0.0), cover


# ---------------------------------------------------------------- pictures

def pictures(quick: bool) -> dict[str, np.ndarray]:
    pics = photos()
    if quick:
        pics = {k: pics[k] for k in ("chelsea", "coffee", "sky")}
        pics["generated 1"] = generated(1)
        return pics
    pics.update({"generated 1": generated(1), "generated 2": generated(2), "soft 1": soft(1)})
    return pics


def hosts(quick: bool) -> dict[str, np.ndarray]:
    out = {"landscape 900": landscape(512, 768, seed=900), "landscape 901": landscape(700, 1000, seed=901)}
    if not quick:
        out["landscape 902"] = landscape(600, 900, seed=902)
    return out


@dataclass
class Work:
    rgb: np.ndarray
    luma: np.ndarray
    proj: dict[Feature, np.ndarray]
    bits: dict[Feature, np.ndarray]
    bound: np.ndarray       # marked with the primary feature's bits (the mark high-passed at ``cut``)
    today: np.ndarray       # marked as format 3's fine component is today (no bits, full band)
    unbound: np.ndarray     # the high-passed mark without bits (what the cut costs)


def prepare_work(rgb: np.ndarray, primary: Feature, cut: float) -> Work:
    luma = to_luma(rgb).astype(np.float64)
    cover = np.ones(luma.shape, dtype=bool)
    proj = {f: projections(luma, cover, f, luma.shape)[0] for f in FEATURES}
    bits = {f: np.where(p >= 0, 1.0, -1.0) for f, p in proj.items()}
    signs = block_map(bits[primary], primary.block, luma.shape)
    ones = np.ones_like(luma)

    def marked(signs: np.ndarray, cut: float) -> np.ndarray:
        return add_luma_delta(rgb, bound_delta(luma, signs, cut).astype(np.float32))

    return Work(rgb, luma, proj, bits, marked(signs, cut), marked(ones, 0.0), marked(ones, cut))


SCHEMES = ("hard", f"{TAU:g} x noise", f"{STRONG:g} grey")


def thresholds(noise: float) -> tuple[float, float, float]:
    """The examiner's abstention thresholds of ``SCHEMES``: none, TAU x the noise scale, STRONG."""
    return 0.0, TAU * noise, STRONG


def weights_of(p: np.ndarray, ok: np.ndarray, threshold: float) -> np.ndarray:
    """The examiner's per-block weights: the sign, 0 where |p| < ``threshold`` or the window is not held."""
    w = np.where(p >= 0, 1.0, -1.0)
    w = np.where(np.abs(p) >= threshold, w, 0.0)
    return np.where(ok, w, 0.0)


def kept(w: np.ndarray, b: np.ndarray, held: np.ndarray) -> float:
    """Expected share of the claim's z kept: sum(w b) / sqrt(N sum w^2) over the N blocks held."""
    n = int(held.sum())
    s2 = float(np.sum(w[held] ** 2))
    return 0.0 if n == 0 or s2 == 0 else float(np.sum((w * b)[held]) / math.sqrt(n * s2))


def held_blocks(cover: np.ndarray, block: int) -> np.ndarray:
    """Blocks of which the copy holds at least half."""
    h, w = cover.shape
    ny, nx = -(-h // block), -(-w // block)
    pad = np.zeros((ny * block, nx * block))
    pad[:h, :w] = cover
    return pad.reshape(ny, block, nx, block).mean(axis=(1, 3)) >= 0.5


# ---------------------------------------------------------------- the runs

def noise_scale(works: dict[str, Work], feat: Feature) -> float:
    """The projection's noise scale for ``feat``: the median |change| over the battery's signal attacks.

    Measured on the pictures themselves (JPEG, filters, noise, tone,
    recompression of the *unmarked* originals), so the abstention threshold is
    a fixed number an examiner would take from such a calibration.
    """
    deltas = []
    for wk in works.values():
        for a in stress.battery():
            if not _identity_family(a) or a.family == "reference":
                continue
            luma = to_luma(a.apply(wk.rgb)).astype(np.float64)
            p, _ = projections(luma, np.ones(luma.shape, dtype=bool), feat, luma.shape)
            deltas.append(np.abs(p - wk.proj[feat]).ravel())
    return float(np.median(np.concatenate(deltas)))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="four pictures, the quick battery")
    ap.add_argument("--primary", default=FEATURES[3].name, choices=[f.name for f in FEATURES],
                    help="the feature the prototype mark is embedded with")
    ap.add_argument("--cut", type=float, default=LOW_CUT,
                    help="the prototype mark's lowest frequency (cycles/px; 0: format 3's full band)")
    ap.add_argument("--pairs", action="store_true", help="print every transplant, not only the summaries")
    ap.add_argument("--transplants-only", action="store_true", help="leave out the genuine copies")
    args = ap.parse_args()
    t0 = time.perf_counter()
    primary = next(f for f in FEATURES if f.name == args.primary)
    works = {k: prepare_work(v, primary, args.cut) for k, v in pictures(args.quick).items()}
    print(f"{len(works)} pictures marked (prototype, fine component, primary feature {primary.name}, "
          f"mark above {args.cut:g} cycles/px) in {time.perf_counter() - t0:.0f} s; claim thresholds: "
          f"pilot z {Z_PILOT_CLAIM:.2f} alone, {Z_PAYLOAD_CLAIM:.2f} with a decoded valid payload")
    print("  picture      size      PSNR (bound) z untouched: format 3 | high-passed unbound | bound, hard")
    for k, wk in works.items():
        ones = np.ones(wk.luma.shape)
        zs = [claim_scores(detect.whiten(to_luma(m).astype(np.float64)), ones)[0]
              for m in (wk.today, wk.unbound)]
        zs.append(read_exhibit(wk.bound, primary, 0.0)[0])
        print(f"  {k:12s} {wk.rgb.shape[1]:4d}x{wk.rgb.shape[0]:<4d}  {psnr(wk.rgb, wk.bound):5.1f} dB     "
              + " | ".join(f"{z:5.1f}" for z in zs))
    noise = {f: noise_scale(works, f) for f in FEATURES}
    print("\nNOISE SCALE of each feature's projection (median |change| over JPEG, filters, noise, tone, "
          "WebP/AVIF of the unmarked pictures; the projection is in grey levels: a unit kernel):")
    for f in FEATURES:
        typical = np.median(np.concatenate([np.abs(wk.proj[f]).ravel() for wk in works.values()]))
        print(f"  {f.name:14s} noise {noise[f]:7.3f}   median |projection| {typical:7.3f}")

    print("\nEMBEDDING: share of blocks whose bit the mark itself flips (original vs marked; "
          "worst picture, mean): the bound mark (high-passed) | format 3's full-band mark")
    for f in FEATURES:
        cells = []
        for attr in ("bound", "today"):
            row = []
            for wk in works.values():
                shape = wk.luma.shape
                p, _ = projections(to_luma(getattr(wk, attr)).astype(np.float64), np.ones(shape, dtype=bool),
                                   f, shape)
                row.append(float(np.mean(np.where(p >= 0, 1.0, -1.0) != wk.bits[f])))
            cells.append(f"worst {max(row):.3f} mean {np.mean(row):.4f}")
        print(f"  {f.name:14s} " + " | ".join(cells))

    if not args.transplants_only:
        genuine(works, primary, noise, args.quick)
    transplants(works, primary, noise[primary], args.quick, args.pairs)
    print(f"\n{time.perf_counter() - t0:.0f} s")


def genuine(works: dict[str, Work], primary: Feature, noise: dict[Feature, float], quick: bool) -> None:
    print(f"\nGENUINE COPIES: per picture and attack, for each feature: agreement | abstaining share "
          f"({SCHEMES[1]}) | kept z share ({', '.join(SCHEMES)}); then the prototype's pilot z (the "
          f"embedder's bits | bound: {' | '.join(SCHEMES)})")
    print("  features: " + "  ".join(f.name for f in FEATURES))
    summary: dict[str, list] = {}
    for k, wk in works.items():
        shape = wk.luma.shape
        print(f"\n  {k} ({shape[1]}x{shape[0]})")
        for a in stress.battery(quick=quick):
            copy = a.apply(wk.bound)
            if min(copy.shape[:2]) < detect.MIN_SIDE:
                print(f"    {a.name:28s} copy below {detect.MIN_SIDE} px: not examined")
                continue
            fit = copy_to_original(a, shape)
            cl = to_luma(copy).astype(np.float64)
            luma, cover = to_original(cl, fit, shape)
            xw, _ = to_original(detect.whiten(cl), fit, shape)
            cells = []
            for f in FEATURES:
                p, ok = projections(luma, cover, f, shape)
                held = held_blocks(cover, f.block)
                b = wk.bits[f]
                sel = held & ok
                agree = float(np.mean((np.where(p >= 0, 1.0, -1.0) == b)[sel])) if sel.any() else float("nan")
                ts = thresholds(noise[f])
                abst = float(np.mean((weights_of(p, ok, ts[1]) == 0)[held]))
                ks = [kept(weights_of(p, ok, t), b, held) for t in ts]
                summary.setdefault(f.name, []).append((k, a.name, agree, abst, *ks))
                cells.append(f"{agree:.2f}|{abst:.2f}|{ks[0]:.2f},{ks[1]:.2f},{ks[2]:.2f}")
                if f == primary:
                    p_primary, ok_primary = p, ok
            zs = [claim_scores(xw, block_map(wk.bits[primary], primary.block, shape))[0]]
            for t in thresholds(noise[primary]):
                zs.append(claim_scores(xw, block_map(weights_of(p_primary, ok_primary, t),
                                                     primary.block, shape))[0])
            summary.setdefault("z", []).append((k, a.name, *zs))
            print(f"    {a.name:28s} " + "  ".join(cells)
                  + "   z " + " | ".join(f"{z:5.1f}" for z in zs), flush=True)

    print(f"\nSUMMARY per feature over every copy: mean agreement, abstaining share ({SCHEMES[1]}), kept z "
          f"share ({', '.join(SCHEMES)}); the same without the sky; the sky's kept share; the worst copy "
          f"but the sky's (hard)")
    for f in FEATURES:
        rows = summary[f.name]
        arr = np.array([r[2:] for r in rows], dtype=float)
        nosky = np.array([r[0] != "sky" for r in rows])
        worst = min((r for r in rows if r[0] != "sky"), key=lambda r: r[4])

        def part(sel: np.ndarray, arr: np.ndarray = arr) -> str:
            a = arr[sel]
            return (f"{np.nanmean(a[:, 0]):.3f} {np.nanmean(a[:, 1]):.2f} "
                    + " ".join(f"{np.mean(a[:, i]):.2f}" for i in (2, 3, 4)))

        print(f"  {f.name:14s} all {part(np.ones(len(rows), dtype=bool))} | without the sky {part(nosky)} | "
              f"sky {part(~nosky)} | worst {worst[0]} / {worst[1]} {worst[4]:.2f}")
    z = np.array([r[2:] for r in summary["z"]], dtype=float)
    nosky = np.array([r[0] != "sky" for r in summary["z"]])
    for label, sel in (("every picture but the sky", nosky), ("the sky", ~nosky)):
        zz = z[sel]
        strong = zz[:, 0] >= Z_PILOT_CLAIM
        ratio = zz[strong, 1:] / zz[strong, :1]
        print(f"  prototype z, {label}: median with the embedder's bits {np.median(zz[:, 0]):.1f}, bound "
              + ", ".join(f"{n} {np.median(zz[:, i + 1]):.1f}" for i, n in enumerate(SCHEMES))
              + "; where those claim, median (lowest) ratio to them "
              + ", ".join(f"{np.median(ratio[:, i]):.2f} ({np.min(ratio[:, i]):.2f})" for i in range(3))
              + f"; copies with z >= {Z_PILOT_CLAIM:.1f}: embedder's bits {int(np.sum(strong))}, bound "
              + ", ".join(f"{int(np.sum(zz[:, i + 1] >= Z_PILOT_CLAIM))}" for i in range(3))
              + f" of {len(zz)}")


def read_exhibit(rgb: np.ndarray, feat: Feature, threshold: float,
                 source_bits: np.ndarray | None = None) -> tuple[float, float, float]:
    """The prototype examiner on an exhibit at the original's grid: its own bits, then the claim z.

    Returns the z of the work's family at its offset, the best z, and (with
    ``source_bits``, the bits of the picture the mark came from) the share of
    the source's claim the exhibit's weights keep.
    """
    luma = to_luma(rgb).astype(np.float64)
    shape = luma.shape
    cover = np.ones(shape, dtype=bool)
    p, ok = projections(luma, cover, feat, shape)
    w = weights_of(p, ok, threshold)
    own, best = claim_scores(detect.whiten(luma), block_map(w, feat.block, shape))
    share = float("nan")
    if source_bits is not None:
        hh, ww = min(w.shape[0], source_bits.shape[0]), min(w.shape[1], source_bits.shape[1])
        share = kept(w[:hh, :ww], source_bits[:hh, :ww], np.ones((hh, ww), dtype=bool))
    return own, best, share


# ---------------------------------------------------------------- the attacker (numpy only)

def attacker_luma(a: np.ndarray) -> np.ndarray:
    a = a.astype(np.float64)
    return 0.299 * a[..., 0] + 0.587 * a[..., 1] + 0.114 * a[..., 2]


def attacker_blur(y: np.ndarray, sigma: float) -> np.ndarray:
    """Gaussian blur by the FFT, the edges reflected first (numpy only)."""
    pad = int(4 * sigma)
    p = np.pad(y, pad, mode="reflect")
    fy = np.fft.fftfreq(p.shape[0])[:, None]
    fx = np.fft.rfftfreq(p.shape[1])[None, :]
    gain = np.exp(-2 * np.pi ** 2 * sigma ** 2 * (fy ** 2 + fx ** 2))
    out = np.fft.irfft2(np.fft.rfft2(p) * gain, s=p.shape)
    return out[pad:pad + y.shape[0], pad:pad + y.shape[1]]


def content_band(a: np.ndarray) -> np.ndarray:
    """The band of the luma a content binding is likely to read: blurred by 8 px minus blurred by 32 px."""
    y = attacker_luma(a)
    return attacker_blur(y, 8) - attacker_blur(y, 32)


def flat_blocks(host: np.ndarray, block: int = 64) -> np.ndarray:
    """1 on the half of the host's 64-px blocks (the grid from the origin) whose content band is weakest."""
    band = content_band(host)
    h, w = band.shape
    ny, nx = -(-h // block), -(-w // block)
    pad = np.zeros((ny * block, nx * block))
    pad[:h, :w] = band ** 2
    rms = pad.reshape(ny, block, nx, block).mean(axis=(1, 3))
    chosen = (rms <= np.median(rms)).astype(np.float64)
    return np.repeat(np.repeat(chosen, block, axis=0), block, axis=1)[:h, :w]


def forged(host: np.ndarray, marked: np.ndarray, attack: str) -> np.ndarray:
    """The copy attack onto ``host`` at TRANSPLANT_DB (numpy only; the mark's source is ``marked``).

    ``whole residual``: the source's high-pass residual (luma minus its 5 x 5
    box mean), cut to the host's size; ``512-px fold``: the residual averaged
    over 512 px from the origin and tiled; ``... + content s``: an attacker
    who knows the claim is bound to the low-frequency content adds the
    source's own band of it (luma blurred by 8 px minus blurred by 32 px)
    too, with a share ``s`` of the squared change, so that the host's bits
    follow the source's where the host is flat; ``... + swap s`` adds the
    source's band minus the host's own (it pulls every block towards the
    source's bit, for the same change); ``... + flat s`` adds the source's
    band on the half of the host's blocks where the host's own band is
    weakest only (the attacker knows the block grid: it is published).
    """
    hs = host.shape[:2]
    if attack.startswith("whole residual"):
        src = residual(marked)
        d = np.zeros(hs)
        hh, ww = min(hs[0], src.shape[0]), min(hs[1], src.shape[1])
        d[:hh, :ww] = src[:hh, :ww]
    else:
        d = tiled(fold_estimate(marked, MACRO_SIDE), hs)
    budget = 255.0 ** 2 / 10 ** (TRANSPLANT_DB / 10)
    share = float(attack.split(" ")[-1]) if "+" in attack else 0.0
    total = np.sqrt((1 - share) * budget / float(np.mean(d ** 2))) * d
    if share:
        c = np.zeros(hs)
        band = content_band(marked)
        hh, ww = min(hs[0], band.shape[0]), min(hs[1], band.shape[1])
        c[:hh, :ww] = band[:hh, :ww]
        if "swap" in attack:
            c -= content_band(host)
        if "flat" in attack:
            c *= flat_blocks(host)
        total += np.sqrt(share * budget / float(np.mean(c ** 2))) * c
    return np.clip(np.rint(host.astype(np.float64) + total[..., None]), 0, 255).astype(np.uint8)


TRANSPLANTS = ("whole residual", "512-px fold", "whole residual + content 0.5",
               "whole residual + swap 0.5", "whole residual + flat 0.5")


def transplants(works: dict[str, Work], primary: Feature, noise: float, quick: bool, pairs: bool) -> None:
    print(f"\nTRANSPLANTS at {TRANSPLANT_DB:g} dB onto unrelated pictures (every other picture of the set, "
          f"unmarked, and generated landscapes): pilot z of the source's family at its offset (own) and the "
          f"best over every family and offset; the share of the source's claim the host's weights keep")
    targets = {k: wk.rgb for k, wk in works.items()} | hosts(quick)
    ts = thresholds(noise)
    null = [claim_scores(detect.whiten(attacker_luma(v)), np.ones(v.shape[:2])) for v in targets.values()]
    print(f"  unmarked, read as today: own z {fmt_dist([n[0] for n in null])}; "
          f"best {fmt_dist([n[1] for n in null])}")
    for name, t in zip(SCHEMES, ts, strict=True):
        bound = [read_exhibit(v, primary, t) for v in targets.values()]
        print(f"  unmarked, read bound ({name}): own z {fmt_dist([n[0] for n in bound])}; "
              f"best {fmt_dist([n[1] for n in bound])}")
    if "sky" in works:
        # Where do a flat host's bits come from? The residual of an *unmarked* source alone.
        host = works["sky"].rgb
        hb = np.where(works["sky"].proj[primary] >= 0, 1.0, -1.0)
        print("  the residual of the unmarked source alone onto the sky: share of the sky's bits equal to "
              "the source's, before | after")
        for sk, wk in works.items():
            if sk == "sky":
                continue
            x = to_luma(forged(host, wk.rgb, "whole residual")).astype(np.float64)
            px, _ = projections(x, np.ones(x.shape, dtype=bool), primary, x.shape)
            sb = wk.bits[primary]
            hh, ww = min(hb.shape[0], sb.shape[0]), min(hb.shape[1], sb.shape[1])
            sb = sb[:hh, :ww]
            print(f"    {sk:12s} {np.mean(hb[:hh, :ww] == sb):.2f} | "
                  f"{np.mean(np.where(px[:hh, :ww] >= 0, 1.0, -1.0) == sb):.2f}")
    for attack in TRANSPLANTS:
        rows = []
        for sk, wk in works.items():
            for hk, host in targets.items():
                if hk == sk:
                    continue
                x = forged(host, wk.today, attack)
                today = claim_scores(detect.whiten(attacker_luma(x)), np.ones(x.shape[:2]))
                y = forged(host, wk.bound, attack)
                reads = [read_exhibit(y, primary, t, wk.bits[primary]) for t in ts]
                n = int(held_blocks(np.ones(host.shape[:2], dtype=bool), primary.block).sum())
                rows.append((sk, hk, today, reads, n))
        if pairs:
            print(f"\n  {attack} (source -> host: today own [best] | bound, for each of "
                  f"{', '.join(SCHEMES)}: "
                  f"own [best] share | sqrt(1 + z_today^2 / N))")
            for sk, hk, today, reads, n in rows:
                print(f"    {sk:12s} -> {hk:14s} {today[0]:6.1f} [{today[1]:5.1f}] | "
                      + " | ".join(f"{r[0]:5.1f} [{r[1]:4.1f}] {r[2]:+.2f}" for r in reads)
                      + f" | {math.sqrt(1 + today[0] ** 2 / n):5.1f} (N {n})")
        own_today = np.array([r[2][0] for r in rows])
        print(f"\n  {attack}: today own z {fmt_dist(own_today)}, >= {Z_PILOT_CLAIM:.1f} in "
              f"{int(np.sum(own_today >= Z_PILOT_CLAIM))} of {len(rows)}")
        sd = np.array([math.sqrt(1 + r[2][0] ** 2 / r[4]) for r in rows])
        for i, name in enumerate(SCHEMES):
            own = np.array([r[3][i][0] for r in rows])
            best = np.array([r[3][i][1] for r in rows])
            share = np.array([r[3][i][2] for r in rows])
            worst = sorted(rows, key=lambda r: -r[3][i][0])[:3]
            print(f"    bound {name:10s}: own z {fmt_dist(own)}; own / sqrt(1 + z_today^2/N): sd "
                  f"{np.std(own / sd):.2f}; share kept mean {np.mean(share):+.2f} max {np.max(share):+.2f}; "
                  f"best z >= {Z_PILOT_CLAIM:.1f} in {int(np.sum(best >= Z_PILOT_CLAIM))}, "
                  f">= {Z_PAYLOAD_CLAIM:.1f} in "
                  f"{int(np.sum(best >= Z_PAYLOAD_CLAIM))} of {len(rows)}; the worst: "
                  + ", ".join(f"{r[0]} -> {r[1]} {r[3][i][0]:.1f}" for r in worst))


def fmt_dist(v) -> str:
    v = np.asarray(v, dtype=float)
    return f"mean {v.mean():+.2f} sd {v.std():.2f} max {v.max():.2f} (n {len(v)})"


if __name__ == "__main__":
    main()
