"""Merkle trees as in Certificate Transparency (RFC 6962, section 2.1).

One timestamp token covers a whole shoot: the token's digest is the root of a
tree whose leaves are the canonical work records, and each work keeps its
inclusion proof (audit path), so it can be checked alone.

Leaf hash ``SHA-256(0x00 || data)``, interior node ``SHA-256(0x01 || left ||
right)``: the prefixes keep a leaf from ever passing as a node. For ``n`` > 1
leaves the left subtree holds the largest power of two below ``n``; building
the levels bottom-up and carrying a lone last node up unchanged gives the same
tree, and that is how :class:`MerkleTree` computes it (linear time, all proofs
available).

References
----------
B. Laurie, A. Langley, E. Kasper, "Certificate Transparency", RFC 6962, 2013,
section 2.1. doi:10.17487/RFC6962. The verification loop follows
RFC 9162, section 2.1.3.2. doi:10.17487/RFC9162
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence

__all__ = ["EMPTY_ROOT", "MerkleTree", "leaf_hash", "node_hash", "root_of", "verify_inclusion"]

EMPTY_ROOT = hashlib.sha256(b"").digest()


def leaf_hash(data: bytes) -> bytes:
    """RFC 6962 leaf hash: ``SHA-256(0x00 || data)``."""
    return hashlib.sha256(b"\x00" + data).digest()


def node_hash(left: bytes, right: bytes) -> bytes:
    """RFC 6962 interior node: ``SHA-256(0x01 || left || right)``."""
    return hashlib.sha256(b"\x01" + left + right).digest()


class MerkleTree:
    """A tree over leaf data (each item is hashed with :func:`leaf_hash`).

    Parameters
    ----------
    leaves : sequence of bytes
        The leaf data in order.
    """

    def __init__(self, leaves: Sequence[bytes]):
        level = [leaf_hash(d) for d in leaves]
        self.size = len(level)
        self._levels: list[list[bytes]] = [level]
        while len(level) > 1:
            nxt = [node_hash(level[i], level[i + 1]) for i in range(0, len(level) - 1, 2)]
            if len(level) % 2:
                nxt.append(level[-1])  # a lone node rises unchanged
            self._levels.append(nxt)
            level = nxt

    @property
    def root(self) -> bytes:
        return self._levels[-1][0] if self.size else EMPTY_ROOT

    def proof(self, index: int) -> list[bytes]:
        """The audit path of leaf ``index``, bottom-up (RFC 6962 ``PATH(m, D[n])``)."""
        if not 0 <= index < self.size:
            raise IndexError(f"leaf {index} not in a tree of {self.size}")
        path = []
        i = index
        for level in self._levels[:-1]:
            sibling = i ^ 1
            if sibling < len(level):
                path.append(level[sibling])
            i //= 2
        return path


def root_of(leaves: Sequence[bytes]) -> bytes:
    """The RFC 6962 Merkle tree hash of the leaf data."""
    return MerkleTree(leaves).root


def verify_inclusion(leaf: bytes, index: int, size: int, proof: Sequence[bytes],
                     root: bytes, *, hashed: bool = False) -> bool:
    """Check an audit path (RFC 9162, section 2.1.3.2).

    Parameters
    ----------
    leaf : bytes
        The leaf data, or its leaf hash when ``hashed`` is true.
    index, size : int
        Position of the leaf and number of leaves in the tree.
    proof : sequence of bytes
        The audit path, bottom-up.
    root : bytes
        The expected root.
    """
    if not 0 <= index < size:
        return False
    fn, sn = index, size - 1
    r = leaf if hashed else leaf_hash(leaf)
    for p in proof:
        if sn == 0:
            return False
        if fn & 1 or fn == sn:
            r = node_hash(p, r)
            if not fn & 1:
                while not fn & 1 and fn != 0:
                    fn >>= 1
                    sn >>= 1
        else:
            r = node_hash(r, p)
        fn >>= 1
        sn >>= 1
    return sn == 0 and r == root
