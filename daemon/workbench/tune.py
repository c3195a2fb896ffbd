"""Tune: choose a model's prior, noise prior and forgetting half-life from a historian CSV.

The criterion is the prequential log predictive density (Dawid 1984): the lab results are
taken in time order, each is predicted by the model learned from the ones before it, and the
log density of the one-step-ahead predictive at the lab value is averaged over the lab results
after a burn-in. Without forgetting, the sum over all lab results is the log marginal
likelihood (the evidence) of the model, so this is evidence maximization; with forgetting it
rewards the half-life that predicts best, which is what the daemon is for.

The model runs on `recursive.Posterior` exactly as the daemon builds it from its config
(`ModelConfig.build_posterior`), with the features each lab sample reflects matched by the
daemon's rule (dead times, tolerance). Lab results the robust gate of the starting model
rejects (blunders) are left out of the score for every candidate alike, since a single
blunder would otherwise decide between candidates; they are re-derived once from the best
candidate.

Search: coordinate-wise over log-spaced grids (alpha in half decades, the noise in half
octaves, half-lives from 6 h to 16 weeks and no forgetting), extended when the best value is
at the end of a grid, twice round, then refined by `scipy.optimize.minimize_scalar` between
the grid neighbours of the best value.
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass, fields, replace
from datetime import UTC, datetime

import numpy as np
from scipy import optimize, special

from daemon.config import InputConfig, ModelConfig, format_duration
from daemon.workbench.backtest import History, lab_features

__all__ = [
    "HALF_LIVES",
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
@dataclass(frozen=True)
class Candidate:
    """One evaluated setting and how it predicted.

    ``score`` is the mean log predictive density (nats per scored lab result; higher is
    better), ``rmse`` and ``coverage`` (of the model's interval) are over the same lab results,
    ``gated`` counts all the lab results its gate rejected, ``noise_std`` is its final
    estimate (or the known value).
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


def _variant(base: ModelConfig, alpha: float, noise: float, half_life: float | None,
             policy: str) -> ModelConfig:
    m = replace(base, alpha=float(alpha))
    m = replace(m, noise_std=float(noise)) if base.noise_std is not None else \
        replace(m, noise_guess=float(noise))
    if half_life is None:
        return replace(m, forgetting="none", half_life=None, q=None)
    return replace(m, forgetting=policy, half_life=float(half_life), q=None)


def _run(model: ModelConfig, data: LabData):
    post = model.build_posterior()
    k = data.t.size
    logp = np.full(k, np.nan)
    resid = np.full(k, np.nan)
    z = np.full(k, np.nan)
    gated = np.zeros(k, dtype=bool)
    for i in range(k):
        step = post.update(data.Phi[i], float(data.y[i]), float(data.t[i]))
        logp[i], resid[i], z[i] = step.logpdf, step.innovation, step.z
        gated[i] = step.reason == "gated"
    return logp, resid, z, gated, post


def prequential(model: ModelConfig, data: LabData, scored) -> Candidate:
    """Run ``model`` over ``data`` one lab result at a time and score the ``scored`` ones.

    ``scored`` is a boolean mask over the lab results. A scored lab result the model could
    not predict (not identified yet) makes the score ``-inf``.
    """
    scored = np.asarray(scored, dtype=bool)
    logp, resid, z, gated, post = _run(model, data)
    n = int(np.count_nonzero(scored))
    lp = logp[scored]
    value = float(np.mean(lp)) if n and np.all(np.isfinite(lp)) else -math.inf
    r = resid[scored]
    zq = special.ndtri(0.5 + model.level / 2)
    zz = z[scored]
    noise = model.noise_std if model.noise_std is not None else (
        math.sqrt(post.noise_var) if post.noise_var > 0 else math.nan)
    return Candidate(
        alpha=model.alpha,
        noise=model.noise_std if model.noise_std is not None else model.noise_guess,
        half_life=model.half_life if model.forgetting != "none" else None,
        score=value,
        rmse=float(np.sqrt(np.nanmean(r ** 2))) if n else math.nan,
        coverage=float(np.mean(np.abs(zz) <= zq)) if n else math.nan,
        gated=int(np.count_nonzero(gated)), n=n, noise_std=float(noise))


# ---------------------------------------------------------------------------------- search
@dataclass(frozen=True, eq=False)
class TuneResult:
    """The chosen model, its candidate, and every candidate evaluated (in order)."""

    model: ModelConfig
    best: Candidate
    candidates: list
    n_labs: int
    n_scored: int
    burn_in: int
    outliers: int
    until: float | None
    start: ModelConfig


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


def tune(history: History, base: ModelConfig, *, until: float | None = None,
         burn_in: int = 20, search=("alpha", "noise", "half_life"), policy: str | None = None,
         rounds: int = 2, refine: bool = True, keep_outliers: bool = False) -> TuneResult:
    """Choose ``alpha``, the noise (guess, or ``std`` when the noise is known) and the
    half-life of ``base`` by the prequential log predictive density (module docstring).

    Parameters
    ----------
    until : epoch seconds; only lab results drawn before it are used (the first weeks).
    burn_in : the first ``burn_in`` lab results are learned from but not scored.
    search : which of ``"alpha"``, ``"noise"``, ``"half_life"`` to choose; the half-life is
        only searched when the model forgets or ``policy`` names a forgetting policy.
    policy : ``"stabilized"`` or ``"exponential"`` for the candidates that forget (default:
        the base model's policy, or stabilized when it has none).
    keep_outliers : score every lab result after the burn-in, gated ones included.
    """
    unknown = set(search) - {"alpha", "noise", "half_life"}
    if unknown:
        raise ValueError(f"search={search!r}: unknown parameter(s) {sorted(unknown)}")
    if base.forgetting == "random_walk":
        raise ValueError("tune chooses half-lives of the stabilized and exponential policies; "
                         "the model uses policy = \"random_walk\"")
    if policy is None:
        policy = base.forgetting if base.forgetting in ("stabilized", "exponential") \
            else "stabilized"
        search_h = "half_life" in search and base.forgetting != "none"
    elif policy in ("stabilized", "exponential"):
        search_h = "half_life" in search
    else:
        raise ValueError(f"policy={policy!r}: expected 'stabilized' or 'exponential'")
    if isinstance(burn_in, bool) or not isinstance(burn_in, int) or burn_in < 0:
        raise ValueError(f"burn_in={burn_in!r}: expected an integer >= 0")
    data = lab_data(history, base, until)
    if data.t.size <= burn_in + 2:
        raise ValueError(f"{data.t.size} usable lab results with burn-in {burn_in}: too few "
                         f"to tune (unmatched: {data.n_unmatched})")

    noise0 = base.noise_std if base.noise_std is not None else base.noise_guess
    alpha0 = base.alpha if base.alpha > 0 else 1.0 / max(float(np.var(data.y)), 1e-300)
    h0 = base.half_life if base.forgetting != "none" else (None if not search_h else 7 * _DAY)
    current = {"alpha": alpha0, "noise": noise0, "half_life": h0}
    axes = [a for a in ("alpha", "noise") if a in search] + (["half_life"] if search_h else [])
    cache: dict[tuple, Candidate] = {}
    order: list[Candidate] = []

    def model_of(p: dict) -> ModelConfig:
        return _variant(base, p["alpha"], p["noise"], p["half_life"], policy)

    def evaluate(p: dict, scored, stage: str = "grid") -> Candidate:
        key = (p["alpha"], p["noise"], p["half_life"])
        c = cache.get(key)
        if c is None:
            c = replace(prequential(model_of(p), data, scored), stage=stage)
            cache[key] = c
            order.append(c)
        return c

    def mask_from(model: ModelConfig) -> np.ndarray:
        m = np.arange(data.t.size) >= burn_in
        if not keep_outliers:
            m &= ~_run(model, data)[3]
        return m

    start = model_of(current)
    scored = mask_from(start)
    for _ in range(2):
        cache.clear()
        for _ in range(max(1, rounds)):
            for axis in axes:
                current[axis] = _best_on_axis(axis, current,
                                              lambda p, s=scored: evaluate(p, s))
        if refine:
            for axis in axes:
                current[axis] = _refine(axis, current,
                                        lambda p, s=scored: evaluate(p, s, "refine"))
        new = mask_from(model_of(current))
        if np.array_equal(new, scored):
            break
        scored = new
    chosen = {"alpha": _round_sig(current["alpha"]), "noise": _round_sig(current["noise"]),
              "half_life": _round_half_life(current["half_life"])}
    best = evaluate(chosen, scored, "chosen")
    model = model_of(chosen)
    return TuneResult(model, best, order, int(data.t.size), int(np.count_nonzero(scored)),
                      burn_in, int(np.count_nonzero(~scored[burn_in:])), until, start)


def _grid(axis: str, center) -> list:
    if axis == "alpha":
        return [center * 10.0 ** s for s in _ALPHA_STEPS]
    if axis == "noise":
        return [center * 2.0 ** s for s in _NOISE_STEPS]
    return list(HALF_LIVES)


def _best_on_axis(axis: str, current: dict, evaluate):
    values = _grid(axis, current[axis])
    if axis == "half_life" and current[axis] not in values:
        values.insert(-1, current[axis])
        values[:-1] = sorted(values[:-1])
    results = [evaluate({**current, axis: v}) for v in values]
    finite = values if axis != "half_life" else values[:-1]
    ratio = 10.0 ** 0.5 if axis == "alpha" else (2.0 ** 0.5 if axis == "noise" else 2.0)
    for _ in range(_MAX_EXTEND):
        scores = [c.score for c in results]
        i = int(np.argmax(scores))
        v = values[i]
        if v is None or not finite:
            break
        # a flat end (the prior no longer matters, say) is not worth following further
        j = i + 1 if i == 0 else i - 1
        if 0 <= j < len(scores) and scores[i] - scores[j] < _FLAT:
            break
        if v == finite[0] and (axis != "half_life" or v > _HOUR):
            new = [v / ratio ** 2, v / ratio]
            values[:0] = new
            finite[:0] = new if finite is not values else []
            results[:0] = [evaluate({**current, axis: x}) for x in new]
        elif v == finite[-1] and axis != "half_life":
            new = [v * ratio, v * ratio ** 2]
            values.extend(new)
            results.extend(evaluate({**current, axis: x}) for x in new)
        else:
            break
    # of values within _FLAT of the best, keep the one nearest the current value, so that a
    # flat direction does not wander from round to round
    top = max(c.score for c in results)
    near = [v for v, c in zip(values, results, strict=True) if c.score >= top - _FLAT]
    center = current[axis]
    if center is None:
        return None if None in near else near[-1]
    return min(near, key=lambda v: math.inf if v is None else abs(math.log(v / center)))


def _refine(axis: str, current: dict, evaluate):
    v = current[axis]
    if v is None:
        return v
    step = {"alpha": 0.5 * math.log(10.0), "noise": 0.5 * math.log(2.0),
            "half_life": math.log(2.0)}[axis]
    x0 = math.log(v)

    def f(x):
        c = evaluate({**current, axis: math.exp(x)})
        return -c.score if math.isfinite(c.score) else 1e300

    res = optimize.minimize_scalar(f, bounds=(x0 - step, x0 + step), method="bounded",
                                   options={"xatol": 0.01, "maxiter": 25})
    best = min([x0, float(res.x)], key=f)
    return math.exp(best)


# ---------------------------------------------------------------------------------- text
def _fmt_h(h: float | None) -> str:
    return "none" if h is None else format_duration(h)


def table_text(res: TuneResult, *, top: int = 12, unit: str = "", source: str = "") -> str:
    """The candidates, best first, and what was chosen."""
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
        "scored lab result in nats, higher is better",
        "",
        f"  {'rank':>4}  {'alpha':>9}  {noise_name + (f' [{unit}]' if unit else ''):>16}  "
        f"{'half-life':>10}  "
        f"{'mean ln p':>10}  {'RMSE':>7}  {'cover':>6}  {'gated':>5}",
    ]
    # the refinement steps differ in far digits; the grid and the chosen value tell the story
    ranked = sorted((c for c in res.candidates if c.stage != "refine"),
                    key=lambda c: -c.score if math.isfinite(c.score) else math.inf)
    shown = ranked[:top]
    if res.best not in shown:
        shown.append(res.best)
    for i, c in enumerate(shown, 1):
        mark = "  <- chosen" if c is res.best else ""
        lines.append(f"  {i:>4}  {c.alpha:9.3g}  {c.noise:16.4g}  "
                     f"{_fmt_h(_round_half_life(c.half_life)):>10}  "
                     f"{c.score:10.4f}  {c.rmse:7.2f}  {100 * c.coverage:5.1f}%  {c.gated:5d}"
                     f"{mark}")
    lines += [
        f"  ({len(res.candidates)} candidates evaluated, {len(ranked) - 1} on the grids and "
        f"the rest refining the best; the chosen values are rounded to 3 significant "
        f"digits)",
        "",
        f"chosen: alpha {m.alpha:g}, {noise_name} {_num(res.best.noise)}{u}, "
        + ("no forgetting" if m.forgetting == "none" else
           f"{m.forgetting} forgetting with half-life {format_duration(m.half_life)}")
        + (f"; final noise estimate {res.best.noise_std:.3g}{u}"
           if m.noise_std is None else ""),
    ]
    return "\n".join(lines)


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
)


def model_toml(m: ModelConfig, comments=()) -> str:
    """A ``[[model]]`` block that `daemon.config.loads` reads back as ``m``."""
    out = [f"# {c}" for c in comments]
    out += ["[[model]]", f"name = {_str(m.name)}", f"level = {_num(m.level)}", "inputs = ["]
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
    out += ["", "[model.gate]", f"k = {_num(m.gate or 0.0)}"]
    if m.gate:
        out.append(f"release = {m.gate_release}")
    out += ["", "[model.lab]", f"keep = {_dur(m.keep)}", f"keep_count = {m.keep_count}",
            f"tolerance = {_dur(m.tolerance)}", f"stale_after = {_dur(m.stale_after)}"]
    defaults = {f.name: f.default for f in fields(ModelConfig)}
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
        f"{res.burn_in}).",
    ]
