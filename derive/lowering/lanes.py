"""Lanes lowering: a kernel's loop IR for one matrix becomes the same IR over W matrices stored interleaved element
by element; every statement runs across the lanes, and pivot search and interchanges become per-lane selects."""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass

from derive.lowering.ir import (Block, Call, FactorCall, Gemm, Kernel, Lin, Loop, OneColumn, Param, PivotCheck,
                                PivotSearch, RowSwaps, Routine, Scale, Span, Step, Trsm, lin)
from derive.lowering.printing import dump_stmt, show_block, show_lin, show_span
from derive.options import KernelOptions
from derive.targets.storage import LAYOUTS


def _width(w: int) -> None:
    if not isinstance(w, int) or w < 1:
        raise ValueError(f"lane width must be a positive integer, got {w!r}")


@dataclass(frozen=True, slots=True)
class OverLanes:
    """The scalar statement `stmt` (a GEMM-like update, triangular solve or scaling) done in each of `width`
    interleaved matrices at once. The lanes are the innermost loop, so it vectorizes with no shuffles."""
    stmt: Gemm | Trsm | Scale
    width: int

    def __post_init__(self) -> None:
        _width(self.width)
        if not isinstance(self.stmt, (Gemm, Trsm, Scale)):
            raise TypeError(f"OverLanes wraps Gemm, Trsm or Scale, not {type(self.stmt).__name__}")


@dataclass(frozen=True, slots=True)
class SelectPivot:
    """Partial pivoting on one column in every lane at once: each lane's own pivot row (its first entry of largest
    magnitude), interchange, division and zero-pivot code, chosen by selects so no lane's data steers another."""
    column: Block
    width: int
    source: str

    def __post_init__(self) -> None:
        _width(self.width)
        if not self.column.cols.is_unit():
            raise ValueError("SelectPivot works on one column")


@dataclass(frozen=True, slots=True)
class SelectSwaps:
    """Each lane's own recorded interchanges for `steps`, applied to the columns `cols` of `matrix` by selects
    over the rows below each step (the matrix has `rows` rows), so every lane runs the same instructions."""
    matrix: str
    cols: Span
    steps: Span
    rows: Lin
    width: int
    source: str

    def __post_init__(self) -> None:
        _width(self.width)


@dataclass(frozen=True, slots=True)
class LaneFactorCall:
    """The pivoted panel `block` of every lane factored by the unblocked lane routine `routine`; each lane's pivot
    rows and zero-pivot code come back relative to the panel and are offset by its first row, lane by lane."""
    block: Block
    routine: str
    width: int
    source: str

    def __post_init__(self) -> None:
        _width(self.width)


@dataclass(frozen=True, slots=True)
class Groups:
    """For each group of `width` matrices (the last may be partial), call `routine` on that group. Matrix
    arguments advance by rows x cols x width, pivots by n and codes by one per matrix. `binds` are the routine's
    sizes that the batched ABI fixes (leading dimensions, one right-hand side, the pivot stride)."""
    routine: str
    width: int
    binds: tuple[tuple[str, Lin], ...]
    source: str

    def __post_init__(self) -> None:
        _width(self.width)


LANE_COUNT = Param("nl", "size")        # lanes in use in this group: width, or fewer in the last group
PIVOT_STRIDE = Param("ips", "size")     # ipiv[l * ips + k]: lane l's pivot of step k (ips = n)
LANE_CODES = Param("info", "codes")     # info[l]: lane l's zero-pivot code


def lane_body(body: tuple, width: int, rows_of: dict[str, Lin]) -> tuple:
    """Scalar statements as statements over `width` lanes."""
    out = []
    for s in body:
        if isinstance(s, OneColumn):
            # a batched solve has one right-hand side per matrix: the one-column statements are the solve
            out += lane_body(s.special, width, rows_of)
        else:
            out.append(lane_stmt(s, width, rows_of))
    return tuple(out)


def lane_stmt(s, width: int, rows_of: dict[str, Lin]):
    """One scalar statement as a statement over `width` lanes."""
    if isinstance(s, (Loop, Step)):      # a loop, or one step of a loop unrolled for a fixed size
        return dataclasses.replace(s, body=lane_body(s.body, width, rows_of))
    if isinstance(s, (Gemm, Trsm, Scale)):
        return OverLanes(s, width)
    # the pivot search and the interchanges come as selects where the fixed-size lowering made them so
    # (constant time); per lane they are selects either way
    if isinstance(s, PivotSearch):
        return SelectPivot(s.column, width, s.source)
    if isinstance(s, RowSwaps):
        return SelectSwaps(s.matrix, s.cols, s.steps, rows_of[s.matrix], width, s.source)
    if isinstance(s, FactorCall) and s.pivoted:
        return LaneFactorCall(s.block, s.routine, width, s.source)
    if isinstance(s, Call):
        return s
    if isinstance(s, (FactorCall, PivotCheck)):
        # a lane cannot stop alone; the options refuse lanes without pivoting, so this is a lowering bug
        raise ValueError("lanes need a pivoted kernel: an unpivoted zero-pivot stop cannot be done per lane")
    raise TypeError(type(s))


def _lane_routine(r: Routine, width: int, name: str, role: str) -> Routine:
    rows_of = {m: lin(int(e) if e.isdigit() else e) for m, e in ((m, ext.split(",")[0]) for m, ext in r.extents)}
    params: list[Param] = []
    for p in r.params:
        params.append(p)
        if p.kind in ("pivots", "const_pivots"):
            params.append(PIVOT_STRIDE)
    if r.on_zero == "record":
        params.append(LANE_CODES)
    params.append(LANE_COUNT)
    body = lane_body(r.body, width, rows_of)
    return Routine(name, role, tuple(params), body, r.on_zero, f"{r.doc}, in each lane of a group", r.matrices,
                   r.extents)


def lower_lanes(scalar: Kernel, o: KernelOptions) -> Kernel:
    """The batched kernel of options `o` from the single-matrix kernel `scalar` lowered from the same derivation:
    every routine runs over one group of lanes; the public routines loop over the groups."""
    w = o.lanes
    name = o.name
    n = lin(o.size) if o.size else lin("n")        # a fixed size is a constant everywhere, else the argument n
    sized = (Param("n", "size"),) if not o.size else ()
    ext = f"{o.size},{o.size}" if o.size else "n,n"
    routines = []
    for r in scalar.routines:
        if r.role == "factor":
            routines.append(_lane_routine(r, w, f"{name}_group", "group"))
        elif r.role == "solve":
            routines.append(_lane_routine(r, w, f"{name}_solve_group", "group"))
        else:
            routines.append(_lane_routine(r, w, r.name, r.role))
    # b holds one right-hand side per matrix, an n x 1 matrix in the layout with the leading dimension its
    # leading extent asks for (n column-major, 1 row-major): then element i is at offset i, as the ABI says
    ldb = n if LAYOUTS[o.layout].leading == "rows" else lin(1)
    count = Param("count", "count")
    routines.append(Routine(
        name, "factor", (count, *sized, Param("a", "matrix"), Param("ipiv", "pivots"), LANE_CODES),
        (Groups(f"{name}_group", w, (("lda", n), ("ips", n)), "factor each group of lanes"),), None,
        "batched LU factorization with partial pivoting", (), (("a", ext),)))
    routines.append(Routine(
        f"{name}_solve", "solve", (count, *sized, Param("lu", "const_matrix"), Param("ipiv", "const_pivots"),
                                   Param("b", "matrix")),
        (Groups(f"{name}_solve_group", w, (("nrhs", lin(1)), ("lda", n), ("ldb", ldb), ("ips", n)),
                "solve each group of lanes, one right-hand side per matrix"),), None,
        "batched solve with the factorization", (), (("lu", ext), ("b", ext.split(",")[0] + ",1"))))
    return Kernel(name, tuple(routines))


def dump_lane_stmt(s, indent: str = "") -> list[str]:
    """`luforge derive --ir` text of the lane statements (the scalar ones print as before)."""
    if isinstance(s, Loop):
        head = dump_stmt(Loop(s.var, s.extent, s.step, (), s.invariant, s.partition), indent)
        return head + [ln for t in s.body for ln in dump_lane_stmt(t, indent + "  ")]
    if isinstance(s, Step):
        head = dump_stmt(dataclasses.replace(s, body=()), indent)
        return head + [ln for t in s.body for ln in dump_lane_stmt(t, indent + "  ")]
    if isinstance(s, OverLanes):
        return [f"{indent}over {s.width} lanes: {ln.lstrip()}" for ln in dump_stmt(s.stmt)]
    if isinstance(s, SelectPivot):
        return [f"{indent}per-lane pivot by selects: choose in {show_block(s.column)}, interchange, scale below by its reciprocal"
                f"    [{s.source}]"]
    if isinstance(s, SelectSwaps):
        return [f"{indent}per-lane interchanges by selects: rows of {s.matrix}[.]{show_span(s.cols)} for steps "
                f"{show_span(s.steps)} over rows [0, {show_lin(s.rows)})    [{s.source}]"]
    if isinstance(s, LaneFactorCall):
        return [f"{indent}call {s.routine} on pivoted panel {show_block(s.block)} of every lane    [{s.source}]"]
    if isinstance(s, Groups):
        binds = ", ".join(f"{k} = {show_lin(v)}" for k, v in s.binds)
        return [f"{indent}for each group of {s.width} matrices: call {s.routine} ({binds})    [{s.source}]"]
    return dump_stmt(s, indent)


def dump_lane_routine(r: Routine) -> str:
    params = ", ".join(p.name for p in r.params)
    lines = [f"routine {r.name}({params})  role={r.role}" + (f" on_zero={r.on_zero}" if r.on_zero else "")]
    for s in r.body:
        lines += dump_lane_stmt(s, "  ")
    return "\n".join(lines)
