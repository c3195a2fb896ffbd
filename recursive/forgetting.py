"""Forgetting policies: how the posterior loses confidence as time passes.

A policy acts on the posterior in square-root information form (see
:class:`recursive.Posterior`): an upper-triangular ``R`` with ``R^T R = Lambda`` (the
precision in units of the noise variance), an information vector ``z`` with
``R^T z = eta = Lambda m``, and the noise statistics ``nu`` (degrees of freedom) and ``ss``
(weighted residual sum of squares). Each policy offers two operations:

``forget(R, z, nu, ss, prior, dt)``
    the exact time update applied before a learning step: ``R`` and ``z`` are changed in
    place, the new ``(nu, ss)`` are returned;
``widen(state, prior, phit, u, mean, dt, cache)``
    the predictive mean and leverage ``phi^T V phi`` after a time ``dt`` for a batch of
    rows, each with its own ``dt``, without touching the state. This is vectorized so that
    predictions between lab results cost O(n^2) per row.

Adding a policy means writing these two methods, ``to_dict`` and a branch in
:func:`forgetting_from_dict`; the tests that compare ``widen`` with ``forget`` followed by
a plain prediction then apply to it too.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from dataclasses import dataclass, field

import numpy as np

from recursive import _linalg
from recursive._linalg import solve_upper_t


@dataclass(frozen=True)
class Prior:
    """The prior in the scaled square-root information form the policies work in.

    Attributes
    ----------
    r0 : ndarray, shape (n,)
        Square root of the prior precision of each weight, in units of the noise
        variance (zero for a flat prior on that weight).
    z0 : ndarray, shape (n,)
        ``r0 * m0``, the prior information vector in square-root form.
    nu0, ss0 : float
        Prior degrees of freedom and sum of squares of the noise statistics.
    ref_var : float
        The noise variance that the scaled units refer to: the known noise variance, or
        the prior guess ``sigma0**2`` when the noise is learned.
    """

    r0: np.ndarray
    z0: np.ndarray
    nu0: float
    ss0: float
    ref_var: float


def _check_half_life(half_life: float) -> float:
    try:
        h = float(half_life)
    except (TypeError, ValueError):
        raise ValueError(f"half_life must be a positive number, got {half_life!r}") from None
    if not h > 0.0 or math.isnan(h):
        raise ValueError(f"half_life must be a positive number, got {half_life!r}")
    return h


def _delta(half_life: float, dt):
    """``2**(-dt / half_life)``, scalar or array."""
    if isinstance(dt, float):
        return 2.0 ** (-dt / half_life)
    return np.exp2(-np.asarray(dt, dtype=float) / half_life)


class Forgetting(ABC):
    """Base class of the forgetting policies."""

    kind = "none"
    #: whether a time update can make an identified posterior unidentified (underflow)
    may_lose_rank = False
    #: whether `widen` uses ``u = R^{-T} phi`` and the unwidened mean (else they are None)
    needs_u = True

    @abstractmethod
    def forget(self, R, z, nu, ss, prior: Prior, dt: float):
        """Apply a time ``dt`` to ``R`` and ``z`` in place; return the new ``(nu, ss)``."""

    @abstractmethod
    def widen(self, R, z, nu, ss, prior: Prior, phit, u, mean, dt, cache: dict):
        """Return per-row ``(mean, leverage, nu, ss)`` after times ``dt`` (arrays).

        Called by :meth:`Posterior.predict` inside ``np.errstate`` that silences division
        by zero, overflow and invalid operations (a prediction of a state that forgot
        everything has an infinite leverage).
        """

    @abstractmethod
    def to_dict(self) -> dict:
        """Plain-data description, inverse of :func:`forgetting_from_dict`."""

    def check_features(self, n: int) -> None:
        """Raise ValueError if the policy cannot serve a posterior with ``n`` weights."""
        return None  # the scalar policies serve any n


@dataclass(frozen=True)
class _HalfLife(Forgetting):
    """A policy given by one half-life (checked positive)."""

    half_life: float

    def __post_init__(self):
        object.__setattr__(self, "half_life", _check_half_life(self.half_life))

    def to_dict(self):
        return {"kind": self.kind, "half_life": self.half_life}


@dataclass(frozen=True)
class Exponential(_HalfLife):
    """Exponential forgetting: discount all information by ``delta = 2**(-dt/half_life)``.

    Parameters
    ----------
    half_life : float
        Time (or number of samples) after which old information counts half.

    Notes
    -----
    The time update is ``Lambda <- delta Lambda``, ``eta <- delta eta``,
    ``nu <- delta nu``, ``ss <- delta ss``: the mean and the noise estimate are unchanged,
    the covariance grows by ``1/delta``. The prior is discounted too, so directions the
    data do not excite lose all information and the covariance grows without bound
    ("windup"). This is the classical baseline; :class:`Stabilized` avoids the windup.
    """

    kind = "exponential"
    may_lose_rank = True

    def forget(self, R, z, nu, ss, prior, dt):
        d = float(_delta(self.half_life, dt))
        s = math.sqrt(d)
        R *= s
        z *= s
        return nu * d, ss * d

    def widen(self, R, z, nu, ss, prior, phit, u, mean, dt, cache):
        d = _delta(self.half_life, dt)
        with np.errstate(divide="ignore"):
            lev = np.einsum("ij,ij->j", u, u) / d
        return mean, lev, nu * d, ss * d


@dataclass(frozen=True)
class Stabilized(_HalfLife):
    """Stabilized forgetting: flatten the posterior toward the prior.

    Parameters
    ----------
    half_life : float
        Time (or number of samples) after which old information counts half.

    Notes
    -----
    With ``delta = 2**(-dt/half_life)`` the time update is (Kulhavý & Zarrop, 1993)

    .. math::

        \\Lambda \\leftarrow \\delta \\Lambda + (1-\\delta) \\Lambda_0, \\quad
        \\eta \\leftarrow \\delta \\eta + (1-\\delta) \\eta_0, \\quad
        \\nu \\leftarrow \\delta \\nu + (1-\\delta) \\nu_0, \\quad
        ss \\leftarrow \\delta\\, ss + (1-\\delta) ss_0 .

    Since ``Lambda - Lambda_0`` stays positive semi-definite, the covariance never exceeds
    the prior covariance however long the gap between updates. After updates at times
    ``t_i`` the precision is ``Lambda_0 + sum_i 2**(-(t_N - t_i)/h) phi_i phi_i^T``:
    weighted ridge regression with the prior precision as a floor.

    In square-root form the update is one QR factorization of
    ``[sqrt(delta) R, sqrt(delta) z; sqrt(1-delta) R0, sqrt(1-delta) z0]``.

    For predictions over many rows with different gaps, the pencil
    ``(Lambda, Lambda_0)`` is diagonalized once: with ``X = R^{-T} D`` (``D = diag(r0)``)
    and ``X X^T = W diag(kappa) W^T``,
    ``phi^T V(delta) phi = sum_i g_i^2 / (delta + (1-delta) kappa_i)`` with
    ``g = W^T R^{-T} phi``, and the mean follows likewise, so each row costs O(n).
    """

    kind = "stabilized"

    def forget(self, R, z, nu, ss, prior, dt):
        d = float(_delta(self.half_life, dt))
        if d < 1.0:
            _linalg.stabilize(R, z, prior.r0, prior.z0, d)
        return d * nu + (1.0 - d) * prior.nu0, d * ss + (1.0 - d) * prior.ss0

    needs_u = False

    def _pencil(self, R, z, prior, cache):
        if "pencil" not in cache:
            inv_t = solve_upper_t(R, np.eye(R.shape[0]))  # R^{-T}
            x = inv_t * prior.r0  # R^{-T} D, D = diag(r0)
            kappa, w = np.linalg.eigh(x @ x.T)
            kappa = np.maximum(kappa, 0.0)
            c = w.T @ z
            c0 = w.T @ (x @ prior.z0)
            # g = W^T R^{-T} phi in one product; denominators kappa + (1 - kappa) delta
            # and numerators c0 + (c - c0) delta
            m = np.ascontiguousarray(w.T @ inv_t)
            cache["pencil"] = (m, np.ascontiguousarray(kappa), np.ascontiguousarray(c0),
                               np.ascontiguousarray(c - c0))
        return cache["pencil"]

    def widen(self, R, z, nu, ss, prior, phit, u, mean, dt, cache):
        m, kappa, c0, dc = self._pencil(R, z, prior, cache)
        # One kernel call per batch (recursive._linalg.stabilized_rows): for row j with
        # g = W^T R^{-T} phi_j, the mean is sum_i g_i (c0_i + dc_i delta_j) / q_i and the
        # leverage sum_i g_i^2 / q_i, q_i = kappa_i + (1 - kappa_i) delta_j. A q_i of 0 only
        # happens where delta underflowed to 0 in a direction without prior information:
        # nothing is known there any more, and the row gets an infinite leverage (reported
        # as not identified).
        P = np.ascontiguousarray(phit.T)
        dt = np.ascontiguousarray(dt, dtype=float)
        out = np.empty((3, P.shape[0]))
        _linalg.stabilized_rows(out, m, kappa, c0, dc, P, dt, self.half_life)
        d = out[2]
        dn = 1.0 - d
        return out[0], out[1], d * nu + dn * prior.nu0, d * ss + dn * prior.ss0


@dataclass(frozen=True)
class RandomWalk(Forgetting):
    """Random-walk weights: process noise added to the covariance (Kalman filter, F = I).

    Parameters
    ----------
    q : float
        Variance added to each weight per time unit (or per sample), in the weights' own
        units squared.
    noise_half_life : float, optional
        If given, the noise statistics ``nu`` and ``ss`` are discounted exponentially with
        this half-life; otherwise they are kept (the noise level is then assumed
        constant).

    Notes
    -----
    The time update is ``P <- P + q dt I`` with ``P`` the weight covariance. In the scaled
    units of the state (covariance divided by the reference noise variance
    ``sigma_ref^2``) this is ``V <- V + (q dt / sigma_ref^2) I``; with learned noise
    ``sigma_ref`` is the prior guess ``sigma0``, which keeps the update conjugate.

    In square-root information form the new factor is ``R' = U^{-T} R`` (and
    ``z' = U^{-T} z``), with ``U`` the lower-triangular factor of
    ``U^T U = I + c R R^T``, ``c = q dt / sigma_ref^2``, found by Householder reflections of
    ``[I; sqrt(c) R^T]``: then ``R'^T R' = Lambda (I + c Lambda)^{-1}``, the information
    form of ``V + c I``, by the push-through identity. ``U`` has a diagonal of at least 1,
    so no inverse of ``R`` is needed and the update also works before the weights are
    identified. It costs about ``n^3`` flops, against about ``3 n^3`` for rotating the
    classic SRIF array ``[-Rw, Rw, 0; R, 0, z]``, which gives the same result.
    """

    q: float
    noise_half_life: float | None = None
    kind = "random_walk"

    def __post_init__(self):
        try:
            q = float(self.q)
        except (TypeError, ValueError):
            raise ValueError(f"q must be a positive number, got {self.q!r}") from None
        if not q > 0.0 or not math.isfinite(q):
            raise ValueError(f"q must be a positive finite number, got {self.q!r}")
        object.__setattr__(self, "q", q)
        if self.noise_half_life is not None:
            object.__setattr__(self, "noise_half_life", _check_half_life(self.noise_half_life))

    def _noise(self, nu, ss, dt):
        if self.noise_half_life is None:
            return nu, ss
        d = _delta(self.noise_half_life, dt)
        return nu * d, ss * d

    def forget(self, R, z, nu, ss, prior, dt):
        if dt <= 0.0:
            return nu, ss
        _linalg.random_walk(R, z, self.q * dt / prior.ref_var)
        if self.noise_half_life is None:
            return nu, ss
        return self._noise(nu, ss, float(dt))

    def widen(self, R, z, nu, ss, prior, phit, u, mean, dt, cache):
        # phi^T (V + c I) phi = |u|^2 + c |phi|^2
        phi2 = np.einsum("ij,ij->j", phit, phit)
        lev = np.einsum("ij,ij->j", u, u) + (self.q * np.asarray(dt, float) / prior.ref_var) * phi2
        nu, ss = self._noise(nu, ss, dt)
        return mean, lev, nu, ss

    def to_dict(self):
        return {"kind": self.kind, "q": self.q, "noise_half_life": self.noise_half_life}


@dataclass(frozen=True)
class TermDrift(Forgetting):
    """Per-term random walks: each weight drifts at its own rate (diagonal process noise).

    Parameters
    ----------
    q : sequence of float, length n
        Variance added to weight ``j`` per time unit (or per sample), in the weight's own
        units squared; 0 for a weight that does not drift. Typically only the constant
        term drifts (an offset: feed composition, analyzer zero, fouling).
    half_life : float, optional
        If given, the whole posterior is also flattened toward the prior with this
        half-life, as :class:`Stabilized` does, before the drift is added; the noise
        statistics ``nu`` and ``ss`` then follow :class:`Stabilized` too. Otherwise they are
        kept (the noise level is assumed constant).

    Notes
    -----
    *Model.* ``w(t + dt) = w(t) + v``, ``v ~ N(0, dt Q)``, ``Q = diag(q)``: a Kalman filter
    with ``F = I``. The time update of the weight covariance is ``P <- P + dt Q``; in the
    scaled units of the state (covariance over the reference noise variance
    ``sigma_ref^2``) it is ``V <- V + C``, ``C = (dt / sigma_ref^2) Q``. With all ``q_j``
    equal this is :class:`RandomWalk`; with all zero, no forgetting.

    *Units with learned noise.* ``q`` is absolute at the noise prior guess, as in
    :class:`RandomWalk`: ``sigma_ref = sigma0`` and, given ``sigma^2``, the process noise
    is ``dt Q sigma^2 / sigma0^2``. Scaling with ``sigma^2`` keeps the update conjugate
    (the Normal-inverse-gamma form is kept exactly, the weights stay Student-t); a drift
    fixed in absolute units whatever ``sigma`` would not. Choose ``q`` at ``sigma0``.

    *Square-root information form.* ``Lambda' = Lambda (I + C Lambda)^{-1}`` and
    ``eta' = (I + Lambda C)^{-1} eta`` (the mean is unchanged). Only the ``k`` weights with
    ``q_j > 0`` matter: ``C`` is a sum of ``k`` rank-one terms, and each is applied
    exactly as ``R' = U^{-T} R``, ``U^T U = I + c_j R e_j e_j^T R^T``, with ``U`` in closed
    form (``recursive._givens.term_drift``): about ``4 j n`` flops for weight ``j``, a
    single row scaling for a constant first in the basis. No inverse of ``R`` is formed,
    so the update works before the weights are identified (a flat prior on the
    constant): zero rows and pivots of ``R`` stay where they are, and a weight nothing is
    known about stays so.

    *Prediction after a gap.* ``phi^T V' phi = phi^T V phi + (dt / sigma_ref^2)
    sum_j q_j phi_j^2``, the mean unchanged. With ``half_life`` the first term is the
    stabilized one (``delta = 2**(-dt/half_life)``):
    ``phi^T (delta Lambda + (1 - delta) Lambda_0)^{-1} phi``, from the pencil of
    :class:`Stabilized`, row by row.

    *Why stabilize all terms.* A half-life on some weights only is not an operation on
    the joint information (the weights are correlated through ``Lambda``); this policy
    flattens all of them and lets the drifting ones move faster. The composite update
    (flatten, then drift) is exact for one gap; two gaps ``dt1 + dt2`` differ slightly
    from one, as for any mix of two forgetting mechanisms.

    *Choosing q.* An offset that wanders by about ``s`` units in ``sqrt(T)`` (its change
    over a time ``T`` has standard deviation ``s``) has ``q = s^2 / T``: ``s`` units per
    square root of an hour is ``q = s^2 / 3600`` per second.
    """

    q: tuple
    half_life: float | None = None
    kind = "term_drift"
    # only a gap so long that dt q_j overflows (or, with a half-life, delta underflows)
    may_lose_rank = True
    _rates: np.ndarray = field(init=False, repr=False, compare=False)
    _terms: tuple = field(init=False, repr=False, compare=False)
    _stab: Stabilized | None = field(init=False, repr=False, compare=False)

    def __post_init__(self):
        raw = self.q
        if isinstance(raw, str | bytes | dict) or np.ndim(raw) != 1:
            raise ValueError(f"q must be a sequence of non-negative rates, one per term, "
                             f"got {raw!r}")
        vals = []
        for j, v in enumerate(raw):
            try:
                if isinstance(v, bool | str | bytes):
                    raise TypeError
                x = float(v)
            except (TypeError, ValueError):
                raise ValueError(f"q[{j}] must be a non-negative finite number, "
                                 f"got {v!r}") from None
            if not (x >= 0.0 and math.isfinite(x)):
                raise ValueError(f"q[{j}] must be a non-negative finite number, got {v!r}")
            vals.append(x)
        if not vals:
            raise ValueError(f"q must have one rate per term, got {raw!r}")
        object.__setattr__(self, "q", tuple(vals))
        rates = np.array(vals)
        rates.flags.writeable = False
        object.__setattr__(self, "_rates", rates)
        object.__setattr__(self, "_terms", tuple((j, x) for j, x in enumerate(vals) if x > 0))
        stab = None
        if self.half_life is not None:
            stab = Stabilized(self.half_life)
            object.__setattr__(self, "half_life", stab.half_life)
        object.__setattr__(self, "_stab", stab)

    @property
    def needs_u(self) -> bool:
        # with a half-life the leverage comes from the stabilized pencil, row by row
        return self._stab is None

    def check_features(self, n: int) -> None:
        if len(self.q) != n:
            raise ValueError(f"term_drift q must have one rate per term ({n}), got "
                             f"{len(self.q)}: {list(self.q)!r}")

    def forget(self, R, z, nu, ss, prior, dt):
        if dt <= 0.0:
            return nu, ss
        if self._stab is not None:
            nu, ss = self._stab.forget(R, z, nu, ss, prior, dt)
        if self._terms:
            _linalg.term_drift(R, z, self._rates, dt / prior.ref_var)
        return nu, ss

    def widen(self, R, z, nu, ss, prior, phit, u, mean, dt, cache):
        if self._stab is None:
            lev = np.einsum("ij,ij->j", u, u)
        else:
            mean, lev, nu, ss = self._stab.widen(R, z, nu, ss, prior, phit, None, None, dt,
                                                 cache)
        s = np.asarray(dt, dtype=float) / prior.ref_var
        # elementwise per row (no reduction over the batch), so rowwise results hold
        for j, qj in self._terms:
            p = phit[j]
            lev = lev + (s * qj) * (p * p)
        return mean, lev, nu, ss

    def to_dict(self):
        return {"kind": self.kind, "q": list(self.q), "half_life": self.half_life}


def forgetting_from_dict(d: dict | None) -> Forgetting | None:
    """Rebuild a policy from :meth:`Forgetting.to_dict` output (``None`` for no forgetting)."""
    if d is None:
        return None
    if not isinstance(d, dict) or "kind" not in d:
        raise ValueError(f"forgetting must be a dict with a 'kind', got {d!r}")
    kind = d["kind"]
    if kind == "exponential":
        return Exponential(d["half_life"])
    if kind == "stabilized":
        return Stabilized(d["half_life"])
    if kind == "random_walk":
        return RandomWalk(d["q"], d.get("noise_half_life"))
    if kind == "term_drift":
        return TermDrift(d["q"], d.get("half_life"))
    raise ValueError(f"unknown forgetting kind {kind!r}; expected exponential, stabilized, "
                     "random_walk or term_drift")
