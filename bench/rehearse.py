"""Virtual-time speed of rehearsal: one 60-minute session, and a cohort of virtual animals.

Prints virtual seconds per wall second and trials per second for (a) the session core with
the emulated box and virtual animal, (b) the same with the closed loop on (learning-model
estimator after every trial, and the protocol's rules), and (c) a cohort through
`vigil rehearse`'s own code path (closed loop on). The baseline measured in the same run is
the session core alone replaying the same animal's recorded inputs.

    python bench/rehearse.py [--protocol FILE] [--agent NAME] [--animals 1000] [--sessions 1] [--json]
    python bench/rehearse.py --animals 1000 --sessions 5     # the closed-loop cohort figure
    python bench/rehearse.py --protocol protocols/two_stage.yaml --agent two_stage_learner
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

from hardware_stubs.agents import make_agent  # noqa: E402
from hardware_stubs.emulated_box import EmulatedBox  # noqa: E402
from server.engine.caps import HardCaps  # noqa: E402
from server.engine.records import EventLogged, InputEvent  # noqa: E402
from server.engine.session import Session  # noqa: E402
from server.engine.virtual import run_virtual  # noqa: E402
from server.lab.assembly import build_session  # noqa: E402
from server.lab.rehearsal import rehearse  # noqa: E402
from server.protocol.load import load_protocol  # noqa: E402


def one_session(protocol, seed: int, agent: str, closed_loop: bool = False) -> tuple[float, Session, list]:
    if closed_loop:
        session = build_session(protocol, seed, HardCaps(), log_events=False, summarise_estimates=False)
    else:
        session = Session(protocol, seed, HardCaps(), log_events=False)
    box = EmulatedBox(protocol.wiring, make_agent(agent), np.random.default_rng(seed + 1))
    start = time.perf_counter()
    run_virtual(session, box)
    return time.perf_counter() - start, session, box


def recorded_inputs(protocol, seed: int, agent: str) -> list[tuple[float, InputEvent]]:
    session = Session(protocol, seed, HardCaps(), log_events=True)
    box = EmulatedBox(protocol.wiring, make_agent(agent), np.random.default_rng(seed + 1))
    records: list = []
    run_virtual(session, box, on_records=records.extend)
    return [
        (r.t, InputEvent(r.name, r.value == 1.0)) for r in records if isinstance(r, EventLogged) and r.kind == "input"
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
    parser.add_argument("--agent", default="q_learner", help="virtual animal (default q_learner)")
    parser.add_argument("--animals", type=int, default=1000)
    parser.add_argument("--repeats", type=int, default=20)
    parser.add_argument("--workers", type=int, default=None)
    parser.add_argument("--loop-animals", type=int, default=200, help="animals in the closed-loop cohort")
    parser.add_argument("--sessions", type=int, default=5, help="sessions per animal in the closed-loop cohort")
    parser.add_argument("--json", action="store_true")
    args = parser.parse_args()
    protocol = load_protocol(args.protocol)

    times, trials, virtual = [], [], []
    for i in range(args.repeats):
        wall, session, _ = one_session(protocol, 1000 + i, args.agent)
        times.append(wall)
        trials.append(session.trials_done)
        virtual.append(session.ended_at)
    wall = statistics.median(times)
    virtual_s = statistics.median(virtual)
    inputs = recorded_inputs(protocol, 1000, args.agent)
    core = statistics.median(replay_core(protocol, 1000, inputs) for _ in range(args.repeats))
    loop_times, loop_trials = [], []
    for i in range(max(3, args.repeats // 4)):
        w, session, _ = one_session(protocol, 1000 + i, args.agent, closed_loop=True)
        loop_times.append(w)
        loop_trials.append(session.trials_done)
    loop_wall = statistics.median(loop_times)

    start = time.perf_counter()
    plain = rehearse(protocol, args.animals, seed=7, agent=args.agent, workers=args.workers, closed_loop=False)
    plain_s = time.perf_counter() - start
    plain_trials = sum(a["trials"] for a in plain["animals"])
    plain_virtual = sum(a["duration_s"] for a in plain["animals"])

    start = time.perf_counter()
    result = rehearse(
        protocol, args.loop_animals, seed=7, agent=args.agent, workers=args.workers, sessions=args.sessions
    )
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
        "closed_loop_session_wall_ms": round(loop_wall * 1000, 2),
        "closed_loop_speedup": round(virtual_s / loop_wall),
        "closed_loop_trials_per_s": round(statistics.median(loop_trials) / loop_wall),
        "cohort_animals": args.animals,
        "cohort_wall_s": round(plain_s, 2),
        "cohort_trials_per_s": round(plain_trials / plain_s),
        "cohort_speedup": round(plain_virtual / plain_s),
        "loop_cohort_animals": args.loop_animals,
        "loop_cohort_sessions_per_animal": args.sessions,
        "loop_cohort_wall_s": round(cohort_s, 2),
        "loop_cohort_trials_per_s": round(cohort_trials / cohort_s),
        "loop_cohort_speedup": round(cohort_virtual / cohort_s),
    }
    if args.json:
        print(json.dumps(figures))
        return 0
    print(f"machine: {where_run()}")
    print(f"protocol '{protocol.name}', agent {args.agent}")
    print(f"one session: {virtual_s / 60:.0f} virtual min in {wall * 1000:.1f} ms "
          f"(median of {args.repeats}) = {virtual_s / wall:,.0f}x real time, "
          f"{statistics.median(trials) / wall:,.0f} trials/s")  # fmt: skip
    print(f"baseline, session core alone replaying the same inputs: {core * 1000:.1f} ms "
          f"({core / wall:.0%} of the full rehearsal)")  # fmt: skip
    print(f"closed loop on (estimator + rules): {loop_wall * 1000:.1f} ms per session "
          f"= {virtual_s / loop_wall:,.0f}x real time, "
          f"{statistics.median(loop_trials) / loop_wall:,.0f} trials/s")  # fmt: skip
    print(f"cohort, schedule only: {args.animals} animals x 1 session in {plain_s:.1f} s wall "
          f"= {plain_virtual / plain_s:,.0f}x real time, {plain_trials / plain_s:,.0f} trials/s")  # fmt: skip
    print(f"cohort, closed loop on: {args.loop_animals} animals x {args.sessions} sessions in {cohort_s:.1f} s wall "
          f"= {cohort_virtual / cohort_s:,.0f}x real time, {cohort_trials / cohort_s:,.0f} trials/s")  # fmt: skip
    return 0


if __name__ == "__main__":
    sys.exit(main())
