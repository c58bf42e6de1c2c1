"""Pure-numpy recursive weighted least squares for sensor monitoring (no I/O)."""

from estimator.bank_state import export_state, import_state
from estimator.baseline import Baseline
from estimator.batch import BatchFit, NotIdentifiable, fit_wls
from estimator.channel import ChannelSettings, Sample, SampleOutcome, WeightRule
from estimator.channel_bank import ChannelBank, ChannelEvent, ChannelView
from estimator.detectors import DEFAULT_TIMING, ConditionTiming, DetectorSettings
from estimator.detectors import KINDS as DETECTOR_KINDS
from estimator.log_variance import LogVarianceModel, LogVarianceState
from estimator.quantiles import chi2_quantile, student_t_quantile
from estimator.regressors import Factor, NotUsable, RegressorBuilder, RegressorSpec, Term, parse_term
from estimator.run_length import offset_arl, threshold_for_arl, variance_arl, variance_reference
from estimator.rwls import BankState, RecursiveWLSBank, RejectedSample, UpdateResult
from estimator.sample_columns import SampleColumns
from estimator.statistics import CONDITION_LIMIT, ChannelStatistics, bank_statistics
from estimator.variance import NoiseVarianceTracker, TrackerState

__all__ = [
    "CONDITION_LIMIT",
    "DEFAULT_TIMING",
    "DETECTOR_KINDS",
    "BankState",
    "Baseline",
    "BatchFit",
    "ChannelBank",
    "ChannelEvent",
    "ChannelSettings",
    "ChannelStatistics",
    "ChannelView",
    "ConditionTiming",
    "DetectorSettings",
    "Factor",
    "LogVarianceModel",
    "LogVarianceState",
    "NoiseVarianceTracker",
    "NotIdentifiable",
    "NotUsable",
    "RecursiveWLSBank",
    "RegressorBuilder",
    "RegressorSpec",
    "RejectedSample",
    "Sample",
    "SampleColumns",
    "SampleOutcome",
    "Term",
    "TrackerState",
    "UpdateResult",
    "WeightRule",
    "bank_statistics",
    "chi2_quantile",
    "export_state",
    "fit_wls",
    "import_state",
    "offset_arl",
    "parse_term",
    "student_t_quantile",
    "threshold_for_arl",
    "variance_arl",
    "variance_reference",
]
