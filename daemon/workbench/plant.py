"""Simulator of an invented process unit: the "C-301 solvent-recovery column".

Everything here is simulated data from a fictitious unit, not plant data. The site, the column,
the tag names and the coefficients are made up so that the daemon, the backtest and the tests
have a realistic-looking stream to work on.

Inputs (sampled every ``sample_period_s``, one minute by default):

========  =======================  ==============
tag       meaning                  usual range
========  =======================  ==============
TI-104    tray temperature, degC   95 .. 125
FI-201    reflux flow, t/h         8 .. 20
PI-110    top pressure, barg       0.8 .. 1.6
AI-305    feed solvent, %wt        2 .. 8
========  =======================  ==============

Target ``AX-350``: residual solvent in the bottoms product, ppm (roughly 50 .. 400), measured by
the lab every few hours. A sample is drawn at time t and its result is reported 1 to 3 hours
later.

True relation. Each input is scaled to ``z_i = (x_i - CENTERS[i]) / SCALES[i]`` (about -1 .. 1
over the usual range) and the target is ``y = sum_j coef_j(t) * phi_j(z)`` with the basis
``phi = (1, zT, zF, zP, zA, zT**2, zT*zA)`` (see `basis` and `COEF_NAMES`), so the coefficients
are in ppm. Hotter trays strip more solvent (negative ``zT`` term, flattening through ``zT**2``),
more reflux, higher pressure and richer feed leave more solvent in the bottoms. Over time:

* fouling adds ``fouling_ppm_per_day`` per day to coefficient ``fouling_coef`` (the intercept by
  default): linear in time;
* an optional feed-grade change at ``step_day`` adds ``step_size`` to coefficient ``step_coef``
  (the ``zA`` term by default) and moves the AI-305 operating level by ``step_feed_shift`` %wt;
* lab results are the noise-free value at the drawn time plus Gaussian noise (sd
  ``lab_noise_ppm``), rounded to ``lab_resolution_ppm`` and floored at 0 ppm;
* optional lab outage (no sample drawn or reported between two days), optional blunders (a
  decimal point in the wrong place or two digits swapped), optional TI-104 excursion above its
  range for ``excursion_hours``;
* an optional unmeasured disturbance ``offset`` (ppm) added to the intercept: an AR(1) process
  on the sample grid with stationary sd ``offset_sd_ppm`` and time constant ``offset_tau_h``
  (``o[n] = a o[n-1] + offset_sd_ppm sqrt(1 - a^2) e[n]``, ``a = exp(-dt / tau)``, started
  from its stationary law), plus a random walk of ``offset_walk_ppm`` per square-root day. It
  stands for the feed components no analyzer sees: it moves the target, no input shows it;
* optional lab/analyzer zero drift ``lab_zero`` (ppm) added to the reported values only, not
  to the truth: a random walk of ``zero_walk_ppm`` per square-root day plus a ramp of
  ``zero_ramp_ppm_per_day``, both starting at 0;
* optional slow lab results: a share ``lab_slow_share`` of the results is reported after a
  delay drawn from ``lab_slow_delay_h`` instead of ``lab_delay_h``, so results arrive late and
  out of drawn-time order.

The disturbance, the zero drift and the slow results draw from random streams of their own
(seeded from ``seed``), so switching them on leaves the inputs, the lab schedule, the lab noise
and the blunders of a scenario exactly as they were.

Inputs move as Ornstein-Uhlenbeck processes (correlated across inputs) around operating points
which jump now and then (setpoint moves, feed changes) and are followed through a first-order lag.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import asdict, dataclass, field, fields

import numpy as np
from scipy.signal import lfilter

__all__ = [
    "BASE_COEF",
    "CENTERS",
    "COEF_NAMES",
    "DISCLAIMER",
    "RANGES",
    "SCALES",
    "TAGS",
    "TARGET",
    "Run",
    "Scenario",
    "basis",
    "events",
    "simulate",
]

DISCLAIMER = "simulated data from a fictitious unit, not plant data"
UNIT = "C-301 solvent-recovery column (invented)"

TAGS: tuple[str, ...] = ("TI-104", "FI-201", "PI-110", "AI-305")
RANGES: dict[str, tuple[float, float]] = {
    "TI-104": (95.0, 125.0),
    "FI-201": (8.0, 20.0),
    "PI-110": (0.8, 1.6),
    "AI-305": (2.0, 8.0),
}
TARGET = "AX-350"

CENTERS = np.array([(RANGES[tag][0] + RANGES[tag][1]) / 2.0 for tag in TAGS])
SCALES = np.array([(RANGES[tag][1] - RANGES[tag][0]) / 2.0 for tag in TAGS])

COEF_NAMES: tuple[str, ...] = ("1", "zT", "zF", "zP", "zA", "zT^2", "zT*zA")
BASE_COEF: tuple[float, ...] = (170.0, -90.0, 25.0, 40.0, 60.0, 35.0, -20.0)

DEFAULT_START = 1767571200.0  # 2026-01-05T00:00:00Z
_DAY = 86400.0
_HOUR = 3600.0

# Input dynamics, in scaled units (z). Chosen so that the inputs wander over most of their usual
# range within a few weeks but rarely hit its edges.
_OU_TAU_H = np.array([2.0, 1.5, 3.0, 6.0])
_OU_SD_Z = np.array([0.12, 0.12, 0.10, 0.10])
# Correlation of the short-term movements: more reflux cools the tray, pressure follows the tray
# temperature a little, a richer feed comes with more reflux.
_OU_CORR = np.array(
    [
        [1.0, -0.5, 0.3, 0.0],
        [-0.5, 1.0, 0.0, 0.3],
        [0.3, 0.0, 1.0, 0.0],
        [0.0, 0.3, 0.0, 1.0],
    ]
)
_SETPOINT_Z_MAX = 0.6
_SETPOINT_LAG_MIN = 20.0
_EXCURSION_RAMP_H = 0.5


def basis(X: np.ndarray) -> np.ndarray:
    """Basis functions of the true relation for input rows ``X`` (k, 4) -> (k, 7).

    Columns follow `COEF_NAMES`; a single row (4,) gives a (7,) vector.
    """
    X = np.asarray(X, dtype=float)
    if X.shape[-1] != len(TAGS):
        raise ValueError(f"basis needs {len(TAGS)} input columns, got shape {X.shape}")
    z = (X - CENTERS) / SCALES
    zT, zF, zP, zA = z[..., 0], z[..., 1], z[..., 2], z[..., 3]
    return np.stack([np.ones_like(zT), zT, zF, zP, zA, zT * zT, zT * zA], axis=-1)


@dataclass(frozen=True)
class Scenario:
    """Settings of one simulated run; all times relative to ``start`` are in days unless noted."""

    seed: int = 0
    start: float = DEFAULT_START
    days: float = 30.0
    sample_period_s: float = 60.0
    lab_period_h: float = 4.0
    lab_delay_h: tuple[float, float] = (1.0, 3.0)
    lab_noise_ppm: float = 8.0
    fouling_ppm_per_day: float = 0.0
    step_day: float | None = None
    step_size: float = 0.0
    outage_days: tuple[float, float] | None = None
    blunders: int = 0
    excursion_day: float | None = None
    # Further knobs, with defaults that suit the presets.
    excursion_hours: float = 6.0
    excursion_degC: float = 6.0
    fouling_coef: int = 0
    step_coef: int = 4
    step_feed_shift: float = 1.5
    lab_jitter_min: float = 20.0
    lab_resolution_ppm: float = 1.0
    setpoint_moves_per_day: float = 1.0
    dead_times_s: tuple[float, float, float, float] = (0.0, 0.0, 0.0, 0.0)
    base_coef: tuple[float, ...] = field(default=BASE_COEF)
    # Unmeasured disturbance, analyzer zero drift and slow lab results (module docstring);
    # all off by default.
    offset_sd_ppm: float = 0.0
    offset_tau_h: float = 24.0
    offset_walk_ppm: float = 0.0
    zero_walk_ppm: float = 0.0
    zero_ramp_ppm_per_day: float = 0.0
    lab_slow_share: float = 0.0
    lab_slow_delay_h: tuple[float, float] = (6.0, 12.0)

    def __post_init__(self) -> None:
        def bad(name: str, value: object, why: str) -> ValueError:
            return ValueError(f"Scenario.{name}={value!r}: {why}")

        if isinstance(self.seed, bool) or not isinstance(self.seed, int | np.integer):
            raise bad("seed", self.seed, "must be an integer")
        for name in ("start", "days", "sample_period_s", "lab_period_h"):
            v = getattr(self, name)
            if not math.isfinite(v):
                raise bad(name, v, "must be finite")
        if self.days <= 0:
            raise bad("days", self.days, "must be > 0")
        if self.sample_period_s <= 0:
            raise bad("sample_period_s", self.sample_period_s, "must be > 0")
        if self.lab_period_h * _HOUR < self.sample_period_s:
            raise bad("lab_period_h", self.lab_period_h, "must be at least one sample period")
        if len(self.lab_delay_h) != 2:
            raise bad("lab_delay_h", self.lab_delay_h, "must be (min_h, max_h)")
        lo, hi = self.lab_delay_h
        if not (0 <= lo <= hi and math.isfinite(hi)):
            raise bad("lab_delay_h", self.lab_delay_h, "needs 0 <= min <= max < inf")
        if not (self.lab_noise_ppm >= 0 and math.isfinite(self.lab_noise_ppm)):
            raise bad("lab_noise_ppm", self.lab_noise_ppm, "must be finite and >= 0")
        if not math.isfinite(self.fouling_ppm_per_day):
            raise bad("fouling_ppm_per_day", self.fouling_ppm_per_day, "must be finite")
        if self.step_day is not None and not 0 <= self.step_day <= self.days:
            raise bad("step_day", self.step_day, f"must be None or within 0..{self.days}")
        if not math.isfinite(self.step_size):
            raise bad("step_size", self.step_size, "must be finite")
        if self.outage_days is not None:
            if len(self.outage_days) != 2 or not (
                0 <= self.outage_days[0] < self.outage_days[1] <= self.days
            ):
                raise bad("outage_days", self.outage_days, f"needs 0 <= start < end <= {self.days}")
        if isinstance(self.blunders, bool) or not isinstance(self.blunders, int | np.integer):
            raise bad("blunders", self.blunders, "must be an integer")
        if self.blunders < 0:
            raise bad("blunders", self.blunders, "must be >= 0")
        if self.excursion_day is not None and not 0 <= self.excursion_day < self.days:
            raise bad("excursion_day", self.excursion_day, f"must be None or within 0..{self.days}")
        if not self.excursion_hours > 2 * _EXCURSION_RAMP_H:
            raise bad("excursion_hours", self.excursion_hours, f"must be > {2 * _EXCURSION_RAMP_H}")
        if not self.excursion_degC > 0:
            raise bad("excursion_degC", self.excursion_degC, "must be > 0")
        n_coef = len(COEF_NAMES)
        if len(self.base_coef) != n_coef:
            raise bad("base_coef", self.base_coef, f"needs {n_coef} values {COEF_NAMES}")
        for name in ("fouling_coef", "step_coef"):
            v = getattr(self, name)
            if not 0 <= v < n_coef:
                raise bad(name, v, f"must index a coefficient 0..{n_coef - 1}")
        jitter_h = self.lab_jitter_min / 60.0
        if not 0 <= jitter_h < self.lab_period_h / 2:
            raise bad("lab_jitter_min", self.lab_jitter_min, "must be in [0, lab_period/2)")
        if not self.lab_resolution_ppm >= 0:
            raise bad("lab_resolution_ppm", self.lab_resolution_ppm, "must be >= 0")
        if not self.setpoint_moves_per_day >= 0:
            raise bad("setpoint_moves_per_day", self.setpoint_moves_per_day, "must be >= 0")
        if len(self.dead_times_s) != len(TAGS) or any(d < 0 for d in self.dead_times_s):
            raise bad("dead_times_s", self.dead_times_s, f"needs {len(TAGS)} values >= 0")
        for name in ("offset_sd_ppm", "offset_walk_ppm", "zero_walk_ppm"):
            v = getattr(self, name)
            if not (math.isfinite(v) and v >= 0):
                raise bad(name, v, "must be finite and >= 0")
        if not (math.isfinite(self.offset_tau_h) and self.offset_tau_h > 0):
            raise bad("offset_tau_h", self.offset_tau_h, "must be finite and > 0 hours")
        if not math.isfinite(self.zero_ramp_ppm_per_day):
            raise bad("zero_ramp_ppm_per_day", self.zero_ramp_ppm_per_day, "must be finite")
        if not 0 <= self.lab_slow_share <= 1:
            raise bad("lab_slow_share", self.lab_slow_share, "must be within 0..1")
        if len(self.lab_slow_delay_h) != 2:
            raise bad("lab_slow_delay_h", self.lab_slow_delay_h, "must be (min_h, max_h)")
        lo, hi = self.lab_slow_delay_h
        if not (0 <= lo <= hi and math.isfinite(hi)):
            raise bad("lab_slow_delay_h", self.lab_slow_delay_h, "needs 0 <= min <= max < inf")

    # -- presets -------------------------------------------------------------------------------

    @classmethod
    def stationary(cls, days: float = 30.0, seed: int = 0) -> Scenario:
        """Fixed coefficients, no outage, no blunders: the easy case."""
        return cls(seed=seed, days=days)

    @classmethod
    def drifting(cls, days: float = 60.0, seed: int = 0) -> Scenario:
        """Slow fouling drift of the intercept (1 ppm/day), otherwise clean."""
        return cls(seed=seed, days=days, fouling_ppm_per_day=1.0)

    @classmethod
    def real_drift(cls, days: float = 60.0, seed: int = 0) -> Scenario:
        """Drifting like a real unit: the fouling of `drifting`, an unmeasured feed offset
        (AR(1), sd 15 ppm, time constant 2 days, plus a walk of 3 ppm per square-root day),
        an analyzer zero that walks 1.5 ppm per square-root day, six blunders, and one result
        in five reported 6 to 14 hours late, after results drawn later."""
        return cls(seed=seed, days=days, fouling_ppm_per_day=1.0, offset_sd_ppm=15.0,
                   offset_tau_h=48.0, offset_walk_ppm=3.0, zero_walk_ppm=1.5, blunders=6,
                   lab_slow_share=0.2, lab_slow_delay_h=(6.0, 14.0))

    @classmethod
    def demo(cls, seed: int = 0) -> Scenario:
        """Three months with fouling, a feed-grade step, a lab outage and a few blunders."""
        return cls(
            seed=seed,
            days=90.0,
            fouling_ppm_per_day=0.8,
            step_day=40.0,
            step_size=40.0,
            outage_days=(60.0, 64.0),
            blunders=4,
        )

    # -- plain-data state ----------------------------------------------------------------------

    def to_state(self) -> dict:
        """Plain-data description (JSON/msgpack friendly) with a schema version."""
        state = asdict(self)
        for key, value in state.items():
            if isinstance(value, tuple):
                state[key] = list(value)
        state["seed"] = int(self.seed)
        state["schema"] = "plant.scenario/1"
        return state

    @classmethod
    def from_state(cls, state: dict) -> Scenario:
        """Inverse of `to_state`."""
        if state.get("schema") != "plant.scenario/1":
            raise ValueError(f"unknown scenario schema {state.get('schema')!r}")
        names = {f.name for f in fields(cls)}
        unknown = set(state) - names - {"schema"}
        if unknown:
            raise ValueError(f"unknown scenario keys {sorted(unknown)}")
        kwargs = {}
        for key in names & set(state):
            value = state[key]
            kwargs[key] = tuple(value) if isinstance(value, list) else value
        return cls(**kwargs)


@dataclass(frozen=True, eq=False)
class Run:
    """Result of `simulate` (simulated data from a fictitious unit, not plant data).

    Attributes
    ----------
    scenario : the settings used.
    t : (k,) sample times, epoch seconds.
    X : (k, 4) inputs, columns in `TAGS` order.
    lab_t : (m,) times the lab samples were drawn; ``lab_t == t[lab_index]`` exactly.
    lab_index : (m,) index into ``t`` of each drawn sample.
    lab_y : (m,) reported lab values, ppm (blunders included).
    lab_arrival : (m,) times the results were reported, epoch seconds (whole seconds).
    lab_blunder : (m,) True where the reported value is a gross error.
    truth_y : (k,) noise-free target at every sample time, ppm.
    coef : (k, 7) true coefficients at every sample time, columns in `COEF_NAMES` order, so
        that ``truth_y[k] == basis(X_eff[k]) @ coef[k]`` where ``X_eff`` is ``X`` with each
        column delayed by the scenario's dead time (``X_eff == X`` with the default zero dead
        times). The unmeasured offset is part of the intercept column.
    offset : (k,) the unmeasured disturbance at every sample time, ppm (zeros when off).
    lab_zero : (m,) the analyzer zero error in each reported value, ppm (zeros when off):
        ``lab_y`` is ``truth_y[lab_index] + lab_zero`` plus noise, rounded, floored at 0,
        except for blunders.
    """

    scenario: Scenario
    t: np.ndarray
    X: np.ndarray
    lab_t: np.ndarray
    lab_index: np.ndarray
    lab_y: np.ndarray
    lab_arrival: np.ndarray
    lab_blunder: np.ndarray
    truth_y: np.ndarray
    coef: np.ndarray
    offset: np.ndarray | None = None
    lab_zero: np.ndarray | None = None

    @property
    def tags(self) -> tuple[str, ...]:
        return TAGS

    @property
    def target(self) -> str:
        return TARGET


def _ar1(a: float, drive: np.ndarray, y0: float) -> np.ndarray:
    """y[n] = a*y[n-1] + drive[n] with y[-1] = y0, vectorized through lfilter."""
    out, _ = lfilter([1.0], [1.0, -a], drive, zi=[a * y0])
    return out


def _inputs(sc: Scenario, rng: np.random.Generator, t_rel: np.ndarray) -> np.ndarray:
    """Simulated inputs (k, 4) in engineering units."""
    k = t_rel.size
    n = len(TAGS)
    dt = sc.sample_period_s

    # Operating points: piecewise constant, each move changes one input.
    sp0 = rng.uniform(-_SETPOINT_Z_MAX / 2, _SETPOINT_Z_MAX / 2, size=n)
    n_moves = rng.poisson(sc.setpoint_moves_per_day * sc.days)
    move_t = np.sort(rng.uniform(0.0, sc.days * _DAY, size=n_moves))
    move_tag = rng.integers(0, n, size=n_moves)
    move_val = rng.uniform(-_SETPOINT_Z_MAX, _SETPOINT_Z_MAX, size=n_moves)
    sp = np.empty((k, n))
    for i in range(n):
        sel = move_tag == i
        levels = np.concatenate([[sp0[i]], move_val[sel]])
        which = np.searchsorted(move_t[sel], t_rel, side="right")
        sp[:, i] = levels[which]
    if sc.step_day is not None:
        ia = TAGS.index("AI-305")
        after = t_rel >= sc.step_day * _DAY
        sp[after, ia] += sc.step_feed_shift / SCALES[ia]
        sp[:, ia] = np.clip(sp[:, ia], -0.8, 0.8)

    a_sp = math.exp(-dt / (_SETPOINT_LAG_MIN * 60.0))
    level = np.empty_like(sp)
    for i in range(n):
        level[:, i] = _ar1(a_sp, (1.0 - a_sp) * sp[:, i], sp[0, i])

    # Correlated OU deviations, exact discretization: d[n] = a d[n-1] + sd*sqrt(1-a^2) e[n].
    chol = np.linalg.cholesky(_OU_CORR)
    e = rng.standard_normal((k, n)) @ chol.T
    d0 = chol @ rng.standard_normal(n)
    dev = np.empty_like(sp)
    for i in range(n):
        a = math.exp(-dt / (_OU_TAU_H[i] * _HOUR))
        dev[:, i] = _ar1(a, _OU_SD_Z[i] * math.sqrt(1.0 - a * a) * e[:, i], _OU_SD_Z[i] * d0[i])

    X = CENTERS + SCALES * np.clip(level + dev, -1.0, 1.0)

    if sc.excursion_day is not None:
        it = TAGS.index("TI-104")
        t0 = sc.excursion_day * _DAY
        t1 = t0 + sc.excursion_hours * _HOUR
        ramp = _EXCURSION_RAMP_H * _HOUR
        w = np.clip(np.minimum(t_rel - t0, t1 - t_rel) / ramp, 0.0, 1.0)
        hot = RANGES["TI-104"][1] + sc.excursion_degC + SCALES[it] * np.abs(dev[:, it])
        X[:, it] = (1.0 - w) * X[:, it] + w * hot
    return X


def _coefficients(sc: Scenario, t_rel: np.ndarray) -> np.ndarray:
    coef = np.tile(np.asarray(sc.base_coef, dtype=float), (t_rel.size, 1))
    coef[:, sc.fouling_coef] += sc.fouling_ppm_per_day * (t_rel / _DAY)
    if sc.step_day is not None:
        coef[t_rel >= sc.step_day * _DAY, sc.step_coef] += sc.step_size
    return coef


def _side_rng(sc: Scenario, stream: int) -> np.random.Generator:
    # a stream of its own per feature, so that switching one on does not move the others
    return np.random.default_rng((int(sc.seed), 301, stream))


def _offset(sc: Scenario, k: int) -> np.ndarray:
    """The unmeasured disturbance on the sample grid (module docstring), ppm."""
    out = np.zeros(k)
    dt = sc.sample_period_s
    if sc.offset_sd_ppm > 0:
        rng = _side_rng(sc, 1)
        a = math.exp(-dt / (sc.offset_tau_h * _HOUR))
        e = rng.standard_normal(k)
        y0 = sc.offset_sd_ppm * rng.standard_normal()
        # started from the stationary law: the first value is the draw y0 itself
        drive = sc.offset_sd_ppm * math.sqrt(1.0 - a * a) * e
        drive[0] = 0.0
        out += _ar1(a, drive, y0 / a)
    if sc.offset_walk_ppm > 0:
        rng = _side_rng(sc, 2)
        steps = sc.offset_walk_ppm * math.sqrt(dt / _DAY) * rng.standard_normal(k)
        steps[0] = 0.0
        out += np.cumsum(steps)
    return out


def _zero(sc: Scenario, t_rel: np.ndarray) -> np.ndarray:
    """The analyzer zero error on the sample grid, ppm."""
    out = sc.zero_ramp_ppm_per_day * (t_rel / _DAY)
    if sc.zero_walk_ppm > 0:
        rng = _side_rng(sc, 3)
        steps = sc.zero_walk_ppm * math.sqrt(sc.sample_period_s / _DAY) * rng.standard_normal(
            t_rel.size)
        steps[0] = 0.0
        out = out + np.cumsum(steps)
    return out


def _blunder(value: float, rng: np.random.Generator, min_change: float) -> float:
    """A gross lab error: digits swapped, or else the decimal point one place off."""
    digits = str(int(round(value)))
    if len(digits) >= 2 and rng.random() < 0.5:
        for i in range(len(digits) - 1):
            if digits[i] != digits[i + 1]:
                swapped = digits[:i] + digits[i + 1] + digits[i] + digits[i + 2 :]
                if abs(float(swapped) - value) >= min_change:
                    return float(swapped)
    wrong = value * 10.0 if (value < 100.0 or rng.random() < 0.5) else value / 10.0
    if abs(wrong - value) < min_change:
        wrong = value * 10.0 + min_change
    return wrong


def simulate(scenario: Scenario) -> Run:
    """Simulate one run of the invented column; deterministic given ``scenario.seed``."""
    sc = scenario
    rng = np.random.default_rng(sc.seed)
    k = int(round(sc.days * _DAY / sc.sample_period_s))
    if k < 2:
        raise ValueError(
            f"scenario gives {k} samples (days={sc.days}, period={sc.sample_period_s})"
        )
    t_rel = np.arange(k) * sc.sample_period_s
    t = sc.start + t_rel

    X = _inputs(sc, rng, t_rel)
    coef = _coefficients(sc, t_rel)
    offset = _offset(sc, k)
    coef[:, 0] += offset

    lag = np.rint(np.asarray(sc.dead_times_s) / sc.sample_period_s).astype(int)
    idx = np.arange(k)
    X_eff = np.column_stack([X[np.maximum(idx - lag[i], 0), i] for i in range(len(TAGS))])
    truth = np.einsum("kj,kj->k", basis(X_eff), coef)

    # Lab schedule: nominal grid with jitter, snapped to the sample grid.
    period = sc.lab_period_h * _HOUR
    n_lab = int(math.floor(t_rel[-1] / period))
    nominal = (np.arange(n_lab) + 0.5) * period
    jitter = rng.uniform(-1.0, 1.0, size=n_lab) * sc.lab_jitter_min * 60.0
    lab_index = np.clip(np.rint((nominal + jitter) / sc.sample_period_s), 0, k - 1).astype(int)
    delay = rng.uniform(sc.lab_delay_h[0], sc.lab_delay_h[1], size=n_lab) * _HOUR
    noise = rng.standard_normal(n_lab) * sc.lab_noise_ppm
    lab_index, first = np.unique(lab_index, return_index=True)
    delay, noise = delay[first], noise[first]
    if sc.lab_slow_share > 0:
        srng = _side_rng(sc, 4)
        slow = srng.random(lab_index.size) < sc.lab_slow_share
        slow_delay = srng.uniform(*sc.lab_slow_delay_h, size=lab_index.size) * _HOUR
        delay = np.where(slow, slow_delay, delay)
    lab_t = t[lab_index]
    lab_arrival = np.rint(lab_t + delay)

    if sc.outage_days is not None:
        o0 = sc.start + sc.outage_days[0] * _DAY
        o1 = sc.start + sc.outage_days[1] * _DAY
        keep = ~(((lab_t >= o0) & (lab_t < o1)) | ((lab_arrival >= o0) & (lab_arrival < o1)))
        lab_index, lab_t, lab_arrival, noise = (
            lab_index[keep],
            lab_t[keep],
            lab_arrival[keep],
            noise[keep],
        )

    lab_zero = _zero(sc, t_rel)[lab_index]
    lab_y = truth[lab_index] + lab_zero + noise
    if sc.lab_resolution_ppm > 0:
        lab_y = np.round(lab_y / sc.lab_resolution_ppm) * sc.lab_resolution_ppm
    lab_y = np.maximum(lab_y, 0.0)

    lab_blunder = np.zeros(lab_y.size, dtype=bool)
    if sc.blunders > lab_y.size:
        raise ValueError(f"blunders={sc.blunders} but only {lab_y.size} lab results")
    if sc.blunders:
        which = rng.choice(lab_y.size, size=sc.blunders, replace=False)
        min_change = max(6.0 * sc.lab_noise_ppm, 30.0)
        for j in np.sort(which):
            lab_y[j] = _blunder(float(lab_y[j]), rng, min_change)
        lab_blunder[which] = True

    return Run(
        scenario=sc,
        t=t,
        X=X,
        lab_t=lab_t,
        lab_index=lab_index,
        lab_y=lab_y,
        lab_arrival=lab_arrival,
        lab_blunder=lab_blunder,
        truth_y=truth,
        coef=coef,
        offset=offset,
        lab_zero=lab_zero,
    )


def events(run: Run) -> Iterator[tuple]:
    """Replay a run as it would reach the daemon, in arrival order.

    Yields ``("x", t, x_row)`` with ``x_row`` a tuple of floats in `TAGS` order, and
    ``("y", t_drawn, y, t_arrival)`` for lab results. A lab result reported at the same instant
    as a feature sample comes after it. Results reported after the last sample come at the end.
    """
    order = np.argsort(run.lab_arrival, kind="stable")
    arr = run.lab_arrival[order].tolist()
    drawn = run.lab_t[order].tolist()
    ys = run.lab_y[order].tolist()
    ts = run.t.tolist()
    rows = run.X.tolist()
    m = len(arr)
    j = 0
    for k, tk in enumerate(ts):
        while j < m and arr[j] < tk:
            yield ("y", drawn[j], ys[j], arr[j])
            j += 1
        yield ("x", tk, tuple(rows[k]))
    while j < m:
        yield ("y", drawn[j], ys[j], arr[j])
        j += 1


# ------------------------------------------------------------------------ dense analyzer unit
#: The second invented unit: a column whose on-line analyzer reports every sample.
DENSE_UNIT = "K-700 column with an on-line analyzer (invented)"
DENSE_TAGS: tuple[str, ...] = ("TI-701", "TI-702", "FI-703", "FI-704", "PI-705", "LI-706",
                               "TI-707")
DENSE_TARGET = "AX-790"
#: True sensitivities to the normalized inputs (target units per input sd).
DENSE_SLOPES: tuple[float, ...] = (0.30, -0.22, 0.15, 0.10, -0.12, 0.06, 0.04)


@dataclass(frozen=True)
class DenseScenario:
    """A dense-analyzer run of the invented K-700 column (simulated data, not plant data).

    Seven inputs normalized by the engineer (zero mean, unit sd: OU processes with time
    constants of hours around operating points that move now and then, correlated), one
    analyzer quality in normalized units, a result for every sample, known ``delay_samples``
    samples after it. The truth is ``sum_i b_i x_i`` with the slopes `DENSE_SLOPES` (each
    drifting by a share ``slope_drift`` of itself over the run, up or down; the TI-701 one
    applies to its unnormalized reading) plus an unmeasured offset: a random walk of
    ``walk`` per sample plus an AR(1) of sd ``ar_sd`` and time constant ``ar_tau_samples``.
    The operators counter a share ``feedback`` of the offset they see on the analyzer by
    moving TI-701, two hours late, so the offset and TI-701 move together on the record. The
    readings carry white noise ``input_noise`` the column does not pass on. The analyzer
    adds Gaussian noise ``noise``, a zero error that walks ``zero_walk`` per sample and ramps
    ``zero_ramp`` over the run, and ``blunders`` gross errors (a spike of 8 to 15 noise sds
    either way).
    """

    seed: int = 0
    start: float = DEFAULT_START
    days: float = 12.0
    period_s: float = 600.0
    delay_samples: int = 4
    noise: float = 0.03
    walk: float = 0.012
    ar_sd: float = 0.02
    ar_tau_samples: float = 6.0
    slope_drift: float = 0.1
    zero_walk: float = 0.004
    zero_ramp: float = 0.1
    blunders: int = 6
    feedback: float = 0.9
    input_noise: float = 0.25

    def to_state(self) -> dict:
        state = asdict(self)
        state["schema"] = "plant.dense/1"
        return state


@dataclass(frozen=True, eq=False)
class DenseRun:
    """Result of `simulate_dense`; fields as in `Run` (``X`` has the seven `DENSE_TAGS`)."""

    scenario: DenseScenario
    t: np.ndarray
    X: np.ndarray
    lab_t: np.ndarray
    lab_index: np.ndarray
    lab_y: np.ndarray
    lab_arrival: np.ndarray
    lab_blunder: np.ndarray
    truth_y: np.ndarray
    offset: np.ndarray
    lab_zero: np.ndarray
    tags: tuple = DENSE_TAGS
    target: str = DENSE_TARGET
    unit_name: str = DENSE_UNIT


def simulate_dense(sc: DenseScenario) -> DenseRun:
    """Simulate the invented K-700 column (`DenseScenario`); deterministic given the seed."""
    rng = np.random.default_rng((int(sc.seed), 700))
    k = int(round(sc.days * _DAY / sc.period_s))
    n = len(DENSE_TAGS)
    t = sc.start + np.arange(k) * sc.period_s
    # inputs: operating points moving about twice a day, followed through a lag of an hour,
    # plus correlated OU deviations of time constants from 5 to 40 hours, smoothed by a
    # second lag (slow and smooth against the analyzer's delay, as on a column, so that the
    # last result is a strong predictor);
    # normalized afterwards, as an engineer would
    taus = np.array([90.0, 60.0, 150.0, 40.0, 240.0, 120.0, 30.0])  # samples
    corr = np.eye(n)
    for i, j, c in ((0, 1, -0.5), (0, 2, 0.3), (2, 3, 0.4), (4, 5, -0.3), (1, 6, 0.3)):
        corr[i, j] = corr[j, i] = c
    e = rng.standard_normal((k, n)) @ np.linalg.cholesky(corr).T
    X = np.empty((k, n))
    n_moves = rng.poisson(2.0 * sc.days)
    move_k = np.sort(rng.integers(0, k, size=n_moves))
    move_i = rng.integers(0, n, size=n_moves)
    move_v = rng.uniform(-1.5, 1.5, size=n_moves)
    a_sp = math.exp(-sc.period_s / _HOUR)
    for i in range(n):
        sel = move_i == i
        levels = np.concatenate([[rng.uniform(-0.5, 0.5)], move_v[sel]])
        sp = levels[np.searchsorted(move_k[sel], np.arange(k), side="right")]
        a = math.exp(-1.0 / taus[i])
        a2 = math.exp(-3.0 / taus[i])
        dev = _ar1(a2, (1 - a2) * _ar1(a, math.sqrt(1 - a * a) * e[:, i], 0.0), 0.0)
        X[:, i] = _ar1(a_sp, (1 - a_sp) * sp, sp[0]) + 2.0 * dev
    frac = np.arange(k) / k
    walk = np.cumsum(sc.walk * rng.standard_normal(k))
    a = math.exp(-1.0 / sc.ar_tau_samples)
    ar = _ar1(a, sc.ar_sd * math.sqrt(1 - a * a) * rng.standard_normal(k),
              sc.ar_sd * rng.standard_normal() / a)
    offset = walk + ar
    zero = sc.zero_ramp * frac + np.cumsum(sc.zero_walk * rng.standard_normal(k))
    # the operators hold the quality: they move TI-701 against what the analyzer shows, late
    # and smoothed (a lag of two hours), so that on the record the offset and TI-701 move
    # together and a regression of the quality on the inputs confounds them
    a_op = math.exp(-1.0 / 12.0)
    seen = np.r_[np.zeros(sc.delay_samples), (offset + zero)[:k - sc.delay_samples]]
    X[:, 0] -= sc.feedback / DENSE_SLOPES[0] * _ar1(a_op, (1 - a_op) * seen, 0.0)
    mean, sd = X.mean(axis=0), X.std(axis=0)
    X = (X - mean) / sd
    slopes = np.tile(np.asarray(DENSE_SLOPES), (k, 1))
    slopes[:, 0] *= sd[0]  # the loop's gain is in the unnormalized units
    # the sensitivities change slowly (fouling, a feed that varies): each by a share
    # ``slope_drift`` of itself over the run, up or down
    sign = rng.choice([-1.0, 1.0], size=n)
    slopes *= 1.0 + sc.slope_drift * sign * frac[:, None]
    truth = np.einsum("ki,ki->k", X, slopes) + offset
    # the readings carry fast variation the column does not pass on to the quality
    # (transmitter noise, turbulence): white, ``input_noise`` in normalized units
    X = X + sc.input_noise * rng.standard_normal((k, n))
    lab_y = truth + zero + sc.noise * rng.standard_normal(k)
    blunder = np.zeros(k, dtype=bool)
    if sc.blunders:
        which = rng.choice(np.arange(k // 10, k), size=sc.blunders, replace=False)
        for j in which.tolist():
            lab_y[j] += rng.choice([-1.0, 1.0]) * rng.uniform(8.0, 15.0) * sc.noise
        blunder[which] = True
    idx = np.arange(k)
    return DenseRun(sc, t, X, t.copy(), idx, lab_y, t + sc.delay_samples * sc.period_s,
                    blunder, truth, offset, zero)
