"""Merkle tree hashing of RFC 9162 section 2.1 (the same as RFC 6962 section 2.1).

The tree head over n leaves: MTH({}) = SHA-256(""), MTH({d}) = SHA-256(0x00 || d), and for
n > 1, with k the largest power of two strictly below n,
MTH(D[n]) = SHA-256(0x01 || MTH(D[0:k]) || MTH(D[k:n])).
The 0x00 / 0x01 prefixes keep a leaf from ever passing for an interior node.

:class:`TreeBuilder` computes the same root in one pass over the leaf hashes, keeping only
O(log n) hashes: a seal over millions of records never holds them all in memory.
Pure functions, no I/O.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable, Sequence

LEAF_PREFIX = b"\x00"
NODE_PREFIX = b"\x01"
EMPTY_ROOT = hashlib.sha256(b"").digest()


def leaf_hash(data: bytes) -> bytes:
    """SHA-256(0x00 || data)."""
    return hashlib.sha256(LEAF_PREFIX + data).digest()


def node_hash(left: bytes, right: bytes) -> bytes:
    """SHA-256(0x01 || left || right)."""
    return hashlib.sha256(NODE_PREFIX + left + right).digest()


def _split(n: int) -> int:
    """The largest power of two strictly below ``n`` (n >= 2)."""
    return 1 << ((n - 1).bit_length() - 1)


class TreeBuilder:
    """Streams leaf hashes in order and gives the tree head of all seen so far.

    The stack holds the roots of the perfect subtrees the leaves decompose into, largest
    (leftmost) first, their sizes the binary digits of the count. RFC 9162 splits every
    range at its largest power of two, so the head is those roots folded from the right.
    """

    def __init__(self) -> None:
        self._stack: list[tuple[int, bytes]] = []
        self._count = 0

    @property
    def count(self) -> int:
        return self._count

    def add_leaf_hash(self, h: bytes) -> None:
        if len(h) != 32:
            raise ValueError(f"a leaf hash has 32 bytes, got {len(h)}")
        size, node = 1, h
        # Merge equal-sized neighbours: two perfect trees of 2^j leaves make one of 2^(j+1).
        while self._stack and self._stack[-1][0] == size:
            left_size, left = self._stack.pop()
            size, node = left_size + size, node_hash(left, node)
        self._stack.append((size, node))
        self._count += 1

    def add_leaf_hashes(self, hashes: Iterable[bytes]) -> None:
        for h in hashes:
            self.add_leaf_hash(h)

    def root(self) -> bytes:
        if not self._stack:
            return EMPTY_ROOT
        node = self._stack[-1][1]
        for _, left in reversed(self._stack[:-1]):
            node = node_hash(left, node)
        return node


def root_from_leaf_hashes(hashes: Iterable[bytes]) -> bytes:
    """The tree head over leaves given by their leaf hashes (in order)."""
    builder = TreeBuilder()
    builder.add_leaf_hashes(hashes)
    return builder.root()


def root_from_leaves(leaves: Iterable[bytes]) -> bytes:
    """The tree head over raw leaf data (in order)."""
    return root_from_leaf_hashes(leaf_hash(d) for d in leaves)


def _subtree_root(hashes: Sequence[bytes]) -> bytes:
    return root_from_leaf_hashes(hashes)


def inclusion_proof(hashes: Sequence[bytes], index: int) -> list[bytes]:
    """The audit path for leaf ``index`` in the tree over ``hashes`` (RFC 9162 2.1.3.1).

    Holds the whole list, unlike :class:`TreeBuilder`: meant for one seal's records.
    """
    n = len(hashes)
    if not 0 <= index < n:
        raise ValueError(f"leaf index {index} is outside the tree of {n} leaves")
    path: list[bytes] = []
    lo, hi = 0, n
    # Walk down from the root; the sibling subtree of each step goes on the path, the
    # deepest first once reversed.
    while hi - lo > 1:
        k = _split(hi - lo)
        if index - lo < k:
            path.append(_subtree_root(hashes[lo + k : hi]))
            hi = lo + k
        else:
            path.append(_subtree_root(hashes[lo : lo + k]))
            lo = lo + k
    path.reverse()
    return path


def verify_inclusion(
    leaf: bytes, index: int, tree_size: int, path: Sequence[bytes], root: bytes
) -> bool:
    """Whether ``path`` proves leaf hash ``leaf`` at ``index`` in a tree of ``root``.

    The verification algorithm of RFC 9162 section 2.1.3.2.
    """
    if not 0 <= index < tree_size:
        return False
    fn, sn = index, tree_size - 1
    r = leaf
    for p in path:
        if sn == 0:
            return False
        if fn & 1 or fn == sn:
            r = node_hash(p, r)
            if not fn & 1:
                while fn & 1 == 0 and fn != 0:
                    fn >>= 1
                    sn >>= 1
        else:
            r = node_hash(r, p)
        fn >>= 1
        sn >>= 1
    return sn == 0 and r == root
