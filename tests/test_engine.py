"""The derivation engine on its own: the invariants it finds, the reasons it gives for infeasible ones, its
self-check, pivoting capability, the triangular solves, and operation counts against their closed forms."""
from __future__ import annotations

import dataclasses

import pytest

from derive.engine import operation
from derive.lowering.counts import kernel_flops, lu_flops, solve_flops
from derive.engine.derivation import Update, derive, pivoting_supported, self_check
from derive.engine.invariants import InfeasibleInvariant, by_name, check, enumerate_invariants, from_mapping
from derive.lowering.lower import lower_kernel
from derive.options import make_options

LU = operation.LU
TRADE = {"bordered", "up-looking", "left-looking", "crout", "right-looking"}


def test_exactly_five_lu_invariants_with_their_trade_names():
    invs = enumerate_invariants(LU)
    assert len(invs) == 5
    assert {i.name for i in invs} == TRADE
    # A11 is always factored: it is the whole matrix when the loop ends
    assert all(i.as_dict(LU)["A11"] == "factored" for i in invs)


def test_each_name_labels_the_expected_states():
    expect = {
        "bordered": ("input", "input", "input"),
        "up-looking": ("solved", "input", "input"),
        "left-looking": ("input", "solved", "input"),
        "crout": ("solved", "solved", "input"),
        "right-looking": ("solved", "solved", "updated"),
    }
    for name, (a12, a21, a22) in expect.items():
        d = by_name(LU, name).as_dict(LU)
        assert (d["A12"], d["A21"], d["A22"]) == (a12, a21, a22)


@pytest.mark.parametrize("states, needle", [
    ({"A12": "input", "A21": "solved", "A22": "updated"}, "needs U12"),
    ({"A12": "solved", "A21": "input", "A22": "updated"}, "needs L21"),
    ({"A11": "input", "A12": "input", "A21": "input", "A22": "input"}, "must be 'factored'"),
    ({"A12": "solved", "A21": "solved", "A22": "factored"}, "not one of input, updated"),
    ({"A12": "solved", "A21": "solved", "A77": "input"}, "unknown block"),
])
def test_infeasible_invariants_are_refused_with_the_equation(states, needle):
    with pytest.raises(InfeasibleInvariant) as e:
        from_mapping(LU, states)
    assert needle in str(e.value)


def test_dependency_reason_names_the_block_equation():
    with pytest.raises(InfeasibleInvariant) as e:
        check(LU, ("factored", "input", "solved", "updated"))
    assert "A22 = L21 U12 + L22 U22" in str(e.value)


@pytest.mark.parametrize("op", list(operation.OPERATIONS.values()), ids=lambda o: o.name)
def test_every_derivation_passes_its_self_check(op):
    for inv in enumerate_invariants(op):
        for rule in pivoting_supported(op, inv):
            d = derive(op, inv, rule)
            self_check(d)          # derive() already ran it; run again on the frozen result
            assert d.updates


def test_self_check_catches_a_missing_or_misordered_update():
    d = derive(LU, by_name(LU, "right-looking"))
    broken = dataclasses.replace(d, updates=d.updates[:-1])          # drop the trailing GEMM
    with pytest.raises(AssertionError, match="ends as"):
        self_check(broken)
    swapped = dataclasses.replace(d, updates=(d.updates[1], d.updates[0]) + d.updates[2:])
    with pytest.raises(AssertionError, match="read before it is final"):
        self_check(swapped)
    extra = dataclasses.replace(d, updates=d.updates + (d.updates[-1],))
    with pytest.raises(AssertionError):
        self_check(extra)


def test_self_check_catches_interchanges_in_the_wrong_place():
    d = derive(LU, by_name(LU, "crout"), "partial")
    kinds = [u.kind for u in d.updates]
    swap = kinds.index("swap")
    moved = list(d.updates)
    moved.insert(0, moved.pop(swap))                  # interchanges before the pivots are known
    with pytest.raises(AssertionError, match="before the pivots"):
        self_check(dataclasses.replace(d, updates=tuple(moved)))
    late = [u for u in d.updates if u.kind != "swap" or u.column != 2] + [
        u for u in d.updates if u.kind == "swap" and u.column == 2]
    with pytest.raises(AssertionError, match="interchanged"):
        self_check(dataclasses.replace(d, updates=tuple(late)))


def test_pivoting_capability_is_derived():
    got = {inv.name: pivoting_supported(LU, inv) for inv in enumerate_invariants(LU)}
    assert got == {"bordered": ["none"], "up-looking": ["none"], "left-looking": ["none", "partial"],
                   "crout": ["none", "partial"], "right-looking": ["none", "partial"]}
    with pytest.raises(InfeasibleInvariant, match="A21 'input'"):
        derive(LU, by_name(LU, "up-looking"), "partial")


def test_where_the_interchanges_go_differs_between_orderings():
    """Crout must interchange the right-hand columns before it updates A12; right-looking before its TRSM;
    left-looking changes no right-hand block in the step, so they only have to be done by its end."""
    def order(name):
        return [(u.kind, u.targets[0] if u.kind != "swap" else u.column)
                for u in derive(LU, by_name(LU, name), "partial").updates]
    crout = order("crout")
    assert crout.index(("swap", 2)) < crout.index(("gemm", (1, 2)))
    right = order("right-looking")
    assert right.index(("swap", 2)) < right.index(("trsm", (1, 2))) < right.index(("gemm", (2, 2)))
    left = order("left-looking")
    assert left[-2:] == [("swap", 0), ("swap", 2)]


@pytest.mark.parametrize("opname", ["lower-solve", "upper-solve"])
def test_triangular_solves_have_two_orderings(opname):
    op = operation.get(opname)
    invs = enumerate_invariants(op)
    assert [i.name for i in invs] == ["inner-product", "outer-product"]


def test_a_new_invariant_needs_no_engine_code():
    """A user-written invariant equal to a named one derives the same body; the name is only a label."""
    d1 = derive(LU, from_mapping(LU, {"A12": "solved", "A21": "solved", "A22": "input"}))
    d2 = derive(LU, by_name(LU, "crout"))
    assert d1.updates == d2.updates


def test_update_validation():
    with pytest.raises(ValueError):
        Update("gemm", ((1, 1),))
    with pytest.raises(ValueError):
        Update("blas", ((1, 1),))


@pytest.mark.parametrize("loop", sorted(TRADE))
@pytest.mark.parametrize("block", [1, 2, 3, 8])
def test_flop_counts_match_the_closed_forms(loop, block):
    """Every update appears exactly once: the IR's count equals 2n^3/3 - n^2/2 - n/6 for any n and block."""
    pivs = ["none", "partial"] if loop in ("left-looking", "crout", "right-looking") else ["none"]
    for piv in pivs:
        for inner in (["crout", "right-looking"] if piv == "partial" else ["bordered", "up-looking"]):
            for sl in ("inner-product", "outer-product"):
                k = lower_kernel(make_options("k", loop, block, inner, pivoting=piv, solve_loop=sl))
                for n in (0, 1, 2, 7, 8, 9, 23):
                    assert kernel_flops(k, n, 3) == (lu_flops(n), solve_flops(n, 3))
