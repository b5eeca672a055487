"""Demo scenario (invented for this project): the flow estimator of a tidal pumping station. Every 20 ms control
tick it re-solves a 6 x 6 innovation system S y = r with a pivoted factor + solve pair from generated/."""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from derive.check.build import build_directory  # noqa: E402
from derive.check.harness import CKernel  # noqa: E402
from derive.spec import load  # noqa: E402
from derive.check.accuracy import solve_ratio  # noqa: E402

PUMPS = 6
TICKS = 8
DEAD_SENSOR_TICK = 5     # at this tick one flow sensor reads a copy of its neighbour


def innovation_system(rng, tick):
    """S = H P H^T + R for the pump-flow model: H mixes neighbouring pumps (shared manifold), P the state
    covariance, R the sensor noise. A failed sensor duplicates its neighbour's row of H and has no noise."""
    h = np.eye(PUMPS) + 0.35 * np.roll(np.eye(PUMPS), 1, axis=1) + 0.1 * rng.standard_normal((PUMPS, PUMPS))
    p = np.diag(rng.uniform(0.5, 2.0, PUMPS))
    r = np.diag(rng.uniform(0.01, 0.05, PUMPS))
    if tick == DEAD_SENSOR_TICK:
        h[3] = h[2]
        r[3, 3], r[2, 2], r[2, 3], r[3, 2] = 0.0, 0.0, 0.0, 0.0
    return h @ p @ h.T + r


def main() -> int:
    spec = ROOT / "generated" / "kernels.toml"
    options = {o.name: o for o in load(spec)}
    name = "tide_right_piv_b4_dcm"
    mod = build_directory(ROOT / "generated", [name])
    kernel = CKernel(mod, options[name])
    rng = np.random.default_rng(2026)
    print(f"tidal station flow estimator: {PUMPS} pumps, {TICKS} ticks, kernel {name} "
          f"({options[name].loop}, block {options[name].block}, partial pivoting)")
    print(f"{'tick':>4}  {'factor code':>11}  {'solve ratio':>11}  {'max |y - y_numpy|':>17}  action")
    failures = 0
    for tick in range(TICKS):
        s = innovation_system(rng, tick)
        resid = rng.standard_normal((PUMPS, 1))
        info, lu, ipiv, ok = kernel.factor(s)
        if not ok:
            print("kernel wrote outside its matrix")
            return 1
        if info != 0:
            # always check the return code: a singular S means a sensor fault, never a usable gain
            print(f"{tick:>4}  {info:>11}  {'-':>11}  {'-':>17}  skip update, flag sensor fault (U({info - 1},"
                  f"{info - 1}) = 0)")
            failures += 1
            continue
        code, y, ok = kernel.solve(lu, resid, ipiv)
        ratio = solve_ratio(s, y, resid)            # LAPACK TESTING/LIN/dget02.f
        diff = float(np.max(np.abs(y - np.linalg.solve(s, resid))))
        action = "apply update" if code == 0 and ok and ratio < 30 else "REJECT"
        print(f"{tick:>4}  {info:>11}  {ratio:>11.3f}  {diff:>17.2e}  {action}")
    expected = 1
    print(f"{failures} tick(s) skipped for a singular system (expected {expected}: the dead sensor tick)")
    return 0 if failures == expected else 1


if __name__ == "__main__":
    sys.exit(main())
