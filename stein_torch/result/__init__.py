"""What a run returns (:class:`Result`), its InferenceData, predictions and files."""

from .predictive import PredictiveBands, predictive_interval
from .predictive_checks import prior_predictive
from .result import Result

__all__ = ["Result", "PredictiveBands", "predictive_interval", "prior_predictive"]
