"""`luforge verify`: build every kernel of a spec, run each on a fixed, seeded budget of matrices, and judge the
results by published criteria: LAPACK's factor and solve ratios, and Higham's componentwise backward error bound."""
from __future__ import annotations

import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from derive.check.accuracy import column_dominant, componentwise_ratio, factor_ratio, solve_ratio
from derive.check.build import build, load_python
from derive.printers.emit import emit_kernel
from derive.check.harness import CKernel
from derive.options import KernelOptions

# LAPACK TESTING/dtest.in: THRESH = 30.0, the largest acceptable test ratio
THRESHOLD = 30.0


@dataclass
class Row:
    name: str
    sizes: list[int]
    matrices: int
    worst_factor: float
    worst_componentwise: float
    worst_solve: float
    problems: list[str]

    @property
    def passed(self) -> bool:
        return not self.problems


def sizes_for(block: int) -> list[int]:
    s = {0, 1, 2, 3, 4, 5, 7, 8, 9, 16, 17, 31, 33, 48}
    if block > 1:
        s |= {block - 1, block, block + 1, 2 * block + 1}
    return sorted(x for x in s if x <= 64)


def check_kernel(ck: CKernel, py, o: KernelOptions, rng, per_size: int = 2) -> Row:
    dtype = ck.dtype
    problems: list[str] = []
    wf = wc = ws = 0.0
    sizes = [o.size] if o.size is not None else sizes_for(o.block)   # a fixed-size kernel has one n
    for n in sizes:
        for _ in range(per_size):
            a = (rng.standard_normal((n, n)).astype(dtype) if ck.pivoted else column_dominant(n, dtype, rng))
            lda = max(1, n) + int(rng.integers(0, 4))
            info, lu, ipiv, ok = ck.factor(a, lda)
            if not ok:
                problems.append(f"n={n}: wrote outside the matrix (or ipiv)")
            if info != 0:
                problems.append(f"n={n}: returned {info} on a nonsingular matrix")
                continue
            f, c = factor_ratio(a, lu, ipiv), componentwise_ratio(a, lu, ipiv)
            wf, wc = max(wf, f), max(wc, c)
            b = rng.standard_normal((n, 2)).astype(dtype)
            code, x, ok2 = ck.solve(lu, b, ipiv)
            if code != 0 or not ok2:
                problems.append(f"n={n}: solve returned {code} or wrote outside its arguments")
            ws = max(ws, solve_ratio(a, x, b))
            pa = a.copy()
            res = py.factor(pa)
            pinfo, pipiv = (res if ck.pivoted else (res, None))
            if pinfo != info or (ipiv is not None and not np.array_equal(pipiv, ipiv)):
                problems.append(f"n={n}: the NumPy kernel disagrees with the C kernel (code or pivots)")
            elif componentwise_ratio(a, pa, pipiv) > 1:
                problems.append(f"n={n}: the NumPy kernel breaks the backward error bound")
    if wf >= THRESHOLD:
        problems.append(f"factor ratio {wf:.3g} >= {THRESHOLD}")
    if wc > 1:
        problems.append(f"componentwise backward error {wc:.3g} x gamma_n")
    if ws >= THRESHOLD:
        problems.append(f"solve ratio {ws:.3g} >= {THRESHOLD}")
    return Row(o.name, sizes, len(sizes) * per_size, wf, wc, ws, problems)


def verify(options: list[KernelOptions], seed: int = 20261202, per_size: int = 2) -> list[Row]:
    emitted = [emit_kernel(o) for o in options]
    mod = build([(e.options.name, dict(e.files)[f"{e.options.name}.c"], dict(e.files)[f"{e.options.name}.h"])
                 for e in emitted])
    rows = []
    with tempfile.TemporaryDirectory(prefix="luforge-verify-") as tmp:
        for e in emitted:
            path = Path(tmp) / f"{e.options.name}.py"
            path.write_text(dict(e.files)[path.name])
            py = load_python(path)
            rng = np.random.default_rng([seed, len(rows)])
            rows.append(check_kernel(CKernel(mod, e.options), py, e.options, rng, per_size))
    return rows


def table(rows: list[Row]) -> str:
    head = ("kernel", "sizes tried", "matrices", "worst factor ratio", "worst |PA-LU|/(gamma_n|L||U|)", "worst solve ratio",
            "result")
    body = [(r.name, f"{len(r.sizes)}: n = {r.sizes[0]}..{r.sizes[-1]}", str(r.matrices), f"{r.worst_factor:.3f}", f"{r.worst_componentwise:.3f}",
             f"{r.worst_solve:.3f}", "pass" if r.passed else "FAIL") for r in rows]
    widths = [max(len(x) for x in col) for col in zip(head, *body)]
    fmt = "  ".join(f"{{:<{w}}}" for w in widths)
    out = [fmt.format(*row).rstrip() for row in (head, tuple("-" * w for w in widths), *body)]
    for r in rows:
        for p in r.problems:
            out.append(f"{r.name}: {p}")
    out.append(f"thresholds: factor and solve ratios < {THRESHOLD:g} (LAPACK TESTING/dtest.in), "
               f"componentwise <= 1 (Higham 2002, Thm 9.3)")
    return "\n".join(out) + "\n"
