"""The tune pipeline: enumerate the space, emit and verify every candidate, measure what the cache lacks, join the
best factor with the best solve of each whole-kernel group, and hand the figures to the ranking."""
from __future__ import annotations

import sys
import time
from pathlib import Path
from dataclasses import dataclass, field

from derive.check.build import OPT_FLAGS
from derive.printers.emit import emit_kernel
from derive.tune import measure
from derive.tune.cache import Cache, code_key
from derive.tune.space import Candidate, Case, candidate, enumerate_space, to_options

# cached host figures re-timed beside new kernels at the same n: all of them (timing is cheap next to verifying,
# and a leader kept from a quieter run beat the real best by 35 % in the independent check)
ANCHORS, ANCHOR_WITHIN = 10 ** 6, float("inf")
VERIFY_BATCH = 12    # kernels per cffi module while verifying: small enough that Ctrl-C loses little


class Progress:
    """One status line on a terminal (rewritten in place), plain lines otherwise."""

    def __init__(self, stream=None, quiet: bool = False):
        self.stream = stream or sys.stderr
        self.tty = self.stream.isatty()
        self.quiet = quiet
        self.started = time.monotonic()

    def step(self, what: str, done: int, total: int) -> None:
        if self.quiet:
            return
        width = 24
        fill = int(width * done / max(total, 1))
        bar = "#" * fill + "." * (width - fill)
        line = f"[{bar}] {done}/{total} {what}"
        if self.tty:
            self.stream.write("\r" + line[:119].ljust(119))
            if done >= total:
                self.stream.write("\n")
        elif done in (0, total) or done % 10 == 0:
            self.stream.write(line + "\n")
        self.stream.flush()

    def note(self, text: str) -> None:
        if not self.quiet:
            self.stream.write(text + "\n")
            self.stream.flush()


@dataclass
class Measured:
    """What tune knows about one candidate: its verdict and its figures per n (None where not measured)."""
    cand: Candidate
    verified: bool | None = None
    problems: list[str] = field(default_factory=list)
    figures: dict[int, dict] = field(default_factory=dict)    # n -> {"factor": .., "solve": .., ...}
    static: dict = field(default_factory=dict)                 # n-independent figures: bytes, stack
    cached: int = 0                                            # figures taken from the cache


@dataclass
class Outcome:
    case: Case
    objective: str
    results: list[Measured]
    contenders: dict[str, dict[int, dict]]      # tag -> n -> figures
    untuned: list[str]
    interrupted: bool = False
    notes: list[str] = field(default_factory=list)
    seconds: float = 0.0
    measured_now: int = 0
    retimed: int = 0


def _files(cand: Candidate) -> dict[str, str]:
    return dict(emit_kernel(to_options(cand)).files)


def _checker() -> str:
    """The checks' own sources: a verdict is reused only while verify judges the same way."""
    import derive.check.accuracy
    import derive.check.harness
    import derive.check.verify
    return "verify:" + "".join(Path(mod.__file__).read_text() for mod in (derive.check.verify, derive.check.accuracy,
                                                                          derive.check.harness))


def _budget(sizes, flags):
    """verify's default budget (its sizes already cover 0..17, 31, 33 and 48; a fixed-size kernel is tried at its
    own n), built with the flags being measured."""
    from derive.check.build import OPT_FLAGS as BASE
    from derive.check.verify import Budget
    return Budget(cflags=tuple(f for f in flags if f not in BASE))


def verify_all(items: list[Measured], files: dict[str, dict], cache: Cache, flags, target: str,
               progress: Progress, case_sizes=()) -> None:
    """Every candidate passes luforge's own verify (LAPACK's ratios, Higham's bound, canaries, the NumPy twin)
    before it is measured; verdicts are cached by the code's key and the checks' sources."""
    from derive.check.verify import verify
    todo = []
    checker = _checker()
    for m in items:
        got = cache.get("verified", code_key(files[m.cand.name], flags, checker))
        if got is None:
            todo.append(m)
        else:
            m.verified, m.problems = got["passed"], got["problems"]
    for i in range(0, len(todo), VERIFY_BATCH):
        progress.step(f"verifying {todo[i].cand.label()}", i, len(todo))
        batch = todo[i:i + VERIFY_BATCH]
        rows = verify([to_options(m.cand) for m in batch], budget=_budget(case_sizes, flags))
        for m, row in zip(batch, rows):
            m.verified, m.problems = row.passed, list(row.problems)
            cache.put("verified", code_key(files[m.cand.name], flags, checker),
                      {"passed": row.passed, "problems": row.problems})
    if todo:
        progress.step("verified", len(todo), len(todo))


def measure_all(case: Case, items: list[Measured], files: dict[str, dict], cache: Cache, flags, progress: Progress,
                fresh: bool, outcome: Outcome, contenders: bool = True) -> None:
    backend = measure.backend(case.target)
    where = backend.where()
    for m in items:
        if not m.verified:
            continue
        ck = code_key(files[m.cand.name], flags, case.target)
        st = None if fresh else cache.get("static", cache.figure_key(ck, case.target, 0, 0, where))
        if st is None:
            st = backend.static(m.cand.name, files[m.cand.name], flags)
            if st is not None:      # None: the backend reports bytes and stack with each measurement
                cache.put("static", cache.figure_key(ck, case.target, 0, 0, where), st)
        m.static = dict(st or {})
    for n in case.sizes:
        want = []
        for m in items:
            if not m.verified or n not in m.cand.sizes:
                continue
            key = cache.figure_key(code_key(files[m.cand.name], flags, case.target), case.target, n, case.nrhs, where)
            got = None if fresh else cache.get("figure", key)
            if got is None:
                want.append((m, key))
            else:
                m.figures[n] = got
                m.cached += 1
                _statics(m, got)
                if got.get("problems"):
                    m.verified, m.problems = False, got["problems"]
        ckey = cache.figure_key(backend.contender_key(case, flags), case.target, n, case.nrhs, where)
        cont = None if fresh else cache.get("contenders", ckey)
        if not want and (cont is not None or not contenders):
            for tag, fig in (cont or {}).items() if contenders else ():
                outcome.contenders.setdefault(tag, {})[n] = fig
            continue
        if want and backend.chunk is None:
            # host figures from another run were taken under another load: re-time the cached leaders beside
            # the new kernels so the comparisons that decide the winner are made in one run
            cached = [m for m in items if n in m.figures and m.verified and not any(m is w for w, _ in want)]
            if cached:
                best = min(_speed(m.figures[n], case) for m in cached)
                leaders = sorted((m for m in cached if _speed(m.figures[n], case) <= ANCHOR_WITHIN * best),
                                 key=lambda m: _speed(m.figures[n], case))[:ANCHORS]
                for m in leaders:
                    key = cache.figure_key(code_key(files[m.cand.name], flags, case.target), case.target, n,
                                           case.nrhs, where)
                    want.append((m, key))
                    m.cached -= 1
                    outcome.retimed += 1
        step = backend.chunk or max(len(want), 1)
        for i in range(0, max(len(want), 1), step):
            part = want[i:i + step]
            progress.step(f"measuring at n = {n} on {case.target}", i, len(want))
            figs, conts, notes = backend.measure(case, n, [(m.cand.name, files[m.cand.name], to_options(m.cand))
                                                           for m, _ in part], flags, contenders and i == 0)
            for (m, key) in part:
                if figs[m.cand.name].get("problems"):
                    m.verified, m.problems = False, figs[m.cand.name]["problems"]   # failed its check on the target
                m.figures[n] = figs[m.cand.name]
                _statics(m, figs[m.cand.name])
                cache.put("figure", key, figs[m.cand.name])
                outcome.measured_now += 1
            if i == 0 and contenders:
                cache.put("contenders", ckey, conts)
                for tag, fig in conts.items():
                    outcome.contenders.setdefault(tag, {})[n] = fig
            outcome.notes += [x for x in notes if x not in outcome.notes]
        progress.step(f"measured n = {n}", 1, 1)


def _speed(fig: dict, case: Case) -> float:
    return fig["factor"] + (fig["solve"] if case.nrhs else 0.0)


def _statics(m: Measured, fig: dict) -> None:
    for k in ("bytes", "stack"):
        if k in fig and k not in m.static:
            m.static[k] = fig[k]


def _join(case: Case, items: list[Measured], part_figure) -> list[Candidate]:
    """The best factor and the best solve of each whole-kernel group, joined into one kernel (the halves are
    separate functions: the solve reads the factor's output, never how it was computed)."""
    out = []
    groups = {}
    for m in items:
        if m.verified and m.figures:
            groups.setdefault(m.cand.group, []).append(m)
    for group, ms in groups.items():
        sizes = sorted({n for m in ms for n in m.cand.sizes})

        def best(part):
            pool = [m for m in ms if m.cand.part in (part, "both") and all(n in m.figures for n in m.cand.sizes)
                    and tuple(sizes) == m.cand.sizes]
            return min(pool, key=lambda m: sum(part_figure(m, n, part) for n in sizes), default=None)
        f, s = best("factor"), best("solve")
        if f is None or s is None:
            continue
        entry = dict(f.cand.entry)
        entry["solve_loop"] = s.cand.entry["solve_loop"]
        out.append(candidate(entry, sizes, "both", dict(group)))
    return out


def tune(case: Case, objective, flags=OPT_FLAGS, fresh: bool = False, progress: Progress | None = None,
         cache: Cache | None = None, contenders: bool = True) -> Outcome:
    progress = progress or Progress()
    cache = cache or Cache()
    t0 = time.monotonic()
    cands, untuned = enumerate_space(case)
    measure.backend(case.target).check(case, objective)
    outcome = Outcome(case, objective.name, [], {}, untuned)
    items = [Measured(c) for c in cands]
    files: dict[str, dict] = {}
    try:
        progress.note(f"tune: {case.describe()}; {len(cands)} candidates")
        for i, m in enumerate(items):
            progress.step(f"deriving {m.cand.label()}", i, len(items))
            files[m.cand.name] = _files(m.cand)
        progress.step("derived", len(items), len(items))
        verify_all(items, files, cache, flags, case.target, progress, case.sizes)
        measure_all(case, items, files, cache, flags, progress, fresh, outcome, contenders)
        joined = [c for c in _join(case, items, objective.part_figure) if c.name not in files]
        if joined:
            extra = [Measured(c) for c in joined]
            for m in extra:
                files[m.cand.name] = _files(m.cand)
            verify_all(extra, files, cache, flags, case.target, progress, case.sizes)
            measure_all(case, extra, files, cache, flags, progress, fresh, outcome, contenders)
            items += extra
    except KeyboardInterrupt:
        outcome.interrupted = True
    outcome.results = items
    outcome.seconds = time.monotonic() - t0
    return outcome

