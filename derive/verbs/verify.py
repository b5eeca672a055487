"""`luforge verify SPEC`: build the kernels of a spec and check each on a seeded budget of matrices.
A thin driver over derive/check/verify.py, which holds what is checked and how."""
from __future__ import annotations

import sys

from derive.verbs.common import EXIT_FAILED, add_verb, fail, positive_int, seed_int


def register(subparsers) -> None:
    p = add_verb(subparsers, "verify", help="build every kernel of a spec and check it against published criteria",
                 description="Build every kernel of SPEC and run it on a seeded budget of matrices, judging the "
                             "results by LAPACK's factor and solve ratios and Higham's componentwise bound.",
                 examples=["luforge verify generated/kernels.toml",
                           "luforge verify generated/kernels.toml --per-size 4 --seed 7",
                           "luforge verify generated/kernels.toml --target cortex-m4f --target rv32imafc",
                           "luforge verify generated/kernels.toml --target all"],
                 handler=run)
    p.add_argument("spec", metavar="SPEC", help="the TOML spec whose kernels to verify")
    p.add_argument("--seed", type=seed_int, default=20261202, help="seed of the random matrices (default 20261202)")
    p.add_argument("--per-size", type=positive_int, default=2, metavar="N",
                   help="random matrices per size, an integer >= 1 (default 2)")
    from derive.verbs.targets import add_target_option
    add_target_option(p, "instead of calling the kernels on this machine through cffi, cross-build a test image "
                         "for each named row of the target table, run it (emulated where needed) and judge what it "
                         "sends back")


def run(args) -> int:
    from derive.check.build import BuildError
    from derive.check.verify import table, verify
    from derive.spec import SpecError, load
    try:
        options = load(args.spec)
    except SpecError as e:
        return fail(str(e))
    if args.target:
        from derive.verbs.targets import verify_on_targets
        return verify_on_targets(options, args)
    try:
        rows = verify(options, seed=args.seed, per_size=args.per_size)
    except BuildError as e:
        return fail(str(e), EXIT_FAILED)
    sys.stdout.write(table(rows))
    return 0 if all(r.passed for r in rows) else EXIT_FAILED
