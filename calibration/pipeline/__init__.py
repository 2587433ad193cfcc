"""Orchestration: validated data -> checks -> DIF -> calibration -> quality -> an unpublished bundle.

No numerics live here. Rooms: ``settings`` (run settings, size floors, vocabulary), ``prepare``
(checks, category merging), ``policy`` (:class:`PolicyTable`), ``dif`` (the DIF stage and its
rows), ``invariance`` (the ladder), ``quality``, ``build`` (bundle assembly) and ``calibrate``
(:func:`calibrate_data`, which only orders the steps).
"""

from calibration.errors import CalibrationInputError
from calibration.pipeline.calibrate import CalibrationOutcome, calibrate_data
from calibration.pipeline.policy import PolicyTable
from calibration.pipeline.prepare import PreparedData, collapse_sparse_categories, prepare_data, small_group_notes
from calibration.pipeline.settings import (
    HARD_MIN_PER_GROUP,
    HARD_MIN_RESPONDENTS,
    MIN_CATEGORY_COUNT,
    RECOMMENDED_MIN_RESPONDENTS,
    SINGLE_GROUP,
    PipelineSettings,
    PolicyOverride,
)
from calibration.vocabulary import DIF_ACTIONS, POLICY_STATUSES

__all__ = [
    "DIF_ACTIONS",
    "HARD_MIN_PER_GROUP",
    "HARD_MIN_RESPONDENTS",
    "MIN_CATEGORY_COUNT",
    "POLICY_STATUSES",
    "RECOMMENDED_MIN_RESPONDENTS",
    "SINGLE_GROUP",
    "CalibrationInputError",
    "CalibrationOutcome",
    "PipelineSettings",
    "PolicyOverride",
    "PolicyTable",
    "PreparedData",
    "calibrate_data",
    "collapse_sparse_categories",
    "prepare_data",
    "small_group_notes",
]
