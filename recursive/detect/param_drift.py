"""How far the weights have moved: :class:`ParamDrift`, Mahalanobis distance and KL divergence
of the weight posterior from a periodically refreshed reference snapshot."""

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.linalg

from recursive.detect._common import (
    _INF,
    SCHEMA,
    _check_state,
    _construct,
    _finite,
    _get,
    _positive,
)


@dataclass(frozen=True)
class ParamDriftStep:
    """Result of :meth:`ParamDrift.step`.

    ``mahalanobis`` and ``kl`` compare the current posterior with the reference that was in
    force when the step began (nan where a covariance is not positive definite);
    ``reference_time`` is the clock value of the reference after the step and ``replaced``
    tells whether this step installed a new reference.
    """

    mahalanobis: float
    kl: float
    reference_time: float
    replaced: bool


def _cholesky_or_none(a: np.ndarray) -> np.ndarray | None:
    try:
        return np.linalg.cholesky(a)
    except np.linalg.LinAlgError:
        return None


class ParamDrift:
    """Distance of the weight posterior from a periodically refreshed reference snapshot.

    Parameters
    ----------
    window : float
        Age (in the units of the clock passed to :meth:`step`: seconds, sample counts...)
        after which the reference is replaced by the current posterior, ``> 0``.

    Notes
    -----
    With current posterior :math:`N_0 = N(m, S)` and reference :math:`N_1 = N(m_r, S_r)`,
    :math:`S_r = L_r L_r^T` and :math:`S = L L^T` (Cholesky), :math:`k` the dimension:

    .. math::

        d_M = \\lVert L_r^{-1}(m - m_r) \\rVert, \\qquad
        \\mathrm{KL}(N_0 \\Vert N_1) = \\tfrac12\\left[\\lVert L_r^{-1} L \\rVert_F^2 + d_M^2 - k
        + 2\\sum_j \\ln (L_r)_{jj} - 2\\sum_j \\ln L_{jj}\\right].

    Both are computed against the reference in force at the start of the step; then, if
    ``t - t_ref >= window``, the reference becomes the current posterior. The first step only
    installs the reference and reports 0 for both. A non-positive-definite reference gives nan
    for both numbers, a non-positive-definite current covariance gives nan for the KL. Rounding
    can make a KL of nearly equal Gaussians slightly negative; it is clipped at 0.
    """

    __slots__ = ("_window", "_ref_time", "_ref_mean", "_ref_cov", "_ref_chol", "_last_t")

    def __init__(self, window: float) -> None:
        self._window = _positive("window", window)
        self.reset()

    def params(self) -> dict:
        """Parameters as a plain dict."""
        return {"window": self._window}

    def reset(self) -> None:
        """Drop the reference; the next step installs a new one."""
        self._ref_time = 0.0
        self._ref_mean = None
        self._ref_cov = None
        self._ref_chol = None
        self._last_t = -_INF

    @property
    def has_reference(self) -> bool:
        """True once a reference snapshot exists."""
        return self._ref_mean is not None

    def _set_reference(self, t: float, mean: np.ndarray, cov: np.ndarray) -> None:
        self._ref_time = t
        self._ref_mean = mean.copy()
        self._ref_cov = cov.copy()
        self._ref_chol = _cholesky_or_none(self._ref_cov)

    def step(self, t: float, mean: Any, cov: Any) -> ParamDriftStep:
        """Compare posterior (mean, cov) at clock value ``t`` with the reference."""
        t = _finite("t", t)
        if t < self._last_t:
            raise ValueError(f"t must not decrease: got {t!r} after {self._last_t!r}")
        m = np.asarray(mean, dtype=float)
        if m.ndim != 1 or m.size == 0 or not np.all(np.isfinite(m)):
            raise ValueError(f"mean must be a non-empty finite vector, got {mean!r}")
        k = m.size
        c = np.asarray(cov, dtype=float)
        if c.shape != (k, k) or not np.all(np.isfinite(c)):
            raise ValueError(f"cov must be a finite {k}x{k} matrix, got shape {c.shape}: {cov!r}")
        if self._ref_mean is not None and self._ref_mean.size != k:
            raise ValueError(
                f"mean has length {k} but the reference has length {self._ref_mean.size}; "
                "reset() before changing the model size"
            )
        self._last_t = t
        if self._ref_mean is None:
            self._set_reference(t, m, c)
            return ParamDriftStep(0.0, 0.0, t, True)
        lr = self._ref_chol
        if lr is None:
            dist = kl = math.nan
        else:
            y = scipy.linalg.solve_triangular(lr, m - self._ref_mean, lower=True)
            maha2 = float(y @ y)
            dist = math.sqrt(maha2)
            lc = _cholesky_or_none(c)
            if lc is None:
                kl = math.nan
            else:
                a = scipy.linalg.solve_triangular(lr, lc, lower=True)
                trace_term = float(np.sum(a * a))
                logdet_ratio = 2.0 * float(np.sum(np.log(np.diag(lr)) - np.log(np.diag(lc))))
                kl = 0.5 * (trace_term + maha2 - k + logdet_ratio)
                if kl < 0.0:
                    kl = 0.0
        replaced = t - self._ref_time >= self._window
        if replaced:
            self._set_reference(t, m, c)
        return ParamDriftStep(dist, kl, self._ref_time, replaced)

    def to_state(self) -> dict:
        """Plain-data snapshot (parameters and state; arrays as lists)."""
        has = self._ref_mean is not None
        return {
            "schema": SCHEMA,
            "kind": "param_drift",
            "params": self.params(),
            "has_reference": has,
            "reference_time": self._ref_time,
            "reference_mean": self._ref_mean.tolist() if has else [],
            "reference_cov": self._ref_cov.tolist() if has else [],
            "started": math.isfinite(self._last_t),
            "last_t": self._last_t if math.isfinite(self._last_t) else 0.0,
        }

    @classmethod
    def from_state(cls, state: dict) -> "ParamDrift":
        """Rebuild from :meth:`to_state` output."""
        state = _check_state(state, "param_drift")
        obj = _construct(cls, state["params"])
        last_t = _finite("last_t", _get(state, "last_t"))
        obj._last_t = last_t if _get(state, "started") else -_INF
        if _get(state, "has_reference"):
            m = np.asarray(_get(state, "reference_mean"), dtype=float)
            if m.ndim != 1 or m.size == 0 or not np.all(np.isfinite(m)):
                raise ValueError(f"reference_mean must be a finite vector, got {m!r}")
            c = np.asarray(_get(state, "reference_cov"), dtype=float)
            if c.shape != (m.size, m.size) or not np.all(np.isfinite(c)):
                raise ValueError(f"reference_cov must be a finite square matrix, got {c!r}")
            obj._set_reference(_finite("reference_time", _get(state, "reference_time")), m, c)
        return obj
