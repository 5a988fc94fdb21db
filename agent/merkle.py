"""Merkle tree hashing, inclusion and consistency proofs as defined by RFC 9162.

Terminology (RFC 9162, section 2.1)
-----------------------------------
leaf hash
    ``SHA-256(0x00 || entry)`` for one log entry's bytes.
node hash
    ``SHA-256(0x01 || left || right)`` for an interior node.
tree head (root)
    ``MTH(D[n])``: the hash of the empty string for no entries, the leaf hash
    for one, otherwise ``SHA-256(0x01 || MTH(D[0:k]) || MTH(D[k:n]))`` with
    ``k`` the largest power of two smaller than ``n``.
inclusion proof
    ``PATH(m, D[n])``: the sibling hashes that lead from leaf ``m`` to the root
    of a tree of size ``n`` (section 2.1.3).
consistency proof
    ``PROOF(m, D[n])``: the node hashes that show the tree of size ``m`` is a
    prefix of the tree of size ``n`` (section 2.1.4): nothing in the first
    ``m`` entries was changed, removed or reordered.
frontier
    The roots of the perfect subtrees that a tree of ``n`` leaves splits into
    (one per 1-bit of ``n``, largest first); enough to extend the tree by one
    leaf and to compute its root without the leaves themselves.

Every function works on leaf *hashes* (32-byte ``bytes``) so a caller hashes
each entry once.  Proof generation is linear in the number of leaves; proof
verification is logarithmic.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence

from .errors import UsageError

HASH_BYTES = 32
EMPTY_ROOT = hashlib.sha256(b"").digest()  # RFC 9162 section 2.1.1: MTH({}) = HASH()


def leaf_hash(entry: bytes) -> bytes:
    """``SHA-256(0x00 || entry)`` (RFC 9162 section 2.1.1)."""
    return hashlib.sha256(b"\x00" + bytes(entry)).digest()


def node_hash(left: bytes, right: bytes) -> bytes:
    """``SHA-256(0x01 || left || right)`` (RFC 9162 section 2.1.1)."""
    return hashlib.sha256(b"\x01" + left + right).digest()


def _split(n: int) -> int:
    """The largest power of two smaller than ``n`` (``n >= 2``)."""
    return 1 << ((n - 1).bit_length() - 1)


def _check_size(name: str, value: int, low: int, high: int | None = None) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < low or (high is not None and value > high):
        bound = f" and at most {high}" if high is not None else ""
        raise UsageError(f"{name}: expected an integer of at least {low}{bound}, got {value!r}")
    return value


def root(leaves: Sequence[bytes]) -> bytes:
    """``MTH(D[n])`` of a list of leaf hashes (iterative, linear time)."""
    return _mth(leaves, 0, len(leaves))


def _mth(leaves: Sequence[bytes], lo: int, hi: int) -> bytes:
    n = hi - lo
    if n == 0:
        return EMPTY_ROOT
    if n == 1:
        return leaves[lo]
    # Fold the perfect subtrees of the binary decomposition of n: the same
    # value as the recursive definition, without recursion depth.
    f = Frontier()
    for i in range(lo, hi):
        f.append(leaves[i])
    return f.root()


def inclusion_proof(index: int, leaves: Sequence[bytes]) -> list[bytes]:
    """``PATH(index, D[n])`` for the tree over ``leaves`` (RFC 9162 section 2.1.3.1)."""
    n = len(leaves)
    _check_size("index", index, 0, n - 1)
    out: list[bytes] = []

    def path(m: int, lo: int, hi: int) -> None:
        if hi - lo <= 1:
            return
        k = _split(hi - lo)
        if m < k:
            path(m, lo, lo + k)
            out.append(_mth(leaves, lo + k, hi))
        else:
            path(m - k, lo + k, hi)
            out.append(_mth(leaves, lo, lo + k))

    path(index, 0, n)
    return out


def consistency_proof(old_size: int, leaves: Sequence[bytes]) -> list[bytes]:
    """``PROOF(old_size, D[n])`` for the tree over ``leaves`` (RFC 9162 section 2.1.4.1).

    Empty when ``old_size`` is 0 or equals ``n`` (nothing to prove).
    """
    n = len(leaves)
    _check_size("old_size", old_size, 0, n)
    if old_size in (0, n):
        return []
    out: list[bytes] = []

    def subproof(m: int, lo: int, hi: int, start: bool) -> None:
        if m == hi - lo:
            if not start:
                out.append(_mth(leaves, lo, hi))
            return
        k = _split(hi - lo)
        if m <= k:
            subproof(m, lo, lo + k, start)
            out.append(_mth(leaves, lo + k, hi))
        else:
            subproof(m - k, lo + k, hi, False)
            out.append(_mth(leaves, lo, lo + k))

    subproof(old_size, 0, n, True)
    return out


def verify_inclusion(leaf: bytes, index: int, size: int, proof: Sequence[bytes], root_hash: bytes) -> bool:
    """Check an inclusion proof (RFC 9162 section 2.1.3.2); True when it holds."""
    if not (isinstance(index, int) and isinstance(size, int) and 0 <= index < size):
        return False
    fn, sn = index, size - 1
    r = leaf
    for p in proof:
        if sn == 0:
            return False
        if fn & 1 or fn == sn:
            r = node_hash(p, r)
            if not fn & 1:
                while fn and not fn & 1:
                    fn >>= 1
                    sn >>= 1
        else:
            r = node_hash(r, p)
        fn >>= 1
        sn >>= 1
    return sn == 0 and r == root_hash


def verify_consistency(old_size: int, new_size: int, old_root: bytes, new_root: bytes,
                       proof: Sequence[bytes]) -> bool:
    """Check a consistency proof (RFC 9162 section 2.1.4.2); True when it holds.

    A tree of size 0 is consistent with every tree (empty proof); equal sizes
    need equal roots and an empty proof.
    """
    if not (isinstance(old_size, int) and isinstance(new_size, int) and 0 <= old_size <= new_size):
        return False
    if old_size == 0:
        return not proof
    if old_size == new_size:
        return not proof and old_root == new_root
    path = list(proof)
    if not path:
        return False
    # Step 2: if first is an exact power of two, prepend first_hash to the path.
    if old_size & (old_size - 1) == 0:
        path.insert(0, old_root)
    fn, sn = old_size - 1, new_size - 1
    # Step 4: right-shift fn and sn while LSB(fn) is set.
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
            if not fn & 1:
                while fn and not fn & 1:
                    fn >>= 1
                    sn >>= 1
        else:
            sr = node_hash(sr, c)
        fn >>= 1
        sn >>= 1
    return fr == old_root and sr == new_root and sn == 0


class Frontier:
    """An append-only Merkle tree kept as its frontier (the roots of its perfect subtrees).

    ``append`` costs amortised O(1) hashes; ``root`` O(log n).  The frontier
    serialises to a short list of hex hashes (``to_list`` / ``from_list``),
    which is what a checkpoint stores.
    """

    def __init__(self, size: int = 0, nodes: Sequence[bytes] = ()):
        _check_size("size", size, 0)
        nodes = [bytes(x) for x in nodes]
        if len(nodes) != bin(size).count("1") or any(len(x) != HASH_BYTES for x in nodes):
            raise UsageError(f"Frontier: a tree of {size} leaves has {bin(size).count('1')} subtree roots "
                             f"of {HASH_BYTES} bytes, got {len(nodes)}")
        self.size = size
        self.nodes = nodes  # largest subtree first

    def append(self, leaf: bytes) -> None:
        """Add one leaf hash."""
        node, n = leaf, self.size
        while n & 1:  # merge equal-sized subtrees, as the binary counter carries
            node = node_hash(self.nodes.pop(), node)
            n >>= 1
        self.nodes.append(node)
        self.size += 1

    def root(self) -> bytes:
        """``MTH`` of the leaves appended so far."""
        if not self.nodes:
            return EMPTY_ROOT
        r = self.nodes[-1]
        for left in reversed(self.nodes[:-1]):
            r = node_hash(left, r)
        return r

    def copy(self) -> Frontier:
        return Frontier(self.size, list(self.nodes))

    def to_list(self) -> list[str]:
        return [x.hex() for x in self.nodes]

    @classmethod
    def from_list(cls, size: int, nodes: Sequence[str]) -> Frontier:
        try:
            raw = [bytes.fromhex(x) for x in nodes]
        except (TypeError, ValueError):
            raise UsageError("Frontier: expected hex subtree roots") from None
        return cls(size, raw)


__all__ = ["EMPTY_ROOT", "Frontier", "consistency_proof", "inclusion_proof", "leaf_hash", "node_hash",
           "root", "verify_consistency", "verify_inclusion"]
