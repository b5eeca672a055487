"""`luforge generate` loses nothing: a failure or interruption at any point leaves the complete old set or the
complete new set and no staging files; edited or foreign files and the spec itself are kept (issue 6)."""
from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest

from derive.cli import main
from derive.printers import write as write_mod

ROOT = Path(__file__).resolve().parents[1]
OLD = '[[kernel]]\nname = "sluice_a"\nloop = "crout"\n[[kernel]]\nname = "sluice_b"\nloop = "left-looking"\nblock = 3\n'
NEW = OLD.replace('loop = "crout"', 'loop = "right-looking"') + '[[kernel]]\nname = "sluice_c"\nloop = "bordered"\n'


def snapshot(d: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(d.iterdir()) if p.is_file()}


@pytest.fixture
def old_set(tmp_path, capsys):
    spec = tmp_path / "station.toml"
    spec.write_text(OLD)
    assert main(["generate", str(spec)]) == 0
    capsys.readouterr()
    before = snapshot(tmp_path)
    spec.write_text(NEW)
    new_dir = tmp_path / "reference"
    assert main(["generate", str(spec), "-o", str(new_dir)]) == 0
    capsys.readouterr()
    after = snapshot(new_dir)
    after["station.toml"] = spec.read_bytes()
    before["station.toml"] = spec.read_bytes()
    return spec, before, after


def outputs(d: Path) -> dict[str, bytes]:
    return {k: v for k, v in snapshot(d).items()}


def assert_old_or_new(d: Path, before, after) -> str:
    now = outputs(d)
    assert sorted(p.name for p in d.iterdir() if p.name.startswith(".")) == [], "staging or temporary files left"
    if now == before:
        return "old"
    assert now == after, "a mix of old and new files"
    return "new"


def test_every_failing_rename_leaves_the_old_set(old_set, monkeypatch, capsys):
    spec, before, after = old_set
    real = os.replace
    total = len(after) - 1
    for fail_at in range(total):
        calls = []

        def flaky(src, dst):
            if Path(dst).parent == spec.parent and not Path(src).name.endswith(".part"):
                calls.append(dst)
                if len(calls) == fail_at + 1:
                    raise OSError(28, "No space left on device", str(dst))
            return real(src, dst)
        monkeypatch.setattr(write_mod.os, "replace", flaky)
        assert main(["generate", str(spec)]) == 1
        assert "nothing was replaced" in capsys.readouterr().err
        assert assert_old_or_new(spec.parent, before, after) == "old", fail_at
    monkeypatch.setattr(write_mod.os, "replace", real)
    assert main(["generate", str(spec)]) == 0
    assert assert_old_or_new(spec.parent, before, after) == "new"


def test_ctrl_c_during_the_renames_completes_the_new_set_and_exits_130(old_set, monkeypatch, capsys):
    spec, before, after = old_set
    real = os.replace
    calls = []

    def interrupting(src, dst):
        calls.append(dst)
        if len(calls) == 3:
            # raised in this thread, synchronously (os.kill may hand it to another thread of the process, and
            # the handler then runs whenever the main thread next looks): held until the set is complete
            signal.raise_signal(signal.SIGINT)
        return real(src, dst)
    monkeypatch.setattr(write_mod.os, "replace", interrupting)
    # Ctrl-C as a terminal delivers it: a process started in the background by a shell without job control
    # inherits SIGINT ignored, and then the held signal is rightly dropped, so the test sets Python's default
    previous = signal.signal(signal.SIGINT, signal.default_int_handler)
    try:
        code = main(["generate", str(spec)])
    finally:
        signal.signal(signal.SIGINT, previous)
    assert code == 130
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "the new set is complete" in err
    assert assert_old_or_new(spec.parent, before, after) == "new"


def test_ctrl_c_while_staging_replaces_nothing(old_set, monkeypatch, capsys):
    spec, before, after = old_set
    real = write_mod._write_file

    def interrupting(path, data):
        if path.name == "sluice_b.h":
            raise KeyboardInterrupt
        return real(path, data)
    monkeypatch.setattr(write_mod, "_write_file", interrupting)
    assert main(["generate", str(spec)]) == 130
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "nothing was replaced" in err
    assert assert_old_or_new(spec.parent, before, after) == "old"


KILLER = """
import os, signal, sys
from derive.printers import write
real, calls = os.replace, []
def killing(src, dst):
    calls.append(dst)
    if len(calls) == int(sys.argv[2]):
        os.kill(os.getpid(), signal.SIGKILL)
    return real(src, dst)
write.os.replace = killing
from derive.cli import main
main(["generate", sys.argv[1]])
"""


@pytest.mark.parametrize("kill_at", [1, 4, 8])
def test_killed_mid_swap_the_next_run_restores_the_old_set(old_set, kill_at, capsys):
    """SIGKILL cannot be caught: the journal lets the next luforge command put the old set back."""
    spec, before, after = old_set
    res = subprocess.run([sys.executable, "-c", KILLER, str(spec), str(kill_at)], cwd=ROOT,
                         capture_output=True, text=True)
    assert res.returncode == -signal.SIGKILL, res.stderr
    assert (spec.parent / write_mod.STAGING).is_dir()       # what the crash left
    assert main(["generate", str(spec), "--check"]) == 1    # a read-only check neither repairs nor writes
    assert write_mod.recover(spec.parent) is not None
    assert assert_old_or_new(spec.parent, before, after) == "old"
    assert main(["generate", str(spec)]) == 0
    assert assert_old_or_new(spec.parent, before, after) == "new"


def test_sigterm_while_rendering_exits_with_one_line(old_set):
    spec, before, after = old_set
    script = ("import os, signal\nfrom derive.printers import emit\nreal = emit.emit_kernel\n"
              "def slow(o, *a, **k):\n    os.kill(os.getpid(), signal.SIGTERM)\n    return real(o, *a, **k)\n"
              "emit.emit_kernel = slow\nfrom derive.cli import main\nimport sys\n"
              f"sys.exit(main(['generate', {str(spec)!r}]))\n")
    res = subprocess.run([sys.executable, "-c", script], cwd=ROOT, capture_output=True, text=True)
    assert res.returncode == 128 + signal.SIGTERM and len(res.stderr.strip().splitlines()) == 1, res.stderr
    assert assert_old_or_new(spec.parent, before, after) == "old"


# --- files in the way -----------------------------------------------------------------------------------------

def test_a_directory_named_like_an_output_replaces_nothing(old_set, capsys):
    spec, before, after = old_set
    (spec.parent / "sluice_c.py").mkdir()
    edited = spec.parent / "sluice_a.c"
    edited.write_text(edited.read_text() + "/* a field fix */\n")
    before = snapshot(spec.parent)
    assert main(["generate", str(spec)]) == 1
    err = capsys.readouterr().err
    assert "sluice_c.py: a directory is in the way" in err and "sluice_a.c: was edited" in err
    assert "nothing was written" in err
    assert snapshot(spec.parent) == before
    assert sorted(p.name for p in spec.parent.iterdir() if p.name.startswith(".")) == []


def test_a_hand_edited_or_foreign_file_is_kept_unless_forced(old_set, capsys):
    spec, before, after = old_set
    edited = spec.parent / "sluice_a.h"
    edited.write_text(edited.read_text().replace("do not edit", "edited on site"))
    foreign = spec.parent / "sluice_c.c"
    foreign.write_text("int sluice_c(void) { return 0; }\n")
    assert main(["generate", str(spec)]) == 1
    err = capsys.readouterr().err
    assert "sluice_a.h: was edited" in err and "sluice_c.c: was not written by luforge" in err
    assert "edited on site" in edited.read_text() and foreign.read_text().startswith("int sluice_c")
    assert main(["generate", str(spec), "--force"]) == 0
    assert "edited on site" not in edited.read_text()


def test_the_spec_is_never_overwritten(tmp_path, capsys):
    spec = tmp_path / "gate.py"
    text = '[[kernel]]\nname = "gate"\nloop = "crout"\n'
    spec.write_text(text)
    for extra in ([], ["--force"]):
        assert main(["generate", str(spec), *extra]) == 2
        assert "is the spec itself" in capsys.readouterr().err
        assert spec.read_text() == text and sorted(p.name for p in tmp_path.iterdir()) == ["gate.py"]


def test_check_reports_drift_and_writes_nothing(old_set, capsys):
    spec, before, after = old_set
    assert main(["generate", str(spec), "--check"]) == 1
    out = capsys.readouterr().out
    assert "sluice_a.c: differs" in out and "sluice_c.h: missing" in out
    assert snapshot(spec.parent) == before


def test_content_hash_seals_every_file(old_set):
    spec, before, after = old_set
    for name, data in after.items():
        if name.endswith((".c", ".h", ".py")):
            assert write_mod.seal_state(data) == "sealed"
            assert write_mod.seal_state(data + b"// edited on site\n") == "edited"
            assert write_mod.seal_state(data.replace(b"do not edit", b"edited", 1)) == "edited"
    assert write_mod.seal_state(b"int x;\n") == "foreign"


def test_batched_and_fixed_size_files_are_sealed_and_regenerated(tmp_path, capsys):
    """Every kind of kernel carries its content hash, so `generate` run again on the same spec replaces its own
    files (a lanes kernel once shipped with an unfilled hash and was then taken for an edited file)."""
    spec = tmp_path / "bays.toml"
    spec.write_text('[[kernel]]\nname = "bays"\nloop = "right-looking"\npivoting = "partial"\nlanes = 4\n\n'
                    '[[kernel]]\nname = "bays6"\nloop = "right-looking"\npivoting = "partial"\nlanes = 4\nsize = 6\n\n'
                    '[[kernel]]\nname = "gate6"\nloop = "right-looking"\npivoting = "partial"\nsize = 6\n')
    assert main(["generate", str(spec)]) == 0
    for f in tmp_path.iterdir():
        if f.suffix in (".c", ".h", ".py"):
            assert write_mod.seal_state(f.read_bytes()) == "sealed", f.name
    capsys.readouterr()
    assert main(["generate", str(spec)]) == 0, capsys.readouterr().err
