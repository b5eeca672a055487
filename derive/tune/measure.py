"""Where tune measures: the host (wall time, by tune/host.py) or an emulated row of the target table (exact
instruction counts, bytes and stack, by the targets' own build-and-run modules). One backend class per kind."""
from __future__ import annotations

import hashlib
import importlib
from pathlib import Path

from derive.check.build import compile_object
from derive.targets.storage import SCALARS
from derive.tune import contenders as contmod
from derive.tune import host
from derive.tune.cache import machine
from derive.tune.space import Case, CaseError

HOST = "host"


class HostBackend:
    name = HOST
    unit = "ns"
    speed = "time"
    objectives = ("time", "size", "weighted", "pareto")

    def where(self) -> str:
        return machine()

    def check(self, case: Case, objective) -> None:
        if objective.name not in self.objectives:
            raise CaseError(f"--objective {objective.name} on the host: allowed: {', '.join(self.objectives)} "
                            f"(instructions and stack are counted on an emulated --target)")

    def static(self, name: str, files: dict[str, str], flags) -> dict:
        obj = compile_object(name, files[f"{name}.c"], files[f"{name}.h"], flags)
        return {"bytes": host.object_bytes(obj)}

    def contender_key(self, case: Case, flags) -> str:
        # the contenders' own sources and the driver's protocol are part of what their figures depend on
        blob = repr((case.scalar, case.layout, case.pivoting, case.nrhs, list(flags), Path(contmod.__file__).read_text(),
                     Path(host.__file__).read_text()))
        return hashlib.sha256(blob.encode()).hexdigest()

    def measure(self, case: Case, n: int, kernels: list[tuple[str, dict]], flags, contenders: bool = True):
        T = SCALARS[case.scalar].c_type
        pivoted = case.pivoting != "none"
        conts = contmod.available(T, case.layout, (n,), case.nrhs, flags, pivoted) if contenders else []
        ks = [host.Kernel(name, f[f"{name}.c"], f[f"{name}.h"], case.layout) for name, f in kernels]
        parts = ("factor", "solve") if case.nrhs > 0 else ("factor",)

        def entries_for(name):
            return [(n, part, f"{name}:{part}") for part in parts]
        timings, notes = host.time_kernels(ks, conts, (n,), case.nrhs, case.scalar, pivoted, entries_for, flags)

        def figures(prefix):
            out = {"unit": "ns"}
            for part in parts:
                t = timings[f"{prefix}:{part}"]
                out[part], out[f"{part}_spread"] = t.median_ns, t.spread_ns
            if case.nrhs == 0:
                out["solve"], out["solve_spread"] = 0.0, 0.0
            return out
        figs = {name: figures(name) for name, _ in kernels}
        cfigs = {c.tag: figures(f"{c.tag}:{n}") for c in conts}
        return figs, cfigs, [ln for ln in notes.splitlines() if ln.strip()]


def _target_module():
    """The targets' cross-build-and-count module, when it is on this tree (it lands in its own issue)."""
    for name in ("derive.check.cross", "derive.targets.cross", "derive.check.report"):
        try:
            return importlib.import_module(name)
        except ImportError:
            continue
    return None


def backend(target: str):
    if target == HOST:
        return HostBackend()
    from derive.targets import table
    rows = [name for name, t in table.TARGETS.items() if t.counting != "none"]
    if target not in table.TARGETS or target not in rows:
        allowed = ", ".join([HOST, *rows])
        raise CaseError(f"--target {target}: allowed: {allowed} (a target-table row that counts instructions)")
    mod = _target_module()
    if mod is None:
        raise CaseError(f"--target {target}: this tree has no cross-build module to run it; allowed: {HOST}")
    raise CaseError(f"--target {target}: not wired yet; allowed: {HOST}")
