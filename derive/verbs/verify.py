"""`luforge verify SPEC`: check that the kernel files on disk are what SPEC generates, then build and run them on
a seeded budget of matrices. A thin driver over derive/check/verify.py, which holds what is checked and how."""
from __future__ import annotations

import argparse
import shlex
import sys
from pathlib import Path

from derive.verbs.common import EXIT_FAILED, add_verb, fail, positive_int, seed_int, shown

DESCRIPTION = (
    "Check the kernels of SPEC as they ship: the NAME.c, NAME.h and NAME.py files next to SPEC (or in -o DIR). "
    "First every file is compared byte for byte with what SPEC generates now; a missing or differing file fails "
    "(exit 1) before anything runs. Then each kernel is built from those files (with $CC, split like a shell "
    "does, and --cflags) and run on: random matrices judged by LAPACK's factor and solve ratios (< 30) and "
    "Higham's componentwise bound; matrices with exactly known factors, which must come back bit for bit, at "
    "sizes that cross at least two block boundaries (n >= 2b+1) whatever the block b is; LAPACK's GE matrix "
    "types with the codes its tests expect for zero columns; canaries around every buffer; and the NumPy twin "
    "against the C kernel. A NaN or Inf in any ratio fails. Exit 0 when every kernel passes, 1 when one fails, "
    "2 for bad input.")


def _sizes(text: str) -> tuple[int, ...]:
    try:
        sizes = tuple(int(x) for x in text.split(",") if x.strip())
    except ValueError:
        raise argparse.ArgumentTypeError(f"{shown(text)}: allowed: integers >= 0 separated by commas, e.g. "
                                         f"9,16,200") from None
    if not sizes or any(not 0 <= n <= 20000 for n in sizes):
        raise argparse.ArgumentTypeError(f"{shown(text)}: allowed: integers from 0 to 20000 separated by commas")
    return sizes


def register(subparsers) -> None:
    p = add_verb(subparsers, "verify", help="check that the shipped kernel files match SPEC and pass published "
                                            "accuracy tests", description=DESCRIPTION,
                 examples=["luforge verify generated/kernels.toml",
                           "CC=clang luforge verify pumps.toml -o firmware/lu --kernel pump_lu --sizes 9,200 "
                           "--sanitize",
                           "luforge verify generated/kernels.toml --target cortex-m4f --target rv32imafc",
                           "luforge verify generated/kernels.toml --target all"],
                 handler=run)
    p.add_argument("spec", metavar="SPEC", help="the TOML spec whose kernels to verify")
    p.add_argument("-o", "--output", metavar="DIR",
                   help="directory holding the generated files (default: the spec's directory)")
    p.add_argument("--kernel", metavar="NAME", action="append",
                   help="verify only this kernel (repeat, or give NAME,NAME,...; default: every kernel)")
    p.add_argument("--sizes", type=_sizes, default=(), metavar="N,N,...",
                   help="also try these sizes n, e.g. 9,16,200 (integers from 0 to 20000)")
    p.add_argument("--seed", type=seed_int, default=20261202,
                   help="seed of the random matrices, 0 to 2**63 - 1 (default 20261202)")
    p.add_argument("--per-size", type=positive_int, default=2, metavar="N",
                   help="random matrices per size, an integer >= 1 (default 2)")
    p.add_argument("--cflags", default="", metavar="FLAGS",
                   help='extra compiler flags, split like a shell does; write them with =, e.g. --cflags="-O3 -march=native"')
    p.add_argument("--sanitize", action="store_true",
                   help="also build each kernel with -fsanitize=address,undefined into a standalone driver "
                        "and run it (needs a compiler with ASan and UBSan, e.g. gcc or clang)")
    from derive.verbs.targets import add_target_option
    add_target_option(p, "instead of calling the kernels on this machine through cffi, cross-build a test image "
                         "for each named row of the target table, run it (emulated where needed) and judge what it "
                         "sends back")


def run(args) -> int:
    from derive.check.build import BuildError
    from derive.check.verify import Budget, drift, table, verify
    from derive.spec import SpecError, load
    spec = Path(args.spec)
    try:
        options = load(spec)
    except SpecError as e:
        return fail(str(e))
    try:
        cflags = tuple(shlex.split(args.cflags))
    except ValueError as e:
        return fail(f"--cflags {shown(args.cflags)}: {e}")
    if args.kernel:
        wanted = [w for k in args.kernel for w in k.split(",") if w]
        known = {o.name for o in options}
        unknown = [w for w in wanted if w not in known]
        if unknown:
            return fail(f"--kernel {shown(unknown[0])}: no such kernel in {spec}; kernels: "
                        f"{', '.join(sorted(known))[:300]}")
        options = [o for o in options if o.name in wanted]
    directory = Path(args.output) if args.output else spec.resolve().parent
    if not directory.is_dir():
        return fail(f"-o {directory}: not a directory; generate the kernels there first", EXIT_FAILED)
    from derive.printers.write import recover
    note = recover(directory)       # an interrupted generate is repaired before anything is compared
    if note:
        print(f"luforge: note: {note}", file=sys.stderr)
    problems = drift(options, directory)
    if problems:
        for line in problems[:50]:
            print(f"luforge: {line}", file=sys.stderr)
        if len(problems) > 50:
            print(f"luforge: ... and {len(problems) - 50} more", file=sys.stderr)
        return fail(f"verify: {len(problems)} file(s) differ from {spec.name} or are missing; nothing was tested",
                    EXIT_FAILED)
    if args.target:
        from derive.verbs.targets import verify_on_targets
        return verify_on_targets(options, args)
    budget = Budget(seed=args.seed, per_size=args.per_size, sizes=args.sizes, cflags=cflags,
                    sanitize=args.sanitize)
    try:
        rows = verify(options, directory, budget, progress=lambda line: print(line, file=sys.stderr, flush=True))
    except BuildError as e:
        return fail(str(e), EXIT_FAILED)
    sys.stdout.write(table(rows))
    failed = [r.name for r in rows if not r.passed]
    if failed:
        return fail(f"verify: {len(failed)} of {len(rows)} kernel(s) failed: {', '.join(failed)[:300]}", EXIT_FAILED)
    return 0
