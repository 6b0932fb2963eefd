"""Mark format 3 (``claimkit-mark/3``): a periodic synchronisation component and a keyed claim component.

Why a new format: in formats 1 and 2 every tile of every work of an owner
carries the same pattern. Folding the high-pass residual of one photo (or of
a portfolio) over the tile period averages the picture away and leaves an
estimate of the mark that removes it from any of the owner's works and, added
to an unrelated photo, makes the detector claim that photo (the copy attack
[1]_, [2]_). Format 3 splits the mark in two:

* **Synchronisation** (``SYNC_SHARE`` of the energy). One ``TILE x TILE``
  pattern from the owner's *sync seed*: a random-phase carrier convolved with
  ``SYNC_SPOTS`` signed spots, tiled with the picture's origin as grid
  origin. Its lattice carries the geometry (:mod:`claimkit.mark.geometry`) and
  its correlation gives the grid origin, the quarter-turn/mirror variant and
  the half-pixel phase. No claim rests on it: an adversary can estimate and
  transplant it. Found alone it is reported as ``removal_suspected``.
* **Claim** (the rest). Every work falls in one of ``FAMILIES`` families
  (a keyed assignment of its serial, made by the evidence layer). Each family
  has its own pilots, spot positions and, for each of the ``MACRO x MACRO``
  tiles of a macro-cell, its own independent random-phase carrier. A tile's
  claim pattern is ``zero-mean(M_f * C_{f,u,v})`` where ``M_f`` is the
  family's message (pilots and the work's coded payload) and ``(u, v)`` the
  tile's place in the macro-cell, whose origin is keyed too. Folding at the
  tile period without the key sums ``MACRO**2`` independent carriers, which
  keeps a ``1/MACRO**2`` share of the claim's energy; folding at the
  macro-period (``MACRO * TILE`` = 512 px) leaves a handful of repetitions in
  a photo; pooling an owner's portfolio mixes families whose patterns are
  independent.

Examination aligns the copy with the synchronisation pattern (the same
search as formats 1 and 2), cuts the macro-period fold into its ``MACRO**2``
tiles, and scores each family at each macro offset: the tile spectra are
shared, a family costs one small matrix product.

References
----------
.. [1] M. Kutter, S. Voloshynovskiy, A. Herrigel, "The watermark copy attack",
   Proc. SPIE 3971, Security and Watermarking of Multimedia Contents II,
   2000. doi:10.1117/12.384990
.. [2] S. Voloshynovskiy, S. Pereira, T. Pun, J. J. Eggers, J. K. Su,
   "Attacks on digital watermarks: classification, estimation-based attacks
   and benchmarks", IEEE Communications Magazine 39(8), 118-126, 2001.
   doi:10.1109/35.940053
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np
from scipy import fft as sfft

from claimkit.mark import ecc
from claimkit.mark.pattern import (
    MIN_SPACING,
    PAYLOAD_BITS,
    SPOT_SIGMA,
    TILE,
    KeyPattern,
    MarkFormat,
    _band,
    _carrier_phase,
    _stream,
    _upper_half,
    spot_spectrum,
)
from claimkit.mark.payload import PayloadList

NAME = "claimkit-mark/3"
MACRO = 4                 # tiles per side of the macro-cell (16 independent carriers per family)
FAMILIES = 16             # keyed families of works, each with its own carriers and spots
SYNC_SPOTS = 192          # signed spots of the synchronisation message (all fixed by the sync seed)
CLAIM_PILOTS = 96          # pilot spots of a family's message (fixed by the family seed)
SYNC_SHARE = 0.35         # share of the mark's energy in the synchronisation component
CODE = ecc.RATE_HALF      # the payload's code (as format 2)

# Streams of a family seed: 2 and 3 spot positions and pilot signs, 4 the macro
# origin, CARRIER_STREAM the carriers of all tile classes.
CARRIER_STREAM = 16

SYNC_FORMAT = MarkFormat("claimkit-mark/3 sync", pilots=SYNC_SPOTS, code=CODE)
CLAIM_FORMAT = MarkFormat(NAME, pilots=CLAIM_PILOTS, code=CODE)


@dataclass(frozen=True)
class MarkKeys:
    """The detection keys an examiner holds (pure bytes; the evidence layer derives them).

    Attributes
    ----------
    legacy : bytes or None
        The owner-level 32-byte seed of formats 1 and 2.
    sync : bytes or None
        The owner's format-3 synchronisation seed.
    families : mapping of int to bytes
        Format-3 family seeds by family index: all ``FAMILIES`` of them for
        the owner, only the disclosed work's family for a disclosure holder.
    """

    legacy: bytes | None = None
    sync: bytes | None = None
    families: Mapping[int, bytes] = field(default_factory=dict)

    def __hash__(self) -> int:
        """A hash over every seed (the keys are used as a cache key)."""
        return hash((self.legacy, self.sync, tuple(sorted(self.families.items()))))


@dataclass(frozen=True)
class EmbedKeys:
    """What marking one format-3 work needs: the sync seed and the work's family."""

    sync: bytes
    family: int
    family_seed: bytes


# ---------------------------------------------------------------- patterns

@lru_cache(maxsize=4)
def sync_pattern(seed: bytes, tile: int = TILE) -> KeyPattern:
    """The synchronisation pattern: carrier and ``SYNC_SPOTS`` fixed-sign spots, as a pilot-only pattern."""
    if len(seed) != 32:
        raise ValueError("sync seed must be 32 bytes")
    pos = _spread_positions(_stream(seed, 2), tile, SYNC_SPOTS)
    sign = np.where(_stream(seed, 3).integers(0, 2, SYNC_SPOTS) == 1, 1, -1).astype(np.int8)
    return KeyPattern(carrier_phase=_carrier_phase(_stream(seed, 1), tile), band=_band(tile),
                      pilot_pos=pos, pilot_sign=sign, code_pos=np.zeros((0, 2), dtype=np.int64),
                      spot_ft=spot_spectrum(tile, SPOT_SIGMA), fmt=SYNC_FORMAT)


FREQ_RADIUS = 0.3   # claim carriers use frequencies up to this radius (cycles/pixel)


@lru_cache(maxsize=4)
def claim_frequencies(tile: int = TILE) -> tuple[np.ndarray, np.ndarray]:
    """Flat indices of the claim's frequencies (one of each Hermitian pair) and of their partners.

    The spots (Gaussian, sigma 1 px) put 97 % of the message's energy within
    ``FREQ_RADIUS`` = 0.3 cycles/pixel; the claim's carriers live there only,
    which makes a family's key expansion and score seven times cheaper.
    """
    f = np.fft.fftfreq(tile)
    radius = np.hypot(f[:, None], f[None, :])
    keep = _upper_half(tile) & _band(tile) & (radius <= FREQ_RADIUS)
    idx = np.flatnonzero(keep)
    r, c = np.divmod(idx, tile)
    partner = ((-r) % tile) * tile + (-c) % tile
    for arr in (idx, partner):
        arr.setflags(write=False)
    return idx, partner


@dataclass(frozen=True)
class FamilyPattern:
    """The key-derived arrays of one family."""

    # (MACRO**2, nf) complex64 unit phasors at claim_frequencies(); class c = u * MACRO + v
    phases: np.ndarray
    pilot_pos: np.ndarray    # (CLAIM_PILOTS, 2)
    pilot_sign: np.ndarray   # (CLAIM_PILOTS,) +-1
    code_pos: np.ndarray     # (code spots, 2)
    origin: tuple[int, int]  # macro-cell place of the picture's first tile
    tile: int = TILE

    def carriers(self) -> np.ndarray:
        """Full Hermitian spectra (MACRO**2, T, T) complex128 of every class's carrier."""
        idx, partner = claim_frequencies(self.tile)
        out = np.zeros((len(self.phases), self.tile * self.tile), dtype=np.complex128)
        out[:, idx] = self.phases
        out[:, partner] = np.conj(self.phases)
        return out.reshape(-1, self.tile, self.tile)


def _phases(seed: bytes, count: int, nf: int) -> np.ndarray:
    """``count`` x ``nf`` independent uniform phases as unit phasors (one Philox stream, class by class)."""
    theta = _stream(seed, CARRIER_STREAM).uniform(-np.pi, np.pi, size=(count, nf)).astype(np.float32)
    out = np.empty((count, nf), dtype=np.complex64)
    out.real = np.cos(theta)
    out.imag = np.sin(theta)
    return out


def _spread_positions(rng: np.random.Generator, n: int, count: int) -> np.ndarray:
    """Spot centres at least ``MIN_SPACING`` apart on the torus (candidates drawn in batches)."""
    r = MIN_SPACING - 1
    taken = np.zeros((n + 2 * r, n + 2 * r), dtype=bool)   # padded: wrapped neighbours are slices
    out: list[tuple[int, int]] = []
    while len(out) < count:
        for y, x in rng.integers(0, n, size=(2 * count, 2)).tolist():
            if taken[y:y + 2 * r + 1, x:x + 2 * r + 1].any():
                continue
            out.append((y, x))
            for yy in {y, y + n, y - n}:
                for xx in {x, x + n, x - n}:
                    if -r <= yy < n + r and -r <= xx < n + r:
                        taken[yy + r, xx + r] = True
            if len(out) == count:
                break
    return np.asarray(out, dtype=np.int64)


# Every family of the fine and of the coarse component (mark.scales derives the coarse
# seeds) stays expanded across examinations, with room for a second key set (a decoy or a
# disclosure): a cache smaller than the families examined at once is re-filled every time.
KEY_CACHE = 4 * FAMILIES + 4


@lru_cache(maxsize=KEY_CACHE)
def family_pattern(seed: bytes, tile: int = TILE) -> FamilyPattern:
    """Expand a 32-byte family seed (Philox streams, as :func:`claimkit.mark.pattern.key_pattern`)."""
    if len(seed) != 32:
        raise ValueError("family seed must be 32 bytes")
    n_code = CODE.coded_length(PAYLOAD_BITS)
    pos = _spread_positions(_stream(seed, 2), tile, CLAIM_PILOTS + n_code)
    sign = np.where(_stream(seed, 3).integers(0, 2, CLAIM_PILOTS) == 1, 1, -1).astype(np.int8)
    origin = _stream(seed, 4).integers(0, MACRO, 2)
    phases = _phases(seed, MACRO * MACRO, len(claim_frequencies(tile)[0]))
    for arr in (phases, pos, sign):
        arr.setflags(write=False)
    return FamilyPattern(phases=phases, pilot_pos=pos[:CLAIM_PILOTS], pilot_sign=sign,
                         code_pos=pos[CLAIM_PILOTS:], origin=(int(origin[0]), int(origin[1])),
                         tile=tile)


def _spots(pos: np.ndarray, sign: np.ndarray, tile: int) -> np.ndarray:
    d = np.zeros((tile, tile))
    d[pos[:, 0], pos[:, 1]] = sign
    return d


def _unit(e: np.ndarray) -> np.ndarray:
    e = e - e.mean()
    return e / e.std()


def macro_tile(keys: EmbedKeys, payload_bits: np.ndarray, tile: int = TILE, *,
               sync_share: float = SYNC_SHARE) -> np.ndarray:
    """One macro-period (``MACRO * tile`` square) of the format-3 mark at unit RMS (float32).

    Block ``(i, j)`` (the picture's tile ``(i, j)`` modulo ``MACRO``) holds
    ``a_s S + a_c E_c`` with ``S`` the synchronisation tile, ``E_c`` the
    claim tile of class ``c = ((i + o_r) mod MACRO, (j + o_c) mod MACRO)``
    and ``a_s^2 = sync_share``, ``a_s^2 + a_c^2 = 1`` (the coarse component
    of :mod:`claimkit.mark.scales` gives its synchronisation less).
    """
    sp = sync_pattern(keys.sync, tile)
    fam = family_pattern(keys.family_seed, tile)
    spot_ft = sp.spot_ft
    sync = _unit(np.real(np.fft.ifft2(np.fft.fft2(_spots(sp.pilot_pos, sp.pilot_sign, tile)) * spot_ft
                                      * sp.carrier_phase)))
    code = 2.0 * CODE.encode(np.asarray(payload_bits, dtype=np.uint8)).astype(np.float64) - 1.0
    msg_ft = np.fft.fft2(_spots(np.concatenate([fam.pilot_pos, fam.code_pos]),
                                np.concatenate([fam.pilot_sign.astype(np.float64), code]), tile)) * spot_ft
    a_s, a_c = np.sqrt(sync_share), np.sqrt(1.0 - sync_share)
    carriers = fam.carriers()
    out = np.empty((MACRO * tile, MACRO * tile), dtype=np.float64)
    for i in range(MACRO):
        for j in range(MACRO):
            c = ((i + fam.origin[0]) % MACRO) * MACRO + (j + fam.origin[1]) % MACRO
            claim = _unit(np.real(np.fft.ifft2(msg_ft * carriers[c])))
            out[i * tile:(i + 1) * tile, j * tile:(j + 1) * tile] = a_s * sync + a_c * claim
    return _unit(out).astype(np.float32)


# ---------------------------------------------------------------- claim detection

@dataclass
class ClaimResult:
    """The best family and macro offset at one synchronisation placement."""

    family: int
    offset: tuple[int, int]
    z_pilot: float
    z_full: float | None
    bits: np.ndarray
    valid: bool
    recovered: np.ndarray   # recovered claim message (T x T), aligned to the family's spots


def aligned_spectra(macro_fold: np.ndarray, variant: int, shift, ramp: np.ndarray,
                    tile: int = TILE) -> np.ndarray:
    """The macro fold's tiles in the variant and at the origin the sync found, as spectra.

    ``shift`` is the integer grid origin and ``ramp`` the half-pixel phase of
    the placement (see :func:`claimkit.mark.detect._surfaces`): the fold's
    pixel ``x + shift + phase`` holds the pattern's pixel ``x``. Returns the
    tiles' spectra at :func:`claim_frequencies` (MACRO**2, nf), all a claim
    reads, complex64 and turned by ``ramp``.

    The tiles are real: their half spectra (``rfft2``, half the work of a
    complex transform) hold every frequency, one member of each Hermitian
    pair as it is and the other conjugated.
    """
    f = np.rot90(macro_fold, variant) if variant < 4 else np.rot90(macro_fold.T, variant - 4)
    f = np.roll(f, (-int(shift[0]), -int(shift[1])), axis=(0, 1))
    k = f.shape[0] // tile
    blocks = f.reshape(k, tile, k, tile).transpose(0, 2, 1, 3).reshape(k * k, tile, tile)
    half = sfft.rfft2(np.asarray(blocks, dtype=np.float32), axes=(1, 2))
    at, flip = _half_places(tile)
    y = np.take(half.reshape(k * k, -1), at, axis=1)
    y.imag[:, flip] *= -1
    y *= at_claim_frequencies(ramp, tile)
    return y


@lru_cache(maxsize=4)
def _half_places(tile: int) -> tuple[np.ndarray, np.ndarray]:
    """Where the frequencies of :func:`claim_frequencies` sit in an ``rfft2`` half (T, T/2+1).

    Returns the flat indices into the half spectrum and whether the value
    there is the conjugate (the frequency's Hermitian partner is stored).
    """
    half = tile // 2 + 1
    flat = claim_frequencies(tile)[0]
    r, c = np.divmod(flat, tile)
    flip = c >= half
    r, c = np.where(flip, (-r) % tile, r), np.where(flip, (-c) % tile, c)
    out = (r * half + c, flip)
    for arr in out:
        arr.setflags(write=False)
    return out


def at_claim_frequencies(a: np.ndarray, tile: int = TILE) -> np.ndarray:
    """The values of ``a`` (..., T, T) at :func:`claim_frequencies`: (..., nf)."""
    idx, _ = claim_frequencies(tile)
    return np.take(a.reshape(*a.shape[:-2], tile * tile), idx, axis=-1)


def _class_table(offset: tuple[int, int]) -> np.ndarray:
    """Class of each aligned tile (u, v) for a macro offset (a, b): ((u + a) mod K, (v + b) mod K)."""
    u = (np.arange(MACRO)[:, None] + offset[0]) % MACRO
    v = (np.arange(MACRO)[None, :] + offset[1]) % MACRO
    return (u * MACRO + v).ravel()


OFFSETS = [(a, b) for a in range(MACRO) for b in range(MACRO)]
_TABLES = np.stack([_class_table(o) for o in OFFSETS])      # (K^2 offsets, K^2 tiles)


@lru_cache(maxsize=KEY_CACHE)
def _pilot_kernels(seed: bytes, tile: int = TILE) -> tuple[np.ndarray, np.ndarray]:
    """The family's pilot kernels ``Q_c = C_c w P`` transformed over the class torus, and ``|w P|^2``.

    ``w`` is the spot spectrum and ``P`` the transform of the family's pilot
    spots, both at :func:`claim_frequencies`. Returns ``conj(DFT_classes(Q))``
    as (K^2, nf) complex64 and ``|w P|^2`` (nf,); cached per family seed.
    """
    fam = family_pattern(seed, tile)
    idx, _ = claim_frequencies(tile)
    wp = (np.fft.fft2(_spots(fam.pilot_pos, fam.pilot_sign, tile))
          * spot_spectrum(tile, SPOT_SIGMA)).ravel()[idx]
    q = (fam.phases * wp.astype(np.complex64)).reshape(MACRO, MACRO, -1)
    qt = np.conj(_class_dft(q)).reshape(MACRO * MACRO, -1)
    power = np.abs(wp) ** 2
    qt.setflags(write=False)
    power.setflags(write=False)
    return qt, power


def score_families(y: np.ndarray, families: Mapping[int, bytes], tile: int = TILE) -> dict[int, np.ndarray]:
    """Pilot scores (z) of every family at every macro offset: dict family -> (K^2,) array, ``OFFSETS`` order.

    ``y`` are the aligned tiles' spectra at :func:`claim_frequencies`
    (K^2, nf), times the spectral weight. The score of offset ``(a, b)`` sums, over the tiles ``t = (u,
    v)``, the correlation of each tile with the carrier of its class
    ``c(t) = (u + a, v + b)`` times the family's pilot spots::

        z(a, b) = sum_t Re sum_k Y_t[k] conj(Q_c(t)[k]) / (T^2 sigma)

    over all frequencies ``k``, which is twice the real part of the sum over
    one member of each Hermitian pair (the tiles and the pattern are real).
    Its exact standard deviation over the key (carrier phases independent per
    class and frequency pair, see :mod:`claimkit.mark.stats`) is
    ``sigma = sqrt(sum_t sum_k |Y_t[k]|^2 |w P[k]|^2) / T^2`` for every
    offset. The sum over tiles is a cyclic correlation on the ``MACRO x
    MACRO`` torus of classes, so it is computed through transforms over that
    torus: one product per (class frequency, frequency) and family.
    """
    n = tile
    y = y.reshape(MACRO, MACRO, -1)
    power = (y.real ** 2 + y.imag ** 2).sum(axis=(0, 1)).astype(np.float64)
    yt = _class_dft(y).reshape(MACRO * MACRO, -1)
    names = tuple(families)
    qc, kpower = _stacked_kernels(tuple(families[f] for f in names), n)
    # Every family at once (einsum's and vecdot's own loops, not BLAS calls that
    # start threads: on a loaded two-core machine a threaded 16k-long dot product
    # took 20 ms). vecdot conjugates its first argument: qc holds the conjugates.
    sigma = np.sqrt(2.0 * np.einsum("fk,k->f", kpower, power)) / n ** 2
    v = np.vecdot(qc, yt[:, None, :]).T.reshape(len(names), MACRO, MACRO)
    c = np.fft.fft2(v, axes=(1, 2)) / (MACRO * MACRO)
    z = 2.0 * c.real.reshape(len(names), -1) / (n ** 2 * np.maximum(sigma, 1e-30)[:, None])
    return {f: z[i] for i, f in enumerate(names)}


@lru_cache(maxsize=8)
def _stacked_kernels(seeds: tuple[bytes, ...], tile: int = TILE) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_pilot_kernels` of several families, conjugated and stacked by class frequency.

    Returns (K^2, F, nf) (the conjugates, for ``np.vecdot``) and (F, nf),
    cached per key set.
    """
    parts = [_pilot_kernels(s, tile) for s in seeds]
    qc = np.ascontiguousarray(np.conj(np.stack([p[0] for p in parts])).transpose(1, 0, 2))
    kpower = np.stack([p[1] for p in parts])
    qc.setflags(write=False)
    kpower.setflags(write=False)
    return qc, kpower


def _class_dft(a: np.ndarray) -> np.ndarray:
    """The 2-D DFT over the first two axes (the K x K class torus) of a (K, K, ...) complex array.

    Written out per axis: NumPy's FFT along a short axis with a long stride
    cost 26 ms for (4, 4, 16384). For K = 4 (``MACRO``) as the radix-4
    butterfly (sums, differences and exact turns by -i: 0.6 -> 0.15 ms for
    the claim frequencies); otherwise as K^2 scaled sums per axis.
    """
    a = np.asarray(a, dtype=np.complex64)
    if a.shape[0] == 4:
        return np.swapaxes(_dft4(np.swapaxes(_dft4(a), 0, 1)), 0, 1)
    k = a.shape[0]
    w = np.exp(-2j * np.pi * np.outer(np.arange(k), np.arange(k)) / k).astype(np.complex64)
    rows = np.zeros_like(a)
    for m in range(k):
        for u in range(k):
            rows[m] += w[m, u] * a[u]
    out = np.zeros_like(a)
    for m in range(k):
        for v in range(k):
            out[:, m] += w[m, v] * rows[:, v]
    return out


def _dft4(a: np.ndarray) -> np.ndarray:
    """The 4-point DFT along the first axis (radix-4 butterfly)."""
    s02, d02 = a[0] + a[2], a[0] - a[2]
    s13, d13 = a[1] + a[3], a[1] - a[3]
    d13 *= np.complex64(-1j)                  # exact: a swap of parts and a sign
    return np.stack([s02 + s13, d02 + d13, s02 - s13, d02 - d13])


def score_families_direct(spec: np.ndarray, families: Mapping[int, bytes]) -> dict[int, np.ndarray]:
    """:func:`score_families` by the plain formula over full spectra, tile by tile and offset by offset.

    (For the tests: the fast path must agree with it.)
    """
    n = spec.shape[-1]
    out = {}
    sp = spot_spectrum(n, SPOT_SIGMA)
    power = (np.abs(spec) ** 2).sum(axis=0)
    for fam_idx, seed in families.items():
        fam = family_pattern(seed, n)
        carriers = fam.carriers()
        p_ft = np.fft.fft2(_spots(fam.pilot_pos, fam.pilot_sign, n)) * sp
        on = np.abs(carriers[0]) > 0
        sigma = np.sqrt(float(np.sum((power * np.abs(p_ft) ** 2)[on]))) / n ** 2
        z = []
        for offset in OFFSETS:
            table = _class_table(offset)
            total = sum(np.sum(spec[t] * np.conj(carriers[table[t]] * p_ft)).real
                        for t in range(MACRO * MACRO))
            z.append(total / n ** 2 / max(sigma, 1e-30))
        out[fam_idx] = np.asarray(z)
    return out


def decode_family(y: np.ndarray, seed: bytes, offset: tuple[int, int], *,
                  payload_check: Callable[[np.ndarray], bool] | None,
                  known_bits: np.ndarray | None,
                  candidates: PayloadList | None = None,
                  accept_listed: Callable[[float], bool] | None = None,
                  tile: int = TILE,
                  ) -> tuple[np.ndarray, bool, float | None, np.ndarray]:
    """Recovered message of one family at one offset, decoded; full-template score if the payload checks.

    ``y``: the aligned tiles' weighted spectra at :func:`claim_frequencies`
    (K^2, nf), as :func:`score_families` reads them. (The examination calls
    it only where the pilot score could lead to a claim, see
    ``detect.DECODE_MIN_Z3``; elsewhere it reads :func:`recovered` alone.)
    Where the decoder's payload does not check, the best match in
    ``candidates`` is tried (:class:`claimkit.mark.payload.PayloadList`), and
    kept only where ``accept_listed(z_full)`` holds.
    """
    n = tile
    fam = family_pattern(seed, n)
    idx, _ = claim_frequencies(n)
    sp = spot_spectrum(n, SPOT_SIGMA).ravel()[idx]
    rec = recovered(y, seed, offset, n)
    soft = rec[fam.code_pos[:, 0], fam.code_pos[:, 1]]
    bits = CODE.decode(soft, PAYLOAD_BITS, known=known_bits)
    if payload_check is None:
        return bits, False, None, rec

    def z_full_of(bits):
        pos, sign, _ = reference_message(seed, bits, n)
        q = (np.fft.fft2(_spots(pos, sign, n)).ravel()[idx]) * sp
        power = (y.real ** 2 + y.imag ** 2).sum(axis=0)
        sigma = np.sqrt(2.0 * float(np.sum(power * np.abs(q) ** 2))) / n ** 2
        return float(np.sum(sign * rec[pos[:, 0], pos[:, 1]]) / max(sigma, 1e-30))

    if payload_check(bits):
        return bits, True, z_full_of(bits), rec
    pilots = rec[fam.pilot_pos[:, 0], fam.pilot_pos[:, 1]] * fam.pilot_sign
    listed = None if candidates is None else candidates.best(soft, CODE, pilots)
    if listed is not None and payload_check(listed):
        z_full = z_full_of(listed)
        if accept_listed is None or accept_listed(z_full):
            return listed, True, z_full, rec
    return bits, False, None, rec


def recovered(y: np.ndarray, seed: bytes, offset: tuple[int, int], tile: int = TILE) -> np.ndarray:
    """The recovered claim message (T, T) of one family at one macro offset (``y`` as in decode_family)."""
    n = tile
    fam = family_pattern(seed, n)
    idx, partner = claim_frequencies(n)
    sp = spot_spectrum(n, SPOT_SIGMA).ravel()[idx]
    half = (y * np.conj(fam.phases[_class_table(offset)])).sum(axis=0) * sp
    full = np.zeros(n * n, dtype=np.complex128)
    full[idx] = half
    full[partner] = np.conj(half)
    return np.real(np.fft.ifft2(full.reshape(n, n)))


def reference_message(seed: bytes, bits: np.ndarray | None,
                      tile: int = TILE) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Spot positions, signs and the template (spots of peak 1) of a family's message for ``bits``.

    ``bits=None`` (nothing decoded): the pilots only, the code spots at zero.
    """
    fam = family_pattern(seed, tile)
    if bits is None:
        code = np.zeros(len(fam.code_pos))
    else:
        code = 2.0 * CODE.encode(np.asarray(bits, dtype=np.uint8)).astype(np.float64) - 1.0
    pos = np.concatenate([fam.pilot_pos, fam.code_pos])
    sign = np.concatenate([fam.pilot_sign.astype(np.float64), code])
    ref = np.real(np.fft.ifft2(np.fft.fft2(_spots(pos, sign, tile)) * spot_spectrum(tile, SPOT_SIGMA)))
    return pos, sign, ref
