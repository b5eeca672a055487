"""Loop invariants of an operation: the content calculus of its blocks, and the enumeration of every feasible
invariant of its 2x2 partition (closed under the equations' dependencies, true before the loop, final after)."""
from __future__ import annotations

from dataclasses import dataclass
from itertools import product

from derive.engine.operation import FINAL, INPUT, PARTIAL, Equation, Operation, Ref


class InfeasibleInvariant(ValueError):
    """An invariant the loop cannot maintain; the message names the block equation it cannot satisfy."""


@dataclass(frozen=True, slots=True)
class Content:
    """What one block holds: its input minus the product terms whose index is in `done`, or its final value."""
    final: bool
    done: frozenset[int] = frozenset()

    def __post_init__(self) -> None:
        if self.final and self.done:
            raise ValueError("a final block has no partial sum")


INPUT_CONTENT = Content(False)
FINAL_CONTENT = Content(True)


@dataclass(frozen=True, slots=True)
class BlockUse:
    """A block of a matrix at partition positions `index`, read as `symbol` (L, U or X)."""
    matrix: str
    index: tuple[int, ...]
    symbol: str


@dataclass(frozen=True, slots=True)
class Invariant:
    operation: str
    words: tuple[str, ...]          # one state word per region, in the operation's region order
    name: str | None

    def describe(self, op: Operation) -> str:
        return ", ".join(f"{r.label} {w}" for r, w in zip(op.regions, self.words))

    def as_dict(self, op: Operation) -> dict[str, str]:
        return {r.label: w for r, w in zip(op.regions, self.words)}

    @property
    def label(self) -> str:
        return self.name or "(" + ",".join(self.words) + ")"


# -- the content calculus ---------------------------------------------------------------------------------------

def summation_set(target: tuple[int, ...], positions: tuple[int, ...]) -> frozenset[int]:
    """Indices k that precede every index of the target: the terms its equation sums over."""
    return frozenset(k for k in positions if all(k < t for t in target))


def content_of(kind: str, target: tuple[int, ...], processed: frozenset[int]) -> Content:
    if kind == INPUT:
        return INPUT_CONTENT
    if kind == FINAL:
        return FINAL_CONTENT
    if kind == PARTIAL:
        return Content(False, summation_set(target, tuple(processed)))
    raise ValueError(kind)


def bind(ref: Ref, target: tuple[int, ...], k: int | None) -> BlockUse:
    env = {"i": target[0], "k": k}
    if len(target) > 1:
        env["j"] = target[1]
    return BlockUse(ref.matrix, tuple(env[v] for v in ref.index), ref.symbol)


def term_uses(eq: Equation, target: tuple[int, ...], k: int) -> tuple[BlockUse, BlockUse]:
    return bind(eq.left, target, k), bind(eq.right, target, k)


def finish_uses(eq: Equation, target: tuple[int, ...]) -> tuple[BlockUse, ...]:
    return (bind(eq.finish.tri, target, None),) if eq.finish.tri is not None else ()


def needs(op: Operation, target: tuple[int, ...], content: Content,
          positions: tuple[int, ...]) -> list[tuple[BlockUse, str]]:
    """Blocks of the target matrix that must be final for `target` to hold `content`, each with the reason."""
    eq = op.equation_for(target)
    out: list[tuple[BlockUse, str]] = []
    ks = summation_set(target, positions) if content.final else content.done
    for k in sorted(ks):
        for use in term_uses(eq, target, k):
            out.append((use, "term"))
    if content.final:
        for use in finish_uses(eq, target):
            out.append((use, "finish"))
    return [(u, why) for u, why in out if u.matrix == op.target]


# -- display ------------------------------------------------------------------------------------------------------

def display_index(op: Operation, index: tuple[int, ...], positions: tuple[int, ...]) -> str:
    """Index digits as they appear in storage order (a backward operation numbers from the other end)."""
    if op.direction == "backward":
        lo, hi = min(positions), max(positions)
        index = tuple(lo + hi - p for p in index)
    return "".join(str(p) for p in index)


def block_label(op: Operation, index: tuple[int, ...], positions: tuple[int, ...]) -> str:
    return f"{op.block_prefix}{display_index(op, index, positions)}"


def use_label(op: Operation, use: BlockUse, positions: tuple[int, ...]) -> str:
    return f"{use.symbol}{display_index(op, use.index, positions)}"


def held_label(op: Operation, target: tuple[int, ...], positions: tuple[int, ...]) -> str:
    eq = op.equation_for(target)
    d = display_index(op, target, positions)
    # packed factors show as LU11: L11 below the diagonal, U11 on and above it (the README defines it once)
    return "".join(eq.holds.split(",")) + d


def finish_product(op: Operation, target: tuple[int, ...], positions: tuple[int, ...]) -> str:
    eq = op.equation_for(target)
    d = display_index(op, target, positions)
    if eq.finish.kind == "factor":
        return " ".join(f"{s}{d}" for s in eq.holds.split(","))
    tri = use_label(op, bind(eq.finish.tri, target, None), positions)
    mine = f"{eq.holds}{d}"
    return f"{tri} {mine}" if eq.finish.side == "left" else f"{mine} {tri}"


def equation_text(op: Operation, target: tuple[int, ...], positions: tuple[int, ...]) -> str:
    eq = op.equation_for(target)
    terms = [" ".join(use_label(op, u, positions) for u in term_uses(eq, target, k))
             for k in sorted(summation_set(target, positions))]
    terms.append(finish_product(op, target, positions))
    return f"{block_label(op, target, positions)} = " + " + ".join(terms)


def content_text(op: Operation, target: tuple[int, ...], c: Content, positions: tuple[int, ...]) -> str:
    if c.final:
        return held_label(op, target, positions)
    eq = op.equation_for(target)
    s = block_label(op, target, positions)
    for k in sorted(c.done):
        s += " - " + " ".join(use_label(op, u, positions) for u in term_uses(eq, target, k))
    return s


# -- the 2x2 partition ----------------------------------------------------------------------------------------------

TWO_WAY = (1, 2)


def check(op: Operation, words: tuple[str, ...]) -> None:
    """Raise InfeasibleInvariant unless `words` (one per region) is a loop invariant the engine can maintain."""
    if len(words) != len(op.regions):
        raise InfeasibleInvariant(f"{op.name}: an invariant names {len(op.regions)} regions, got {len(words)}")
    processed = frozenset({1})
    contents = {}
    for region, word in zip(op.regions, words):
        if word not in region.words:
            raise InfeasibleInvariant(
                f"{region.label}: state {word!r} is not one of {', '.join(region.words)}")
        contents[region.position] = (region, word, content_of(region.content_of(word), region.position, processed))
    # closed under dependencies: every block a state's equation reads must be final in the invariant
    for pos, (region, word, c) in contents.items():
        for use, why in needs(op, pos, c, TWO_WAY):
            other, oword, oc = contents[use.index]
            if not oc.final:
                finals = [w for w, kind in other.states if kind == FINAL]
                raise InfeasibleInvariant(
                    f"{region.label} '{word}' holds {content_text(op, pos, c, TWO_WAY)} "
                    f"(from {equation_text(op, pos, TWO_WAY)}), which needs {use_label(op, use, TWO_WAY)}; "
                    f"but {other.label} is '{oword}' and holds {use_label(op, use, TWO_WAY)} only when "
                    f"'{finals[0]}'")
    # true before the loop: nothing is processed, the unprocessed region is the whole matrix and holds its input
    for pos, (region, word, c) in contents.items():
        if all(p == 2 for p in pos):
            start = content_of(region.content_of(word), pos, frozenset())
            if start != INPUT_CONTENT:
                raise InfeasibleInvariant(
                    f"before the loop {region.label} is all of {op.target} and holds its input, "
                    f"so it cannot be '{word}'")
    # implies the postcondition: when the loop ends the processed region is the whole matrix and must be final
    for pos, (region, word, c) in contents.items():
        if all(p == 1 for p in pos) and not c.final:
            finals = [w for w, kind in region.states if kind == FINAL]
            raise InfeasibleInvariant(
                f"when the loop ends {region.label} is all of {op.target} and must be '{finals[0]}' "
                f"({equation_text(op, pos, TWO_WAY)}), but the invariant keeps it '{word}'")


def make(op: Operation, words: tuple[str, ...]) -> Invariant:
    check(op, words)
    return Invariant(op.name, words, op.name_of(words))


def enumerate_invariants(op: Operation) -> list[Invariant]:
    """Every feasible invariant of the 2x2 partition, in a fixed order (fewest finished blocks first)."""
    found = []
    for words in product(*(r.words for r in op.regions)):
        try:
            found.append(make(op, tuple(words)))
        except InfeasibleInvariant:
            continue
    def weight(inv: Invariant) -> tuple:
        kinds = [r.content_of(w) for r, w in zip(op.regions, inv.words)]
        return (sum(k != INPUT for k in kinds), [k != INPUT for k in kinds][::-1])
    return sorted(found, key=weight)


def by_name(op: Operation, name: str) -> Invariant:
    words = op.words_of(name)
    if words is None:
        known = ", ".join(n for _, n in op.names)
        raise KeyError(f"{op.name}: no loop ordering named {name!r}; known: {known}")
    return make(op, words)


def from_mapping(op: Operation, states: dict[str, str]) -> Invariant:
    """An invariant written as {region label: state word}; regions with a single possible final-only role
    may be left out only if the operation has exactly one feasible word for them."""
    labels = [r.label for r in op.regions]
    unknown = [k for k in states if k not in labels]
    if unknown:
        raise InfeasibleInvariant(f"unknown block {unknown[0]!r}; blocks are {', '.join(labels)}")
    words = []
    for r in op.regions:
        if r.label in states:
            words.append(states[r.label])
        else:
            finals = [w for w, kind in r.states if kind == FINAL]
            if all(p == 1 for p in r.position) and finals:
                words.append(finals[0])   # the processed region is always finished
            else:
                raise InfeasibleInvariant(f"the invariant must give a state for {r.label} "
                                          f"(one of {', '.join(r.words)})")
    return make(op, tuple(words))
