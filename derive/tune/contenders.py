"""Reference contenders timed beside the candidates on the host when present: Eigen's fixed-size PartialPivLU,
LAPACK getrf/getrs (through OpenBLAS) and the bench's textbook loop. Each copies its input like the kernels do."""
from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

from derive.check.build import cache_root
from derive.digest import digest
from derive.tune.host import Contender

EIGEN_INCLUDE = ("/usr/include/eigen3", "/usr/local/include/eigen3")


def _cxx() -> str | None:
    return shutil.which("g++") or shutil.which("c++") or shutil.which("clang++")


def _eigen_source(T: str, layout: str, sizes, nrhs: int) -> str:
    order = "Eigen::ColMajor" if layout == "column-major" else "Eigen::RowMajor"
    rhs = max(nrhs, 1)
    out = ["#include <Eigen/Dense>"]
    for n in sizes:
        border = order if rhs > 1 else "Eigen::ColMajor"   # Eigen refuses a row-major column vector
        mat = f"Eigen::Matrix<{T}, {n}, {n}, {order}>"
        vec = f"Eigen::Matrix<{T}, {n}, {rhs}, {border}>"
        out.append(f"""
static Eigen::PartialPivLU<{mat}> *eig_lu_{n};
extern "C" int eig_setup_{n}(const {T} *a0) {{ {mat} m = Eigen::Map<const {mat}>(a0); eig_lu_{n} = new Eigen::PartialPivLU<{mat}>(m); return 0; }}
extern "C" int eig_factor_{n}(const {T} *a0, {T} *work) {{
    Eigen::Map<{mat}> w(work);
    w = Eigen::Map<const {mat}>(a0);
    Eigen::PartialPivLU<Eigen::Ref<{mat}> > lu(w);   // in place, like the kernels: one copy of the input
    return (int)lu.permutationP().indices()(0);
}}
extern "C" int eig_solve_{n}(const {T} *b0, {T} *bw) {{
    Eigen::Map<{vec}> x(bw);
    x = eig_lu_{n}->solve(Eigen::Map<const {vec}>(b0));
    return 0;
}}""")
    return "\n".join(out) + "\n"


def eigen(T: str, layout: str, sizes, nrhs: int, flags: tuple[str, ...], pivoted: bool) -> Contender | None:
    """Eigen's PartialPivLU at compile-time n; None when Eigen or a C++ compiler is missing, or without pivoting
    (Eigen has no unpivoted LU to compare with)."""
    inc = next((p for p in EIGEN_INCLUDE if Path(p, "Eigen", "Dense").exists()), None)
    cxx = _cxx()
    if not inc or not cxx or not pivoted:
        return None
    src = _eigen_source(T, layout, sizes, nrhs)
    cflags = [f for f in flags if f not in ("-std=c99",)]
    key = digest(src, cxx, cflags)[:24]
    obj = cache_root() / "tune" / "eigen" / f"{key}.o"
    if not obj.exists():
        obj.parent.mkdir(parents=True, exist_ok=True)
        cpp = obj.with_suffix(".cpp")
        cpp.write_text(src)
        tmp = obj.with_suffix(".tmp.o")
        res = subprocess.run([cxx, "-std=c++14", "-DNDEBUG", *cflags, "-I", inc, "-c", str(cpp), "-o", str(tmp)],
                             capture_output=True, text=True)
        if res.returncode != 0:
            return None
        tmp.replace(obj)
    decls = "\n".join(f"int eig_setup_{n}(const {T} *); int eig_factor_{n}(const {T} *, {T} *); "
                      f"int eig_solve_{n}(const {T} *, {T} *);" for n in sizes)
    return Contender("eigen", decls,
                     factor_body=lambda n: f"sink += eig_factor_{n}(a0_{n}, work);",
                     solve_body=lambda n: f"sink += eig_solve_{n}(b0_{n}, bw);",
                     setup=lambda n: f"    sink += eig_setup_{n}(a0_{n});",
                     objects=[obj], libs=[])


def _links(lib: str) -> bool:
    cc = shutil.which("cc") or shutil.which("gcc")
    if not cc:
        return False
    res = subprocess.run([cc, "-x", "c", "-", "-o", "/dev/null", lib], input="int main(void){return 0;}",
                         capture_output=True, text=True)
    return res.returncode == 0


def lapack(T: str, layout: str, sizes, nrhs: int, pivoted: bool) -> Contender | None:
    """LAPACK getrf/getrs from OpenBLAS (one thread), column-major whatever the kernels' layout (the work is the
    same); None when OpenBLAS does not link or without pivoting (LAPACK's LU always pivots)."""
    if not pivoted or not _links("-lopenblas"):
        return None
    p = "d" if T == "double" else "s"
    rhs = max(nrhs, 1)
    decls = (f"void {p}getrf_(const int *, const int *, {T} *, const int *, int *, int *);\n"
             f"void {p}getrs_(const char *, const int *, const int *, const {T} *, const int *, const int *, {T} *, "
             f"const int *, int *, size_t);\n"
             "char *openblas_get_corename(void);\n"
             + "\n".join(f"static {T} lap_lu_{n}[{n * n}]; static int lap_piv_{n}[{n}];" for n in sizes))

    def factor(n):
        return (f"int n = {n}, info; memcpy(work, a0_{n}, sizeof a0_{n}); "
                f"{p}getrf_(&n, &n, work, &n, ipiv_w, &info); sink += info;")

    def solve(n):
        return (f"int n = {n}, r = {rhs}, info; memcpy(bw, b0_{n}, sizeof b0_{n}); "
                f"{p}getrs_(\"N\", &n, &r, lap_lu_{n}, &n, lap_piv_{n}, bw, &n, &info, 1); sink += info;")

    def setup(n):
        first = '    fprintf(stderr, "OpenBLAS core: %s\\n", openblas_get_corename());\n' if n == min(sizes) else ""
        return (first + f"    {{ int n = {n}, info; memcpy(lap_lu_{n}, a0_{n}, sizeof a0_{n}); "
                f"{p}getrf_(&n, &n, lap_lu_{n}, &n, lap_piv_{n}, &info); sink += info; }}")
    return Contender("lapack", decls, factor, solve, setup, objects=[], libs=["-lopenblas"])


TEXTBOOK = Path(__file__).resolve().parents[2] / "bench" / "small_textbook.c"


def textbook(T: str, sizes, nrhs: int, flags: tuple[str, ...], pivoted: bool) -> Contender | None:
    """The bench's hand-written textbook LU (bench/small_textbook.c, in a source checkout), built with the
    candidates' flags; None when it is not there or without pivoting."""
    if not pivoted or not TEXTBOOK.exists():
        return None
    from derive.check.build import compiler
    src = TEXTBOOK.read_text()
    key = digest(src, compiler(), list(flags))[:24]
    obj = cache_root() / "tune" / "textbook" / f"{key}.o"
    if not obj.exists():
        obj.parent.mkdir(parents=True, exist_ok=True)
        tmp = obj.with_suffix(".tmp.o")
        res = subprocess.run([compiler(), "-std=c99", *flags, "-I", str(TEXTBOOK.parent), "-c", str(TEXTBOOK), "-o",
                              str(tmp)], capture_output=True, text=True)
        if res.returncode != 0:
            return None
        tmp.replace(obj)
    p = "d" if T == "double" else "s"
    rhs = max(nrhs, 1)
    decls = (f"int tb_{p}getrf(int, {T} *, int, int *); void tb_{p}getrs(int, const {T} *, int, const int *, {T} *);\n"
             + "\n".join(f"static {T} tb_lu_{n}[{n * n}]; static int tb_piv_{n}[{n}];" for n in sizes))
    return Contender(
        "textbook", decls,
        factor_body=lambda n: f"memcpy(work, a0_{n}, sizeof a0_{n}); sink += tb_{p}getrf({n}, work, {n}, ipiv_w);",
        solve_body=lambda n: (f"memcpy(bw, b0_{n}, sizeof b0_{n}); for (int r = 0; r < {rhs}; ++r) "
                              f"tb_{p}getrs({n}, tb_lu_{n}, {n}, tb_piv_{n}, bw + r * {n});"),
        setup=lambda n: f"    memcpy(tb_lu_{n}, a0_{n}, sizeof a0_{n}); sink += tb_{p}getrf({n}, tb_lu_{n}, {n}, tb_piv_{n});",
        objects=[obj], libs=[])


def available(T: str, layout: str, sizes, nrhs: int, flags: tuple[str, ...], pivoted: bool) -> list[Contender]:
    return [c for c in (eigen(T, layout, sizes, nrhs, flags, pivoted), lapack(T, layout, sizes, nrhs, pivoted),
                        textbook(T, sizes, nrhs, flags, pivoted)) if c is not None]
