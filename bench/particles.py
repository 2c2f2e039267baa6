"""Speed and accuracy of the particle estimator (resample-move SMC, server/models/particles.py).

1. Per-trial update, p50 / p99 / max over 300 trials of one animal, for every single-stage
   model and for the seven-parameter hybrid model-based/model-free learner (its compiled
   kernel; the trials come from the separately written simulator of
   tests/models/hybrid_standin.py), with the number of rejuvenations (each replays the whole
   history for every particle, twice).
2. Accuracy of the default particle count: posterior means and 95 % bounds against a run
   with four times as many particles, as a share of each parameter's range (target <= 2 %).
3. Baseline in the same run: the exact grid estimator's update on the same trials.

    python bench/particles.py [--json] [--particles 1024] [--trials 300]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests" / "models"))  # the stand-in hybrid lives beside the tests that use it

import numpy as np  # noqa: E402
from hybrid_standin import COMMON, simulate  # noqa: E402
from machine import where_run  # noqa: E402

from server.engine.records import SecondStage  # noqa: E402
from server.models import CHOICE_MODELS, OnlineEstimator  # noqa: E402
from server.models.particles import ParticleEstimator  # noqa: E402

# The two-stage task of the simulated trials, as the lab hands it to the estimator
TASK = {
    "first": ["L", "R"],
    "states": {"A": ["x", "y"], "B": ["x2", "y2"]},
    "transitions": {"L": {"A": COMMON, "B": 1 - COMMON}, "R": {"A": 1 - COMMON, "B": COMMON}},
}
TWO_STAGE = {"states": ["A", "B"], "second_options": ["x", "y", "x2", "y2"], "task": TASK}
# The example protocol's shape (protocols/two_stage.yaml): each state one lit port, so the
# second stage is a single response
FIVE_PORT = {"states": ["A", "B"], "second_options": [], "task": {**TASK, "states": {"A": [], "B": []}}}


def single_stage_trials(n: int, seed: int) -> list[tuple[str, float]]:
    rng = np.random.default_rng(seed)
    q, out = np.zeros(2), []
    for t in range(n):
        good = (t // 40) % 2
        p1 = 1 / (1 + np.exp(-4.0 * (q[1] - q[0])))
        c = int(rng.random() < p1)
        r = float(rng.random() < (0.8 if c == good else 0.2))
        q[c] += 0.3 * (r - q[c])
        out.append(("LR"[c], r))
    return out


def hybrid_trials(n: int, seed: int, single_response: bool = False) -> list[tuple[str, float, SecondStage]]:
    p = {"w": 0.6, "alpha": 0.5, "beta1": 4.0, "beta2": 4.0, "lam": 0.6, "persev": 0.3}
    return [
        ("LR"[a1], r, SecondStage("AB"[s], bool(common),
                                  None if single_response else TWO_STAGE["second_options"][2 * s + a2]))
        for a1, s, common, a2, r in simulate(p, n, seed)
    ]  # fmt: skip


def timed(est, trials) -> np.ndarray:
    times = []
    for trial in trials:
        second = trial[2] if len(trial) > 2 else None
        start = time.perf_counter()
        est.update(trial[0], trial[1], second=second, summarise=False)
        times.append(time.perf_counter() - start)
    return np.array(times) * 1e3


def unit_gap(a, b, params) -> float:
    gaps = []
    for p in params:
        for x, y in zip(
            (a.params[p.name].mean, a.params[p.name].low, a.params[p.name].high),
            (b.params[p.name].mean, b.params[p.name].low, b.params[p.name].high),
        ):
            gaps.append(abs(float(p.to_unit(x)) - float(p.to_unit(y))))
    return max(gaps)


def figures(particles: int | None = None, trials: int = 300) -> dict[str, dict[str, float]]:
    """Per model: update p50 / p99 / max in ms, rejuvenations, largest gap against 4x particles."""
    rows = {}
    single = single_stage_trials(trials, 1)
    cases = [(name, name, single, {}) for name in CHOICE_MODELS] + [
        ("hybrid", "hybrid", hybrid_trials(trials, 2), TWO_STAGE),
        ("hybrid, single-response 2nd", "hybrid", hybrid_trials(trials, 2, single_response=True), FIVE_PORT),
    ]
    for label, name, seen, two in cases:
        est = ParticleEstimator(name, ["L", "R"], particles=particles, seed=1, **two)
        ms = timed(est, seen)
        count = est.config["particles"]
        ref = ParticleEstimator(name, ["L", "R"], particles=4 * count, seed=2, **two)
        timed(ref, seen)
        rows[label] = {
            "particles": count,
            "p50_ms": round(float(np.percentile(ms, 50)), 3),
            "p99_ms": round(float(np.percentile(ms, 99)), 3),
            "max_ms": round(float(ms.max()), 2),
            "rejuvenations": est.rejuvenations,
            "gap_vs_4x": round(unit_gap(est.estimate(), ref.estimate(), est.params), 4),
        }
    grid = OnlineEstimator("q_learning", ["L", "R"])
    grid_ms = timed(grid, single)
    rows["grid q_learning (baseline)"] = {
        "p50_ms": round(float(np.percentile(grid_ms, 50)), 3),
        "p99_ms": round(float(np.percentile(grid_ms, 99)), 3),
        "max_ms": round(float(grid_ms.max()), 2),
    }
    return rows


def report(rows: dict[str, dict[str, float]], trials: int) -> None:
    print(f"particle estimator, {trials} trials of one animal (particles by model size unless --particles)")
    for name, r in rows.items():
        extra = (
            f"  particles {r['particles']}  rejuvenations {r['rejuvenations']}  gap vs 4x {r['gap_vs_4x']:.2%}"
            if "gap_vs_4x" in r
            else ""
        )
        print(f"  {name:28s} p50 {r['p50_ms']:.3f} ms  p99 {r['p99_ms']:.3f} ms  max {r['max_ms']:.1f} ms{extra}")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--json", action="store_true")
    parser.add_argument("--particles", type=int, default=None, help="particles for every model (default: by size)")
    parser.add_argument("--trials", type=int, default=300)
    args = parser.parse_args()
    rows = figures(args.particles, args.trials)
    if args.json:
        print(json.dumps({"particles": args.particles, "trials": args.trials, "models": rows}))
        return 0
    print(f"machine: {where_run()}")
    report(rows, args.trials)
    return 0


if __name__ == "__main__":
    sys.exit(main())
