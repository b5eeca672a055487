"""The command line as a user meets it: generate is deterministic and atomic, bad specs exit 2 with one line
per problem naming the file, kernel, key and what is allowed, and nothing is written."""
from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from derive.cli import main

GOOD = """
[defaults]
scalar = "float"

[[kernel]]
name = "ctl_lu"
loop = "right-looking"
block = 3
inner = "crout"
pivoting = "partial"
layout = "row-major"

[[kernel]]
name = "ctl_plain"
invariant = { A12 = "solved", A21 = "solved", A22 = "input" }
scalar = "double"
solve_loop = { lower = "inner-product", upper = "outer-product" }
"""


def run(argv, capsys):
    code = main(argv)
    out = capsys.readouterr()
    return code, out.out, out.err


def write(tmp_path, text, name="spec.toml"):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_generate_writes_three_files_per_kernel_next_to_the_spec(tmp_path, capsys):
    spec = write(tmp_path, GOOD)
    code, out, err = run(["generate", str(spec)], capsys)
    assert code == 0, err
    for stem in ("ctl_lu", "ctl_plain"):
        for ext in (".c", ".h", ".py"):
            assert (tmp_path / f"{stem}{ext}").is_file()
    text = (tmp_path / "ctl_plain.c").read_text()
    assert "loop=crout" in text and "scalar=double" in text and "inner-product/outer-product" in text
    assert "float" in (tmp_path / "ctl_lu.h").read_text()


def test_generate_is_deterministic(tmp_path, capsys):
    spec = write(tmp_path, GOOD)
    a, b = tmp_path / "a", tmp_path / "b"
    assert run(["generate", str(spec), "-o", str(a)], capsys)[0] == 0
    assert run(["generate", str(spec), "-o", str(b)], capsys)[0] == 0
    for f in a.iterdir():
        assert f.read_bytes() == (b / f.name).read_bytes()


BAD = [
    ('name = "x"\nloop = "diagonal"', "key 'loop'", "allowed: bordered, up-looking, left-looking, crout, right-looking"),
    ('name = "x"\nloop = "crout"\nblock = 0', "key 'block'", "allowed: an integer from 1"),
    ('name = "x"\nloop = "crout"\nblock = 2.5', "key 'block'", "allowed: an integer"),
    ('name = "x"\nloop = "crout"\nscalar = "half"', "key 'scalar'", "allowed: double, float"),
    ('name = "x"\nloop = "crout"\nlayout = "tiled"', "key 'layout'", "allowed: column-major, row-major"),
    ('name = "x"\nloop = "crout"\npivoting = "full"', "key 'pivoting'", "allowed: none, partial"),
    ('name = "x"\nloop = "crout"\ncolour = 1', "key 'colour'", "unknown key; allowed: name, loop"),
    ('name = "9lives"\nloop = "crout"', "key 'name'", "not a C identifier"),
    ('name = "while"\nloop = "crout"', "key 'name'", "is a C keyword"),
    ('loop = "crout"', "key 'name'", "missing"),
    ('name = "x"', "key 'loop'", "missing; give 'loop'"),
    ('name = "x"\nloop = "crout"\ninvariant = { A12 = "solved" }', "key 'invariant'", "not both"),
    ('name = "x"\ninvariant = { A12 = "input", A21 = "solved", A22 = "updated" }', "key 'invariant'",
     "A22 = L21 U12 + L22 U22"),
    ('name = "x"\nloop = "bordered"\npivoting = "partial"', "key 'loop'", "cannot do partial pivoting"),
    ('name = "x"\nloop = "crout"\nblock = 4\ninner = "up-looking"\npivoting = "partial"', "key 'inner'",
     "Loops that can: left-looking, crout, right-looking"),
    ('name = "x"\nloop = "crout"\nsolve_loop = "sideways"', "key 'solve_loop'", "inner-product or outer-product"),
]


@pytest.mark.parametrize("body, key, allowed", BAD, ids=[b[1] + ":" + b[2][:20] for b in BAD])
def test_bad_spec_exits_2_and_writes_nothing(tmp_path, capsys, body, key, allowed):
    spec = write(tmp_path, GOOD + "\n[[kernel]]\n" + body + "\n")
    keep = tmp_path / "ctl_lu.c"
    keep.write_text("precious")
    code, out, err = run(["generate", str(spec)], capsys)
    assert code == 2
    assert "spec.toml" in err and key in err and allowed in err
    assert keep.read_text() == "precious"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["ctl_lu.c", "spec.toml"]


def test_every_problem_is_reported_on_its_own_line(tmp_path, capsys):
    spec = write(tmp_path, '[[kernel]]\nname = "a"\nloop = "x"\nscalar = "y"\n[[kernel]]\nname = "a"\nloop = "crout"\n'
                           '[[kernel]]\nname = "A"\nloop = "crout"\n')
    code, _, err = run(["generate", str(spec)], capsys)
    assert code == 2
    lines = err.strip().splitlines()
    assert any("key 'loop'" in ln for ln in lines) and any("key 'scalar'" in ln for ln in lines)
    assert any("only in case" in ln for ln in lines)


def test_duplicate_names_and_solve_clash(tmp_path, capsys):
    spec = write(tmp_path, '[[kernel]]\nname = "k"\nloop = "crout"\n[[kernel]]\nname = "k"\nloop = "crout"\n'
                           '[[kernel]]\nname = "k_solve"\nloop = "crout"\n')
    code, _, err = run(["generate", str(spec)], capsys)
    assert code == 2 and "given twice" in err and "clashes with the _solve function" in err


def test_toml_syntax_error_and_unknown_table(tmp_path, capsys):
    code, _, err = run(["generate", str(write(tmp_path, "[[kernel]\nname=1"))], capsys)
    assert code == 2 and "not valid TOML" in err
    code, _, err = run(["generate", str(write(tmp_path, '[kernels]\nname = "x"\n', "b.toml"))], capsys)
    assert code == 2 and "unknown top-level key 'kernels'" in err
    code, _, err = run(["generate", str(tmp_path / "missing.toml")], capsys)
    assert code == 2 and "cannot read" in err


def test_defaults_table_applies_and_kernel_overrides(tmp_path, capsys):
    spec = write(tmp_path, '[defaults]\nloop = "crout"\nblock = 5\nscalar = "float"\n'
                           '[[kernel]]\nname = "a"\n[[kernel]]\nname = "b"\nblock = 1\ninvariant = { A12 = "solved", A21 = "solved", A22 = "updated" }\n')
    assert run(["generate", str(spec)], capsys)[0] == 0
    a, b = (tmp_path / "a.c").read_text(), (tmp_path / "b.c").read_text()
    assert "loop=crout block=5" in a and "scalar=float" in a
    assert "loop=right-looking block=1" in b


def test_variants_json(capsys):
    code, out, _ = run(["variants", "lu", "--json"], capsys)
    assert code == 0
    rows = json.loads(out)
    assert [r["name"] for r in rows] == ["bordered", "up-looking", "left-looking", "crout", "right-looking"]
    for r in rows:
        assert set(r) == {"name", "quadrants", "pivoting"}
        assert set(r["quadrants"]) == {"A11", "A12", "A21", "A22"}
    piv = {r["name"]: r["pivoting"] for r in rows}
    assert piv["crout"] == ["none", "partial"] and piv["bordered"] == ["none"]


def test_derive_from_spec(tmp_path, capsys):
    spec = write(tmp_path, GOOD)
    code, out, _ = run(["derive", "--spec", str(spec), "--kernel", "ctl_lu"], capsys)
    assert code == 0
    assert "ordering    right-looking" in out and "pivoting    partial" in out
    assert "panel factor with partial pivoting" in out
    code, out, _ = run(["derive", "--spec", str(spec), "--kernel", "ctl_lu", "--ir"], capsys)
    assert code == 0
    for routine in ("routine ctl_lu(", "routine ctl_lu_inner(", "routine ctl_lu_lower(", "routine ctl_lu_upper(",
                    "routine ctl_lu_solve("):
        assert routine in out
    assert "call ctl_lu_inner on pivoted panel" in out
    code, _, err = run(["derive", "--spec", str(spec), "--kernel", "nope"], capsys)
    assert code == 2 and "no kernel named 'nope'" in err
    code, _, err = run(["derive", "--loop", "up-looking", "--pivoting", "partial"], capsys)
    assert code == 2 and "A21 'input'" in err


def test_verify_prints_a_row_per_kernel(tmp_path, capsys):
    spec = write(tmp_path, GOOD)
    code, out, err = run(["verify", str(spec), "--per-size", "1"], capsys)
    assert code == 1 and "missing" in err        # nothing generated yet: verify tests what ships
    assert run(["generate", str(spec)], capsys)[0] == 0
    code, out, err = run(["verify", str(spec), "--per-size", "1"], capsys)
    assert code == 0, out + err
    assert "ctl_lu" in out and "ctl_plain" in out and "pass" in out


def test_console_script_or_module_exit_status(tmp_path):
    spec = write(tmp_path, '[[kernel]]\nname = "x"\nloop = "nope"\n')
    exe = shutil.which("luforge")
    cmd = [exe] if exe and Path(exe).parent == Path(sys.executable).parent else [sys.executable, "-m", "derive.cli"]
    res = subprocess.run(cmd + ["generate", str(spec)], capture_output=True, text=True)
    assert res.returncode == 2 and "key 'loop'" in res.stderr


# --- a CLI a newcomer can drive (issue 6) ---

def test_luforge_alone_prints_help_and_exits_0(capsys):
    code, out, err = run([], capsys)
    assert code == 0 and "usage: luforge" in out and "verify" in out and "examples:" in out, err


def test_every_verb_has_help_for_every_argument_and_examples():
    from derive.cli import parser
    top = parser()
    sub = next(a for a in top._actions if a.dest == "verb")
    assert set(sub.choices) >= {"variants", "derive", "generate", "verify"}
    for verb, p in sub.choices.items():
        assert p.epilog and p.epilog.startswith("examples:") and "luforge " + verb in p.epilog, verb
        for action in p._actions:
            assert action.help, f"{verb}: {action.dest} has no help text"
            if action.choices:
                assert all(str(c) in action.help for c in action.choices), f"{verb} {action.dest}: choices"


def test_bad_arguments_give_one_line_and_exit_2(capsys):
    for argv, words in ((["verify", "x.toml", "--per-size", "0"], "allowed: an integer >= 1"),
                        (["verify", "x.toml", "--per-size", "-5"], "allowed: an integer >= 1"),
                        (["verify", "x.toml", "--seed", "-1"], "allowed: 0 to 2**63 - 1"),
                        (["derive", "--loop", "diagonal"], "bordered"),
                        (["derive", "--op", "qr"], "lower-solve"),
                        (["nope"], "invalid choice")):
        with pytest.raises(SystemExit) as e:
            main(argv)
        err = capsys.readouterr().err
        assert e.value.code == 2 and words in err and len(err.strip().splitlines()) == 1, (argv, err)


def test_python_dash_m_derive_runs_the_cli():
    res = subprocess.run([sys.executable, "-m", "derive", "--help"], capture_output=True, text=True,
                         cwd=Path(__file__).resolve().parents[1])
    assert res.returncode == 0 and "usage: luforge" in res.stdout
