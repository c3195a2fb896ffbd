"""Drift detectors, predictive scores and the trust state machine.

Everything here is pure computation on numbers handed in by the caller: no clock, no I/O.

- :mod:`~recursive.detect.sequential`: charts on the standardized residual (:class:`Cusum`,
  :class:`PageHinkley`, :class:`SpreadCusum`, :class:`Ewma`).
- :mod:`~recursive.detect.scoring`: proper scores of a normal or Student-t predictive
  (:func:`log_score_normal`, :func:`log_score_t`, :func:`crps_normal`, :func:`crps_t`).
- :mod:`~recursive.detect.calibration`: running coverage and scores (:class:`Calibration`) and
  the typical predictive spread (:class:`StdBaseline`).
- :mod:`~recursive.detect.region`: the region the inputs have covered (:class:`InputRegion`).
- :mod:`~recursive.detect.param_drift`: drift of the weight posterior (:class:`ParamDrift`).
- :mod:`~recursive.detect.trust`: the trust level with hysteresis (:class:`Trust`), the
  commissioning period of a new model (:class:`Commissioning`) and the observed lab schedule
  behind staleness (:class:`LabInterval`).

The scalar detectors run once per lab result or prediction and use plain ``math`` float
arithmetic so that a step costs a few microseconds; :class:`InputRegion` and
:class:`ParamDrift` use numpy on small arrays.

The residual detectors expect the *standardized residual* ``z``: the innovation mapped through the
model's predictive CDF to a standard normal quantile, so that ``z ~ N(0, 1)`` while the model is
calibrated whatever the shape of its predictive distribution.

Every detector keeps its state as plain numbers. ``to_state()`` returns a dict of Python floats,
ints, strings and lists (tagged with ``"schema"`` and ``"kind"``) and ``from_state()`` restores a
detector that continues bit-identically.
"""

from recursive.detect._common import SCHEMA
from recursive.detect.calibration import (
    Calibration,
    CalibrationStep,
    StdBaseline,
    StdBaselineStep,
)
from recursive.detect.param_drift import ParamDrift, ParamDriftStep
from recursive.detect.region import InputRegion, RegionStep
from recursive.detect.scoring import crps_normal, crps_t, log_score_normal, log_score_t
from recursive.detect.sequential import (
    Cusum,
    CusumStep,
    Ewma,
    EwmaStep,
    PageHinkley,
    PageHinkleyStep,
    SpreadCusum,
    SpreadCusumStep,
)
from recursive.detect.trust import Commissioning, LabInterval, Trust, TrustStep

__all__ = [
    "SCHEMA",
    "Calibration",
    "CalibrationStep",
    "Commissioning",
    "Cusum",
    "CusumStep",
    "Ewma",
    "EwmaStep",
    "InputRegion",
    "LabInterval",
    "PageHinkley",
    "PageHinkleyStep",
    "ParamDrift",
    "ParamDriftStep",
    "RegionStep",
    "SpreadCusum",
    "SpreadCusumStep",
    "StdBaseline",
    "StdBaselineStep",
    "Trust",
    "TrustStep",
    "crps_normal",
    "crps_t",
    "log_score_normal",
    "log_score_t",
]
