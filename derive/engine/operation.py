"""Operations as data: each operation's block equations, the states its 2x2 regions may hold, and its trade names.
The engine (invariants, derivation, lowering) reads only these tables; nothing downstream knows which operation it has."""
from __future__ import annotations

from dataclasses import dataclass, field

# What a block can hold, in the content calculus of derive.content:
INPUT = "input"      # the block still holds its input value
PARTIAL = "partial"  # input minus every product term whose summation index is already processed
FINAL = "final"      # the finished value (a factor, or a solution block)

CONTENT_KINDS = (INPUT, PARTIAL, FINAL)


@dataclass(frozen=True, slots=True)
class Ref:
    """A block named in an equation: the matrix that stores it, the symbol it is read as, and its index variables."""
    matrix: str
    symbol: str                 # "L", "U" or "X": how the block is read (unit-lower factor, upper factor, whole)
    index: tuple[str, ...]      # index variables, e.g. ("i", "k")

    def __post_init__(self) -> None:
        if self.symbol not in ("L", "U", "X"):
            raise ValueError(f"Ref symbol must be L, U or X, not {self.symbol!r}")


@dataclass(frozen=True, slots=True)
class Finish:
    """The last step that turns a fully updated block into its final value.

    kind "factor" factors the block itself; kind "trsm" solves with the triangular block `tri` from `side`.
    """
    kind: str
    side: str | None = None
    tri: Ref | None = None

    def __post_init__(self) -> None:
        if self.kind not in ("factor", "trsm"):
            raise ValueError(f"Finish kind must be factor or trsm, not {self.kind!r}")
        if (self.kind == "trsm") != (self.tri is not None and self.side in ("left", "right")):
            raise ValueError("a trsm finish needs side left/right and a triangular operand; a factor finish neither")


@dataclass(frozen=True, slots=True)
class Equation:
    """One block equation: target(t) = sum over k preceding t of left(k) right(k) + the finishing product.

    `where` is the relation between the target's two indices that selects this equation ("i=j", "i<j", "i>j"),
    or "" for a one-index target. `holds` names what the finished block is (symbol used when others read it).
    """
    where: str
    left: Ref
    right: Ref
    finish: Finish
    holds: str                  # e.g. "L,U" (both factors packed in the block, shown LU11), "U", "L", "X"

    def __post_init__(self) -> None:
        if self.where not in ("", "i=j", "i<j", "i>j"):
            raise ValueError(f"Equation.where {self.where!r} is not one of '', i=j, i<j, i>j")


@dataclass(frozen=True, slots=True)
class Region:
    """A block of the 2x2 partition (positions 1 = processed, 2 = not yet), with the state words it may hold."""
    label: str
    position: tuple[int, ...]
    states: tuple[tuple[str, str], ...]   # (state word, content kind)

    def content_of(self, word: str) -> str:
        for w, kind in self.states:
            if w == word:
                return kind
        raise KeyError(word)

    @property
    def words(self) -> tuple[str, ...]:
        return tuple(w for w, _ in self.states)


@dataclass(frozen=True, slots=True)
class PivotRule:
    """Interchanges chosen inside a panel. The panel is the blocks whose `panel_axis` index is the current
    position and whose `exchange_axis` index is the current position or later; the pivot is chosen along the
    exchange axis and the interchanges then act along it in every other block of the panel axis.
    Partial (row) pivoting of LU: panel_axis 1 (the current block column), exchange_axis 0 (rows)."""
    name: str                   # the spec's word for it, e.g. "partial"
    panel_axis: int = 1
    exchange_axis: int = 0

    def __post_init__(self) -> None:
        if {self.panel_axis, self.exchange_axis} != {0, 1}:
            raise ValueError("a pivot rule needs one panel axis and one exchange axis of a 2-index target")

    def in_panel(self, t: tuple[int, ...], current: int) -> bool:
        return t[self.panel_axis] == current and t[self.exchange_axis] >= current

    def exchanged(self, t: tuple[int, ...], current: int) -> bool:
        """Whether the interchanges of the current step reach block t."""
        return len(t) == 2 and t[self.exchange_axis] >= current


@dataclass(frozen=True, slots=True)
class Operation:
    name: str
    summary: str
    target: str                 # the matrix that is overwritten
    rank: int                   # 2: blocks indexed (row, col); 1: row blocks of all columns
    inputs: tuple[str, ...]     # read-only matrices
    regions: tuple[Region, ...]
    equations: tuple[Equation, ...]
    direction: str = "forward"  # "forward": the processed part is leading; "backward": trailing
    pivot_rules: tuple[PivotRule, ...] = ()
    names: tuple[tuple[tuple[str, ...], str], ...] = field(default=())   # state words in region order -> name
    block_prefix: str = "A"     # how blocks of the target are labelled (A11, B1, ...)

    def __post_init__(self) -> None:
        if self.direction not in ("forward", "backward"):
            raise ValueError("direction must be forward or backward")
        for r in self.regions:
            if len(r.position) != self.rank:
                raise ValueError(f"region {r.label} has {len(r.position)} indices, operation rank is {self.rank}")
            for _, kind in r.states:
                if kind not in CONTENT_KINDS:
                    raise ValueError(f"region {r.label}: content kind {kind!r} not in {CONTENT_KINDS}")

    def equation_for(self, index: tuple[int, ...]) -> Equation:
        if self.rank == 1:
            return self.equations[0]
        i, j = index
        rel = "i=j" if i == j else ("i<j" if i < j else "i>j")
        for e in self.equations:
            if e.where == rel:
                return e
        raise KeyError(rel)

    def region(self, label: str) -> Region:
        for r in self.regions:
            if r.label == label:
                return r
        raise KeyError(label)

    def name_of(self, words: tuple[str, ...]) -> str | None:
        for w, n in self.names:
            if w == words:
                return n
        return None

    def words_of(self, name: str) -> tuple[str, ...] | None:
        for w, n in self.names:
            if n == name:
                return w
        return None


_PRODUCT_L = Ref("A", "L", ("i", "k"))
_PRODUCT_U = Ref("A", "U", ("k", "j"))

LU = Operation(
    name="lu",
    summary="A = L U with L unit lower triangular and U upper triangular, in place",
    target="A",
    rank=2,
    inputs=(),
    regions=(
        Region("A11", (1, 1), (("input", INPUT), ("factored", FINAL))),
        Region("A12", (1, 2), (("input", INPUT), ("solved", FINAL))),
        Region("A21", (2, 1), (("input", INPUT), ("solved", FINAL))),
        Region("A22", (2, 2), (("input", INPUT), ("updated", PARTIAL))),
    ),
    equations=(
        # A_ii = sum_k L_ik U_ki + L_ii U_ii
        Equation("i=j", _PRODUCT_L, _PRODUCT_U, Finish("factor"), holds="L,U"),
        # A_ij = sum_k L_ik U_kj + L_ii U_ij   (i < j): U_ij by a solve with the unit-lower L_ii
        Equation("i<j", _PRODUCT_L, _PRODUCT_U, Finish("trsm", "left", Ref("A", "L", ("i", "i"))), holds="U"),
        # A_ij = sum_k L_ik U_kj + L_ij U_jj   (i > j): L_ij by a solve with the upper U_jj from the right
        Equation("i>j", _PRODUCT_L, _PRODUCT_U, Finish("trsm", "right", Ref("A", "U", ("j", "j"))), holds="L"),
    ),
    pivot_rules=(PivotRule("partial"),),
    names=(
        (("factored", "input", "input", "input"), "bordered"),
        (("factored", "solved", "input", "input"), "up-looking"),
        (("factored", "input", "solved", "input"), "left-looking"),
        (("factored", "solved", "solved", "input"), "crout"),
        (("factored", "solved", "solved", "updated"), "right-looking"),
    ),
)

# L X = B, L unit lower triangular (the strict lower part of a packed LU), B overwritten by X.
LOWER_SOLVE = Operation(
    name="lower-solve",
    summary="X = L^-1 B with L the unit lower triangular factor of a packed LU, B overwritten by X",
    target="B",
    rank=1,
    inputs=("LU",),
    regions=(
        Region("B1", (1,), (("input", INPUT), ("solved", FINAL))),
        Region("B2", (2,), (("input", INPUT), ("updated", PARTIAL))),
    ),
    equations=(
        Equation("", Ref("LU", "L", ("i", "k")), Ref("B", "X", ("k",)),
                 Finish("trsm", "left", Ref("LU", "L", ("i", "i"))), holds="X"),
    ),
    names=(
        (("solved", "input"), "inner-product"),
        (("solved", "updated"), "outer-product"),
    ),
    block_prefix="B",
)

# U X = B, U upper triangular; processed from the last row block up.
UPPER_SOLVE = Operation(
    name="upper-solve",
    summary="X = U^-1 B with U the upper triangular factor of a packed LU, B overwritten by X",
    target="B",
    rank=1,
    inputs=("LU",),
    # labels follow storage order: the processed (trailing) region is B2
    regions=(
        Region("B2", (1,), (("input", INPUT), ("solved", FINAL))),
        Region("B1", (2,), (("input", INPUT), ("updated", PARTIAL))),
    ),
    equations=(
        Equation("", Ref("LU", "U", ("i", "k")), Ref("B", "X", ("k",)),
                 Finish("trsm", "left", Ref("LU", "U", ("i", "i"))), holds="X"),
    ),
    direction="backward",
    names=LOWER_SOLVE.names,
    block_prefix="B",
)

OPERATIONS: dict[str, Operation] = {op.name: op for op in (LU, LOWER_SOLVE, UPPER_SOLVE)}


def get(name: str) -> Operation:
    try:
        return OPERATIONS[name]
    except KeyError:
        raise KeyError(f"unknown operation {name!r}; known: {', '.join(OPERATIONS)}") from None
