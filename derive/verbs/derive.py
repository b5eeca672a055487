"""`luforge derive`: show how a loop body follows from its invariant (the triple, the before/after contents of
every block, the ordered updates, the lowered loop). A thin driver over derive/printers/explain.py."""
from __future__ import annotations

import sys

from derive.engine import operation
from derive.verbs.common import add_verb, fail, positive_int, shown


def _all_loops() -> list[str]:
    seen: list[str] = []
    for op in operation.OPERATIONS.values():
        seen += [n for _, n in op.names if n not in seen]
    return seen


def register(subparsers) -> None:
    p = add_verb(subparsers, "derive", help="show the derivation of a loop body from its invariant",
                 description="Print the Hoare triple of one loop ordering, the contents of every block before and "
                             "after the boundary moves, the updates that follow, in order, and the lowered loop.",
                 examples=["luforge derive --loop crout --block 4 --ir",
                           "luforge derive --spec generated/kernels.toml --kernel tide_crout_piv_b4_dcm --ir"],
                 handler=run)
    p.add_argument("--loop", choices=_all_loops(), metavar="LOOP",
                   help=f"loop ordering by name: {', '.join(_all_loops())} (see `luforge variants OP`)")
    p.add_argument("--spec", metavar="FILE", help="take the ordering from this spec (needs --kernel)")
    p.add_argument("--kernel", metavar="NAME", help="the kernel of --spec to show")
    p.add_argument("--block", type=positive_int, metavar="B",
                   help="block size for the lowered loop, an integer >= 1 (default: 1, or the kernel's)")
    p.add_argument("--pivoting", choices=("none", "partial"),
                   help="pivoting rule: none or partial (default: none, or the kernel's)")
    p.add_argument("--op", default="lu", choices=operation.OPERATIONS, metavar="OP",
                   help=f"operation: {', '.join(operation.OPERATIONS)} (default: lu)")
    p.add_argument("--ir", action="store_true",
                   help="also print the lowered loop IR (with --spec: every routine of the kernel)")


def run(args) -> int:
    from derive.engine.derivation import derive
    from derive.engine.invariants import InfeasibleInvariant, by_name, make
    from derive.printers.explain import derivation_text
    from derive.spec import SpecError, load

    op = operation.get(args.op)
    pivoting, block, o = args.pivoting, args.block, None
    if args.spec:
        if not args.kernel:
            return fail("--spec needs --kernel NAME")
        try:
            kernels = {k.name: k for k in load(args.spec)}
        except SpecError as e:
            return fail(str(e))
        if args.kernel not in kernels:
            return fail(f"{args.spec}: no kernel named {shown(args.kernel)}; kernels: {', '.join(kernels) or 'none'}")
        o = kernels[args.kernel]
        words = {"lu": o.invariant, "lower-solve": o.solve_lower, "upper-solve": o.solve_upper}[op.name]
        inv = make(op, words)
        pivoting = pivoting or (o.pivoting if op.name == "lu" else "none")
        block = block or o.block
    elif args.loop:
        try:
            inv = by_name(op, args.loop)
        except KeyError as e:
            return fail(str(e.args[0]))
    else:
        return fail("give --loop NAME, or --spec FILE --kernel NAME (see `luforge derive --help`)")
    block = block or 1
    try:
        d = derive(op, inv, pivoting or "none")
    except InfeasibleInvariant as e:
        return fail(f"{inv.label}: {e}")
    sys.stdout.write(derivation_text(d, block, show_ir=args.ir and o is None))
    if args.ir and o is not None:
        from derive.lowering.printing import dump_routine
        from derive.printers.emit import lower_options     # a fixed-size kernel: its IR after the size lowering
        print(f"\nloop IR of kernel {o.name}, every routine{' (n = ' + str(o.size) + ')' if o.size else ''}:")
        if o.lanes > 1:     # a batched kernel: the same IR lowered over its lanes
            from derive.lowering.lanes import dump_lane_routine
            from derive.printers.emit_lanes import lower_batched
            for r in lower_batched(o)[1].routines:
                print(dump_lane_routine(r))
            return 0
        kernel = lower_options(o)
        for r in kernel.routines:
            print(dump_routine(r))
    return 0
