"""The keyed pattern of the phase-dispersion watermark: carrier, spot positions, message template.

Everything here is a pure function of a 32-byte detection seed. The seed is
expanded with NumPy's Philox counter-based generator (one independent stream
per purpose), so the carrier phases are independent of the spot positions.
That independence is what the detection statistics rest on (see
:mod:`claimkit.mark.stats`).

References
----------
.. [1] I. J. Cox, M. L. Miller, J. A. Bloom, J. Fridrich, T. Kalker,
   *Digital Watermarking and Steganography*, 2nd ed., Morgan Kaufmann, 2008,
   ch. 3 and 5 (correlation detection, spread-spectrum carriers).
.. [2] J. R. Hernandez, M. Amado, F. Perez-Gonzalez, "DCT-domain watermarking
   techniques for still images: detector performance analysis and a new
   structure", IEEE Trans. Image Process. 9(1), 55-68, 2000.
   doi:10.1109/83.817598
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from claimkit.mark import ecc

# The mark's format. Anything that changes what is embedded (tile, spots, code,
# key expansion) must change this name and keep the old format readable: a
# copy marked years ago must still be examined the way it was marked.
MARK_FORMAT = "claimkit-mark/1"
TILE = 128            # period of the tiled mark, in pixels of the original
PAYLOAD_BITS = 64     # owner tag (16) + work serial (24) + payload tag (24)
PILOT_SPOTS = 64      # spots with key-fixed signs, for detection and alignment
CODE_SPOTS = ecc.coded_length(PAYLOAD_BITS)   # 216
SPOT_SIGMA = 1.0      # width of each message spot (Gaussian sigma, pixels): trades message sharpness for survival of JPEG and blur
MIN_SPACING = 4       # minimum cyclic distance between spot centres, pixels


@dataclass(frozen=True)
class KeyPattern:
    """The key-derived arrays for one detection seed (all ``TILE x TILE``)."""

    carrier_phase: np.ndarray   # complex unit phasors, Hermitian, 0 at DC and Nyquist
    band: np.ndarray            # bool mask of the frequencies the carrier uses
    pilot_pos: np.ndarray       # (PILOT_SPOTS, 2) int rows/cols
    pilot_sign: np.ndarray      # (PILOT_SPOTS,) +-1
    code_pos: np.ndarray        # (CODE_SPOTS, 2)
    spot_ft: np.ndarray         # real spectrum of one spot (peak 1 in space)

    @property
    def tile(self) -> int:
        return self.carrier_phase.shape[0]


def _stream(seed: bytes, purpose: int) -> np.random.Generator:
    key = int.from_bytes(seed[:16], "big")
    counter = int.from_bytes(seed[16:32], "big")
    # Philox takes a 128-bit key; the purpose selects an independent counter block.
    return np.random.Generator(np.random.Philox(key=key, counter=[counter & (2**64 - 1), purpose, 0, 0]))


def _band(n: int) -> np.ndarray:
    """Frequencies that have a distinct Hermitian partner (not DC, not a Nyquist row/column)."""
    band = np.ones((n, n), dtype=bool)
    band[0, 0] = False
    band[n // 2, :] = False
    band[:, n // 2] = False
    return band


def _carrier_phase(rng: np.random.Generator, n: int) -> np.ndarray:
    theta = rng.uniform(-np.pi, np.pi, size=(n, n))
    # Hermitian symmetry: phase(-k) = -phase(k), so the carrier is real.
    idx = (-np.arange(n)) % n
    theta = np.where(_upper_half(n), theta, -theta[np.ix_(idx, idx)])
    phase = np.exp(1j * theta)
    phase[~_band(n)] = 0.0
    return phase


def _upper_half(n: int) -> np.ndarray:
    """One member of every Hermitian pair (k, -k)."""
    r = np.arange(n)[:, None]
    c = np.arange(n)[None, :]
    rr, cc = (-r) % n, (-c) % n
    return (r < rr) | ((r == rr) & (c < cc)) | ((r == rr) & (c == cc))


def _positions(rng: np.random.Generator, n: int, count: int) -> np.ndarray:
    """Distinct spot centres at least MIN_SPACING apart on the torus."""
    taken = np.zeros((n, n), dtype=bool)
    out = []
    r = MIN_SPACING - 1
    while len(out) < count:
        y, x = rng.integers(0, n, size=2)
        ys = (np.arange(y - r, y + r + 1) % n)[:, None]
        xs = (np.arange(x - r, x + r + 1) % n)[None, :]
        if taken[ys, xs].any():
            continue
        taken[y, x] = True
        out.append((y, x))
    return np.asarray(out, dtype=np.int64)


def spot_spectrum(n: int, sigma: float) -> np.ndarray:
    """FFT of a cyclic Gaussian spot of peak 1 centred at the origin."""
    f = np.fft.fftfreq(n)
    g = np.exp(-2 * (np.pi * sigma) ** 2 * (f[:, None] ** 2 + f[None, :] ** 2))
    # Spatial peak = mean of the spectrum; normalise it to 1.
    return g / g.mean()


@lru_cache(maxsize=16)
def key_pattern(seed: bytes, tile: int = TILE) -> KeyPattern:
    """Expand a 32-byte detection seed into the watermark pattern."""
    if len(seed) != 32:
        raise ValueError("detection seed must be 32 bytes")
    phase = _carrier_phase(_stream(seed, 1), tile)
    pos = _positions(_stream(seed, 2), tile, PILOT_SPOTS + CODE_SPOTS)
    sign = np.where(_stream(seed, 3).integers(0, 2, PILOT_SPOTS) == 1, 1, -1)
    return KeyPattern(
        carrier_phase=phase, band=_band(tile),
        pilot_pos=pos[:PILOT_SPOTS], pilot_sign=sign.astype(np.int8),
        code_pos=pos[PILOT_SPOTS:], spot_ft=spot_spectrum(tile, SPOT_SIGMA),
    )


def spot_signs(pattern: KeyPattern, codeword: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """Positions and signs of all spots for a coded payload (pilot only if ``codeword`` is None)."""
    if codeword is None:
        return pattern.pilot_pos, pattern.pilot_sign.astype(np.float64)
    code_sign = 2.0 * np.asarray(codeword, dtype=np.float64) - 1.0
    return (np.concatenate([pattern.pilot_pos, pattern.code_pos]),
            np.concatenate([pattern.pilot_sign.astype(np.float64), code_sign]))


def message_template(pattern: KeyPattern, codeword: np.ndarray | None) -> np.ndarray:
    """The reference message M: signed Gaussian spots of peak 1 (``tile x tile``, float64)."""
    pos, sign = spot_signs(pattern, codeword)
    n = pattern.tile
    d = np.zeros((n, n))
    d[pos[:, 0], pos[:, 1]] = sign
    return np.real(np.fft.ifft2(np.fft.fft2(d) * pattern.spot_ft))


def mark_tile(pattern: KeyPattern, codeword: np.ndarray) -> np.ndarray:
    """One period of the mark, E0 = zero-mean(M * C) scaled to unit RMS (float32)."""
    m = message_template(pattern, codeword)
    e = np.real(np.fft.ifft2(np.fft.fft2(m) * pattern.carrier_phase))
    e -= e.mean()
    return (e / e.std()).astype(np.float32)
