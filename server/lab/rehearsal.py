"""Rehearsal: run a protocol over a cohort of virtual animals in virtual time.

Each animal's seeds come from `numpy.random.SeedSequence(seed).spawn(n)`, so the result for
animal i does not depend on how many worker processes ran the cohort: the same seed gives
byte-identical output.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from typing import Any, TypedDict

import numpy as np

from server.engine.caps import HardCaps
from server.engine.records import TrialRecord
from server.engine.session import Session
from server.engine.virtual import run_virtual
from server.lab.assembly import build_session
from server.lab.population import Population, Spread
from server.protocol.model import SCHEDULE_ACTIONS, Protocol
from server.store.history import PastTrial

PARALLEL_FROM = 40  # animals; below this a process pool costs more than it saves


@dataclass(frozen=True)
class Animal:
    index: int
    session_seed: int
    agent_seed: int
    params_seed: int


class _BlockRun(TypedDict):
    block: str
    trials: int
    ended_by: str | None


class _Day(TypedDict):
    """One session of one animal; the result lists these (without blocks) when there are several."""

    trials: int
    rewards: int
    duration_s: float
    reversals: int
    end_reason: str | None
    blocks: list[_BlockRun]


def cohort(seed: int, n: int) -> list[Animal]:
    children = np.random.SeedSequence(seed).spawn(n)
    animals = []
    for i, child in enumerate(children):
        a, b, c = (int(x >> np.uint64(1)) for x in child.generate_state(3, dtype=np.uint64))
        animals.append(Animal(i, a, b, c))
    return animals


def has_performance_criterion(protocol: Protocol) -> bool:
    """Whether the protocol can reach a criterion: a block ending on performance, or a rule
    that changes the schedule (reversal, block switch, probe, end of session)."""
    blocks = any(b.until.streak is not None or b.until.accuracy is not None for b in protocol.blocks)
    rules = any(a.kind in SCHEDULE_ACTIONS for r in protocol.rules for a in r.actions)
    return blocks or rules


def rehearse_one(
    protocol: Protocol,
    animal: Animal,
    population: Population,
    caps: HardCaps,
    sessions: int = 1,
    closed_loop: bool = True,
    with_log: bool = False,
    with_choices: bool = False,
) -> dict:
    """One virtual animal over `sessions` days: its learned values and the estimator's
    posterior carry from day to day, as they would for a real animal."""
    from hardware_stubs.agents import make_agent
    from hardware_stubs.emulated_box import EmulatedBox

    params = population.draw(np.random.default_rng(animal.params_seed))
    learned: dict = {}
    estimator_state = None
    days: list[_Day] = []
    firings: dict[str, int] = {}
    log: list[dict] = []
    trials_before = 0
    choices: list[PastTrial] = []  # every trial, as `vigil fit` reads them (when asked)
    to_criterion = sessions_to_criterion = None
    for day in range(sessions):
        agent = make_agent(population.agent, **params)
        agent.restore(learned)
        if closed_loop:
            session = build_session(
                protocol, animal.session_seed + day, caps,
                log_events=False, summarise_estimates=False, estimator_state=estimator_state,
            )  # fmt: skip
        else:  # the schedule alone: no estimator, no rules (a speed baseline)
            session = Session(protocol, animal.session_seed + day, caps, log_events=False)
        box = EmulatedBox(protocol.wiring, agent, np.random.default_rng(animal.agent_seed + day))
        if with_choices:
            kept: list[TrialRecord] = []
            run_virtual(session, box, on_records=_trials_into(kept))
            name = f"virtual-{animal.index + 1:04d}"
            choices.extend(PastTrial(name, day + 1, r.trial, r.choice, r.reward, r.omission, r.second) for r in kept)
        else:
            run_virtual(session, box)
        learned = agent.learned_state()
        if session.estimator is not None:
            estimator_state = session.estimator.state_dict()
        counts = session.rules.firings() if session.rules is not None else {}
        for name, count in counts.items():
            firings[name] = firings.get(name, 0) + count
        if with_log:
            log.extend(
                {"session": day + 1, "trial": f.trial, "minute": round(f.t / 60, 2), "rule": f.rule,
                 "actions": list(f.actions), "values": f.values}
                for f in session.rule_firings
            )  # fmt: skip
        if to_criterion is None and session.first_criterion_trial is not None:
            to_criterion = trials_before + session.first_criterion_trial
            sessions_to_criterion = day + 1
        trials_before += session.trials_done
        days.append({
            "trials": session.trials_done,
            "rewards": session.rewards,
            "duration_s": round(_end_time(session), 3),
            "reversals": session.reversals,
            "end_reason": session.end_reason,
            "blocks": [{"block": n, "trials": t, "ended_by": why} for n, t, why in session.block_log],
        })  # fmt: skip
    criterion = has_performance_criterion(protocol)
    result = {
        "animal": f"virtual-{animal.index + 1:04d}",
        "agent": population.agent,
        "params": params,
        "trials": sum(d["trials"] for d in days),
        "rewards": sum(d["rewards"] for d in days),
        "duration_s": round(sum(d["duration_s"] for d in days), 3),
        "blocks": days[0]["blocks"] if sessions == 1 else [b for d in days for b in d["blocks"]],
        "criterion_reached": (to_criterion is not None) if criterion else None,
        "trials_to_criterion": to_criterion,
        "sessions_to_criterion": sessions_to_criterion,
        "end_reason": days[-1]["end_reason"],
        "reversals": sum(d["reversals"] for d in days),
        "rule_firings": firings,
    }
    if session.estimator is not None:  # what the model thinks of the animal at the end
        est = session.estimator.estimate()
        result["estimate"] = {
            name: {"mean": round(p.mean, 6), "low": round(p.low, 6), "high": round(p.high, 6)}
            for name, p in est.params.items()
        }
    if sessions > 1:
        result["sessions"] = [{k: v for k, v in d.items() if k != "blocks"} for d in days]
    if with_log:
        result["firing_log"] = log
    if with_choices:
        result["choices"] = choices
    return result


def _trials_into(kept: list[TrialRecord]) -> Callable[[list], None]:
    """A record sink that keeps a session's whole trials."""

    def keep(records: list) -> None:
        kept.extend(r for r in records if isinstance(r, TrialRecord) and not r.interrupted)

    return keep


def _end_time(session: Session) -> float:
    return session.ended_at if session.ended_at is not None else 0.0


def _run_chunk(args) -> list[dict]:
    protocol, animals, population, caps, sessions, closed_loop, with_log, with_choices = args
    return [rehearse_one(protocol, a, population, caps, sessions, closed_loop, with_log, with_choices) for a in animals]


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
    sessions: int = 1,
    population: Population | None = None,
    closed_loop: bool = True,
    firing_log: bool = False,
    choices: bool = False,
) -> dict:
    """Every virtual animal's sessions; `choices` keeps each one's trials (`"choices"`, as
    `server.store.history.PastTrial`) for an export `vigil fit` reads."""
    if population is None:
        population = Population(agent, {k: Spread("fixed", float(v)) for k, v in (options or {}).items()})
    animals = cohort(seed, n_animals)
    workers = workers or (min(os.cpu_count() or 1, 8) if n_animals * sessions >= PARALLEL_FROM else 1)
    results: list[dict] = []
    if workers <= 1:
        for animal in animals:
            results.append(rehearse_one(protocol, animal, population, caps, sessions, closed_loop, firing_log, choices))
            if progress:
                progress(len(results), n_animals)
    else:
        size = max(1, min(25, n_animals // (workers * 4) or 1))
        chunks = [animals[i : i + size] for i in range(0, n_animals, size)]
        with ProcessPoolExecutor(workers) as pool:
            jobs = [(protocol, c, population, caps, sessions, closed_loop, firing_log, choices) for c in chunks]
            for part in pool.map(_run_chunk, jobs):
                results.extend(part)
                if progress:
                    progress(len(results), n_animals)
    return {
        "protocol": protocol.name,
        "seed": seed,
        "sessions_per_animal": sessions,
        "animals": results,
        "summary": summarise(results, has_performance_criterion(protocol), sessions),
    }


def _spread(values: list[float]) -> dict[str, float | None]:
    if not values:
        return {"median": None, "q1": None, "q3": None}
    q1, med, q3 = np.percentile(np.asarray(values, dtype=float), [25, 50, 75])
    return {"median": round(float(med), 3), "q1": round(float(q1), 3), "q3": round(float(q3), 3)}


def summarise(results: list[dict], criterion: bool, sessions: int = 1) -> dict:
    reached = [r["trials_to_criterion"] for r in results if r["trials_to_criterion"] is not None]
    days = [d for r in results for d in r.get("sessions", [r])]
    firings: dict[str, int] = {}
    for r in results:
        for name, count in r["rule_firings"].items():
            firings[name] = firings.get(name, 0) + count
    return {
        "animals": len(results),
        "trials": _spread([d["trials"] for d in days]),
        "rewards": _spread([d["rewards"] for d in days]),
        "duration_s": _spread([d["duration_s"] for d in days]),
        "reversals_per_session": _spread([d["reversals"] for d in days]),
        "rule_firings": dict(sorted(firings.items())),
        "trials_to_criterion": _spread(reached) if criterion else None,
        "sessions_to_criterion": (
            _spread([r["sessions_to_criterion"] for r in results if r["sessions_to_criterion"] is not None])
            if criterion
            else None
        ),
        "fraction_never_reaching_criterion": (
            round(1 - len(reached) / len(results), 4) if criterion and results else None
        ),
        "recovery": recovery(results),
    }


def recovery(results: list[dict]) -> dict[str, dict[str, float | int | None]]:
    """For each trait the virtual animals drew that the estimator estimates under the same
    name: how the estimates track it (Pearson r of the posterior means against the drawn
    values) and how often the 95 % interval holds the drawn value."""
    out: dict[str, dict[str, float | int | None]] = {}
    names = sorted({n for r in results for n in r.get("estimate", {}) if n in r["params"]})
    for name in names:
        pairs = [(float(r["params"][name]), r["estimate"][name]) for r in results if name in r.get("estimate", {})]
        truth = np.array([t for t, _ in pairs])
        means = np.array([e["mean"] for _, e in pairs])
        covered = sum(e["low"] <= t <= e["high"] for t, e in pairs)
        r_value = None
        if len(pairs) >= 3 and truth.std() > 0 and means.std() > 0:
            r_value = round(float(np.corrcoef(truth, means)[0, 1]), 4)
        out[name] = {"animals": len(pairs), "pearson_r": r_value, "coverage_95": round(covered / len(pairs), 4)}
    return out
