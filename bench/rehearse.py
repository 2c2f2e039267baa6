"""Virtual-time speed of rehearsal: one 60-minute session, and a 1,000-animal cohort.

Prints virtual seconds per wall second and trials per second. The baseline measured in the
same run is the session core alone replaying the same animal's recorded inputs, so the ratio
shows how much of the cost is the core and how much the emulated box and virtual animal.

    python bench/rehearse.py [--protocol FILE] [--animals 1000] [--repeats 20] [--json]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402

from hardware_stubs.agents import make_agent  # noqa: E402
from hardware_stubs.emulated_box import EmulatedBox  # noqa: E402
from server.engine.caps import HardCaps  # noqa: E402
from server.engine.records import EventLogged, InputEvent  # noqa: E402
from server.engine.session import Session  # noqa: E402
from server.engine.virtual import run_virtual  # noqa: E402
from server.protocol.load import load_protocol  # noqa: E402
from server.rehearsal import rehearse  # noqa: E402


def machine() -> str:
    cpu = platform.processor() or platform.machine()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return f"{cpu}, {os.cpu_count()} cores, Python {platform.python_version()}, numpy {np.__version__}"


def one_session(protocol, seed: int) -> tuple[float, Session, list]:
    session = Session(protocol, seed, HardCaps(), log_events=False)
    box = EmulatedBox(protocol.wiring, make_agent("q_learner"), np.random.default_rng(seed + 1))
    start = time.perf_counter()
    run_virtual(session, box)
    return time.perf_counter() - start, session, box


def recorded_inputs(protocol, seed: int) -> list[tuple[float, InputEvent]]:
    session = Session(protocol, seed, HardCaps(), log_events=True)
    box = EmulatedBox(protocol.wiring, make_agent("q_learner"), np.random.default_rng(seed + 1))
    records: list = []
    run_virtual(session, box, on_records=records.extend)
    return [
        (r.t, InputEvent(r.name, r.value == 1.0))
        for r in records
        if isinstance(r, EventLogged) and r.kind == "input"
    ]


def replay_core(protocol, seed: int, inputs) -> float:
    """Baseline: the session core alone, fed the inputs the animal produced."""
    session = Session(protocol, seed, HardCaps(), log_events=False)
    start = time.perf_counter()
    session.start(0.0)
    for t, event in inputs:
        while session.next_deadline < t and not session.finished:
            session.advance(session.next_deadline)
        session.feed(event, t)
    while not session.finished:
        session.advance(session.next_deadline)
    return time.perf_counter() - start


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--protocol", default=str(ROOT / "protocols" / "reversal.yaml"))
    parser.add_argument("--animals", type=int, default=1000)
    parser.add_argument("--repeats", type=int, default=20)
    parser.add_argument("--workers", type=int, default=None)
    parser.add_argument("--json", action="store_true")
    args = parser.parse_args()
    protocol = load_protocol(args.protocol)

    times, trials, virtual = [], [], []
    for i in range(args.repeats):
        wall, session, _ = one_session(protocol, 1000 + i)
        times.append(wall)
        trials.append(session.trials_done)
        virtual.append(session.ended_at)
    wall = statistics.median(times)
    virtual_s = statistics.median(virtual)
    inputs = recorded_inputs(protocol, 1000)
    core = statistics.median(replay_core(protocol, 1000, inputs) for _ in range(args.repeats))

    start = time.perf_counter()
    result = rehearse(protocol, args.animals, seed=7, agent="q_learner", workers=args.workers)
    cohort_s = time.perf_counter() - start
    cohort_trials = sum(a["trials"] for a in result["animals"])
    cohort_virtual = sum(a["duration_s"] for a in result["animals"])

    figures = {
        "protocol": protocol.name,
        "session_virtual_s": round(virtual_s, 1),
        "session_wall_ms": round(wall * 1000, 2),
        "speedup": round(virtual_s / wall),
        "trials_per_s": round(statistics.median(trials) / wall),
        "core_only_wall_ms": round(core * 1000, 2),
        "core_share": round(core / wall, 3),
        "cohort_animals": args.animals,
        "cohort_wall_s": round(cohort_s, 2),
        "cohort_trials_per_s": round(cohort_trials / cohort_s),
        "cohort_speedup": round(cohort_virtual / cohort_s),
    }
    if args.json:
        print(json.dumps(figures))
        return 0
    print(f"machine: {machine()}")
    print(f"protocol '{protocol.name}', agent q_learner")
    print(f"one session: {virtual_s / 60:.0f} virtual min in {wall * 1000:.1f} ms "
          f"(median of {args.repeats}) = {virtual_s / wall:,.0f}x real time, "
          f"{statistics.median(trials) / wall:,.0f} trials/s")  # fmt: skip
    print(f"baseline, session core alone replaying the same inputs: {core * 1000:.1f} ms "
          f"({core / wall:.0%} of the full rehearsal)")  # fmt: skip
    print(f"cohort: {args.animals} animals x 1 session in {cohort_s:.1f} s wall "
          f"= {cohort_virtual / cohort_s:,.0f}x real time, {cohort_trials / cohort_s:,.0f} trials/s")  # fmt: skip
    return 0


if __name__ == "__main__":
    sys.exit(main())
