"""`luforge generate SPEC`: render and check every kernel of a spec, then write NAME.c, NAME.h and NAME.py for
each so that the whole set is replaced or none of it is. A thin driver over emission and derive/printers/write.py."""
from __future__ import annotations

import signal
import sys
from pathlib import Path

from derive.verbs.common import EXIT_FAILED, EXIT_INTERRUPTED, add_verb, fail


class Interrupted(BaseException):
    """SIGTERM or SIGHUP, turned into an exception so the same clean-up runs as for Ctrl-C."""


def register(subparsers) -> None:
    p = add_verb(subparsers, "generate", help="write NAME.c, NAME.h, NAME_selftest.c (and NAME.py) for every "
                                              "kernel of a spec",
                 description="Render every kernel of SPEC and write its C99 source, its header, its known-answer "
                             "self-test and (unless the spec says python = false) its NumPy twin next to the spec "
                             "(or into -o DIR), with SPECNAME.cmake and SPECNAME.mk listing the sources. The whole set is rendered and checked first and "
                             "then replaces the old set as one: an error or an interruption leaves the complete "
                             "old set. A file in the way that luforge did not write, or that was edited since, is "
                             "kept unless --force; the spec itself is never overwritten.",
                 examples=["luforge generate generated/kernels.toml",
                           "luforge generate pumps.toml -o firmware/lu --check"],
                 handler=run)
    p.add_argument("spec", metavar="SPEC", help="the TOML spec ([defaults] and [[kernel]] tables)")
    p.add_argument("-o", "--output", metavar="DIR", help="output directory (default: the spec's directory)")
    p.add_argument("--check", action="store_true",
                   help="write nothing; list the files that are missing or differ from what SPEC generates now "
                        "(exit 1 if any)")
    p.add_argument("--force", action="store_true",
                   help="replace files in the way that luforge did not write or that were edited since")


def _raise_interrupted(signum, frame):
    raise Interrupted(signum)


def run(args) -> int:
    from derive.printers.emit import emit_kernel
    from derive.printers.firmware import fragments
    from derive.printers.write import WriteError, plan, recover, write_set
    from derive.spec import SpecError, load
    spec = Path(args.spec)
    try:
        options = load(spec)
    except SpecError as e:
        return fail(str(e))
    out = Path(args.output) if args.output else spec.resolve().parent
    if out.exists() and not out.is_dir():
        return fail(f"-o {out}: exists and is not a directory")
    if args.check:
        from derive.check.verify import drift
        problems = drift(options, out)
        for line in problems:
            print(line)
        return EXIT_FAILED if problems else 0
    old = {s: signal.signal(s, _raise_interrupted) for s in (signal.SIGTERM, signal.SIGHUP)}
    written: list[Path] = []
    try:
        from derive import names
        emitted = [emit_kernel(o) for o in options]   # everything is rendered and checked before anything is written
        errors, warnings = names.check([(e.options.name, e.files) for e in emitted])
        for line in warnings:
            print(f"luforge: warning: {spec}: {line}", file=sys.stderr)
        if errors:
            for line in errors:
                print(f"luforge: {spec}: {line}", file=sys.stderr)
            return fail("nothing was written (see the namespace rule in the README)")
        files = [f for e in emitted for f in e.written()]
        files += fragments(spec.stem, spec.name, options)   # the CMake and Make lists of the sources
        if out.is_dir():
            note = recover(out)
            if note:
                print(f"luforge: note: {note}", file=sys.stderr)
        try:
            the_plan = plan(out, files, spec, args.force)
        except WriteError as e:
            for line in e.lines[:-1]:
                print(f"luforge: {line}", file=sys.stderr)
            return fail(e.lines[-1], e.code)
        try:
            write_set(the_plan, written)
        except OSError as e:
            where = f" {e.filename}" if getattr(e, "filename", None) else ""
            return fail(f"cannot write{where}: {e.strerror or e}; nothing was replaced (the old set is as it was)",
                        EXIT_FAILED)
    except (KeyboardInterrupt, Interrupted) as e:
        code = EXIT_INTERRUPTED if isinstance(e, KeyboardInterrupt) else 128 + int(e.args[0])
        if written:
            return fail(f"interrupted after all {len(written)} files were replaced; the new set is complete", code)
        return fail("interrupted; nothing was replaced (the old set is as it was)", code)
    finally:
        for s, h in old.items():
            signal.signal(s, h)
    for p in written:
        print(p)
    return 0
