"""Lean code where it matters: the pivoted unblocked right-looking float kernel on Cortex-M4F at -Os, in each C
shaping, against a textbook LU written by hand with the same ABI (bench/reference/textbook_lu.c).

Bytes are what the factor alone (and factor + solve) pulls in when linked with --gc-sections; stack is the
deepest path of the call graph over -fstack-usage frames; instructions are counted on the emulated core by the
target table's counter (derive/check/report.py) for n = 4, 8, 16. Run: .venv/bin/python bench/firmware.py
"""
from __future__ import annotations

import argparse
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
        o = make_options(f"lean_{h}", "right-looking", 1, scalar="float", pivoting="partial", c_helpers=h)
        files = dict(emit_kernel(o).files)
        out.append((f"generated, c_helpers = \"{h}\"", o.name, files[f"{o.name}.c"], o, files[f"{o.name}.h"]))
    out.append(("textbook LU by hand (bench/reference)", "textbook_lu", TEXTBOOK.read_text(), None, ""))
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


def instructions(label_opts, orders) -> dict[int, int] | None:
    """Instructions of the factor on the emulated Cortex-M4F, from the target table's counter."""
    try:
        from derive.check import report
        from derive.targets.table import get
    except ImportError:
        return None
    o = label_opts
    t = get("cortex-m4f")
    entry = report.report_kernel(o, t, orders)
    return {n: entry.instructions[n][0] for n in orders}


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
            factor = linked_text(work, obj, [sym])
            both = linked_text(work, obj, [sym, f"{sym}_solve"])
            stack = worst_stack(work, obj, sym)
            counts = instructions(o, orders) if o is not None else None
            rows.append((label, factor, both, stack, counts))
    head = "| kernel | factor bytes | factor+solve bytes | worst stack (factor) | " + \
        " | ".join(f"instructions, n = {n}" for n in orders) + " |"
    print(head)
    print("|" + "---|" * (4 + len(orders)))
    for label, factor, both, stack, counts in rows:
        cells = [f"{counts[n]:,}" if counts else "(counter not available)" for n in orders]
        print(f"| {label} | {factor} | {both} | {stack} | " + " | ".join(cells) + " |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
