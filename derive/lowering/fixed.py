"""Fixed-size lowering: the loop IR of a kernel specialised for n known at compile time (spec key `size`).
Loops over the matrix become steps with constant index ranges, pivoting becomes constant-time, the solve gets a
one-column path; the derivation and the statements are the same as for n as an argument."""
from __future__ import annotations

import ast
import dataclasses
import re

from derive.lowering.ir import (Block, Gemm, Kernel, Lin, Loop, OneColumn, PivotSearch,
                                RowSwaps, Routine, Scale, Span, Step, Trsm)
from derive.lowering.onecolumn import RHS, inlined
from derive.options import KernelOptions

SIZE = "n"      # the size argument that a fixed-size kernel knows


# -- substitution of known sizes ---------------------------------------------------------------------------------
def _span(s: Span, env: dict[str, int]) -> Span:
    return Span(s.lo.substitute(env), s.hi.substitute(env))


def _block(b: Block, env: dict[str, int]) -> Block:
    return Block(b.matrix, _span(b.rows, env), _span(b.cols, env))


def substitute(stmt, env: dict[str, int]):
    """The statement with every index expression partially evaluated for the sizes `env` knows."""
    changes = {}
    for f in dataclasses.fields(stmt):
        v = getattr(stmt, f.name)
        if isinstance(v, Block):
            changes[f.name] = _block(v, env)
        elif isinstance(v, Span):
            changes[f.name] = _span(v, env)
        elif isinstance(v, Lin):
            changes[f.name] = v.substitute(env)
        elif isinstance(v, tuple) and f.name in ("body", "special", "general"):
            changes[f.name] = tuple(substitute(t, env) for t in v)
    return dataclasses.replace(stmt, **changes)


def _empty(stmt) -> bool:
    """A statement on an empty block does nothing; with the sizes known that is decided here, not at run time."""
    def zero(x: Lin) -> bool:
        return x.is_const() and x.const <= 0
    if isinstance(stmt, Gemm):
        return any(zero(z) for z in (stmt.c.rows.size, stmt.c.cols.size, stmt.a.cols.size))
    if isinstance(stmt, (Trsm, Scale)):
        return zero(stmt.b.rows.size) or zero(stmt.b.cols.size)
    if isinstance(stmt, RowSwaps):
        return zero(stmt.cols.size) or zero(stmt.steps.size)
    return False


# -- concrete partition text at the head of each step ----------------------------------------------------------
_RANGE = re.compile(r"\[([^,\[\]]+), ([^,\[\]]+)\)")


def _value(expr: str, env: dict[str, int]) -> str:
    """Evaluate a printed index expression (names, integers, +, -, *) when every name is known."""
    def ev(node):
        if isinstance(node, ast.Expression):
            return ev(node.body)
        if isinstance(node, ast.Constant) and isinstance(node.value, int):
            return node.value
        if isinstance(node, ast.Name):
            return env[node.id]
        if isinstance(node, ast.BinOp) and isinstance(node.op, (ast.Add, ast.Sub, ast.Mult)):
            a, b = ev(node.left), ev(node.right)
            return a + b if isinstance(node.op, ast.Add) else a - b if isinstance(node.op, ast.Sub) else a * b
        raise KeyError(expr)
    try:
        return str(ev(ast.parse(expr, mode="eval")))
    except KeyError:
        return expr


def concrete_partition(text: str, env: dict[str, int]) -> str:
    return _RANGE.sub(lambda m: f"[{_value(m.group(1), env)}, {_value(m.group(2), env)})", text)


# -- unrolling ----------------------------------------------------------------------------------------------------
# Unroll a loop into its steps when its extent is at most this: every block statement of a step then has
# constant bounds. The compiler's time grows with the elements the steps touch (gcc 12 -O3, CPU time of a whole
# right-looking kernel, measured: 0.8 s at n = 8, 3.5 s at n = 16, 9 s at n = 32; crout block 4 at n = 32:
# 4 s); past n = 16 the loop is kept, its extent a constant, and the kernel compiles in a fraction of a second.
MAX_EXTENT = 16
# A single matrix's factor pays for its straight-line steps in instruction fetch: at n = 16 the unrolled
# right-looking factor is 33 KB of code, more than a 32 KB L1 instruction cache, and the kept step loop ran it in
# 0.72-0.85x the time at n = 12 and 16 (gcc 12 -O3 -march=native, one core of an AMD EPYC, same-run ratios to
# Eigen; bench/small.py). A batched factor spreads each step over W matrices and keeps the steps (unrolled was
# 0.77-0.89x the time of the kept loop at n = 16 there), as does the one-column solve.
MAX_EXTENT_FACTOR = 8


def unroll(body: tuple, env: dict[str, int], max_extent: int = MAX_EXTENT) -> tuple:
    """Every loop whose extent the known sizes fix, at most `max_extent`, becomes its steps,
    each with its index ranges constant. The block statements of a step stay loops with constant bounds that
    the compiler unrolls or vectorizes as it finds best (fully unrolling the element loops too is what makes
    gcc take minutes at n = 32)."""
    out = []
    for s in body:
        s = substitute(s, env)
        if isinstance(s, Loop) and s.extent.is_const() and s.extent.const > max_extent:
            out.append(dataclasses.replace(s, body=unroll(s.body, {}, max_extent)))
        elif isinstance(s, Loop) and s.extent.is_const():
            extent, k, count = s.extent.const, 0, -(-s.extent.const // s.step)
            while k < extent:
                kb = min(s.step, extent - k)
                here = {s.var: k, "kb": kb}
                steps = unroll(s.body, here, max_extent)
                part = concrete_partition(s.partition, dict(env, **here))
                out.append(Step(s.var, k, kb, count, steps, s.invariant, part))
                k += kb
        elif not _empty(s):
            out.append(s)
    return tuple(out)


def constant_time(stmt):
    """Pivot choice and interchanges by selects: the same instructions run whatever the matrix holds."""
    if isinstance(stmt, (PivotSearch, RowSwaps)):
        return dataclasses.replace(stmt, by="select")
    if isinstance(stmt, (Loop, Step)):
        return dataclasses.replace(stmt, body=tuple(constant_time(t) for t in stmt.body))
    if isinstance(stmt, OneColumn):
        return dataclasses.replace(stmt, special=tuple(constant_time(t) for t in stmt.special),
                                   general=tuple(constant_time(t) for t in stmt.general))
    return stmt


def reciprocal(stmt):
    """Triangular solves scale by reciprocals of U's diagonal: the divisions no longer wait for the solution,
    at the price of one more rounding per entry (the bound the header states accounts for it)."""
    if isinstance(stmt, Scale) or (isinstance(stmt, Trsm) and stmt.uplo == "U"):
        return dataclasses.replace(stmt, by="reciprocal")
    if isinstance(stmt, (Loop, Step)):
        return dataclasses.replace(stmt, body=tuple(reciprocal(t) for t in stmt.body))
    return stmt


def _fixed_extents(r: Routine, n: int) -> tuple[tuple[str, str], ...]:
    return tuple((m, ",".join(str(n) if e == SIZE else e for e in ext.split(","))) for m, ext in r.extents)


def lower_fixed(kernel: Kernel, o: KernelOptions, choices: str = "select",
                factor_steps: int = MAX_EXTENT_FACTOR) -> Kernel:
    """The kernel of `o` (lowered for n as an argument) specialised for n = o.size. choices="branch" keeps the
    pivoting's branches (only `make bench` asks for it, to show what constant time costs)."""
    n = o.size
    assert n is not None
    env = {SIZE: n}
    timed = constant_time if choices == "select" else (lambda s: s)
    out = []
    for r in kernel.routines:
        if r.role == "inner":
            # its sizes come from the call sites as constants; its loop stays a loop (one body, several sizes)
            out.append(dataclasses.replace(r, body=tuple(timed(s) for s in r.body)))
            continue
        if r.role in ("lower", "upper"):
            continue        # inlined into the solve below
        params = tuple(p for p in r.params if p.name != SIZE)
        extents = _fixed_extents(r, n)
        if r.role == "factor":
            body = tuple(timed(s) for s in unroll(r.body, env, factor_steps))
            out.append(dataclasses.replace(r, params=params, body=body, extents=extents))
            continue
        # the solve: the triangular solves inlined, then specialised once more for a single right-hand side
        general = inlined(r, kernel, reciprocal)
        # several right-hand sides: the loops stay (the compile time goes to the one-column path)
        general_t = tuple(timed(s) for s in unroll(tuple(general), env, 0))
        special = tuple(timed(s) for s in unroll(tuple(general), dict(env, **{RHS: 1})))
        body = (OneColumn(RHS, special, general_t, "one right-hand side: every column loop has one trip"),)
        out.append(dataclasses.replace(r, params=params, body=body, extents=extents))
    return Kernel(kernel.name, tuple(out))
