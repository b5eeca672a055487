"""Ranking for `luforge tune`: the objective's figure per candidate, the ranked table (with which candidates tie
the winner within the measured noise), and the Pareto front of speed against code size."""
from __future__ import annotations

import math
from dataclasses import dataclass, field

from derive.tune.space import CaseError

OBJECTIVES = ("time", "instructions", "size", "stack", "weighted", "pareto")
WEIGHT_KEYS = ("speed", "size", "stack")


@dataclass(frozen=True)
class Objective:
    name: str
    nrhs: int = 1
    weights: dict = field(default_factory=lambda: {"speed": 1.0})

    def __post_init__(self):
        if self.name not in OBJECTIVES:
            raise CaseError(f"--objective {self.name}: allowed: {', '.join(OBJECTIVES)}")

    # -- figures ----------------------------------------------------------------------------------------------
    def speed(self, m, n) -> float | None:
        f = m.figures.get(n)
        if not f:
            return None
        return f["factor"] + (f["solve"] if self.nrhs > 0 else 0.0)

    def spread(self, m, n) -> float:
        f = m.figures.get(n) or {}
        return math.hypot(f.get("factor_spread", 0.0), f.get("solve_spread", 0.0) if self.nrhs > 0 else 0.0)

    def part_figure(self, m, n, part) -> float:
        """The figure one half is judged by when the best factor and best solve are joined."""
        if self.name in ("size", "stack"):
            return m.static.get("bytes" if self.name == "size" else "stack") or 0
        return m.figures[n][part]

    def raw(self, m, n) -> float | None:
        """The objective's own figure of a whole kernel at n (weighted and pareto rank by the speed)."""
        if self.name == "size":
            return m.static.get("bytes")
        if self.name == "stack":
            return m.static.get("stack")
        return self.speed(m, n)


def parse_weights(text: str | None) -> dict:
    if not text:
        return {"speed": 1.0, "size": 1.0}
    out = {}
    for part in text.split(","):
        k, _, v = part.partition("=")
        k = k.strip()
        try:
            w = float(v)
        except ValueError:
            w = -1.0
        if k not in WEIGHT_KEYS or not w >= 0:
            raise CaseError(f"--weights {text}: allowed: comma-separated KEY=WEIGHT with KEY one of "
                            f"{', '.join(WEIGHT_KEYS)} and WEIGHT >= 0, e.g. speed=1,size=0.5")
        out[k] = w
    return out


@dataclass
class Row:
    m: object
    score: float            # lower is better; 1.0 is the best of the pool on every n
    per_n: dict             # n -> figure
    spread: dict            # n -> noise of that figure
    ties: bool = False      # within the measured noise of the winner
    front: int = 0          # Pareto layer (1 = on the front)


def _pool(results, sizes):
    return [m for m in results if m.verified and all(n in m.figures for n in sizes)]


def pareto_layers(points: list[tuple[float, float]]) -> list[int]:
    """Layer of each (speed, bytes) point: 1 for the non-dominated ones, 2 for those dominated only by layer 1..."""
    layer = [0] * len(points)
    left = set(range(len(points)))
    k = 0
    while left:
        k += 1
        front = {i for i in left if not any(points[j][0] <= points[i][0] and points[j][1] <= points[i][1]
                                            and points[j] != points[i] for j in left)}
        for i in front:
            layer[i] = k
        left -= front
    return layer


def rank(results, sizes, objective: Objective) -> list[Row]:
    """Candidates measured at every size, best first. With several n a kernel's score is the geometric mean
    over n of its figure divided by the best figure at that n, so each size counts alike."""
    pool = _pool(results, sizes)
    if not pool:
        return []
    rows = []
    best_speed = {n: min(objective.speed(m, n) for m in pool) for n in sizes}
    best_static = {k: min((m.static.get(k) or math.inf) for m in pool) for k in ("bytes", "stack")}

    def ratio(x, b):
        return x / b if b and x is not None and math.isfinite(b) else 1.0

    for m in pool:
        speed_ratio = math.exp(sum(math.log(ratio(objective.speed(m, n), best_speed[n])) for n in sizes) / len(sizes))
        if objective.name in ("time", "instructions", "pareto"):
            score = speed_ratio
        elif objective.name == "size":
            score = ratio(m.static.get("bytes"), best_static["bytes"])
        elif objective.name == "stack":
            score = ratio(m.static.get("stack"), best_static["stack"])
        else:
            w = objective.weights
            score = (w.get("speed", 0) * speed_ratio + w.get("size", 0) * ratio(m.static.get("bytes"), best_static["bytes"])
                     + w.get("stack", 0) * ratio(m.static.get("stack"), best_static["stack"]))
        rows.append(Row(m, score, {n: objective.raw(m, n) for n in sizes},
                        {n: objective.spread(m, n) for n in sizes}))
    layers = pareto_layers([(r.m and math.log(speed_of(r, objective, sizes)), r.m.static.get("bytes") or 0)
                            for r in rows])
    for r, k in zip(rows, layers):
        r.front = k
    if objective.name == "pareto":
        rows.sort(key=lambda r: (r.front, r.score, r.m.cand.name))
    else:
        rows.sort(key=lambda r: (r.score, speed_of(r, objective, sizes), r.m.cand.name))
    win = rows[0]
    for r in rows:
        r.ties = all(abs(r.per_n[n] - win.per_n[n]) <= r.spread[n] + win.spread[n] for n in sizes) \
            if objective.name in ("time", "instructions") else r.score == win.score
    return rows


def speed_of(r: Row, objective: Objective, sizes) -> float:
    return math.exp(sum(math.log(max(objective.speed(r.m, n), 1e-12)) for n in sizes) / len(sizes))
