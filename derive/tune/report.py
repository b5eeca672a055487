"""`tune --report DIR`: the ranked table as Markdown and JSON, a PNG of the measured figure against n for the top
candidates and the contenders, and a PNG of code size against speed with the Pareto front marked."""
from __future__ import annotations

import json
import math
from pathlib import Path

from derive import __version__
from derive.tune.show import unit_of

TOP = 6


def _rows_json(out, objective, rows) -> dict:
    case = out.case
    return {
        "luforge": __version__,
        "case": {"n": list(case.sizes), "scalar": case.scalar, "layout": case.layout, "pivoting": case.pivoting,
                 "target": case.target, "nrhs": case.nrhs},
        "objective": objective.name,
        "unit": unit_of(out),
        "ranking": [{"rank": i, "kernel": r.m.cand.name, "settings": r.m.cand.entry, "score": r.score,
                     "figure": {str(n): r.per_n[n] for n in case.sizes},
                     "noise": {str(n): r.spread[n] for n in case.sizes},
                     "factor": {str(n): r.m.figures[n]["factor"] for n in case.sizes},
                     "solve": {str(n): r.m.figures[n]["solve"] for n in case.sizes},
                     "bytes": r.m.static.get("bytes"), "stack": r.m.static.get("stack"),
                     "pareto_front": r.front == 1, "ties_winner": r.ties}
                    for i, r in enumerate(rows, start=1)],
        "contenders": {tag: {str(n): f for n, f in per.items()} for tag, per in out.contenders.items()},
        "untuned_keys": out.untuned,
        "seconds": out.seconds,
    }


def _markdown(data: dict) -> str:
    ns = data["case"]["n"]
    c = data["case"]
    lines = [f"# luforge tune: n = {', '.join(map(str, ns))}, {c['scalar']}, {c['layout']}, pivoting {c['pivoting']}, "
             f"nrhs {c['nrhs']}, target {c['target']}", "",
             f"Objective: {data['objective']}; figure in {data['unit']} per factor + solve (median ± noise).", "",
             "| # | configuration | " + " | ".join(f"n = {n}" for n in ns) + " | bytes | score | |",
             "|---|---|" + "---|" * len(ns) + "---|---|---|"]
    for r in data["ranking"]:
        label = ", ".join(f"{k}={v}" for k, v in r["settings"].items() if k not in ("scalar", "layout", "pivoting"))
        figs = " | ".join(f"{r['figure'][str(n)]:,.1f} ± {r['noise'][str(n)]:,.1f}" for n in ns)
        mark = "front" if r["pareto_front"] else ""
        lines.append(f"| {r['rank']} | {label} | {figs} | {r['bytes']} | {r['score']:.3f} | {mark} |")
    if data["contenders"]:
        lines += ["", "| contender | " + " | ".join(f"n = {n}" for n in ns) + " |", "|---|" + "---|" * len(ns)]
        for tag, per in data["contenders"].items():
            cells = [f"{per[str(n)]['factor'] + per[str(n)]['solve']:,.1f}" if str(n) in per else "-" for n in ns]
            lines.append(f"| {tag} | " + " | ".join(cells) + " |")
    return "\n".join(lines) + "\n"


def _plots(directory: Path, data: dict) -> list[Path]:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    ns = data["case"]["n"]
    unit = data["unit"]
    written = []
    fig, ax = plt.subplots(figsize=(7, 4.5))
    for r in data["ranking"][:TOP]:
        label = " ".join(f"{v}" for k, v in r["settings"].items() if k in ("loop", "block", "inner", "size"))
        ax.errorbar(ns, [r["figure"][str(n)] for n in ns], yerr=[r["noise"][str(n)] for n in ns], marker="o",
                    label=f"#{r['rank']} {label}")
    for tag, per in data["contenders"].items():
        xs = [n for n in ns if str(n) in per]
        ax.plot(xs, [per[str(n)]["factor"] + per[str(n)]["solve"] for n in xs], "--", marker="s", alpha=0.7,
                label=tag)
    ax.set_xlabel("n")
    ax.set_ylabel(f"{unit} per factor + solve")
    ax.set_title(f"luforge tune, {data['case']['scalar']}, target {data['case']['target']}")
    ax.legend(fontsize=7)
    p = directory / "figure_vs_n.png"
    fig.tight_layout()
    fig.savefig(p, dpi=110)
    plt.close(fig)
    written.append(p)

    fig, ax = plt.subplots(figsize=(7, 4.5))
    speed = {r["rank"]: [r["factor"][str(n)] + (r["solve"][str(n)] if data["case"]["nrhs"] else 0) for n in ns]
             for r in data["ranking"]}
    best = [min(v[i] for v in speed.values()) for i in range(len(ns))]
    ratio = {k: math.exp(sum(math.log(x / b) for x, b in zip(v, best)) / len(ns)) for k, v in speed.items()}
    pts = [(r["bytes"], ratio[r["rank"]], r["pareto_front"]) for r in data["ranking"] if r["bytes"]]
    ax.scatter([p[0] for p in pts if not p[2]], [p[1] for p in pts if not p[2]], c="grey", s=14, label="candidates")
    front = sorted((p[0], p[1]) for p in pts if p[2])
    ax.plot([p[0] for p in front], [p[1] for p in front], "r-o", label="Pareto front")
    ax.set_xlabel("code bytes (factor + solve object)")
    ax.set_ylabel(f"{unit} relative to the fastest (geometric mean over n)")
    ax.set_title("code size against speed")
    ax.legend(fontsize=8)
    p = directory / "size_vs_speed.png"
    fig.tight_layout()
    fig.savefig(p, dpi=110)
    plt.close(fig)
    written.append(p)
    return written


def write_report(directory: str, out, objective, rows) -> list[Path]:
    d = Path(directory)
    d.mkdir(parents=True, exist_ok=True)
    data = _rows_json(out, objective, rows)
    written = []
    (d / "tune.json").write_text(json.dumps(data, indent=1) + "\n")
    written.append(d / "tune.json")
    (d / "tune.md").write_text(_markdown(data))
    written.append(d / "tune.md")
    try:
        written += _plots(d, data)
    except ImportError:
        print("luforge: matplotlib is not installed; the PNG plots were skipped (pip install matplotlib)")
    return written
