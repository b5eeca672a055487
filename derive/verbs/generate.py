"""`luforge generate SPEC`: render every kernel of a spec and write NAME.c, NAME.h and NAME.py for each, so
that the whole set is replaced or none of it is. A thin driver over emission and derive/printers/write.py."""
from __future__ import annotations

import sys
from pathlib import Path

from derive.verbs.common import EXIT_FAILED, add_verb, fail


def register(subparsers) -> None:
    p = add_verb(subparsers, "generate", help="write NAME.c, NAME.h, NAME_selftest.c (and NAME.py) for every kernel of a spec",
                 description="Render every kernel of SPEC and write its C99 source, its header, its known-answer "
                             "self-test and (unless the spec says python = false) its NumPy twin next to the spec "
                             "(or into -o DIR), with SPECNAME.cmake and SPECNAME.mk listing the sources.",
                 examples=["luforge generate generated/kernels.toml",
                           "luforge generate pumps.toml -o firmware/lu"],
                 handler=run)
    p.add_argument("spec", metavar="SPEC", help="the TOML spec ([defaults] and [[kernel]] tables)")
    p.add_argument("-o", "--output", metavar="DIR", help="output directory (default: the spec's directory)")


def run(args) -> int:
    from derive.printers.emit import emit_kernel, write_atomically
    from derive.printers.firmware import fragments
    from derive.spec import SpecError, load
    spec = Path(args.spec)
    try:
        options = load(spec)
    except SpecError as e:
        return fail(str(e))
    out = Path(args.output) if args.output else spec.resolve().parent
    if out.exists() and not out.is_dir():
        return fail(f"-o {out}: exists and is not a directory")
    files: list[tuple[str, str]] = []
    for o in options:
        files += emit_kernel(o).written()   # everything is rendered before anything is written
    files += fragments(spec.stem, spec.name, options)   # the CMake and Make lists of the sources
    try:
        written = write_atomically(out, files)
    except OSError as e:
        return fail(f"cannot write to {out}: {e.strerror or e}; nothing was replaced", EXIT_FAILED)
    for p in written:
        print(p)
    return 0
