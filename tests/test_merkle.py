"""Merkle tree heads against the published test vectors and an independent recursion."""

from __future__ import annotations

import hashlib
import random

import pytest

from service.log.merkle import (
    EMPTY_ROOT,
    TreeBuilder,
    aligned_blocks,
    consistency_path,
    inclusion_path,
    inclusion_proof,
    leaf_hash,
    root_from_leaf_hashes,
    root_from_leaves,
    roots_of,
    verify_consistency,
    verify_inclusion,
)

# Leaves and tree heads from the reference test suite of the Certificate Transparency project
# (certificate-transparency, python/ct/crypto/merkle_test.py), which implements the tree head
# MTH of RFC 6962 section 2.1 (Laurie, Langley & Kasper, 2013; unchanged in RFC 9162,
# section 2.1). MTH of the first n leaves, n = 0..8.
CT_LEAVES = [
    "",
    "00",
    "10",
    "2021",
    "3031",
    "40414243",
    "5051525354555657",
    "606162636465666768696a6b6c6d6e6f",
]
CT_ROOTS = [
    "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855",
    "6e340b9cffb37a989ca544e6bb780a2c78901d3fb33738768511a30617afa01d",
    "fac54203e7cc696cf0dfcb42c92a1d9dbaf70ad9e621f4bd8d98662f00e3c125",
    "aeb6bcfe274b70a14fb067a5e5578264db0fa9b51af5e0ba159158f329e06e77",
    "d37ee418976dd95753c1c73862b9398fa2a2cf9b4ff0fdfe8b30cd95209614b7",
    "4e3bbb1f7b478dcfe71fb631631519a3bca12c9aefca1612bfce4c13a86264d4",
    "76e67dadbcdf1e10e1b74ddc608abd2f98dfb16fbce75277b5232a127f2087ef",
    "ddb89be403809e325750d3d263cd78929c2942b7942a34b77e122c9594a74c8c",
    "5dc9da79a70659a9ad559cb701ded9a2ab9d823aad2f4960cfe370eff4604328",
]


def _reference_mth(leaves: list[bytes]) -> bytes:
    """RFC 6962 section 2.1 written out literally: recursion on the leaf data."""
    n = len(leaves)
    if n == 0:
        return hashlib.sha256(b"").digest()
    if n == 1:
        return hashlib.sha256(b"\x00" + leaves[0]).digest()
    k = 1
    while k * 2 < n:
        k *= 2
    return hashlib.sha256(
        b"\x01" + _reference_mth(leaves[:k]) + _reference_mth(leaves[k:])
    ).digest()


@pytest.mark.parametrize("n", range(len(CT_ROOTS)))
def test_certificate_transparency_vectors(n: int) -> None:
    leaves = [bytes.fromhex(x) for x in CT_LEAVES[:n]]
    assert root_from_leaves(leaves).hex() == CT_ROOTS[n]


def test_empty_tree_is_hash_of_empty_string() -> None:
    # RFC 6962 section 2.1: MTH({}) = SHA-256().
    assert EMPTY_ROOT.hex() == CT_ROOTS[0]
    assert root_from_leaf_hashes([]) == EMPTY_ROOT


def test_leaf_and_node_prefixes_differ() -> None:
    # A leaf holding the bytes of two child hashes must not hash like their parent node.
    a, b = leaf_hash(b"a"), leaf_hash(b"b")
    assert leaf_hash(a + b) != root_from_leaf_hashes([a, b])


def test_streaming_root_equals_recursive_definition_on_random_trees() -> None:
    rng = random.Random(4242)
    sizes = [*range(1, 70), 127, 128, 129, 255, 256, 257, 1000, 1023, 1024, 1025]
    for n in sizes:
        leaves = [rng.randbytes(rng.randrange(0, 40)) for _ in range(n)]
        assert root_from_leaves(leaves) == _reference_mth(leaves), n


def test_builder_gives_every_prefix_root() -> None:
    rng = random.Random(7)
    leaves = [rng.randbytes(16) for _ in range(100)]
    builder = TreeBuilder()
    for i, d in enumerate(leaves):
        builder.add_leaf_hash(leaf_hash(d))
        assert builder.count == i + 1
        assert builder.root() == _reference_mth(leaves[: i + 1])


def test_any_change_of_leaves_changes_the_root() -> None:
    rng = random.Random(11)
    leaves = [rng.randbytes(8) for _ in range(37)]
    root = root_from_leaves(leaves)
    swapped = list(leaves)
    swapped[3], swapped[4] = swapped[4], swapped[3]
    edited = list(leaves)
    edited[20] = edited[20][:-1] + bytes([edited[20][-1] ^ 1])
    assert root_from_leaves(swapped) != root
    assert root_from_leaves(edited) != root
    assert root_from_leaves(leaves[:-1]) != root
    assert root_from_leaves([*leaves, b""]) != root
    assert root_from_leaves(leaves[:10] + leaves[11:]) != root


def test_rejects_hash_of_wrong_length() -> None:
    with pytest.raises(ValueError, match="32 bytes"):
        TreeBuilder().add_leaf_hash(b"short")


def _reference_path(leaves: list[bytes], m: int) -> list[bytes]:
    """PATH(m, D[n]) of RFC 6962 section 2.1.1, written out literally."""
    n = len(leaves)
    if n == 1:
        return []
    k = 1
    while k * 2 < n:
        k *= 2
    if m < k:
        return [*_reference_path(leaves[:k], m), _reference_mth(leaves[k:])]
    return [*_reference_path(leaves[k:], m - k), _reference_mth(leaves[:k])]


def test_inclusion_proofs_match_definition_and_verify() -> None:
    rng = random.Random(99)
    for n in [1, 2, 3, 5, 7, 8, 9, 16, 31, 33]:
        leaves = [rng.randbytes(12) for _ in range(n)]
        hashes = [leaf_hash(d) for d in leaves]
        root = _reference_mth(leaves)
        for m in range(n):
            path = inclusion_proof(hashes, m)
            assert path == _reference_path(leaves, m)
            assert verify_inclusion(hashes[m], m, n, path, root)
            # The same path must not prove another leaf, another place, or another root.
            other = leaf_hash(b"not in the tree")
            assert not verify_inclusion(other, m, n, path, root)
            if n > 1:
                assert not verify_inclusion(hashes[m], (m + 1) % n, n, path, root)
            assert not verify_inclusion(hashes[m], m, n, path, leaf_hash(b"other root"))


def test_inclusion_proof_rejects_index_outside_tree() -> None:
    with pytest.raises(ValueError, match="outside"):
        inclusion_proof([leaf_hash(b"x")], 1)
    assert not verify_inclusion(leaf_hash(b"x"), 1, 1, [], leaf_hash(b"x"))


# --- proofs and ranges, against RFC 9162's definitions written out literally -------------


def _ref_path(m: int, leaves: list[bytes]) -> list[bytes]:
    """RFC 9162 section 2.1.3.1, PATH(m, D[n]), on leaf hashes."""
    n = len(leaves)
    if n == 1:
        return []
    k = 1
    while k * 2 < n:
        k *= 2
    if m < k:
        return [*_ref_path(m, leaves[:k]), root_from_leaf_hashes(leaves[k:])]
    return [*_ref_path(m - k, leaves[k:]), root_from_leaf_hashes(leaves[:k])]


def _ref_subproof(m: int, leaves: list[bytes], b: bool) -> list[bytes]:
    """RFC 9162 section 2.1.4.1, SUBPROOF(m, D[n], b), on leaf hashes."""
    n = len(leaves)
    if m == n:
        return [] if b else [root_from_leaf_hashes(leaves)]
    k = 1
    while k * 2 < n:
        k *= 2
    if m <= k:
        return [*_ref_subproof(m, leaves[:k], b), root_from_leaf_hashes(leaves[k:])]
    return [*_ref_subproof(m - k, leaves[k:], False), root_from_leaf_hashes(leaves[:k])]


def _leaves(n: int) -> list[bytes]:
    return [leaf_hash(f"record {i}".encode()) for i in range(n)]


@pytest.mark.parametrize("n", [1, 2, 3, 4, 5, 7, 8, 9, 16, 17, 33])
def test_inclusion_paths_follow_the_rfc_and_verify(n: int) -> None:
    leaves = _leaves(n)
    root = root_from_leaf_hashes(leaves)
    for m in range(n):
        path = inclusion_path(n, m, roots_of(leaves))
        assert path == _ref_path(m, leaves)
        assert verify_inclusion(leaves[m], m, n, path, root)
        assert not verify_inclusion(leaves[(m + 1) % n], m, n, path, root) or n == 1
        if path:
            bad = [path[0][:-1] + bytes([path[0][-1] ^ 1]), *path[1:]]
            assert not verify_inclusion(leaves[m], m, n, bad, root)


@pytest.mark.parametrize("n", [1, 2, 3, 5, 8, 9, 12, 16, 21, 32, 33])
def test_consistency_proofs_follow_the_rfc_and_verify(n: int) -> None:
    leaves = _leaves(n)
    second = root_from_leaf_hashes(leaves)
    for m in range(1, n + 1):
        first = root_from_leaf_hashes(leaves[:m])
        proof = consistency_path(m, n, roots_of(leaves))
        assert proof == _ref_subproof(m, leaves, True)
        assert verify_consistency(m, n, proof, first, second)
        # A tree that is not a prefix of the second cannot be proven consistent with it.
        other = root_from_leaf_hashes([leaf_hash(b"forged"), *leaves[1:m]])
        assert not verify_consistency(m, n, proof, other, second)
        if proof:
            assert not verify_consistency(m, n, proof[:-1], first, second)


def test_a_resumed_builder_with_aligned_blocks_gives_the_whole_tree() -> None:
    rng = random.Random(7)
    for _ in range(200):
        n = rng.randint(1, 300)
        a = rng.randint(0, n)
        b = rng.randint(a, n)
        leaves = _leaves(n)
        head = TreeBuilder()
        head.add_leaf_hashes(leaves[:a])
        resumed = TreeBuilder.resume(head.frontier())
        resumed.add_leaf_hashes(leaves[a:b])
        for start, size in aligned_blocks(b, n):
            assert start % size == 0 and size & (size - 1) == 0
            resumed.add_subtree(size, root_from_leaf_hashes(leaves[start : start + size]))
        assert resumed.count == n
        assert resumed.root() == root_from_leaf_hashes(leaves)


def test_misplaced_subtrees_and_bad_frontiers_are_refused() -> None:
    builder = TreeBuilder()
    builder.add_leaf_hash(leaf_hash(b"x"))
    with pytest.raises(ValueError):
        builder.add_subtree(2, leaf_hash(b"y"))  # a 2-leaf subtree cannot start at leaf 1
    with pytest.raises(ValueError):
        TreeBuilder.resume([(1, leaf_hash(b"a")), (2, leaf_hash(b"b"))])  # increasing sizes
    with pytest.raises(ValueError):
        TreeBuilder.resume([(3, leaf_hash(b"a"))])  # not a power of two
