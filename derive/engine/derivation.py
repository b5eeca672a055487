"""Loop bodies from invariants: split the partition 3x3 around the current block, compare what every block holds
before and after the boundary moves past it, turn each difference into ordered updates, and check the result."""
from __future__ import annotations

from dataclasses import dataclass
from itertools import product

from derive.engine.invariants import (BlockUse, Content, InfeasibleInvariant, Invariant, content_of, content_text,
                         block_label, equation_text, finish_uses, summation_set, term_uses, use_label)
from derive.engine.operation import Operation

THREE_WAY = (0, 1, 2)
CURRENT = 1
BEFORE = frozenset({0})          # processed positions while the current block still lies ahead
AFTER = frozenset({0, 1})        # processed positions once the boundary has moved past it


@dataclass(frozen=True, slots=True)
class Update:
    """One step of a loop body, in block terms.

    kind: "gemm"  target -= left * right (summation index k)
          "trsm"  target := solve with the triangular block `reads[0]` from `side`
          "factor" target := its own factorization (the inner loop)
          "panel"  the targets (current column, diagonal down) := factored with row interchanges
          "swap"   apply the panel's interchanges to the current and later rows of column block `column`
    """
    kind: str
    targets: tuple[tuple[int, ...], ...]
    reads: tuple[BlockUse, ...] = ()
    side: str | None = None
    k: int | None = None
    column: int | None = None      # swap: the position, along the rule's panel axis, of the blocks it reaches
    source: str = ""

    def __post_init__(self) -> None:
        if self.kind not in ("gemm", "trsm", "factor", "panel", "swap"):
            raise ValueError(f"unknown update kind {self.kind!r}")
        if self.kind == "gemm" and (self.k is None or len(self.reads) != 2):
            raise ValueError("a gemm update needs k and two operands")
        if self.kind == "swap" and self.column is None:
            raise ValueError("a swap update needs its column block")


@dataclass(frozen=True, slots=True)
class Derivation:
    operation: Operation
    invariant: Invariant
    pivoting: str
    before: tuple[tuple[tuple[int, ...], Content], ...]
    after: tuple[tuple[tuple[int, ...], Content], ...]
    updates: tuple[Update, ...]

    def before_of(self, index: tuple[int, ...]) -> Content:
        return dict(self.before)[index]

    def after_of(self, index: tuple[int, ...]) -> Content:
        return dict(self.after)[index]


def blocks(op: Operation) -> list[tuple[int, ...]]:
    return [tuple(t) for t in product(THREE_WAY, repeat=op.rank)]


def _region_of(op: Operation, inv: Invariant, index: tuple[int, ...], processed: frozenset[int]):
    region_pos = tuple(1 if p in processed else 2 for p in index)
    for region, word in zip(op.regions, inv.words):
        if region.position == region_pos:
            return region, word
    raise KeyError(region_pos)


def _state(op: Operation, inv: Invariant, index: tuple[int, ...], processed: frozenset[int]) -> Content:
    region, word = _region_of(op, inv, index, processed)
    return content_of(region.content_of(word), index, processed)


def _block_updates(op: Operation, t: tuple[int, ...], b: Content, a: Content) -> list[Update]:
    """The updates that take block t from content b to content a, in the order its equation allows."""
    if b == a:
        return []
    name = block_label(op, t, THREE_WAY)
    if b.final:
        raise InfeasibleInvariant(f"{name} is final before the step but {content_text(op, t, a, THREE_WAY)} after "
                                  f"it: the step would have to undo a finished block")
    eq = op.equation_for(t)
    src = equation_text(op, t, THREE_WAY)
    goal = summation_set(t, THREE_WAY) if a.final else a.done
    if not b.done <= goal:
        raise InfeasibleInvariant(f"{name} holds {content_text(op, t, b, THREE_WAY)} before the step but "
                                  f"{content_text(op, t, a, THREE_WAY)} after it: terms cannot be added back")
    out = [Update("gemm", (t,), term_uses(eq, t, k), k=k, source=src) for k in sorted(goal - b.done)]
    if a.final:
        kind = "factor" if eq.finish.kind == "factor" else "trsm"
        out.append(Update(kind, (t,), finish_uses(eq, t), side=eq.finish.side, source=src))
    return out


def _rows_touched(op: Operation, u: Update) -> list[tuple[int, ...]]:
    return list(u.targets) + [r.index for r in u.reads if r.matrix == op.target]


def derive(op: Operation, inv: Invariant, pivoting: str = "none") -> Derivation:
    """Derive the loop body of `inv`; raise InfeasibleInvariant with the reason when it cannot be done."""
    rules = {r.name: r for r in op.pivot_rules}
    if pivoting != "none" and pivoting not in rules:
        allowed = ", ".join(["none", *sorted(rules)])
        raise InfeasibleInvariant(f"{op.name} has no pivoting rule {pivoting!r}; allowed: {allowed}")
    rule = rules.get(pivoting)
    before = {t: _state(op, inv, t, BEFORE) for t in blocks(op)}
    after = {t: _state(op, inv, t, AFTER) for t in blocks(op)}

    gen: list[Update] = []
    finisher: dict[tuple[int, ...], int] = {}
    chains: dict[tuple[int, ...], list[int]] = {}
    per_block = {t: _block_updates(op, t, before[t], after[t]) for t in blocks(op)}

    panel_blocks: list[tuple[int, ...]] = []
    if pivoting != "none":
        panel_blocks = [t for t in blocks(op) if rule.in_panel(t, CURRENT)]
        for t in panel_blocks:
            if not after[t].final or before[t].final:
                region, word = _region_of(op, inv, t, AFTER)
                raise InfeasibleInvariant(
                    f"{pivoting} pivoting chooses each pivot from the whole column below the boundary, so the step "
                    f"must finish {', '.join(block_label(op, p, THREE_WAY) for p in panel_blocks)} together "
                    f"({equation_text(op, t, THREE_WAY)}); but this invariant keeps {region.label} '{word}', so "
                    f"{block_label(op, t, THREE_WAY)} still holds {content_text(op, t, after[t], THREE_WAY)} "
                    f"after the step")

    for t in blocks(op):
        ups = per_block[t]
        if t in panel_blocks:
            ups = [u for u in ups if u.kind == "gemm"]
        for u in ups:
            chains.setdefault(t, []).append(len(gen))
            gen.append(u)
            if u.kind in ("trsm", "factor"):
                finisher[t] = len(gen) - 1
    panel_at = None
    swap_at: dict[int, int] = {}
    if panel_blocks:
        srcs = "; ".join(equation_text(op, p, THREE_WAY) for p in panel_blocks)
        gen.append(Update("panel", tuple(panel_blocks), source=srcs))
        panel_at = len(gen) - 1
        for t in panel_blocks:
            chains.setdefault(t, []).append(panel_at)
            finisher[t] = panel_at
        for c in THREE_WAY:
            if c == CURRENT:
                continue
            group = tuple(t for t in blocks(op) if t[rule.panel_axis] == c and rule.exchanged(t, CURRENT))
            gen.append(Update("swap", group, column=c,
                              source=f"P applied to rows of column block {c}"))
            swap_at[c] = len(gen) - 1

    # dependencies: each block's own chain, and every operand final before it is read
    deps: dict[int, set[int]] = {i: set() for i in range(len(gen))}
    for chain in chains.values():
        for a, b in zip(chain, chain[1:]):
            deps[b].add(a)
    for i, u in enumerate(gen):
        for r in u.reads:
            if r.matrix != op.target:
                continue
            if before[r.index].final:
                continue
            if after[r.index].final and r.index in finisher:
                if finisher[r.index] == i:
                    continue
                deps[i].add(finisher[r.index])
                continue
            raise InfeasibleInvariant(
                f"{u.source}: updating {block_label(op, u.targets[0], THREE_WAY)} needs "
                f"{use_label(op, r, THREE_WAY)}, which is not finished before the step nor by it")
    if panel_at is not None:
        for c, s in swap_at.items():
            deps[s].add(panel_at)
        ancestors = _ancestors(deps, panel_at)
        for i, u in enumerate(gen):
            if u.kind in ("swap", "panel"):
                continue
            for c, s in swap_at.items():
                touched = [t for t in _rows_touched(op, u) if rule.exchanged(t, CURRENT) and t[rule.panel_axis] == c]
                if not touched:
                    continue
                if i in ancestors:
                    writes = [t for t in u.targets if t in touched]
                    if writes:
                        raise InfeasibleInvariant(
                            f"{u.source}: the panel needs this update of {block_label(op, writes[0], THREE_WAY)} "
                            f"first, but rows it changes are still to be interchanged")
                    continue
                deps[i].add(s)
    order = _schedule(gen, deps)
    d = Derivation(op, inv, pivoting, tuple(before.items()), tuple(after.items()), tuple(gen[i] for i in order))
    self_check(d)
    return d


def _ancestors(deps: dict[int, set[int]], node: int) -> set[int]:
    seen: set[int] = set()
    stack = list(deps[node])
    while stack:
        n = stack.pop()
        if n not in seen:
            seen.add(n)
            stack.extend(deps[n])
    return seen


def _schedule(gen: list[Update], deps: dict[int, set[int]]) -> list[int]:
    """Topological order; among ready updates the earliest generated goes first, so the order is fixed."""
    done: list[int] = []
    left = set(range(len(gen)))
    while left:
        ready = sorted(i for i in left if deps[i] <= set(done))
        if not ready:
            names = ", ".join(gen[i].source for i in sorted(left))
            raise InfeasibleInvariant(f"the updates wait on each other in a cycle: {names}")
        done.append(ready[0])
        left.remove(ready[0])
    return done


def self_check(d: Derivation) -> None:
    """Apply the updates to the 'before' contents symbolically; they must give exactly the 'after' contents."""
    op = d.operation
    state = dict(d.before)
    after = dict(d.after)
    pivots_known = d.pivoting == "none"
    rule = {r.name: r for r in op.pivot_rules}.get(d.pivoting)
    permuted = {t: rule is None or not rule.exchanged(t, CURRENT) for t in state}

    def fail(u: Update, why: str) -> None:
        raise AssertionError(f"derivation self-check failed at '{u.kind}' ({u.source}): {why}")

    for u in d.updates:
        if u.kind != "swap":
            for r in u.reads:
                if r.matrix == op.target and not state[r.index].final:
                    fail(u, f"{use_label(op, r, THREE_WAY)} is read before it is final")
            if pivots_known and u.kind != "panel":
                for t in _rows_touched(op, u):
                    if not permuted[t]:
                        fail(u, f"{block_label(op, t, THREE_WAY)} is used before its rows are interchanged")
        if u.kind == "gemm":
            (t,) = u.targets
            c = state[t]
            if c.final or u.k in c.done or u.k not in summation_set(t, THREE_WAY):
                fail(u, f"{block_label(op, t, THREE_WAY)} cannot take term {u.k}")
            state[t] = Content(False, c.done | {u.k})
        elif u.kind in ("trsm", "factor", "panel"):
            for t in u.targets:
                if state[t] != Content(False, summation_set(t, THREE_WAY)):
                    fail(u, f"{block_label(op, t, THREE_WAY)} is not fully updated")
                state[t] = Content(True)
            if u.kind == "panel":
                pivots_known = True
                for t in u.targets:
                    permuted[t] = True
        elif u.kind == "swap":
            if not pivots_known:
                fail(u, "interchanges applied before the pivots are chosen")
            cs = {state[t] for t in u.targets}
            held = {op.equation_for(t).holds for t in u.targets if state[t].final}
            if len(cs) != 1 or len(held) > 1:
                fail(u, "the rows exchanged do not hold the same kind of value")
            for t in u.targets:
                permuted[t] = True
    for t, c in after.items():
        if state[t] != c:
            raise AssertionError(f"derivation self-check failed: {block_label(op, t, THREE_WAY)} ends as "
                                 f"{content_text(op, t, state[t], THREE_WAY)}, the invariant says "
                                 f"{content_text(op, t, c, THREE_WAY)}")
    if not all(permuted.values()):
        raise AssertionError("derivation self-check failed: some rows never receive the interchanges")


def pivoting_supported(op: Operation, inv: Invariant) -> list[str]:
    out = ["none"]
    for rule in op.pivot_rules:
        try:
            derive(op, inv, rule.name)
            out.append(rule.name)
        except InfeasibleInvariant:
            pass
    return out
