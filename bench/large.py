"""`make bench-large`: luforge's large-n kernels against OpenBLAS dgetrf/sgetrf and dgemm on one core, n = 256 ..
4096: GFLOP/s, time ratios, fraction of the same run's dgemm rate, and a PNG plot. Measurements only, never asserted.

Run it pinned with OpenBLAS left to pick its own core type: `make bench-large` does
    taskset -c 1 env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE OPENBLAS_NUM_THREADS=1 python bench/large.py
Every repetition runs each configuration once, in turn (interleaved), so drift in the machine's load spreads
over all of them; the table shows medians and the spread (max/min - 1 over the repetitions)."""
from __future__ import annotations

import argparse
import ctypes
import ctypes.util
import os
import statistics
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from derive.check.build import build  # noqa: E402
from derive.lowering.counts import lu_flops  # noqa: E402
from derive.printers.emit import emit_kernel  # noqa: E402
from derive.spec import parse  # noqa: E402
from derive.targets.table import get, runs_here  # noqa: E402

SIZES = (256, 512, 1024, 2048, 4096)
FLAGS = ("-O3", "-march=native", "-fPIC")

# The configurations compared; every one is an ordinary spec entry, as a user would write it.
SPEC = """
[defaults]
pivoting = "partial"
layout = "column-major"

# right-looking in blocks of 256; each panel factored by halving its columns recursively (AVX2 + FMA)
[[kernel]]
name = "lu_v3_d"
loop = "right-looking"
block = 256
inner = "right-looking"
panel = "recursive"
target = "x86-64-v3"

# the whole matrix as one panel: recursive halving from the top
[[kernel]]
name = "lu_v3_rec_d"
loop = "right-looking"
block = 4096
inner = "right-looking"
panel = "recursive"
target = "x86-64-v3"

# two levels: blocks of 256, their panels left-looking in blocks of 32, those unblocked
[[kernel]]
name = "lu_v3_ml_d"
loop = "right-looking"
block = [256, 32]
inner = ["left-looking", "left-looking"]
target = "x86-64-v3"

[[kernel]]
name = "lu_v3_s"
loop = "right-looking"
block = 256
inner = "right-looking"
panel = "recursive"
target = "x86-64-v3"
scalar = "float"

[[kernel]]
name = "lu_v3_rec_s"
loop = "right-looking"
block = 4096
inner = "right-looking"
panel = "recursive"
target = "x86-64-v3"
scalar = "float"

# portable C: the compiler vectorizes the micro-kernel (-O3 -march=native)
[[kernel]]
name = "lu_gen_d"
loop = "right-looking"
block = 256
inner = "right-looking"
panel = "recursive"

[[kernel]]
name = "lu_v4_d"
loop = "right-looking"
block = 256
inner = "right-looking"
panel = "recursive"
target = "x86-64-v4"
"""

OPENBLAS_CANDIDATES = ("/usr/lib/x86_64-linux-gnu/openblas-pthread/libopenblas.so.0", "libopenblas.so.0",
                       "libopenblas.so")


def openblas():
    for name in OPENBLAS_CANDIDATES:
        try:
            lib = ctypes.CDLL(name)
            lib.openblas_get_corename.restype = ctypes.c_char_p
            lib.openblas_get_config.restype = ctypes.c_char_p
            return lib
        except OSError:
            continue
    raise SystemExit("bench-large: OpenBLAS not found (Debian: apt-get install libopenblas-dev)")


class Reference:
    """OpenBLAS's Fortran entry points, called directly (no wrapper in the timed path)."""

    def __init__(self, lib):
        self.lib = lib
        lib.openblas_set_num_threads(1)

    def getrf(self, dtype, a, ipiv):
        n = ctypes.c_int(a.shape[0])
        info = ctypes.c_int(0)
        fn = self.lib.dgetrf_ if dtype == np.float64 else self.lib.sgetrf_
        fn(ctypes.byref(n), ctypes.byref(n), ctypes.c_void_p(a.ctypes.data), ctypes.byref(n),
           ctypes.c_void_p(ipiv.ctypes.data), ctypes.byref(info))
        return info.value

    def gemm(self, a, b, c):
        """C := C - A B, n x n, the LU update's shape."""
        n = ctypes.c_int(a.shape[0])
        no = ctypes.c_char(b"N")
        alpha, beta = ctypes.c_double(-1.0), ctypes.c_double(1.0)
        self.lib.dgemm_(ctypes.byref(no), ctypes.byref(no), ctypes.byref(n), ctypes.byref(n), ctypes.byref(n),
                        ctypes.byref(alpha), ctypes.c_void_p(a.ctypes.data), ctypes.byref(n),
                        ctypes.c_void_p(b.ctypes.data), ctypes.byref(n), ctypes.byref(beta),
                        ctypes.c_void_p(c.ctypes.data), ctypes.byref(n))


def build_kernels(options):
    """One cffi module per target (each needs its own ISA flags); targets this CPU cannot run are compiled
    only, and reported."""
    mods, skipped = {}, []
    for target in dict.fromkeys(o.target for o in options):
        group = [o for o in options if o.target == target]
        files = []
        for o in group:
            d = dict(emit_kernel(o).files)
            files.append((o.name, d[f"{o.name}.c"], d[f"{o.name}.h"]))
        mod = build(files, FLAGS + get(target).codegen_flags)
        if not runs_here(get(target)):
            skipped += [o.name for o in group]
            continue
        for o in group:
            mods[o.name] = (mod, o)
    return mods, skipped


def timed(fn) -> tuple[float, float]:
    """(wall seconds, this thread's CPU seconds): on a shared core the second leaves out time spent waiting for
    other processes, so both are reported."""
    t, c = time.perf_counter(), time.thread_time()
    fn()
    return time.perf_counter() - t, time.thread_time() - c


def run(sizes, reps: int, kernels, ref: Reference, rng) -> dict:
    """({(what, n): [wall seconds per repetition]}, the same in CPU seconds), what = kernel name, 'dgetrf',
    'sgetrf' or 'dgemm'."""
    times: dict = {}
    cpu_times: dict = {}
    for n in sizes:
        a64 = rng.standard_normal((n, n))
        a32 = a64.astype(np.float32)
        src = {np.float64: np.asfortranarray(a64), np.float32: np.asfortranarray(a32)}
        work = {k: np.empty_like(v, order="F") for k, v in src.items()}
        ipiv = np.zeros(n, dtype=np.intc)
        g_a, g_b = np.asfortranarray(rng.standard_normal((n, n))), np.asfortranarray(rng.standard_normal((n, n)))
        g_c = np.asfortranarray(np.zeros((n, n)))
        jobs = []
        for name, (mod, o) in kernels.items():
            dt = np.float64 if o.scalar == "double" else np.float32
            fn = getattr(mod.lib, name)
            ctype = "double *" if o.scalar == "double" else "float *"
            pa = mod.ffi.cast(ctype, work[dt].ctypes.data)
            pp = mod.ffi.cast("int *", ipiv.ctypes.data)
            jobs.append((name, dt, lambda fn=fn, pa=pa, pp=pp: fn(n, pa, n, pp)))
        for dt, label in ((np.float64, "dgetrf"), (np.float32, "sgetrf")):
            jobs.append((label, dt, lambda dt=dt: ref.getrf(dt, work[dt], ipiv)))
        jobs.append(("dgemm", None, lambda: ref.gemm(g_a, g_b, g_c)))
        for r in range(reps):
            order = jobs[r % len(jobs):] + jobs[:r % len(jobs)]      # rotate who goes first
            for name, dt, call in order:
                if dt is not None:
                    work[dt][...] = src[dt]
                wall, cpu = timed(call)
                times.setdefault((name, n), []).append(wall)
                cpu_times.setdefault((name, n), []).append(cpu)
        print(f"  n = {n} done", file=sys.stderr, flush=True)
    return times, cpu_times


def report(sizes, times, cpu_times, kernels, plot: Path | None) -> str:
    med = {k: statistics.median(v) for k, v in times.items()}
    cmed = {k: statistics.median(v) for k, v in cpu_times.items()}
    spread = {k: max(v) / min(v) - 1 for k, v in times.items()}
    rate = lambda what, n: (2 * n ** 3 if what == "dgemm" else lu_flops(n)) / med[(what, n)] / 1e9  # noqa: E731
    crate = lambda what, n: (2 * n ** 3 if what == "dgemm" else lu_flops(n)) / cmed[(what, n)] / 1e9  # noqa: E731
    lines = ["| n | kernel | scalar | GFLOP/s | vs OpenBLAS getrf (time ratio getrf/kernel) | same, CPU time "
             "| share of dgemm rate | spread |", "|---|---|---|---|---|---|---|---|"]
    for n in sizes:
        for ref in ("dgetrf", "sgetrf", "dgemm"):
            lines.append(f"| {n} | OpenBLAS {ref} | {'float' if ref[0] == 's' else 'double'} | {rate(ref, n):.1f} "
                         f"| | | {rate(ref, n) / rate('dgemm', n):.0%} | {spread[(ref, n)]:.0%} |")
        for name, (_, o) in kernels.items():
            ref = "dgetrf" if o.scalar == "double" else "sgetrf"
            ratio = med[(ref, n)] / med[(name, n)]
            cratio = cmed[(ref, n)] / cmed[(name, n)]
            lines.append(f"| {n} | {name} | {o.scalar} | {rate(name, n):.1f} | {ratio:.2f}x | {cratio:.2f}x "
                         f"| {rate(name, n) / rate('dgemm', n):.0%} | {spread[(name, n)]:.0%} |")
    lines += ["", "Best of each group, time ratio getrf/kernel by wall clock and, in brackets, by CPU time (the same "
              "when the core is not shared):", "",
              "| n | best double / dgetrf | best double, share of dgemm | best float / sgetrf | generic / dgetrf |",
              "|---|---|---|---|---|"]
    for n in sizes:
        def best(pred, ref):
            names = [k for k, (_, o) in kernels.items() if pred(o)]
            if not names:
                return "-", None
            k = min(names, key=lambda k: cmed[(k, n)])
            return (f"{med[(ref, n)] / med[(k, n)]:.2f}x [{cmed[(ref, n)] / cmed[(k, n)]:.2f}x] ({k})", k)
        bd, kd = best(lambda o: o.scalar == "double", "dgetrf")
        bf, _ = best(lambda o: o.scalar == "float", "sgetrf")
        bg, _ = best(lambda o: o.scalar == "double" and o.target == "generic", "dgetrf")
        share = f"{rate(kd, n) / rate('dgemm', n):.0%}" if kd else "-"
        lines.append(f"| {n} | {bd} | {share} | {bf} | {bg} |")
    if plot is not None:
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
        fig, ax = plt.subplots(figsize=(7, 4.5))
        for what in ["dgemm", "dgetrf", "sgetrf", *kernels]:
            ax.plot(sizes, [crate(what, n) for n in sizes], marker="o",
                    linestyle="--" if what in ("dgemm", "dgetrf", "sgetrf") else "-",
                    label=f"OpenBLAS {what}" if what in ("dgemm", "dgetrf", "sgetrf") else what)
        ax.set_xscale("log", base=2)
        ax.set_xlabel("n")
        ax.set_ylabel("GFLOP/s (one core, by thread CPU time)")
        ax.set_title("LU factorization, one thread")
        ax.legend(fontsize=8)
        ax.grid(True, alpha=0.3)
        fig.tight_layout()
        fig.savefig(plot, dpi=110)
    return "\n".join(lines)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=list(SIZES))
    ap.add_argument("--reps", type=int, default=7)
    ap.add_argument("--only", nargs="*", help="kernel names to run (default: all)")
    ap.add_argument("--spec", help="a spec file of configurations to run instead of the built-in ones")
    ap.add_argument("--plot", default=str(ROOT / "bench" / "large.png"))
    args = ap.parse_args()
    lib = openblas()
    ref = Reference(lib)
    print(f"OpenBLAS {lib.openblas_get_config().decode()}; core: {lib.openblas_get_corename().decode()}; "
          f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS')}")
    try:
        cpus = sorted(os.sched_getaffinity(0))
    except AttributeError:
        cpus = []
    print(f"CPUs this process may run on: {cpus}; flags: {' '.join(FLAGS)}; medians of {args.reps} interleaved "
          f"repetitions")
    text, where = (Path(args.spec).read_text(), args.spec) if args.spec else (SPEC, "bench/large.py")
    options = [o for o in parse(text, where) if not args.only or o.name in args.only]
    kernels, skipped = build_kernels(options)
    for name in skipped:
        print(f"{name}: compiled, but this CPU lacks its target's features; not run")
    times, cpu_times = run(args.sizes, args.reps, kernels, ref, np.random.default_rng(20261202))
    print(report(args.sizes, times, cpu_times, kernels, Path(args.plot) if args.plot else None))
    return 0


if __name__ == "__main__":
    sys.exit(main())
