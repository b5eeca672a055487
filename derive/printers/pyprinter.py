"""NumPy printer: renders the loop IR of a kernel into Python function bodies over array slices, one visit_<Node>
method per node type, and the invariant of the factor loop as data that the module's checker interprets."""
from __future__ import annotations

from derive.engine import operation
from derive.engine.invariants import TWO_WAY, bind, content_of, summation_set, term_uses
from derive.lowering.ir import (Block, Call, FactorCall, Gemm, Leaf, Lin, Loop, OneColumn, PivotCheck, PivotSearch,
                               RowSwaps, Routine, Scale, Span, Step, Trsm)
from derive.lowering.printing import show_lin


class PyPrinter:
    def __init__(self, prefix: str):
        self.prefix = prefix
        self.routine: Routine | None = None

    def x(self, e: Lin) -> str:
        return show_lin(e)

    def sl(self, s: Span) -> str:
        return f"{self.x(s.lo)}:{self.x(s.hi)}"

    def blk(self, b: Block) -> str:
        return f"{b.matrix}[{self.sl(b.rows)}, {self.sl(b.cols)}]"

    def elem(self, b: Block) -> str:
        return f"{b.matrix}[{self.x(b.rows.lo)}, {self.x(b.cols.lo)}]"

    def fn(self, routine: str) -> str:
        return "_" + routine[len(self.prefix) + 1:] if routine.startswith(self.prefix + "_") else routine

    def visit(self, node, indent: str) -> list[str]:
        return getattr(self, f"visit_{type(node).__name__}")(node, indent)

    def visit_Loop(self, s: Loop, indent: str) -> list[str]:
        k, e = s.var, self.x(s.extent)
        out = [f"{indent}# loop invariant, {s.invariant}", f"{indent}# partition at step {k}: {s.partition}"]
        if s.step == 1:
            out += [f"{indent}for {k} in range({e}):", f"{indent}    kb = 1"]
        elif s.halves:
            out += [f"{indent}for {k} in range(0, {e}, ({e} + 1) // 2):",
                    f"{indent}    kb = ({e} + 1) // 2 if {k} == 0 else {e} - {k}"]
        else:
            out += [f"{indent}for {k} in range(0, {e}, {s.step}):", f"{indent}    kb = min({s.step}, {e} - {k})"]
        for t in s.body:
            out += self.visit(t, indent + "    ")
        if self.routine is not None and self.routine.role == "factor":
            out.append(f"{indent}    if check is not None:")
            out.append(f"{indent}        check({k} + kb)")
        return out

    def visit_Step(self, s: Step, indent: str) -> list[str]:
        """One step of a loop unrolled for a fixed size: its index ranges are constants."""
        out = [f"{indent}# step {s.var} = {s.value} (of {s.count}); loop invariant, {s.invariant}",
               f"{indent}# partition at this step: {s.partition}"]
        for t in s.body:
            out += self.visit(t, indent)
        if self.routine is not None and self.routine.role == "factor":
            out += [f"{indent}if check is not None:", f"{indent}    check({s.value + s.size})"]
        return out

    def visit_OneColumn(self, s: OneColumn, indent: str) -> list[str]:
        # NumPy gains nothing from the one-column path: the general statements serve every nrhs
        out = []
        for t in s.general:
            out += self.visit(t, indent)
        return out

    def visit_Gemm(self, s: Gemm, indent: str) -> list[str]:
        return [f"{indent}# {s.shape}: from {s.source}",
                f"{indent}{self.blk(s.c)} -= {self.blk(s.a)} @ {self.blk(s.b)}"]

    def visit_Trsm(self, s: Trsm, indent: str) -> list[str]:
        fn = {("left", "L"): "_trsm_llu", ("left", "U"): "_trsm_lun", ("right", "U"): "_trsm_run"}[(s.side, s.uplo)]
        return [f"{indent}# trsm ({s.side}): from {s.source}", f"{indent}{fn}({self.blk(s.tri)}, {self.blk(s.b)})"]

    def visit_Scale(self, s: Scale, indent: str) -> list[str]:
        if s.by == "reciprocal":
            return [f"{indent}# scal by the reciprocal of the pivot: from {s.source}",
                    f"{indent}{self.blk(s.b)} *= 1 / {self.elem(s.pivot)}"]
        return [f"{indent}# scal by the pivot: from {s.source}", f"{indent}{self.blk(s.b)} /= {self.elem(s.pivot)}"]

    def visit_PivotCheck(self, s: PivotCheck, indent: str) -> list[str]:
        return [f"{indent}# exactly zero pivot: stop before dividing by it ({s.source})",
                f"{indent}if {self.elem(s.pivot)} == 0:", f"{indent}    return {self.x(s.pivot.rows.lo)} + 1"]

    def visit_PivotSearch(self, s: PivotSearch, indent: str) -> list[str]:
        r0 = self.x(s.column.rows.lo)
        col = f"{s.column.matrix}[{self.sl(s.column.rows)}, {self.x(s.column.cols.lo)}]"
        return [f"{indent}# partial pivoting: from {s.source}",
                f"{indent}if _pivot({col}, {r0}, ipiv) and info == 0:", f"{indent}    info = {r0} + 1"]

    def visit_FactorCall(self, s: FactorCall, indent: str) -> list[str]:
        r0, n = self.x(s.block.rows.lo), self.x(s.block.cols.size)
        if s.pivoted:
            return [f"{indent}# panel factor with partial pivoting by the inner loop: from {s.source}",
                    f"{indent}r = {self.fn(s.routine)}({self.blk(s.block)}, ipiv[{r0}:{r0} + {n}])",
                    f"{indent}ipiv[{r0}:{r0} + {n}] += {r0}",
                    f"{indent}if r and info == 0:", f"{indent}    info = r + {r0}"]
        return [f"{indent}# factor the diagonal block by the inner loop: from {s.source}",
                f"{indent}r = {self.fn(s.routine)}({self.blk(s.block)})",
                f"{indent}if r:", f"{indent}    return r + {r0}"]

    def visit_RowSwaps(self, s: RowSwaps, indent: str) -> list[str]:
        return [f"{indent}# row interchanges: {s.source}",
                f"{indent}_swaps({s.matrix}[:, {self.sl(s.cols)}], ipiv, {self.x(s.steps.lo)}, {self.x(s.steps.hi)})"]

    def visit_Leaf(self, s: Leaf, indent: str) -> list[str]:
        args = ", ".join(p.name for p in self.routine.params if p.kind != "size")
        return [f"{indent}# {s.source}", f"{indent}if {s.cols} <= {s.limit}:",
                f"{indent}    return {self.fn(s.routine)}({args})"]

    def visit_Call(self, s: Call, indent: str) -> list[str]:
        return [f"{indent}# {s.source}", f"{indent}{self.fn(s.routine)}(lu, b)"]

    def function(self, r: Routine) -> dict:
        """Header, prologue (sizes read off the arrays), body and result of one routine."""
        self.routine = r
        name = {"factor": "_factor", "solve": "_solve"}.get(r.role) or self.fn(r.name)
        params = [p.name for p in r.params if p.kind != "size"] + (["check"] if r.role == "factor" else [])
        prologue, known = [], set()
        for matrix, ext in r.extents:
            for d, e in enumerate(ext.split(",")):
                if e not in known and not e.isdigit():     # a fixed size is a constant in the body
                    known.add(e)
                    prologue.append(f"{e} = {matrix}.shape[{d}]")
        if r.on_zero == "record":
            prologue.append("info = 0")
        body = []
        for s in r.body:
            body += self.visit(s, "    ")
        return {"header": f"{name}({', '.join(params)}):", "doc": r.doc, "prologue": prologue, "body": body,
                "result": "info" if r.on_zero == "record" else "0"}


def invariant_data(words: tuple[str, ...]) -> list[dict]:
    """The factor loop's invariant as data for the module's checker: for each region, the product terms its
    input equals (up to rounding) and whether the region's current value is a remainder or a finished factor."""
    op = operation.LU
    out = []
    for region, word in zip(op.regions, words):
        pos = region.position
        c = content_of(region.content_of(word), pos, frozenset({1}))
        eq = op.equation_for(pos)
        ks = summation_set(pos, TWO_WAY) if c.final else c.done
        terms = [[(u.symbol, list(u.index)) for u in term_uses(eq, pos, k)] for k in sorted(ks)]
        if not c.final and not c.done:
            kind = "input"
        elif not c.final:
            kind = "remainder"
        else:
            kind = "final"
            if eq.finish.kind == "factor":
                terms.append([("L", list(pos)), ("U", list(pos))])
            else:
                tri = bind(eq.finish.tri, pos, None)
                mine = (eq.holds, list(pos))
                pair = [(tri.symbol, list(tri.index)), mine]
                terms.append(pair if eq.finish.side == "left" else pair[::-1])
        out.append({"region": region.label, "state": word, "position": list(pos), "kind": kind, "terms": terms})
    return out
