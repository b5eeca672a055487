"""Lowering: a derivation's block updates become loop IR over index ranges for one block size, and a kernel's
options become its routines (factor, the inner unblocked loop, the two triangular solves, the solve driver)."""
from __future__ import annotations

from derive.engine import operation
from derive.engine.derivation import THREE_WAY, Derivation, derive
from derive.engine.invariants import TWO_WAY, content_of, content_text, make
from derive.lowering.ir import (Block, Call, FactorCall, Gemm, Kernel, Leaf, Loop, Param, PivotCheck, PivotSearch,
                                RowSwaps,
                 Routine, Scale, Span, Trsm, lin)
from derive.engine.operation import Operation
from derive.options import KernelOptions
from derive.lowering.printing import show_span
from derive.targets.table import get as get_target

K = "k"
KB = "kb"


class Frame:
    """How partition positions 0/1/2 map to index ranges for one loop: processed, current, remaining."""

    def __init__(self, op: Operation, step: int):
        self.op = op
        self.kb = lin(1) if step == 1 else lin(KB)

    def span(self, position: int, extent: str) -> Span:
        k, kb, e = lin(K), self.kb, lin(extent)
        if self.op.direction == "forward":
            bounds = [(lin(0), k), (k, k + kb), (k + kb, e)]
        else:
            bounds = [(e - k, e), (e - k - kb, e - k), (lin(0), e - k - kb)]
        lo, hi = bounds[position]
        return Span(lo, hi)

    def union(self, positions: list[int], extent: str) -> Span:
        spans = [self.span(p, extent) for p in sorted(positions)]
        if self.op.direction == "forward":
            return Span(spans[0].lo, spans[-1].hi)
        return Span(spans[-1].lo, spans[0].hi)


class Shapes:
    """Matrix arguments of a routine: op matrix name -> (argument, rows extent, cols extent)."""

    def __init__(self, args: dict[str, tuple[str, str, str]]):
        self.args = args

    def block(self, frame: Frame, matrix: str, index: tuple[int, ...]) -> Block:
        arg, rows, cols = self.args[matrix]
        r = frame.span(index[0], rows)
        c = frame.span(index[1], cols) if len(index) > 1 else Span(lin(0), lin(cols))
        return Block(arg, r, c)


def gemm_shape(c: Block, a: Block) -> str:
    m1, n1, k1 = c.rows.is_unit(), c.cols.is_unit(), a.cols.is_unit()
    if m1 and n1:
        return "dot"
    if n1:
        return "gemv_n"
    if m1:
        return "gemv_t"
    if k1:
        return "ger"
    return "gemm"


def lower_updates(d: Derivation, step: int, shapes: Shapes, inner: str | None) -> tuple:
    op = d.operation
    frame = Frame(op, step)
    tgt = op.target
    out = []
    for u in d.updates:
        blk = lambda idx, m=tgt: shapes.block(frame, m, idx)  # noqa: E731
        if u.kind == "gemm":
            c = blk(u.targets[0])
            a, b = (shapes.block(frame, r.matrix, r.index) for r in u.reads)
            out.append(Gemm(c, a, b, gemm_shape(c, a), u.source))
        elif u.kind == "trsm":
            (tri_use,) = u.reads
            tri = shapes.block(frame, tri_use.matrix, tri_use.index)
            b = blk(u.targets[0])
            if tri.rows.is_unit():
                if tri_use.symbol == "U":
                    out.append(Scale(b, tri, u.source))
                # a 1x1 unit-lower factor is the identity: nothing to do
            else:
                out.append(Trsm(b, tri, u.side, tri_use.symbol, u.source))
        elif u.kind == "factor":
            b = blk(u.targets[0])
            out.append(PivotCheck(b, u.source) if step == 1 else FactorCall(b, inner, False, u.source))
        elif u.kind == "panel":
            arg, rows, cols = shapes.args[tgt]
            rule = {r.name: r for r in op.pivot_rules}[d.pivoting]
            extents = (rows, cols)
            spans = [None, None]
            e, p = rule.exchange_axis, rule.panel_axis
            spans[e] = frame.union([t[e] for t in u.targets], extents[e])
            spans[p] = frame.span(u.targets[0][p], extents[p])
            panel = Block(arg, spans[0], spans[1])
            out.append(PivotSearch(panel, u.source) if step == 1 else FactorCall(panel, inner, True, u.source))
        elif u.kind == "swap":
            arg, rows, cols = shapes.args[tgt]
            which = "left" if u.column < 1 else "right"
            out.append(RowSwaps(arg, frame.span(u.column, cols), frame.span(1, rows),
                                f"the panel's interchanges, applied to the columns {which} of it"))
        else:
            raise AssertionError(u.kind)
    return tuple(out)


def invariant_text(op: Operation, words: tuple[str, ...], label: str) -> str:
    parts = []
    for r, w in zip(op.regions, words):
        c = content_of(r.content_of(w), r.position, frozenset({1}))
        parts.append(f"{r.label} {w} (holds {content_text(op, r.position, c, TWO_WAY)})")
    return f"{label}: " + "; ".join(parts)


def partition_text(op: Operation, frame: Frame, rows: str, cols: str) -> str:
    """Index ranges of positions 0 (processed), 1 (current) and 2 (remaining), by rows and, if they differ,
    by columns."""
    def ranges(extent: str) -> str:
        return ", ".join(f"{p}: {show_span(frame.span(p, extent))}" for p in THREE_WAY)
    if op.rank == 1 or rows == cols:
        return ranges(rows)
    return f"rows {ranges(rows)}; columns {ranges(cols)}"


def lower_loop(d: Derivation, step: int, shapes: Shapes, extent: str, inner: str | None, label: str,
               halves: bool = False) -> Loop:
    op = d.operation
    body = lower_updates(d, step, shapes, inner)
    _, rows, cols = shapes.args[op.target]
    part = partition_text(op, Frame(op, step), rows, cols)
    return Loop(K, lin(extent), step, body, invariant_text(op, d.invariant.words, label), part, halves)


def panel_routines(o: KernelOptions, piv: tuple, on_zero: str) -> tuple[list[Routine], str]:
    """The routines below the outer loop, deepest first, and the name of the one the outer loop calls. Every
    level is the same lowering of a derived loop on an m x n panel: the unblocked loop at the bottom; with
    panel = "recursive", above it the loop split into two halves whose first half is the routine itself
    (the 2x1/1x2 partition with a block of half the columns); then each blocked level, calling the one below."""
    lu = operation.LU
    params = (Param("m", "size"), Param("n", "size"), Param("a", "matrix"), Param("lda", "size")) + piv
    shapes = Shapes({"A": ("a", "m", "n")})
    mats, ext = (("a", "lda"),), (("a", "m,n"),)
    what = "panel" if piv else "block"
    out = []
    inv = make(lu, o.inner)
    below = f"{o.name}_inner"
    out.append(Routine(below, "inner", params, (lower_loop(derive(lu, inv, o.pivoting), 1, shapes, "n", None,
                                                           inv.label),), on_zero,
                       f"unblocked {inv.label} LU of an m x n block (m >= n)", mats, ext))
    if o.panel == "recursive":
        name = f"{o.name}_halves"
        leaf = get_target(o.target).blocks(o.scalar).leaf
        loop = lower_loop(derive(lu, inv, o.pivoting), 2, shapes, "n", name, inv.label, halves=True)
        out.append(Routine(name, "inner", params,
                           (Leaf("n", leaf, below, f"at most {leaf} columns: the unblocked loop"), loop), on_zero,
                           f"{inv.label} LU of an m x n {what} (m >= n), its columns split in halves recursively",
                           mats, ext))
        below = name
    for depth, (step, words) in reversed(list(enumerate(o.levels, start=1))):
        lv = make(lu, words)
        name = f"{o.name}_level{depth}"
        loop = lower_loop(derive(lu, lv, o.pivoting), step, shapes, "n", below, lv.label)
        out.append(Routine(name, "inner", params, (loop,), on_zero,
                           f"{lv.label} LU of an m x n {what} (m >= n) in blocks of {step}", mats, ext))
        below = name
    return out, below


def lower_kernel(o: KernelOptions) -> Kernel:
    lu, lo, up = operation.LU, operation.LOWER_SOLVE, operation.UPPER_SOLVE
    pivoted = o.pivoting != "none"
    on_zero = "record" if pivoted else "stop"
    piv = (Param("ipiv", "pivots"),) if pivoted else ()
    cpiv = (Param("ipiv", "const_pivots"),) if pivoted else ()
    routines = []
    inner_name = None
    main = make(lu, o.invariant)
    if o.block > 1 or o.panel == "recursive":
        routines, inner_name = panel_routines(o, piv, on_zero)
    dv = derive(lu, main, o.pivoting)
    shapes = Shapes({"A": ("a", "n", "n")})
    if o.block == 1 and o.panel == "recursive":
        # unblocked and recursive: the whole matrix is the one panel the recursion halves
        whole = Block("a", Span(lin(0), lin("n")), Span(lin(0), lin("n")))
        body = (FactorCall(whole, inner_name, pivoted, "A = L U, the matrix as one panel"),)
    else:
        body = (lower_loop(dv, o.block, shapes, "n", inner_name, main.label),)
    routines.append(Routine(
        o.name, "factor", (Param("n", "size"), Param("a", "matrix"), Param("lda", "size")) + piv, body,
        on_zero, "LU factorization", (("a", "lda"),), (("a", "n,n"),)))
    solve_args = (Param("n", "size"), Param("nrhs", "size"), Param("lu", "const_matrix"), Param("lda", "size"))
    rhs = (Param("b", "matrix"), Param("ldb", "size"))
    mats = (("lu", "lda"), ("b", "ldb"))
    ext = (("lu", "n,n"), ("b", "n,nrhs"))
    for op, words, tag in ((lo, o.solve_lower, "lower"), (up, o.solve_upper, "upper")):
        inv = make(op, words)
        d = derive(op, inv)
        shapes = Shapes({"B": ("b", "n", "nrhs"), "LU": ("lu", "n", "n")})
        loop = lower_loop(d, o.block, shapes, "n", None, inv.label)
        routines.append(Routine(f"{o.name}_{tag}", tag, solve_args + rhs, (loop,), None, op.summary, mats, ext))
    body = []
    if pivoted:
        body.append(RowSwaps("b", Span(lin(0), lin("nrhs")), Span(lin(0), lin("n")),
                             "B := P B, the factorization's interchanges in order"))
    body.append(Call(f"{o.name}_lower", "B := L^-1 B"))
    body.append(Call(f"{o.name}_upper", "B := U^-1 B"))
    routines.append(Routine(f"{o.name}_solve", "solve", solve_args + cpiv + rhs, tuple(body), None,
                            "solve A X = B with the factorization", mats, ext))
    return Kernel(o.name, tuple(routines))


def display_shapes(op: Operation) -> Shapes:
    """Generic argument names for showing one operation's loop alone (`luforge derive`)."""
    if op.rank == 2:
        return Shapes({op.target: ("a", "n", "n")})
    return Shapes({op.target: ("b", "n", "nrhs"), **{m: ("lu", "n", "n") for m in op.inputs}})


def lower_derivation_for_display(d: Derivation, step: int) -> Loop:
    """The loop of one derivation alone (for `luforge derive --ir`)."""
    return lower_loop(d, step, display_shapes(d.operation), "n", "inner" if step > 1 else None,
                      d.invariant.label)
