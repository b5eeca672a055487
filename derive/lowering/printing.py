"""Text shared by every printer and dump: linear index expressions, spans, and a readable dump of the loop IR.
Language printers (C, Python) build on show_lin; the dump is what `luforge derive --ir` prints."""
from __future__ import annotations

from derive.lowering.ir import (Block, Call, FactorCall, Gemm, Leaf, Lin, Loop, OneColumn, PivotCheck, PivotSearch,
                               RowSwaps, Routine, Scale, Span, Step, Trsm)


def show_lin(x: Lin, names: dict[str, str] | None = None, unsigned: bool = False) -> str:
    """`unsigned`: constants get the U suffix (C index arithmetic in size_t mixes no signed operands)."""
    names = names or {}
    u = "U" if unsigned else ""
    pos = [names.get(n, n) if c == 1 else f"{c}{u}*{names.get(n, n)}" for n, c in x.terms if c > 0]
    neg = [names.get(n, n) if c == -1 else f"{-c}{u}*{names.get(n, n)}" for n, c in x.terms if c < 0]
    s = " + ".join(pos)
    if x.const > 0:
        s = f"{s} + {x.const}{u}" if s else f"{x.const}{u}"
    for t in neg:
        s = f"{s} - {t}" if s else f"-{t}"
    if x.const < 0:
        s = f"{s} - {-x.const}{u}" if s else str(x.const)
    return s or f"0{u}"


def show_span(s: Span) -> str:
    return f"[{show_lin(s.lo)}, {show_lin(s.hi)})"


def show_block(b: Block) -> str:
    return f"{b.matrix}{show_span(b.rows)}{show_span(b.cols)}"


def dump_stmt(s, indent: str = "") -> list[str]:
    if isinstance(s, Loop):
        head = (f"{indent}loop {s.var} over [0, {show_lin(s.extent)}) in two halves, kb = ceil({show_lin(s.extent)}/2)"
                f" then the rest" if s.halves else
                f"{indent}loop {s.var} over [0, {show_lin(s.extent)}) step {s.step}"
                + (f", kb = min({s.step}, {show_lin(s.extent)} - {s.var})" if s.step > 1 else ""))
        lines = [head,
                 f"{indent}  invariant {s.invariant}",
                 f"{indent}  positions {s.partition}"]
        for t in s.body:
            lines += dump_stmt(t, indent + "  ")
        return lines
    if isinstance(s, Step):
        lines = [f"{indent}step {s.var} = {s.value}, size {s.size} (one of {s.count} steps)",
                 f"{indent}  invariant {s.invariant}",
                 f"{indent}  positions {s.partition}"]
        for t in s.body:
            lines += dump_stmt(t, indent + "  ")
        return lines
    if isinstance(s, OneColumn):
        lines = [f"{indent}when {s.var} = 1:    [{s.source}]"]
        for t in s.special:
            lines += dump_stmt(t, indent + "  ")
        lines.append(f"{indent}otherwise:")
        for t in s.general:
            lines += dump_stmt(t, indent + "  ")
        return lines
    if isinstance(s, Gemm):
        return [f"{indent}{s.shape}: {show_block(s.c)} -= {show_block(s.a)} * {show_block(s.b)}"
                f"    [{s.source}]"]
    if isinstance(s, Trsm):
        tri = "unit-lower" if s.uplo == "L" else "upper"
        return [f"{indent}trsm {s.side} {tri}: {show_block(s.b)} with {show_block(s.tri)}    [{s.source}]"]
    if isinstance(s, Scale):
        op = "*= 1 /" if s.by == "reciprocal" else "/="
        return [f"{indent}scal: {show_block(s.b)} {op} {show_block(s.pivot)}    [{s.source}]"]
    if isinstance(s, PivotCheck):
        return [f"{indent}pivot check: {show_block(s.pivot)} == 0    [{s.source}]"]
    if isinstance(s, PivotSearch):
        how = ", by selects" if s.by == "select" else ""
        return [f"{indent}pivot: choose in {show_block(s.column)}, interchange, divide below{how}    [{s.source}]"]
    if isinstance(s, FactorCall):
        what = "pivoted panel" if s.pivoted else "block"
        return [f"{indent}call {s.routine} on {what} {show_block(s.block)}    [{s.source}]"]
    if isinstance(s, RowSwaps):
        how = ", always exchanged" if s.by == "select" else ""
        return [f"{indent}interchange rows of {s.matrix}[.]{show_span(s.cols)} for steps "
                f"{show_span(s.steps)}{how}    [{s.source}]"]
    if isinstance(s, Call):
        return [f"{indent}call {s.routine}    [{s.source}]"]
    if isinstance(s, Leaf):
        return [f"{indent}if {s.cols} <= {s.limit}: return {s.routine}    [{s.source}]"]
    raise TypeError(type(s))


def dump_routine(r: Routine) -> str:
    params = ", ".join(f"{p.name}" for p in r.params)
    lines = [f"routine {r.name}({params})  role={r.role}" + (f" on_zero={r.on_zero}" if r.on_zero else "")]
    for s in r.body:
        lines += dump_stmt(s, "  ")
    return "\n".join(lines)
