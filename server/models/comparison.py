"""Model comparison by BIC, and trial-by-trial regressors at fitted parameters.

BIC is the comparison the lab can read without priors: per animal (which model explains
this animal best) and summed over animals (which model explains the group best). The
regressors are what gets aligned with neural recordings: values, choice probabilities and
prediction errors per trial, computed by the same batch code the fit used.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import cast

import numpy as np

from .batch import ValueSettings, choice_probabilities, value_history
from .choice import CHOICE_MODELS, ChoiceModel, get_choice_model
from .fitting import FitResult, fit_animals
from .trials import AnimalTrials, stack_animals
from .two_stage import TWO_STAGE_MODELS, get_two_stage_model
from .two_stage_fit import fit_two_stage
from .two_stage_trials import TwoStageTrials


@dataclass(frozen=True, slots=True)
class Comparison:
    """Fits of several models to the same animals, ranked by BIC (lower is better)."""

    fits: dict[str, list[FitResult]]  # model name -> one fit per animal, same order

    @property
    def animals(self) -> list[str]:
        first = next(iter(self.fits.values()))
        return [f.animal for f in first]

    def ranking(self, index: int) -> list[FitResult]:
        """One animal's fits, best BIC first."""
        return sorted((fits[index] for fits in self.fits.values()), key=lambda f: f.bic)

    def totals(self) -> list[tuple[str, float]]:
        """(model, BIC summed over animals), best first."""
        sums = {m: float(sum(f.bic for f in fits)) for m, fits in self.fits.items()}
        return sorted(sums.items(), key=lambda kv: kv[1])

    def best(self, index: int) -> FitResult:
        return self.ranking(index)[0]


def compare_models(
    animals: Sequence[AnimalTrials] | Sequence[TwoStageTrials],
    models: Sequence[str] | None = None,
    *,
    use_prior: bool = False,
    values: ValueSettings = ValueSettings(),
) -> Comparison:
    """Fit every choice model (or those named) to every animal; on two-stage animals, the
    two-stage models (model-free, model-based, hybrid)."""
    if animals and isinstance(animals[0], TwoStageTrials):
        two = cast(Sequence[TwoStageTrials], animals)
        return Comparison(
            {
                name: fit_two_stage(get_two_stage_model(name), two, use_prior=use_prior, values=values)
                for name in (models or TWO_STAGE_MODELS)
            }
        )
    one = cast(Sequence[AnimalTrials], animals)
    return Comparison(
        {
            name: fit_animals(get_choice_model(name), one, use_prior=use_prior, values=values)
            for name in (models or CHOICE_MODELS)
        }
    )


@dataclass(frozen=True, slots=True, eq=False)
class Regressors:
    """Model variables per trial: values before the choice, choice probabilities, and the
    prediction error of the outcome (NaN on omissions)."""

    animal: str
    model: str
    options: tuple[str, ...]
    values: np.ndarray  # (trials, options)
    p_choice: np.ndarray  # (trials, options)
    prediction_error: np.ndarray  # (trials,)


def regressors(
    model: ChoiceModel, animal: AnimalTrials, params: Mapping[str, float], values: ValueSettings = ValueSettings()
) -> Regressors:
    theta = model.check(params)
    stack = stack_animals([animal])
    hist, deltas = value_history(model, theta, stack, (), values, keep_delta=True)
    assert deltas is not None  # kept: keep_delta
    probs = choice_probabilities(model, theta, stack, hist)
    pe = np.where(animal.choice >= 0, deltas[:, 0], np.nan)
    return Regressors(animal.animal, model.name, animal.options, hist[:, :, 0].T, probs[:, :, 0].T, pe)
