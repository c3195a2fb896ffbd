"""Tune: choose a model's prior, noise and forgetting (policy and rates) from a historian CSV.

The criterion is the prequential log predictive density (Dawid 1984): the lab results are
taken in time order, each is predicted by the model learned from the ones *known when its
sample was drawn* (a result arrives ``lab_delay`` after it was drawn, so on dense analyzer
data the last few results are not known yet, as in the control room), and the log density
of that predictive at the lab value is summed over the lab results after a burn-in. Without
forgetting and without delay, the sum over all lab results is the log marginal likelihood
(the evidence) of the model, so this is evidence maximization; with forgetting it rewards the
policy and rates that predict best, which is what the daemon is for.

The model runs on `recursive.Posterior` exactly as the daemon builds it from its config
(`ModelConfig.build_posterior`), with the features each lab sample reflects matched by the
daemon's rule (dead times, tolerance). Lab results the robust gate of the starting model
rejects (blunders) are left out of the score for every candidate alike, since a single
blunder would otherwise decide between candidates; they are re-derived once from the best
candidate.

Search: alpha over a log grid in half decades (and a known noise std in half octaves),
extended when the best value is at the end; then every forgetting policy of
:data:`POLICIES` on its grid: half-lives from 6 h to 16 weeks for stabilized and exponential
forgetting, drift rates in powers of 4 of the noise variance per lab interval for the random
walk, and the offset drift rate *jointly* with the half-life of the stabilized forgetting of
the other terms (and without it); the best policy by the same score wins; alpha again, then
`scipy.optimize.minimize_scalar` refines each value between its grid neighbours. With learned
noise, the guess written is the noise implied by the predictive residuals
(:func:`prequential`), not a value searched by the score (a guess worth two results hardly
moves it) nor the in-sample residuals (biased low).

What the score cannot show is reported as warnings (:attr:`TuneResult.warnings`, also
written as comments above the block): policies or rates that score within
:data:`FLAT_NATS` of the best (the data do not determine them), a prior that pins every
slope to zero, and forgetting that leaves fewer than :data:`MIN_DOF` degrees of freedom.
"""

from __future__ import annotations

import copy
import math
import os
import re
from dataclasses import dataclass, field, fields, replace
from datetime import UTC, datetime

import numpy as np
from scipy import optimize, special, stats

from daemon.config import InputConfig, ModelConfig, format_duration
from daemon.config.durations import format_drift
from daemon.workbench.backtest import History, lab_features

__all__ = [
    "FLAT_NATS",
    "FLAT_SPAN",
    "HALF_LIVES",
    "LAB_DELAY",
    "MIN_DOF",
    "POLICIES",
    "Candidate",
    "LabData",
    "TuneResult",
    "base_model",
    "derive_inputs",
    "lab_data",
    "model_toml",
    "prequential",
    "table_text",
    "tune",
]

_HOUR = 3600.0
_DAY = 86400.0
#: Half-lives tried first (seconds); ``None`` is no forgetting.
HALF_LIVES: tuple[float | None, ...] = (
    6 * _HOUR, 12 * _HOUR, _DAY, 2 * _DAY, 4 * _DAY, 7 * _DAY, 14 * _DAY, 28 * _DAY,
    56 * _DAY, 112 * _DAY, None)
_ALPHA_STEPS = np.arange(-3.0, 3.01, 0.5)       # decades around the start
_NOISE_STEPS = np.arange(-2.0, 2.01, 0.5)       # octaves around the start
_MAX_EXTEND = 6
_FLAT = 1e-4  # nats per lab result: differences below this do not move a grid's edge


# ---------------------------------------------------------------------------------- data
@dataclass(frozen=True, eq=False)
class LabData:
    """Lab results with the basis of the features they reflect, in drawn-time order."""

    t: np.ndarray
    y: np.ndarray
    Phi: np.ndarray
    n_unmatched: int


def lab_data(history: History, model: ModelConfig, until: float | None = None) -> LabData:
    """The lab results of ``history`` usable by ``model``, drawn before ``until`` (epoch s)."""
    lab_t, lab_y, X, ok = lab_features(history, model)
    if until is not None:
        within = lab_t < until
        lab_t, lab_y, X, ok = lab_t[within], lab_y[within], X[within], ok[within]
    basis = model.build_basis()
    Phi = np.full((lab_t.size, basis.n_features), np.nan)
    if ok.any():
        with np.errstate(over="ignore", invalid="ignore"):
            Phi[ok] = basis(X[ok])
    ok &= np.isfinite(Phi).all(axis=1)
    return LabData(lab_t[ok], lab_y[ok], Phi[ok], int(np.count_nonzero(~ok)))


def derive_inputs(history: History, tags, *, dead_times: dict | None = None,
                  margin: float = 0.1, quantile: float = 0.001) -> tuple[InputConfig, ...]:
    """Instrument ranges from the data: robust min/max with a margin.

    ``lo`` and ``hi`` are the ``quantile`` and ``1 - quantile`` quantiles of the readings,
    widened by ``margin`` times their distance on each side and rounded outward to two
    significant digits of that distance. Polynomial bases map the range to [-1, 1], so a
    range a little wider than the data keeps the basis well scaled without clipping.
    """
    if not 0 <= quantile < 0.5:
        raise ValueError(f"quantile={quantile!r}: must be in [0, 0.5)")
    if not margin >= 0:
        raise ValueError(f"margin={margin!r}: must be >= 0")
    dead_times = dict(dead_times or {})
    unknown = set(dead_times) - set(tags)
    if unknown:
        raise ValueError(f"dead times for tags that are not inputs: {sorted(unknown)}")
    X = history.columns(tags)
    out = []
    for j, tag in enumerate(tags):
        v = X[:, j]
        v = v[np.isfinite(v)]
        if v.size == 0:
            raise ValueError(f"{history.path}: column {tag} has no readings")
        qlo, qhi = np.quantile(v, [quantile, 1.0 - quantile])
        span = float(qhi - qlo)
        if not span > 0:
            span = max(abs(float(qlo)), 1.0)
        step = 10.0 ** (math.floor(math.log10(span)) - 1)
        digits = max(0, -int(math.floor(math.log10(step))))
        lo = round(math.floor((qlo - margin * span) / step) * step, digits)
        hi = round(math.ceil((qhi + margin * span) / step) * step, digits)
        out.append(InputConfig(tag, float(lo), float(hi), float(dead_times.get(tag, 0.0))))
    return tuple(out)


_NAME_BAD = re.compile(r"[^A-Za-z0-9._-]")


def base_model(history: History, *, name: str | None = None, tags=None,
               dead_times: dict | None = None, degree: int = 1) -> ModelConfig:
    """A starting model when no config is given: every input column, ranges from the data.

    The prior and noise start from the spread of the lab values (a prior standard deviation
    of one spread per weight, a noise guess of half of it); forgetting starts stabilized with
    a 10-day half-life. `tune` moves all three.
    """
    tags = tuple(history.tags if tags is None else tags)
    inputs = derive_inputs(history, tags, dead_times=dead_times)
    y = history.lab_y
    if y.size < 3:
        raise ValueError(f"{history.path}: {y.size} lab results; need at least 3 to tune")
    spread = float(np.std(y)) or 1.0
    name = name or (_NAME_BAD.sub("_", history.target)[:100] or "model")
    return ModelConfig(name=name, inputs=inputs, degree=degree, alpha=1.0 / spread ** 2,
                       noise_guess=0.5 * spread, noise_strength=2.0, forgetting="stabilized",
                       half_life=10 * _DAY)


# ---------------------------------------------------------------------------------- scoring
#: The forgetting policies tune compares (``"offset"`` also stands for offset drift without a
#: half-life, written as ``policy = "term_drift"``).
POLICIES = ("none", "stabilized", "exponential", "random_walk", "offset")
#: Default time from drawing a lab sample to its result (seconds), as in the backtest.
LAB_DELAY = 7200.0
#: Total log score (nats over the scored lab results) within which two choices are told
#: apart: below it the data do not prefer one (a log Bayes factor of 1 is "barely worth
#: mentioning", Jeffreys' scale, from memory).
FLAT_NATS = 1.0
#: Fewest predictive degrees of freedom (learned noise) a choice may leave without a warning.
MIN_DOF = 5.0


@dataclass(frozen=True)
class Candidate:
    """One evaluated setting and how it predicted.

    ``score`` is the mean log predictive density (nats per scored lab result; higher is
    better), ``rmse`` and ``coverage`` (of the model's interval) are over the same lab results,
    ``gated`` counts all the lab results its gate rejected, ``noise_std`` is its final
    estimate (or the known value). ``policy`` is one of :data:`POLICIES`, ``q`` the drift
    rate (per second: of the offset for ``offset``, of every weight for ``random_walk``).
    ``noise_pred`` is the noise level implied by the predictive residuals (see
    :func:`prequential`), ``dof_min`` the fewest degrees of freedom of a scored prediction
    (``inf`` with known noise). ``adapt`` is ``(lo, hi)``, the bounds of an offset drift rate
    adapted online (``adapt_offset``; ``q`` is then its starting rate), or None.
    """

    alpha: float
    noise: float
    half_life: float | None
    score: float
    rmse: float
    coverage: float
    gated: int
    n: int
    noise_std: float
    stage: str = "grid"
    policy: str = "stabilized"
    q: float | None = None
    noise_pred: float = math.nan
    dof_min: float = math.nan
    adapt: tuple[float, float] | None = None

    @property
    def total(self) -> float:
        """The log score summed over the scored lab results (nats)."""
        return self.score * self.n


def _variant(base: ModelConfig, alpha: float, noise: float, half_life: float | None,
             policy: str, q: float | None = None, adapt=None) -> ModelConfig:
    m = replace(base, alpha=float(alpha))
    m = replace(m, noise_std=float(noise)) if base.noise_std is not None else \
        replace(m, noise_guess=float(noise))
    m = replace(m, q=None, offset_drift=None, linear_drift=None, higher_drift=None)
    # the adaptive rates are off unless tune chose an adapted offset drift (``adapt``)
    m = replace(m, **{f: ModelConfig.__dataclass_fields__[f].default for f in _ADAPTIVE})
    if policy == "none":
        return replace(m, forgetting="none", half_life=None)
    if policy == "random_walk":
        return replace(m, forgetting="random_walk", half_life=None, q=float(q))
    if policy == "offset":
        m = replace(m, forgetting="offset" if half_life is not None else "term_drift",
                    half_life=None if half_life is None else float(half_life),
                    offset_drift=float(q))
        if adapt is not None:
            m = replace(m, adapt_offset=True, offset_drift_min=float(adapt[0]),
                        offset_drift_max=float(adapt[1]), adapt_window=base.adapt_window)
        return m
    if half_life is None:
        return replace(m, forgetting="none", half_life=None)
    return replace(m, forgetting=policy, half_life=float(half_life))


_ADAPTIVE = ("noise_adaptive", "noise_half_life", "vb_iterations", "adapt_offset",
             "offset_drift_min", "offset_drift_max", "adapt_window")


def _policy_of(m: ModelConfig) -> tuple[str, float | None, float | None]:
    """``(policy, half_life, q)`` of a model in tune's terms."""
    if m.forgetting == "term_drift":
        if m.linear_drift or m.higher_drift or not m.offset_drift:
            raise ValueError("tune chooses the offset drift only; the model drifts its "
                             "linear or higher terms (policy = \"term_drift\")")
        return "offset", m.half_life, m.offset_drift
    if m.forgetting == "offset":
        return "offset", m.half_life, m.offset_drift
    if m.forgetting == "random_walk":
        return "random_walk", None, m.q
    if m.forgetting == "none":
        return "none", None, None
    return m.forgetting, m.half_life, None


def _t_logpdf(r, scale, dof):
    """Log density of a Student-t (normal where ``dof`` is infinite) at residuals ``r``."""
    r = np.asarray(r, float)
    scale = np.asarray(scale, float)
    dof = np.asarray(dof, float)
    x = r / scale
    normal = -0.5 * (math.log(2 * math.pi) + x * x) - np.log(scale)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        d = np.where(np.isfinite(dof), dof, 1.0)
        student = (special.gammaln((d + 1) / 2) - special.gammaln(d / 2)
                   - 0.5 * np.log(d * math.pi) - np.log(scale)
                   - (d + 1) / 2 * np.log1p(x * x / d))
    return np.where(np.isfinite(dof), student, normal)


@dataclass(frozen=True, eq=False)
class _Trace:
    logp: np.ndarray
    resid: np.ndarray
    scale: np.ndarray
    dof: np.ndarray
    lev: np.ndarray
    gated: np.ndarray
    post: object


def _noise_scale_at(post, model: ModelConfig, t: float, p_flat: int) -> float:
    """The noise scale ``s^2`` a prediction of ``post`` at time ``t`` uses: the known
    variance, or ``ss / dof`` after the time update of the noise statistics, which is
    ``delta`` times the learned ones plus ``1 - delta`` times the prior's for the policies
    that stabilize and ``delta`` times the learned ones for exponential forgetting
    (``recursive.forgetting``)."""
    if model.noise_std is not None:
        return model.noise_std ** 2
    dof = post.dof
    nu, ss = dof + p_flat, post.noise_var * dof if dof > 0 else 0.0
    nu0 = model.noise_strength
    ss0 = nu0 * model.noise_guess ** 2
    dt = 0.0 if post.t_last is None else t - post.t_last
    h = model.half_life
    if dt > 0 and h is not None and model.forgetting in ("stabilized", "offset",
                                                          "term_drift", "exponential"):
        d = 2.0 ** (-dt / h)
        if model.forgetting == "exponential":
            nu, ss = d * nu, d * ss
        else:
            nu, ss = d * nu + (1 - d) * nu0, d * ss + (1 - d) * ss0
    d_post = nu - p_flat
    return ss / d_post if d_post > 0 else math.nan


def _run(model: ModelConfig, data: LabData, lab_delay: float = 0.0, *,
         fast: bool = True) -> _Trace:
    """Predict each lab result from the results that had arrived when its sample was drawn.

    Result ``j`` arrives at ``t_j + lab_delay``; the prediction of result ``i`` (at its drawn
    time ``t_i``, widened by the forgetting for the time since the last learned result) uses
    exactly the ``j < i`` that arrived before ``t_i``. Results are learned in drawn-time order,
    as the daemon learns them, and each is learned (or gated) once.
    """
    post = model.build_posterior()
    k = data.t.size
    logp = np.full(k, np.nan)
    resid = np.full(k, np.nan)
    scale = np.full(k, np.nan)
    dof = np.full(k, np.nan)
    lev = np.full(k, np.nan)
    gated = np.zeros(k, dtype=bool)
    # a result that arrives at the very instant of a sample is learned after that sample's
    # prediction, as the backtest's feed sends it (and as the plant's events order them):
    # on an analyzer reporting every sample, counting it known would score the model one
    # sample closer than what the control room saw
    known = np.minimum(np.searchsorted(data.t + lab_delay, data.t, side="left"),
                       np.arange(k))
    learned = 0
    i = 0
    p_flat = int(np.count_nonzero(model.build_basis().alpha_vector(model.alpha) == 0))
    while i < k:
        target = int(known[i])
        if fast and target == i and learned == i:
            # every earlier result is known: the update's own one-step prediction is the one
            # wanted (the same distribution as predict at t_i), at a fraction of the cost
            s2 = _noise_scale_at(post, model, float(data.t[i]), p_flat)
            step = post.update(data.Phi[i], float(data.y[i]), float(data.t[i]))
            gated[i] = step.reason == "gated"
            learned += 1
            if step.reason != "not_identified":
                resid[i], scale[i], dof[i] = step.innovation, step.scale, step.dof
                logp[i] = step.logpdf
                # the leverage from the scale: scale^2 = s^2 (1 + h)
                lev[i] = step.scale ** 2 / s2 - 1.0
            i += 1
            continue
        while learned < target:
            step = post.update(data.Phi[learned], float(data.y[learned]),
                               float(data.t[learned]))
            gated[learned] = step.reason == "gated"
            learned += 1
        if fast:
            # a copy of the state learns result i: its update's one-step prediction is the
            # prediction wanted, several times cheaper than a widened predict (the copy,
            # gate state included, is then dropped)
            s2 = _noise_scale_at(post, model, float(data.t[i]), p_flat)
            step = copy.deepcopy(post).update(data.Phi[i], float(data.y[i]), float(data.t[i]))
            if step.reason != "not_identified":
                resid[i], scale[i], dof[i] = step.innovation, step.scale, step.dof
                logp[i] = step.logpdf
                lev[i] = step.scale ** 2 / s2 - 1.0
            i += 1
            continue
        j = i
        while j < k and known[j] == target:
            j += 1
        pred = post.predict(data.Phi[i:j], t=data.t[i:j])
        r = data.y[i:j] - np.asarray(pred.mean)
        ok = np.asarray(pred.identified, bool)
        resid[i:j] = r
        scale[i:j] = pred.scale
        dof[i:j] = pred.dof
        lev[i:j] = pred.leverage
        lp = np.full(j - i, np.nan)
        if ok.any():
            lp[ok] = _t_logpdf(r[ok], np.asarray(pred.scale)[ok], np.asarray(pred.dof)[ok])
        logp[i:j] = lp
        i = j
    while learned < k:
        step = post.update(data.Phi[learned], float(data.y[learned]), float(data.t[learned]))
        gated[learned] = step.reason == "gated"
        learned += 1
    return _Trace(logp, resid, scale, dof, lev, gated, post)


def prequential(model: ModelConfig, data: LabData, scored, lab_delay: float = 0.0
                ) -> Candidate:
    """Run ``model`` over ``data`` and score the ``scored`` lab results (a boolean mask).

    Each result is predicted from what was known when its sample was drawn: the results
    whose arrival (drawn time + ``lab_delay``) is before it (see :func:`_run`). A scored
    lab result the model could not predict (not identified yet) makes the score ``-inf``.

    Notes
    -----
    ``noise_pred`` estimates the noise standard deviation from the predictive residuals:
    under the model, the residual ``e_i`` of a result predicted before it is learned has
    variance ``sigma^2 (1 + h_i)`` with ``h_i`` the leverage ``phi^T V phi`` of that
    prediction (widened for the elapsed time), independently of the data it was predicted
    from, so ``mean(e_i^2 / (1 + h_i))`` is unbiased for ``sigma^2`` with no
    degrees-of-freedom correction. The in-sample residuals of the fitted weights are too
    small by the ``p`` weights they fitted (and by much more under forgetting, where only the
    few recent results count), which biases a noise taken from them low.
    """
    scored = np.asarray(scored, dtype=bool)
    tr = _run(model, data, lab_delay)
    n = int(np.count_nonzero(scored))
    lp = tr.logp[scored]
    value = float(np.mean(lp)) if n and np.all(np.isfinite(lp)) else -math.inf
    r = tr.resid[scored]
    zz = r / tr.scale[scored]
    dof = tr.dof[scored]
    with np.errstate(invalid="ignore"):
        zq = np.where(np.isfinite(dof), stats.t.ppf(0.5 + model.level / 2, dof),
                      special.ndtri(0.5 + model.level / 2))
    post = tr.post
    noise = model.noise_std if model.noise_std is not None else (
        math.sqrt(post.noise_var) if post.noise_var > 0 else math.nan)
    with np.errstate(invalid="ignore"):
        ratio = r * r / (1.0 + tr.lev[scored])
    pred_noise = float(math.sqrt(np.nanmean(ratio))) if n and np.isfinite(ratio).any() \
        else math.nan
    policy, half_life, q = _policy_of(model)
    rate = model.adaptation().rate if model.adapt_offset else None
    return Candidate(
        alpha=model.alpha,
        noise=model.noise_std if model.noise_std is not None else model.noise_guess,
        half_life=half_life,
        score=value,
        rmse=float(np.sqrt(np.nanmean(r ** 2))) if n else math.nan,
        coverage=float(np.mean(np.abs(zz) <= zq)) if n else math.nan,
        gated=int(np.count_nonzero(tr.gated)), n=n, noise_std=float(noise),
        policy=policy, q=q, noise_pred=pred_noise,
        dof_min=float(np.nanmin(dof)) if n and not np.isnan(dof).all() else math.nan,
        adapt=None if rate is None else (rate.lo, rate.hi))


# ---------------------------------------------------------------------------------- search
@dataclass(frozen=True, eq=False)
class TuneResult:
    """The chosen model, its candidate, and every candidate evaluated (in order).

    ``by_policy`` holds the best candidate of each policy compared, ``warnings`` what the
    engineer must know before using the choice (a flat score surface, slopes pinned to zero,
    too few degrees of freedom), ``lab_delay`` the delay the results were scored at, ``flat``
    the offset drift rates ``(lo, hi)`` (per second) that score within :data:`FLAT_NATS` of
    the best when they span a factor :data:`FLAT_SPAN` or more (None otherwise): the data do
    not determine the rate, and the choice adapts it online within them.
    """

    model: ModelConfig
    best: Candidate
    candidates: list
    n_labs: int
    n_scored: int
    burn_in: int
    outliers: int
    until: float | None
    start: ModelConfig
    lab_delay: float = 0.0
    by_policy: dict = field(default_factory=dict)
    warnings: tuple = ()
    flat: tuple[float, float] | None = None


def _round_sig(v: float, digits: int = 3) -> float:
    if v == 0 or not math.isfinite(v):
        return v
    return float(f"{v:.{digits}g}")


def _round_half_life(h: float | None) -> float | None:
    if h is None:
        return None
    # whole minutes below a day, whole hours above: config files read better so
    step = 60.0 if h < _DAY else _HOUR
    return max(step, round(h / step) * step)


def _round_drift(q: float | None, policy: str) -> float | None:
    if q is None:
        return None
    if policy == "offset":
        # three significant digits of the change per hour, as the config writes it
        s = _round_sig(math.sqrt(q * _HOUR))
        return s * s / _HOUR
    return _round_sig(q)


def tune(history: History, base: ModelConfig, *, until: float | None = None,
         burn_in: int = 20, search=("alpha", "noise", "half_life"), policy: str | None = None,
         rounds: int = 2, refine: bool = True, keep_outliers: bool = False,
         lab_delay: float = LAB_DELAY) -> TuneResult:
    """Choose ``alpha``, the noise and the forgetting (policy and rates) of ``base`` by the
    prequential log predictive density at the real lab delay (module docstring).

    Parameters
    ----------
    until : epoch seconds; only lab results drawn before it are used (the first weeks).
    burn_in : the first ``burn_in`` lab results are learned from but not scored.
    search : which of ``"alpha"``, ``"noise"``, ``"half_life"`` to choose; ``"half_life"``
        stands for the forgetting: the policy and its rates (half-life, drift rate). With
        learned noise, ``"noise"`` sets the guess from the predictive residuals (the score
        hardly depends on a guess worth a few results); with known noise it searches the
        std by the score.
    policy : one of :data:`POLICIES` to compare only that one (default: all of them).
    keep_outliers : score every lab result after the burn-in, gated ones included.
    lab_delay : seconds from drawing a sample to its result (default 2 h, as the backtest):
        each result is predicted from the results that had arrived when its sample was
        drawn.
    """
    unknown = set(search) - {"alpha", "noise", "half_life"}
    if unknown:
        raise ValueError(f"search={search!r}: unknown parameter(s) {sorted(unknown)}")
    lab_delay = float(lab_delay)
    if not (math.isfinite(lab_delay) and lab_delay >= 0):
        raise ValueError(f"lab_delay={lab_delay!r}: must be finite and >= 0 seconds")
    base_policy, base_h, base_q = _policy_of(base)
    if policy is None:
        policies = POLICIES if "half_life" in search else (base_policy,)
    elif policy in POLICIES:
        policies = (policy,)
    else:
        raise ValueError(f"policy={policy!r}: expected one of {', '.join(POLICIES)}")
    if isinstance(burn_in, bool) or not isinstance(burn_in, int) or burn_in < 0:
        raise ValueError(f"burn_in={burn_in!r}: expected an integer >= 0")
    data = lab_data(history, base, until)
    if data.t.size <= burn_in + 2:
        raise ValueError(f"{data.t.size} usable lab results with burn-in {burn_in}: too few "
                         f"to tune (unmatched: {data.n_unmatched})")

    known_noise = base.noise_std is not None
    noise0 = base.noise_std if known_noise else base.noise_guess
    alpha0 = base.alpha if base.alpha > 0 else 1.0 / max(float(np.var(data.y)), 1e-300)
    gaps = np.diff(data.t)
    gaps = gaps[gaps > 0]
    dt_lab = float(np.median(gaps)) if gaps.size else _HOUR
    cache: dict[tuple, Candidate] = {}
    order: list[Candidate] = []

    def model_of(p: dict) -> ModelConfig:
        return _variant(base, p["alpha"], p["noise"], p["half_life"], p["policy"], p["q"],
                        p.get("adapt"))

    def evaluate(p: dict, scored, stage: str = "grid") -> Candidate:
        key = (p["alpha"], p["noise"], p["half_life"], p["policy"], p["q"], p.get("adapt"))
        c = cache.get(key)
        if c is None:
            c = replace(prequential(model_of(p), data, scored, lab_delay), stage=stage)
            cache[key] = c
            order.append(c)
        return c

    def mask_from(model: ModelConfig) -> np.ndarray:
        m = np.arange(data.t.size) >= burn_in
        if not keep_outliers:
            m &= ~_run(model, data, lab_delay).gated
        return m

    def start_of(pol: str, alpha: float, noise: float) -> dict:
        h = base_h if pol == base_policy else None
        q = base_q if pol == base_policy else None
        if pol in ("stabilized", "exponential") and h is None:
            h = 7 * _DAY
        if pol == "offset" and base_policy != "offset":
            h = base_h if base_h is not None else 7 * _DAY
        if pol in ("random_walk", "offset") and q is None:
            q = noise * noise / dt_lab / 16.0
        return {"alpha": alpha, "noise": noise, "policy": pol, "half_life": h, "q": q}

    current = start_of(base_policy if base_policy in policies else policies[0], alpha0,
                       noise0)
    start = model_of(current)
    scored = mask_from(start)
    best_of: dict[str, dict] = {}
    axes = [a for a in ("alpha",) if a in search] + \
        (["noise"] if "noise" in search and known_noise else [])

    def prior_and_noise(score_mask) -> None:
        for axis in axes:
            current[axis] = _best_on_axis(axis, current,
                                          lambda p, s=score_mask: evaluate(p, s))
        if "noise" in search and not known_noise:
            current.update(_renoise(current, _noise_from_residuals(
                evaluate(current, score_mask), current["noise"])))

    for _ in range(2):
        cache.clear()
        best_of.clear()
        # first the prior and noise with the starting forgetting, then the forgetting
        # (every policy on its grid), then the prior and noise again for the winner, and
        # its rates refined: the axes interact little once each is near its optimum
        prior_and_noise(scored)
        if "half_life" in search:
            for pol in policies:
                best_of[pol] = _search_policy(start_of(pol, current["alpha"], current["noise"]),
                                              lambda p, s=scored: evaluate(p, s), dt_lab)
            winner = max(best_of.values(), key=lambda p: _score(evaluate(p, scored)))
            current = {**winner, "alpha": current["alpha"], "noise": current["noise"]}
        for _ in range(max(1, rounds) - 1):
            # the prior found with the starting forgetting may not suit the winner (an
            # offset left unmodelled shows as shrunk slopes): once more for the winner alone
            prior_and_noise(scored)
            if "half_life" in search and current["policy"] != "none":
                current = _search_policy(dict(current), lambda p, s=scored: evaluate(p, s),
                                         dt_lab, around=current)
                prior_and_noise(scored)
        if refine:
            for axis in axes + [a for a in ("q", "half_life") if "half_life" in search]:
                if current[axis] is not None:
                    current[axis] = _refine(axis, current,
                                            lambda p, s=scored: evaluate(p, s, "refine"))
            if "noise" in search and not known_noise:
                current.update(_renoise(current, _noise_from_residuals(
                    evaluate(current, scored), current["noise"])))
        if "half_life" in search:
            # every policy at the prior and noise the winner ended with, so that they are
            # compared alike; one of them may now do better than the winner
            for name in best_of:
                p = best_of[name]
                if not known_noise:
                    p = _renoise(p, current["noise"])
                best_of[name] = {**p, "alpha": current["alpha"], "noise": current["noise"]}
            best_of[current["policy"]] = dict(current)
            top = max(best_of.values(), key=lambda p: _score(evaluate(p, scored)))
            if _score(evaluate(top, scored)) > _score(evaluate(current, scored)):
                current = dict(top)
        new = mask_from(model_of(current))
        if np.array_equal(new, scored):
            break
        scored = new
    flat = None
    if "half_life" in search and "offset" in policies:
        current, flat = _adaptive_choice(current, best_of, lambda p, st="flat", s=scored:
                                         evaluate(p, s, st))
    pol = current["policy"]
    chosen = {"alpha": _round_sig(current["alpha"]), "noise": _round_sig(current["noise"]),
              "policy": pol, "half_life": _round_half_life(current["half_life"]),
              "q": _round_drift(current["q"], pol)}
    if current.get("adapt") is not None:
        chosen["adapt"] = tuple(_round_drift(b, pol) for b in current["adapt"])
    best = evaluate(chosen, scored, "chosen")
    model = model_of(chosen)
    by_policy = {}
    for name, p in best_of.items():
        by_policy[name] = evaluate(p, scored) if name != pol else best
    warnings = _warnings(model, best, by_policy, order, data, scored, lab_delay, flat)
    return TuneResult(model, best, order, int(data.t.size), int(np.count_nonzero(scored)),
                      burn_in, int(np.count_nonzero(~scored[burn_in:])), until, start,
                      lab_delay, by_policy, tuple(warnings), flat)


def _score(c: Candidate) -> float:
    return c.score if math.isfinite(c.score) else -math.inf


def _renoise(p: dict, noise: float) -> dict:
    """``p`` with the learned-noise guess ``noise`` and the same model otherwise.

    With learned noise the prior precision (``alpha``) and the drift rates (``q``) hold at
    the guess (``recursive.Posterior`` works in units of the guessed noise variance): what
    the model is made of is ``alpha * guess^2`` and ``q / guess^2``. Moving the guess alone
    would change both, so they move with it.
    """
    f = (noise / p["noise"]) ** 2
    out = {**p, "noise": noise, "alpha": p["alpha"] / f}
    if p["q"] is not None:
        out["q"] = p["q"] * f
    return out


def _noise_from_residuals(c: Candidate, fallback: float) -> float:
    v = c.noise_pred
    return v if math.isfinite(v) and v > 0 else fallback


#: Drift rates tried first: the variance added per lab interval as a share of the noise
#: variance, in powers of 4 (4^-6 .. 4^2).
_DRIFT_STEPS = np.arange(-6.0, 2.01, 1.0)


def _q_grid(center_noise: float, dt_lab: float) -> list[float]:
    # the drift per lab interval as a share of the noise variance: 4^-6 .. 4^2
    return [center_noise ** 2 / dt_lab * 4.0 ** k for k in _DRIFT_STEPS]


#: Half-lives tried jointly with the offset drift (seconds); ``None``: the drift alone.
_OFFSET_HALF_LIVES = (12 * _HOUR, 2 * _DAY, 7 * _DAY, 28 * _DAY, 112 * _DAY, None)


def _search_policy(p: dict, evaluate, dt_lab: float, around: dict | None = None) -> dict:
    """The best rates of one policy on a grid over the half-life and/or the drift rate
    (jointly for ``offset``), extended at a favourable end; ``around`` a found choice, the
    grid is the neighbours of its rates."""
    pol = p["policy"]
    if pol == "none":
        evaluate(p)
        return p
    hs = {"offset": list(_OFFSET_HALF_LIVES), "random_walk": [None],
          "exponential": [h for h in HALF_LIVES if h is not None]}.get(pol, list(HALF_LIVES))
    qs = _q_grid(p["noise"], dt_lab) if pol in ("random_walk", "offset") else [None]
    if around is not None:
        h0, q0 = around["half_life"], around["q"]
        if h0 is not None:
            hs = sorted({h0 / 2, h0, h0 * 2}) + ([None] if pol != "exponential" else [])
        elif pol != "random_walk":
            hs = [_OFFSET_HALF_LIVES[-2], None]
        if q0 is not None:
            qs = [q0 / 4, q0 / 2, q0, q0 * 2, q0 * 4]
    results = {(h, q): evaluate({**p, "half_life": h, "q": q}) for h in hs for q in qs}

    def best_key():
        return max(results, key=lambda k: _score(results[k]))

    for _ in range(_MAX_EXTEND):
        h, q = best_key()
        grown = False
        if q is not None and q == max(qs):
            qs.append(q * 4.0)
            grown = True
        elif q is not None and q == min(qs) and len(qs) > 1:
            # a lower rate is followed only while it still pays: toward no drift at all the
            # score goes flat
            if _score(results[(h, q)]) - _score(results[(h, sorted(qs)[1])]) > _FLAT:
                qs.insert(0, q / 4.0)
                grown = True
        finite = [x for x in hs if x is not None]
        if h is not None and finite and h == min(finite) and h > _HOUR:
            hs.insert(0, h / 2.0)
            grown = True
        if not grown:
            break
        for hh in hs:
            for qq in qs:
                if (hh, qq) not in results:
                    results[(hh, qq)] = evaluate({**p, "half_life": hh, "q": qq})
    h, q = best_key()
    return {**p, "half_life": h, "q": q}


#: A range of offset drift rates (variance rates, a factor 4 = a factor 2 in the change per
#: hour) scoring within :data:`FLAT_NATS` of the best counts as undetermined from this span.
FLAT_SPAN = 16.0
_FLAT_STEPS = 8  # steps of 4 in the offset rate scanned each way from the best
#: Bounds of an adapted offset drift: the rates whose total score is within this of the best,
#: the 95 % likelihood-ratio interval of one parameter (chi-square(1) 0.95 quantile / 2,
#: Wilks 1938), with the prequential score as the log-likelihood.
ADAPT_NATS = float(stats.chi2.ppf(0.95, 1) / 2.0)


def _flat_range(p: dict, evaluate, top: float, nats: float) -> tuple[float, float, dict]:
    """The contiguous offset drift rates around ``p["q"]`` (steps of 4) whose total score is
    within ``nats`` of the best (of them and ``top``): ``(lo, hi, best point)``. The scan
    goes on each way until a rate falls more than ``nats`` below the best, or
    :data:`_FLAT_STEPS` steps."""
    res = {0: evaluate(p)}

    def best_total():
        return max(top, *(c.total for c in res.values() if math.isfinite(c.score)))

    for sign in (-1, 1):
        for j in range(1, _FLAT_STEPS + 1):
            k = sign * j
            res[k] = evaluate({**p, "q": p["q"] * 4.0 ** k})
            if not (math.isfinite(res[k].score) and res[k].total >= best_total() - nats):
                break
    best = best_total()
    ks = sorted(res)
    k0 = max(ks, key=lambda k: _score(res[k]))
    inside = {k for k in ks if math.isfinite(res[k].score) and res[k].total >= best - nats}
    if k0 not in inside:
        return p["q"], p["q"], p
    lo = hi = k0
    while lo - 1 in inside:
        lo -= 1
    while hi + 1 in inside:
        hi += 1
    return p["q"] * 4.0 ** lo, p["q"] * 4.0 ** hi, {**p, "q": p["q"] * 4.0 ** k0}


def _adaptive_choice(current: dict, best_of: dict, evaluate):
    """The choice when the data do not determine the offset drift rate: adapt it online.

    When the chosen forgetting is an offset drift, or the best offset drift scores within
    :data:`FLAT_NATS` of the chosen policy (the data hardly tell them apart), the offset
    rates around it are scanned in steps of 4. If those within :data:`FLAT_NATS` of the best
    span :data:`FLAT_SPAN` or more, the training data cannot tell them apart and any one of
    them is an arbitrary pick (on a quiet fortnight the score may even prefer a rate
    hundreds of times below the unit's). The choice then becomes the offset drift adapted
    online by covariance matching (`recursive.adaptive.RateMatch`) within the rates the data
    do not exclude (within :data:`ADAPT_NATS` of the best), started at their geometric
    middle, provided that it scores within :data:`FLAT_NATS` of the best as well. Returns the
    point chosen and the flat range (None if the rate is determined).
    """
    top = evaluate(current).total
    if current["policy"] == "offset":
        p = dict(current)
    else:
        p = best_of.get("offset")
        if p is None or not evaluate(p).total >= top - FLAT_NATS:
            return current, None
        p = {**p, "alpha": current["alpha"], "noise": current["noise"]}
    lo, hi, p_best = _flat_range(p, evaluate, top, FLAT_NATS)
    if hi / lo < FLAT_SPAN:
        return current, None
    # the bounds: every rate the data do not exclude, the likelihood-ratio interval
    blo, bhi, _ = _flat_range(p_best, evaluate, top, ADAPT_NATS)
    blo, bhi = min(lo, blo), max(hi, bhi)
    # started in the middle: starting at the top cost more score on a quiet fortnight than
    # the adaptation later gained
    cand = {**p_best, "q": math.sqrt(blo * bhi), "adapt": (blo, bhi)}
    c = evaluate(cand)
    if not (math.isfinite(c.score) and c.total >= max(top, evaluate(p_best).total) - FLAT_NATS):
        return current, (lo, hi)
    return cand, (lo, hi)


def _grid(axis: str, center) -> list:
    if axis == "alpha":
        return [center * 10.0 ** s for s in _ALPHA_STEPS]
    if axis == "noise":
        return [center * 2.0 ** s for s in _NOISE_STEPS]
    return list(HALF_LIVES)


def _best_on_axis(axis: str, current: dict, evaluate, dt_lab: float = _HOUR):
    values = _grid(axis, current[axis])
    results = [evaluate({**current, axis: v}) for v in values]
    ratio = 10.0 ** 0.5 if axis == "alpha" else 2.0 ** 0.5
    for _ in range(_MAX_EXTEND):
        scores = [_score(c) for c in results]
        i = int(np.argmax(scores))
        v = values[i]
        # a flat end (the prior no longer matters, say) is not worth following further
        j = i + 1 if i == 0 else i - 1
        if 0 <= j < len(scores) and scores[i] - scores[j] < _FLAT:
            break
        if i == 0:
            new = [v / ratio ** 2, v / ratio]
            values[:0] = new
            results[:0] = [evaluate({**current, axis: x}) for x in new]
        elif i == len(values) - 1:
            new = [v * ratio, v * ratio ** 2]
            values.extend(new)
            results.extend(evaluate({**current, axis: x}) for x in new)
        else:
            break
    # of values within _FLAT of the best, keep the one nearest the current value, so that a
    # flat direction does not wander from round to round
    top = max(_score(c) for c in results)
    near = [v for v, c in zip(values, results, strict=True) if _score(c) >= top - _FLAT]
    center = current[axis]
    return min(near, key=lambda v: abs(math.log(v / center)))


def _refine(axis: str, current: dict, evaluate):
    v = current[axis]
    if v is None:
        return v
    step = {"alpha": 0.5 * math.log(10.0), "noise": 0.5 * math.log(2.0),
            "half_life": math.log(2.0), "q": math.log(4.0)}[axis]
    x0 = math.log(v)

    def f(x):
        c = evaluate({**current, axis: math.exp(x)})
        return -c.score if math.isfinite(c.score) else 1e300

    res = optimize.minimize_scalar(f, bounds=(x0 - step, x0 + step), method="bounded",
                                   options={"xatol": 0.01, "maxiter": 25})
    best = min([x0, float(res.x)], key=f)
    return math.exp(best)


def _describe_choice(c: Candidate) -> str:
    h = _fmt_h(_round_half_life(c.half_life))
    if c.policy == "none":
        return "no forgetting"
    if c.policy in ("stabilized", "exponential"):
        return f"{c.policy} half-life {h}"
    if c.policy == "random_walk":
        return f"random walk q {c.q:.3g}/s"
    rate = f"offset drift {_drift_text(c.q, c)}" if c.adapt is None else (
        f"offset drift adapted {_drift_text(c.adapt[0], c, False)}.."
        f"{_drift_text(c.adapt[1], c)}")
    return rate + (f" + stabilized {h}" if c.half_life is not None else "")


def _warnings(model: ModelConfig, best: Candidate, by_policy: dict, order: list,
              data: LabData, scored, lab_delay: float, flat=None) -> list[str]:
    """What the score cannot show: ties between policies and rates, pinned slopes, too few
    degrees of freedom."""
    out = []
    if flat is not None:
        lo, hi = (_drift_text(v, replace(best, policy="offset")) for v in flat)
        if best.adapt is not None:
            out.append(f"the data do not determine the offset drift rate: from {lo} to {hi} "
                       f"score within {FLAT_NATS:g} nat of the best, so the rate is adapted "
                       f"online within that range (adapt_offset, covariance matching of the "
                       f"residuals), not fixed at an arbitrary value")
        else:
            out.append(f"the data do not determine the offset drift rate: from {lo} to {hi} "
                       f"score within {FLAT_NATS:g} nat of the best; the rate adapted within "
                       f"that range scored worse, so a fixed rate was kept")
    total = best.total
    rivals = [c for name, c in by_policy.items() if name != best.policy
              and math.isfinite(c.score) and total - c.total < FLAT_NATS]
    if rivals:
        out.append("the data hardly tell the policies apart: " + ", ".join(
            f"{_describe_choice(c)} scores {c.total - total:+.2f} nats" for c in rivals)
            + f" against the chosen one (below {FLAT_NATS:g} nat over {best.n} results)")
    same = [c for c in order if c.policy == best.policy and c.alpha == best.alpha
            and c.noise == best.noise and math.isfinite(c.score)
            and total - c.total < FLAT_NATS]
    if best.policy in ("random_walk", "offset") and best.q and flat is None:
        qs = [c.q for c in same if c.q and c.half_life == best.half_life]
        if qs and max(qs) / min(qs) >= 16.0:
            out.append(f"the data do not determine the drift rate: from "
                       f"{_drift_text(min(qs), best)} to {_drift_text(max(qs), best)} "
                       f"score within {FLAT_NATS:g} nat of the best")
    if best.policy in ("stabilized", "exponential", "offset") and best.half_life is not None:
        hs = [c.half_life for c in same if (c.q == best.q or best.policy != "offset")]
        finite = [h for h in hs if h is not None]
        if None in hs or (finite and max(finite) / min(finite) >= 8.0):
            hi = "no forgetting" if None in hs else _fmt_h(max(finite))
            out.append(f"the data do not determine the half-life: from {_fmt_h(min(finite))} "
                       f"to {hi} score within {FLAT_NATS:g} nat of the best")
    if best.dof_min < MIN_DOF:
        out.append(f"the chosen forgetting leaves only {best.dof_min:.1f} degrees of freedom "
                   f"in some predictions (fewer than {MIN_DOF:g}): their intervals are very "
                   f"wide or infinite; a longer half-life or a drift on the offset only keeps "
                   f"more results")
    Phi = data.Phi[np.asarray(scored, bool)]
    slopes = ~model.build_basis().unpenalized
    noise = best.noise_pred if math.isfinite(best.noise_pred) else best.noise
    if model.alpha > 0 and slopes.any() and Phi.size:
        effect = float(np.max(Phi[:, slopes].std(axis=0))) / math.sqrt(model.alpha)
        if effect < 0.05 * noise:
            out.append(f"alpha {model.alpha:.3g} pins every slope to zero: a weight's prior "
                       f"sd {1 / math.sqrt(model.alpha):.3g} moves the prediction by at most "
                       f"{effect:.3g}, under 5 % of the noise {noise:.3g}; the model is a "
                       f"level follower, not a soft sensor of these inputs")
    return out


def _drift_text(q: float, c: Candidate, unit: bool = True) -> str:
    if c.policy != "offset":
        return f"q {q:.3g}/s"
    return f"{math.sqrt(q * _HOUR):.3g}" + (" per 1h" if unit else "")


# ---------------------------------------------------------------------------------- text
def _fmt_h(h: float | None) -> str:
    return "none" if h is None else format_duration(h)


def table_text(res: TuneResult, *, top: int = 12, unit: str = "", source: str = "") -> str:
    """The candidates, best first, the best of each policy, what was chosen and the
    warnings."""
    m = res.model
    noise_name = "noise std" if m.noise_std is not None else "noise guess"
    u = f" {unit}" if unit else ""
    span = ""
    if res.until is not None:
        span = f" drawn before {datetime.fromtimestamp(res.until, UTC):%Y-%m-%d %H:%M} UTC"
    lines = [
        f"tune {m.name}{' on ' + source if source else ''}: {res.n_labs} lab results{span}; "
        f"the first {res.burn_in} learned but not scored; {res.outliers} rejected by the gate "
        f"left out; {res.n_scored} scored",
        "criterion: prequential log predictive density (Dawid 1984), mean ln p(lab) per "
        "scored lab result in nats, higher is better; each result predicted from the "
        f"results known when its sample was drawn (lab delay {format_duration(res.lab_delay)})",
        "",
        f"  {'rank':>4}  {'alpha':>9}  {noise_name + (f' [{unit}]' if unit else ''):>16}  "
        f"{'forgetting':<40}  "
        f"{'mean ln p':>10}  {'RMSE':>9}  {'cover':>6}  {'gated':>5}",
    ]
    # the refinement steps differ in far digits; the grid and the chosen value tell the story
    ranked = sorted((c for c in res.candidates if c.stage != "refine"),
                    key=lambda c: -c.score if math.isfinite(c.score) else math.inf)
    # the candidate the chosen values were rounded from would read as the same row twice
    shown = [c for c in ranked if c is res.best or not _rounds_to(c, res.best)][:top]
    if res.best not in shown:
        shown.append(res.best)
    for i, c in enumerate(shown, 1):
        mark = "  <- chosen" if c is res.best else ""
        lines.append(f"  {i:>4}  {c.alpha:9.3g}  {c.noise:16.4g}  "
                     f"{_describe_choice(c):<40}  "
                     f"{c.score:10.4f}  {c.rmse:9.4g}  {100 * c.coverage:5.1f}%  {c.gated:5d}"
                     f"{mark}")
    lines += [
        f"  ({len(res.candidates)} candidates evaluated, {len(ranked) - 1} on the grids and "
        f"scans of the offset rate and the rest refining the best; the chosen values are "
        f"rounded to 3 significant digits)",
    ]
    if len(res.by_policy) > 1:
        lines += ["", "best of each policy (total ln p over the scored results, against the "
                      "chosen):"]
        for c in sorted(res.by_policy.values(), key=lambda c: -_score(c)):
            diff = c.total - res.best.total if math.isfinite(c.score) else -math.inf
            lines.append(f"  {_describe_choice(c):<40} {diff:+10.2f} nats  RMSE "
                         f"{c.rmse:.4g}{u}")
    lines += [
        "",
        f"chosen: alpha {m.alpha:g}, {noise_name} {_num(res.best.noise)}{u}, "
        + _describe_choice(res.best)
        + (f"; final noise estimate {res.best.noise_std:.3g}{u}, from the predictive "
           f"residuals {res.best.noise_pred:.3g}{u}" if m.noise_std is None else ""),
    ]
    for w in res.warnings:
        lines.append(f"warning: {w}")
    return "\n".join(lines)


def _rounds_to(c: Candidate, best: Candidate) -> bool:
    """Whether ``c`` is ``best`` before its values were rounded to be written."""
    return (c.policy == best.policy and _round_sig(c.alpha) == best.alpha
            and _round_sig(c.noise) == best.noise
            and _describe_choice(c) == _describe_choice(best))


def _num(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    v = float(v)
    if v.is_integer() and abs(v) < 1e15:
        return str(int(v))
    return repr(v)


def _str(s: str) -> str:
    return '"' + s.replace("\\", "\\\\").replace('"', '\\"') + '"'


def _dur(v: float) -> str:
    return _str(format_duration(v))


_ALERT_KEYS = (
    ("enabled", "alerts", _num), ("cusum_k", "cusum_k", _num), ("cusum_h", "cusum_h", _num),
    ("head_start", "head_start", _num), ("spread_sigma", "spread_sigma", _num),
    ("spread_h", "spread_h", _num), ("hold", "hold", _num),
    ("calibration_half_life", "calibration_half_life", _num),
    ("coverage_min", "coverage_min", _num), ("std_limit", "std_limit", _num),
    ("std_ratio", "std_ratio", _num), ("std_half_life", "std_half_life", _num),
    ("leverage_limit", "leverage_limit", _num), ("region_limit", "region_limit", _num),
    ("region_half_life", "region_half_life", _num), ("drift_window", "drift_window", _dur),
    ("drift_limit", "drift_limit", _num), ("clear_count", "clear_count", _num),
    ("clear_time", "clear_time", _dur), ("auto_flatten", "auto_flatten", _num),
    ("flatten_keep", "flatten_keep", _num),
    ("region_min_samples", "region_min_samples", _num),
    ("commissioning_labs", "commissioning_labs", _num),
    ("commissioning_time", "commissioning_time", _dur),
)


def model_toml(m: ModelConfig, comments=()) -> str:
    """A ``[[model]]`` block that `daemon.config.loads` reads back as ``m``."""
    out = [f"# {c}" for c in comments]
    out += ["[[model]]", f"name = {_str(m.name)}"]
    if m.target:
        out.append(f"target = {_str(m.target)}")
    if m.unit:
        out.append(f"unit = {_str(m.unit)}")
    out += [f"level = {_num(m.level)}", "inputs = ["]
    for i in m.inputs:
        dead = f", dead_time = {_dur(i.dead_time)}" if i.dead_time > 0 else ""
        out.append(f"    {{ tag = {_str(i.tag)}, lo = {_num(i.lo)}, hi = {_num(i.hi)}{dead} }},")
    out += ["]", "", "[model.basis]", f"kind = {_str(m.basis_kind)}"]
    if m.basis_kind == "polynomial":
        out += [f"degree = {m.degree}", f"interactions = {_num(m.interactions)}",
                f"family = {_str(m.family)}"]
    out += ["", "[model.prior]", f"alpha = {_num(m.alpha)}"]
    if m.prior_mean is not None:
        out.append("mean = [" + ", ".join(_num(v) for v in m.prior_mean) + "]")
    out += ["", "[model.noise]"]
    if m.noise_std is not None:
        out.append(f"std = {_num(m.noise_std)}")
    else:
        out += [f"guess = {_num(m.noise_guess)}", f"strength = {_num(m.noise_strength)}"]
    out += ["", "[model.forgetting]", f"policy = {_str(m.forgetting)}"]
    if m.half_life is not None:
        out.append(f"half_life = {_dur(m.half_life)}")
    if m.q is not None:
        out.append(f"q = {_num(m.q)}")
    for key in ("offset_drift", "linear_drift", "higher_drift"):
        if getattr(m, key) is not None:
            out.append(f"{key} = {_str(format_drift(getattr(m, key)))}")
    if m.adapt_offset:
        out += ["# the offset drift adapts online within these bounds, starting at "
                "offset_drift", "adapt_offset = true"]
        for key in ("offset_drift_min", "offset_drift_max"):
            if getattr(m, key) is not None:
                out.append(f"{key} = {_str(format_drift(getattr(m, key)))}")
        out.append(f"adapt_window = {_num(m.adapt_window)}")
    out += ["", "[model.gate]", f"k = {_num(m.gate or 0.0)}"]
    if m.gate:
        out.append(f"release = {m.gate_release}")
    out += ["", "[model.lab]", f"keep = {_dur(m.keep)}", f"keep_count = {m.keep_count}",
            f"tolerance = {_dur(m.tolerance)}"]
    defaults = {f.name: f.default for f in fields(ModelConfig)}
    if m.stale_after is not None:
        out.append(f"stale_after = {_dur(m.stale_after)}")
    for key, fmt in (("stale_factor", _num), ("stale_min", _dur), ("stale_max", _dur)):
        if getattr(m, key) != defaults[key]:
            out.append(f"{key} = {fmt(getattr(m, key))}")
    changed = [(key, fmt(getattr(m, attr))) for key, attr, fmt in _ALERT_KEYS
               if getattr(m, attr) != defaults[attr] and getattr(m, attr) is not None]
    if changed:
        out += ["", "[model.alerts]"] + [f"{k} = {v}" for k, v in changed]
    return "\n".join(out) + "\n"


def header_comments(res: TuneResult, source: str) -> list[str]:
    """Comment lines saying how a tuned block was chosen."""
    return [
        f"Tuned by posteriord tune on {os.path.basename(source)}: mean ln p(lab) "
        f"{res.best.score:.4f} over {res.n_scored} lab results (prequential, burn-in "
        f"{res.burn_in}, lab delay {format_duration(res.lab_delay)}).",
    ] + [f"WARNING: {w}" for w in res.warnings]
