"""Emission of batched (lanes) kernels: the single-matrix kernel lowered over W lanes, printed by the lane printers
into their .c, .h and .py skeletons. Like emit.py it only arranges printed parts."""
from __future__ import annotations

from derive.engine import operation
from derive.engine.invariants import make
from derive.lowering.fixed import MAX_EXTENT
from derive.lowering.lanes import lower_lanes
from derive.lowering.lower import invariant_text
from derive.options import KernelOptions
from derive.printers import emit
from derive.printers.clanes import LaneCPrinter
from derive.printers.cprinter import HELPER_ORDER
from derive.printers.pylanes import LanePyPrinter
from derive.printers.write import seal
from derive.targets import table
from derive.targets.storage import LAYOUTS, SCALARS


def lower_batched(o: KernelOptions):
    """(the single-matrix kernel the lanes lowering takes, the batched kernel). With a fixed size the factor
    keeps its steps up to n = 16: each step's code serves W matrices (see fixed.py)."""
    # a batched solve has one right-hand side per matrix already: the lanes lowering takes the general path
    scalar_kernel = emit.lower_options(o, factor_steps=MAX_EXTENT, one_column=False)
    return scalar_kernel, lower_lanes(scalar_kernel, o)


def emit_lanes(o: KernelOptions) -> emit.Emitted:
    # the single-matrix kernel, specialised for a fixed size if there is one (pivoting then by selects), is
    # what the lanes lowering takes
    scalar_kernel, kernel = lower_batched(o)
    env = emit._environment()
    layout, scalar = LAYOUTS[o.layout], SCALARS[o.scalar]
    lines = emit.banner_lines(o, scalar_kernel)
    lines.insert(2, f"lanes: {o.lanes} matrices interleaved element by element per group; flops below are per matrix")
    inv = make(operation.LU, o.invariant)
    common = dict(banner=emit._banner(lines), name=o.name, NAME=o.name.upper(), version=emit.__version__,
                  digest=o.digest(), block=o.block, scalar=scalar, layout=layout, pivoted=True,
                  pivoting=o.pivoting, loop=o.loop, inner_loop=o.inner_loop, lower_loop=o.lower_loop,
                  upper_loop=o.upper_loop, invariant_doc=invariant_text(operation.LU, o.invariant, inv.label),
                  lanes=o.lanes, size=o.size)

    cp = LaneCPrinter(o.name, layout, scalar, kernel)
    internal, public = [], []
    for r in kernel.routines:
        entry = {"signature": cp.signature(r), "body": cp.body(r), "doc": r.doc}
        (public if r.role in ("factor", "solve") else internal).append(entry)
    helpers = [h for h in HELPER_ORDER if h in cp.needs]
    # the target row says how wide a lane vector is; the kernel's lanes are whole chunks of it
    vl = table.get(o.target).lane_vector(o.lanes, scalar.bytes)
    iota = "{ " + ", ".join(str(e) for e in range(vl)) + " }"
    t = scalar.c_type
    n = "" if o.size else "int n, "
    pack_params = {"pack": f"int count, {n}const {t} *restrict mats, {t} *restrict a",
                   "unpack": f"int count, {n}const {t} *restrict a, {t} *restrict mats"}
    c_text = env.get_template("c/kernel_lanes.c.j2").render(
        helpers=helpers, internal=internal, public=public, at_index=layout.index, pack_params=pack_params,
        vl=vl, iota=iota,
        **common)
    idx = layout.index.replace("(ld)", "n").replace("(i)", "i").replace("(j)", "j")
    h_text = env.get_template("c/kernel_lanes.h.j2").render(
        guard=f"{o.name.upper()}_H", factor_params=emit._params(public[0]["signature"]),
        solve_params=emit._params(public[1]["signature"]), layout_idx=idx,
        # restrict only on the definitions: the header is included from C++ too
        pack_params={k: v.replace("restrict ", "") for k, v in pack_params.items()}, **common)

    pp = LanePyPrinter(o.name, kernel)
    fns = [pp.function(r) for r in kernel.routines if r.role not in ("factor", "solve")]
    py_text = env.get_template("python/kernel_lanes.py.j2").render(
        routines=fns, doc_summary=f"batched LU with partial pivoting, {o.loop} loop, block {o.block}, {o.scalar}",
        **common)
    files = ((f"{o.name}.c", emit._tidy(c_text)), (f"{o.name}.h", emit._tidy(h_text)),
             (f"{o.name}.py", emit._tidy(py_text, blanks=2)))
    # sealed like every emitted file: without its content hash, `generate` would take its own files for edited ones
    return emit.Emitted(o, tuple((n, seal(t)) for n, t in files))
