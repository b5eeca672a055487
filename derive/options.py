"""One kernel's settings as a single frozen, validated value; everything downstream of the spec reads only this.
The allowed values live here so the spec reader, the CLI and the docs name the same ones."""
from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, dataclass

from derive.engine import operation
from derive.engine.invariants import by_name, make
from derive.targets.table import TARGETS

SCALARS = ("double", "float")
LAYOUTS = ("column-major", "row-major")
PIVOTING = ("none", "partial")
C_HELPERS = ("inline", "functions")     # inner operations as loops in the routine body, or as static functions
PANELS = ("loop", "recursive")   # how the bottom level factors its panel: one column a step, or halves recursively
                                 # (unblocked and recursive: the whole matrix is the panel)
MAX_BLOCK = 4096
MAX_SIZE = 32       # fixed-size kernels: n from 1 to this (larger n gains little over the runtime-n kernels)
MAX_LANES = 64       # matrices interleaved in one group (`lanes`); 1 means not batched

C_KEYWORDS = frozenset("""auto break case char const continue default do double else enum extern float for goto if
inline int long register restrict return short signed sizeof static struct switch typedef union unsigned void
volatile while _Alignas _Alignof _Atomic _Bool _Complex _Generic _Imaginary _Noreturn _Static_assert
_Thread_local""".split())


@dataclass(frozen=True, slots=True)
class KernelOptions:
    name: str
    invariant: tuple[str, ...]      # LU state words, in the operation's region order
    block: int
    inner: tuple[str, ...]          # state words of the unblocked loop used on each diagonal block or panel
    scalar: str
    layout: str
    pivoting: str
    solve_lower: tuple[str, ...]    # state words of the forward (unit lower) solve
    solve_upper: tuple[str, ...]    # state words of the backward (upper) solve
    spec: str = ""                  # the spec file's name, for the banner
    size: int | None = None         # n fixed at compile time (a fixed-size kernel), or None for n an argument
    constant_time: bool = True      # fixed-size pivoted kernels: pivot by selects (True) or by branches
    lanes: int = 1                  # W matrices interleaved element by element (batched kernel); 1: one matrix
    c_helpers: str = "inline"       # how the C reads: inner operations inline as loops, or as helper functions
    python: bool = True             # also write the NumPy twin NAME.py (False: C only, for a firmware tree)
    target: str = "generic"         # row of the target table the GEMM micro-kernels are specialised for
    levels: tuple[tuple[int, tuple[str, ...]], ...] = ()   # blocked levels between the outer loop and the
                                    # unblocked one: (block size, state words of that level's loop), outer first
    panel: str = "loop"

    def __post_init__(self) -> None:
        if self.target not in TARGETS:
            raise ValueError(f"target {self.target!r} is not in the target table; allowed: {', '.join(TARGETS)}")
        if not is_c_identifier(self.name) or self.name in C_KEYWORDS:
            raise ValueError(f"kernel name {self.name!r} must be a C identifier that is not a C keyword")
        if self.scalar not in SCALARS or self.layout not in LAYOUTS or self.pivoting not in PIVOTING:
            raise ValueError("scalar, layout or pivoting out of range")
        if self.c_helpers not in C_HELPERS or not isinstance(self.python, bool):
            raise ValueError(f"c_helpers must be one of {C_HELPERS} and python a bool")
        if not 1 <= self.block <= MAX_BLOCK:
            raise ValueError(f"block must be from 1 to {MAX_BLOCK}")
        if self.size is not None and (isinstance(self.size, bool) or not 1 <= self.size <= MAX_SIZE):
            raise ValueError(f"size must be from 1 to {MAX_SIZE}")
        make(operation.LU, self.invariant)
        sizes = [self.block] + [b for b, _ in self.levels]
        if any(not 2 <= b <= MAX_BLOCK for b, _ in self.levels) or any(x <= y for x, y in zip(sizes, sizes[1:])):
            raise ValueError("the block sizes of the levels must decrease, each from 2 up")
        for _, words in self.levels:
            make(operation.LU, words)
        if self.panel not in PANELS or (self.panel == "recursive" and self.lanes > 1):
            raise ValueError(f"panel must be one of {PANELS}, and \"loop\" for a batched kernel")
        make(operation.LU, self.inner)
        make(operation.LOWER_SOLVE, self.solve_lower)
        make(operation.UPPER_SOLVE, self.solve_upper)
        if isinstance(self.lanes, bool) or not isinstance(self.lanes, int) or not 1 <= self.lanes <= MAX_LANES:
            raise ValueError(f"lanes must be an integer from 1 to {MAX_LANES}")
        if self.lanes > 1 and self.pivoting != "partial":
            raise ValueError("lanes > 1 needs pivoting = partial (each lane pivots and reports on its own)")

    @property
    def loop(self) -> str:
        return make(operation.LU, self.invariant).label

    @property
    def inner_loop(self) -> str:
        return make(operation.LU, self.inner).label

    @property
    def lower_loop(self) -> str:
        return make(operation.LOWER_SOLVE, self.solve_lower).label

    @property
    def upper_loop(self) -> str:
        return make(operation.UPPER_SOLVE, self.solve_upper).label

    def settings(self) -> dict:
        """The settings that determine the emitted code (the spec file's name does not)."""
        d = asdict(self)
        d.pop("spec")
        if d["size"] is None:
            d.pop("size")   # runtime-n kernels keep the hash they had before fixed sizes existed
        else:
            d.pop("c_helpers")  # a fixed-size kernel has its own printer; the shaping does not apply
        if d["constant_time"]:
            d.pop("constant_time")
        if self.lanes == 1:
            d.pop("lanes")      # a single-matrix kernel keeps the settings (and hash) it had before lanes existed
        if self.lanes != 1 and "c_helpers" in d:
            d.pop("c_helpers")  # nor does it to a batched kernel
        d.pop("python")     # which files are written, not what the code does
        for key, default in ADDED_DEFAULTS.items():
            # settings added later leave the hash of kernels that keep their default unchanged
            if d[key] == default:
                d.pop(key)
        d.update(loop=self.loop, inner_loop=self.inner_loop, lower_loop=self.lower_loop,
                 upper_loop=self.upper_loop)
        return d

    def digest(self) -> str:
        blob = json.dumps(self.settings(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(blob.encode()).hexdigest()[:16]


ADDED_DEFAULTS = {"target": "generic", "levels": (), "panel": "loop"}


def is_c_identifier(s: str) -> bool:
    return bool(s) and (s[0].isalpha() or s[0] == "_") and all(ch.isalnum() or ch == "_" for ch in s) and s.isascii()


DEFAULT_SOLVE_LOOP = {"column-major": "outer-product", "row-major": "inner-product"}
# why: the outer-product form reads L and U by columns and the inner-product form by rows, so each reads the
# factor along its storage order (common practice)


def make_options(name: str, loop: str, block: int = 1, inner: str | None = None, scalar: str = "double",
                 layout: str = "column-major", pivoting: str = "none", solve_loop: str | None = None,
                 spec: str = "", size: int | None = None, constant_time: bool = True,
                 lanes: int = 1, c_helpers: str = "inline", python: bool = True,
                 target: str = "generic") -> KernelOptions:
    """Convenience constructor from trade names (the spec reader validates and reports errors itself)."""
    inv = by_name(operation.LU, loop).words
    inn = by_name(operation.LU, inner or loop).words
    sl = solve_loop or DEFAULT_SOLVE_LOOP[layout]
    return KernelOptions(name, inv, block, inn if block > 1 else inv, scalar, layout, pivoting,
                         by_name(operation.LOWER_SOLVE, sl).words, by_name(operation.UPPER_SOLVE, sl).words, spec, size,
                         constant_time, lanes, c_helpers, python, target)
