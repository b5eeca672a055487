"""Golden files of `luforge derive` for every ordering (and its pivoted and blocked forms) and of
`luforge variants`: any silent change in a derivation shows up as a diff. `make golden` rewrites them."""
from __future__ import annotations

import os
from pathlib import Path

import pytest

from derive.cli import main

GOLDEN = Path(__file__).resolve().parent / "golden"
CASES = [
    *[(f"lu-{loop}", ["derive", "--loop", loop, "--ir"]) for loop in
      ("bordered", "up-looking", "left-looking", "crout", "right-looking")],
    *[(f"lu-{loop}-partial-b4", ["derive", "--loop", loop, "--pivoting", "partial", "--block", "4", "--ir"])
      for loop in ("left-looking", "crout", "right-looking")],
    *[(f"{op}-{loop}", ["derive", "--op", op, "--loop", loop, "--block", "3", "--ir"])
      for op in ("lower-solve", "upper-solve") for loop in ("inner-product", "outer-product")],
    ("variants-lu", ["variants", "lu"]),
    ("variants-lu-json", ["variants", "lu", "--json"]),
]


@pytest.mark.parametrize("name, argv", CASES, ids=[c[0] for c in CASES])
def test_golden(name, argv, capsys):
    assert main(argv) == 0
    out = capsys.readouterr().out
    path = GOLDEN / f"{name}.txt"
    if os.environ.get("LUFORGE_UPDATE_GOLDEN"):
        path.write_text(out)
    assert path.exists(), f"missing golden file {path.name}: run `make golden`"
    assert out == path.read_text(), f"`luforge {' '.join(argv)}` changed; if intended, run `make golden`"
