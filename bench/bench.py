"""`make bench`: time the committed pivoted double kernels against scipy's LAPACK getrf/getrs for the sizes the
users care about. Prints measurements only; speed is never asserted in tests."""
from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np
import scipy.linalg

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from derive.check.build import build_directory  # noqa: E402
from derive.lowering.counts import lu_flops  # noqa: E402
from derive.spec import load  # noqa: E402

SIZES = (4, 8, 16, 32, 64, 128, 256)


def best_of(fn, repeat: int) -> float:
    best = float("inf")
    for _ in range(5):
        t = time.perf_counter()
        for _ in range(repeat):
            fn()
        best = min(best, (time.perf_counter() - t) / repeat)
    return best


def table(lib, ffi, options, scalar: str, rng) -> None:
    ctype = "double" if scalar == "double" else "float"
    dtype = np.float64 if scalar == "double" else np.float32
    getrf = scipy.linalg.lapack.dgetrf if scalar == "double" else scipy.linalg.lapack.sgetrf
    print(f"{'n':>5}  " + "  ".join(f"{o.name:>24}" for o in options) + f"  {'scipy ' + scalar[0].replace('f', 's') + 'getrf':>20}")
    for n in SIZES:
        a0 = rng.standard_normal((n, n)).astype(dtype)
        order = "F" if options[0].layout == "column-major" else "C"
        work = a0.copy(order=order)
        ipiv = np.zeros(n, dtype=np.intc)
        pa, pp = ffi.cast(f"{ctype} *", work.ctypes.data), ffi.cast("int *", ipiv.ctypes.data)
        repeat = max(1, int(2e6 / max(lu_flops(n), 1)))
        row = []
        for o in options:
            f = getattr(lib, o.name)

            def call():
                work[...] = a0
                f(n, pa, n, pp)
            t = best_of(call, repeat)
            row.append(f"{t * 1e6:>10.2f} us {lu_flops(n) / t / 1e9:>6.2f} GF")
        ref_work = np.asfortranarray(a0)

        def ref():
            ref_work[...] = a0
            getrf(ref_work, overwrite_a=1)
        t = best_of(ref, repeat)
        print(f"{n:>5}  " + "  ".join(f"{r:>24}" for r in row)
              + f"  {t * 1e6:>11.2f} us {lu_flops(n) / t / 1e9:>5.2f}")


def main() -> int:
    every = [o for o in load(ROOT / "generated" / "kernels.toml") if o.pivoting == "partial"]
    mod = build_directory(ROOT / "generated", [o.name for o in every])
    rng = np.random.default_rng(1)
    print("factor time per call (microseconds, best of 5) and Gflop/s of the pivoted kernels in generated/;")
    print("scipy = LAPACK getrf through scipy; times include copying the input and the Python call")
    for scalar, layout in (("double", "column-major"), ("float", "row-major")):
        group = [o for o in every if o.scalar == scalar and o.layout == layout]
        print(f"\n{scalar}, {layout}")
        table(mod.lib, mod.ffi, group, scalar, rng)
    return 0


if __name__ == "__main__":
    sys.exit(main())
