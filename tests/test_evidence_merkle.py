"""Merkle trees against hand-computed SHA-256 (RFC 6962 section 2.1)."""

from __future__ import annotations

import hashlib

import pytest

from claimkit.evidence.merkle import EMPTY_ROOT, MerkleTree, root_of, verify_inclusion


def H(b: bytes) -> bytes:
    return hashlib.sha256(b).digest()


def L(d: bytes) -> bytes:  # RFC 6962: leaf hash = SHA-256(0x00 || d)
    return H(b"\x00" + d)


def N(a: bytes, b: bytes) -> bytes:  # RFC 6962: node hash = SHA-256(0x01 || left || right)
    return H(b"\x01" + a + b)


def mth(d: list[bytes]) -> bytes:
    # RFC 6962 section 2.1 definition, written recursively: k = largest power of 2 < n.
    n = len(d)
    if n == 0:
        return H(b"")
    if n == 1:
        return L(d[0])
    k = 1
    while k * 2 < n:
        k *= 2
    return N(mth(d[:k]), mth(d[k:]))


D = [b"alpha", b"bravo", b"charlie", b"delta", b"echo"]


def test_small_trees_by_hand():
    # Hand-built with hashlib, RFC 6962 section 2.1 prefixes and split rule.
    assert root_of([]) == EMPTY_ROOT == H(b"")
    assert root_of(D[:1]) == L(b"alpha")
    assert root_of(D[:2]) == N(L(b"alpha"), L(b"bravo"))
    assert root_of(D[:3]) == N(N(L(b"alpha"), L(b"bravo")), L(b"charlie"))
    four = N(N(L(b"alpha"), L(b"bravo")), N(L(b"charlie"), L(b"delta")))
    assert root_of(D[:4]) == four
    assert root_of(D) == N(four, L(b"echo"))
    # The leaf prefix matters: the same bytes unprefixed give another root.
    assert root_of(D[:2]) != H(H(b"alpha") + H(b"bravo"))


def test_proofs_by_hand():
    t = MerkleTree(D)
    assert t.proof(0) == [L(b"bravo"), N(L(b"charlie"), L(b"delta")), L(b"echo")]
    assert t.proof(4) == [N(N(L(b"alpha"), L(b"bravo")), N(L(b"charlie"), L(b"delta")))]
    assert t.proof(2) == [L(b"delta"), N(L(b"alpha"), L(b"bravo")), L(b"echo")]


@pytest.mark.parametrize("n", list(range(1, 34)) + [100, 257])
def test_every_proof_verifies_and_matches_definition(n):
    leaves = [f"record {i}".encode() for i in range(n)]
    t = MerkleTree(leaves)
    assert t.root == mth(leaves)
    for i in range(n):
        p = t.proof(i)
        assert verify_inclusion(leaves[i], i, n, p, t.root)
        assert not verify_inclusion(leaves[i] + b"!", i, n, p, t.root)
        if n > 1:
            assert not verify_inclusion(leaves[i], (i + 1) % n, n, p, t.root)
            bent = [bytes([p[0][0] ^ 1]) + p[0][1:]] + p[1:]
            assert not verify_inclusion(leaves[i], i, n, bent, t.root)
            assert not verify_inclusion(leaves[i], i, n, p[:-1], t.root)


def test_proof_out_of_range():
    t = MerkleTree(D)
    with pytest.raises(IndexError):
        t.proof(5)
    assert not verify_inclusion(D[0], 5, 5, [], t.root)
