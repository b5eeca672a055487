"""`make bench-small`: ns per factor and per one-column solve at small n against what a user would pick instead:
Eigen's fixed-size PartialPivLU, LAPACK getrf/getrs (OpenBLAS, one thread) and a textbook loop, in one run.

Builds bench/small_driver.cpp with luforge's fixed-size kernels (constant-time and, to show what constant time
costs, branching), its runtime-n kernel, and bench/small_textbook.c, all with the same flags; runs it pinned to
one CPU (taskset -c 1) with OPENBLAS_CORETYPE and OPENBLAS_L2_SIZE unset for this command only; prints the
medians and the time ratios, and writes bench/small.png. Options: --flags "-O2" (default: both -O3 -march=native
and -O2), --sizes 4,8, --out DIR, --cpu 1.
"""
from __future__ import annotations

import argparse
import os
import platform
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from derive.options import make_options  # noqa: E402
from derive.tune.cache import machine  # noqa: E402
from derive.printers.emit import emit_kernel  # noqa: E402

SIZES = (4, 6, 8, 12, 16)
SCALARS = (("double", "d"), ("float", "s"))
FLAG_SETS = (("-O3", "-march=native"), ("-O2",))
EIGEN = ("/usr/include/eigen3", "/usr/local/include/eigen3")
LOOP = "right-looking"      # the fastest ordering at these sizes (luforge tune, issue 8's table)


def write_kernels(where: Path, sizes) -> list[str]:
    names, headers, cases = [], [], []
    for scalar, t in SCALARS:
        rt = f"lfr_{t}"
        for name, size, choices in [(rt, None, "select")] + [
                (f"lf{kind}_{t}{n}", n, ch) for n in sizes for kind, ch in (("", "select"), ("b", "branch"))]:
            o = make_options(name, LOOP, 1, scalar=scalar, pivoting="partial", size=size, spec="bench/small.py")
            for fname, text in emit_kernel(o, choices).files:
                if not fname.endswith(".py"):
                    (where / fname).write_text(text)
            names.append(name)
            headers.append(f'#include "{name}.h"')
        cases += [f"CASE({scalar}, {n}, lf_{t}{n}, lfb_{t}{n}, {rt})" for n in sizes]
    (where / "kernels.inc").write_text("\n".join(headers) + "\n")
    (where / "cases.inc").write_text("\n".join(cases) + "\n")
    return names


def build(where: Path, names: list[str], flags: tuple[str, ...]) -> Path:
    cc, cxx = os.environ.get("CC", "gcc"), os.environ.get("CXX", "g++")
    inc = next((p for p in EIGEN if Path(p, "Eigen", "Dense").exists()), None)
    if inc is None or not shutil.which(cxx):
        sys.exit("bench-small needs Eigen (Debian: libeigen3-dev) and a C++ compiler (g++)")
    tag = "_".join(f.strip("-").replace("=", "") for f in flags)
    objs = []
    for src in [where / f"{n}.c" for n in names] + [HERE / "small_textbook.c"]:
        obj = where / f"{src.stem}.{tag}.o"
        # the compilers' default dialects (GNU C, GNU C++) for every contender: an ISO -std switches off the
        # contraction of a*b+c into one FMA in C, while Eigen calls FMA intrinsics whatever the dialect
        subprocess.run([cc, *flags, "-I", str(HERE), "-c", str(src), "-o", str(obj)], check=True)
        objs.append(str(obj))
    exe = where / f"small_driver.{tag}"
    subprocess.run([cxx, *flags, "-DNDEBUG", "-I", inc, "-I", str(where), "-I", str(HERE),
                    str(HERE / "small_driver.cpp"), *objs, "-o", str(exe), "-lopenblas"], check=True)
    return exe


def run(exe: Path, cpu: int = 1) -> tuple[dict, str]:
    env = {k: v for k, v in os.environ.items() if k not in ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE")}
    env["OPENBLAS_NUM_THREADS"] = "1"
    cmd = ([shutil.which("taskset"), "-c", str(cpu)] if shutil.which("taskset") else []) + [str(exe)]
    out = subprocess.run(cmd, env=env, capture_output=True, text=True)
    results, core = {}, "?"
    for line in out.stdout.splitlines():
        if line.startswith("MISMATCH"):
            print(line)
        elif line.startswith("OPENBLAS_CORE"):
            core = line.split(maxsplit=1)[1]
        elif line.startswith("RESULT"):
            _, t, n, who, f, s = line.split()
            results[(t, int(n), who)] = (float(f), float(s))
    if out.returncode != 0:
        sys.exit(f"the bench driver failed (a result differs from getrf, or it crashed):\n{out.stderr}")
    return results, core


def table(results: dict, sizes) -> str:
    rows = []
    for scalar, _ in SCALARS:
        head = f"| {scalar}, n | " + " | ".join(str(n) for n in sizes) + " |"
        rows += [head, "|---" * (len(sizes) + 1) + "|"]
        for who in ("luforge", "luforge-branching", "luforge-runtime-n", "eigen", "lapack", "textbook"):
            for col, what in ((0, "factor"), (1, "solve")):
                vals = [results[(scalar, n, who)][col] for n in sizes]
                rows.append(f"| {what} ns, {who} | " + " | ".join(f"{v:.1f}" for v in vals) + " |")
        for col, what in ((0, "factor"), (1, "solve (1 rhs)")):
            for mine, other in (("luforge", "eigen"), ("luforge", "lapack"), ("luforge", "textbook"),
                                ("luforge", "luforge-branching"), ("luforge-branching", "eigen")):
                vals = [results[(scalar, n, mine)][col] / results[(scalar, n, other)][col] for n in sizes]
                rows.append(f"| {what}, {mine} / {other} | " + " | ".join(f"{v:.2f}" for v in vals) + " |")
        rows.append("")
    return "\n".join(rows)


def plot(all_results: dict, sizes, path: Path) -> None:
    try:
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        print("matplotlib is missing (pip install '.[bench]'): no plot written")
        return
    fig, axes = plt.subplots(2, 2, figsize=(11, 8), sharex=True)
    flags = next(iter(all_results))
    results = all_results[flags]
    for row, (scalar, _) in enumerate(SCALARS):
        for col, what in enumerate(("factor", "solve, one right-hand side")):
            ax = axes[row][col]
            for who in ("luforge", "luforge-branching", "luforge-runtime-n", "eigen", "lapack", "textbook"):
                ax.plot(sizes, [results[(scalar, n, who)][col] for n in sizes], marker="o", label=who)
            ax.set_title(f"{what}, {scalar} ({flags})")
            ax.set_yscale("log")
            ax.set_xlabel("n")
            ax.set_ylabel("ns per call (median)")
            ax.grid(True, which="both", alpha=0.3)
    axes[0][0].legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    print(f"plot: {path}")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default=",".join(map(str, SIZES)))
    ap.add_argument("--flags", action="append", help="compiler flags for every contender (repeatable)")
    ap.add_argument("--out", default=str(HERE / "small.png"))
    ap.add_argument("--cpu", type=int, default=1, help="the CPU the driver is pinned to (default 1)")
    args = ap.parse_args()
    sizes = tuple(int(s) for s in args.sizes.split(","))
    flag_sets = tuple(tuple(f.split()) for f in args.flags) if args.flags else FLAG_SETS
    print(f"machine: {machine()}; {platform.system()} {platform.release()}; "
          f"{subprocess.run(['gcc', '--version'], capture_output=True, text=True).stdout.splitlines()[0]}")
    all_results = {}
    with tempfile.TemporaryDirectory(prefix="luforge-bench-small-") as tmp:
        where = Path(tmp)
        names = write_kernels(where, sizes)
        for flags in flag_sets:
            exe = build(where, names, flags)
            results, core = run(exe, args.cpu)
            key = " ".join(flags)
            all_results[key] = results
            print(f"\n## {key} (pinned to CPU {args.cpu}; OpenBLAS core {core}, one thread; medians of interleaved "
                  f"repetitions; every contender copies its input; all checked against getrf/getrs first)\n")
            print(table(results, sizes))
    plot(all_results, sizes, Path(args.out))
    return 0


if __name__ == "__main__":
    sys.exit(main())
