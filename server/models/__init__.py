"""Learning models: what each animal has learned, how fast it learns, how it explores.

Pure numerics, no I/O, no clocks and no database schema: trials come in as data. The
session core calls `OnlineEstimator.update(choice, reward)` after every trial; `vigil fit`
(server/cli/fit.py) reads trials from a CSV or the store and calls `fit_animals`.
"""

from .batch import ValueSettings
from .choice import CHOICE_MODELS, ChoiceModel, get_choice_model
from .comparison import Comparison, Regressors, compare_models, regressors
from .estimator import Estimate, OnlineEstimator, ParamEstimate
from .fitting import FitResult, fit_animals
from .params import Param, ParamError, Prior
from .pavlovian import RESCORLA_WAGNER, response_probability, rw_session, rw_update
from .trials import AnimalTrials, encode_animal

__all__ = [
    "AnimalTrials",
    "CHOICE_MODELS",
    "ChoiceModel",
    "Comparison",
    "Estimate",
    "FitResult",
    "OnlineEstimator",
    "Param",
    "ParamError",
    "ParamEstimate",
    "Prior",
    "RESCORLA_WAGNER",
    "Regressors",
    "ValueSettings",
    "compare_models",
    "encode_animal",
    "fit_animals",
    "get_choice_model",
    "regressors",
    "response_probability",
    "rw_session",
    "rw_update",
]
