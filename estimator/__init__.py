"""Pure-numpy recursive weighted least squares for sensor monitoring (no I/O)."""

from estimator.batch import BatchFit, NotIdentifiable, fit_wls
from estimator.regressors import Factor, NotUsable, RegressorBuilder, RegressorSpec, Term, parse_term
from estimator.rwls import BankState, RecursiveWLSBank, RejectedSample, UpdateResult
from estimator.statistics import ChannelStatistics, bank_statistics, student_t_quantile

__all__ = [
    "BankState",
    "BatchFit",
    "ChannelStatistics",
    "Factor",
    "NotIdentifiable",
    "NotUsable",
    "RecursiveWLSBank",
    "RegressorBuilder",
    "RegressorSpec",
    "RejectedSample",
    "Term",
    "UpdateResult",
    "bank_statistics",
    "fit_wls",
    "parse_term",
    "student_t_quantile",
]
