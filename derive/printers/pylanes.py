"""NumPy printer of batched (lanes) kernels: the single-matrix printer with every block carrying a leading axis
over the matrices, so each statement runs over all of them at once and pivoting is per matrix."""
from __future__ import annotations

from derive.lowering.ir import Block, Call, Kernel, Routine
from derive.lowering.lanes import Groups, LaneFactorCall, OverLanes, SelectPivot, SelectSwaps
from derive.printers.pyprinter import PyPrinter


class LanePyPrinter(PyPrinter):
    def __init__(self, prefix: str, kernel: Kernel):
        super().__init__(prefix)
        self.kernel = kernel

    def blk(self, b: Block) -> str:
        return f"{b.matrix}[:, {self.sl(b.rows)}, {self.sl(b.cols)}]"

    def elem(self, b: Block) -> str:
        return f"{b.matrix}[:, {self.x(b.rows.lo)}, {self.x(b.cols.lo)}]"

    def visit_OverLanes(self, s: OverLanes, indent: str) -> list[str]:
        return self.visit(s.stmt, indent)

    def visit_Scale(self, s, indent: str) -> list[str]:
        return [f"{indent}# scal by each matrix's pivot: from {s.source}",
                f"{indent}{self.blk(s.b)} /= {self.elem(s.pivot)}[:, np.newaxis, np.newaxis]"]

    def visit_SelectPivot(self, s: SelectPivot, indent: str) -> list[str]:
        r0 = self.x(s.column.rows.lo)
        col = f"{s.column.matrix}[:, {self.sl(s.column.rows)}, {self.x(s.column.cols.lo)}]"
        return [f"{indent}# partial pivoting in every matrix: from {s.source}",
                f"{indent}_pivot({col}, {r0}, ipiv, info)"]

    def visit_SelectSwaps(self, s: SelectSwaps, indent: str) -> list[str]:
        return [f"{indent}# each matrix's row interchanges: {s.source}",
                f"{indent}_swaps({s.matrix}[:, :, {self.sl(s.cols)}], ipiv, {self.x(s.steps.lo)}, "
                f"{self.x(s.steps.hi)})"]

    def visit_LaneFactorCall(self, s: LaneFactorCall, indent: str) -> list[str]:
        r0, n = self.x(s.block.rows.lo), self.x(s.block.cols.size)
        return [f"{indent}# panel factor with partial pivoting in every matrix by the inner loop: from {s.source}",
                f"{indent}r = np.zeros_like(info)",
                f"{indent}{self.fn(s.routine)}({self.blk(s.block)}, ipiv[:, {r0}:{r0} + {n}], r)",
                f"{indent}ipiv[:, {r0}:{r0} + {n}] += {r0}",
                f"{indent}info[:] = np.where((r != 0) & (info == 0), r + {r0}, info)"]

    def visit_Call(self, s: Call, indent: str) -> list[str]:
        args = ", ".join(p.name for p in self.kernel.routine(s.routine).params if p.kind != "size")
        return [f"{indent}# {s.source}", f"{indent}{self.fn(s.routine)}({args})"]

    def visit_Groups(self, s: Groups, indent: str) -> list[str]:
        raise AssertionError("the NumPy twin takes every matrix at once; it prints no group loop")

    def function(self, r: Routine) -> dict:
        self.routine = r
        params = [p.name for p in r.params if p.kind != "size"]
        prologue, known = [], set()
        for matrix, ext in r.extents:
            for d, e in enumerate(ext.split(",")):
                if e not in known and not e.isdigit():     # a fixed size is a constant, not a name
                    known.add(e)
                    prologue.append(f"{e} = {matrix}.shape[{d + 1}]")
        if r.on_zero == "record":
            prologue.append("info[:] = 0")
        body = []
        for s in r.body:
            body += self.visit(s, "    ")
        return {"header": f"{self.fn(r.name)}({', '.join(params)}):", "doc": r.doc, "prologue": prologue,
                "body": body, "result": "None"}
