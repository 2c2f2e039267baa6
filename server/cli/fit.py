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

from server.cli.fit_sources import FitInputError, read_trials_csv, read_trials_db
from server.models.batch import ValueSettings
from server.models.choice import CHOICE_MODELS, get_choice_model
from server.models.comparison import Comparison, compare_models, regressors
from server.models.fitting import FitResult, fit_animals
from server.models.trials import AnimalTrials

PROG = "vigil fit"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.description = (
        "Fit a learning model to each animal's choices (maximum likelihood, or MAP with "
        "--map) from a trials CSV (header animal,session,trial,choice,reward; empty choice "
        "= omission) or from the session database."
    )
    parser.add_argument("trials", nargs="?", metavar="TRIALS.csv", help="trials CSV file")
    parser.add_argument("--db", metavar="PATH", help="read trials from a Vigil database")
    parser.add_argument(
        "--animal", action="append", metavar="ID", help="fit only this animal (repeatable; default: every animal)"
    )
    parser.add_argument(
        "--model", default="q_learning", metavar="NAME", help=f"one of {', '.join(CHOICE_MODELS)} (default q_learning)"
    )
    parser.add_argument("--json", action="store_true", help="print results as JSON")
    parser.add_argument("--map", action="store_true", help="maximise the posterior under the models' declared priors")
    parser.add_argument("--compare", action="store_true", help="fit every choice model and rank them by BIC")
    parser.add_argument(
        "--regressors",
        metavar="OUT.csv",
        help="write per-trial values, choice probabilities and prediction errors at the fitted parameters",
    )
    parser.add_argument("--carry-values", action="store_true", help="keep learned values from one session to the next")


def run(args: argparse.Namespace, out: TextIO | None = None, err: TextIO | None = None) -> int:
    out = out or sys.stdout
    err = err or sys.stderr

    def fail(message: str, code: int) -> int:
        print(f"{PROG}: {message}", file=err)
        return code

    if bool(args.trials) == bool(args.db):
        return fail("give a trials CSV or --db PATH (one of the two)", 2)
    if not args.compare:
        try:
            model = get_choice_model(args.model)
        except ValueError as exc:
            return fail(str(exc), 2)
    try:
        animals = (
            read_trials_db(args.db, args.animal)
            if args.db
            else _select(read_trials_csv(args.trials), args.animal, args.trials)
        )
    except FitInputError as exc:
        return fail(str(exc), 1)
    usable = []
    for a in animals:
        if a.n_choices == 0:
            print(f"{PROG}: animal {a.animal} has no choice trials; skipped", file=err)
        else:
            usable.append(a)
    if not usable:
        return fail("nothing to fit", 1)
    values = ValueSettings(carry_values=args.carry_values)
    if args.compare:
        comparison = compare_models(usable, use_prior=args.map, values=values)
        best = [comparison.best(i) for i in range(len(usable))]
        if args.json:
            print(json.dumps(_comparison_json(comparison)), file=out)
        else:
            _print_comparison(comparison, out)
    else:
        best = fit_animals(model, usable, use_prior=args.map, values=values)
        if args.json:
            print(json.dumps([_clean(f.to_dict()) for f in best]), file=out)
        else:
            _print_fits(best, out)
    if args.regressors:
        try:
            _write_regressors(args.regressors, usable, best, values)
        except OSError as exc:
            return fail(f"cannot write {args.regressors}: {exc.strerror or exc}", 1)
    return 0


def _select(animals: list[AnimalTrials], wanted: Sequence[str] | None, source: str) -> list[AnimalTrials]:
    if not wanted:
        return animals
    by_name = {a.animal: a for a in animals}
    for name in wanted:
        if name not in by_name:
            raise FitInputError(f"{source}: no trials for animal {name!r}")
    return [by_name[name] for name in dict.fromkeys(wanted)]


def _clean(obj):
    """JSON has no NaN or infinity: turn them into null."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    return obj


def _comparison_json(comparison: Comparison) -> list[dict]:
    rows = []
    for i in range(len(comparison.animals)):
        for rank, fit in enumerate(comparison.ranking(i), 1):
            rows.append(_clean({**fit.to_dict(), "rank": rank}))
    for rank, (name, bic) in enumerate(comparison.totals(), 1):
        fits = comparison.fits[name]
        ll = sum(f.loglik for f in fits)
        rows.append(
            _clean(
                {
                    "animal": None,
                    "model": name,
                    "params": {},
                    "loglik": ll,
                    "n_trials": sum(f.n_trials for f in fits),
                    "aic": sum(f.aic for f in fits),
                    "bic": bic,
                    "rank": rank,
                }
            )
        )
    return rows


def _num(x: float | None, digits: int = 4) -> str:
    if x is None or not math.isfinite(x):
        return "-"
    return f"{x:.{digits}g}"


def _print_table(rows: list[list[str]], out: TextIO) -> None:
    widths = [max(len(r[c]) for r in rows) for c in range(len(rows[0]))]
    for r in rows:
        print("  ".join(cell.ljust(w) for cell, w in zip(r, widths)).rstrip(), file=out)


def _print_fits(fits: list[FitResult], out: TextIO) -> None:
    first = fits[0]
    kind = "MAP under the declared priors" if first.objective == "map" else "maximum likelihood"
    print(f"{first.model} ({kind}); intervals are Wald 95 % from the observed information", file=out)
    names = list(first.params)
    rows = [["animal", "trials", "loglik", "AIC", "BIC"] + names]
    for f in fits:
        cells = [f.animal, str(f.n_trials), _num(f.loglik, 6), _num(f.aic, 6), _num(f.bic, 6)]
        for name in names:
            iv = f.intervals.get(name)
            span = f" [{_num(iv[0], 3)}, {_num(iv[1], 3)}]" if iv else ""
            cells.append(_num(f.params[name]) + span)
        rows.append(cells)
    _print_table(rows, out)


def _print_comparison(comparison: Comparison, out: TextIO) -> None:
    print("model comparison by BIC (lower is better)", file=out)
    rows = [["animal", "rank", "model", "BIC", "dBIC", "loglik", "k", "trials"]]
    for i, animal in enumerate(comparison.animals):
        ranked = comparison.ranking(i)
        for rank, f in enumerate(ranked, 1):
            rows.append(
                [
                    animal,
                    str(rank),
                    f.model,
                    _num(f.bic, 6),
                    _num(f.bic - ranked[0].bic, 3),
                    _num(f.loglik, 6),
                    str(f.k),
                    str(f.n_trials),
                ]
            )
    totals = comparison.totals()
    for rank, (name, bic) in enumerate(totals, 1):
        rows.append(
            [
                "(all)",
                str(rank),
                name,
                _num(bic, 6),
                _num(bic - totals[0][1], 3),
                _num(sum(f.loglik for f in comparison.fits[name]), 6),
                "",
                "",
            ]
        )
    _print_table(rows, out)


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
