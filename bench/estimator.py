"""Speed of the learning-model layer: the online update and an offline fit.

1. Online update: `OnlineEstimator.update` on the default q_learning grid with 4 options,
   timed trial by trial (p50, p99). Baseline in the same run: recomputing the same grid
   posterior from scratch with the batch likelihood at trial 500, which is what a filter
   saves the session from doing.
2. Offline fit of 1,000 trials (q_learning, two options, 0.8/0.2 with reversals): ours
   (coarse grid + damped Newton, numpy only) against scipy.optimize.minimize (L-BFGS-B
   from 10 random starts) on a plain per-trial numpy likelihood, as commonly written.
   loglik_gap = best scipy log-likelihood - ours (<= 0: ours is at least as good).

3. The particle estimator (bench/particles.py): per model, the update's p50 / p99 and its
   accuracy against four times the particles, with a stand-in hybrid model.

    python bench/estimator.py [--json] [--trials 2000] [--repeats 3] [--no-particles]
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
from machine import where_run  # noqa: E402  (bench/ is on sys.path when run as a script)
from scipy import optimize  # noqa: E402

from server.models import CHOICE_MODELS, OnlineEstimator, encode_animal, fit_animals  # noqa: E402
from server.models.batch import loglik  # noqa: E402
from server.models.trials import stack_animals  # noqa: E402

OPTIONS = ["west", "east", "north", "south"]


def bandit_animal(
    n: int, k: int, alpha: float, beta: float, seed: int, reversal_every: int = 100
) -> tuple[np.ndarray, np.ndarray]:
    """A simulated Q-learner on a k-armed bandit (one arm at 0.8, the rest at 0.2)."""
    rng = np.random.default_rng(seed)
    q = np.zeros(k)
    choices, rewards = np.empty(n, dtype=int), np.empty(n)
    for t in range(n):
        good = (t // reversal_every) % k
        z = beta * q
        p = np.exp(z - z.max())
        c = int(rng.choice(k, p=p / p.sum()))
        r = float(rng.random() < (0.8 if c == good else 0.2))
        q[c] += alpha * (r - q[c])
        choices[t], rewards[t] = c, r
    return choices, rewards


def time_updates(trials: int, drift: float) -> tuple[list[float], OnlineEstimator]:
    choices, rewards = bandit_animal(trials + 50, 4, 0.3, 5.0, seed=1)
    est = OnlineEstimator("q_learning", options=OPTIONS, drift=drift)
    times = []
    for i, (c, r) in enumerate(zip(choices, rewards)):
        start = time.perf_counter()
        est.update(OPTIONS[c], r)
        if i >= 50:  # warm-up
            times.append(time.perf_counter() - start)
    return times, est


def time_recompute(est: OnlineEstimator, n: int) -> float:
    """Baseline: the grid posterior rebuilt from all n trials so far (batch likelihood)."""
    choices, rewards = bandit_animal(n, 4, 0.3, 5.0, seed=1)
    animal = encode_animal(
        "bench", [("s", i, OPTIONS[c], r) for i, (c, r) in enumerate(zip(choices, rewards))], options=OPTIONS
    )
    theta = {k: v[None] for k, v in est.grid.theta.items()}
    start = time.perf_counter()
    stack = stack_animals([animal])
    loglik(est.model, theta, stack, est.grid.qshape)
    return time.perf_counter() - start


def plain_nll(x: np.ndarray, choices: np.ndarray, rewards: np.ndarray, k: int) -> float:
    """Negative log-likelihood of Q-learning + softmax, one trial at a time."""
    alpha, beta = x
    q = np.zeros(k)
    total = 0.0
    for c, r in zip(choices, rewards):
        z = beta * q
        z = z - z.max()
        total += z[c] - np.log(np.exp(z).sum())
        q[c] += alpha * (r - q[c])
    return -total


def scipy_fit(choices: np.ndarray, rewards: np.ndarray, starts: int = 10) -> tuple[float, np.ndarray]:
    rng = np.random.default_rng(0)
    model = CHOICE_MODELS["q_learning"]
    bounds = [(p.low, p.high) for p in model.params]
    best = None
    for _ in range(starts):
        x0 = [rng.uniform(0.05, 0.95), float(np.exp(rng.uniform(np.log(0.5), np.log(20))))]
        res = optimize.minimize(plain_nll, x0, args=(choices, rewards, 2), method="L-BFGS-B", bounds=bounds)
        if best is None or res.fun < best.fun:
            best = res
    return -float(best.fun), best.x


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--json", action="store_true", help="one line of JSON")
    parser.add_argument("--trials", type=int, default=2000, help="online updates to time")
    parser.add_argument("--repeats", type=int, default=3, help="repeats of each fit")
    parser.add_argument("--no-particles", dest="particles", action="store_false",
                        help="skip the particle estimator's figures (bench/particles.py)")  # fmt: skip
    args = parser.parse_args()

    times, est = time_updates(args.trials, drift=0.0)
    drift_times, _ = time_updates(args.trials, drift=0.1)
    recompute_s = time_recompute(est, 500)

    choices, rewards = bandit_animal(1000, 2, 0.25, 4.0, seed=7)
    animal = encode_animal("bench", [("s", i, "LR"[c], r) for i, (c, r) in enumerate(zip(choices, rewards))])
    ours, fit = [], None
    for _ in range(args.repeats):
        start = time.perf_counter()
        fit = fit_animals(CHOICE_MODELS["q_learning"], [animal])[0]
        ours.append(time.perf_counter() - start)
    start = time.perf_counter()
    base_ll, base_x = scipy_fit(choices, rewards)
    scipy_s = time.perf_counter() - start
    others = {}
    for name in CHOICE_MODELS:
        start = time.perf_counter()
        fit_animals(CHOICE_MODELS[name], [animal])
        others[name] = time.perf_counter() - start

    ms = np.array(times) * 1e3
    result = {
        "grid_points": est.grid.points,
        "options": len(OPTIONS),
        "update_ms_p50": round(float(np.percentile(ms, 50)), 4),
        "update_ms_p99": round(float(np.percentile(ms, 99)), 4),
        "fit_1000_trials_s": round(statistics.median(ours), 4),
        "scipy_baseline_s": round(scipy_s, 4),
        "loglik_gap": base_ll - fit.loglik,
    }
    if args.json:
        print(json.dumps(result))
        return 0
    dms = np.array(drift_times) * 1e3
    print(f"machine: {where_run()}")
    print(f"online update, q_learning, {est.grid.points} grid points, {len(OPTIONS)} options, {len(ms)} trials")
    print(f"  static       p50 {np.percentile(ms, 50):.3f} ms   p99 {np.percentile(ms, 99):.3f} ms")
    print(f"  drift 0.1    p50 {np.percentile(dms, 50):.3f} ms   p99 {np.percentile(dms, 99):.3f} ms")
    print(
        f"  baseline: posterior recomputed from 500 trials {recompute_s * 1e3:.1f} ms "
        f"({recompute_s * 1e3 / np.percentile(ms, 50):.0f}x one filter update)"
    )
    print("offline fit, q_learning, 1000 trials, 2 options")
    print(
        f"  ours   {statistics.median(ours):.3f} s  loglik {fit.loglik:.6f}  "
        f"alpha {fit.params['alpha']:.4f} beta {fit.params['beta']:.4f}"
    )
    print(
        f"  scipy  {scipy_s:.3f} s  loglik {base_ll:.6f}  alpha {base_x[0]:.4f} "
        f"beta {base_x[1]:.4f}  (L-BFGS-B, 10 starts, per-trial numpy likelihood)"
    )
    print(f"  speed-up {scipy_s / statistics.median(ours):.1f}x; loglik gap (scipy - ours) {base_ll - fit.loglik:.2e}")
    print(
        "  our fit of every choice model on the same trials: " + ", ".join(f"{k} {v:.3f} s" for k, v in others.items())
    )
    if args.particles:
        import particles  # bench/particles.py, beside this file

        particles.report(particles.figures(), 300)
    return 0


if __name__ == "__main__":
    sys.exit(main())
