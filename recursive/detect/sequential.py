"""Sequential charts on the standardized residual z: :class:`Cusum`, :class:`PageHinkley`,
:class:`SpreadCusum`, :class:`Ewma` and their step results.

Each step is plain ``math`` float arithmetic, a few microseconds per lab result.
"""

import math
from dataclasses import dataclass

import numpy as np

from recursive.detect._common import (
    SCHEMA,
    _check_state,
    _construct,
    _count,
    _finite,
    _get,
    _nonnegative,
    _positive,
)


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
