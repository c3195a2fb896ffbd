"""Backtest: run a model over a historian CSV through the daemon's own message path.

The rows of the file become feed messages exactly as a live feed would carry them (feature
blocks of ``block`` rows on the model's topic, each lab value as a late lab result at its drawn
time, sent ``lab_delay`` after it was drawn), and every message goes through
:meth:`daemon.runtime.service.Service.process`, with a publisher that records what would
have left the daemon. The predictions written are therefore the daemon's, bit for bit:
replaying the same messages into a running daemon gives the same bytes (tested).

Beside the model as configured, four references are scored on the same lab results:

* the same model without forgetting (run through the same service, as a second model);
* the static batch model: ridge regression with the same basis and prior, fitted once on the
  lab results of a training period at the start of the file (``train``), then held fixed;
* the static model plus a lab bias update, as plants run it: an exponential filter of its lab
  residual, ``b <- b + f (y - (static + b))``, with the factor ``f`` of `BIAS_GRID` that has
  the least RMSE on the training period;
* persistence: the last lab value known.

Scores are what the control room saw: each lab result drawn after the training period is
scored against the prediction the model published for its own sample time, before its result
or any later one was known; the bias update and persistence use only the results that had
reached the feed by then (in the order they arrived). Results the recursive model's gate
rejected are scored like any other, for every model, and also apart (``scores_gated``,
``scores_ungated``); the references never learn from them, as a plant's validity check would
not. The arrival-time score of the recursive models (each result predicted when it reached
the model, the ``fit/`` message) is given beside, labelled, for comparison only.

Predictions file (``write_predictions``): a CSV with comment lines starting with ``#``, the
first of which is ``# posteriord predictions: {json}`` with the model name, interval level,
target, unit and detector settings. Columns::

    time,t,mean,std,lo,hi,status,trust,lab,lab_mean,lab_std,lab_scale,lab_dof,residual,z,
    learned,lab_seen,alert,noforget_mean,noforget_std,static_mean,static_std,dof,
    bias_mean,bias_std,persist,persist_std

One row per published prediction (``time`` ISO 8601 UTC, ``t`` epoch seconds); the lab columns
are filled on the row of the time the sample was drawn (a row of its own when no prediction
has that time): the lab value, the one-step-ahead predictive mean, std, scale and degrees of
freedom, the residual ``lab - lab_mean``, the standardized residual ``z``, and ``learned``
(``ok``, ``gate_open``, ``gated``, ``not_identified``), ``lab_seen`` the feed time the result
reached the model (the newest sample time then). ``alert`` lists the trust-state changes
and actions published at that time (``caution:extrapolation+stale``, ``normal``, ``flatten``).
``noforget_mean`` / ``noforget_std`` are what the model without forgetting published for that
lab sample's time, ``dof`` the published prediction's degrees of freedom; ``bias_mean`` /
``bias_std`` and ``persist`` / ``persist_std`` the bias-update and persistence references for
the lab sample of that row (their std: the training RMSE). The lab columns ``lab_mean`` ...
``z`` are the arrival-time one-step prediction; the published one is the row's own ``mean``.
Empty cells are missing values.
"""

from __future__ import annotations

import dataclasses
import json
import logging
import math
import os
from collections import Counter
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime

import numpy as np
from scipy import special

from daemon.config import Config, DaemonConfig, ModelConfig, format_duration
from daemon.config.durations import format_drift
from daemon.runtime import wire
from daemon.runtime.alignment import apply_dead_time
from daemon.workbench.historian import read_csv
from recursive.detect import crps_t, log_score_t
from recursive.quantile import t_quantile

__all__ = [
    "History",
    "StaticModel",
    "Track",
    "Scores",
    "BacktestResult",
    "backtest",
    "backtest_scenario",
    "bias_reference",
    "choose_bias_factor",
    "collect",
    "coverage_verdict",
    "feed_messages",
    "fit_static",
    "history_from_run",
    "lab_features",
    "load_history",
    "persistence_reference",
    "read_predictions",
    "score",
    "summary_text",
    "write_predictions",
]

SCHEMA = "posteriord.predictions/1"
NOFORGET_SUFFIX = ".noforget"
_LEARNED = ("ok", "gate_open")
_MAX_PAYLOAD = 1 << 30


# ---------------------------------------------------------------------------------- history
@dataclass(frozen=True, eq=False)
class History:
    """The good rows of a historian CSV: inputs (nan where blank) and lab values."""

    path: str
    tags: tuple[str, ...]
    target: str
    t: np.ndarray
    X: np.ndarray
    lab_t: np.ndarray
    lab_y: np.ndarray
    summary: dict = field(default_factory=dict)

    def columns(self, tags) -> np.ndarray:
        """The inputs ``tags`` (in that order) as a (k, n) array."""
        try:
            idx = [self.tags.index(tag) for tag in tags]
        except ValueError:
            missing = [tag for tag in tags if tag not in self.tags]
            raise ValueError(f"{self.path}: no column for input(s) {missing}; "
                             f"columns are {list(self.tags)}") from None
        return self.X[:, idx]


def load_history(path, tags=None, *, target=None, tz=None, time_format="auto",
                 progress=False, time_column=None, delimiter=None, decimal=None) -> History:
    """Read a historian CSV (see :mod:`daemon.workbench.historian`) into memory.

    ``tags`` are the input columns to keep, by header or tag (default: every column but time
    and target); ``target`` the lab column (default ``AX-350`` when present). The layout
    (separator, decimal mark, time column and format, units row, header descriptions) is
    detected unless given. A cell that is not a number is a missing reading (nan) of its tag;
    the row and its lab value are kept. Bad rows are skipped; ``summary`` holds the counts,
    the layout found and the account of every lab cell (`historian.reading_text`).
    """
    reader = read_csv(path, target=target, tags=tags, tz=tz, time_format=time_format,
                      progress=progress, time_column=time_column, delimiter=delimiter,
                      decimal=decimal)
    if reader.target is None:
        raise ValueError(f"{path}: no lab column; name it with --target "
                         f"(columns are {reader.columns})")
    ts, xs, lab_t, lab_y = [], [], [], []
    for row in reader:
        ts.append(row.t)
        xs.append(row.x)
        if row.y is not None:
            lab_t.append(row.t)
            lab_y.append(row.y)
    if not ts:
        raise ValueError(f"{path}: no good data rows ({reader.summary()['bad_counts']})")
    n = len(reader.tags)
    return History(os.fspath(path), reader.tags, reader.target, np.array(ts, dtype=float),
                   np.array(xs, dtype=float).reshape(len(ts), n), np.array(lab_t, dtype=float),
                   np.array(lab_y, dtype=float), reader.summary())


def lab_features(history: History, model: ModelConfig):
    """Inputs each lab sample reflects, by the daemon's matching rule.

    Rows with a blank model input are never sent to the daemon, so they are dropped here too;
    then input i of a sample drawn at s is the last row at or before ``s - dead_time_i``
    within the model's ``tolerance``. Returns ``(lab_t, lab_y, X, available)``.
    """
    X = history.columns([i.tag for i in model.inputs])
    keep = np.isfinite(X).all(axis=1)
    t, X = history.t[keep], X[keep]
    dead = [i.dead_time for i in model.inputs]
    if t.size == 0:
        m = history.lab_t.size
        return history.lab_t, history.lab_y, np.full((m, len(dead)), np.nan), np.zeros(m, bool)
    values, ok = apply_dead_time(t, X, history.lab_t, dead, tolerance_s=model.tolerance)
    return history.lab_t, history.lab_y, values, ok


# ---------------------------------------------------------------------------------- messages
def feed_messages(history: History, models, *, lab_delay: float = 7200.0, block: int = 60,
                  seq: bool = True) -> list[tuple[float, str, dict]]:
    """The feed a live plant would have sent: ``(arrival time, topic, body)``, in order.

    For each model, its input columns go out as feature blocks
    ``{"t": [...], "x": [[...], ...]}`` of at most ``block`` rows, and each lab value as
    ``{"t": drawn, "y": value}`` once ``lab_delay`` seconds have passed since it was drawn:
    after every row up to that time, before any later row. A block is sent when its last row
    is read (its arrival time) and is cut short before a lab result. ``seq`` adds a per-topic
    sequence number, which lets the daemon count lost messages.

    The daemon's wire format needs every input of a sample finite, so a row with a missing
    reading (nan) of one of the model's inputs is not sent as a feature sample; its lab value
    still goes out as a lab result, and the daemon matches it to the inputs it buffered at the
    drawn time (within the model's tolerance), as it would live. Rows missing only readings
    of other columns are sent as usual.

    Feature rows always travel as blocks (a block may hold a single row): the daemon predicts
    each feature block on its own, so the outputs do not depend on how many messages the
    daemon happens to take per wake-up.
    """
    if isinstance(block, bool) or not isinstance(block, int) or block < 1:
        raise ValueError(f"block={block!r}: expected an integer >= 1")
    lab_delay = float(lab_delay)
    if not (math.isfinite(lab_delay) and lab_delay >= 0):
        raise ValueError(f"lab_delay={lab_delay!r}: must be finite and >= 0 seconds")
    out: list[tuple[float, int, str, dict]] = []
    for order, m in enumerate(models):
        X = history.columns([i.tag for i in m.inputs])
        keep = np.isfinite(X).all(axis=1)
        ts = history.t[keep].tolist()
        rows = X[keep].tolist()
        arrivals = (history.lab_t + lab_delay).tolist()
        labs = list(zip(history.lab_t.tolist(), history.lab_y.tolist(), strict=True))
        n = 0

        def emit(arrival: float, body: dict, _name=m.name, _order=order) -> None:
            nonlocal n
            if seq:
                body["seq"] = n
            n += 1
            out.append((arrival, _order, _name, body))

        bt: list[float] = []
        bx: list[list[float]] = []
        j = 0
        for tk, row in zip(ts, rows, strict=True):
            while j < len(labs) and arrivals[j] < tk:
                if bt:
                    emit(bt[-1], {"t": bt, "x": bx})
                    bt, bx = [], []
                emit(arrivals[j], {"t": labs[j][0], "y": labs[j][1]})
                j += 1
            bt.append(tk)
            bx.append(row)
            if len(bt) >= block:
                emit(tk, {"t": bt, "x": bx})
                bt, bx = [], []
        if bt:
            emit(bt[-1], {"t": bt, "x": bx})
        for k in range(j, len(labs)):
            emit(arrivals[k], {"t": labs[k][0], "y": labs[k][1]})
    # each model's list is in arrival order already; a stable sort interleaves the models
    out.sort(key=lambda e: (e[0], e[1]))
    return [(a, name, body) for a, _, name, body in out]


# ---------------------------------------------------------------------------------- outputs
@dataclass(eq=False)
class Track:
    """What one model published: predictions, lab fits and alerts, as columns and lists.

    ``fits`` are the ``fit/`` bodies with ``seen``, the feed time at which the result reached
    the model (the newest prediction time then), and with ``scale`` and ``dof`` of the
    one-step predictive when the backtest added them; ``alerts`` the ``alert/`` bodies;
    ``meta`` the file metadata (level, unit, detector settings).
    """

    model: str
    t: np.ndarray
    mean: np.ndarray
    std: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    status: list
    trust: list
    fits: list
    alerts: list
    meta: dict = field(default_factory=dict)
    dof: np.ndarray | None = None

    @property
    def level(self) -> float:
        return float(self.meta.get("level", 0.95))

    def lab_arrays(self) -> dict:
        """The fits as arrays: t, y, mean, std, scale, dof, resid, z, learned (bool)."""
        f = self.fits

        def col(key):
            return np.array([_nan(x.get(key)) for x in f], dtype=float)

        return {"t": col("t"), "y": col("y"), "mean": col("pred_mean"), "std": col("pred_std"),
                "scale": col("scale"), "dof": col("dof"), "resid": col("resid"), "z": col("z"),
                "learned": np.array([x.get("reason") in _LEARNED and bool(x.get("accepted"))
                                     for x in f], dtype=bool),
                "reason": [x.get("reason") for x in f]}


def _nan(v) -> float:
    return math.nan if v is None else float(v)


def collect(messages, model: str, meta: dict | None = None) -> Track:
    """Gather the ``pred/``, ``fit/`` and ``alert/`` messages of ``model`` into a `Track`.

    ``messages`` yields ``(topic, body)`` with decoded bodies; other topics are ignored.
    Block predictions are unrolled into rows.
    """
    pred, fit, alert = f"pred/{model}", f"fit/{model}", f"alert/{model}"
    cols: dict[str, list] = {k: [] for k in ("t", "mean", "std", "lo", "hi", "status", "trust",
                                             "dof")}
    fits: list[dict] = []
    alerts: list[dict] = []
    level = None
    for topic, body in messages:
        if topic == pred:
            level = body.get("level", level)
            if isinstance(body["t"], list):
                k = len(body["t"])
                for key in ("t", "mean", "std", "lo", "hi", "status"):
                    cols[key].extend(body[key])
                cols["trust"].extend([body.get("trust")] * k)
                cols["dof"].extend(body.get("dof") or [None] * k)
            else:
                for key in ("t", "mean", "std", "lo", "hi", "status"):
                    cols[key].append(body[key])
                cols["trust"].append(body.get("trust"))
                cols["dof"].append(body.get("dof"))
        elif topic == fit:
            # the feed time the result reached the model: its newest sample time then
            last = cols["t"][-1] if cols["t"] else body["t"]
            fits.append({**body, "seen": max(last, body["t"])})
        elif topic == alert:
            alerts.append(body)
    meta = dict(meta or {})
    if level is not None:
        meta.setdefault("level", level)
    arr = {k: np.array([_nan(v) for v in cols[k]], dtype=float)
           for k in ("t", "mean", "std", "lo", "hi", "dof")}
    return Track(model, arr["t"], arr["mean"], arr["std"], arr["lo"], arr["hi"], cols["status"],
                 cols["trust"], fits, alerts, meta, arr["dof"])


class _Recorder:
    """Stands in for the daemon's PUB socket: keeps every message it is given."""

    def __init__(self):
        self.frames: list[tuple[bytes, bytes]] = []

    def send_multipart(self, frames) -> None:
        self.frames.append((bytes(frames[0]), bytes(frames[1])))


def _decoded(frames):
    for topic, payload in frames:
        yield topic.decode(), wire.unpack(payload, _MAX_PAYLOAD)


# ---------------------------------------------------------------------------------- static model
@dataclass(frozen=True, eq=False)
class StaticModel:
    """Batch ridge fit with its conjugate predictive; see `fit_static`."""

    weights: np.ndarray
    unit_cov: np.ndarray
    noise_std: float | None
    s2: float
    dof: float
    n: int

    def predict(self, Phi) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Predictive ``(mean, scale, dof)`` for rows ``Phi`` (Student-t, or Gaussian with
        ``dof = inf`` when the noise is known)."""
        Phi = np.atleast_2d(np.asarray(Phi, dtype=float))
        mean = Phi @ self.weights
        lev = np.einsum("ij,jk,ik->i", Phi, self.unit_cov, Phi)
        s2 = self.noise_std ** 2 if self.noise_std is not None else self.s2
        return mean, np.sqrt(s2 * (1.0 + lev)), np.full(mean.shape, self.dof)


def fit_static(Phi, y, lam, prior_mean=None, *, noise_std=None,
               noise_prior=(1.0, 2.0)) -> StaticModel:
    """Ridge regression with per-weight penalties ``lam``, fitted by least squares.

    The prior enters as pseudo-rows: minimize
    ``||y - Phi w||^2 + sum_j lam_j (w_j - m0_j)^2`` by solving ``[Phi; diag(sqrt(lam))] w ~
    [y; sqrt(lam) m0]`` with ``numpy.linalg.lstsq``. With the daemon's prior, ``lam = alpha *
    sigma_ref^2`` (``basis.alpha_vector(alpha)`` times the known noise variance or the squared
    noise guess): the same mode as the recursive posterior without forgetting.

    The predictive is the conjugate one: ``V = (Phi^T Phi + diag(lam))^-1`` (in units of the
    noise variance), known noise ``sigma^2 (1 + phi^T V phi)`` (Gaussian); learned noise a
    Student-t with ``nu = strength + n - p_flat`` degrees of freedom and scale
    ``s^2 (1 + phi^T V phi)``, ``s^2 = (strength sigma0^2 + RSS) / nu``, RSS the residual sum
    of squares of the augmented system (``p_flat`` weights have ``lam = 0``).
    """
    Phi = np.asarray(Phi, dtype=float)
    y = np.asarray(y, dtype=float)
    lam = np.asarray(lam, dtype=float)
    n, p = Phi.shape
    if y.shape != (n,) or lam.shape != (p,):
        raise ValueError(f"Phi {Phi.shape}, y {y.shape} and lam {lam.shape} do not match")
    if np.any(lam < 0) or not np.all(np.isfinite(lam)):
        raise ValueError(f"lam must be finite and >= 0, got {lam.tolist()!r}")
    m0 = np.zeros(p) if prior_mean is None else np.asarray(prior_mean, dtype=float)
    p_flat = int(np.count_nonzero(lam == 0))
    if n <= p_flat:
        raise ValueError(f"{n} training lab results cannot fit {p_flat} unpenalized weights")
    root = np.sqrt(lam)
    A = np.vstack([Phi, np.diag(root)])
    b = np.concatenate([y, root * m0])
    w, *_ = np.linalg.lstsq(A, b, rcond=None)
    R = np.linalg.qr(A, mode="r")
    Rinv = np.linalg.solve(R, np.eye(p))
    V = Rinv @ Rinv.T
    rss = float(np.sum((b - A @ w) ** 2))
    if noise_std is not None:
        return StaticModel(w, V, float(noise_std), float(noise_std) ** 2, math.inf, n)
    sigma0, strength = noise_prior
    dof = strength + n - p_flat
    return StaticModel(w, V, None, (strength * sigma0 * sigma0 + rss) / dof, float(dof), n)


def _ref_var(model: ModelConfig) -> float:
    return model.noise_std ** 2 if model.noise_std is not None else model.noise_guess ** 2


# ---------------------------------------------------------------------------------- scores
@dataclass(frozen=True)
class Scores:
    """One-step-ahead scores over a set of lab results.

    ``log_score`` is the mean negative log predictive density (nats) and ``crps`` the mean
    continuous ranked probability score (target units): lower is better for both, as for
    ``rmse`` and ``mae``. ``coverage`` is the share of lab results inside the central interval
    of probability ``level``.
    """

    n: int
    rmse: float
    mae: float
    coverage: float
    log_score: float
    crps: float
    level: float


def score(y, mean, scale, dof, level: float = 0.95) -> Scores:
    """Scores of predictive Student-t (``dof = inf``: Gaussian) distributions at ``y``.

    Uses `recursive.detect.log_score_t` and `recursive.detect.crps_t`; lab results with
    ``dof <= 1`` (CRPS undefined) or a missing prediction must be left out by the caller.
    """
    y, mean, scale, dof = (np.asarray(a, dtype=float) for a in (y, mean, scale, dof))
    if y.size == 0:
        nan = math.nan
        return Scores(0, nan, nan, nan, nan, nan, level)
    err = y - mean
    q = np.where(np.isinf(dof), special.ndtri(0.5 + level / 2),
                 special.stdtrit(np.where(np.isinf(dof), 2.0, dof), 0.5 + level / 2))
    inside = np.abs(err) <= q * scale
    return Scores(int(y.size), float(np.sqrt(np.mean(err ** 2))), float(np.mean(np.abs(err))),
                  float(np.mean(inside)), float(np.mean(log_score_t(y, mean, scale, dof))),
                  float(np.mean(crps_t(y, mean, scale, dof))), level)


# ---------------------------------------------------------------------------------- references
BIAS_GRID = tuple(round(0.05 * i, 2) for i in range(1, 19))  # 0.05 .. 0.9


def _check_known(m: int, arrived, n_known, use):
    arrived = np.asarray(arrived, dtype=int)
    n_known = np.asarray(n_known, dtype=int)
    if arrived.ndim != 1 or np.any((arrived < 0) | (arrived >= m)):
        raise ValueError(f"arrived must index the {m} lab results, got {arrived.tolist()!r}")
    if n_known.shape != (m,) or np.any((n_known < 0) | (n_known > arrived.size)):
        raise ValueError(f"n_known must be {m} counts within 0..{arrived.size}, got "
                         f"{n_known.tolist()!r}")
    use = np.ones(m, dtype=bool) if use is None else np.asarray(use, dtype=bool)
    if use.shape != (m,):
        raise ValueError(f"use must have {m} flags, got shape {use.shape}")
    return arrived, n_known, use


def bias_reference(y, base, arrived, n_known, factor: float, use=None) -> np.ndarray:
    """The plant's bias update: a fixed model plus an exponential filter of its lab residual.

    ``y`` and ``base`` (m,) are the lab values and the fixed model's predictions at each
    result's sample time; ``arrived`` the indices of the results in the order they reached
    the plant, and ``n_known[i]`` how many of them had arrived when the prediction for result
    ``i``'s sample time was published. Results with ``use`` False (default all True) arrive but
    leave the bias alone. Returns ``base + b`` where ``b`` is the bias after the first
    ``n_known[i]`` arrivals, starting from 0 and updated ``b <- b + factor (y - (base + b))``
    on each result used.
    """
    y = np.asarray(y, dtype=float)
    base = np.asarray(base, dtype=float)
    m = y.size
    if base.shape != (m,):
        raise ValueError(f"y {y.shape} and base {base.shape} do not match")
    if not (math.isfinite(factor) and 0 < factor <= 1):
        raise ValueError(f"factor={factor!r}: must be in (0, 1]")
    arrived, n_known, use = _check_known(m, arrived, n_known, use)
    b = np.zeros(arrived.size + 1)
    for k, j in enumerate(arrived.tolist()):
        r = y[j] - base[j]
        b[k + 1] = b[k] + factor * (r - b[k]) if use[j] and math.isfinite(r) else b[k]
    return base + b[n_known]


def persistence_reference(y, t, arrived, n_known, use=None) -> np.ndarray:
    """The last lab value known at each prediction: of the results arrived by then (as in
    `bias_reference`), the one drawn last; nan before any has arrived."""
    y = np.asarray(y, dtype=float)
    t = np.asarray(t, dtype=float)
    m = y.size
    arrived, n_known, use = _check_known(m, arrived, n_known, use)
    last = np.full(arrived.size + 1, np.nan)
    newest, value = -math.inf, math.nan
    for k, j in enumerate(arrived.tolist()):
        if use[j] and math.isfinite(y[j]) and t[j] > newest:
            newest, value = t[j], y[j]
        last[k + 1] = value
    return last[n_known]


def choose_bias_factor(y, base, arrived, n_known, train, use=None, grid=BIAS_GRID):
    """The filter factor of `bias_reference` with the least RMSE over the results ``train``
    (a mask); returns ``(factor, {factor: rmse})``. Ties go to the smaller factor."""
    train = np.asarray(train, dtype=bool) & np.isfinite(np.asarray(y, dtype=float))
    if not train.any():
        raise ValueError("no training lab results to choose the bias filter factor on")
    table = {}
    for f in grid:
        pred = bias_reference(y, base, arrived, n_known, f, use)
        err = (np.asarray(y, dtype=float) - pred)[train & np.isfinite(pred)]
        table[f] = float(np.sqrt(np.mean(err ** 2))) if err.size else math.inf
    best = min(table, key=lambda f: (table[f], f))
    return best, table


# ---------------------------------------------------------------------------------- backtest
REFERENCES = ("model", "noforget", "static", "bias", "persist")


@dataclass(eq=False)
class BacktestResult:
    """Everything a backtest found; `summary_text` writes it for people, `table` for programs.

    ``scores`` (keys `REFERENCES`) are the headline: every lab result drawn after the training
    period scored with the prediction published for its own sample time, gated ones
    included; ``scores_gated`` the same over the results the recursive gate rejected alone,
    ``scores_ungated`` over the others;
    ``scores_arrival`` (``model``, ``noforget``) the one-step-ahead score at arrival.
    """

    model: ModelConfig
    history: History
    track: Track
    noforget: Track
    static: StaticModel
    scores: dict
    n_scored: int
    n_gated: int
    train_end: float
    lab_delay: float
    block: int
    messages: int
    frames: list
    static_pred: dict
    alerts: Counter
    alert_reasons: Counter
    scores_arrival: dict = field(default_factory=dict)
    scores_gated: dict = field(default_factory=dict)
    scores_ungated: dict = field(default_factory=dict)
    bias_factor: float = math.nan
    bias_grid: dict = field(default_factory=dict)
    ref_pred: dict = field(default_factory=dict)
    n_left_out: int = 0

    @property
    def ratio(self) -> float:
        """The recursive model's RMSE over the bias update's (below 1: the model wins)."""
        return _ratio(self.scores)

    @property
    def ratio_ungated(self) -> float:
        """`ratio` over the lab results the gate accepted."""
        return _ratio(self.scores_ungated)

    def table(self) -> list[dict]:
        """The headline scores as rows ``{"name", "label", "n", "rmse", "mae", "coverage",
        "log_score", "crps", "rmse_arrival", "rmse_gated", "rmse_ungated"}``, in
        `REFERENCES` order."""
        out = []
        for key in REFERENCES:
            s = self.scores[key]
            arr = self.scores_arrival.get(key)
            g = self.scores_gated.get(key)
            ug = self.scores_ungated.get(key)
            out.append({"name": key, "label": _labels(self)[key], "n": s.n, "rmse": s.rmse,
                        "mae": s.mae, "coverage": s.coverage, "log_score": s.log_score,
                        "crps": s.crps, "rmse_arrival": arr.rmse if arr else math.nan,
                        "rmse_gated": g.rmse if g else math.nan,
                        "rmse_ungated": ug.rmse if ug else math.nan})
        return out


def backtest(history: History, model: ModelConfig, *, train: float = 14 * 86400.0,
             lab_delay: float = 7200.0, block: int = 60, unit: str = "") -> BacktestResult:
    """Run ``model`` over ``history`` as the daemon would, and score it (module docstring).

    ``train`` is the length of the static model's training period from the first row;
    scores cover the lab results drawn after it.
    """
    if not (math.isfinite(train) and train > 0):
        raise ValueError(f"train={train!r}: must be a positive number of seconds")
    if lab_delay >= model.keep:
        raise ValueError(f"lab_delay={format_duration(lab_delay)} is not shorter than the "
                         f"model's lab.keep={format_duration(model.keep)}: every lab result "
                         f"would be too old to match")
    companion = replace(model, name=model.name + NOFORGET_SUFFIX, forgetting="none",
                        half_life=None, q=None, adapt_offset=False, offset_drift_min=None,
                        offset_drift_max=None)
    from daemon.runtime.service import Service

    config = Config(daemon=DaemonConfig(), models=(model, companion), source="<backtest>")
    svc = Service(config, wall_clock=None)
    recorder = _Recorder()
    svc.pub = recorder
    steps: dict[str, list] = {model.name: [], companion.name: []}
    for name, runner in svc.runners.items():
        _tap(runner, steps[name])
    messages = feed_messages(history, (model, companion), lab_delay=lab_delay, block=block)
    process = svc.process
    log = logging.getLogger("posteriord")
    old_level = log.level
    # the daemon's rate-limited warnings (gated results, trust changes) would flood the
    # terminal; the backtest counts and reports them instead
    log.setLevel(logging.ERROR)
    try:
        for _, name, body in messages:
            process([[name.encode(), wire.packb(body)]])
    finally:
        log.setLevel(old_level)
    meta = {"schema": SCHEMA, "model": model.name, "level": model.level,
            "target": history.target, "unit": unit, "cusum_k": model.cusum_k,
            "cusum_h": model.cusum_h, "stale_after": svc.runners[model.name].stale_after,
            "stale_after_source": "config" if model.stale_after is not None else
            "lab interval",
            "source": os.path.basename(history.path), "lab_delay": lab_delay, "block": block}
    decoded = list(_decoded(recorder.frames))
    track = collect(decoded, model.name, meta)
    other = collect(decoded, companion.name, {**meta, "model": companion.name})
    for tr, name in ((track, model.name), (other, companion.name)):
        if len(tr.fits) != len(steps[name]):
            raise RuntimeError(f"{name}: {len(tr.fits)} fit messages but "
                               f"{len(steps[name])} updates")
        for f, step in zip(tr.fits, steps[name], strict=True):
            f["scale"] = step.scale
            f["dof"] = step.dof

    # static model: ridge on the lab results of the training period
    t0 = float(history.t[0])
    train_end = t0 + train
    lab_t, lab_y, Xlab, ok = lab_features(history, model)
    basis = svc.runners[model.name].basis
    Phi = np.full((lab_t.size, basis.n_features), np.nan)
    if ok.any():
        Phi[ok] = basis(Xlab[ok])
    ok &= np.isfinite(Phi).all(axis=1)
    gated_t = {f["t"] for f in track.fits if f.get("reason") == "gated"}
    not_gated = np.array([t not in gated_t for t in lab_t.tolist()], dtype=bool)
    sel = ok & (lab_t < train_end) & not_gated
    lam = basis.alpha_vector(model.alpha) * _ref_var(model)
    static = fit_static(Phi[sel], lab_y[sel], lam, model.prior_mean, noise_std=model.noise_std,
                        noise_prior=(model.noise_guess, model.noise_strength))
    s_mean = np.full(lab_t.size, np.nan)
    s_scale = np.full(lab_t.size, np.nan)
    if ok.any():
        s_mean[ok], s_scale[ok], _ = static.predict(Phi[ok])
    s_dof = np.full(lab_t.size, static.dof)
    if math.isinf(static.dof):
        s_std = s_scale
    else:
        s_std = s_scale * (math.sqrt(static.dof / (static.dof - 2)) if static.dof > 2
                           else math.inf)
    static_pred = {"t": lab_t, "mean": s_mean, "scale": s_scale, "dof": s_dof, "std": s_std}

    # what was known when: the position in the feed of each lab result and of the block
    # carrying each published prediction
    lab_pos, row_pos = _positions(messages, model.name, lab_t)
    pub = _published_at(track, lab_t, row_pos, model.tolerance)
    pub_nf = _published_at(other, lab_t, row_pos, model.tolerance)
    sent = np.isfinite(lab_pos)
    arrived = np.flatnonzero(sent)[np.argsort(lab_pos[sent], kind="stable")]
    n_known = np.searchsorted(np.sort(lab_pos[sent]), pub["pos"], side="left")
    fits_a, fits_b = _fits_by_time(track), _fits_by_time(other)
    gated = np.array([fits_a.get(t, {}).get("reason") == "gated" for t in lab_t.tolist()],
                     dtype=bool)
    use = ~gated
    train_mask = ok & use & (lab_t < train_end) & np.isfinite(pub["pos"])
    factor, grid = choose_bias_factor(lab_y, s_mean, arrived, n_known, train_mask, use)
    b_mean = bias_reference(lab_y, s_mean, arrived, n_known, factor, use)
    p_mean = persistence_reference(lab_y, lab_t, arrived, n_known, use)
    # the references publish a mean only: their spread is their RMSE on the training period
    b_sd = _rms(lab_y - b_mean, train_mask)
    p_sd = _rms(lab_y - p_mean, train_mask)
    ref_pred = {"t": lab_t, "bias_mean": b_mean, "bias_std": np.full(lab_t.size, b_sd),
                "persist": p_mean, "persist_std": np.full(lab_t.size, p_sd),
                "noforget_mean": pub_nf["mean"], "noforget_std": pub_nf["std"],
                "pub_t": pub["t"], "gated": gated, "factor": factor, "grid": grid}

    cand = {
        "model": (pub["mean"], pub["scale"], pub["dof"]),
        "noforget": (pub_nf["mean"], pub_nf["scale"], pub_nf["dof"]),
        "static": (s_mean, s_scale, s_dof),
        "bias": (b_mean, np.full(lab_t.size, b_sd), np.full(lab_t.size, math.inf)),
        "persist": (p_mean, np.full(lab_t.size, p_sd), np.full(lab_t.size, math.inf)),
    }
    after = ok & (lab_t >= train_end) & np.isfinite(lab_y)
    usable = after.copy()
    for mean_, scale_, dof_ in cand.values():
        usable &= np.array([_usable(*c) for c in zip(mean_.tolist(), scale_.tolist(),
                                                     dof_.tolist(), strict=True)], dtype=bool)
    rows = np.flatnonzero(usable)
    g_rows = rows[gated[rows]]
    u_rows = rows[~gated[rows]]
    scores, scores_gated, scores_ungated = {}, {}, {}
    for key, (mean_, scale_, dof_) in cand.items():
        for out, r in ((scores, rows), (scores_gated, g_rows), (scores_ungated, u_rows)):
            out[key] = score(lab_y[r], mean_[r], scale_[r], dof_[r], model.level)
    # the old way, labelled as such: each result predicted when it reached the model
    scores_arrival = {}
    for key, fits in (("model", fits_a), ("noforget", fits_b)):
        got = [(lab_y[i], fits[t]["pred_mean"], fits[t]["scale"], fits[t]["dof"])
               for i, t in zip(rows.tolist(), lab_t[rows].tolist(), strict=True)
               if t in fits and _usable(fits[t]["pred_mean"], fits[t]["scale"],
                                        fits[t]["dof"])]
        cols = list(zip(*got, strict=True)) if got else ([], [], [], [])
        scores_arrival[key] = score(*cols, level=model.level)
    alerts, reasons = Counter(), Counter()
    for e in track.alerts:
        if e.get("kind") == "state" and e.get("new") in ("caution", "untrusted"):
            alerts[e["new"]] += 1
            for r in e.get("reasons", []):
                reasons[r["name"]] += 1
    track.meta["static_train_end"] = train_end
    track.meta["bias_factor"] = factor
    return BacktestResult(model, history, track, other, static, scores, rows.size,
                          int(g_rows.size), train_end, lab_delay, block, len(messages),
                          recorder.frames, static_pred, alerts, reasons,
                          scores_arrival=scores_arrival, scores_gated=scores_gated,
                          scores_ungated=scores_ungated,
                          bias_factor=factor, bias_grid=grid, ref_pred=ref_pred,
                          n_left_out=int(after.sum() - rows.size))


def _rms(err, mask) -> float:
    e = np.asarray(err, dtype=float)[mask]
    e = e[np.isfinite(e)]
    return float(np.sqrt(np.mean(e ** 2))) if e.size else math.nan


def _positions(messages, name: str, lab_t):
    """Feed positions (message indices) of each lab result of ``lab_t`` (inf when never
    sent) and of each feature row time of model ``name``."""
    idx = {}
    for i, t in enumerate(np.asarray(lab_t, dtype=float).tolist()):
        idx.setdefault(t, i)
    lab_pos = np.full(len(lab_t), np.inf)
    row_pos: dict = {}
    for k, (_, topic, body) in enumerate(messages):
        if topic != name:
            continue
        if "y" in body:
            i = idx.get(float(body["t"]))
            if i is not None and not math.isfinite(lab_pos[i]):
                lab_pos[i] = k
        elif isinstance(body.get("t"), list):
            for t in body["t"]:
                row_pos.setdefault(float(t), k)
        elif "t" in body:
            row_pos.setdefault(float(body["t"]), k)
    return lab_pos, row_pos


def _published_at(track: Track, lab_t, row_pos: dict, tolerance: float) -> dict:
    """The prediction published for each lab sample's own time: the newest published row at
    or before it (within ``tolerance``), with the Student-t scale recovered from its interval
    and ``pos`` the feed position of the block that carried it (nan where none)."""
    lab_t = np.asarray(lab_t, dtype=float)
    m = lab_t.size
    out = {k: np.full(m, np.nan) for k in ("t", "mean", "std", "scale", "dof", "pos")}
    if track.t.size == 0:
        return out
    order = np.argsort(track.t, kind="stable")
    ts = track.t[order]
    j = np.searchsorted(ts, lab_t, side="right") - 1
    has = (j >= 0)
    j = np.where(has, j, 0)
    k = order[j]
    has &= lab_t - track.t[k] <= tolerance
    dof = track.dof if track.dof is not None and track.dof.size == track.t.size else \
        np.full(track.t.size, np.nan)
    q = t_quantile(dof[k], 0.5 + track.level / 2.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = (track.hi[k] - track.lo[k]) / (2.0 * q)
    out["t"] = np.where(has, track.t[k], np.nan)
    out["mean"] = np.where(has, track.mean[k], np.nan)
    out["std"] = np.where(has, track.std[k], np.nan)
    out["scale"] = np.where(has, scale, np.nan)
    out["dof"] = np.where(has, dof[k], np.nan)
    out["pos"] = np.array([row_pos.get(t, math.nan) if h else math.nan
                           for t, h in zip(track.t[k].tolist(), has.tolist(), strict=True)])
    return out


def history_from_run(run, path: str = "<simulated>") -> History:
    """A `History` holding a simulated `plant.Run` as its historian CSV would (without the
    round trip through a file: the CSV keeps floats exactly, so the rows are the same)."""
    names = {f.name for f in dataclasses.fields(History)}
    lab = {"lab_arrival": np.asarray(run.lab_arrival, dtype=float)}
    extra = {k: v for k, v in lab.items() if k in names}
    return History(path, tuple(run.tags), run.target, np.asarray(run.t, dtype=float),
                   np.asarray(run.X, dtype=float), np.asarray(run.lab_t, dtype=float),
                   np.asarray(run.lab_y, dtype=float),
                   {"rows": int(run.t.size), "bad": 0, "simulated": True}, **extra)


def backtest_scenario(scenario, model: ModelConfig, *, train: float | None = None,
                      lab_delay: float | None = None, block: int = 60,
                      unit: str = "ppm") -> BacktestResult:
    """Simulate ``scenario`` (a `plant.Scenario`) and backtest ``model`` on it.

    ``train`` defaults to 14 days, or half the run when shorter than four weeks;
    ``lab_delay`` to the middle of the scenario's usual lab delay. ``result.table()`` gives the
    scores as rows, ``summary_text(result)`` as text.
    """
    from daemon.workbench import plant

    run = plant.simulate(scenario)
    days = float(scenario.days)
    if train is None:
        train = 14 * 86400.0 if days >= 28 else days * 86400.0 / 2
    if lab_delay is None:
        lab_delay = 3600.0 * round(sum(scenario.lab_delay_h) / 2, 3)
    return backtest(history_from_run(run, f"<{plant.UNIT}, seed {scenario.seed}>"), model,
                    train=train, lab_delay=lab_delay, block=block, unit=unit)


def _usable(mean, scale, dof) -> bool:
    return (mean is not None and scale is not None and dof is not None
            and math.isfinite(mean) and math.isfinite(scale) and scale > 0 and dof > 1)


def _fits_by_time(track: Track) -> dict:
    # a lab result drawn at an instant already learned is refused before the posterior sees
    # it and publishes no fit, so times are unique; the first is kept all the same
    out: dict = {}
    for f in track.fits:
        out.setdefault(f["t"], f)
    return out


def _tap(runner, sink: list) -> None:
    """Keep each `Step` the runner's posterior returns (its scale and degrees of freedom are
    not part of the ``fit/`` message). The posterior's results are passed on unchanged."""
    update = runner.post.update

    def recorded(phi, y, t=None):
        step = update(phi, y, t)
        sink.append(step)
        return step

    runner.post.update = recorded


# ---------------------------------------------------------------------------------- text
def _stamp(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).strftime("%Y-%m-%d %H:%M")


def _policy(m: ModelConfig) -> str:
    if m.forgetting == "none":
        return "no forgetting"
    if m.forgetting == "random_walk":
        return f"random walk q={m.q:g}"
    parts = []
    if m.forgetting in ("offset", "term_drift"):
        for label, q in (("offset", m.offset_drift), ("linear terms", m.linear_drift),
                         ("higher terms", m.higher_drift)):
            if q:
                parts.append(f"{label} drift {format_drift(q)}")
    else:
        parts.append(m.forgetting)
    if m.half_life is not None:
        parts.append(f"half-life {format_duration(m.half_life)}")
    return ", ".join(parts) or m.forgetting


def _ratio(scores: dict) -> float:
    if "bias" not in scores:
        return math.nan
    b = scores["bias"].rmse
    return scores["model"].rmse / b if b > 0 else math.nan


def _labels(res: BacktestResult) -> dict:
    return {"model": f"recursive, {_policy(res.model)}",
            "noforget": "recursive, no forgetting",
            "static": f"static ridge on {res.static.n} lab results",
            "bias": f"static + lab bias update, f={res.bias_factor:g}",
            "persist": "persistence (last known lab value)"}


def _g(x: float, width: int) -> str:
    # four significant digits tell 0.1211 from 0.1234, whatever the unit's scale
    if not math.isfinite(x):
        return f"{'-':>{width}}"
    text = f"{x:#.4g}"
    return f"{text[:-1] if text.endswith('.') else text:>{width}}"


def coverage_verdict(z, level: float = 0.95) -> dict:
    """Whether the interval coverage is inside the band a calibrated model stays in.

    ``z`` are the standardized residuals of the scored results. The share inside the
    central interval of probability ``level`` is binomial for a calibrated model, so it lies
    within ``level +- 1.96 sqrt(level (1 - level) / n)`` 95% of the time (the normal
    approximation, the band of the calibration page); likewise the mean of ``z`` within
    ``+- 1.96 / sqrt(n)``. Returns ``{"n", "coverage", "band", "inside", "mean_z",
    "mean_band", "biased"}``.
    """
    z = np.asarray(z, dtype=float)
    z = z[np.isfinite(z)]
    n = int(z.size)
    if n == 0:
        return {"n": 0, "coverage": math.nan, "band": (math.nan, math.nan), "inside": True,
                "mean_z": math.nan, "mean_band": math.nan, "biased": False}
    q = special.ndtri(0.5 + level / 2)
    cover = float(np.mean(np.abs(z) <= q))
    half = 1.96 * math.sqrt(level * (1 - level) / n)
    mean_z = float(np.mean(z))
    mb = 1.96 / math.sqrt(n)
    return {"n": n, "coverage": cover, "band": (level - half, level + half),
            "inside": level - half <= cover <= level + half, "mean_z": mean_z,
            "mean_band": mb, "biased": abs(mean_z) > mb}


#: A share of the squared error above which the gated results are said to dominate it.
GATED_DOMINATES = 0.5


def gated_share(res: BacktestResult) -> float:
    """The share of the recursive model's squared error (over the scored lab results) that
    comes from the results its gate rejected (0 when there are none)."""
    if not res.n_gated:
        return 0.0
    s, g = res.scores["model"], res.scores_gated["model"]
    total = s.n * s.rmse ** 2
    return float(g.n * g.rmse ** 2 / total) if total > 0 else 0.0


def summary_text(res: BacktestResult, unit: str = "") -> str:
    """The backtest summary: scores side by side, alerts raised."""
    h, m = res.history, res.model
    u = f" {unit}" if unit else ""
    bad = h.summary.get("bad", 0)
    lines = [
        f"backtest of {m.name} on {os.path.basename(h.path)}: {h.t.size} rows"
        f" ({bad} bad), {h.lab_t.size} lab results, {_stamp(h.t[0])} .. {_stamp(h.t[-1])} UTC",
        f"  fed as the daemon sees it: {res.messages} messages (feature blocks of "
        f"{res.block} rows, lab results {format_duration(res.lab_delay)} after drawn)",
        f"  scored: {res.n_scored} lab results drawn after {_stamp(res.train_end)} (after "
        f"the training period), each with",
        "  the prediction published for its own sample time, before its result was known;",
        f"  {res.n_gated} of them rejected by the recursive model's gate, scored all the same"
        + (f"; {res.n_left_out} without a usable prediction left out" if res.n_left_out
           else ""),
        "",
        f"  {'':<40}{'RMSE':>8}{'MAE':>8}{'cover':>8}{'log sc.':>8}{'CRPS':>8}"
        f"{'RMSE arr':>9}{'ungated':>9}",
    ]
    level = int(round(100 * m.level))
    names = _labels(res)
    for key in REFERENCES:
        s = res.scores[key]
        arr = res.scores_arrival.get(key)
        ug = res.scores_ungated.get(key)
        lines.append(f"  {names[key][:39]:<40}{_g(s.rmse, 8)}{_g(s.mae, 8)}"
                     f"{_g(100 * s.coverage, 7)}%{_g(s.log_score, 8)}{_g(s.crps, 8)}"
                     f"{_g(arr.rmse, 9) if arr else ' ' * 9}"
                     f"{_g(ug.rmse, 9) if ug else ' ' * 9}")
    lines += [
        f"  recursive RMSE / bias-update RMSE: {_g(res.ratio, 0)} (below 1: the recursive "
        "model wins),",
        f"  {_g(res.ratio_ungated, 0)} on the results the gate accepted; bias update: "
        "b <- b + f (lab - (static + b))",
        f"  on the results known at each sample time, f={res.bias_factor:g} chosen on the "
        f"training period from {BIAS_GRID[0]:g} .. {BIAS_GRID[-1]:g}",
        f"  (RMSE, MAE, CRPS in{u or ' target units'}; cover: share inside the {level}% "
        "interval, for the bias update",
        "  and persistence a Gaussian with their training RMSE; log sc.: mean -ln p(lab); "
        "lower is better",
        "  except cover; RMSE arr: each result predicted when it reached the model, from every "
        "result known",
        "  then, not what the control room saw; ungated: RMSE without the results the gate "
        "rejected)",
    ]
    lines += _verdict_lines(res)
    if res.n_gated:
        parts = ", ".join(f"{k} {_g(res.scores_gated[k].rmse, 0)}" for k in REFERENCES)
        lines.append(f"  RMSE over the {res.n_gated} results the gate rejected, alone:")
        lines.append(f"    {parts}")
        share = gated_share(res)
        if share > GATED_DOMINATES:
            lines.append(f"  those {res.n_gated} results make {100 * share:.0f}% of the "
                         f"recursive model's squared error (blunders, most likely): the "
                         f"headline RMSE and its ratio mostly score them; compare the models "
                         f"on the results the gate accepted (ungated)")
    lines.append("")
    n_alerts = sum(res.alerts.values())
    if n_alerts:
        by = ", ".join(f"{k} {v}" for k, v in sorted(res.alerts.items()))
        why = ", ".join(f"{k} {v}" for k, v in res.alert_reasons.most_common())
        lines.append(f"  alerts raised: {n_alerts} ({by}); reasons: {why}")
    else:
        lines.append("  alerts raised: none")
    return "\n".join(lines)


def _published_verdict(res: BacktestResult) -> list[str]:
    """The binomial band of `coverage_verdict` around the headline coverage of the published
    intervals (the ungated results): the arrival one-step z can be calibrated while what
    the control room saw, further ahead on dense analyzer data, is not."""
    s = res.scores_ungated.get("model")
    if s is None or not s.n or not math.isfinite(s.coverage):
        return []
    level = res.model.level
    half = 1.96 * math.sqrt(level * (1 - level) / s.n)
    lo, hi = level - half, level + half
    where = "inside" if lo <= s.coverage <= hi else "OUTSIDE"
    head = "calibration" if where == "inside" else "CALIBRATION"
    out = [f"  {head}: coverage {100 * s.coverage:.1f}% (published intervals, {s.n} results) "
           f"is {where} the band {100 * lo:.1f} .. {100 * hi:.1f}% of a calibrated model"]
    if where == "OUTSIDE":
        out.append("    the published intervals are " + (
            "too narrow" if s.coverage < lo else "too wide") + " for the time from the last "
            "known result to the sample (tune at this lab delay)")
    return out


def _verdict_lines(res: BacktestResult) -> list[str]:
    """The calibration verdicts of the recursive model over the scored, ungated results:
    the published intervals, then the one-step predictions at arrival."""
    return _published_verdict(res) + _arrival_verdict(res)


def _arrival_verdict(res: BacktestResult) -> list[str]:
    f = _fits_by_time(res.track)
    start = res.train_end
    z = [x.get("z") for t, x in f.items() if t >= start and x.get("reason") != "gated"]
    v = coverage_verdict(np.array([_nan(q) for q in z], dtype=float), res.model.level)
    if not v["n"]:
        return []
    lo, hi = v["band"]
    if v["inside"] and not v["biased"]:
        return [f"  calibration: coverage {100 * v['coverage']:.1f}% (arrival z, {v['n']} "
                f"results), inside the band {100 * lo:.1f} .. {100 * hi:.1f}% of a calibrated "
                "model; mean z within its band"]
    out = [f"  CALIBRATION: coverage {100 * v['coverage']:.1f}% (arrival z, {v['n']} results)"
           f" is {'inside' if v['inside'] else 'OUTSIDE'} the band {100 * lo:.1f} .. "
           f"{100 * hi:.1f}% of a calibrated model"]
    if not v["inside"]:
        out.append("    the intervals are " + ("too narrow" if v["coverage"] < lo
                                               else "too wide"))
    if v["biased"]:
        side = "above" if v["mean_z"] > 0 else "below"
        out.append(f"    mean z {v['mean_z']:+.2f} (band +-{v['mean_band']:.2f}): the lab "
                   f"results sit {side} the predictions (a bias)")
    return out


# ---------------------------------------------------------------------------------- files
COLUMNS = ("time", "t", "mean", "std", "lo", "hi", "status", "trust", "lab", "lab_mean",
           "lab_std", "lab_scale", "lab_dof", "residual", "z", "learned", "lab_seen", "alert",
           "noforget_mean", "noforget_std", "static_mean", "static_std", "dof", "bias_mean",
           "bias_std", "persist", "persist_std")


# reference columns read back into the fits (by the lab row)
_REF_COLUMNS = ("noforget_mean", "static_mean", "bias_mean", "bias_std", "persist",
                "persist_std")


def _cell(v) -> str:
    if v is None:
        return ""
    if isinstance(v, str):
        return v
    f = float(v)
    return repr(f) if math.isfinite(f) else ("" if math.isnan(f) else repr(f))


def _alert_text(e: dict) -> str:
    kind = e.get("kind")
    if kind == "state":
        reasons = "+".join(r["name"] for r in e.get("reasons", []))
        return f"{e['new']}:{reasons}" if reasons else str(e["new"])
    if kind == "action":
        return str(e.get("action"))
    return str(kind)


def write_predictions(path, res_or_track, *, static: dict | None = None,
                      noforget: Track | None = None, refs: dict | None = None) -> int:
    """Write the predictions file (module docstring); returns the number of data rows.

    Pass a `BacktestResult` (the static and no-forgetting columns are filled) or a `Track`.
    """
    if isinstance(res_or_track, BacktestResult):
        track = res_or_track.track
        static = res_or_track.static_pred
        noforget = res_or_track.noforget
        refs = res_or_track.ref_pred
    else:
        track = res_or_track
    rows: dict[float, dict] = {}
    order: list[float] = []

    def row(t: float) -> dict:
        r = rows.get(t)
        if r is None:
            r = rows[t] = {}
            order.append(t)
        return r

    for i, t in enumerate(track.t.tolist()):
        r = row(t)
        r.update(mean=track.mean[i], std=track.std[i], lo=track.lo[i], hi=track.hi[i],
                 status=track.status[i], trust=track.trust[i])
        if track.dof is not None and track.dof.size == track.t.size:
            r["dof"] = track.dof[i]
    for f in track.fits:
        r = row(f["t"])
        r.update(lab=f["y"], lab_mean=f.get("pred_mean"), lab_std=f.get("pred_std"),
                 lab_scale=f.get("scale"), lab_dof=f.get("dof"), residual=f.get("resid"),
                 z=f.get("z"), learned=f.get("reason"), lab_seen=f.get("seen"))
    for e in track.alerts:
        t = e.get("t")
        if t is None:
            continue
        r = row(float(t))
        text = _alert_text(e)
        r["alert"] = f"{r['alert']};{text}" if r.get("alert") else text
    if refs and "noforget_mean" in refs:
        for i, t in enumerate(refs["t"].tolist()):
            if t in rows:
                rows[t].update(noforget_mean=refs["noforget_mean"][i],
                               noforget_std=refs["noforget_std"][i])
    elif noforget is not None:
        for f in noforget.fits:
            if f["t"] in rows:
                rows[f["t"]].update(noforget_mean=f.get("pred_mean"),
                                    noforget_std=f.get("pred_std"))
    if static is not None:
        for t, mu, sd in zip(static["t"].tolist(), static["mean"].tolist(),
                             static["std"].tolist(), strict=True):
            if t in rows:
                rows[t].update(static_mean=mu, static_std=sd)
    if refs:
        for i, t in enumerate(refs["t"].tolist()):
            if t in rows:
                rows[t].update({k: refs[k][i] for k in ("bias_mean", "bias_std", "persist",
                                                        "persist_std")})
    order.sort()
    meta = {k: v for k, v in track.meta.items()}
    meta.setdefault("schema", SCHEMA)
    meta.setdefault("model", track.model)
    with open(path, "w", encoding="utf-8", newline="") as fh:
        fh.write(f"# posteriord predictions: {json.dumps(meta, sort_keys=True)}\n")
        fh.write("# one row per prediction; lab columns on the row of the drawn time; "
                 "empty cells are missing values\n")
        fh.write(",".join(COLUMNS) + "\n")
        for t in order:
            r = rows[t]
            cells = [datetime.fromtimestamp(t, UTC).isoformat(), repr(float(t))]
            cells += [_cell(r.get(c)) for c in COLUMNS[2:]]
            fh.write(",".join(cells) + "\n")
    return len(order)


def read_predictions(path) -> Track:
    """Read a predictions file written by `write_predictions` back into a `Track`."""
    meta: dict = {}
    header = None
    data: list[list[str]] = []
    with open(path, encoding="utf-8") as fh:
        for lineno, line in enumerate(fh, 1):
            line = line.rstrip("\r\n")
            if line.startswith("#"):
                key = "# posteriord predictions:"
                if line.startswith(key):
                    try:
                        meta = json.loads(line[len(key):])
                    except json.JSONDecodeError as exc:
                        raise ValueError(f"{path}:{lineno}: bad metadata line: {exc}") from None
                continue
            if not line.strip():
                continue
            if header is None:
                header = line.split(",")
                missing = [c for c in ("t", "mean", "lab", "z") if c not in header]
                if missing:
                    raise ValueError(f"{path}: not a predictions file (no column "
                                     f"{', '.join(missing)}; header {header})")
                continue
            cells = line.split(",")
            if len(cells) != len(header):
                raise ValueError(f"{path}:{lineno}: {len(cells)} cells, header has "
                                 f"{len(header)}")
            data.append(cells)
    if header is None:
        raise ValueError(f"{path}: no header line")
    col = {c: i for i, c in enumerate(header)}

    def num(cells, name):
        i = col.get(name)
        if i is None or cells[i] == "":
            return math.nan
        try:
            return float(cells[i])
        except ValueError:
            raise ValueError(f"{path}: column {name}: {cells[i]!r} is not a number") from None

    def text(cells, name):
        i = col.get(name)
        return None if i is None or cells[i] == "" else cells[i]

    pt, pm, ps, plo, phi_, pst, ptr, pdof = [], [], [], [], [], [], [], []
    fits, alerts = [], []
    for cells in data:
        t = num(cells, "t")
        mean = num(cells, "mean")
        if text(cells, "mean") is not None or text(cells, "status") is not None:
            pt.append(t)
            pm.append(mean)
            ps.append(num(cells, "std"))
            plo.append(num(cells, "lo"))
            phi_.append(num(cells, "hi"))
            pst.append(text(cells, "status"))
            ptr.append(text(cells, "trust"))
            pdof.append(num(cells, "dof"))
        if text(cells, "lab") is not None:
            learned = text(cells, "learned")
            fits.append({"t": t, "y": num(cells, "lab"), "pred_mean": num(cells, "lab_mean"),
                         "pred_std": num(cells, "lab_std"), "scale": num(cells, "lab_scale"),
                         "dof": num(cells, "lab_dof"), "resid": num(cells, "residual"),
                         "z": num(cells, "z"), "reason": learned, "seen": num(cells, "lab_seen"),
                         "accepted": learned in _LEARNED,
                         **{k: num(cells, k) for k in _REF_COLUMNS if k in col}})
        a = text(cells, "alert")
        if a:
            for part in a.split(";"):
                state, _, why = part.partition(":")
                if state in ("normal", "caution", "untrusted"):
                    alerts.append({"t": t, "kind": "state", "new": state,
                                   "reasons": [{"name": r} for r in why.split("+") if r]})
                else:
                    alerts.append({"t": t, "kind": "action", "action": state})
    return Track(meta.get("model", ""), np.array(pt), np.array(pm), np.array(ps), np.array(plo),
                 np.array(phi_), pst, ptr, fits, alerts, meta, np.array(pdof, dtype=float))
