"""Pure-numpy recursive weighted least squares for sensor monitoring (no I/O)."""

from estimator.channels.bank_state import export_state, import_state
from estimator.channels.channel import WEIGHTINGS, ChannelSettings, Sample, SampleOutcome, Weighting, WeightRule
from estimator.channels.channel_bank import ChannelBank, ChannelBankState, ChannelEvent, ChannelView, ViewBlock
from estimator.channels.channel_group import GroupState, LaneState
from estimator.channels.group_watch import WatchState
from estimator.channels.regressors import (
    BuilderState,
    Factor,
    NotUsable,
    RegressorBuilder,
    RegressorSpec,
    Term,
    parse_term,
)
from estimator.channels.sample_columns import AppliedRows, ColumnsOutcome, SampleColumns
from estimator.detection.baseline import Baseline
from estimator.detection.detectors import DEFAULT_TIMING, ConditionTiming, DetectorKind, DetectorSettings, DetectorState
from estimator.detection.detectors import KINDS as DETECTOR_KINDS
from estimator.detection.quantiles import chi2_quantile, student_t_quantile
from estimator.detection.run_length import offset_arl, threshold_for_arl, variance_arl, variance_reference
from estimator.noise.log_variance import LogVarianceModel, LogVarianceState
from estimator.noise.variance import NoiseVarianceTracker, TrackerState
from estimator.recursive.batch import BatchFit, NotIdentifiable, fit_wls
from estimator.recursive.rwls import BankState, RecursiveWLSBank, SampleRefused, UpdateResult
from estimator.recursive.sample_refusal import SampleRefusal
from estimator.recursive.statistics import CONDITION_LIMIT, ChannelStatistics, bank_statistics
from estimator.recursive.weight_rule import sigma_is_usable, usable_sigmas, usable_weights, weight_is_usable

__all__ = [
    "CONDITION_LIMIT",
    "DEFAULT_TIMING",
    "DETECTOR_KINDS",
    "WEIGHTINGS",
    "AppliedRows",
    "BankState",
    "Baseline",
    "BatchFit",
    "BuilderState",
    "ChannelBank",
    "ChannelBankState",
    "ChannelEvent",
    "ChannelSettings",
    "ChannelStatistics",
    "ChannelView",
    "ColumnsOutcome",
    "ConditionTiming",
    "DetectorKind",
    "DetectorSettings",
    "DetectorState",
    "Factor",
    "GroupState",
    "LaneState",
    "LogVarianceModel",
    "LogVarianceState",
    "NoiseVarianceTracker",
    "NotIdentifiable",
    "NotUsable",
    "RecursiveWLSBank",
    "RegressorBuilder",
    "RegressorSpec",
    "Sample",
    "SampleColumns",
    "SampleOutcome",
    "SampleRefusal",
    "SampleRefused",
    "Term",
    "TrackerState",
    "UpdateResult",
    "ViewBlock",
    "WatchState",
    "WeightRule",
    "Weighting",
    "bank_statistics",
    "chi2_quantile",
    "export_state",
    "fit_wls",
    "import_state",
    "offset_arl",
    "parse_term",
    "sigma_is_usable",
    "student_t_quantile",
    "threshold_for_arl",
    "usable_sigmas",
    "usable_weights",
    "variance_arl",
    "variance_reference",
    "weight_is_usable",
]
