"""Calling built C kernels from NumPy: place a logical matrix in a padded buffer in the kernel's layout with
canary values around and between its columns (or rows), call through cffi, and report any canary that changed."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from derive.options import KernelOptions
from derive.targets.storage import LAYOUTS, SCALARS

GUARD = 7           # canary entries before and after every buffer
CANARY = -7.25e11   # exactly representable in float32 and float64, and not a value a factorization produces here


@dataclass
class Placed:
    buf: np.ndarray
    offset: int
    rows: int
    cols: int
    ld: int
    layout: str

    def index(self) -> np.ndarray:
        i, j = np.meshgrid(np.arange(self.rows), np.arange(self.cols), indexing="ij")
        if self.layout == "column-major":
            return self.offset + i + j * self.ld
        return self.offset + i * self.ld + j

    def read(self) -> np.ndarray:
        return self.buf[self.index()] if self.rows and self.cols else np.zeros((self.rows, self.cols),
                                                                                   self.buf.dtype)

    def untouched(self, canary: np.ndarray) -> bool:
        mask = np.ones(self.buf.shape, bool)
        if self.rows and self.cols:
            mask[self.index().ravel()] = False
        return bool(np.array_equal(self.buf[mask], canary[mask]))


def place(x: np.ndarray, ld: int, layout: str, dtype) -> tuple[Placed, np.ndarray]:
    rows, cols = x.shape
    lead = rows if LAYOUTS[layout].leading == "rows" else cols
    other = cols if LAYOUTS[layout].leading == "rows" else rows
    assert ld >= max(1, lead)
    size = GUARD * 2 + ld * max(other, 1)
    buf = np.full(size, CANARY, dtype=dtype)
    p = Placed(buf, GUARD, rows, cols, ld, layout)
    if rows and cols:
        buf[p.index()] = x
    return p, buf.copy()


class CKernel:
    """One built kernel: factor and solve on logical NumPy matrices, with leading dimensions and canaries."""

    def __init__(self, module, options: KernelOptions):
        self.ffi, self.lib = module.ffi, module.lib
        self.o = options
        self.dtype = np.dtype(SCALARS[options.scalar].numpy)
        self.ctype = SCALARS[options.scalar].c_type
        self.pivoted = options.pivoting != "none"
        self.fixed = options.size is not None     # fixed-size ABI: no n argument
        self._factor = getattr(self.lib, options.name)
        self._solve = getattr(self.lib, options.name + "_solve")

    def ptr(self, buf: np.ndarray, offset: int, ctype: str):
        return self.ffi.cast(f"{ctype} *", buf.ctypes.data + offset * buf.itemsize)

    def factor(self, a: np.ndarray, lda: int | None = None):
        """Returns (info, lu, ipiv or None, canaries_ok)."""
        n = a.shape[0]
        lda = lda or max(1, n)
        placed, canary = place(np.asarray(a, dtype=self.dtype), lda, self.o.layout, self.dtype)
        if self.fixed and n != self.o.size:
            raise ValueError(f"{self.o.name} is a fixed-size kernel for n = {self.o.size}, not {n}")
        args = [] if self.fixed else [n]
        args += [self.ptr(placed.buf, placed.offset, self.ctype), lda]
        piv = None
        if self.pivoted:
            piv = np.full(n + 2 * GUARD, -12345, dtype=np.intc)
            args.append(self.ptr(piv, GUARD, "int"))
        info = self._factor(*args)
        ok = placed.untouched(canary)
        ipiv = None
        if piv is not None:
            ok = ok and bool(np.all(piv[:GUARD] == -12345) and np.all(piv[GUARD + n:] == -12345))
            ipiv = piv[GUARD:GUARD + n].astype(np.intp)
        return info, placed.read(), ipiv, ok

    def solve(self, lu: np.ndarray, b: np.ndarray, ipiv=None, lda: int | None = None, ldb: int | None = None):
        """Returns (code, x, canaries_ok); lu and ipiv are checked unchanged too."""
        n, nrhs = b.shape
        lda = lda or max(1, n)
        lead_b = n if LAYOUTS[self.o.layout].leading == "rows" else nrhs
        ldb = ldb or max(1, lead_b)
        pl, lcan = place(np.asarray(lu, dtype=self.dtype), lda, self.o.layout, self.dtype)
        pb, bcan = place(np.asarray(b, dtype=self.dtype), ldb, self.o.layout, self.dtype)
        args = [nrhs] if self.fixed else [n, nrhs]
        args += [self.ptr(pl.buf, pl.offset, f"const {self.ctype}"), lda]
        if self.pivoted:
            piv = np.full(n + 2 * GUARD, -12345, dtype=np.intc)
            piv[GUARD:GUARD + n] = np.asarray(ipiv, dtype=np.intc)
            pcan = piv.copy()
            args.append(self.ptr(piv, GUARD, "const int"))
        args += [self.ptr(pb.buf, pb.offset, self.ctype), ldb]
        code = self._solve(*args)
        ok = pb.untouched(bcan) and bool(np.array_equal(pl.buf, lcan, equal_nan=True))
        if self.pivoted:
            ok = ok and bool(np.array_equal(piv, pcan))
        return code, pb.read(), ok


# -- batched kernels (lanes = W) ----------------------------------------------------------------------------------

def interleave_index(count: int, n: int, w: int, layout: str) -> np.ndarray:
    """Offsets of element (i, j) of matrix m, shape (count, n, n), in the interleaved storage the header
    documents: ((m / W) * n * n + IDX(i, j)) * W + m % W, IDX the layout's index with leading dimension n."""
    m, i, j = np.meshgrid(np.arange(count), np.arange(n), np.arange(n), indexing="ij")
    idx = i + j * n if layout == "column-major" else i * n + j
    return ((m // w) * n * n + idx) * w + m % w


class LaneKernel:
    """One built batched kernel on (count, n, n) stacks of logical matrices: every buffer sits between canaries,
    and the unused lanes of the last partial group hold canaries too, which must survive every call."""

    def __init__(self, module, options: KernelOptions):
        self.ffi, self.lib = module.ffi, module.lib
        self.o = options
        self.w = options.lanes
        self.dtype = np.dtype(SCALARS[options.scalar].numpy)
        self.ctype = SCALARS[options.scalar].c_type
        self._factor = getattr(self.lib, options.name)
        self._solve = getattr(self.lib, options.name + "_solve")
        self.pack_fn = getattr(self.lib, options.name + "_pack")
        self.unpack_fn = getattr(self.lib, options.name + "_unpack")

    def ptr(self, buf: np.ndarray, offset: int, ctype: str):
        return self.ffi.cast(f"{ctype} *", buf.ctypes.data + offset * buf.itemsize)

    def n_arg(self, n: int) -> tuple[int, ...]:
        """The n argument, which a fixed-size kernel does not take (it must be its size)."""
        if self.o.size is not None:
            assert n == self.o.size, f"kernel {self.o.name} is fixed at n = {self.o.size}"
            return ()
        return (n,)

    def groups(self, count: int) -> int:
        return -(-count // self.w)

    def storage(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(buffer with canaries, index of x's elements in it, copy of the buffer): x is (count, n, n)."""
        count, n = x.shape[:2]
        size = self.groups(count) * n * n * self.w
        buf = np.full(size + 2 * GUARD, CANARY, dtype=self.dtype)
        idx = GUARD + interleave_index(count, n, self.w, self.o.layout)
        buf[idx] = x
        return buf, idx, buf.copy()

    def factor(self, mats: np.ndarray):
        """Returns (code, info (count,), lu (count, n, n), ipiv (count, n), canaries_ok)."""
        count, n = mats.shape[:2]
        buf, idx, before = self.storage(np.asarray(mats, dtype=self.dtype))
        piv = np.full(count * n + 2 * GUARD, -12345, dtype=np.intc)
        info = np.full(count + 2 * GUARD, -12345, dtype=np.intc)
        code = self._factor(count, *self.n_arg(n), self.ptr(buf, GUARD, self.ctype), self.ptr(piv, GUARD, "int"),
                            self.ptr(info, GUARD, "int"))
        mask = np.ones(buf.shape, bool)
        mask[idx.ravel()] = False
        ok = bool(np.array_equal(buf[mask], before[mask]))
        for arr, used in ((piv, count * n), (info, count)):
            ok = ok and bool(np.all(arr[:GUARD] == -12345) and np.all(arr[GUARD + used:] == -12345))
        return (code, info[GUARD:GUARD + count].astype(np.intp), buf[idx],
                piv[GUARD:GUARD + count * n].reshape(count, n).astype(np.intp), ok)

    def solve(self, lu: np.ndarray, ipiv: np.ndarray, b: np.ndarray):
        """b (count, n), one right-hand side per matrix. Returns (code, x, canaries_ok); lu and ipiv unchanged."""
        count, n = b.shape
        lbuf, _, lbefore = self.storage(np.asarray(lu, dtype=self.dtype))
        # b is an n x 1 matrix per lane: its interleaved offsets are those of column 0 of an n x n stack, packed
        bidx = GUARD + ((np.arange(count)[:, None] // self.w) * n + np.arange(n)[None, :]) * self.w \
            + (np.arange(count)[:, None] % self.w)
        bbuf = np.full(self.groups(count) * n * self.w + 2 * GUARD, CANARY, dtype=self.dtype)
        bbuf[bidx] = b
        bbefore = bbuf.copy()
        piv = np.full(count * n + 2 * GUARD, -12345, dtype=np.intc)
        piv[GUARD:GUARD + count * n] = np.asarray(ipiv, dtype=np.intc).ravel()
        pbefore = piv.copy()
        code = self._solve(count, *self.n_arg(n), self.ptr(lbuf, GUARD, f"const {self.ctype}"),
                           self.ptr(piv, GUARD, "const int"), self.ptr(bbuf, GUARD, self.ctype))
        mask = np.ones(bbuf.shape, bool)
        mask[bidx.ravel()] = False
        ok = bool(np.array_equal(bbuf[mask], bbefore[mask]) and np.array_equal(lbuf, lbefore, equal_nan=True)
                  and np.array_equal(piv, pbefore))
        return code, bbuf[bidx], ok

    def pack(self, mats: np.ndarray) -> np.ndarray:
        """The C pack helper's interleaved storage of (count, n, n) matrices (unused lanes: canaries)."""
        count, n = mats.shape[:2]
        order = "F" if self.o.layout == "column-major" else "C"
        src = np.concatenate([np.asarray(m, dtype=self.dtype).ravel(order=order) for m in mats]) if count else \
            np.zeros(0, self.dtype)
        out = np.full(self.groups(count) * n * n * self.w, CANARY, dtype=self.dtype)
        code = self.pack_fn(count, *self.n_arg(n), self.ptr(src, 0, f"const {self.ctype}"), self.ptr(out, 0, self.ctype))
        assert code == 0
        return out
