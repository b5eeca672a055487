"""The loop IR: routines, loops and block-level statements as frozen values. It says what happens to which index
ranges of which matrix; it knows nothing of C or NumPy syntax (that is the printers' business)."""
from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class Lin:
    """An integer linear expression over named sizes and loop indices: const + sum(coeff * name)."""
    terms: tuple[tuple[str, int], ...] = ()
    const: int = 0

    def __post_init__(self) -> None:
        names = [n for n, _ in self.terms]
        if names != sorted(set(names)) or any(c == 0 for _, c in self.terms):
            raise ValueError(f"Lin terms must be sorted, unique and nonzero: {self.terms}")

    @staticmethod
    def of(x: "Lin | str | int") -> "Lin":
        if isinstance(x, Lin):
            return x
        if isinstance(x, int):
            return Lin((), x)
        return Lin(((x, 1),), 0)

    def _combine(self, other: "Lin | str | int", sign: int) -> "Lin":
        o = Lin.of(other)
        acc = dict(self.terms)
        for n, c in o.terms:
            acc[n] = acc.get(n, 0) + sign * c
        return Lin(tuple(sorted((n, c) for n, c in acc.items() if c)), self.const + sign * o.const)

    def __add__(self, other):
        return self._combine(other, 1)

    def __sub__(self, other):
        return self._combine(other, -1)

    def is_const(self) -> bool:
        return not self.terms

    def evaluate(self, env: dict[str, int]) -> int:
        return self.const + sum(c * env[n] for n, c in self.terms)

    def substitute(self, env: dict[str, int]) -> "Lin":
        """Replace the names that `env` knows by their values (a partial evaluation)."""
        rest = tuple((n, c) for n, c in self.terms if n not in env)
        return Lin(rest, self.const + sum(c * env[n] for n, c in self.terms if n in env))


def lin(x: "Lin | str | int") -> Lin:
    return Lin.of(x)


@dataclass(frozen=True, slots=True)
class Span:
    """Half-open index range [lo, hi)."""
    lo: Lin
    hi: Lin

    @property
    def size(self) -> Lin:
        return self.hi - self.lo

    def is_unit(self) -> bool:
        return self.size == Lin((), 1)


@dataclass(frozen=True, slots=True)
class Block:
    """A rectangular block of a matrix argument."""
    matrix: str
    rows: Span
    cols: Span


# -- statements ---------------------------------------------------------------------------------------------------

SHAPES = ("gemm", "gemv_n", "gemv_t", "ger", "dot")
DIVISIONS = ("divide", "reciprocal")


@dataclass(frozen=True, slots=True)
class Gemm:
    """c -= a * b. `shape` names the BLAS-like kind its sizes make it (dot, gemv_n, gemv_t, ger, gemm)."""
    c: Block
    a: Block
    b: Block
    shape: str
    source: str

    def __post_init__(self) -> None:
        if self.shape not in SHAPES:
            raise ValueError(f"Gemm shape {self.shape!r} not in {SHAPES}")


@dataclass(frozen=True, slots=True)
class Trsm:
    """b := tri^-1 b (side left) or b tri^-1 (side right), tri unit-lower ("L") or upper ("U")."""
    b: Block
    tri: Block
    side: str
    uplo: str
    source: str
    by: str = "divide"      # or "reciprocal": multiply by 1/U(p,p) (see Scale)

    def __post_init__(self) -> None:
        if self.side not in ("left", "right") or self.uplo not in ("L", "U"):
            raise ValueError("Trsm side must be left/right and uplo L/U")
        if self.by not in DIVISIONS:
            raise ValueError(f"Trsm by {self.by!r} not in {DIVISIONS}")


@dataclass(frozen=True, slots=True)
class Scale:
    """b := b / pivot, pivot a 1x1 block (a triangular solve with a 1x1 upper factor). `by` = "reciprocal"
    multiplies by 1/pivot instead: one more rounding per entry, but the division leaves the critical path."""
    b: Block
    pivot: Block
    source: str
    by: str = "divide"

    def __post_init__(self) -> None:
        if self.by not in DIVISIONS:
            raise ValueError(f"Scale by {self.by!r} not in {DIVISIONS}")


@dataclass(frozen=True, slots=True)
class FactorCall:
    """Factor `block` by the unblocked routine `routine`; a nonzero code is offset by the block's first index.
    With `ipiv` the routine pivots within the block (a tall panel) and its pivot indices are offset too."""
    block: Block
    routine: str
    pivoted: bool
    source: str


@dataclass(frozen=True, slots=True)
class PivotCheck:
    """An exactly zero 1x1 pivot: record or stop with code index+1 (the routine's on_zero says which)."""
    pivot: Block
    source: str


@dataclass(frozen=True, slots=True)
class PivotSearch:
    """Partial pivoting on one column: choose the first entry of largest magnitude in `column` (rows from the
    diagonal down), record its row in ipiv, exchange it with the diagonal entry, then divide the entries below by
    it unless it is exactly zero (then record the code)."""
    column: Block
    source: str
    by: str = "branch"

    def __post_init__(self) -> None:
        if self.by not in CHOICES:
            raise ValueError(f"PivotSearch by {self.by!r} not in {CHOICES}")


# "branch": skip what need not be done (an interchange of a row with itself, a zero pivot's division);
# "select": the same instruction sequence whatever the values (choices by selects, interchanges always done)
CHOICES = ("branch", "select")


@dataclass(frozen=True, slots=True)
class RowSwaps:
    """Apply the interchanges recorded for steps `steps` to the columns `cols` of `matrix`."""
    matrix: str
    cols: Span
    steps: Span
    source: str
    by: str = "branch"

    def __post_init__(self) -> None:
        if self.by not in CHOICES:
            raise ValueError(f"RowSwaps by {self.by!r} not in {CHOICES}")


@dataclass(frozen=True, slots=True)
class Loop:
    """for var in 0, step, ... < extent; kb = min(step, extent - var) is the current block size.
    With `halves` the loop makes two steps, kb = ceil(extent / 2) and then the rest (a recursive split)."""
    var: str
    extent: Lin
    step: int
    body: tuple
    invariant: str
    partition: str
    halves: bool = False

    def __post_init__(self) -> None:
        if self.step < 1:
            raise ValueError("loop step must be >= 1")
        if self.halves and self.step != 2:
            raise ValueError("a loop over halves makes two steps: give step 2")


@dataclass(frozen=True, slots=True)
class Leaf:
    """A recursion's base case: when the block has at most `limit` columns (`cols`), factor it by `routine`
    and return what that returns."""
    cols: str
    limit: int
    routine: str
    source: str

    def __post_init__(self) -> None:
        if self.limit < 1:
            raise ValueError("a recursion's leaf must hold at least one column")


@dataclass(frozen=True, slots=True)
class Step:
    """One iteration of a loop unrolled for a known extent: the loop variable is `value`, the block size
    `size`; the body's index ranges are constants. The invariant and the partition stay as comments."""
    var: str
    value: int
    size: int
    count: int          # steps of the whole unrolled loop, for the comment
    body: tuple
    invariant: str
    partition: str

    def __post_init__(self) -> None:
        if self.value < 0 or self.size < 1:
            raise ValueError("a step needs value >= 0 and size >= 1")


@dataclass(frozen=True, slots=True)
class OneColumn:
    """Run `special` when the size `var` equals 1 (its statements specialised for that), else `general`."""
    var: str
    special: tuple
    general: tuple
    source: str


@dataclass(frozen=True, slots=True)
class Call:
    """Call another routine of the same kernel with the whole arguments."""
    routine: str
    source: str


@dataclass(frozen=True, slots=True)
class Param:
    name: str
    kind: str       # "size", "matrix", "const_matrix", "pivots", "const_pivots"; batched: "count", "codes"

    def __post_init__(self) -> None:
        if self.kind not in ("size", "matrix", "const_matrix", "pivots", "const_pivots", "count", "codes"):
            raise ValueError(f"Param kind {self.kind!r}")


@dataclass(frozen=True, slots=True)
class Routine:
    """A function of the kernel. role: 'factor' / 'solve' are public; the rest are internal helpers."""
    name: str
    role: str
    params: tuple[Param, ...]
    body: tuple
    on_zero: str | None         # "stop" (return index+1), "record" (keep the first, go on) or None
    doc: str
    matrices: tuple[tuple[str, str], ...]   # matrix argument -> its leading dimension argument
    extents: tuple[tuple[str, str], ...] = ()   # matrix argument -> (rows name, cols name) as "rows,cols"

    def __post_init__(self) -> None:
        if self.on_zero not in (None, "stop", "record"):
            raise ValueError("on_zero must be stop, record or None")


@dataclass(frozen=True, slots=True)
class Kernel:
    name: str
    routines: tuple[Routine, ...]

    def routine(self, name: str) -> Routine:
        for r in self.routines:
            if r.name == name:
                return r
        raise KeyError(name)


def walk(body) -> list:
    """Every statement of a body, loops included, in order."""
    out = []
    for s in body:
        out.append(s)
        if isinstance(s, (Loop, Step)):
            out.extend(walk(s.body))
        elif isinstance(s, OneColumn):
            out.extend(walk(s.special))
            out.extend(walk(s.general))
    return out
