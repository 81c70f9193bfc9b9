"""vault.audit.merkle against published vectors and an independent RFC 9162 reference.

Outside sources:
- github.com/transparency-dev/merkle, testdata/ at commit
  417fb0c314750d94e53942e9f92e79b6d35915db (Apache-2.0), read from
  ../shared/vectors/merkle: inclusion and consistency proofs, happy paths and
  mutated proofs that must be rejected (`wantErr`).
- RFC 9162 section 2.1: the recursive reference below is transcribed from its
  definitions of MTH, PATH and PROOF/SUBPROOF and uses hashlib directly; it
  shares no code with vault.audit.merkle.
"""

from __future__ import annotations

import base64
import functools
import hashlib
import json
import random
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tests.conftest import SHARED_VECTORS, shared_vectors_dir
from vault.audit.merkle import (
    CompactRange,
    consistency_proof,
    inclusion_proof,
    root_from_leaf_hashes,
    verify_consistency,
    verify_inclusion,
)
from vault.crypto import merkle_leaf_hash
from vault.errors import IntegrityError, UsageError

# --------------------------------------------------------------------------- RFC 9162 reference


def ref_leaf(entry: bytes) -> bytes:
    return hashlib.sha256(b"\x00" + entry).digest()


def ref_node(left: bytes, right: bytes) -> bytes:
    return hashlib.sha256(b"\x01" + left + right).digest()


def ref_split(n: int) -> int:
    """The largest power of two smaller than n (n > 1), RFC 9162 section 2.1.1."""
    k = 1
    while k * 2 < n:
        k *= 2
    return k


def ref_mth_of(entries: list[bytes]) -> bytes:
    """MTH of a non-empty entry list, without the cache below."""
    if len(entries) == 1:
        return ref_leaf(entries[0])
    k = ref_split(len(entries))
    return ref_node(ref_mth_of(entries[:k]), ref_mth_of(entries[k:]))


# Entries of varied length, including the empty one (RFC 9162 allows it).
ENTRIES = [b"dish-%d/" % i * (i % 4) for i in range(2100)]
LEAVES = [ref_leaf(e) for e in ENTRIES]


@functools.cache
def ref_mth(lo: int, hi: int) -> bytes:
    """MTH(ENTRIES[lo:hi]), recursively as in RFC 9162 section 2.1.1."""
    n = hi - lo
    if n == 0:
        return hashlib.sha256(b"").digest()
    if n == 1:
        return ref_leaf(ENTRIES[lo])
    k = ref_split(n)
    return ref_node(ref_mth(lo, lo + k), ref_mth(lo + k, hi))


def ref_path(m: int, lo: int, hi: int) -> list[bytes]:
    """PATH(m, ENTRIES[lo:hi]), RFC 9162 section 2.1.3.1."""
    n = hi - lo
    if n == 1:
        return []
    k = ref_split(n)
    if m < k:
        return [*ref_path(m, lo, lo + k), ref_mth(lo + k, hi)]
    return [*ref_path(m - k, lo + k, hi), ref_mth(lo, lo + k)]


def ref_subproof(m: int, lo: int, hi: int, whole: bool) -> list[bytes]:
    """SUBPROOF(m, ENTRIES[lo:hi], b), RFC 9162 section 2.1.4.1."""
    n = hi - lo
    if m == n:
        return [] if whole else [ref_mth(lo, hi)]
    k = ref_split(n)
    if m <= k:
        return [*ref_subproof(m, lo, lo + k, whole), ref_mth(lo + k, hi)]
    return [*ref_subproof(m - k, lo + k, hi, False), ref_mth(lo, lo + k)]


def ref_proof(m: int, n: int) -> list[bytes]:
    return ref_subproof(m, 0, n, True)


def ref_inclusion_ok(leaf: bytes, m: int, n: int, proof: list[bytes], root: bytes) -> bool:
    """Verify by rebuilding the root along the PATH recursion (not the RFC's bit loop)."""

    def rebuild(m: int, n: int, path: list[bytes]) -> bytes | None:
        if n == 1:
            return leaf if not path else None
        if not path:
            return None
        k = ref_split(n)
        if m < k:
            left = rebuild(m, k, path[:-1])
            return None if left is None else ref_node(left, path[-1])
        right = rebuild(m - k, n - k, path[:-1])
        return None if right is None else ref_node(path[-1], right)

    if not (0 <= m < n) or any(len(p) != 32 for p in proof):
        return False
    return rebuild(m, n, list(proof)) == root


def ref_consistency_ok(m: int, n: int, old: bytes, new: bytes, proof: list[bytes]) -> bool:
    """Verify by rebuilding (old root, new root) along the SUBPROOF recursion."""

    def rebuild(m: int, n: int, path: list[bytes], whole: bool) -> tuple[bytes, bytes] | None:
        if m == n:
            if whole:
                return (old, old) if not path else None
            return (path[0], path[0]) if len(path) == 1 else None
        if not path:
            return None
        k = ref_split(n)
        if m <= k:
            inner = rebuild(m, k, path[:-1], whole)
            return None if inner is None else (inner[0], ref_node(inner[1], path[-1]))
        inner = rebuild(m - k, n - k, path[:-1], False)
        if inner is None:
            return None
        return ref_node(path[-1], inner[0]), ref_node(path[-1], inner[1])

    if not (0 < m <= n) or any(len(p) != 32 for p in proof):
        return False
    return rebuild(m, n, list(proof), True) == (old, new)


# --------------------------------------------------------------------------- helpers


def flip(value: bytes, bit: int) -> bytes:
    out = bytearray(value)
    out[bit // 8 % len(out)] ^= 1 << (bit % 8)
    return bytes(out)


DENSE = 100  # below this size every index / old size is compared


def sampled_indices(n: int, rng: random.Random) -> list[int]:
    """Every index for small trees; edges, split points and a few random ones above."""
    if n <= DENSE:
        return list(range(n))
    k = ref_split(n)
    picks = {0, 1, k - 1, k, n // 2, n - 2, n - 1, *rng.sample(range(n), 4)}
    return sorted(picks)


def sampled_old_sizes(n: int, rng: random.Random) -> list[int]:
    if n <= DENSE:
        return list(range(1, n + 1))
    k = ref_split(n)
    powers = [1 << i for i in range(n.bit_length()) if 1 << i <= n]
    picks = {1, 2, 3, k - 1, k, k + 1, n - 1, n, *powers, *rng.sample(range(1, n + 1), 4)}
    return sorted(picks)


def few(values: list[int], rng: random.Random) -> list[int]:
    """Both ends and a few random picks, for the costlier tamper tests."""
    return sorted({*values[:2], *values[-2:], *rng.sample(values, min(4, len(values)))})


SIZES = range(1, 301)


# --------------------------------------------------------------------------- published vectors
# github.com/transparency-dev/merkle testdata/, commit 417fb0c314750d94e53942e9f92e79b6d35915db


def vector_names(kind: str) -> list[str]:
    base = SHARED_VECTORS / "merkle" / kind
    names = sorted(str(p.relative_to(base)) for p in base.rglob("*.json")) if base.is_dir() else []
    return names or ["(vectors absent)"]


def load_vector(kind: str, name: str) -> dict[str, object]:
    path: Path = shared_vectors_dir("merkle", kind) / name
    return json.loads(path.read_text(encoding="utf-8"))


def b64(value: object) -> bytes:
    assert isinstance(value, str)
    return base64.b64decode(value, validate=True)


def b64_list(value: object) -> list[bytes]:
    assert value is None or isinstance(value, list)
    return [b64(p) for p in value or []]  # JSON null is the empty proof


# The entries behind the vectors' 8-leaf tree, recalled from memory (the leaf
# inputs of the upstream Merkle tests); test_vector_leaves_from_memory checks
# them against every happy-path root in the vectors.
VECTOR_ENTRIES = [
    b"", b"\x00", b"\x10", b"\x20\x21", b"\x30\x31", b"\x40\x41\x42\x43",
    bytes(range(0x50, 0x58)), bytes(range(0x60, 0x70)),
]
VECTOR_LEAVES = [ref_leaf(e) for e in VECTOR_ENTRIES]

# Deliberate deviation: this happy path has 12-byte "roots"; vault.audit.merkle
# refuses any root that is not a 32-byte SHA-256 value. The case's intent
# (equal sizes, equal roots, empty proof) is checked with real roots below.
STRICTER_THAN_VECTORS = {"additional/sizes-are-equal-one-and-proof-is-empty.json"}


@pytest.mark.vectors
def test_vector_folders_are_complete() -> None:
    # 98 + 98 files at the pinned commit; a silently emptied folder must fail.
    assert len(list(shared_vectors_dir("merkle", "inclusion").rglob("*.json"))) == 98
    assert len(list(shared_vectors_dir("merkle", "consistency").rglob("*.json"))) == 98


@pytest.mark.vectors
def test_vector_leaves_from_memory() -> None:
    roots = {}
    for kind in ("inclusion", "consistency"):
        for name in vector_names(kind):
            if name.endswith("happy-path.json") and "/" in name:
                v = load_vector(kind, name)
                for size, root in (("treeSize", "root"), ("size1", "root1"), ("size2", "root2")):
                    if size in v:
                        roots[v[size]] = b64(v[root])
    assert set(roots) == {1, 2, 3, 5, 6, 7, 8}
    for size, root in roots.items():
        assert root_from_leaf_hashes(VECTOR_LEAVES[:size]) == root
        assert ref_mth_of(VECTOR_ENTRIES[:size]) == root


@pytest.mark.vectors
@pytest.mark.parametrize("name", vector_names("inclusion"))
def test_inclusion_vector(name: str) -> None:
    v = load_vector("inclusion", name)
    leaf, root, proof = b64(v["leafHash"]), b64(v["root"]), b64_list(v["proof"])
    ok = verify_inclusion(leaf, v["leafIdx"], v["treeSize"], proof, root)
    assert ok is (not v["wantErr"])
    if ok and len(VECTOR_LEAVES) >= v["treeSize"] > 1:
        # happy paths over the known leaves: we generate the very same proof
        assert VECTOR_LEAVES[v["leafIdx"]] == leaf
        assert inclusion_proof(VECTOR_LEAVES, v["leafIdx"], tree_size=v["treeSize"]) == proof


@pytest.mark.vectors
@pytest.mark.parametrize("name", vector_names("consistency"))
def test_consistency_vector(name: str) -> None:
    v = load_vector("consistency", name)
    old, new, proof = b64(v["root1"]), b64(v["root2"]), b64_list(v["proof"])
    ok = verify_consistency(v["size1"], v["size2"], old, new, proof)
    if name in STRICTER_THAN_VECTORS:
        assert not v["wantErr"] and len(old) != 32 and not ok
        real = VECTOR_LEAVES[0]
        assert verify_consistency(v["size1"], v["size2"], real, real, proof)
        assert not verify_consistency(v["size1"], v["size2"], real, flip(real, 0), proof)
        return
    assert ok is (not v["wantErr"])
    if ok and v["size2"] <= len(VECTOR_LEAVES):
        assert consistency_proof(VECTOR_LEAVES, v["size1"], v["size2"]) == proof


# --------------------------------------------------------------------------- roots


def test_leaf_hash_matches_reference() -> None:
    assert [merkle_leaf_hash(e) for e in ENTRIES[:50]] == LEAVES[:50]


def test_empty_tree_root() -> None:
    # RFC 9162 section 2.1.1: MTH({}) = SHA-256()
    assert root_from_leaf_hashes([]) == hashlib.sha256(b"").digest()
    assert CompactRange().root() == hashlib.sha256(b"").digest()


def test_roots_match_reference_for_every_size_up_to_300() -> None:
    frontier = CompactRange()
    for n in SIZES:
        frontier.append(LEAVES[n - 1])
        assert root_from_leaf_hashes(LEAVES[:n]) == ref_mth(0, n), n
        assert frontier.root() == ref_mth(0, n), n
        assert frontier.size == n


@pytest.mark.parametrize("n", [255, 256, 257, 511, 512, 513, 767, 1000, 1024, 1025, 2047, 2100])
def test_roots_across_block_boundaries(n: int) -> None:
    assert root_from_leaf_hashes(LEAVES[:n]) == ref_mth(0, n)
    assert root_from_leaf_hashes(tuple(LEAVES[:n])) == ref_mth(0, n)


def test_root_depends_on_order_and_count() -> None:
    leaves = LEAVES[:10]
    assert root_from_leaf_hashes(leaves) != root_from_leaf_hashes(leaves[::-1])
    assert root_from_leaf_hashes(leaves) != root_from_leaf_hashes(leaves[:9])
    # a lone leaf is its own root, never re-hashed (RFC 9162 section 2.1.1)
    assert root_from_leaf_hashes(leaves[:1]) == leaves[0]


@pytest.mark.parametrize("bad", [b"", b"\x00" * 31, b"\x00" * 33, "0" * 32, None, bytearray(32)])
def test_malformed_leaf_hashes_are_refused(bad: object) -> None:
    with pytest.raises(UsageError):
        CompactRange().append(bad)  # type: ignore[arg-type]
    for n in (1, 300):  # per-leaf path and full-block path
        leaves: list[object] = list(LEAVES[:n])
        leaves[n // 2] = bad
        with pytest.raises(UsageError):
            root_from_leaf_hashes(leaves)  # type: ignore[arg-type]


# --------------------------------------------------------------------------- inclusion


@pytest.mark.parametrize("n", SIZES)
def test_inclusion_proofs_match_reference(n: int) -> None:
    rng = random.Random(n)
    root = ref_mth(0, n)
    for m in sampled_indices(n, rng):
        assert inclusion_proof(LEAVES, m, tree_size=n) == ref_path(m, 0, n), (n, m)
    assert inclusion_proof(LEAVES[:n], n - 1) == ref_path(n - 1, 0, n)
    # every index of every size: the reference's proof verifies
    for m in range(n):
        assert verify_inclusion(LEAVES[m], m, n, ref_path(m, 0, n), root), (n, m)


def inclusion_mutations(
    leaf: bytes, m: int, n: int, proof: list[bytes], root: bytes, rng: random.Random
) -> list[tuple[str, tuple[object, ...]]]:
    """(name, args) of tampered inclusion claims."""
    cases: list[tuple[str, tuple[object, ...]]] = []
    for i, p in enumerate(proof):
        bad = [*proof]
        bad[i] = flip(p, rng.randrange(256))
        cases.append((f"flip proof[{i}]", (leaf, m, n, bad, root)))
        cases.append((f"drop proof[{i}]", (leaf, m, n, proof[:i] + proof[i + 1 :], root)))
        cases.append((f"short proof[{i}]", (leaf, m, n, [*proof[:i], p[:31], *proof[i + 1 :]], root)))
    for i in range(len(proof) + 1):
        extra = [*proof[:i], rng.randbytes(32), *proof[i:]]
        cases.append((f"insert at {i}", (leaf, m, n, extra, root)))
    cases.append(("repeat last", (leaf, m, n, [*proof, *proof[-1:]] or [leaf], root)))
    cases.append(("flip leaf", (flip(leaf, rng.randrange(256)), m, n, proof, root)))
    cases.append(("flip root", (leaf, m, n, proof, flip(root, rng.randrange(256)))))
    if root != leaf:
        cases.append(("root as leaf", (root, m, n, proof, leaf)))
    for bad_m in {m ^ 1, m + 1, m - 1, n, n + 1, 2**64} - {m}:
        cases.append((f"index {bad_m}", (leaf, bad_m, n, proof, root)))
    return cases


@pytest.mark.parametrize("n", SIZES)
def test_tampered_inclusion_proofs_are_rejected(n: int) -> None:
    rng = random.Random(1000 + n)
    root = ref_mth(0, n)
    for m in few(sampled_indices(n, rng), rng):
        proof = ref_path(m, 0, n)
        for what, args in inclusion_mutations(LEAVES[m], m, n, proof, root, rng):
            assert verify_inclusion(*args) is False, (n, m, what)  # type: ignore[arg-type]
            if what.startswith(("flip", "insert", "drop")):
                assert ref_inclusion_ok(*args) is False  # type: ignore[arg-type]
        # A proof does not bind the tree size on its own (a signed tree head
        # does; common practice, no source): a wrong size may pass only where
        # the reference's own recursion says the same proof fits that size.
        for bad_n in {n - 1, n + 1, 2 * n, n // 2, m + 1} - {n}:
            expected = ref_inclusion_ok(LEAVES[m], m, bad_n, proof, root)
            assert verify_inclusion(LEAVES[m], m, bad_n, proof, root) is expected, (n, m, bad_n)


def test_wrong_tree_sizes_agree_with_reference_and_mostly_fail() -> None:
    # every (n, m, wrong size) for n <= 32 and sizes up to 64; a verifier that
    # ignored tree_size would accept them all (about 85% must be rejected)
    total = rejected = 0
    for n in range(1, 33):
        root = ref_mth(0, n)
        for m in range(n):
            proof = ref_path(m, 0, n)
            for bad_n in range(1, 65):
                if bad_n != n:
                    got = verify_inclusion(LEAVES[m], m, bad_n, proof, root)
                    assert got is ref_inclusion_ok(LEAVES[m], m, bad_n, proof, root)
                    total += 1
                    rejected += not got
    assert rejected > 0.8 * total
    # the last leaf of a full tree moves deeper when one leaf is added
    assert not verify_inclusion(LEAVES[7], 7, 9, ref_path(7, 0, 8), ref_mth(0, 8))


@pytest.mark.parametrize(
    "args",
    [
        (None, 0, 1, [], b"\x00" * 32),
        (b"\x00" * 32, 0, 1, None, b"\x00" * 32),
        (b"\x00" * 32, 0, 1, b"\x00" * 32, b"\x00" * 32),
        (b"\x00" * 32, 0, 1, [b"\x00" * 32, 5], b"\x00" * 32),
        (b"\x00" * 32, -1, 1, [], b"\x00" * 32),
        (b"\x00" * 32, 0, 0, [], b"\x00" * 32),
        (b"\x00" * 32, 0.0, 1, [], b"\x00" * 32),
        (b"\x00" * 32, True, 2, [b"\x00" * 32], b"\x00" * 32),
        (b"\x00" * 32, 0, 2**64, [], b"\x00" * 32),
        ("0" * 32, 0, 1, [], "0" * 32),
        (bytearray(32), 0, 1, [], bytearray(32)),
    ],
)
def test_verify_inclusion_never_raises_on_garbage(args: tuple[object, ...]) -> None:
    assert verify_inclusion(*args) is False  # type: ignore[arg-type]


def test_inclusion_proof_refuses_bad_arguments() -> None:
    for index in (-1, 5):
        with pytest.raises(UsageError):
            inclusion_proof(LEAVES[:5], index)
    with pytest.raises(UsageError):
        inclusion_proof(LEAVES[:5], 0, tree_size=6)
    with pytest.raises(UsageError):
        inclusion_proof([], 0)


# --------------------------------------------------------------------------- consistency


@pytest.mark.parametrize("n", SIZES)
def test_consistency_proofs_match_reference(n: int) -> None:
    rng = random.Random(2000 + n)
    for m in sampled_old_sizes(n, rng):
        assert consistency_proof(LEAVES, m, n) == ref_proof(m, n), (m, n)
    assert consistency_proof(LEAVES[:n], 1) == ref_proof(1, n)
    # every (m, n) pair: the reference's proof verifies
    new = ref_mth(0, n)
    for m in range(1, n + 1):
        assert verify_consistency(m, n, ref_mth(0, m), new, ref_proof(m, n)), (m, n)


@pytest.mark.parametrize("n", SIZES)
def test_tampered_consistency_proofs_are_rejected(n: int) -> None:
    rng = random.Random(3000 + n)
    new = ref_mth(0, n)
    for m in few(sampled_old_sizes(n, rng), rng):
        old, proof = ref_mth(0, m), ref_proof(m, n)
        cases: list[tuple[str, tuple[object, ...]]] = []
        for i, p in enumerate(proof):
            bad = [*proof]
            bad[i] = flip(p, rng.randrange(256))
            cases.append((f"flip proof[{i}]", (m, n, old, new, bad)))
            cases.append((f"drop proof[{i}]", (m, n, old, new, proof[:i] + proof[i + 1 :])))
            cases.append((f"long proof[{i}]", (m, n, old, new, [*proof[:i], p + b"\x00"])))
        for i in range(len(proof) + 1):
            cases.append((f"insert at {i}", (m, n, old, new, [*proof[:i], old, *proof[i:]])))
        cases.append(("flip old root", (m, n, flip(old, rng.randrange(256)), new, proof)))
        cases.append(("flip new root", (m, n, old, flip(new, rng.randrange(256)), proof)))
        if old != new:
            cases.append(("swapped roots", (m, n, new, old, proof)))
            cases.append(("swapped sizes", (n, m, new, old, proof)))
        cases.append(("old size 0", (0, n, hashlib.sha256(b"").digest(), new, proof)))
        for what, args in cases:
            assert verify_consistency(*args) is False, (m, n, what)  # type: ignore[arg-type]
            assert ref_consistency_ok(*args) is False, (m, n, what)  # type: ignore[arg-type]
        # Wrong sizes: the reference recursion decides whether the proof fits them.
        for bad_m, bad_n in {(m - 1, n), (m + 1, n), (m, n + 1), (m, n - 1), (m, 2 * n)}:
            if (bad_m, bad_n) != (m, n):
                expected = ref_consistency_ok(bad_m, bad_n, old, new, proof)
                got = verify_consistency(bad_m, bad_n, old, new, proof)
                assert got is expected, (m, n, bad_m, bad_n)


def test_equal_sizes_need_equal_roots_and_no_proof() -> None:
    root = ref_mth(0, 5)
    assert verify_consistency(5, 5, root, root, [])
    assert not verify_consistency(5, 5, root, ref_mth(0, 4), [])
    assert not verify_consistency(5, 5, root, root, [root])
    assert consistency_proof(LEAVES[:5], 5) == []


@pytest.mark.parametrize(
    "args",
    [
        (1, 2, b"\x00" * 32, b"\x00" * 32, None),
        (1, 2, b"\x00" * 32, b"\x00" * 32, [None]),
        (1, 2, None, b"\x00" * 32, [b"\x00" * 32]),
        (1, 2, b"\x00" * 32, b"\x00" * 31, [b"\x00" * 32]),
        (1, "2", b"\x00" * 32, b"\x00" * 32, [b"\x00" * 32]),
        (-1, 2, b"\x00" * 32, b"\x00" * 32, [b"\x00" * 32]),
        (0, 0, hashlib.sha256(b"").digest(), hashlib.sha256(b"").digest(), []),
        (1, 2**64, b"\x00" * 32, b"\x00" * 32, [b"\x00" * 32] * 64),
        (3, 2**63, b"\x00" * 32, b"\x00" * 32, [b"\x00" * 32] * 200),
    ],
)
def test_verify_consistency_never_raises_on_garbage(args: tuple[object, ...]) -> None:
    assert verify_consistency(*args) is False  # type: ignore[arg-type]


def test_consistency_proof_refuses_bad_arguments() -> None:
    for old, new in ((0, 5), (6, 5), (-1, 5), (1, 6)):
        with pytest.raises(UsageError):
            consistency_proof(LEAVES[:5], old, new)


# --------------------------------------------------------------------------- CompactRange


def seeded_leaves(seed: int, n: int) -> list[bytes]:
    return [hashlib.sha256(b"%d/%d" % (seed, i)).digest() for i in range(n)]


@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 2**32), n=st.integers(0, 70))
def test_root_after_each_append_matches_prefix_root(seed: int, n: int) -> None:
    leaves = seeded_leaves(seed, n)
    frontier = CompactRange()
    for i, leaf in enumerate(leaves):
        frontier.append(leaf)
        assert frontier.size == i + 1
        assert frontier.root() == root_from_leaf_hashes(leaves[: i + 1])
        # one hash per set bit of the size (O(log n) state)
        assert len(frontier.hashes) == (i + 1).bit_count()


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 2**32),
    cuts=st.lists(st.integers(0, 900), min_size=1, max_size=5),
)
def test_extend_in_pieces_equals_appending_one_by_one(seed: int, cuts: list[int]) -> None:
    bounds = sorted(set(cuts))
    leaves = seeded_leaves(seed, bounds[-1])
    pieces = CompactRange()
    start = 0
    for stop in bounds:
        pieces.extend(leaves, start, stop)
        start = stop
    single = CompactRange()
    for leaf in leaves:
        single.append(leaf)
    assert pieces == single
    assert pieces.root() == single.root() == root_from_leaf_hashes(leaves)


@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 2**32), n=st.integers(0, 600), more=st.integers(0, 40))
def test_serialisation_round_trip(seed: int, n: int, more: int) -> None:
    leaves = seeded_leaves(seed, n + more)
    frontier = CompactRange()
    frontier.extend(leaves, 0, n)
    data = frontier.to_bytes()
    assert len(data) == 9 + 32 * n.bit_count()
    restored = CompactRange.from_bytes(data)
    assert restored == frontier
    assert restored.size == n and restored.root() == frontier.root()
    assert CompactRange.from_bytes(bytearray(data)) == frontier
    # a restored frontier keeps growing exactly like the original; a copy grows on its own
    twin = frontier.copy()
    restored.extend(leaves, n, n + more)
    assert restored.root() == root_from_leaf_hashes(leaves)
    assert twin == frontier and twin.size == n
    twin.extend(leaves, n, n + more)
    assert twin == restored and frontier.size == n


@settings(max_examples=100, deadline=None)
@given(
    seed=st.integers(0, 2**32),
    n=st.integers(0, 300),
    cut=st.integers(1, 200),
    extra=st.binary(min_size=1, max_size=64),
    version=st.integers(0, 255).filter(lambda v: v != 1),
    new_size=st.integers(0, 2**64 - 1),
)
def test_from_bytes_rejects_malformed_input(
    seed: int, n: int, cut: int, extra: bytes, version: int, new_size: int
) -> None:
    frontier = CompactRange()
    frontier.extend(seeded_leaves(seed, n))
    data = frontier.to_bytes()
    with pytest.raises(IntegrityError):
        CompactRange.from_bytes(data[: max(0, len(data) - cut)])
    with pytest.raises(IntegrityError):
        CompactRange.from_bytes(data + extra)
    with pytest.raises(IntegrityError):
        CompactRange.from_bytes(bytes([version]) + data[1:])
    resized = data[:1] + new_size.to_bytes(8, "big") + data[9:]
    if new_size.bit_count() != n.bit_count():
        with pytest.raises(IntegrityError):
            CompactRange.from_bytes(resized)


@pytest.mark.parametrize("bad", [None, "", "\x01" + "\x00" * 8, 12345, [1] * 9])
def test_from_bytes_rejects_non_bytes(bad: object) -> None:
    with pytest.raises(IntegrityError):
        CompactRange.from_bytes(bad)  # type: ignore[arg-type]
