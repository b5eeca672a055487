"""Constant time, counted: a fixed-size pivoted kernel executes the same number of instructions on very different
matrices (zero pivots, NaN and Inf included) on emulated targets, counted by the targets' QEMU plugin; the
branching variant of the same kernel does not, so the count can tell them apart."""
from __future__ import annotations

import numpy as np
import pytest

from derive.check import cross, ondevice
from derive.check.harness import place
from derive.options import make_options
from derive.printers.emit import emit_kernel
from derive.targets.table import TARGETS

N = 6
# (row, scalar): the scalar each row computes in hardware (a software-float routine is not constant time)
ROWS = (("cortex-m4f", "float"), ("aarch64-linux", "double"))


def matrices(n: int, dtype) -> list[tuple[str, np.ndarray]]:
    rng = np.random.default_rng(20261202)
    out = [("random", rng.standard_normal((n, n))),
           ("identity: no interchange", np.eye(n)),
           ("pivot always in the last row", np.flipud(np.eye(n)) * 4 + np.tril(np.ones((n, n)), -1) * 0.5),
           ("wide range", rng.standard_normal((n, n)) * 10.0 ** rng.integers(-8, 9, (n, n))),
           ("zero column: zero pivot", np.where(np.arange(n) == n // 2, 0.0, rng.standard_normal((n, n)))),
           ("all zero", np.zeros((n, n)))]
    nan = rng.standard_normal((n, n))
    nan[n - 1, 0] = np.nan
    inf = rng.standard_normal((n, n))
    inf[1, 1] = np.inf
    out += [("NaN", nan), ("Inf", inf)]
    return [(label, a.astype(dtype)) for label, a in out]


def counts(o, t, text_c: str, text_h: str, mats, tag: str) -> tuple[list[int], list[int], list]:
    cases = []
    for _, a in mats:
        pa, _ = place(a, N + 1, o.layout, a.dtype)
        b = np.ones((N, ondevice.NRHS), a.dtype)
        pb, _ = place(b, N + 1 if o.layout == "column-major" else ondevice.NRHS + 1, o.layout, a.dtype)
        cases.append(ondevice.Case(N, a, pa, b, pb, None))
    sources = {f"{o.name}.c": text_c, f"{o.name}.h": text_h, "luforge_driver.c": ondevice.driver_c(o, t, cases),
               "luforge_cases.c": ondevice.data_c(o, cases)}
    img = cross.build_image(t, o.name, sources, f"{o.name}.c", tag)
    run = cross.run(img, count=True)
    windows = [w[0] for w in run.windows]
    factor, solve = windows[1::2][:len(cases)], windows[2::2][:len(cases)]
    return factor, solve, ondevice.parse(o, run.stdout, len(cases))


@pytest.mark.parametrize("row,scalar", ROWS)
@pytest.mark.parametrize("loop,block", (("right-looking", 1), ("crout", 4)))
def test_same_instruction_count_whatever_the_matrix(row, scalar, loop, block):
    t = TARGETS[row]
    try:
        cross.require(t)
    except cross.ToolMissing as e:
        pytest.skip(str(e))
    o = make_options("ct_fix", loop, block, scalar=scalar, pivoting="partial", size=N)
    mats = matrices(N, np.float32 if scalar == "float" else np.float64)
    files = dict(emit_kernel(o).files)
    factor, solve, results = counts(o, t, files["ct_fix.c"], files["ct_fix.h"], mats, "constant-time")
    by = dict(zip((label for label, _ in mats), factor))
    assert len(set(factor)) == 1, f"factor instruction counts differ by matrix on {row}: {by}"
    assert len(set(solve)) == 1, f"solve instruction counts differ by matrix on {row}"
    # and the kernel still did its job: getrf's codes for the zero pivots (LAPACK dgetrf.f convention)
    info = {label: r.info for (label, _), r in zip(mats, results)}
    assert info["zero column: zero pivot"] == N // 2 + 1 and info["all zero"] == 1 and info["random"] == 0
    # the branching variant of the same kernel runs fewer instructions on some matrices than on others
    branchy = dict(emit_kernel(o, "branch").files)
    bfactor, _, _ = counts(o, t, branchy["ct_fix.c"], branchy["ct_fix.h"], mats, "branching")
    assert len(set(bfactor)) > 1, "the count cannot tell a branching kernel from a constant-time one"
    print(f"{row} {scalar} {loop} b{block} n={N}: constant-time factor {factor[0]} instructions, solve "
          f"{solve[0]}; branching factor {min(bfactor)}..{max(bfactor)}")
