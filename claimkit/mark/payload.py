"""The 64-bit payload: owner tag (16 bits), work serial (24 bits), payload tag (24 bits).

The owner tag names the owner's key pair; the serial names the work in the
owner's registry; the payload tag is a keyed check computed by the evidence
layer, so that a payload cannot be made up for a work without the owner's
secret. Bits are big-endian, field after field.
"""

from __future__ import annotations

import math

import numpy as np

FIELDS = (("owner_tag", 16), ("serial", 24), ("tag", 24))
PAYLOAD_SPACE = 2 ** 24   # valid payloads for one owner: one per serial


def pack(owner_tag: int, serial: int, tag: int) -> np.ndarray:
    """Payload bits (uint8 0/1, length 64)."""
    out: list[int] = []
    for (name, width), value in zip(FIELDS, (owner_tag, serial, tag), strict=True):
        if not 0 <= value < 2 ** width:
            raise ValueError(f"{name} {value} does not fit in {width} bits")
        out.extend((value >> (width - 1 - i)) & 1 for i in range(width))
    return np.asarray(out, dtype=np.uint8)


def unpack(bits) -> dict[str, int]:
    """Inverse of :func:`pack`."""
    bits = [int(b) for b in bits]
    out, i = {}, 0
    for name, width in FIELDS:
        v = 0
        for b in bits[i:i + width]:
            v = (v << 1) | b
        out[name] = v
        i += width
    return out


# Largest posterior probability, given the readings, that the mark is another listed payload
# than the one picked (a uniform prior over the list); above it the list names no work.
MAX_CONFUSION = 1e-6


class PayloadList:
    """Payloads an examiner knows to be valid: an owner's allocated serials, or one disclosed work's.

    The Viterbi decoder finds the payload alone and needs a clean reading of
    the code spots (about one error in ten coded bits at most). Where it
    fails, the examiner who holds the list picks the listed payload whose
    codeword correlates best with the same soft readings: a maximum-likelihood
    decision over the listed codewords rather than over every 64-bit string,
    which reads the mark at about two thirds of the amplitude (a web copy of
    a large master, JPEG 75 and cropped, is one).

    Two different risks, two different guards. *A claim on a picture that
    never carried the mark*: the bound is unchanged, since each listed
    payload is one the payload check accepts and the bound already counts
    every payload the check could accept (``payload_space``), whatever rule
    picked the one reported. *The wrong work of the right owner*: every
    listed payload is valid, so the keyed payload tag, which makes a wrong
    Viterbi output fail the check, cannot catch a wrong pick. The pick is
    therefore kept only when the readings make every other listed payload
    together at most ``MAX_CONFUSION`` as likely (Gaussian readings of
    amplitude ``A`` and spread ``sigma``, both estimated from the pilots'
    readings; their spread includes how the mark's strength varies from spot
    to spot, which overstates ``sigma`` and so understates every likelihood
    ratio). Measured on 25 % copies (bench_scales): no wrong work named, and
    the guard costs a few JPEG copies whose nearest listed neighbours are
    only 15 to 30 coded bits away.

    Parameters
    ----------
    bits : ndarray, (N, 64) of 0/1
    """

    def __init__(self, bits) -> None:
        b = np.atleast_2d(np.asarray(bits, dtype=np.uint8))
        if b.ndim != 2 or b.shape[1] != sum(w for _, w in FIELDS):
            raise ValueError("payload list must be (N, 64) bits")
        b.setflags(write=False)
        self.bits = b
        self._signs: dict = {}

    def __len__(self) -> int:
        """Number of listed payloads."""
        return int(self.bits.shape[0])

    def signs(self, code) -> np.ndarray:
        """Every listed payload's codeword under ``code`` as +-1 (int8), computed once per code."""
        key = id(code)
        if key not in self._signs:
            self._signs[key] = (code, (2 * code.encode_many(self.bits).astype(np.int8) - 1))
        return self._signs[key][1]

    def scores(self, soft: np.ndarray, code) -> np.ndarray:
        """Correlation of every listed codeword (+-1) with ``soft`` (float32, one per listed payload)."""
        soft = np.nan_to_num(np.asarray(soft, dtype=np.float32), nan=0.0)
        signs = self.signs(code)
        # In blocks of rows converted to float32 (no float copy of the whole list); einsum's own
        # loop rather than a BLAS call that may start threads inside a worker.
        return np.concatenate([np.einsum("ij,j->i", signs[i:i + 16384].astype(np.float32), soft)
                               for i in range(0, len(signs), 16384)] or [np.zeros(0, np.float32)])

    def best(self, soft: np.ndarray, code, pilots: np.ndarray) -> np.ndarray | None:
        """The listed payload the readings name, or None (empty list, or no payload clear enough).

        Parameters
        ----------
        soft : ndarray
            One reading per coded bit, positive for a 1 (as for
            :meth:`claimkit.mark.ecc.ConvCode.decode`).
        code : ConvCode
        pilots : ndarray
            The pilot spots' readings times their known signs, on the same scale.

        Returns
        -------
        ndarray of 0/1, or None
            The best-matching payload, kept only if every other listed
            payload is together at most ``MAX_CONFUSION`` as probable.
        """
        if not len(self):
            return None
        s = self.scores(soft, code).astype(np.float64)
        k = int(np.argmax(s))
        if len(self) > 1:
            p = np.asarray(pilots, dtype=np.float64)
            p = p[np.isfinite(p)]
            if p.size < 2:
                return None
            var = float(np.var(p, ddof=1))
            amp = float(np.mean(p))
            if amp <= 0.0 or var <= 0.0:
                return None
            # log P(j) / P(k) = -(s_k - s_j) A / sigma^2 for Gaussian readings, equal priors.
            llr = np.delete(s[k] - s, k) * (amp / var)
            if float(np.logaddexp.reduce(-llr)) > math.log(MAX_CONFUSION):
                return None
        return self.bits[k].copy()

    def __getstate__(self) -> dict:
        """The payloads only: a worker in another process encodes them again (the cache is by object id)."""
        return {"bits": self.bits}

    def __setstate__(self, state: dict) -> None:
        """Rebuilt from the payloads, with an empty cache."""
        self.bits = np.array(state["bits"], dtype=np.uint8)
        self.bits.setflags(write=False)
        self._signs = {}
