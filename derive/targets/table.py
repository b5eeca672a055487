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
    pack_from: int = 16     # smallest kernel block size whose GEMM updates are packed; below it the plain loops
                            # win, since packing costs O(mk + kn) and pays off only over k-long dot products
    strip: int = 32         # columns per strip when row interchanges are applied column-outer
    tri: int = 32           # diagonal blocks a blocked TRSM solves by plain loops (the rest goes through GEMM)
    tri_cols: int = 64      # columns of B a unit-lower diagonal block is solved on at once, copied by rows
    leaf: int = 8           # a recursive panel stops halving at this many columns and runs the unblocked loop
    unroll: int = 1         # steps of the micro-kernel's k-loop printed per pass (vector micro-kernels)

    def __post_init__(self) -> None:
        if min(self.mr, self.nr, self.mc, self.kc, self.nc, self.pack_from, self.strip, self.tri, self.leaf,
               self.unroll, self.tri_cols) < 1:
            raise ValueError("every block extent must be >= 1")
        if self.mc % self.mr or self.nc % self.nr:
            raise ValueError("mc must be a multiple of mr and nc of nr")


@dataclass(frozen=True, slots=True)
class Simd:
    """How one scalar's vector registers are spelled in a target's intrinsics: the header, the vector type and
    the operations the micro-kernel uses (unaligned load and store, broadcast, zero, fused multiply-add)."""
    header: str
    vtype: str
    lanes: int
    loadu: str
    storeu: str
    set1: str
    setzero: str
    fmadd: str
    sub: str
    prefetch: str = ""      # statement that pulls the cache line at address {p} into L1; "" if none

    def __post_init__(self) -> None:
        if self.lanes < 1:
            raise ValueError("a vector holds at least one lane")


def _x86(width: int, scalar: str) -> Simd:
    """Intel's intrinsic naming: _mm<width>_<op>_<pd|ps>, types __m<width>[d] (common practice)."""
    w = "" if width == 128 else str(width)
    sfx, vt, lanes = ("pd", f"__m{width}d", width // 64) if scalar == "double" else ("ps", f"__m{width}", width // 32)
    return Simd("immintrin.h", vt, lanes, f"_mm{w}_loadu_{sfx}", f"_mm{w}_storeu_{sfx}", f"_mm{w}_set1_{sfx}",
                f"_mm{w}_setzero_{sfx}", f"_mm{w}_fmadd_{sfx}", f"_mm{w}_sub_{sfx}",
                "_mm_prefetch((const char *)({p}), _MM_HINT_T0)")


@dataclass(frozen=True, slots=True)
class Target:
    name: str
    describe: str
    # -- what emitted C is specialised for ---------------------------------------------------------------------
    vector_bytes: int                       # SIMD register width the micro-kernels assume; 0: plain scalar C
    blocking: tuple[tuple[str, Blocking], ...]   # scalar name -> register/cache blocks
    codegen_flags: tuple[str, ...] = ()     # flags a kernel specialised for this target needs (ISA extensions)
    simd: tuple[tuple[str, Simd], ...] = ()  # scalar -> intrinsics of the micro-kernel; absent: portable C loops
    ext_vector_bytes: int = 0               # rows without simd: width of the GCC/Clang vector-extension type the
                                            # portable micro-kernel uses when __GNUC__ is defined (plain C loops
                                            # otherwise); 0: plain C loops only
    cpu_features: tuple[str, ...] = ()      # /proc/cpuinfo flags a machine needs to run such a kernel
    lane_bytes: int = 0                     # batched (lanes) kernels: bytes of one lane vector (GCC/Clang vector
                                            # extensions); 0: one lane at a time in plain C
    # -- where a kernel is built and run to be checked ---------------------------------------------------------
    cc: tuple[str, ...] = ("cc",)           # the compiler command (CC overrides it for the host rows)
    cflags: tuple[str, ...] = ()            # architecture, FPU and ABI
    ldflags: tuple[str, ...] = ()
    native: tuple[str, ...] = ("float", "double")   # scalars the hardware computes natively
    image: str = "hosted"                   # "hosted": a program for an OS (or user-mode emulator); "bare": startup
                                            # code, vector table and linker script from templates/targets/
    runner: tuple[str, ...] = ()            # command that runs an image, "{image}" replaced; () runs it directly
    counting: str = "none"                  # how executed instructions are counted: "none" or "plugin" (QEMU TCG)
    packages: tuple[str, ...] = ()          # Debian packages that provide the compiler and the runner
    extra: tuple[tuple[str, str], ...] = field(default=())   # row-specific facts (memory map, machine) by name
    opt: tuple[str, ...] = ("-O2",)         # optimisation the kernel is checked and measured with
    startup: str = ""                       # bare images: startup file in templates/targets/ (vector table, reset)
    memory: tuple[int, int, int, int] = (0, 0, 0, 0)   # bare images: code origin and length, RAM origin and length
    max_n: int = 64                         # largest order whose test matrices fit the image's RAM
    paint_bytes: int = 16384                # stack painted below the driver's frame to measure what a call uses
    float_mnemonics: tuple[str, ...] = ()   # disassembler mnemonic prefixes counted as floating-point instructions
    tools: str = ""                         # binutils prefix for size, nm and objdump ("" for the host's)
    timeout: float = 300.0                  # seconds one image may run
    one_column_solve: bool = True           # runtime-n solves get a path of their own for one right-hand side:
                                            # 0.78-0.87x the time on x86, but 37 % more solve code on Cortex-M4
                                            # (504 -> 690 bytes at -Os), so the microcontroller rows go without

    def __post_init__(self) -> None:
        if self.image not in ("hosted", "bare"):
            raise ValueError(f"target {self.name}: image must be hosted or bare")
        if self.counting not in ("none", "plugin"):
            raise ValueError(f"target {self.name}: counting must be none or plugin")
        if self.image == "bare" and (not self.startup or not all(self.memory[1::2])):
            raise ValueError(f"target {self.name}: a bare image needs a startup file and a memory map")
        if self.max_n < 1 or self.paint_bytes % 4:
            raise ValueError(f"target {self.name}: max_n must be >= 1 and paint_bytes a multiple of 4")
        if self.vector_bytes < 0:
            raise ValueError(f"target {self.name}: vector_bytes must be >= 0")
        if self.lane_bytes < 0 or self.lane_bytes & (self.lane_bytes - 1):
            raise ValueError(f"target {self.name}: lane_bytes must be 0 or a power of two")
        if self.ext_vector_bytes and (self.simd or any(
                self.ext_vector_bytes % (8 if s == "double" else 4) or
                b.mr % (self.ext_vector_bytes // (8 if s == "double" else 4)) for s, b in self.blocking)):
            raise ValueError(f"target {self.name}: extension vectors are for rows without simd; they must hold "
                             f"whole scalars and divide mr")
        for scalar, v in self.simd:
            b = self.blocks(scalar)
            if v.lanes * (8 if scalar == "double" else 4) != self.vector_bytes or b.mr % v.lanes:
                raise ValueError(f"target {self.name}: {scalar} vectors must fill vector_bytes and divide mr")

    def lane_vector(self, lanes: int, scalar_bytes: int) -> int:
        """Lanes per lane vector of a batched kernel of `lanes` interleaved matrices: the largest power of two
        that divides `lanes` and fits lane_bytes (1: plain C, one lane at a time)."""
        vl = 1
        while lanes % (2 * vl) == 0 and 2 * vl * scalar_bytes <= self.lane_bytes:
            vl *= 2
        return vl

    def blocks(self, scalar: str) -> Blocking:
        return dict(self.blocking)[scalar]

    def vectors(self, scalar: str) -> Simd | None:
        return dict(self.simd).get(scalar)


# Register blocks from the register count and vector width (common practice: an mr x nr accumulator tile
# that leaves a few registers for the A and B vectors); cache blocks sized so a kc x nr sliver of B stays in
# L1 and an mc x kc panel of A in L2 (common practice). Tuned figures replace these as they are measured.
_SCALAR_C = (("double", Blocking(4, 4, 64, 128, 512)), ("float", Blocking(4, 4, 64, 128, 512)))
# generic: 8 x 6 doubles vectorize cleanly when a compiler has 256-bit registers (-march=native on a
# current x86 or a 2 x 128-bit core) and stay correct, only slower, in plain scalar code; cache blocks for a
# desktop-class core (32 KB L1, 1 MB L2).
# unroll = 4: the packed GEMM alone (2048 x 2048 x 256, gcc 12 -O3 -march=native, Zen 4, against OpenBLAS dgemm
# by thread CPU time, best of 5, 4 interleaved rounds) went from 0.89-0.98x to 0.96-1.07x for generic and was
# unchanged (0.91-1.00x against 0.88-1.00x) for x86-64-v3; mc, kc, nc, tri (16/32/64) and leaf (8/16) moved the
# LU at n = 2048 by less than the run-to-run spread of a shared machine (about 10 %), so they stay as they were.
_GENERIC = (("double", Blocking(8, 6, 96, 256, 1536, unroll=4)), ("float", Blocking(16, 6, 96, 256, 1536, unroll=4)))
# x86-64-v3: 16 ymm registers; 8 x 6 doubles = 12 accumulators + 2 A vectors + 1 broadcast (common practice).
_AVX2 = (("double", Blocking(8, 6, 96, 256, 1536, unroll=4)), ("float", Blocking(16, 6, 96, 256, 1536, unroll=4)))
# x86-64-v4: 32 zmm registers; 16 x 12 doubles = 24 accumulators + 2 A vectors + 1 broadcast.
_AVX512 = (("double", Blocking(16, 12, 96, 256, 1536, unroll=4)),
           ("float", Blocking(32, 12, 96, 256, 1536, unroll=4)))

_QEMU_BARE = ("-semihosting-config", "enable=on,target=native", "-nographic", "-monitor", "none",
              "-serial", "none")
_M_PROFILE = ("-mthumb", "-ffreestanding")
_ARM_EABI = dict(cc=("arm-none-eabi-gcc",), tools="arm-none-eabi-", image="bare", startup="cortex-m.S",
                 counting="plugin", float_mnemonics=("v",), opt=("-Os",), ldflags=("-nostartfiles",),
                 packages=("gcc-arm-none-eabi", "libnewlib-arm-none-eabi", "qemu-system-arm"),
                 one_column_solve=False)
# mps2 boards: code in SSRAM1 at 0, data in SSRAM2/3 at 0x20000000 (QEMU's mps2 machines, 4 MB each).
_MPS2 = (0x0, 0x400000, 0x20000000, 0x400000)
# RISC-V names every float instruction with a leading f (fadd.s, flw, fmadd.s, fcvt, fmv, feq, fsgnj).
_RV_FLOAT = ("f",)
# AArch64: the scalar float data-processing mnemonics; loads and stores of s/d registers are not counted.
_A64_FLOAT = ("f", "scvtf", "ucvtf")

TARGETS: dict[str, Target] = {t.name: t for t in (
    # lane vectors of 32 bytes: one AVX register on current x86, two NEON registers on Arm (common practice);
    # a compiler without 256-bit registers splits each operation, a compiler without vector extensions gets
    # the plain C spelling. The packed micro-kernel's extension vectors are the same width, for the same reason.
    Target("generic", "portable C99 for any compiler and core; built and run on this machine", 0, _GENERIC,
           lane_bytes=32, ext_vector_bytes=32),
    Target("x86-64-v3", "x86-64 with AVX2 and FMA (Haswell, Zen and later): 256-bit fused multiply-add "
           "micro-kernels", 32, _AVX2, codegen_flags=("-mavx2", "-mfma"),
           simd=(("double", _x86(256, "double")), ("float", _x86(256, "float"))),
           cpu_features=("avx2", "fma"), lane_bytes=32),
    Target("x86-64-v4", "x86-64 with AVX-512 F/VL/DQ/BW (Skylake-X, Zen 4 and later): 512-bit micro-kernels",
           64, _AVX512, codegen_flags=("-mavx512f", "-mavx512vl", "-mavx512dq", "-mavx512bw", "-mavx2",
                                       "-mfma"),
           simd=(("double", _x86(512, "double")), ("float", _x86(512, "float"))),
           cpu_features=("avx512f", "avx512vl", "avx512dq", "avx512bw"), lane_bytes=64),
    Target("host", "this machine, natively", 0, _SCALAR_C, packages=("gcc",), lane_bytes=32),
    Target("cortex-m4f", "Arm Cortex-M4 with single-precision FPU, bare metal on QEMU mps2-an386", 0, _SCALAR_C,
           cflags=("-mcpu=cortex-m4", "-mfpu=fpv4-sp-d16", "-mfloat-abi=hard", *_M_PROFILE), native=("float",),
           runner=("qemu-system-arm", "-M", "mps2-an386", *_QEMU_BARE, "-kernel", "{image}"), memory=_MPS2,
           **_ARM_EABI),
    Target("cortex-m7", "Arm Cortex-M7 with double-precision FPU, bare metal on QEMU mps2-an500", 0, _SCALAR_C,
           cflags=("-mcpu=cortex-m7", "-mfpu=fpv5-d16", "-mfloat-abi=hard", *_M_PROFILE),
           runner=("qemu-system-arm", "-M", "mps2-an500", *_QEMU_BARE, "-kernel", "{image}"), memory=_MPS2,
           **_ARM_EABI),
    # micro:bit (nRF51822): 256 KB flash at 0, 16 KB RAM at 0x20000000; n <= 16 keeps a double test case with
    # its canaries and right-hand sides, the copy of the factors and a 2 KB painted stack inside that RAM.
    Target("cortex-m0", "Arm Cortex-M0 without FPU (libgcc software float), bare metal on QEMU microbit", 0,
           _SCALAR_C, cflags=("-mcpu=cortex-m0", "-mfloat-abi=soft", *_M_PROFILE), native=(),
           runner=("qemu-system-arm", "-M", "microbit", *_QEMU_BARE, "-kernel", "{image}"),
           memory=(0x0, 0x40000, 0x20000000, 0x4000), max_n=16, paint_bytes=2048, **_ARM_EABI),
    # The bare-metal riscv64-unknown-elf gcc, not Debian's riscv64-linux-gnu one: only it ships an rv32imafc/ilp32f
    # libgcc, which double (software) kernels need; the Linux one also makes position-independent code by default.
    Target("rv32imafc", "RISC-V RV32IMAFC, single-precision FPU, bare metal on QEMU virt", 0, _SCALAR_C,
           cc=("riscv64-unknown-elf-gcc",), tools="riscv64-unknown-elf-",
           cflags=("-march=rv32imafc", "-mabi=ilp32f", "-mcmodel=medany", "-ffreestanding"),
           ldflags=("-nostdlib", "-nostartfiles", "-Wl,--build-id=none"), native=("float",),
           image="bare", startup="riscv.S", memory=(0x80000000, 0x400000, 0x80400000, 0x400000),
           runner=("qemu-system-riscv32", "-M", "virt", "-bios", "none", *_QEMU_BARE, "-kernel", "{image}"),
           counting="plugin", float_mnemonics=_RV_FLOAT, opt=("-Os",), one_column_solve=False,
           packages=("gcc-riscv64-unknown-elf", "qemu-system-misc")),
    Target("aarch64-linux", "64-bit Arm Linux, static, on qemu-aarch64 (user mode)", 0, _SCALAR_C,
           cc=("aarch64-linux-gnu-gcc",), tools="aarch64-linux-gnu-", ldflags=("-static",),
           runner=("qemu-aarch64", "{image}"), counting="plugin", float_mnemonics=_A64_FLOAT, lane_bytes=16,
           packages=("gcc-aarch64-linux-gnu", "libc6-dev-arm64-cross", "qemu-user")),
    Target("rv64gc-linux", "64-bit RISC-V Linux, static, on qemu-riscv64 (user mode)", 0, _SCALAR_C,
           cc=("riscv64-linux-gnu-gcc",), tools="riscv64-linux-gnu-", ldflags=("-static",),
           runner=("qemu-riscv64", "{image}"), counting="plugin", float_mnemonics=_RV_FLOAT,
           packages=("gcc-riscv64-linux-gnu", "libc6-dev-riscv64-cross", "qemu-user")),
)}

# The rows `verify --target all` and `report` go through: every row with a place to build and run.
CHECK_ROWS = ("host", "cortex-m4f", "cortex-m7", "cortex-m0", "rv32imafc", "aarch64-linux", "rv64gc-linux")


def runs_here(t: Target) -> bool:
    """Whether this machine's CPU has every feature the target's kernels use (Linux /proc/cpuinfo)."""
    if not t.cpu_features:
        return True
    try:
        with open("/proc/cpuinfo", encoding="ascii", errors="replace") as fh:
            flags = next((ln.split(":", 1)[1].split() for ln in fh if ln.startswith("flags")), [])
    except OSError:
        return False
    return set(t.cpu_features) <= set(flags)


def get(name: str) -> Target:
    try:
        return TARGETS[name]
    except KeyError:
        raise KeyError(f"unknown target {name!r}; allowed: {', '.join(TARGETS)}") from None
