"""`make bench`, batched part: luforge's lanes kernels (W matrices interleaved) against Eigen's fixed-size PartialPivLU,
time per matrix, in one run pinned to one CPU; every result is checked against LAPACK getrf before it is timed."""
from __future__ import annotations

import argparse
import ctypes
import os
import subprocess
import sys
import tempfile
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import scipy.linalg

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from derive.printers.emit import emit_kernel, write_atomically  # noqa: E402
from derive.check.build import load_python  # noqa: E402
from derive.options import make_options  # noqa: E402
from derive.tune.cache import machine  # noqa: E402

SIZES = (4, 6, 8, 12, 16)
SCALARS = ("double", "float")
WIDTHS = (4, 8, 16)          # n as an argument
SIZED_WIDTHS = (4, 8, 16)    # n fixed (size = n): one kernel per n
CFLAGS = ("-O3", "-march=native")
CPU = 1
ROUNDS = 41
OUT = ROOT / "bench" / "results"

CTYPE = {"double": "double", "float": "float"}
DTYPE = {"double": np.float64, "float": np.float32}


def kernel_name(scalar: str, w: int, loop: str, size: int | None = None) -> str:
    return f"bat_{loop.replace('-', '_')}_{scalar[0]}_w{w}" + (f"_n{size}" if size else "")


def contenders() -> list[tuple[str, int, bool]]:
    """(column label, W, fixed size?) in table order."""
    return [(f"W={w}", w, False) for w in WIDTHS] + [(f"W={w},size", w, True) for w in SIZED_WIDTHS]


def driver_source(kernels: list[tuple[str, str, int | None]]) -> str:
    """C++ driver: one timing entry per luforge kernel (copy the packed input, factor) and per Eigen instance
    (for each matrix: construct PartialPivLU from the input, which copies it, and factor)."""
    out = ["#include <cstring>", "#include <ctime>", "#include <Eigen/Dense>",
           'extern "C" {'] + [f'#include "{k}.h"' for k, _, _ in kernels] + ["}",
           "static double now() { timespec t; clock_gettime(CLOCK_MONOTONIC, &t); return t.tv_sec * 1e9 + t.tv_nsec; }"]
    for k, t, size in kernels:
        n_arg = "" if size else "n, "
        out.append(f'extern "C" double time_{k}(int count, int n, const {t} *src, {t} *work, size_t len, int *ipiv, '
                   f"int *info) {{ double t0 = now(); std::memcpy(work, src, len * sizeof({t})); (void)n; "
                   f"{k}(count, {n_arg}work, ipiv, info); return now() - t0; }}")
    out.append("""template <typename T, int N> static double eigen(int count, const T *src, T *out, int *perm, int check) {
    typedef Eigen::Matrix<T, N, N> M;
    volatile T sink = 0;
    T acc = 0;
    double t0 = now();
    for (int m = 0; m < count; ++m) {
        Eigen::PartialPivLU<M> lu(Eigen::Map<const M>(src + (size_t)m * N * N));
        acc += lu.matrixLU()(N - 1, N - 1);
        if (check) {
            Eigen::Map<M>(out + (size_t)m * N * N) = lu.matrixLU();
            for (int i = 0; i < N; ++i) perm[m * N + i] = lu.permutationP().indices()(i);
        }
    }
    double t = now() - t0;
    sink = acc;
    (void)sink;
    return t;
}""")
    for t in SCALARS:
        for n in SIZES:
            out.append(f'extern "C" double eigen_{t}_{n}(int count, const {t} *src, {t} *out, int *perm, int check) '
                       f"{{ return eigen<{t}, {n}>(count, src, out, perm, check); }}")
    return "\n".join(out) + "\n"


def build(tmp: Path, loop: str):
    kernels = []
    for scalar in SCALARS:
        for _, w, sized in contenders():
            for size in (SIZES if sized else (None,)):
                name = kernel_name(scalar, w, loop, size)
                o = make_options(name, loop, scalar=scalar, pivoting="partial", lanes=w, size=size,
                                 spec="bench/batched.py")
                write_atomically(tmp, list(emit_kernel(o).files))
                kernels.append((name, CTYPE[scalar], size))
    (tmp / "driver.cpp").write_text(driver_source(kernels))
    def compile_one(k: str) -> str:
        # the compilers' default dialects (GNU C, GNU C++), as bench/small.py: an ISO -std switches off the
        # contraction to fused multiply-adds in C, while Eigen calls FMA intrinsics
        subprocess.run(["gcc", *CFLAGS, "-fPIC", "-c", str(tmp / f"{k}.c"), "-o", str(tmp / f"{k}.o")], check=True)
        return str(tmp / f"{k}.o")
    with ThreadPoolExecutor(os.cpu_count() or 1) as pool:
        objs = list(pool.map(compile_one, [k for k, _, _ in kernels]))
    lib = tmp / "batched.so"
    subprocess.run(["g++", *CFLAGS, "-fPIC", "-shared", "-I/usr/include/eigen3", "-I", str(tmp),
                    str(tmp / "driver.cpp"), *objs, "-o", str(lib)], check=True)
    return ctypes.CDLL(str(lib)), kernels


def ptr(x: np.ndarray):
    return ctypes.c_void_p(x.ctypes.data)


def getrf_reference(mats: np.ndarray):
    """LAPACK getrf of every matrix (column-major, as the kernels are here): LU and 0-based pivots."""
    lus, pivs = [], []
    for a in mats:
        lu, piv = scipy.linalg.lu_factor(a, check_finite=False)
        lus.append(lu)
        pivs.append(piv)
    return np.array(lus), np.array(pivs)


def swaps_to_perm(piv: np.ndarray) -> np.ndarray:
    perm = np.arange(len(piv))
    for k, p in enumerate(piv):
        perm[[k, p]] = perm[[p, k]]
    return perm


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--loop", default="right-looking")
    ap.add_argument("--rounds", type=int, default=ROUNDS)
    args = ap.parse_args()
    cc = subprocess.run(["gcc", "--version"], capture_output=True, text=True).stdout.splitlines()[0]
    rng = np.random.default_rng(20261202)
    rows = []
    td = tempfile.TemporaryDirectory(prefix="luforge-bench-")
    tmp = Path(td.name)
    lib, kernels = build(tmp, args.loop)       # compiled on every CPU; timed on one
    if hasattr(os, "sched_setaffinity") and CPU in os.sched_getaffinity(0):
        os.sched_setaffinity(0, {CPU})
    pinned = sorted(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else "?"
    print(f"batched pivoted LU, time per matrix; machine: {machine()}, {os.cpu_count()} CPUs, "
          f"{cc}, {' '.join(CFLAGS)}; pinned to CPU {pinned}; medians of {args.rounds} interleaved rounds")
    print(f"luforge: {args.loop} loop, block 1, W matrices interleaved, n an argument or fixed (size); Eigen 3 "
          "PartialPivLU<Matrix<T,N,N>>;"
          " both copy their input; every result checked against LAPACK getrf (scipy) first")
    with td:
        twins = {k: load_python(tmp / f"{k}.py") for k, _, _ in kernels}
        for scalar in SCALARS:
            dt = DTYPE[scalar]
            for n in SIZES:
                count = max(64, min(4096, 65536 // (n * n * np.dtype(dt).itemsize // 4))) // 16 * 16
                mats = rng.standard_normal((count, n, n)).astype(dt)
                ref_lu, ref_piv = getrf_reference(mats)
                tol = 1e-9 if scalar == "double" else 1e-3
                # Eigen: factors and the row permutation it reports, checked against getrf's
                src_e = np.ascontiguousarray(mats.transpose(0, 2, 1))   # column-major per matrix, as Eigen stores
                out_e = np.empty_like(src_e)
                perm_e = np.empty((count, n), np.intc)
                fe = getattr(lib, f"eigen_{scalar}_{n}")
                fe.restype = ctypes.c_double
                fe(count, ptr(src_e), ptr(out_e), ptr(perm_e), 1)
                lu_e = out_e.transpose(0, 2, 1)
                for m in range(count):
                    want = swaps_to_perm(ref_piv[m])
                    got = np.argsort(perm_e[m])
                    if not np.array_equal(got, want) or not np.allclose(lu_e[m], ref_lu[m], rtol=tol, atol=tol):
                        raise SystemExit(f"Eigen n={n} {scalar}: matrix {m} differs from getrf")
                timers = {"Eigen": lambda: fe(count, ptr(src_e), ptr(out_e), ptr(perm_e), 0)}
                for k, t, size in kernels:
                    if t != CTYPE[scalar] or size not in (None, n):
                        continue
                    src = twins[k].pack(mats)
                    work = np.empty_like(src)
                    ipiv = np.empty(count * n, np.intc)
                    info = np.empty(count, np.intc)
                    f = getattr(lib, f"time_{k}")
                    f.restype = ctypes.c_double
                    f(count, n, ptr(src), ptr(work), ctypes.c_size_t(src.size), ptr(ipiv), ptr(info))
                    lu = twins[k].unpack(work, count, n)
                    if not (np.array_equal(ipiv.reshape(count, n), ref_piv) and not info.any()
                            and np.allclose(lu, ref_lu, rtol=tol, atol=tol)):
                        raise SystemExit(f"{k} n={n}: differs from getrf")
                    timers[k] = (lambda f=f, src=src, work=work, ipiv=ipiv, info=info:
                                 f(count, n, ptr(src), ptr(work), ctypes.c_size_t(src.size), ptr(ipiv), ptr(info)))
                samples = {k: [] for k in timers}
                for _ in range(3):
                    for fn in timers.values():
                        fn()
                for _ in range(args.rounds):
                    for k, fn in timers.items():
                        samples[k].append(fn() / count)
                med = {k: float(np.median(v)) for k, v in samples.items()}
                rows.append((scalar, n, count, med))
    head = f"{'scalar':<7}{'n':>4}{'count':>7}{'Eigen ns':>10}" + "".join(
        f"{label + ' ns':>15}{'ratio':>7}" for label, _, _ in contenders())
    print(head)
    for scalar, n, count, med in rows:
        line = f"{scalar:<7}{n:>4}{count:>7}{med['Eigen']:>10.1f}"
        for _, w, sized in contenders():
            v = med[kernel_name(scalar, w, args.loop, n if sized else None)]
            line += f"{v:>15.1f}{v / med['Eigen']:>7.3f}"
        print(line)
    print("ratio = luforge time per matrix / Eigen's; figures to reach: <= 0.1 at n = 4..8, <= 0.2 at n = 16")
    for scalar in SCALARS:
        best = {n: min(med[kernel_name(scalar, w, args.loop, n if sized else None)] / med["Eigen"]
                       for _, w, sized in contenders()) for s_, n, _, med in rows if s_ == scalar}
        print(f"{scalar}: best ratio per n: " + ", ".join(f"n={n}: {r:.2f}" for n, r in best.items()))
    plot(rows, args.loop)
    return 0


def plot(rows, loop: str) -> None:
    try:
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        print("matplotlib is not installed: no plot (pip install matplotlib)")
        return
    OUT.mkdir(parents=True, exist_ok=True)
    fig, axes = plt.subplots(1, 2, figsize=(10, 4), sharey=True)
    for ax, scalar in zip(axes, SCALARS):
        sel = [(n, med) for s, n, _, med in rows if s == scalar]
        ns = [n for n, _ in sel]
        ax.plot(ns, [m["Eigen"] for _, m in sel], "k-o", label="Eigen PartialPivLU<N,N>")
        for label, w, sized in contenders():
            ax.plot(ns, [m[kernel_name(scalar, w, loop, n if sized else None)] for n, m in sel], "-s",
                    label=f"luforge {label.replace('W=', 'lanes = ')}")
        ax.set_title(f"{scalar}: pivoted LU, ns per matrix")
        ax.set_xlabel("n")
        ax.set_yscale("log")
        ax.grid(True, which="both", alpha=0.3)
    axes[0].set_ylabel("ns per matrix (median)")
    axes[0].legend()
    fig.tight_layout()
    path = OUT / "batched.png"
    fig.savefig(path, dpi=110)
    print(f"plot: {path.relative_to(ROOT)}")


if __name__ == "__main__":
    sys.exit(main())
