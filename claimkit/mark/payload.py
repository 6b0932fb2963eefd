"""The 64-bit payload: owner tag (16 bits), work serial (24 bits), payload tag (24 bits).

The owner tag names the owner's key pair; the serial names the work in the
owner's registry; the payload tag is a keyed check computed by the evidence
layer, so that a payload cannot be made up for a work without the owner's
secret. Bits are big-endian, field after field.
"""

from __future__ import annotations

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


class PayloadList:
    """Payloads an examiner knows to be valid: an owner's allocated serials, or one disclosed work's.

    The Viterbi decoder finds the payload alone and needs a clean reading of
    the code spots (about one error in ten coded bits at most). Where it
    fails, the examiner who holds the list picks the listed payload whose
    codeword correlates best with the same soft readings: a maximum-likelihood
    decision over a few thousand codewords rather than over every 64-bit
    string, which reads the mark at about half the amplitude (a web copy of a
    large master, JPEG 75 and cropped, is one). The bound is unchanged: each
    listed payload is one the payload check accepts, and the bound already
    counts every payload the check could accept (``payload_space``), whatever
    rule picked the one reported.

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

    def best(self, soft: np.ndarray, code) -> np.ndarray | None:
        """The listed payload whose codeword under ``code`` best matches ``soft`` (None if empty).

        ``soft`` holds one reading per coded bit, positive for a 1 (as for
        :meth:`claimkit.mark.ecc.ConvCode.decode`).
        """
        if not len(self):
            return None
        soft = np.nan_to_num(np.asarray(soft, dtype=np.float32), nan=0.0)
        signs = self.signs(code)
        # In blocks of rows converted to float32 (no float copy of the whole list); einsum's own
        # loop rather than a BLAS call that may start threads inside a worker.
        scores = np.concatenate([np.einsum("ij,j->i", signs[i:i + 16384].astype(np.float32), soft)
                                 for i in range(0, len(signs), 16384)])
        return self.bits[int(np.argmax(scores))].copy()

    def __getstate__(self) -> dict:
        """The payloads only: a worker in another process encodes them again (the cache is by object id)."""
        return {"bits": self.bits}

    def __setstate__(self, state: dict) -> None:
        """Rebuilt from the payloads, with an empty cache."""
        self.bits = np.array(state["bits"], dtype=np.uint8)
        self.bits.setflags(write=False)
        self._signs = {}
