"""What `verify --target` and `report` share: the --target option over the target table's rows (`all` for every
row with a place to run), and `verify --target` itself, a thin driver over derive/check/ondevice.py."""
from __future__ import annotations

import argparse
import sys

from derive.verbs.common import EXIT_FAILED, fail


def add_target_option(p: argparse.ArgumentParser, what: str) -> None:
    from derive.targets.table import CHECK_ROWS
    p.add_argument("--target", action="append", metavar="NAME", choices=(*CHECK_ROWS, "all"),
                   help=f"{what}; repeat for several; allowed: {', '.join(CHECK_ROWS)}, all")


def targets_of(names: list[str]):
    from derive.targets.table import CHECK_ROWS, get
    chosen = list(CHECK_ROWS) if "all" in names else list(dict.fromkeys(names))
    return [get(n) for n in chosen]


def verify_on_targets(options, args) -> int:
    from derive.check.build import BuildError
    from derive.check.cross import CrossError, ToolMissing
    from derive.check.ondevice import table, verify_targets
    try:
        rows = verify_targets(options, targets_of(args.target), seed=args.seed, per_size=args.per_size)
    except (ToolMissing, CrossError, BuildError) as e:
        return fail(str(e), EXIT_FAILED)
    sys.stdout.write(table(rows))
    return 0 if all(r.passed for r in rows) else EXIT_FAILED
