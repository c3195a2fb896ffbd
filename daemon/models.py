"""One configured model at run time: its posterior, its feature buffer, its counters.

A :class:`ModelRunner` is driven by the service loop with already-decoded values; it does
no I/O. Predictions are computed in vectorized batches; lab results are matched to the
buffered features of the time the sample was drawn and learned one at a time.
"""

from __future__ import annotations

import math
from collections import Counter, OrderedDict
from dataclasses import dataclass

import numpy as np

from daemon.historian import Aligner
from daemon.monitor import Monitor
from recursive import OutOfOrderError

STATUSES = ("unidentified", "learning", "frozen", "stale")


class Rejected(Exception):
    """A sample or lab result that is counted and logged but not used."""

    def __init__(self, reason: str, detail: str):
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail


@dataclass(frozen=True)
class PredBatch:
    """Predictions for a run of feature samples of one model."""

    t: np.ndarray
    ids: list
    mean: np.ndarray
    std: np.ndarray
    var: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    dof: np.ndarray
    status: list


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
        dead = [float(i.dead_time) for i in cfg.inputs]
        history = max(cfg.keep, max(dead) + cfg.tolerance)
        self.aligner = Aligner(self.tags, dead, history, tolerance_s=cfg.tolerance,
                               max_rows=cfg.keep_count)
        self.ids: OrderedDict = OrderedDict()
        self.monitor = Monitor(cfg, self.basis) if cfg.alerts else None
        # alert events waiting to be published by the service
        self.alerts: list[dict] = []
        self.frozen = False
        self.last_x_t: float | None = None
        self.last_seq: int | None = None
        # snapshot for the metrics collector and the status command
        self.last_std = math.nan
        self.last_mean = math.nan
        self.last_lab_t: float | None = None
        self.last_fit: dict | None = None
        # event counters (exported by the collector at scrape time)
        self.n_features = 0
        self.n_predictions = 0
        self.n_lab = 0
        self.n_learned = 0
        self.n_gaps = 0
        self.n_lost = 0
        self.rejected: Counter = Counter()

    # ------------------------------------------------------------------ config
    def reconfigure(self, cfg) -> None:
        """Apply a reloaded config whose learning settings are unchanged."""
        self.cfg = cfg

    def reset(self) -> None:
        """Back to the configured prior; buffered features are kept, detectors cleared."""
        self.post.reset()
        self.last_lab_t = None
        self.last_fit = None
        if self.monitor is not None:
            self.monitor.reset()

    @property
    def trust(self) -> str | None:
        return None if self.monitor is None else self.monitor.state

    # ------------------------------------------------------------------ feed
    def note_seq(self, seq: int | None) -> None:
        """Count gaps in a publisher's sequence numbers (PUB/SUB drops silently)."""
        if seq is None:
            return
        if self.last_seq is not None and seq > self.last_seq + 1:
            self.n_gaps += 1
            self.n_lost += seq - self.last_seq - 1
        self.last_seq = seq

    def add_features(self, t: float, row: list, ident) -> None:
        """Buffer one feature sample; raises :class:`Rejected` when out of order."""
        if self.last_x_t is not None:
            if t < self.last_x_t:
                raise Rejected("out_of_order", f"t={t!r} before the last sample {self.last_x_t!r}")
            if t == self.last_x_t:
                raise Rejected("duplicate", f"second sample at t={t!r}")
        self.last_x_t = t
        self.n_features += 1
        # a tuple of floats drops out of the cyclic GC's sight, which keeps collections short
        self.aligner.push_trusted(t, tuple(row))
        if ident is not None:
            self._remember_id(ident, t)

    def _remember_id(self, ident, t: float) -> None:
        self.ids[ident] = t
        while len(self.ids) > self.cfg.keep_count:
            self.ids.popitem(last=False)

    def add_block(self, ts: list, X: np.ndarray, ids: list | None, increasing: bool) -> bool:
        """Buffer a block of samples at once if its times are increasing and new.

        Returns False (nothing done) otherwise; the caller then adds the rows one by one so
        that each bad row is rejected on its own.
        """
        if not increasing:
            return False
        if self.last_x_t is not None and ts[0] <= self.last_x_t:
            return False
        self.last_x_t = ts[-1]
        self.n_features += len(ts)
        self.aligner.push_many_trusted(ts, list(X))
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
        if self.last_lab_t is None or t - self.last_lab_t > self.cfg.stale_after:
            return "stale"
        return "learning"

    def predict(self, ts: list, rows, ids: list) -> PredBatch:
        """Vectorized predictions for feature samples already buffered."""
        t = np.asarray(ts, dtype=float)
        X = np.asarray(rows, dtype=float)
        Phi = self.basis(X)
        pred = self.post.predict(Phi, t=t)
        if self.monitor is not None:
            self.alerts += self.monitor.on_predictions(ts[-1], X, pred.std, pred.leverage,
                                                       self.last_lab_t)
        lo, hi = pred.interval(self.cfg.level)
        if not self.post.identified or self.frozen or self.last_lab_t is None:
            status = [self.status_at(ts[0])] * len(ts)
        elif ts[-1] - self.last_lab_t <= self.cfg.stale_after:
            status = ["learning"] * len(ts)
        else:
            status = np.where(t - self.last_lab_t > self.cfg.stale_after, "stale",
                              "learning").tolist()
        self.n_predictions += len(ts)
        self.last_mean = float(pred.mean[-1])
        self.last_std = float(pred.std[-1])
        return PredBatch(t, ids, pred.mean, pred.std, pred.var, lo, hi, pred.dof, status)

    # ------------------------------------------------------------------ lab
    def learn(self, t: float, y: float, ident) -> dict:
        """Match a lab result to its features and learn from it.

        Returns the ``fit/`` message body; raises :class:`Rejected` when the result cannot
        be used at all (no features, out of order).
        """
        self.n_lab += 1
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
        if self.frozen:
            raise Rejected("frozen", "learning is frozen")
        phi = self.basis(np.asarray(x, dtype=float))
        if not np.isfinite(phi).all():
            # finite readings far outside the range can overflow the basis
            raise Rejected("bad_x", f"the basis of the features at t={t!r} is not finite")
        try:
            step = self.post.update(phi, y, t)
        except OutOfOrderError as exc:
            raise Rejected("lab_out_of_order", str(exc)) from None
        if step.accepted:
            self.n_learned += 1
            self.last_lab_t = t
        else:
            self.rejected[step.reason] += 1
        if self.monitor is not None:
            clock = t if self.last_x_t is None else max(t, self.last_x_t)
            self.alerts += self.monitor.on_lab(clock, step, x, self.post)
        fit = {
            "t": t, "y": y, "pred_mean": step.mean, "pred_std": step.std,
            "resid": step.innovation, "z": step.z, "accepted": step.accepted,
            "reason": step.reason, "n": step.n_updates,
        }
        if ident is not None:
            fit["id"] = ident
        if self.monitor is not None:
            fit["trust"] = self.monitor.state
        self.last_fit = fit
        return fit

    # ------------------------------------------------------------------ views
    def status(self) -> dict:
        p = self.post
        return {
            "updates": p.n_updates,
            "identified": p.identified,
            "frozen": self.frozen,
            "last_lab_t": self.last_lab_t,
            "last_sample_t": self.last_x_t,
            "std": self.last_std,
            "mean": self.last_mean,
            "noise_std": math.sqrt(p.noise_var) if p.noise_var == p.noise_var else math.nan,
            "status": self.status_at(self.last_x_t) if self.last_x_t is not None else (
                "unidentified" if not p.identified else "stale"),
            "features": self.n_features,
            "predictions": self.n_predictions,
            "lab_results": self.n_lab,
            "learned": self.n_learned,
            "rejected": dict(self.rejected),
            "trust": self.trust,
            "reasons": [] if self.monitor is None else self.monitor.reasons(),
        }

    def posterior(self) -> dict:
        p = self.post
        return {
            "terms": list(self.basis.names),
            "mean": p.mean.tolist(),
            "cov": p.cov.tolist(),
            "noise_var": p.noise_var,
            "dof": p.dof,
            "updates": p.n_updates,
            "t_last": p.t_last,
        }
