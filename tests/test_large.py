"""Large-n kernels (packed GEMM, blocked TRSM, strip swaps; multi-level blocking; recursive panel) for every
target row: the same accuracy checks as the small kernels, at sizes that cross cache blocks and micro-tiles."""
from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

import refcheck as ref
from derive.check.build import OPT_FLAGS, build, compile_object
from derive.check.harness import CKernel
from derive.lowering.counts import kernel_flops, lu_flops
from derive.lowering.lower import lower_kernel
from derive.printers.emit import emit_kernel
from derive.printers.microkernel import uses_packing
from derive.spec import SpecError, parse
from derive.targets.table import TARGETS, get, runs_here

THRESH = 30.0   # LAPACK TESTING/dtest.in

# One entry per kind of large kernel; sizes are chosen so each crosses mc = 96 (A panels), kc = 256 (rank
# updates), the mr x nr micro-tiles with ragged edges, and every level's block.
KINDS = """
[[kernel]]
name = "lg_rl_v3"
loop = "right-looking"
block = [128, 32]
inner = ["left-looking", "crout"]
pivoting = "partial"
target = "x86-64-v3"

[[kernel]]
name = "lg_rec_v3"
loop = "right-looking"
block = 96
inner = "right-looking"
panel = "recursive"
pivoting = "partial"
target = "x86-64-v3"

[[kernel]]
name = "lg_rec_v3_s"
loop = "left-looking"
block = 128
inner = "right-looking"
panel = "recursive"
pivoting = "partial"
scalar = "float"
target = "x86-64-v3"

[[kernel]]
name = "lg_cr_gen"
loop = "crout"
block = [64, 16]
inner = "left-looking"
pivoting = "partial"
panel = "recursive"

[[kernel]]
name = "lg_ll_s_rm"
loop = "left-looking"
block = 48
inner = "crout"
pivoting = "partial"
scalar = "float"
layout = "row-major"
target = "x86-64-v3"

[[kernel]]
name = "lg_up_unpiv"
loop = "up-looking"
block = [40, 20]
inner = ["bordered", "crout"]
target = "x86-64-v3"

[[kernel]]
name = "lg_whole_rec"
loop = "crout"
pivoting = "partial"
panel = "recursive"

[[kernel]]
name = "lg_rl_v4"
loop = "right-looking"
block = [256, 32]
inner = "left-looking"
panel = "recursive"
pivoting = "partial"
target = "x86-64-v4"
"""

OPTIONS = {o.name: o for o in parse(KINDS, "large.toml")}
_BUILT: dict = {}


def kernel(name: str, extra: tuple[str, ...] = ()) -> CKernel:
    o = OPTIONS[name]
    t = get(o.target)
    if not runs_here(t):
        pytest.skip(f"{t.name} kernels need {', '.join(t.cpu_features)}, which this CPU lacks (compiled only)")
    if (name, extra) not in _BUILT:
        files = dict(emit_kernel(o).files)
        mod = build([(name, files[f"{name}.c"], files[f"{name}.h"])], OPT_FLAGS + t.codegen_flags + extra)
        _BUILT[name, extra] = CKernel(mod, o)
    return _BUILT[name, extra]


def test_every_kind_packs():
    # the catalogue above must exercise the packed path, or the checks below prove nothing about it
    assert all(uses_packing(o) for o in OPTIONS.values())


@pytest.mark.parametrize("name", sorted(OPTIONS))
def test_compiles_for_its_target(name):
    # a kernel for a CPU this machine lacks is still generated and compiled with the strict flags
    o = OPTIONS[name]
    files = dict(emit_kernel(o).files)
    assert compile_object(name, files[f"{name}.c"], files[f"{name}.h"],
                          OPT_FLAGS + get(o.target).codegen_flags).exists()


@pytest.mark.parametrize("name", sorted(OPTIONS))
def test_flops_from_the_ir(name):
    # the walk over every level and the recursion counts exactly LU's closed form (common practice)
    k = lower_kernel(OPTIONS[name])
    for n in (1, 7, 97, 515):
        assert kernel_flops(k, n)[0] == lu_flops(n)


# Big sizes go to float kernels where they can: the double checks form the residual in double-double, O(n^3)
# NumPy work that costs tens of seconds at n = 1000.
CASES = [("lg_rl_v3", 300, 3), ("lg_rl_v3", 97, 0), ("lg_rec_v3", 515, 5), ("lg_rec_v3", 7, 2),
         ("lg_rec_v3_s", 515, 0), ("lg_cr_gen", 193, 0), ("lg_cr_gen", 97, 3), ("lg_cr_gen", 1, 0),
         ("lg_ll_s_rm", 1000, 2), ("lg_ll_s_rm", 7, 1), ("lg_whole_rec", 97, 2), ("lg_whole_rec", 1, 0),
         ("lg_rl_v4", 515, 1)]


# The generic row's micro-kernel is written in GCC/Clang vector extensions with plain C loops for other
# compilers; -U__GNUC__ makes gcc take the plain branch, so both are checked.
PLAIN_C = ("-U__GNUC__",)
CASES += [("lg_cr_gen", 193, 1, PLAIN_C)]


@pytest.mark.parametrize("name,n,pad,extra", [c if len(c) == 4 else (*c, ()) for c in CASES])
def test_pivoted_matches_lapack(name, n, pad, extra):
    k = kernel(name, extra)
    rng = np.random.default_rng([n, pad, 9])
    a = rng.standard_normal((n, n)).astype(k.dtype)
    info, lu, ipiv, ok = k.factor(a, lda=n + pad)
    assert ok, "wrote outside the matrix or ipiv (canaries, padding in lda)"
    assert info == 0
    getrf = scipy.linalg.lapack.sgetrf if k.dtype == np.float32 else scipy.linalg.lapack.dgetrf
    _, piv, _ = getrf(a)
    assert np.array_equal(ipiv, piv), "pivot sequence differs from LAPACK getrf"
    # Higham 2002, Thm 9.3: |PA - LU| <= gamma_n |L||U| for any summation order; the micro-kernel sums each
    # entry's products sequentially within a kc block and subtracts block by block, at most n roundings
    assert ref.componentwise_ratio(a, lu, ipiv) <= 1
    assert ref.factor_ratio(a, lu, ipiv) < THRESH       # LAPACK TESTING/LIN/dget01.f
    b = rng.standard_normal((n, 3)).astype(k.dtype)
    code, x, ok2 = k.solve(lu, b, ipiv, lda=n + pad)
    assert code == 0 and ok2
    assert ref.solve_ratio(a, x, b) < THRESH             # LAPACK TESTING/LIN/dget02.f


@pytest.mark.parametrize("n,pad", [(300, 2), (97, 1), (7, 0)])
def test_unpivoted_on_dominant(n, pad):
    k = kernel("lg_up_unpiv")
    rng = np.random.default_rng([n, 11])
    a = ref.column_dominant(n, k.dtype, rng)
    info, lu, _, ok = k.factor(a, lda=n + pad)
    assert ok and info == 0
    assert ref.componentwise_ratio(a, lu) <= 1           # Higham 2002, Thm 9.3
    assert ref.factor_ratio(a, lu) < THRESH               # LAPACK TESTING/LIN/dget01.f
    b = rng.standard_normal((n, 2)).astype(k.dtype)
    code, x, ok2 = k.solve(lu, b, lda=n + pad)
    assert code == 0 and ok2 and ref.solve_ratio(a, x, b) < THRESH


@pytest.mark.parametrize("entry,key", [
    ('block = [32, 64]\ninner = "crout"', "block"),          # levels must shrink
    ('block = [64, 16]\ninner = ["crout"]', "inner"),        # one inner loop per level
    ('block = 64\ntarget = "pentium"', "target"),            # not a row of the target table
    ('block = 64\npanel = "halves"', "panel"),
    ('panel = "recursive"\nlanes = 4', "panel"),             # the recursion is per matrix, lanes step together
])
def test_spec_rejects_bad_large_settings(entry, key):
    with pytest.raises(SpecError) as e:
        parse(f'[[kernel]]\nname = "x"\nloop = "crout"\npivoting = "partial"\n{entry}\n', "bad.toml")
    assert f"key '{key}'" in str(e.value) and "allowed" in str(e.value)


def test_generic_micro_kernel_takes_both_branches_and_compiles_as_cplusplus(tmp_path):
    # the extension branch is what gcc and clang compile, the plain loops what any other C99 compiler does
    import shutil
    import subprocess
    o = OPTIONS["lg_cr_gen"]
    files = dict(emit_kernel(o).files)
    text = files["lg_cr_gen.c"]
    assert "#if defined(__GNUC__)" in text and "__attribute__((vector_size(" in text and "#else" in text
    for name, body in files.items():
        (tmp_path / name).write_text(body)
    for cxx in ("g++", "clang++"):
        if shutil.which(cxx) is None:
            pytest.skip(f"{cxx} not installed")
        res = subprocess.run([cxx, "-x", "c++", "-std=c++11", "-Wall", "-Wextra", "-pedantic", "-Werror",
                              "-fsyntax-only", str(tmp_path / "lg_cr_gen.c")], capture_output=True, text=True)
        assert res.returncode == 0, res.stderr


def test_generic_micro_kernel_fuses_under_iso_c(tmp_path):
    # gcc's -std=c99 turns contraction off (GCC manual, -ffp-contract); the micro-kernel asks for it back, so
    # an FMA machine gets fused multiply-adds from the portable source (x86-64 assembler checked)
    import platform
    import subprocess
    if platform.machine() not in ("x86_64", "AMD64"):
        pytest.skip("checks x86-64 assembler")
    files = dict(emit_kernel(OPTIONS["lg_cr_gen"]).files)
    for name, body in files.items():
        (tmp_path / name).write_text(body)
    res = subprocess.run(["gcc", "-std=c99", "-O3", "-mavx2", "-mfma", "-S", "-o", "-",
                          str(tmp_path / "lg_cr_gen.c")], capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    assert "vfmadd" in res.stdout


def test_targets_table_rows():
    # the rows this issue adds exist and describe vectors that fill their registers
    for name in ("generic", "x86-64-v3", "x86-64-v4"):
        assert name in TARGETS
    assert get("x86-64-v3").vectors("double").lanes == 4 and get("x86-64-v4").vectors("float").lanes == 16
