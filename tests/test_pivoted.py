"""Property tests of every pivoted kernel (each pivot-capable ordering x block 1, 4, 16, 5 x inner x scalar x
layout), C and NumPy, against LAPACK (scipy) and LAPACK's own GE test procedure."""
from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
from hypothesis import given, settings
from hypothesis import strategies as st

import refcheck as ref
from derive.check.accuracy import solve_componentwise_ratio
from conftest import names

KERNELS = names("pivoted")
THRESH = 30.0   # LAPACK TESTING/dtest.in


def getrf(a):
    f = scipy.linalg.lapack.sgetrf if a.dtype == np.float32 else scipy.linalg.lapack.dgetrf
    lu, piv, info = f(a)
    return lu, piv, info


@pytest.mark.parametrize("name", KERNELS)
@settings(max_examples=6)
@given(n=st.integers(0, 64), pad=st.integers(0, 4), seed=st.integers(0, 2 ** 32 - 1))
def test_matches_lapack_getrf(pivoted, name, n, pad, seed):
    k = pivoted[name]
    rng = np.random.default_rng(seed)
    a = rng.standard_normal((n, n)).astype(k.c.dtype)
    info, lu, ipiv, ok = k.c.factor(a, lda=max(1, n) + pad)
    assert ok, "wrote outside the matrix or ipiv"
    assert info == 0
    if n == 0:
        return
    lu_s, piv_s, info_s = getrf(a)
    # same pivot rule as getrf (first entry of largest magnitude); getrf's ipiv is 1-based
    assert np.array_equal(ipiv, piv_s), "pivot sequence differs from LAPACK getrf"
    L, U = ref.unpack(lu_s)
    # the exact factors are unknown; the bound is formed around getrf's, which differ from them by a
    # second-order amount (the same pivots were checked above, so both factor the same P A)
    tol_l, tol_u = ref.factor_tolerance(L, U, k.c.dtype)
    Lh, Uh = ref.unpack(lu)
    # both computed factors lie within the perturbation bound of the exact ones: twice it of each other
    assert np.max(np.abs(Lh - L)) <= 2 * tol_l
    assert np.max(np.abs(Uh - U)) <= 2 * tol_u
    assert ref.componentwise_ratio(a, lu, ipiv) <= 1    # Higham 2002, Thm 9.3 (for P A)
    assert ref.factor_ratio(a, lu, ipiv) < THRESH       # LAPACK TESTING/LIN/dget01.f


@pytest.mark.parametrize("name", KERNELS)
@settings(max_examples=5)
@given(n=st.integers(1, 48), nrhs=st.integers(0, 5), pad=st.integers(0, 3), seed=st.integers(0, 2 ** 32 - 1))
def test_solve_matches_lu_solve(pivoted, name, n, nrhs, pad, seed):
    k = pivoted[name]
    rng = np.random.default_rng(seed)
    a = rng.standard_normal((n, n)).astype(k.c.dtype)
    b = rng.standard_normal((n, nrhs)).astype(k.c.dtype)
    info, lu, ipiv, _ = k.c.factor(a)
    assert info == 0
    lead = n if k.options.layout == "column-major" else nrhs
    code, x, ok = k.c.solve(lu, b, ipiv, lda=n + pad, ldb=max(1, lead) + pad)
    assert code == 0 and ok, "solve wrote outside b or changed lu / ipiv"
    if nrhs == 0:
        return
    assert ref.solve_ratio(a, x, b) < THRESH          # LAPACK TESTING/LIN/dget02.f
    xs = scipy.linalg.lu_solve(scipy.linalg.lu_factor(a), b)
    # normwise forward error of each: kappa * eta / (1 - kappa * eta), eta = gamma_3n || |L||U| || / ||A||
    # (Higham 2002, Thm 9.4 for the backward error, Thm 7.2 for the forward error; theorem numbers from memory)
    L, U = ref.unpack(lu)
    kappa = np.linalg.cond(a.astype(np.float64), np.inf)
    eta = ref.gamma(3 * n, k.c.dtype) * np.linalg.norm(np.abs(L) @ np.abs(U), np.inf) / np.linalg.norm(
        a.astype(np.float64), np.inf)
    if kappa * eta < 0.5:
        bound = 2 * kappa * eta / (1 - kappa * eta)
        rel = np.max(np.abs(x - xs), axis=0) / np.maximum(np.max(np.abs(xs), axis=0), np.finfo(k.c.dtype).tiny)
        assert np.all(rel <= bound)
    xp = b.copy()
    k.py.solve(lu, xp, ipiv)
    assert ref.solve_ratio(a, xp, b) < THRESH


UNBLOCKED = [name for name in KERNELS if "_b1_" in name]


@pytest.mark.parametrize("name", UNBLOCKED)
@settings(max_examples=4)
@given(n=st.integers(1, 40), seed=st.integers(0, 2 ** 32 - 1))
def test_one_column_solve_is_the_general_one(pivoted, name, n, seed):
    """The one-right-hand-side path (a second path in the emitted solve) does the general path's arithmetic:
    with b column-major (its loops along the column either way) x from nrhs = 1 equals, bit for bit, each
    column of an nrhs = 2 solve of the same column twice; with b row-major a row's products are summed before
    they are subtracted, so it meets Higham's componentwise bound (2002, Thm 9.4) instead. Both meet LAPACK's
    dget02 ratio (TESTING/LIN/dget02.f)."""
    k = pivoted[name]
    rng = np.random.default_rng(seed)
    a = rng.standard_normal((n, n)).astype(k.c.dtype)
    b = rng.standard_normal((n, 1)).astype(k.c.dtype)
    info, lu, ipiv, _ = k.c.factor(a)
    assert info == 0
    code, x1, ok = k.c.solve(lu, b, ipiv)
    assert code == 0 and ok
    code, x2, ok = k.c.solve(lu, np.hstack([b, b]), ipiv)
    assert code == 0 and ok
    assert np.array_equal(x2[:, 0], x2[:, 1])
    if k.options.layout == "column-major":
        assert np.array_equal(x1[:, 0], x2[:, 0])
    assert solve_componentwise_ratio(a, lu, ipiv, x1[:, 0], b[:, 0]) <= 1
    assert ref.solve_ratio(a, x1, b) < THRESH


def test_one_column_path_follows_the_target_row():
    """The target table decides whether the one-column path is worth its code: the host rows take it, the
    microcontroller rows (code size first) do not; a blocked solve never does."""
    from derive.options import make_options
    from derive.printers.emit import emit_kernel
    from derive.targets.table import TARGETS

    def solve_text(target: str, block: int = 1) -> str:
        o = make_options("oc", "right-looking", block, scalar="float", pivoting="partial", target=target)
        c = dict(emit_kernel(o).files)["oc.c"]
        return c[c.index("int oc_solve("):]

    assert "if (NRHS == 1U)" in solve_text("generic")
    assert "if (NRHS == 1U)" not in solve_text("generic", block=4)
    for name, row in TARGETS.items():
        assert ("if (NRHS == 1U)" in solve_text(name)) == row.one_column_solve
    assert not TARGETS["cortex-m4f"].one_column_solve and TARGETS["host"].one_column_solve


# LAPACK TESTING/LIN/dchkge.f matrix types (built as dlatb4.f / dlatms.f do; see refcheck)
SINGULAR = {5, 6, 7}


@pytest.mark.parametrize("name", KERNELS)
def test_lapack_ge_matrix_types(pivoted, name):
    k = pivoted[name]
    rng = np.random.default_rng(2002)
    for n in (1, 2, 3, 5, 10, 17, 33):
        for imat in range(1, 12):
            if imat in SINGULAR and n < imat - 4:
                continue     # dchkge skips these (the zeroed columns do not fit)
            a, expected = ref.lapack_ge_matrix(imat, n, k.c.dtype, rng)
            info, lu, ipiv, ok = k.c.factor(a, lda=n + 2)
            assert ok
            assert info == expected, f"type {imat} n={n}: code {info}, LAPACK's test expects {expected}"
            r = ref.factor_ratio(a, lu, ipiv)
            assert r < THRESH, f"type {imat} n={n}: dget01 ratio {r}"
            if imat in SINGULAR:
                continue
            b = rng.standard_normal((n, 2)).astype(k.c.dtype) * (np.max(np.abs(a)) or 1)
            code, x, ok = k.c.solve(lu, b, ipiv)
            assert code == 0 and ok
            s = ref.solve_ratio(a, x, b)
            assert s < THRESH, f"type {imat} n={n}: dget02 ratio {s}"


@pytest.mark.parametrize("name", KERNELS)
def test_wilkinson_growth(pivoted, name):
    """Unit diagonal, -1 below, last column of ones: partial pivoting makes no interchanges (every tie goes
    to the diagonal) and U(n-1, n-1) = 2^(n-1) exactly (Higham 2002, §9.4; Wilkinson 1961). Exact in every
    summation order while each partial sum of the last column, an integer below 2^(n-1), fits the significand:
    n - 1 <= 24 (float) or 53 (double); beyond that a dot-product ordering may round, a rank-1 one need not."""
    k = pivoted[name]
    top = 25 if k.c.dtype == np.float32 else 54
    for n in (1, 2, 7, 24, top):
        a = ref.wilkinson_growth(n).astype(k.c.dtype)
        info, lu, ipiv, _ = k.c.factor(a)
        assert info == 0
        assert np.array_equal(ipiv, np.arange(n))
        assert lu[n - 1, n - 1] == 2.0 ** (n - 1)
        pa = a.copy()
        info_p, ipiv_p = k.py.factor(pa)
        assert info_p == 0 and np.array_equal(ipiv_p, ipiv) and pa[n - 1, n - 1] == 2.0 ** (n - 1)


@pytest.mark.parametrize("name", KERNELS)
@settings(max_examples=3)
@given(n=st.integers(0, 20), seed=st.integers(0, 2 ** 32 - 1))
def test_python_invariant_agrees_with_c(pivoted, name, n, seed):
    k = pivoted[name]
    a = np.random.default_rng(seed).standard_normal((n, n)).astype(k.c.dtype)
    pa = a.copy()
    info_p, ipiv_p = k.py.factor(pa, check_invariant=True)
    info_c, lu, ipiv_c, _ = k.c.factor(a)
    assert info_p == info_c == 0
    assert np.array_equal(ipiv_p, ipiv_c)
    assert ref.componentwise_ratio(a, pa, ipiv_p) <= 1    # Higham 2002, Thm 9.3
    if n:
        L, U = ref.unpack(lu)
        tol_l, tol_u = ref.factor_tolerance(L, U, k.c.dtype)   # around the C factors, as above around getrf's
        Lp, Up = ref.unpack(pa)
        # both within the perturbation bound of the exact factors of P A: within twice it of each other
        assert np.max(np.abs(Lp - L)) <= 2 * tol_l and np.max(np.abs(Up - U)) <= 2 * tol_u


@pytest.mark.parametrize("name", KERNELS)
def test_zero_pivot_recorded_and_completed(pivoted, name):
    """LAPACK getrf's convention: the first exactly zero pivot is reported as k+1 and the factorization goes on;
    with the first column zero (dchkge type 5) that is 1 and the rest matches getrf."""
    k = pivoted[name]
    a, expected = ref.lapack_ge_matrix(5, 9, k.c.dtype, np.random.default_rng(3))
    info, lu, ipiv, _ = k.c.factor(a)
    lu_s, piv_s, info_s = getrf(a)
    assert info == expected == info_s == 1
    assert np.array_equal(ipiv, piv_s)
    assert np.all(np.isfinite(lu))
    assert ref.factor_ratio(a, lu, ipiv) < THRESH
    pa = a.copy()
    info_p, ipiv_p = k.py.factor(pa, check_invariant=True)
    assert info_p == 1 and np.array_equal(ipiv_p, ipiv)


@pytest.mark.parametrize("name", KERNELS[::3])
def test_nan_and_inf_stay_inside(pivoted, name):
    """NaN or Inf in the input: no crash, nothing written outside the arguments, a code from 0 to n, and the
    non-finite value shows up in the factors (it is not silently dropped)."""
    k = pivoted[name]
    rng = np.random.default_rng(5)
    for bad in (np.nan, np.inf, -np.inf):
        for where in ((0, 0), (3, 1), (6, 6)):
            a = rng.standard_normal((7, 7)).astype(k.c.dtype)
            a[where] = bad
            info, lu, ipiv, ok = k.c.factor(a, lda=9)
            assert ok and 0 <= info <= 7
            assert not np.all(np.isfinite(lu))
            assert np.all((ipiv >= np.arange(7)) & (ipiv < 7))
            code, x, ok = k.c.solve(lu, np.ones((7, 2), k.c.dtype), ipiv)
            assert code == 0 and ok


@pytest.mark.parametrize("name", KERNELS)
def test_bad_arguments(pivoted, name):
    k = pivoted[name]
    ffi = k.c.ffi
    T = k.c.ctype
    buf = np.zeros(16, dtype=k.c.dtype)
    piv = np.zeros(4, dtype=np.intc)
    p, ip = ffi.cast(f"{T} *", buf.ctypes.data), ffi.cast("int *", piv.ctypes.data)
    f, s = k.c._factor, k.c._solve
    assert f(-1, p, 1, ip) == -1
    assert f(3, ffi.NULL, 3, ip) == -2
    assert f(3, p, 2, ip) == -3
    assert f(3, p, 3, ffi.NULL) == -4
    assert f(0, ffi.NULL, 1, ffi.NULL) == 0
    cp, cip = ffi.cast(f"const {T} *", buf.ctypes.data), ffi.cast("const int *", piv.ctypes.data)
    row = k.options.layout == "row-major"
    assert s(-1, 1, cp, 1, cip, p, 1) == -1
    assert s(2, -1, cp, 2, cip, p, 2) == -2
    assert s(2, 1, ffi.NULL, 2, cip, p, 2) == -3
    assert s(2, 1, cp, 1, cip, p, 2) == -4
    assert s(2, 1, cp, 2, ffi.NULL, p, 2) == -5
    assert s(2, 1, cp, 2, cip, ffi.NULL, 2) == -6
    assert s(2, 3, cp, 2, cip, p, 2 if row else 1) == -7     # ldb >= max(1, n) or max(1, nrhs) row-major
    assert s(2, 0, cp, 2, cip, ffi.NULL, 2 if not row else 1) == 0
    assert not buf.any() and not piv.any()
    for bad in (-1, 2):      # a corrupted pivot entry is refused before b is touched
        piv[1] = bad
        assert s(2, 1, cp, 2, cip, p, 2) == -5
    assert not buf.any()
