"""Build emitted C kernels into one importable cffi module, cached by content hash outside the source tree.
Kernel sources are compiled alone with the strict flags they promise; the cdef is the preprocessed header."""
from __future__ import annotations

import fcntl
import importlib.util
import os
import shlex
import shutil
import subprocess
import sys
import tempfile
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

from derive.digest import digest

STRICT_FLAGS = ("-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic")
OPT_FLAGS = ("-O2", "-fPIC")


class BuildError(RuntimeError):
    pass


_CACHE_ROOT: dict[str, Path] = {}


def cache_root() -> Path:
    """The build cache; when it cannot be written, a temporary directory for this run, said once on stderr."""
    env = os.environ.get("LUFORGE_CACHE")
    if env:
        want = Path(env)
    else:
        base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
        want = Path(base) / "luforge"
    key = str(want)
    if key not in _CACHE_ROOT:
        try:
            want.mkdir(parents=True, exist_ok=True)
            probe = tempfile.NamedTemporaryFile(dir=want, prefix=".probe-")
            probe.close()
            _CACHE_ROOT[key] = want
        except OSError as e:
            fallback = Path(tempfile.mkdtemp(prefix="luforge-cache-"))
            print(f"luforge: note: cannot use the build cache {want} ({e.strerror or e}); building in {fallback} "
                  f"for this run (set LUFORGE_CACHE to a writable directory)", file=sys.stderr)
            _CACHE_ROOT[key] = fallback
    return _CACHE_ROOT[key]


def compiler_words() -> list[str]:
    """$CC split into words as a shell would (CC="gcc -O3" is a compiler and a flag), or the system's cc."""
    env = os.environ.get("CC", "").strip()
    if env:
        try:
            words = shlex.split(env)
        except ValueError as e:
            raise BuildError(f"CC={env[:80]!r} cannot be split into words: {e}") from None
        if words:
            return words
    return [shutil.which("cc") or shutil.which("gcc") or "cc"]


def compiler() -> str:
    return compiler_words()[0]


def run_compiler(args: list[str], what: str, **kw) -> subprocess.CompletedProcess:
    """Run the compiler; a missing compiler or a failed compile is a BuildError naming its first error line."""
    try:
        res = subprocess.run(args, capture_output=True, text=True, **kw)
    except OSError as e:
        raise BuildError(f"cannot run the compiler {args[0]!r}: {e.strerror or e} (set CC to a C99 compiler)") \
            from None
    if res.returncode != 0:
        lines = [ln for ln in (res.stderr or res.stdout).splitlines() if ln.strip()]
        first = next((ln for ln in lines if "error" in ln.lower()), lines[0] if lines else "no message")
        raise BuildError(f"{what} failed with {' '.join(args[:1])}: {first.strip()[:300]}")
    return res


_VERSION_CACHE: dict[str, str] = {}


def compiler_version(cc: str) -> str:
    if cc not in _VERSION_CACHE:
        out = run_compiler([cc, "--version"], "asking the compiler its version")
        _VERSION_CACHE[cc] = out.stdout.splitlines()[0] if out.stdout else cc
    return _VERSION_CACHE[cc]


class _Lock:
    def __init__(self, path: Path):
        self.path = path

    def __enter__(self):
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self.fh = open(self.path, "w")
        fcntl.flock(self.fh, fcntl.LOCK_EX)
        return self

    def __exit__(self, *exc):
        fcntl.flock(self.fh, fcntl.LOCK_UN)
        self.fh.close()


def compile_object(name: str, c_text: str, h_text: str, flags: tuple[str, ...] = OPT_FLAGS) -> Path:
    """Compile one kernel with the strict flags; returns the cached object file."""
    cc, *cc_flags = compiler_words()
    flags = (*cc_flags, *flags)
    key = digest(c_text, h_text, cc, compiler_version(cc), *STRICT_FLAGS, *flags)
    root = cache_root() / "obj" / key[:2] / key
    obj = root / f"{name}.o"
    if obj.exists():
        return obj
    with _Lock(root.with_suffix(".lock")):
        if obj.exists():
            return obj
        src = root / "src"
        src.mkdir(parents=True, exist_ok=True)
        (src / f"{name}.c").write_text(c_text)
        (src / f"{name}.h").write_text(h_text)
        tmp = root / f".{name}.{os.getpid()}.o"
        run_compiler([cc, *STRICT_FLAGS, *flags, "-c", str(src / f"{name}.c"), "-o", str(tmp)],
                     f"compiling {name}.c with {' '.join(STRICT_FLAGS)}")
        os.replace(tmp, obj)
    return obj


def cdef_of(h_text: str) -> str:
    """The declarations cffi sees: the shipped header run through the C preprocessor, so the tested ABI is
    the shipped ABI."""
    return run_compiler([compiler(), "-E", "-P", "-x", "c", "-"], "preprocessing a header", input=h_text).stdout


def build(kernels: list[tuple[str, str, str]], flags: tuple[str, ...] = OPT_FLAGS, jobs: int | None = None):
    """kernels: (name, c text, h text). Returns the loaded cffi module (with .ffi and .lib)."""
    import cffi

    jobs = jobs or os.cpu_count() or 1
    with ThreadPoolExecutor(jobs) as pool:
        objs = list(pool.map(lambda k: compile_object(k[0], k[1], k[2], flags), kernels))
    key = digest(*(str(o) for o in objs), cffi.__version__, sys.version, *flags)
    modname = f"_luforge_{key[:20]}"
    root = cache_root() / "mod" / key[:20]
    with _Lock(root.with_suffix(".lock")):
        # a module counts only once its build finished (marker written last): a build killed half-way
        # leaves a truncated .so that must not be imported by the next run
        done = root / "complete"
        lib = next(iter(root.glob(f"{modname}*.so")), None) if done.exists() else None
        if lib is None:
            if root.exists():
                shutil.rmtree(root)
            inc = root / "include"
            inc.mkdir(parents=True)
            for name, _, h in kernels:
                (inc / f"{name}.h").write_text(h)
            ffi = cffi.FFI()
            ffi.cdef("\n".join(cdef_of(h) for _, _, h in kernels))
            ffi.set_source(modname, "\n".join(f'#include "{name}.h"' for name, _, _ in kernels),
                           include_dirs=[str(inc)], extra_objects=[str(o) for o in objs])
            try:
                lib = Path(ffi.compile(tmpdir=str(root), verbose=False))
            except Exception as e:  # cffi raises VerificationError and distutils errors
                raise BuildError(f"building the cffi module failed: {e}") from e
            done.write_text("")
    spec = importlib.util.spec_from_file_location(modname, lib)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def build_directory(directory: Path, names: list[str], flags: tuple[str, ...] = OPT_FLAGS):
    return build([(n, (directory / f"{n}.c").read_text(), (directory / f"{n}.h").read_text()) for n in names],
                 flags)


def load_python(path: Path):
    """Import a generated NumPy kernel module from its file."""
    name = f"_luforge_py_{path.stem}_{digest(path.read_text())[:12]}"
    spec = importlib.util.spec_from_file_location(name, path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod
