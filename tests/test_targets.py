"""Targets in the loop: every row of the target table cross-builds a few kernels, runs them (emulated where
needed) and passes the host's accuracy checks bit for bit; report figures against an independent build."""
from __future__ import annotations

import dataclasses
import json
import re
import shutil
import subprocess
import sys

import numpy as np
import pytest

from derive.check import cross, ondevice, ondevice_lanes, report
from derive.check.harness import GUARD
from derive.cli import main
from derive.lowering.counts import lu_flops
from derive.options import make_options
from derive.printers.emit import emit_kernel
from derive.targets.table import CHECK_ROWS, TARGETS, Target, get

# A few kernels per row (the full catalogue on every row is `make target-check`): pivoted float column-major
# unblocked, unpivoted double row-major blocked, a pivoted double blocked one, and a fixed-order one.
KERNELS = (
    make_options("tt_right_piv_s", "right-looking", 1, scalar="float", pivoting="partial"),
    make_options("tt_crout_b3_d", "crout", 3, inner="left-looking", scalar="double", layout="row-major"),
    make_options("tt_left_piv_b4_d", "left-looking", 4, inner="crout", scalar="double", pivoting="partial"),
    make_options("tt_fixed5_piv_s", "crout", 1, scalar="float", pivoting="partial", size=5),
)


def _usable(t: Target):
    try:
        cross.require(t)
    except cross.ToolMissing as e:
        pytest.skip(str(e))


@pytest.fixture(scope="module")
def host():
    return ondevice.host_kernels(list(KERNELS))


@pytest.mark.parametrize("row", CHECK_ROWS)
def test_row_runs_kernels_bit_identical_to_host(row, host):
    t = get(row)
    _usable(t)
    painted = []
    for k, o in enumerate(KERNELS):
        r = ondevice.check_on(o, t, np.random.default_rng([7, k]), per_size=1, host=host[o.name])
        # thresholds: LAPACK TESTING/dtest.in (ratios < 30) and Higham 2002, Thm 9.3 (componentwise <= 1),
        # applied by the same judge as host verify
        assert r.passed, (row, o.name, r.problems)
        assert r.bit_identical
        if o.size:
            assert r.sizes == [o.size]
        else:
            assert r.matrices >= 10 and max(r.sizes) == min(t.max_n, 48)
        # an unblocked factor with its loops inline can be a leaf that keeps everything in registers (0 bytes
        # on AArch64); the painting is shown to work by the kernels that do use stack
        assert 0 <= r.max_factor_stack <= t.paint_bytes
        painted.append(r.max_factor_stack + r.max_solve_stack)
    assert not painted or max(painted) > 0, f"{row}: the painted stack showed no use by any kernel"


def test_judge_catches_a_changed_bit_a_canary_and_a_wrong_code(host):
    t = get("host")
    o = KERNELS[0]
    cases = ondevice.choose_cases(o, t, np.random.default_rng(3), per_size=1)
    img = ondevice.image_for(o, t, cases)
    results = ondevice.parse(o, cross.run(img).stdout, len(cases))
    assert ondevice.judge(o, t, cases, results, host[o.name]).passed
    k = next(i for i, c in enumerate(cases) if c.n == 9)
    c = cases[k]
    inside = int(c.a_place.index()[4, 4])

    def tampered(fn):
        rs = [dataclasses.replace(r, a_buf=r.a_buf.copy(), piv_buf=r.piv_buf.copy()) for r in results]
        fn(rs[k])
        return ondevice.judge(o, t, cases, rs, host[o.name])

    def last_bit(r):
        r.a_buf.view(np.uint32)[inside] ^= 1
    row = tampered(last_bit)
    assert not row.passed and not row.bit_identical and any("bit" in p for p in row.problems)

    def canary(r):
        r.a_buf[GUARD - 1] = 0
    assert any("outside the matrix" in p for p in tampered(canary).problems)

    def pivots(r):
        r.piv_buf[GUARD + c.n] = 0
    assert any("outside ipiv" in p for p in tampered(pivots).problems)

    def code(r):
        r.info = 3
    assert any("returned 3" in p for p in tampered(code).problems)


def test_reference_matrices_return_the_expected_codes_and_exact_factors(host):
    t = get("host")
    for o, judges in zip(KERNELS[:2], ({"random", "exact", "lapack"}, {"random", "exact", "code"})):
        cases = ondevice.choose_cases(o, t, np.random.default_rng(5), per_size=1)
        assert {c.judge for c in cases} == judges
        # LAPACK TESTING/LIN/dchkge.f: types 5, 6, 7 zero columns IZERO = 1, N, N/2+1 (7: IZERO..N)
        zero = [c for c in cases if c.expect_info]
        assert zero and all(c.expect_info <= c.n for c in zero)
        results = ondevice.parse(o, cross.run(ondevice.image_for(o, t, cases)).stdout, len(cases))
        for c, r in zip(cases, results):
            assert r.info == (c.expect_info or 0)
        assert ondevice.judge(o, t, cases, results, host[o.name]).passed
        k = next(i for i, c in enumerate(cases) if c.judge == "exact")
        bad = [dataclasses.replace(r, a_buf=r.a_buf.copy()) for r in results]
        bad[k].a_buf[int(cases[k].a_place.index()[1, 0])] += 1
        assert any("exactly known" in p for p in ondevice.judge(o, t, cases, bad).problems)


# Batched kernels: runtime n with the aarch64 row's 16-byte lane vectors (GCC vector extensions wherever GCC
# builds it) and a fixed order with W = 3 in plain C; per_size = 1 gives W + 1 matrices, a partial last group.
LANE_KERNELS = (
    make_options("tt_lanes4_s", "right-looking", 1, scalar="float", pivoting="partial", lanes=4,
                 target="aarch64-linux"),
    make_options("tt_lanes3_fixed5_d", "crout", 2, inner="left-looking", scalar="double", pivoting="partial",
                 lanes=3, size=5, layout="row-major"),
)


@pytest.fixture(scope="module")
def lane_host():
    return ondevice.host_kernels(list(LANE_KERNELS))


@pytest.mark.parametrize("row", ("cortex-m4f", "aarch64-linux"))
def test_row_runs_lanes_kernels_bit_identical_to_host(row, lane_host):
    t = get(row)
    _usable(t)
    for k, o in enumerate(LANE_KERNELS):
        cases = ondevice_lanes.choose_cases(o, t, np.random.default_rng([7, k]), per_size=1)
        assert {c.judge for c in cases} == {"random", "nan", "lapack", "exact"}
        assert all(c.count % o.lanes for c in cases if c.judge != "lapack")      # every batch ends partial
        # LAPACK TESTING/LIN/dchkge.f: types 5, 6, 7 are singular with INFO = IZERO, side by side with the others
        assert any(c.expect.any() and not c.expect.all() for c in cases if c.judge == "lapack")
        r = ondevice.check_on(o, t, np.random.default_rng([7, k]), per_size=1, host=lane_host[o.name])
        # thresholds: LAPACK TESTING/dtest.in (ratios < 30), Higham 2002, Thm 9.3 (componentwise <= 1)
        assert r.passed, (row, o.name, r.problems)
        assert r.bit_identical and not r.notes
        assert r.sizes == ([5] if o.size else [0, 1, 2, 3, 4, 5, 7, 8, 9, 10, 16, 17])


def _one_lane_broken(edit: str):
    """emit_kernel with the factor of tt_lanes4_s wrapped so that, after it, lane 1 of the first group gets
    `edit` applied to the bits of its U(n-1, n-1): the C of one lane made wrong on purpose."""
    real = ondevice.emit_kernel

    def emit(o):
        e = real(o)
        files = dict(e.files)
        name = o.name
        files[f"{name}.c"] = (f"#define {name} {name}_broken\n" + files[f"{name}.c"] + f"\n#undef {name}\n"
                              f"int {name}(int count, int n, float *a, int *ipiv, int *info)\n{{\n"
                              f"    int code = {name}_broken(count, n, a, ipiv, info);\n"
                              f"    if (count > 1 && n > 0) {{\n"
                              f"        union {{ float f; uint32_t u; }} p;\n"
                              f"        size_t k = ((size_t)n * (size_t)n - 1u) * {name.upper()}_LANES + 1u;\n"
                              f"        p.f = a[k];\n        {edit};\n        a[k] = p.f;\n    }}\n"
                              f"    return code;\n}}\n")
        return dataclasses.replace(e, files=tuple(files.items()))
    return emit


@pytest.mark.parametrize("edit, caught", (("p.u ^= 1u", "bits"), ("p.f += 1.0f", "factor ratio")))
def test_lanes_judge_catches_one_wrong_lane_on_a_row(edit, caught, lane_host, monkeypatch):
    t = get("aarch64-linux")
    _usable(t)
    o = LANE_KERNELS[0]
    monkeypatch.setattr(ondevice, "emit_kernel", _one_lane_broken(edit))
    r = ondevice.check_on(o, t, np.random.default_rng([7, 0]), per_size=1, host=lane_host[o.name])
    assert not r.passed and any(caught in p for p in r.problems), r.problems
    # the last bit alone leaves the ratios within LAPACK's thresholds: only the comparison with the host sees it
    assert not r.bit_identical


def test_lanes_judge_catches_an_unused_lane_a_code_and_a_leaking_nan(lane_host):
    t = get("host")
    o = LANE_KERNELS[0]
    cases = ondevice_lanes.choose_cases(o, t, np.random.default_rng(3), per_size=1)
    results = ondevice.parse(o, cross.run(ondevice.image_for(o, t, cases)).stdout, len(cases))
    assert ondevice_lanes.judge(o, t, cases, results, lane_host[o.name]).passed
    k = next(i for i, c in enumerate(cases) if c.judge == "random" and c.n == 3)
    nan = next(i for i, c in enumerate(cases) if c.judge == "nan")

    def tampered(i, fn):
        rs = [dataclasses.replace(r, a_buf=r.a_buf.copy(), piv_buf=r.piv_buf.copy(), b_buf=r.b_buf.copy())
              for r in results]
        fn(cases[i], rs[i])
        return ondevice_lanes.judge(o, t, cases, rs).problems

    def unused_lane(c, r):
        # the last lane of the partial last group: no matrix lives there, its bits must stay
        r.a_buf[GUARD + len(c.a_buf) - 2 * GUARD - 1] = 0
    assert any("unused lanes" in p for p in tampered(k, unused_lane))

    def code(c, r):
        r.piv_buf[c.info_at()] = 99
    assert any("codes" in p for p in tampered(k, code))

    def leak(c, r):
        other = (c.victim + 1) % c.count
        r.a_buf[c.a_idx[other, 0, 0]] = np.nan
    assert any("NaN changed another" in p for p in tampered(nan, leak))

    # one unit in the last place of one entry of one lane of a batch with exactly known factors: within every
    # ratio, and no host build to compare with here, so only the exact factors can see it
    exact = next(i for i, c in enumerate(cases) if c.judge == "exact")

    def one_ulp(c, r):
        r.a_buf[c.a_idx[1, 2, 1]] = np.nextafter(r.a_buf[c.a_idx[1, 2, 1]], np.inf)
    assert tampered(exact, one_ulp) == [f"n={cases[exact].n} (exact): matrices [1] differ from their exactly "
                                        "known factors or pivots"]


def test_lanes_without_scipy_is_one_line_naming_it(monkeypatch, capsys, tmp_path):
    spec = tmp_path / "s.toml"
    spec.write_text('[[kernel]]\nname = "tt_l"\nloop = "right-looking"\nblock = 1\nscalar = "float"\n'
                    'pivoting = "partial"\nlanes = 4\n')
    assert main(["generate", str(spec)]) == 0
    capsys.readouterr()
    monkeypatch.setitem(sys.modules, "scipy", None)     # import scipy now raises ImportError
    monkeypatch.setitem(sys.modules, "scipy.linalg", None)
    monkeypatch.setitem(sys.modules, "scipy.linalg.lapack", None)
    assert main(["verify", str(spec), "--target", "host"]) == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "scipy" in err and "getrf" in err


def test_missing_toolchain_names_the_package():
    fake = dataclasses.replace(TARGETS["cortex-m4f"], name="fake", cc=("no-such-gcc-xyz",))
    with pytest.raises(cross.ToolMissing, match="gcc-arm-none-eabi"):
        cross.require(fake)


def test_cli_target_choice_is_checked(capsys):
    with pytest.raises(SystemExit) as e:
        main(["verify", "generated/kernels.toml", "--target", "pdp11"])
    assert e.value.code == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "cortex-m4f" in err


def _independent_object(t: Target, o, tmp_path):
    files = dict(emit_kernel(o).files)
    for name in (f"{o.name}.c", f"{o.name}.h"):
        (tmp_path / name).write_text(files[name])
    subprocess.run([*t.cc, *cross.STRICT, *t.cflags, *t.opt, "-ffunction-sections", "-fstack-usage", "-c",
                    f"{o.name}.c"], cwd=tmp_path, check=True)
    size = subprocess.run([f"{t.tools}size", f"{o.name}.o"], cwd=tmp_path, capture_output=True, text=True, check=True)
    su = {line.split("\t")[0].split(":")[-1]: int(line.split("\t")[1])
          for line in (tmp_path / f"{o.name}.su").read_text().splitlines()}
    return int(size.stdout.splitlines()[1].split()[0]), su


def test_report_agrees_with_an_independent_build_and_counts_reproducibly(tmp_path):
    t = get("cortex-m4f")
    _usable(t)
    o = KERNELS[0]
    e = report.report_kernel(o, t, orders=(4, 16))
    assert not e.problems and not e.runtime and e.factor_solve.data == 0 and e.factor_solve.bss == 0
    text, su = _independent_object(t, o, tmp_path)
    # everything in the object is reached from factor or solve, so the linked code differs from the
    # object's text only by alignment padding (arm-none-eabi-size on the object, common practice)
    assert abs(e.factor_solve.text - text) <= 8
    assert e.factor.text < e.factor_solve.text
    # the static worst case starts with the factor's own frame from -fstack-usage and bounds the painted stack
    assert e.factor_stack.path[0] == o.name and e.factor_stack.worst >= su[o.name]
    assert e.factor_stack.unknown == [] and 0 < e.factor_stack.measured <= e.factor_stack.worst
    # every multiplication, addition and division of the factor is one float instruction here (no FMA under
    # ISO C), so the float instructions counted are at least the flops counted from the loop IR
    for n in (4, 16):
        total, fp = e.instructions[n]
        assert lu_flops(n) <= fp < total
    again = report.report_kernel(o, t, orders=(4, 16))
    assert again.instructions == e.instructions and again.solve_instructions == e.solve_instructions


def _report(capsys, tmp_path, row: str, kernel: str, orders: str):
    """`luforge report` of one spec entry (TOML lines after [[kernel]]) on a row: (markdown, JSON entries)."""
    _usable(get(row))
    spec, out = tmp_path / "s.toml", tmp_path / "r.json"
    spec.write_text("[[kernel]]\n" + kernel)
    assert main(["report", str(spec), "--target", row, "--orders", orders, "--json", str(out)]) == 0
    return capsys.readouterr().out, json.loads(out.read_text())


def test_report_warns_about_software_double_on_cortex_m4f(capsys, tmp_path):
    md, data = _report(capsys, tmp_path, "cortex-m4f", 'name = "tt_d"\nloop = "right-looking"\nblock = 1\n'
                       'scalar = "double"\npivoting = "partial"\n', "8")
    assert re.search(r"double on cortex-m4f: software floating point, \+\d\.\d KB, ~\d+x instructions", md)
    assert data[0]["kernel"] == "tt_d" and "__aeabi_dmul" in data[0]["runtime"]
    assert data[0]["runtime_bytes"] > 1000 and data[0]["instructions"]["8"]["total"] > 0


@pytest.mark.parametrize("row", ("cortex-m4f", "aarch64-linux"))
def test_report_counts_batched_kernels_per_group(row):
    """A batched kernel's report: bytes, stack and the instructions of one call on one whole group of W
    matrices (the driver's judge passes on them), the same on a second run; a fixed order is counted at its own
    order whatever orders the others are counted at."""
    t = get(row)
    _usable(t)
    for o in LANE_KERNELS:
        e = report.report_kernel(o, t, orders=(4, 8))
        assert not e.problems, e.problems
        want = (o.size,) if o.size else (4, 8)
        assert sorted(e.instructions) == sorted(e.solve_instructions) == list(want)
        # every lane's 2n^3/3 flops (common practice) are done in float instructions of VL lanes each, with no FMA
        # under ISO C and a multiplication where a division would be; so the count covers all W matrices
        vl = get(o.target).lane_vector(o.lanes, 8 if o.scalar == "double" else 4)
        for n, (total, fp) in e.instructions.items():
            assert o.lanes * lu_flops(n) <= fp * vl and fp < total, (n, fp, vl)
        assert e.factor.text > 0 and e.factor.text < e.factor_solve.text and e.factor_stack.worst > 0
        assert f"instructions are per call on one whole group of W = {o.lanes} matrices" in e.warnings
        again = report.report_kernel(o, t, orders=(4, 8))
        assert again.instructions == e.instructions and again.solve_instructions == e.solve_instructions


def test_report_counts_a_fixed_order_missing_from_orders(capsys, tmp_path):
    """--orders 4 and a kernel of fixed order 6: counted at 6 (it cannot run at 4), with a column for it; this
    once failed to build the driver, which then held no matrix at all."""
    t = get("cortex-m4f")
    _usable(t)
    spec = tmp_path / "s.toml"
    spec.write_text('[[kernel]]\nname = "tt_f6"\nloop = "right-looking"\nscalar = "float"\npivoting = "partial"\n'
                    'size = 6\n')
    assert main(["report", str(spec), "--target", "cortex-m4f", "--orders", "4"]) == 0
    md = capsys.readouterr().out
    head = next(line for line in md.splitlines() if line.startswith("| kernel"))
    row = next(line for line in md.splitlines() if line.startswith("| tt_f6"))
    cells = dict(zip(head.split("|"), row.split("|")))
    assert cells[" instructions n = 4 (float) "].strip() == "-"
    assert re.fullmatch(r" [\d,]+ \([\d,]+\) ", cells[" instructions n = 6 (float) "])


def test_report_says_when_no_matrix_fits_the_row(capsys, tmp_path):
    """A fixed order beyond what the row's RAM holds (cortex-m0: max_n = 16; n = 24 here): bytes and the static
    stack are still reported, the instruction columns stay empty, and the report says why instead of failing."""
    t = get("cortex-m0")
    assert t.max_n < 24
    md, entries = _report(capsys, tmp_path, "cortex-m0", 'name = "tt_f24"\nloop = "right-looking"\nscalar = "float"\n'
                          'pivoting = "partial"\nsize = 24\n', "4")
    assert f"not counted: no matrix of order 24 fits the row's RAM (max_n = {t.max_n})" in md
    data = entries[0]
    assert data["kernel"] == "tt_f24" and data["instructions"] == {} and not data["problems"]
    assert data["factor"]["text"] > 0 and data["factor_stack"]["worst"] > 0


@pytest.mark.skipif(shutil.which("qemu-system-arm") is None, reason="qemu-system-arm not installed")
def test_plugin_counts_a_known_instruction_sequence(tmp_path):
    """Two marked windows around code whose instructions are known from the Armv7-M encoding."""
    t = get("cortex-m4f")
    _usable(t)
    main_c = ('#include "port.h"\nint main(void)\n{\n    luf_mark_begin();\n    luf_mark_end();\n'
              '    luf_mark_begin();\n    __asm__ volatile("nop\\n nop\\n nop\\n vmov.f32 s0, #1.0\\n'
              ' vadd.f32 s0, s0, s0" ::: "s0");\n    luf_mark_end();\n    return 0;\n}\n')
    img = cross.build_image(t, "plug", {"plug.c": main_c}, "plug.c", "plugin-test")
    windows = cross.run(img, count=True).windows
    assert len(windows) == 2
    # the second window exceeds the empty one by the 5 instructions written, 2 of them float (vmov, vadd)
    assert (windows[1][0] - windows[0][0], windows[1][1] - windows[0][1]) == (5, 2)
