"""One configured model at run time: its posterior, its feature buffer, its counters.

A :class:`ModelRunner` is driven by the service loop with already-decoded values; it does
no I/O. Predictions are computed in vectorized batches; lab results are matched to the
buffered features of the time the sample was drawn and learned one at a time. Both use the
same rows: for time t, each input as it was at t minus its dead time.

Every change of learned state goes through :meth:`ModelRunner.learn_row` (a matched lab
result, learned in drawn-time order even when it arrives late) or :meth:`ModelRunner.control`
(freeze, resume, reset, acknowledge). The service logs
their arguments in the write-ahead log and, after a restart, replays them through the same
two methods, so that the replayed state is bit-identical to the one that was lost.
"""

from __future__ import annotations

import bisect
import math
from collections import Counter, OrderedDict
from collections.abc import Iterator
from dataclasses import dataclass, fields, replace

import numpy as np

from daemon.config import ModelConfig
from daemon.runtime import wire
from daemon.runtime.alignment import Aligner
from daemon.runtime.monitor import STALE_FALLBACK, Monitor
from recursive import OutOfOrderError, Posterior, Prediction
from recursive.basis import Identity, Polynomial
from recursive.posterior import predict_rows_many

_PREDICTION_FIELDS = tuple(f.name for f in fields(Prediction))

# "waiting": an input's dead time reaches back before the buffered readings (after a start or
# a reset), so there is no prediction yet
STATUSES = ("unidentified", "learning", "frozen", "stale", "waiting")
CONTROLS = ("freeze", "resume", "reset", "acknowledge")
# Schema of ModelRunner.to_state(): one model's whole run-time state, as plain data.
RUNNER_SCHEMA = "posteriord.runner/1"
# publishers (src values) whose sequence numbers a model follows
_MAX_SOURCES = 64
_COUNTERS = ("n_features", "n_predictions", "n_lab", "n_learned", "n_gaps", "n_lost")
# lab results remembered for learning a late one in drawn-time order (besides the feature
# buffer's span): each holds a snapshot, and a late result re-applies those drawn after it
MAX_REWIND = 64
# a visit with at most this many single samples takes the short path (_predict_few):
# its cost grows by a few microseconds a row from almost nothing, the general path's
# starts at a few hundred (measured with tools/bench_daemon.py, 200 models)
_FEW = 16


def _affine_terms(basis) -> tuple | None:
    """``(scaled, lo, hi, width)`` of a basis whose terms are 1 then one per input (the
    input, or its scaled ``((x - lo) - (hi - x)) / width``), else None."""
    if type(basis) is Identity or (type(basis) is Polynomial and basis.degree == 1
                                   and not basis.scale):
        return (False, None, None, None)
    if type(basis) is Polynomial and basis.degree == 1:
        return (True, basis._lo, basis._hi, basis._width)
    return None


def predict_few_together(visits: list) -> dict:
    """The numbers of many models' short visits, computed together where they share a shape.

    ``visits`` is ``[(key, runner, ts, rows)]``, each a visit for which
    :meth:`ModelRunner.few_together` is true. Returns ``{key: shared}`` for the visits
    computed, ``shared`` to pass to :meth:`ModelRunner.predict`; a visit left out takes its
    own path. Models with the same number of inputs and the same kind of affine terms
    (scaled or not) share one array expression for their terms, one kernel call and one
    pass of elementwise arithmetic (`recursive.posterior.predict_rows_many`): the bits each
    row gets are those of its model's own short path (:meth:`ModelRunner._predict_few`),
    whichever other models it is computed with.
    """
    groups: dict = {}
    for v in visits:
        r = v[1]
        groups.setdefault((r._affine[0], len(r.tags)), []).append(v)
    out: dict = {}
    for (scaled, _d), group in groups.items():
        if len(group) < 2:
            continue  # nothing to share
        ts, rows, owner = [], [], []
        for g, (_key, _r, vts, vrows) in enumerate(group):
            ts += vts
            rows += vrows
            owner += [g] * len(vts)
        X = np.array(rows, dtype=float)
        own = np.array(owner)
        P = np.empty((X.shape[0], X.shape[1] + 1))
        P[:, 0] = 1.0
        if scaled:
            lim = np.array([(r._affine[1], r._affine[2], r._affine[3])
                            for _k, r, _t, _x in group])[own]
            lo, hi, width = lim[:, 0], lim[:, 1], lim[:, 2]
            # the basis' own ((X - lo) - (hi - X)) / width, elementwise
            P[:, 1:] = ((X - lo) - (hi - X)) / width
        else:
            P[:, 1:] = X
        t = np.array(ts, dtype=float)
        res = predict_rows_many([r.post for _k, r, _t, _x in group], P, t, own,
                                [r.cfg.level for _k, r, _t, _x in group])
        if res is None:
            continue
        mean, std, var, lo_, hi_, dof, lev = res
        cols = np.array((t, mean, std, var, lo_, hi_, dof)).tolist()
        xs, lev_l = X.tolist(), lev.tolist()
        std_l = cols[2]
        start = 0
        for key, _r, vts, _x in group:
            end = start + len(vts)
            out[key] = (xs[start:end], [c[start:end] for c in cols], std_l[start:end],
                        lev_l[start:end])
            start = end
    return out


class _Offered:
    """A lab result offered to the posterior, with the learning state just before it."""

    __slots__ = ("t", "x", "y", "ident", "clock", "accepted", "reason", "before")

    def __init__(self, t, x, y, ident, clock, before):
        self.t, self.x, self.y, self.ident, self.clock = t, x, y, ident, clock
        self.before = before
        self.accepted = False
        self.reason = ""


class Rejected(Exception):
    """A sample or lab result that is counted and logged but not used."""

    def __init__(self, reason: str, detail: str):
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail


@dataclass(slots=True)
class PredBatch:
    """Predictions for a run of feature samples of one model.

    The numbers are float arrays, or lists of floats from the short path of a few single
    samples (:meth:`ModelRunner._predict_few`). Not frozen: a frozen dataclass' ``__init__``
    sets each field through ``object.__setattr__``, a cost on every model visit.
    """

    t: np.ndarray
    ids: list
    mean: np.ndarray
    std: np.ndarray
    var: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    dof: np.ndarray
    status: list
    # trust after each row (single samples stepped one by one), or None: ``runner.trust``
    trust: list | None = None
    # [(row, events)]: alert events to publish right after that row's prediction
    marks: tuple | list = ()


def _blanked(pred: Prediction, rows: list) -> Prediction:
    """``pred`` with nan in the given rows: no prediction there."""
    out = {}
    for f in _PREDICTION_FIELDS:
        v = np.array(getattr(pred, f))
        if f == "identified":
            v[rows] = False
        else:
            v[rows] = math.nan
        out[f] = v
    return Prediction(**out)


def _note(note: dict | None) -> dict:
    """The audit fields of a freeze or resume: reason and who (strings), at (a time or None)."""
    note = note or {}
    at = note.get("at")
    return {"reason": str(note.get("reason") or "")[:500], "by": str(note.get("by") or "")[:100],
            "at": float(at) if isinstance(at, int | float) and math.isfinite(at) else None}


def _drawn(entry: _Offered) -> float:
    return entry.t


class ModelRunner:
    """Run-time state of one model."""

    def __init__(self, cfg):
        self.cfg = cfg
        self.name = cfg.name
        self.basis = cfg.build_basis()
        self.post = cfg.build_posterior()
        self.tags = tuple(i.tag for i in cfg.inputs)
        self.index = {tag: i for i, tag in enumerate(self.tags)}
        self.spec = (self.tags, self.index)
        self.aligner = self._new_aligner()
        # predictions use each input at t - dead_time, as learning does; with no dead time
        # that is the sample's own row, and no lookup is made
        self.delayed = any(i.dead_time > 0 for i in cfg.inputs)
        # terms 1, u_1, ..., u_d: what predict_few_together builds for many models at once
        self._affine = _affine_terms(self.basis)
        # how long a run of pending samples may span before the oldest's delayed inputs
        # could leave the buffer (history minus the longest dead time and the tolerance)
        dead = max(float(i.dead_time) for i in cfg.inputs)
        self.lookback_margin = max(0.0, max(cfg.keep, dead + cfg.tolerance) - dead
                                   - cfg.tolerance)
        self.ids: OrderedDict = OrderedDict()
        self.monitor = Monitor(cfg, self.basis) if cfg.alerts else None
        # alert events waiting to be published by the service
        self.alerts: list[dict] = []
        self.frozen = False
        # the last freeze or resume with its reason, who and when (see control)
        self.learning_note: dict | None = None
        self.last_x_t: float | None = None
        # last sequence number per publisher (``src``; None for messages that name none)
        self.last_seq: dict = {}
        # snapshot for the metrics collector and the status command
        self.last_std = math.nan
        self.last_mean = math.nan
        self.last_lab_t: float | None = None
        # sample time of the last lab result that reached the posterior (learned or gated):
        # a result drawn at or before it is a duplicate or out of order and is not offered,
        # so a feed re-sent after a restart cannot teach the model anything twice
        self.last_offered_t: float | None = None
        # the recent offered results in drawn-time order (see learn_row); a late result
        # drawn at or before ``lab_floor`` cannot be placed exactly and is not offered
        self.offered: list[_Offered] = []
        self.lab_floor: float | None = None
        self.last_fit: dict | None = None
        # event counters (exported by the collector at scrape time)
        self.n_features = 0
        self.n_predictions = 0
        self.n_lab = 0
        self.n_learned = 0
        self.n_gaps = 0
        self.n_lost = 0
        # late lab results learned by rewinding (not part of the exported counters)
        self.n_late = 0
        self.rejected: Counter = Counter()

    def _new_aligner(self) -> Aligner:
        cfg = self.cfg
        dead = [float(i.dead_time) for i in cfg.inputs]
        history = max(cfg.keep, max(dead) + cfg.tolerance)
        return Aligner(self.tags, dead, history, tolerance_s=cfg.tolerance,
                       max_rows=cfg.keep_count)

    # ------------------------------------------------------------------ config
    def reconfigure(self, cfg) -> None:
        """Apply a reloaded config whose learning settings are unchanged."""
        self.cfg = cfg

    def reset(self) -> None:
        """Back to the configured prior, detectors cleared, feature buffer and feed clock too.

        The feed clock (the newest sample time) goes with the buffer, so a model whose
        publisher once sent wrong times accepts correct ones again; lab results drawn before
        the reset find no features to match and are rejected (``lab_unmatched``).
        """
        self.post.reset()
        self.aligner = self._new_aligner()
        self.ids.clear()
        self.last_x_t = None
        self.last_lab_t = None
        self.last_offered_t = None
        self.offered = []
        self.lab_floor = None
        self.last_fit = None
        if self.monitor is not None:
            self.monitor.reset()

    @property
    def trust(self) -> str | None:
        return None if self.monitor is None else self.monitor.state

    @property
    def stale_after(self) -> float:
        """``[model.lab] stale_after``, or the monitor's estimate from the lab interval."""
        if self.monitor is not None:
            return self.monitor.stale_after
        return self.cfg.stale_after if self.cfg.stale_after is not None else STALE_FALLBACK

    # ------------------------------------------------------------------ feed
    def note_seq(self, seq: int | None, src: str | None = None) -> None:
        """Count gaps in a publisher's sequence numbers on this model's topic.

        PUB/SUB drops silently when a queue is full. ``seq`` numbers one publisher's
        messages on one topic; ``src`` tells publishers of the same topic apart. A number
        not above the last one is a publisher that started again (a bridge restarted):
        one gap, of a size nobody knows (nothing added to the lost messages).
        """
        if seq is None:
            return
        last = self.last_seq.get(src)
        if last is not None and seq > last + 1:
            self.n_gaps += 1
            self.n_lost += seq - last - 1
        elif last is not None and seq <= last:
            self.n_gaps += 1
        if len(self.last_seq) >= _MAX_SOURCES and src not in self.last_seq:
            self.last_seq.pop(next(iter(self.last_seq)))  # bounded: the first seen goes
        self.last_seq[src] = seq

    def add_features(self, t: float, row: list, ident) -> None:
        """Buffer one feature sample; raises :class:`Rejected` when out of order."""
        if self.last_x_t is not None:
            if t < self.last_x_t:
                raise Rejected("out_of_order", f"t={t!r} before the last sample {self.last_x_t!r}")
            if t == self.last_x_t:
                raise Rejected("duplicate", f"second sample at t={t!r}")
        self.last_x_t = t
        self.n_features += 1
        self.aligner.push_trusted(t, row)  # copied into the buffer's float64 array
        if ident is not None:
            self._remember_id(ident, t)

    def _remember_id(self, ident, t: float) -> None:
        self.ids[ident] = t
        while len(self.ids) > self.cfg.keep_count:
            self.ids.popitem(last=False)

    def add_block(self, ts: list, X: np.ndarray, ids: list | None, increasing: bool,
                  t_array: np.ndarray | None = None) -> bool:
        """Buffer a block of samples at once if its times are increasing and new.

        Returns False (nothing done) otherwise; the caller then adds the rows one by one so
        that each bad row is rejected on its own. ``t_array``: ``ts`` as a float array too.
        """
        if not increasing:
            return False
        if self.last_x_t is not None and ts[0] <= self.last_x_t:
            return False
        self.last_x_t = ts[-1]
        self.n_features += len(ts)
        self.aligner.push_block_trusted(ts if t_array is None else t_array, X)
        if ids is not None:
            for ident, t in zip(ids, ts, strict=True):
                if ident is not None:
                    self._remember_id(ident, t)
        return True

    def status_at(self, t: float) -> str:
        if not self.post.identified:
            return "unidentified"
        if self.frozen:
            return "frozen"
        if self.last_lab_t is None or t - self.last_lab_t > self.stale_after:
            return "stale"
        return "learning"

    def predict(self, ts: list, rows, ids: list, *, singles: bool = False,
                shared: tuple | None = None) -> PredBatch:
        """Vectorized predictions for feature samples already buffered.

        ``singles``: the rows came as single-sample messages. Each then gets its own detector
        step and trust, and its numbers must not depend on the other rows: where the
        posterior cannot promise that for a batch (`Posterior.rowwise`), rows are predicted
        one at a time. ``shared``: this visit's numbers as :func:`predict_few_together`
        computed them with other models' rows (the same bits as computed here).
        """
        if shared is not None:
            return self._finish_few(ts, ids, *shared)
        if singles and 0 < len(ts) <= _FEW and not self.delayed:
            batch = self._predict_few(ts, rows, ids)
            if batch is not None:
                return batch
        t = np.asarray(ts, dtype=float)
        X = np.asarray(rows, dtype=float)
        waiting = None
        if self.delayed:
            X, waiting = self._aligned(ts, X)
        if singles and len(ts) > 1 and not self.post.rowwise:
            parts = [self.post.predict(self.basis(X[i:i + 1]), t=t[i:i + 1])
                     for i in range(len(ts))]
            pred = Prediction(**{f: np.concatenate([getattr(p, f) for p in parts])
                                 for f in _PREDICTION_FIELDS})
        else:
            pred = self.post.predict(self.basis(X), t=t)
        return self._finish(ts, t, X, ids, pred, singles, waiting)

    def few_together(self, ts: list) -> bool:
        """Whether a visit of single samples at ``ts`` may take :func:`predict_few_together`:
        the short path (:meth:`_predict_few`) of a posterior whose rows can be computed with
        other models' (`Posterior.rows_together`) and an affine basis."""
        return (0 < len(ts) <= _FEW and not self.delayed and self._affine
                and self.post.rows_together)

    def _predict_few(self, ts: list, rows, ids: list) -> PredBatch | None:
        """:meth:`predict` of a few single samples (most visits have one): one kernel call
        (`Posterior.predict_rows`) and plain float arithmetic for the distribution, the
        interval, the detectors and the status, with the same bits as the general path
        (tested against it). None where that path does not apply (the general one then
        runs): a posterior that is not row by row, or not identified yet."""
        # the decoded rows are lists of floats already (the wire's single-sample path)
        xs = [r if type(r) is list else np.array(r, dtype=float).tolist() for r in rows]
        basis = self.basis
        P = basis.row_terms(xs[0]) if len(xs) == 1 else np.concatenate(
            [basis.row_terms(x) for x in xs])
        out = self.post.predict_rows(P, ts, self.cfg.level)
        if out is None:
            return None
        mean, std, var, lo, hi, dof, lev = out
        # the numbers are floats already; the times are made floats (an int would be
        # written as a msgpack int)
        times = ts if all(type(t) is float for t in ts) else [float(t) for t in ts]
        return self._finish_few(ts, ids, xs, [times, mean, std, var, lo, hi, dof], std, lev)

    def _finish_few(self, ts: list, ids: list, xs: list, c: list, std: list,
                    lev: list) -> PredBatch:
        """The rest of :meth:`_predict_few` once the numbers are known: ``c`` the lists of
        k floats of the times, means, stds, variances, interval ends and dofs, ``std`` and
        ``lev`` the stds and leverages, ``xs`` the raw rows as lists of floats."""
        k = len(ts)
        trust, marks = None, ()
        last = self.last_lab_t
        if self.monitor is not None:
            # each row stepped as if it had come alone (quiet rows: only the last, to the
            # same effect), as on_prediction_rows does on the general path
            trust, marks = self.monitor.on_prediction_few(ts, xs, std, lev, last)
        if not self.post.identified or self.frozen or last is None:
            status = [self.status_at(ts[0])] * k
        else:
            sa = self.stale_after
            status = ["stale" if t - last > sa else "learning" for t in ts]
        self.n_predictions += k
        self.last_mean, self.last_std = c[1][-1], std[-1]
        # lists of floats, as the publisher writes them (no array to convert back)
        return PredBatch(c[0], ids, c[1], c[2], c[3], c[4], c[5], c[6], status, trust, marks)

    def _aligned(self, ts: list, X: np.ndarray) -> tuple[np.ndarray, list | None]:
        """The rows the predictions at ``ts`` use: each input at t - its dead time, looked
        up as for a lab result drawn at t. Also the indices of the rows whose inputs are
        not buffered (their own readings stand in, so the batch stays finite, and their
        predictions are blanked)."""
        if len(ts) > 4:
            out, ok = self.aligner.lookup_many(ts)
            if ok.all():
                return out, None
            out[~ok] = X[~ok]
            return out, np.flatnonzero(~ok).tolist()
        lookup = self.aligner.lookup
        out = np.array(X, dtype=float)
        waiting = []
        for k, tk in enumerate(ts):
            x = lookup(tk)
            if x is None:
                waiting.append(k)
            else:
                out[k] = x
        return out, waiting or None

    def predict_blocks(self, blocks: list) -> Iterator[PredBatch]:
        """:meth:`predict` of several blocks ``(ts, X, ids, t_array)``, yielding one result
        per block (``t_array``: ``ts`` as a float array, or None).

        When the posterior's predictions are row by row (each row's numbers do not depend
        on the other rows of its batch: `Posterior.rowwise`), the rows of all blocks are
        predicted in one call. The detectors, intervals and statuses still run block by
        block, each when its result is asked for, so a caller that publishes each result
        before asking for the next one sends the same messages, bit for bit and with the
        same trust states and alerts in between, as block by block.
        """
        if len(blocks) == 1 or not self.post.rowwise or self.delayed:
            for ts, X, ids, _ta in blocks:
                yield self.predict(ts, X, ids)
            return
        t = np.concatenate([np.asarray(b[0], dtype=float) if b[3] is None else b[3]
                            for b in blocks])
        X = np.concatenate([b[1] for b in blocks])
        pred = self.post.predict(self.basis(X), t=t)
        # the intervals and the detectors' per-block checks of all rows at once: each is
        # a function of its own row (or a maximum or count of such), so the same bits
        lo, hi = pred.interval(self.cfg.level)
        starts = np.cumsum([0] + [len(b[0]) for b in blocks[:-1]]).tolist()
        checks = None
        if self.monitor is not None and all(len(b[0]) for b in blocks):
            checks = self.monitor.block_checks(X, pred.leverage, starts)
        start = 0
        for i, (ts, Xb, ids, _ta) in enumerate(blocks):
            sl = slice(start, start + len(ts))
            start = sl.stop
            part = Prediction(**{f: getattr(pred, f)[sl] for f in _PREDICTION_FIELDS})
            yield self._finish(ts, t[sl], Xb, ids, part,
                               known=(lo[sl], hi[sl], None if checks is None else checks[i]))

    def _finish(self, ts: list, t: np.ndarray, X: np.ndarray, ids: list,
                pred: Prediction, singles: bool = False,
                waiting: list | None = None, known: tuple | None = None) -> PredBatch:
        """The rest of a prediction once the numbers are known: blanking of rows waiting
        for delayed inputs, the detectors, the interval and the status. ``known``: the
        interval ends and the block's detector checks (`Monitor.block_checks`, or None)
        computed already with other blocks' rows (`predict_blocks`)."""
        trust, marks = None, ()
        if waiting is not None:
            pred = _blanked(pred, waiting)
        if known is not None:
            lo, hi, checks = known
            if self.monitor is not None:
                if checks is None:
                    trust, marks = self._detect(ts, X, pred, singles, waiting)
                else:
                    self.alerts += self.monitor.on_block(ts[-1], float(pred.std[-1]), checks,
                                                         self.last_lab_t)
        else:
            if self.monitor is not None:
                trust, marks = self._detect(ts, X, pred, singles, waiting)
            lo, hi = pred.interval(self.cfg.level)
        stale = self.stale_after
        if not self.post.identified or self.frozen or self.last_lab_t is None:
            status = [self.status_at(ts[0])] * len(ts)
        elif ts[-1] - self.last_lab_t <= stale:
            status = ["learning"] * len(ts)
        elif ts[0] - self.last_lab_t > stale:
            status = ["stale"] * len(ts)
        else:
            status = np.where(t - self.last_lab_t > stale, "stale",
                              "learning").tolist()
        if waiting is not None:
            status = list(status)
            for k in waiting:
                status[k] = "waiting"
        self.n_predictions += len(ts)
        self.last_mean = float(pred.mean[-1])
        self.last_std = float(pred.std[-1])
        return PredBatch(t, ids, pred.mean, pred.std, pred.var, lo, hi, pred.dof, status,
                         trust, marks)

    def _detect(self, ts, X, pred, singles: bool, waiting) -> tuple[list | None, list]:
        """The detector steps of a batch: per sample for single samples, one per block.

        Returns the per-row trust and events as :meth:`Monitor.on_prediction_rows` does
        (``None, ()`` for a block, whose events go to :attr:`alerts`).
        """
        if singles:
            if waiting is not None:
                return self._rows_with_waiting(ts, X, pred, waiting)
            return self.monitor.on_prediction_rows(ts, X, pred.std, pred.leverage,
                                                   self.last_lab_t)
        if waiting is None:
            self.alerts += self.monitor.on_predictions(ts[-1], X, pred.std, pred.leverage,
                                                       self.last_lab_t)
            return None, ()
        # the detectors see the rows that have a prediction (a start-up moment only)
        ok = np.ones(len(ts), dtype=bool)
        ok[waiting] = False
        if ok.any():
            last = int(np.flatnonzero(ok)[-1])
            self.alerts += self.monitor.on_predictions(ts[last], X[ok], pred.std[ok],
                                                       pred.leverage[ok], self.last_lab_t)
        return None, ()

    def _rows_with_waiting(self, ts, X, pred, waiting) -> tuple[list, list]:
        """Per-sample detector steps of the rows that have a prediction; a waiting row
        takes no step and is published with the trust of the step before it."""
        ok = np.ones(len(ts), dtype=bool)
        ok[waiting] = False
        idx = np.flatnonzero(ok)
        before = self.monitor.state
        stepped, marks = [], []
        if idx.size:
            tr, mk = self.monitor.on_prediction_rows([ts[i] for i in idx.tolist()], X[idx],
                                                     pred.std[idx], pred.leverage[idx],
                                                     self.last_lab_t)
            stepped = [self.monitor.state] * idx.size if tr is None else tr
            marks = [(int(idx[j]), ev) for j, ev in mk]
        trust, cur, j = [], before, 0
        for i in range(len(ts)):
            if ok[i]:
                cur = stepped[j]
                j += 1
            trust.append(cur)
        return trust, marks

    # ------------------------------------------------------------------ lab
    def match(self, t: float, ident) -> tuple[float, tuple]:
        """The sample time and the buffered features a lab result refers to.

        ``t`` is nan for a result that names its sample by ``ident`` only. Raises
        :class:`Rejected` (``lab_unmatched``, ``lab_too_old``) when there are none.
        """
        if math.isnan(t):
            t0 = self.ids.get(ident)
            if t0 is None:
                raise Rejected("lab_unmatched", f"no buffered sample with id {ident!r}")
            t = t0
        x = self.aligner.lookup(t)
        if x is None:
            oldest = self.aligner.oldest
            if oldest is None or t >= oldest:
                raise Rejected("lab_unmatched", f"no features within {self.cfg.tolerance:g} s "
                                                f"of t={t!r}")
            raise Rejected("lab_too_old", f"t={t!r} is older than the buffer ({oldest!r})")
        return t, x

    def learn(self, t: float, y: float, ident) -> tuple[dict, dict]:
        """Match a lab result to its features and learn from it.

        Returns the ``fit/`` message body and the write-ahead log record that replays it
        (:meth:`replay`); raises :class:`Rejected` when the result changes nothing.
        """
        try:
            t, x = self.match(t, ident)
        except Rejected:
            self.n_lab += 1
            raise
        x = [float(v) for v in x]
        # the monitor's clock is the feed's; kept in the record because replay has no feed
        clock = t if self.last_x_t is None else max(t, self.last_x_t)
        fit = self.learn_row(t, x, y, ident, clock)
        record = {"k": "lab", "m": self.name, "t": t, "x": x, "y": y, "id": ident, "c": clock}
        return fit, record

    def replay(self, record: dict, snapshot: bool = True, terms=None) -> dict:
        """Learn a lab result again from its write-ahead log record (``snapshot``, ``terms``:
        as in :meth:`learn_row`)."""
        return self.learn_row(record["t"], record["x"], record["y"], record["id"],
                              record["c"], snapshot, terms)

    def learn_row(self, t: float, x, y: float, ident, clock: float,
                  snapshot: bool = True, terms=None) -> dict:
        """Learn from a lab result already matched with its features ``x`` (tags order).

        The one path by which lab results change the model, live and in replay. Returns the
        ``fit/`` body; raises :class:`Rejected` (``frozen``, ``lab_out_of_order``,
        ``lab_too_old``, ``bad_x``) when nothing changed but the lab counter.

        A result drawn before the last one offered is learned as if it had come in
        drawn-time order: the learning state (posterior, detectors, last lab time) goes back
        to its snapshot from just before the first result drawn after it, then the late
        result and those after it are offered again in drawn-time order. Only the late
        result's fit is returned, marked ``"late": true``; its z is against the posterior
        before it in drawn-time order. The counters end as in drawn-time order. A result
        drawn at the time of one already offered is a duplicate (``lab_out_of_order``); one
        drawn at or before :attr:`lab_floor` (older than the results kept for re-ordering:
        the feature buffer's span, at most :data:`MAX_REWIND`) is ``lab_too_old``.

        ``snapshot=False`` (a replay that knows this result will be trimmed from
        :attr:`offered` before any later result is put before it) skips the snapshot taken
        for a rewind; nothing else changes. ``terms``: the basis of ``x``, when a replay
        has evaluated it already (the same bits).
        """
        self.n_lab += 1
        if self.frozen:
            raise Rejected("frozen", "learning is frozen")
        offered = self.offered
        k = len(offered)
        last = self.last_offered_t
        if last is not None and t <= last:
            k = self._place(t)
        phi = self.basis(np.asarray(x, dtype=float)) if terms is None else terms
        if not np.isfinite(phi).all():
            # finite readings far outside the range can overflow the basis
            raise Rejected("bad_x", f"the basis of the features at t={t!r} is not finite")
        if k == len(offered):
            step = self._offer(t, x, y, ident, clock, phi, snapshot)
            fit = self._fit(step, t, y, ident)
        else:
            fit = self._offer_late(k, t, x, y, ident, clock, phi)
        self._trim()
        self.last_fit = fit
        return fit

    def _place(self, t: float) -> int:
        """Where a result drawn at or before the last offered one goes among :attr:`offered`."""
        offered = self.offered
        k = bisect.bisect_left(offered, t, key=_drawn)
        if k < len(offered) and offered[k].t == t:
            raise Rejected("lab_out_of_order", f"t={t!r} is the sample time of a lab result "
                                               f"already offered (a duplicate)")
        floor = self.lab_floor
        if floor is None and not offered:
            floor = self.last_offered_t  # nothing kept to put it among
        if floor is not None and t <= floor:
            raise Rejected("lab_too_old", f"t={t!r} is not after {floor!r}, the oldest lab "
                                          f"time that late results can be put after")
        return k

    def _snapshot(self) -> tuple:
        # the detectors change in place; their state is kept as one msgpack string (as a
        # checkpoint holds it), not as dozens of lists and dicts per lab result that every
        # full garbage collection would visit (and, at hundreds of terms, a list per row
        # of a factor)
        return (self.post.snapshot(),
                None if self.monitor is None else wire.pack(self.monitor.to_state()),
                self.last_lab_t, self.last_offered_t)

    def _restore(self, snap: tuple) -> None:
        post, mon, self.last_lab_t, self.last_offered_t = snap
        self.post.restore(post)
        if mon is not None:
            self.monitor.load_state(wire.unpack(mon, len(mon)))

    def _offer(self, t: float, x, y: float, ident, clock: float, phi,
               snapshot: bool = True) -> object:
        """Offer one result to the posterior and the detectors; append it to :attr:`offered`."""
        entry = _Offered(t, x, y, ident, clock, self._snapshot() if snapshot else None)
        try:
            step = self.post.update(phi, y, t)
        except OutOfOrderError as exc:
            raise Rejected("lab_out_of_order", str(exc)) from None
        self.last_offered_t = t
        entry.accepted, entry.reason = step.accepted, step.reason
        if step.accepted:
            self.n_learned += 1
            self.last_lab_t = t
        else:
            self.rejected[step.reason] += 1
        if self.monitor is not None:
            self.alerts += self.monitor.on_lab(clock, step, x, self.post)
        self.offered.append(entry)
        return step

    def _offer_late(self, k: int, t: float, x, y: float, ident, clock: float, phi) -> dict:
        later = self.offered[k:]
        undo = (self._snapshot(), self.n_learned, Counter(self.rejected), len(self.alerts))
        self._restore(later[0].before)
        del self.offered[k:]
        for e in later:
            if e.accepted:
                self.n_learned -= 1
            else:
                self.rejected[e.reason] -= 1
                if not self.rejected[e.reason]:
                    del self.rejected[e.reason]
        try:
            step = self._offer(t, x, y, ident, clock, phi)
            fit = self._fit(step, t, y, ident)
            for e in later:
                # the detectors' clock (the feed's) does not go back: they see the results
                # offered again now
                self._offer(e.t, e.x, e.y, e.ident, max(e.clock, clock),
                            self.basis(np.asarray(e.x, dtype=float)))
        except BaseException:
            # nothing half done: back to the state before this result
            self._restore(undo[0])
            self.n_learned, self.rejected = undo[1], undo[2]
            del self.alerts[undo[3]:]
            self.offered[k:] = later
            raise
        self.n_late += 1
        fit["late"] = True
        if self.monitor is not None:
            fit["trust"] = self.monitor.state
        return fit

    def _fit(self, step, t: float, y: float, ident) -> dict:
        fit = {
            "t": t, "y": y, "pred_mean": step.mean, "pred_std": step.std,
            "resid": step.innovation, "z": step.z, "accepted": step.accepted,
            "reason": step.reason, "n": step.n_updates,
        }
        if ident is not None:
            fit["id"] = ident
        if self.monitor is not None:
            fit["trust"] = self.monitor.state
        adapted = self.post.adapted
        if adapted is not None:
            # the values in use after this result (noise.adaptive, forgetting.adapt_offset)
            if adapted["noise_std"] is not None:
                fit["noise_std"] = adapted["noise_std"]
            if adapted["rate"] is not None:
                fit["offset_q"] = adapted["rate"]
        return fit

    def _forget_offered(self) -> None:
        if self.offered:
            self.lab_floor = self.offered[-1].t
            self.offered = []

    def _trim(self) -> None:
        """Forget the offered results no late result can be put before."""
        offered = self.offered
        # a result the feature buffer can still match is drawn within its span of the
        # newest sample, hence of the last offered result
        horizon = self.last_offered_t - self.aligner.history_s
        n = 0
        while n < len(offered) and (len(offered) - n > MAX_REWIND or offered[n].t < horizon):
            n += 1
        if n:
            self.lab_floor = offered[n - 1].t
            del offered[:n]

    # ------------------------------------------------------------------ control
    def control(self, cmd: str, note: dict | None = None) -> None:
        """Apply a control action (:data:`CONTROLS`), live and in replay.

        Alert events it causes are queued on :attr:`alerts`. ``acknowledge`` needs the
        monitor (raises ValueError without one). ``note`` (``freeze`` and ``resume``) is
        the audit trail of the action, ``{"reason", "by", "at"}`` (``at``: wall-clock time
        of the request); it is kept as :attr:`learning_note`, shown by ``status`` and
        published as an ``action`` alert.
        """
        if cmd in ("freeze", "resume"):
            self.frozen = cmd == "freeze"
            note = _note(note)
            self.learning_note = {"action": cmd, **note}
            if self.monitor is not None:
                self.alerts.append({"t": self.last_x_t, "kind": "action", "action": cmd,
                                    "reason": note["reason"], "by": note["by"]})
        elif cmd == "reset":
            self.reset()
            if self.monitor is not None:
                self.alerts.append({"t": self.last_x_t, "kind": "reset",
                                    "state": self.monitor.state})
        elif cmd == "acknowledge":
            if self.monitor is None:
                raise ValueError(f"acknowledge needs the alerts of {self.name!r}, which are "
                                 f"disabled")
            self.alerts.append(self.monitor.acknowledge())
            # a rewind would undo the acknowledgement: late results go after it only
            self._forget_offered()
        else:
            raise ValueError(f"control action must be one of {CONTROLS}, got {cmd!r}")

    # ------------------------------------------------------------------ views
    def status(self) -> dict:
        p = self.post
        return {
            "target": self.cfg.target,
            "unit": self.cfg.unit,
            "updates": p.n_updates,
            "identified": p.identified,
            "frozen": self.frozen,
            "learning_note": self.learning_note,
            "last_lab_t": self.last_lab_t,
            "last_sample_t": self.last_x_t,
            "std": self.last_std,
            "mean": self.last_mean,
            "noise_std": math.sqrt(p.noise_var) if p.noise_var == p.noise_var else math.nan,
            "status": self._status_now(),
            "features": self.n_features,
            # the feature buffer: rows held and the bytes of its arrays (check-config's estimate)
            "buffer_rows": len(self.aligner),
            "buffer_bytes": self.aligner.nbytes,
            "predictions": self.n_predictions,
            "lab_results": self.n_lab,
            "learned": self.n_learned,
            "learned_late": self.n_late,
            "rejected": dict(self.rejected),
            "trust": self.trust,
            "reasons": [] if self.monitor is None else self.monitor.reasons(),
        }

    def _status_now(self) -> str:
        t = self.last_x_t
        if t is None:
            return "unidentified" if not self.post.identified else "stale"
        if self.delayed and self.aligner.lookup(t) is None:
            return "waiting"
        return self.status_at(t)

    def posterior(self) -> dict:
        p = self.post
        return {
            "target": self.cfg.target,
            "unit": self.cfg.unit,
            "terms": list(self.basis.names),
            "mean": p.mean.tolist(),
            "cov": p.cov.tolist(),
            "noise_var": p.noise_var,
            "dof": p.dof,
            "updates": p.n_updates,
            "t_last": p.t_last,
        }

    def operating_point(self, at: dict | None = None) -> tuple[np.ndarray, str, float | None]:
        """The input point sensitivities are taken at: ``(x, source, t)``.

        ``at`` ({tag: value}, each tag of the model) gives it; else the readings a lab sample
        drawn at the last sample time would be learned with (each input at ``t - dead
        time``), as the last prediction used them; else the centre of the instrument ranges.
        """
        if at is not None:
            missing = [tag for tag in self.tags if tag not in at]
            unknown = [tag for tag in at if tag not in self.index]
            if missing or unknown:
                raise ValueError(f"\"at\" must give every input of {self.name} "
                                 f"({', '.join(self.tags)}): missing {missing}, "
                                 f"unknown {unknown}")
            x = np.array([float(at[tag]) for tag in self.tags])
            if not np.isfinite(x).all():
                raise ValueError(f"\"at\" values must be finite numbers, got {at!r}")
            return x, "given", None
        t = self.last_x_t
        row = None if t is None else self.aligner.lookup(t)
        if row is not None and all(math.isfinite(v) for v in row):
            return np.array(row, dtype=float), "last sample", t
        centre = [(float(i.lo) + float(i.hi)) / 2.0 for i in self.cfg.inputs]
        return np.array(centre), "range centre", None

    def sensitivities(self, at: dict | None = None) -> dict:
        """dy/dx of the posterior mean model in engineering units, with its std.

        ``sensitivity[i] = w @ J[:, i]`` with ``J = basis.jacobian(x0)`` (target units per
        unit of input ``i``) and ``std[i] = sqrt(J[:, i]' C J[:, i])`` with the weights'
        posterior covariance ``C``; at the operating point of :meth:`operating_point`
        (it matters only for bases of degree 2 or more).
        """
        x0, source, t = self.operating_point(at)
        sens, std = [], []
        # nan or inf where the posterior is not identified yet, or a reading overflows
        with np.errstate(invalid="ignore", over="ignore"):
            J = self.basis.jacobian(x0)
            w = self.post.mean
            cov = self.post.cov
            for i in range(len(self.tags)):
                g = J[:, i]
                used = np.flatnonzero(g)
                sens.append(float(w[used] @ g[used]))
                var = float(g[used] @ cov[np.ix_(used, used)] @ g[used]) if used.size else 0.0
                std.append(math.sqrt(var) if var >= 0 else math.nan)
        degree = int(self.basis.exponents.sum(axis=1).max())
        return {"unit": self.cfg.unit, "inputs": list(self.tags), "sensitivity": sens,
                "std": std,
                "at": {"source": source, "t": t, "x": x0.tolist()},
                "depends_on_point": degree > 1}

    # ------------------------------------------------------------------ persistence
    def to_state(self) -> dict:
        """Everything needed to carry on after a restart, as plain data (with the config)."""
        al = self.aligner.to_state()
        return {
            "schema": RUNNER_SCHEMA,
            "config": self.cfg.to_state(),
            "fingerprint": self.cfg.fingerprint(),
            "posterior": self.post.to_state(),
            "monitor": None if self.monitor is None else self.monitor.to_state(),
            "aligner": al,
            "ids": [[k, float(t)] for k, t in self.ids.items()],
            "frozen": self.frozen,
            "learning_note": self.learning_note,
            "last_x_t": self.last_x_t,
            "last_seq": self.last_seq.get(None),
            "last_seqs": [[k, v] for k, v in self.last_seq.items() if k is not None],
            "last_lab_t": self.last_lab_t,
            "last_offered_t": self.last_offered_t,
            "last_fit": self.last_fit,
            "last_std": self.last_std,
            "last_mean": self.last_mean,
            "counters": {k: getattr(self, k) for k in _COUNTERS},
            "rejected": dict(self.rejected),
            "n_late": self.n_late,
            "lab_floor": self.lab_floor,
            "offered": [self._offered_state(e) for e in self.offered],
        }

    def _offered_state(self, e: _Offered) -> list:
        post, mon, last_lab_t, last_offered_t = e.before
        p = Posterior.__new__(type(self.post))
        p.restore(post)
        ps = p.to_state()
        del ps["config"]  # the model's posterior holds it
        if mon is not None:
            mon = wire.unpack(mon, len(mon))  # kept packed (see _snapshot)
        return [e.t, list(e.x), e.y, e.ident, e.clock, e.accepted, e.reason,
                {"posterior": ps, "monitor": mon, "last_lab_t": last_lab_t,
                 "last_offered_t": last_offered_t}]

    def _load_offered(self, state: dict) -> None:
        if "offered" not in state:
            # a state from before late results were re-ordered: they go after its last one
            self.lab_floor = self.last_offered_t
            return
        self.n_late = int(state["n_late"])
        floor = state["lab_floor"]
        self.lab_floor = None if floor is None else float(floor)
        cfg = state["posterior"]["config"]
        last = -math.inf
        for t, x, y, ident, clock, accepted, reason, before in state["offered"]:
            t = float(t)
            if not t > last:
                raise ValueError(f"offered lab results out of order at t={t!r}")
            last = t
            post = Posterior.from_state({**before["posterior"], "config": cfg})
            mon = before["monitor"]
            if (mon is None) != (self.monitor is None):
                raise ValueError("offered lab result with a monitor state that does not "
                                 "match the model's alerts")
            snap = (post.snapshot(), None if mon is None else wire.pack(mon),
                    before["last_lab_t"], before["last_offered_t"])
            e = _Offered(t, [float(v) for v in x], float(y), ident, float(clock), snap)
            e.accepted, e.reason = bool(accepted), str(reason)
            self.offered.append(e)

    @classmethod
    def from_state(cls, state: dict, name: str | None = None) -> ModelRunner:
        """Rebuild a runner from :meth:`to_state` (optionally under another ``name``).

        Raises ValueError when the state is not a runner state of this schema.
        """
        if not isinstance(state, dict) or state.get("schema") != RUNNER_SCHEMA:
            got = state.get("schema") if isinstance(state, dict) else type(state).__name__
            raise ValueError(f"model state schema must be {RUNNER_SCHEMA!r}, got {got!r}")
        try:
            cfg = ModelConfig.from_state(state["config"])
            if name is not None and name != cfg.name:
                cfg = replace(cfg, name=name)
            r = cls(cfg)
            fresh, r.post = r.post, Posterior.from_state(state["posterior"])
            if r.post.config() != fresh.config():
                raise ValueError("the posterior's settings differ from the model's config")
            r.aligner = Aligner.from_state(state["aligner"])
            if r.aligner.tags != r.tags:
                raise ValueError(f"the feature buffer has tags {r.aligner.tags}, the model "
                                 f"{r.tags}")
            if (state["monitor"] is None) != (r.monitor is None):
                raise ValueError("monitor state present without alerts, or missing with them")
            if r.monitor is not None:
                r.monitor.load_state(state["monitor"])
            r.ids = OrderedDict((k, float(t)) for k, t in state["ids"])
            r.frozen = bool(state["frozen"])
            # absent from states written before freeze took a reason
            note = state.get("learning_note")
            r.learning_note = None if note is None else {"action": str(note["action"]),
                                                         **_note(note)}
            r.last_x_t = state["last_x_t"]
            r.last_seq = {} if state["last_seq"] is None else {None: int(state["last_seq"])}
            for k, v in state.get("last_seqs", ()):
                r.last_seq[str(k)] = int(v)
            r.last_lab_t = state["last_lab_t"]
            r.last_offered_t = state["last_offered_t"]
            r.last_fit = state["last_fit"]
            r.last_std = float(state["last_std"])
            r.last_mean = float(state["last_mean"])
            for k in _COUNTERS:
                setattr(r, k, int(state["counters"][k]))
            r.rejected = Counter({str(k): int(v) for k, v in state["rejected"].items()})
            r._load_offered(state)
        except (KeyError, TypeError) as exc:
            raise ValueError(f"bad model state: {exc!r}") from None
        return r
