"""Build emitted C kernels into one importable cffi module, cached by content hash outside the source tree.
Kernel sources are compiled alone with the strict flags they promise; the cdef is the preprocessed header."""
from __future__ import annotations

import fcntl
import hashlib
import importlib.util
import os
import shutil
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

STRICT_FLAGS = ("-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic")
OPT_FLAGS = ("-O2", "-fPIC")


class BuildError(RuntimeError):
    pass


def cache_root() -> Path:
    env = os.environ.get("LUFORGE_CACHE")
    if env:
        return Path(env)
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "luforge"


def compiler() -> str:
    return os.environ.get("CC") or shutil.which("cc") or shutil.which("gcc") or "cc"


def _digest(*parts: str | bytes) -> str:
    h = hashlib.sha256()
    for p in parts:
        h.update(p.encode() if isinstance(p, str) else p)
        h.update(b"\0")
    return h.hexdigest()


_VERSION_CACHE: dict[str, str] = {}


def compiler_version(cc: str) -> str:
    if cc not in _VERSION_CACHE:
        out = subprocess.run([cc, "--version"], capture_output=True, text=True)
        _VERSION_CACHE[cc] = out.stdout.splitlines()[0] if out.returncode == 0 and out.stdout else cc
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
    cc = compiler()
    key = _digest(c_text, h_text, cc, compiler_version(cc), *STRICT_FLAGS, *flags)
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
        res = subprocess.run([cc, *STRICT_FLAGS, *flags, "-c", str(src / f"{name}.c"), "-o", str(tmp)],
                             capture_output=True, text=True)
        if res.returncode != 0:
            raise BuildError(f"{name}.c does not compile with {' '.join(STRICT_FLAGS)}:\n{res.stderr}")
        os.replace(tmp, obj)
    return obj


def cdef_of(h_text: str) -> str:
    """The declarations cffi sees: the shipped header run through the C preprocessor, so the tested ABI is
    the shipped ABI."""
    res = subprocess.run([compiler(), "-E", "-P", "-x", "c", "-"], input=h_text, capture_output=True, text=True)
    if res.returncode != 0:
        raise BuildError(f"preprocessing a header failed:\n{res.stderr}")
    return res.stdout


def build(kernels: list[tuple[str, str, str]], flags: tuple[str, ...] = OPT_FLAGS, jobs: int | None = None):
    """kernels: (name, c text, h text). Returns the loaded cffi module (with .ffi and .lib)."""
    import cffi

    jobs = jobs or os.cpu_count() or 1
    with ThreadPoolExecutor(jobs) as pool:
        objs = list(pool.map(lambda k: compile_object(k[0], k[1], k[2], flags), kernels))
    key = _digest(*(str(o) for o in objs), cffi.__version__, sys.version, *flags)
    modname = f"_luforge_{key[:20]}"
    root = cache_root() / "mod" / key[:20]
    with _Lock(root.with_suffix(".lock")):
        lib = next(iter(root.glob(f"{modname}*.so")), None) if root.exists() else None
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
    spec = importlib.util.spec_from_file_location(modname, lib)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def build_directory(directory: Path, names: list[str], flags: tuple[str, ...] = OPT_FLAGS):
    return build([(n, (directory / f"{n}.c").read_text(), (directory / f"{n}.h").read_text()) for n in names],
                 flags)


def load_python(path: Path):
    """Import a generated NumPy kernel module from its file."""
    name = f"_luforge_py_{path.stem}_{_digest(path.read_text())[:12]}"
    spec = importlib.util.spec_from_file_location(name, path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod
