"""Property tests of every unpivoted kernel (each ordering x block x inner x scalar x layout), C and NumPy:
known factors come back, backward error within published bounds, agreement with LAPACK, exact cases."""
from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
from hypothesis import given, settings
from hypothesis import strategies as st

import refcheck as ref
from conftest import names

KERNELS = names("unpivoted")
# LAPACK TESTING/dtest.in: THRESH 30.0
THRESH = 30.0


def sizes(block: int):
    """n from 0 to 64, with multiples of the block size and their neighbours drawn often."""
    near = sorted({m + d for m in range(0, 65, max(block, 1)) for d in (-1, 0, 1) if 0 <= m + d <= 64})
    return st.one_of(st.integers(0, 64), st.sampled_from(near))


def dtype_of(k):
    return k.c.dtype


@pytest.mark.parametrize("name", KERNELS)
@settings(max_examples=8)
@given(data=st.data())
def test_c_known_factors(unpivoted, name, data):
    k = unpivoted[name]
    n = data.draw(sizes(k.options.block), label="n")
    pad = data.draw(st.integers(0, 4), label="lda padding")
    rng = np.random.default_rng(data.draw(st.integers(0, 2 ** 32 - 1), label="seed"))
    a, L, U = ref.known_factors(n, k.c.dtype, rng)
    info, lu, ipiv, untouched = k.c.factor(a, lda=max(1, n) + pad)
    assert info == 0
    assert untouched, "the kernel wrote outside the n x n matrix"
    assert ipiv is None
    # first-order LU perturbation bound around the backward error of Higham 2002, Thm 9.3 (see refcheck)
    tol_l, tol_u = ref.factor_tolerance(L, U, k.c.dtype)
    Lh, Uh = ref.unpack(lu)
    assert np.max(np.abs(Lh - L), initial=0) <= tol_l
    assert np.max(np.abs(Uh - U), initial=0) <= tol_u
    # Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed., 2002, Thm 9.3
    assert ref.componentwise_ratio(a, lu) <= 1
    # LAPACK TESTING/LIN/dget01.f ratio with the threshold of TESTING/dtest.in
    assert ref.factor_ratio(a, lu) < THRESH


@pytest.mark.parametrize("name", KERNELS)
@settings(max_examples=3)
@given(n=st.integers(0, 20), seed=st.integers(0, 2 ** 32 - 1))
def test_python_invariant_and_agreement(unpivoted, name, n, seed):
    """The NumPy kernel asserts its loop invariant after every step, and agrees with the C kernel."""
    k = unpivoted[name]
    a, L, U = ref.known_factors(n, k.c.dtype, np.random.default_rng(seed))
    pa = a.copy()
    info_py = k.py.factor(pa, check_invariant=True)
    info_c, lu, _, _ = k.c.factor(a)
    assert info_py == info_c == 0
    assert ref.componentwise_ratio(a, pa) <= 1     # Higham 2002, Thm 9.3
    tol_l, tol_u = ref.factor_tolerance(L, U, k.c.dtype)
    # both are within the tolerance of the exact factors, so within twice it of each other
    assert np.max(np.abs(np.tril(pa, -1) - np.tril(lu, -1)), initial=0) <= 2 * tol_l
    assert np.max(np.abs(np.triu(pa) - np.triu(lu)), initial=0) <= 2 * tol_u


@pytest.mark.parametrize("name", KERNELS)
def test_agrees_with_scipy_on_column_dominant(unpivoted, name):
    """On a column diagonally dominant matrix partial pivoting makes no interchanges (Higham 2002, Thm 9.9,
    from memory), so scipy.linalg.lu (LAPACK getrf) computes the same factors."""
    k = unpivoted[name]
    rng = np.random.default_rng(7)
    for n in (1, 6, 19, 40):
        a = ref.column_dominant(n, k.c.dtype, rng)
        p, l, u = scipy.linalg.lu(a)
        assert np.array_equal(p, np.eye(n)), "reference made interchanges on a dominant matrix"
        info, lu, _, ok = k.c.factor(a, lda=n + 3)
        assert info == 0 and ok
        # both computed factorizations lie within the perturbation bound of the exact factors (formed here
        # around getrf's, a second-order difference), hence within twice it of each other
        tol_l, tol_u = ref.factor_tolerance(l, u, k.c.dtype)
        Lh, Uh = ref.unpack(lu)
        assert np.max(np.abs(Lh - l)) <= 2 * tol_l
        assert np.max(np.abs(Uh - u)) <= 2 * tol_u


@pytest.mark.parametrize("name", KERNELS)
def test_pascal_exact(unpivoted, name):
    """The symmetric Pascal matrix is L L^T with L the lower Pascal matrix, all pivots 1 (Edelman & Strang,
    "Pascal Matrices", Amer. Math. Monthly 111(3), 2004): every intermediate is an integer below the
    matrix's largest entry, so the factors come back exactly while that entry is exact in the precision."""
    k = unpivoted[name]
    top = 14 if k.c.dtype == np.float32 else 26   # C(2n-2, n-1) < 2**24 resp. 2**53
    for n in (1, 2, 5, top):
        s = ref.pascal_symmetric(n).astype(k.c.dtype)
        low = ref.pascal_lower(n).astype(k.c.dtype)
        for lu in (k.c.factor(s)[1], _py(k, s)):
            L, U = ref.unpack(lu)
            assert np.array_equal(L, low)
            assert np.array_equal(U, low.T)


def _py(k, a):
    b = a.copy()
    assert k.py.factor(b) == 0
    return b


@pytest.mark.parametrize("name", KERNELS)
def test_zero_pivot_stops(unpivoted, name):
    """An exactly zero pivot U(k,k) returns k+1 without dividing by it (no Inf or NaN appears)."""
    k = unpivoted[name]
    rng = np.random.default_rng(11)
    for n, z in ((1, 0), (4, 0), (9, 4), (17, 16), (23, 8)):
        a = ref.zero_pivot_matrix(n, z, k.c.dtype, rng)
        info, lu, _, ok = k.c.factor(a, lda=n + 1)
        assert info == z + 1 and ok
        assert np.all(np.isfinite(lu))
        b = a.copy()
        assert k.py.factor(b) == z + 1
        assert np.all(np.isfinite(b))


@pytest.mark.parametrize("name", KERNELS)
def test_bad_arguments(unpivoted, name):
    k = unpivoted[name]
    ffi, f = k.c.ffi, k.c._factor
    buf = np.zeros(16, dtype=k.c.dtype)
    p = ffi.cast(f"{k.c.ctype} *", buf.ctypes.data)
    assert f(-1, p, 1) == -1
    assert f(3, ffi.NULL, 3) == -2
    assert f(3, p, 2) == -3
    assert f(0, p, 0) == -3          # lda >= max(1, n)
    assert f(0, ffi.NULL, 1) == 0    # nothing to do
    assert not buf.any()


@pytest.mark.parametrize("name", KERNELS[::5])
@settings(max_examples=6)
@given(n=st.integers(0, 40), nrhs=st.integers(0, 4), pad=st.integers(0, 3), seed=st.integers(0, 2 ** 32 - 1))
def test_solve(unpivoted, name, n, nrhs, pad, seed):
    """X from the unpivoted solve: LAPACK TESTING/LIN/dget02.f ratio below the dtest.in threshold; the
    factors, the right-hand sides' padding and everything around them untouched."""
    k = unpivoted[name]
    rng = np.random.default_rng(seed)
    a = ref.column_dominant(n, k.c.dtype, rng)
    info, lu, _, _ = k.c.factor(a)
    assert info == 0
    b = rng.standard_normal((n, nrhs)).astype(k.c.dtype)
    lead = n if k.options.layout == "column-major" else nrhs
    code, x, ok = k.c.solve(lu, b, ldb=max(1, lead) + pad)
    assert code == 0 and ok
    if n and nrhs:
        assert ref.solve_ratio(a, x, b) < THRESH
    xp = b.copy()
    k.py.solve(lu, xp)
    if n and nrhs:
        assert ref.solve_ratio(a, xp, b) < THRESH


def test_invariant_check_catches_a_wrong_invariant(unpivoted, monkeypatch):
    """The NumPy checker can fail: a right-looking loop judged by the Crout invariant (A22 must still hold its
    input) and a Crout loop judged by the right-looking one (A22 must hold A22 - L21 U12) are both refused."""
    right, crout = unpivoted["u_ri_b1_dc"].py, unpivoted["u_cr_b1_dc"].py
    a = ref.column_dominant(6, np.float64, np.random.default_rng(1))
    for mod, other in ((right, crout), (crout, right)):
        monkeypatch.setattr(mod, "_INVARIANT_TERMS", other._INVARIANT_TERMS)
        with pytest.raises(AssertionError, match="A22"):
            mod.factor(a.copy(), check_invariant=True)
        monkeypatch.undo()
        assert mod.factor(a.copy(), check_invariant=True) == 0
