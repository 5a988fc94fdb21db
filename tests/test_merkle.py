"""RFC 9162 Merkle tree hashing and proofs, checked against the RFC's definitions
and against pymerkle 7 (an independent implementation from PyPI)."""

from __future__ import annotations

import hashlib

import pymerkle
import pytest

from agent import merkle
from agent.errors import UsageError



def entries(n):
    return [b"entry %d" % i for i in range(n)]


def leaves(n):
    return [merkle.leaf_hash(e) for e in entries(n)]


def pm_tree(n):
    # pymerkle with security=True prefixes 0x00 to leaves and 0x01 to nodes,
    # as RFC 9162 section 2.1.1 does (pymerkle docs, "Security").
    t = pymerkle.InmemoryTree(algorithm="sha256")
    for e in entries(n):
        t.append_entry(e)
    return t


def test_empty_root_is_hash_of_empty_string():
    # RFC 9162 section 2.1.1: MTH({}) = HASH().
    assert merkle.root([]) == hashlib.sha256(b"").digest()


def test_leaf_and_node_prefixes():
    # RFC 9162 section 2.1.1: leaf = HASH(0x00 || d), node = HASH(0x01 || l || r).
    assert merkle.leaf_hash(b"abc") == hashlib.sha256(b"\x00abc").digest()
    assert merkle.node_hash(b"L" * 32, b"R" * 32) == hashlib.sha256(b"\x01" + b"L" * 32 + b"R" * 32).digest()


def test_root_of_three_by_the_definition():
    # RFC 9162 section 2.1.1 written out for n = 3 (k = 2).
    a, b, c = leaves(3)
    assert merkle.root([a, b, c]) == merkle.node_hash(merkle.node_hash(a, b), c)


@pytest.mark.parametrize("n", list(range(1, 40)) + [64, 65, 100])
def test_root_matches_pymerkle(n):
    assert merkle.root(leaves(n)) == pm_tree(n).get_root(n)


def test_frontier_matches_root_at_every_size():
    f = merkle.Frontier()
    ls = leaves(70)
    for i, leaf in enumerate(ls):
        f.append(leaf)
        assert f.root() == merkle.root(ls[:i + 1])
        g = merkle.Frontier.from_list(f.size, f.to_list())
        assert g.root() == f.root()


def test_frontier_rejects_wrong_node_count():
    with pytest.raises(UsageError, match="a tree of 3 leaves has 2 subtree roots"):
        merkle.Frontier(3, [b"x" * 32])


@pytest.mark.parametrize("n", [1, 2, 3, 5, 7, 8, 13, 33])
def test_inclusion_proofs_verify_against_pymerkle_roots(n):
    t, ls = pm_tree(n), leaves(n)
    for m in range(n):
        proof = merkle.inclusion_proof(m, ls)
        assert merkle.verify_inclusion(ls[m], m, n, proof, t.get_root(n))


def test_inclusion_proof_rfc_example_shape():
    # RFC 9162 section 2.1.5: in the 7-leaf example tree the path of d0 is [b, h, l]
    # (sibling leaf, then the subtree roots of [d2, d3] and [d4, d5, d6]).
    ls = leaves(7)
    b = ls[1]
    h = merkle.node_hash(ls[2], ls[3])
    la = merkle.node_hash(merkle.node_hash(ls[4], ls[5]), ls[6])
    assert merkle.inclusion_proof(0, ls) == [b, h, la]


def test_inclusion_fails_for_another_leaf():
    ls = leaves(9)
    proof = merkle.inclusion_proof(4, ls)
    assert not merkle.verify_inclusion(ls[5], 4, 9, proof, merkle.root(ls))


def test_consistency_proof_rfc_example():
    # RFC 9162 section 2.1.5: PROOF(3, D[7]) = [c, d, g, l].
    ls = leaves(7)
    c, d = ls[2], ls[3]
    g = merkle.node_hash(ls[0], ls[1])
    la = merkle.node_hash(merkle.node_hash(ls[4], ls[5]), ls[6])
    assert merkle.consistency_proof(3, ls) == [c, d, g, la]
    # PROOF(4, D[7]) = [l]; PROOF(6, D[7]) = [i, j, k] with i = node(d4, d5), j = d6, k = node(g, h).
    assert merkle.consistency_proof(4, ls) == [la]
    i = merkle.node_hash(ls[4], ls[5])
    k = merkle.node_hash(g, merkle.node_hash(c, d))
    assert merkle.consistency_proof(6, ls) == [i, ls[6], k]


@pytest.mark.parametrize("n", [2, 3, 4, 5, 7, 8, 9, 16, 17, 31])
def test_consistency_proofs_verify_against_pymerkle_roots(n):
    t, ls = pm_tree(n), leaves(n)
    for m in range(1, n + 1):
        proof = merkle.consistency_proof(m, ls)
        assert merkle.verify_consistency(m, n, t.get_root(m), t.get_root(n), proof), (m, n)
        # and pymerkle agrees that the two trees are consistent
        pymerkle.verify_consistency(t.get_root(m), t.get_root(n), t.prove_consistency(m, n))


def test_consistency_fails_for_a_changed_prefix():
    ls = leaves(10)
    old = list(ls[:6])
    old[2] = merkle.leaf_hash(b"rewritten")
    proof = merkle.consistency_proof(6, ls)
    assert not merkle.verify_consistency(6, 10, merkle.root(old), merkle.root(ls), proof)


def test_consistency_fails_for_a_reset_log():
    # A log restarted from scratch: the new tree does not extend the old one.
    old, new = leaves(5), [merkle.leaf_hash(b"fresh %d" % i) for i in range(8)]
    proof = merkle.consistency_proof(5, new)
    assert not merkle.verify_consistency(5, 8, merkle.root(old), merkle.root(new), proof)


def test_consistency_fails_when_sizes_go_down():
    ls = leaves(5)
    assert not merkle.verify_consistency(6, 5, merkle.root(ls), merkle.root(ls), [])


def test_proof_arguments_validated():
    with pytest.raises(UsageError, match="old_size: expected an integer of at least 0 and at most 3"):
        merkle.consistency_proof(4, leaves(3))
    with pytest.raises(UsageError, match="index: expected an integer"):
        merkle.inclusion_proof(3, leaves(3))
