"""The `luforge` command: a list of verbs, each registering itself from its own module (`register(subparsers)`
adds its parser, help, choices, examples and handler). Bad input exits 2 with one line; no verb prints help."""
from __future__ import annotations

import argparse
import importlib
import sys

from derive import __version__
from derive.verbs.common import Parser

# One line per verb; a module here exposes register(subparsers). Order is the order in `luforge --help`.
VERBS = (
    "derive.verbs.variants",
    "derive.verbs.derive",
    "derive.verbs.generate",
    "derive.verbs.verify",
    "derive.tune.verb",
    "derive.verbs.report",
)


def parser() -> argparse.ArgumentParser:
    p = Parser(
        prog="luforge", formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Derive LU loop bodies from loop invariants and emit verified C99 and NumPy kernels.",
        epilog="examples:\n  luforge variants lu\n  luforge generate generated/kernels.toml\n"
               "  luforge verify generated/kernels.toml\n\n`luforge VERB --help` describes each verb.")
    p.add_argument("--version", action="version", version=f"luforge {__version__}")
    sub = p.add_subparsers(dest="verb", metavar="VERB", title="verbs", parser_class=Parser)
    for module in VERBS:
        importlib.import_module(module).register(sub)
    return p


def main(argv: list[str] | None = None) -> int:
    p = parser()
    args = p.parse_args(argv)
    if getattr(args, "fn", None) is None:
        p.print_help()
        return 0
    try:
        return args.fn(args)
    except KeyboardInterrupt:       # a verb that writes handles this itself and says what was replaced
        print(f"luforge: {args.verb}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
