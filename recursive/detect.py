"""Drift detectors, predictive scores and the trust state machine.

Everything here is pure computation on numbers handed in by the caller: no clock, no I/O. The
scalar detectors (:class:`Cusum`, :class:`PageHinkley`, :class:`SpreadCusum`, :class:`Ewma`,
:class:`Calibration`, :class:`StdBaseline`) run once per lab result or prediction and use plain
``math`` float arithmetic so that a step costs a few microseconds. The vector ones
(:class:`InputRegion`, :class:`ParamDrift`) use numpy on small arrays.

The residual detectors expect the *standardized residual* ``z``: the innovation mapped through the
model's predictive CDF to a standard normal quantile, so that ``z ~ N(0, 1)`` while the model is
calibrated whatever the shape of its predictive distribution.

Every detector keeps its state as plain numbers. ``to_state()`` returns a dict of Python floats,
ints, strings and lists (tagged with ``"schema"`` and ``"kind"``) and ``from_state()`` restores a
detector that continues bit-identically.
"""

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.linalg
import scipy.special
from scipy.linalg import lapack

_dtrtri = lapack.dtrtri

__all__ = [
    "SCHEMA",
    "Calibration",
    "CalibrationStep",
    "Cusum",
    "CusumStep",
    "Ewma",
    "EwmaStep",
    "InputRegion",
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

SCHEMA = 1

_SQRT2 = math.sqrt(2.0)
_INV_SQRT_PI = 1.0 / math.sqrt(math.pi)
_HALF_LOG_2PI = 0.5 * math.log(2.0 * math.pi)
_HALF_LOG_PI = 0.5 * math.log(math.pi)
_INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)
_INF = math.inf


# ----------------------------------------------------------------------------------------------
# argument and state checking
# ----------------------------------------------------------------------------------------------


def _real(name: str, value: Any) -> float:
    """Convert to float, turning type errors into ValueError that names the value."""
    if isinstance(value, bool):
        raise ValueError(f"{name} must be a real number, got {value!r}")
    try:
        return float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a real number, got {value!r}") from None


def _finite(name: str, value: Any) -> float:
    v = _real(name, value)
    if not math.isfinite(v):
        raise ValueError(f"{name} must be finite, got {value!r}")
    return v


def _positive(name: str, value: Any) -> float:
    v = _finite(name, value)
    if not v > 0.0:
        raise ValueError(f"{name} must be finite and > 0, got {value!r}")
    return v


def _nonnegative(name: str, value: Any) -> float:
    v = _finite(name, value)
    if not v >= 0.0:
        raise ValueError(f"{name} must be finite and >= 0, got {value!r}")
    return v


def _count(name: str, value: Any, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise ValueError(f"{name} must be an integer >= {minimum}, got {value!r}")
    if value < minimum:
        raise ValueError(f"{name} must be an integer >= {minimum}, got {value!r}")
    return int(value)


def _decay(half_life: float) -> float:
    """Per-sample weight factor for a half-life in samples."""
    return 2.0 ** (-1.0 / half_life)


def _check_state(state: Any, kind: str) -> dict:
    if not isinstance(state, dict):
        raise ValueError(f"state must be a dict, got {type(state).__name__}")
    if state.get("schema") != SCHEMA:
        raise ValueError(f"unsupported state schema {state.get('schema')!r}, expected {SCHEMA}")
    if state.get("kind") != kind:
        raise ValueError(f"state is for {state.get('kind')!r}, expected {kind!r}")
    if not isinstance(state.get("params"), dict):
        raise ValueError(f"state has no params dict: {state.get('params')!r}")
    return state


def _construct(cls: type, params: dict) -> Any:
    """Build a detector from saved parameters; unknown or missing names are a ValueError."""
    try:
        return cls(**params)
    except TypeError as exc:
        raise ValueError(f"bad parameters for {cls.__name__}: {params!r} ({exc})") from None


def _get(state: dict, key: str) -> Any:
    try:
        return state[key]
    except KeyError:
        raise ValueError(f"state is missing {key!r}") from None


# ----------------------------------------------------------------------------------------------
# mean-shift detectors on z
# ----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class CusumStep:
    """Result of :meth:`Cusum.step`: statistics after the update and the signal (+1, -1, 0)."""

    upper: float
    lower: float
    signal: int


class Cusum:
    """Two-sided tabular CUSUM on the standardized residual.

    Parameters
    ----------
    k : float, default 0.5
        Reference value (allowance) in units of z, ``k >= 0``. ``k = delta / 2`` is tuned to a
        shift of ``delta`` standard deviations.
    h : float, default 5.0
        Decision interval, ``h > 0``.
    head_start : float, default 0.0
        Fast-initial-response start value, ``0 <= head_start < h``. Used at construction, on
        :meth:`reset` and after every signal.

    Notes
    -----
    Page's (1954) tabular form, with both sums starting from the head start ``S_0``:

    .. math::

        S^+_t = \\max(0, S^+_{t-1} + z_t - k), \\qquad
        S^-_t = \\max(0, S^-_{t-1} - z_t - k).

    The chart signals ``+1`` when :math:`S^+_t > h` and ``-1`` when :math:`S^-_t > h`. With
    ``k >= 0`` at most one sum can cross in one step, because only one of them can grow. A head
    start :math:`S_0 > 0` (Lucas & Crosier 1982) shortens the delay for a shift that is already
    present at start-up.

    After a signal both sums are restarted at the head start, so the detector can signal again
    and successive run lengths are independent copies of the zero-state run length. The step
    result still reports the sums that crossed; :attr:`statistic` shows the restarted state.
    """

    __slots__ = ("_k", "_h", "_head_start", "_upper", "_lower", "_run_length")

    def __init__(self, k: float = 0.5, h: float = 5.0, head_start: float = 0.0) -> None:
        self._k = _nonnegative("k", k)
        self._h = _positive("h", h)
        hs = _nonnegative("head_start", head_start)
        if not hs < self._h:
            raise ValueError(f"head_start must be < h = {self._h!r}, got {head_start!r}")
        self._head_start = hs
        self.reset()

    def params(self) -> dict:
        """Parameters as a plain dict."""
        return {"k": self._k, "h": self._h, "head_start": self._head_start}

    def reset(self) -> None:
        """Restart both sums at the head start."""
        self._upper = self._head_start
        self._lower = self._head_start
        self._run_length = 0

    @property
    def statistic(self) -> float:
        """``max(S+, S-)`` of the current state."""
        return self._upper if self._upper > self._lower else self._lower

    @property
    def run_length(self) -> int:
        """Steps since construction, reset or the last signal."""
        return self._run_length

    def step(self, z: float) -> CusumStep:
        """Feed one standardized residual; return the sums and the signal."""
        z = float(z)
        if not math.isfinite(z):
            raise ValueError(f"z must be finite, got {z!r}")
        k = self._k
        up = self._upper + z - k
        if up < 0.0:
            up = 0.0
        lo = self._lower - z - k
        if lo < 0.0:
            lo = 0.0
        h = self._h
        if up > h:
            signal = 1
        elif lo > h:
            signal = -1
        else:
            signal = 0
        if signal:
            self._upper = self._lower = self._head_start
            self._run_length = 0
        else:
            self._upper = up
            self._lower = lo
            self._run_length += 1
        return CusumStep(up, lo, signal)

    def to_state(self) -> dict:
        """Plain-data snapshot (parameters and state)."""
        return {
            "schema": SCHEMA,
            "kind": "cusum",
            "params": self.params(),
            "upper": self._upper,
            "lower": self._lower,
            "run_length": self._run_length,
        }

    @classmethod
    def from_state(cls, state: dict) -> "Cusum":
        """Rebuild a detector from :meth:`to_state` output."""
        state = _check_state(state, "cusum")
        obj = _construct(cls, state["params"])
        obj._upper = _nonnegative("upper", _get(state, "upper"))
        obj._lower = _nonnegative("lower", _get(state, "lower"))
        obj._run_length = _count("run_length", _get(state, "run_length"), 0)
        return obj


@dataclass(frozen=True)
class PageHinkleyStep:
    """Result of :meth:`PageHinkley.step`.

    ``statistic = cumsum - minimum`` is the value compared with the threshold; ``cumsum`` and
    ``minimum`` are reported as they were before a restart.
    """

    statistic: float
    cumsum: float
    minimum: float
    signal: bool


class PageHinkley:
    """Page–Hinkley test for an increase of the mean of z above a known ``mu``.

    Parameters
    ----------
    mu : float
        Known in-control mean of z (0 for a calibrated model).
    delta : float
        Tolerated drift magnitude, ``delta >= 0``.
    threshold : float
        Alarm threshold, ``> 0``.

    Notes
    -----
    With :math:`m_0 = 0`,

    .. math::

        m_T = \\sum_{t=1}^{T} (z_t - \\mu - \\delta), \\qquad
        M_T = \\min_{0 \\le t \\le T} m_t,

    and the test signals when :math:`m_T - M_T > \\lambda` (the threshold). Since
    :math:`m_T - M_T` obeys :math:`S_T = \\max(0, S_{T-1} + z_T - \\mu - \\delta)`, this is the
    upper one-sided CUSUM with :math:`k = \\mu + \\delta`. After a signal, ``m`` and ``M`` are
    restarted at 0 (the same convention as :class:`Cusum`), which keeps the identity.
    """

    __slots__ = ("_mu", "_delta", "_threshold", "_offset", "_cumsum", "_minimum")

    def __init__(self, mu: float, delta: float, threshold: float) -> None:
        self._mu = _finite("mu", mu)
        self._delta = _nonnegative("delta", delta)
        self._threshold = _positive("threshold", threshold)
        self._offset = self._mu + self._delta
        self.reset()

    def params(self) -> dict:
        """Parameters as a plain dict."""
        return {"mu": self._mu, "delta": self._delta, "threshold": self._threshold}

    def reset(self) -> None:
        """Restart the cumulative sum and its running minimum at 0."""
        self._cumsum = 0.0
        self._minimum = 0.0

    @property
    def statistic(self) -> float:
        """``m_T - M_T`` of the current state."""
        return self._cumsum - self._minimum

    def step(self, z: float) -> PageHinkleyStep:
        """Feed one standardized residual."""
        z = float(z)
        if not math.isfinite(z):
            raise ValueError(f"z must be finite, got {z!r}")
        m = self._cumsum + (z - self._offset)
        mn = self._minimum
        if m < mn:
            mn = m
        stat = m - mn
        signal = stat > self._threshold
        if signal:
            self._cumsum = 0.0
            self._minimum = 0.0
        else:
            self._cumsum = m
            self._minimum = mn
        return PageHinkleyStep(stat, m, mn, signal)

    def to_state(self) -> dict:
        """Plain-data snapshot (parameters and state)."""
        return {
            "schema": SCHEMA,
            "kind": "page_hinkley",
            "params": self.params(),
            "cumsum": self._cumsum,
            "minimum": self._minimum,
        }

    @classmethod
    def from_state(cls, state: dict) -> "PageHinkley":
        """Rebuild a detector from :meth:`to_state` output."""
        state = _check_state(state, "page_hinkley")
        obj = _construct(cls, state["params"])
        cumsum = _finite("cumsum", _get(state, "cumsum"))
        minimum = _finite("minimum", _get(state, "minimum"))
        if minimum > 0.0 or minimum > cumsum:
            raise ValueError(f"minimum must be <= min(0, cumsum), got {minimum!r}")
        obj._cumsum = cumsum
        obj._minimum = minimum
        return obj


@dataclass(frozen=True)
class SpreadCusumStep:
    """Result of :meth:`SpreadCusum.step` (statistic before a restart)."""

    statistic: float
    signal: bool


class SpreadCusum:
    """One-sided log-likelihood-ratio CUSUM for an increase of the spread of z.

    Parameters
    ----------
    sigma1 : float, default 1.5
        Out-of-control standard deviation of z to be detected, ``> 1``.
    h : float, default 5.0
        Decision interval, ``> 0``.

    Notes
    -----
    For :math:`H_0: z \\sim N(0, 1)` against :math:`H_1: z \\sim N(0, \\sigma_1^2)` the
    log-likelihood ratio of one observation is

    .. math::

        \\ell(z) = \\frac{z^2}{2}\\left(1 - \\frac{1}{\\sigma_1^2}\\right) - \\ln \\sigma_1,

    and the CUSUM is :math:`S_t = \\max(0, S_{t-1} + \\ell(z_t))`, signalling when
    :math:`S_t > h`. After a signal ``S`` restarts at 0.
    """

    __slots__ = ("_sigma1", "_h", "_a", "_b", "_s")

    def __init__(self, sigma1: float = 1.5, h: float = 5.0) -> None:
        s1 = _finite("sigma1", sigma1)
        if not s1 > 1.0:
            raise ValueError(f"sigma1 must be finite and > 1, got {sigma1!r}")
        self._sigma1 = s1
        self._h = _positive("h", h)
        self._a = 0.5 * (1.0 - 1.0 / (s1 * s1))
        self._b = math.log(s1)
        self.reset()

    def params(self) -> dict:
        """Parameters as a plain dict."""
        return {"sigma1": self._sigma1, "h": self._h}

    def reset(self) -> None:
        """Restart the statistic at 0."""
        self._s = 0.0

    @property
    def statistic(self) -> float:
        """Current value of ``S``."""
        return self._s

    def step(self, z: float) -> SpreadCusumStep:
        """Feed one standardized residual."""
        z = float(z)
        if not math.isfinite(z):
            raise ValueError(f"z must be finite, got {z!r}")
        s = self._s + (self._a * z * z - self._b)
        if s < 0.0:
            s = 0.0
        signal = s > self._h
        self._s = 0.0 if signal else s
        return SpreadCusumStep(s, signal)

    def to_state(self) -> dict:
        """Plain-data snapshot (parameters and state)."""
        return {"schema": SCHEMA, "kind": "spread_cusum", "params": self.params(), "s": self._s}

    @classmethod
    def from_state(cls, state: dict) -> "SpreadCusum":
        """Rebuild a detector from :meth:`to_state` output."""
        state = _check_state(state, "spread_cusum")
        obj = _construct(cls, state["params"])
        obj._s = _nonnegative("s", _get(state, "s"))
        return obj


@dataclass(frozen=True)
class EwmaStep:
    """Result of :meth:`Ewma.step`: EWMA value and limit before a restart, signal +1/-1/0."""

    value: float
    limit: float
    signal: int


class Ewma:
    """EWMA control chart on the standardized residual.

    Parameters
    ----------
    lam : float, default 0.1
        Smoothing weight, ``0 < lam <= 1``.
    L : float, default 2.814
        Limit width in standard deviations of the EWMA, ``> 0``.
    exact_limits : bool, default True
        Use the exact time-varying limits; ``False`` uses the asymptotic ones.

    Notes
    -----
    Roberts (1959): :math:`E_t = \\lambda z_t + (1 - \\lambda) E_{t-1}`, :math:`E_0 = 0`. For
    iid N(0, 1) input :math:`\\mathrm{Var}(E_t) = \\frac{\\lambda}{2 - \\lambda}
    \\left(1 - (1 - \\lambda)^{2t}\\right)`, so the exact limits are

    .. math::

        \\pm L \\sqrt{\\frac{\\lambda}{2-\\lambda}\\left(1 - (1-\\lambda)^{2t}\\right)}

    and the asymptotic ones drop the bracket. The chart signals ``+1`` (``-1``) when
    :math:`E_t` is above (below) the limit. After a signal ``E`` and ``t`` restart at 0; with
    exact limits this also narrows the limits again, like a fast initial response.
    """

    __slots__ = ("_lam", "_L", "_exact", "_keep", "_var_factor", "_q", "_limit_inf", "_e", "_t")

    def __init__(self, lam: float = 0.1, L: float = 2.814, exact_limits: bool = True) -> None:
        lam_ = _finite("lam", lam)
        if not 0.0 < lam_ <= 1.0:
            raise ValueError(f"lam must be in (0, 1], got {lam!r}")
        self._lam = lam_
        self._L = _positive("L", L)
        if not isinstance(exact_limits, (bool, np.bool_)):
            raise ValueError(f"exact_limits must be a bool, got {exact_limits!r}")
        self._exact = bool(exact_limits)
        self._keep = 1.0 - lam_
        self._var_factor = lam_ / (2.0 - lam_)
        self._q = self._keep * self._keep
        self._limit_inf = self._L * math.sqrt(self._var_factor)
        self.reset()

    def params(self) -> dict:
        """Parameters as a plain dict."""
        return {"lam": self._lam, "L": self._L, "exact_limits": self._exact}

    def reset(self) -> None:
        """Restart the EWMA at 0 and the limit clock at t = 0."""
        self._e = 0.0
        self._t = 0

    @property
    def value(self) -> float:
        """Current EWMA value."""
        return self._e

    def step(self, z: float) -> EwmaStep:
        """Feed one standardized residual."""
        z = float(z)
        if not math.isfinite(z):
            raise ValueError(f"z must be finite, got {z!r}")
        t = self._t + 1
        e = self._lam * z + self._keep * self._e
        if self._exact:
            limit = self._L * math.sqrt(self._var_factor * (1.0 - self._q**t))
        else:
            limit = self._limit_inf
        if e > limit:
            signal = 1
        elif e < -limit:
            signal = -1
        else:
            signal = 0
        if signal:
            self._e = 0.0
            self._t = 0
        else:
            self._e = e
            self._t = t
        return EwmaStep(e, limit, signal)

    def to_state(self) -> dict:
        """Plain-data snapshot (parameters and state)."""
        return {
            "schema": SCHEMA,
            "kind": "ewma",
            "params": self.params(),
            "e": self._e,
            "t": self._t,
        }

    @classmethod
    def from_state(cls, state: dict) -> "Ewma":
        """Rebuild a detector from :meth:`to_state` output."""
        state = _check_state(state, "ewma")
        obj = _construct(cls, state["params"])
        obj._e = _finite("e", _get(state, "e"))
        obj._t = _count("t", _get(state, "t"), 0)
        return obj


# ----------------------------------------------------------------------------------------------
# proper scores of the predictive distribution
# ----------------------------------------------------------------------------------------------

# Above this argument the asymptotic series for ln Γ(x + 1/2) - ln Γ(x) is accurate to a few
# ulp, whereas the difference of two large lgamma values loses digits as x grows.
_G_SWITCH = 30.0


def _half_gamma_ratio(x: float) -> float:
    """ln Γ(x + 1/2) - ln Γ(x) for scalar x > 0."""
    if x < _G_SWITCH:
        return math.lgamma(x + 0.5) - math.lgamma(x)
    inv = 1.0 / x
    inv2 = inv * inv
    return 0.5 * math.log(x) + inv * (
        -0.125 + inv2 * (1.0 / 192.0 + inv2 * (-1.0 / 640.0 + inv2 * (17.0 / 14336.0)))
    )


def _half_gamma_ratio_array(x: np.ndarray) -> np.ndarray:
    small = x < _G_SWITCH
    xs = np.where(small, x, 1.0)
    xl = np.where(small, _G_SWITCH, x)
    direct = scipy.special.gammaln(xs + 0.5) - scipy.special.gammaln(xs)
    inv = 1.0 / xl
    inv2 = inv * inv
    series = 0.5 * np.log(xl) + inv * (
        -0.125 + inv2 * (1.0 / 192.0 + inv2 * (-1.0 / 640.0 + inv2 * (17.0 / 14336.0)))
    )
    return np.where(small, direct, series)


def _is_scalar(*args: Any) -> bool:
    for a in args:
        if isinstance(a, bool) or not isinstance(a, (float, int)):
            return False
    return True


def _first_bad(arr: np.ndarray, ok: np.ndarray) -> Any:
    return arr[~ok].flat[0].item()


def _check_scale_scalar(name: str, scale: float) -> float:
    s = float(scale)
    if not (s > 0.0 and s < _INF):
        raise ValueError(f"{name} must be finite and > 0, got {scale!r}")
    return s


def _check_dof_scalar(dof: float, minimum: float) -> float:
    d = float(dof)
    if not d > minimum:  # also rejects nan
        raise ValueError(f"dof must be > {minimum:g} (inf allowed), got {dof!r}")
    return d


def _arrays(y: Any, mu: Any, scale: Any, name: str, dof: Any = None) -> tuple:
    arrs = [np.asarray(y, dtype=float), np.asarray(mu, dtype=float), np.asarray(scale, dtype=float)]
    if dof is not None:
        arrs.append(np.asarray(dof, dtype=float))
    arrs = np.broadcast_arrays(*arrs)
    s = arrs[2]
    ok = (s > 0.0) & np.isfinite(s)
    if not np.all(ok):
        raise ValueError(f"{name} must be finite and > 0, got {_first_bad(s, ok)!r}")
    return tuple(arrs)


def _check_dof_array(dof: np.ndarray, minimum: float) -> None:
    ok = dof > minimum
    if not np.all(ok):
        raise ValueError(f"dof must be > {minimum:g} (inf allowed), got {_first_bad(dof, ok)!r}")


def _out(x: np.ndarray) -> Any:
    return float(x) if x.ndim == 0 else x


def log_score_normal(y: Any, mu: Any, sigma: Any) -> Any:
    """Negative log predictive density of ``y`` under N(mu, sigma^2).

    Parameters
    ----------
    y, mu, sigma : float or array_like
        Observation, predictive mean and predictive standard deviation (``> 0``); broadcast.

    Returns
    -------
    float or ndarray
        :math:`-\\ln p(y)`; a float when all inputs are scalars.

    Notes
    -----
    .. math:: -\\ln p(y) = \\tfrac12 \\ln(2\\pi) + \\ln\\sigma + \\tfrac12 z^2,
              \\quad z = (y - \\mu)/\\sigma.
    """
    if _is_scalar(y, mu, sigma):
        s = _check_scale_scalar("sigma", sigma)
        z = (y - mu) / s
        return _HALF_LOG_2PI + math.log(s) + 0.5 * z * z
    y_, mu_, s_ = _arrays(y, mu, sigma, "sigma")
    z = (y_ - mu_) / s_
    return _out(_HALF_LOG_2PI + np.log(s_) + 0.5 * z * z)


def _t_log_density_std(z: float, dof: float) -> float:
    """ln f_nu(z) for the standard Student-t."""
    return (
        _half_gamma_ratio(0.5 * dof)
        - 0.5 * math.log(dof)
        - _HALF_LOG_PI
        - 0.5 * (dof + 1.0) * math.log1p(z * z / dof)
    )


def _t_log_density_std_array(z: np.ndarray, dof: np.ndarray) -> np.ndarray:
    return (
        _half_gamma_ratio_array(0.5 * dof)
        - 0.5 * np.log(dof)
        - _HALF_LOG_PI
        - 0.5 * (dof + 1.0) * np.log1p(z * z / dof)
    )


def log_score_t(y: Any, mu: Any, scale: Any, dof: Any) -> Any:
    """Negative log predictive density of ``y`` under a location-scale Student-t.

    Parameters
    ----------
    y, mu : float or array_like
        Observation and location.
    scale : float or array_like
        Scale, ``> 0``.
    dof : float or array_like
        Degrees of freedom, ``> 0``; ``inf`` gives :func:`log_score_normal` exactly.

    Returns
    -------
    float or ndarray
        :math:`-\\ln p(y)`; a float when all inputs are scalars.

    Notes
    -----
    With :math:`z = (y - \\mu)/s`,

    .. math::

        -\\ln p(y) = \\ln s - \\ln\\Gamma\\!\\left(\\tfrac{\\nu+1}{2}\\right)
        + \\ln\\Gamma\\!\\left(\\tfrac{\\nu}{2}\\right) + \\tfrac12\\ln(\\nu\\pi)
        + \\tfrac{\\nu+1}{2}\\ln\\!\\left(1 + \\tfrac{z^2}{\\nu}\\right).

    The gamma-function difference :math:`g(x) = \\ln\\Gamma(x+\\frac12) - \\ln\\Gamma(x)` is
    evaluated for :math:`x \\ge 30` from its asymptotic series
    :math:`\\frac12\\ln x - \\frac{1}{8x} + \\frac{1}{192x^3} - \\frac{1}{640x^5}
    + \\frac{17}{14336x^7}` (from Stirling's series with Bernoulli polynomials), which stays
    accurate for very large :math:`\\nu`.
    """
    if _is_scalar(y, mu, scale, dof):
        s = _check_scale_scalar("scale", scale)
        d = _check_dof_scalar(dof, 0.0)
        z = (y - mu) / s
        if d == _INF:
            return _HALF_LOG_2PI + math.log(s) + 0.5 * z * z
        return math.log(s) - _t_log_density_std(z, d)
    y_, mu_, s_, d_ = _arrays(y, mu, scale, "scale", dof)
    _check_dof_array(d_, 0.0)
    z = (y_ - mu_) / s_
    inf = np.isinf(d_)
    d_safe = np.where(inf, 2.0, d_)
    t_part = np.log(s_) - _t_log_density_std_array(z, d_safe)
    n_part = _HALF_LOG_2PI + np.log(s_) + 0.5 * z * z
    return _out(np.where(inf, n_part, t_part))


def crps_normal(y: Any, mu: Any, sigma: Any) -> Any:
    """Continuous ranked probability score of N(mu, sigma^2) at ``y`` (closed form).

    Parameters
    ----------
    y, mu, sigma : float or array_like
        Observation, predictive mean and standard deviation (``> 0``); broadcast.

    Returns
    -------
    float or ndarray
        CRPS in the units of ``y``; a float when all inputs are scalars.

    Notes
    -----
    :math:`\\mathrm{CRPS}(F, y) = \\int (F(x) - \\mathbf 1\\{x \\ge y\\})^2 dx`; for the normal
    (Gneiting & Raftery 2007), with :math:`z = (y-\\mu)/\\sigma`,

    .. math::

        \\mathrm{CRPS} = \\sigma\\left[z\\,(2\\Phi(z) - 1) + 2\\varphi(z)
        - \\frac{1}{\\sqrt\\pi}\\right].

    :math:`z(2\\Phi(z)-1)` is evaluated as :math:`|z|(1 - 2\\Phi(-|z|))` so that the tail
    probability keeps its relative accuracy.
    """
    if _is_scalar(y, mu, sigma):
        s = _check_scale_scalar("sigma", sigma)
        z = (y - mu) / s
        az = abs(z)
        tail = 0.5 * math.erfc(az / _SQRT2)
        pdf = _INV_SQRT_2PI * math.exp(-0.5 * z * z)
        return s * (az * (1.0 - 2.0 * tail) + 2.0 * pdf - _INV_SQRT_PI)
    y_, mu_, s_ = _arrays(y, mu, sigma, "sigma")
    z = (y_ - mu_) / s_
    az = np.abs(z)
    tail = scipy.special.ndtr(-az)
    pdf = _INV_SQRT_2PI * np.exp(-0.5 * z * z)
    return _out(s_ * (az * (1.0 - 2.0 * tail) + 2.0 * pdf - _INV_SQRT_PI))


def _crps_t_std_const(dof: float) -> float:
    """2 sqrt(nu)/(nu - 1) * B(1/2, nu - 1/2) / B(1/2, nu/2)^2 for scalar nu > 1."""
    log_ratio = 2.0 * _half_gamma_ratio(0.5 * dof) - _half_gamma_ratio(dof - 0.5) - _HALF_LOG_PI
    return 2.0 * math.sqrt(dof) / (dof - 1.0) * math.exp(log_ratio)


def crps_t(y: Any, mu: Any, scale: Any, dof: Any) -> Any:
    """CRPS of a location-scale Student-t predictive at ``y`` (closed form).

    Parameters
    ----------
    y, mu : float or array_like
        Observation and location.
    scale : float or array_like
        Scale, ``> 0``.
    dof : float or array_like
        Degrees of freedom, ``> 1`` (the CRPS is infinite for ``dof <= 1``); ``inf`` gives
        :func:`crps_normal` exactly.

    Returns
    -------
    float or ndarray
        CRPS in the units of ``y``; a float when all inputs are scalars.

    Notes
    -----
    For the standard t with :math:`\\nu > 1` degrees of freedom, CDF :math:`F_\\nu` and density
    :math:`f_\\nu`, and :math:`z = (y - \\mu)/s`,

    .. math::

        \\mathrm{CRPS} = s\\left[z\\,(2F_\\nu(z) - 1)
        + 2 f_\\nu(z)\\,\\frac{\\nu + z^2}{\\nu - 1}
        - \\frac{2\\sqrt{\\nu}}{\\nu - 1}
          \\frac{B(\\frac12, \\nu - \\frac12)}{B(\\frac12, \\frac\\nu2)^2}\\right].

    The beta-function ratio equals :math:`\\exp(2g(\\nu/2) - g(\\nu - \\frac12))/\\sqrt\\pi`
    with :math:`g(x) = \\ln\\Gamma(x+\\frac12) - \\ln\\Gamma(x)` (see :func:`log_score_t`);
    as :math:`\\nu \\to \\infty` the bracket tends to the normal one.
    """
    if _is_scalar(y, mu, scale, dof):
        s = _check_scale_scalar("scale", scale)
        d = _check_dof_scalar(dof, 1.0)
        if d == _INF:
            return crps_normal(y, mu, s)
        z = (y - mu) / s
        return s * _crps_t_std(z, d)
    y_, mu_, s_, d_ = _arrays(y, mu, scale, "scale", dof)
    _check_dof_array(d_, 1.0)
    z = (y_ - mu_) / s_
    inf = np.isinf(d_)
    d = np.where(inf, 2.0, d_)
    az = np.abs(z)
    tail = scipy.special.stdtr(d, -az)
    pdf = np.exp(_t_log_density_std_array(z, d))
    log_ratio = (
        2.0 * _half_gamma_ratio_array(0.5 * d) - _half_gamma_ratio_array(d - 0.5) - _HALF_LOG_PI
    )
    const = 2.0 * np.sqrt(d) / (d - 1.0) * np.exp(log_ratio)
    t_part = s_ * (az * (1.0 - 2.0 * tail) + 2.0 * pdf * (d + z * z) / (d - 1.0) - const)
    n_part = crps_normal(y_, mu_, s_)
    return _out(np.where(inf, n_part, t_part))


def _crps_t_std(z: float, dof: float) -> float:
    az = abs(z)
    tail = float(scipy.special.stdtr(dof, -az))
    pdf = math.exp(_t_log_density_std(z, dof))
    return (
        az * (1.0 - 2.0 * tail) + 2.0 * pdf * (dof + z * z) / (dof - 1.0) - _crps_t_std_const(dof)
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

    def step(self, std: float, learn: bool = False) -> StdBaselineStep:
        """Judge one predictive std against the baseline; learn from it if ``learn``."""
        std = float(std)
        if not (std > 0.0 and std < _INF):
            raise ValueError(f"std must be finite and > 0, got {std!r}")
        if self._n:
            base = math.exp(self._lsum / self._wsum)
            rat = std / base
            too_rat = self._ratio is not None and rat > self._ratio
        else:
            base = rat = math.nan
            too_rat = False
        too_abs = self._limit_abs is not None and std > self._limit_abs
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


# ----------------------------------------------------------------------------------------------
# input region
# ----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RegionStep:
    """Result of :meth:`InputRegion.step`: distance (nan while too few updates), flag."""

    distance: float
    outside: bool


def _vector(name: str, x: Any, n: int) -> np.ndarray:
    try:
        v = np.asarray(x, dtype=float)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a vector of {n} numbers, got {x!r}") from None
    if v.shape != (n,):
        raise ValueError(f"{name} must have shape ({n},), got shape {v.shape}: {x!r}")
    if not np.all(np.isfinite(v)):
        raise ValueError(f"{name} must be finite, got {x!r}")
    return v


class InputRegion:
    """Exponentially weighted mean and covariance of the inputs seen at accepted lab results.

    Parameters
    ----------
    n_inputs : int
        Length of the input vectors, ``>= 1``.
    half_life : float
        Half-life of the weights in updates, ``> 0``.
    limit : float
        Flag a point whose Mahalanobis distance exceeds this value, ``> 0``.
    ridge : float, default 1e-8
        Relative ridge added to the covariance before it is inverted, ``>= 0``.

    Notes
    -----
    With :math:`w = 2^{-1/h}` and weight :math:`w^{n-i}` on the i-th of n updates, the mean and
    covariance are the reliability-weighted estimates

    .. math::

        \\bar x = \\frac{\\sum_i w_i x_i}{V_1}, \\quad
        C = \\frac{\\sum_i w_i (x_i - \\bar x)(x_i - \\bar x)^T}{V_1 - V_2/V_1}, \\quad
        V_1 = \\sum_i w_i,\\ V_2 = \\sum_i w_i^2,

    (the weighting of ``numpy.cov(..., aweights=...)``), updated recursively by West's
    weighted algorithm: after decaying the old sums by ``w``, with :math:`\\delta = x - \\bar x`,
    :math:`V_1 \\leftarrow V_1 + 1`, :math:`\\bar x \\leftarrow \\bar x + \\delta / V_1` and the
    scatter gains :math:`\\delta\\delta^T (V_1 - 1)/V_1`.

    The distance is :math:`d(x) = \\sqrt{(x - \\bar x)^T C_r^{-1} (x - \\bar x)}` computed by a
    Cholesky solve, with :math:`C_r = C + \\rho\\,\\mathrm{diag}(\\max(C_{jj}, f))` and floor
    :math:`f = 10^{-12}\\,\\mathrm{tr}(C)/n`. The ridge is relative to each input's own variance
    rather than to the trace alone so that inputs in very different units are regularised
    alike; the trace floor keeps an input that has not varied at all from making
    :math:`C_r` singular. It is nan until ``n_inputs + 1`` updates have been made, and when
    every input has been constant (zero trace) the distance is 0 at the mean and inf elsewhere.
    """

    __slots__ = (
        "_n_inputs",
        "_half_life",
        "_limit",
        "_ridge",
        "_w",
        "_v1",
        "_v2",
        "_mean",
        "_scatter",
        "_count",
        "_chol",
        "_chol_inv",
    )

    def __init__(self, n_inputs: int, half_life: float, limit: float, ridge: float = 1e-8) -> None:
        self._n_inputs = _count("n_inputs", n_inputs, 1)
        self._half_life = _positive("half_life", half_life)
        self._limit = _positive("limit", limit)
        self._ridge = _nonnegative("ridge", ridge)
        self._w = _decay(self._half_life)
        self.reset()

    def params(self) -> dict:
        """Parameters as a plain dict."""
        return {
            "n_inputs": self._n_inputs,
            "half_life": self._half_life,
            "limit": self._limit,
            "ridge": self._ridge,
        }

    def reset(self) -> None:
        """Forget all inputs."""
        n = self._n_inputs
        self._v1 = 0.0
        self._v2 = 0.0
        self._mean = np.zeros(n)
        self._scatter = np.zeros((n, n))
        self._count = 0
        self._chol = None
        self._chol_inv = None

    @property
    def count(self) -> int:
        """Number of updates."""
        return self._count

    @property
    def mean(self) -> np.ndarray:
        """Weighted mean (copy)."""
        return self._mean.copy()

    @property
    def cov(self) -> np.ndarray:
        """Weighted covariance without ridge (nan before two updates)."""
        denom = self._v1 - self._v2 / self._v1 if self._v1 > 0.0 else 0.0
        if self._count < 2 or not denom > 0.0:
            return np.full((self._n_inputs, self._n_inputs), np.nan)
        return self._scatter / denom

    def update(self, x: Any) -> None:
        """Add one input vector (weight 1, older ones decayed)."""
        v = _vector("x", x, self._n_inputs)
        w = self._w
        old = w * self._v1
        self._v1 = old + 1.0
        self._v2 = w * w * self._v2 + 1.0
        delta = v - self._mean
        self._mean = self._mean + delta / self._v1
        self._scatter = w * self._scatter + np.outer(delta, delta) * (old / self._v1)
        self._count += 1
        self._chol = None
        self._chol_inv = None

    def _factor(self) -> Any:
        if self._chol is None:
            c = self.cov
            tr = float(np.trace(c))
            if not tr > 0.0:
                self._chol = "degenerate"
            else:
                floor = 1e-12 * tr / self._n_inputs
                reg = c + np.diag(self._ridge * np.maximum(np.diag(c), floor))
                try:
                    self._chol = np.linalg.cholesky(reg)
                except np.linalg.LinAlgError:
                    self._chol = "degenerate"
        return self._chol

    def distance(self, x: Any) -> float:
        """Mahalanobis distance of ``x`` from the weighted mean (nan until n_inputs + 1 updates)."""
        v = _vector("x", x, self._n_inputs)
        if self._count < self._n_inputs + 1:
            return math.nan
        chol = self._factor()
        d = v - self._mean
        if isinstance(chol, str):
            return 0.0 if not np.any(d) else math.inf
        y = scipy.linalg.solve_triangular(chol, d, lower=True, check_finite=False)
        return float(math.sqrt(float(y @ y)))

    def distances(self, X: Any) -> np.ndarray:
        """Mahalanobis distances of the rows of ``X`` (k, n_inputs) in one triangular solve.

        Same values as :meth:`distance` row by row (nan until ``n_inputs + 1`` updates).
        """
        A = np.asarray(X, dtype=float)
        if A.ndim != 2 or A.shape[1] != self._n_inputs:
            raise ValueError(f"X must have shape (k, {self._n_inputs}), got {np.shape(X)}")
        if self._count < self._n_inputs + 1:
            return np.full(A.shape[0], math.nan)
        chol = self._factor()
        D = A - self._mean
        if isinstance(chol, str):
            return np.where(np.any(D != 0, axis=1), math.inf, 0.0)
        # one product with the inverse factor (kept with the factor) instead of a solve
        # with many right-hand sides, which costs LAPACK several times more for these
        # narrow factors; the distances agree with `distance` to rounding (tested)
        if self._chol_inv is None:
            inv, info = _dtrtri(chol, lower=1)
            if info != 0:  # pragma: no cover - the Cholesky factor has a positive diagonal
                raise np.linalg.LinAlgError(f"singular region factor (info={info})")
            self._chol_inv = inv
        Y = self._chol_inv @ D.T
        return np.sqrt(np.einsum("ij,ij->j", Y, Y))

    def step(self, x: Any, learn: bool = False) -> RegionStep:
        """Distance of ``x`` from the region and the flag; then learn ``x`` if ``learn``."""
        dist = self.distance(x)
        if learn:
            self.update(x)
        return RegionStep(dist, bool(dist > self._limit))

    def to_state(self) -> dict:
        """Plain-data snapshot (parameters and state; arrays as lists)."""
        return {
            "schema": SCHEMA,
            "kind": "input_region",
            "params": self.params(),
            "v1": self._v1,
            "v2": self._v2,
            "mean": self._mean.tolist(),
            "scatter": self._scatter.tolist(),
            "count": self._count,
        }

    @classmethod
    def from_state(cls, state: dict) -> "InputRegion":
        """Rebuild from :meth:`to_state` output."""
        state = _check_state(state, "input_region")
        obj = _construct(cls, state["params"])
        n = obj._n_inputs
        obj._v1 = _nonnegative("v1", _get(state, "v1"))
        obj._v2 = _nonnegative("v2", _get(state, "v2"))
        obj._mean = _vector("mean", _get(state, "mean"), n)
        scatter = np.asarray(_get(state, "scatter"), dtype=float)
        if scatter.shape != (n, n) or not np.all(np.isfinite(scatter)):
            raise ValueError(f"scatter must be a finite {n}x{n} matrix, got {state['scatter']!r}")
        obj._scatter = scatter
        obj._count = _count("count", _get(state, "count"), 0)
        return obj


# ----------------------------------------------------------------------------------------------
# posterior drift
# ----------------------------------------------------------------------------------------------


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


# ----------------------------------------------------------------------------------------------
# trust state machine
# ----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class TrustStep:
    """Result of :meth:`Trust.step`.

    ``reasons`` holds ``(name, level, value, limit)`` for every held reason, sorted by name,
    with its held level and the last reported value and limit. ``acknowledged`` is True when
    there is at least one held reason and all of them have been acknowledged at their current
    level.
    """

    state: str
    level: int
    changed: bool
    old: str
    reasons: tuple
    acknowledged: bool


class Trust:
    """Trust level of a model from named alarm reasons, with hysteresis.

    Parameters
    ----------
    levels : tuple of str, default ("normal", "caution", "untrusted")
        Names of the levels, lowest first; at least two distinct non-empty names.
    clear_after_count : int, default 3
        Consecutive steps a reason (at a level) must be absent before it clears, ``>= 1``.
    clear_after_time : float, default 0.0
        Clock time it must also have been absent, ``>= 0``.

    Notes
    -----
    Each :meth:`step` receives the clock value ``t`` and the currently *active* reasons as
    ``{name: (level, value, limit)}`` with ``1 <= level < len(levels)``. A reason is held at
    level :math:`\\ell` from the first step it is active at :math:`\\ell` or above; it is
    released from :math:`\\ell` once it has been below :math:`\\ell` (or absent) for at least
    ``clear_after_count`` consecutive steps *and* ``t - t_first >= clear_after_time``, where
    ``t_first`` is the clock value of the first of those steps. Raising is immediate; any step
    at :math:`\\ell` or above restarts the countdown for :math:`\\ell`, so a condition that
    flickers never clears and the state does not flap. A reason's held level is the highest
    level still held; the model's level is the maximum over held reasons (0 when none).

    :meth:`acknowledge` marks the held reasons as seen at their current level. A reason that
    later rises to a higher level, or clears and comes back, is unacknowledged again.
    """

    __slots__ = ("_levels", "_count", "_time", "_reasons", "_level", "_n", "_last_t")

    def __init__(
        self,
        levels: tuple = ("normal", "caution", "untrusted"),
        clear_after_count: int = 3,
        clear_after_time: float = 0.0,
    ) -> None:
        if isinstance(levels, str) or not isinstance(levels, (tuple, list)):
            raise ValueError(f"levels must be a tuple of names, got {levels!r}")
        lv = tuple(levels)
        if len(lv) < 2 or len(set(lv)) != len(lv):
            raise ValueError(f"levels must hold at least two distinct names, got {levels!r}")
        for name in lv:
            if not isinstance(name, str) or not name:
                raise ValueError(f"level names must be non-empty strings, got {name!r}")
        self._levels = lv
        self._count = _count("clear_after_count", clear_after_count, 1)
        self._time = _nonnegative("clear_after_time", clear_after_time)
        self.reset()

    def params(self) -> dict:
        """Parameters as a plain dict."""
        return {
            "levels": list(self._levels),
            "clear_after_count": self._count,
            "clear_after_time": self._time,
        }

    def reset(self) -> None:
        """Back to the lowest level with no reasons held."""
        # name -> {"held": {level: [absent_steps, absent_since]}, "value", "limit", "ack"}
        self._reasons: dict[str, dict] = {}
        self._level = 0
        self._n = 0
        self._last_t = 0.0

    @property
    def state(self) -> str:
        """Name of the current level."""
        return self._levels[self._level]

    @property
    def level(self) -> int:
        """Index of the current level."""
        return self._level

    @property
    def reasons(self) -> tuple:
        """Held reasons as ``(name, level, value, limit)``, sorted by name."""
        return self._result(self._level).reasons

    @property
    def acknowledged(self) -> bool:
        """True when reasons are held and all are acknowledged at their current level."""
        return self._result(self._level).acknowledged

    def _check_active(self, active: Any) -> dict:
        if not isinstance(active, dict):
            raise ValueError(f"active must be a dict name -> (level, value, limit), got {active!r}")
        top = len(self._levels) - 1
        out = {}
        for name, entry in active.items():
            if not isinstance(name, str) or not name:
                raise ValueError(f"reason names must be non-empty strings, got {name!r}")
            if not isinstance(entry, (tuple, list)) or len(entry) != 3:
                raise ValueError(
                    f"reason {name!r} must map to (level, value, limit), got {entry!r}"
                )
            lvl, value, limit = entry
            if (
                isinstance(lvl, bool)
                or not isinstance(lvl, (int, np.integer))
                or not (1 <= lvl <= top)
            ):
                raise ValueError(
                    f"reason {name!r} level must be an integer in 1..{top}, got {lvl!r}"
                )
            out[name] = (int(lvl), _real(f"{name} value", value), _real(f"{name} limit", limit))
        return out

    def _result(self, old: int) -> TrustStep:
        reasons = []
        acked = bool(self._reasons)
        for name in sorted(self._reasons):
            r = self._reasons[name]
            held = max(r["held"])
            reasons.append((name, held, r["value"], r["limit"]))
            if r["ack"] < held:
                acked = False
        return TrustStep(
            self._levels[self._level],
            self._level,
            self._level != old,
            self._levels[old],
            tuple(reasons),
            acked,
        )

    def step(self, t: float, active: dict) -> TrustStep:
        """Advance one step at clock value ``t`` with the currently active reasons."""
        old = self._level
        self.advance(t, active)
        return self._result(old)

    def advance(self, t: float, active: dict, *, checked: bool = False) -> bool:
        """:meth:`step` without building its result; True if the level changed.

        With ``checked=True`` the caller vouches that ``active`` maps non-empty names to
        ``(level, value, limit)`` tuples of an int in ``1..len(levels)-1`` and two floats
        (the validation costs more than the step on a hot path).
        """
        t = _finite("t", t)
        if self._n and t < self._last_t:
            raise ValueError(f"t must not decrease: got {t!r} after {self._last_t!r}")
        act = active if checked else self._check_active(active)
        old = self._level
        for name, (lvl, value, limit) in act.items():
            r = self._reasons.get(name)
            if r is None:
                r = {"held": {}, "value": value, "limit": limit, "ack": 0}
                self._reasons[name] = r
            held = r["held"]
            for ell in range(1, lvl + 1):
                held[ell] = [0, 0.0]
            r["value"] = value
            r["limit"] = limit
        for name in list(self._reasons):
            r = self._reasons[name]
            now = act[name][0] if name in act else 0
            held = r["held"]
            for ell in list(held):
                if ell <= now:
                    continue
                rec = held[ell]
                if rec[0] == 0:
                    rec[1] = t
                rec[0] += 1
                if rec[0] >= self._count and t - rec[1] >= self._time:
                    del held[ell]
            if not held:
                del self._reasons[name]
            elif r["ack"] > max(held):
                r["ack"] = max(held)
        self._level = max((max(r["held"]) for r in self._reasons.values()), default=0)
        self._n += 1
        self._last_t = t
        return self._level != old

    def acknowledge(self) -> None:
        """Mark every held reason as acknowledged at its current level (does not clear it)."""
        for r in self._reasons.values():
            r["ack"] = max(r["held"])

    def to_state(self) -> dict:
        """Plain-data snapshot (parameters and state)."""
        reasons = {}
        for name, r in self._reasons.items():
            reasons[name] = {
                "held": {str(ell): [rec[0], rec[1]] for ell, rec in r["held"].items()},
                "value": r["value"],
                "limit": r["limit"],
                "ack": r["ack"],
            }
        return {
            "schema": SCHEMA,
            "kind": "trust",
            "params": self.params(),
            "reasons": reasons,
            "steps": self._n,
            "last_t": self._last_t,
        }

    @classmethod
    def from_state(cls, state: dict) -> "Trust":
        """Rebuild from :meth:`to_state` output."""
        state = _check_state(state, "trust")
        p = dict(state["params"])
        if "levels" in p:
            p["levels"] = tuple(p["levels"])
        obj = _construct(cls, p)
        top = len(obj._levels) - 1
        reasons = _get(state, "reasons")
        if not isinstance(reasons, dict):
            raise ValueError(f"reasons must be a dict, got {reasons!r}")
        for name, r in reasons.items():
            try:
                held = {int(ell): [int(rec[0]), float(rec[1])] for ell, rec in r["held"].items()}
                entry = {
                    "held": held,
                    "value": float(r["value"]),
                    "limit": float(r["limit"]),
                    "ack": int(r["ack"]),
                }
            except (KeyError, TypeError, ValueError, IndexError):
                raise ValueError(f"malformed state for reason {name!r}: {r!r}") from None
            if not held or not all(1 <= ell <= top for ell in held):
                raise ValueError(f"reason {name!r} has invalid held levels {sorted(held)!r}")
            obj._reasons[name] = entry
        obj._n = _count("steps", _get(state, "steps"), 0)
        obj._last_t = _finite("last_t", _get(state, "last_t"))
        obj._level = max((max(r["held"]) for r in obj._reasons.values()), default=0)
        return obj
