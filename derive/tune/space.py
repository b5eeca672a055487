"""The candidate space of `luforge tune`: every feasible configuration for a case, enumerated from the engine's
invariants and the spec layer's allowed values (never a hand-written list), with the pruning rule stated here."""
from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field

from derive import options as optmod
from derive import spec as specmod
from derive.engine import operation
from derive.engine.derivation import pivoting_supported
from derive.engine.invariants import enumerate_invariants
from derive.options import KernelOptions


class CaseError(ValueError):
    """A tuning request that no configuration can meet; str() is one line naming what is wrong and what is allowed."""


# Spec keys that split a kernel into its two independently timed halves: the factor reads only these...
FACTOR_KEYS = ("loop", "invariant", "block", "inner")
# ...and the solve only this one (it reads the factor's output, never how it was computed).
SOLVE_KEYS = ("solve_loop",)
# Keys fixed by the case the user asks about, not searched.
CASE_KEYS = ("name", "scalar", "layout", "pivoting")
# Keys that change the calling convention to many systems at once: a different problem from one system per
# call, so they are not part of this space (tune them with their own case, when the ABI is comparable).
EXCLUDED_KEYS = {"lanes": "batched kernels solve many systems per call; their time is not comparable",
                 "python": "decides only whether the NumPy twin is written; the C is the same"}


@dataclass(frozen=True, slots=True)
class Case:
    sizes: tuple[int, ...]
    scalar: str = "double"
    layout: str = "column-major"
    pivoting: str = "partial"
    target: str = "host"
    nrhs: int = 1
    fixed: tuple[tuple[str, object], ...] = ()     # whole-kernel keys the user pins (--fix KEY=VALUE)

    def __post_init__(self) -> None:
        if not self.sizes or any(n < 1 for n in self.sizes):
            raise CaseError(f"--n {','.join(map(str, self.sizes)) or '(none)'}: allowed: one or more sizes >= 1")
        for key, value, allowed in (("scalar", self.scalar, optmod.SCALARS), ("layout", self.layout, optmod.LAYOUTS),
                                    ("pivoting", self.pivoting, optmod.PIVOTING)):
            if value not in allowed:
                raise CaseError(f"--{key} {value}: allowed: {', '.join(allowed)}")
        if self.nrhs < 0:
            raise CaseError(f"--nrhs {self.nrhs}: allowed: 0 (factor only) or more right-hand sides")

    def describe(self) -> str:
        ns = ", ".join(map(str, self.sizes))
        return (f"n = {ns}, {self.scalar}, {self.layout}, pivoting {self.pivoting}, nrhs {self.nrhs}, "
                f"target {self.target}")


@dataclass(frozen=True, slots=True)
class Candidate:
    """One configuration as the spec keys that define it (besides the case's own), and the sizes it is tried at."""
    keys: tuple[tuple[str, object], ...]
    sizes: tuple[int, ...]
    part: str                       # "factor", "solve" or "both": which half this candidate varies
    group: tuple[tuple[str, object], ...] = field(default=())   # whole-kernel axes (size, shaping, ...)

    def __post_init__(self) -> None:
        if self.part not in ("factor", "solve", "both"):
            raise ValueError("part must be factor, solve or both")
        if not self.sizes:
            raise ValueError("a candidate is tried at one size at least")

    @property
    def entry(self) -> dict:
        return {k: _thaw(v) for k, v in self.keys}

    @property
    def name(self) -> str:
        blob = json.dumps(self.entry, sort_keys=True, separators=(",", ":"))
        return "tune_" + hashlib.sha256(blob.encode()).hexdigest()[:12]

    def label(self) -> str:
        """A short human description: the keys that are not part of the case."""
        e = self.entry
        parts = []
        for k, v in e.items():
            if k in CASE_KEYS:
                continue
            if isinstance(v, dict):
                v = "/".join(str(x) for x in v.values())
            parts.append(f"{k}={v}")
        return " ".join(parts)


def _freeze(v):
    return tuple(sorted(v.items())) if isinstance(v, dict) else v


def _thaw(v):
    return dict(v) if isinstance(v, tuple) else v


def candidate(entry: dict, sizes, part: str, group: dict | None = None) -> Candidate:
    order = {k: i for i, k in enumerate(specmod.KERNEL_KEYS)}
    keys = tuple(sorted(((k, _freeze(v)) for k, v in entry.items()), key=lambda kv: order.get(kv[0], 99)))
    return Candidate(keys, tuple(sorted(set(sizes))), part, tuple(sorted((group or {}).items())))


# -- the block-size rule -------------------------------------------------------------------------------------------

def block_sizes(n: int) -> list[int]:
    """Blocks tried at size n: every b with 2 <= b <= n/2 that is a power of two or divides n.

    Why: b >= n runs the inner loop once on the whole matrix (block 1 with loop = inner, plus the outer loop's
    overhead), so it is dominated and pruned; a b that is neither leaves a ragged last block and falls between
    two tried sizes (common practice: blocks are powers of two or divisors of the size)."""
    return [b for b in range(2, n // 2 + 1) if (b & (b - 1)) == 0 or n % b == 0]


# -- the space -----------------------------------------------------------------------------------------------------

def _loop_value(op, inv):
    names = [nm for _, nm in op.names]
    return ("loop", inv.name) if inv.name in names else ("invariant", inv.as_dict(op))


def pivot_capable(pivoting: str) -> list:
    lu = operation.LU
    return [inv for inv in enumerate_invariants(lu) if pivoting in pivoting_supported(lu, inv)]


def _solve_names() -> list[str]:
    lower = [inv.name for inv in enumerate_invariants(operation.LOWER_SOLVE)]
    upper = [inv.name for inv in enumerate_invariants(operation.UPPER_SOLVE)]
    return [(lo, up) for lo in lower for up in upper]


def whole_kernel_axes(case: Case) -> tuple[dict[str, list], list[str]]:
    """Spec keys (besides the case's own and the factor's and solve's) that change the whole kernel, with the
    values to try, read from the options layer and the target table; and the keys left at their default."""
    axes: dict[str, list] = {}
    untuned: list[str] = []
    handled = set(FACTOR_KEYS) | set(SOLVE_KEYS) | set(CASE_KEYS)
    for key in specmod.KERNEL_KEYS:
        if key in handled:
            continue
        if key in EXCLUDED_KEYS:
            continue
        pinned = dict(case.fixed)
        if key in pinned:
            axes[key] = [pinned[key]]
            continue
        rule = AXIS_RULES.get(key)
        values = rule(case) if rule else (_allowed_values(key) or _bool_values(key))
        if values is None:
            untuned.append(key)
        else:
            axes[key] = values
    return axes, untuned


def _allowed_values(key: str):
    """A key's allowed words as the options module publishes them (KEYS or KEY as a tuple of strings)."""
    for attr in (key.upper() + "S", key.upper(), key.upper() + "_VALUES"):
        v = getattr(optmod, attr, None)
        if isinstance(v, (tuple, list)) and v and all(isinstance(x, str) for x in v):
            return list(v)
    return None


def _bool_values(key: str):
    """A yes/no key of the options (a bool field): its default first, then the other."""
    import dataclasses
    for f in dataclasses.fields(KernelOptions):
        if f.name == key and f.type in ("bool", bool) and isinstance(f.default, bool):
            return [f.default, not f.default]
    return None


def _size_axis(case: Case):
    # a compile-time n serves only that n; None keeps the runtime-n kernel (which serves every size)
    top = getattr(optmod, "MAX_SIZE", 32)
    return ["runtime", "per-n"] if any(n <= top for n in case.sizes) else ["runtime"]


def _codegen_target_axis(case: Case):
    # the portable C, and the row being tuned for when that row specialises code (a vector width or ISA flags);
    # a row whose kernels differ from the portable ones only in going without the one-column solve path (the
    # microcontrollers: code size first) replaces the portable C rather than doubling the space
    from derive.targets import table
    rows = ["generic"]
    row = table.TARGETS.get(case.target)
    if row is not None and case.target != "generic" and (row.vector_bytes or row.codegen_flags):
        rows.append(case.target)
    elif row is not None and not row.one_column_solve:
        rows = [case.target]
    return rows


# Keys whose values depend on the case rather than on a fixed list.
AXIS_RULES = {"size": _size_axis, "target": _codegen_target_axis}


def _group_settings(case: Case, axes: dict[str, list]):
    """Every combination of the whole-kernel axes, each with the sizes it serves."""
    combos = [({}, case.sizes)]
    for key, values in axes.items():
        nxt = []
        for settings, sizes in combos:
            for v in values:
                if key == "size":
                    if v == "runtime":
                        nxt.append((settings, sizes))
                    else:
                        top = getattr(optmod, "MAX_SIZE", 32)
                        nxt += [({**settings, "size": n}, (n,)) for n in sizes if n <= top]
                else:
                    nxt.append(({**settings, key: v}, sizes))
        combos = nxt
    return combos


def enumerate_space(case: Case) -> tuple[list[Candidate], list[str]]:
    """Every candidate for the case, and the spec keys left at their default. Raises CaseError when the case
    is infeasible (no loop ordering can do the pivoting asked for)."""
    capable = pivot_capable(case.pivoting)
    if not capable:
        lu = operation.LU
        allowed = sorted({p for inv in enumerate_invariants(lu) for p in pivoting_supported(lu, inv)})
        raise CaseError(f"--pivoting {case.pivoting}: no loop ordering can do it; allowed: {', '.join(allowed)}")
    axes, untuned = whole_kernel_axes(case)
    base = {"scalar": case.scalar, "layout": case.layout, "pivoting": case.pivoting}
    default_solve = optmod.DEFAULT_SOLVE_LOOP[case.layout]
    base["solve_loop"] = default_solve
    default_factor = dict([_loop_value(operation.LU, capable[0])], block=1)
    solves = _solve_names()
    out: list[Candidate] = []
    seen = set()

    def add(entry, sizes, part, group):
        c = candidate(entry, sizes, part, group)
        if sizes and c.name not in seen:
            seen.add(c.name)
            out.append(c)
        elif sizes:
            # the same kernel reached from the other half: it serves both comparisons
            i = next(i for i, x in enumerate(out) if x.name == c.name)
            out[i] = Candidate(out[i].keys, out[i].sizes, "both", out[i].group)

    for group, sizes in _group_settings(case, axes):
        gbase = {**base, **group}
        for inv in capable:
            add({**gbase, **dict([_loop_value(operation.LU, inv)]), "block": 1}, sizes, "factor", group)
        for b in sorted({b for n in sizes for b in block_sizes(n)}):
            at = tuple(n for n in sizes if b in block_sizes(n))
            for inv in capable:
                for inner in capable:
                    add({**gbase, **dict([_loop_value(operation.LU, inv)]), "block": b, "inner": inner.name},
                        at, "factor", group)
        for lower, upper in solves:
            sl = lower if lower == upper else {"lower": lower, "upper": upper}
            add({**gbase, **default_factor, "solve_loop": sl}, sizes, "solve", group)
    # the spec layer is the judge of feasibility: a combination of axes it refuses (say, a recursive panel
    # with block 1) is not a candidate
    feasible = []
    for c in out:
        try:
            to_options(c)
        except specmod.SpecError:
            continue
        feasible.append(c)
    if not feasible:
        raise CaseError(f"no feasible configuration for {case.describe()}")
    return feasible, untuned


def to_options(c: Candidate, name: str | None = None, spec_name: str = "") -> KernelOptions:
    """The candidate through the spec layer, so it is checked exactly as a user's spec entry would be."""
    text = entry_text({"name": name or c.name, **c.entry})
    return specmod.parse(text, spec_name or "(tune)")[0]


def toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(f"no TOML form for {v!r}")


def entry_text(entry: dict, comment: str = "") -> str:
    lines = [comment] if comment else []
    lines.append("[[kernel]]")
    width = max(len(k) for k in entry)
    lines += [f"{k:<{width}} = {toml_value(v)}" for k, v in entry.items()]
    return "\n".join(lines) + "\n"
