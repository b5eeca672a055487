"""`luforge variants OP`: list the feasible loop invariants of an operation, with the pivoting each allows.
A thin driver over the enumeration in derive/engine/invariants.py and the table in derive/printers/explain.py."""
from __future__ import annotations

import json
import sys

from derive.engine import operation
from derive.verbs.common import add_verb


def register(subparsers) -> None:
    p = add_verb(subparsers, "variants", help="list the feasible loop orderings (invariants) of an operation",
                 description="List every loop invariant of OPERATION that the derivation accepts: its name, the "
                             "state of each block of the 2x2 partition, and the pivoting it allows.",
                 examples=["luforge variants lu", "luforge variants lower-solve --json"], handler=run)
    p.add_argument("operation", choices=operation.OPERATIONS, metavar="OPERATION",
                   help=f"one of: {', '.join(operation.OPERATIONS)}")
    p.add_argument("--json", action="store_true", help="print a JSON list of {name, quadrants, pivoting}")


def run(args) -> int:
    from derive.printers.explain import variants_rows, variants_table
    op = operation.get(args.operation)
    if args.json:
        print(json.dumps(variants_rows(op), indent=2))
    else:
        sys.stdout.write(variants_table(op))
    return 0
