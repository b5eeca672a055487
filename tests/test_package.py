"""Packaging: a plain (non-editable) install carries the templates, and the installed tool generates the same
files as the source tree does."""
from __future__ import annotations

import subprocess
import sys
import venv
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def wheel(tmp_path_factory):
    out = tmp_path_factory.mktemp("wheel")
    # with build isolation, as `pip install .` does: pip fetches the build backend from the package index
    res = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(out), str(ROOT)],
                         capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    return next(out.glob("luforge-*.whl"))


def test_wheel_carries_the_templates(wheel):
    names = zipfile.ZipFile(wheel).namelist()
    for t in ("derive/templates/c/kernel.c.j2", "derive/templates/c/kernel.h.j2", "derive/templates/c/helpers_column_major.c.j2",
              "derive/templates/c/helpers_row_major.c.j2", "derive/templates/c/helpers_common.c.j2",
              "derive/templates/python/kernel.py.j2"):
        assert t in names
    assert any(n.endswith("entry_points.txt") for n in names)


def test_installed_tool_generates_the_committed_files(wheel, tmp_path):
    env_dir = tmp_path / "env"
    venv.create(env_dir, system_site_packages=True, with_pip=True)
    py = env_dir / "bin" / "python"
    res = subprocess.run([str(py), "-m", "pip", "install", "--no-deps", "-q", str(wheel)], capture_output=True,
                         text=True)
    assert res.returncode == 0, res.stderr
    out = tmp_path / "out"
    spec = ROOT / "generated" / "kernels.toml"
    # run from elsewhere so the source tree's package cannot be picked up instead
    res = subprocess.run([str(env_dir / "bin" / "luforge"), "generate", str(spec), "-o", str(out)],
                         capture_output=True, text=True, cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    for f in out.iterdir():
        assert f.read_text() == (ROOT / "generated" / f.name).read_text()
