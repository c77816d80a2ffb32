"""Numerical core of arxwatch: ARX structure, recursive and batch estimation.

Pure numpy/scipy: no I/O, clocks, threads or logging. The service shell in
``arxwatch.daemon`` calls it; nothing here imports the shell.
"""

from arxwatch.estimators.arx import (
    ArxOrder,
    RegressorHistory,
    regression_matrix,
    segment_regression_matrix,
)
from arxwatch.estimators.baseline import (
    AcceptanceRule,
    Baseline,
    BaselineResult,
    BaselineSet,
    LearnerConfig,
    LiveBaselineLearner,
    SearchRanges,
    fit_baseline,
)
from arxwatch.estimators.batch import BatchRls, BatchStep
from arxwatch.estimators.codec import CodecError, decode_estimator, encode_estimator
from arxwatch.estimators.errors import DimensionError, OrderError
from arxwatch.estimators.estimator import ArxEstimator, StepResult
from arxwatch.estimators.identify import (
    ArxFit,
    BatchFit,
    RankDeficientError,
    fit_arx,
    fit_lad,
    fit_lasso,
    fit_ols,
    fit_percent,
    fit_ridge,
)
from arxwatch.estimators.order import OrderCandidate, OrderSearch, select_order
from arxwatch.estimators.readout import PhysicalReadout, read_out, readout_jacobian
from arxwatch.estimators.rls import RlsConfig

__all__ = [
    "AcceptanceRule",
    "Baseline",
    "BaselineResult",
    "BaselineSet",
    "LearnerConfig",
    "LiveBaselineLearner",
    "SearchRanges",
    "fit_baseline",
    "ArxEstimator",
    "ArxFit",
    "ArxOrder",
    "BatchFit",
    "BatchRls",
    "BatchStep",
    "CodecError",
    "DimensionError",
    "OrderCandidate",
    "OrderError",
    "OrderSearch",
    "PhysicalReadout",
    "RankDeficientError",
    "RegressorHistory",
    "RlsConfig",
    "StepResult",
    "decode_estimator",
    "encode_estimator",
    "fit_arx",
    "fit_lad",
    "fit_lasso",
    "fit_ols",
    "fit_percent",
    "fit_ridge",
    "read_out",
    "readout_jacobian",
    "regression_matrix",
    "segment_regression_matrix",
    "select_order",
]
