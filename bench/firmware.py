"""Lean code where it matters: the pivoted unblocked right-looking float kernel on Cortex-M4F at -Os, in each C
shaping, against a textbook LU written by hand with the same ABI (bench/reference/textbook_lu.c).

Bytes are what the factor alone (and factor + solve) pulls in when linked with --gc-sections; stack is the
deepest path of the call graph over -fstack-usage frames; instructions are counted on the emulated core by the
target table's counter (derive/check/report.py) for n = 4, 8, 16. Run: .venv/bin/python bench/firmware.py
"""
from __future__ import annotations

import argparse
import dataclasses
import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from derive.options import C_HELPERS, make_options  # noqa: E402
from derive.printers.emit import emit_kernel  # noqa: E402

CC = "arm-none-eabi-gcc"
# the reference flags for the Cortex-M4F figures
FLAGS = ["-mcpu=cortex-m4", "-mthumb", "-mfpu=fpv4-sp-d16", "-mfloat-abi=hard", "-Os", "-std=c99",
         "-ffunction-sections", "-fdata-sections"]
TEXTBOOK = ROOT / "bench" / "reference" / "textbook_lu.c"


def kernels() -> list[tuple[str, str, str, object, str]]:
    """(label, symbol, C text, options or None, header) for each shaping and the textbook."""
    out = []
    for h in C_HELPERS:
        o = make_options(f"lean_{h}", "right-looking", 1, scalar="float", pivoting="partial", c_helpers=h,
                         target="cortex-m4f")
        files = dict(emit_kernel(o).files)
        out.append((f"generated, c_helpers = \"{h}\"", o.name, files[f"{o.name}.c"], o, files[f"{o.name}.h"]))
    tb = textbook_options()
    out.append(("textbook LU by hand (bench/reference)", "textbook_lu", TEXTBOOK.read_text(), None,
                dict(emit_kernel(tb).files)["textbook_lu.h"]))
    return out


def compile_object(work: Path, sym: str, c_text: str, header: str) -> Path:
    src = work / f"{sym}.c"
    src.write_text(c_text)
    if header:
        (work / f"{sym}.h").write_text(header)
    obj = work / f"{sym}.o"
    subprocess.run([CC, *FLAGS, "-fstack-usage", "-I", str(work), "-c", str(src), "-o", str(obj)], check=True,
                   cwd=work)
    return obj


def linked_text(work: Path, obj: Path, roots: list[str]) -> int:
    """Bytes of code and read-only data kept by --gc-sections when only `roots` are needed."""
    elf = work / f"{obj.stem}_{len(roots)}.elf"
    keep = [f"-Wl,--undefined={r}" for r in roots]
    subprocess.run([CC, *FLAGS, "-nostdlib", "-nostartfiles", "-Wl,--gc-sections", f"-Wl,-e,{roots[0]}", *keep,
                    str(obj), "-o", str(elf)], check=True, cwd=work)
    out = subprocess.run(["arm-none-eabi-size", "-A", str(elf)], capture_output=True, text=True, check=True).stdout
    return sum(int(m.group(2)) for m in re.finditer(r"^(\.text\S*|\.rodata\S*)\s+(\d+)", out, flags=re.M))


def worst_stack(work: Path, obj: Path, root: str) -> int:
    """Deepest path from `root` over the static call graph read from the disassembly, each function's frame
    from -fstack-usage (gcc's clones such as .constprop keep their base name's calls)."""
    frames = {}
    for ln in (work / f"{obj.stem}.su").read_text().splitlines():
        fn, size, _ = ln.split("\t")
        frames[fn.rsplit(":", 1)[-1]] = int(size)
    dis = subprocess.run(["arm-none-eabi-objdump", "-dr", str(obj)], capture_output=True, text=True).stdout
    calls: dict[str, set[str]] = {}
    cur = None
    for ln in dis.splitlines():
        m = re.match(r"^[0-9a-f]+ <([^>]+)>:", ln)
        if m:
            cur = m.group(1)
            calls[cur] = set()
        m = re.search(r"R_ARM_THM_(?:CALL|JUMP24)\s+(\S+)", ln)     # calls, read from the relocations
        if m and cur:
            calls[cur].add(m.group(1))

    def depth(fn: str, seen: frozenset) -> int:
        if fn in seen:
            raise RuntimeError(f"recursion through {fn}")
        return frames.get(fn, 0) + max((depth(c, seen | {fn}) for c in calls.get(fn, ())), default=0)
    return depth(root, frozenset())


def textbook_options():
    return make_options("textbook_lu", "right-looking", 1, scalar="float", pivoting="partial")


def target_report(o, c_text: str | None, orders):
    """The target table's report for one kernel on cortex-m4f (bytes, stack, instructions counted by its QEMU
    plugin); with `c_text`, that C replaces the generated source (the textbook kernel has the same ABI and is
    checked by the same on-target judge)."""
    try:
        from derive.check import ondevice, report
        from derive.targets.table import get
    except ImportError:
        return None
    real = report.emit_kernel
    if c_text is not None:
        def emit(opts):
            e = real(opts)
            if opts.name != o.name:
                return e
            return dataclasses.replace(e, files=tuple((n, c_text if n == f"{o.name}.c" else t) for n, t in e.files))
        report.emit_kernel = ondevice.emit_kernel = emit
    try:
        entry = report.report_kernel(o, get("cortex-m4f"), orders)
    finally:
        report.emit_kernel = ondevice.emit_kernel = real
    if entry.problems:
        raise RuntimeError(f"{o.name} failed on the target: {entry.problems}")
    return entry


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--orders", default="4,8,16", help="orders n for the instruction counts")
    args = ap.parse_args()
    orders = [int(x) for x in args.orders.split(",")]
    if shutil.which(CC) is None:
        print(f"{CC} not found: install gcc-arm-none-eabi", file=sys.stderr)
        return 1
    print(subprocess.run([CC, "--version"], capture_output=True, text=True).stdout.splitlines()[0])
    print("flags: " + " ".join(FLAGS) + "; linked with -Wl,--gc-sections\n")
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        for label, sym, text, o, header in kernels():
            obj = compile_object(work, sym, text, header)
            mine = (linked_text(work, obj, [sym]), linked_text(work, obj, [sym, f"{sym}_solve"]),
                    worst_stack(work, obj, sym))
            entry = target_report(o or textbook_options(), None if o else text, orders)
            rows.append((label, mine, entry))
    print("| kernel | factor bytes | factor+solve bytes | worst stack (factor) | "
          + " | ".join(f"instructions, n = {n}" for n in orders) + " |")
    print("|" + "---|" * (4 + len(orders)))
    for label, (factor, both, stack), e in rows:
        if e is None:
            cells = ["(target counter not available)"] * len(orders)
        else:
            cells = [f"{e.instructions[n][0]:,}" for n in orders]
            factor, both, stack = e.factor.text, e.factor_solve.text, e.factor_stack.worst
        print(f"| {label} | {factor} | {both} | {stack} | " + " | ".join(cells) + " |")
    print("\nindependent build of the same C (arm-none-eabi-size on a --gc-sections link, call graph from the "
          "relocations over -fstack-usage frames):")
    for label, (factor, both, stack), _ in rows:
        print(f"  {label}: factor {factor} bytes, factor+solve {both} bytes, stack {stack} bytes")
    return 0


if __name__ == "__main__":
    sys.exit(main())
