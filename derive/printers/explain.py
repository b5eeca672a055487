"""Readable dumps of each stage for `luforge derive` and `luforge variants`: the Hoare triple, the invariant,
the before/after contents of every block of the 3x3 split, the ordered updates and the lowered loop."""
from __future__ import annotations

from derive.engine.derivation import THREE_WAY, Derivation, pivoting_supported
from derive.engine.invariants import (TWO_WAY, Invariant, block_label, content_of, content_text, enumerate_invariants,
                         equation_text, use_label)
from derive.lowering.lower import Frame, display_shapes, gemm_shape, lower_derivation_for_display
from derive.engine.operation import Operation
from derive.lowering.printing import dump_stmt

UPDATE_WORDS = {
    "gemm": "GEMM",
    "trsm": "TRSM",
    "factor": "factor",
    "panel": "panel factor with partial pivoting",
    "swap": "row interchanges",
}


def variants_rows(op: Operation) -> list[dict]:
    return [{"name": inv.label, "quadrants": inv.as_dict(op), "pivoting": pivoting_supported(op, inv)}
            for inv in enumerate_invariants(op)]


def variants_table(op: Operation) -> str:
    rows = variants_rows(op)
    labels = [r.label for r in op.regions]
    head = ["loop ordering", *labels, "pivoting"]
    body = [[r["name"], *(r["quadrants"][x] for x in labels), ", ".join(r["pivoting"])] for r in rows]
    widths = [max(len(str(x)) for x in col) for col in zip(head, *body)]
    fmt = "  ".join(f"{{:<{w}}}" for w in widths)
    lines = [f"{op.name}: {op.summary}", f"{len(rows)} feasible loop invariants", "", fmt.format(*head).rstrip(),
             fmt.format(*("-" * w for w in widths)).rstrip()]
    lines += [fmt.format(*r).rstrip() for r in body]
    return "\n".join(lines) + "\n"


def _update_line(d: Derivation, u) -> str:
    op = d.operation
    lab = lambda t: block_label(op, t, THREE_WAY)  # noqa: E731
    if u.kind == "gemm":
        left, right = (use_label(op, r, THREE_WAY) for r in u.reads)
        return f"{lab(u.targets[0])} := {lab(u.targets[0])} - {left} {right}"
    if u.kind == "trsm":
        tri = use_label(op, u.reads[0], THREE_WAY)
        t = lab(u.targets[0])
        return f"{t} := {tri}^-1 {t}" if u.side == "left" else f"{t} := {t} {tri}^-1"
    if u.kind == "factor":
        t = lab(u.targets[0])
        return f"{t} := LU{t[1:]} of {t}, packed (inner unblocked loop)"
    if u.kind == "panel":
        ts = "; ".join(lab(t) for t in u.targets)
        return f"[{ts}] := P [{ts}] factored: choose each pivot in the column, interchange, divide below"
    if u.kind == "swap":
        ts = "; ".join(lab(t) for t in u.targets)
        side = "left of" if u.column < 1 else "right of"
        return f"[{ts}] := P [{ts}]  (the panel's interchanges, columns {side} the panel)"
    raise AssertionError(u.kind)


def _unblocked_word(d: Derivation, u) -> str:
    """What an update becomes when the block size is 1."""
    if u.kind == "gemm":
        step_frame = Frame(d.operation, 1)
        shapes = display_shapes(d.operation)
        c = shapes.block(step_frame, d.operation.target, u.targets[0])
        a = shapes.block(step_frame, u.reads[0].matrix, u.reads[0].index)
        return {"dot": "dot product", "gemv_n": "GEMV", "gemv_t": "GEMV (transposed)", "ger": "rank-1 update",
                "gemm": "GEMM"}[gemm_shape(c, a)]
    if u.kind == "trsm":
        return "nothing (unit diagonal)" if u.reads[0].symbol == "L" else "scaling by the pivot"
    if u.kind == "factor":
        return "check the pivot for an exact zero"
    if u.kind == "panel":
        return "pivot search, interchange, scaling of the column"
    return "row interchange"


def derivation_text(d: Derivation, block: int = 1, show_ir: bool = False) -> str:
    op = d.operation
    inv: Invariant = d.invariant
    final_words = {r.label: next((w for w, k in r.states if k == "final"), "") for r in op.regions}
    done_region = [r for r in op.regions if all(p == 1 for p in r.position)][0]
    todo_region = [r for r in op.regions if all(p == 2 for p in r.position)][0]
    lines = [
        f"operation   {op.name}: {op.summary}",
        f"ordering    {inv.label}" + ("" if inv.name else " (unnamed)"),
        f"pivoting    {d.pivoting}",
        f"pre         {op.target} holds its input; {done_region.label} is empty "
        f"({op.direction} sweep: the processed part is {'leading' if op.direction == 'forward' else 'trailing'})",
        f"post        {done_region.label} is all of {op.target} and is {final_words[done_region.label]}",
        f"guard       {todo_region.label} is not empty",
        "",
        "loop invariant (2x2 partition; 1 = processed, 2 = not yet):",
    ]
    for r, w in zip(op.regions, inv.words):
        c = content_of(r.content_of(w), r.position, frozenset({1}))
        lines.append(f"  {r.label:<4} {w:<9} holds {content_text(op, r.position, c, TWO_WAY):<16} "
                     f"from {equation_text(op, r.position, TWO_WAY)}")
    lines += ["", "3x3 split around the current block (index 1), before and after the boundary moves past it:",
              f"  {'block':<6} {'before':<24} {'after':<24}"]
    for t, b in d.before:
        a = d.after_of(t)
        mark = "" if a == b else "   changes"
        lines.append(f"  {block_label(op, t, THREE_WAY):<6} {content_text(op, t, b, THREE_WAY):<24} "
                     f"{content_text(op, t, a, THREE_WAY):<24}{mark}".rstrip())
    lines += ["", "updates, in order (each operand is final before it is read):"]
    for i, u in enumerate(d.updates, start=1):
        lines.append(f"  {i}. {_update_line(d, u)}")
        lines.append(f"       {UPDATE_WORDS[u.kind]}; with block size 1: {_unblocked_word(d, u)}")
        if u.kind != "swap":
            lines.append(f"       from {u.source}")
    lines.append("")
    lines.append("self-check: the updates take every block from its 'before' to its 'after' content: passed")
    if show_ir:
        lines += ["", f"loop IR for block size {block}:"]
        lines += dump_stmt(lower_derivation_for_display(d, block), "  ")
    return "\n".join(lines) + "\n"
