"""Test matrices that `luforge verify` and the test suite share: LAPACK's GE matrix types with their expected
codes, and matrices with exactly known factors for sizes where a wide-format residual would cost too much."""
from __future__ import annotations

import numpy as np

from derive.check.accuracy import _float_dtype, _rng

def _dlatb4_constants(dtype):
    """EPS, BADC1, BADC2, SMALL, LARGE exactly as dlatb4 forms them, in dtype's arithmetic."""
    # LAPACK TESTING/LIN/dlatb4.f:
    #   EPS = DLAMCH('Precision'); BADC2 = 0.1/EPS; BADC1 = SQRT(BADC2)
    #   SMALL = SHRINK*(DLAMCH('Safe minimum')/EPS) with SHRINK = 0.25; LARGE = 1/SMALL
    # LAPACK INSTALL/dlamch.f: 'P' = eps*radix (= finfo.eps), 'S' = TINY since
    # 1/HUGE < TINY for IEEE formats.
    f = np.finfo(dtype).dtype.type
    eps = f(np.finfo(dtype).eps)
    badc2 = f(0.1) / eps
    badc1 = np.sqrt(badc2)
    small = f(0.25) * (f(np.finfo(dtype).tiny) / eps)
    large = f(1) / small
    return float(eps), float(badc1), float(badc2), float(small), float(large)


def _dlatb4_ge(imat, n, dtype):
    """(kl, ku, anorm, cndnum) for path xGE, square n x n."""
    # LAPACK TESTING/LIN/dlatb4.f, branch C2 = 'GE' (MODE = 3, DIST = 'S' throughout).
    _, badc1, badc2, small, large = _dlatb4_constants(dtype)
    if imat == 1:
        kl, ku = 0, 0
    elif imat == 2:
        kl, ku = 0, max(n - 1, 0)
    elif imat == 3:
        kl, ku = max(n - 1, 0), 0
    else:
        kl, ku = max(n - 1, 0), max(n - 1, 0)
    cnd = badc1 if imat == 8 else badc2 if imat == 9 else 2.0
    anorm = small if imat == 10 else large if imat == 11 else 1.0
    if n <= 1:
        cnd = 1.0
    return kl, ku, anorm, cnd


def _haar_orthogonal(n, rng):
    # QR of a Gaussian matrix with the signs of R's diagonal moved into Q gives
    # Haar-distributed Q: Mezzadri, "How to generate random matrices from the classical
    # compact groups", Notices AMS 54(5), 2007 (from memory).
    z = rng.standard_normal((n, n))
    q, r = np.linalg.qr(z)
    s = np.sign(np.diag(r))
    s[s == 0] = 1.0
    return q * s


def lapack_ge_matrix(imat, n, dtype, rng):
    """Matrix type imat (1..11) of LAPACK's GE tests; returns (a, expected_info)."""
    # LAPACK TESTING/LIN/dchkge.f (matrix set-up and zeroed columns), dlatb4.f
    # (parameters), TESTING/MATGEN/dlatms.f and dlatm1.f (singular values).
    dtype = _float_dtype(dtype)
    rng = _rng(rng)
    imat = int(imat)
    n = int(n)
    if not 1 <= imat <= 11:
        raise ValueError("imat must be in 1..11")
    if n < 0:
        raise ValueError("n must be >= 0")
    if 5 <= imat <= 7 and n < imat - 4:
        # dchkge skips types 5, 6, 7 when N < IMAT-4: there is no such matrix.
        raise ValueError(f"type {imat} needs n >= {imat - 4}")
    if n == 0:
        return np.zeros((0, 0), dtype=dtype), 0

    kl, ku, anorm, cnd = _dlatb4_ge(imat, n, dtype)

    # dlatm1 MODE = 3: D(1) = 1, D(I) = ALPHA**(I-1), ALPHA = COND**(-1/(N-1)).
    # dlatms then scales D by DMAX/max|D(i)| (DMAX = ANORM), so ANORM is the 2-norm.
    if n > 1:
        alpha = cnd ** (-1.0 / (n - 1))
        d = alpha ** np.arange(n, dtype=np.float64)
    else:
        d = np.ones(1)
    d = d * (anorm / np.max(d))

    if kl == 0 and ku == 0:
        # dlatms/dlagge: a diagonal request is D itself (no random signs for SYM='N').
        g = np.diag(d)
    else:
        u = _haar_orthogonal(n, rng)
        v = _haar_orthogonal(n, rng)
        ud = u * d  # column scaling: rounding here only perturbs U, multiplicatively
        if dtype.itemsize >= 8 and np.finfo(np.longdouble).nmant >= 63:
            # Forming U D V in a wider format leaves the final cast as the only
            # rounding that can move the small singular values of types 8 and 9.
            g = np.asarray(np.matmul(ud.astype(np.longdouble), v.astype(np.longdouble)),
                           dtype=np.float64)
        else:
            g = ud @ v
        if kl == 0:
            # dlagge reduces the bandwidth with Householder transforms from the left
            # (annihilating subdiagonals first when KL = 0): the R of a QR, whose
            # singular values are still D.
            g = np.triu(np.linalg.qr(g, mode="r"))
        elif ku == 0:
            g = np.tril(np.linalg.qr(g.T, mode="r").T)

    info = 0
    if 5 <= imat <= 7:
        # dchkge: IZERO = 1, MIN(M,N), or MIN(M,N)/2+1 (1-based); type 7 zeroes
        # columns IZERO..N, the others only column IZERO. getrf must return IZERO.
        izero = 1 if imat == 5 else n if imat == 6 else n // 2 + 1
        if imat < 7:
            g[:, izero - 1] = 0.0
        else:
            g[:, izero - 1:] = 0.0
        info = izero
    return g.astype(dtype), info


def exact_factors(n, dtype, rng, pivoted: bool):
    """(a, lu, ipiv): a matrix whose LU every elimination ordering computes without a single rounding.

    L is unit lower with entries in {0, +-1/4, +-1/2}, U upper with integer entries in -2..2 and a diagonal in
    {+-1, +-2, +-4}; a = P^T L U with a random row order P when `pivoted`. Every value any ordering forms is a
    partial sum a_ij - sum_{t in T} l_it u_tj, a multiple of 1/4 of magnitude <= sum_t |l_it||u_tj| <= 2n,
    and every division is by a power of two whose quotient is an entry of L, so for n below 2**20 (float) all
    of them are exact (common practice: integers and dyadic fractions are exact below 2**p). Partial
    pivoting then meets a unique largest candidate at every step (|l| <= 1/2 < 1), so the pivots are fixed
    too: the factors and ipiv a kernel returns must equal these bit for bit, which costs O(n^2) to check.
    """
    dtype = _float_dtype(dtype)
    rng = _rng(rng)
    n = int(n)
    if n >= 2 ** 20:
        raise ValueError("exact_factors needs n < 2**20")
    low = rng.choice(np.array([0.0, 0.0, 0.25, -0.25, 0.5, -0.5]), (n, n))
    L = np.tril(low, -1) + np.eye(n)
    U = np.triu(rng.integers(-2, 3, (n, n)).astype(np.float64), 1)
    U += np.diag(rng.choice(np.array([1.0, -1.0, 2.0, -2.0, 4.0, -4.0]), n))
    # exact even in float32 (half the time of float64): every partial sum is a multiple of 1/4 below 2**21
    m = (L.astype(np.float32) @ U.astype(np.float32)).astype(np.float64)
    lu = np.tril(L, -1) + U
    if not pivoted:
        return m.astype(dtype), lu.astype(dtype), None
    order = rng.permutation(n)          # row i of a is row order[i] of L U
    a = m[order]
    # the swaps partial pivoting makes: at step k bring the row that holds row k of L U to position k
    where = np.empty(n, dtype=np.intp)  # where[r] = current position of row r of L U
    where[order] = np.arange(n)
    at = order.copy()                   # at[i] = the row of L U currently at position i
    ipiv = np.empty(n, dtype=np.intp)
    for k in range(n):
        p = where[k]
        ipiv[k] = p
        at[k], at[p] = at[p], at[k]
        where[at[k]], where[at[p]] = k, p
    return a.astype(dtype), lu.astype(dtype), ipiv


def zero_columns(a: np.ndarray, imat: int) -> tuple[np.ndarray, int]:
    """dchkge's singular types 5-7: a zero column at IZERO (5, 6) or zero columns from IZERO on (7); returns
    the matrix and IZERO, the code a factorization must report."""
    # LAPACK TESTING/LIN/dchkge.f: IZERO = 1, N, or N/2+1; type 7 zeroes columns IZERO..N
    n = a.shape[0]
    izero = 1 if imat == 5 else n if imat == 6 else n // 2 + 1
    if imat < 7:
        a[:, izero - 1] = 0
    else:
        a[:, izero - 1:] = 0
    return a, izero
