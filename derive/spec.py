"""The TOML spec: read it, check every kernel entry against the allowed keys and values, and turn each into
KernelOptions. All problems are collected first; nothing is generated from a spec with any of them."""
from __future__ import annotations

import sys
import tomllib
from pathlib import Path

from derive.engine import operation
from derive.engine.derivation import derive, pivoting_supported
from derive.engine.invariants import InfeasibleInvariant, by_name, from_mapping
from derive.targets.table import TARGETS
from derive.options import (C_HELPERS, C_KEYWORDS, DEFAULT_SOLVE_LOOP, LAYOUTS, MAX_BLOCK, MAX_LANES, MAX_SIZE,
                            PANELS, PIVOTING, SCALARS, KernelOptions, is_c_identifier)

KERNEL_KEYS = ("name", "loop", "invariant", "block", "inner", "scalar", "layout", "pivoting", "solve_loop", "size",
               "constant_time", "lanes", "c_helpers", "python", "target", "panel")
DEFAULT_KEYS = tuple(k for k in KERNEL_KEYS if k != "name")
TOP_KEYS = ("defaults", "kernel")
BUILTIN_DEFAULTS = {"block": 1, "scalar": "double", "layout": "column-major", "pivoting": "none",
                    "c_helpers": "inline", "python": True, "target": "generic", "panel": "loop"}
# symbols a kernel emits besides its own name; another kernel may not take one of them
PUBLIC_SUFFIXES = ("_solve", "_pack", "_unpack", "_selftest")   # NAME_selftest is also a file


class SpecError(Exception):
    """One or more problems in a spec; str() is one line per problem."""

    def __init__(self, problems: list[str]):
        super().__init__("\n".join(problems))
        self.problems = problems


def _loops(op) -> list[str]:
    return [n for _, n in op.names]


SHOW_AT_MOST = 80     # characters of a user's value echoed back in a message


def _show(value) -> str:
    """repr() of a value from the spec, cut so that a 5 MB string is not echoed whole."""
    text = repr(value)
    return text if len(text) <= SHOW_AT_MOST else text[: SHOW_AT_MOST - 15] + f"... ({len(text)} chars)"


def load(path: str | Path) -> list[KernelOptions]:
    path = Path(path)
    try:
        data = path.read_bytes()
    except IsADirectoryError:
        raise SpecError([f"{path}: is a directory; give the spec's TOML file"]) from None
    except OSError as e:
        raise SpecError([f"{path}: cannot read the spec: {e.strerror or e}"]) from None
    if data.startswith((b"\xff\xfe", b"\xfe\xff")) or b"\x00" in data[:4096]:
        raise SpecError([f"{path}: the spec must be UTF-8 (this looks like UTF-16 or binary); save it as UTF-8"])
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as e:
        line = data[:e.start].count(b"\n") + 1
        raise SpecError([f"{path}: the spec must be UTF-8 (byte {e.start} on line {line} is not); save it as "
                         f"UTF-8"]) from None
    return parse(text, path.name, str(path))


def parse(text: str, spec_name: str, where: str | None = None) -> list[KernelOptions]:
    where = where or spec_name
    text = text.removeprefix("\ufeff")      # a UTF-8 byte order mark, as some editors write
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise SpecError([f"{where}: not valid TOML: {str(e)[:200]}"]) from None
    except RecursionError:
        raise SpecError([f"{where}: arrays or tables nested too deeply; a spec needs at most two levels"]) from None
    problems: list[str] = []
    for key in data:
        if key not in TOP_KEYS:
            problems.append(f"{where}: unknown top-level key {_show(key)}; allowed: [defaults] and [[kernel]]")
    defaults = data.get("defaults", {})
    if not isinstance(defaults, dict):
        problems.append(f"{where}: 'defaults' must be a table ([defaults])")
        defaults = {}
    for key in defaults:
        if key not in DEFAULT_KEYS:
            allowed = ", ".join(DEFAULT_KEYS)
            problems.append(f"{where}: [defaults]: unknown key {_show(key)}; allowed: {allowed}")
    kernels = data.get("kernel")
    if kernels is None:
        problems.append(f"{where}: no kernels: add at least one [[kernel]] table")
        kernels = []
    elif not isinstance(kernels, list) or not all(isinstance(k, dict) for k in kernels):
        problems.append(f"{where}: 'kernel' must be an array of tables ([[kernel]])")
        kernels = []
    out: list[KernelOptions] = []
    seen: dict[str, int] = {}
    for i, entry in enumerate(kernels, start=1):
        opts = _kernel(entry, defaults, i, spec_name, where, problems)
        if opts is not None:
            out.append(opts)
    names = [o.name for o in out]
    for o in out:
        low = o.name.lower()
        if low in seen:
            other = names[seen[low]]
            what = "is given twice" if other == o.name else f"differs from {other!r} only in case"
            problems.append(f"{where}: kernel '{o.name}': key 'name': {o.name!r} {what}; every kernel needs its "
                            f"own name (file names, include guards and macros are derived from it)")
        else:
            seen[low] = names.index(o.name)
        for suffix in PUBLIC_SUFFIXES:
            if o.name.endswith(suffix) and o.name[: -len(suffix)] in names:
                problems.append(f"{where}: kernel '{o.name}': key 'name': clashes with the {suffix} function of "
                                f"kernel '{o.name[: -len(suffix)]}'")
    if problems:
        raise SpecError(list(dict.fromkeys(problems)))
    return out


def _kernel(entry: dict, defaults: dict, i: int, spec_name: str, where: str,
            problems: list[str]) -> KernelOptions | None:
    raw_name = entry.get("name")
    label = f"kernel '{raw_name}'" if isinstance(raw_name, str) else f"kernel #{i}"
    start = len(problems)
    from_defaults = {k for k in defaults if k in DEFAULT_KEYS and k not in entry and
                     not (k in ("loop", "invariant") and ("loop" in entry or "invariant" in entry))}

    def bad(key: str, msg: str) -> None:
        # a value the kernel took from [defaults] is reported against [defaults], once (duplicates are dropped)
        owner = "[defaults]" if key in from_defaults else label
        problems.append(f"{where}: {owner}: key '{key}': {msg}")

    for key in entry:
        if key not in KERNEL_KEYS:
            bad(key, f"unknown key; allowed: {', '.join(KERNEL_KEYS)}")
    if raw_name is None:
        bad("name", "missing; every [[kernel]] needs a name (a C identifier)")
    elif not isinstance(raw_name, str) or not is_c_identifier(raw_name):
        bad("name", f"{_show(raw_name)} is not a C identifier; allowed: ASCII letters, digits and '_', not starting "
                    f"with a digit")
    elif raw_name in C_KEYWORDS:
        bad("name", f"{_show(raw_name)} is a C keyword; choose another name")

    merged = dict(BUILTIN_DEFAULTS)
    merged.update({k: v for k, v in defaults.items() if k in DEFAULT_KEYS})
    if "loop" in entry or "invariant" in entry:
        merged.pop("loop", None)
        merged.pop("invariant", None)
    merged.update({k: v for k, v in entry.items() if k in KERNEL_KEYS})

    def choice(key: str, allowed) -> str | None:
        v = merged.get(key)
        if not isinstance(v, str) or v not in allowed:
            bad(key, f"{_show(v)} is not allowed; allowed: {', '.join(allowed)}")
            return None
        return v

    scalar = choice("scalar", SCALARS)
    layout = choice("layout", LAYOUTS)
    pivoting = choice("pivoting", PIVOTING)
    c_helpers = choice("c_helpers", C_HELPERS)
    python = merged.get("python")
    if not isinstance(python, bool):
        bad("python", f"{python!r} is not allowed; allowed: true (also write NAME.py) or false (C only)")
    target = choice("target", tuple(TARGETS))
    panel = choice("panel", PANELS)
    block = merged.get("block")
    blocks = block if isinstance(block, list) and block else [block]
    if any(isinstance(b, bool) or not isinstance(b, int) or not 1 <= b <= MAX_BLOCK for b in blocks) or (
            len(blocks) > 1 and (min(blocks) < 2 or any(x <= y for x, y in zip(blocks, blocks[1:])))):
        bad("block", f"{_show(block)} is not allowed; allowed: an integer from 1 (unblocked) to {MAX_BLOCK}, or a list "
                     f"of decreasing block sizes from 2 up, one per level, e.g. [256, 32]")
        block = blocks = None
    else:
        block = blocks[0]

    size = merged.get("size")
    if size is not None and (isinstance(size, bool) or not isinstance(size, int) or not 1 <= size <= MAX_SIZE):
        bad("size", f"{_show(size)} is not allowed; allowed: an integer from 1 to {MAX_SIZE} (n fixed at compile "
                    f"time), or leave it out for n as an argument")
        size = None

    constant_time = merged.get("constant_time", True)
    if not isinstance(constant_time, bool):
        bad("constant_time", f"{constant_time!r} is not allowed; allowed: true (pivoting by selects, the same "
                             f"instructions whatever the matrix) or false (by branches)")
        constant_time = True
    elif not constant_time and (size is None or merged.get("pivoting") == "none"):
        bad("constant_time", "false is allowed only with 'size' and pivoting = \"partial\" (kernels for n as an "
                             "argument, and unpivoted ones, pivot by branches or not at all)")

    lanes = merged.get("lanes", 1)
    if isinstance(lanes, bool) or not isinstance(lanes, int) or not 1 <= lanes <= MAX_LANES:
        bad("lanes", f"{lanes!r} is not allowed; allowed: an integer from 1 (one matrix a call) to {MAX_LANES} "
                     f"(matrices interleaved element by element)")
        lanes = None
    elif lanes > 1 and pivoting and pivoting != "partial":
        bad("lanes", f"a batched kernel (lanes = {lanes}) needs pivoting = \"partial\": each matrix pivots and "
                     f"reports a zero pivot on its own; got pivoting = {pivoting!r}")
        lanes = None

    lu = operation.LU
    inv = None
    if "loop" in merged and "invariant" in merged:
        bad("invariant", "give either 'loop' or 'invariant', not both")
    elif "invariant" in merged:
        spec_inv = merged["invariant"]
        if not isinstance(spec_inv, dict) or not all(isinstance(v, str) for v in spec_inv.values()):
            bad("invariant", "must be an inline table of block = state, e.g. "
                             "{ A12 = \"solved\", A21 = \"solved\", A22 = \"input\" }")
        else:
            try:
                inv = from_mapping(lu, spec_inv)
            except InfeasibleInvariant as e:
                bad("invariant", f"not a feasible loop invariant: {e}")
    elif "loop" in merged:
        v = choice("loop", _loops(lu))
        inv = by_name(lu, v) if v else None
    else:
        bad("loop", f"missing; give 'loop' (one of {', '.join(_loops(lu))}) or 'invariant'")

    inner = None
    if "inner" in entry and block == 1:
        print(f"luforge: warning: {where}: {label}: key 'inner' has no effect with block = 1 (an unblocked kernel "
              f"is the loop itself); remove it or set block > 1", file=sys.stderr)
    inners = []        # the loop of every level below the outer one, the unblocked one last
    if "inner" in merged:
        raw = merged["inner"]
        names = raw if isinstance(raw, list) else [raw] * len(blocks or [1])
        if blocks and len(names) != len(blocks):
            bad("inner", f"{raw!r}: allowed: one loop per level of 'block' ({len(blocks)}), or a single loop for all")
        elif not all(isinstance(v, str) and v in _loops(lu) for v in names):
            bad("inner", f"{raw!r} is not allowed; allowed: {', '.join(_loops(lu))}, or a list of those")
        else:
            inners = [by_name(lu, v) for v in names]
            inner = inners[-1]
    else:
        inner = inv
        inners = [inv] * len(blocks or [1])
    if pivoting and pivoting != "none":
        checks = [("loop" if "invariant" not in merged else "invariant", inv)]
        if "inner" in merged and block and block > 1:
            checks += [("inner", i) for i in dict.fromkeys(inners)]
        for key, which in checks:
            if which is None:
                continue
            try:
                derive(lu, which, pivoting)
            except InfeasibleInvariant as e:
                capable = [n for n in _loops(lu) if pivoting in pivoting_supported(lu, by_name(lu, n))]
                bad(key, f"the {which.label} loop cannot do {pivoting} pivoting: {e}. Loops that can: "
                         f"{', '.join(capable)}")

    solve = merged.get("solve_loop", DEFAULT_SOLVE_LOOP.get(layout or "column-major"))
    names = _loops(operation.LOWER_SOLVE)
    lower = upper = None
    if isinstance(solve, str) and solve in names:
        lower = upper = solve
    elif isinstance(solve, dict) and set(solve) <= {"lower", "upper"} and all(
            isinstance(solve.get(k), str) and solve.get(k) in names for k in ("lower", "upper")):
        lower, upper = solve["lower"], solve["upper"]
    else:
        bad("solve_loop", f"{_show(solve)} is not allowed; allowed: {' or '.join(names)}, or a table "
                          f"{{ lower = ..., upper = ... }} of those")

    if panel == "recursive" and lanes and lanes > 1:
        bad("panel", f"'recursive' halves one matrix's panel; a batched kernel (lanes = {lanes}) steps all its "
                     f"matrices together; allowed with lanes: \"loop\"")
    if len(problems) > start or inv is None or inner is None or lanes is None or target is None:
        return None
    levels = tuple((b, i.words) for b, i in zip(blocks[1:], inners[:-1]))
    return KernelOptions(
        name=raw_name, invariant=inv.words, block=block, inner=inner.words if block > 1 else inv.words,
        scalar=scalar, layout=layout, pivoting=pivoting,
        solve_lower=by_name(operation.LOWER_SOLVE, lower).words,
        solve_upper=by_name(operation.UPPER_SOLVE, upper).words, spec=spec_name, size=size,
        constant_time=constant_time, lanes=lanes, c_helpers=c_helpers, python=python, target=target,
        levels=levels, panel=panel)

