"""Fixed-size kernels (spec key `size`): every pivot-capable ordering pivoted and every ordering unpivoted, C and
NumPy, against LAPACK (scipy), LAPACK's test ratios and Higham's componentwise bounds; the fixed ABI's codes."""
from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

import refcheck as ref
from conftest import LOOPS, PIVOT_LOOPS, SHORT, build_catalogue
from derive.check.accuracy import solve_componentwise_ratio
from derive.lowering.fixed import lower_fixed
from derive.lowering.ir import Loop, Step, walk
from derive.lowering.lower import lower_kernel
from derive.options import make_options
from derive.spec import SpecError, parse

THRESH = 30.0   # LAPACK TESTING/dtest.in


def _entry(name, loop, block, scalar, layout, pivoting, size):
    return (f'[[kernel]]\nname = "{name}"\nloop = "{loop}"\nblock = {block}\nscalar = "{scalar}"\n'
            f'layout = "{layout}"\npivoting = "{pivoting}"\nsize = {size}\n')


def fixed_spec() -> str:
    """n = 6: every pivot-capable ordering pivoted and every ordering unpivoted, unblocked and blocked by 4 (steps
    of 4 and 2), double column-major and float row-major (and the other two pairings pivoted); n = 1, 16
    (the step loop kept in the factor, the one-column solve unrolled) and 17 for one ordering each."""
    out = []
    pairs = (("double", "column-major"), ("float", "row-major"))
    for loop in PIVOT_LOOPS:
        for block in (1, 4):
            for scalar, layout in pairs + (("float", "column-major"), ("double", "row-major")):
                tag = f"{scalar[0]}{layout[0]}"
                out.append(_entry(f"fp_{SHORT[loop]}_b{block}_{tag}", loop, block, scalar, layout, "partial", 6))
    for loop in LOOPS:
        for block in (1, 4):
            for scalar, layout in pairs:
                tag = f"{scalar[0]}{layout[0]}"
                out.append(_entry(f"fu_{SHORT[loop]}_b{block}_{tag}", loop, block, scalar, layout, "none", 6))
    out.append(_entry("fp_n1", "right-looking", 1, "double", "column-major", "partial", 1))
    out.append(_entry("fp_n16", "right-looking", 1, "double", "column-major", "partial", 16))
    out.append(_entry("fp_n16_cr", "crout", 4, "float", "row-major", "partial", 16))
    out.append(_entry("fp_n17", "left-looking", 1, "double", "column-major", "partial", 17))
    out.append(_entry("fu_n17", "up-looking", 3, "float", "column-major", "none", 17))
    # the branching option (constant_time = false) passes the same checks
    out.append(_entry("fp_br_b1_dc", "right-looking", 1, "double", "column-major", "partial", 6) +
               "constant_time = false\n")
    out.append(_entry("fp_br_b4_sr", "crout", 4, "float", "row-major", "partial", 7) + "constant_time = false\n")
    return "\n".join(out)


NAMES = [line.split('"')[1] for line in fixed_spec().splitlines() if line.startswith("name = ")]
PIVOTED = [n for n in NAMES if n.startswith("fp_")]
UNPIVOTED = [n for n in NAMES if n.startswith("fu_")]


@pytest.fixture(scope="module")
def fixed(tmp_path_factory):
    return build_catalogue(fixed_spec(), "fixed.toml", tmp_path_factory.mktemp("fixed"))


def getrf(a):
    f = scipy.linalg.lapack.sgetrf if a.dtype == np.float32 else scipy.linalg.lapack.dgetrf
    return f(a)


def _solve_checks(k, a, lu, ipiv, rng):
    n = a.shape[0]
    for nrhs in (1, 3):     # the one-column path and the general one
        b = rng.standard_normal((n, nrhs)).astype(k.c.dtype)
        lead = n if k.options.layout == "column-major" else nrhs
        code, x, ok = k.c.solve(lu, b, ipiv, lda=n + 2, ldb=lead + 1)
        assert code == 0 and ok, "solve wrote outside b or changed lu / ipiv"
        assert ref.solve_ratio(a, x, b) < THRESH                                # LAPACK TESTING/LIN/dget02.f
        # the header's promise: Higham 2002, Thm 9.4 with one more rounding per entry for the reciprocals
        assert solve_componentwise_ratio(a, lu, ipiv, x, b, extra=1) <= 1
        xp = b.copy()
        k.py.solve(lu, xp, *([ipiv] if ipiv is not None else []))
        assert ref.solve_ratio(a, xp, b) < THRESH
        assert solve_componentwise_ratio(a, lu, ipiv, xp, b, extra=1) <= 1


@pytest.mark.parametrize("name", PIVOTED)
def test_pivoted_matches_lapack(fixed, name):
    k = fixed[name]
    n = k.options.size
    rng = np.random.default_rng(list(map(ord, name)))
    for trial in range(4):
        a = rng.standard_normal((n, n)).astype(k.c.dtype)
        if trial == 3:      # wide dynamic range: pivots far from the diagonal
            a *= (10.0 ** rng.integers(-6, 7, (n, n))).astype(k.c.dtype)
        info, lu, ipiv, ok = k.c.factor(a, lda=n + trial)
        assert ok, "wrote outside the matrix or ipiv"
        lu_s, piv_s, info_s = getrf(a)
        assert info == info_s == 0
        assert np.array_equal(ipiv, piv_s), "pivot sequence differs from LAPACK getrf"
        assert ref.componentwise_ratio(a, lu, ipiv) <= 1    # Higham 2002, Thm 9.3
        assert ref.factor_ratio(a, lu, ipiv) < THRESH       # LAPACK TESTING/LIN/dget01.f
        pa = a.copy()
        info_p, ipiv_p = k.py.factor(pa, check_invariant=n <= 6)
        assert info_p == 0 and np.array_equal(ipiv_p, ipiv)
        assert ref.componentwise_ratio(a, pa, ipiv_p) <= 1
        _solve_checks(k, a, lu, ipiv, rng)


@pytest.mark.parametrize("name", UNPIVOTED)
def test_unpivoted_on_dominant_matrices(fixed, name):
    """Column diagonally dominant: partial pivoting would make no interchanges (Higham 2002, Thm 9.9, from
    memory), so the factors are LAPACK's and the same bounds hold."""
    k = fixed[name]
    n = k.options.size
    rng = np.random.default_rng(list(map(ord, name)))
    for trial in range(3):
        a = ref.column_dominant(n, k.c.dtype, rng)
        info, lu, _, ok = k.c.factor(a, lda=n + trial)
        assert info == 0 and ok
        _, piv_s, _ = getrf(a)
        assert np.array_equal(piv_s, np.arange(n))
        assert ref.componentwise_ratio(a, lu) <= 1           # Higham 2002, Thm 9.3
        assert ref.factor_ratio(a, lu) < THRESH              # LAPACK TESTING/LIN/dget01.f
        pa = a.copy()
        assert k.py.factor(pa, check_invariant=n <= 6) == 0
        assert ref.componentwise_ratio(a, pa) <= 1
        _solve_checks(k, a, lu, None, rng)


@pytest.mark.parametrize("name", PIVOTED)
def test_exact_zero_pivots(fixed, name):
    """getrf's convention: the first exactly zero pivot is reported as k+1 and the factorization completed; a
    zero column (LAPACK dchkge type 5 for the first) and an integer matrix meeting a zero pivot later give
    getrf's code and pivots."""
    k = fixed[name]
    n = k.options.size
    rng = np.random.default_rng(7)
    cases = []
    for col in sorted({0, n // 2, n - 1}):
        a = rng.standard_normal((n, n)).astype(k.c.dtype)
        a[:, col] = 0
        cases.append(a)
    a = ref.zero_pivot_matrix(n, n - 1, k.c.dtype, rng)   # exact all the way: U(n-1, n-1) = 0 (for any P)
    cases.append(a)
    for a in cases:
        info, lu, ipiv, ok = k.c.factor(a)
        lu_s, piv_s, info_s = getrf(a)
        assert ok and info == info_s > 0
        assert np.array_equal(ipiv, piv_s)
        assert np.all(np.isfinite(lu))
        pa = a.copy()
        info_p, ipiv_p = k.py.factor(pa)
        assert info_p == info and np.array_equal(ipiv_p, ipiv)


@pytest.mark.parametrize("name", UNPIVOTED)
def test_unpivoted_zero_pivot_stops(fixed, name):
    k = fixed[name]
    n = k.options.size
    rng = np.random.default_rng(11)
    for z in sorted({0, n // 2, n - 1}):
        a = ref.zero_pivot_matrix(n, z, k.c.dtype, rng)
        info, lu, _, ok = k.c.factor(a, lda=n + 1)
        assert info == z + 1 and ok
        assert np.all(np.isfinite(lu))
        b = a.copy()
        assert k.py.factor(b) == z + 1


@pytest.mark.parametrize("name", PIVOTED)
def test_nan_and_inf(fixed, name):
    """Documented: a NaN is chosen as pivot only in first place of its column (getrf's idamax compares with
    '>' too, reference BLAS idamax.f); nothing outside the arguments is written, ipiv stays in range, and the
    C and NumPy kernels choose the same pivots."""
    k = fixed[name]
    n = k.options.size
    rng = np.random.default_rng(5)
    for bad in (np.nan, np.inf):
        for where in sorted({(0, 0), (n - 1, 0), (n // 2, n - 1)}):
            a = rng.standard_normal((n, n)).astype(k.c.dtype)
            a[where] = bad
            info, lu, ipiv, ok = k.c.factor(a, lda=n + 2)
            assert ok and 0 <= info <= n
            assert not np.all(np.isfinite(lu))
            assert np.all((ipiv >= np.arange(n)) & (ipiv < n))
            pa = a.copy()
            with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
                _, ipiv_p = k.py.factor(pa)
            assert np.array_equal(ipiv_p, ipiv)
            code, _, ok = k.c.solve(lu, np.ones((n, 1), k.c.dtype), ipiv)
            assert code == 0 and ok


def test_fixed_abi_codes(fixed):
    """Codes by position of the fixed ABI: NAME(a, lda, ipiv), NAME_solve(nrhs, lu, lda, ipiv, b, ldb)."""
    for name in ("fp_ri_b1_dc", "fu_ri_b1_dc"):
        k = fixed[name]
        ffi, T, n = k.c.ffi, k.c.ctype, k.options.size
        buf = np.zeros(n * n, dtype=k.c.dtype)
        piv = np.zeros(n, dtype=np.intc)
        p, ip = ffi.cast(f"{T} *", buf.ctypes.data), ffi.cast("int *", piv.ctypes.data)
        cp, cip = ffi.cast(f"const {T} *", buf.ctypes.data), ffi.cast("const int *", piv.ctypes.data)
        f, s = k.c._factor, k.c._solve
        pv = (ip,) if k.c.pivoted else ()
        cpv = (cip,) if k.c.pivoted else ()
        assert f(ffi.NULL, n, *pv) == -1
        assert f(p, n - 1, *pv) == -2
        if k.c.pivoted:
            assert f(p, n, ffi.NULL) == -3
        o = 1 if k.c.pivoted else 0
        assert s(-1, cp, n, *cpv, p, n) == -1
        assert s(1, ffi.NULL, n, *cpv, p, n) == -2
        assert s(1, cp, n - 1, *cpv, p, n) == -3
        if k.c.pivoted:
            assert s(1, cp, n, ffi.NULL, p, n) == -4
            piv[2] = n      # a corrupted pivot entry is refused before b is touched
            assert s(1, cp, n, cip, p, n) == -4
            piv[2] = 0
        assert s(1, cp, n, *cpv, ffi.NULL, n) == -4 - o
        assert s(1, cp, n, *cpv, p, n - 1) == -5 - o
        assert s(0, cp, n, *cpv, ffi.NULL, n) == 0
        assert not buf.any()


def test_header_and_comments(fixed, tmp_path):
    """The fixed header declares the fixed ABI and NAME_N; each unrolled step opens with the loop invariant."""
    from derive.printers.emit import emit_kernel
    o = make_options("tide_fix", "crout", 1, scalar="float", pivoting="partial", size=5)
    files = dict(emit_kernel(o).files)
    h, c = files["tide_fix.h"], files["tide_fix.c"]
    assert "#define TIDE_FIX_N 5" in h
    assert "int tide_fix(float *a, int lda, int *ipiv);" in h
    assert "int tide_fix_solve(int nrhs, const float *lu, int lda, const int *ipiv, float *b, int ldb);" in h
    factor = c[c.index("int tide_fix(float *a"):c.index("int tide_fix_solve(")]
    assert factor.count("loop invariant, crout") == 5 and "for (size_t k" not in factor   # one per step


@pytest.mark.parametrize("loop", LOOPS)
@pytest.mark.parametrize("block", (1, 2, 3, 5))
def test_every_ordering_and_block_lowers(loop, block):
    """Every ordering and block size is derivable at a fixed size: the lowering unrolls the same IR into
    ceil(n / block) steps with constant ranges (n <= MAX_EXTENT_FACTOR) and keeps the loop beyond."""
    from derive.lowering.fixed import MAX_EXTENT_FACTOR
    for n, pivoting in ((7, "none"), (MAX_EXTENT_FACTOR, "partial"), (16, "partial"), (20, "partial")):
        if pivoting == "partial" and loop not in PIVOT_LOOPS:
            continue
        o = make_options("f", loop, block, pivoting=pivoting, size=n)
        factor = lower_fixed(lower_kernel(o), o).routine("f")
        steps = [s for s in factor.body if isinstance(s, Step)]
        if n <= MAX_EXTENT_FACTOR:
            assert len(steps) == -(-n // block) and not any(isinstance(s, Loop) for s in walk(factor.body))
        else:
            assert not steps and isinstance(factor.body[0], Loop)


@pytest.mark.parametrize("bad", ["0", "33", '"8"', "true", "2.5"])
def test_size_is_checked(bad):
    with pytest.raises(SpecError) as e:
        parse(f'[[kernel]]\nname = "k"\nloop = "crout"\nsize = {bad}\n', "s.toml")
    assert "key 'size'" in str(e.value) and "from 1 to 32" in str(e.value)


@pytest.mark.parametrize("extra", ['constant_time = 1\nsize = 4\npivoting = "partial"',
                                   'constant_time = false\npivoting = "partial"',
                                   'constant_time = false\nsize = 4'])
def test_constant_time_is_checked(extra):
    with pytest.raises(SpecError) as e:
        parse(f'[[kernel]]\nname = "k"\nloop = "crout"\n{extra}\n', "s.toml")
    assert "key 'constant_time'" in str(e.value)


def test_ir_dump_shows_the_steps(tmp_path):
    """`luforge derive --spec --kernel --ir` dumps a fixed-size kernel's IR after the size lowering."""
    import subprocess
    import sys
    spec = tmp_path / "s.toml"
    spec.write_text('[[kernel]]\nname = "tide_fix"\nloop = "crout"\nblock = 2\npivoting = "partial"\nsize = 4\n')
    out = subprocess.run([sys.executable, "-m", "derive", "derive", "--spec", str(spec), "--kernel", "tide_fix",
                          "--ir"], capture_output=True, text=True, check=True).stdout
    assert "every routine (n = 4)" in out and "routine tide_fix(a, lda, ipiv)" in out
    assert out.count("step k = ") == 2 + 2 + 2      # the factor, then the one-column forward and backward solves
    assert "by selects" in out and "when nrhs = 1" in out


def test_emission_is_the_same_from_several_threads():
    """`luforge tune` on an emulated target emits and measures two kernels at once (one thread each). The C text
    of a kernel must not depend on what another thread prints meanwhile: a printer setting kept in a module
    global once made the one-column solve come out unrolled or not by chance, and so the instruction counts.
    Frequent thread switches make such interference show up in every run (it did: 17 of 40 texts differed)."""
    import sys
    from concurrent.futures import ThreadPoolExecutor

    from derive.printers.emit import emit_kernel
    text = "".join(_entry(f"th_{SHORT[loop]}_b{b}_{n}", loop, b, "float", "column-major", "partial", n)
                   for loop in PIVOT_LOOPS for b in (1, 2) for n in (3, 4, 5))
    opts = parse(text, "threads.toml")
    alone = {o.name: emit_kernel(o).files for o in opts}
    old = sys.getswitchinterval()
    sys.setswitchinterval(1e-6)
    try:
        with ThreadPoolExecutor(4) as pool:
            together = list(pool.map(lambda o: (o.name, emit_kernel(o).files), opts * 2))
    finally:
        sys.setswitchinterval(old)
    assert [name for name, files in together if files != alone[name]] == []
