"""What every verb shares: exit codes, the one-line error, and `add_verb`, which gives each verb's parser its
help, its examples and its handler in one call so a new verb is one `register` function."""
from __future__ import annotations

import argparse
import sys
import textwrap
from typing import Callable

EXIT_OK = 0
EXIT_FAILED = 1        # a check failed, or the environment (compiler, disk, cache) let us down
EXIT_BAD_INPUT = 2     # the user's spec or arguments are wrong
EXIT_INTERRUPTED = 130  # 128 + SIGINT, what a shell reports for Ctrl-C (common practice)

SHOW_AT_MOST = 80      # characters of a user's value echoed back in a message


def fail(msg: str, code: int = EXIT_BAD_INPUT) -> int:
    print(f"luforge: {msg}", file=sys.stderr)
    return code


def shown(value, limit: int = SHOW_AT_MOST) -> str:
    """repr() of a user's value, cut to `limit` characters so a 5 MB value is not echoed whole."""
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 15] + f"... ({len(text)} chars)"


class Parser(argparse.ArgumentParser):
    """argparse with a one-line error: what was wrong and where to read what is allowed."""

    def error(self, message: str):
        self.exit(EXIT_BAD_INPUT, f"{self.prog}: {message} (see `{self.prog} --help`)\n")


def add_verb(subparsers, name: str, *, help: str, description: str, examples: list[str],
             handler: Callable[[argparse.Namespace], int]) -> argparse.ArgumentParser:
    """Add one verb: `help` is its line in `luforge --help`; the examples close its own --help."""
    epilog = "examples:\n" + "\n".join(f"  {e}" for e in examples)
    p = subparsers.add_parser(name, help=help, description=textwrap.fill(description, 88), epilog=epilog,
                              formatter_class=argparse.RawDescriptionHelpFormatter)
    p.set_defaults(fn=handler)
    return p


def positive_int(text: str) -> int:
    """argparse type: an integer >= 1."""
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{shown(text)} is not an integer; allowed: an integer >= 1") from None
    if v < 1:
        raise argparse.ArgumentTypeError(f"{v} is not allowed; allowed: an integer >= 1")
    return v


def seed_int(text: str) -> int:
    """argparse type: a seed numpy accepts, 0 <= seed < 2**63."""
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{shown(text)} is not an integer; allowed: 0 to 2**63 - 1") from None
    if not 0 <= v < 2 ** 63:
        raise argparse.ArgumentTypeError(f"{shown(v)} is out of range; allowed: 0 to 2**63 - 1")
    return v
