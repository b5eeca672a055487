"""The tune cache: verification verdicts and measurements stored as small JSON files under the build cache, keyed
by everything that determines the figure: the emitted code, the compiler and its flags, the target, n and nrhs."""
from __future__ import annotations

import json
import os
import platform
import re
from pathlib import Path

from derive.check.build import cache_root, compiler, compiler_version
from derive.digest import digest

BANNER_HASH = re.compile(r"settings hash|content hash|_SETTINGS_HASH")
PROTOCOL = "tune-1"      # bump when the way a figure is measured changes, so old figures are not reused


def machine() -> str:
    """The host's processor model: host timings are only comparable on the same kind of machine."""
    model = platform.machine()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return model + " " + line.split(":", 1)[1].strip()
    except OSError:
        pass
    return model


def code_key(files: dict[str, str], flags, target: str) -> str:
    """Everything that determines a built kernel: its texts, the compiler and its version, flags and target.
    The kernel's own name is taken out, so the same code reached under another name (a candidate whose
    settings gained a key at its default value) finds its figures again."""
    cc = compiler()
    stem = next((f[:-2] for f in files if f.endswith(".c")), None)

    def plain(text: str) -> str:
        # the banner's settings and content hashes cover the name too: they are not code
        text = "\n".join(ln for ln in text.splitlines() if not BANNER_HASH.search(ln))
        return text.replace(stem, "@").replace(stem.upper(), "@@")
    norm = sorted((f.replace(stem, "@"), plain(t)) for f, t in files.items()) if stem else sorted(files.items())
    return digest(PROTOCOL, norm, cc, compiler_version(cc), list(flags), target)


class Cache:
    def __init__(self, root: Path | None = None):
        self.root = (root or cache_root()) / "tune"

    def _path(self, kind: str, key: str) -> Path:
        return self.root / kind / key[:2] / f"{key}.json"

    def get(self, kind: str, key: str):
        try:
            return json.loads(self._path(kind, key).read_text())
        except (OSError, ValueError):
            return None

    def put(self, kind: str, key: str, value) -> None:
        p = self._path(kind, key)
        p.parent.mkdir(parents=True, exist_ok=True)
        tmp = p.with_suffix(f".{os.getpid()}.tmp")
        tmp.write_text(json.dumps(value, sort_keys=True))
        os.replace(tmp, p)   # a reader never sees half a file, and Ctrl-C leaves whole entries only

    @staticmethod
    def figure_key(code: str, target: str, n: int, nrhs: int, where: str) -> str:
        return digest(code, target, n, nrhs, where)
