"""The target table: one row per target, saying both what emitted C may be specialised for (vector width,
register and cache blocks) and where a kernel is built and run to be checked (compiler, flags, image, runner)."""
from __future__ import annotations

from dataclasses import dataclass, field


@dataclass(frozen=True, slots=True)
class Blocking:
    """Register and cache blocks of the packed GEMM for one scalar: an mr x nr tile of accumulators, and
    panels of mc x kc (A) and kc x nc (B) sized to stay in the caches."""
    mr: int
    nr: int
    mc: int
    kc: int
    nc: int

    def __post_init__(self) -> None:
        if min(self.mr, self.nr, self.mc, self.kc, self.nc) < 1:
            raise ValueError("every block extent must be >= 1")
        if self.mc % self.mr or self.nc % self.nr:
            raise ValueError("mc must be a multiple of mr and nc of nr")


@dataclass(frozen=True, slots=True)
class Target:
    name: str
    describe: str
    # -- what emitted C is specialised for ---------------------------------------------------------------------
    vector_bytes: int                       # SIMD register width the micro-kernels assume; 0: plain scalar C
    blocking: tuple[tuple[str, Blocking], ...]   # scalar name -> register/cache blocks
    codegen_flags: tuple[str, ...] = ()     # flags a kernel specialised for this target needs (ISA extensions)
    # -- where a kernel is built and run to be checked ---------------------------------------------------------
    cc: tuple[str, ...] = ("cc",)           # the compiler command (CC overrides it for the host rows)
    cflags: tuple[str, ...] = ()            # architecture, FPU and ABI
    ldflags: tuple[str, ...] = ()
    native: tuple[str, ...] = ("float", "double")   # scalars the hardware computes natively
    image: str = "hosted"                   # "hosted": a program for an OS (or user-mode emulator); "bare": startup
                                            # code, vector table and linker script from templates/targets/
    runner: tuple[str, ...] = ()            # command that runs an image, "{image}" replaced; () runs it directly
    counting: str = "none"                  # how executed instructions are counted: "none", "plugin" or "icount"
    packages: tuple[str, ...] = ()          # Debian packages that provide the compiler and the runner
    extra: tuple[tuple[str, str], ...] = field(default=())   # row-specific facts (memory map, machine) by name

    def __post_init__(self) -> None:
        if self.image not in ("hosted", "bare"):
            raise ValueError(f"target {self.name}: image must be hosted or bare")
        if self.counting not in ("none", "plugin", "icount"):
            raise ValueError(f"target {self.name}: counting must be none, plugin or icount")
        if self.vector_bytes < 0:
            raise ValueError(f"target {self.name}: vector_bytes must be >= 0")

    def blocks(self, scalar: str) -> Blocking:
        return dict(self.blocking)[scalar]


# Register blocks from the register count and vector width (common practice: an mr x nr accumulator tile
# that leaves a few registers for the A and B vectors); cache blocks sized so a kc x nr sliver of B stays in
# L1 and an mc x kc panel of A in L2 (common practice). Tuned figures replace these as they are measured.
_SCALAR_C = (("double", Blocking(4, 4, 64, 128, 512)), ("float", Blocking(4, 4, 64, 128, 512)))

TARGETS: dict[str, Target] = {t.name: t for t in (
    Target("generic", "portable C99 for any compiler and core; built and run on this machine", 0, _SCALAR_C),
)}


def get(name: str) -> Target:
    try:
        return TARGETS[name]
    except KeyError:
        raise KeyError(f"unknown target {name!r}; allowed: {', '.join(TARGETS)}") from None
