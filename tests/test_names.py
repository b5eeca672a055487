"""Names that cannot break a build, and errors instead of tracebacks (issue 6): every name the spec accepts must
compile and link beside the C library, other kernels and C++; every bad input is one line and exit 2."""
from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest

from derive.cli import main

ROOT = Path(__file__).resolve().parents[1]


def gen(tmp_path, names, capsys, extra=""):
    spec = tmp_path / "names.toml"
    spec.write_text("".join(f'[[kernel]]\nname = "{n}"\nloop = "crout"\nblock = 4\n{extra}' for n in names))
    code = main(["generate", str(spec)])
    err = capsys.readouterr().err
    return code, err, sorted(p.name for p in tmp_path.iterdir())


@pytest.mark.parametrize("names, words", [
    (["main"], "C standard library"), (["memcpy"], "C standard library"), (["abs"], "C standard library"),
    (["NULL"], "C standard library"), (["size_t"], "C standard library"), (["offsetof"], "C standard library"),
    (["__lu"], "reserved identifier"), (["_Lu"], "reserved identifier"), (["_lu"], "leading underscore"),
    (["class"], "C++ keyword"), (["new"], "C++ keyword"),
    (["numpy"], "shadow the Python module 'numpy'"), (["json"], "shadow"), (["scipy"], "shadow"), (["cffi"], "shadow"),
    (["X", "X_BLOCK"], "both emit X_BLOCK"), (["lu", "lu_lower"], "both emit lu_lower"),
    (["pump", "pump_inner"], "both emit pump_inner"),
])
def test_dangerous_names_exit_2_and_write_nothing(tmp_path, capsys, names, words):
    code, err, files = gen(tmp_path, names, capsys)
    assert code == 2 and words in err and "nothing was written" in err, err
    assert files == ["names.toml"]


def test_gnu_attributes_are_not_symbols(tmp_path, capsys):
    # packed kernels of the generic row declare vector types with __attribute__ in code only gcc and clang see;
    # the keyword is the compiler's, so two such kernels generate side by side
    spec = tmp_path / "names.toml"
    spec.write_text("".join(f'[[kernel]]\nname = "{n}"\nloop = "right-looking"\nblock = 64\npivoting = "partial"\n'
                            for n in ("pump_a", "pump_b")))
    assert main(["generate", str(spec)]) == 0, capsys.readouterr().err
    assert "__attribute__((vector_size(" in (tmp_path / "pump_a.c").read_text()


def test_long_names_warn_but_generate(tmp_path, capsys):
    code, err, files = gen(tmp_path, ["tidal_station_outflow_gate_controller"], capsys)
    assert code == 0 and "warning" in err and "31" in err


@pytest.mark.skipif(shutil.which("cc") is None or shutil.which("c++") is None, reason="needs cc and c++")
def test_unity_build_of_the_catalogue_compiles_and_links_with_and_without_internal_linkage(tmp_path):
    """Every kernel of generated/ in one translation unit, from C and from C++, once with the helpers static and
    once with every NAME_INTERNAL defined empty (external helpers): no symbol may collide."""
    gen_dir = ROOT / "generated"
    names = sorted(p.stem for p in gen_dir.glob("*.c"))
    unity = tmp_path / "unity.c"
    unity.write_text("".join(f'#include "{n}.c"\n' for n in names) + "int main(void) { return 0; }\n")
    heads = tmp_path / "heads.cpp"
    headers = sorted(p.name for p in gen_dir.glob("*.h"))
    heads.write_text("".join(f'#include "{h}"\n' for h in headers) + "int main() { return 0; }\n")
    empty = [f"-D{n.upper()}_INTERNAL=" for n in names]
    for flags in ([], empty):
        res = subprocess.run(["cc", "-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", *flags, f"-I{gen_dir}",
                              str(unity), "-o", str(tmp_path / "unity")], capture_output=True, text=True)
        assert res.returncode == 0, res.stderr[:2000]
        objs = []
        for n in names[:12]:      # separate objects linked together: external helpers must not clash either
            obj = tmp_path / f"{n}.o"
            res = subprocess.run(["cc", "-std=c99", "-c", *flags, str(gen_dir / f"{n}.c"), "-o", str(obj)],
                                 capture_output=True, text=True)
            assert res.returncode == 0, res.stderr[:2000]
            objs.append(str(obj))
        main_c = tmp_path / "main.c"
        main_c.write_text("int main(void) { return 0; }\n")
        res = subprocess.run(["cc", str(main_c), *objs, "-o", str(tmp_path / "linked")], capture_output=True, text=True)
        assert res.returncode == 0, res.stderr[:2000]
    res = subprocess.run(["c++", "-std=c++17", "-Wall", "-Werror", f"-I{gen_dir}", str(heads), "-o",
                          str(tmp_path / "heads")], capture_output=True, text=True)
    assert res.returncode == 0, res.stderr[:2000]


# --- errors, not tracebacks ----------------------------------------------------------------------------------

def one_line(capsys, argv, code):
    got = main(argv)
    err = capsys.readouterr().err
    assert got == code, err
    assert "Traceback" not in err and len([ln for ln in err.splitlines() if "warning" not in ln]) >= 1
    return err


def test_encodings(tmp_path, capsys):
    body = '[[kernel]]\nname = "gate"\nloop = "crout"\n'
    (tmp_path / "bom.toml").write_bytes(b"\xef\xbb\xbf" + body.encode())
    assert main(["generate", str(tmp_path / "bom.toml")]) == 0
    (tmp_path / "u16.toml").write_bytes(body.encode("utf-16"))
    assert "must be UTF-8" in one_line(capsys, ["generate", str(tmp_path / "u16.toml")], 2)
    (tmp_path / "latin.toml").write_bytes(body.replace("gate", "gat\u00e9").encode("latin-1"))
    assert "must be UTF-8" in one_line(capsys, ["generate", str(tmp_path / "latin.toml")], 2)


def test_deep_nesting_and_huge_values(tmp_path, capsys):
    (tmp_path / "deep.toml").write_text("x = " + "[" * 50000 + "]" * 50000 + "\n")
    assert "nested too deeply" in one_line(capsys, ["generate", str(tmp_path / "deep.toml")], 2)
    (tmp_path / "huge.toml").write_text('[[kernel]]\nname = "gate"\nloop = "' + "q" * 5_000_000 + '"\n')
    err = one_line(capsys, ["generate", str(tmp_path / "huge.toml")], 2)
    assert len(err) < 400 and "5000002 chars" in err


def test_a_bad_defaults_value_is_reported_once_against_defaults(tmp_path, capsys):
    spec = tmp_path / "d.toml"
    spec.write_text('[defaults]\nscalar = "half"\n' + "".join(f'[[kernel]]\nname = "k{i}"\nloop = "crout"\n'
                                                             for i in range(5)))
    err = one_line(capsys, ["generate", str(spec)], 2)
    lines = [ln for ln in err.splitlines() if "scalar" in ln]
    assert len(lines) == 1 and "[defaults]: key 'scalar'" in lines[0]


def test_inner_with_block_1_warns_that_it_has_no_effect(tmp_path, capsys):
    spec = tmp_path / "i.toml"
    spec.write_text('[[kernel]]\nname = "gate"\nloop = "crout"\ninner = "left-looking"\n')
    assert main(["generate", str(spec)]) == 0
    assert "'inner' has no effect with block = 1" in capsys.readouterr().err


def test_a_spec_that_is_a_directory(tmp_path, capsys):
    assert "is a directory" in one_line(capsys, ["generate", str(tmp_path)], 2)
