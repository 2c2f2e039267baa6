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
from .two_stage import HYBRID_PARAMS, TWO_STAGE_MODELS, TwoStageModel, TwoStageTask, get_two_stage_model, hybrid_step
from .two_stage_fit import fit_two_stage, two_stage_regressors
from .two_stage_trials import TwoStageRow, TwoStageTrials, encode_two_stage

__all__ = [
    "AnimalTrials",
    "CHOICE_MODELS",
    "ChoiceModel",
    "Comparison",
    "Estimate",
    "FitResult",
    "HYBRID_PARAMS",
    "OnlineEstimator",
    "Param",
    "ParamError",
    "ParamEstimate",
    "Prior",
    "RESCORLA_WAGNER",
    "TWO_STAGE_MODELS",
    "TwoStageModel",
    "TwoStageRow",
    "TwoStageTask",
    "TwoStageTrials",
    "Regressors",
    "ValueSettings",
    "compare_models",
    "encode_animal",
    "encode_two_stage",
    "fit_animals",
    "fit_two_stage",
    "get_two_stage_model",
    "hybrid_step",
    "get_choice_model",
    "regressors",
    "response_probability",
    "rw_session",
    "rw_update",
    "two_stage_regressors",
]
