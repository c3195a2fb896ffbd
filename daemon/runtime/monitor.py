"""Per-model trust: the drift detectors of :mod:`recursive.detect` wired to one model.

A :class:`Monitor` is fed the outcome of every lab result and every batch of predictions,
keeps the detectors' state, and turns their verdicts into the reasons of a
:class:`recursive.detect.Trust` state machine (normal / caution / untrusted, with hysteresis).
It returns alert events for the service to publish; it does no I/O and reads no clock: the
time it is given is the feed's sample time.

Reasons and their levels (1 = caution, 2 = untrusted):

=====================  =====  ==========================================================
reason                 level  active when
=====================  =====  ==========================================================
``mean_shift``         2      the two-sided CUSUM on z signalled within the last ``hold``
                              lab results
``spread``             1      the spread CUSUM on z signalled within the last ``hold``
``miscalibrated``      1      the weighted coverage of the interval < ``coverage_min``
``rejections``         1      two or more consecutive same-sign gate rejections
``param_drift``        1      the weights moved more than ``drift_limit`` (Mahalanobis)
                              over ``drift_window``
``uncertainty``        2      predictive std > ``std_limit``
``uncertainty_ratio``  1      predictive std > ``std_ratio`` x its typical value
``stale``              1      no accepted lab result for ``stale_after`` (set, or derived
                              from the observed lab interval)
``extrapolation``      1      leverage phi'V phi > ``leverage_limit``
``outside_region``     1      inputs farther than ``region_limit`` (Mahalanobis) from those
                              learned on, once ``region_min_samples`` have been learned
``out_of_range``       1      an input outside its declared instrument range
=====================  =====  ==========================================================

A new model is first ``commissioning``: the detectors run and learn their baselines, but the
trust state is not advanced and no alert is raised, until ``commissioning_labs`` lab results
have been learned or ``commissioning_time`` has passed since its first sample. Then one
state event goes from ``commissioning`` to the state the active reasons give (often
``normal``). Until the learned input region has ``region_min_samples`` results, the region
is the instrument ranges: inputs outside them are ``out_of_range``.
"""

from __future__ import annotations

import math

import numpy as np

from recursive.detect import (
    Calibration,
    Commissioning,
    Cusum,
    InputRegion,
    LabInterval,
    ParamDrift,
    SpreadCusum,
    StdBaseline,
    Trust,
)

REASONS = ("mean_shift", "spread", "miscalibrated", "rejections", "param_drift", "uncertainty",
           "uncertainty_ratio", "stale", "extrapolation", "outside_region", "out_of_range")
STATES = ("normal", "caution", "untrusted")
COMMISSIONING = "commissioning"
# every trust a model publishes: the levels, and commissioning before they count
TRUST_STATES = (COMMISSIONING, *STATES)
# stale_after while the lab schedule is not known yet (and with alerts disabled)
STALE_FALLBACK = 12 * 3600.0
SCHEMA = 1
_MIN_CALIBRATION = 20
# the latest value of each statistic shown by view() and the metrics, before any is computed
_LAST = {"std_ratio": math.nan, "leverage": math.nan, "region": math.nan, "drift": math.nan,
         "kl": math.nan, "out_of_range": 0.0}


class Monitor:
    """Detectors and trust state of one model (see the module docstring)."""

    def __init__(self, cfg, basis):
        self.cfg = cfg
        self.basis = basis
        n_in = len(cfg.inputs)
        self.cusum = Cusum(cfg.cusum_k, cfg.cusum_h, cfg.head_start)
        self.spread = SpreadCusum(cfg.spread_sigma, cfg.spread_h)
        self.calibration = Calibration(cfg.calibration_half_life, cfg.level)
        self.std = StdBaseline(cfg.std_half_life, limit_abs=cfg.std_limit,
                               ratio=cfg.std_ratio if cfg.std_ratio > 0 else None)
        self.region = InputRegion(n_in, cfg.region_half_life,
                                  cfg.region_limit if cfg.region_limit > 0 else 1.0,
                                  min_count=cfg.region_min_samples)
        self.drift = ParamDrift(cfg.drift_window)
        self.trust = Trust(STATES, cfg.clear_count, cfg.clear_time)
        self.commissioning = Commissioning(cfg.commissioning_labs, cfg.commissioning_time)
        self.lab_interval = LabInterval()
        self._clear_views()

    def _clear_views(self) -> None:
        self.labs_since_shift: int | None = None
        self.labs_since_spread: int | None = None
        self.lab_active: dict = {}
        self.pred_active: dict = {}
        self.last = dict(_LAST)
        self.clock: float | None = None
        # the last ParamDrift step, whose KL is computed on request (view)
        self._drift_step = None
        self._stale_after = self._derive_stale_after()

    def reset(self) -> None:
        """Forget all detector state (with the model's reset)."""
        for d in (self.cusum, self.spread, self.calibration, self.std, self.region, self.drift,
                  self.trust, self.commissioning, self.lab_interval):
            d.reset()
        self._clear_views()

    @property
    def state(self) -> str:
        """The trust published: ``commissioning``, or the trust state's level."""
        return COMMISSIONING if self.commissioning.active else self.trust.state

    @property
    def stale_after(self) -> float:
        """The age of the last accepted lab result beyond which the model is stale."""
        return self._stale_after

    def _derive_stale_after(self) -> float:
        cfg = self.cfg
        if cfg.stale_after is not None:
            return float(cfg.stale_after)
        return self.lab_interval.stale_after(cfg.stale_factor, cfg.stale_min, cfg.stale_max,
                                             STALE_FALLBACK)

    # ------------------------------------------------------------------ events
    def on_lab(self, clock: float, step, x, post) -> list[dict]:
        """After a lab result was offered to the posterior (accepted or gated)."""
        cfg = self.cfg
        events: list[dict] = []
        act = self.lab_active
        if step.t is not None and math.isfinite(step.t):
            self.lab_interval.update(step.t, max(clock, step.t))
            self._stale_after = self._derive_stale_after()
        run = abs(step.reject_run)
        if run >= 2:
            act["rejections"] = (1, float(run), 2.0)
        else:
            act.pop("rejections", None)
        if step.accepted and math.isfinite(step.z):
            c = self.cusum.step(step.z)
            if self.labs_since_shift is not None:
                self.labs_since_shift += 1
            if c.signal:
                self.labs_since_shift = 0
                act["mean_shift"] = (2, max(c.upper, c.lower) if max(c.upper, c.lower) > 0
                                     else cfg.cusum_h, cfg.cusum_h)
                if cfg.auto_flatten:
                    post.flatten(cfg.flatten_keep)
                    events.append({"t": clock, "kind": "action", "action": "flatten",
                                   "keep": cfg.flatten_keep, "reason": "mean_shift",
                                   "direction": int(c.signal)})
            elif self.labs_since_shift is not None and self.labs_since_shift >= cfg.hold:
                act.pop("mean_shift", None)
                self.labs_since_shift = None
            s = self.spread.step(step.z)
            if self.labs_since_spread is not None:
                self.labs_since_spread += 1
            if s.signal:
                self.labs_since_spread = 0
                act["spread"] = (1, cfg.spread_h, cfg.spread_h)
            elif self.labs_since_spread is not None and self.labs_since_spread >= cfg.hold:
                act.pop("spread", None)
                self.labs_since_spread = None
            # a t predictive with dof <= 1 has no CRPS (a young model with an uninformative
            # noise prior): such results are not scored, and the verdict stays as it was
            if step.dof > 1.0:
                cal = self.calibration.step(step.y, step.mean, step.scale, step.dof)
                if (self.calibration.count >= _MIN_CALIBRATION
                        and cal.coverage < cfg.coverage_min):
                    act["miscalibrated"] = (1, cal.coverage, cfg.coverage_min)
                else:
                    act.pop("miscalibrated", None)
            if math.isfinite(step.std):
                self.std.step(step.std, learn=True)
        if step.accepted:
            self.region.update(np.asarray(x, dtype=float))
            if post.identified:
                # from the posterior's own square-root factor: no covariance, no Cholesky;
                # the KL is computed when the detectors view asks for it
                d = self.drift.step_sqrt(clock, post.mean, post.sqrt_information,
                                         post.noise_var)
                self.last["drift"], self.last["kl"] = d.mahalanobis, math.nan
                self._drift_step = d
                if cfg.drift_limit > 0 and d.mahalanobis > cfg.drift_limit:
                    act["param_drift"] = (1, d.mahalanobis, cfg.drift_limit)
                else:
                    act.pop("param_drift", None)
        return events + self._evaluate(clock, 1 if step.accepted else 0)

    def on_predictions(self, clock: float, X: np.ndarray, std: np.ndarray,
                       leverage: np.ndarray, last_lab_t: float | None) -> list[dict]:
        """After the predictions of one block message (rows ``X`` of raw inputs): one step.

        The block is judged by its last std, its largest leverage and distance, and the
        number of its rows out of range.
        """
        cfg = self.cfg
        lev = float(leverage.max()) if len(leverage) else math.nan
        dist = None
        if cfg.region_limit > 0 and self.region.ready:
            # row by row (the bits of a row's distance do not depend on the others), so
            # that blocks checked together (block_checks) are judged as each alone
            dist = float(self.region.distances(X, rowwise=True).max())
        return self._pred_step(clock, float(std[-1]), lev, dist,
                               self.basis.rows_out_of_range(X), last_lab_t)

    def block_checks(self, X: np.ndarray, leverage: np.ndarray, starts: list) -> list:
        """What :meth:`on_predictions` judges each block by, for several blocks at once.

        ``X`` and ``leverage`` are the rows of consecutive blocks, block ``i`` starting at
        row ``starts[i]`` (every block at least one row). Returns ``(largest leverage,
        largest distance or None, rows out of range)`` per block, the values
        :meth:`on_predictions` would compute for each block alone (same bits: maxima and
        counts of row-by-row values), for :meth:`on_block`.
        """
        lev = np.maximum.reduceat(leverage, starts).tolist()
        if self.cfg.region_limit > 0 and self.region.ready:
            dist = np.maximum.reduceat(self.region.distances(X, rowwise=True),
                                       starts).tolist()
        else:
            dist = [None] * len(starts)
        flags = self.basis.rows_out_of_range_flags(X)
        if flags is None:
            outside = [0] * len(starts)
        else:
            # sums of ones and zeros: exact
            outside = [int(v) for v in np.add.reduceat(flags, starts).tolist()]
        return list(zip(lev, dist, outside, strict=True))

    def on_block(self, clock: float, s_last: float, checks: tuple,
                 last_lab_t: float | None) -> list[dict]:
        """:meth:`on_predictions` of a block whose ``checks`` (:meth:`block_checks`) are
        known: ``s_last`` is the std of its last row."""
        lev, dist, outside = checks
        return self._pred_step(clock, s_last, lev, dist, outside, last_lab_t)

    def _pred_step(self, clock: float, s_last: float, lev: float, dist: float | None,
                   outside: int, last_lab_t: float | None) -> list[dict]:
        """One detector step on predictions: the reasons they make active, then trust."""
        cfg = self.cfg
        act = self.pred_active
        act.clear()
        if math.isfinite(s_last):
            ratio, too_abs, too_ratio = self.std.judge(s_last)
            self.last["std_ratio"] = ratio
            if too_abs:
                act["uncertainty"] = (2, s_last, cfg.std_limit)
            if too_ratio:
                act["uncertainty_ratio"] = (1, ratio, cfg.std_ratio)
        elif s_last == math.inf:
            # a t predictive with dof <= 2 has no finite variance: it is above any limit, and
            # above any multiple of a baseline (a model that forgot nearly everything)
            if cfg.std_limit is not None:
                act["uncertainty"] = (2, s_last, cfg.std_limit)
            if cfg.std_ratio > 0 and math.isfinite(self.std.baseline):
                self.last["std_ratio"] = math.inf
                act["uncertainty_ratio"] = (1, math.inf, cfg.std_ratio)
        self.last["leverage"] = lev
        if cfg.leverage_limit > 0 and lev > cfg.leverage_limit:
            act["extrapolation"] = (1, lev, cfg.leverage_limit)
        if dist is not None:
            self.last["region"] = dist
            if dist > cfg.region_limit:
                act["outside_region"] = (1, dist, cfg.region_limit)
        self.last["out_of_range"] = float(outside)
        if outside:
            act["out_of_range"] = (1, float(outside), 0.0)
        stale = self._stale_after
        if last_lab_t is not None and clock - last_lab_t > stale:
            act["stale"] = (1, clock - last_lab_t, stale)
        return self._evaluate(clock)

    def on_prediction_rows(self, ts, X: np.ndarray, std: np.ndarray, leverage: np.ndarray,
                           last_lab_t: float | None) -> tuple[list | None, list]:
        """One step for each row in turn, as if each had come in a message of its own.

        Single-sample messages get one detector step each, whatever wake-up they were taken
        in, so the trust published with them is a function of the feed alone: every value a
        row's step uses is computed from that row only (elementwise, never a product over
        the batch). Returns ``(trust, marks)``: the trust state after each row (None when it
        is the same for all rows, i.e. the current state) and ``[(row, events)]`` for rows
        after which events were raised.

        The common batch has nothing active in any row and no reason held; then a step
        changes nothing but the latest statistics, and only the last row is stepped.
        """
        cfg = self.cfg
        k = len(ts)
        dist = None
        if cfg.region_limit > 0 and self.region.ready:
            dist = self.region.distances(X, rowwise=True)
        outside = self.basis.out_of_range(X).any(axis=1)
        if k > 1 and self._quiet_rows(ts, std, leverage, dist, outside, last_lab_t):
            ev = self._pred_step(ts[-1], float(std[-1]), float(leverage[-1]),
                                 None if dist is None else float(dist[-1]),
                                 int(outside[-1]), last_lab_t)
            assert not ev  # _quiet_rows promised that nothing changes
            return None, []
        std_l, lev_l = std.tolist(), leverage.tolist()
        dist_l = None if dist is None else dist.tolist()
        out_l = outside.tolist()
        trust, marks = [], []
        # rows that make nothing active, while reasons are held (a model in caution): their
        # steps only count the reasons' absence (`Trust.advance_quiet`), and a run of them
        # but its last row is taken at once; the last is stepped as usual (it leaves the
        # latest statistics), as is every row at which a held reason clears
        held = (k > 2 and not self.lab_active and not self.commissioning.active
                and (self.clock is None or ts[0] >= self.clock))
        quiet = self._quiet_each(ts, std, leverage, dist, outside, last_lab_t) if held \
            else None
        i = 0
        while i < k:
            # (with nothing held a step does not advance the trust at all: see _evaluate)
            if quiet is not None and quiet[i] and self.trust.level:
                j = i + 1
                while j < k and quiet[j]:
                    j += 1
                if j - i > 1:
                    n = self.trust.advance_quiet(ts[i:j - 1])
                    if n:
                        self.clock = ts[i + n - 1]
                        self.pred_active.clear()
                        trust += [self.state] * n
                        i += n
                        continue
            ev = self._pred_step(ts[i], std_l[i], lev_l[i],
                                 None if dist_l is None else dist_l[i], int(out_l[i]),
                                 last_lab_t)
            if ev:
                marks.append((i, ev))
            trust.append(self.state)
            i += 1
        return trust, marks

    def _quiet_each(self, ts, std, leverage, dist, outside, last_lab_t) -> list:
        """For each row, whether its step makes no reason active (`_pred_step`'s tests,
        elementwise)."""
        cfg = self.cfg
        with np.errstate(invalid="ignore", divide="ignore"):
            q = np.isfinite(std) & ~outside
            if cfg.std_limit is not None:
                q &= ~(std > cfg.std_limit)
            if cfg.std_ratio > 0:
                q &= ~(std / self.std.baseline > cfg.std_ratio)
            if cfg.leverage_limit > 0:
                q &= ~(leverage > cfg.leverage_limit)
            if dist is not None:
                q &= ~(dist > cfg.region_limit)
            if last_lab_t is not None:
                q &= ~(np.asarray(ts, dtype=float) - last_lab_t > self._stale_after)
        return q.tolist()

    def on_prediction_row(self, t: float, x: list, std: float, leverage: float,
                          last_lab_t: float | None) -> tuple[list, list]:
        """:meth:`on_prediction_rows` of one row (``x`` the raw inputs as floats), in plain
        float arithmetic: the same values, bit for bit, and the same step."""
        cfg = self.cfg
        dist = None
        if cfg.region_limit > 0 and self.region.ready:
            dist = self.region.distance_row(x)
        ev = self._pred_step(t, std, leverage, dist, int(self.basis.row_out_of_range(x)),
                             last_lab_t)
        return [self.state], [(0, ev)] if ev else []

    def on_prediction_few(self, ts: list, xs: list, std: list, leverage: list,
                          last_lab_t: float | None) -> tuple[list | None, list]:
        """:meth:`on_prediction_rows` of a few rows given as lists of floats (``xs`` the raw
        inputs), in plain float arithmetic: the same values, bit for bit, the same steps, and
        the same shortcut for quiet rows (only the last is stepped; the trust is then None,
        the current state for all rows)."""
        k = len(ts)
        if k == 1:
            return self.on_prediction_row(ts[0], xs[0], std[0], leverage[0], last_lab_t)
        dist = None
        if self.cfg.region_limit > 0 and self.region.ready:
            row = self.region.distance_row
            dist = [row(x) for x in xs]
        oor = self.basis.row_out_of_range
        outside = [int(oor(x)) for x in xs]
        step = self._pred_step
        if self._quiet_few(ts, std, leverage, dist, outside, last_lab_t):
            ev = step(ts[-1], std[-1], leverage[-1], None if dist is None else dist[-1],
                      outside[-1], last_lab_t)
            assert not ev  # _quiet_few promised that nothing changes
            return None, []
        trust, marks = [], []
        for j in range(k):
            ev = step(ts[j], std[j], leverage[j], None if dist is None else dist[j],
                      outside[j], last_lab_t)
            if ev:
                marks.append((j, ev))
            trust.append(self.state)
        return trust, marks

    def _quiet_held(self, ts) -> bool:
        """Whether the state allows the quiet shortcut for rows at ``ts``: nothing active or
        held, and no commissioning step that matters (its start set by the first row, or its
        end within these rows)."""
        if self.lab_active or self.trust.level or self.trust.holding:
            return False
        com = self.commissioning
        if com.active:
            if com.start is None:
                return False  # the first row's time starts it: step them one by one
            duration = com.duration
            if duration and ts[-1] - com.start >= duration:
                return False  # commissioning may end within these rows
        return True

    def _quiet_few(self, ts, std, leverage, dist, outside, last_lab_t) -> bool:
        """:meth:`_quiet_rows` of lists of floats (``outside`` counts per row)."""
        if not self._quiet_held(ts):
            return False
        total = sum(std)
        if total - total != 0.0:
            return False  # inf or nan rows: rare, step them one by one
        lim = self.cfg.region_limit
        # finite stds mean no nan leverage (the std grows with it): the largest decides
        return self._quiet_tops(ts[-1], max(std), max(leverage),
                                dist is not None and any(v > lim for v in dist),
                                any(outside), last_lab_t)

    def _quiet_rows(self, ts, std, leverage, dist, outside, last_lab_t) -> bool:
        """True if no row would make a reason active and none is active or held now."""
        if not self._quiet_held(ts):
            return False
        if not np.isfinite(std).all():
            return False  # inf or nan rows: rare, take the row-by-row path
        return self._quiet_tops(ts[-1], float(std.max()), float(leverage.max()),
                                dist is not None and bool((dist > self.cfg.region_limit).any()),
                                bool(outside.any()), last_lab_t)

    def _quiet_tops(self, t_last: float, top: float, top_leverage: float, far: bool,
                    outside: bool, last_lab_t: float | None) -> bool:
        """Whether rows of finite stds up to ``top`` and leverages up to ``top_leverage``,
        the last at ``t_last``, make no reason active (``far``: a row outside the learned
        region, ``outside``: one out of range)."""
        cfg = self.cfg
        if cfg.std_limit is not None and top > cfg.std_limit:
            return False
        if cfg.std_ratio > 0:
            # a division by the same positive baseline is monotone: the largest std decides
            base = self.std.baseline
            if math.isfinite(base) and top / base > cfg.std_ratio:
                return False
        if cfg.leverage_limit > 0 and top_leverage > cfg.leverage_limit:
            return False
        if far or outside:
            return False
        return not (last_lab_t is not None and t_last - last_lab_t > self._stale_after)

    def _evaluate(self, clock: float, learned: int = 0) -> list[dict]:
        if self.clock is not None and clock < self.clock:
            clock = self.clock  # lab results carry older sample times; the clock never goes back
        self.clock = clock
        if self.commissioning.active:
            if not self.commissioning.step(clock, learned):
                return []  # the detectors learn; their verdicts do not count yet
            # commissioning ended: the reasons active now set the first trust state
            self.trust.advance(clock, {**self.lab_active, **self.pred_active}, checked=True)
            trust = self.trust
            return [{"t": clock, "kind": "state", "old": COMMISSIONING, "new": trust.state,
                     "reasons": _reasons(trust.reasons), "acknowledged": trust.acknowledged}]
        if not self.lab_active and not self.pred_active and self.trust.level == 0 \
                and not self.trust.holding:
            return []  # nothing active and nothing held: a trust step would change nothing
        active = {**self.lab_active, **self.pred_active}
        # the entries are built here as (int, float, float): no need to validate them again
        old = self.trust.level
        if not self.trust.advance(clock, active, checked=True):
            return []
        trust = self.trust
        return [{"t": clock, "kind": "state", "old": STATES[old], "new": trust.state,
                 "reasons": _reasons(trust.reasons), "acknowledged": trust.acknowledged}]

    def acknowledge(self) -> dict:
        self.trust.acknowledge()
        return {"t": self.clock, "kind": "ack", "state": self.state}

    # ------------------------------------------------------------------ views
    def reasons(self) -> list[dict]:
        return _reasons(self.trust.reasons)

    def view(self) -> dict:
        """Detector statistics and the trust state, for the control socket."""
        cal = self.calibration
        com = self.commissioning
        return {
            "state": self.state,
            "reasons": self.reasons(),
            "commissioning": {"active": com.active, "learned": com.learned,
                              **({"remaining": com.remaining(self.clock)}
                                 if com.active and self.clock is not None else {})},
            "stale_after": self._stale_after,
            "stale_after_source": "config" if self.cfg.stale_after is not None else (
                "lab interval" if self.lab_interval.count >= LabInterval.MIN_INTERVALS
                else "default until the lab interval is known"),
            "lab_interval": {"interval": self.lab_interval.interval,
                             "delay": self.lab_interval.delay},
            "region": "learned" if self.region.ready else "instrument ranges",
            "cusum": {k: v for k, v in self.cusum.to_state().items()
                      if k in ("upper", "lower", "run_length")} | self.cusum.params(),
            "spread": {"statistic": self.spread.statistic, **self.spread.params()},
            "calibration": {"count": cal.count, **_calibration_means(cal)},
            "std": {"baseline": self.std.baseline, "ratio": self.last["std_ratio"]},
            "leverage": self.last["leverage"],
            "region_distance": self.last["region"],
            "param_drift": {"mahalanobis": self.last["drift"], "kl": self.kl},
            "out_of_range_rows": self.last["out_of_range"],
        }

    @property
    def kl(self) -> float:
        """KL divergence of the weight posterior from the drift reference, at the last lab
        result (computed now, on request; nan after a restore until the next result)."""
        d = self._drift_step
        return self.last["kl"] if d is None else d.kl

    def to_state(self) -> dict:
        # ``last["kl"]`` is never computed for the state (only on request, by view()), so
        # the state does not depend on whether the view was asked for
        return {
            "schema": SCHEMA,
            "cusum": self.cusum.to_state(), "spread": self.spread.to_state(),
            "calibration": self.calibration.to_state(), "std": self.std.to_state(),
            "region": self.region.to_state(), "drift": self.drift.to_state(),
            "trust": self.trust.to_state(),
            "commissioning": self.commissioning.to_state(),
            "lab_interval": self.lab_interval.to_state(),
            "labs_since_shift": self.labs_since_shift, "labs_since_spread": self.labs_since_spread,
            "lab_active": {k: list(v) for k, v in self.lab_active.items()},
            # the last batch's verdicts stay active until the next batch; without them a lab
            # result right after a restore would count those reasons as gone
            "pred_active": {k: list(v) for k, v in self.pred_active.items()},
            "last": dict(self.last),
            "clock": self.clock,
        }

    def load_state(self, d: dict) -> None:
        if d.get("schema") != SCHEMA:
            raise ValueError(f"monitor state schema must be {SCHEMA}, got {d.get('schema')!r}")
        self.cusum = Cusum.from_state(d["cusum"])
        self.spread = SpreadCusum.from_state(d["spread"])
        self.calibration = Calibration.from_state(d["calibration"])
        self.std = StdBaseline.from_state(d["std"])
        self.region = InputRegion.from_state(d["region"])
        self.drift = ParamDrift.from_state(d["drift"])
        self.trust = Trust.from_state(d["trust"])
        if "commissioning" in d:
            self.commissioning = Commissioning.from_state(d["commissioning"])
        else:  # a model that ran before commissioning existed is past it
            self.commissioning = Commissioning(self.cfg.commissioning_labs,
                                               self.cfg.commissioning_time)
            self.commissioning.end()
        self.lab_interval = (LabInterval.from_state(d["lab_interval"]) if "lab_interval" in d
                             else LabInterval())
        self.labs_since_shift = d["labs_since_shift"]
        self.labs_since_spread = d["labs_since_spread"]
        self.lab_active = {k: (int(v[0]), float(v[1]), float(v[2]))
                           for k, v in d["lab_active"].items()}
        # states written before these two keys existed restore as after a prediction-free start
        self.pred_active = {k: (int(v[0]), float(v[1]), float(v[2]))
                            for k, v in d.get("pred_active", {}).items()}
        last = d.get("last", {})
        self.last = {k: float(last.get(k, v)) for k, v in _LAST.items()}
        self.clock = d["clock"]
        self._drift_step = None
        self._stale_after = self._derive_stale_after()


def _reasons(reasons) -> list[dict]:
    return [{"name": n, "level": STATES[lvl], "value": v, "limit": lim}
            for n, lvl, v, lim in reasons]


def _calibration_means(cal: Calibration) -> dict:
    st = cal.to_state()
    w = st["weight_sum"]
    if not w > 0:
        return {"coverage": math.nan, "log_score": math.nan, "crps": math.nan}
    return {"coverage": st["covered_sum"] / w, "log_score": st["log_score_sum"] / w,
            "crps": st["crps_sum"] / w}
