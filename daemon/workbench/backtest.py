"""Backtest: run a model over a historian CSV through the daemon's own message path.

The rows of the file become feed messages exactly as a live feed would carry them (feature
blocks of ``block`` rows on the model's topic, each lab value as a late lab result at its drawn
time, sent ``lab_delay`` after it was drawn), and every message goes through
:meth:`daemon.runtime.service.Service.process`, with a publisher that records what would
have left the daemon. The predictions written are therefore the daemon's, bit for bit:
replaying the same messages into a running daemon gives the same bytes (tested).

Beside the model as configured, two references are scored on the same lab results:

* the same model without forgetting (run through the same service, as a second model), and
* the static batch model: ridge regression with the same basis and prior, fitted once on the
  lab results of a training period at the start of the file (``train``), then held fixed.

Scores are one-step-ahead: each lab result is predicted before the model learns from it. They
are computed on the lab results drawn after the training period, leaving out those the
model's robust gate rejected (lab blunders, by the gate's judgement), so that all three models
are scored on the same set.

Predictions file (``write_predictions``): a CSV with comment lines starting with ``#``, the
first of which is ``# posteriord predictions: {json}`` with the model name, interval level,
target, unit and detector settings. Columns::

    time,t,mean,std,lo,hi,status,trust,lab,lab_mean,lab_std,lab_scale,lab_dof,residual,z,
    learned,lab_seen,alert,noforget_mean,noforget_std,static_mean,static_std

One row per published prediction (``time`` ISO 8601 UTC, ``t`` epoch seconds); the lab columns
are filled on the row of the time the sample was drawn (a row of its own when no prediction
has that time): the lab value, the one-step-ahead predictive mean, std, scale and degrees of
freedom, the residual ``lab - lab_mean``, the standardized residual ``z``, and ``learned``
(``ok``, ``gate_open``, ``gated``, ``not_identified``), ``lab_seen`` the feed time the result
reached the model (the newest sample time then). ``alert`` lists the trust-state changes
and actions published at that time (``caution:extrapolation+stale``, ``normal``, ``flatten``).
Empty cells are missing values.
"""

from __future__ import annotations

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
from daemon.runtime import wire
from daemon.runtime.alignment import apply_dead_time
from daemon.workbench.historian import read_csv
from recursive.detect import crps_t, log_score_t

__all__ = [
    "History",
    "StaticModel",
    "Track",
    "Scores",
    "BacktestResult",
    "backtest",
    "collect",
    "feed_messages",
    "fit_static",
    "lab_features",
    "load_history",
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
    cols: dict[str, list] = {k: [] for k in ("t", "mean", "std", "lo", "hi", "status", "trust")}
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
            else:
                for key in ("t", "mean", "std", "lo", "hi", "status"):
                    cols[key].append(body[key])
                cols["trust"].append(body.get("trust"))
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
           for k in ("t", "mean", "std", "lo", "hi")}
    return Track(model, arr["t"], arr["mean"], arr["std"], arr["lo"], arr["hi"], cols["status"],
                 cols["trust"], fits, alerts, meta)


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


# ---------------------------------------------------------------------------------- backtest
@dataclass(eq=False)
class BacktestResult:
    """Everything a backtest found; `summary_text` writes it for people."""

    model: ModelConfig
    history: History
    track: Track
    noforget: Track
    static: StaticModel
    scores: dict
    n_scored: int
    n_gated_left_out: int
    train_end: float
    lab_delay: float
    block: int
    messages: int
    frames: list
    static_pred: dict
    alerts: Counter
    alert_reasons: Counter


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
                        half_life=None, q=None)
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
            "cusum_h": model.cusum_h, "stale_after": model.stale_after,
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

    # the same lab results for all three models
    a = _fits_by_time(track)
    b = _fits_by_time(other)
    idx = {t: i for i, t in enumerate(lab_t.tolist())}
    rows = []
    n_gated = 0
    for t in sorted(a):
        fa = a[t]
        if t < train_end:
            continue
        if fa.get("reason") == "gated":
            n_gated += 1
            continue
        fb, i = b.get(t), idx.get(t)
        if fb is None or i is None or not ok[i]:
            continue
        cand = [(fa["pred_mean"], fa["scale"], fa["dof"]), (fb["pred_mean"], fb["scale"],
                                                           fb["dof"]),
                (s_mean[i], s_scale[i], s_dof[i])]
        if all(_usable(*c) for c in cand):
            rows.append((fa["y"], *cand))
    y = np.array([r[0] for r in rows])
    scores = {}
    for key, k in (("model", 1), ("noforget", 2), ("static", 3)):
        scores[key] = score(y, [r[k][0] for r in rows], [r[k][1] for r in rows],
                            [r[k][2] for r in rows], model.level)
    alerts, reasons = Counter(), Counter()
    for e in track.alerts:
        if e.get("kind") == "state" and e.get("new") in ("caution", "untrusted"):
            alerts[e["new"]] += 1
            for r in e.get("reasons", []):
                reasons[r["name"]] += 1
    track.meta["static_train_end"] = train_end
    return BacktestResult(model, history, track, other, static, scores, len(rows), n_gated,
                          train_end, lab_delay, block, len(messages), recorder.frames,
                          static_pred, alerts, reasons)


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
    return f"{m.forgetting}, half-life {format_duration(m.half_life)}"


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
        f"  scored: {res.n_scored} lab results drawn after {_stamp(res.train_end)} (the "
        f"static model's training period), one step ahead; {res.n_gated_left_out} rejected "
        f"by the gate left out",
        "",
        f"  {'':<40}{'RMSE':>8}{'MAE':>8}{'cover':>8}{'log sc.':>9}{'CRPS':>8}",
    ]
    level = int(round(100 * m.level))
    names = {"model": f"recursive, {_policy(m)}",
             "noforget": "recursive, no forgetting",
             "static": f"static ridge on {res.static.n} lab results"}
    for key in ("model", "noforget", "static"):
        s = res.scores[key]
        lines.append(f"  {names[key][:39]:<40}{s.rmse:8.2f}{s.mae:8.2f}"
                     f"{100 * s.coverage:7.1f}%{s.log_score:9.3f}{s.crps:8.2f}")
    lines += [
        f"  (RMSE, MAE, CRPS in{u or ' target units'}; cover: share inside the {level}% "
        f"interval; log sc.: mean -ln p(lab); lower is better except cover)",
        "",
    ]
    n_alerts = sum(res.alerts.values())
    if n_alerts:
        by = ", ".join(f"{k} {v}" for k, v in sorted(res.alerts.items()))
        why = ", ".join(f"{k} {v}" for k, v in res.alert_reasons.most_common())
        lines.append(f"  alerts raised: {n_alerts} ({by}); reasons: {why}")
    else:
        lines.append("  alerts raised: none")
    return "\n".join(lines)


# ---------------------------------------------------------------------------------- files
COLUMNS = ("time", "t", "mean", "std", "lo", "hi", "status", "trust", "lab", "lab_mean",
           "lab_std", "lab_scale", "lab_dof", "residual", "z", "learned", "lab_seen", "alert",
           "noforget_mean", "noforget_std", "static_mean", "static_std")


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
                      noforget: Track | None = None) -> int:
    """Write the predictions file (module docstring); returns the number of data rows.

    Pass a `BacktestResult` (the static and no-forgetting columns are filled) or a `Track`.
    """
    if isinstance(res_or_track, BacktestResult):
        track = res_or_track.track
        static = res_or_track.static_pred
        noforget = res_or_track.noforget
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
    if noforget is not None:
        for f in noforget.fits:
            if f["t"] in rows:
                rows[f["t"]].update(noforget_mean=f.get("pred_mean"),
                                    noforget_std=f.get("pred_std"))
    if static is not None:
        for t, mu, sd in zip(static["t"].tolist(), static["mean"].tolist(),
                             static["std"].tolist(), strict=True):
            if t in rows:
                rows[t].update(static_mean=mu, static_std=sd)
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

    pt, pm, ps, plo, phi_, pst, ptr = [], [], [], [], [], [], []
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
        if text(cells, "lab") is not None:
            learned = text(cells, "learned")
            fits.append({"t": t, "y": num(cells, "lab"), "pred_mean": num(cells, "lab_mean"),
                         "pred_std": num(cells, "lab_std"), "scale": num(cells, "lab_scale"),
                         "dof": num(cells, "lab_dof"), "resid": num(cells, "residual"),
                         "z": num(cells, "z"), "reason": learned, "seen": num(cells, "lab_seen"),
                         "accepted": learned in _LEARNED})
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
                 np.array(phi_), pst, ptr, fits, alerts, meta)
