"""The printed result of `luforge tune`: the ranked table, the Pareto front of speed against code size, the
reference contenders at each n, and what was pruned, cached, failed or left at its default."""
from __future__ import annotations

from derive.tune.rank import rank
from derive.tune.space import block_sizes

SHOW_ROWS = 15
PRUNING = ("pruned before measuring: block sizes b >= n (one call of the inner loop plus overhead: dominated by "
           "block 1), and b that are neither a power of two nor a divisor of n; loop and inner orderings that "
           "cannot do the pivoting asked for. The factor and the solve are separate functions, so each is "
           "compared on its own and the best of each is joined into one kernel, which is measured too.")


def fmt(x, unit: str) -> str:
    if x is None:
        return "-"
    if unit == "ns":
        return f"{x:,.1f}"
    return f"{x:,.0f}"


def _table(head, body) -> list[str]:
    widths = [max(len(str(x)) for x in col) for col in zip(head, *body)]
    f = "  ".join(f"{{:<{w}}}" for w in widths)
    return [f.format(*head).rstrip(), f.format(*("-" * w for w in widths)).rstrip()] + \
           [f.format(*r).rstrip() for r in body]


def unit_of(out) -> str:
    for m in out.results:
        for f in m.figures.values():
            return f.get("unit", "ns")
    return "ns"


def render(out, objective, show_all: bool = False):
    case = out.case
    sizes = case.sizes
    unit = unit_of(out)
    what = "ns per factor" + (f" + solve ({case.nrhs} rhs)" if case.nrhs else "") if unit == "ns" else \
        "instructions per factor" + (f" + solve ({case.nrhs} rhs)" if case.nrhs else "")
    rows = rank(out.results, sizes, objective)
    how = "median ± noise" if unit == "ns" else "exact counts, the same on every run"
    lines = [f"tune: {case.describe()}; objective {objective.name}; figure: {what} ({how})", ""]
    body = []
    for i, r in enumerate(rows if show_all else rows[:SHOW_ROWS], start=1):
        cells = [str(i), r.m.cand.label().replace(f"scalar={case.scalar} ", "")]
        for n in sizes:
            cells.append(f"{fmt(r.per_n[n], unit)} ± {fmt(r.spread[n], unit)}" if unit == "ns"
                         else fmt(r.per_n[n], unit))
        cells += [fmt(r.m.static.get("bytes"), "B"), f"{r.score:.3f}",
                  ("front " if r.front == 1 else "") + ("tie" if r.ties and i > 1 else ("winner" if i == 1 else ""))]
        body.append(cells)
    head = ["#", "configuration", *[f"n={n}" for n in sizes], "bytes", "score", ""]
    lines += _table(head, body)
    if len(rows) > len(body):
        lines.append(f"... {len(rows) - len(body)} more (--all shows every row)")
    if len(sizes) > 1:
        lines += ["", "best at each n alone (kernels that serve only some of the sizes compete here too):"]
        for n in sizes:
            alone = rank(out.results, (n,), objective)
            if alone:
                lines.append(f"  n={n}: {fmt(alone[0].per_n[n], unit)}  {alone[0].m.cand.label()}")
    if out.contenders:
        lines += ["", "reference contenders (same driver, same input copy):"]
        cbody = []
        for tag, per in sorted(out.contenders.items()):
            cells = [tag]
            for n in sizes:
                f = per.get(n)
                sp = (f["factor"] + (f["solve"] if case.nrhs else 0)) if f else None
                cells.append(fmt(sp, unit))
                if f and rows:
                    cells[-1] += f" ({rows[0].per_n[n] / sp:.2f}x)"
            cbody.append(cells)
        lines += _table(["contender", *[f"n={n} (winner/it)" for n in sizes]], cbody)
    front = [r for r in rows if r.front == 1]
    if front:
        lines += ["", "Pareto front, speed against code size (no other candidate is both faster and smaller):"]
        front.sort(key=lambda r: r.m.static.get("bytes") or 0)
        lines += [f"  {fmt(r.m.static.get('bytes'), 'B'):>7} B  " + "  ".join(fmt(r.per_n[n], unit) for n in sizes)
                  + f"  {r.m.cand.label()}" for r in front]
    failed = [m for m in out.results if m.verified is False]
    if failed:
        lines += ["", f"{len(failed)} candidates failed verification and were not measured:"]
        lines += [f"  {m.cand.label()}: {'; '.join(m.problems[:2])}" for m in failed]
    measured = sum(1 for m in out.results if m.figures)
    cached = sum(m.cached for m in out.results)
    lines += ["", f"{len(out.results)} candidates, {measured} measured ({out.measured_now} figures now, {cached} from "
                  f"the cache{f', {out.retimed} cached figures re-timed beside the new ones' if out.retimed else ''}) in "
                  f"{out.seconds:.1f} s; blocks tried: "
                  + "; ".join(f"n={n}: {', '.join(map(str, [1] + block_sizes(n)))}" for n in sizes), PRUNING]
    if out.untuned:
        lines.append(f"spec keys left at their default: {', '.join(out.untuned)}")
    if unit == "ns":
        lines.append("noise: half the interquartile range of the interleaved rounds; 'tie' = within the noise of "
                     "the winner at every n")
    lines += out.notes
    return "\n".join(lines) + "\n", rows
