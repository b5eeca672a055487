"""Accuracy measures of computed LU factors and solutions, by published procedures: LAPACK's factor and solve
ratios and Higham's componentwise bound, with residuals formed in a format wider than the data.

Conventions used throughout:

* matrices are logical 2-D NumPy arrays (storage layout is the caller's concern);
* ``ipiv`` is a 0-based sequence of row swaps: for k = 0..len(ipiv)-1 swap rows
  k and ipiv[k], in that order (LAPACK getrf's IPIV minus one), so that
  ``apply_swaps(A, ipiv) == L @ U``.

`luforge verify` and the test suite both judge kernels with these functions; tests/test_refcheck.py checks
the functions themselves against exact rational arithmetic and scipy.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["unit_roundoff", "gamma", "unpack", "apply_swaps", "factor_ratio", "solve_ratio",
           "componentwise_ratio", "solve_componentwise_ratio", "column_dominant"]


# ---------------------------------------------------------------------------
# Floating-point constants
# ---------------------------------------------------------------------------

def unit_roundoff(dtype) -> float:
    """Unit roundoff u of a binary floating type (2**-53 for float64, 2**-24 for float32)."""
    # LAPACK INSTALL/dlamch.f: with rounding assumed, DLAMCH('E') = EPSILON(0)*0.5,
    # and Fortran EPSILON is the spacing at 1, i.e. NumPy's finfo.eps.
    return float(np.finfo(_float_dtype(dtype)).eps) / 2.0


def gamma(n, dtype) -> float:
    """gamma_n = n u / (1 - n u)."""
    # Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed., 2002, eq. (3.8), Lemma 3.1.
    n = int(n)
    if n < 0:
        raise ValueError("gamma_n needs n >= 0")
    nu = n * unit_roundoff(dtype)
    if nu >= 1.0:
        # The lemma only holds for n u < 1; an infinite bound would make every
        # componentwise check pass silently, so refuse instead.
        raise ValueError(f"gamma_{n} undefined: n*u = {nu} >= 1")
    return nu / (1.0 - nu)


def _float_dtype(dtype) -> np.dtype:
    dt = np.dtype(dtype)
    if dt.kind != "f":
        raise TypeError(f"real floating dtype required, got {dt}")
    return dt


def _as_float(x) -> np.ndarray:
    x = np.asarray(x)
    if x.dtype.kind in "biu":
        # Integer test matrices (e.g. exact combinatorial ones) are judged as float64 data.
        x = x.astype(np.float64)
    _float_dtype(x.dtype)
    return x


# ---------------------------------------------------------------------------
# Factor bookkeeping
# ---------------------------------------------------------------------------

def unpack(lu):
    """Split a packed LU array into (L, U): L unit lower trapezoidal, U upper trapezoidal."""
    lu = _as_float(lu)
    if lu.ndim != 2:
        raise ValueError("lu must be 2-D")
    m, n = lu.shape
    k = min(m, n)
    L = np.tril(lu[:, :k], -1) + np.eye(m, k, dtype=lu.dtype)
    U = np.triu(lu[:k, :])
    return L, U


def apply_swaps(a, ipiv) -> np.ndarray:
    """Return P @ a (a copy), P being the product of the row swaps described by ipiv."""
    out = np.array(a, copy=True)
    if ipiv is None:
        return out
    m = out.shape[0]
    for k, p in enumerate(np.asarray(ipiv).reshape(-1)):
        p = int(p)
        if not (0 <= p < m) or k >= m:
            raise ValueError(f"swap ({k}, {p}) out of range for {m} rows")
        if p != k:
            out[[k, p]] = out[[p, k]]
    return out


# ---------------------------------------------------------------------------
# Accurate residual evaluation  c - p @ q
# ---------------------------------------------------------------------------
#
# Residuals of a backward-stable factorization are of the size of the rounding
# errors made while forming them in working precision, so they must be formed
# in a wider format:
#   "f64": inputs with <= 24-bit significands; their products are exact in
#          float64 (2*24 <= 53 bits) and float64 summation error is 2**-29 of
#          the float32 unit roundoff.
#   "ld":  float64 inputs and an x87-style long double (>= 64-bit significand):
#          summation error relative to float64 rounding is about 2**-11.
#   "dd":  float64 inputs without such a long double: error-free TwoProduct and
#          TwoSum (double-double accumulation).

_SPLITTER = 134217729.0  # 2**27 + 1
# Veltkamp splitting constant for 53-bit doubles: Dekker, "A floating-point technique
# for extending the available precision", Numer. Math. 18 (1971) (from memory);
# also Higham 2002, §4.3 / Notes (from memory).


def _work_mode(*dtypes) -> str:
    nmant = max(np.finfo(_float_dtype(d)).nmant for d in dtypes)
    if nmant <= 23:
        return "f64"
    if nmant > 52:
        raise TypeError("inputs wider than float64 are not supported")
    if np.finfo(np.longdouble).nmant >= 63:
        return "ld"
    return "dd"


def _ext_unit_roundoff(mode: str) -> float:
    """Unit roundoff of the wide format behind each evaluation mode."""
    if mode == "f64":
        return 2.0 ** -53
    if mode == "ld":
        return unit_roundoff(np.longdouble)
    # Double-double carries about 2*53 bits; 2**-104 leaves a factor 2 of headroom
    # over the ~2**-105 of a normalized hi+lo pair (common practice).
    return 2.0 ** -104


def _two_sum(a, b):
    # Knuth's TwoSum: s + e == a + b exactly (Higham 2002, §4.3, Alg. 4.4 (from memory)).
    s = a + b
    bb = s - a
    e = (a - (s - bb)) + (b - bb)
    return s, e


def _split(a):
    c = _SPLITTER * a
    hi = c - (c - a)
    return hi, a - hi


def _pow2_scale(x) -> float:
    """A power of two bringing max|x| near 1, or 1.0 when no rescaling is needed."""
    m = float(np.max(np.abs(x))) if x.size else 0.0
    if m == 0.0 or not math.isfinite(m):
        return 1.0
    e = math.frexp(m)[1]
    # Veltkamp splitting overflows above ~2**996 and TwoProduct stops being exact
    # once partial products underflow; only rescale far from those limits so that
    # ordinary data go through untouched.
    if -300 <= e <= 300:
        return 1.0
    return math.ldexp(1.0, -e)


def _residual(c, p, q, mode):
    """Return (c', p', q', r, absprod) with r ~ c' - p' @ q' and absprod = |p'| @ |q'|.

    c', p', q' are the inputs in the working type of ``mode``. In "dd" mode they may
    have been multiplied by powers of two (c by the product of p's and q's factors);
    every ratio computed from them is invariant under that scaling.
    """
    if mode == "f64":
        c, p, q = (np.asarray(t, dtype=np.float64) for t in (c, p, q))
        return c, p, q, c - p @ q, np.abs(p) @ np.abs(q)
    if mode == "ld":
        c, p, q = (np.asarray(t, dtype=np.longdouble) for t in (c, p, q))
        return c, p, q, c - np.matmul(p, q), np.matmul(np.abs(p), np.abs(q))
    if mode != "dd":
        raise ValueError(mode)

    c, p, q = (np.array(t, dtype=np.float64) for t in (c, p, q))
    sp, sq = _pow2_scale(p), _pow2_scale(q)
    if sp != 1.0 or sq != 1.0:
        p = p * sp
        q = q * sq
        # Two separate multiplications: sp*sq alone may leave the double range.
        c = (c * sp) * sq
    ph, pl = _split(p)
    qh, ql = _split(q)
    sh = c.copy()
    sl = np.zeros_like(c)
    for t in range(p.shape[1]):
        ah, al = ph[:, t:t + 1], pl[:, t:t + 1]
        bh, bl = qh[t:t + 1, :], ql[t:t + 1, :]
        prod = p[:, t:t + 1] * q[t:t + 1, :]
        # Dekker's TwoProduct: prod + err == p_it * q_tj exactly (no FMA in NumPy).
        err = ((ah * bh - prod) + ah * bl + al * bh) + al * bl
        s, e = _two_sum(sh, -prod)
        e = e + (sl - err)
        sh, sl = _two_sum(s, e)
    # The denominator-side product only needs relative accuracy ~u: nonnegative terms.
    return c, p, q, sh, np.abs(p) @ np.abs(q)


def _accurate_product(p, q, mode) -> np.ndarray:
    """p @ q with a single final rounding to float64 (up to the wide format's error)."""
    p = np.asarray(p, dtype=np.float64)
    q = np.asarray(q, dtype=np.float64)
    z = np.zeros((p.shape[0], q.shape[1]))
    if mode == "dd":
        sp, sq = _pow2_scale(p), _pow2_scale(q)
        _, _, _, r, _ = _residual(z, -(p * sp), q * sq, "dd")
        return (r / sp) / sq
    _, _, _, r, _ = _residual(z, -p, q, mode)
    return np.asarray(r, dtype=np.float64)


def _norm1(x) -> float:
    """Matrix 1-norm (max column sum), evaluated in x's own (possibly wide) type."""
    if x.size == 0:
        return 0.0
    return np.max(np.sum(np.abs(x), axis=0))


# ---------------------------------------------------------------------------
# Metrics
# ---------------------------------------------------------------------------

def factor_ratio(a, lu, ipiv=None) -> float:
    """LAPACK dget01 ratio ||P A - L U||_1 / (n ||A||_1 eps), eps = unit roundoff of lu.dtype."""
    # LAPACK TESTING/LIN/dget01.f. dget01 compares P^T L U with A; the 1-norm is
    # invariant under row permutation, so comparing P A with L U is the same number.
    a = _as_float(a)
    lu = _as_float(lu)
    if a.shape != lu.shape or a.ndim != 2:
        raise ValueError("a and lu must be 2-D of the same shape")
    m, n = a.shape
    if m == 0 or n == 0:
        return 0.0
    eps = unit_roundoff(lu.dtype)
    L, U = unpack(lu)
    mode = _work_mode(a.dtype, lu.dtype)
    pa, _, _, r, _ = _residual(apply_swaps(a, ipiv), L, U, mode)
    resid = _norm1(r)
    anorm = _norm1(pa)
    if anorm <= 0:
        # dget01: ANORM <= 0 gives 1/EPS unless the residual is exactly zero.
        return 0.0 if resid == 0 else 1.0 / eps
    # Same evaluation order as dget01, which keeps near-overflow data finite.
    return float(((resid / n) / anorm) / eps)


def solve_ratio(a, x, b) -> float:
    """LAPACK dget02 ratio max_j ||b_j - A x_j||_1 / (||A||_1 ||x_j||_1 eps), eps of x.dtype."""
    # LAPACK TESTING/LIN/dget02.f (3.6.0), TRANS = 'N'.
    a = _as_float(a)
    x = _as_float(x)
    b = _as_float(b)
    if x.ndim == 1:
        x = x[:, None]
    if b.ndim == 1:
        b = b[:, None]
    m, n = a.shape
    if x.shape[0] != n or b.shape != (m, x.shape[1]):
        raise ValueError("shapes do not match A x = b")
    nrhs = x.shape[1]
    if m == 0 or n == 0 or nrhs == 0:
        return 0.0
    eps = unit_roundoff(x.dtype)
    mode = _work_mode(a.dtype, x.dtype, b.dtype)
    _, aw, xw, r, _ = _residual(b, a, x, mode)
    anorm = _norm1(aw)
    if anorm <= 0:
        # dget02 exits with 1/EPS when ANORM = 0, whatever the residual.
        return 1.0 / eps
    resid = 0.0
    for j in range(nrhs):
        bnorm = np.sum(np.abs(r[:, j]))
        xnorm = np.sum(np.abs(xw[:, j]))
        if np.isnan(bnorm):
            # Fortran MAX is silent about NaN; a NaN residual must not read as a pass.
            return math.nan
        if xnorm <= 0:
            # dget02 assigns (not maxes) 1/EPS for a zero solution column.
            resid = 1.0 / eps
        else:
            resid = max(resid, float(((bnorm / anorm) / xnorm) / eps))
    return resid


def componentwise_ratio(a, lu, ipiv=None) -> float:
    """max_ij |P A - L U|_ij / (gamma_k (|L||U|)_ij), k = min(m, n); <= 1 is what theory allows."""
    # Higham 2002, Thm 9.3: the computed factors of any GE ordering satisfy
    # L U = A + dA with |dA| <= gamma_n |L||U| (no underflow assumed).
    a = _as_float(a)
    lu = _as_float(lu)
    return _componentwise_ratio(a, lu, ipiv, _work_mode(a.dtype, lu.dtype))


def _componentwise_ratio(a, lu, ipiv, mode) -> float:
    a = _as_float(a)
    lu = _as_float(lu)
    if a.shape != lu.shape or a.ndim != 2:
        raise ValueError("a and lu must be 2-D of the same shape")
    k = min(a.shape)
    if k == 0:
        return 0.0
    L, U = unpack(lu)
    _, _, _, r, absprod = _residual(apply_swaps(a, ipiv), L, U, mode)
    num = np.abs(r)
    den = gamma(k, lu.dtype) * absprod
    if np.isnan(num).any() or np.isnan(den).any():
        return math.nan
    with np.errstate(divide="ignore", invalid="ignore"):
        q = np.where(den > 0, num / np.where(den > 0, den, 1), np.where(num > 0, np.inf, 0.0))
    return float(np.max(q))


def solve_componentwise_ratio(a, lu, ipiv, x, b, extra: int = 0) -> float:
    """max_i |b - A x|_i / (gamma_(3n+extra) (P^T |L||U| |x|)_i); <= 1 is what theory allows."""
    # Higham 2002, Thm 9.4: the solution computed from the factors satisfies (A + dA) x = b with
    # |dA| <= gamma_3n |L||U| (P A = L U), so |b - A x| = |dA x| <= gamma_3n P^T |L||U||x|. `extra` adds
    # roundings per entry that a solve makes beyond Higham's count (a reciprocal of U's diagonal: one).
    a, lu, x, b = (_as_float(t) for t in (a, lu, x, b))
    if x.ndim == 1:
        x, b = x[:, None], b[:, None]
    n = a.shape[0]
    if n == 0 or x.shape[1] == 0:
        return 0.0
    mode = _work_mode(a.dtype, x.dtype, b.dtype, lu.dtype)
    bw, _, _, r, _ = _residual(b, a, x, mode)
    # "dd" mode scales b (and so r) by a power of two; undo it for the comparison
    scale = float(np.max(np.abs(bw))) / float(np.max(np.abs(b))) if np.any(b) else 1.0
    L, U = unpack(lu)
    bound = np.abs(L.astype(np.float64)) @ (np.abs(U.astype(np.float64)) @ np.abs(x.astype(np.float64)))
    num = apply_swaps(np.abs(np.asarray(r, dtype=np.float64)) / scale, ipiv)
    den = gamma(3 * n + extra, lu.dtype) * bound
    if np.isnan(num).any() or np.isnan(den).any():
        return math.nan
    with np.errstate(divide="ignore", invalid="ignore"):
        q = np.where(den > 0, num / np.where(den > 0, den, 1), np.where(num > 0, np.inf, 0.0))
    return float(np.max(q))


# ---------------------------------------------------------------------------
# LAPACK GE test matrices


# ---------------------------------------------------------------------------
# Matrices on which unpivoted LU is safe
# ---------------------------------------------------------------------------

def _rng(rng):
    return rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)


def column_dominant(n, dtype, rng) -> np.ndarray:
    """Strictly column diagonally dominant matrix: partial pivoting makes no interchanges."""
    # A matrix diagonally dominant by columns has GEPP choose the diagonal at every
    # step and growth factor <= 2: Higham 2002, Thm 9.9 (from memory); Wilkinson (1961).
    # Elimination never shrinks a column's dominance margin (common practice), so a
    # margin >= 1 on O(1) entries survives both the cast and the rounding errors.
    dtype = _float_dtype(dtype)
    rng = _rng(rng)
    n = int(n)
    a = rng.uniform(-1.0, 1.0, (n, n))
    np.fill_diagonal(a, 0.0)
    margin = 1.0 + rng.uniform(0.0, 1.0, n)
    diag = (np.sum(np.abs(a), axis=0) + margin) * rng.choice([-1.0, 1.0], n)
    np.fill_diagonal(a, diag)
    return a.astype(dtype)
