"""For a firmware tree: each kernel's known-answer self-test (NAME_selftest.c) and the build fragments (CMake and
Make) that list a spec's sources and include directory. Text only; generate writes it with the kernels."""
from __future__ import annotations

import re

from derive import __version__
from derive.options import KernelOptions
from derive.targets.storage import LAYOUTS, SCALARS
from derive.printers.write import content_hash_line, seal

# Known answers, n = 6. L is unit lower triangular with dyadic multipliers of magnitude below 1 and U has
# power-of-two diagonal, so every intermediate of the elimination and of both substitutions is exact in binary32
# and binary64, and any correct LU with partial pivoting returns exactly these factors bit for bit, in any loop
# order or block size. A_IDENT = L U (no interchange needed); A_PERM holds the rows of L U in the order
# PERM_ROWS. The factors, the pivot sequence and the solution below are what LAPACK's dgetrf/sgetrf and
# dgetrs/sgetrs return for these matrices; tests/test_firmware.py checks them against scipy.linalg.lu_factor
# and lu_solve on every run, so none of them is taken on trust.
N = 6
LU_PACKED = (  # strict lower part: L; upper part with the diagonal: U (rows)
    (4.0, 3.0, -1.0, 2.0, 1.0, -2.0),
    (0.5, -2.0, 1.0, -3.0, 2.0, 1.0),
    (-0.25, 0.5, 4.0, -1.0, 2.0, 1.0),
    (0.75, -0.5, 0.25, 2.0, 3.0, -2.0),
    (-0.5, 0.25, -0.75, 0.5, -4.0, 1.0),
    (0.25, 0.5, 0.5, -0.25, -0.5, 2.0),
)
PERM_ROWS = (2, 5, 0, 4, 1, 3)          # row i of A_PERM is row PERM_ROWS[i] of L U
PIVOTS_PERM = (2, 4, 2, 5, 5, 5)        # 0-based interchange sequence LAPACK's getrf returns for A_PERM
X_KNOWN = (1.0, -2.0, 3.0, 0.0, -1.0, 2.0)
CANARY = 1234.5                         # the padding row of each array; no routine may touch it


def factors() -> tuple[list[list[float]], list[list[float]]]:
    """L (unit lower) and U of LU_PACKED, as lists of rows."""
    lo = [[LU_PACKED[i][j] if j < i else (1.0 if i == j else 0.0) for j in range(N)] for i in range(N)]
    up = [[LU_PACKED[i][j] if j >= i else 0.0 for j in range(N)] for i in range(N)]
    return lo, up


def matrices() -> dict[str, list[list[float]]]:
    lo, up = factors()
    lu = [[sum(lo[i][p] * up[p][j] for p in range(N)) for j in range(N)] for i in range(N)]
    perm = [lu[r] for r in PERM_ROWS]
    return {"ident": lu, "perm": perm}


def rhs(a: list[list[float]]) -> list[float]:
    return [sum(a[i][j] * X_KNOWN[j] for j in range(N)) for i in range(N)]


def _literal(x: float, scalar: str) -> str:
    text = repr(float(x))
    return text + ("f" if scalar == "float" else "")


def _stored(rows: list[list[float]], layout: str, ld: int, scalar: str) -> str:
    """An N x N matrix in the kernel's layout with leading dimension ld; the padding holds the canary."""
    lead = LAYOUTS[layout].leading
    cells = []
    outer = N
    for o in range(outer):
        for i in range(ld):
            if i >= N:
                cells.append(CANARY)
            else:
                cells.append(rows[i][o] if lead == "rows" else rows[o][i])
    lits = [_literal(c, scalar) for c in cells]
    return ",\n    ".join(", ".join(lits[k:k + ld]) for k in range(0, len(lits), ld))


def has_selftest(o: KernelOptions) -> bool:
    """Runtime-n single-matrix kernels get one: a fixed-size kernel's n is its own (the known answers are 6 x 6)
    and a batched kernel has another ABI; verify checks those."""
    return o.size is None and o.lanes == 1


def selftest_text(o: KernelOptions, env, banner) -> str:
    scalar = SCALARS[o.scalar]
    pivoted = o.pivoting != "none"
    ld = N + 1
    mats = matrices()
    lu_rows = [list(r) for r in LU_PACKED]
    cases = [("ident", mats["ident"], list(range(N)))]
    if pivoted:
        cases.append(("perm", mats["perm"], list(PIVOTS_PERM)))
    data = []
    for tag, a, piv in cases:
        b = rhs(a)
        data.append(dict(tag=tag, a=_stored(a, o.layout, ld, o.scalar), lu=_stored(lu_rows, o.layout, ld, o.scalar),
                         piv=", ".join(str(p) for p in piv), b=", ".join(_literal(v, o.scalar) for v in b),
                         x=", ".join(_literal(v, o.scalar) for v in X_KNOWN)))
    return env.get_template("c/selftest.c.j2").render(
        banner=banner, name=o.name, NAME=o.name.upper(), T=scalar.c_type, n=N, ld=ld, pivoted=pivoted,
        cases=data, canary=_literal(CANARY, o.scalar), column_major=LAYOUTS[o.layout].leading == "rows")


# -- build fragments ----------------------------------------------------------------------------------------------
def fragment_prefix(spec_stem: str) -> str:
    """Build-variable prefix from the spec's file name: LUFORGE_ and its letters and digits, upper case."""
    return "LUFORGE_" + re.sub(r"[^A-Za-z0-9]+", "_", spec_stem).strip("_").upper()


def fragment_names(spec_stem: str) -> tuple[str, str]:
    return f"{spec_stem}.cmake", f"{spec_stem}.mk"


def fragments(spec_stem: str, spec_name: str, options: list[KernelOptions]) -> list[tuple[str, str]]:
    """A CMake and a Make fragment listing the kernels' sources, their self-tests and the include directory
    (the fragment's own directory, wherever the tree is moved)."""
    px = fragment_prefix(spec_stem)
    srcs = [f"{o.name}.c" for o in options]
    tests = [f"{o.name}_selftest.c" for o in options if has_selftest(o)]
    head = [f"generated by luforge {__version__} from {spec_name}; do not edit",
            f"{len(options)} kernels; the sources need only a C99 compiler (no libm, no allocator, no stdio)",
            content_hash_line()]
    cmake = [*(f"# {ln}" for ln in head),
             f"# include() this file, then add ${{{px}_SOURCES}} to a target and ${{{px}_INCLUDE_DIR}} to its",
             f"# include directories; ${{{px}_SELFTEST_SOURCES}} are the known-answer tests (NAME_selftest()).",
             f'set({px}_INCLUDE_DIR "${{CMAKE_CURRENT_LIST_DIR}}")',
             f"set({px}_SOURCES",
             *(f'    "${{CMAKE_CURRENT_LIST_DIR}}/{s}"' for s in srcs), ")",
             f"set({px}_SELFTEST_SOURCES",
             *(f'    "${{CMAKE_CURRENT_LIST_DIR}}/{s}"' for s in tests), ")"]
    make = [*(f"# {ln}" for ln in head),
            f"# include this file, then compile $({px}_SOURCES) with -I$({px}_INCLUDE_DIR);",
            f"# $({px}_SELFTEST_SOURCES) are the known-answer tests (NAME_selftest()).",
            f"{px}_INCLUDE_DIR := $(patsubst %/,%,$(dir $(lastword $(MAKEFILE_LIST))))",
            f"{px}_SOURCES :=" + "".join(f" \\\n    $({px}_INCLUDE_DIR)/{s}" for s in srcs),
            f"{px}_SELFTEST_SOURCES :=" + "".join(f" \\\n    $({px}_INCLUDE_DIR)/{s}" for s in tests)]
    cm, mk = fragment_names(spec_stem)
    return [(cm, seal("\n".join(cmake) + "\n")), (mk, seal("\n".join(make) + "\n"))]
