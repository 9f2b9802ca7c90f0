"""The group tables and pixel actions, checked against references outside the project."""

import itertools

import numpy as np
import pytest
import torch
from sympy.combinatorics.named_groups import CyclicGroup, DihedralGroup

from orbify.errors import GroupError
from orbify.symmetry.groups import Group, parse_group

ALL_SMALL = [Group(n, m) for n in range(1, 9) for m in (False, True)]


def _as_permutation_group(group: Group):
    """The group as permutations of its own elements (left regular action), for sympy."""
    from sympy.combinatorics import Permutation, PermutationGroup

    table = group.table.tolist()
    return PermutationGroup([Permutation([table[a][b] for b in range(group.order)]) for a in range(group.order)])


@pytest.mark.parametrize("group", ALL_SMALL, ids=str)
def test_axioms(group):
    # Group axioms (textbook): closure, associativity, one identity, one inverse each.
    t = group.table
    n = group.order
    assert sorted(t.flatten().unique().tolist()) == list(range(n))
    for a, b, c in itertools.product(range(n), repeat=3):
        assert t[t[a, b], c] == t[a, t[b, c]]
    identities = [e for e in range(n) if all(t[e, a] == a and t[a, e] == a for a in range(n))]
    assert identities == [0]
    for a in range(n):
        assert t[a, group.inverse(a)] == 0 and t[group.inverse(a), a] == 0


@pytest.mark.parametrize("group", ALL_SMALL, ids=str)
def test_matches_sympy_named_groups(group):
    # Reference: sympy.combinatorics.named_groups.CyclicGroup / DihedralGroup — order, the
    # multiset of element orders and the number of conjugacy classes must agree (isomorphism invariants).
    ours = _as_permutation_group(group)
    # sympy's DihedralGroup(1) is C2 and DihedralGroup(2) the Klein four-group, as d1 and d2 should be.
    ref = DihedralGroup(group.rotations) if group.mirror else CyclicGroup(group.rotations)
    assert ours.order() == ref.order() == group.order
    assert sorted(p.order() for p in ours.elements) == sorted(p.order() for p in ref.elements)
    assert len(ours.conjugacy_classes()) == len(ref.conjugacy_classes())


def test_d4_published_facts():
    # Textbook fact (from memory; sympy's DihedralGroup(4) agrees, as test_matches_sympy_named_groups checks):
    # the dihedral group of the square has 5 conjugacy classes and element orders 1×1, 2×5, 4×2.
    d4 = parse_group("d4")
    perm = _as_permutation_group(d4)
    assert len(perm.conjugacy_classes()) == 5
    orders = sorted(p.order() for p in perm.elements)
    assert orders == [1, 2, 2, 2, 2, 2, 4, 4]


@pytest.mark.parametrize("name", ["c1", "c2", "c4", "d1", "d2", "d4"])
def test_grid_action_matches_numpy(name):
    # Reference: numpy.rot90 (counter-clockwise for axes (0, 1)) and numpy.flip (numpy documentation).
    group = parse_group(name)
    x = np.random.default_rng(0).normal(size=(2, 5, 7, 7))
    for a, (k, m) in enumerate(group.elements):
        ref = np.flip(x, axis=-1) if m else x
        ref = np.rot90(ref, k * (4 // group.rotations), axes=(-2, -1))
        ours = group.act_grid(a, torch.from_numpy(x)).numpy()
        np.testing.assert_array_equal(ours, ref)


@pytest.mark.parametrize("name", ["c2", "c4", "d1", "d2", "d4"])
def test_grid_action_is_a_homomorphism(name):
    group = parse_group(name)
    x = torch.randn(3, 6, 6)
    for a in range(group.order):
        for b in range(group.order):
            both = group.act_grid(a, group.act_grid(b, x))
            assert torch.equal(both, group.act_grid(group.compose(a, b), x))


def test_parse_group_forms_and_errors():
    assert parse_group("D4") == Group(4, True)
    assert parse_group(" c8 ") == Group(8, False)
    assert parse_group("c4").exact and not parse_group("c8").exact
    for bad in ["x4", "c", "d0", "c-1", "rot4", ""]:
        with pytest.raises(GroupError) as info:
            parse_group(bad)
        assert "cN" in str(info.value) or "N ≥ 1" in str(info.value)
