"""Pure-numpy recursive weighted least squares for sensor monitoring (no I/O)."""

from estimator.batch import BatchFit, NotIdentifiable, fit_wls
from estimator.channel import ChannelSettings, Sample, SampleOutcome, WeightRule
from estimator.channel_bank import ChannelBank, ChannelView
from estimator.log_variance import LogVarianceModel, LogVarianceState
from estimator.quantiles import chi2_quantile, student_t_quantile
from estimator.regressors import Factor, NotUsable, RegressorBuilder, RegressorSpec, Term, parse_term
from estimator.rwls import BankState, RecursiveWLSBank, RejectedSample, UpdateResult
from estimator.rwls_scalar import ScalarRecursiveWLS
from estimator.statistics import ChannelStatistics, bank_statistics
from estimator.variance import NoiseVarianceTracker, TrackerState

__all__ = [
    "BankState",
    "BatchFit",
    "ChannelBank",
    "ChannelSettings",
    "ChannelStatistics",
    "ChannelView",
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
    "SampleOutcome",
    "ScalarRecursiveWLS",
    "Term",
    "TrackerState",
    "UpdateResult",
    "WeightRule",
    "bank_statistics",
    "chi2_quantile",
    "fit_wls",
    "parse_term",
    "student_t_quantile",
]
