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
