"""Tables a printer reads for storage layout and scalar type. A new layout, precision or target is a new row here
(and, for a target with its own micro-kernels, a printer subclass), never a branch in the engine."""
from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class Layout:
    name: str
    index: str          # C expression of the offset of element (i, j) with leading dimension ld
    leading: str        # which extent the leading dimension must cover: "rows" or "cols"
    describe: str
    helpers: str        # template of the inner operations whose loop order suits this storage


@dataclass(frozen=True, slots=True)
class Scalar:
    name: str           # spec word
    c_type: str
    c_zero: str
    numpy: str          # numpy dtype name
    unit_roundoff_exp: int   # u = 2**-p  (IEEE 754 binary64: 53, binary32: 24)
    c_min_normal: str = ""   # the smallest normal number, a C constant (LAPACK's SFMIN for this format)
    c_lift: str = ""         # a power of two that lifts any subnormal into the normal range, a C constant
    bytes: int = 8           # storage size of one value
    c_bits: str = "int64_t"  # the <stdint.h> integer of the same size (the lanes of a comparison's mask)


LAYOUTS = {
    "column-major": Layout("column-major", "(i) + ((j) * (ld))", "rows", "element (i, j) is a[i + j*lda]",
                           "c/helpers_column_major.c.j2"),
    "row-major": Layout("row-major", "((i) * (ld)) + (j)", "cols", "element (i, j) is a[i*lda + j]",
                        "c/helpers_row_major.c.j2"),
}

SCALARS = {
    "double": Scalar("double", "double", "0.0", "float64", 53, "0x1p-1022", "0x1p54"),
    "float": Scalar("float", "float", "0.0f", "float32", 24, "0x1p-126f", "0x1p25f", 4, "int32_t"),
}
