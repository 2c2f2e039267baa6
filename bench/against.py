"""One benchmark on two versions of the code in the same run: a git revision and this tree.

Speed on a shared machine drifts by tens of percent from minute to minute, so two versions
are only compared when their runs alternate: REV, this tree, REV, this tree ... Each run must
print one JSON object as its last line (`bench/rehearse.py --json`, `bench/latency.py
--json`); every numeric figure is reported as the median over the rounds of each version,
with the ratio this tree / REV (below 1 is faster for times, above 1 for rates).

    python bench/against.py HEAD~3 -- bench/rehearse.py --json --animals 200
    python bench/against.py main --rounds 5 -- bench/latency.py --json --boxes 8
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "bench"))

from machine import where_run  # noqa: E402  (bench/ is this script's folder)


def run_once(tree: Path, command: list[str]) -> dict:
    """The bench's last JSON line, run from `tree` with that tree's code first on the path."""
    done = subprocess.run(
        [sys.executable, *command],
        cwd=tree,
        env={**os.environ, "PYTHONPATH": str(tree)},
        capture_output=True,
        text=True,
        check=False,
    )
    if done.returncode != 0:
        raise SystemExit(f"against: {' '.join(command)} failed in {tree}:\n{done.stderr[-2000:]}")
    lines = [line for line in done.stdout.splitlines() if line.startswith("{")]
    if not lines:
        raise SystemExit(f"against: {' '.join(command)} printed no JSON line in {tree}")
    return json.loads(lines[-1])


def numbers(figures: dict, prefix: str = "") -> dict[str, float]:
    """Every numeric figure, nested keys joined with dots."""
    out: dict[str, float] = {}
    for key, value in figures.items():
        name = f"{prefix}{key}"
        if isinstance(value, bool):
            continue
        if isinstance(value, (int, float)):
            out[name] = float(value)
        elif isinstance(value, dict):
            out.update(numbers(value, name + "."))
    return out


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("rev", help="git revision to compare against")
    parser.add_argument("--rounds", type=int, default=3)
    argv = sys.argv[1:]
    if "--" not in argv:
        parser.error("give the benchmark after --: against.py REV [--rounds N] -- BENCH.py [ARGS]")
    split = argv.index("--")
    args = parser.parse_args(argv[:split])
    command = argv[split + 1 :]
    if not command:
        parser.error("give the benchmark after --")
    print(f"machine: {where_run()}")
    with tempfile.TemporaryDirectory(prefix="vigil-against-") as folder:
        base = Path(folder) / "base"
        subprocess.run(["git", "-C", str(ROOT), "worktree", "add", "--detach", "-q", str(base), args.rev], check=True)
        try:
            results: dict[str, list[dict[str, float]]] = {"rev": [], "tree": []}
            for round_ in range(args.rounds):
                for name, tree in (("rev", base), ("tree", ROOT)):
                    results[name].append(numbers(run_once(tree, command)))
                    print(f"round {round_ + 1}/{args.rounds}: {name} done", file=sys.stderr)
        finally:
            subprocess.run(["git", "-C", str(ROOT), "worktree", "remove", "--force", str(base)], check=False)
    keys = [k for k in results["tree"][0] if all(k in r for r in results["rev"] + results["tree"])]
    print(f"{args.rev} against this tree, median of {args.rounds} alternating rounds: {' '.join(command)}")
    print(f"{'figure':<44}{args.rev[:14]:>16}{'this tree':>16}{'ratio':>9}")
    for key in keys:
        old = statistics.median(r[key] for r in results["rev"])
        new = statistics.median(r[key] for r in results["tree"])
        ratio = f"{new / old:.3f}" if old else "-"
        print(f"{key:<44}{old:>16.6g}{new:>16.6g}{ratio:>9}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
