"""The `luforge` command: variants, derive, generate, verify. Each verb is a thin driver over the pipeline stages;
bad input exits with status 2 and one line per problem, naming the file, the kernel, the key and what is allowed."""
from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from derive import __version__
from derive.engine import operation
from derive.engine.derivation import derive
from derive.printers.explain import derivation_text, variants_rows, variants_table
from derive.engine.invariants import InfeasibleInvariant, by_name, make
from derive.spec import SpecError, load

EXIT_BAD_INPUT = 2


def _fail(msg: str) -> int:
    print(f"luforge: {msg}", file=sys.stderr)
    return EXIT_BAD_INPUT


def cmd_variants(args) -> int:
    try:
        op = operation.get(args.operation)
    except KeyError as e:
        return _fail(str(e.args[0]))
    if args.json:
        print(json.dumps(variants_rows(op), indent=2))
    else:
        sys.stdout.write(variants_table(op))
    return 0


def cmd_derive(args) -> int:
    try:
        op = operation.get(args.op)
    except KeyError as e:
        return _fail(str(e.args[0]))
    pivoting = args.pivoting
    block = args.block
    if args.spec:
        if not args.kernel:
            return _fail("--spec needs --kernel NAME")
        try:
            kernels = {o.name: o for o in load(args.spec)}
        except SpecError as e:
            return _fail(str(e))
        if args.kernel not in kernels:
            return _fail(f"{args.spec}: no kernel named {args.kernel!r}; kernels: {', '.join(kernels) or 'none'}")
        o = kernels[args.kernel]
        words = {"lu": o.invariant, "lower-solve": o.solve_lower, "upper-solve": o.solve_upper}[op.name]
        inv = make(op, words)
        pivoting = pivoting or (o.pivoting if op.name == "lu" else "none")
        block = block or o.block
    elif args.loop:
        try:
            inv = by_name(op, args.loop)
        except KeyError as e:
            return _fail(str(e.args[0]))
    else:
        return _fail("give --loop NAME, or --spec FILE --kernel NAME")
    block = block or 1
    if block < 1:
        return _fail(f"--block {block}: allowed: an integer >= 1")
    try:
        d = derive(op, inv, pivoting or "none")
    except InfeasibleInvariant as e:
        return _fail(f"{inv.label}: {e}")
    sys.stdout.write(derivation_text(d, block, show_ir=args.ir and not args.spec))
    if args.ir and args.spec:
        from derive.lowering.lower import lower_kernel
        from derive.lowering.printing import dump_routine
        print(f"\nloop IR of kernel {o.name}, every routine:")
        for r in lower_kernel(o).routines:
            print(dump_routine(r))
    return 0


def cmd_generate(args) -> int:
    from derive.printers.emit import emit_kernel, write_atomically
    spec = Path(args.spec)
    try:
        options = load(spec)
    except SpecError as e:
        return _fail(str(e))
    out = Path(args.output) if args.output else spec.resolve().parent
    if out.exists() and not out.is_dir():
        return _fail(f"-o {out}: exists and is not a directory")
    files: list[tuple[str, str]] = []
    for o in options:
        files += list(emit_kernel(o).files)   # everything is rendered before anything is written
    try:
        written = write_atomically(out, files)
    except OSError as e:
        print(f"luforge: cannot write to {out}: {e.strerror or e}; nothing was replaced", file=sys.stderr)
        return 1
    for p in written:
        print(p)
    return 0


def cmd_verify(args) -> int:
    from derive.check.build import BuildError
    from derive.check.verify import table, verify
    try:
        options = load(args.spec)
    except SpecError as e:
        return _fail(str(e))
    try:
        rows = verify(options, seed=args.seed, per_size=args.per_size)
    except BuildError as e:
        print(f"luforge: {e}", file=sys.stderr)
        return 1
    sys.stdout.write(table(rows))
    return 0 if all(r.passed for r in rows) else 1


def parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="luforge", description="Derive LU loop bodies from loop invariants and "
                                                           "emit verified C99 and NumPy kernels.")
    p.add_argument("--version", action="version", version=f"luforge {__version__}")
    sub = p.add_subparsers(dest="verb", required=True)

    v = sub.add_parser("variants", help="list the feasible loop invariants of an operation")
    v.add_argument("operation", help=f"one of: {', '.join(operation.OPERATIONS)}")
    v.add_argument("--json", action="store_true", help="print a JSON list of {name, quadrants, pivoting}")
    v.set_defaults(fn=cmd_variants)

    d = sub.add_parser("derive", help="show the derivation of a loop body from its invariant")
    d.add_argument("--loop", help="loop ordering by name (see `luforge variants`)")
    d.add_argument("--spec", help="take the ordering from this spec ...")
    d.add_argument("--kernel", help="... and this kernel of it")
    d.add_argument("--block", type=int, help="block size for the lowered loop (default: 1 or the kernel's)")
    d.add_argument("--pivoting", choices=("none", "partial"), help="pivoting rule (default: none or the kernel's)")
    d.add_argument("--op", default="lu", help=f"operation: {', '.join(operation.OPERATIONS)} (default lu)")
    d.add_argument("--ir", action="store_true", help="also print the lowered loop IR (with --spec: every "
                                                     "routine of the kernel)")
    d.set_defaults(fn=cmd_derive)

    g = sub.add_parser("generate", help="write NAME.c, NAME.h and NAME.py for every kernel of a spec")
    g.add_argument("spec")
    g.add_argument("-o", "--output", help="output directory (default: next to the spec)")
    g.set_defaults(fn=cmd_generate)

    c = sub.add_parser("verify", help="build every kernel of a spec and check it on a fixed budget of matrices")
    c.add_argument("spec")
    c.add_argument("--seed", type=int, default=20261202)
    c.add_argument("--per-size", type=int, default=2, help="matrices per size (default 2)")
    c.set_defaults(fn=cmd_verify)
    return p


def main(argv: list[str] | None = None) -> int:
    args = parser().parse_args(argv)
    return args.fn(args)


if __name__ == "__main__":
    sys.exit(main())
