"""Speed of the hybrid model-based/model-free model (server/models/two_stage.py).

1. The trial update `hybrid_step` over N parameter sets at once (what an online estimator
   runs per trial over its particles), timed call by call (p50, p99), for N = 1 ... 16384.
   Baseline in the same run: one single-stage Q-learning trial (`learn`, `drive` and the
   choice log-probability of server/models/choice.py) over the same N.
2. The MLE fit of the seven-parameter hybrid to one animal of 300 trials and to 20 animals
   at once, against scipy.optimize.minimize (L-BFGS-B, 5 starts) on the plain-Python
   likelihood of the tests (tests/models/two_stage_simulation.py).
   loglik_gap = best scipy log-likelihood - ours (<= 0: ours is at least as good).

    python bench/two_stage.py [--json]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests" / "models"))

import numpy as np  # noqa: E402
from machine import where_run  # noqa: E402  (bench/ is on sys.path when run as a script)
from scipy import optimize  # noqa: E402
from two_stage_simulation import OPTIONS, reference_loglik, simulate_two_stage  # noqa: E402

from server.models.choice import CHOICE_MODELS, log_choice_probability  # noqa: E402
from server.models.two_stage import HYBRID_PARAMS, TWO_STAGE_MODELS, TwoStageTask, hybrid_step, initial_values  # noqa: E402
from server.models.two_stage_fit import fit_two_stage  # noqa: E402
from server.models.two_stage_trials import TwoStageRow, encode_two_stage  # noqa: E402

TASK = TwoStageTask.build(
    ["left", "right"], OPTIONS, {"left": {"upper": 0.7, "lower": 0.3}, "right": {"upper": 0.3, "lower": 0.7}}
)
NAMES = [p.name for p in HYBRID_PARAMS]
TRUTH = dict(alpha1=0.5, alpha2=0.5, beta1=5.0, beta2=5.0, w=0.6, persev=0.1, **{"lambda": 0.6})


def _particles(n: int, rng: np.random.Generator) -> dict[str, np.ndarray]:
    return {p.name: p.from_unit(rng.random(n)) for p in HYBRID_PARAMS}


def time_steps(n: int, trials: int = 400) -> tuple[np.ndarray, np.ndarray]:
    """Per-call seconds of hybrid_step and of the single-stage baseline, over n sets."""
    rng = np.random.default_rng(0)
    theta = _particles(n, rng)
    sim = simulate_two_stage(TRUTH, trials, seed=1)
    encoded = [TASK.encode(a, st, b, r).expand(1) for _, _, a, _, st, b, r in sim]
    values = initial_values(TASK, (n,))
    ours = []
    for trial in encoded:
        t0 = time.perf_counter()
        step = hybrid_step(theta, values, TASK, trial)
        ours.append(time.perf_counter() - t0)
        values = step.values
    q_model = CHOICE_MODELS["q_learning"]
    q_theta = {"alpha": theta["alpha2"], "beta": theta["beta1"]}
    q, prev = np.zeros((2, n)), np.zeros((2, n))
    base = []
    for _, _, a, _, _, _, r in sim:
        chosen = np.array([[a == "left"], [a == "right"]], dtype=float)
        t0 = time.perf_counter()
        log_choice_probability(q_model.drive(q_theta, q, prev), chosen)
        q, _ = q_model.learn(q_theta, q, chosen, r)
        base.append(time.perf_counter() - t0)
    return np.array(ours[20:]), np.array(base[20:])


def _animal(name: str, sim: list[tuple]):
    rows = [
        TwoStageRow(s, t, a, st, None if tt is None else tt == "common", b, False, r) for s, t, a, tt, st, b, r in sim
    ]
    return encode_two_stage(name, rows, TASK)


def scipy_fit(sim: list[tuple], starts: int = 5) -> float:
    rng = np.random.default_rng(0)
    bounds = [(p.low, p.high) for p in HYBRID_PARAMS]
    best = np.inf
    for _ in range(starts):
        x0 = [float(p.from_unit(rng.uniform(0.1, 0.9))) for p in HYBRID_PARAMS]
        res = optimize.minimize(
            lambda x: -reference_loglik(dict(zip(NAMES, x)), sim), x0, method="L-BFGS-B", bounds=bounds
        )
        best = min(best, res.fun)
    return -float(best)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--json", action="store_true", help="one line of JSON")
    args = parser.parse_args()

    steps = {}
    for n in (1, 1024, 4096, 16384):
        ours, base = time_steps(n)
        steps[n] = (ours * 1e3, base * 1e3)

    sim = simulate_two_stage(TRUTH, 300, seed=7)
    t0 = time.perf_counter()
    fit = fit_two_stage(TWO_STAGE_MODELS["hybrid"], [_animal("bench", sim)])[0]
    fit_s = time.perf_counter() - t0
    cohort = [_animal(f"b{i}", simulate_two_stage(TRUTH, 300, seed=100 + i)) for i in range(20)]
    t0 = time.perf_counter()
    fit_two_stage(TWO_STAGE_MODELS["hybrid"], cohort)
    cohort_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    scipy_ll = scipy_fit(sim)
    scipy_s = time.perf_counter() - t0

    result = {
        "step_ms_p50": {n: round(float(np.percentile(o, 50)), 4) for n, (o, _) in steps.items()},
        "step_ms_p99": {n: round(float(np.percentile(o, 99)), 4) for n, (o, _) in steps.items()},
        "fit_300_trials_s": round(fit_s, 3),
        "fit_20_animals_s": round(cohort_s, 3),
        "scipy_baseline_s": round(scipy_s, 3),
        "loglik_gap": scipy_ll - fit.loglik,
    }
    if args.json:
        print(json.dumps(result))
        return 0
    print(f"machine: {where_run()}")
    print("hybrid_step, one trial over N parameter sets (baseline: one q_learning trial over the same N)")
    for n, (o, b) in steps.items():
        print(
            f"  N {n:>6}  p50 {np.percentile(o, 50):.4f} ms  p99 {np.percentile(o, 99):.4f} ms   "
            f"baseline p50 {np.percentile(b, 50):.4f} ms  ({np.percentile(o, 50) / np.percentile(b, 50):.1f}x)  "
            f"per set {np.percentile(o, 50) * 1e3 / n:.3f} us"
        )
    print("MLE fit of the hybrid (7 parameters), 300 trials")
    print(f"  one animal  {fit_s:.2f} s  loglik {fit.loglik:.4f}  w {fit.params['w']:.3f}")
    print(f"  20 animals at once  {cohort_s:.2f} s  ({cohort_s / 20:.2f} s per animal)")
    print(f"  scipy  {scipy_s:.2f} s  loglik {scipy_ll:.4f}  (L-BFGS-B, 5 starts, plain-Python likelihood)")
    print(f"  speed-up {scipy_s / fit_s:.1f}x; loglik gap (scipy - ours) {scipy_ll - fit.loglik:.2e}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
