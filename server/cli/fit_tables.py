"""What `vigil fit` prints: fit tables, model comparisons, their JSON, shared by the
single-stage (server/cli/fit.py) and two-stage (server/cli/fit_two_stage.py) paths."""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Protocol, TextIO, TypeVar

from server.cli.fit_sources import FitInputError
from server.models.comparison import Comparison
from server.models.fitting import FitResult


class _Named(Protocol):
    @property
    def animal(self) -> str: ...
    @property
    def n_choices(self) -> int: ...


A = TypeVar("A", bound=_Named)


def select(animals: list[A], wanted: Sequence[str] | None, source: str) -> list[A]:
    """The animals named (in that order, once each), or all of them."""
    if not wanted:
        return animals
    by_name = {a.animal: a for a in animals}
    for name in wanted:
        if name not in by_name:
            raise FitInputError(f"{source}: no trials for animal {name!r}")
    return [by_name[name] for name in dict.fromkeys(wanted)]


def clean(obj):
    """JSON has no NaN or infinity: turn them into null."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [clean(v) for v in obj]
    return obj


def comparison_json(comparison: Comparison) -> list[dict]:
    rows = []
    for i in range(len(comparison.animals)):
        for rank, fit in enumerate(comparison.ranking(i), 1):
            rows.append(clean({**fit.to_dict(), "rank": rank}))
    for rank, (name, bic) in enumerate(comparison.totals(), 1):
        fits = comparison.fits[name]
        ll = sum(f.loglik for f in fits)
        rows.append(
            clean(
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


def num(x: float | None, digits: int = 4) -> str:
    if x is None or not math.isfinite(x):
        return "-"
    return f"{x:.{digits}g}"


def print_table(rows: list[list[str]], out: TextIO) -> None:
    widths = [max(len(r[c]) for r in rows) for c in range(len(rows[0]))]
    for r in rows:
        print("  ".join(cell.ljust(w) for cell, w in zip(r, widths)).rstrip(), file=out)


def print_fits(fits: list[FitResult], out: TextIO) -> None:
    first = fits[0]
    kind = "MAP under the declared priors" if first.objective == "map" else "maximum likelihood"
    print(f"{first.model} ({kind}); intervals are Wald 95 % from the observed information", file=out)
    names = list(first.params)
    rows = [["animal", "trials", "loglik", "AIC", "BIC"] + names]
    for f in fits:
        cells = [f.animal, str(f.n_trials), num(f.loglik, 6), num(f.aic, 6), num(f.bic, 6)]
        for name in names:
            iv = f.intervals.get(name)
            span = f" [{num(iv[0], 3)}, {num(iv[1], 3)}]" if iv else ""
            cells.append(num(f.params[name]) + span)
        rows.append(cells)
    print_table(rows, out)


def print_comparison(comparison: Comparison, out: TextIO) -> None:
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
                    num(f.bic, 6),
                    num(f.bic - ranked[0].bic, 3),
                    num(f.loglik, 6),
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
                num(bic, 6),
                num(bic - totals[0][1], 3),
                num(sum(f.loglik for f in comparison.fits[name]), 6),
                "",
                "",
            ]
        )
    print_table(rows, out)


def with_choices(animals: list[A], err: TextIO) -> list[A]:
    """The animals that made a choice; the others are named on `err` as skipped."""
    usable = []
    for a in animals:
        if a.n_choices == 0:
            print(f"vigil fit: animal {a.animal} has no choice trials; skipped", file=err)
        else:
            usable.append(a)
    return usable


def write_or_fail(path: str | None, write: Callable[[str], None], fail: Callable[[str, int], int]) -> int:
    """Write `path` (when given) with `write`; 0, or `fail`'s code on an OSError."""
    if path:
        try:
            write(path)
        except OSError as exc:
            return fail(f"cannot write {path}: {exc.strerror or exc}", 1)
    return 0
