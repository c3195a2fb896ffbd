"""Adaptive rates: the lab noise and one term's drift rate learned online from the innovations.

Two optional mechanisms, each a small step function on scalars, used by
:class:`recursive.Posterior` when it is given an :class:`Adaptation`:

:class:`VBNoise`
    the variational-Bayes adaptive Kalman filter of Särkkä and Nummenmaa (2009) for the
    measurement noise variance: an inverse-gamma posterior on the variance, a few
    fixed-point iterations per lab result, and a forgetting of its parameters between
    results. The weights then have an absolute covariance (process noise in the weights'
    own units, independent of the noise level), which is the physical reading of an offset
    that wanders by so many ppm per hour whatever the lab's repeatability.
:class:`RateMatch`
    covariance matching of the innovations (Mehra, 1972) for the variance rate of one
    term's random walk (the offset): exponentially weighted means of the squared
    innovation and of its predicted variance give the rate that makes them agree, kept
    within configured bounds.

Everything here is pure computation on floats: no clock, no state of its own. The state of
the rate matching is a frozen :class:`RateState` (replaced, never changed in place); the
state of the noise is the posterior's own ``(nu, ss)`` (``nu = 2 a``, ``ss = 2 b`` for the
inverse-gamma ``IG(a, b)``), so both are part of every snapshot of the posterior.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: schema of :meth:`RateState.to_dict`
STATE_SCHEMA = "recursive.adaptive.rate/1"
#: lab results learned before the matched rate replaces the configured one (the squared
#: innovation of one result has a relative sd of sqrt(2); after ten the mean's is 0.45)
MIN_RESULTS = 10


def _positive(name: str, v, *, allow_zero: bool = False) -> float:
    try:
        if isinstance(v, bool | str | bytes):
            raise TypeError
        x = float(v)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number, got {v!r}") from None
    if not math.isfinite(x) or x < 0.0 or (x == 0.0 and not allow_zero):
        need = ">= 0" if allow_zero else "> 0"
        raise ValueError(f"{name} must be a finite number {need}, got {v!r}")
    return x


def _delta(half_life: float | None, dt):
    if half_life is None:
        return 1.0 if np.ndim(dt) == 0 else np.ones(np.shape(dt))
    if np.ndim(dt) == 0:
        return 2.0 ** (-float(dt) / half_life)
    return np.exp2(-np.asarray(dt, dtype=float) / half_life)


@dataclass(frozen=True)
class VBNoise:
    """Variational-Bayes adaptive noise (Särkkä and Nummenmaa, 2009), scalar measurement.

    Parameters
    ----------
    half_life : float or None
        Time after which the noise statistics count half (the paper's forgetting factor
        ``rho = 2**(-dt / half_life)`` between results ``dt`` apart); ``None`` keeps them
        (a noise level assumed constant, learned ever more surely).
    iterations : int
        Fixed-point iterations per lab result (the paper uses a few; 2 to 5 converge to
        well below the noise of the estimate).

    Notes
    -----
    *Model.* ``y_k = h_k^T w_k + e_k``, ``e_k ~ N(0, sigma^2)``, with the weights a Gaussian
    with absolute covariance ``P`` (its time update the forgetting policy's, with process
    noise in the weights' units) and ``sigma^2 ~ IG(a, b)``, independent in the
    variational posterior ``q(w) q(sigma^2)``.

    *Prediction of the noise* (between results): ``a^- = a_0 + rho (a - a_0)``,
    ``b^- = b_0 + rho (b - b_0)``. With ``a_0 = b_0 = 0`` this is the paper's
    ``a^- = rho a``, ``b^- = rho b``; with the prior ``(a_0, b_0)`` as the floor (the
    stabilized forgetting of :class:`recursive.Stabilized`), a long silence of the lab
    returns the noise to its prior instead of to an improper one.

    *Update* (the paper's algorithm for one scalar measurement, ``m^-``, ``P^-`` the
    predicted weights, ``s = h^T P^- h``, ``v = y - h^T m^-``): ``a = a^- + 1/2``,
    ``b^{(0)} = b^-``, and for ``i = 1 .. N``

    .. math::

        \\hat\\sigma^2 = b^{(i-1)} / a, \\quad S = s + \\hat\\sigma^2, \\quad
        m^{(i)} = m^- + P^- h\\, v / S, \\quad P^{(i)} = P^- - P^- h h^T P^- / S,

        b^{(i)} = b^- + \\tfrac12 (y - h^T m^{(i)})^2 + \\tfrac12 h^T P^{(i)} h .

    The result is ``m^{(N)}``, ``P^{(N)}``, ``b = b^{(N)}``: a Kalman update with the noise
    variance of the last iteration. Only scalars enter the iteration:
    ``y - h^T m^{(i)} = v \\hat\\sigma^2 / S`` and
    ``h^T P^{(i)} h = s \\hat\\sigma^2 / S``, so :meth:`step` returns that variance and the
    caller makes one weighted update of its square-root information state.

    *Predictive.* ``sigma^2 ~ IG(a^-, b^-)`` makes ``e`` a Student-t with ``2 a^-`` degrees
    of freedom and scale ``sqrt(b^- / a^-)``; the prediction adds the independent Gaussian
    ``h^T w`` of variance ``s``. Their sum is approximated by a Student-t with ``2 a^-``
    degrees of freedom and scale ``sqrt(b^- / a^- + s)`` (exact when ``s = 0``; its
    tails are a little heavier than the sum's otherwise, so the intervals err on the wide
    side). The noise estimate reported is ``b / a``.
    """

    half_life: float | None = None
    iterations: int = 3

    def __post_init__(self):
        if self.half_life is not None:
            object.__setattr__(self, "half_life",
                               _positive("VBNoise half_life", self.half_life))
        it = self.iterations
        if isinstance(it, bool) or not isinstance(it, int | np.integer) or not 1 <= it <= 100:
            raise ValueError(f"VBNoise iterations must be an integer in 1..100, got {it!r}")
        object.__setattr__(self, "iterations", int(it))

    def forget(self, nu, ss, nu0: float, ss0: float, dt):
        """``(nu, ss)`` (``2 a``, ``2 b``) after times ``dt`` (scalar or per row)."""
        if self.half_life is None:
            return nu, ss
        d = _delta(self.half_life, dt)
        return nu0 + d * (nu - nu0), ss0 + d * (ss - ss0)

    def step(self, innovation: float, s: float, nu: float, ss: float):
        """One lab result: ``(sigma2, nu, ss)`` after it.

        ``innovation`` is ``y - h^T m^-``, ``s`` the predicted ``h^T P^- h`` (absolute),
        ``(nu, ss) = (2 a^-, 2 b^-)``. ``sigma2`` is the noise variance the weights are to be
        updated with (the last iteration's).
        """
        a = 0.5 * nu + 0.5
        b_prior = 0.5 * ss
        b = b_prior
        sigma2 = b / a
        for _ in range(self.iterations):
            sigma2 = b / a
            S = s + sigma2
            r = innovation * sigma2 / S
            b = b_prior + 0.5 * (r * r + s * sigma2 / S)
        return sigma2, 2.0 * a, 2.0 * b

    def step_unidentified(self, nu: float, ss: float, ref_var: float):
        """A lab result learned before a prediction was possible (a direction of the
        weights still flat): its fitted value equals ``y`` and its posterior variance is
        the noise variance, so ``b`` grows by ``sigma2 / 2`` (the limit of :meth:`step`
        for ``s -> inf``)."""
        sigma2 = ss / nu if nu > 0 and ss > 0 else ref_var
        return sigma2, nu + 1.0, ss + sigma2

    def to_dict(self) -> dict:
        return {"half_life": self.half_life, "iterations": self.iterations}


@dataclass(frozen=True)
class RateState:
    """State of :class:`RateMatch`: the rate in use and the weighted means behind it.

    Attributes
    ----------
    q : float
        The drift rate in use (variance per time unit, at the noise reference).
    weight : float
        Sum of the weights of the results in the means (``sum lam**k``).
    e2, base, span : float
        Weighted sums of the squared innovation, of its predicted variance without the
        term's drift, and of that drift's variance per unit of rate.
    n : int
        Results matched so far.
    """

    q: float
    weight: float = 0.0
    e2: float = 0.0
    base: float = 0.0
    span: float = 0.0
    n: int = 0

    def to_dict(self) -> dict:
        return {"schema": STATE_SCHEMA, "q": self.q, "weight": self.weight, "e2": self.e2,
                "base": self.base, "span": self.span, "n": self.n}

    @classmethod
    def from_dict(cls, d: dict) -> RateState:
        if not isinstance(d, dict) or d.get("schema") != STATE_SCHEMA:
            got = d.get("schema") if isinstance(d, dict) else type(d).__name__
            raise ValueError(f"adaptive rate state schema must be {STATE_SCHEMA!r}, "
                             f"got {got!r}")
        try:
            vals = {k: float(d[k]) for k in ("q", "weight", "e2", "base", "span")}
            n = int(d["n"])
        except (KeyError, TypeError, ValueError) as exc:
            raise ValueError(f"bad adaptive rate state: {exc!r}") from None
        if not all(math.isfinite(v) for v in vals.values()) or vals["q"] < 0 or n < 0:
            raise ValueError(f"bad adaptive rate state: {d!r}")
        return cls(n=n, **vals)


@dataclass(frozen=True)
class RateMatch:
    """Covariance matching (Mehra, 1972) of one term's random-walk variance rate.

    Parameters
    ----------
    term : int
        Index of the drifting weight (0: the constant, the offset).
    lo, hi : float
        Bounds of the rate (``0 <= lo <= hi``), in the policy's units.
    window : float
        Half-life of the weighted means, in lab results.

    Notes
    -----
    For result ``k`` with innovation ``v_k`` (observed minus predicted, before learning)
    the model predicts ``E[v_k^2] = S_k``, and the drift of term ``j`` over the gap
    ``dt_k`` adds exactly ``q D_k`` to it, with ``D_k = dt_k h_j^2 kappa_k``
    (``kappa_k = 1`` for an absolute covariance, ``s_k^2 / sigma_ref^2`` for a covariance
    scaled with the learned noise). With ``B_k = S_k - q_k D_k`` the predicted variance
    without that drift, matching the weighted means

    .. math::

        \\hat q = \\frac{\\sum_k \\lambda^{N-k} (v_k^2 - B_k)}
                       {\\sum_k \\lambda^{N-k} D_k}, \\qquad
        \\lambda = 2^{-1/\\text{window}},

    clipped to ``[lo, hi]``, is the rate for the next time update. At the true rate the
    filter is optimal, ``E[v_k^2] = S_k``, and the true rate is a fixed point of the
    recursion (Mehra's covariance-matching argument); a rate too low makes the filter lag,
    the innovations larger than predicted, and the estimate rises. The configured rate is
    kept until :data:`MIN_RESULTS` results have entered the means.
    """

    term: int
    lo: float
    hi: float
    window: float = 30.0

    def __post_init__(self):
        if isinstance(self.term, bool) or not isinstance(self.term, int | np.integer) \
                or self.term < 0:
            raise ValueError(f"RateMatch term must be an index >= 0, got {self.term!r}")
        object.__setattr__(self, "term", int(self.term))
        lo = _positive("RateMatch lo", self.lo, allow_zero=True)
        hi = _positive("RateMatch hi", self.hi, allow_zero=True)
        if not lo <= hi:
            raise ValueError(f"RateMatch needs lo <= hi, got lo={self.lo!r}, hi={self.hi!r}")
        object.__setattr__(self, "lo", lo)
        object.__setattr__(self, "hi", hi)
        object.__setattr__(self, "window", _positive("RateMatch window", self.window))

    def start(self, q: float) -> RateState:
        """The state before any result: the configured rate, clipped to the bounds."""
        return RateState(q=min(max(float(q), self.lo), self.hi))

    def step(self, st: RateState, v2: float, S: float, D: float) -> RateState:
        """The state after one learned result: squared innovation ``v2``, its predicted
        variance ``S`` (with the drift at the rate ``st.q``) and ``D``, that variance's
        share per unit of rate."""
        if not (math.isfinite(v2) and math.isfinite(S) and math.isfinite(D)) or D < 0:
            return st
        lam = 2.0 ** (-1.0 / self.window)
        base = S - st.q * D
        weight = lam * st.weight + 1.0
        e2 = lam * st.e2 + v2
        b = lam * st.base + base
        span = lam * st.span + D
        n = st.n + 1
        q = st.q
        if n >= MIN_RESULTS and span > 0.0:
            q = min(max((e2 - b) / span, self.lo), self.hi)
        return RateState(q=q, weight=weight, e2=e2, base=b, span=span, n=n)

    def to_dict(self) -> dict:
        return {"term": self.term, "lo": self.lo, "hi": self.hi, "window": self.window}


@dataclass(frozen=True)
class Adaptation:
    """What adapts online: the noise (:class:`VBNoise`), a drift rate (:class:`RateMatch`),
    or both."""

    noise: VBNoise | None = None
    rate: RateMatch | None = None

    def __post_init__(self):
        if self.noise is not None and not isinstance(self.noise, VBNoise):
            raise ValueError(f"Adaptation noise must be a VBNoise or None, got {self.noise!r}")
        if self.rate is not None and not isinstance(self.rate, RateMatch):
            raise ValueError(f"Adaptation rate must be a RateMatch or None, got {self.rate!r}")

    def to_dict(self) -> dict:
        return {"noise": None if self.noise is None else self.noise.to_dict(),
                "rate": None if self.rate is None else self.rate.to_dict()}

    @classmethod
    def from_dict(cls, d: dict | None) -> Adaptation | None:
        if d is None:
            return None
        if not isinstance(d, dict):
            raise ValueError(f"adaptation must be a dict, got {d!r}")
        try:
            n, r = d["noise"], d["rate"]
            return cls(None if n is None else VBNoise(n["half_life"], n["iterations"]),
                       None if r is None else RateMatch(r["term"], r["lo"], r["hi"],
                                                        r["window"]))
        except (KeyError, TypeError) as exc:
            raise ValueError(f"bad adaptation: {exc!r}") from None
