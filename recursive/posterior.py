"""Recursive Bayesian linear regression in square-root information form."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
from scipy import special
from scipy.linalg import lapack

from recursive import _linalg
from recursive._linalg import full_rank, solve_upper
from recursive.adaptive import Adaptation, RateState
from recursive.forgetting import Forgetting, Prior, Stabilized, forgetting_from_dict
from recursive.quantile import t_quantile
from recursive.quantile import t_quantile_scalar as _quantile

_dtrtri = lapack.dtrtri

SCHEMA = 1
_LOG_2PI = math.log(2.0 * math.pi)


class OutOfOrderError(ValueError):
    """An update carries a time earlier than the last one learned.

    Attributes
    ----------
    t, t_last : float
        The offending time and the time of the last update.
    """

    def __init__(self, t: float, t_last: float):
        super().__init__(f"update at t={t!r} is earlier than the last update at t={t_last!r}")
        self.t = t
        self.t_last = t_last


@dataclass(frozen=True)
class Gate:
    """Robust gate on the standardized residual.

    Parameters
    ----------
    k : float
        A sample whose standardized residual satisfies ``|z| > k`` is not learned from.
    release : int or None
        After this many consecutive rejections *of the same sign* the gate opens: the
        samples are then learned from (reported with reason ``"gate_open"``) until one
        passes the gate again. An isolated outlier (a lab blunder) is rejected, while a real
        step change in the process, which produces a run of same-sign residuals, is not
        locked out for ever. ``None`` keeps the gate shut.

    Notes
    -----
    Under the model, consecutive residuals are independent, so ``release`` consecutive
    same-sign exceedances of ``k`` have probability ``(2 * Phi(-k) / 2)**release``; for
    ``k = 4`` and ``release = 3`` that is about ``3e-14``. Such a run is evidence of a
    change, not of outliers.
    """

    k: float
    release: int | None = 3

    def __post_init__(self):
        try:
            k = float(self.k)
        except (TypeError, ValueError):
            raise ValueError(f"gate k must be a positive number, got {self.k!r}") from None
        if not k > 0.0 or math.isnan(k):
            raise ValueError(f"gate k must be a positive number, got {self.k!r}")
        object.__setattr__(self, "k", k)
        if self.release is not None:
            if isinstance(self.release, bool) or not isinstance(self.release, int | np.integer) \
                    or self.release < 1:
                raise ValueError(f"gate release must be a positive integer or None, "
                                 f"got {self.release!r}")
            object.__setattr__(self, "release", int(self.release))

    def to_dict(self) -> dict:
        return {"k": self.k, "release": self.release}


@dataclass(frozen=True)
class Prediction:
    """Predictive distribution for one row or a batch of rows.

    Attributes
    ----------
    mean : float or ndarray
        Predictive mean ``phi^T m``.
    scale : float or ndarray
        Scale of the predictive: the standard deviation for a Gaussian, the scale of the
        Student-t otherwise.
    var, std : float or ndarray
        Predictive variance and its square root (``scale**2 * dof / (dof - 2)`` for a
        Student-t; infinite for ``dof <= 2``).
    dof : float or ndarray
        Degrees of freedom (``inf`` for a Gaussian predictive).
    leverage : float or ndarray
        ``phi^T V phi``, the weight uncertainty in units of the noise variance.
    identified : bool or ndarray
        False where the model cannot predict yet (flat prior not yet identified by the
        data); the other fields are then nan.
    """

    mean: float | np.ndarray
    scale: float | np.ndarray
    var: float | np.ndarray
    std: float | np.ndarray
    dof: float | np.ndarray
    leverage: float | np.ndarray
    identified: bool | np.ndarray

    def interval(self, level: float = 0.95):
        """Central predictive interval ``(lo, hi)`` with probability ``level``."""
        level = _check_level(level)
        q = t_quantile(np.asarray(self.dof, float), 0.5 + level / 2.0)
        half = q * np.asarray(self.scale, float)
        lo, hi = np.asarray(self.mean) - half, np.asarray(self.mean) + half
        if np.ndim(self.mean) == 0:
            return float(lo), float(hi)
        return lo, hi


class Step(NamedTuple):
    """The outcome of one :meth:`Posterior.update` (an immutable named tuple).

    Attributes
    ----------
    t : float or None
        Time of the sample (``None`` when counting samples).
    y : float
        The target value.
    mean, scale, std, dof : float
        One-step-ahead predictive distribution of ``y`` before learning from it.
    innovation : float
        ``y - mean``.
    z : float
        Standardized residual: the predictive CDF at ``y`` mapped to a standard normal
        quantile, so thresholds mean the same for Gaussian and Student-t predictives.
    logpdf : float
        Log predictive density of ``y`` (nan when not identified).
    accepted : bool
        Whether the sample was learned from.
    reason : str
        ``"ok"``, ``"not_identified"`` (learned; no prediction was possible), ``"gated"``
        (rejected by the gate) or ``"gate_open"`` (learned through an opened gate).
    reject_run : int
        Signed count of consecutive same-sign gate rejections, after this step.
    n_updates : int
        Number of accepted updates after this step.
    """

    t: float | None
    y: float
    mean: float
    scale: float
    std: float
    dof: float
    innovation: float
    z: float
    logpdf: float
    accepted: bool
    reason: str
    reject_run: int
    n_updates: int


def _check_level(level) -> float:
    try:
        lv = float(level)
    except (TypeError, ValueError):
        raise ValueError(f"level must be a number in (0, 1), got {level!r}") from None
    if not 0.0 < lv < 1.0:
        raise ValueError(f"level must be a number in (0, 1), got {level!r}")
    return lv


def _to_normal(r: float, dof: float) -> float:
    """Map a standardized Student-t variate to the standard normal with the same CDF."""
    if math.isinf(dof):
        return r
    # Work on the lower tail so that large |r| keeps its precision.
    z = -float(special.ndtri(special.stdtr(dof, -abs(r))))
    return math.copysign(z, r)


def _logpdf(r: float, scale: float, dof: float) -> float:
    if math.isinf(dof):
        return -0.5 * (_LOG_2PI + r * r) - math.log(scale)
    return (math.lgamma((dof + 1.0) / 2.0) - math.lgamma(dof / 2.0)
            - 0.5 * math.log(dof * math.pi) - math.log(scale)
            - (dof + 1.0) / 2.0 * math.log1p(r * r / dof))


def _as_float(name: str, value) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a real number, got {value!r}") from None
    if not math.isfinite(v):
        raise ValueError(f"{name} must be finite, got {value!r}")
    return v


class Posterior:
    """Posterior over the weights of ``y = w^T phi + e`` updated one sample at a time.

    Parameters
    ----------
    n_features : int
        Length of the regressor ``phi``.
    alpha : float or array_like, default 1.0
        Prior precision of the weights (per weight if an array). 0 gives a flat (uniform)
        prior on that weight.
    prior_mean : array_like, optional
        Prior mean ``m0`` of the weights (default zeros), e.g. a commissioning model.
    noise_std : float, optional
        Known noise standard deviation. If omitted, the noise variance is learned.
    noise_prior : (float, float), default (1.0, 1.0)
        ``(sigma0, strength)``: prior guess of the noise standard deviation and its weight in
        pseudo-observations, used when the noise is learned. ``strength = 0`` is the
        improper prior ``p(sigma^2) ~ 1/sigma^2``.
    forgetting : Exponential, Stabilized, RandomWalk, TermDrift or None
        How old information is discounted; ``None`` keeps everything.
    gate : float or Gate, optional
        Robust gate on the standardized residual (a float is ``Gate(k)``).
    adapt : recursive.adaptive.Adaptation, optional
        Online adaptation of the noise (variational Bayes; needs learned noise, whose
        ``noise_prior`` is then the inverse-gamma prior) and of one term's drift rate
        (covariance matching; needs :class:`TermDrift`). See :mod:`recursive.adaptive`.

    Notes
    -----
    *Model.* With known noise ``sigma``, the prior is ``w ~ N(m0, alpha^{-1} I)``. With
    learned noise it is the conjugate Normal–inverse-gamma prior
    ``w | sigma^2 ~ N(m0, sigma^2 / (alpha sigma0^2) I)``,
    ``sigma^2 ~ Inv-Gamma(nu0/2, nu0 sigma0^2 / 2)`` with ``nu0 = strength``; at
    ``sigma = sigma0`` the weight prior is ``N(m0, alpha^{-1} I)``. In both cases the
    posterior mode is ridge regression with ``lambda = alpha * sigma_ref^2``.

    *State.* The posterior is kept in the units of the noise variance as an
    upper-triangular ``R`` with ``R^T R = Lambda = alpha sigma_ref^2 I + sum phi phi^T``
    and ``z`` with ``R^T z = Lambda m``, plus the noise statistics ``nu`` (degrees of
    freedom) and ``ss`` (residual sum of squares). A sample updates them by one QR
    factorization of ``[R, z; phi^T, y]`` whose last diagonal entry ``e`` satisfies
    ``e^2 = (y - phi^T m)^2 / (1 + phi^T V phi)``, ``V = Lambda^{-1}``; then
    ``nu += 1`` and ``ss += e^2``. Orthogonal updates keep the condition number of ``R``
    at the square root of that of the covariance, which is what makes ill-conditioned
    regressors (polynomials, collinear tags) safe.

    *Predictive.* ``u = R^{-T} phi``, mean ``phi^T m = u^T z``, leverage
    ``phi^T V phi = u^T u``. Known noise: Gaussian with variance
    ``sigma^2 (1 + phi^T V phi)``. Learned noise: Student-t with
    ``nu_post = nu - p_flat`` degrees of freedom (``p_flat`` weights with a flat prior)
    and scale ``s^2 (1 + phi^T V phi)``, ``s^2 = ss / nu_post``. With a flat prior and
    ``strength = 0`` this is the classical result: ``N - p`` degrees of freedom and
    ``s^2 = SSE / (N - p)`` (Gelman et al., Bayesian Data Analysis, 3rd ed., sec. 14.2).

    *Time.* Passing ``t`` to :meth:`update` makes forgetting act on elapsed time;
    otherwise each update is one time unit. Times must not decrease.

    *Adaptive noise* (``adapt.noise``). The weights have the absolute covariance
    ``sigma0^2 V`` (the known-noise form at the guess ``sigma0``) and the noise variance
    its own inverse-gamma posterior ``IG(nu / 2, ss / 2)``, updated by
    :meth:`recursive.adaptive.VBNoise.step`; a result is learned with the weight
    ``sigma0^2 / sigma_hat^2``. The predictive is a Student-t with ``nu`` degrees of
    freedom and scale ``sqrt(ss / nu + sigma0^2 phi^T V phi)``.
    """

    def __init__(self, n_features: int, *, alpha=1.0, prior_mean=None, noise_std=None,
                 noise_prior=(1.0, 1.0), forgetting: Forgetting | None = None, gate=None,
                 adapt: Adaptation | None = None):
        if isinstance(n_features, bool) or not isinstance(n_features, int | np.integer) \
                or n_features < 1:
            raise ValueError(f"n_features must be a positive integer, got {n_features!r}")
        n = int(n_features)
        self._n = n
        a = np.array(alpha, dtype=float, copy=True) if not np.isscalar(alpha) else None
        if a is None:
            a = np.full(n, _as_float("alpha", alpha))
        if a.shape != (n,) or not np.all(np.isfinite(a)) or np.any(a < 0):
            raise ValueError(f"alpha must be a non-negative finite number or an array of "
                             f"{n} of them, got {alpha!r}")
        self._alpha = a
        if prior_mean is None:
            m0 = np.zeros(n)
        else:
            m0 = np.array(prior_mean, dtype=float, copy=True)
            if m0.shape != (n,) or not np.all(np.isfinite(m0)):
                raise ValueError(f"prior_mean must be {n} finite numbers, got {prior_mean!r}")
        self._m0 = m0
        if noise_std is not None:
            s = _as_float("noise_std", noise_std)
            if s <= 0:
                raise ValueError(f"noise_std must be positive, got {noise_std!r}")
            self._noise_std = s
            ref_var = s * s
            nu0 = ss0 = 0.0
        else:
            self._noise_std = None
            try:
                sigma0, strength = noise_prior
            except (TypeError, ValueError):
                raise ValueError(f"noise_prior must be (sigma0, strength), "
                                 f"got {noise_prior!r}") from None
            sigma0 = _as_float("noise_prior sigma0", sigma0)
            strength = _as_float("noise_prior strength", strength)
            if sigma0 <= 0 or strength < 0:
                raise ValueError(f"noise_prior needs sigma0 > 0 and strength >= 0, "
                                 f"got {noise_prior!r}")
            ref_var = sigma0 * sigma0
            nu0, ss0 = strength, strength * ref_var
        self._noise_prior = None if noise_std is not None else (sigma0, strength)
        if forgetting is not None and not isinstance(forgetting, Forgetting):
            raise ValueError(f"forgetting must be Exponential, Stabilized, RandomWalk, "
                             f"TermDrift or None, got {forgetting!r}")
        if forgetting is not None:
            forgetting.check_features(n)
        self._forgetting = forgetting
        # the configured policy; _forgetting is the one in use (an adapted rate)
        self._forgetting_cfg = forgetting
        self._adapt, self._vb = self._check_adapt(adapt, noise_std, forgetting, n)
        if gate is not None and not isinstance(gate, Gate):
            gate = Gate(gate)
        self._gate = gate
        r0 = np.sqrt(a * ref_var)
        self._prior = Prior(r0=r0, z0=r0 * m0, nu0=nu0, ss0=ss0, ref_var=ref_var)
        self._p_flat = int(np.count_nonzero(a == 0.0))
        self.reset()

    # ------------------------------------------------------------------ state
    def reset(self) -> None:
        """Return to the prior (the configuration is kept)."""
        self._R = np.ascontiguousarray(np.diag(self._prior.r0))
        self._z = self._prior.z0.copy()
        self._nu = self._prior.nu0
        self._ss = self._prior.ss0
        self._t_last: float | None = None
        self._clock: str | None = None
        self._n_updates = 0
        self._reject_run = 0
        self._forgetting = self._forgetting_cfg
        self._rate: RateState | None = None
        if self._adapt is not None and self._adapt.rate is not None:
            self._rate = self._adapt.rate.start(self._forgetting_cfg.q[self._adapt.rate.term])
            self._forgetting = self._rated(self._rate.q)
        self._refresh()

    @staticmethod
    def _check_adapt(adapt, noise_std, forgetting, n):
        if adapt is None:
            return None, None
        if not isinstance(adapt, Adaptation):
            raise ValueError(f"adapt must be an Adaptation or None, got {adapt!r}")
        if adapt.noise is not None and noise_std is not None:
            raise ValueError("adaptive noise needs a learned noise (noise_prior), not "
                             "noise_std")
        if adapt.rate is not None:
            from recursive.forgetting import TermDrift
            if not isinstance(forgetting, TermDrift):
                raise ValueError(f"an adaptive drift rate needs TermDrift forgetting, got "
                                 f"{forgetting!r}")
            if adapt.rate.term >= n:
                raise ValueError(f"adaptive rate term {adapt.rate.term} is not one of the "
                                 f"{n} weights")
        return adapt, adapt.noise

    def _rated(self, q: float) -> Forgetting:
        """The configured TermDrift with the adapted rate of its matched term."""
        f = self._forgetting_cfg
        j = self._adapt.rate.term
        if f.q[j] == q:
            return f
        rates = list(f.q)
        rates[j] = q
        return type(f)(tuple(rates), f.half_life)

    @property
    def adapted(self) -> dict | None:
        """The adapted values (None without adaptation): ``noise_std`` (adaptive noise)
        and ``rate`` (the matched term's drift rate in use), each None when not adapted."""
        if self._adapt is None:
            return None
        nv = self.noise_var if self._vb is not None else None
        return {"noise_std": None if nv is None else (math.sqrt(nv) if nv == nv else math.nan),
                "rate": None if self._rate is None else self._rate.q}

    def _refresh(self, ident: bool | None = None) -> None:
        self._cache: dict = {}
        self._ident = self._identified(self._R, self._nu) if ident is None else ident
        self._m_cache = None

    @property
    def _m(self) -> np.ndarray:
        # the mean is only needed by batch predictions and views: solved on demand
        if self._m_cache is None:
            self._m_cache = (solve_upper(self._R, self._z) if self._ident
                             else np.full(self._n, np.nan))
        return self._m_cache

    def _identified(self, R, nu, was: bool = False) -> bool:
        if self._noise_std is None and not nu - self._p_flat > 0.0:
            return False
        # information only grows in an update, and the rank-keeping policies keep the rank
        # of a time update, so an identified posterior needs no new rank test
        if was and (self._forgetting is None or not self._forgetting.may_lose_rank):
            return True
        return full_rank(R)

    @property
    def n_features(self) -> int:
        return self._n

    @property
    def mean(self) -> np.ndarray:
        """Posterior mean of the weights (nan until identified)."""
        return self._m.copy()

    @property
    def dof(self) -> float:
        """Degrees of freedom of the marginal posterior (inf with known noise)."""
        if self._noise_std is not None or self._vb is not None:
            return math.inf  # the weights are Gaussian with adaptive noise too
        return self._nu - self._p_flat

    @property
    def noise_var(self) -> float:
        """Point estimate of the noise variance (known value, or ``ss / nu_post``)."""
        if self._noise_std is not None:
            return self._noise_std ** 2
        if self._vb is not None:
            return self._ss / self._nu if self._nu > 0 else math.nan
        d = self._nu - self._p_flat
        return self._ss / d if d > 0 else math.nan

    @property
    def unit_cov(self) -> np.ndarray:
        """``V = Lambda^{-1}``: the weight covariance in units of the noise variance."""
        if not full_rank(self._R):
            return np.full((self._n, self._n), np.nan)
        ri = solve_upper(self._R, np.eye(self._n))
        return ri @ ri.T

    @property
    def sqrt_information(self) -> np.ndarray:
        """The upper-triangular ``R`` with ``R^T R = V^{-1}`` (read-only view).

        ``scale_matrix = noise_var * (R^T R)^{-1}``. The posterior replaces this array on
        each change of its state and never writes into it, so a caller may keep it.
        """
        v = self._R.view()
        v.flags.writeable = False
        return v

    @property
    def scale_matrix(self) -> np.ndarray:
        """``noise_var * V``: the covariance (known noise) or the Student-t scale matrix."""
        if self._vb is not None:
            return self._prior.ref_var * self.unit_cov  # absolute with adaptive noise
        return self.noise_var * self.unit_cov

    @property
    def cov(self) -> np.ndarray:
        """Marginal posterior covariance of the weights.

        ``sigma^2 V`` for known noise; ``dof / (dof - 2) * s^2 V`` for learned noise
        (the covariance of the multivariate Student-t; infinite for ``dof <= 2``).
        """
        d = self.dof
        if math.isinf(d):
            return self.scale_matrix
        if d <= 2:
            return np.full((self._n, self._n), np.inf)
        return d / (d - 2.0) * self.scale_matrix

    @property
    def n_updates(self) -> int:
        return self._n_updates

    @property
    def t_last(self) -> float | None:
        """Time of the last accepted update (None before the first, or when counting)."""
        return self._t_last

    @property
    def identified(self) -> bool:
        return self._ident

    @property
    def reject_run(self) -> int:
        return self._reject_run

    @property
    def forgetting(self) -> Forgetting | None:
        return self._forgetting

    @property
    def gate(self) -> Gate | None:
        return self._gate

    # ------------------------------------------------------------------ predict
    def predict(self, Phi, t=None) -> Prediction:
        """Predictive distribution for one regressor ``(n,)`` or a batch ``(k, n)``.

        Parameters
        ----------
        Phi : array_like
            Regressor vector or matrix.
        t : float or array_like, optional
            Time(s) of the prediction. When given and later than the last update, the
            forgetting policy widens the prediction for the time elapsed (the state is not
            changed). An array gives each row its own time.
        """
        P = np.asarray(Phi, dtype=float)
        single = P.ndim == 1
        if single:
            P = P[None, :]
        if P.ndim != 2 or P.shape[1] != self._n:
            raise ValueError(f"Phi must have shape ({self._n},) or (k, {self._n}), "
                             f"got {np.shape(Phi)}")
        k = P.shape[0]
        if not self._ident:
            nan = np.full(k, np.nan)
            out = Prediction(nan, nan, nan, nan, nan, nan, np.zeros(k, bool))
            return _squeeze(out) if single else out
        dt = self._elapsed(t, k)
        # a regressor that overflowed (inf) gives nan rows, as substitution would, and a
        # widening may divide by zero (see the policies): silently
        f = self._forgetting
        if dt is None and t is not None and self.rowwise:
            # the widening path even with no time elapsed, so that whether a row is widened
            # never depends on the other rows of its batch
            dt = np.zeros(k)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            if dt is not None and f is not None:
                u = mean = None
                if f.needs_u:
                    u = self._inv_t() @ P.T
                    mean = P @ self._m
                mean, lev, nu, ss = f.widen(self._R, self._z, self._nu, self._ss, self._prior,
                                            P.T, u, mean, dt, self._cache)
                if self._vb is not None:
                    nu, ss = self._vb.forget(self._nu, self._ss, self._prior.nu0,
                                             self._prior.ss0, dt)
            else:
                u = self._inv_t() @ P.T
                mean = P @ self._m
                nu, ss = self._nu, self._ss
                lev = np.einsum("ij,ij->j", u, u)
                if self._vb is not None and dt is not None:
                    nu, ss = self._vb.forget(nu, ss, self._prior.nu0, self._prior.ss0, dt)
        out = self._distribution(mean, lev, nu, ss)
        return _squeeze(out) if single else out

    def predict_rows(self, P: np.ndarray, ts: list, level: float):
        """:meth:`predict` and :meth:`Prediction.interval` of a few rows, as plain floats.

        ``P`` is the (k, n) float64 regressor array and ``ts`` the k times (a list of
        floats). Returns ``(mean, std, var, lo, hi, dof, leverage)``, lists of k floats with
        the same bits as ``predict(P, t=ts)`` and its ``interval(level)``: the same
        operations in the same order, on Python floats instead of arrays (IEEE double
        either way; ``math.sqrt`` and ``numpy.sqrt`` both round correctly). Returns None
        where that path is not taken (the caller then uses :meth:`predict`): a posterior
        that is not :attr:`rowwise` or not identified, one that counts samples, or one
        with adaptive noise.

        A single-sample message then costs one kernel call and a few float operations,
        not a dozen array operations of one element each.
        """
        if not self._ident or self._clock == "samples" or not self.rowwise \
                or self._vb is not None:
            return None  # adaptive noise: the predictive of _vb_distribution
        k = len(ts)
        t_last = self._t_last
        dts = []
        for t in ts:
            if not math.isfinite(t):
                return None  # predict raises the error
            # predict: t - t_last clipped at 0, or all zeros when nothing has elapsed
            dts.append(0.0 if t_last is None or not t > t_last else t - t_last)
        f = self._forgetting
        prior = self._prior
        P = np.ascontiguousarray(P, dtype=float)
        if type(f) is Stabilized:
            # Stabilized.widen inlined: the kernel, then its elementwise tail on floats
            m, kappa, c0, dc = f._pencil(self._R, self._z, prior, self._cache)
            out = np.empty((3, k))
            _linalg.stabilized_rows(out, m, kappa, c0, dc, P, np.array(dts), f.half_life)
            mean, lev, d = out.tolist()
            nu0, ss0, nu_s, ss_s = prior.nu0, prior.ss0, self._nu, self._ss
            nus = [dj * nu_s + (1.0 - dj) * nu0 for dj in d]
            sss = [dj * ss_s + (1.0 - dj) * ss0 for dj in d]
        else:
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                mn, lv, nu, ss = f.widen(self._R, self._z, self._nu, self._ss, prior, P.T,
                                         None, None, np.array(dts), self._cache)
            mean, lev = mn.tolist(), lv.tolist()
            nus = np.broadcast_to(np.asarray(nu, float), (k,)).tolist()
            sss = np.broadcast_to(np.asarray(ss, float), (k,)).tolist()
        p = 0.5 + _check_level(level) / 2.0
        inf, nan = math.inf, math.nan
        o_mean, o_std, o_var, o_lo, o_hi, o_dof = [], [], [], [], [], []
        known = self._noise_std is not None
        p_flat = self._p_flat
        for j in range(k):
            mu, lj = mean[j], lev[j]
            if known:
                scale = _sqrt(prior.ref_var * (1.0 + lj))
                var = scale * scale
                dof = inf
                if not lj < inf:  # infinite or nan leverage: not identified
                    mu = scale = var = dof = nan
                std = scale
            else:
                dof = nus[j] - p_flat
                ssj = sss[j]
                if dof > 2.0 and lj < inf:
                    scale = _sqrt(ssj / dof * (1.0 + lj))
                    var = scale * scale * dof / (dof - 2.0)
                elif dof > 0 and math.isfinite(lj):
                    scale = _sqrt(ssj / dof * (1.0 + lj))
                    var = scale * scale * dof / (dof - 2.0) if dof > 2 else inf
                else:
                    mu = scale = var = dof = nan
                std = _sqrt(var)
            half = _quantile(dof, p) * scale
            o_mean.append(mu)
            o_std.append(std)
            o_var.append(var)
            o_lo.append(mu - half)
            o_hi.append(mu + half)
            o_dof.append(dof)
        return o_mean, o_std, o_var, o_lo, o_hi, o_dof, lev

    @property
    def rows_together(self) -> bool:
        """Whether :func:`predict_rows_many` takes this posterior's rows.

        The common case of :meth:`predict_rows`: identified, timed, stabilized forgetting
        with the C kernel, the noise learned (not known, not adaptive). Posteriors of the
        same number of terms then share one kernel call and one pass of array arithmetic.
        """
        return (self._ident and self._clock != "samples" and self._vb is None
                and self._noise_std is None and type(self._forgetting) is Stabilized
                and _linalg.HAVE_KERNEL)

    def _rows_many_part(self) -> tuple[np.ndarray, np.ndarray]:
        """What :func:`predict_rows_many` takes of this posterior: the pencil's ``m``, and
        one array of its ``kappa``, ``c0`` and ``dc`` followed by the half-life, the last
        time (nan: none), ``nu``, ``nu0``, ``ss``, ``ss0`` and the unpenalized count.

        Kept with the pencil until the posterior changes (every change clears the cache),
        so a wake-up reads one small array per model instead of a dozen attributes.
        """
        part = self._cache.get("rows_many")
        if part is None:
            f = self._forgetting
            m, kappa, c0, dc = f._pencil(self._R, self._z, self._prior, self._cache)
            prior, tl = self._prior, self._t_last
            tail = (f.half_life, math.nan if tl is None else tl, self._nu, prior.nu0,
                    self._ss, prior.ss0, float(self._p_flat))
            part = self._cache["rows_many"] = (m, np.concatenate((kappa, c0, dc, tail)))
        return part

    @property
    def rowwise(self) -> bool:
        """Whether a batch prediction with times is computed row by row.

        Then each row's numbers are the same, bit for bit, whatever other rows share its
        batch (no matrix product whose rounding depends on the batch): the policies that
        widen from the regressors alone (``needs_u`` false: stabilized, and term drift with
        a half-life) with the C kernel. Callers may then merge batches freely.
        """
        return (self._forgetting is not None and not self._forgetting.needs_u
                and _linalg.HAVE_KERNEL)

    def _inv_t(self) -> np.ndarray:
        """``R^{-T}``, kept until the next change of the state.

        A batch then costs one matrix product instead of a triangular solve with many
        right-hand sides, which LAPACK does several times slower for the narrow ``R`` of
        these models. The error is of the order of ``cond(R)`` times the rounding unit,
        the normwise bound of substitution too; the tests compare batches with the
        single-vector path (substitution) and with outside references.
        """
        inv = self._cache.get("inv_t")
        if inv is None:
            r_inv, info = _dtrtri(self._R, lower=0)
            if info != 0:
                raise np.linalg.LinAlgError(f"singular triangular factor (info={info})")
            inv = self._cache["inv_t"] = np.ascontiguousarray(r_inv.T)
        return inv

    def _elapsed(self, t, k):
        if t is None or self._t_last is None:
            return None
        if self._clock == "samples":
            raise ValueError("this posterior counts samples (updates were made without t); "
                             "predict without t")
        ta = np.asarray(t, dtype=float)
        if ta.ndim == 0:
            ta = np.full(k, float(ta))
        dt = ta - self._t_last
        # the sum is finite only if every entry is (an overflow of it is rare and checked)
        if ta.shape != (k,) or not (math.isfinite(dt.sum()) or np.isfinite(ta).all()):
            raise ValueError(f"t must be a finite number or {k} finite numbers, got {t!r}")
        if dt.max() <= 0.0:
            return None
        return np.maximum(dt, 0.0, out=dt)

    def _distribution(self, mean, lev, nu, ss) -> Prediction:
        k = np.shape(mean)[0]
        if self._vb is not None:
            return self._vb_distribution(k, mean, lev, nu, ss)
        if self._noise_std is not None:
            s2 = self._prior.ref_var
            scale = np.sqrt(s2 * (1.0 + lev))
            var = scale * scale
            dof = np.full(k, np.inf)
            if lev.max() < math.inf:  # infinite after forgetting everything (underflow)
                return Prediction(mean=mean, scale=scale, var=var, std=scale, dof=dof,
                                  leverage=lev, identified=np.ones(k, bool))
            ident = np.isfinite(lev)
            mean, scale, var, dof = (np.where(ident, a, np.nan)
                                     for a in (mean, scale, var, dof))
            return Prediction(mean=mean, scale=scale, var=var, std=scale, dof=dof,
                              leverage=lev, identified=ident)
        dof = np.asarray(nu, float) - self._p_flat
        if dof.ndim == 0:
            dof = np.full(k, float(dof))
        ss = np.asarray(ss, float)
        if dof.min() > 2.0 and lev.max() < math.inf:
            # the common case: identified with a finite variance everywhere
            s2 = ss / dof
            scale = np.sqrt(s2 * (1.0 + lev))
            var = scale * scale * dof / (dof - 2.0)
            return Prediction(mean=mean, scale=scale, var=var, std=np.sqrt(var), dof=dof,
                              leverage=lev, identified=np.ones(k, bool))
        ident = (dof > 0) & np.isfinite(lev)
        with np.errstate(divide="ignore", invalid="ignore"):
            s2 = np.where(ident, ss / np.where(ident, dof, 1.0), np.nan)
            scale = np.sqrt(s2 * (1.0 + lev))
            var = np.where(dof > 2, scale * scale * dof / (dof - 2.0), np.inf)
        dof = np.where(ident, dof, np.nan)
        var = np.where(ident, var, np.nan)
        mean = np.where(ident, mean, np.nan)
        scale = np.where(ident, scale, np.nan)
        return Prediction(mean=mean, scale=scale, var=var, std=np.sqrt(var), dof=dof,
                          leverage=lev, identified=ident)

    def _vb_distribution(self, k, mean, lev, nu, ss) -> Prediction:
        """The predictive with adaptive noise (class Notes), elementwise per row."""
        nu = np.broadcast_to(np.asarray(nu, float), (k,))
        ss = np.broadcast_to(np.asarray(ss, float), (k,))
        with np.errstate(divide="ignore", invalid="ignore"):
            ident = (nu > 0) & np.isfinite(lev)
            s2 = np.where(ident, ss / np.where(ident, nu, 1.0), np.nan)
            scale = np.sqrt(s2 + self._prior.ref_var * lev)
            var = np.where(nu > 2, scale * scale * nu / (nu - 2.0), np.inf)
        nan = np.nan
        return Prediction(mean=np.where(ident, mean, nan), scale=np.where(ident, scale, nan),
                          var=np.where(ident, var, nan),
                          std=np.sqrt(np.where(ident, var, nan)),
                          dof=np.where(ident, nu, nan), leverage=lev, identified=ident)

    # ------------------------------------------------------------------ update
    def update(self, phi, y, t=None) -> Step:
        """Learn from one sample ``(phi, y)`` observed at time ``t``.

        Raises
        ------
        ValueError
            On a wrong shape, non-finite values, or a mix of timed and untimed updates.
        OutOfOrderError
            If ``t`` is earlier than the last accepted update.
        """
        phi = np.ascontiguousarray(phi, dtype=float)
        if phi.shape != (self._n,):
            raise ValueError(f"phi must have shape ({self._n},), got {phi.shape}")
        # phi . phi is finite for finite phi unless the squares overflow; the full check
        # (a few times dearer than the whole update for small n) only runs then
        if not math.isfinite(phi.dot(phi)) and not np.isfinite(phi).all():
            raise ValueError(f"phi must be finite, got {phi.tolist()!r}")
        if type(y) is not float or not math.isfinite(y):
            y = _as_float("y", y)
        if t is None:
            if self._clock == "time":
                raise ValueError("this posterior was updated with times; pass t")
            dt = 1.0 if self._n_updates > 0 else 0.0
        else:
            if type(t) is not float or not math.isfinite(t):
                t = _as_float("t", t)
            if self._clock == "samples":
                raise ValueError("this posterior was updated without times; omit t")
            if self._t_last is not None and t < self._t_last:
                raise OutOfOrderError(t, self._t_last)
            dt = 0.0 if self._t_last is None else t - self._t_last
        # work on copies: a gated sample must leave the state exactly as it was
        R, z, nu, ss = self._R.copy(), self._z.copy(), self._nu, self._ss
        f = self._forgetting
        vb = self._vb
        if f is not None and dt > 0.0:
            nu_f, ss_f = f.forget(R, z, nu, ss, self._prior, dt)
            if vb is None:
                nu, ss = nu_f, ss_f
        if vb is not None and dt > 0.0:
            nu, ss = vb.forget(nu, ss, self._prior.nu0, self._prior.ss0, dt)
        if self._ident and (f is None or not f.may_lose_rank) and (
                self._noise_std is not None or nu - self._p_flat > 0.0):
            ident = True  # what _identified would say, without the call
        else:
            ident = self._identified(R, nu, self._ident)
        nan = math.nan
        pm = scale = std = dof = zs = logp = innov = nan
        kappa = 1.0
        reason = "not_identified"
        run = self._reject_run
        if ident:
            pm, lev = _linalg.predict(R, z, phi)
            if self._noise_std is not None:
                dof = math.inf
                scale = math.sqrt(self._prior.ref_var * (1.0 + lev))
                std = scale
            elif vb is not None:
                dof = nu
                scale = math.sqrt(ss / nu + self._prior.ref_var * lev)
                std = scale * math.sqrt(dof / (dof - 2.0)) if dof > 2 else math.inf
            else:
                dof = nu - self._p_flat
                scale = math.sqrt(ss / dof * (1.0 + lev))
                kappa = ss / dof / self._prior.ref_var
                std = scale * math.sqrt(dof / (dof - 2.0)) if dof > 2 else math.inf
            innov = y - pm
            r = innov / scale
            zs = _to_normal(r, dof)
            logp = _logpdf(r, scale, dof)
            reason = "ok"
            if self._gate is not None:
                if abs(zs) > self._gate.k:
                    sign = 1 if zs > 0 else -1
                    run = run + sign if run * sign > 0 else sign
                    rel = self._gate.release
                    if rel is None or abs(run) <= rel:
                        self._reject_run = run
                        return Step(t, y, pm, scale, std, dof, innov, zs, logp, False,
                                    "gated", run, self._n_updates)
                    reason = "gate_open"
                else:
                    run = 0
        if vb is None:
            e = _linalg.update(R, z, phi.copy(), y)
            nu, ss = nu + 1.0, ss + e * e
        else:
            ref = self._prior.ref_var
            if ident:
                s2, nu, ss = vb.step(innov, ref * lev, nu, ss)
            else:
                s2, nu, ss = vb.step_unidentified(nu, ss, ref)
            w = math.sqrt(ref / s2)
            _linalg.update(R, z, phi * w, y * w)
        if self._rate is not None and ident and dt > 0.0:
            self._match_rate(phi, innov, scale, dt, kappa)
        self._R, self._z = R, z
        self._nu, self._ss = nu, ss
        if t is None:
            self._clock = "samples"
        else:
            self._clock = "time"
            self._t_last = t
        self._n_updates += 1
        self._reject_run = run
        self._refresh(ident or None)
        return Step(t, y, pm, scale, std, dof, innov, zs, logp, True, reason, run,
                    self._n_updates)

    def flatten(self, keep: float) -> None:
        """Partially reset toward the prior, as one stabilized-forgetting step.

        ``Lambda <- keep * Lambda + (1 - keep) * Lambda_0`` (and likewise the information
        vector and noise statistics), whatever the configured policy. Used to re-learn
        quickly after a confirmed change in the process.
        """
        keep = _as_float("keep", keep)
        if not 0.0 <= keep <= 1.0:
            raise ValueError(f"keep must be in [0, 1], got {keep!r}")
        if keep == 1.0:
            return
        if keep == 0.0:
            self._R = np.ascontiguousarray(np.diag(self._prior.r0))
            self._z = self._prior.z0.copy()
            self._nu, self._ss = self._prior.nu0, self._prior.ss0
        else:
            # half_life chosen so that one unit of time gives delta = keep
            policy = Stabilized(-1.0 / math.log2(keep))
            R, z = self._R.copy(), self._z.copy()
            self._nu, self._ss = policy.forget(R, z, self._nu, self._ss, self._prior, 1.0)
            self._R, self._z = R, z
        self._refresh()

    def _match_rate(self, phi, innov, scale, dt, kappa) -> None:
        """One covariance-matching step of the adapted rate (recursive.adaptive.RateMatch)
        from a result predicted with ``scale``: the drift's share of ``scale**2`` is
        ``q dt phi_j^2 kappa``, ``kappa = s^2 / sigma_ref^2`` where the covariance scales
        with the learned noise ``s^2``, else 1."""
        rm = self._adapt.rate
        pj = float(phi[rm.term])
        st = rm.step(self._rate, innov * innov, scale * scale, dt * pj * pj * kappa)
        if st.q != self._rate.q:
            self._forgetting = self._rated(st.q)
        self._rate = st

    # ------------------------------------------------------------------ persistence
    def config(self) -> dict:
        """The constructor arguments as plain data."""
        return {
            "n_features": self._n,
            "alpha": self._alpha.tolist(),
            "prior_mean": self._m0.tolist(),
            "noise_std": self._noise_std,
            "noise_prior": None if self._noise_prior is None else list(self._noise_prior),
            "forgetting": (None if self._forgetting_cfg is None
                           else self._forgetting_cfg.to_dict()),
            "gate": None if self._gate is None else self._gate.to_dict(),
            **({} if self._adapt is None else {"adapt": self._adapt.to_dict()}),
        }

    def snapshot(self) -> dict:
        """The learning state as it is now, for :meth:`restore` (in memory, not plain data).

        Cheap: every update replaces the posterior's arrays and never writes into them, so
        the snapshot shares them. The prediction caches, derived from the factor and as
        large as it at hundreds of terms, are left out; :meth:`restore` starts them empty
        and they are rebuilt when next needed, to the same bits.
        """
        d = dict(self.__dict__)
        d["_cache"] = d["_m_cache"] = None
        return d

    def restore(self, snap: dict) -> None:
        """Go back to the state of a :meth:`snapshot` (of a posterior of this config)."""
        self.__dict__.update(snap)
        self._cache, self._m_cache = {}, None

    def to_state(self) -> dict:
        """Plain-data snapshot (numbers, lists, str, None) with a schema version.

        ``Posterior.from_state(p.to_state())`` restores a posterior whose every later
        result is bit-identical to the original's.
        """
        out = {
            "schema": SCHEMA,
            "config": self.config(),
            "R": self._R.tolist(),
            "z": self._z.tolist(),
            "nu": float(self._nu),
            "ss": float(self._ss),
            "t_last": self._t_last,
            "clock": self._clock,
            "n_updates": self._n_updates,
            "reject_run": self._reject_run,
        }
        if self._rate is not None:
            out["rate"] = self._rate.to_dict()
        return out

    @classmethod
    def from_config(cls, cfg: dict) -> Posterior:
        """Build a fresh posterior from :meth:`config` output."""
        try:
            gate = cfg["gate"]
            return cls(
                cfg["n_features"], alpha=cfg["alpha"], prior_mean=cfg["prior_mean"],
                noise_std=cfg["noise_std"],
                noise_prior=cfg["noise_prior"] if cfg["noise_prior"] is not None else (1.0, 1.0),
                forgetting=forgetting_from_dict(cfg["forgetting"]),
                gate=None if gate is None else Gate(gate["k"], gate["release"]),
                adapt=Adaptation.from_dict(cfg.get("adapt")))
        except (KeyError, TypeError) as exc:
            raise ValueError(f"bad posterior config: {exc!r}") from None

    @classmethod
    def from_state(cls, d: dict) -> Posterior:
        """Rebuild a posterior from :meth:`to_state` output."""
        if not isinstance(d, dict) or d.get("schema") != SCHEMA:
            got = d.get("schema") if isinstance(d, dict) else type(d).__name__
            raise ValueError(f"posterior state schema must be {SCHEMA}, got {got!r}")
        try:
            p = cls.from_config(d["config"])
            n = p._n
            R = np.array(d["R"], dtype=float)
            z = np.array(d["z"], dtype=float)
            if R.shape != (n, n) or z.shape != (n,):
                raise ValueError(f"state arrays have shapes {R.shape}, {z.shape}; "
                                 f"expected ({n}, {n}) and ({n},)")
            if not (np.all(np.isfinite(R)) and np.all(np.isfinite(z))):
                raise ValueError("state arrays contain non-finite values")
            if np.any(np.tril(R, -1) != 0.0):
                raise ValueError("state R is not upper triangular")
            clock = d["clock"]
            if clock not in (None, "time", "samples"):
                raise ValueError(f"state clock must be None, 'time' or 'samples', got {clock!r}")
            t_last = d["t_last"]
            p._R, p._z = np.ascontiguousarray(R), np.ascontiguousarray(z)
            p._nu, p._ss = float(d["nu"]), float(d["ss"])
            p._t_last = None if t_last is None else float(t_last)
            p._clock = clock
            p._n_updates = int(d["n_updates"])
            p._reject_run = int(d["reject_run"])
            if (p._rate is None) != ("rate" not in d):
                raise ValueError("an adapted rate state without its adaptation, or missing")
            if p._rate is not None:
                p._rate = RateState.from_dict(d["rate"])
                p._forgetting = p._rated(p._rate.q)
        except (KeyError, TypeError) as exc:
            raise ValueError(f"bad posterior state: {exc!r}") from None
        p._refresh()
        return p


def predict_rows_many(posts: list, P: np.ndarray, ts: np.ndarray, owner: np.ndarray,
                      levels: list) -> tuple | None:
    """:meth:`Posterior.predict_rows` of the rows of several posteriors at once.

    Parameters
    ----------
    posts : list of Posterior
        G posteriors with the same number of terms n, each :attr:`Posterior.rows_together`.
    P : ndarray, shape (k, n)
        Regressors, float64, C-contiguous: row j is one of ``posts[owner[j]]``.
    ts : ndarray, shape (k,)
        The times of the rows, float64.
    owner : ndarray, shape (k,)
        Integer index into ``posts`` of each row.
    levels : list of float
        The interval level of each posterior.

    Returns
    -------
    tuple of ndarray or None
        ``(mean, std, var, lo, hi, dof, leverage)``, each of shape (k,), with the bits
        :meth:`Posterior.predict_rows` gives each row in a call of its own posterior; None
        (the caller then asks each posterior) when a time is not finite.

    Notes
    -----
    The kernel (``stabilized_rows_many``) runs, for each row, the same loop as
    ``stabilized_rows`` with its own posterior's pencil, and everything after it is
    elementwise IEEE arithmetic (``+ - * /`` and the square root, correctly rounded in
    numpy as on Python floats), in the order of :meth:`Posterior.predict_rows`:
    :math:`\\nu_j = \\delta_j \\nu + (1 - \\delta_j) \\nu_0` and likewise
    :math:`s_j`, :math:`\\mathrm{dof}_j = \\nu_j - p_0` (``p_0`` the unpenalized terms),
    :math:`\\sigma_j = \\sqrt{s_j / \\mathrm{dof}_j \\, (1 + \\ell_j)}` and
    :math:`\\mathrm{var}_j = \\sigma_j^2 \\mathrm{dof}_j / (\\mathrm{dof}_j - 2)`
    (Student-t predictive), with :func:`recursive.quantile.t_quantile`, which equals its
    scalar twin row by row. Hence a row's numbers do not depend on the rows of other models
    it is computed with.
    """
    if not np.isfinite(ts).all():
        return None
    n = P.shape[1]
    Ms, parts = [], []
    for post in posts:
        m, part = post._rows_many_part()
        Ms.append(m)
        parts.append(part)
    # per posterior, one row: kappa, c0, dc (n each), then half-life, t_last, nu, nu0, ss,
    # ss0 and the unpenalized count
    A = np.array(parts)
    kap, c0s, dcs = (np.ascontiguousarray(A[:, i * n:(i + 1) * n]) for i in range(3))
    hl = np.ascontiguousarray(A[:, 3 * n])
    p_of = {lv: 0.5 + _check_level(lv) / 2.0 for lv in set(levels)}
    tl, nu_s, nu0, ss_s, ss0, p_flat = A[:, 3 * n + 1:].T[:, owner]
    p_row = np.array([p_of[lv] for lv in levels])[owner]
    # predict_rows: t - t_last, or 0 when nothing has elapsed (or nothing was learned yet)
    dts = np.where(ts > tl, ts - tl, 0.0)
    out = np.empty((3, len(ts)))
    _linalg.stabilized_rows_many(out, np.concatenate(Ms), kap, c0s, dcs, hl, P, dts,
                                 owner.astype(float))
    mean, lev, d = out
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        nus = d * nu_s + (1.0 - d) * nu0
        sss = d * ss_s + (1.0 - d) * ss0
        dof = nus - p_flat
        a = (dof > 2.0) & (lev < math.inf)
        ok = a | ((dof > 0) & np.isfinite(lev))
        scale = _sqrt_rows(sss / dof * (1.0 + lev))
        var = np.where(a, scale * scale * dof / (dof - 2.0), math.inf)
        bad = ~ok
        if bad.any():
            mu = np.where(bad, math.nan, mean)
            scale[bad] = var[bad] = dof[bad] = math.nan
        else:
            mu = mean
        std = _sqrt_rows(var)
        ps = np.unique(p_row)
        if ps.size == 1:
            q = t_quantile(dof, float(ps[0]))
        else:
            q = np.empty(len(ts))
            for p in ps.tolist():
                sel = p_row == p
                q[sel] = t_quantile(dof[sel], p)
        half = q * scale
        return mu, std, var, mu - half, mu + half, dof, lev


def _sqrt(x: float) -> float:
    # numpy.sqrt on a float: nan below 0 instead of an error
    return math.sqrt(x) if x >= 0.0 else (x if x != x else math.nan)


def _sqrt_rows(x: np.ndarray) -> np.ndarray:
    # _sqrt elementwise: the same nan (Python's) below 0, whatever the FPU's default nan
    r = np.sqrt(x)
    neg = x < 0.0
    if neg.any():
        r[neg] = math.nan
    return r


def _squeeze(p: Prediction) -> Prediction:
    return Prediction(float(p.mean[0]), float(p.scale[0]), float(p.var[0]), float(p.std[0]),
                      float(p.dof[0]), float(p.leverage[0]), bool(p.identified[0]))
