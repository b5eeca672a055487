"""`luforge verify` for batched (lanes) kernels: each size is tried with a partial last group, singular and NaN
matrices beside regular ones; results are judged per matrix by the same published criteria as single kernels."""
from __future__ import annotations

import numpy as np

from derive.check.accuracy import componentwise_ratio, factor_ratio, solve_ratio
from derive.check.harness import LaneKernel
from derive.check.matrices import exact_factors
from derive.check.sanitize import driver_prologue
from derive.options import KernelOptions
from derive.targets.storage import LAYOUTS, SCALARS

SIZES = (0, 1, 2, 3, 4, 5, 7, 8, 9, 16, 17)


def sizes_of(o: KernelOptions) -> list[int]:
    return [o.size] * 4 if getattr(o, "size", None) else list(SIZES)   # a fixed size: four batches at its n


def check_lanes(s, budget, rng):
    """One verify row for a lanes kernel: per size, count = per_size whole groups and one more matrix; one lane
    of each batch gets a zero column (an exact zero pivot), and one a NaN that must reach no other lane."""
    from derive.check.verify import Row
    o, py = s.options, s.py
    lk = LaneKernel(s.c, o)         # the built module's ffi and lib, called through the lanes ABI
    row = Row(o.name, "lanes", sizes_of(o))
    for n in row.sizes:
        count = budget.per_size * o.lanes + 1
        mats = rng.standard_normal((count, n, n)).astype(lk.dtype)
        zero = int(rng.integers(0, count))
        if n:
            mats[zero][:, n // 2] = 0
        code, info, lu, ipiv, ok = lk.factor(mats)
        row.matrices += count
        if code != 0 or not ok:
            row.problems.append(f"n={n}: returned {code} or wrote outside the matrices (unused lanes included)")
            continue
        want = [m == zero and n > 0 for m in range(count)]
        if [bool(i) for i in info] != want:
            row.problems.append(f"n={n}: zero-pivot codes {list(info)}; expected nonzero only for matrix {zero}")
        b = rng.standard_normal((count, n)).astype(lk.dtype)
        scode, x, sok = lk.solve(lu, ipiv, b)
        if scode != 0 or not sok:
            row.problems.append(f"n={n}: solve returned {scode} or wrote outside its arguments")
        for m in range(count if n else 0):
            row.fold("factor ratio", n, factor_ratio(mats[m], lu[m], ipiv[m]))
            row.fold("componentwise ratio", n, componentwise_ratio(mats[m], lu[m], ipiv[m]))
            if m != zero:
                row.fold("solve ratio", n, solve_ratio(mats[m], x[m], b[m]))
        pm = mats.copy()
        pinfo, pipiv = py.factor(pm)
        if not (np.array_equal(pinfo, info) and np.array_equal(pipiv, ipiv)):
            row.problems.append(f"n={n}: the NumPy twin disagrees with the C kernel (codes or pivots)")
        if n and count > 1:
            bad = mats.copy()
            victim = (zero + 1) % count
            bad[victim][n - 1, 0] = np.nan
            _, _, lu2, ipiv2, _ = lk.factor(bad)
            rest = [m for m in range(count) if m != victim]
            if not (np.array_equal(lu2[rest], lu[rest]) and np.array_equal(ipiv2[rest], ipiv[rest])):
                row.problems.append(f"n={n}: a NaN in matrix {victim} changed another matrix's factors")
    for n in sorted(set(n for n in row.sizes if n)):
        exact_batch(lk, py, n, budget.per_size * o.lanes + 1, rng, row)
    # LAPACK TESTING/dtest.in: THRESH = 30; Higham 2002, Thm 9.3: componentwise <= 1
    from derive.check.verify import finish
    return finish(row)


def exact_stack(n: int, dtype, rng, count: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """count pivoted matrices with exactly known factors (matrices.exact_factors), each with its own row order:
    (mats, lu, ipiv) stacked as a batch. Each pivot is a power of two, so the reciprocal a lanes kernel
    multiplies by is exact and the factors are promised to a lanes kernel too."""
    made = [exact_factors(n, dtype, rng, True) for _ in range(count)]
    return tuple(np.stack([m[k] for m in made]) for k in range(3))


def not_exact(lu: np.ndarray, ipiv: np.ndarray, want_lu: np.ndarray, want_piv: np.ndarray) -> list[int]:
    """The matrices of a batch whose factors or pivots differ from the exactly known ones."""
    return [m for m in range(len(want_lu))
            if not (np.array_equal(lu[m], want_lu[m]) and np.array_equal(ipiv[m], want_piv[m]))]


def exact_batch(lk: LaneKernel, py, n: int, count: int, rng, row) -> None:
    """count matrices with exactly known factors side by side (exact_stack): every lane's factors and pivots
    must equal them exactly, in C and in the NumPy twin."""
    mats, want_lu, want_piv = exact_stack(n, lk.dtype, rng, count)
    code, info, lu, ipiv, ok = lk.factor(mats)
    row.matrices += count
    wrong = not_exact(lu, ipiv, want_lu, want_piv)
    if code != 0 or not ok or info.any():
        row.problems.append(f"n={n}, exact factors: returned {code}, codes {list(info)} or wrote outside the matrices")
    if wrong:
        row.problems.append(f"n={n}, exact factors: matrices {wrong} differ from their exactly known factors or pivots")
    pm = mats.copy()
    pinfo, pipiv = py.factor(pm)
    if pinfo.any() or not (np.array_equal(pm, want_lu) and np.array_equal(pipiv, want_piv)):
        row.problems.append(f"n={n}, exact factors: the NumPy twin differs from the exactly known factors")


def lanes_driver(o: KernelOptions, sizes: list[int]) -> str:
    """A C driver for `--sanitize`: per n, count = W + 1 matrices (a partial last group) in malloc'd buffers of
    exactly the whole groups, so a read or write past them lands in an ASan red zone; dominant matrices."""
    t = SCALARS[o.scalar].c_type
    at = LAYOUTS[o.layout].index.replace("(ld)", "(n)")
    fixed = getattr(o, "size", None) is not None
    n_arg = "" if fixed else "n, "
    shown = sorted(set([o.size] if fixed else [n for n in sizes if n <= 17]))
    return f"""{driver_prologue(o.name)}
int main(void)
{{
    static const int sizes[] = {{{", ".join(str(n) for n in shown) or "0"}}};
    const int w = {o.name.upper()}_LANES, count = w + 1, groups = (count + w - 1) / w;
    int s, failures = 0;
    for (s = 0; s < (int)(sizeof sizes / sizeof sizes[0]); ++s) {{
        int n = sizes[s], m, i, j, code, solved;
        size_t nn = (size_t)(n > 0 ? n : 1) * (size_t)(n > 0 ? n : 1);
        {t} *mats = malloc(sizeof({t}) * nn * (size_t)count);
        {t} *a = malloc(sizeof({t}) * nn * (size_t)(groups * w));
        {t} *b = malloc(sizeof({t}) * (size_t)(n > 0 ? n : 1) * (size_t)(groups * w));
        int *ipiv = malloc(sizeof(int) * (size_t)(n > 0 ? n : 1) * (size_t)count);
        int *info = malloc(sizeof(int) * (size_t)count);
        if (!mats || !a || !b || !ipiv || !info) {{ puts("out of memory"); return 2; }}
        for (m = 0; m < count; ++m)
            for (j = 0; j < n; ++j) {{
                double sum = 1.0;
                for (i = 0; i < n; ++i) {{
                    double v = i == j ? 0.0 : uniform();
                    mats[(size_t)m * nn + {at}] = ({t})v;
                    sum += v < 0 ? -v : v;
                }}
                mats[(size_t)m * nn + {at.replace("(i)", "(j)")}] = ({t})sum;
            }}
        for (i = 0; i < n * groups * w; ++i) b[i] = ({t})uniform();
        {o.name}_pack(count, {n_arg}mats, a);
        code = {o.name}(count, {n_arg}a, ipiv, info);
        solved = {o.name}_solve(count, {n_arg}a, ipiv, b);
        for (m = 0; m < count; ++m) if (info[m] != 0) ++failures;
        if (code != 0 || solved != 0) {{ printf("n=%d: codes %d and %d on dominant matrices\\n", n, code, solved);
                                        ++failures; }}
        free(mats); free(a); free(b); free(ipiv); free(info);
    }}
    return failures ? 1 : 0;
}}
"""
