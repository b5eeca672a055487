"""`luforge report SPEC [--target ...]`: bytes, stack and instructions of each kernel on each target row, as a
Markdown table for people and JSON for CI diffs. A thin driver over derive/check/report.py."""
from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from derive.verbs.common import EXIT_FAILED, add_verb, fail, shown


def orders(text: str) -> tuple[int, ...]:
    try:
        vals = tuple(int(x) for x in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(f"{shown(text)}: allowed: orders >= 1 separated by commas, e.g. 4,8,16") \
            from None
    if not vals or min(vals) < 1:
        raise argparse.ArgumentTypeError(f"{shown(text)}: allowed: orders >= 1 separated by commas, e.g. 4,8,16")
    return vals


def register(subparsers) -> None:
    from derive.verbs.targets import add_target_option
    p = add_verb(subparsers, "report", help="bytes, stack and instruction counts of each kernel on target rows",
                 description="For every kernel of SPEC and every target row: code, data and bss bytes of the factor "
                             "alone and of factor + solve as linked with --gc-sections; worst-case stack from the "
                             "compiler's call graph next to the stack a run actually used; instructions executed on "
                             "the emulator (all, and floating-point ones); runtime routines pulled in, with a warning "
                             "when the scalar is emulated in software.",
                 examples=["luforge report generated/kernels.toml --target cortex-m4f",
                           "luforge report my.toml --target cortex-m4f --target cortex-m0 --orders 4,8,16,32 "
                           "--json report.json"],
                 handler=run)
    p.add_argument("spec", metavar="SPEC", help="the TOML spec whose kernels to measure")
    add_target_option(p, "the rows to build and measure on (default: cortex-m4f)")
    p.add_argument("--orders", type=orders, default=(4, 8, 16), metavar="N,N,...",
                   help="matrix orders whose instructions are counted (default 4,8,16)")
    p.add_argument("--json", metavar="FILE", help="also write the figures as JSON to FILE ('-': standard output "
                                                  "instead of the Markdown)")
    p.add_argument("--kernel", action="append", metavar="NAME", help="only this kernel of SPEC; repeat for several")


def run(args) -> int:
    from derive.check.build import BuildError
    from derive.check.cross import CrossError, ToolMissing
    from derive.check.report import as_json, markdown, report
    from derive.spec import SpecError, load
    from derive.verbs.targets import targets_of
    try:
        options = load(args.spec)
    except SpecError as e:
        return fail(str(e))
    if args.kernel:
        names = {o.name for o in options}
        unknown = [k for k in args.kernel if k not in names]
        if unknown:
            return fail(f"{args.spec}: no kernel named {shown(unknown[0])}; kernels: {', '.join(sorted(names))}")
        options = [o for o in options if o.name in args.kernel]
    try:
        entries = report(options, targets_of(args.target or ["cortex-m4f"]), args.orders)
    except (ToolMissing, CrossError, BuildError) as e:
        return fail(str(e), EXIT_FAILED)
    if args.json:
        text = json.dumps(as_json(entries), indent=1, sort_keys=True) + "\n"
        if args.json == "-":
            sys.stdout.write(text)
        else:
            try:
                Path(args.json).write_text(text)
            except OSError as e:
                return fail(f"--json {args.json}: cannot write: {e.strerror or e}", EXIT_FAILED)
    if args.json != "-":
        sys.stdout.write(markdown(entries, args.orders))
    return 0 if not any(e.problems for e in entries) else EXIT_FAILED
