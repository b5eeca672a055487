"""`luforge report`: per kernel and target row, bytes linked for factor alone and factor + solve, worst-case stack
from the compiler's call graph checked against the painted stack, instructions counted on the emulator, runtime."""
from __future__ import annotations

import dataclasses
import re
from dataclasses import dataclass, field

import numpy as np

from derive import __version__
from derive.check import cross, ondevice
from derive.options import KernelOptions
from derive.printers.emit import emit_kernel
from derive.targets.storage import SCALARS
from derive.targets.table import Target

DEFAULT_ORDERS = (4, 8, 16)


@dataclass
class Bytes:
    text: int
    data: int
    bss: int

    def __sub__(self, other: "Bytes") -> "Bytes":
        return Bytes(self.text - other.text, self.data - other.data, self.bss - other.bss)


@dataclass
class Stack:
    worst: int                 # bytes along the deepest path of the call graph, known frames only
    path: list[str]
    unknown: list[str]         # callees without a frame size (runtime routines, indirect calls)
    recursive: bool
    dynamic: bool              # a frame of dynamic size (alloca, VLA)
    measured: int              # the most the painted stack showed used, over the counted orders


@dataclass
class Entry:
    kernel: str
    target: str
    scalar: str
    factor: Bytes
    factor_solve: Bytes
    factor_stack: Stack
    solve_stack: Stack
    instructions: dict[int, tuple[int, int]]        # n -> (factor instructions, of them floating point)
    solve_instructions: dict[int, tuple[int, int]]  # n -> (solve of 2 right-hand sides, floating point)
    runtime: list[str]                              # runtime routines the kernel calls
    runtime_bytes: int                              # code and data of the library members linked for them
    warnings: list[str] = field(default_factory=list)
    problems: list[str] = field(default_factory=list)


def _probe(o: KernelOptions, t: Target, factor: bool, solve: bool) -> cross.Image:
    env = cross.jinja2.Environment(loader=cross.jinja2.FileSystemLoader(str(cross.TEMPLATES)),
                                   keep_trailing_newline=True, undefined=cross.jinja2.StrictUndefined)
    abi = ondevice.abi_of(o)
    probe = env.get_template("probe.c.j2").render(
        version=__version__, name=o.name, target=t.name, real=SCALARS[o.scalar].c_type, factor=factor,
        solve=solve, factor_call=f"{o.name}({abi.factor_args})", solve_call=f"{o.name}_solve({abi.solve_args})")
    files = dict(emit_kernel(o).files)
    sources = {f"{o.name}.c": files[f"{o.name}.c"], f"{o.name}.h": files[f"{o.name}.h"], "luforge_probe.c": probe}
    return cross.build_image(t, o.name, sources, f"{o.name}.c", f"probe{int(factor)}{int(solve)}")


_INPUT = re.compile(r"^ (\S+)?\s+0x([0-9a-f]+)\s+0x([0-9a-f]+)\s+(\S+\.(?:o|a\(\S+\)))\s*$")
_KIND = ((".text", "text"), (".rodata", "text"), (".srodata", "text"), (".data", "data"), (".sdata", "data"),
         (".bss", "bss"), (".sbss", "bss"), ("COMMON", "bss"))


def linked_bytes(img: cross.Image) -> dict[str, Bytes]:
    """Bytes each object or library member (archive(member)) keeps in the image's allocated sections after
    --gc-sections, from the linker map; read-only data counts as code, as the size tool does."""
    text = (img.workdir / f"{img.elf.stem}.map").read_text(errors="replace")
    body = text.split("Linker script and memory map", 1)[-1]
    out: dict[str, Bytes] = {}
    section = ""
    for line in body.splitlines():
        m = _INPUT.match(line)
        if m:
            name = m.group(1) or section
            kind = next((k for prefix, k in _KIND if name.startswith(prefix)), None)
            if kind:
                path = m.group(4)
                key = path if ".a(" in path else path.rsplit("/", 1)[-1]
                b = out.setdefault(key, Bytes(0, 0, 0))
                setattr(b, kind, getattr(b, kind) + int(m.group(3), 16))
        elif line.startswith(" ") and len(line.split()) == 1:
            section = line.split()[0]   # a long input section name: its address and size follow on the next line
    return out


def kernel_bytes(img: cross.Image, base: dict[str, Bytes]) -> tuple[Bytes, int]:
    """The kernel object's bytes plus those of the library members the image has and the base probe has not;
    and the library part alone."""
    linked = linked_bytes(img)
    own = linked.get(img.kernel_obj.name, Bytes(0, 0, 0))
    lib = [b for k, b in linked.items() if ".a(" in k and k not in base]
    total = Bytes(own.text + sum(b.text for b in lib), own.data + sum(b.data for b in lib),
                  own.bss + sum(b.bss for b in lib))
    return total, sum(b.text + b.data + b.bss for b in lib)


def undefined(img: cross.Image) -> list[str]:
    out = cross._run([cross.tool(img.target, "nm"), "-u", str(img.kernel_obj)], img.workdir, "nm").stdout
    return sorted({line.split()[-1] for line in out.splitlines() if line.strip()})


_NODE = re.compile(r'node: \{ title: "([^"]+)" label: "([^"]*)"')
_EDGE = re.compile(r'edge: \{ sourcename: "([^"]+)" targetname: "([^"]+)"')


def call_graph_stack(img: cross.Image, root: str) -> Stack:
    """Worst stack from `root` over gcc's -fcallgraph-info=su graph (frames as -fstack-usage reports them)."""
    ci = (img.workdir / f"{img.kernel_obj.stem}.ci").read_text()
    frame: dict[str, int] = {}
    dynamic: set[str] = set()
    for title, label in _NODE.findall(ci):
        m = re.search(r"\\n(\d+) bytes \(([^)]*)\)", label)
        if m:
            frame[title] = int(m.group(1))
            if "dynamic" in m.group(2):
                dynamic.add(title)
    edges: dict[str, list[str]] = {}
    for src, dst in _EDGE.findall(ci):
        edges.setdefault(src, []).append(dst)
    unknown: set[str] = set()
    recursive = False

    def walk(node: str, on_path: tuple[str, ...]) -> tuple[int, list[str]]:
        nonlocal recursive
        if node in on_path:
            recursive = True
            return 0, [node + " (recursion)"]
        if node not in frame:
            unknown.add(node.split(":")[-1])
            return 0, [node.split(":")[-1] + " (unknown)"]
        best, best_path = 0, []
        for nxt in edges.get(node, []):
            d, p = walk(nxt, on_path + (node,))
            if d > best or not best_path:
                best, best_path = d, p
        return frame[node] + best, [node.split(":")[-1]] + best_path

    worst, path = walk(root, ())
    return Stack(worst, path, sorted(unknown), recursive, bool(dynamic & set(path)), 0)


def _counts(o: KernelOptions, t: Target, orders, seed: int):
    """Run the driver on one matrix per order through the counting plugin: per order the factor's and the
    solve's (instructions, float instructions), minus the empty window's marker overhead; and the results."""
    cases = ondevice.kind_of(o).choose_cases(o, t, np.random.default_rng([seed, 1]), orders=list(orders))
    if not cases:
        return None, [], [], ({}, {})
    img = ondevice.image_for(o, t, cases, tag="count")
    run = cross.run(img, count=t.counting == "plugin")
    results = ondevice.parse(o, run.stdout, len(cases))
    counted = {}, {}
    if run.windows:
        base_i, base_f = run.windows[0]
        for k, c in enumerate(cases):
            for which, w in enumerate(run.windows[1 + 2 * k:3 + 2 * k]):
                counted[which][c.n] = (w[0] - base_i, w[1] - base_f)
    return img, cases, results, counted


def report_kernel(o: KernelOptions, t: Target, orders=DEFAULT_ORDERS, seed: int = 20261202) -> Entry:
    abi = ondevice.abi_of(o)
    why = abi.unsupported
    if why:
        empty = Stack(0, [], [], False, False, 0)
        return Entry(o.name, t.name, o.scalar, Bytes(0, 0, 0), Bytes(0, 0, 0), empty, empty, {}, {}, [], 0,
                     warnings=[f"not built: {why}"])
    base, only_f, both = _probe(o, t, False, False), _probe(o, t, True, False), _probe(o, t, True, True)
    # a fixed-size kernel runs at its own order only, whatever orders the others are counted at
    img, cases, results, (fcount, scount) = _counts(o, t, abi.orders or orders, seed)
    row = ondevice.kind_of(o).judge(o, t, cases, results) if cases else None
    fstack = call_graph_stack(img or both, o.name)
    sstack = call_graph_stack(img or both, f"{o.name}_solve")
    by_n = {c.n: r for c, r in zip(cases, results)}
    fstack.measured = max([r.factor_stack for r in by_n.values()] + [0])
    sstack.measured = max([r.solve_stack for r in by_n.values()] + [0])
    lib_base = linked_bytes(base)
    factor, _ = kernel_bytes(only_f, lib_base)
    factor_solve, runtime_bytes = kernel_bytes(both, lib_base)
    e = Entry(o.name, t.name, o.scalar, factor, factor_solve, fstack, sstack, fcount, scount, undefined(both),
              runtime_bytes, problems=list(row.problems) if row else [])
    if not cases:
        e.warnings.append(f"not counted: no matrix of order {', '.join(map(str, abi.orders or orders))} fits the "
                          f"row's RAM (max_n = {t.max_n})")
    if abi.kind == "lanes":
        e.warnings.append(f"instructions are per call on one whole group of W = {o.lanes} matrices")
    for what, s in (("factor", fstack), ("solve", sstack)):
        if not s.unknown and not s.recursive and not s.dynamic and s.measured > s.worst:
            e.problems.append(f"{what}: the painted stack shows {s.measured} bytes used, more than the call "
                              f"graph's worst case {s.worst}")
        if s.recursive:
            e.warnings.append(f"{what}: recursion in the call graph; the worst case is not bounded statically")
        if s.unknown:
            e.warnings.append(f"{what}: calls without a known frame ({', '.join(s.unknown)}); the static worst "
                              f"case leaves them out, the measured figure includes them")
    if o.scalar not in t.native:
        msg = f"{o.scalar} on {t.name}: software floating point, +{e.runtime_bytes / 1024:.1f} KB"
        twin = dataclasses.replace(o, scalar=next(iter(t.native), o.scalar), name=f"{o.name}_twin")
        n = max(fcount) if fcount else None
        if twin.scalar != o.scalar and n:
            tcount = _counts(twin, t, (n,), seed)[3][0]
            if tcount.get(n):
                msg += f", ~{fcount[n][0] / tcount[n][0]:.0f}x instructions of {twin.scalar} at n = {n}"
        e.warnings.append(msg)
    return e


def report(options: list[KernelOptions], targets: list[Target], orders=DEFAULT_ORDERS,
           jobs: int | None = None) -> list[Entry]:
    """Every kernel on every row, in parallel: each step is a compiler or emulator process."""
    import os
    from concurrent.futures import ThreadPoolExecutor
    for t in targets:
        cross.require(t)
    with ThreadPoolExecutor(jobs or os.cpu_count() or 1) as pool:
        return list(pool.map(lambda p: report_kernel(p[1], p[0], orders), [(t, o) for t in targets for o in options]))


def _b(x: Bytes) -> str:
    return f"{x.text} / {x.data} / {x.bss}"


def _stack(s: Stack) -> str:
    flag = "+?" if s.unknown else "" + ("rec" if s.recursive else "") + ("dyn" if s.dynamic else "")
    return f"{s.worst}{flag} ({s.measured})"


def markdown(entries: list[Entry], orders=DEFAULT_ORDERS) -> str:
    # a fixed-size kernel is counted at its own order: a column for it too
    orders = sorted(set(orders) | {n for e in entries for n in e.instructions})
    head = ["kernel", "target", "factor: code / data / bss", "factor + solve", "stack factor: static (measured)",
            "stack solve"] + [f"instructions n = {n} (float)" for n in orders] + ["runtime routines"]
    lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    notes = []
    for e in entries:
        if e.warnings and e.warnings[0].startswith("not built"):
            lines.append("| " + " | ".join([e.kernel, e.target, *["-"] * (len(head) - 3), "not built"]) + " |")
            notes.append(f"- {e.kernel} on {e.target}: {e.warnings[0]}")
            continue
        counts = [f"{e.instructions[n][0]:,} ({e.instructions[n][1]:,})" if n in e.instructions else "-"
                  for n in orders]
        runtime = ", ".join(e.runtime) + (f" ({e.runtime_bytes} B)" if e.runtime_bytes else "")
        lines.append("| " + " | ".join([e.kernel, e.target, _b(e.factor), _b(e.factor_solve), _stack(e.factor_stack),
                                         _stack(e.solve_stack), *counts, runtime or "none"]) + " |")
        notes += [f"- {e.kernel} on {e.target}: warning: {w}" for w in e.warnings]
        notes += [f"- {e.kernel} on {e.target}: PROBLEM: {p}" for p in e.problems]
    legend = ("\nBytes: the kernel's sections and the library members they pull in, as linked with --gc-sections "
              "(read-only data counted as code). Stack: "
              "the deepest path of gcc's call graph (-fstack-usage frames; +? when a callee's frame is unknown), "
              "in parentheses the most a painted stack showed used. Instructions: executed by the factor on one "
              "matrix of order n (a batched kernel: on one group of W matrices), counted by a QEMU TCG plugin; in "
              "parentheses those with a floating-point mnemonic.\n")
    return "\n".join(lines) + "\n" + legend + ("\n" + "\n".join(notes) + "\n" if notes else "")


def as_json(entries: list[Entry]) -> list[dict]:
    out = []
    for e in entries:
        d = dataclasses.asdict(e)
        d["instructions"] = {str(n): {"total": v[0], "float": v[1]} for n, v in e.instructions.items()}
        d["solve_instructions"] = {str(n): {"total": v[0], "float": v[1]} for n, v in e.solve_instructions.items()}
        out.append(d)
    return out
