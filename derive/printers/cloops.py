"""Inline shaping of the C printer: an inner operation of the IR printed as loops over the matrix itself, in the
routine's body, instead of a call of a static helper. Same arithmetic, same rounding order as the helpers."""
from __future__ import annotations

from typing import TYPE_CHECKING

from derive.lowering.ir import Gemm, Lin, PivotSearch, RowSwaps, Scale, Span

if TYPE_CHECKING:
    from derive.printers.cprinter import CPrinter

# Loop order of an update c(i, j) -= a(i, p) b(p, j) for each layout, outermost first: the innermost index runs
# along the storage (common practice). The helpers in templates/c/ use the same orders.
LOOP_ORDER = {"rows": ("j", "p", "i"), "cols": ("i", "p", "j")}
ONE = Lin((), 1)


def _var(name: str) -> Lin:
    return Lin.of(name)


class InlineLoops:
    """Prints IR statements as loops for one CPrinter (its names, layout, scalar and the loops open around the
    statement, `printer.open_spans`)."""

    def __init__(self, printer: "CPrinter"):
        self.cp = printer

    def at(self, matrix: str, i: Lin, j: Lin) -> str:
        return self.cp.at(matrix, i, j)

    def nonempty(self, span: Span, outer: list[Span]) -> bool:
        """True when the range cannot be empty where it is entered: the same range as a loop around it (whose
        body runs only when that range is not empty), or a size that is a positive constant or the current
        block size kb (never zero inside its loop)."""
        size = span.size
        return span in outer or (size.is_const() and size.const > 0) or size == Lin.of("kb")

    def paren(self, e: Lin) -> str:
        """An index expression as an operand: parenthesised unless it is a single name or constant."""
        text = self.cp.x(e)
        return text if text.replace("_", "").isalnum() else f"({text})"

    def loop(self, var: str, span: Span, body: list[str], indent: str, outer: list[Span],
             own_scope: bool = False) -> list[str]:
        """A counted loop over `span` around `body` (lines without indentation). A range known not to be empty
        gets its test at the bottom: compilers optimising for size do not copy a loop's test to its end, and the
        test at the top costs a compare and a branch more on every pass. `own_scope`: the loop is the only one
        of its variable in the enclosing block, so its counter may be declared there without braces."""
        lo = self.cp.x(span.lo)
        inner = [f"{indent}    {ln}" for ln in body]
        if self.nonempty(span, outer):
            lines = [f"size_t {var} = {lo};", "do {", *(f"    {ln}" for ln in body), f"    ++{var};",
                     f"}} while ({var} < {self.paren(span.hi)});"]
            if own_scope:
                return [indent + ln for ln in lines]
            return [f"{indent}{{", *(f"{indent}    {ln}" for ln in lines), f"{indent}}}"]
        head = f"for (size_t {var} = {lo}; {var} < {self.paren(span.hi)}; ++{var})"
        if len(body) == 1:
            return [f"{indent}{head} {{ {body[0]} }}"]
        return [f"{indent}{head} {{", *inner, f"{indent}}}"]

    def _nested(self, order, spans, inner, indent, outer, own_scope: bool = False) -> list[str]:
        """Loops over `order` (outermost first) around the lines `inner`; each inner level is alone in the body
        of the level around it."""
        if not order:
            return [indent + ln for ln in inner]
        v, rest = order[0], order[1:]
        body = self._nested(rest, spans, inner, "", outer + [spans[v]], True)
        return self.loop(v, spans[v], body, indent, outer, own_scope)

    # -- statements --------------------------------------------------------------------------------------------
    def gemm(self, s: Gemm, indent: str) -> list[str]:
        """c(i, j) -= sum over p of a(i, p) b(p, j). A sum along the innermost loop is kept in a local and
        subtracted once (as the dot and GEMV helpers do); otherwise the operand the innermost loop does not move
        is read once before it, since the compiler may not assume the store leaves it unchanged."""
        c, a, b = s.c, s.a, s.b
        spans = {"i": c.rows, "j": c.cols, "p": a.cols}
        idx = {v: (_var(v) if not sp.is_unit() else sp.lo) for v, sp in spans.items()}
        cx = self.at(c.matrix, idx["i"], idx["j"])
        ax = self.at(a.matrix, idx["i"] + a.rows.lo - c.rows.lo, idx["p"])
        bx = self.at(b.matrix, idx["p"] + b.rows.lo - a.cols.lo, idx["j"] + b.cols.lo - c.cols.lo)
        t = self.cp.scalar.c_type
        loops = [v for v in LOOP_ORDER[self.cp.layout.leading] if not spans[v].is_unit()]
        if not loops:
            return [f"{indent}{cx} -= {ax} * {bx};"]
        v, outer = loops[-1], loops[:-1]
        if v == "p":
            # a reduction: accumulate, then one subtraction
            inner = [f"{t} s = {self.cp.scalar.c_zero};",
                     *self._nested(["p"], spans, [f"s += {ax} * {bx};"], "", self._outer(outer, spans), True),
                     f"{cx} -= s;"]
        elif v == "i":
            inner = [f"const {t} h = {bx};",
                     *self._nested(["i"], spans, [f"{cx} -= {ax} * h;"], "", self._outer(outer, spans), True)]
        else:
            inner = [f"const {t} h = {ax};",
                     *self._nested(["j"], spans, [f"{cx} -= h * {bx};"], "", self._outer(outer, spans), True)]
        return self._scoped_nest(outer, spans, inner, indent)

    def _outer(self, order: list[str], spans: dict[str, Span]) -> list[Span]:
        return list(self.cp.open_spans) + [spans[v] for v in order]

    def _scoped_nest(self, order: list[str], spans: dict[str, Span], inner: list[str], indent: str) -> list[str]:
        if not order and len(inner) > 1:
            return [f"{indent}{{", *(f"{indent}    {ln}" for ln in inner), f"{indent}}}"]
        return self._nested(order, spans, inner, indent, list(self.cp.open_spans))

    def scale(self, s: Scale, indent: str) -> list[str]:
        b = s.b
        piv = self.at(s.pivot.matrix, s.pivot.rows.lo, s.pivot.cols.lo)
        spans = {"i": b.rows, "j": b.cols}
        idx = {v: (_var(v) if not sp.is_unit() else sp.lo) for v, sp in spans.items()}
        bx = self.at(b.matrix, idx["i"], idx["j"])
        loops = [v for v in LOOP_ORDER[self.cp.layout.leading] if v in spans and not spans[v].is_unit()]
        if not loops:
            return [f"{indent}{bx} /= {piv};"]
        t = self.cp.scalar.c_type
        return [f"{indent}{{", f"{indent}    const {t} d = {piv};",
                *self._nested(loops, spans, [f"{bx} /= d;"], indent + "    ", list(self.cp.open_spans), True),
                f"{indent}}}"]

    def exchange(self, matrix: str, r1: Lin, r2: str, cols: Span, outer: list[Span],
                 own_scope: bool = True) -> list[str]:
        """Exchange rows r1 and r2 over the columns `cols` (lines without indentation)."""
        t = self.cp.scalar.c_type
        r2l = _var(r2)
        j = cols.lo if cols.is_unit() else _var("j")
        body = [f"const {t} t = {self.at(matrix, r1, j)};", f"{self.at(matrix, r1, j)} = {self.at(matrix, r2l, j)};",
                f"{self.at(matrix, r2l, j)} = t;"]
        if cols.is_unit():
            return ["{", *(f"    {ln}" for ln in body), "}"]
        return self.loop("j", cols, body, "", outer, own_scope)

    def row_swaps(self, swaps: list[RowSwaps], indent: str) -> list[str]:
        """The interchanges of one range of steps applied to one or more column ranges of a matrix: one pass over
        the steps, each exchange done on every range (the IR's RowSwaps of the columns left and right of a panel
        share their steps)."""
        s = swaps[0]
        outer = list(self.cp.open_spans)
        unit = s.steps.is_unit()
        r = s.steps.lo if unit else _var("r")
        rx = self.cp.x(r)
        inner = outer if unit else outer + [s.steps]
        body = [f"const size_t q = (size_t)ipiv[{rx}];", f"if (q != {rx}) {{"]
        for w in swaps:
            # several ranges share the block: only the last counter may be declared without braces of its own
            own = len(swaps) == 1
            lines = self.exchange(s.matrix, r, "q", w.cols, inner, own)
            if own and w.cols.is_unit():
                lines = [ln[4:] for ln in lines[1:-1]]     # one column alone: the if's braces are its scope
            body += [f"    {ln}" for ln in lines]
        body.append("}")
        if unit:
            return [f"{indent}{{", *(f"{indent}    {ln}" for ln in body), f"{indent}}}"]
        return self.loop("r", s.steps, body, indent, outer)

    def pivot_search(self, s: PivotSearch, exchange_cols: Span, indent: str) -> list[str]:
        """Choose the first entry of largest magnitude, record it, exchange its row over `exchange_cols` (the
        panel's column, joined with the interchanges of the columns either side when they follow at once),
        then divide below the pivot unless it is exactly zero (the first such step is recorded)."""
        col, m = s.column, s.column.matrix
        t, zero = self.cp.scalar.c_type, self.cp.scalar.c_zero
        r0, c0 = col.rows.lo, col.cols.lo
        rx, below, i = self.cp.x(r0), Span(r0 + ONE, col.rows.hi), _var("i")
        outer = list(self.cp.open_spans)
        search = [f"{t} v = {self.at(m, i, c0)};", f"if (v < {zero}) {{ v = -v; }}", "if (v > big) {", "    big = v;",
                  "    q = i;", "}"]
        body = [f"size_t q = {rx};", f"{t} big = {self.at(m, r0, c0)};", f"if (big < {zero}) {{ big = -big; }}",
                *self.loop("i", below, search, "", outer),
                f"ipiv[{rx}] = (int)q;",
                f"if (q != {rx}) {{", *(f"    {ln}" for ln in self.exchange(m, r0, "q", exchange_cols, outer)), "}",
                f"if ({self.at(m, r0, c0)} != {zero}) {{", f"    const {t} d = {self.at(m, r0, c0)};",
                *(f"    {ln}" for ln in self.loop("i", below, [f"{self.at(m, i, c0)} /= d;"], "", outer, True)),
                "} else {", "    if (info == 0) {", f"        info = (int)({rx}) + 1;", "    }", "}"]
        return [f"{indent}{{", *(f"{indent}    {ln}" for ln in body), f"{indent}}}"]


def joined_exchange(search: PivotSearch, following: list) -> tuple[Span, int]:
    """The columns one row exchange can serve: the panel's column joined with the RowSwaps that follow the search
    at once, for the same single step, on adjacent columns. Returns the joined span and how many RowSwaps it
    takes in. Moving those interchanges before the division is sound: they touch other columns only."""
    col = search.column
    span = col.cols
    taken = 0
    step = Span(col.rows.lo, col.rows.lo + ONE)
    for s in following:
        if not (isinstance(s, RowSwaps) and s.matrix == col.matrix and s.steps == step):
            break
        if s.cols.hi == span.lo:
            span = Span(s.cols.lo, span.hi)
        elif s.cols.lo == span.hi:
            span = Span(span.lo, s.cols.hi)
        else:
            break
        taken += 1
    return span, taken
