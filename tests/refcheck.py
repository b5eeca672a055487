# refcheck: test-matrix generators for checking luforge's LU kernels (pure NumPy).
# The accuracy measures they are judged by live in derive/accuracy.py and are re-exported here.
"""Reference checks for LU factorization kernels: the test-matrix generators (LAPACK's GE matrix types, known
factors, Pascal, Wilkinson, exact zero pivots), with the accuracy measures from derive.check.accuracy re-exported.

Conventions: matrices are logical 2-D NumPy arrays; ``ipiv`` is a 0-based sequence of row swaps.
"""

from __future__ import annotations

import math

import numpy as np

from derive.check.matrices import _dlatb4_constants, _dlatb4_ge, exact_factors, lapack_ge_matrix  # noqa: F401
from derive.check.accuracy import (_accurate_product, _as_float, _componentwise_ratio,  # noqa: F401
                             _ext_unit_roundoff, _float_dtype, _residual, _rng, _work_mode, apply_swaps,
                             column_dominant, componentwise_ratio, factor_ratio, gamma, solve_ratio,
                             unit_roundoff, unpack)

__all__ = [
    "unit_roundoff", "gamma", "unpack", "apply_swaps", "factor_ratio", "solve_ratio", "componentwise_ratio",
    "lapack_ge_matrix", "known_factors", "factor_tolerance", "column_dominant", "pascal_symmetric",
    "pascal_lower", "wilkinson_growth", "zero_pivot_matrix",
]

# LAPACK's GE test matrices (lapack_ge_matrix) live in derive/check/matrices.py: verify runs them too.

# ---------------------------------------------------------------------------
# Matrices with known factors or known elimination behaviour
# ---------------------------------------------------------------------------

def known_factors(n, dtype, rng):
    """Random unit-lower L and well-conditioned upper U (both in dtype) and a = fl(L @ U)."""
    dtype = _float_dtype(dtype)
    rng = _rng(rng)
    n = int(n)
    # Multipliers bounded by 1/n (< 1) make partial pivoting choose the diagonal at
    # every step, so getrf-style kernels should reproduce L and U themselves.
    L = np.eye(n) + np.tril(rng.uniform(-1.0, 1.0, (n, n)), -1) / n
    U = np.triu(rng.uniform(-1.0, 1.0, (n, n)), 1) / n
    U += np.diag(rng.uniform(1.0, 2.0, n) * rng.choice([-1.0, 1.0], n))
    # Cast the factors first so that they are exactly the returned ones; then form the
    # product in a wide format and round once (bounded in factor_tolerance).
    L = L.astype(dtype)
    U = U.astype(dtype)
    a = _accurate_product(L, U, _work_mode(dtype)).astype(dtype)
    return a, L, U


def factor_tolerance(L, U, dtype):
    """(tolL, tolU): max-abs error bounds for factors recovered from the LU of known_factors' a.

    Perturbation theory for LU: if L U + dA = (L + dL)(U + dU), write
    G = L^{-1} dL (strictly lower) and H = dU U^{-1} (upper). Then exactly
        X := L^{-1} dA U^{-1} = G + H + G H,
    so G = stril(X - G H), H = triu(X - G H). Dropping G H gives the first-order result
        |dL| <= |L| stril(|L^{-1}| E |U^{-1}|),   |dU| <= triu(|L^{-1}| E |U^{-1}|) |U|
    for |dA| <= E: Stewart, "On the perturbation of LU, Cholesky, and QR factorizations",
    SIAM J. Matrix Anal. Appl. 14(4), 1993; Sun, "Componentwise perturbation bounds for
    some matrix decompositions", BIT 32, 1992 (both from memory).

    E collects (i) the backward error of the computed factorization,
    gamma_n |L^||U^| (Higham 2002, Thm 9.3), and (ii) the rounding of a = fl(L U) itself:
    a wide-format product (error gamma_n^ext |L||U|) rounded once to dtype, i.e.
    (u + gamma_n^ext (1 + u)) |L||U|.

    The first-order bound is the leading term; the second-order remainder (G H, and
    |L^||U^| = |L|(I + G)(I + H)|U| exceeding |L||U|) is kept by iterating the
    entrywise majorants Gm >= |G|, Hm >= |H| to their fixed point
        W = |L^{-1}| E(Gm, Hm) |U^{-1}| + Gm Hm,  Gm = stril(W),  Hm = triu(W),
    starting from 0 (continuation from dA = 0; common practice). The iteration converges
    to first order in one step; the limit is accepted only once it is a supersolution.
    """
    dtype = _float_dtype(dtype)
    L = np.asarray(L, dtype=np.float64)
    U = np.asarray(U, dtype=np.float64)
    n = L.shape[0]
    if n == 0:
        return 0.0, 0.0
    u = unit_roundoff(dtype)
    u_ext = _ext_unit_roundoff(_work_mode(dtype))
    g_ext = n * u_ext / (1.0 - n * u_ext)  # Higham 2002, eq. (3.8), in the wide format
    g_n = gamma(n, dtype)
    aL, aU = np.abs(L), np.abs(U)
    iL, iU = np.abs(np.linalg.inv(L)), np.abs(np.linalg.inv(U))
    E_round = (u + g_ext * (1.0 + u)) * (aL @ aU)
    eye = np.eye(n)

    def step(Gm, Hm):
        E = g_n * (aL @ (eye + Gm) @ (eye + Hm) @ aU) + E_round
        W = iL @ E @ iU + Gm @ Hm
        return np.tril(W, -1), np.triu(W)

    Gm = np.zeros((n, n))
    Hm = np.zeros((n, n))
    for _ in range(60):
        G2, H2 = step(Gm, Hm)
        done = np.array_equal(G2, Gm) and np.array_equal(H2, Hm)
        Gm, Hm = G2, H2
        if done:
            break
    # A hair above the limit must map below itself; otherwise the perturbation is too
    # large for any bound of this kind (the remainder would not be second order).
    bump = 1.0 + 2.0 ** -20
    Gs, Hs = Gm * bump, Hm * bump
    G2, H2 = step(Gs, Hs)
    if not (np.all(G2 <= Gs) and np.all(H2 <= Hs)) or not np.all(np.isfinite(Gs)):
        raise ValueError("perturbation bound does not close: factors too ill-conditioned")
    tolL = aL @ Gs
    tolU = Hs @ aU
    return float(np.max(tolL)), float(np.max(tolU))


def _check_exact_integers(x, what):
    if x.size and int(np.max(x)) > 2 ** 53:
        raise ValueError(f"{what} entries exceed 2**53 and are not exact in float64")


def pascal_symmetric(n) -> np.ndarray:
    """Symmetric Pascal matrix S_ij = C(i+j, i), 0-based, as float64 integers."""
    # Edelman & Strang, "Pascal Matrices", Amer. Math. Monthly 111(3), 2004.
    n = int(n)
    s = np.array([[math.comb(i + j, i) for j in range(n)] for i in range(n)], dtype=object)
    _check_exact_integers(s, "pascal_symmetric")
    return s.astype(np.float64).reshape(n, n)


def pascal_lower(n) -> np.ndarray:
    """Lower-triangular Pascal matrix L_ij = C(i, j), with S = L L^T."""
    # Edelman & Strang, "Pascal Matrices", Amer. Math. Monthly 111(3), 2004.
    n = int(n)
    low = np.array([[math.comb(i, j) for j in range(n)] for i in range(n)], dtype=object)
    _check_exact_integers(low, "pascal_lower")
    return low.astype(np.float64).reshape(n, n)


def wilkinson_growth(n) -> np.ndarray:
    """Unit diagonal, -1 strictly below, last column ones: GEPP growth 2**(n-1)."""
    # Higham 2002, §9.4; Wilkinson, "Error analysis of direct methods of matrix
    # inversion", J. ACM 8, 1961. Every candidate pivot ties at magnitude 1 and
    # partial pivoting keeps the first (the diagonal), so no rows move and the last
    # column doubles at each step: U[n-1, n-1] = 2**(n-1).
    n = int(n)
    a = np.eye(n) - np.tril(np.ones((n, n)), -1)
    if n:
        a[:, -1] = 1.0
    return a


def zero_pivot_matrix(n, k, dtype, rng) -> np.ndarray:
    """Integer matrix whose unpivoted LU first meets an exact zero pivot at 0-based step k.

    Built as L @ U with L unit lower (entries in {-1, 0, 1}) and U upper with entries in
    {-1, 0, 1}, diagonal +-1 except U[k, k] = 0. The leading k principal minors are +-1,
    so steps 0..k-1 reproduce L and U exactly and step k's pivot is U[k, k] = 0.
    Every value any elimination ordering forms up to step k is a partial sum
    a_ij - sum_{t in T} l_it u_tj, an integer of magnitude <= 2 (|L||U|)_ij <= 2n,
    and every division is by +-1, so nothing is ever rounded.
    """
    dtype = _float_dtype(dtype)
    rng = _rng(rng)
    n, k = int(n), int(k)
    if not 0 <= k < n:
        raise ValueError("need 0 <= k < n")
    L = np.eye(n, dtype=np.int64) + np.tril(rng.integers(-1, 2, (n, n)), -1)
    U = np.triu(rng.integers(-1, 2, (n, n)), 1) + np.diag(rng.choice([-1, 1], n))
    U[k, k] = 0
    bound = 2 * int(np.max(np.abs(L) @ np.abs(U)))
    if bound >= 2 ** (np.finfo(dtype).nmant + 1):
        raise ValueError(f"n = {n} too large for exact intermediates in {dtype}")
    return (L @ U).astype(dtype)
