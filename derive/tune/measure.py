"""Where tune measures: the host (wall time, by tune/host.py) or an emulated row of the target table (exact
instruction counts, bytes and stack, by the targets' own build-and-run modules). One backend class per kind."""
from __future__ import annotations

import importlib
from pathlib import Path

from derive.check.build import compile_object
from derive.targets.storage import SCALARS
from derive.tune import contenders as contmod
from derive.tune import host
from derive.digest import digest
from derive.tune.cache import machine
from derive.tune.space import Case, CaseError

HOST = "host"


class HostBackend:
    name = HOST
    unit = "ns"
    speed = "time"
    objectives = ("time", "size", "weighted", "pareto")
    chunk = None                    # every kernel in one driver: interleaved rounds compare them under one load
    default_nrhs = 1

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
        return digest(case.scalar, case.layout, case.pivoting, case.nrhs, list(flags),
                      Path(contmod.__file__).read_text(), Path(host.__file__).read_text())

    def measure(self, case: Case, n: int, kernels: list[tuple[str, dict]], flags, contenders: bool = True):
        T = SCALARS[case.scalar].c_type
        pivoted = case.pivoting != "none"
        conts = contmod.available(T, case.layout, (n,), case.nrhs, flags, pivoted) if contenders else []
        ks = [host.Kernel(name, f[f"{name}.c"], f[f"{name}.h"], case.layout) for name, f, _ in kernels]
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
        figs = {name: figures(name) for name, _, _ in kernels}
        cfigs = {c.tag: figures(f"{c.tag}:{n}") for c in conts}
        return figs, cfigs, [ln for ln in notes.splitlines() if ln.strip()]


class TargetBackend:
    """An emulated row of the target table: exact instruction counts, linked bytes and worst-case stack, all
    from the targets' report (derive/check/report.py), which also judges every result on the target."""
    unit = "instr"
    speed = "instructions"
    objectives = ("instructions", "size", "stack", "weighted", "pareto")
    chunk = 2                       # kernels per step: two emulators at once on two cores, and Ctrl-C loses little

    def __init__(self, row, report, ondevice):
        self.row, self.report, self.ondevice = row, report, ondevice
        self.name = row.name
        self.default_nrhs = ondevice.NRHS

    def where(self) -> str:
        """The row, its compiler and everything that makes a count: the driver, startup and port sources under
        templates/targets/ and the modules that build, run and count. A cached figure from before any of them
        changed is measured again."""
        from derive.check import cross
        from derive.check.build import compiler_version
        sources = [(f.name, f.read_text()) for f in sorted(cross.TEMPLATES.iterdir()) if f.is_file()]
        sources += [Path(mod.__file__).read_text() for mod in (cross, self.report, self.ondevice)]
        return repr(self.row) + compiler_version(cross.cc_of(self.row)[0]) + digest(*sources)

    def check(self, case: Case, objective) -> None:
        if objective.name not in self.objectives:
            raise CaseError(f"--objective {objective.name} on {self.name}: allowed: {', '.join(self.objectives)} "
                            f"(wall time is measured on the host)")
        if case.nrhs not in (0, self.ondevice.NRHS):
            raise CaseError(f"--nrhs {case.nrhs} on {self.name}: the on-target driver solves with "
                            f"{self.ondevice.NRHS} right-hand sides; allowed: 0 (factor only) or {self.ondevice.NRHS}")
        from derive.check import cross
        try:
            cross.require(self.row)
        except cross.ToolMissing as e:
            raise CaseError(f"--target {self.name}: {e}") from None

    def static(self, name: str, files: dict[str, str], flags):
        return None

    def contender_key(self, case: Case, flags) -> str:
        return "none"

    def _one(self, o, n):
        e = self.report.report_kernel(o, self.row, orders=(n,))
        if e.warnings and e.warnings[0].startswith("not built"):
            return {"unit": "instr", "problems": [e.warnings[0]], "factor": 0, "solve": 0}
        fs = e.factor_solve
        return {"unit": "instr", "factor": e.instructions[n][0], "factor_float": e.instructions[n][1],
                "solve": e.solve_instructions[n][0], "solve_float": e.solve_instructions[n][1],
                "factor_spread": 0, "solve_spread": 0, "bytes": fs.text + fs.data + fs.bss,
                "factor_bytes": e.factor.text + e.factor.data + e.factor.bss,
                "stack": max(e.factor_stack.worst, e.solve_stack.worst), "warnings": e.warnings,
                "problems": e.problems}

    def measure(self, case: Case, n: int, kernels, flags, contenders: bool = True):
        from concurrent.futures import ThreadPoolExecutor
        with ThreadPoolExecutor(self.chunk) as pool:
            figs = dict(zip([k[0] for k in kernels], pool.map(lambda k: self._one(k[2], n), kernels)))
        notes = sorted({w for f in figs.values() for w in f.get("warnings", []) if "software floating" in w})
        return figs, {}, notes


def backend(target: str):
    if target == HOST:
        return HostBackend()
    from derive.targets import table
    rows = [name for name, t in table.TARGETS.items() if t.counting != "none"]
    if target not in rows:
        allowed = ", ".join([HOST, *rows])
        raise CaseError(f"--target {target}: allowed: {allowed} (a target-table row that counts instructions)")
    try:
        report = importlib.import_module("derive.check.report")
        ondevice = importlib.import_module("derive.check.ondevice")
    except ImportError:
        raise CaseError(f"--target {target}: this tree has no cross-build module to run it; allowed: {HOST}") \
            from None
    return TargetBackend(table.TARGETS[target], report, ondevice)
