"""Kernels checked on a target: the host chooses the matrices and embeds them (with canaries) in a test image, the
target runs factor and solve and sends back every buffer as hex of its raw bits, the host judges them."""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from derive import __version__
from derive.check import cross
from derive.check.accuracy import column_dominant, componentwise_ratio, factor_ratio, solve_ratio
from derive.check.harness import GUARD, Placed, place
from derive.check.matrices import exact_factors, lapack_ge_matrix, zero_columns
from derive.check.verify import THRESHOLD, ratio_problems, sizes_for
from derive.options import KernelOptions
from derive.printers.emit import emit_kernel
from derive.targets.storage import LAYOUTS, SCALARS
from derive.targets.table import Target

PIV_CANARY = -12345   # the same canary the host harness puts around ipiv
NRHS = 2


@dataclass(frozen=True)
class Abi:
    """How the driver calls a kernel: C argument lists over the driver's n, a, lda, ipiv, nrhs, b, ldb, and
    the orders it can be called with. A kernel kind with another signature (fixed order, lanes) is one more
    branch of `abi_of` reading its options, never a change to the driver template."""
    factor_args: str
    solve_args: str
    orders: tuple[int, ...] | None = None     # None: any n; else only these
    unsupported: str | None = None            # why the driver cannot call such a kernel yet
    piv_words: str = "(size_t)n + 2u * LUF_GUARD"   # entries of the driver's pivot buffer sent back
    kind: str = "matrix"                      # the module that lays out and judges the cases (KIND_MODULES)


# choose_cases and judge per kind of calling convention; each case offers fields(), a_buf, b_buf, piv_len()
KIND_MODULES = {"matrix": "derive.check.ondevice", "lanes": "derive.check.ondevice_lanes"}


def abi_of(o: KernelOptions) -> Abi:
    piv = ", ipiv" if o.pivoting != "none" else ""
    size = getattr(o, "size", None)   # fixed-order kernels: `int NAME(T *a, int lda, int *ipiv)`
    if getattr(o, "lanes", 1) > 1:
        # W interleaved matrices per call: the case's nrhs is the count of matrices (one right-hand side each),
        # and the driver's pivot buffer holds ipiv[count * n], GUARD canaries, then info[count]
        n_arg = "" if size else "n, "
        info = f"ipiv + (size_t)nrhs * (size_t)n + {GUARD}"
        return Abi(f"nrhs, {n_arg}a, ipiv, {info}", f"nrhs, {n_arg}a, ipiv, b", (int(size),) if size else None,
                   piv_words=f"(size_t)nrhs * (size_t)n + (size_t)nrhs + {3 * GUARD}u", kind="lanes")
    if size:
        return Abi(f"a, lda{piv}", f"nrhs, a, lda{piv}, b, ldb", (int(size),))
    return Abi(f"n, a, lda{piv}", f"n, nrhs, a, lda{piv}, b, ldb")


def kind_of(o: KernelOptions):
    import importlib
    return importlib.import_module(KIND_MODULES[abi_of(o).kind])


@dataclass
class Case:
    n: int
    a: np.ndarray               # the logical matrix
    a_place: Placed             # its padded buffer, canaries included, exactly as embedded
    b: np.ndarray
    b_place: Placed
    expect_info: int | None     # None: nonsingular, so 0; else the exact code
    judge: str = "random"       # what is promised: "random" (ratios and Higham's bound), "exact" (the known
                                # factors, bit for bit), "lapack" (dchkge: code, dget01, dget02), "code" only
    exact: tuple | None = None  # (lu, ipiv) for "exact"

    def fields(self) -> tuple[int, int, int, int]:
        return self.n, self.a_place.ld, NRHS, self.b_place.ld

    @property
    def a_buf(self) -> np.ndarray:
        return self.a_place.buf

    @property
    def b_buf(self) -> np.ndarray:
        return self.b_place.buf

    def piv_len(self) -> int:
        return self.n + 2 * GUARD


def _bits(dtype) -> np.dtype:
    return np.dtype(np.uint32) if np.dtype(dtype).itemsize == 4 else np.dtype(np.uint64)


def _case(o: KernelOptions, a: np.ndarray, rng, lda: int, expect: int | None, judge: str = "random",
          exact=None) -> Case:
    dtype = a.dtype
    n = a.shape[0]
    pa, _ = place(a, lda, o.layout, dtype)
    b = rng.standard_normal((n, NRHS)).astype(dtype)
    if judge == "lapack" and n:
        b *= np.max(np.abs(a))   # scaled with the matrix, so LAPACK's types 10 and 11 stay in range (as verify)
    ldb = (n if LAYOUTS[o.layout].leading == "rows" else NRHS) + int(rng.integers(0, 2))
    pb, _ = place(b, max(1, ldb), o.layout, dtype)
    return Case(n, a, pa, b, pb, expect, judge, exact)


# LAPACK TESTING/dtest.in runs N = 0, 1, 2, 3, 5, 10, 50; on a target those up to 10 (its RAM is small).
LAPACK_ORDERS = (1, 2, 3, 5, 10)
EXACT_ORDERS = (4, 9, 16)


def choose_cases(o: KernelOptions, t: Target, rng, per_size: int = 2, orders=None) -> list[Case]:
    """The matrices host verify uses, for the sizes that fit the row: random (pivoted) or column-dominant
    (unpivoted) ones with leading dimensions beyond n, matrices with exactly known factors, and LAPACK's GE
    types with their expected codes (zero columns: exact zero pivots). With `orders`: one random matrix per
    order (for counting)."""
    dtype = np.dtype(SCALARS[o.scalar].numpy)
    abi = abi_of(o)

    def fits(ns):
        return [n for n in ns if n <= t.max_n and (abi.orders is None or n in abi.orders)]

    pivoted = o.pivoting != "none"
    cases = []
    for n in fits(orders or abi.orders or sizes_for(o.block)):
        for _ in range(per_size if orders is None else 1):
            a = rng.standard_normal((n, n)).astype(dtype) if pivoted else column_dominant(n, dtype, rng)
            cases.append(_case(o, a, rng, max(1, n) + int(rng.integers(0, 4)), None))
    if orders is not None:
        return cases
    for n in fits(abi.orders or EXACT_ORDERS):
        a, lu, ipiv = exact_factors(n, dtype, rng, pivoted)
        cases.append(_case(o, a, rng, max(1, n) + 1, None, "exact", (lu, ipiv)))
    for n in fits(abi.orders or LAPACK_ORDERS):
        for imat in range(1, 12):
            if 5 <= imat <= 7 and n < imat - 4:
                continue    # dchkge skips these types when N < IMAT-4
            if pivoted:
                a, expected = lapack_ge_matrix(imat, n, dtype, rng)
            elif imat in (5, 6, 7):
                # host verify's zero-column placement (dchkge's IZERO) on a dominant matrix: exact zero pivot
                a, expected = zero_columns(column_dominant(n, dtype, rng), imat)
            else:
                continue    # the other GE types need pivoting; an unpivoted kernel promises nothing on them
            cases.append(_case(o, a, rng, max(1, n), expected, "lapack" if pivoted else "code"))
    return cases


def data_c(o: KernelOptions, cases: list[Case]) -> str:
    """The cases as C constants: the raw bits of every buffer entry, so nothing is rounded on the way."""
    bits = _bits(SCALARS[o.scalar].numpy)
    suffix = "u" if bits.itemsize == 4 else "ull"
    width = 2 * bits.itemsize
    out = [f"/* generated by luforge {__version__}: test matrices for {o.name}; do not edit */",
           "#include <stddef.h>", "#include <stdint.h>", "",
           f"typedef uint{8 * bits.itemsize}_t luf_bits;",
           "struct luf_case {", "    int n, lda, nrhs, ldb;", "    size_t a_len, b_len;",
           "    const luf_bits *a, *b;", "};", ""]

    def array(name, buf):
        words = buf.view(bits)
        body = ",\n".join("    " + ", ".join(f"0x{int(w):0{width}x}{suffix}" for w in words[i:i + 6])
                          for i in range(0, len(words), 6))
        return f"static const luf_bits {name}[{len(words)}] = {{\n{body}\n}};"

    for k, c in enumerate(cases):
        out += [array(f"a{k}", c.a_buf), array(f"b{k}", c.b_buf)]
    out += ["", "extern const struct luf_case luf_cases[];", "extern const int luf_ncases;", "",
            f"const struct luf_case luf_cases[{max(1, len(cases))}] = {{"]
    out += [f"    {{{', '.join(str(f) for f in c.fields())}, {len(c.a_buf)}, {len(c.b_buf)}, a{k}, b{k}}},"
            for k, c in enumerate(cases)] or ["    {0, 1, 0, 1, 0, 0, NULL, NULL}"]
    out += ["};", f"const int luf_ncases = {len(cases)};", ""]
    return "\n".join(out)


def driver_c(o: KernelOptions, t: Target, cases: list[Case]) -> str:
    env = cross.jinja2.Environment(loader=cross.jinja2.FileSystemLoader(str(cross.TEMPLATES)),
                                   keep_trailing_newline=True, undefined=cross.jinja2.StrictUndefined)
    abi = abi_of(o)
    bits = _bits(SCALARS[o.scalar].numpy)
    return env.get_template("driver.c.j2").render(
        version=__version__, name=o.name, target=t.name, real=SCALARS[o.scalar].c_type,
        bits=f"uint{8 * bits.itemsize}_t", guard=GUARD, paint_words=t.paint_bytes // 4,
        max_a=max([len(c.a_buf) for c in cases] + [1]), max_b=max([len(c.b_buf) for c in cases] + [1]),
        max_piv=max([c.piv_len() for c in cases] + [2 * GUARD]), piv_words=abi.piv_words,
        factor_call=f"{o.name}({abi.factor_args})", solve_call=f"{o.name}_solve({abi.solve_args})")


@dataclass
class Result:
    info: int
    code: int
    lu_unchanged: bool
    factor_stack: int
    solve_stack: int
    a_buf: np.ndarray
    piv_buf: np.ndarray
    b_buf: np.ndarray


def parse(o: KernelOptions, text: str, ncases: int) -> list[Result]:
    bits = _bits(SCALARS[o.scalar].numpy)
    dtype = np.dtype(SCALARS[o.scalar].numpy)
    results: list[Result] = []
    head: list[int] = []
    bufs: dict[str, list[int]] = {}
    ended = False

    def close():
        if head:
            results.append(Result(head[1], head[2], bool(head[3]), head[4], head[5],
                                  np.array(bufs.get("a", []), dtype=bits).view(dtype),
                                  np.array(bufs.get("p", []), dtype=np.uint32).view(np.int32),
                                  np.array(bufs.get("b", []), dtype=bits).view(dtype)))

    for line in text.splitlines():
        parts = line.split()
        if not parts:
            continue
        if parts[0] == "case":
            close()
            head, bufs = [int(x) for x in parts[1:]], {}
        elif parts[0] in ("a", "p", "b"):
            bufs.setdefault(parts[0], []).extend(int(x, 16) for x in parts[1:])
        elif parts[0] == "end":
            ended = True
    close()
    if not ended or len(results) != ncases:
        raise cross.CrossError(f"the target sent back {len(results)} of {ncases} cases"
                               f"{'' if ended else ' and no end mark'}")
    return results


def _same_bits(x: np.ndarray, y: np.ndarray) -> bool:
    return x.shape == y.shape and bool(np.array_equal(x.view(_bits(x.dtype)), y.view(_bits(y.dtype))))


def _canaries_ok(p: Placed, out: np.ndarray) -> bool:
    mask = np.ones(p.buf.shape, bool)
    if p.rows and p.cols:
        mask[p.index().ravel()] = False
    return out.shape == p.buf.shape and _same_bits(out[mask], p.buf[mask])


@dataclass
class TargetRow:
    """One kernel on one row: the worst of each published ratio over the cases, and what went wrong."""
    name: str
    sizes: list[int]
    matrices: int
    worst_factor: float
    worst_componentwise: float
    worst_solve: float
    problems: list[str]
    target: str = ""
    max_factor_stack: int = 0
    max_solve_stack: int = 0
    bit_identical: bool = True
    notes: list[str] = field(default_factory=list)

    @property
    def passed(self) -> bool:
        return not self.problems


def judge(o: KernelOptions, t: Target, cases: list[Case], results: list[Result], host=None) -> TargetRow:
    """The host's verdict on what the target sent back: canaries, codes, LAPACK's factor and solve ratios and
    Higham's componentwise bound (the same functions and threshold as host verify); and, given the host's own
    build (a harness.CKernel), whether the target's factors and solutions are bit-identical to it."""
    problems: list[str] = []
    wf = wc = ws = 0.0
    identical = True
    for c, r in zip(cases, results):
        n = c.n
        tag = f"n={n}"
        if not _canaries_ok(c.a_place, r.a_buf) or not _canaries_ok(c.b_place, r.b_buf):
            problems.append(f"{tag}: wrote outside the matrix or the right-hand sides")
        pivoted = o.pivoting != "none"
        piv = r.piv_buf
        outside = np.r_[piv[:GUARD], piv[GUARD + n:]] if pivoted else piv
        if (outside != PIV_CANARY).any():
            problems.append(f"{tag}: wrote outside ipiv")
        if not r.lu_unchanged:
            problems.append(f"{tag}: the solve changed the factors or the pivots")
        expect = c.expect_info or 0
        if r.info != expect:
            problems.append(f"{tag}: factor returned {r.info}, expected {expect}")
            continue
        if c.judge == "code":
            continue
        lu = Placed(r.a_buf, c.a_place.offset, n, n, c.a_place.ld, o.layout).read()
        x = Placed(r.b_buf, c.b_place.offset, n, NRHS, c.b_place.ld, o.layout).read()
        ipiv = piv[GUARD:GUARD + n].astype(np.intp) if pivoted else None
        if ipiv is not None and ((ipiv < 0) | (ipiv >= max(n, 1))).any():
            problems.append(f"{tag}: pivot entries outside 0..n-1")
            continue
        if c.judge == "exact":
            want_lu, want_piv = c.exact
            if not np.array_equal(lu, want_lu) or (pivoted and not np.array_equal(ipiv, want_piv)):
                problems.append(f"{tag}: factors differ from the exactly known ones")
                continue
        else:
            wf = max(wf, factor_ratio(c.a, lu, ipiv))
        if c.judge == "random":
            wc = max(wc, componentwise_ratio(c.a, lu, ipiv))
        if expect == 0:
            if r.code != 0:
                problems.append(f"{tag}: solve returned {r.code}")
            ws = max(ws, solve_ratio(c.a, x, c.b))
        if host is not None:
            hinfo, hlu, hpiv, _ = host.factor(c.a, c.a_place.ld)
            same = hinfo == r.info and _same_bits(hlu, lu) and (ipiv is None or np.array_equal(hpiv, ipiv))
            if same and expect == 0:
                _, hx, _ = host.solve(hlu, c.b, hpiv, c.a_place.ld, c.b_place.ld)
                same = _same_bits(hx, x)
            identical = identical and same
    return verdict(o, t, cases, len(cases), results, (wf, wc, ws), problems, identical if host is not None else None)


def verdict(o: KernelOptions, t: Target, cases, matrices: int, results: list[Result], worst: tuple[float, float, float],
            problems: list[str], identical: bool | None) -> TargetRow:
    """The row of one kernel on one target: its worst ratios against host verify's thresholds, and whether it
    equals the host build bit for bit (None: not compared)."""
    problems = problems + ratio_problems(*worst)
    if identical is False:
        # ISO C forbids contracting a*b - c into an FMA across statements and every row computes IEEE
        # binary32/64 with round-to-nearest, so the same C gives the same bits everywhere (common practice)
        problems.append("factors or solutions differ in their bits from the host build of the same C")
    return TargetRow(o.name, sorted({c.n for c in cases}), matrices, *worst, problems, target=t.name,
                     max_factor_stack=max([r.factor_stack for r in results] + [0]),
                     max_solve_stack=max([r.solve_stack for r in results] + [0]), bit_identical=identical is not False)


def image_for(o: KernelOptions, t: Target, cases: list[Case], tag: str = "verify") -> cross.Image:
    files = dict(emit_kernel(o).files)
    sources = {f"{o.name}.c": files[f"{o.name}.c"], f"{o.name}.h": files[f"{o.name}.h"],
               "luforge_driver.c": driver_c(o, t, cases), "luforge_cases.c": data_c(o, cases)}
    return cross.build_image(t, o.name, sources, f"{o.name}.c", tag)


def check_on(o: KernelOptions, t: Target, rng, per_size: int = 2, host=None) -> TargetRow:
    """Build, run and judge one kernel on one row; a scalar the row cannot link is a note, not a failure."""
    why = abi_of(o).unsupported
    if why:
        return TargetRow(o.name, [], 0, 0.0, 0.0, 0.0, [], target=t.name, notes=[f"not run: {why}"])
    kind = kind_of(o)
    cases = kind.choose_cases(o, t, rng, per_size)
    if not cases:
        return TargetRow(o.name, [], 0, 0.0, 0.0, 0.0, [], target=t.name,
                         notes=[f"not run: no test matrix of its orders fits the row's RAM (max_n = {t.max_n})"])
    img = image_for(o, t, cases)
    results = parse(o, cross.run(img).stdout, len(cases))
    return kind.judge(o, t, cases, results, host)


def host_kernels(options: list[KernelOptions]) -> dict:
    """The host's cffi build of each kernel, the reference the targets' bits are compared with."""
    from derive.check.build import build
    from derive.check.harness import CKernel, LaneKernel
    emitted = [emit_kernel(o) for o in options]
    mod = build([(e.options.name, dict(e.files)[f"{e.options.name}.c"], dict(e.files)[f"{e.options.name}.h"])
                 for e in emitted])
    return {o.name: (LaneKernel if abi_of(o).kind == "lanes" else CKernel)(mod, o) for o in options}


def verify_targets(options: list[KernelOptions], targets: list[Target], seed: int = 20261202, per_size: int = 2,
                   jobs: int | None = None) -> list[TargetRow]:
    """Every kernel on every row, in parallel (each run is a compiler or emulator process); the same seeds give
    the same matrices on every row, so each row is compared with the same host results."""
    import os
    from concurrent.futures import ThreadPoolExecutor
    for t in targets:
        cross.require(t)
    host = host_kernels(options)
    pairs = [(t, k, o) for t in targets for k, o in enumerate(options)]
    with ThreadPoolExecutor(jobs or os.cpu_count() or 1) as pool:
        return list(pool.map(lambda p: check_on(p[2], p[0], np.random.default_rng([seed, p[1]]), per_size,
                                                host[p[2].name]), pairs))


def table(rows: list[TargetRow]) -> str:
    head = ("target", "kernel", "sizes", "matrices", "factor ratio", "componentwise", "solve ratio",
            "stack f/s (painted)", "bits = host", "result")
    body = [(r.target, r.name, f"{r.sizes[0]}..{r.sizes[-1]}", str(r.matrices), f"{r.worst_factor:.3f}",
             f"{r.worst_componentwise:.3f}", f"{r.worst_solve:.3f}", f"{r.max_factor_stack}/{r.max_solve_stack}",
             "yes" if r.bit_identical else "NO", "pass" if r.passed else "FAIL") if r.matrices else
            (r.target, r.name, "-", "0", "-", "-", "-", "-", "-", "not run") for r in rows]
    widths = [max(len(x) for x in col) for col in zip(head, *body)]
    fmt = "  ".join(f"{{:<{w}}}" for w in widths)
    out = [fmt.format(*row).rstrip() for row in (head, tuple("-" * w for w in widths), *body)]
    out += [f"{r.target} {r.name}: {p}" for r in rows for p in r.problems]
    notes: dict[str, list[str]] = {}
    for r in rows:
        for p in r.notes:
            notes.setdefault(f"{r.target}: {p}", []).append(r.name)
    out += [f"{note} ({', '.join(names)})" for note, names in notes.items()]
    out.append(f"thresholds: factor and solve ratios < {THRESHOLD:g} (LAPACK TESTING/dtest.in), componentwise "
               f"<= 1 (Higham 2002, Thm 9.3); bits = host: factors and solutions equal, bit for bit, to the host "
               f"build's")
    return "\n".join(out) + "\n"
