"""`vigil fit` on two-stage trials: the hybrid model and its variants, the stay analysis,
and per-trial regressors (server/cli/fit.py hands a two-stage CSV over to `run`)."""

from __future__ import annotations

import argparse
import csv
import json
import math
from collections.abc import Callable
from typing import TextIO

from server.cli.fit_sources import FitInputError
from server.cli.fit_tables import (
    clean,
    comparison_json,
    num,
    print_comparison,
    print_fits,
    print_table,
    select,
    with_choices,
    write_or_fail,
)
from server.cli.two_stage_sources import read_two_stage_csv, read_two_stage_db
from server.engine.stay import CONDITION_NAMES, StayAnalysis
from server.models.batch import ValueSettings
from server.models.choice import CHOICE_MODELS
from server.models.comparison import compare_models
from server.models.fitting import FitResult
from server.models.two_stage import TWO_STAGE_MODELS, get_two_stage_model
from server.models.two_stage_fit import fit_two_stage, two_stage_regressors
from server.models.two_stage_trials import TwoStageTrials
from server.store.history import PastTrial


def run(
    args: argparse.Namespace,
    out: TextIO,
    err: TextIO,
    fail: Callable[[str, int], int],
    stored: list[PastTrial] | None = None,
) -> int:
    """Fit the two-stage CSV `args.trials`, or the `stored` trials of `args.db`."""
    name = args.model or "hybrid"
    if name in CHOICE_MODELS:
        return fail(f"{name} is a single-stage model; two-stage trials take {', '.join(TWO_STAGE_MODELS)}", 2)
    if not args.compare:
        try:
            model = get_two_stage_model(name)
        except ValueError as exc:
            return fail(str(exc), 2)
    p_common = args.common_probability
    if p_common is not None and not (0.5 < p_common <= 1.0):
        return fail(f"--common-probability must be in (0.5, 1], got {p_common:g}", 2)
    if args.stay_lags < 1:
        return fail(f"--stay-lags must be 1 or more, got {args.stay_lags}", 2)
    try:
        if stored is not None:
            animals = read_two_stage_db(args.db, args.animal, p_common, stored)
        else:
            animals = select(read_two_stage_csv(args.trials, p_common), args.animal, args.trials)
    except FitInputError as exc:
        return fail(str(exc), 1)
    usable = with_choices(animals, err)
    if not usable:
        return fail("nothing to fit", 1)
    values = ValueSettings(carry_values=args.carry_values)
    stay = {a.animal: a.stay(args.stay_lags) for a in usable}
    if args.compare:
        comparison = compare_models(usable, use_prior=args.map, values=values)
        best = [comparison.best(i) for i in range(len(usable))]
        if args.json:
            rows = comparison_json(comparison)
            for r in rows:
                if r["animal"] is not None:
                    r["stay"] = clean(stay[r["animal"]].to_dict())
            print(json.dumps(rows), file=out)
        else:
            print_comparison(comparison, out)
    else:
        best = fit_two_stage(model, usable, use_prior=args.map, values=values)
        if args.json:
            print(json.dumps([clean({**f.to_dict(), "stay": stay[f.animal].to_dict()}) for f in best]), file=out)
        else:
            print_fits(best, out)
    if not args.json:
        t = usable[0].task.transitions
        given = "given" if p_common is not None else "the file's share of common transitions"
        print(f"\nmodel-based transition model: P(common) = {num(float(t.max(1).min()), 4)} ({given})", file=out)
        print_stay(stay, out)
    return write_or_fail(args.regressors, lambda path: write_regressors(path, usable, best, values), fail)


def print_stay(stay: dict[str, StayAnalysis], out: TextIO) -> None:
    print("\nstay analysis: P(repeat the first-stage choice) after each kind of trial (Wilson 95 %)", file=out)
    rows = [["animal", "after", "n", "P(stay)", "interval"]]
    for animal, s in stay.items():
        for key, c in s.counts.items():
            iv = c.interval
            span = f"[{num(iv[0], 3)}, {num(iv[1], 3)}]" if iv else "-"
            rows.append([animal, CONDITION_NAMES[key], str(c.pairs), num(c.p, 3), span])
    print_table(rows, out)
    print("\nlogistic regression of stay (reward and transition coded +1/-1; Wald SE, two-sided p)", file=out)
    rows = [["animal", "term", "estimate", "SE", "z", "p", "n"]]
    for animal, s in stay.items():
        reg = s.regression
        if reg is None:
            rows.append([animal, "(too few trials)", "", "", "", "", ""])
            continue
        note = "" if reg.converged else " (not converged: separation?)"
        for k in reg.coefficients:
            rows.append(
                [animal, k.name + note, num(k.estimate), num(k.se, 3), num(k.z, 3), num(k.p_value, 3), str(reg.n)]
            )
    print_table(rows, out)


def write_regressors(path: str, animals: list[TwoStageTrials], fits: list[FitResult], values: ValueSettings) -> None:
    task = animals[0].task
    first = list(task.first)
    slots = [(si, bi, f"{s}_{o}") for si, s in enumerate(task.states) for bi, o in enumerate(task.options[si] or ("",))]
    header = (
        ["animal", "session", "trial", "model", "choice", "transition", "state", "choice2", "reward"]
        + [f"q_mf_{a}" for a in first]
        + [f"q_mb_{a}" for a in first]
        + [f"q_net_{a}" for a in first]
        + [f"p_{a}" for a in first]
        + [f"q2_{label.rstrip('_')}" for _, _, label in slots]
        + ["delta1", "delta2", "loglik"]
    )

    def cell(x: float) -> str:
        return "" if math.isnan(x) else repr(float(x))

    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow(header)
        for a, fit in zip(animals, fits):
            reg = two_stage_regressors(TWO_STAGE_MODELS[fit.model], a, fit.params, values)
            for t, r in enumerate(a.rows):
                transition = "" if r.common is None else ("common" if r.common else "rare")
                row = [a.animal, r.session, r.trial, fit.model, r.choice or "", transition, r.state or ""]
                row += [r.choice2 or "", repr(float(r.reward))]
                for arr in (reg.q_mf, reg.q_mb, reg.q_net, reg.p_first):
                    row += [cell(v) for v in arr[t]]
                row += [cell(reg.q2[t, si, bi]) for si, bi, _ in slots]
                row += [cell(reg.delta1[t]), cell(reg.delta2[t]), cell(reg.loglik[t])]
                writer.writerow(row)
