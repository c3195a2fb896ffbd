"""Running quality of the predictive distribution: :class:`Calibration` (weighted coverage,
log score and CRPS) and :class:`StdBaseline` (typical predictive std, flags when it grows)."""

import math
from dataclasses import dataclass

import scipy.special

from recursive.detect._common import (
    _INF,
    SCHEMA,
    _check_state,
    _construct,
    _count,
    _decay,
    _finite,
    _get,
    _nonnegative,
    _positive,
)
from recursive.detect.scoring import (
    _HALF_LOG_2PI,
    _INV_SQRT_2PI,
    _INV_SQRT_PI,
    _SQRT2,
    _check_dof_scalar,
    _check_scale_scalar,
    _crps_t_std_const,
    _t_log_density_std,
)


@dataclass(frozen=True)
class CalibrationStep:
    """Result of :meth:`Calibration.step`.

    ``covered`` is for this observation; ``coverage``, ``log_score`` and ``crps`` are the
    exponentially weighted running means including it.
    """

    covered: bool
    coverage: float
    log_score: float
    crps: float


class Calibration:
    """Exponentially weighted coverage, mean log score and mean CRPS of the predictions.

    Parameters
    ----------
    half_life : float
        Half-life of the weights in samples, ``> 0``.
    level : float, default 0.95
        Nominal probability of the central prediction interval, ``0 < level < 1``.

    Notes
    -----
    With :math:`w = 2^{-1/h}` each running mean is the bias-corrected weighted mean

    .. math:: \\bar x_n = \\frac{\\sum_{i \\le n} w^{n-i} x_i}{\\sum_{i \\le n} w^{n-i}},

    updated as :math:`A_n = w A_{n-1} + x_n`, :math:`W_n = w W_{n-1} + 1`. Dividing by
    :math:`W_n` rather than by its limit :math:`1/(1-w)` keeps early values from being pulled
    toward 0. An observation is covered when it lies in the central ``level`` interval, i.e.
    when its lower or upper tail probability is at least :math:`(1 - \\text{level})/2`.
    """

    __slots__ = ("_half_life", "_level", "_w", "_tail", "_wsum", "_cov", "_ls", "_crps", "_n")

    def __init__(self, half_life: float, level: float = 0.95) -> None:
        self._half_life = _positive("half_life", half_life)
        lv = _finite("level", level)
        if not 0.0 < lv < 1.0:
            raise ValueError(f"level must be in (0, 1), got {level!r}")
        self._level = lv
        self._w = _decay(self._half_life)
        self._tail = 0.5 * (1.0 - lv)
        self.reset()

    def params(self) -> dict:
        """Parameters as a plain dict."""
        return {"half_life": self._half_life, "level": self._level}

    def reset(self) -> None:
        """Forget all observations."""
        self._wsum = 0.0
        self._cov = 0.0
        self._ls = 0.0
        self._crps = 0.0
        self._n = 0

    @property
    def count(self) -> int:
        """Number of observations scored."""
        return self._n

    def step(self, y: float, mu: float, scale: float, dof: float = _INF) -> CalibrationStep:
        """Score one lab result ``y`` against its predictive (location, scale, dof).

        ``dof = inf`` means a normal predictive with standard deviation ``scale``.
        """
        y = float(y)
        mu = float(mu)
        if not math.isfinite(y):
            raise ValueError(f"y must be finite, got {y!r}")
        if not math.isfinite(mu):
            raise ValueError(f"mu must be finite, got {mu!r}")
        s = _check_scale_scalar("scale", scale)
        d = _check_dof_scalar(dof, 1.0)
        z = (y - mu) / s
        az = abs(z)
        if d == _INF:
            tail = 0.5 * math.erfc(az / _SQRT2)
            pdf = _INV_SQRT_2PI * math.exp(-0.5 * z * z)
            ls = _HALF_LOG_2PI + math.log(s) + 0.5 * z * z
            cr = s * (az * (1.0 - 2.0 * tail) + 2.0 * pdf - _INV_SQRT_PI)
        else:
            tail = float(scipy.special.stdtr(d, -az))
            log_pdf = _t_log_density_std(z, d)
            ls = math.log(s) - log_pdf
            cr = s * (
                az * (1.0 - 2.0 * tail)
                + 2.0 * math.exp(log_pdf) * (d + z * z) / (d - 1.0)
                - _crps_t_std_const(d)
            )
        covered = tail >= self._tail
        w = self._w
        self._wsum = w * self._wsum + 1.0
        self._cov = w * self._cov + (1.0 if covered else 0.0)
        self._ls = w * self._ls + ls
        self._crps = w * self._crps + cr
        self._n += 1
        inv = 1.0 / self._wsum
        return CalibrationStep(covered, self._cov * inv, self._ls * inv, self._crps * inv)

    def to_state(self) -> dict:
        """Plain-data snapshot (parameters and state)."""
        return {
            "schema": SCHEMA,
            "kind": "calibration",
            "params": self.params(),
            "weight_sum": self._wsum,
            "covered_sum": self._cov,
            "log_score_sum": self._ls,
            "crps_sum": self._crps,
            "count": self._n,
        }

    @classmethod
    def from_state(cls, state: dict) -> "Calibration":
        """Rebuild from :meth:`to_state` output."""
        state = _check_state(state, "calibration")
        obj = _construct(cls, state["params"])
        obj._wsum = _nonnegative("weight_sum", _get(state, "weight_sum"))
        obj._cov = _nonnegative("covered_sum", _get(state, "covered_sum"))
        obj._ls = _finite("log_score_sum", _get(state, "log_score_sum"))
        obj._crps = _nonnegative("crps_sum", _get(state, "crps_sum"))
        obj._n = _count("count", _get(state, "count"), 0)
        return obj


# ----------------------------------------------------------------------------------------------
# predictive spread baseline
# ----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class StdBaselineStep:
    """Result of :meth:`StdBaseline.step`.

    ``baseline`` and ``ratio = std / baseline`` refer to the baseline *before* this step's
    learning update (nan while nothing has been learned); the flags are False when their limit
    is not configured or no baseline exists yet.
    """

    baseline: float
    ratio: float
    too_high_abs: bool
    too_high_ratio: bool


class StdBaseline:
    """Typical predictive standard deviation of a model, and flags when it grows.

    Parameters
    ----------
    half_life : float
        Half-life of the weights in learning updates, ``> 0``.
    limit_abs : float or None
        Flag ``too_high_abs`` when the std exceeds this value (``> 0``).
    ratio : float or None
        Flag ``too_high_ratio`` when ``std / baseline`` exceeds this value (``> 1``).

    Notes
    -----
    The baseline is the exponentiated, bias-corrected exponentially weighted mean of
    :math:`\\ln \\sigma`, i.e. a weighted geometric mean, which suits a positive scale quantity:

    .. math::

        b_n = \\exp\\frac{\\sum_i w^{n-i} \\ln\\sigma_i}{\\sum_i w^{n-i}}, \\quad w = 2^{-1/h},

    where the sums run over learning steps only. :meth:`step` compares the incoming std with
    the baseline first and then, only when ``learn=True``, adds it, so a sudden jump is judged
    against the old baseline and callers choose which predictions (e.g. those made at lab time)
    define "typical".
    """

    __slots__ = ("_half_life", "_limit_abs", "_ratio", "_w", "_wsum", "_lsum", "_n")

    def __init__(
        self, half_life: float, limit_abs: float | None = None, ratio: float | None = None
    ) -> None:
        self._half_life = _positive("half_life", half_life)
        self._limit_abs = None if limit_abs is None else _positive("limit_abs", limit_abs)
        if ratio is None:
            self._ratio = None
        else:
            r = _finite("ratio", ratio)
            # a ratio limit at or below 1 would flag a model at its own typical spread
            if not r > 1.0:
                raise ValueError(f"ratio must be finite and > 1, got {ratio!r}")
            self._ratio = r
        self._w = _decay(self._half_life)
        self.reset()

    def params(self) -> dict:
        """Parameters as a plain dict (None for an unset limit)."""
        return {"half_life": self._half_life, "limit_abs": self._limit_abs, "ratio": self._ratio}

    def reset(self) -> None:
        """Forget the baseline."""
        self._wsum = 0.0
        self._lsum = 0.0
        self._n = 0

    @property
    def baseline(self) -> float:
        """Current baseline std (nan before the first learning step)."""
        if self._n == 0:
            return math.nan
        return math.exp(self._lsum / self._wsum)

    def judge(self, std: float) -> tuple[float, bool, bool]:
        """:meth:`step` without learning, as ``(ratio, too_high_abs, too_high_ratio)``.

        The same values, bit for bit, without building a :class:`StdBaselineStep`: the
        check a monitor makes of every prediction.
        """
        if not (type(std) is float and std > 0.0 and std < _INF):
            std = float(std)
            if not (std > 0.0 and std < _INF):
                raise ValueError(f"std must be finite and > 0, got {std!r}")
        if self._n:
            rat = std / math.exp(self._lsum / self._wsum)
            r = self._ratio
            too_rat = r is not None and rat > r
        else:
            rat, too_rat = math.nan, False
        lim = self._limit_abs
        return rat, lim is not None and std > lim, too_rat

    def step(self, std: float, learn: bool = False) -> StdBaselineStep:
        """Judge one predictive std against the baseline; learn from it if ``learn``."""
        std = float(std)
        rat, too_abs, too_rat = self.judge(std)
        base = self.baseline
        if learn:
            w = self._w
            self._wsum = w * self._wsum + 1.0
            self._lsum = w * self._lsum + math.log(std)
            self._n += 1
        return StdBaselineStep(base, rat, too_abs, too_rat)

    def to_state(self) -> dict:
        """Plain-data snapshot (parameters and state)."""
        return {
            "schema": SCHEMA,
            "kind": "std_baseline",
            "params": self.params(),
            "weight_sum": self._wsum,
            "log_sum": self._lsum,
            "count": self._n,
        }

    @classmethod
    def from_state(cls, state: dict) -> "StdBaseline":
        """Rebuild from :meth:`to_state` output."""
        state = _check_state(state, "std_baseline")
        obj = _construct(cls, state["params"])
        obj._wsum = _nonnegative("weight_sum", _get(state, "weight_sum"))
        obj._lsum = _finite("log_sum", _get(state, "log_sum"))
        obj._n = _count("count", _get(state, "count"), 0)
        if obj._n > 0 and not obj._wsum > 0.0:
            raise ValueError(f"weight_sum must be > 0 when count > 0, got {obj._wsum!r}")
        return obj
