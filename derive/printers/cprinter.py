"""C99 printer: renders the loop IR of a kernel into C function bodies, one visit_<Node> method per node type.
Helpers a body calls are recorded on a side channel (`needs`) so the template emits each exactly once."""
from __future__ import annotations

import re

from derive.lowering.ir import (Block, Call, FactorCall, Gemm, Leaf, Lin, Loop, OneColumn, Param, PivotCheck, PivotSearch,
                                RowSwaps, Routine, Scale, Span, Step, Trsm)
from derive.lowering.printing import show_lin
from derive.printers.cloops import InlineLoops, joined_exchange
from derive.targets.storage import Layout, Scalar

# Helpers that are always emitted together with the one named (a helper calling another), and the order in
# which they are defined (callees first).
HELPER_DEPS = {"pivot": ("iamax", "scal")}
HELPER_ORDER = ("gemm", "gemv_n", "gemv_t", "dot", "ger", "scal", "trsm_llu", "trsm_lun", "trsm_run", "swaps",
                "iamax", "pivot")


class CPrinter:
    """Prints routines of one kernel. `prefix` is the kernel name; every symbol it emits starts with it."""

    def __init__(self, prefix: str, layout: Layout, scalar: Scalar, helpers: str = "functions"):
        self.prefix = prefix
        # "inline": inner operations printed as loops in the routine's body (cloops.py); "functions": calls of
        # static helpers. The IR is the same; only how it reads in C differs.
        self.loops = InlineLoops(self) if helpers == "inline" else None
        self.open_spans: list[Span] = []    # index ranges of the loops around the statement being printed
        self.layout = layout
        self.scalar = scalar
        self.needs: set[str] = set()
        self.names: dict[str, str] = {}
        self.routine: Routine | None = None

    unsigned_constants = True   # index constants printed with U: size_t arithmetic mixes no signed operand
    loop_vars_in_for = False    # True: a printer declares each loop's variables in its own for statement

    # -- expressions -------------------------------------------------------------------------------------------
    def x(self, e: Lin) -> str:
        return show_lin(e, self.names, unsigned=self.unsigned_constants)

    def ld(self, matrix: str) -> str:
        assert self.routine is not None
        ld = dict(self.routine.matrices)[matrix]
        return self.names.get(ld, ld)

    def at(self, matrix: str, i: Lin, j: Lin) -> str:
        return f"{self.prefix.upper()}_AT({matrix}, {self.ld(matrix)}, {self.x(i)}, {self.x(j)})"

    def ptr(self, b: Block) -> str:
        return f"&{self.at(b.matrix, b.rows.lo, b.cols.lo)}, {self.ld(b.matrix)}"

    def helper(self, name: str) -> str:
        self.needs.add(name)
        for dep in HELPER_DEPS.get(name, ()):
            self.needs.add(dep)
        return f"{self.prefix}_{name}"

    def routine_for(self, op: str) -> str:
        """The helper that carries an inner operation (gemm, trsm_*, swaps); a target's printer may route it
        to its own."""
        return self.helper(op)

    def guarded(self, sizes: list[Lin], call: str) -> str:
        """Skip a call on an empty block: even forming the address of an empty block may point past the array.
        The current block size kb is never zero inside the loop."""
        conds = list(dict.fromkeys(self.x(s) for s in sizes if not s.is_const() and s != Lin.of("kb")))
        if not conds:
            return call
        ops = [c if c.replace("_", "").isalnum() else f"({c})" for c in conds]
        tests = [f"{c} != 0U" if len(ops) == 1 else f"({c} != 0U)" for c in ops]
        return f"if ({' && '.join(tests)}) {{ {call} }}"

    # -- statements --------------------------------------------------------------------------------------------
    def visit(self, node, indent: str) -> list[str]:
        return getattr(self, f"visit_{type(node).__name__}")(node, indent)

    def statements(self, body, indent: str) -> list[str]:
        out: list[str] = []
        body = list(body)
        i = 0
        while i < len(body):
            s = body[i]
            if self.loops is not None and isinstance(s, PivotSearch):
                # inline, the interchanges that follow the search join its own row exchange: one loop
                cols, taken = joined_exchange(s, body[i + 1:])
                out += [self.comment(f"partial pivoting on column {self.x(s.column.cols.lo)}: from {s.source}", indent)]
                out += [self.comment(t.source, indent) for t in body[i + 1:i + 1 + taken]]
                out += self.loops.pivot_search(s, cols, indent)
                i += 1 + taken
                continue
            if self.loops is not None and isinstance(s, RowSwaps):
                # interchanges of the same steps on several column ranges: one pass over the steps
                same = [s]
                while (i + len(same) < len(body) and isinstance(body[i + len(same)], RowSwaps)
                       and body[i + len(same)].steps == s.steps and body[i + len(same)].matrix == s.matrix):
                    same.append(body[i + len(same)])
                out += [self.comment(f"row interchanges: {t.source}", indent) for t in same]
                out += self.loops.row_swaps(same, indent)
                i += len(same)
                continue
            out += self.visit(s, indent)
            i += 1
        return out

    def comment(self, text: str, indent: str) -> str:
        return f"{indent}/* {text.replace('*/', '* /')} */"

    def visit_Step(self, s: Step, indent: str) -> list[str]:
        """One step of a loop unrolled for a fixed size (fixed-size and batched kernels): constant index ranges,
        opened by the loop invariant and the step's concrete partition."""
        size = f", kb = {s.size}" if s.size > 1 else ""
        out = [self.comment(f"step {s.var} = {s.value}{size} (of {s.count}); loop invariant, {s.invariant}", indent),
               self.comment(f"partition at this step: {s.partition}", indent)]
        for t in s.body:
            out += self.visit(t, indent)
        return out

    def visit_OneColumn(self, s: OneColumn, indent: str) -> list[str]:
        return [self.comment(s.source, indent), f"{indent}if ({self.names.get(s.var, s.var)} == 1U) {{",
                *self.statements(s.special, indent + "    "), f"{indent}}} else {{",
                *self.statements(s.general, indent + "    "), f"{indent}}}"]

    def visit_Loop(self, s: Loop, indent: str) -> list[str]:
        k, e = s.var, self.x(s.extent)
        out = [self.comment(f"loop invariant, {s.invariant}", indent),
               self.comment(f"partition at step {k}: {s.partition}", indent)]
        self.open_spans.append(Span(Lin(), s.extent))
        if s.step == 1:
            out.append(f"{indent}for ({k} = 0U; {k} < {e}; ++{k}) {{")
            out += self.statements(s.body, indent + "    ")
        elif s.halves:
            # two steps: half the columns (rounded up), then the rest
            out += [f"{indent}{k} = 0U;", f"{indent}while ({k} < {e}) {{",
                    f"{indent}    kb = ({k} == 0U) ? (({e} + 1U) / 2U) : ({e} - {k});"]
            out += self.statements(s.body, indent + "    ")
            out.append(f"{indent}    {k} += kb;")
        else:
            # a while loop: the step kb is set in the body, which a well-formed for loop may not do
            out += [f"{indent}{k} = 0U;", f"{indent}while ({k} < {e}) {{",
                    f"{indent}    kb = {e} - {k};", f"{indent}    if (kb > {s.step}U) {{ kb = {s.step}U; }}"]
            out += self.statements(s.body, indent + "    ")
            out.append(f"{indent}    {k} += kb;")
        self.open_spans.pop()
        out.append(f"{indent}}}")
        return out

    def visit_Gemm(self, s: Gemm, indent: str) -> list[str]:
        if self.loops is not None:
            return [self.comment(f"{s.shape}: from {s.source}", indent)] + self.loops.gemm(s, indent)
        m, n, kk = s.c.rows.size, s.c.cols.size, s.a.cols.size
        fn = self.routine_for(s.shape)
        a, b, c = self.ptr(s.a), self.ptr(s.b), self.ptr(s.c)
        sizes = {"dot": [kk], "gemv_n": [m, kk], "gemv_t": [n, kk], "ger": [m, n], "gemm": [m, n, kk]}[s.shape]
        call = f"{fn}({', '.join(self.x(z) for z in sizes)}, {a}, {b}, {c});"
        return [self.comment(f"{s.shape}: from {s.source}", indent), indent + self.guarded(sizes, call)]

    def visit_Trsm(self, s: Trsm, indent: str) -> list[str]:
        fn = self.routine_for({("left", "L"): "trsm_llu", ("left", "U"): "trsm_lun", ("right", "U"): "trsm_run"}[
            (s.side, s.uplo)])
        m, n = s.b.rows.size, s.b.cols.size
        call = f"{fn}({self.x(m)}, {self.x(n)}, {self.ptr(s.tri)}, {self.ptr(s.b)});"
        what = "unit-lower" if s.uplo == "L" else "upper"
        return [self.comment(f"trsm ({s.side}, {what}): from {s.source}", indent), indent + self.guarded([m, n], call)]

    def visit_Scale(self, s: Scale, indent: str) -> list[str]:
        if self.loops is not None:
            return [self.comment(f"scal by the pivot: from {s.source}", indent)] + self.loops.scale(s, indent)
        fn = self.helper("scal")
        m, n = s.b.rows.size, s.b.cols.size
        piv = self.at(s.pivot.matrix, s.pivot.rows.lo, s.pivot.cols.lo)
        call = f"{fn}({self.x(m)}, {self.x(n)}, {self.ptr(s.b)}, {piv});"
        return [self.comment(f"scal by the pivot: from {s.source}", indent), indent + self.guarded([m, n], call)]

    def visit_PivotCheck(self, s: PivotCheck, indent: str) -> list[str]:
        piv = self.at(s.pivot.matrix, s.pivot.rows.lo, s.pivot.cols.lo)
        code = f"(int)({self.x(s.pivot.rows.lo)}) + 1"
        return [self.comment(f"exactly zero pivot: stop before dividing by it ({s.source})", indent),
                f"{indent}if ({piv} == {self.scalar.c_zero}) {{ return {code}; }}"]

    def visit_PivotSearch(self, s: PivotSearch, indent: str) -> list[str]:
        if self.loops is not None:
            return self.statements([s], indent)
        fn = self.helper("pivot")
        r0, r1, c0 = self.x(s.column.rows.lo), self.x(s.column.rows.hi), self.x(s.column.cols.lo)
        col = f"&{self.at(s.column.matrix, s.column.rows.lo, s.column.cols.lo)}"
        return [self.comment(f"partial pivoting on column {c0}: from {s.source}", indent),
                f"{indent}{fn}({r1} - {r0}, {col}, {self.ld(s.column.matrix)}, {r0}, ipiv, &info);"]

    def visit_FactorCall(self, s: FactorCall, indent: str) -> list[str]:
        r0 = self.x(s.block.rows.lo)
        m, n = self.x(s.block.rows.size), self.x(s.block.cols.size)
        fn = f"{s.routine}"
        out = [self.comment(f"{'panel factor with partial pivoting' if s.pivoted else 'factor the diagonal block'}"
                            f" by the inner loop: from {s.source}", indent), f"{indent}{{"]
        if s.pivoted and s.block.rows.lo == Lin():
            # the block starts at row 0: its pivot indices and code need no offset
            out += [f"{indent}    const int r = {fn}({m}, {n}, {self.ptr(s.block)}, ipiv);",
                    f"{indent}    if ((r != 0) && (info == 0)) {{ info = r; }}"]
        elif s.pivoted:
            out += [f"{indent}    const int r = {fn}({m}, {n}, {self.ptr(s.block)}, &ipiv[{r0}]);",
                    f"{indent}    size_t i;",
                    f"{indent}    for (i = {r0}; i < ({r0} + {n}); ++i) {{ ipiv[i] += (int)({r0}); }}",
                    f"{indent}    if ((r != 0) && (info == 0)) {{ info = r + (int)({r0}); }}"]
        else:
            out += [f"{indent}    const int r = {fn}({m}, {n}, {self.ptr(s.block)});",
                    f"{indent}    if (r != 0) {{ return r + (int)({r0}); }}"]
        out.append(f"{indent}}}")
        return out

    def visit_RowSwaps(self, s: RowSwaps, indent: str) -> list[str]:
        if self.loops is not None:
            return self.statements([s], indent)
        fn = self.routine_for("swaps")
        ncols = s.cols.size
        start = f"&{self.at(s.matrix, Lin(), s.cols.lo)}"
        call = (f"{fn}({self.x(ncols)}, {start}, {self.ld(s.matrix)}, {self.x(s.steps.lo)}, "
                f"{self.x(s.steps.hi)}, ipiv);")
        return [self.comment(f"row interchanges: {s.source}", indent), indent + self.guarded([ncols], call)]

    def visit_Leaf(self, s: Leaf, indent: str) -> list[str]:
        args = ", ".join(self.names.get(p.name, p.name) for p in self.routine.params)
        return [self.comment(s.source, indent), f"{indent}if ({s.cols} <= {s.limit}) return {s.routine}({args});"]

    def visit_Call(self, s: Call, indent: str) -> list[str]:
        args = ", ".join(self.names.get(p.name, p.name) for p in self.routine.params
                         if p.kind not in ("pivots", "const_pivots"))
        # the callee's code is always 0 here (the solves cannot fail once the arguments are checked)
        return [self.comment(s.source, indent), f"{indent}(void){s.routine}({args});"]

    # -- routines ----------------------------------------------------------------------------------------------
    def c_param(self, p: Param, public: bool) -> str:
        t = self.scalar.c_type
        if p.kind == "size":
            return f"int {p.name}" if public else f"size_t {p.name}"
        return {"matrix": f"{t} *{p.name}", "const_matrix": f"const {t} *{p.name}",
                "pivots": f"int *{p.name}", "const_pivots": f"const int *{p.name}"}[p.kind]

    def signature(self, r: Routine) -> str:
        public = r.role in ("factor", "solve")
        params = ", ".join(self.c_param(p, public) for p in r.params)
        return f"int {r.name}({params})"

    def body(self, r: Routine) -> list[str]:
        """Statements of the routine; public routines first check their arguments and convert sizes."""
        self.routine = r
        public = r.role in ("factor", "solve")
        self.names = {p.name: p.name.upper() for p in r.params if p.kind == "size"} if public else {}
        out: list[str] = []
        # declarations first (the conversions are used only once the checks have passed), then the checks
        if public:
            sizes = [p.name for p in r.params if p.kind == "size"]
            out += [f"    const size_t {n.upper()} = (size_t){n};" for n in sizes]
        # the loops of the routine, or of either path of a one-column solve
        tops = [t for s in r.body for t in ((*s.special, *s.general) if isinstance(s, OneColumn) else (s,))]
        loops = [s for s in tops if isinstance(s, Loop)]
        if loops and not self.loop_vars_in_for:
            out.append("    size_t k;")
            if any(lp.step > 1 for lp in loops):
                out.append("    size_t kb;")
        if r.on_zero == "record":
            out.append("    int info = 0;")
        if public:
            out += self.argument_checks(r)
            names = self.extent_names(r)
            empty = " || ".join(f"({n.upper()} == 0U)" if len(names) > 1 else f"{n.upper()} == 0U" for n in names)
            if empty:
                out.append(f"    if ({empty}) {{ return 0; }}")
        out += self.statements(r.body, "    ")
        out.append("    return info;" if r.on_zero == "record" else "    return 0;")
        if not public:
            text = re.sub(r"/\*.*?\*/", "", "\n".join(out), flags=re.S)   # comments do not use a parameter
            unused = [p.name for p in r.params if not re.search(rf"\b{p.name}\b", text)]
            decls = [i for i, ln in enumerate(out) if re.match(r"    (const )?(size_t|int) \w+( = .*)?;$", ln)]
            at = decls[-1] + 1 if decls else 0
            out[at:at] = [f"    (void){n};  /* not needed by this loop ordering */" for n in unused]
        return out

    @staticmethod
    def extent_names(r: Routine) -> list[str]:
        names: list[str] = []
        for _, ext in r.extents:
            for e in ext.split(","):
                if e not in names:
                    names.append(e)
        return names

    def argument_checks(self, r: Routine) -> list[str]:
        """Negative codes name the bad argument by its 1-based position (as the ABI documents)."""
        ext = {m: e.split(",") for m, e in r.extents}
        lds = {ld: m for m, ld in r.matrices}
        out = []
        for pos, p in enumerate(r.params, start=1):
            if p.kind == "size" and p.name in lds:
                rows, cols = ext[lds[p.name]]
                lead = rows if self.layout.leading == "rows" else cols
                out.append(f"    if (({p.name} < 1) || ({p.name} < {lead})) {{ return -{pos}; }}")
            elif p.kind == "size":
                out.append(f"    if ({p.name} < 0) {{ return -{pos}; }}")
            elif p.kind in ("matrix", "const_matrix"):
                # an extent fixed at compile time (always >= 1) needs no test
                cond = "".join(f" && ({e} > 0)" for e in dict.fromkeys(ext[p.name]) if not e.isdigit())
                test = f"({p.name} == NULL){cond}" if cond else f"{p.name} == NULL"
                out.append(f"    if ({test}) {{ return -{pos}; }}")
            else:
                rows = ext[r.matrices[0][0]][0]
                test = f"{p.name} == NULL" if rows.isdigit() else f"({p.name} == NULL) && ({rows} > 0)"
                out.append(f"    if ({test}) {{ return -{pos}; }}")
                if p.kind == "const_pivots":
                    # pivots handed back in: an entry out of range would make the solve write outside b
                    out += ["    {",
                            "        int i;",
                            f"        for (i = 0; i < {rows}; ++i) {{",
                            f"            if (({p.name}[i] < 0) || ({p.name}[i] >= {rows})) {{ return -{pos}; }}",
                            "        }",
                            "    }"]
        return out
