"""Batched (lanes) kernels checked on a target: W matrices interleaved per buffer, canaries around every buffer
and in the unused lanes of a partial last group, judged per matrix by host verify's criteria for lanes kernels."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from derive.check.accuracy import componentwise_ratio, factor_ratio, solve_ratio
from derive.check.cross import ToolMissing
from derive.check.harness import CANARY, GUARD, interleave_index
from derive.check.matrices import lapack_ge_matrix
from derive.check.ondevice import (EXACT_ORDERS, LAPACK_ORDERS, PIV_CANARY, Result, TargetRow, _same_bits, abi_of,
                                   verdict)
from derive.check.verify_lanes import exact_stack, not_exact, sizes_of
from derive.options import KernelOptions
from derive.targets.storage import SCALARS
from derive.targets.table import Target


@dataclass
class LaneCase:
    n: int
    mats: np.ndarray            # (count, n, n) logical matrices
    b: np.ndarray               # (count, n): one right-hand side per matrix
    a_buf: np.ndarray           # interleaved storage between GUARD canaries; unused lanes hold canaries too
    a_idx: np.ndarray           # (count, n, n) offsets of the matrices' elements in a_buf
    b_buf: np.ndarray
    b_idx: np.ndarray           # (count, n)
    expect: np.ndarray          # (count,) the exact code each matrix must get
    judge: str = "random"       # "random" (getrf's pivots, ratios, Higham), "lapack" (dchkge: codes, dget01,
                                # dget02), "nan" (a NaN in lane `victim`: every other lane as in case `twin`),
                                # "exact" (every lane's factors and pivots equal to `exact`, exactly)
    twin: int = -1
    victim: int = -1
    exact: tuple | None = None  # for "exact": (lu (count, n, n), ipiv (count, n)) known without rounding

    @property
    def count(self) -> int:
        return len(self.mats)

    def fields(self) -> tuple[int, int, int, int]:
        # the driver's (n, lda, nrhs, ldb): the interleaved stack's leading extent is n, nrhs the count
        return self.n, max(self.n, 1), self.count, max(self.n, 1)

    def piv_len(self) -> int:
        return self.count * self.n + self.count + 3 * GUARD

    def info_at(self) -> int:
        return 2 * GUARD + self.count * self.n


def getrf(a: np.ndarray):
    """LAPACK getrf of one matrix (scipy's binding): (lu, 0-based pivots, info)."""
    try:
        import scipy.linalg.lapack
    except ImportError:     # scipy is a test extra; the reference pivots of batched kernels need it
        raise ToolMissing("checking batched kernels on a target compares their pivots with LAPACK getrf: "
                          "install scipy (pip install '.[test]' in the luforge tree, or pip install scipy)") from None
    return (scipy.linalg.lapack.sgetrf if a.dtype == np.float32 else scipy.linalg.lapack.dgetrf)(a)


def _codes(mats: np.ndarray) -> list[int]:
    """LAPACK getrf's code for each matrix of a batch (0 for n = 0, where there is nothing to factor)."""
    return [getrf(m)[2] if m.size else 0 for m in mats]


def _case(o: KernelOptions, mats: np.ndarray, rng, judge: str, expect, **kw) -> LaneCase:
    count, n = mats.shape[:2]
    w, dtype = o.lanes, mats.dtype
    groups = -(-count // w)
    a_idx = GUARD + interleave_index(count, n, w, o.layout)
    a_buf = np.full(groups * n * n * w + 2 * GUARD, CANARY, dtype)
    a_buf[a_idx] = mats
    m = np.arange(count)[:, None]
    b_idx = GUARD + ((m // w) * n + np.arange(n)[None, :]) * w + m % w
    b = rng.standard_normal((count, n)).astype(dtype)
    if judge == "lapack" and n:
        b *= np.abs(mats).reshape(count, -1).max(axis=1)[:, None]   # scaled with each matrix, as verify does
    b_buf = np.full(groups * n * w + 2 * GUARD, CANARY, dtype)
    b_buf[b_idx] = b
    return LaneCase(n, mats, b, a_buf, a_idx, b_buf, b_idx, np.asarray(expect, np.intp), judge, **kw)


def _count(o: KernelOptions, t: Target, n: int, wanted: int) -> int | None:
    """`wanted` matrices if their whole groups fit the RAM the row has for one n x n test matrix, else a
    smaller count that still leaves the last group partial; None if not even that fits."""
    w = o.lanes
    for count in (wanted, w + 1, w - 1):
        if count >= 1 and -(-count // w) * w * n * n <= t.max_n * (t.max_n + 3):
            return count
    return None


def choose_cases(o: KernelOptions, t: Target, rng, per_size: int = 2, orders=None) -> list[LaneCase]:
    """verify_lanes's batches for the sizes that fit the row: random matrices in per_size whole groups and one
    more, one lane with a zero column (an exact zero pivot); one batch again with a NaN in another lane; and
    per LAPACK order one batch of dchkge's GE types side by side, singular ones with their exact codes; per
    order of host verify's exact ones that fits, W + 1 matrices with exactly known factors, each lane its own
    (a partial last group). With `orders`: one whole group of random matrices per order (for counting)."""
    dtype = np.dtype(SCALARS[o.scalar].numpy)
    cases: list[LaneCase] = []
    if orders is not None:
        # counting (`luforge report`): per order one whole group of W random matrices, so one call's count is
        # the cost of W systems; a fixed-size kernel has its own order only
        own = abi_of(o).orders
        for n in orders:
            if (own is None or n in own) and _count(o, t, n, o.lanes) == o.lanes:
                mats = rng.standard_normal((o.lanes, n, n)).astype(dtype)
                cases.append(_case(o, mats, rng, "random", _codes(mats)))
        return cases
    sizes = [n for n in sizes_of(o) if _count(o, t, n, per_size * o.lanes + 1)]
    for n in sizes:
        mats = rng.standard_normal((_count(o, t, n, per_size * o.lanes + 1), n, n)).astype(dtype)
        zero = int(rng.integers(0, len(mats)))
        if n:
            mats[zero][:, n // 2] = 0
        cases.append(_case(o, mats, rng, "random", _codes(mats)))
    # the NaN batch at the largest size up to 9 (a few columns past the NaN's row and column), else the smallest
    nan_n = max([n for n in sizes if 0 < n <= 9] or [n for n in sizes if n][:1] or [0])
    clean = next((k for k, c in enumerate(cases) if c.n == nan_n and c.count > 1), None)
    if clean is not None:
        c = cases[clean]
        victim = int(np.flatnonzero(c.expect == 0)[0])
        bad = c.mats.copy()
        bad[victim][nan_n - 1, 0] = np.nan
        nan = _case(o, bad, rng, "nan", c.expect, twin=clean, victim=victim)
        nan.b[:], nan.b_buf[:] = c.b, c.b_buf   # the same right-hand sides, so the other lanes' x compare too
        cases.append(nan)
    for n in LAPACK_ORDERS if getattr(o, "size", None) is None else (o.size,):
        types = [i for i in range(1, 12) if not (5 <= i <= 7 and n < i - 4)]   # dchkge skips these
        if _count(o, t, n, len(types)) != len(types):
            continue
        made = [lapack_ge_matrix(i, n, dtype, rng) for i in types]
        cases.append(_case(o, np.stack([a for a, _ in made]), rng, "lapack", [e for _, e in made]))
    for n in (EXACT_ORDERS if getattr(o, "size", None) is None else (o.size,)):
        count = _count(o, t, n, o.lanes + 1)
        if not n or count is None:
            continue
        mats, lu, ipiv = exact_stack(n, dtype, rng, count)
        cases.append(_case(o, mats, rng, "exact", [0] * count, exact=(lu, ipiv)))
    return cases


def _same_or_nan(x: np.ndarray, y: np.ndarray) -> bool:
    """Bit for bit, except that any NaN matches any NaN: IEEE 754 leaves NaN payloads to the hardware."""
    nx, ny = np.isnan(x), np.isnan(y)
    return x.shape == y.shape and bool(np.array_equal(nx, ny)) and _same_bits(x[~nx], y[~ny])


def _kept(before: np.ndarray, after: np.ndarray, idx: np.ndarray) -> bool:
    mask = np.ones(before.shape, bool)
    mask[idx.ravel()] = False
    return after.shape == before.shape and _same_bits(after[mask], before[mask])


def judge(o: KernelOptions, t: Target, cases: list[LaneCase], results: list[Result], host=None) -> TargetRow:
    """The host's verdict per matrix: canaries and unused lanes, codes, getrf's pivots, LAPACK's ratios and
    Higham's bound (the functions and threshold of host verify); a NaN reaches no other lane; and, given the
    host's build (a harness.LaneKernel), every lane's factors, pivots, codes and solutions equal to it."""
    problems: list[str] = []
    wf = wc = ws = 0.0
    identical = True
    seen: dict[int, tuple] = {}
    for k, (c, r) in enumerate(zip(cases, results)):
        n, count = c.n, c.count
        tag = f"n={n}" + (f" (NaN in matrix {c.victim})" if c.judge == "nan" else f" ({c.judge})")
        if not _kept(c.a_buf, r.a_buf, c.a_idx) or not _kept(c.b_buf, r.b_buf, c.b_idx):
            problems.append(f"{tag}: wrote outside the matrices or the right-hand sides (unused lanes included)")
        piv = r.piv_buf
        used = np.r_[GUARD:GUARD + count * n, c.info_at():c.info_at() + count]
        outside = np.ones(piv.shape, bool)
        outside[used[used < len(piv)]] = False
        if len(piv) != c.piv_len() or (piv[outside] != PIV_CANARY).any():
            problems.append(f"{tag}: wrote outside ipiv or info")
            continue
        if not r.lu_unchanged:
            problems.append(f"{tag}: the solve changed the factors or the pivots")
        if r.info != 0 or r.code != 0:
            problems.append(f"{tag}: factor returned {r.info} and solve {r.code}, expected 0 and 0")
            continue
        info = piv[c.info_at():c.info_at() + count].astype(np.intp)
        ipiv = piv[GUARD:GUARD + count * n].reshape(count, n).astype(np.intp)
        lu, x = r.a_buf[c.a_idx], r.b_buf[c.b_idx]
        seen[k] = (info, ipiv, lu, x)
        if ((ipiv < 0) | (ipiv >= max(n, 1))).any():
            problems.append(f"{tag}: pivot entries outside 0..n-1")
            continue
        wrong = [m for m in range(count) if info[m] != c.expect[m]]
        if wrong:
            problems.append(f"{tag}: codes {list(info)}, expected {list(c.expect)}")
        if c.judge == "nan":
            rest = [m for m in range(count) if m != c.victim]
            ref = seen.get(c.twin)
            if ref is None or not all(_same_bits(np.ascontiguousarray(got[rest]), np.ascontiguousarray(want[rest]))
                                      for got, want in zip((lu, x), ref[2:])) or \
                    not all(np.array_equal(got[rest], want[rest]) for got, want in zip((info, ipiv), ref[:2])):
                problems.append(f"{tag}: the NaN changed another matrix's factors, pivots, code or solution")
        if c.judge == "exact":
            off = not_exact(lu, ipiv, *c.exact)
            if off:
                problems.append(f"{tag}: matrices {off} differ from their exactly known factors or pivots")
        for m in range(count if n and c.judge != "nan" else 0):
            if c.judge == "random" and not np.array_equal(ipiv[m], getrf(c.mats[m])[1]):
                problems.append(f"{tag}: matrix {m}: pivots differ from LAPACK getrf's")
            wf = max(wf, factor_ratio(c.mats[m], lu[m], ipiv[m]))
            if c.judge == "random":
                wc = max(wc, componentwise_ratio(c.mats[m], lu[m], ipiv[m]))
            if c.expect[m] == 0:
                ws = max(ws, solve_ratio(c.mats[m], x[m], c.b[m]))
        if host is not None:
            hcode, hinfo, hlu, hpiv, _ = host.factor(c.mats)
            same = hcode == 0 and np.array_equal(hinfo, info) and np.array_equal(hpiv, ipiv) and \
                _same_or_nan(hlu, lu)
            if same:
                _, hx, _ = host.solve(hlu, hpiv, c.b)
                same = _same_or_nan(hx, x)
            identical = identical and same
    # plain C and the vector extensions are documented bit-identical, so the host build is the reference too
    return verdict(o, t, cases, sum(c.count for c in cases), results, (wf, wc, ws), problems,
                   identical if host is not None else None)
