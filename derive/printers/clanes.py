"""C99 printer of batched (lanes) kernels: the single-matrix printer with the lane statements added, each block
statement a call of a lane helper, and the public routines a loop over groups of W interleaved matrices."""
from __future__ import annotations

import re

from derive.lowering.ir import Call, Kernel, Lin, Loop, Param, Routine, walk
from derive.lowering.lanes import Groups, LaneFactorCall, OverLanes, SelectPivot, SelectSwaps
from derive.printers.cprinter import CPrinter
from derive.targets.storage import Layout, Scalar


class LaneCPrinter(CPrinter):
    """Prints the routines of one lanes kernel; element macros address lane 0 of an element, helpers take the
    lane count of the group last."""

    def __init__(self, prefix: str, layout: Layout, scalar: Scalar, kernel: Kernel):
        super().__init__(prefix, layout, scalar)
        self.kernel = kernel

    def helper(self, name: str) -> str:
        # the lane helpers call no other helper (the pivot step does its own search and division)
        self.needs.add(name)
        return f"{self.prefix}_{name}"

    def lanes_of(self) -> str:
        return self.names.get("nl", "nl")

    def visit_OverLanes(self, s: OverLanes, indent: str) -> list[str]:
        lines = self.visit(s.stmt, indent)
        # the single-matrix statement ends in one helper call; its lane twin takes the lane count last
        lines[-1] = re.sub(r"\);( \})?$", lambda m: f", {self.lanes_of()});" + (m.group(1) or ""), lines[-1])
        return lines

    def visit_Scale(self, s, indent: str) -> list[str]:
        # the pivot is handed over as the address of its lanes, not as one value
        fn = self.helper("scal")
        m, n = s.b.rows.size, s.b.cols.size
        piv = f"&{self.at(s.pivot.matrix, s.pivot.rows.lo, s.pivot.cols.lo)}"
        call = f"{fn}({self.x(m)}, {self.x(n)}, {self.ptr(s.b)}, {piv});"
        return [self.comment(f"scal by each lane's pivot: from {s.source}", indent),
                indent + self.guarded([m, n], call)]

    def visit_SelectPivot(self, s: SelectPivot, indent: str) -> list[str]:
        fn = self.helper("pivot")
        r0, r1, c0 = self.x(s.column.rows.lo), self.x(s.column.rows.hi), self.x(s.column.cols.lo)
        col = f"&{self.at(s.column.matrix, s.column.rows.lo, s.column.cols.lo)}"
        return [self.comment(f"partial pivoting on column {c0} in every lane, by selects: from {s.source}", indent),
                f"{indent}{fn}({r1} - {r0}, {col}, {self.ld(s.column.matrix)}, {r0}, ipiv, ips, code, "
                f"{self.lanes_of()});"]

    def visit_SelectSwaps(self, s: SelectSwaps, indent: str) -> list[str]:
        fn = self.helper("swaps")
        ncols = s.cols.size
        start = f"&{self.at(s.matrix, Lin(), s.cols.lo)}"
        call = (f"{fn}({self.x(ncols)}, {start}, {self.ld(s.matrix)}, {self.x(s.steps.lo)}, "
                f"{self.x(s.steps.hi)}, {self.x(s.rows)}, ipiv, ips, {self.lanes_of()});")
        return [self.comment(f"each lane's row interchanges, by selects: {s.source}", indent),
                indent + self.guarded([ncols], call)]

    def visit_LaneFactorCall(self, s: LaneFactorCall, indent: str) -> list[str]:
        lo = s.block.rows.lo
        r0 = self.x(lo)
        m, n = self.x(s.block.rows.size), self.x(s.block.cols.size)
        nl = self.lanes_of()
        first = lo.is_const() and lo.const == 0     # the panel starts at row 0: its pivots and codes need no offset
        off = str(lo.const) if lo.is_const() else f"(int)({r0})"
        end = self.x(lo + s.block.cols.size)
        shift = [] if first else [f"{indent}        for (i = {r0}; i < {end}; ++i) ipiv[lane * ips + i] += {off};"]
        code = "r[lane]" if first else f"r[lane] + {off}"
        piv = "ipiv" if first else f"ipiv + {r0}"
        return [self.comment(f"panel factor with partial pivoting in every lane by the inner loop: from {s.source}",
                             indent),
                f"{indent}{{",
                f"{indent}    int r[{self.prefix.upper()}_LANES];",
                f"{indent}    size_t {'' if first else 'i, '}lane;",
                f"{indent}    {s.routine}({m}, {n}, {self.ptr(s.block)}, {piv}, ips, r, {nl});",
                f"{indent}    for (lane = 0; lane < {nl}; ++lane) {{"] + shift + [
                f"{indent}        if (r[lane] != 0 && info[lane] == 0) info[lane] = {code};",
                f"{indent}    }}",
                f"{indent}}}"]

    def n_text(self, r: Routine) -> str:
        """n in a public routine: the argument's local copy, or the constant of a fixed-size kernel."""
        rows = r.extents[0][1].split(",")[0]
        return self.names.get(rows, rows)

    def visit_Call(self, s: Call, indent: str) -> list[str]:
        callee = self.kernel.routine(s.routine)
        args = ", ".join(self.names.get(p.name, p.name) for p in callee.params)
        return [self.comment(s.source, indent), f"{indent}{s.routine}({args});"]

    def visit_Groups(self, s: Groups, indent: str) -> list[str]:
        r = self.routine
        callee = self.kernel.routine(s.routine)
        ext = {m: e.split(",") for m, e in r.extents}
        binds = dict(s.binds)
        args = []
        for p in callee.params:
            if p.name == "nl":
                args.append("nl")
            elif p.name in binds:
                args.append(self.x(binds[p.name]))
            elif p.kind in ("matrix", "const_matrix"):
                rows, cols = (self.names.get(e, e) for e in ext[p.name])
                size = rows if cols == "1" else f"{rows} * {cols}"
                args.append(f"{p.name} + g * {size}")
            elif p.kind in ("pivots", "const_pivots"):
                args.append(f"{p.name} + g * {self.n_text(r)}")
            elif p.kind == "codes":
                args.append(f"{p.name} + g")
            else:
                args.append(self.names.get(p.name, p.name))
        w = f"{self.prefix.upper()}_LANES"
        call = f"{s.routine}({', '.join(args)});"
        # whole groups pass the lane count as the constant W, so the compiler can specialise the lane loops for
        # it; the last, partial group passes fewer, and its lanes past count keep their bits
        return [self.comment(f"{s.source}; g is the first matrix of the group, nl its lanes in use", indent),
                f"{indent}for (g = 0; COUNT - g >= {w}; g += {w}) {{",
                f"{indent}    const size_t nl = {w};",
                f"{indent}    {call}",
                f"{indent}}}",
                f"{indent}if (g < COUNT) {{",
                f"{indent}    const size_t nl = COUNT - g;",
                f"{indent}    {call}",
                f"{indent}}}"]

    # -- routines ----------------------------------------------------------------------------------------------
    def c_param(self, p: Param, public: bool) -> str:
        if p.kind == "count":
            return f"int {p.name}"
        if p.kind == "codes":
            return f"int *{p.name}"
        return super().c_param(p, public)

    def body(self, r: Routine) -> list[str]:
        self.routine = r
        public = r.role in ("factor", "solve")
        self.names = {p.name: p.name.upper() for p in r.params if p.kind in ("size", "count")} if public else {}
        out: list[str] = []
        if public:
            out += self.lane_argument_checks(r)
            out += [f"    const size_t {p.name.upper()} = (size_t){p.name};" for p in r.params
                    if p.kind in ("size", "count")]
            out.append("    size_t g;")
            n = self.n_text(r)
            if any(p.kind == "codes" for p in r.params):
                if not n.isdigit():
                    out += [f"    if ({n} == 0) {{",
                            "        for (g = 0; g < COUNT; ++g) info[g] = 0;",
                            "        return 0;",
                            "    }"]
            else:
                out.append(f"    if ({'COUNT == 0' if n.isdigit() else f'{n} == 0 || COUNT == 0'}) return 0;")
        else:
            loops = [s for s in r.body if isinstance(s, Loop)]
            if loops:
                out.append("    size_t k;")
                if any(lp.step > 1 for lp in loops):
                    out.append("    size_t kb;")
            if self.pivots_here(r):
                # the codes as integer lanes while the pivot steps run (no lane-by-lane test per step), written
                # to info once at the end
                P = self.prefix.upper()
                out += [f"    {self.prefix}_m code[{P}_NC];", "    size_t l;",
                        f"    for (l = 0; l < {P}_NC; ++l) code[l] = {P}_ISET(0);"]
            elif r.on_zero == "record":
                out += ["    size_t l;", "    for (l = 0; l < nl; ++l) info[l] = 0;"]
        for s in r.body:
            out += self.visit(s, "    ")
        if not public and self.pivots_here(r):
            P = self.prefix.upper()
            out.append(f"    for (l = 0; l < nl; ++l) info[l] = (int){P}_LANE(code[l / {P}_VL], l % {P}_VL);")
        out.append("    return 0;")
        if not public:
            text = re.sub(r"/\*.*?\*/", "", "\n".join(out), flags=re.S)
            unused = [p.name for p in r.params if not re.search(rf"\b{p.name}\b", text)]
            out = [f"    (void){n};  /* not needed by this loop ordering */" for n in unused] + out
        return out

    @staticmethod
    def pivots_here(r: Routine) -> bool:
        """The routine takes pivot steps itself (not through a panel routine it calls): its codes are kept as
        integer lanes."""
        return r.on_zero == "record" and any(isinstance(s, SelectPivot) for s in walk(r.body))

    def lane_argument_checks(self, r: Routine) -> list[str]:
        """Negative codes name the bad argument by its 1-based position (as the header documents)."""
        n = r.extents[0][1].split(",")[0]       # the argument n, or the fixed size
        some = "count > 0" if n.isdigit() else "count > 0 && n > 0"
        out = []
        for pos, p in enumerate(r.params, start=1):
            if p.kind in ("count", "size"):
                out.append(f"    if ({p.name} < 0) return -{pos};")
            elif p.kind in ("matrix", "const_matrix", "pivots"):
                out.append(f"    if ({p.name} == NULL && {some}) return -{pos};")
            elif p.kind == "codes":
                out.append(f"    if ({p.name} == NULL && count > 0) return -{pos};")
            elif p.kind == "const_pivots":
                # pivots handed back in: the interchanges by selects look for row ipiv[k] among rows k..n-1,
                # and getrf never records another, so anything else is refused before b is touched
                out += [f"    if ({p.name} == NULL && {some}) return -{pos};",
                        "    {",
                        "        int m, k;",
                        "        for (m = 0; m < count; ++m)",
                        f"            for (k = 0; k < {n}; ++k)",
                        f"                if ({p.name}[(size_t)m * (size_t){n} + (size_t)k] < k || "
                        f"{p.name}[(size_t)m * (size_t){n} + (size_t)k] >= {n}) return -{pos};",
                        "    }"]
        return out
