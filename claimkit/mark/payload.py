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
