"""Batched kernels (lanes = W), C and NumPy twins, against LAPACK getrf per matrix (scipy), LAPACK's factor and solve
ratios and Higham's componentwise bound; canaries around every buffer and in the unused lanes of a last group."""
from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
from hypothesis import given, settings
from hypothesis import strategies as st

from conftest import PIVOT_LOOPS, SHORT, build_catalogue
from derive.check.accuracy import apply_swaps, componentwise_ratio, factor_ratio, solve_ratio
from derive.check.harness import LaneKernel, interleave_index
from derive.lowering import lanes as ln
from derive.lowering.ir import FactorCall, Gemm, Loop, PivotSearch, RowSwaps, Scale, Step, Trsm, walk
from derive.lowering.lower import lower_kernel
from derive.options import make_options
from derive.spec import SpecError, parse

THRESH = 30.0   # LAPACK TESTING/dtest.in: the largest acceptable test ratio

# (block, inner, scalar, layout, lanes, size): every pivot-capable ordering gets each row, so blocks 1, 2, 3
# and 5, each inner ordering, both scalars and layouts, widths that are and are not powers of two, and n as an
# argument or fixed (size) are covered
VARIANTS = ((1, None, "double", "column-major", 4, None), (1, None, "float", "row-major", 8, None),
            (3, "crout", "double", "row-major", 3, None), (5, "left-looking", "float", "column-major", 16, None),
            (2, "right-looking", "double", "column-major", 2, None), (1, None, "double", "column-major", 8, 4),
            (3, "right-looking", "float", "row-major", 4, 7))


def lanes_spec() -> str:
    out = []
    for loop in PIVOT_LOOPS:
        for block, inner, scalar, layout, w, size in VARIANTS:
            name = f"l_{SHORT[loop]}_b{block}_{scalar[0]}{layout[0]}_w{w}" + (f"_n{size}" if size else "")
            out.append(f'[[kernel]]\nname = "{name}"\nloop = "{loop}"\nblock = {block}\nscalar = "{scalar}"\n'
                       f'layout = "{layout}"\npivoting = "partial"\nlanes = {w}\n'
                       + (f'inner = "{inner}"\n' if inner else "") + (f"size = {size}\n" if size else ""))
    return "\n".join(out)


KERNELS = [line.split('"')[1] for line in lanes_spec().splitlines() if line.startswith("name = ")]


@pytest.fixture(scope="module")
def lanes(tmp_path_factory):
    built = build_catalogue(lanes_spec(), "lanes.toml", tmp_path_factory.mktemp("lanes"))
    return {k: (_lane(b), b.py, b.options) for k, b in built.items()}


def _lane(b):
    # the catalogue builder wraps every kernel for the single-matrix ABI; the lanes ABI needs its own wrapper
    return LaneKernel(type("M", (), {"ffi": b.c.ffi, "lib": b.c.lib})(), b.options)


def getrf(a):
    """LAPACK getrf of one matrix: (lu, 0-based pivots, info as the 1-based index of the first zero pivot)."""
    f = scipy.linalg.lapack.sgetrf if a.dtype == np.float32 else scipy.linalg.lapack.dgetrf
    return f(a)


def stack(rng, count, n, dtype):
    return rng.standard_normal((count, n, n)).astype(dtype)


@pytest.mark.parametrize("name", KERNELS)
@settings(max_examples=4)
@given(n=st.integers(0, 20), extra=st.integers(0, 40), seed=st.integers(0, 2 ** 32 - 1))
def test_factor_and_solve_per_matrix(lanes, name, n, extra, seed):
    ck, py, o = lanes[name]
    rng = np.random.default_rng(seed)
    n = o.size or n
    count = extra % (3 * o.lanes + 2)          # whole groups, a partial last group, or none at all
    mats = stack(rng, count, n, ck.dtype)
    code, info, lu, ipiv, ok = ck.factor(mats)
    assert code == 0 and ok, "bad code, or wrote outside the matrices, their pivots or codes (unused lanes too)"
    assert not info.any()
    pinfo, pipiv = py.factor(pmats := mats.copy())
    assert np.array_equal(pinfo, info) and np.array_equal(pipiv, ipiv), "the NumPy twin pivots differently"
    b = rng.standard_normal((count, n)).astype(ck.dtype)
    scode, x, sok = ck.solve(lu, ipiv, b)
    assert scode == 0 and sok
    px = py.solve(pmats, b.copy(), pipiv)
    for m in range(count if n else 0):
        ref_lu, ref_piv, ref_info = getrf(mats[m])
        # pivots: the same rule as getrf (first entry of largest magnitude), matrix by matrix
        assert np.array_equal(ipiv[m], ref_piv), f"matrix {m}: pivots differ from LAPACK getrf"
        assert ref_info == 0
        # LAPACK TESTING/LIN/dget01.f and dget02.f ratios, below THRESH
        assert factor_ratio(mats[m], lu[m], ipiv[m]) < THRESH
        assert factor_ratio(mats[m], pmats[m], pipiv[m]) < THRESH
        assert solve_ratio(mats[m], x[m], b[m]) < THRESH
        assert solve_ratio(mats[m], px[m], b[m]) < THRESH
        # Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed., 2002, Thm 9.3: |PA - LU| <= gamma_n |L||U|
        assert componentwise_ratio(mats[m], lu[m], ipiv[m]) <= 1
        assert componentwise_ratio(mats[m], pmats[m], pipiv[m]) <= 1


def singular_mix(rng, count, n, dtype):
    """Regular matrices with, in every third lane, an exactly singular one: a zero column (row operations keep
    it zero, so its pivot is exactly zero) at a different place each time, or no nonzero entry at all."""
    mats = stack(rng, count, n, dtype)
    for m in range(0, count, 3):
        if (m // 3) % 3 == 2:
            mats[m][:] = 0
        else:
            mats[m][:, (m // 3) % n] = 0
    return mats


@pytest.mark.parametrize("name", KERNELS)
def test_exact_zero_pivots_beside_regular_lanes(lanes, name):
    ck, py, o = lanes[name]
    rng = np.random.default_rng(7)
    n, count = o.size or 6, 2 * o.lanes + 1
    mats = singular_mix(rng, count, n, ck.dtype)
    code, info, lu, ipiv, ok = ck.factor(mats)
    pinfo, pipiv = py.factor(mats.copy())
    assert code == 0 and ok
    assert np.array_equal(pinfo, info) and np.array_equal(pipiv, ipiv)
    for m in range(count):
        ref_lu, ref_piv, ref_info = getrf(mats[m])
        # getrf's INFO = i > 0: U(i,i) is exactly zero (1-based), the factorization completed: our k+1
        assert info[m] == ref_info, f"matrix {m}: code {info[m]}, getrf says {ref_info}"
        assert np.array_equal(ipiv[m], ref_piv)
        assert (info[m] != 0) == (m % 3 == 0)
        assert componentwise_ratio(mats[m], lu[m], ipiv[m]) <= 1


@pytest.mark.parametrize("name", KERNELS)
def test_exact_factors_in_every_lane(lanes, name):
    """Matrices whose factors no ordering rounds (matrices.exact_factors), each lane its own, the last group
    partial: every lane's factors and pivots equal the known ones exactly, in C and in the NumPy twin, and
    verify's exact batch finds nothing to report."""
    from derive.check.verify import Row
    from derive.check.verify_lanes import exact_batch
    ck, py, o = lanes[name]
    n = o.size or 7
    row = Row(name, "lanes", [n])
    exact_batch(ck, py, n, 2 * o.lanes + 1, np.random.default_rng(11), row)
    assert row.problems == [] and row.matrices == 2 * o.lanes + 1


def test_exact_batch_catches_one_ulp_in_one_lane(lanes):
    """The exact batch is a check that can fail: a kernel whose factors are one unit in the last place off in a
    single entry of a single lane (well inside every ratio and Higham's bound) is reported, by matrix."""
    from derive.check.verify import Row
    from derive.check.verify_lanes import exact_batch
    ck, py, o = lanes[KERNELS[0]]

    class OneUlpOff:
        dtype = ck.dtype

        def factor(self, mats):
            code, info, lu, ipiv, ok = ck.factor(mats)
            lu[2, 3, 1] = np.nextafter(lu[2, 3, 1], np.inf)
            return code, info, lu, ipiv, ok

    row = Row(KERNELS[0], "lanes", [6])
    exact_batch(OneUlpOff(), py, 6, o.lanes + 1, np.random.default_rng(11), row)
    assert row.problems == ["n=6, exact factors: matrices [2] differ from their exactly known factors or pivots"]


@pytest.mark.parametrize("name", KERNELS)
def test_nan_in_one_lane_touches_no_other(lanes, name):
    ck, py, o = lanes[name]
    rng = np.random.default_rng(11)
    n, count = o.size or 5, o.lanes + 1
    mats = stack(rng, count, n, ck.dtype)
    b = rng.standard_normal((count, n)).astype(ck.dtype)
    _, info0, lu0, ipiv0, _ = ck.factor(mats)
    _, x0, _ = ck.solve(lu0, ipiv0, b)
    bad = mats.copy()
    bad[1, 2, 1] = np.nan
    bad[0, 0, 0] = np.inf
    code, info1, lu1, ipiv1, ok = ck.factor(bad)
    _, x1, sok = ck.solve(lu1, ipiv1, b)
    assert code == 0 and ok and sok
    assert np.isnan(lu1[1]).any()
    rest = np.arange(2, count)
    # bit for bit: the other lanes run the same instructions on the same data
    assert np.array_equal(lu1[rest], lu0[rest]) and np.array_equal(ipiv1[rest], ipiv0[rest])
    assert np.array_equal(info1[rest], info0[rest]) and np.array_equal(x1[rest], x0[rest])
    assert np.all((ipiv1 >= 0) & (ipiv1 < n)), "a NaN lane must still record pivots inside the matrix"
    pbad, pm = bad.copy(), mats.copy()
    pinfo, pipiv = py.factor(pbad)
    py.factor(pm)
    assert np.array_equal(pipiv, ipiv1) and np.array_equal(pinfo, info1)
    assert np.array_equal(pbad[rest], pm[rest])


@pytest.mark.parametrize("name", KERNELS[:7])
def test_bad_arguments(lanes, name):
    ck, py, o = lanes[name]
    ffi, t = ck.ffi, ck.ctype
    n = o.size or 4
    N = ck.n_arg(n)               # n is an argument unless the kernel's size fixes it
    off = len(N)                  # ... and then the positions after count move by one
    a = np.zeros(n * n * o.lanes, ck.dtype)
    piv = np.zeros(2 * n, np.intc)
    info = np.zeros(2, np.intc)
    A, P, I = ck.ptr(a, 0, t), ck.ptr(piv, 0, "int"), ck.ptr(info, 0, "int")
    f, s = ck._factor, ck._solve
    # negative codes name the bad argument by position, as the header documents
    assert f(-1, *N, A, P, I) == -1
    assert f(2, *N, ffi.NULL, P, I) == -(2 + off)
    assert f(2, *N, A, ffi.NULL, I) == -(3 + off)
    assert f(2, *N, A, P, ffi.NULL) == -(4 + off)
    assert f(0, *N, ffi.NULL, ffi.NULL, ffi.NULL) == 0
    if off:
        assert f(2, -1, A, P, I) == -2
        info[:] = 9
        assert f(2, 0, ffi.NULL, ffi.NULL, I) == 0 and not info.any(), "n = 0: every matrix succeeds"
    b = np.zeros(n * o.lanes, ck.dtype)
    B = ck.ptr(b, 0, t)
    cA = ck.ptr(a, 0, f"const {t}")
    good = np.tile(np.arange(n, dtype=np.intc), 2)
    for bad_entry in (0, n):      # entry k = 1 of matrix 1: below k, or past the last row
        piv[:] = good
        piv[n + 1] = bad_entry
        b[:] = 3.0
        assert s(2, *N, cA, ck.ptr(piv, 0, "const int"), B) == -(3 + off)
        assert np.all(b == 3.0), "a refused solve must leave b alone"
    piv[:] = good
    cP = ck.ptr(piv, 0, "const int")
    assert s(-1, *N, cA, cP, B) == -1
    assert s(2, *N, ffi.NULL, cP, B) == -(2 + off)
    assert s(2, *N, cA, ffi.NULL, B) == -(3 + off)
    assert s(2, *N, cA, cP, ffi.NULL) == -(4 + off)
    assert s(0, *N, ffi.NULL, ffi.NULL, ffi.NULL) == 0
    if off:
        assert s(2, -1, cA, cP, B) == -2
    src = ck.ptr(a, 0, f"const {t}")
    for fn in (ck.pack_fn, ck.unpack_fn):
        assert fn(-1, *N, src, A) == -1
        assert fn(1, *N, ffi.NULL, A) == -(2 + off)
        assert fn(1, *N, src, ffi.NULL) == -(3 + off)
        if off:
            assert fn(1, -2, src, A) == -2
    with pytest.raises(ValueError):
        py.factor(np.zeros((2, 3, 4), ck.dtype))
    with pytest.raises(TypeError):
        py.factor(np.zeros((2, 3, 3), np.int64))
    with pytest.raises(ValueError):
        py.solve(np.zeros((2, 3, 3), ck.dtype), np.zeros((2, 4), ck.dtype), np.zeros((2, 3), int))


@pytest.mark.parametrize("name", KERNELS[:7])
def test_pack_follows_the_documented_storage(lanes, name):
    ck, py, o = lanes[name]
    rng = np.random.default_rng(3)
    for count, n in ((0, o.size or 3), (1, o.size or 1), (2 * o.lanes + 1, o.size or 4)):
        mats = stack(rng, count, n, ck.dtype)
        packed = ck.pack(mats)
        idx = interleave_index(count, n, o.lanes, o.layout)
        assert np.array_equal(packed[idx], mats)
        unused = np.ones(packed.shape, bool)
        unused[idx.ravel()] = False
        assert np.all(packed[unused] == -7.25e11), "pack wrote a lane past count"
        assert np.array_equal(py.pack(mats)[idx], mats)
        assert np.array_equal(py.unpack(py.pack(mats), count, n), mats)
        back = np.zeros(count * n * n, ck.dtype)
        assert ck.unpack_fn(count, *ck.n_arg(n), ck.ptr(packed, 0, f"const {ck.ctype}"), ck.ptr(back, 0, ck.ctype)) == 0
        order = "F" if o.layout == "column-major" else "C"
        assert np.array_equal(back, np.concatenate([m.ravel(order=order) for m in mats]) if count else back)


def test_lane_kernel_is_the_scalar_ir_over_lanes():
    """The lanes lowering adds no code path of its own per ordering: unwrapping each lane statement gives back,
    statement for statement, the loop IR of the single-matrix kernel of the same options."""
    for loop in PIVOT_LOOPS:
        for block in (1, 4):
            o = make_options("k", loop, block=block, pivoting="partial", lanes=8)
            scalar = lower_kernel(o)
            batched = ln.lower_lanes(scalar, o)
            back = {"k_group": "k", "k_solve_group": "k_solve"}
            for r in batched.routines:
                if r.role in ("factor", "solve"):
                    assert [type(s) for s in r.body] == [ln.Groups]
                    continue
                src = scalar.routine(back.get(r.name, r.name))
                assert len(walk(r.body)) == len(walk(src.body))
                for got, want in zip(walk(r.body), walk(src.body)):
                    if isinstance(got, ln.OverLanes):
                        assert got.stmt == want
                    elif isinstance(got, ln.SelectPivot):
                        assert got.column == want.column
                    elif isinstance(got, ln.SelectSwaps):
                        assert (got.matrix, got.cols, got.steps) == (want.matrix, want.cols, want.steps)
                    elif isinstance(got, ln.LaneFactorCall):
                        assert (got.block, got.routine) == (want.block, want.routine)
                    elif isinstance(got, Loop):
                        assert (got.extent, got.step, got.invariant) == (want.extent, want.step, want.invariant)
                    else:
                        assert got == want


def test_fixed_size_lanes_are_the_fixed_kernel_over_lanes():
    """With `size`, the lanes lowering takes the fixed-size lowering's steps (constant index ranges, pivoting
    already by selects) and wraps each statement in them: step for step the same, no scalar statement left."""
    from derive.printers.emit_lanes import lower_batched
    for loop in PIVOT_LOOPS:
        o = make_options("k", loop, block=2, pivoting="partial", size=5, lanes=4)
        fixed, batched = lower_batched(o)
        group, single = batched.routine("k_group"), fixed.routine("k")
        assert [type(s) for s in walk(group.body)] == [
            {Gemm: ln.OverLanes, Trsm: ln.OverLanes, Scale: ln.OverLanes, PivotSearch: ln.SelectPivot,
             RowSwaps: ln.SelectSwaps, FactorCall: ln.LaneFactorCall}.get(type(s), type(s)) for s in walk(single.body)]
        assert all(not isinstance(s, (Gemm, Trsm, Scale, PivotSearch, RowSwaps)) for r in batched.routines
                   for s in walk(r.body))


def test_batched_factor_keeps_its_steps_where_one_matrix_keeps_the_loop():
    """At n = 12 a single matrix's factor keeps its step loop (its unrolled code outgrows an instruction cache)
    while a batched one is unrolled into its 12 steps (each step's code serves W matrices): both thresholds are
    the lowering's, handed over by the emitter, not a branch inside it."""
    from derive.lowering.fixed import MAX_EXTENT, MAX_EXTENT_FACTOR
    from derive.printers.emit import lower_options
    from derive.printers.emit_lanes import lower_batched
    assert MAX_EXTENT_FACTOR < 12 <= MAX_EXTENT
    o = make_options("k", "right-looking", pivoting="partial", size=12, lanes=4)
    single = lower_options(o).routine("k")
    assert isinstance(single.body[0], Loop) and not any(isinstance(s, Step) for s in single.body)
    scalar, _ = lower_batched(o)
    assert [s.value for s in scalar.routine("k").body if isinstance(s, Step)] == list(range(12))


@pytest.mark.parametrize("value, says", [(0, "from 1"), (65, "to 64"), (True, "integer"), ('"8"', "integer")])
def test_spec_refuses_bad_lanes(value, says):
    text = f'[[kernel]]\nname = "k"\nloop = "crout"\npivoting = "partial"\nlanes = {value}\n'
    with pytest.raises(SpecError) as e:
        parse(text.replace("True", "true"), "s.toml")
    assert "key 'lanes'" in str(e.value) and says in str(e.value)


def test_spec_refuses_lanes_without_pivoting():
    with pytest.raises(SpecError) as e:
        parse('[[kernel]]\nname = "k"\nloop = "bordered"\nlanes = 4\n', "s.toml")
    assert "key 'lanes'" in str(e.value) and "pivoting" in str(e.value)


@pytest.mark.parametrize("name", KERNELS[:7])
def test_subnormal_pivot_is_lifted_not_overflowed(lanes, name):
    """A column of subnormal entries: its reciprocal would overflow, so the kernel lifts it by a power of two
    first. Column 0 of L must be P A's column 0 over the pivot (each entry divided once, as reference LAPACK's
    dgetrf2.f does below SFMIN). scipy's getrf (OpenBLAS) leaves such a column unscaled, so its later pivots
    are no reference here; the first pivot is the largest entry, as in every getrf."""
    ck, py, o = lanes[name]
    rng = np.random.default_rng(5)
    n, count = o.size or 4, o.lanes + 1
    mats = stack(rng, count, n, ck.dtype)
    tiny = np.finfo(ck.dtype).tiny
    mats[1][:, 0] = (rng.integers(1, 2 ** 10, n) * tiny * 2.0 ** -12).astype(ck.dtype)   # exact subnormals
    code, info, lu, ipiv, ok = ck.factor(mats)
    pm = mats.copy()
    _, pipiv = py.factor(pm)
    assert code == 0 and ok and not info.any()
    assert ipiv[1][0] == np.argmax(np.abs(mats[1][:, 0])) and np.array_equal(pipiv[1], ipiv[1])
    col = apply_swaps(mats[1], ipiv[1])[:, 0]
    want = col[1:] / col[0]
    rtol = 2 * np.finfo(ck.dtype).eps     # one rounding more than the division (common practice)
    for got in (lu[1], pm[1]):
        assert np.all(np.isfinite(got)) and got[0, 0] == col[0]
        assert np.allclose(got[1:, 0], want, rtol=rtol, atol=0)


def test_ir_dump_shows_the_lane_statements(tmp_path):
    import subprocess
    import sys
    spec = tmp_path / "s.toml"
    spec.write_text('[[kernel]]\nname = "k"\nloop = "crout"\nblock = 2\npivoting = "partial"\nlanes = 8\n')
    out = subprocess.run([sys.executable, "-m", "derive", "derive", "--spec", str(spec), "--kernel", "k", "--ir"],
                         capture_output=True, text=True, cwd=str(tmp_path.parent))
    assert out.returncode == 0, out.stderr
    for text in ("over 8 lanes: gemm", "per-lane pivot by selects", "per-lane interchanges by selects",
                 "for each group of 8 matrices"):
        assert text in out.stdout


@pytest.mark.parametrize("cc", ["gcc", "clang"])
def test_lanes_kernels_compile_clean(tmp_path, cc):
    """Strict C99 with every warning an error, as the header promises, on both compilers (common practice)."""
    import shutil
    import subprocess
    from derive.printers.emit import emit_kernel, write_atomically
    if shutil.which(cc) is None:
        pytest.skip(f"{cc} is not installed")
    for o in (make_options("lr", "right-looking", pivoting="partial", lanes=8, scalar="float", layout="row-major"),
              make_options("lc", "crout", block=3, inner="left-looking", pivoting="partial", lanes=4, size=6)):
        write_atomically(tmp_path, list(emit_kernel(o).files))
        # the vector-extension spelling and the plain C one (what a compiler without vector extensions gets)
        for extra in ([], [f"-D{o.name.upper()}_PLAIN_LANES"]):
            res = subprocess.run([cc, "-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-O2", *extra, "-c",
                                  str(tmp_path / f"{o.name}.c"), "-o", str(tmp_path / f"{o.name}.o")],
                                 capture_output=True, text=True)
            assert res.returncode == 0, res.stderr


@pytest.mark.parametrize("loop, block, size, scalar, w", [("right-looking", 1, None, "double", 4),
                                                         ("crout", 2, None, "float", 8),
                                                         ("left-looking", 1, 5, "double", 8)])
def test_plain_lanes_match_vector_lanes_bit_for_bit(tmp_path, loop, block, size, scalar, w):
    """The lane vectors (GCC/Clang vector extensions, chosen by the target row's lane_bytes) and the plain C
    spelling do the same operations in the same order: factors, pivots, codes and solutions agree bit for bit,
    whole groups and a partial last one alike, and both leave the unused lanes alone."""
    from derive.check.build import OPT_FLAGS, build
    from derive.printers.emit import emit_kernel
    name = f"pl_{loop[:2]}_{scalar[0]}{w}"
    o = make_options(name, loop, block, pivoting="partial", lanes=w, size=size, scalar=scalar)
    c_text, h_text = (t for f, t in emit_kernel(o).files if not f.endswith(".py"))
    assert f"{name.upper()}_VL {w if scalar == 'float' or w <= 4 else 4}" in c_text
    vec = LaneKernel(build([(name, c_text, h_text)]), o)
    plain = LaneKernel(build([(name, c_text, h_text)], OPT_FLAGS + (f"-D{name.upper()}_PLAIN_LANES",)), o)
    rng = np.random.default_rng(5)
    n = size or 7
    mats = stack(rng, 2 * w + 3, n, vec.dtype)
    mats[1, :, 0] = 0                     # an exact zero pivot in one lane
    got = [k.factor(mats) for k in (vec, plain)]
    for g in got:
        assert g[0] == 0 and g[4], "bad code, or an unused lane or canary changed"
    for x, y in zip(got[0][1:4], got[1][1:4]):
        assert np.array_equal(x.view(np.uint8), y.view(np.uint8))
    b = rng.standard_normal((len(mats), n)).astype(vec.dtype)
    keep = got[0][1] == 0
    sols = [k.solve(got[0][2][keep], got[0][3][keep], b[keep]) for k in (vec, plain)]
    assert all(s[0] == 0 and s[2] for s in sols)
    assert np.array_equal(sols[0][1].view(np.uint8), sols[1][1].view(np.uint8))
    # and the pivots are LAPACK's (scipy's getrf), matrix by matrix
    for m in np.flatnonzero(keep):
        assert np.array_equal(got[0][3][m], getrf(mats[m])[1])


def test_verify_checks_lanes_kernels_as_their_own_abi_kind():
    """`luforge verify` takes the lanes kind for a batched kernel (with and without size), including the
    sanitized C driver; a kernel that passes here passes the per-matrix criteria above."""
    import shutil
    from derive.check.verify import Budget, kind_of, verify
    opts = [make_options("vr", "left-looking", pivoting="partial", lanes=4),
            make_options("vs", "right-looking", block=2, inner="crout", pivoting="partial", lanes=8, size=5,
                         scalar="float")]
    assert [kind_of(o).name for o in opts] == ["lanes", "lanes"]
    rows = verify(opts, budget=Budget(per_size=1, sanitize=shutil.which("gcc") is not None))
    assert all(r.passed for r in rows), [p for r in rows for p in r.problems]
    assert rows[1].sizes == [5] * 4 and rows[0].matrices > 0
