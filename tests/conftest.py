"""Shared fixtures: the test catalogues are written as TOML specs, generated, built into one cffi module each
(cached by content hash) and loaded alongside their NumPy modules, so every test runs the shipped code."""
from __future__ import annotations

import os
import sys
from dataclasses import dataclass
from pathlib import Path

import pytest
from hypothesis import HealthCheck, settings

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from derive.check.build import build, load_python  # noqa: E402
from derive.printers.emit import emit_kernel, write_atomically  # noqa: E402
from derive.check.harness import CKernel  # noqa: E402
from derive.spec import parse  # noqa: E402

# A fixed, derandomized budget: the same examples on every run, so CI is reproducible (common practice).
settings.register_profile("luforge", deadline=None, derandomize=True, database=None, print_blob=True,
                          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "luforge"))

LOOPS = ("bordered", "up-looking", "left-looking", "crout", "right-looking")
PIVOT_LOOPS = ("left-looking", "crout", "right-looking")
SHORT = {"bordered": "bo", "up-looking": "up", "left-looking": "le", "crout": "cr", "right-looking": "ri"}
SCALARS = ("double", "float")
LAYOUTS = ("column-major", "row-major")


def _entry(name, loop, block, inner, scalar, layout, pivoting):
    lines = ['[[kernel]]', f'name = "{name}"', f'loop = "{loop}"', f'block = {block}',
             f'scalar = "{scalar}"', f'layout = "{layout}"', f'pivoting = "{pivoting}"']
    if inner:
        lines.append(f'inner = "{inner}"')
    return "\n".join(lines) + "\n"


def _spec(prefix: str, loops, blocks, pivoting: str) -> str:
    """Every ordering in `loops` x {unblocked; each block size with each of `loops` as inner} x scalar x layout."""
    out = []
    for loop in loops:
        for scalar in SCALARS:
            for layout in LAYOUTS:
                tag = f"{scalar[0]}{'c' if layout == 'column-major' else 'r'}"
                out.append(_entry(f"{prefix}_{SHORT[loop]}_b1_{tag}", loop, 1, None, scalar, layout, pivoting))
                for block in blocks:
                    for inner in loops:
                        out.append(_entry(f"{prefix}_{SHORT[loop]}_b{block}_{SHORT[inner]}_{tag}", loop, block,
                                          inner, scalar, layout, pivoting))
    return "\n".join(out)


def unpivoted_spec() -> str:
    """Every ordering x {unblocked; blocks 2, 3, 8 with each inner ordering} x scalar x layout."""
    return _spec("u", LOOPS, (2, 3, 8), "none")


def pivoted_spec() -> str:
    """Every pivot-capable ordering x {1, 4, 16, and 5, which divides none of 16, 32, 64} x inner x scalar x
    layout."""
    return _spec("p", PIVOT_LOOPS, (4, 16, 5), "partial")


@dataclass
class Built:
    options: object
    c: CKernel
    py: object


def build_catalogue(spec_text: str, spec_name: str, where: Path) -> dict[str, Built]:
    options = parse(spec_text, spec_name)
    files = []
    for o in options:
        files += list(emit_kernel(o).files)
    write_atomically(where, files)
    mod = build([(o.name, (where / f"{o.name}.c").read_text(), (where / f"{o.name}.h").read_text())
                 for o in options])
    return {o.name: Built(o, CKernel(mod, o), load_python(where / f"{o.name}.py")) for o in options}


_CACHE: dict[str, dict[str, Built]] = {}


def catalogue(kind: str, tmp_factory) -> dict[str, Built]:
    if kind not in _CACHE:
        text = unpivoted_spec() if kind == "unpivoted" else pivoted_spec()
        _CACHE[kind] = build_catalogue(text, f"{kind}.toml", tmp_factory.mktemp(kind))
    return _CACHE[kind]


def names(kind: str) -> list[str]:
    text = unpivoted_spec() if kind == "unpivoted" else pivoted_spec()
    return [line.split('"')[1] for line in text.splitlines() if line.startswith("name = ")]


@pytest.fixture(scope="session")
def unpivoted(tmp_path_factory):
    return catalogue("unpivoted", tmp_path_factory)


@pytest.fixture(scope="session")
def pivoted(tmp_path_factory):
    return catalogue("pivoted", tmp_path_factory)
