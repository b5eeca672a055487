"""`tune --write SPEC --name NAME`: add the winner to a spec or replace the kernel of that name, editing the text
so every other line stays byte for byte; the result must parse and pass the spec's checks before it is written."""
from __future__ import annotations

import datetime
import os
import re
import tempfile
import tomllib
from pathlib import Path

from derive.options import is_c_identifier
from derive.spec import SpecError, parse
from derive.tune.space import Candidate, entry_text, to_options

HEADER = re.compile(r"^\s*\[")                  # any table header line
KERNEL = re.compile(r"^\s*\[\[\s*kernel\s*\]\]\s*(#.*)?$")
TUNED = "# tuned by luforge tune"


class WriteError(Exception):
    def __init__(self, msg: str, code: int = 2):
        super().__init__(msg)
        self.code = code


def check_target(spec: str, name: str) -> None:
    """Refuse before measuring anything: an unreadable or invalid spec, or a name that is not a C identifier."""
    from derive.tune.space import CaseError
    if not is_c_identifier(name):
        raise CaseError(f"--name {name[:40]!r}: allowed: a C identifier (ASCII letters, digits and '_', not "
                        f"starting with a digit)")
    p = Path(spec)
    if p.exists():
        try:
            parse(p.read_text(encoding="utf-8"), p.name, str(p))
        except (SpecError, UnicodeDecodeError) as e:
            raise CaseError(f"--write {spec}: the spec has problems already; fix them first:\n{e}") from None


def _segments(lines: list[str]) -> list[tuple[int, int]]:
    """(start, end) line ranges of every [[kernel]] table: from its header to the next header, less the
    trailing blank and comment lines (those belong to what follows)."""
    heads = [i for i, ln in enumerate(lines) if HEADER.match(ln)]
    out = []
    for k, i in enumerate(heads):
        if not KERNEL.match(lines[i]):
            continue
        end = heads[k + 1] if k + 1 < len(heads) else len(lines)
        while end > i + 1 and (not lines[end - 1].strip() or lines[end - 1].lstrip().startswith("#")):
            end -= 1
        out.append((i, end))
    return out


def _name_of(lines: list[str], seg: tuple[int, int]) -> str | None:
    try:
        data = tomllib.loads("".join(lines[seg[0]:seg[1]]))
    except tomllib.TOMLDecodeError:
        return None
    k = data.get("kernel")
    return k[0].get("name") if isinstance(k, list) and k and isinstance(k[0], dict) else None


def comment_for(out, objective) -> str:
    when = datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    return f"{TUNED} on {when} for {out.case.describe()}, objective {objective.name}"


def edited_text(text: str, name: str, cand: Candidate, comment: str) -> str:
    """The spec text with kernel `name` replaced by the candidate (or appended), nothing else changed."""
    lines = text.splitlines(keepends=True)
    block = entry_text({"name": name, **cand.entry}, comment)
    for seg in _segments(lines):
        if _name_of(lines, seg) == name:
            start, end = seg
            if start > 0 and lines[start - 1].startswith(TUNED):
                start -= 1              # our own comment from an earlier run goes with the kernel it describes
            tail = lines[end - 1]
            newline = "\n" if tail.endswith("\n") else ""
            return "".join(lines[:start]) + block.rstrip("\n") + newline + "".join(lines[end:])
    sep = "" if not text or text.endswith("\n\n") else ("\n" if text.endswith("\n") else "\n\n")
    return text + sep + block


def write_winner(spec: str, name: str, cand: Candidate, out, objective) -> Path:
    path = Path(spec)
    try:
        text = path.read_text(encoding="utf-8") if path.exists() else ""
    except (OSError, UnicodeDecodeError) as e:
        raise WriteError(f"--write {spec}: cannot read: {getattr(e, 'strerror', None) or e}", 1) from None
    new = edited_text(text, name, cand, comment_for(out, objective))
    try:
        kernels = {o.name: o for o in parse(new, path.name, str(path))}
    except SpecError as e:
        raise WriteError(f"--write {spec}: the spec would not be valid with kernel {name!r}, nothing written:\n{e}")
    # the written kernel must be the measured one, whatever the spec's [defaults] say
    got = kernels[name].settings()
    want = to_options(cand, name=name, spec_name=path.name).settings()
    if got != want:
        diff = ", ".join(k for k in want if got.get(k) != want.get(k))
        raise WriteError(f"--write {spec}: the spec's defaults would change the tuned kernel ({diff}); nothing written")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=str(path.resolve().parent))
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
            fh.write(new)
        if path.exists():
            os.chmod(tmp, path.stat().st_mode & 0o777)
        os.replace(tmp, path)
    except OSError as e:
        Path(tmp).unlink(missing_ok=True)
        raise WriteError(f"--write {spec}: cannot write: {e.strerror or e}; the spec is unchanged", 1) from None
    return path
