"""Host timing for `luforge tune`: one C driver links every kernel (and the reference contenders, when present)
and times them in interleaved rounds on one CPU, reporting per-call medians and the spread of the rounds."""
from __future__ import annotations

import os
import re
import shutil
import statistics
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

from derive.check.build import BuildError, cdef_of, compile_object, compiler
from derive.targets.storage import SCALARS

ROUNDS = 15             # interleaved repetitions; the median of 15 is robust to a few disturbed rounds
# clock: the timing thread's CPU time (CLOCK_THREAD_CPUTIME_ID), not wall time; see now_ns in the driver
SAMPLE_NS = 200_000     # each sample runs the call enough times to last about this long (timer resolution)
OPENBLAS_VARS = ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE")


@dataclass(frozen=True, slots=True)
class Entry:
    """One timed call: a kernel (or contender) at one n, factor or solve."""
    key: str            # the caller's handle for the result
    kernel: str         # C function name of the factor (or a contender's tag)
    n: int
    part: str           # "factor" or "solve"


@dataclass(frozen=True, slots=True)
class Timing:
    median_ns: float
    spread_ns: float    # half the interquartile range of the rounds: the noise of this figure
    rounds: int


# -- calling a kernel from its header ----------------------------------------------------------------------------

def _params(cdef: str, fn: str) -> list[str] | None:
    m = re.search(rf"\b{re.escape(fn)}\s*\(([^)]*)\)", cdef)
    if not m:
        return None
    out = []
    for p in m.group(1).split(","):
        p = p.strip()
        if p and p != "void":
            out.append(re.findall(r"[A-Za-z_]\w*", p)[-1])
    return out


def call_expr(cdef: str, fn: str, args: dict[str, str]) -> str:
    """A call of `fn` with each parameter bound by its name (n, a, lda, ipiv, nrhs, lu, b, ldb), so fixed-size
    kernels (no n) and any later parameter order are called correctly, and an unknown parameter is an error."""
    params = _params(cdef, fn)
    if params is None:
        raise BuildError(f"tune: no prototype of {fn} in its header")
    missing = [p for p in params if p not in args]
    if missing:
        raise BuildError(f"tune: cannot call {fn}: parameter {missing[0]!r} has no value in a single-system call")
    return f"{fn}({', '.join(args[p] for p in params)})"


# -- the driver ----------------------------------------------------------------------------------------------------

_MAIN = r"""
/* the timing thread's CPU time: on a shared machine the time this process spends descheduled while another
   runs is not the kernel's, and wall time would charge it to whichever candidate was running */
static unsigned long long now_ns(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_THREAD_CPUTIME_ID, &ts);
    return (unsigned long long)ts.tv_sec * 1000000000ull + (unsigned long long)ts.tv_nsec;
}

static double per_call(void (*fn)(void), long reps)
{
    unsigned long long t0 = now_ns();
    for (long r = 0; r < reps; ++r) fn();
    return (double)(now_ns() - t0) / (double)reps;
}

int main(int argc, char **argv)
{
    int rounds = argc > 1 ? atoi(argv[1]) : 15;
    double sample_ns = argc > 2 ? atof(argv[2]) : 2e5;
    long *reps = malloc(sizeof(long) * NENTRIES);
    double *t = malloc(sizeof(double) * NENTRIES * (size_t)rounds);
    int *order = malloc(sizeof(int) * NENTRIES);
    unsigned int seed = 12345u;
    setup();
    for (int e = 0; e < NENTRIES; ++e) {      /* calibrate: double the batch until it lasts sample_ns */
        long k = 1;
        while (per_call(ENTRIES[e], k) * (double)k < sample_ns && k < (1L << 26)) k *= 2;
        reps[e] = k;
    }
    for (int r = 0; r < rounds; ++r) {
        for (int e = 0; e < NENTRIES; ++e) order[e] = e;
        for (int e = NENTRIES - 1; e > 0; --e) {  /* a fresh order each round, so drift hits everyone alike */
            seed = seed * 1103515245u + 12345u;
            int j = (int)((seed >> 8) % (unsigned)(e + 1)), x = order[e];
            order[e] = order[j]; order[j] = x;
        }
        for (int e = 0; e < NENTRIES; ++e) t[(size_t)order[e] * (size_t)rounds + (size_t)r] = per_call(ENTRIES[order[e]], reps[order[e]]);
    }
    for (int e = 0; e < NENTRIES; ++e) {
        printf("%d", e);
        for (int r = 0; r < rounds; ++r) printf(" %.3f", t[(size_t)e * (size_t)rounds + (size_t)r]);
        printf("\n");
    }
    fprintf(stderr, "sink %d\n", sink);
    return 0;
}
"""


def _matrix_init(T: str, n: int, dominant: bool) -> str:
    # a fixed pseudo-random matrix (LCG, common practice); unpivoted kernels get a dominant diagonal so that
    # every one of them factors it without a tiny pivot
    return (f"    for (int i = 0; i < {n * n}; ++i) {{ s = s * 1664525u + 1013904223u; "
            f"a0_{n}[i] = ({T})((double)(s >> 8) / 16777216.0 - 0.5); }}\n"
            + (f"    for (int i = 0; i < {n}; ++i) a0_{n}[i * {n} + i] += ({T}){n};\n" if dominant else ""))


@dataclass
class Kernel:
    name: str
    c_text: str
    h_text: str
    layout: str


@dataclass
class Contender:
    """A reference implementation the driver can time: C declarations, per-n entry bodies and how to build it."""
    tag: str
    decls: str
    factor_body: callable      # (n) -> C statements using a0_n, work, ipiv_w
    solve_body: callable       # (n) -> C statements using the contender's own factor and bw
    setup: callable            # (n) -> C statements run once
    objects: list              # extra object files
    libs: list


def build_driver(kernels: list[Kernel], contenders: list[Contender], sizes, nrhs: int, scalar: str,
                 pivoted: bool, entries_for, flags: tuple[str, ...], workdir: Path) -> tuple[Path, list[Entry]]:
    T = SCALARS[scalar].c_type
    nmax = max(sizes)
    rhs = max(nrhs, 1)
    lines = ["#define _POSIX_C_SOURCE 199309L", "#include <stdio.h>", "#include <stdlib.h>", "#include <string.h>",
             "#include <time.h>"]
    lines += [f'#include "{k.name}.h"' for k in kernels]
    lines += [f"static {T} work[{nmax * nmax}], bw[{nmax * rhs}];", f"static int ipiv_w[{nmax}];",
              "static volatile int sink;"]
    for n in sizes:
        lines += [f"static {T} a0_{n}[{n * n}], b0_{n}[{n * rhs}];"]
    for c in contenders:
        lines.append(c.decls)
    entries: list[Entry] = []
    bodies: list[str] = []
    setup: list[str] = []
    for k in kernels:
        cdef = cdef_of(k.h_text)
        for n, part, key in entries_for(k.name):
            ldb = str(n) if k.layout == "column-major" else str(rhs)
            lu, piv = f"lu_{k.name}_{n}", f"pv_{k.name}_{n}"
            if not any(e.kernel == k.name and e.n == n for e in entries):
                lines += [f"static {T} {lu}[{n * n}];", f"static int {piv}[{n}];"]
                fcall = call_expr(cdef, k.name, {"n": str(n), "a": lu, "lda": str(n), "ipiv": piv})
                setup.append(f"    memcpy({lu}, a0_{n}, sizeof {lu}); sink += {fcall};")
            if part == "factor":
                body = (f"memcpy(work, a0_{n}, sizeof a0_{n}); sink += "
                        + call_expr(cdef, k.name, {"n": str(n), "a": "work", "lda": str(n), "ipiv": "ipiv_w"}) + ";")
            else:
                body = (f"memcpy(bw, b0_{n}, sizeof b0_{n}); sink += "
                        + call_expr(cdef, k.name + "_solve", {"n": str(n), "nrhs": str(nrhs), "lu": lu,
                                                              "lda": str(n), "ipiv": piv, "b": "bw", "ldb": ldb})
                        + ";")
            entries.append(Entry(key, k.name, n, part))
            bodies.append(body)
    for c in contenders:
        for n in sizes:
            setup.append(c.setup(n))
            for part, fn in (("factor", c.factor_body), ("solve", c.solve_body)):
                if part == "solve" and nrhs == 0:
                    continue
                entries.append(Entry(f"{c.tag}:{n}:{part}", c.tag, n, part))
                bodies.append(fn(n))
    for i, body in enumerate(bodies):
        lines.append(f"static void e{i}(void) {{ {body} }}")
    lines.append("static void setup(void)\n{\n    unsigned int s = 20261202u;")
    for n in sizes:
        lines.append(_matrix_init(T, n, not pivoted))
        lines.append(f"    for (int i = 0; i < {n * rhs}; ++i) {{ s = s * 1664525u + 1013904223u; "
                     f"b0_{n}[i] = ({T})((double)(s >> 8) / 16777216.0 - 0.5); }}")
    lines += setup
    lines.append("}")
    lines.append(f"#define NENTRIES {len(bodies)}")
    lines.append("static void (*const ENTRIES[])(void) = {" + ", ".join(f"e{i}" for i in range(len(bodies))) + "};")
    lines.append(_MAIN)
    src = workdir / "tune_driver.c"
    src.write_text("\n".join(lines))
    inc = workdir / "include"
    inc.mkdir(exist_ok=True)
    objs = []
    for k in kernels:
        (inc / f"{k.name}.h").write_text(k.h_text)
        objs.append(str(compile_object(k.name, k.c_text, k.h_text, flags)))
    for c in contenders:
        objs += [str(o) for o in c.objects]
    exe = workdir / "tune_driver"
    cmd = [compiler(), "-std=c99", *[f for f in flags if f != "-fPIC"], "-I", str(inc), str(src), *objs,
           "-o", str(exe)]
    libs = [lib for c in contenders for lib in c.libs]
    if any(c.objects for c in contenders):
        libs.append("-lstdc++")
    res = subprocess.run(cmd + libs + ["-lm"], capture_output=True, text=True)
    if res.returncode != 0:
        raise BuildError(f"tune: the timing driver does not build:\n{res.stderr[:2000]}")
    return exe, entries


def pin_prefix() -> list[str]:
    """taskset -c 1 when CPU 1 is ours (a quiet core is common practice for timing), else CPU 0, else nothing."""
    taskset = shutil.which("taskset")
    try:
        cpus = sorted(os.sched_getaffinity(0))
    except AttributeError:
        cpus = []
    if not taskset or not cpus:
        return []
    return [taskset, "-c", str(1 if 1 in cpus else cpus[0])]


def run_driver(exe: Path, entries: list[Entry], rounds: int = ROUNDS) -> tuple[dict[str, Timing], str]:
    env = dict(os.environ)
    for var in OPENBLAS_VARS:     # the bench command only: let OpenBLAS pick its own core
        env.pop(var, None)
    env["OPENBLAS_NUM_THREADS"] = "1"
    res = subprocess.run([*pin_prefix(), str(exe), str(rounds), str(SAMPLE_NS)], capture_output=True, text=True,
                         env=env)
    if res.returncode != 0:
        raise BuildError(f"tune: the timing driver failed (status {res.returncode}): {res.stderr[:500]}")
    out: dict[str, Timing] = {}
    for line in res.stdout.splitlines():
        fields = line.split()
        e = entries[int(fields[0])]
        xs = sorted(float(x) for x in fields[1:])
        q = statistics.quantiles(xs, n=4) if len(xs) > 1 else [xs[0]] * 3
        out[e.key] = Timing(statistics.median(xs), (q[2] - q[0]) / 2, len(xs))
    notes = "\n".join(ln for ln in res.stderr.splitlines() if not ln.startswith("sink"))
    return out, notes


def object_bytes(obj: Path) -> int | None:
    """Code and data bytes of a kernel's object file (text + data + bss, as `size` counts them)."""
    tool = shutil.which("size")
    if not tool:
        return None
    res = subprocess.run([tool, str(obj)], capture_output=True, text=True)
    if res.returncode != 0:
        return None
    last = res.stdout.strip().splitlines()[-1].split()
    return int(last[0]) + int(last[1]) + int(last[2])


def time_kernels(kernels: list[Kernel], contenders: list[Contender], sizes, nrhs: int, scalar: str, pivoted: bool,
                 entries_for, flags: tuple[str, ...], rounds: int = ROUNDS) -> tuple[dict[str, Timing], str]:
    with tempfile.TemporaryDirectory(prefix="luforge-tune-") as tmp:
        exe, entries = build_driver(kernels, contenders, sizes, nrhs, scalar, pivoted, entries_for, flags, Path(tmp))
        return run_driver(exe, entries, rounds)
