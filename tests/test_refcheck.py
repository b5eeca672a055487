# Tests for tests/refcheck.py: the metrics and generators are checked against outside facts
# (LAPACK via SciPy, exact rational arithmetic, published matrix identities) before they judge kernels.
import math
import os
import sys
from fractions import Fraction

import numpy as np
import pytest
import scipy.linalg as sl
import scipy.linalg.lapack as la

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import refcheck as rc  # noqa: E402

DTYPES = [np.float64, np.float32]
GETRF = {np.float64: la.dgetrf, np.float32: la.sgetrf}
GETRS = {np.float64: la.dgetrs, np.float32: la.sgetrs}
LAMCH = {np.float64: la.dlamch, np.float32: la.slamch}

# LAPACK TESTING/dtest.in: "30.0  Threshold value of test ratio".
THRESH = 30.0

# What float64 residuals must be formed in: x87 long double (64-bit significand) where
# NumPy has it, else double-double (~2*53 bits); fixed here, not taken from refcheck.
_WIDE_U64 = 2.0 ** -64 if np.finfo(np.longdouble).nmant >= 63 else 2.0 ** -104


def _exact(x):
    """Exact rational value of a float / longdouble."""
    return Fraction(*x.as_integer_ratio()) if hasattr(x, "as_integer_ratio") else Fraction(x)


# ---------------------------------------------------------------------------
# constants
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("dt", DTYPES)
def test_unit_roundoff_matches_lapack_dlamch(dt):
    # LAPACK's own DLAMCH('E') / SLAMCH('E'), as compiled into SciPy.
    assert rc.unit_roundoff(dt) == float(LAMCH[dt]("E"))
    assert rc.unit_roundoff(dt) == {np.float64: 2.0 ** -53, np.float32: 2.0 ** -24}[dt]


def test_gamma():
    u = 2.0 ** -53
    for n in (0, 1, 7, 1000):
        assert rc.gamma(n, np.float64) == n * u / (1 - n * u)
    assert rc.gamma(3, np.float32) == 3 * 2.0 ** -24 / (1 - 3 * 2.0 ** -24)
    with pytest.raises(ValueError):
        rc.gamma(2 ** 11, np.float16)  # n u = 1: Lemma 3.1's hypothesis fails


# ---------------------------------------------------------------------------
# unpack / apply_swaps against SciPy's P, L, U
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("shape", [(6, 6), (7, 4), (4, 7)])
def test_unpack_and_swaps_match_scipy_lu(shape):
    rng = np.random.default_rng(10)
    a = rng.standard_normal(shape)
    lu, piv, info = la.dgetrf(a)
    assert info == 0
    P, L0, U0 = sl.lu(a)  # a = P @ L0 @ U0
    L, U = rc.unpack(lu)
    assert np.array_equal(L, L0) and np.array_equal(U, U0)
    assert np.array_equal(rc.apply_swaps(a, piv), P.T @ a)
    assert np.array_equal(rc.apply_swaps(a, None), a)


def test_apply_swaps_is_sequential_and_copies():
    a = np.arange(4.0)[:, None]
    out = rc.apply_swaps(a, [2, 2, 3, 3])
    # (0 2) then (1 2) then (2 3): rows 0,1,2,3 -> 2,0,3,1
    assert out[:, 0].tolist() == [2.0, 0.0, 3.0, 1.0]
    assert a[:, 0].tolist() == [0.0, 1.0, 2.0, 3.0]
    with pytest.raises(ValueError):
        rc.apply_swaps(a, [4])


# ---------------------------------------------------------------------------
# the wide-precision residual against exact rational arithmetic
# ---------------------------------------------------------------------------

def _exact_residual(c, p, q):
    m, k = p.shape
    n = q.shape[1]
    P = [[_exact(p[i, t]) for t in range(k)] for i in range(m)]
    Q = [[_exact(q[t, j]) for j in range(n)] for t in range(k)]
    return [[_exact(c[i, j]) - sum(P[i][t] * Q[t][j] for t in range(k)) for j in range(n)]
            for i in range(m)]


def _residual_error_ok(c, p, q, r, mode):
    """|r - exact| <= u_out |exact| + gamma_{k+1}^ext (|c| + |p||q|), entrywise."""
    # Inner-product error bound (Higham 2002, eq. (3.4)/(3.5), from memory) applied in
    # the wide format, plus the one rounding of the stored result.
    k = p.shape[1]
    # Unit roundoff each mode is meant to deliver: float64, x87 long double, double-double.
    ue = {"f64": 2.0 ** -53, "ld": 2.0 ** -64, "dd": 2.0 ** -104}[mode]
    g = Fraction((k + 1) * ue) / (1 - Fraction((k + 1) * ue))
    u_out = Fraction(rc.unit_roundoff(r.dtype))
    ex = _exact_residual(c, p, q)
    absb = np.abs(c.astype(np.float64)) + np.abs(p.astype(np.float64)) @ np.abs(q.astype(np.float64))
    ok = True
    for i in range(c.shape[0]):
        for j in range(c.shape[1]):
            err = abs(_exact(r[i, j]) - ex[i][j])
            # absb was summed in float64; (1 + 2k u64) covers that rounding (same bound).
            bound = u_out * abs(ex[i][j]) + g * _exact(absb[i, j]) * (1 + Fraction(2 * k, 2 ** 53))
            ok &= err <= bound
    return ok


@pytest.mark.parametrize("mode", ["ld", "dd"])
def test_wide_residual_is_accurate_float64(mode):
    if mode == "ld" and np.finfo(np.longdouble).nmant < 63:
        pytest.skip("no extended long double on this platform")
    rng = np.random.default_rng(11)
    p = rng.standard_normal((20, 20))
    q = rng.standard_normal((20, 20))
    c = p @ q  # residual of the size of float64 rounding: the hard case
    c2, p2, q2, r, _ = rc._residual(c, p, q, mode)
    assert _residual_error_ok(c, p, q, r, mode)
    # The same check rejects a plain float64 evaluation, so it has teeth.
    assert not _residual_error_ok(c, p, q, c - p @ q, "ld")


def test_wide_residual_dd_with_rescaling():
    # Near-overflow data force the power-of-two rescaling path of the double-double code.
    rng = np.random.default_rng(12)
    p = rng.standard_normal((8, 8)) * 2.0 ** 600
    q = rng.standard_normal((8, 8)) * 2.0 ** 390
    c = p @ q
    c2, p2, q2, r, _ = rc._residual(c, p, q, "dd")
    sp, sq = p2[0, 0] / p[0, 0], q2[0, 0] / q[0, 0]
    # Exact power-of-two rescaling, c by both factors, so every ratio is unchanged.
    assert math.frexp(sp)[0] == 0.5 and math.frexp(sq)[0] == 0.5
    assert np.array_equal(p2, p * sp) and np.array_equal(q2, q * sq)
    assert np.array_equal(c2, (c * sp) * sq)
    assert np.abs(p2).max() <= 1 and np.abs(q2).max() <= 1
    assert _residual_error_ok(c2, p2, q2, r, "dd")


def test_wide_residual_float32_data_in_float64():
    rng = np.random.default_rng(13)
    p = rng.standard_normal((15, 15)).astype(np.float32)
    q = rng.standard_normal((15, 15)).astype(np.float32)
    c = (p @ q).astype(np.float32)
    _, _, _, r, _ = rc._residual(c, p, q, "f64")
    assert r.dtype == np.float64
    assert _residual_error_ok(c, p, q, r, "f64")


# ---------------------------------------------------------------------------
# factor_ratio (dget01)
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("dt", DTYPES)
@pytest.mark.parametrize("n", [1, 5, 60, 150])
def test_factor_ratio_small_for_lapack_and_large_when_perturbed(dt, n):
    rng = np.random.default_rng(20 + n)
    a = rng.standard_normal((n, n)).astype(dt)
    lu, piv, info = GETRF[dt](a)
    r0 = rc.factor_ratio(a, lu, piv)
    assert r0 < THRESH
    # One entry moved by 100 n ||A||_1 eps raises that column's residual norm to at
    # least 100 - r0 in ratio units.
    eps = rc.unit_roundoff(dt)
    bad = lu.astype(np.float64)
    bad[n - 1, n - 1] += 100 * n * np.abs(a.astype(np.float64)).sum(axis=0).max() * eps
    assert rc.factor_ratio(a, bad.astype(dt), piv) > THRESH
    if n > 1:
        assert rc.factor_ratio(a, lu, None) > THRESH  # pivots forgotten


def test_factor_ratio_matches_exact_dget01():
    rng = np.random.default_rng(21)
    n = 12
    a = rng.standard_normal((n, n))
    lu, piv, _ = la.dgetrf(a)
    L, U = rc.unpack(lu)
    pa = rc.apply_swaps(a, piv)
    ex = _exact_residual(pa, L, U)
    resid = max(sum(abs(ex[i][j]) for i in range(n)) for j in range(n))
    anorm = max(sum(abs(_exact(pa[i, j])) for i in range(n)) for j in range(n))
    u = Fraction(2) ** -53
    exact_ratio = resid / (n * anorm * u)
    # Each residual entry is within gamma_{n+1}^ext (|PA| + |L||U|)_ij of the exact one
    # (inner-product bound, Higham 2002 eq. (3.4), from memory), so the column sums move
    # by at most gamma^ext (||A||_1 + || |L||U| ||_1); the final divisions add O(u).
    ue = _WIDE_U64
    g_ext = (n + 1) * ue / (1 - (n + 1) * ue)
    absLU = np.abs(L) @ np.abs(U)
    tol = 2 * g_ext * (float(anorm) + absLU.sum(axis=0).max()) / (n * float(anorm) * 2.0 ** -53)
    got = rc.factor_ratio(a, lu, piv)
    assert abs(got - float(exact_ratio)) <= tol + 4 * 2.0 ** -53 * float(exact_ratio)


def test_factor_ratio_dget01_special_cases():
    z = np.zeros((3, 3))
    assert rc.factor_ratio(z, z) == 0.0
    lu = np.zeros((3, 3))
    lu[0, 0] = 1e-300
    assert rc.factor_ratio(z, lu) == 1.0 / 2.0 ** -53  # dget01: ANORM = 0, RESID != 0
    assert rc.factor_ratio(np.zeros((0, 0)), np.zeros((0, 0))) == 0.0
    assert rc.factor_ratio(z.astype(np.float32), lu.astype(np.float32) + 1) == 2.0 ** 24


def test_factor_ratio_rectangular():
    rng = np.random.default_rng(22)
    for shape in ((9, 4), (4, 9)):
        a = rng.standard_normal(shape)
        lu, piv, _ = la.dgetrf(a)
        assert rc.factor_ratio(a, lu, piv) < THRESH
        assert rc.componentwise_ratio(a, lu, piv) <= 1.0


# ---------------------------------------------------------------------------
# solve_ratio (dget02)
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("dt", DTYPES)
def test_solve_ratio(dt):
    rng = np.random.default_rng(30)
    n, nrhs = 40, 3
    a = rng.standard_normal((n, n)).astype(dt)
    b = rng.standard_normal((n, nrhs)).astype(dt)
    lu, piv, _ = GETRF[dt](a)
    x, info = GETRS[dt](lu, piv, b)
    assert info == 0
    r0 = rc.solve_ratio(a, x, b)
    assert r0 < THRESH
    assert rc.solve_ratio(a, x[:, 0], b[:, 0]) <= r0  # 1-D vectors accepted
    bad = x.astype(np.float64)
    bad[0, 1] += 1e4 * rc.unit_roundoff(dt) * np.abs(bad[:, 1]).sum()
    assert rc.solve_ratio(a, bad.astype(dt), b) > THRESH


def test_solve_ratio_dget02_special_cases():
    a = np.eye(3)
    b = np.ones((3, 2))
    x = np.ones((3, 2))
    assert rc.solve_ratio(a, x, b) == 0.0
    x0 = x.copy()
    x0[:, 1] = 0.0
    assert rc.solve_ratio(a, x0, b) == 2.0 ** 53  # zero solution column: 1/EPS
    assert rc.solve_ratio(np.zeros((3, 3)), x, b) == 2.0 ** 53  # ANORM = 0: 1/EPS
    assert rc.solve_ratio(a, np.zeros((3, 0)), np.zeros((3, 0))) == 0.0
    xn = x.copy()
    xn[0, 0] = np.nan
    assert math.isnan(rc.solve_ratio(a, xn, b))


# ---------------------------------------------------------------------------
# componentwise_ratio (Higham Thm 9.3)
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("dt", DTYPES)
@pytest.mark.parametrize("n", [2, 30, 150])
def test_componentwise_ratio_lapack_passes_and_perturbation_fails(dt, n):
    rng = np.random.default_rng(40 + n)
    a = rng.standard_normal((n, n)).astype(dt)
    lu, piv, _ = GETRF[dt](a)
    assert rc.componentwise_ratio(a, lu, piv) <= 1.0
    L, U = rc.unpack(lu.astype(np.float64))
    den = (np.abs(L) @ np.abs(U))[n - 1, n - 1]
    # Moving U[n-1,n-1] by 4 gamma_n (|L||U|)_{n-1,n-1} changes that residual entry by the
    # same amount (L[n-1,n-1] = 1): the ratio becomes >= (4 - 1)/(1 + 4 gamma_n) > 2.
    bad = lu.astype(np.float64)
    bad[n - 1, n - 1] += 4 * rc.gamma(n, dt) * den
    assert rc.componentwise_ratio(a, bad.astype(dt), piv) > 2.0


def test_componentwise_ratio_resolves_precision():
    # A float32 factorization does not meet the float64 bound: the metric is fine
    # enough to tell the two precisions apart.
    rng = np.random.default_rng(41)
    a = rng.standard_normal((40, 40)).astype(np.float32)
    lu, piv, _ = la.sgetrf(a)
    assert rc.componentwise_ratio(a, lu, piv) <= 1.0
    assert rc.componentwise_ratio(a.astype(np.float64), lu.astype(np.float64), piv) > 1e3


def test_componentwise_ratio_zero_conventions():
    z = np.zeros((2, 2))
    assert rc.componentwise_ratio(z, z) == 0.0
    a = np.eye(2)
    lu = np.array([[1.0, 0.0], [0.0, 0.0]])
    assert rc.componentwise_ratio(a, lu) == math.inf  # numerator 1, denominator 0


def test_componentwise_ld_and_dd_agree():
    if np.finfo(np.longdouble).nmant < 63:
        pytest.skip("no extended long double on this platform")
    rng = np.random.default_rng(42)
    for n in (10, 80):
        a = rng.standard_normal((n, n))
        lu, piv, _ = la.dgetrf(a)
        r_ld = rc._componentwise_ratio(a, lu, piv, "ld")
        r_dd = rc._componentwise_ratio(a, lu, piv, "dd")
        # Per entry the numerator is off by <= gamma_{n+1}^ext (|PA| + |L||U|) <~
        # 2 (n+1)/n (u_ext/u) gamma_n |L||U|: <= 2.2 * 2**-11 of the ratio for long double
        # (n >= 10), ~2**-50 for double-double; their sum stays below 2**-9.
        assert abs(r_ld - r_dd) <= 2.0 ** -9


def test_componentwise_ratio_matches_exact():
    rng = np.random.default_rng(43)
    n = 10
    a = rng.standard_normal((n, n))
    lu, piv, _ = la.dgetrf(a)
    L, U = rc.unpack(lu)
    pa = rc.apply_swaps(a, piv)
    ex = _exact_residual(pa, L, U)
    absLU = [[sum(abs(_exact(L[i, t]) * _exact(U[t, j])) for t in range(n)) for j in range(n)]
             for i in range(n)]
    u = Fraction(2) ** -53
    g = n * u / (1 - n * u)
    exact = max(abs(ex[i][j]) / (g * absLU[i][j]) for i in range(n) for j in range(n) if absLU[i][j])
    # Same per-entry bound as in test_componentwise_ld_and_dd_agree.
    for mode in ("dd",) + (("ld",) if np.finfo(np.longdouble).nmant >= 63 else ()):
        assert abs(rc._componentwise_ratio(a, lu, piv, mode) - float(exact)) <= 2.0 ** -9
    assert abs(rc.componentwise_ratio(a, lu, piv) - float(exact)) <= 2.0 ** -9


# ---------------------------------------------------------------------------
# LAPACK GE matrix types
# ---------------------------------------------------------------------------

def _dlatb4_from_scipy_lamch(dt):
    # dlatb4's constants rebuilt from LAPACK's own xLAMCH as shipped with SciPy
    # (TESTING/LIN/dlatb4.f: SMALL = 0.25*(SFMIN/EPS), LARGE = 1/SMALL, BADC2 = 0.1/EPS).
    eps = float(LAMCH[dt]("P"))
    small = 0.25 * (float(LAMCH[dt]("S")) / eps)
    return math.sqrt(0.1 / eps), 0.1 / eps, small, 1.0 / small


@pytest.mark.parametrize("dt", DTYPES)
@pytest.mark.parametrize("n", [9, 10])
def test_ge_types_structure(dt, n):
    rng = np.random.default_rng(50 + n)
    for imat in range(1, 12):
        a, info = rc.lapack_ge_matrix(imat, n, dt, rng)
        assert a.dtype == dt and a.shape == (n, n)
        assert np.all(np.isfinite(a))
        if imat == 1:
            assert np.array_equal(a, np.diag(np.diag(a)))
            d = np.diag(a).astype(np.float64)
            # dlatm1 MODE 3: 1 = D(1) > ... > D(N) = 1/COND, COND = 2, no signs.
            assert d[0] == 1.0
            assert abs(d[-1] - 0.5) <= 2 * rc.unit_roundoff(dt)
            assert np.all(np.diff(d) < 0)
            assert np.allclose(d[1:] / d[:-1], 2.0 ** (-1.0 / (n - 1)), rtol=4 * rc.unit_roundoff(dt), atol=0)
        elif imat == 2:
            assert not np.tril(a, -1).any() and a[np.triu_indices(n, 1)].all() and np.diag(a).all()
        elif imat == 3:
            assert not np.triu(a, 1).any() and a[np.tril_indices(n, -1)].all() and np.diag(a).all()
        elif imat in (5, 6, 7):
            # dchkge IZERO for M = N: 1, N, N/2+1 (integer division), 1-based.
            iz = {5: 1, 6: n, 7: {9: 5, 10: 6}[n]}[imat]
            assert info == iz
            zero_cols = [iz - 1] if imat < 7 else list(range(iz - 1, n))
            for j in range(n):
                assert (not a[:, j].any()) == (j in zero_cols)
        else:
            assert info == 0 and a.all()


@pytest.mark.parametrize("dt", DTYPES)
@pytest.mark.parametrize("imat", [1, 2, 3, 4, 8, 9, 10, 11])
@pytest.mark.parametrize("n", [10, 31])
def test_ge_types_condition(dt, imat, n):
    rng = np.random.default_rng(51 + imat)
    a, info = rc.lapack_ge_matrix(imat, n, dt, rng)
    badc1, badc2, _, _ = _dlatb4_from_scipy_lamch(dt)
    design = {8: badc1, 9: badc2}.get(imat, 2.0)
    c = np.linalg.cond(a.astype(np.float64))
    assert info == 0
    assert design / 2 <= c <= design * 2
    # Sharper where theory allows: the cast moves each singular value by at most
    # u ||A||_F <= u sqrt(n) sigma_max (Weyl's inequality, from memory), float64 SVD adds
    # about n u64 sigma_max (LAPACK Users' Guide, 3rd ed., §4.9, from memory), and the
    # Householder Q's non-orthogonality is a multiplicative O(n u64) (Higham 2002,
    # Thm 19.4, from memory); relative to sigma_min these scale with the design cond.
    u = rc.unit_roundoff(dt)
    rel = (2 * math.sqrt(n) * u + 4 * n * 2.0 ** -53) * design + 20 * n * 2.0 ** -53
    assert abs(c / design - 1) <= rel


@pytest.mark.parametrize("dt", DTYPES)
@pytest.mark.parametrize("imat", [10, 11])
def test_ge_types_scaled_norms(dt, imat):
    _, _, small, large = _dlatb4_from_scipy_lamch(dt)
    anorm = small if imat == 10 else large
    n = 20
    a, _ = rc.lapack_ge_matrix(imat, n, dt, np.random.default_rng(52))
    # Scale by an exact power of two so the SVD sees O(1) numbers.
    e = math.frexp(anorm)[1]
    nrm = np.linalg.norm(np.ldexp(a.astype(np.float64), -e), 2)
    # dlatms scales D to max singular value ANORM. What moves it: the cast to dtype
    # (|dsigma| <= ||dA||_2 <= u ||A||_F <= u sqrt(n) ||A||_2, Weyl's inequality, from
    # memory) and the non-orthogonality of the float64 Householder Q factors (a few
    # n u64, Higham 2002 Thm 19.4, from memory).
    rtol = math.sqrt(n) * rc.unit_roundoff(dt) + 10 * n * 2.0 ** -53
    assert abs(nrm / math.ldexp(anorm, -e) - 1) <= rtol


@pytest.mark.parametrize("dt", DTYPES)
@pytest.mark.parametrize("n", [1, 2, 3, 10, 11, 50])
def test_ge_types_getrf_info_and_ratios(dt, n):
    rng = np.random.default_rng(53 + n)
    for imat in range(1, 12):
        if 5 <= imat <= 7 and n < imat - 4:
            with pytest.raises(ValueError):
                rc.lapack_ge_matrix(imat, n, dt, rng)
            continue
        a, info = rc.lapack_ge_matrix(imat, n, dt, rng)
        lu, piv, got = GETRF[dt](a)
        assert got == info, (imat, n)
        # dchkge TEST 1 for every type, and Thm 9.3's bound.
        assert rc.factor_ratio(a, lu, piv) < THRESH
        assert rc.componentwise_ratio(a, lu, piv) <= 1.0
        if info == 0:
            # dchkge TEST 3.
            b = rng.standard_normal((n, 2)).astype(dt) * np.abs(a).max()
            x, _ = GETRS[dt](lu, piv, b)
            assert rc.solve_ratio(a, x, b) < THRESH


def test_ge_empty():
    a, info = rc.lapack_ge_matrix(4, 0, np.float64, 0)
    assert a.shape == (0, 0) and info == 0


# ---------------------------------------------------------------------------
# known factors
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("dt", DTYPES)
@pytest.mark.parametrize("n", [1, 4, 40, 120])
def test_known_factors_recovered_within_tolerance(dt, n):
    rng = np.random.default_rng(60 + n)
    a, L, U = rc.known_factors(n, dt, rng)
    assert a.dtype == L.dtype == U.dtype == dt
    assert np.array_equal(np.tril(L, -1) + np.eye(n, dtype=dt), L) and np.array_equal(np.triu(U), U)
    lu, piv, info = GETRF[dt](a)
    assert info == 0 and np.array_equal(piv, np.arange(n))
    Lh, Uh = rc.unpack(lu)
    tolL, tolU = rc.factor_tolerance(L, U, dt)
    assert np.abs(Lh.astype(np.float64) - L).max() <= tolL
    assert np.abs(Uh.astype(np.float64) - U).max() <= tolU
    # Not vacuous: for these factors (|L^-1|, |U^-1| = O(1), |U| <= 2) the first-order
    # bound is a few n u; a wrong formula (e.g. a stray condition number) would show.
    u = rc.unit_roundoff(dt)
    assert tolL <= 4 * n * u + 4 * u and tolU <= 8 * n * u + 8 * u


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("n", [6, 30])
def test_factor_tolerance_sharp_for_worst_case_perturbation(seed, n):
    # Build the perturbation allowed by factor_tolerance's hypothesis
    # |dA| <= (gamma_n + u + gamma_n^ext (1+u)) |L||U| that is worst for the entry the
    # tolerance is set by (signs of the first-order sensitivities), factor L U + dA with
    # LAPACK in float64 (noise ~u64, far below float32 scales), and compare.
    dt = np.float32
    a, L, U = rc.known_factors(n, dt, np.random.default_rng(90 + seed))
    L, U = L.astype(np.float64), U.astype(np.float64)
    u = rc.unit_roundoff(dt)
    g_ext = n * 2.0 ** -53 / (1 - n * 2.0 ** -53)
    E = (rc.gamma(n, dt) + u + g_ext * (1 + u)) * (np.abs(L) @ np.abs(U))
    Li, Ui = np.linalg.inv(L), np.linalg.inv(U)
    tolL, tolU = rc.factor_tolerance(L, U, dt)
    BL = np.abs(L) @ np.tril(np.abs(Li) @ E @ np.abs(Ui), -1)
    BU = np.triu(np.abs(Li) @ E @ np.abs(Ui)) @ np.abs(U)
    # dL_ij = sum_pq dA_pq v_p Ui_qj with v_p = sum_{s>j} L_is Li_sp;
    # dU_ij = sum_pq dA_pq Li_ip w_q with w_q = sum_{t>=i} Ui_qt U_tj.
    i, j = np.unravel_index(np.argmax(BL), BL.shape)
    v = L[i, j + 1:] @ Li[j + 1:, :]
    dA = E * np.sign(np.outer(v, Ui[:, j]))
    lu, piv, _ = la.dgetrf(L @ U + dA)
    assert np.array_equal(piv, np.arange(n))
    errL = abs(rc.unpack(lu)[0][i, j] - L[i, j])
    i, j = np.unravel_index(np.argmax(BU), BU.shape)
    w = Ui[:, i:] @ U[i:, j]
    dA = E * np.sign(np.outer(Li[i, :], w))
    lu, piv, _ = la.dgetrf(L @ U + dA)
    assert np.array_equal(piv, np.arange(n))
    errU = abs(rc.unpack(lu)[1][i, j] - U[i, j])
    # Sound even for the worst case, and attained to within a factor 2 (the first-order
    # bound is sharp entrywise when all signs can be aligned).
    assert 0.5 * tolL <= errL <= tolL
    assert 0.5 * tolU <= errU <= tolU


def test_known_factors_tolerance_catches_lower_precision():
    # Factors recovered by a float32 factorization of the float64 matrix must fail the
    # float64 tolerances: the check separates a kernel working in the wrong precision.
    rng = np.random.default_rng(61)
    n = 30
    a, L, U = rc.known_factors(n, np.float64, rng)
    lu, piv, _ = la.sgetrf(a.astype(np.float32))
    assert np.array_equal(piv, np.arange(n))
    Lh, Uh = rc.unpack(lu.astype(np.float64))
    tolL, tolU = rc.factor_tolerance(L, U, np.float64)
    assert np.abs(Lh - L).max() > tolL and np.abs(Uh - U).max() > tolU


# ---------------------------------------------------------------------------
# column dominance, Pascal, Wilkinson
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("dt", DTYPES)
@pytest.mark.parametrize("n", [1, 7, 64])
def test_column_dominant(dt, n):
    a = rc.column_dominant(n, dt, np.random.default_rng(70 + n))
    assert a.dtype == dt
    d = np.abs(np.diag(a)).astype(np.float64)
    off = np.abs(a).astype(np.float64).sum(axis=0) - d
    assert np.all(d > off)
    lu, piv, info = GETRF[dt](a)
    assert info == 0 and np.array_equal(piv, np.arange(n))
    # Growth factor <= 2 for column dominance (Higham 2002, Thm 9.9, from memory).
    assert np.abs(np.triu(lu)).max() <= 2 * np.abs(a).max()


def test_pascal():
    # Edelman & Strang, "Pascal Matrices", Amer. Math. Monthly 111(3), 2004:
    # S_4 and L_4 as printed there.
    assert rc.pascal_symmetric(4).tolist() == [[1, 1, 1, 1], [1, 2, 3, 4], [1, 3, 6, 10], [1, 4, 10, 20]]
    assert rc.pascal_lower(4).tolist() == [[1, 0, 0, 0], [1, 1, 0, 0], [1, 2, 1, 0], [1, 3, 3, 1]]
    for n in (0, 1, 2, 5, 17, 29):
        S, L = rc.pascal_symmetric(n), rc.pascal_lower(n)
        assert S.dtype == L.dtype == np.float64
        assert np.array_equal(S, L @ L.T)
        assert np.array_equal(S, S.T)
    # S = L L^T is S's Cholesky factorization, and with unit diagonal every value LAPACK
    # forms is a sum of positive integers below S_ij < 2**53, hence exact.
    S20 = rc.pascal_symmetric(20)
    assert np.array_equal(np.linalg.cholesky(S20), rc.pascal_lower(20))
    with pytest.raises(ValueError):
        rc.pascal_symmetric(30)  # C(58, 29) > 2**53


@pytest.mark.parametrize("dt,n", [(np.float64, 1), (np.float64, 2), (np.float64, 10),
                                  (np.float64, 60), (np.float32, 30)])
def test_wilkinson_growth(dt, n):
    a = rc.wilkinson_growth(n)
    assert a.dtype == np.float64
    assert np.array_equal(np.diag(a), np.ones(n))
    assert np.all(np.tril(a, -1)[np.tril_indices(n, -1)] == -1)
    assert np.all(a[:, -1] == 1) and not np.triu(a[:, :-1], 1).any()
    lu, piv, info = GETRF[dt](a.astype(dt))
    assert info == 0 and np.array_equal(piv, np.arange(n))
    assert lu[-1, -1] == 2.0 ** (n - 1)
    # Higham 2002 §9.4: U has unit diagonal and last column 2**i.
    U = np.triu(lu)
    expect = np.eye(n)
    expect[:, -1] = 2.0 ** np.arange(n)
    assert np.array_equal(U, expect)


# ---------------------------------------------------------------------------
# zero pivot
# ---------------------------------------------------------------------------

def _fraction_first_zero_pivot(a):
    """Unpivoted GE in exact rationals; (step of first zero pivot, all values integer?)."""
    n = a.shape[0]
    A = [[Fraction(int(a[i, j])) for j in range(n)] for i in range(n)]
    assert all(Fraction(float(a[i, j])) == A[i][j] for i in range(n) for j in range(n))
    integral = True
    for k in range(n):
        if A[k][k] == 0:
            return k, integral
        for i in range(k + 1, n):
            m = A[i][k] / A[k][k]
            integral &= m.denominator == 1
            A[i][k] = m
            for j in range(k + 1, n):
                A[i][j] -= m * A[k][j]
                integral &= A[i][j].denominator == 1
    return None, integral


def _float_first_zero_pivot_blocked(a, nb):
    """Right-looking blocked unpivoted LU in a's dtype (nb = 1: classic kij); returns step."""
    a = a.copy()
    n = a.shape[0]
    for j0 in range(0, n, nb):
        j1 = min(j0 + nb, n)
        for k in range(j0, j1):  # panel, unblocked
            if a[k, k] == 0:
                return k
            a[k + 1:, k] /= a[k, k]
            a[k + 1:, k + 1:j1] -= np.outer(a[k + 1:, k], a[k, k + 1:j1])
        for k in range(j0, j1):  # U12 = L11^{-1} A12 by forward substitution
            a[k + 1:j1, j1:] -= np.outer(a[k + 1:j1, k], a[k, j1:])
        a[j1:, j1:] -= a[j1:, j0:j1] @ a[j0:j1, j1:]  # BLAS GEMM, any summation order
    return None


def _float_first_zero_pivot_left_looking(a):
    """Doolittle/left-looking unpivoted LU using dot products (different summation order)."""
    n = a.shape[0]
    L = np.eye(n, dtype=a.dtype)
    U = np.zeros_like(a)
    for j in range(n):
        for i in range(j + 1):
            U[i, j] = a[i, j] - L[i, :i] @ U[:i, j]
        if U[j, j] == 0:
            return j
        for i in range(j + 1, n):
            L[i, j] = (a[i, j] - L[i, :j] @ U[:j, j]) * (a.dtype.type(1) / U[j, j])
    return None


@pytest.mark.parametrize("dt", DTYPES)
@pytest.mark.parametrize("n,k", [(1, 0), (2, 0), (2, 1), (8, 3), (20, 19), (64, 0), (64, 37), (64, 63)])
def test_zero_pivot_matrix(dt, n, k):
    a = rc.zero_pivot_matrix(n, k, dt, np.random.default_rng(80 + 7 * n + k))
    assert a.dtype == dt and np.array_equal(a, np.round(a)) and np.abs(a).max() <= n
    step, integral = _fraction_first_zero_pivot(a)
    assert step == k and integral
    for nb in (1, 3, 16):
        assert _float_first_zero_pivot_blocked(a, nb) == k
    assert _float_first_zero_pivot_left_looking(a) == k


def test_zero_pivot_matrix_rejects_bad_k():
    with pytest.raises(ValueError):
        rc.zero_pivot_matrix(4, 4, np.float64, 0)
