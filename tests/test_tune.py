"""`luforge tune`: the candidate space against the engine's own list of variants, the cache (a wider second run
measures only what is new), --write (a valid spec with every other byte unchanged), and bad requests (exit 2)."""
from __future__ import annotations

import json
from itertools import product

import pytest

from derive.cli import main
from derive.printers.emit import emit_kernel
from derive.spec import parse
from derive.tune import measure as measure_mod
from derive.tune import run as run_mod
from derive.tune.cache import Cache
from derive.tune.rank import Objective, pareto_layers, rank
from derive.tune.space import Case, block_sizes, enumerate_space, to_options
from derive.tune.write import WriteError, edited_text, write_winner


def cli(argv, capsys):
    code = main(argv)
    out = capsys.readouterr()
    return code, out.out, out.err


def variants(capsys, op):
    code, out, _ = cli(["variants", op, "--json"], capsys)
    assert code == 0
    return json.loads(out)


# -- the space ----------------------------------------------------------------------------------------------------

def test_block_rule():
    # the rule stated in space.block_sizes: 2 <= b <= n/2, a power of two or a divisor of n
    assert block_sizes(2) == [] and block_sizes(4) == [2] and block_sizes(6) == [2, 3]
    assert block_sizes(12) == [2, 3, 4, 6] and block_sizes(16) == [2, 4, 8]


@pytest.mark.parametrize("pivoting", ["none", "partial"])
def test_every_variant_of_the_engine_is_a_candidate_and_nothing_else(pivoting, capsys):
    """Compared with what `luforge variants` lists (the engine's enumeration as the user sees it): every loop
    that can do the pivoting, unblocked and at every block of the rule with every capable inner loop, and every
    pair of solve orderings; and no other configuration."""
    lu = variants(capsys, "lu")
    loops = [v["name"] for v in lu if pivoting in v["pivoting"]]
    solves = [(lo["name"], up["name"]) for lo in variants(capsys, "lower-solve") for up in variants(capsys, "upper-solve")]
    sizes = (6, 8)
    cands, _ = enumerate_space(Case(sizes, "float", "row-major", pivoting))
    factor = {(c.entry["loop"], c.entry["block"], c.entry.get("inner"), n) for c in cands
              if c.part in ("factor", "both") for n in c.sizes}
    want = {(lp, 1, None, n) for lp in loops for n in sizes}
    want |= {(lp, b, inn, n) for n in sizes for b in block_sizes(n) for lp, inn in product(loops, loops)}
    assert factor == want
    from derive.spec import KERNEL_KEYS
    if "size" in KERNEL_KEYS:
        # every configuration also at compile-time n, for each size alone
        fixed = {(c.entry["loop"], c.entry["block"], c.entry.get("inner"), c.entry["size"]) for c in cands
                 if c.part in ("factor", "both") and c.entry.get("size")}
        assert fixed == want
    got_solves = set()
    for c in cands:
        if c.part in ("solve", "both"):
            s = c.entry["solve_loop"]
            got_solves.add((s, s) if isinstance(s, str) else (s["lower"], s["upper"]))
    assert got_solves == set(solves)


def test_every_candidate_is_feasible_and_derivable():
    cands, _ = enumerate_space(Case((4,), "double", "column-major", "partial"))
    assert len({c.name for c in cands}) == len(cands)
    for c in cands:
        o = to_options(c)          # through the spec layer: a feasible, valid spec entry
        assert o.pivoting == "partial" and o.scalar == "double"
        files = dict(emit_kernel(o).files)
        assert f"int {c.name}(" in files[f"{c.name}.h"]


def test_yes_no_keys_try_both_values_and_fix_pins_them():
    from derive.spec import KERNEL_KEYS
    if "constant_time" not in KERNEL_KEYS:
        pytest.skip("no yes/no key in this spec layer")
    cands, _ = enumerate_space(Case((6,)))
    assert {c.entry.get("constant_time") for c in cands} == {True, False}
    # the spec layer allows branching only at a fixed size: tune drops what it refuses
    assert all(c.entry.get("size") for c in cands if c.entry.get("constant_time") is False)
    pinned, _ = enumerate_space(Case((6,), fixed=(("constant_time", True),)))
    assert {c.entry.get("constant_time") for c in pinned} == {True}


def test_cache_key_ignores_the_name_but_not_the_code():
    from derive.tune.cache import code_key
    from derive.tune.space import candidate
    base = {"loop": "crout", "block": 1, "scalar": "double", "layout": "column-major", "pivoting": "partial",
            "solve_loop": "outer-product"}
    a, b = candidate(base, (8,), "factor"), candidate({**base, "constant_time": True}, (8,), "factor")
    c = candidate({**base, "loop": "right-looking"}, (8,), "factor")
    fa, fb, fc = (dict(emit_kernel(to_options(x)).files) for x in (a, b, c))
    assert a.name != b.name and code_key(fa, (), "host") == code_key(fb, (), "host")
    assert code_key(fa, (), "host") != code_key(fc, (), "host") != code_key(fc, ("-O3",), "host")



def test_cache_keys_frame_their_parts():
    """Every cache (objects, modules, cross builds, tune figures) keys with derive.digest: parts are framed, so
    moving text from one part to the next gives another key; text and its UTF-8 bytes are the same part; a mapping's
    key order does not matter; a list of flags is not its one flag."""
    from derive.digest import digest
    assert digest("ab", "c") != digest("a", "bc") != digest("abc")
    assert digest("ab", "c") == digest(b"ab", "c")
    assert digest({"x": 1, "y": [2, 3]}) == digest({"y": [2, 3], "x": 1})
    assert digest(["-O3"]) != digest("-O3") and digest([8]) != digest([9])
    assert len(digest()) == 64 and digest() != digest("")

# -- ranking ------------------------------------------------------------------------------------------------------

def test_pareto_layers():
    pts = [(1.0, 300), (2.0, 200), (3.0, 100), (2.5, 250), (3.0, 300)]
    assert pareto_layers(pts) == [1, 1, 1, 2, 3]


# -- the cache, with a counting backend so the test is about tune's bookkeeping, not the clock ------------------

class CountingBackend:
    name = "host"
    unit = "ns"
    speed = "time"
    chunk = None
    default_nrhs = 1

    def __init__(self):
        self.measured = []

    def where(self):
        return "test-machine"

    def check(self, case, objective):
        pass

    def static(self, name, files, flags):
        return {"bytes": len(files[f"{name}.c"])}

    def contender_key(self, case, flags):
        return "none"

    def measure(self, case, n, kernels, flags, contenders=True):
        self.measured += [(name, n) for name, _, _ in kernels]
        # a deterministic figure from the code length: enough to rank
        return ({name: {"unit": "ns", "factor": float(len(f[f"{name}.c"]) * n), "factor_spread": 0.0,
                        "solve": float(n), "solve_spread": 0.0} for name, f, _ in kernels}, {}, [])


def test_cache_second_run_measures_only_what_is_new(tmp_path, monkeypatch):
    """The bookkeeping alone (verify and the clock are stand-ins here; the end-to-end test runs the real ones):
    a repeated run measures and verifies nothing, a wider one only the new size and the new kernels."""
    backend = CountingBackend()
    monkeypatch.setattr(measure_mod, "backend", lambda target: backend)
    verified = []
    import derive.check.verify as verify_mod

    class Passed:
        passed, problems = True, []

    def counting_verify(options, *a, **k):
        verified.extend(o.name for o in options)
        return [Passed() for _ in options]
    monkeypatch.setattr(verify_mod, "verify", counting_verify)
    cache = Cache(tmp_path)
    quiet = run_mod.Progress(quiet=True)
    obj = Objective("time")
    first = run_mod.tune(Case((2,)), obj, progress=quiet, cache=cache)
    assert first.measured_now == len(backend.measured) > 0
    assert all(n == 2 for _, n in backend.measured)
    backend.measured.clear()
    again = run_mod.tune(Case((2,)), obj, progress=quiet, cache=cache)
    assert backend.measured == [] and again.measured_now == 0
    backend.measured.clear()
    n_verified = len(verified)
    wider = run_mod.tune(Case((2, 3)), obj, progress=quiet, cache=cache)
    assert backend.measured and all(n == 3 for _, n in backend.measured)
    # nothing verified twice (the wider run may add compile-time-n candidates for the new size, verified once)
    assert wider.measured_now == len(backend.measured) and len(set(verified)) == len(verified) >= n_verified
    # the ranking of the wide run covers both sizes, from cached and new figures alike
    rows = rank(wider.results, (2, 3), obj)
    assert rows and all(set(r.per_n) == {2, 3} for r in rows)


def test_tune_on_the_host_end_to_end(tmp_path, capsys, monkeypatch):
    """The real pipeline (verify, time in the driver, rank, report, write) on three candidates of the space, to
    keep the suite's time: the whole space is the enumeration tests' job."""
    real = run_mod.enumerate_space

    def three(case):
        cands, untuned = real(case)
        return [c for c in cands if c.entry["block"] == 1 and "size" not in c.entry][:3], untuned
    monkeypatch.setattr(run_mod, "enumerate_space", three)
    spec = tmp_path / "station.toml"
    spec.write_text(SPEC)
    code, out, err = cli(["tune", "--n", "2", "--no-contenders", "--quiet", "--report", str(tmp_path / "rep"),
                          "--write", str(spec), "--name", "est_lu"], capsys)
    assert code == 0, err
    assert "winner" in out and "Pareto front" in out
    data = json.loads((tmp_path / "rep" / "tune.json").read_text())
    assert (tmp_path / "rep" / "tune.md").read_text().startswith("# luforge tune")
    pytest.importorskip("matplotlib", reason="the PNG plots need matplotlib (pip install '.[report]')")
    assert (tmp_path / "rep" / "figure_vs_n.png").stat().st_size > 1000
    assert (tmp_path / "rep" / "size_vs_speed.png").stat().st_size > 1000
    best = data["ranking"][0]
    assert all(best["figure"]["2"] <= r["figure"]["2"] + r["noise"]["2"] + best["noise"]["2"] for r in data["ranking"])
    written = {o.name: o for o in parse(spec.read_text(), "station.toml")}["est_lu"]
    assert written.loop == best["settings"]["loop"] and written.block == best["settings"]["block"]


# -- --write ------------------------------------------------------------------------------------------------------

SPEC = """# pumping station kernels: hand-written comments must survive
[defaults]
scalar = "double"   # all double

[[kernel]]
name = "pump_lu"  # stays as it is
loop = "crout"

# the estimator
[[kernel]]
name = "est_lu"
loop = "bordered"
block = 2

[[kernel]]
name = "tail_lu"
loop = "up-looking"
"""


class FakeOut:
    case = Case((6,), "double", "column-major", "partial")


def winner():
    cands, _ = enumerate_space(FakeOut.case)
    return next(c for c in cands if c.entry.get("block") == 2)


def test_write_replaces_one_kernel_and_nothing_else(tmp_path):
    p = tmp_path / "station.toml"
    p.write_text(SPEC)
    c = winner()
    write_winner(str(p), "est_lu", c, FakeOut, Objective("time"))
    new = p.read_text()
    old_lines, new_lines = SPEC.splitlines(keepends=True), new.splitlines(keepends=True)
    start = old_lines.index('name = "est_lu"\n') - 1          # the [[kernel]] line of est_lu
    end = start + 4                                           # its header and three keys
    assert new_lines[:start] == old_lines[:start]              # byte for byte before ...
    assert new_lines[-(len(old_lines) - end):] == old_lines[end:]  # ... and after
    assert new_lines[start].startswith("# tuned by luforge tune on ") and "n = 6" in new_lines[start]
    kernels = {o.name: o for o in parse(new, "station.toml")}
    assert set(kernels) == {"pump_lu", "est_lu", "tail_lu"}
    assert kernels["est_lu"].settings() == to_options(c, name="est_lu", spec_name="station.toml").settings()
    # again: the earlier comment is replaced, not stacked, and the rest is still untouched
    write_winner(str(p), "est_lu", c, FakeOut, Objective("time"))
    assert p.read_text().count("# tuned by luforge tune") == 1
    assert p.read_text().startswith("".join(old_lines[:start]))


def test_write_appends_a_new_kernel_and_creates_a_spec(tmp_path):
    c = winner()
    text = edited_text(SPEC, "obs_lu", c, "# tuned")
    assert text.startswith(SPEC) and {o.name for o in parse(text, "s.toml")} == {"pump_lu", "est_lu", "tail_lu",
                                                                                 "obs_lu"}
    p = tmp_path / "new.toml"
    write_winner(str(p), "obs_lu", c, FakeOut, Objective("time"))
    assert [o.name for o in parse(p.read_text(), "new.toml")] == ["obs_lu"]


def test_write_refuses_a_name_the_spec_rejects(tmp_path):
    p = tmp_path / "station.toml"
    p.write_text(SPEC)
    with pytest.raises(WriteError) as e:
        write_winner(str(p), "pump_lu_solve", winner(), FakeOut, Objective("time"))   # clashes with pump_lu's solve
    assert e.value.code == 2 and "pump_lu_solve" in str(e.value)
    assert p.read_text() == SPEC


# -- bad requests -------------------------------------------------------------------------------------------------

@pytest.mark.parametrize("argv, says", [
    (["--n", "0"], "--n"),
    (["--n", "4,x"], "--n"),
    (["--n", "8", "--target", "nowhere"], "--target nowhere: allowed: host"),
    (["--n", "8", "--objective", "instructions"], "--objective instructions on the host: allowed"),
    (["--n", "8", "--nrhs", "-1"], "--nrhs"),
    (["--n", "8", "--objective", "weighted", "--weights", "speed=x"], "--weights"),
    (["--n", "8", "--write", "x.toml"], "--write SPEC and --name NAME go together"),
    (["--n", "8", "--write", "x.toml", "--name", "9lu"], "--name"),
])
def test_infeasible_request_is_one_line_and_exit_2(argv, says, capsys, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    code, out, err = cli(["tune", *argv], capsys)
    assert code == 2 and says in err and err.count("\n") == 1 and "Traceback" not in err
    assert not (tmp_path / "x.toml").exists()


# -- an emulated target: exact counts, the same on every run -------------------------------------------------------

def test_emulated_target_counts_are_exact_and_repeat(tmp_path):
    """A candidate measured twice on cortex-m4f through the targets' report: the same instruction counts,
    bytes and stack each time, so the ranking cannot change from run to run."""
    from derive.tune.space import CaseError
    try:
        backend = measure_mod.backend("cortex-m4f")
        backend.check(Case((3,), "float", target="cortex-m4f", nrhs=backend.default_nrhs), Objective("instructions"))
    except CaseError as e:
        pytest.skip(str(e))
    case = Case((3,), "float", target="cortex-m4f", nrhs=backend.default_nrhs)
    cands, _ = enumerate_space(case)
    two = [c for c in cands if c.entry.get("block") == 1][:1]
    kernels = [(c.name, dict(emit_kernel(to_options(c)).files), to_options(c)) for c in two]
    first, _, _ = backend.measure(case, 3, kernels, ())
    again, _, _ = backend.measure(case, 3, kernels, ())
    assert first == again
    for f in first.values():
        assert not f["problems"] and f["factor"] > 0 and f["solve"] > 0 and f["bytes"] > 0 and f["stack"] > 0


def test_target_figures_are_keyed_by_what_counts_them(tmp_path, monkeypatch):
    """A cached count stands for the driver, startup and port code it ran with as much as for the kernel: a change
    under templates/targets/ (say, the port's memcpy) gives another key, so the figure is measured again."""
    import shutil

    from derive.check import cross
    backend = measure_mod.backend("cortex-m4f")
    before = backend.where()
    assert backend.where() == before            # stable from call to call, so the cache is reused
    copy = tmp_path / "targets"
    shutil.copytree(cross.TEMPLATES, copy)
    monkeypatch.setattr(cross, "TEMPLATES", copy)
    assert backend.where() == before
    port = copy / "port_bare.c"
    port.write_text(port.read_text() + "\n/* one more line */\n")
    assert backend.where() != before
