"""Operation counts by walking the loop IR for concrete sizes: flops as LAPACK counts them (multiplications,
additions, divisions; comparisons and interchanges are free). Tests hold these to the closed forms below."""
from __future__ import annotations

from derive.lowering.ir import (Call, FactorCall, Gemm, Kernel, Leaf, Loop, OneColumn, PivotCheck, PivotSearch, RowSwaps,
                               Routine, Scale, Step, Trsm)


def lu_flops(n: int) -> int:
    """2n^3/3 - n^2/2 - n/6: per step k, n-k-1 divisions and (n-k-1)^2 multiply-adds (common practice)."""
    return (4 * n ** 3 - 3 * n ** 2 - n) // 6


def solve_flops(n: int, nrhs: int) -> int:
    """Forward substitution with unit L: n(n-1) per column; back substitution: n^2 per column."""
    return nrhs * (2 * n * n - n)


def _stmt(s, env: dict[str, int], kernel: Kernel) -> int:
    if isinstance(s, Loop):
        total, k, extent = 0, 0, s.extent.evaluate(env)
        while k < extent:
            kb = (extent + 1) // 2 if s.halves and k == 0 else extent - k if s.halves else min(s.step, extent - k)
            inner = dict(env, **{s.var: k, "kb": kb})
            total += sum(_stmt(t, inner, kernel) for t in s.body)
            k += kb
        return total
    if isinstance(s, Step):
        inner = dict(env, **{s.var: s.value, "kb": s.size})
        return sum(_stmt(t, inner, kernel) for t in s.body)
    if isinstance(s, OneColumn):
        return sum(_stmt(t, env, kernel) for t in (s.special if env[s.var] == 1 else s.general))
    size = lambda span: span.size.evaluate(env)  # noqa: E731
    if isinstance(s, Gemm):
        return 2 * size(s.c.rows) * size(s.c.cols) * size(s.a.cols)
    if isinstance(s, Trsm):
        t, m, n = size(s.tri.rows), size(s.b.rows), size(s.b.cols)
        unit = s.uplo == "L"
        per_rhs = t * (t - 1) + (0 if unit else t)
        return per_rhs * (n if s.side == "left" else m)
    if isinstance(s, Scale):
        return size(s.b.rows) * size(s.b.cols)
    if isinstance(s, PivotSearch):
        return size(s.column.rows) - 1
    if isinstance(s, FactorCall):
        r = kernel.routine(s.routine)
        return routine_flops(r, {"m": size(s.block.rows), "n": size(s.block.cols)}, kernel)
    if isinstance(s, Call):
        return routine_flops(kernel.routine(s.routine), env, kernel)
    if isinstance(s, (PivotCheck, RowSwaps)):
        return 0
    raise TypeError(type(s))


def routine_flops(r: Routine, env: dict[str, int], kernel: Kernel) -> int:
    total = 0
    for s in r.body:
        if isinstance(s, Leaf):
            if env[s.cols] <= s.limit:
                return total + routine_flops(kernel.routine(s.routine), env, kernel)
            continue
        total += _stmt(s, env, kernel)
    return total


def kernel_flops(kernel: Kernel, n: int, nrhs: int = 1) -> tuple[int, int]:
    """(factor flops, solve flops) of the kernel's public routines for an n x n matrix."""
    f = kernel.routine(kernel.name)
    s = kernel.routine(kernel.name + "_solve")
    return routine_flops(f, {"n": n}, kernel), routine_flops(s, {"n": n, "nrhs": nrhs}, kernel)
