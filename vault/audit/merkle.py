"""Merkle tree algorithms of RFC 9162 (Certificate Transparency v2), section 2.1.

Everything here works on leaf hashes (32-byte `merkle_leaf_hash` outputs), so
the audit log can keep them in SQLite and never re-read entry bodies.

- `root_from_leaf_hashes`: MTH (section 2.1.1), iterative, n - 1 node hashes.
- `CompactRange`: the tree's right frontier (one subtree hash per set bit of
  the size), for O(log n) incremental appends and persistence.
- `inclusion_proof` / `verify_inclusion`: PATH (2.1.3.1) and its check (2.1.3.2).
- `consistency_proof` / `verify_consistency`: PROOF (2.1.4.1) and its check (2.1.4.2).

The verifiers return False for anything malformed and never raise.
"""

from __future__ import annotations

from collections.abc import Sequence

from vault.crypto import EMPTY_TREE_HASH, constant_time_equal, merkle_node_hash
from vault.errors import IntegrityError, UsageError

HASH_SIZE = 32
# Full blocks of this many leaves are hashed level by level in C-speed list
# comprehensions; a power of two so each block is a perfect subtree.
_BLOCK_HEIGHT = 8
_BLOCK = 1 << _BLOCK_HEIGHT
_FORMAT_VERSION = 1
_HEADER_SIZE = 1 + 8  # version byte, big-endian 64-bit size
_MAX_SIZE = (1 << 64) - 1


def _perfect_root(level: list[bytes]) -> bytes:
    """Root of a perfect subtree (len(level) a power of two), level by level."""
    node = merkle_node_hash
    while len(level) > 1:
        pairs = iter(level)
        level = [node(left, right) for left, right in zip(pairs, pairs, strict=False)]
    return level[0]


def _check_hashes(hashes: Sequence[bytes]) -> None:
    # map() keeps the per-leaf work in C
    if set(map(type, hashes)) - {bytes} or set(map(len, hashes)) - {HASH_SIZE}:
        raise UsageError(f"leaf hashes must be {HASH_SIZE}-byte bytes values")


def _largest_power_of_two_below(n: int) -> int:
    """k with k < n <= 2k (n >= 2), the split point of RFC 9162 section 2.1.1."""
    return 1 << ((n - 1).bit_length() - 1)


class CompactRange:
    """The hashes of the perfect subtrees covering leaves [0, size), left to right.

    There is one hash per set bit of `size`, largest subtree first; that is all
    it takes to append and to compute the root (RFC 9162 trees are these
    subtrees folded from the right).
    """

    __slots__ = ("_hashes", "_size")

    def __init__(self) -> None:
        self._size = 0
        self._hashes: list[bytes] = []

    @property
    def size(self) -> int:
        return self._size

    @property
    def hashes(self) -> tuple[bytes, ...]:
        return tuple(self._hashes)

    def _push(self, subtree_hash: bytes, height: int) -> None:
        """Append a perfect subtree of 2**height leaves; size must be a multiple of it."""
        count = self._size >> height
        while count & 1:
            subtree_hash = merkle_node_hash(self._hashes.pop(), subtree_hash)
            count >>= 1
        self._hashes.append(subtree_hash)
        self._size += 1 << height

    def append(self, leaf_hash: bytes) -> None:
        """Add one leaf; amortised one node hash."""
        if type(leaf_hash) is not bytes or len(leaf_hash) != HASH_SIZE:
            raise UsageError(f"a leaf hash must be {HASH_SIZE} bytes")
        if self._size == _MAX_SIZE:
            raise UsageError("the tree is full")
        self._push(leaf_hash, 0)

    def extend(self, leaf_hashes: Sequence[bytes], start: int = 0, stop: int | None = None) -> None:
        """Append leaf_hashes[start:stop]; full aligned blocks go at list-comprehension speed."""
        stop = len(leaf_hashes) if stop is None else stop
        if not 0 <= start <= stop <= len(leaf_hashes):
            raise UsageError("extend range is outside the leaf list")
        pos = start
        while pos < stop and self._size % _BLOCK:
            self.append(leaf_hashes[pos])
            pos += 1
        while stop - pos >= _BLOCK:
            block = list(leaf_hashes[pos : pos + _BLOCK])
            _check_hashes(block)
            self._push(_perfect_root(block), _BLOCK_HEIGHT)
            pos += _BLOCK
        while pos < stop:
            self.append(leaf_hashes[pos])
            pos += 1

    def root(self) -> bytes:
        """MTH of the leaves so far (RFC 9162 section 2.1.1); EMPTY_TREE_HASH when empty."""
        if not self._hashes:
            return EMPTY_TREE_HASH
        result = self._hashes[-1]
        for left in reversed(self._hashes[:-1]):
            result = merkle_node_hash(left, result)
        return result

    def to_bytes(self) -> bytes:
        """version (1 byte) || size (8 bytes, big-endian) || subtree hashes."""
        return (
            bytes([_FORMAT_VERSION]) + self._size.to_bytes(8, "big") + b"".join(self._hashes)
        )

    @classmethod
    def from_bytes(cls, data: bytes) -> CompactRange:
        """Inverse of `to_bytes`; IntegrityError for anything else."""
        if not isinstance(data, bytes | bytearray | memoryview):
            raise IntegrityError("stored Merkle frontier is not bytes")
        data = bytes(data)
        if len(data) < _HEADER_SIZE or data[0] != _FORMAT_VERSION:
            raise IntegrityError("stored Merkle frontier has an unknown format")
        size = int.from_bytes(data[1:_HEADER_SIZE], "big")
        body = data[_HEADER_SIZE:]
        if len(body) != HASH_SIZE * size.bit_count():
            raise IntegrityError("stored Merkle frontier has the wrong length for its size")
        frontier = cls()
        frontier._size = size
        frontier._hashes = [body[i : i + HASH_SIZE] for i in range(0, len(body), HASH_SIZE)]
        return frontier

    def copy(self) -> CompactRange:
        twin = CompactRange()
        twin._size, twin._hashes = self._size, list(self._hashes)
        return twin

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, CompactRange):
            return NotImplemented
        return self._size == other._size and self._hashes == other._hashes

    __hash__ = None  # type: ignore[assignment]  # mutable

    def __repr__(self) -> str:
        return f"CompactRange(size={self._size})"


def _subtree_root(leaf_hashes: Sequence[bytes], start: int, stop: int) -> bytes:
    """MTH(D[start:stop]) without copying the whole list."""
    frontier = CompactRange()
    frontier.extend(leaf_hashes, start, stop)
    return frontier.root()


def root_from_leaf_hashes(leaf_hashes: Sequence[bytes]) -> bytes:
    """MTH(D[n]) of RFC 9162 section 2.1.1 (EMPTY_TREE_HASH for n = 0)."""
    return _subtree_root(leaf_hashes, 0, len(leaf_hashes))


def _tree_size(leaf_hashes: Sequence[bytes], tree_size: int | None) -> int:
    if tree_size is None:
        return len(leaf_hashes)
    if not 0 <= tree_size <= len(leaf_hashes):
        raise UsageError("tree size exceeds the number of leaves")
    return tree_size


def inclusion_proof(
    leaf_hashes: Sequence[bytes], index: int, *, tree_size: int | None = None
) -> list[bytes]:
    """PATH(index, D[tree_size]) of RFC 9162 section 2.1.3.1, leaf level first.

    `tree_size` defaults to all leaves; a smaller one proves inclusion in an
    earlier tree head.
    """
    n = _tree_size(leaf_hashes, tree_size)
    if not 0 <= index < n:
        raise UsageError("leaf index is outside the tree")
    siblings: list[bytes] = []  # root level first; reversed at the end
    lo, hi = 0, n
    while hi - lo > 1:
        k = _largest_power_of_two_below(hi - lo)
        if index < lo + k:
            siblings.append(_subtree_root(leaf_hashes, lo + k, hi))
            hi = lo + k
        else:
            siblings.append(_subtree_root(leaf_hashes, lo, lo + k))
            lo += k
    siblings.reverse()
    return siblings


def consistency_proof(
    leaf_hashes: Sequence[bytes], old_size: int, new_size: int | None = None
) -> list[bytes]:
    """PROOF(old_size, D[new_size]) of RFC 9162 section 2.1.4.1.

    Defined for 0 < old_size <= new_size (empty when they are equal);
    `new_size` defaults to all leaves.
    """
    n = _tree_size(leaf_hashes, new_size)
    if not 0 < old_size <= n:
        raise UsageError("consistency proofs need 0 < old size <= new size")
    # SUBPROOF(m, D[lo:hi], b), unrolled; each step appends after the recursive part.
    tail: list[bytes] = []
    lo, hi, m, whole = 0, n, old_size, True
    while m != hi - lo:
        k = _largest_power_of_two_below(hi - lo)
        if m <= k:
            tail.append(_subtree_root(leaf_hashes, lo + k, hi))
            hi = lo + k
        else:
            tail.append(_subtree_root(leaf_hashes, lo, lo + k))
            lo, m, whole = lo + k, m - k, False
    if not whole:
        tail.append(_subtree_root(leaf_hashes, lo, hi))
    tail.reverse()
    return tail


# --------------------------------------------------------------------------- verification


def _is_size(value: object) -> bool:
    return type(value) is int and 0 <= value <= _MAX_SIZE


def _is_hash(value: object) -> bool:
    return type(value) is bytes and len(value) == HASH_SIZE


def _hash_list(proof: object) -> list[bytes] | None:
    """The proof as a list of 32-byte hashes, or None when it is anything else."""
    if not isinstance(proof, list | tuple):
        return None
    items = list(proof)
    return items if all(_is_hash(p) for p in items) else None


def verify_inclusion(
    leaf_hash: bytes, index: int, tree_size: int, proof: Sequence[bytes], root: bytes
) -> bool:
    """RFC 9162 section 2.1.3.2: does `proof` place `leaf_hash` at `index` under `root`?"""
    path = _hash_list(proof)
    if path is None or not (_is_hash(leaf_hash) and _is_hash(root)):
        return False
    if not (_is_size(index) and _is_size(tree_size)) or index >= tree_size:
        return False
    fn, sn = index, tree_size - 1
    r = leaf_hash
    for p in path:
        if sn == 0:
            return False
        if fn & 1 or fn == sn:
            r = merkle_node_hash(p, r)
            while not fn & 1 and fn != 0:
                fn >>= 1
                sn >>= 1
        else:
            r = merkle_node_hash(r, p)
        fn >>= 1
        sn >>= 1
    return sn == 0 and constant_time_equal(r, root)


def verify_consistency(
    old_size: int, new_size: int, old_root: bytes, new_root: bytes, proof: Sequence[bytes]
) -> bool:
    """RFC 9162 section 2.1.4.2: is the tree of `new_size` an append-only extension?

    Equal sizes need equal roots and an empty proof. An old size of 0 is always
    refused: RFC 9162 defines proofs for 0 < old size only, and a "proof" from
    the empty tree would show nothing (the published vectors reject it too).
    """
    path = _hash_list(proof)
    if path is None or not (_is_hash(old_root) and _is_hash(new_root)):
        return False
    if not (_is_size(old_size) and _is_size(new_size)) or not 0 < old_size <= new_size:
        return False
    if old_size == new_size:
        return not path and constant_time_equal(old_root, new_root)
    if not path:
        return False
    if old_size & (old_size - 1) == 0:  # exact power of two: old root is a subtree
        path = [old_root, *path]
    fn, sn = old_size - 1, new_size - 1
    while fn & 1:
        fn >>= 1
        sn >>= 1
    fr = sr = path[0]
    for c in path[1:]:
        if sn == 0:
            return False
        if fn & 1 or fn == sn:
            fr = merkle_node_hash(c, fr)
            sr = merkle_node_hash(c, sr)
            while not fn & 1 and fn != 0:
                fn >>= 1
                sn >>= 1
        else:
            sr = merkle_node_hash(sr, c)
        fn >>= 1
        sn >>= 1
    return sn == 0 and constant_time_equal(fr, old_root) and constant_time_equal(sr, new_root)
