"""The vectorised Viterbi decoder against the plain textbook recursion, bit for bit.

``ConvCode.decode`` updates all 256 states of a step in a few array
operations. The reference here walks the trellis state by state in plain
Python, as Viterbi (1967) and Forney (1973) state it: for each next state keep
the better of its two entries (the lower-numbered previous state on a tie),
prune the paths that contradict a known bit or the zero tail, and trace back
from state 0. The two must give the same bits on every input, ties included.
"""

from __future__ import annotations

import numpy as np
import pytest

from claimkit.mark import ecc


def reference_decode(code: ecc.ConvCode, soft: np.ndarray, n_bits: int,
                     known: np.ndarray | None = None) -> np.ndarray:
    soft = np.asarray(soft, dtype=np.float64).reshape(-1, code.rate_inv)
    metric = {0: 0.0}
    back: list[dict[int, tuple[int, int]]] = []
    for t in range(soft.shape[0]):
        if t >= n_bits:
            allowed = (0,)
        elif known is not None and known[t] >= 0:
            allowed = (int(known[t]),)
        else:
            allowed = (0, 1)
        branch = code._signs @ soft[t]            # (2, states): the correlation of each output
        new: dict[int, float] = {}
        came: dict[int, tuple[int, int]] = {}
        for s in sorted(metric):                  # ascending: the first of equals is kept
            for b in allowed:
                n = int(code.next[b][s])
                v = metric[s] + branch[b][s]
                if n not in new or v > new[n]:
                    new[n], came[n] = v, (s, b)
        metric = new
        back.append(came)
    state, bits = 0, []
    for came in reversed(back):
        state, b = came[state]
        bits.append(b)
    return np.array(bits[::-1][:n_bits], dtype=np.uint8)


@pytest.mark.parametrize("code", [ecc.RATE_HALF, ecc.RATE_THIRD], ids=["rate-1/2", "rate-1/3"])
def test_vectorised_decoder_matches_the_plain_recursion(code):
    rng = np.random.default_rng(16)
    n = 64
    for i in range(24):
        bits = rng.integers(0, 2, n)
        clean = 2.0 * code.encode(bits) - 1.0
        soft = clean + rng.normal(0.0, (0.5, 1.5, 4.0)[i % 3], clean.size)
        if i % 4 == 1:
            soft = np.round(soft)                 # many exact ties between paths
        if i % 8 == 3:
            soft = np.zeros(clean.size)           # every path ties
        known = None
        if i % 2:
            known = np.full(n, -1)
            known[:16] = bits[:16]                # the owner tag, as the examination knows it
        got = code.decode(soft, n, known=known)
        np.testing.assert_array_equal(got, reference_decode(code, soft, n, known))
        if known is not None:
            np.testing.assert_array_equal(got[:16], bits[:16])

