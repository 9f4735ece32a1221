"""Pure numerics: joint cross-validated tuning of basis and penalty strength. No HTTP, database or files."""

from .model import FittedModel
from .spec import TuneSpec, parse_spec
from .result import TuneResult
from .tune import Budget, check_budget, load_model, tune

__all__ = ["Budget", "FittedModel", "TuneResult", "TuneSpec", "check_budget", "load_model", "parse_spec", "tune"]
