"""Merkle tree hashing of RFC 9162 section 2.1 (the same as RFC 6962 section 2.1).

The tree head over n leaves: MTH({}) = SHA-256(""), MTH({d}) = SHA-256(0x00 || d), and for
n > 1, with k the largest power of two strictly below n,
MTH(D[n]) = SHA-256(0x01 || MTH(D[0:k]) || MTH(D[k:n])).
The 0x00 / 0x01 prefixes keep a leaf from ever passing for an interior node.

:class:`TreeBuilder` computes the same root in one pass over the leaf hashes, keeping only
O(log n) hashes (the *frontier*: the roots of the perfect subtrees the leaves so far decompose
into). A frontier can be stored and resumed, and whole aligned perfect subtrees can be added
at once, so a tree head over a range of a long log is computed from the frontier before the
range, the range's leaves and the subtrees after it. Inclusion proofs (RFC 9162 2.1.3) and
consistency proofs (2.1.4) are computed from a function that gives the root of any leaf range,
so a caller can serve them from stored subtree hashes. Standard library only, no I/O.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Iterable, Sequence

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

    @classmethod
    def resume(cls, frontier: Sequence[tuple[int, bytes]]) -> TreeBuilder:
        """A builder that continues after the leaves ``frontier`` stands for: the roots of
        the perfect subtrees, largest first, whose sizes are distinct powers of two."""
        builder = cls()
        sizes = [size for size, _ in frontier]
        if any(s <= 0 or s & (s - 1) for s in sizes) or sizes != sorted(sizes, reverse=True):
            raise ValueError("a frontier is perfect subtrees of decreasing power-of-two sizes")
        if len(set(sizes)) != len(sizes):
            raise ValueError("a frontier has at most one subtree of each size")
        for _size, h in frontier:
            if len(h) != 32:
                raise ValueError(f"a subtree hash has 32 bytes, got {len(h)}")
        builder._stack = list(frontier)
        builder._count = sum(sizes)
        return builder

    @property
    def count(self) -> int:
        return self._count

    def frontier(self) -> list[tuple[int, bytes]]:
        """The roots of the perfect subtrees of the leaves so far, largest first."""
        return list(self._stack)

    def add_leaf_hash(self, h: bytes) -> None:
        self.add_subtree(1, h)

    def add_subtree(self, size: int, h: bytes) -> None:
        """Add a perfect subtree of ``size`` leaves (a power of two) with root ``h``; it must
        start at a multiple of its size, as in the tree of the whole log."""
        if len(h) != 32:
            raise ValueError(f"a leaf or subtree hash has 32 bytes, got {len(h)}")
        if size <= 0 or size & (size - 1) or self._count % size:
            raise ValueError(f"a subtree of {size} leaves cannot start at leaf {self._count}")
        if self._stack and self._stack[-1][0] < size:
            raise ValueError("a subtree cannot follow a smaller one")
        added, node = size, h
        # Merge equal-sized neighbours: two perfect trees of 2^j leaves make one of 2^(j+1).
        while self._stack and self._stack[-1][0] == size:
            left_size, left = self._stack.pop()
            size, node = left_size + size, node_hash(left, node)
        self._stack.append((size, node))
        self._count += added

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


RangeRoot = Callable[[int, int], bytes]
"""``(lo, hi) -> MTH(D[lo:hi])`` for ``0 <= lo < hi <= n``."""


def roots_of(hashes: Sequence[bytes]) -> RangeRoot:
    """A :data:`RangeRoot` over a list of leaf hashes held in memory."""
    return lambda lo, hi: root_from_leaf_hashes(hashes[lo:hi])


def inclusion_path(tree_size: int, index: int, root_of: RangeRoot) -> list[bytes]:
    """The audit path for leaf ``index`` in the tree of ``tree_size`` leaves, deepest sibling
    first (RFC 9162 section 2.1.3.1, PATH(m, D[n]))."""
    if not 0 <= index < tree_size:
        raise ValueError(f"leaf index {index} is outside the tree of {tree_size} leaves")
    path: list[bytes] = []
    lo, hi = 0, tree_size
    # Walk down from the root; the sibling subtree of each step goes on the path, the
    # deepest first once reversed.
    while hi - lo > 1:
        k = _split(hi - lo)
        if index - lo < k:
            path.append(root_of(lo + k, hi))
            hi = lo + k
        else:
            path.append(root_of(lo, lo + k))
            lo = lo + k
    path.reverse()
    return path


def inclusion_proof(hashes: Sequence[bytes], index: int) -> list[bytes]:
    """The audit path for leaf ``index`` in the tree over ``hashes`` (held in memory)."""
    return inclusion_path(len(hashes), index, roots_of(hashes))


def consistency_path(first: int, second: int, root_of: RangeRoot) -> list[bytes]:
    """The proof that the tree of ``first`` leaves is a prefix of the tree of ``second``
    (RFC 9162 section 2.1.4.1, PROOF(m, D[n]) via SUBPROOF)."""
    if not 0 < first <= second:
        raise ValueError(f"need 0 < first <= second, got {first} and {second}")

    def subproof(m: int, lo: int, hi: int, complete: bool) -> list[bytes]:
        n = hi - lo
        if m == n:
            return [] if complete else [root_of(lo, hi)]
        k = _split(n)
        if m <= k:
            return [*subproof(m, lo, lo + k, complete), root_of(lo + k, hi)]
        return [*subproof(m - k, lo + k, hi, False), root_of(lo, lo + k)]

    return subproof(first, 0, second, True)


def verify_consistency(
    first: int, second: int, proof: Sequence[bytes], first_root: bytes, second_root: bytes
) -> bool:
    """Whether ``proof`` shows the tree of ``first`` leaves (``first_root``) is a prefix of the
    tree of ``second`` leaves (``second_root``): RFC 9162 section 2.1.4.2."""
    if not 0 < first <= second:
        return False
    if first == second:
        return len(proof) == 0 and first_root == second_root
    path = list(proof)
    if first & (first - 1) == 0:  # a power of two: the first root is the first subtree
        path.insert(0, first_root)
    if not path:
        return False
    fn, sn = first - 1, second - 1
    while fn & 1:
        fn >>= 1
        sn >>= 1
    fr = sr = path[0]
    for c in path[1:]:
        if sn == 0:
            return False
        if fn & 1 or fn == sn:
            fr = node_hash(c, fr)
            sr = node_hash(c, sr)
            while fn & 1 == 0 and fn != 0:
                fn >>= 1
                sn >>= 1
        else:
            sr = node_hash(sr, c)
        fn >>= 1
        sn >>= 1
    return sn == 0 and fr == first_root and sr == second_root


def aligned_blocks(lo: int, hi: int) -> list[tuple[int, int]]:
    """``[lo, hi)`` as the perfect aligned subtrees a :class:`TreeBuilder` that has seen
    ``lo`` leaves can take whole: greedy blocks of power-of-two sizes, each starting at a
    multiple of its size, as ``(start, size)``."""
    if not 0 <= lo <= hi:
        raise ValueError(f"need 0 <= lo <= hi, got {lo} and {hi}")
    blocks = []
    at = lo
    while at < hi:
        size = at & -at if at else 1 << (hi.bit_length() - 1)
        while at + size > hi:
            size >>= 1
        blocks.append((at, size))
        at += size
    return blocks


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
