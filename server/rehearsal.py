"""Rehearsal: run a protocol over a cohort of virtual animals in virtual time.

Each animal's seeds come from `numpy.random.SeedSequence(seed).spawn(n)`, so the result for
animal i does not depend on how many worker processes ran the cohort: the same seed gives
byte-identical output.
"""

from __future__ import annotations

import os
import sys
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from server.engine.block_progress import PERFORMANCE_CRITERIA
from server.engine.caps import HardCaps
from server.closed_loop import build_session
from server.engine.session import Session
from server.engine.virtual import run_virtual
from server.protocol.model import SCHEDULE_ACTIONS, Protocol
from server.rules.book import RuleBook

PARALLEL_FROM = 40  # animals; below this a process pool costs more than it saves


@dataclass(frozen=True)
class Animal:
    index: int
    session_seed: int
    agent_seed: int


def cohort(seed: int, n: int) -> list[Animal]:
    children = np.random.SeedSequence(seed).spawn(n)
    animals = []
    for i, child in enumerate(children):
        a, b = child.generate_state(2, dtype=np.uint64)
        animals.append(Animal(i, int(a >> np.uint64(1)), int(b >> np.uint64(1))))
    return animals


def has_performance_criterion(protocol: Protocol) -> bool:
    """Whether the protocol can reach a criterion: a block ending on performance, or a rule
    that changes the schedule (reversal, block switch, probe, end of session)."""
    blocks = any(b.until.streak is not None or b.until.accuracy is not None for b in protocol.blocks)
    rules = any(a.kind in SCHEDULE_ACTIONS for r in protocol.rules for a in r.actions)
    return blocks or rules


def rehearse_one(protocol: Protocol, animal: Animal, agent: str, options: dict[str, Any], caps: HardCaps) -> dict:
    from hardware_stubs.agents import make_agent
    from hardware_stubs.emulated_box import EmulatedBox

    session = build_session(protocol, animal.session_seed, caps, log_events=False)
    box = EmulatedBox(protocol.wiring, make_agent(agent, **options), np.random.default_rng(animal.agent_seed))
    run_virtual(session, box)
    criterion = has_performance_criterion(protocol)
    blocks = [
        {"block": name, "trials": trials, "ended_by": why}
        for name, trials, why in session.block_log
    ]
    return {
        "animal": f"virtual-{animal.index + 1:04d}",
        "agent": agent,
        "trials": session.trials_done,
        "rewards": session.rewards,
        "duration_s": round(_end_time(session), 3),
        "blocks": blocks,
        "criterion_reached": (session.first_criterion_trial is not None) if criterion else None,
        "trials_to_criterion": session.first_criterion_trial,
        "end_reason": session.end_reason,
        "reversals": session.reversals,
        "rule_firings": rule_firings(session),
    }


def rule_firings(session: Session) -> dict[str, int]:
    counts: dict[str, int] = {}
    for observer in session.observers:
        if isinstance(observer, RuleBook):
            counts.update(observer.firings())
    return counts


def _end_time(session: Session) -> float:
    return session.ended_at if session.ended_at is not None else 0.0


def _run_chunk(args) -> list[dict]:
    protocol, animals, agent, options, caps = args
    return [rehearse_one(protocol, a, agent, options, caps) for a in animals]


def rehearse(
    protocol: Protocol,
    n_animals: int,
    seed: int,
    agent: str = "q_learner",
    options: dict[str, Any] | None = None,
    caps: HardCaps = HardCaps(),
    *,
    workers: int | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> dict:
    options = options or {}
    animals = cohort(seed, n_animals)
    workers = workers or (min(os.cpu_count() or 1, 8) if n_animals >= PARALLEL_FROM else 1)
    results: list[dict] = []
    if workers <= 1:
        for animal in animals:
            results.append(rehearse_one(protocol, animal, agent, options, caps))
            if progress:
                progress(len(results), n_animals)
    else:
        size = max(1, min(25, n_animals // (workers * 4) or 1))
        chunks = [animals[i : i + size] for i in range(0, n_animals, size)]
        with ProcessPoolExecutor(workers) as pool:
            for part in pool.map(_run_chunk, [(protocol, c, agent, options, caps) for c in chunks]):
                results.extend(part)
                if progress:
                    progress(len(results), n_animals)
    return {
        "protocol": protocol.name,
        "seed": seed,
        "animals": results,
        "summary": summarise(results, has_performance_criterion(protocol)),
    }


def _spread(values: list[float]) -> dict[str, float | None]:
    if not values:
        return {"median": None, "q1": None, "q3": None}
    q1, med, q3 = np.percentile(np.asarray(values, dtype=float), [25, 50, 75])
    return {"median": round(float(med), 3), "q1": round(float(q1), 3), "q3": round(float(q3), 3)}


def summarise(results: list[dict], criterion: bool) -> dict:
    reached = [r["trials_to_criterion"] for r in results if r["trials_to_criterion"] is not None]
    return {
        "animals": len(results),
        "trials": _spread([r["trials"] for r in results]),
        "rewards": _spread([r["rewards"] for r in results]),
        "duration_s": _spread([r["duration_s"] for r in results]),
        "trials_to_criterion": _spread(reached) if criterion else None,
        "fraction_never_reaching_criterion": (
            round(1 - len(reached) / len(results), 4) if criterion and results else None
        ),
    }


def progress_bar(stream=sys.stderr) -> Callable[[int, int], None] | None:
    if not stream.isatty():
        return None

    def show(done: int, total: int) -> None:
        width = 30
        filled = width * done // max(total, 1)
        stream.write(f"\r[{'#' * filled}{'.' * (width - filled)}] {done}/{total} animals")
        if done == total:
            stream.write("\n")
        stream.flush()

    return show


def human_report(result: dict) -> str:
    s = result["summary"]
    lines = [f"protocol '{result['protocol']}', seed {result['seed']}, {s['animals']} virtual animals", ""]
    lines.append(f"{'animal':<14}{'trials':>7}{'rewards':>9}{'minutes':>9}  criterion  end")
    for r in result["animals"]:
        crit = "-" if r["criterion_reached"] is None else (f"trial {r['trials_to_criterion']}" if r["criterion_reached"] else "never")
        lines.append(
            f"{r['animal']:<14}{r['trials']:>7}{r['rewards']:>9}{r['duration_s'] / 60:>9.1f}  {crit:<10} {r['end_reason']}"
        )
    lines.append("")

    def fmt(spread: dict | None, scale: float = 1.0) -> str:
        if not spread or spread["median"] is None:
            return "-"
        return f"median {spread['median'] / scale:.1f} (IQR {spread['q1'] / scale:.1f}-{spread['q3'] / scale:.1f})"

    lines.append(f"trials per session   {fmt(s['trials'])}")
    lines.append(f"rewards per session  {fmt(s['rewards'])}")
    lines.append(f"session minutes      {fmt(s['duration_s'], 60.0)}")
    if s["trials_to_criterion"] is not None:
        lines.append(f"trials to criterion  {fmt(s['trials_to_criterion'])}")
        lines.append(f"never reached        {s['fraction_never_reaching_criterion']:.0%} of animals")
    return "\n".join(lines)
