"""How far the weights have moved: :class:`ParamDrift`, Mahalanobis distance and KL divergence
of the weight posterior from a periodically refreshed reference snapshot."""

import math
from typing import Any

import numpy as np
import scipy.linalg
from scipy.linalg import lapack

from recursive.detect._common import (
    _INF,
    SCHEMA,
    _check_state,
    _construct,
    _finite,
    _get,
    _positive,
)

_dtrtri = lapack.dtrtri


class ParamDriftStep:
    """Result of :meth:`ParamDrift.step`.

    ``mahalanobis`` and ``kl`` compare the current posterior with the reference that was in
    force when the step began (nan where a covariance is not positive definite);
    ``reference_time`` is the clock value of the reference after the step and ``replaced``
    tells whether this step installed a new reference.

    ``kl`` is computed when first read (it costs a triangular solve with as many right-hand
    sides as weights, and only the ``detectors`` view shows it). The arrays it needs are
    held by reference: the caller must not modify them in place afterwards.
    """

    __slots__ = ("mahalanobis", "reference_time", "replaced", "_kl", "_args")

    def __init__(self, mahalanobis: float, kl, reference_time: float, replaced: bool,
                 args=None) -> None:
        self.mahalanobis = mahalanobis
        self.reference_time = reference_time
        self.replaced = replaced
        self._kl = kl
        self._args = args

    @property
    def kl(self) -> float:
        if self._kl is None:
            self._kl = _kl(*self._args)
            self._args = None
        return self._kl

    def __repr__(self) -> str:
        return (f"ParamDriftStep(mahalanobis={self.mahalanobis!r}, kl={self.kl!r}, "
                f"reference_time={self.reference_time!r}, replaced={self.replaced!r})")

    def __eq__(self, other) -> bool:
        if not isinstance(other, ParamDriftStep):
            return NotImplemented
        return (self.mahalanobis, self.kl, self.reference_time, self.replaced) == (
            other.mahalanobis, other.kl, other.reference_time, other.replaced)

    __hash__ = None


class _Gaussian:
    """A Gaussian ``N(m, S)`` held by a triangular ``F`` with ``S^{-1} = F^T F``.

    ``F`` is None where ``S`` is not positive definite. ``lower`` tells the triangle of ``F``.
    """

    __slots__ = ("mean", "F", "lower")

    def __init__(self, mean: np.ndarray, F: np.ndarray | None, lower: bool) -> None:
        self.mean, self.F, self.lower = mean, F, lower

    @classmethod
    def from_cov(cls, mean: np.ndarray, cov: np.ndarray) -> "_Gaussian":
        # S = L L^T (Cholesky) gives S^{-1} = L^{-T} L^{-1}: F = L^{-1}, lower triangular
        try:
            L = np.linalg.cholesky(cov)
        except np.linalg.LinAlgError:
            return cls(mean, None, True)
        inv, info = _dtrtri(L, lower=1)
        if info != 0:  # pragma: no cover - a Cholesky factor has a positive diagonal
            return cls(mean, None, True)
        return cls(mean, np.tril(inv), True)

    @classmethod
    def from_sqrt(cls, mean: np.ndarray, R: np.ndarray, scale2: float) -> "_Gaussian":
        # S = scale2 (R^T R)^{-1}: F = R / sqrt(scale2), upper triangular
        if not (scale2 > 0.0 and math.isfinite(scale2)):
            return cls(mean, None, False)
        d = np.diagonal(R)
        if not np.all(d != 0.0):
            return cls(mean, None, False)
        return cls(mean, R * (1.0 / math.sqrt(scale2)), False)

    def logdet_cov(self) -> float:
        # log det S = -2 sum log |F_jj|
        return -2.0 * float(np.sum(np.log(np.abs(np.diagonal(self.F)))))


def _kl(ref: _Gaussian, current, maha2: float) -> float:
    """``KL(current() || ref)``; nan where either covariance is not positive definite."""
    cur = current()
    if ref.F is None or cur.F is None:
        return math.nan
    k = cur.mean.size
    # tr(S_r^{-1} S) = || F_r F^{-1} ||_F^2; X = F_r F^{-1} solves F^T X^T = F_r^T
    X = scipy.linalg.solve_triangular(cur.F, ref.F.T, trans="T", lower=cur.lower,
                                      check_finite=False)
    trace_term = float(np.sum(X * X))
    if not math.isfinite(trace_term):
        return math.nan
    kl = 0.5 * (trace_term + maha2 - k + ref.logdet_cov() - cur.logdet_cov())
    return kl if kl > 0.0 else 0.0


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
    each held by a triangular square root of its precision, :math:`S^{-1} = F^T F` and
    :math:`S_r^{-1} = F_r^T F_r`, :math:`k` the dimension:

    .. math::

        d_M = \\lVert F_r (m - m_r) \\rVert, \\qquad
        \\mathrm{KL}(N_0 \\Vert N_1) = \\tfrac12\\left[\\lVert F_r F^{-1} \\rVert_F^2 + d_M^2 - k
        + 2\\sum_j \\ln |F_{jj}| - 2\\sum_j \\ln |(F_r)_{jj}|\\right].

    A posterior in square-root information form (:meth:`step_sqrt`: ``R^T R = S^{-1} s^2``)
    already holds ``F = R / s``, so a step costs one triangular matrix-vector product; the
    KL (a triangular solve with ``k`` right-hand sides) is only computed when
    :attr:`ParamDriftStep.kl` is read. :meth:`step` takes a covariance instead
    (``F = L^{-1}``, ``S = L L^T`` Cholesky). Both forms are the textbook
    ``d_M^2 = (m - m_r)^T S_r^{-1} (m - m_r)`` and the closed-form KL of two Gaussians.

    Both are computed against the reference in force at the start of the step; then, if
    ``t - t_ref >= window``, the reference becomes the current posterior. The first step only
    installs the reference and reports 0 for both. A non-positive-definite reference gives nan
    for both numbers, a non-positive-definite current covariance gives nan for the KL. Rounding
    can make a KL of nearly equal Gaussians slightly negative; it is clipped at 0.
    """

    __slots__ = ("_window", "_ref_time", "_ref", "_last_t")

    def __init__(self, window: float) -> None:
        self._window = _positive("window", window)
        self.reset()

    def params(self) -> dict:
        """Parameters as a plain dict."""
        return {"window": self._window}

    def reset(self) -> None:
        """Drop the reference; the next step installs a new one."""
        self._ref_time = 0.0
        self._ref: _Gaussian | None = None
        self._last_t = -_INF

    @property
    def has_reference(self) -> bool:
        """True once a reference snapshot exists."""
        return self._ref is not None

    def _check(self, t: Any, mean: Any) -> tuple[float, np.ndarray]:
        t = _finite("t", t)
        if t < self._last_t:
            raise ValueError(f"t must not decrease: got {t!r} after {self._last_t!r}")
        m = np.asarray(mean, dtype=float)
        if m.ndim != 1 or m.size == 0 or not np.all(np.isfinite(m)):
            raise ValueError(f"mean must be a non-empty finite vector, got {mean!r}")
        if self._ref is not None and self._ref.mean.size != m.size:
            raise ValueError(
                f"mean has length {m.size} but the reference has length "
                f"{self._ref.mean.size}; reset() before changing the model size"
            )
        return t, m

    def step(self, t: float, mean: Any, cov: Any) -> ParamDriftStep:
        """Compare posterior (mean, cov) at clock value ``t`` with the reference."""
        t, m = self._check(t, mean)
        k = m.size
        c = np.asarray(cov, dtype=float)
        if c.shape != (k, k) or not np.all(np.isfinite(c)):
            raise ValueError(f"cov must be a finite {k}x{k} matrix, got shape {c.shape}: {cov!r}")
        return self._step(t, m, lambda: _Gaussian.from_cov(m.copy(), c.copy()))

    def step_sqrt(self, t: float, mean: Any, R: np.ndarray, scale2: float) -> ParamDriftStep:
        """:meth:`step` for a posterior held as ``R`` (upper triangular) and ``scale2``.

        The covariance (or scale matrix) is ``scale2 * (R^T R)^{-1}``. ``R`` is read, not
        copied, unless it becomes the reference: it must not be changed in place afterwards
        (a :class:`recursive.Posterior` replaces its arrays on each update).
        """
        t, m = self._check(t, mean)
        k = m.size
        if np.shape(R) != (k, k):
            raise ValueError(f"R must be {k}x{k}, got shape {np.shape(R)}")
        scale2 = float(scale2)
        return self._step(t, m, lambda: _Gaussian.from_sqrt(m, R, scale2),
                          lambda: _Gaussian.from_sqrt(m.copy(), np.array(R, dtype=float),
                                                      scale2))

    def _step(self, t: float, m: np.ndarray, current, kept=None) -> ParamDriftStep:
        self._last_t = t
        ref = self._ref
        replaced = ref is None or t - self._ref_time >= self._window
        if ref is None:
            self._set_reference(t, (kept or current)())
            return ParamDriftStep(0.0, 0.0, t, True)
        if ref.F is None:
            dist, kl, args = math.nan, math.nan, None
        else:
            y = ref.F @ (m - ref.mean)
            maha2 = float(y @ y)
            dist = math.sqrt(maha2)
            kl, args = None, (ref, current, maha2)
        if replaced:
            g = (kept or current)()
            self._set_reference(t, g)
            if args is not None and kept is None:
                args = (ref, lambda: g, maha2)
        return ParamDriftStep(dist, kl, self._ref_time, replaced, args)

    def _set_reference(self, t: float, g: _Gaussian) -> None:
        self._ref_time = t
        self._ref = g

    def to_state(self) -> dict:
        """Plain-data snapshot (parameters and state; arrays as lists).

        The reference is kept as its precision factor ``F`` (``reference_factor``, empty
        when its covariance was not positive definite), so a restored detector gives the
        same bits as the original.
        """
        ref = self._ref
        has = ref is not None
        return {
            "schema": SCHEMA,
            "kind": "param_drift",
            "params": self.params(),
            "has_reference": has,
            "reference_time": self._ref_time,
            "reference_mean": ref.mean.tolist() if has else [],
            "reference_factor": ref.F.tolist() if has and ref.F is not None else [],
            "reference_lower": bool(ref.lower) if has else False,
            "started": math.isfinite(self._last_t),
            "last_t": self._last_t if math.isfinite(self._last_t) else 0.0,
        }

    @classmethod
    def from_state(cls, state: dict) -> "ParamDrift":
        """Rebuild from :meth:`to_state` output (or from a state that holds
        ``reference_cov``, as written before the factor was kept)."""
        state = _check_state(state, "param_drift")
        obj = _construct(cls, state["params"])
        last_t = _finite("last_t", _get(state, "last_t"))
        obj._last_t = last_t if _get(state, "started") else -_INF
        if _get(state, "has_reference"):
            m = np.asarray(_get(state, "reference_mean"), dtype=float)
            if m.ndim != 1 or m.size == 0 or not np.all(np.isfinite(m)):
                raise ValueError(f"reference_mean must be a finite vector, got {m!r}")
            t_ref = _finite("reference_time", _get(state, "reference_time"))
            if "reference_factor" in state:
                lower = bool(_get(state, "reference_lower"))
                f = state["reference_factor"]
                if len(f) == 0:
                    g = _Gaussian(m, None, lower)
                else:
                    F = np.asarray(f, dtype=float)
                    tri = np.triu(F, 1) if lower else np.tril(F, -1)
                    if F.shape != (m.size, m.size) or not np.all(np.isfinite(F)) or tri.any():
                        raise ValueError(f"reference_factor must be a finite triangular "
                                         f"matrix, got {f!r}")
                    g = _Gaussian(m, F, lower)
            else:
                c = np.asarray(_get(state, "reference_cov"), dtype=float)
                if c.shape != (m.size, m.size) or not np.all(np.isfinite(c)):
                    raise ValueError(f"reference_cov must be a finite square matrix, got {c!r}")
                g = _Gaussian.from_cov(m, c)
            obj._set_reference(t_ref, g)
        return obj
