"""`vigil fit`: fit choice models to recorded trials, compare them, export regressors.

`vigil` (server/cli/__init__.py) builds the sub-parser with `add_arguments` and calls
`run(args)`, which returns the exit code: 0 done, 1 unreadable input or nothing to fit,
2 usage error. Every error is one line on stderr, never a traceback.
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import sys
from collections.abc import Sequence
from typing import TextIO

from server.cli import fit_two_stage
from server.cli.fit_sources import FitInputError, csv_kind, read_history, read_trials_csv, read_trials_db
from server.cli.fit_tables import (
    clean,
    comparison_json,
    print_comparison,
    print_fits,
    select,
    with_choices,
    write_or_fail,
)
from server.models.batch import ValueSettings
from server.models.choice import CHOICE_MODELS, get_choice_model
from server.models.comparison import compare_models, regressors
from server.models.fitting import FitResult, fit_animals
from server.models.trials import AnimalTrials
from server.models.two_stage import TWO_STAGE_MODELS

PROG = "vigil fit"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.description = (
        "Fit a learning model to each animal's choices (maximum likelihood, or MAP with "
        "--map) from a trials CSV (header animal,session,trial,choice,reward; empty choice "
        "= omission), a two-stage trials CSV (header "
        "animal,session,trial,choice,transition,state,choice2,reward; transition common or "
        "rare, choice2 empty where the second stage offers no choice), or from the session database."
    )
    parser.add_argument("trials", nargs="?", metavar="TRIALS.csv", help="trials CSV file")
    parser.add_argument("--db", metavar="PATH", help="read trials from a Vigil database")
    parser.add_argument(
        "--animal", action="append", metavar="ID", help="fit only this animal (repeatable; default: every animal)"
    )
    parser.add_argument(
        "--model",
        metavar="NAME",
        help=f"one of {', '.join(CHOICE_MODELS)} (default q_learning); on two-stage trials one of "
        f"{', '.join(TWO_STAGE_MODELS)} (default hybrid)",
    )
    parser.add_argument("--json", action="store_true", help="print results as JSON")
    parser.add_argument("--map", action="store_true", help="maximise the posterior under the models' declared priors")
    parser.add_argument(
        "--compare", action="store_true", help="fit every choice model (or every two-stage model) and rank them by BIC"
    )
    parser.add_argument(
        "--regressors",
        metavar="OUT.csv",
        help="write per-trial values, choice probabilities and prediction errors at the fitted parameters",
    )
    parser.add_argument("--carry-values", action="store_true", help="keep learned values from one session to the next")
    parser.add_argument(
        "--common-probability",
        type=float,
        metavar="P",
        help="two-stage trials: P(common transition) the model-based system assumes "
        "(default: the share of common transitions in the file)",
    )
    parser.add_argument(
        "--stay-lags",
        type=int,
        default=1,
        metavar="N",
        help="two-stage trials: past trials in the stay regression (default 1)",
    )


def run(args: argparse.Namespace, out: TextIO | None = None, err: TextIO | None = None) -> int:
    out = out or sys.stdout
    err = err or sys.stderr

    def fail(message: str, code: int) -> int:
        print(f"{PROG}: {message}", file=err)
        return code

    if bool(args.trials) == bool(args.db):
        return fail("give a trials CSV or --db PATH (one of the two)", 2)
    if args.trials and csv_kind(args.trials) == "two_stage":
        return fit_two_stage.run(args, out, err, fail)
    found = None
    if args.db:
        try:
            found = read_history(args.db, args.animal, two_stage=True)
        except FitInputError as exc:
            return fail(str(exc), 1)
        two_stage = {p.session_id for p in found if p.second is not None}
        if two_stage:
            others = {p.session_id for p in found} - two_stage
            if others:
                print(f"{PROG}: {len(others)} single-stage session(s) left out; fitting two-stage sessions", file=err)
            return fit_two_stage.run(args, out, err, fail, [p for p in found if p.session_id in two_stage])
    if args.model in TWO_STAGE_MODELS:
        return fail(f"{args.model} is a two-stage model; these trials have a single stage", 2)
    if args.common_probability is not None or args.stay_lags != 1:
        return fail("--common-probability and --stay-lags apply to two-stage trials only", 2)
    if not args.compare:
        try:
            model = get_choice_model(args.model or "q_learning")
        except ValueError as exc:
            return fail(str(exc), 2)
    try:
        animals = (
            read_trials_db(args.db, args.animal, found)
            if args.db
            else select(read_trials_csv(args.trials), args.animal, args.trials)
        )
    except FitInputError as exc:
        return fail(str(exc), 1)
    usable = with_choices(animals, err)
    if not usable:
        return fail("nothing to fit", 1)
    values = ValueSettings(carry_values=args.carry_values)
    if args.compare:
        comparison = compare_models(usable, use_prior=args.map, values=values)
        best = [comparison.best(i) for i in range(len(usable))]
        if args.json:
            print(json.dumps(comparison_json(comparison)), file=out)
        else:
            print_comparison(comparison, out)
    else:
        best = fit_animals(model, usable, use_prior=args.map, values=values)
        if args.json:
            print(json.dumps([clean(f.to_dict()) for f in best]), file=out)
        else:
            print_fits(best, out)
    return write_or_fail(args.regressors, lambda path: _write_regressors(path, usable, best, values), fail)


def _write_regressors(path: str, animals: list[AnimalTrials], fits: list[FitResult], values: ValueSettings) -> None:
    labels = list(dict.fromkeys(lab for a in animals for lab in a.options))
    header = (
        ["animal", "session", "trial", "model", "choice", "reward"]
        + [f"value_{lab}" for lab in labels]
        + [f"p_{lab}" for lab in labels]
        + ["prediction_error"]
    )
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow(header)
        for a, fit in zip(animals, fits):
            reg = regressors(CHOICE_MODELS[fit.model], a, fit.params, values)
            col = {lab: j for j, lab in enumerate(a.options)}
            for t in range(len(a.choice)):
                c = a.choice[t]
                row = [
                    a.animal,
                    a.session[t],
                    a.trial[t],
                    fit.model,
                    a.options[c] if c >= 0 else "",
                    repr(float(a.reward[t])),
                ]
                row += [repr(float(reg.values[t, col[lab]])) if lab in col else "" for lab in labels]
                row += [repr(float(reg.p_choice[t, col[lab]])) if lab in col else "" for lab in labels]
                pe = reg.prediction_error[t]
                row.append("" if math.isnan(pe) else repr(float(pe)))
                writer.writerow(row)


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog=PROG)
    add_arguments(parser)
    return run(parser.parse_args(argv))


if __name__ == "__main__":
    sys.exit(main())
