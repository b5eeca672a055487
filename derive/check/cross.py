"""Cross-building and running for one row of the target table: compile C with the row's compiler and strict flags,
link a hosted or bare-metal image (startup, vector table, linker script from templates/targets/), run it, count."""
from __future__ import annotations

import os
import shutil
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

import jinja2

from derive.check.build import _Lock, cache_root, compiler, compiler_version
from derive.digest import digest
from derive.targets.table import Target

TEMPLATES = Path(__file__).resolve().parents[2] / "templates" / "targets"
# The flags every kernel and test driver must compile cleanly under, on every row (the firmware flags).
STRICT = ("-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-Wconversion", "-Wdouble-promotion")
# Startup and port files use asm and attributes: GNU C, but still warning-free.
SUPPORT = ("-std=gnu99", "-Wall", "-Wextra", "-Werror")
SECTIONS = ("-ffunction-sections", "-fdata-sections")


class ToolMissing(RuntimeError):
    """A compiler, binutils or emulator of a row is not installed; the message names the Debian package."""


class CrossError(RuntimeError):
    """A compile, link or run failed; the message carries the tool's own words."""


def cc_of(t: Target) -> tuple[str, ...]:
    # the host row follows CC like the cffi build does, so both build with the same compiler
    return (compiler(),) if t.name in ("host", "generic") else t.cc


def tool(t: Target, name: str) -> str:
    return f"{t.tools}{name}"


def require(t: Target) -> None:
    """Raise ToolMissing naming the packages when the row's compiler, binutils or emulator is absent."""
    needed = [cc_of(t)[0], tool(t, "size"), tool(t, "nm")] + ([t.runner[0]] if t.runner else [])
    missing = [x for x in needed if shutil.which(x) is None]
    if missing:
        raise ToolMissing(f"target {t.name}: {', '.join(missing)} not found; install the Debian package(s) "
                          f"{' '.join(t.packages)}")


def _run(cmd: list[str], cwd: Path, what: str, timeout: float = 120.0) -> subprocess.CompletedProcess:
    try:
        res = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=timeout)
    except subprocess.TimeoutExpired:
        raise CrossError(f"{what}: timed out after {timeout:g} s: {' '.join(cmd)}") from None
    if res.returncode != 0:
        raise CrossError(f"{what} failed ({' '.join(cmd[:1])}):\n{res.stderr.strip() or res.stdout.strip()}")
    return res


def linker_script(t: Target) -> str:
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(TEMPLATES)), keep_trailing_newline=True,
                             undefined=jinja2.StrictUndefined)
    code_origin, code_length, ram_origin, ram_length = t.memory
    entry = "_start" if t.startup.startswith("riscv") else "luf_reset"
    return env.get_template("bare.ld.j2").render(machine=t.name, code_name="CODE", code_origin=code_origin,
                                                code_length=code_length, ram_origin=ram_origin,
                                                ram_length=ram_length, entry=entry)


@dataclass(frozen=True)
class Image:
    target: Target
    elf: Path
    workdir: Path
    kernel_obj: Path

    def symbol(self, name: str) -> int:
        out = _run([tool(self.target, "nm"), str(self.elf)], self.workdir, "nm").stdout
        for line in out.splitlines():
            parts = line.split()
            if len(parts) == 3 and parts[2] == name:
                return int(parts[0], 16) & ~1   # Thumb addresses carry the mode in bit 0
        raise CrossError(f"{self.elf.name}: no symbol {name}")


def build_image(t: Target, name: str, sources: dict[str, str], kernel: str, tag: str) -> Image:
    """Compile and link an image from text sources (file name -> text). The kernel file and every file not
    from templates/targets/ compile under STRICT plus the row's flags; cached by content and compiler."""
    require(t)
    cc = list(cc_of(t))
    support = ["port.h", t.startup if t.image == "bare" else "", "port_bare.c" if t.image == "bare" else
               "port_hosted.c"]
    files = dict(sources)
    for s in filter(None, support):
        files[s] = (TEMPLATES / s).read_text()
    if t.image == "bare":
        files["image.ld"] = linker_script(t)
    key = digest(t.name, repr(t), compiler_version(cc[0]), tag, *(f"{k}\0{v}" for k, v in sorted(files.items())))
    root = cache_root() / "cross" / key[:2] / key
    elf = root / f"{name}.elf"
    obj = root / f"{Path(kernel).stem}.o"
    if elf.exists():
        return Image(t, elf, root, obj)
    with _Lock(root.with_suffix(".lock")):
        if elf.exists():
            return Image(t, elf, root, obj)
        if root.exists():
            shutil.rmtree(root)
        root.mkdir(parents=True)
        for fname, text in files.items():
            (root / fname).write_text(text)
        arch = [*t.cflags, *t.opt]
        objs = []
        for fname in files:
            if not fname.endswith((".c", ".S")):
                continue
            ours = fname in support
            flags = (SUPPORT if ours else STRICT) + SECTIONS
            extra = ["-fstack-usage", "-fcallgraph-info=su"] if fname == kernel else []
            o = root / (Path(fname).stem + ".o")
            _run([*cc, *flags, *arch, *extra, "-I", ".", "-c", fname, "-o", o.name], root,
                 f"{t.name}: compiling {fname}" + ("" if ours else f" with {' '.join(STRICT)}"))
            objs.append(o.name)
        link = [*cc, *arch, *t.ldflags, "-Wl,--gc-sections", f"-Wl,-Map={name}.map", *objs, "-o", f".{elf.name}"]
        if t.image == "bare":
            # libgcc last: the software float and division routines a kernel may call, and nothing else
            link[len(cc):len(cc)] = ["-T", "image.ld"]
            link += ["-lgcc"]
        _run(link, root, f"{t.name}: linking {name}")
        os.replace(root / f".{elf.name}", elf)
    return Image(t, elf, root, obj)


def plugin() -> Path:
    """The instruction-counting TCG plugin, built once with the host compiler (cached by source)."""
    src = (TEMPLATES / "count_plugin.c").read_text()
    cc = compiler()
    key = digest(src, compiler_version(cc))
    so = cache_root() / "plugin" / key[:16] / "count_plugin.so"
    if so.exists():
        return so
    with _Lock(so.parent.with_suffix(".lock")):
        if not so.exists():
            so.parent.mkdir(parents=True, exist_ok=True)
            (so.parent / "count_plugin.c").write_text(src)
            _run([cc, "-shared", "-fPIC", "-O2", "-Wall", "-Wextra", "-o", ".count_plugin.so", "count_plugin.c"],
                 so.parent, "building the instruction-counting plugin")
            os.replace(so.parent / ".count_plugin.so", so)
    return so


@dataclass(frozen=True)
class Run:
    stdout: str
    windows: tuple[tuple[int, int], ...]   # (instructions, float instructions) per marked window, in order


def run(img: Image, count: bool = False) -> Run:
    """Run an image on its row's runner (or natively); with count, through the counting plugin."""
    t = img.target
    cmd = [x.replace("{image}", str(img.elf)) for x in t.runner] or [str(img.elf)]
    if count and t.counting != "plugin":
        raise CrossError(f"target {t.name}: instructions are not counted on this row (counting = {t.counting})")
    with tempfile.TemporaryDirectory(prefix="luforge-run-") as tmp:
        out_file = Path(tmp) / "windows.txt"
        if count:
            args = [f"out={out_file}", f"begin={img.symbol('luf_mark_begin'):x}",
                    f"end={img.symbol('luf_mark_end'):x}", f"float={':'.join(t.float_mnemonics)}"]
            cmd[1:1] = ["-plugin", ",".join([str(plugin()), *args])]
        try:
            res = subprocess.run(cmd, capture_output=True, text=True, timeout=t.timeout)
        except subprocess.TimeoutExpired:
            raise CrossError(f"{t.name}: {img.elf.name} did not finish within {t.timeout:g} s") from None
        if res.returncode != 0:
            raise CrossError(f"{t.name}: {img.elf.name} exited with status {res.returncode}"
                             f"{' (a fault: the startup code reports 99)' if res.returncode == 99 else ''}:\n"
                             f"{res.stderr.strip()[-2000:]}")
        windows = []
        if count:
            for line in out_file.read_text().splitlines():
                parts = line.split()
                if parts[0] == "window":
                    windows.append((int(parts[1]), int(parts[2])))
    return Run(res.stdout, tuple(windows))
