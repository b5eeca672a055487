"""`luforge verify` cannot pass a broken kernel: each test plants one defect of a kind a user (or a bug in
luforge) could ship, in the files on disk, and checks that verify fails on it and says why (issue 6)."""
from __future__ import annotations

import math
import shutil
from pathlib import Path

import pytest

from derive.check.verify import Budget, Row, drift, sizes_for, verify
from derive.cli import main
from derive.spec import load

SPEC = """
[[kernel]]
name = "pump_lu"
loop = "right-looking"
block = 4
pivoting = "partial"

[[kernel]]
name = "pump_b64"
loop = "left-looking"
block = 64

[[kernel]]
name = "pump_b100"
loop = "crout"
block = 100
pivoting = "partial"
scalar = "float"
layout = "row-major"
"""


@pytest.fixture
def shipped(tmp_path, capsys):
    spec = tmp_path / "pumps.toml"
    spec.write_text(SPEC)
    assert main(["generate", str(spec)]) == 0
    capsys.readouterr()
    return spec


def plant(path: Path, old: str, new: str, after: str = "") -> None:
    """Replace the first `old` that follows `after` (e.g. a function's signature)."""
    text = path.read_text()
    start = text.index(after) if after in text else -1
    assert start >= 0 and old in text[start:], f"the planted defect no longer fits {path.name}: update the test"
    path.write_text(text[:start] + text[start:].replace(old, new, 1))


def run_verify(spec: Path, name: str, **budget) -> Row:
    options = [o for o in load(spec) if o.name == name]
    (row,) = verify(options, spec.parent, Budget(per_size=1, **budget), progress=lambda line: None)
    return row


def test_the_shipped_kernels_pass_and_every_kernel_crosses_two_block_boundaries(shipped, capsys):
    code = main(["verify", str(shipped), "--per-size", "1", "--sizes", "9,16,210"])
    out, err = capsys.readouterr()
    assert code == 0, out + err
    # one progress line per kernel, and the sizes tried in the table
    assert len([ln for ln in err.splitlines() if ln.startswith("verify [")]) == 3
    assert "129" in out and "201" in out and "210" in out
    for b in (1, 4, 64, 100, 4096):
        s = sizes_for(b)
        assert any(n >= 2 * b + 1 and n % b for n in s) or b == 1, b


def test_nan_solutions_fail():
    """LAPACK dget02 takes MAX over ratios; a NaN must not vanish in the fold (max(w, nan) keeps w)."""
    row = Row("k", "general", [3])
    row.fold("solve ratio", 3, 0.5)
    row.fold("solve ratio", 3, math.nan)
    assert not row.passed and math.isnan(row.worst_solve)


def test_a_kernel_whose_solutions_are_nan_fails(shipped):
    plant(shipped.parent / "pump_lu.c", "    (void)pump_lu_upper(N, NRHS, lu, LDA, b, LDB);\n    return 0;",
          "    (void)pump_lu_upper(N, NRHS, lu, LDA, b, LDB);\n    { size_t q; for (q = 0; q < N; ++q) "
          "PUMP_LU_AT(b, LDB, q, 0) = 0.0 / 0.0; }\n    return 0;")
    row = run_verify(shipped, "pump_lu")
    assert not row.passed and any("NaN" in p for p in row.problems), row.problems


@pytest.mark.parametrize("name, kernel_k", [("pump_b64", "k"), ("pump_b100", "k")])
def test_a_bug_in_the_second_block_iteration_fails(shipped, name, kernel_k):
    """Skip the GEMM update of the trailing blocks from the second block step on: the first block is right."""
    c = shipped.parent / f"{name}.c"
    text = c.read_text()
    b = 64 if name == "pump_b64" else 100
    needle = f"    while ({kernel_k} < N) {{\n        kb = N - {kernel_k};\n        if (kb > {b}U) {{ kb = {b}U; }}\n"
    assert needle in text
    plant(c, needle, needle + f"        if ({kernel_k} == {b}U) {{ {name.upper()}_AT(a, LDA, {b}U, {b}U) += 1; }}\n")
    row = run_verify(shipped, name)
    assert not row.passed, "a defect only the second block iteration meets passed"
    assert any(f"n={2 * b}" in p or f"n={2 * b + 1}" in p or f"n={b + 1}" in p for p in row.problems)


def test_wrong_code_for_a_zero_column_fails(shipped):
    """LAPACK dchkge: types 5-7 zero columns and getrf must return IZERO; here the code loses the block offset."""
    plant(shipped.parent / "pump_lu.c", "if ((r != 0) && (info == 0)) { info = r + (int)(k); }",
          "if ((r != 0) && (info == 0)) { info = r; }")
    row = run_verify(shipped, "pump_lu")
    assert not row.passed and any("expected" in p for p in row.problems), row.problems


def test_a_write_past_the_matrix_trips_a_canary(shipped):
    # one row past the matrix: inside lda's padding (a canary) or the next column (a wrong result)
    plant(shipped.parent / "pump_b64.c", "    }\n    return 0;\n}", "    }\n    if (N > 5) PUMP_B64_AT(a, LDA, N, 0) = 0;\n"
          "    return 0;\n}", after="int pump_b64(int n")
    row = run_verify(shipped, "pump_b64")
    assert not row.passed and any("canary" in p or "differ" in p for p in row.problems), row.problems


@pytest.mark.skipif(shutil.which("gcc") is None, reason="needs gcc with ASan and UBSan")
def test_sanitize_catches_an_out_of_bounds_write(shipped, monkeypatch):
    monkeypatch.setenv("CC", "gcc")
    # one element past the end of a buffer of exactly lda*n elements: no canary in the sanitizer's driver
    plant(shipped.parent / "pump_lu.c", "    if (N == 0U) { return 0; }\n    /* loop invariant",
          "    if (N == 0U) { return 0; }\n    if (N > 8U) { a[LDA * N] = 0; }\n    /* loop invariant")
    row = run_verify(shipped, "pump_lu", sanitize=True)
    assert any("--sanitize" in p and "AddressSanitizer" in p for p in row.problems), row.problems


# --- verify checks what ships --------------------------------------------------------------------------------

def test_an_edited_c_file_and_a_garbage_header_fail_before_testing(shipped, capsys):
    plant(shipped.parent / "pump_lu.c", "info = r + (int)(k);", "info = r;")
    with open(shipped.parent / "pump_b64.h", "a") as fh:
        fh.write("garbage\n")
    code = main(["verify", str(shipped)])
    out, err = capsys.readouterr()
    assert code == 1 and out == ""
    assert "pump_lu.c: differs" in err and "pump_b64.h: differs" in err and "nothing was tested" in err


def test_a_missing_file_fails(shipped, capsys):
    (shipped.parent / "pump_b100.py").unlink()
    assert main(["verify", str(shipped)]) == 1
    assert "pump_b100.py: missing" in capsys.readouterr().err


def test_verify_reads_the_output_directory(shipped, tmp_path, capsys):
    out = tmp_path / "fw"
    assert main(["generate", str(shipped), "-o", str(out)]) == 0
    (shipped.parent / "pump_lu.c").unlink()       # the copy next to the spec is not what -o DIR ships
    assert drift(load(shipped), out) == []
    assert main(["verify", str(shipped), "-o", str(out), "--kernel", "pump_lu", "--per-size", "1"]) == 0
    assert main(["verify", str(shipped), "--kernel", "pump_lu"]) == 1


def test_kernel_selection(shipped, capsys):
    assert main(["verify", str(shipped), "--kernel", "pump_b64", "--per-size", "1"]) == 0
    out, err = capsys.readouterr()
    assert "pump_b64" in out and "pump_lu" not in out
    assert main(["verify", str(shipped), "--kernel", "nope"]) == 2
    assert "no such kernel" in capsys.readouterr().err


# --- the compiler ---------------------------------------------------------------------------------------------

def test_cc_with_flags_is_split_like_a_shell_and_cflags_are_added(shipped, monkeypatch, capsys):
    monkeypatch.setenv("CC", f"{shutil.which('cc') or 'gcc'} -O1")
    assert main(["verify", str(shipped), "--kernel", "pump_lu", "--per-size", "1", "--cflags=-DPUMP=1 -g"]) == 0


def test_a_missing_compiler_is_one_line_exit_1(shipped, monkeypatch, capsys):
    monkeypatch.setenv("CC", "/nonexistent/cc")
    assert main(["verify", str(shipped), "--kernel", "pump_lu"]) == 1
    err = capsys.readouterr().err
    assert "/nonexistent/cc" in err and len(err.strip().splitlines()) == 1, err


def test_a_compiler_error_shows_its_first_error_line(shipped, monkeypatch, capsys):
    assert main(["verify", str(shipped), "--kernel", "pump_lu", "--cflags=-DPUMP_LU_INTERNAL=nonsense"]) == 1
    err = capsys.readouterr().err
    assert "error" in err and len(err.strip().splitlines()) == 1, err


def test_an_unwritable_cache_falls_back_to_a_temporary_directory(shipped, monkeypatch, capsys, tmp_path):
    from derive.check import build
    blocker = tmp_path / "not-a-dir"
    blocker.write_text("")
    monkeypatch.setenv("LUFORGE_CACHE", str(blocker / "cache"))
    monkeypatch.setattr(build, "_CACHE_ROOT", {})
    assert main(["verify", str(shipped), "--kernel", "pump_lu", "--per-size", "1"]) == 0
    assert "cannot use the build cache" in capsys.readouterr().err


def test_budget_refuses_per_size_below_one():
    with pytest.raises(ValueError):
        Budget(per_size=0)


def test_sizes_tried_are_named_once():
    """verify's table: runs of sizes as ranges, and a size tried several times (a fixed-size kernel) once."""
    from derive.check.verify import size_ranges
    assert size_ranges([0, 1, 2, 3, 5, 7, 8]) == "0-3,5,7-8"
    assert size_ranges([32, 32, 32, 32]) == "32"
    assert size_ranges([9, 1, 2, 1]) == "1-2,9"
