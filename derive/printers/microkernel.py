"""Large-matrix printing: a C printer whose GEMM, TRSM and row interchanges go through a packed, register-blocked
micro-kernel whose tile, vectors and cache blocks come from the kernel's row of the target table."""
from __future__ import annotations

import textwrap

from derive.options import KernelOptions
from derive.printers.cprinter import CPrinter
from derive.targets.storage import Layout, Scalar
from derive.targets.table import Blocking, Simd, get

# packed helpers -> the plain helpers they call (their diagonal blocks), emitted before them
PACKED = {"gemm": ("pgemm", ()), "trsm_llu": ("ptrsm_llu", ("trsm_llu",)), "trsm_lun": ("ptrsm_lun", ("trsm_lun",)),
          "trsm_run": ("ptrsm_run", ("trsm_run",)), "swaps": ("pswaps", ())}


def largest_block(o: KernelOptions) -> int:
    return max((o.block, *(b for b, _ in o.levels)))


def uses_packing(o: KernelOptions) -> bool:
    """A kernel packs when its largest block reaches the row's pack_from, or when it halves recursively (its
    top split is a GEMM of half the matrix): below that the updates are rank-k with k too small for packing
    to pay (the row says where that is)."""
    return o.panel == "recursive" or largest_block(o) >= get(o.target).blocks(o.scalar).pack_from


class PackedCPrinter(CPrinter):
    """Prints the same IR as CPrinter; only the inner operations named in PACKED are routed to the packed
    helpers, which the template renders once per kernel."""

    def __init__(self, prefix: str, layout: Layout, scalar: Scalar, blocking: Blocking, simd: Simd | None):
        super().__init__(prefix, layout, scalar)
        self.blocking = blocking
        self.simd = simd
        self.packed: set[str] = set()
        self.step = 0

    def visit_Loop(self, s, indent: str) -> list[str]:
        outer, self.step = self.step, s.step
        try:
            return super().visit_Loop(s, indent)
        finally:
            self.step = outer

    def routine_for(self, op: str) -> str:
        # an unblocked loop's updates are matrix-vector ones: packing a vector costs as much as using it
        if op not in PACKED or self.step <= 1:
            return super().routine_for(op)
        name, plain = PACKED[op]
        self.packed.add(name)
        if name.startswith("ptrsm"):
            self.packed.add("pgemm")
        for p in plain:
            super().routine_for(p)
        return f"{self.prefix}_{name}"

    def micro_body(self) -> list[str]:
        b, t = self.blocking, self.scalar.c_type
        at = f"{self.prefix.upper()}_AT"
        out = [f"    {t} tile[{b.mr * b.nr}];", "    size_t p, i, j;"]
        if self.simd is None:
            # plain C: constant trip counts let an optimizing compiler keep the tile in vector registers
            out += [f"    for (i = 0; i < {b.mr * b.nr}; ++i) tile[i] = 0;",
                    "    for (p = 0; p < k; ++p) {",
                    f"        for (j = 0; j < {b.nr}; ++j) {{",
                    f"            const {t} bj = pb[j];",
                    f"            for (i = 0; i < {b.mr}; ++i) tile[j * {b.mr} + i] += pa[i] * bj;",
                    "        }",
                    f"        pa += {b.mr};",
                    f"        pb += {b.nr};",
                    "    }"]
        else:
            v = self.simd
            nv = b.mr // v.lanes
            accs = [[f"c{r}_{j}" for r in range(nv)] for j in range(b.nr)]
            for j in range(b.nr):
                out.append(f"    {v.vtype} {', '.join(f'{x} = {v.setzero}()' for x in accs[j])};")
            if v.prefetch:
                # the tile of C is read only after the k-loop: ask for its lines now so they arrive meanwhile
                lines = sorted({0, b.mr - 1} | set(range(0, b.mr, 64 // self.scalar_bytes())))
                out += ["    for (j = 0; j < nr; ++j) {"]
                out += [f"        {v.prefetch.format(p=f'&{at}(c, ldc, {i}, j)')};" for i in lines]
                out += ["    }"]
            out += ["    for (p = 0; p < k; ++p) {",
                    f"        const {v.vtype} {', '.join(f'a{r} = {v.loadu}(pa + {r * v.lanes})' for r in range(nv))};",
                    f"        {v.vtype} bj;"]
            for j in range(b.nr):
                out.append(f"        bj = {v.set1}(pb[{j}]);")
                out += [f"        {accs[j][r]} = {v.fmadd}(a{r}, bj, {accs[j][r]});" for r in range(nv)]
            out += [f"        pa += {b.mr};", f"        pb += {b.nr};", "    }"]
            if self.layout.leading == "rows":
                # column-major: a full tile's columns are contiguous, so it is subtracted vector by vector
                out += [f"    if (mr == {b.mr} && nr == {b.nr}) {{", f"        {t} *cj;"]
                for j in range(b.nr):
                    out.append(f"        cj = &{at}(c, ldc, 0, {j});")
                    out += [f"        {v.storeu}(cj + {r * v.lanes}, {v.sub}({v.loadu}(cj + {r * v.lanes}), "
                            f"{accs[j][r]}));" for r in range(nv)]
                out += ["        return;", "    }"]
            for j in range(b.nr):
                out += [f"    {v.storeu}(tile + {j * b.mr + r * v.lanes}, {accs[j][r]});" for r in range(nv)]
        out += ["    for (j = 0; j < nr; ++j)",
                f"        for (i = 0; i < mr; ++i) {at}(c, ldc, i, j) -= tile[j * {b.mr} + i];"]
        return out


    def scalar_bytes(self) -> int:
        return 8 if self.scalar.name == "double" else 4


def printer_for(o: KernelOptions, layout: Layout, scalar: Scalar) -> CPrinter:
    if not uses_packing(o):
        return CPrinter(o.name, layout, scalar, o.c_helpers)
    t = get(o.target)
    return PackedCPrinter(o.name, layout, scalar, t.blocks(o.scalar), t.vectors(o.scalar))


def header_notes(o: KernelOptions, cp: CPrinter) -> list[str]:
    """Lines for the header's comment: the levels, the recursion and, for a packing kernel, its workspace and
    the trade-off it makes. Empty for a kernel without any of them."""
    from derive.engine import operation
    from derive.engine.invariants import make
    out = []
    if o.levels:
        steps = ", then ".join(f"{b} ({make(operation.LU, w).label})" for b, w in o.levels)
        out.append(f"Levels: each block of {o.block} is factored in blocks of {steps}, each of those by the "
                   f"{o.inner_loop} loop.")
    if o.panel == "recursive":
        leaf = get(o.target).blocks(o.scalar).leaf
        out.append(f"Panel: {'the whole matrix is' if o.block == 1 else 'each panel is'} factored by halving its "
                   f"columns recursively ({o.inner_loop} on the halves) down to {leaf} columns.")
    if isinstance(cp, PackedCPrinter) and cp.packed:
        b, t = cp.blocking, cp.scalar.c_type
        size = (b.mc * b.kc + b.kc * b.nc) * (8 if t == "double" else 4)
        out += [f"Target {o.target}: matrix-matrix updates run through a packed GEMM ({b.mr} x {b.nr} register "
                f"tile, cache blocks mc {b.mc}, kc {b.kc}, nc {b.nc}).",
                f"Workspace: no allocation; the packing buffers are static arrays of {size} bytes in all, sized "
                f"from the target row, so the ABI is the plain one and the stack use stays small. The price: calls "
                f"must not overlap (not reentrant, not thread-safe) unless {o.name.upper()}_WORK is defined as "
                f"`static _Thread_local` (C11) when compiling {o.name}.c, one set of buffers per thread."]
    return [ln for note in out for ln in textwrap.wrap(note, 108)]


def packed_parts(cp: CPrinter) -> dict:
    """What the kernel template needs for the packed helpers: the extra headers and the macro's arguments."""
    if not isinstance(cp, PackedCPrinter) or not cp.packed:
        return {"includes": [], "packed": None}
    return {"includes": [cp.simd.header] if cp.simd else [],
            "packed": {"b": cp.blocking, "micro": cp.micro_body(), "needs": sorted(cp.packed)}}
