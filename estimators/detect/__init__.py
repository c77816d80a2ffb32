"""Detectors of the drift monitor: each turns a stream into :class:`Evidence`.

Behaviour of the model (family ``"behaviour"``):

* :class:`Cusum`: two-sided tabular CUSUM on normalised innovations
  (offsets, biases);
* :class:`VarianceChange`: EWMV test of the innovation variance (noise);
* :class:`Whiteness`: windowed Ljung–Box test (unmodelled dynamics);
* :class:`ParameterDrift`, :class:`FeatureDrift`: Wald distance of the live
  parameters or physical features from the baseline;
* :class:`PhysicalBands`: tolerance bands on gains, time constant, dead
  time and offset.

Data feeding the model (family ``"data_quality"``): :class:`SignalQuality`
(stale, stuck, out of range, gaps).

Every detector keeps a frozen config apart from its learned state and offers
``update``, ``reset``, ``clone``, ``to_state`` and ``load_state``.
"""

from arxwatch.estimators.detect.bands import BandsConfig, PhysicalBands
from arxwatch.estimators.detect.cusum import Cusum, CusumConfig
from arxwatch.estimators.detect.evidence import Evidence, Family
from arxwatch.estimators.detect.parameter import (
    FeatureDrift,
    FeatureDriftConfig,
    ParameterDrift,
    ParameterDriftConfig,
    calibrate,
    wald_distance,
)
from arxwatch.estimators.detect.quality import QualityConfig, SignalQuality
from arxwatch.estimators.detect.variance import VarianceChange, VarianceConfig
from arxwatch.estimators.detect.whiteness import Whiteness, WhitenessConfig, ljung_box

__all__ = [
    "BandsConfig",
    "Cusum",
    "CusumConfig",
    "Evidence",
    "Family",
    "FeatureDrift",
    "FeatureDriftConfig",
    "ParameterDrift",
    "ParameterDriftConfig",
    "PhysicalBands",
    "QualityConfig",
    "SignalQuality",
    "VarianceChange",
    "VarianceConfig",
    "Whiteness",
    "WhitenessConfig",
    "calibrate",
    "ljung_box",
    "wald_distance",
]
