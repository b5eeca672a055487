"""`luforge tune`: the verb's arguments and its printed result (ranked table, Pareto front, contenders), a thin
driver over derive/tune/run.py; `--write` and `--report` hand the result to tune/write.py and tune/report.py."""
from __future__ import annotations

import shlex
import sys

from derive.verbs.common import EXIT_FAILED, EXIT_INTERRUPTED, add_verb, fail

SHOW_ROWS = 15


def register(subparsers) -> None:
    from derive.options import LAYOUTS, PIVOTING, SCALARS
    from derive.tune.rank import OBJECTIVES
    p = add_verb(subparsers, "tune", help="derive every candidate for a case, verify and measure each, rank them",
                 description="Enumerate every feasible configuration for the case (loop orderings from the "
                             "engine, block sizes by a stated rule, every other spec key's allowed values), verify "
                             "each with luforge's own checks, measure it on the host (wall time, interleaved "
                             "rounds, medians) or on an emulated target (exact instruction counts), and print the "
                             "ranked table and the Pareto front of speed against code size. Figures are cached by "
                             "code, compiler and target: a second run measures only what is new.",
                 examples=["luforge tune --n 8",
                           "luforge tune --n 4,6,8 --scalar float --layout row-major --nrhs 1",
                           "luforge tune --n 12 --objective weighted --weights speed=1,size=0.5",
                           "luforge tune --n 6 --write station.toml --name est_lu --report tune-out"],
                 handler=run)
    p.add_argument("--n", required=True, metavar="N[,N...]", help="the size or sizes to tune for")
    p.add_argument("--scalar", default="double", choices=SCALARS, help=f"scalar type: {', '.join(SCALARS)} (default double)")
    p.add_argument("--layout", default="column-major", choices=LAYOUTS, help=f"storage order: {', '.join(LAYOUTS)} (default column-major)")
    p.add_argument("--pivoting", default="partial", choices=PIVOTING, help=f"pivoting: {', '.join(PIVOTING)} (default partial)")
    p.add_argument("--target", default="host", metavar="TARGET",
                   help="host (wall time) or a target-table row that counts instructions (default host)")
    p.add_argument("--nrhs", default=None, type=int, metavar="K",
                   help="right-hand sides per solve; 0 tunes the factor alone (default 1 on the host; on an "
                        "emulated target, what its on-target driver solves with)")
    p.add_argument("--objective", choices=OBJECTIVES, default=None,
                   help=f"what to minimise: {', '.join(OBJECTIVES)} (default: time on the host, instructions on an "
                        f"emulated target)")
    p.add_argument("--weights", metavar="K=W,...", help="for --objective weighted: weights of speed, size, stack "
                                                        "(each figure divided by the best; default speed=1,size=1)")
    p.add_argument("--cflags", metavar="FLAGS", help="compiler flags for every candidate (default -O2 -fPIC)")
    p.add_argument("--fix", action="append", default=[], metavar="KEY=VALUE",
                   help="pin a whole-kernel spec key instead of trying its values, e.g. constant_time=true or "
                        "size=8 (repeatable; VALUE in TOML)")
    p.add_argument("--no-contenders", action="store_true", help="do not time Eigen and LAPACK beside the candidates")
    p.add_argument("--fresh", action="store_true", help="measure again even what the cache holds")
    p.add_argument("--write", metavar="SPEC", help="add or update the winner in this spec (needs --name)")
    p.add_argument("--name", metavar="NAME", help="kernel name for --write")
    p.add_argument("--report", metavar="DIR", help="write the table (Markdown, JSON) and PNG plots into DIR")
    p.add_argument("--all", action="store_true", help=f"print every row (default: the best {SHOW_ROWS})")
    p.add_argument("--quiet", action="store_true", help="no progress display")


def parse_sizes(text: str) -> tuple[int, ...]:
    from derive.tune.space import CaseError
    try:
        sizes = tuple(int(x) for x in text.replace(" ", "").split(",") if x)
    except ValueError:
        raise CaseError(f"--n {text[:40]}: allowed: one or more integers >= 1, separated by commas") from None
    if not sizes or any(n < 1 for n in sizes):
        raise CaseError(f"--n {text[:40]}: allowed: one or more integers >= 1, separated by commas")
    return tuple(sorted(set(sizes)))


def parse_fixed(items: list[str]) -> tuple:
    import tomllib

    from derive.spec import KERNEL_KEYS
    from derive.tune.space import CASE_KEYS, FACTOR_KEYS, SOLVE_KEYS, CaseError
    out = []
    for item in items:
        key, eq, value = item.partition("=")
        key = key.strip()
        allowed = [k for k in KERNEL_KEYS if k not in (*CASE_KEYS, *FACTOR_KEYS, *SOLVE_KEYS)]
        if not eq or key not in allowed:
            raise CaseError(f"--fix {item[:40]}: allowed: KEY=VALUE with KEY one of {', '.join(allowed)}")
        try:
            out.append((key, tomllib.loads(f"v = {value}")["v"]))
        except tomllib.TOMLDecodeError:
            raise CaseError(f"--fix {item[:40]}: the value must be TOML (true, 8, \"inline\")") from None
    return tuple(out)


def run(args) -> int:
    from derive.check.build import OPT_FLAGS, BuildError
    from derive.tune import measure
    from derive.tune.rank import Objective, parse_weights
    from derive.tune.run import Progress, tune
    from derive.tune.space import Case, CaseError
    try:
        be = measure.backend(args.target)
        nrhs = be.default_nrhs if args.nrhs is None else args.nrhs
        case = Case(parse_sizes(args.n), args.scalar, args.layout, args.pivoting, args.target, nrhs,
                    parse_fixed(args.fix))
        objective = Objective(args.objective or be.speed, case.nrhs,
                              parse_weights(args.weights) if args.objective == "weighted" else {"speed": 1.0})
        if args.weights and args.objective != "weighted":
            raise CaseError("--weights goes with --objective weighted")
        if bool(args.write) != bool(args.name):
            raise CaseError("--write SPEC and --name NAME go together")
        if args.write:
            from derive.tune.write import check_target
            check_target(args.write, args.name)
    except CaseError as e:
        return fail(str(e))
    flags = tuple(shlex.split(args.cflags)) if args.cflags else OPT_FLAGS
    try:
        out = tune(case, objective, flags, fresh=args.fresh, contenders=not args.no_contenders, progress=Progress(quiet=args.quiet))
    except CaseError as e:
        return fail(str(e))
    except BuildError as e:
        return fail(str(e), EXIT_FAILED)
    from derive.tune.show import render
    text, rows = render(out, objective, show_all=args.all)
    sys.stdout.write(text)
    if out.interrupted:
        verdicts = sum(1 for m in out.results if m.verified is not None)
        print(f"luforge: interrupted; the {verdicts} verdicts and {out.measured_now} figures taken so far are kept "
              f"in the cache (the next run starts from them)", file=sys.stderr)
        return EXIT_INTERRUPTED
    if not rows:
        return fail("no candidate was verified and measured at every size", EXIT_FAILED)
    if args.report:
        from derive.tune.report import write_report
        try:
            for p in write_report(args.report, out, objective, rows):
                print(f"wrote {p}")
        except OSError as e:
            return fail(f"--report {args.report}: cannot write: {e.strerror or e}", EXIT_FAILED)
    if args.write:
        from derive.tune.write import WriteError, write_winner
        try:
            path = write_winner(args.write, args.name, rows[0].m.cand, out, objective)
        except WriteError as e:
            return fail(str(e), e.code)
        print(f"wrote kernel {args.name} into {path}")
    return 0
