"""Large-matrix printing: a C printer whose GEMM, TRSM and row interchanges go through a packed, register-blocked
micro-kernel whose tile, vectors and cache blocks come from the kernel's row of the target table."""
from __future__ import annotations

import textwrap

from derive.options import KernelOptions
from derive.printers.cprinter import CPrinter
from derive.targets.storage import Layout, Scalar
from derive.targets.table import Blocking, Simd, get

# packed helpers -> the plain helpers they call (their diagonal blocks), emitted before them
PACKED = {"gemm": ("pgemm", ()), "trsm_llu": ("ptrsm_llu", ()), "trsm_lun": ("ptrsm_lun", ("trsm_lun",)),
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

    def __init__(self, prefix: str, layout: Layout, scalar: Scalar, blocking: Blocking, simd: Simd | None,
                 ext_bytes: int = 0):
        super().__init__(prefix, layout, scalar)
        self.blocking = blocking
        self.simd = simd
        self.ext_bytes = ext_bytes
        self.linkage = f"{prefix.upper()}_INTERNAL"
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

    def micro_head(self) -> list[str]:
        """File-scope lines the micro-kernel needs before its definition: for a row with extension vectors, the
        vector types and the request that gcc fuse multiply-adds."""
        if self.simd is not None or not self.ext_bytes:
            return []
        P, t, lanes = self.prefix, self.scalar.c_type, self.ext_bytes // self.scalar_bytes()
        return ["#if defined(__GNUC__)",
                f"/* {lanes} lanes of {t} in GCC/Clang vector extensions; the compiler maps them to the registers it "
                f"has */",
                f"typedef {t} {P}_vec __attribute__((vector_size({self.ext_bytes})));",
                "/* the same at the alignment of one scalar and allowed to alias it: loads and stores at any scalar",
                "   step, as expressions (no vector crosses a call, whose ABI would depend on the ISA flags) */",
                f"typedef {t} {P}_vecu __attribute__((vector_size({self.ext_bytes}), aligned({self.scalar_bytes()}), "
                f"may_alias));",
                "#endif",
                "#if defined(__GNUC__) && !defined(__clang__)",
                "/* ISO C modes (-std=c99) turn gcc's contraction off, which would leave every multiply-add as two",
                "   roundings and two instructions; fusing is allowed by C99 6.5 and only removes roundings. (Clang",
                "   contracts within an expression by default.) */",
                '__attribute__((optimize("fp-contract=fast")))',
                "#endif"]

    def micro_body(self) -> list[str]:
        b, t = self.blocking, self.scalar.c_type
        at = f"{self.prefix.upper()}_AT"
        out = [f"    {t} tile[{b.mr * b.nr}];", "    size_t p, i, j;"]
        plain = [f"    for (i = 0; i < {b.mr * b.nr}; ++i) tile[i] = 0;",
                 "    for (p = 0; p < k; ++p) {",
                 f"        for (j = 0; j < {b.nr}; ++j) {{",
                 f"            const {t} bj = pb[j];",
                 f"            for (i = 0; i < {b.mr}; ++i) tile[j * {b.mr} + i] += pa[i] * bj;",
                 "        }",
                 f"        pa += {b.mr};",
                 f"        pb += {b.nr};",
                 "    }"]
        if self.simd is not None:
            out += self.vector_body(_Intrinsics(self.simd))
        elif self.ext_bytes:
            # plain C stays the fallback for compilers without the extension
            out += ["#if defined(__GNUC__)", *self.vector_body(_Extension(self)), "#else", *plain, "#endif"]
        else:
            # plain C: constant trip counts let an optimizing compiler keep the tile in vector registers
            out += plain
        out += ["    for (j = 0; j < nr; ++j)",
                f"        for (i = 0; i < mr; ++i) {at}(c, ldc, i, j) -= tile[j * {b.mr} + i];"]
        return out

    def vector_body(self, v: "_Intrinsics | _Extension") -> list[str]:
        """The mr x nr tile in nr columns of mr/lanes vectors: per p, mr/lanes loads of A, one broadcast of B per
        column and one multiply-add per accumulator; each entry is still a sequential sum over p."""
        b, t = self.blocking, self.scalar.c_type
        at = f"{self.prefix.upper()}_AT"
        nv = b.mr // v.lanes
        accs = [[f"c{r}_{j}" for r in range(nv)] for j in range(b.nr)]
        out = []
        for j in range(b.nr):
            out.append(f"    {v.vtype} {', '.join(f'{x} = {v.zero}' for x in accs[j])};")
        if v.prefetch:
            # the tile of C is read only after the k-loop: ask for its lines now so they arrive meanwhile
            lines = sorted({0, b.mr - 1} | set(range(0, b.mr, 64 // self.scalar_bytes())))
            out += ["    for (j = 0; j < nr; ++j) {"]
            out += [f"        {v.prefetch.format(p=f'&{at}(c, ldc, {i}, j)')};" for i in lines]
            out += ["    }"]
        def step(u: int, ind: str) -> list[str]:
            """The rank-1 update of the tile by column p + u of A's strip and row p + u of B's."""
            loads = ", ".join(f"a{r} = {v.load(f'pa + {u * b.mr + r * v.lanes}')}" for r in range(nv))
            lines = [f"{ind}const {v.vtype} {loads};"]
            for j in range(b.nr):
                # one broadcast of B a column, scoped so its register is free again for the next
                lines.append(f"{ind}{{ const {v.vtype} bj = {v.bcast(f'pb[{u * b.nr + j}]')};")
                lines += [f"{ind}  {accs[j][r]} = {v.fma(f'a{r}', 'bj', accs[j][r])};" for r in range(nv)]
                lines[-1] += " }"
            return lines

        if b.unroll > 1:
            # unrolled so the loop's own counting and branching take fewer of the core's issue slots per
            # multiply-add; the order of the sum over p is unchanged
            out += [f"    for (p = 0; p + {b.unroll} <= k; p += {b.unroll}) {{"]
            for u in range(b.unroll):
                out += ["        {", *step(u, " " * 12), "        }"]
            out += [f"        pa += {b.unroll * b.mr};", f"        pb += {b.unroll * b.nr};", "    }",
                    "    for (; p < k; ++p) {"]
        else:
            out += ["    for (p = 0; p < k; ++p) {"]
        out += [*step(0, " " * 8), f"        pa += {b.mr};", f"        pb += {b.nr};", "    }"]
        if self.layout.leading == "rows":
            # column-major: a full tile's columns are contiguous, so it is subtracted vector by vector
            out += [f"    if (mr == {b.mr} && nr == {b.nr}) {{", f"        {t} *cj;"]
            for j in range(b.nr):
                out.append(f"        cj = &{at}(c, ldc, 0, {j});")
                out += [f"        {v.store(f'cj + {r * v.lanes}', v.sub(v.load(f'cj + {r * v.lanes}'), accs[j][r]))};"
                        for r in range(nv)]
            out += ["        return;", "    }"]
        for j in range(b.nr):
            out += [f"    {v.store(f'tile + {j * b.mr + r * v.lanes}', accs[j][r])};" for r in range(nv)]
        return out

    def prefetch_lines(self, addr: str, indent: str) -> list[str]:
        """A request for the cache line at addr in the row's spelling (intrinsics, or GCC/Clang's builtin in
        guarded code); none for a row with neither."""
        if self.simd is not None:
            return [f"{indent}{self.simd.prefetch.format(p=addr)};"] if self.simd.prefetch else []
        if self.ext_bytes:
            # other compilers still evaluate the address, so what it is computed from is used either way
            return ["#if defined(__GNUC__)", f"{indent}__builtin_prefetch({addr});", "#else", f"{indent}(void)({addr});",
                    "#endif"]
        return []

    def scalar_bytes(self) -> int:
        return 8 if self.scalar.name == "double" else 4


class _Intrinsics:
    """The micro-kernel's vector operations spelled in a row's intrinsics."""

    def __init__(self, v: Simd):
        self.v, self.vtype, self.lanes = v, v.vtype, v.lanes
        self.zero, self.prefetch = f"{v.setzero}()", v.prefetch

    def load(self, p: str) -> str:
        return f"{self.v.loadu}({p})"

    def store(self, p: str, x: str) -> str:
        return f"{self.v.storeu}({p}, {x})"

    def bcast(self, s: str) -> str:
        return f"{self.v.set1}({s})"

    def fma(self, a: str, b: str, c: str) -> str:
        return f"{self.v.fmadd}({a}, {b}, {c})"

    def sub(self, x: str, y: str) -> str:
        return f"{self.v.sub}({x}, {y})"


class _Extension:
    """The same operations in GCC/Clang vector extensions; a * b + c is one expression so the compiler may fuse
    it (micro_head asks gcc to)."""

    def __init__(self, cp: PackedCPrinter):
        self.P = cp.prefix
        self.lanes = cp.ext_bytes // cp.scalar_bytes()
        self.vtype = f"{self.P}_vec"
        self.zero = "{" + ", ".join(["0"] * self.lanes) + "}"
        self.prefetch = "__builtin_prefetch({p})"

    def load(self, p: str) -> str:
        return f"*(const {self.P}_vecu *)({p})"

    def store(self, p: str, x: str) -> str:
        return f"*({self.P}_vecu *)({p}) = {x}"

    def bcast(self, s: str) -> str:
        # an initializer (C99 and C++ alike), not a scalar operand: with excess precision (x87) that scalar
        # would be a long double, which the extensions refuse to narrow
        return "{" + ", ".join([s] * self.lanes) + "}"

    def fma(self, a: str, b: str, c: str) -> str:
        return f"{c} + {a} * {b}"

    def sub(self, x: str, y: str) -> str:
        return f"{x} - {y}"


def printer_for(o: KernelOptions, layout: Layout, scalar: Scalar) -> CPrinter:
    if not uses_packing(o):
        return CPrinter(o.name, layout, scalar, o.c_helpers)
    t = get(o.target)
    return PackedCPrinter(o.name, layout, scalar, t.blocks(o.scalar), t.vectors(o.scalar), t.ext_vector_bytes)


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
        size = (b.mc * b.kc + b.kc * b.nc + ("ptrsm_llu" in cp.packed) * b.tri * b.tri_cols) * (
            8 if t == "double" else 4)
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
            "packed": {"b": cp.blocking, "head": cp.micro_head(), "micro": cp.micro_body(),
                       "needs": sorted(cp.packed), "ahead": cp.prefetch_lines(f"&{cp.prefix.upper()}_AT(a, lda, p, jn)",
                                                                             " " * 16)}}
