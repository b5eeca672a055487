"""C99 printer for fixed-size kernels: the same IR nodes printed as loops with the block bounds written in (constants
once the size is known), so the compiler sees every trip count; pivoting by selects when the IR asks for it."""
from __future__ import annotations

import re

from derive.lowering.ir import Block, OneColumn, PivotCheck, PivotSearch, RowSwaps, Routine, Scale, Trsm
from derive.printers.cprinter import CPrinter
from derive.targets.storage import Layout, Scalar


def _int(s: str) -> int | None:
    return int(s) if s.lstrip("-").isdigit() else None


def plus(a: str, b: str) -> str:
    """a + b as C text, folding constants and zeros."""
    ia, ib = _int(a), _int(b)
    if ia is not None and ib is not None:
        return str(ia + ib)
    if ia == 0:
        return b
    if ib == 0:
        return a
    return f"{a} + {b}"


def for_(var: str, lo: str, hi: str, body: list[str], indent: str, down: bool = False, unroll: int = 0) -> list[str]:
    """A counted loop over [lo, hi); no loop at all when the bounds are constants giving one trip or none, or
    at most `unroll` trips (then written out trip by trip)."""
    il, ih = _int(lo), _int(hi)
    inner = [f"    {line}" for line in body]
    if il is not None and ih is not None:
        if ih <= il:
            return []
        if ih - il == 1 or ih - il <= unroll:
            order = range(ih - 1, il - 1, -1) if down else range(il, ih)
            used = re.search(rf"\b{var}\b", "\n".join(body)) is not None
            decl = lambda v: f"const size_t {var} = {v};" if used else ""  # noqa: E731
            if len(body) == 1:
                return [f"{indent}{{ {decl(v)}{' ' if used else ''}{body[0]} }}" for v in order]
            return [ln for v in order for ln in [f"{indent}{{"] + ([f"{indent}    {decl(v)}"] if used else []) +
                    [indent + x for x in inner] + [f"{indent}}}"]]
    if down:
        head = f"for (size_t {var} = {hi}; {var}-- > {lo};) {{"
    else:
        head = f"for (size_t {var} = {lo}; {var} < {hi}; ++{var}) {{"
    return [indent + head] + [indent + x for x in inner] + [f"{indent}}}"]


class View:
    """Element (i, j) of a block, or of its transpose: a row-major block is printed as the transpose of the
    column-major code, so one loop nest serves both layouts with the contiguous index innermost."""

    def __init__(self, printer: "FixedCPrinter", b: Block, transposed: bool):
        self.p, self.b, self.t = printer, b, transposed

    def __call__(self, i: str, j: str) -> str:
        if self.t:
            i, j = j, i
        p = self.p
        return p.elem(self.b.matrix, plus(p.x(self.b.rows.lo), i), plus(p.x(self.b.cols.lo), j))

    def rows(self) -> str:
        return self.p.x((self.b.cols if self.t else self.b.rows).size)

    def cols(self) -> str:
        return self.p.x((self.b.rows if self.t else self.b.cols).size)


class FixedCPrinter(CPrinter):
    """Prints a fixed-size kernel (derive/lowering/fixed.py). Statements the IR marks `select` run the same
    instruction sequence whatever the values; `branch` ones call the helpers of the runtime-n kernels."""

    def __init__(self, prefix: str, layout: Layout, scalar: Scalar, size: int):
        super().__init__(prefix, layout, scalar)
        self.size = size
        self.transposed = layout.leading != "rows"     # column-major code is the reference nest

    local: str | None = None      # the matrix held in the local array `rhs` (one right-hand side), if any
    unroll = 0                    # constant trip counts up to this are written out trip by trip (one-column part)

    def for_(self, var: str, lo: str, hi: str, body: list[str], indent: str, down: bool = False) -> list[str]:
        return for_(var, lo, hi, body, indent, down, self.unroll)

    def elem(self, matrix: str, i: str, j: str) -> str:
        if matrix == self.local:
            return f"rhs[{i}]"      # its only column
        return f"{self.prefix.upper()}_AT({matrix}, {self.ld(matrix)}, {i}, {j})"

    def view(self, b: Block) -> View:
        return View(self, b, self.transposed)

    def bits(self) -> tuple[str, str, str]:
        """The unsigned type as wide as the scalar, the mask clearing its sign and the pattern of Inf."""
        if self.scalar.c_type == "float":
            return "uint32_t", "0x7fffffffu", "0x7f800000u"
        return "uint64_t", "0x7fffffffffffffffu", "0x7ff0000000000000u"

    @staticmethod
    def extent_names(r: Routine) -> list[str]:
        return [e for e in CPrinter.extent_names(r) if _int(e) is None]

    loop_vars_in_for = True
    unsigned_constants = False  # the views compare printed sizes with "1"

    # -- structure ---------------------------------------------------------------------------------------------
    def visit_Loop(self, s, indent: str) -> list[str]:
        """A loop kept with its extent known: variables declared where they are used."""
        k, e = s.var, self.x(s.extent)
        out = [self.comment(f"loop invariant, {s.invariant}", indent),
               self.comment(f"partition at step {k}: {s.partition}", indent)]
        if s.step == 1:
            out.append(f"{indent}for (size_t {k} = 0; {k} < {e}; ++{k}) {{")
        else:
            out += [f"{indent}for (size_t {k} = 0; {k} < {e}; {k} += {s.step}) {{",
                    f"{indent}    const size_t kb = ({e} - {k} < {s.step}) ? {e} - {k} : {s.step};"]
        for t in s.body:
            out += self.visit(t, indent + "    ")
        return out + [f"{indent}}}"]

    def visit_OneColumn(self, s: OneColumn, indent: str) -> list[str]:
        out = [self.comment(s.source, indent), f"{indent}if ({self.names.get(s.var, s.var)} == 1) {{"]
        # The right-hand side is copied into a local array, interchanged and solved there: it aliases nothing
        # (b could alias lu as far as the compiler knows), so the updates need not store and reload each entry,
        # and the short loops written out trip by trip keep the compiler from vector loads of entries just
        # stored one by one (a stall on every step). Measured with bench/small.py: 0.4-0.7x Eigen's solve.
        ii = indent + "    "
        matrix = next((p.name for p in self.routine.params if p.kind == "matrix"), None)
        if matrix is not None:
            at = lambda i: f"{self.prefix.upper()}_AT({matrix}, {self.ld(matrix)}, {i}, 0)"  # noqa: E731
            out += [self.comment("the right-hand side in a local array while it is solved", ii),
                    f"{ii}{self.scalar.c_type} rhs[{self.size}];"] + \
                self.for_("i", "0", str(self.size), [f"rhs[i] = {at('i')};"], ii)
            self.local = matrix
        self.unroll = self.size if self.size <= 16 else 0
        try:
            for t in s.special:
                out += self.visit(t, ii)
        finally:
            self.unroll = 0
            self.local = None
        if matrix is not None:
            out += self.for_("i", "0", str(self.size), [f"{at('i')} = rhs[i];"], ii)
        out.append(f"{indent}}} else {{")
        for t in s.general:
            out += self.visit(t, indent + "    ")
        return out + [f"{indent}}}"]

    # -- block statements as loops with known bounds -----------------------------------------------------------
    def visit_Gemm(self, s, indent: str) -> list[str]:
        T = self.scalar.c_type
        if self.transposed:     # C' -= B' A' with ' the transpose
            c, a, b = View(self, s.c, True), View(self, s.b, True), View(self, s.a, True)
        else:
            c, a, b = self.view(s.c), self.view(s.a), self.view(s.b)
        m, n, k = c.rows(), c.cols(), a.cols()
        if m == "1":
            # a row of results: each is a dot product along the contiguous index of b
            body = [f"{T} acc = 0;"] + self.for_("p", "0", k, [f"acc += {a('0', 'p')} * {b('p', 'j')};"], "") + \
                   [f"{c('0', 'j')} -= acc;"]
            lines = self.for_("j", "0", n, body, "")
        else:
            inner = self.for_("i", "0", m, [f"{c('i', 'j')} -= {a('i', 'p')} * t;"], "")
            lines = self.for_("j", "0", n, self.for_("p", "0", k, [f"const {T} t = {b('p', 'j')};"] + inner, ""), "")
        return [self.comment(f"{s.shape}: from {s.source}", indent)] + [indent + x for x in lines]

    def _divide(self, by: str, d: str) -> tuple[list[str], str]:
        """Declarations and the operator that divide by d: a division, or a product with 1/d computed first."""
        if by == "reciprocal":
            return [f"const {self.scalar.c_type} r = ({self.scalar.c_type})1 / {d};"], "*= r"
        return [], f"/= {d}"

    def visit_Trsm(self, s: Trsm, indent: str) -> list[str]:
        loop = self.for_
        T = self.scalar.c_type
        b, t = self.view(s.b), self.view(s.tri)
        # the free index (a column of B for left solves, a row for right ones) goes outermost when it is not the
        # contiguous one, innermost when it is
        left = s.side == "left"
        free_outer = left != self.transposed
        m = self.x(s.b.rows.size)
        n = self.x(s.b.cols.size)
        B = lambda i, j: self.elem(s.b.matrix, plus(self.x(s.b.rows.lo), i), plus(self.x(s.b.cols.lo), j))  # noqa
        U = lambda i, j: self.elem(s.tri.matrix, plus(self.x(s.tri.rows.lo), i), plus(self.x(s.tri.cols.lo), j))  # noqa
        del b, t
        if left and s.uplo == "L":
            if free_outer:
                upd = loop("i", "p + 1", m, [f"{B('i', 'j')} -= {U('i', 'p')} * t;"], "")
                lines = loop("j", "0", n, loop("p", "0", m, [f"const {T} t = {B('p', 'j')};"] + upd, ""), "")
            else:
                upd = loop("j", "0", n, [f"{B('i', 'j')} -= t * {B('p', 'j')};"], "")
                lines = loop("p", "0", m, loop("i", "p + 1", m, [f"const {T} t = {U('i', 'p')};"] + upd, ""), "")
        elif left:
            decl, op = self._divide(s.by, U("p", "p"))
            if free_outer:
                upd = loop("i", "0", "p", [f"{B('i', 'j')} -= {U('i', 'p')} * t;"], "")
                body = ["{"] + [f"    {x}" for x in decl + [f"{B('p', 'j')} {op};"]] + ["}"]
                lines = loop("j", "0", n, loop("p", "0", m, body + [f"const {T} t = {B('p', 'j')};"] + upd, "",
                                          down=True), "")
            else:
                scale = decl + loop("j", "0", n, [f"{B('p', 'j')} {op};"], "")
                upd = loop("i", "0", "p", [f"const {T} t = {U('i', 'p')};"] +
                           loop("j", "0", n, [f"{B('i', 'j')} -= t * {B('p', 'j')};"], ""), "")
                lines = loop("p", "0", m, ["{"] + [f"    {x}" for x in scale] + ["}"] + upd, "", down=True)
        else:   # right, upper: B := B U^-1 (the factor's L21 from A21 and U11)
            decl, op = self._divide(s.by, U("p", "p") if free_outer else U("j", "j"))
            if not free_outer:      # column-major: i (rows of B) contiguous, innermost
                upd = loop("p", "0", "j", [f"const {T} t = {U('p', 'j')};"] +
                           loop("i", "0", m, [f"{B('i', 'j')} -= {B('i', 'p')} * t;"], ""), "")
                scale = decl + loop("i", "0", m, [f"{B('i', 'j')} {op};"], "")
                lines = loop("j", "0", n, upd + ["{"] + [f"    {x}" for x in scale] + ["}"], "")
            else:
                upd = loop("j", "p + 1", n, [f"{B('i', 'j')} -= t * {U('p', 'j')};"], "")
                body = ["{"] + [f"    {x}" for x in decl + [f"{B('i', 'p')} {op};"]] + ["}"]
                lines = loop("i", "0", m, loop("p", "0", n, body + [f"const {T} t = {B('i', 'p')};"] + upd, ""), "")
        what = "unit-lower" if s.uplo == "L" else "upper"
        return [self.comment(f"trsm ({s.side}, {what}): from {s.source}", indent)] + [indent + x for x in lines]

    def visit_Scale(self, s: Scale, indent: str) -> list[str]:
        v = self.view(s.b)
        d = self.elem(s.pivot.matrix, self.x(s.pivot.rows.lo), self.x(s.pivot.cols.lo))
        decl, op = self._divide(s.by, d)
        lines = decl + self.for_("j", "0", v.cols(), self.for_("i", "0", v.rows(), [f"{v('i', 'j')} {op};"], ""), "")
        how = "by the reciprocal of the pivot" if s.by == "reciprocal" else "by the pivot"
        return [self.comment(f"scal {how}: from {s.source}", indent), f"{indent}{{"] + \
            [f"{indent}    {x}" for x in lines] + [f"{indent}}}"]

    def visit_PivotCheck(self, s: PivotCheck, indent: str) -> list[str]:
        piv = self.elem(s.pivot.matrix, self.x(s.pivot.rows.lo), self.x(s.pivot.cols.lo))
        code = plus(self.x(s.pivot.rows.lo), "1")
        code = code if _int(code) is not None else f"(int)({code})"
        return [self.comment(f"exactly zero pivot: stop before dividing by it ({s.source})", indent),
                f"{indent}if ({piv} == {self.scalar.c_zero}) return {code};"]

    def visit_FactorCall(self, s, indent: str) -> list[str]:
        out = super().visit_FactorCall(s, indent)
        if s.pivoted:     # the panel's code taken without a branch, like the pivot search's own
            r0 = self.x(s.block.rows.lo)
            out = [line.replace(f"if ((r != 0) && (info == 0)) {{ info = r + (int)({r0}); }}",
                                f"info += ((r != 0) & (info == 0)) * (r + (int)({r0}));") for line in out]
        return out

    def visit_PivotSearch(self, s: PivotSearch, indent: str) -> list[str]:
        if s.by != "select":
            return super().visit_PivotSearch(s, indent)
        T = self.scalar.c_type
        r0, c0 = self.x(s.column.rows.lo), self.x(s.column.cols.lo)
        m = self.x(s.column.rows.size)
        col = lambda i: self.elem(s.column.matrix, plus(r0, i), c0)  # noqa: E731
        code = plus(r0, "1")
        # Magnitudes compared as integers: the bits of an IEEE number with its sign cleared order like its
        # magnitude, and a NaN's lie above Inf's. Integer masks and comparisons leave the compiler no select
        # to turn back into a branch (gcc does that with `c ? x : y` on floats, on AArch64 for one).
        U, mag, inf = self.bits()
        lines = [
            f"union {{ {T} f; {U} u; }} e;",
            f"{U} big;",
            "size_t q = 0;",
            f"e.f = {col('0')};",
            f"big = e.u & {mag};     /* a NaN in first place stays first: nothing lies above it */",
            f"{U} pv = e.u;     /* the pivot's bits, carried with its key */",
        ] + self.for_("i", "1", m, [
            f"{U} key, take;",
            f"e.f = {col('i')};",
            f"key = e.u & {mag};",
            f"key &= ({U})0 - ({U})(key <= {inf});   /* a NaN after the first entry counts as zero */",
            f"take = ({U})0 - ({U})(key > big);     /* all ones or zero: ties go to the first entry */",
            "q ^= (q ^ i) & (size_t)take;",
            "big ^= (big ^ key) & take;",
            "pv ^= (pv ^ e.u) & take;",
        ], "") + [
            "(void)big;",
            f"ipiv[{r0}] = (int)({plus(r0, 'q')});",
            f"e.f = {col('0')};",
            f"const {U} tb = e.u;     /* the old diagonal entry, for row q */",
            "e.u = pv;",
            f"{col('0')} = e.f;",
        ]
        # the old diagonal entry goes to row q by a select over the rows below, so no store waits for q's address
        below = self.for_("i", "1", m, [f"e.f = {col('i')};",
                                   f"e.u ^= (e.u ^ tb) & (({U})0 - ({U})(i == q));",
                                   f"{col('i')} = e.f / s;"], "")
        if not below:
            lines.append("(void)tb;")
        lines += ["{", f"    const int zero = {col('0')} == {self.scalar.c_zero};"]
        if below:
            lines.append(f"    const {T} s = {col('0')} + ({T})zero;  /* a zero pivot's column divided by 1: "
                         f"left as it is */")
        lines += [f"    info += (zero & (info == 0)) * (int)({code});"] + [f"    {x}" for x in below] + ["}"]
        return [self.comment(f"partial pivoting on column {c0}, by selects (the same instructions whatever the "
                             f"values): from {s.source}", indent), f"{indent}{{"] + \
            [f"{indent}    {x}" for x in lines] + [f"{indent}}}"]

    def visit_RowSwaps(self, s: RowSwaps, indent: str) -> list[str]:
        if s.by != "select" and s.matrix != self.local:     # a local array is exchanged in place either way
            return super().visit_RowSwaps(s, indent)
        T = self.scalar.c_type
        c0, nc = self.x(s.cols.lo), self.x(s.cols.size)
        at = lambda i: self.elem(s.matrix, i, plus(c0, "j"))  # noqa: E731
        # both entries are read before either is written, so exchanging a row with itself writes it back
        if _int(nc) is not None:
            # written out column by column: a loop here is one the vectorizer guards with a test whether the
            # two rows overlap, a branch on the pivot
            swap = []
            for j in range(_int(nc)):
                x, y = self.elem(s.matrix, "r", plus(c0, str(j))), self.elem(s.matrix, "q", plus(c0, str(j)))
                swap += [f"{{ const {T} x = {x}, y = {y}; {y} = x; {x} = y; }}"]
        else:
            swap = self.for_("j", "0", nc, [f"const {T} x = {at('r')}, y = {at('q')};", f"{at('q')} = x;",
                                       f"{at('r')} = y;"], "")
        lines = self.for_("r", self.x(s.steps.lo), self.x(s.steps.hi), ["const size_t q = (size_t)ipiv[r];"] + swap, "")
        return [self.comment(f"row interchanges, each done even when a row is exchanged with itself: {s.source}",
                             indent)] + [indent + x for x in lines]
