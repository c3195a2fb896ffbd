"""The frozen dataclasses a configuration is parsed into, with what a model builds from its
settings (basis, posterior), its fingerprint and its state-folder form."""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field, fields
from typing import Any

import numpy as np

from daemon.config.settings import _BY_SECTION, SETTINGS, _default
from daemon.sharding import parse_shard
from recursive import Exponential, Gate, Posterior, RandomWalk, Stabilized
from recursive.adaptive import Adaptation, RateMatch, VBNoise
from recursive.basis import Basis, Identity, Input, Polynomial
from recursive.forgetting import TermDrift

# Version of the canonical text hashed by ModelConfig.fingerprint(); bump it if that text
# changes meaning, so that old fingerprints can never match new ones by accident.
FINGERPRINT_SCHEMA = 1
# Schema of ModelConfig.to_state(), the settings of a model kept in a state folder.
MODEL_STATE_SCHEMA = "posteriord.model-config/1"
# Settings added after the schema above: absent from older state folders (read as their
# default) and left out of the fingerprint while at their default, so that models
# configured before they existed keep their fingerprints and learned state.
_ADDED_LATER = ("offset_drift", "linear_drift", "higher_drift", "noise_adaptive",
                "noise_half_life", "vb_iterations", "adapt_offset", "offset_drift_min",
                "offset_drift_max", "adapt_window")
# Settings added after the schema above that are no learning settings (descriptive, lab and
# alerts; never in the fingerprint): absent from older state folders, read as their default.
_OTHER_LATER = ("target", "unit", "stale_factor", "stale_min", "stale_max",
                "region_min_samples", "commissioning_labs", "commissioning_time")


@dataclass(frozen=True)
class DaemonConfig:
    """The ``[daemon]`` table (see :data:`SETTINGS` for meanings)."""

    feeds: tuple[str, ...] = _default("daemon", "feeds")
    publish: str = _default("daemon", "publish")
    control: str = _default("daemon", "control")
    metrics: str = _default("daemon", "metrics")
    state_dir: str = _default("daemon", "state_dir")
    log_level: str = _default("daemon", "log_level")
    log_format: str = _default("daemon", "log_format")
    batch_limit: int = _default("daemon", "batch_limit")
    batch_bytes: int = _default("daemon", "batch_bytes")
    max_message_bytes: int = _default("daemon", "max_message_bytes")
    reconnect_ivl: float = _default("daemon", "reconnect_ivl")
    reconnect_ivl_max: float = _default("daemon", "reconnect_ivl_max")
    hwm: int = _default("daemon", "hwm")
    checkpoint_every: float = _default("daemon", "checkpoint_every")
    checkpoint_wal_bytes: int = _default("daemon", "checkpoint_wal_bytes")
    fsync: str = _default("daemon", "fsync")
    group_commit: float = _default("daemon", "group_commit")
    future_tolerance: float = _default("daemon", "future_tolerance")
    on_corruption: str = _default("daemon", "on_corruption")
    shard: str = _default("daemon", "shard")
    curve_secret_key: str = _default("daemon", "curve_secret_key")
    curve_clients: str = _default("daemon", "curve_clients")
    curve_admins: str = _default("daemon", "curve_admins")
    curve_feed_server_key: str = _default("daemon", "curve_feed_server_key")

    def shard_spec(self) -> tuple[int, int] | None:
        return parse_shard(self.shard) if self.shard else None


@dataclass(frozen=True)
class InputConfig:
    """One entry of a model's ``inputs``; times in seconds."""

    tag: str
    lo: float
    hi: float
    dead_time: float = _default("model.inputs", "dead_time")


@dataclass(frozen=True)
class ModelConfig:
    """One ``[[model]]`` table; durations in seconds, ``q`` and the drift rates
    (``offset_drift``, ``linear_drift``, ``higher_drift``: variance rates ``s**2 / T``) per
    second.

    Built by :func:`load` / :func:`loads`, which check every value; direct construction is
    not checked.
    """

    name: str
    inputs: tuple[InputConfig, ...]
    basis_kind: str = _default("model.basis", "kind")
    degree: int = _default("model.basis", "degree")
    interactions: bool = _default("model.basis", "interactions")
    family: str = _default("model.basis", "family")
    alpha: float = _default("model.prior", "alpha")
    prior_mean: tuple[float, ...] | None = _default("model.prior", "mean")
    noise_std: float | None = _default("model.noise", "std")
    noise_guess: float = _default("model.noise", "guess")
    noise_strength: float = _default("model.noise", "strength")
    forgetting: str = _default("model.forgetting", "policy")
    half_life: float | None = _default("model.forgetting", "half_life")
    q: float | None = _default("model.forgetting", "q")
    offset_drift: float | None = _default("model.forgetting", "offset_drift")
    linear_drift: float | None = _default("model.forgetting", "linear_drift")
    higher_drift: float | None = _default("model.forgetting", "higher_drift")
    noise_adaptive: bool = _default("model.noise", "adaptive")
    noise_half_life: float | None = _default("model.noise", "adaptive_half_life")
    vb_iterations: int = _default("model.noise", "iterations")
    adapt_offset: bool = _default("model.forgetting", "adapt_offset")
    offset_drift_min: float | None = _default("model.forgetting", "offset_drift_min")
    offset_drift_max: float | None = _default("model.forgetting", "offset_drift_max")
    adapt_window: float = _default("model.forgetting", "adapt_window")
    gate: float | None = _default("model.gate", "k")
    gate_release: int = _default("model.gate", "release")
    level: float = _default("model", "level")
    target: str | None = _default("model", "target")
    unit: str | None = _default("model", "unit")
    keep: float = _default("model.lab", "keep")
    keep_count: int = _default("model.lab", "keep_count")
    tolerance: float = _default("model.lab", "tolerance")
    stale_after: float | None = _default("model.lab", "stale_after")
    stale_factor: float = _default("model.lab", "stale_factor")
    stale_min: float = _default("model.lab", "stale_min")
    stale_max: float = _default("model.lab", "stale_max")
    alerts: bool = _default("model.alerts", "enabled")
    cusum_k: float = _default("model.alerts", "cusum_k")
    cusum_h: float = _default("model.alerts", "cusum_h")
    head_start: float = _default("model.alerts", "head_start")
    spread_sigma: float = _default("model.alerts", "spread_sigma")
    spread_h: float = _default("model.alerts", "spread_h")
    hold: int = _default("model.alerts", "hold")
    calibration_half_life: float = _default("model.alerts", "calibration_half_life")
    coverage_min: float = _default("model.alerts", "coverage_min")
    std_limit: float | None = _default("model.alerts", "std_limit")
    std_ratio: float = _default("model.alerts", "std_ratio")
    std_half_life: float = _default("model.alerts", "std_half_life")
    leverage_limit: float = _default("model.alerts", "leverage_limit")
    region_limit: float = _default("model.alerts", "region_limit")
    region_half_life: float = _default("model.alerts", "region_half_life")
    region_min_samples: int = _default("model.alerts", "region_min_samples")
    drift_window: float = _default("model.alerts", "drift_window")
    drift_limit: float = _default("model.alerts", "drift_limit")
    clear_count: int = _default("model.alerts", "clear_count")
    clear_time: float = _default("model.alerts", "clear_time")
    commissioning_labs: int = _default("model.alerts", "commissioning_labs")
    commissioning_time: float = _default("model.alerts", "commissioning_time")
    auto_flatten: bool = _default("model.alerts", "auto_flatten")
    flatten_keep: float = _default("model.alerts", "flatten_keep")

    def build_basis(self) -> Basis:
        """The basis: :class:`Identity`, or :class:`Polynomial` on inputs scaled to [-1, 1]."""
        inputs = [Input(i.tag, i.lo, i.hi) for i in self.inputs]
        if self.basis_kind == "identity":
            return Identity(inputs)
        return Polynomial(inputs, self.degree, interactions=self.interactions,
                          family=self.family, scale=True)

    def build_posterior(self, basis: Basis | None = None) -> Posterior:
        """A fresh posterior for this model (pass ``basis`` to reuse one already built).

        The constant term gets a flat prior (``basis.alpha_vector``); forgetting half-lives
        and ``q`` are per second, the daemon's unit of time.
        """
        basis = self.build_basis() if basis is None else basis
        if self.forgetting == "stabilized":
            policy = Stabilized(self.half_life)
        elif self.forgetting == "exponential":
            policy = Exponential(self.half_life)
        elif self.forgetting == "random_walk":
            policy = RandomWalk(self.q, self.half_life)
        elif self.forgetting in ("offset", "term_drift"):
            policy = TermDrift(self.drift_rates(basis), self.half_life)
        else:
            policy = None
        gate = None
        if self.gate:
            gate = Gate(self.gate, self.gate_release if self.gate_release > 0 else None)
        return Posterior(basis.n_features, alpha=basis.alpha_vector(self.alpha),
                         prior_mean=self.prior_mean, noise_std=self.noise_std,
                         noise_prior=(self.noise_guess, self.noise_strength),
                         forgetting=policy, gate=gate, adapt=self.adaptation(basis))

    def adaptation(self, basis: Basis | None = None) -> Adaptation | None:
        """What adapts online (`recursive.adaptive`), or None: the noise
        (``noise_adaptive``) and the offset's drift rate (``adapt_offset``, the constant
        term's rate, bounded by ``offset_drift_min`` / ``offset_drift_max``, by default the
        configured rate / 100 and * 100)."""
        if not (self.noise_adaptive or self.adapt_offset):
            return None
        noise = VBNoise(self.noise_half_life, self.vb_iterations) \
            if self.noise_adaptive else None
        rate = None
        if self.adapt_offset:
            basis = self.build_basis() if basis is None else basis
            term = int(np.flatnonzero(basis.exponents.sum(axis=1) == 0)[0])
            q = self.offset_drift or 0.0
            lo = self.offset_drift_min if self.offset_drift_min is not None else q / 100.0
            hi = self.offset_drift_max if self.offset_drift_max is not None else q * 100.0
            rate = RateMatch(term, lo, hi, self.adapt_window)
        return Adaptation(noise, rate)

    def drift_rates(self, basis: Basis | None = None) -> tuple[float, ...]:
        """The per-term variance rates (per second) of the ``offset`` and ``term_drift``
        policies, in basis order: ``offset_drift`` for the constant, ``linear_drift`` for
        terms of degree 1, ``higher_drift`` for the others (0 where not set).

        They are absolute at the noise reference (the known ``std``, or the ``guess`` when
        the noise is learned), the convention of :class:`recursive.forgetting.TermDrift`.
        """
        basis = self.build_basis() if basis is None else basis
        by_degree = (self.offset_drift or 0.0, self.linear_drift or 0.0,
                     self.higher_drift or 0.0)
        return tuple(float(by_degree[min(int(d), 2)]) for d in basis.exponents.sum(axis=1))

    def learning_settings(self) -> dict:
        """The settings that affect learning (rows with ``learning=True``), as plain data."""
        out: dict[str, Any] = {}
        for row in SETTINGS:
            if row.learning and row.section.startswith("model") \
                    and row.section != "model.inputs":
                value = getattr(self, row.field)
                if row.field in _ADDED_LATER and value == row.default:
                    continue
                out[row.field] = list(value) if isinstance(value, tuple) else value
        rows = [r for r in _BY_SECTION["model.inputs"] if r.learning]
        out["inputs"] = [{r.field: getattr(i, r.field) for r in rows} for i in self.inputs]
        return out

    def fingerprint(self) -> str:
        """Stable hash (16 hex digits) of :meth:`learning_settings`.

        Equal fingerprints mean a reloaded model may keep its learned state. The name,
        ``level`` and the ``[model.lab]`` settings do not enter it. Durations enter as
        seconds, so ``"10d"`` and ``"240h"`` give the same fingerprint.
        """
        text = json.dumps({"fingerprint_schema": FINGERPRINT_SCHEMA,
                           "settings": self.learning_settings()},
                          sort_keys=True, separators=(",", ":"), allow_nan=False)
        return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]

    def to_state(self) -> dict:
        """Every setting of the model as plain data, with a schema key (for state folders)."""
        out: dict[str, Any] = {"schema": MODEL_STATE_SCHEMA}
        for f in fields(self):
            value = getattr(self, f.name)
            if f.name == "inputs":
                value = [{g.name: getattr(i, g.name) for g in fields(i)} for i in value]
            elif isinstance(value, tuple):
                value = list(value)
            out[f.name] = value
        return out

    @classmethod
    def from_state(cls, state: dict) -> ModelConfig:
        """Inverse of :meth:`to_state`; raises ValueError on anything else."""
        if not isinstance(state, dict) or state.get("schema") != MODEL_STATE_SCHEMA:
            got = state.get("schema") if isinstance(state, dict) else type(state).__name__
            raise ValueError(f"model config schema must be {MODEL_STATE_SCHEMA!r}, got {got!r}")
        names = {f.name for f in fields(cls)}
        later = {f.name: f.default for f in fields(cls)
                 if f.name in _ADDED_LATER or f.name in _OTHER_LATER}
        state = {**later, **state}
        keys = set(state) - {"schema"}
        if keys != names:
            raise ValueError(f"model config keys differ from the settings: missing "
                             f"{sorted(names - keys)}, unknown {sorted(keys - names)}")
        values = dict(state)
        del values["schema"]
        try:
            values["inputs"] = tuple(InputConfig(**i) for i in values["inputs"])
        except TypeError as exc:
            raise ValueError(f"bad inputs in a model config: {exc}") from None
        if values["prior_mean"] is not None:
            values["prior_mean"] = tuple(float(v) for v in values["prior_mean"])
        return cls(**values)


@dataclass(frozen=True)
class Config:
    """A whole configuration file."""

    daemon: DaemonConfig = field(default_factory=DaemonConfig)
    models: tuple[ModelConfig, ...] = ()
    source: str = "<string>"
