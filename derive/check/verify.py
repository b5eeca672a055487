"""`luforge verify`: check the kernel files a user ships (the .c, .h and .py on disk) first for drift from their
spec, then by running each on seeded matrices judged by published criteria (LAPACK's ratios, Higham's bound)."""
from __future__ import annotations

import math
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from derive.check.accuracy import column_dominant, componentwise_ratio, factor_ratio, solve_ratio
from derive.check.build import OPT_FLAGS, build, load_python
from derive.check.harness import CKernel
from derive.check.matrices import exact_factors, lapack_ge_matrix, zero_columns
from derive.options import KernelOptions
from derive.targets.table import get as get_target, runs_here

# LAPACK TESTING/dtest.in: THRESH = 30.0, the largest acceptable test ratio
THRESHOLD = 30.0
# Random matrices are judged by residuals formed in a wider format, O(n^3) in Python-side arithmetic; above
# this size a kernel meets matrices with exactly known factors instead, checked bit for bit in O(n^2).
RANDOM_UP_TO = 96
# The NumPy twin runs its unblocked inner loop in Python; above this size it is left to the test suite.
TWIN_UP_TO = 600
SUFFIXES = (".c", ".h", ".py")
# Up to this block size the edges of the first block (b-1, b, b+1, 2b) are tried too; beyond it each size costs
# (2b)^3 and only n = 2b + 1 is (one matrix with exact factors: about 3.7e11 flops at b = 4096).
EDGES_UP_TO = 128


@dataclass(frozen=True)
class Budget:
    """What verify tries: the seed, random matrices per size, sizes the user adds, and how to build."""
    seed: int = 20261202
    per_size: int = 2
    sizes: tuple[int, ...] = ()
    cflags: tuple[str, ...] = ()
    sanitize: bool = False

    def __post_init__(self) -> None:
        if self.per_size < 1:
            raise ValueError("per_size must be >= 1")
        if any(n < 0 for n in self.sizes):
            raise ValueError("sizes must be >= 0")


@dataclass
class Row:
    name: str
    kind: str
    sizes: list[int]
    matrices: int = 0
    worst_factor: float = 0.0
    worst_componentwise: float = 0.0
    worst_solve: float = 0.0
    problems: list[str] = field(default_factory=list)
    seconds: float = 0.0
    not_run: str = ""       # why a kernel was compiled but not run (its target's CPU features are missing here)

    @property
    def passed(self) -> bool:
        return not self.problems

    def fold(self, what: str, n: int, value: float) -> None:
        """Keep the worst ratio; a NaN or Inf is itself a failure (max(w, nan) would silently keep w)."""
        if not math.isfinite(value):
            self.problems.append(f"n={n}: {what} is {value} (a NaN or Inf result)")
        attr = {"factor ratio": "worst_factor", "componentwise ratio": "worst_componentwise",
                "solve ratio": "worst_solve"}[what]
        old = getattr(self, attr)
        if not (value <= old):     # true for NaN too, so NaN is what the table shows
            setattr(self, attr, value)


@dataclass
class Subject:
    """One kernel as it ships: its options, the built C kernel and the imported NumPy twin."""
    options: KernelOptions
    c: object
    py: object


# --- the files on disk ---------------------------------------------------------------------------------------

def shipped_files(options: list[KernelOptions], directory: Path) -> dict[str, dict[str, Path]]:
    """Where each kernel's files should be: NAME.c, NAME.h, NAME.py in `directory`."""
    return {o.name: {sfx: directory / f"{o.name}{sfx}" for sfx in SUFFIXES} for o in options}


def drift(options: list[KernelOptions], directory: Path, emit=None) -> list[str]:
    """Regenerate every kernel in memory and compare it byte for byte with the file on disk; one line per
    missing or differing file (an empty list means what ships is what the spec makes now)."""
    from derive.printers.emit import emit_kernel
    emit = emit or emit_kernel
    problems = []
    where = shipped_files(options, directory)
    for o in options:
        e = emit(o)
        # what generate writes: no NumPy twin when the spec says python = false; NAME_selftest.c by its own name
        for fname, text in (e.written() if hasattr(e, "written") else e.files):
            sfx = Path(fname).suffix
            path = where[o.name][sfx] if fname == f"{o.name}{sfx}" else directory / fname
            try:
                data = path.read_bytes()
            except FileNotFoundError:
                problems.append(f"{path}: missing (run `luforge generate` for kernel {o.name})")
                continue
            except OSError as e:
                problems.append(f"{path}: cannot be read: {e.strerror or e}")
                continue
            if data != text.encode("utf-8"):
                problems.append(f"{path}: differs from what the spec generates for kernel {o.name} (edited, or "
                                f"generated from another spec or version); run `luforge generate` or restore it")
    return problems


# --- sizes ---------------------------------------------------------------------------------------------------

def sizes_for(block: int, extra: tuple[int, ...] = ()) -> list[int]:
    """Small sizes, the edges of one block, and sizes crossing two block boundaries (n >= 2b + 1, one of them
    not a multiple of b) whatever b is, plus the sizes the user names."""
    s = {0, 1, 2, 3, 4, 5, 7, 8, 9, 16, 17, 31, 33, 48}
    if block > 1:
        s.add(2 * block + 1)      # three block iterations, the last one partial
        if block <= EDGES_UP_TO:
            s |= {block - 1, block, block + 1, 2 * block}
    return sorted(s | set(extra))


def size_ranges(sizes: list[int]) -> str:
    """[0,1,2,3,5,7,8] -> '0-3,5,7-8'; a size tried several times (a fixed-size kernel's) is named once."""
    sizes = sorted(set(sizes))
    out, i = [], 0
    while i < len(sizes):
        j = i
        while j + 1 < len(sizes) and sizes[j + 1] == sizes[j] + 1:
            j += 1
        out.append(str(sizes[i]) if i == j else f"{sizes[i]}-{sizes[j]}")
        i = j + 1
    return ",".join(out)


# --- the general (variable n) ABI ----------------------------------------------------------------------------

def _twin_factor(py, a: np.ndarray, pivoted: bool):
    res = py.factor(a)
    return res if pivoted else (res, None)


def check_general(s: Subject, budget: Budget, rng) -> Row:
    """`int NAME(int n, T *a, int lda[, int *ipiv])` and its `_solve`: random, exact and LAPACK matrices."""
    return check_matrices(s, budget, rng, Row(s.options.name, "general", sizes_for(s.options.block, budget.sizes)))


def check_fixed(s: Subject, budget: Budget, rng) -> Row:
    """`int NAME(T *a, int lda[, int *ipiv])` for n = size only: the same matrices at that one n."""
    return check_matrices(s, budget, rng, Row(s.options.name, "fixed", [s.options.size]))


def check_matrices(s: Subject, budget: Budget, rng, row: Row) -> Row:
    ck = s.c
    dtype, pivoted = ck.dtype, ck.pivoted

    def run(n: int, a: np.ndarray, expected_info: int, judge: str, exact=None) -> None:
        """judge: 'random' (ratios and Higham's bound), 'exact' (known factors, bit for bit), 'lapack' (dchkge's
        checks: the expected code, dget01's factor ratio, dget02's solve ratio for the nonsingular types), 'code'
        (the code only: past an exactly zero pivot an unpivoted kernel's factors carry no promise)."""
        row.matrices += 1
        lda = max(1, n) + int(rng.integers(0, 4))
        info, lu, ipiv, ok = ck.factor(a, lda)
        if not ok:
            row.problems.append(f"n={n}: the factor wrote outside the matrix (or ipiv): a canary changed")
        if info != expected_info:
            row.problems.append(f"n={n}: the factor returned {info}, expected {expected_info}")
            return
        if judge == "code":
            return
        if judge == "exact":
            want_lu, want_piv = exact
            if not np.array_equal(lu, want_lu) or (pivoted and not np.array_equal(ipiv, want_piv)):
                bad = np.argwhere(lu != want_lu)
                at = f" (first wrong entry at {tuple(int(x) for x in bad[0])})" if len(bad) else " (pivots)"
                row.problems.append(f"n={n}: factors differ from the exactly known ones{at}")
                return
        else:
            row.fold("factor ratio", n, factor_ratio(a, lu, ipiv))
        if judge == "random":
            row.fold("componentwise ratio", n, componentwise_ratio(a, lu, ipiv))
        if info != 0:
            return
        b = rng.standard_normal((n, 2)).astype(dtype)
        if judge == "lapack":
            b *= np.max(np.abs(a)) if n else 1   # scaled with the matrix, so types 10 and 11 stay in range
        code, x, ok2 = ck.solve(lu, b, ipiv)
        if code != 0 or not ok2:
            row.problems.append(f"n={n}: the solve returned {code}" + ("" if ok2 else " and a canary changed"))
        row.fold("solve ratio", n, solve_ratio(a, x, b))
        if n <= TWIN_UP_TO and judge != "lapack":
            pa = a.copy()
            pinfo, pipiv = _twin_factor(s.py, pa, pivoted)
            if pinfo != info or (pivoted and not np.array_equal(pipiv, ipiv)):
                row.problems.append(f"n={n}: the NumPy twin disagrees with the C kernel (code or pivots)")
            elif judge == "exact" and not np.array_equal(pa, exact[0]):
                row.problems.append(f"n={n}: the NumPy twin's factors differ from the exactly known ones")
            elif judge == "random" and not (componentwise_ratio(a, pa, pipiv) <= 1):
                row.problems.append(f"n={n}: the NumPy twin breaks the componentwise backward error bound")

    for n in row.sizes:
        if n <= RANDOM_UP_TO:
            for _ in range(budget.per_size):
                a = rng.standard_normal((n, n)).astype(dtype) if pivoted else column_dominant(n, dtype, rng)
                run(n, a, 0, "random")
        a, lu, ipiv = exact_factors(n, dtype, rng, pivoted)
        run(n, a, 0, "exact", (lu, ipiv))
    for n in _lapack_sizes(row.sizes):
        for imat in range(1, 12):
            if 5 <= imat <= 7 and n < imat - 4:
                continue
            if pivoted:
                a, expected = lapack_ge_matrix(imat, n, dtype, rng)
            elif imat in (5, 6, 7):
                # LAPACK's zero-column placement on a dominant matrix: the zero column stays zero through every
                # update, so an unpivoted kernel meets an exactly zero pivot there first (dchkge's IZERO)
                a, expected = zero_columns(column_dominant(n, dtype, rng), imat)
            else:
                continue     # the other GE types need pivoting; an unpivoted kernel promises nothing on them
            run(n, a, expected, "lapack" if pivoted else "code")
    return finish(row)


def ratio_problems(factor: float, componentwise: float, solve: float) -> list[str]:
    """The worst ratios against the published thresholds: LAPACK TESTING/dtest.in's THRESH for dget01/dget02,
    1 for Higham's componentwise bound (2002, Thm 9.3). Host verify, the lanes check and the target checks
    all judge by this one function."""
    out = []
    if factor >= THRESHOLD:
        out.append(f"factor ratio {factor:.3g} >= {THRESHOLD:g}")
    if componentwise > 1:
        out.append(f"componentwise backward error {componentwise:.3g} x gamma_n > 1")
    if solve >= THRESHOLD:
        out.append(f"solve ratio {solve:.3g} >= {THRESHOLD:g}")
    return out


def finish(row: Row) -> Row:
    """Turn the worst ratios into problems against the published thresholds."""
    row.problems += ratio_problems(row.worst_factor, row.worst_componentwise, row.worst_solve)
    return row


def _lapack_sizes(sizes: list[int]) -> list[int]:
    # LAPACK TESTING/dtest.in runs N = 0, 1, 2, 3, 5, 10, 50; here the kernel's own sizes up to 50
    return [n for n in sizes if n <= 50]


@dataclass(frozen=True)
class Kind:
    """One ABI kind: which kernels it covers, how verify checks them, and the C driver --sanitize builds."""
    name: str
    applies: Callable[[KernelOptions], bool]
    check: Callable[[Subject, Budget, object], Row]
    sanitizer_driver: Callable[[KernelOptions, list[int]], str]


def _general_driver(o: KernelOptions, sizes: list[int]) -> str:
    from derive.check.sanitize import general_driver
    return general_driver(o, sizes)


# First match wins: specific kinds (fixed size, lanes) go before the general one, which takes every kernel.
def _lanes_check(s: Subject, budget: Budget, rng) -> Row:
    from derive.check.verify_lanes import check_lanes
    return check_lanes(s, budget, rng)


def _lanes_driver(o: KernelOptions, sizes: list[int]) -> str:
    from derive.check.verify_lanes import lanes_driver
    return lanes_driver(o, sizes)


KINDS: list[Kind] = [
    Kind("lanes", lambda o: o.lanes > 1, _lanes_check, _lanes_driver),
    Kind("fixed", lambda o: getattr(o, "size", None) is not None, check_fixed, _general_driver),
    Kind("general", lambda o: True, check_general, _general_driver),
]


def kind_of(o: KernelOptions) -> Kind:
    return next(k for k in KINDS if k.applies(o))


# --- the whole run -------------------------------------------------------------------------------------------

def verify(options: list[KernelOptions], directory: Path | None = None, budget: Budget = Budget(),
           progress: Callable[[str], None] | None = None) -> list[Row]:
    """Build the kernels from their files in `directory` and check each (the caller checks drift first); with no
    directory, from what the spec generates now, emitted into a temporary one. Raises BuildError."""
    if directory is None:
        from derive.printers.emit import emit_kernel
        with tempfile.TemporaryDirectory(prefix="luforge-verify-") as tmp:
            for o in options:
                for fname, text in emit_kernel(o).files:
                    (Path(tmp) / fname).write_text(text, encoding="utf-8")
            return _verify_in(options, Path(tmp), budget, progress)
    return _verify_in(options, directory, budget, progress)


def _verify_in(options: list[KernelOptions], directory: Path, budget: Budget,
               progress: Callable[[str], None] | None) -> list[Row]:
    from derive.check.sanitize import sanitize_kernel
    progress = progress or (lambda line: None)
    where = shipped_files(options, directory)
    texts = [(o.name, where[o.name][".c"].read_text(encoding="utf-8"), where[o.name][".h"].read_text(encoding="utf-8"))
             for o in options]
    mods = {}
    for target in dict.fromkeys(o.target for o in options):
        # one module per row of the target table: each needs its own ISA flags
        group = [t for t, o in zip(texts, options) if o.target == target]
        mod = build(group, (*OPT_FLAGS, *budget.cflags, *get_target(target).codegen_flags))
        mods.update({name: mod for name, _, _ in group})
    rows = []
    for i, o in enumerate(options, start=1):
        t0 = time.perf_counter()
        kind = kind_of(o)
        row_target = get_target(o.target)
        if not runs_here(row_target):
            rows.append(Row(o.name, kind.name, [], not_run=f"compiled for {row_target.name}; this CPU lacks "
                                                           f"{', '.join(row_target.cpu_features)}, not run"))
            progress(f"verify [{i}/{len(options)}] {o.name}: compiled, not run here")
            continue
        subject = Subject(o, CKernel(mods[o.name], o), load_python(where[o.name][".py"]))
        rng = np.random.default_rng([budget.seed, i - 1])
        row = kind.check(subject, budget, rng)
        if budget.sanitize:
            row.problems += sanitize_kernel(o, where[o.name][".c"], kind.sanitizer_driver(o, row.sizes),
                                            budget.cflags)
        row.seconds = time.perf_counter() - t0
        rows.append(row)
        progress(f"verify [{i}/{len(options)}] {o.name}: {'pass' if row.passed else 'FAIL'} ({len(set(row.sizes))} "
                 f"sizes up to n={max(row.sizes)}, {row.matrices} matrices, {row.seconds:.1f} s)")
    return rows


def table(rows: list[Row]) -> str:
    head = ("kernel", "sizes tried (n)", "matrices", "worst factor ratio", "worst |PA-LU|/(gamma_n|L||U|)",
            "worst solve ratio", "result")
    body = [(r.name, size_ranges(r.sizes), str(r.matrices), f"{r.worst_factor:.3f}", f"{r.worst_componentwise:.3f}",
             f"{r.worst_solve:.3f}", "pass" if r.passed else "FAIL") if not r.not_run else
            (r.name, "-", "0", "-", "-", "-", "not run") for r in rows]
    widths = [max(len(x) for x in col) for col in zip(head, *body)]
    fmt = "  ".join(f"{{:<{w}}}" for w in widths)
    out = [fmt.format(*row).rstrip() for row in (head, tuple("-" * w for w in widths), *body)]
    for r in rows:
        for p in r.problems[:20]:
            out.append(f"{r.name}: {p}")
        if len(r.problems) > 20:
            out.append(f"{r.name}: ... and {len(r.problems) - 20} more problems")
        if r.not_run:
            out.append(f"{r.name}: {r.not_run}")
    out.append(f"thresholds: factor and solve ratios < {THRESHOLD:g} (LAPACK TESTING/dtest.in), "
               f"componentwise <= 1 (Higham 2002, Thm 9.3); above n={RANDOM_UP_TO} exact factors bit for bit")
    return "\n".join(out) + "\n"
