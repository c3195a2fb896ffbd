"""The table of settings: every section and setting declared once, with its kind, default,
check and help. The dataclasses, the parser and the documentation all read it."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from daemon.config.errors import REQUIRED, _Bad
from daemon.config.kinds import (
    BOOLEAN,
    DRIFT,
    DURATION,
    ENDPOINT,
    ENDPOINTS,
    GE0,
    GE1,
    GT0,
    GT1,
    HOST_PORT,
    INTEGER,
    NAME,
    NUMBER,
    NUMBERS,
    OPEN01,
    PATH,
    SHARD,
    STRING,
    TAG,
    UNIT01,
    ZERO_OR_GT1,
    _Check,
    _choice,
    _Kind,
)
from recursive.basis import FAMILIES

_MIB = 1024 * 1024


@dataclass(frozen=True)
class Section:
    """A TOML table holding settings.

    Attributes
    ----------
    name : str
        Dotted name, e.g. ``"model.forgetting"``; the last part is the key in the parent table.
    noun : str
        How messages and documentation refer to it, e.g. ``"[model.forgetting]"``.
    help : str
        One paragraph for the documentation.
    array : bool
        True for an array of tables (``[[model]]``, the ``inputs`` of a model).
    """

    name: str
    noun: str
    help: str
    array: bool = False

    @property
    def key(self) -> str:
        return self.name.rpartition(".")[2]

    @property
    def parent(self) -> str:
        return self.name.rpartition(".")[0]


@dataclass(frozen=True)
class Setting:
    """One configuration setting.

    Attributes
    ----------
    section : str
        Name of the :class:`Section` holding the key.
    key : str
        Key in that TOML table.
    field : str
        Attribute of the dataclass the value lands in.
    kind : _Kind
        Value type (how it is read, named and written).
    default : Any
        Value when the key is absent (already converted), :data:`REQUIRED`, or None for
        "not set".
    help : str
        Meaning, for the documentation.
    check : _Check or None
        Range rule on the converted value.
    learning : bool
        True if changing the setting changes what a model learns: it enters
        :meth:`ModelConfig.fingerprint`, and a reload then starts that model afresh.
    default_doc : str or None
        Text for the documentation's default column when the default depends on other keys.
    """

    section: str
    key: str
    field: str
    kind: _Kind
    default: Any
    help: str
    check: _Check | None = None
    learning: bool = False
    default_doc: str | None = None

    def parse(self, raw: Any) -> Any:
        """Convert and check a TOML value; raises ``_Bad`` with the expectation."""
        value = self.kind.convert(raw)
        if self.check is not None and not self.check.ok(value):
            raise _Bad(f"{self.kind.noun} {self.check.text}")
        return value

    def type_doc(self) -> str:
        return self.kind.doc + (f" {self.check.text}" if self.check else "")

    def default_text(self) -> str:
        if self.default_doc is not None:
            return self.default_doc
        if self.default is REQUIRED:
            return "required"
        if self.default is None:
            return "not set"
        return f"`{self.kind.write(self.default)}`"


SECTIONS: tuple[Section, ...] = (
    Section("daemon", "[daemon]",
            "Sockets, logging and housekeeping of the service. Every key is optional."),
    Section("model", "[[model]]",
            "One `[[model]]` table per soft sensor. `name` and `inputs` are required; the "
            "sub-tables below are optional and take their defaults when absent.", array=True),
    Section("model.inputs", "an inputs entry",
            "The measured inputs of the model, as an array of inline tables: "
            '`inputs = [{tag = "TI-104", lo = 95, hi = 125, dead_time = "5m"}, ...]`. '
            "Tags must be unique within the model; the order is the order of the basis "
            "terms.", array=True),
    Section("model.basis", "[model.basis]",
            "The basis functions phi(x) of the linear-in-the-weights model y = w'phi(x) + e."),
    Section("model.prior", "[model.prior]",
            "The Gaussian prior of the weights before any lab result is learned."),
    Section("model.noise", "[model.noise]",
            "The lab noise: either known (`std`) or learned from the residuals, starting from "
            "a guess (`guess`) worth `strength` lab results."),
    Section("model.forgetting", "[model.forgetting]",
            "How old lab results lose weight as time passes, so the model follows a process "
            "that drifts."),
    Section("model.gate", "[model.gate]",
            "The robust gate: a lab result far from the prediction is not learned from, unless "
            "it is one of a run of same-sign rejections (a real change in the process)."),
    Section("model.lab", "[model.lab]",
            "Matching late lab results with the input readings of the time the sample was "
            "drawn, and the stale status."),
    Section("model.alerts", "[model.alerts]",
            "Drift detectors and the trust state (normal / caution / untrusted) published on "
            "`alert/<model>`. Detectors on lab results work on the standardized residual z; "
            "those on predictions on the predictive std and the inputs."),
)

_day = 86400.0
_hour = 3600.0

SETTINGS: tuple[Setting, ...] = (
    # [daemon]
    Setting("daemon", "feeds", "feeds", ENDPOINTS, ("tcp://127.0.0.1:5555",),
            "Endpoints the SUB socket connects to for input readings and lab results."),
    Setting("daemon", "publish", "publish", ENDPOINT, "tcp://127.0.0.1:5556",
            "Endpoint the PUB socket binds to for predictions and alerts."),
    Setting("daemon", "control", "control", ENDPOINT, "tcp://127.0.0.1:5557",
            "Endpoint the REP socket binds to for control requests (status, reload, reset)."),
    Setting("daemon", "metrics", "metrics", HOST_PORT, "127.0.0.1:9108",
            'Address of the Prometheus HTTP endpoint; "" disables it.'),
    Setting("daemon", "state_dir", "state_dir", STRING, "state",
            "Folder of the learned state: a write-ahead log and checkpoints (relative to the "
            "daemon's working directory unless absolute). Created with mode 0700; one daemon "
            "at a time holds its lock."),
    Setting("daemon", "log_level", "log_level", _choice("debug", "info", "warning", "error"),
            "info", "Least severe log level written."),
    Setting("daemon", "log_format", "log_format", _choice("text", "json"), "text",
            "Log lines as plain text or as one JSON object per line."),
    Setting("daemon", "batch_limit", "batch_limit", INTEGER, 65536,
            "Most messages taken per wake-up before they are processed and the control "
            "socket and signals get a turn. A wake-up takes only what is queued, so at low "
            "load batches stay small (latency); under load they grow, and each model "
            "predicts more samples per call (throughput: with thousands of models a "
            "wake-up of 16384 messages gives each one or two, and costs a third more per "
            "message than one of 65536). A full wake-up of 65536 single samples takes "
            "about 1 to 3 s of the loop; lower it where the control socket must answer "
            "sooner under overload.", GE1),
    Setting("daemon", "batch_bytes", "batch_bytes", INTEGER, 64 * _MIB,
            "Most payload bytes taken per wake-up (the batch ends after the message that "
            "crosses it), which bounds the memory a batch of large block messages holds.",
            GE1),
    Setting("daemon", "max_message_bytes", "max_message_bytes", INTEGER, _MIB,
            "Largest accepted message; longer ones are dropped.", GE1),
    Setting("daemon", "future_tolerance", "future_tolerance", DURATION, 3600.0,
            "How far ahead of this host's clock a sample or lab time may be. A later time "
            "cannot be right (samples do not come from the future; replays of history are "
            "in the past) and is rejected as `bad_time`, with a hint when it looks like "
            "milliseconds, microseconds or nanoseconds; otherwise one such time would make "
            "every later sample of its model `out_of_order`. Only admission looks at the "
            "clock, never learning. 0 turns the check off.", GE0),
    Setting("daemon", "reconnect_ivl", "reconnect_ivl", DURATION, 0.1,
            "First wait before reconnecting a lost feed.", GT0),
    Setting("daemon", "reconnect_ivl_max", "reconnect_ivl_max", DURATION, 10.0,
            "Longest wait between reconnection attempts (the wait doubles up to this); at "
            "least `reconnect_ivl`.", GT0),
    Setting("daemon", "hwm", "hwm", INTEGER, 100_000,
            "High-water mark (queued messages) of the sockets; 0 means no limit.", GE0),
    Setting("daemon", "checkpoint_every", "checkpoint_every", DURATION, 300.0,
            "Interval between checkpoints of the learned state (one is also written at "
            "start-up, on shutdown and on the `checkpoint` command).", GT0),
    Setting("daemon", "checkpoint_wal_bytes", "checkpoint_wal_bytes", INTEGER, _MIB // 2,
            "Bytes of write-ahead log after which a checkpoint is written even before "
            "`checkpoint_every` has passed, so that a restart never replays more than about "
            "this much log (a lab record of a 4-input model is about 110 bytes). 0: by time "
            "only.", GE0),
    Setting("daemon", "fsync", "fsync", _choice("group", "always"), "group",
            "When write-ahead log records reach the disk: `group` fsyncs at most once per "
            "`group_commit` (a power loss may lose that much; a crash of the process loses "
            "nothing); `always` fsyncs every record, and a `fit/` message is published only "
            "after its record is durable."),
    Setting("daemon", "group_commit", "group_commit", DURATION, 0.05,
            "Longest time a log record waits for its fsync with `fsync = \"group\"`.", GE0),
    Setting("daemon", "on_corruption", "on_corruption", _choice("refuse", "checkpoint"),
            "refuse",
            "What start-up does with a damaged write-ahead log (a torn last record is always "
            "dropped and never counts as damage): `refuse` exits with code 6 and leaves the "
            "folder for a decision; `checkpoint` starts from the newest checkpoint plus the "
            "intact records before the damage and logs what was dropped."),
    Setting("daemon", "shard", "shard", SHARD, "",
            'Run only the models whose CRC-32 of the name modulo n is i (`"i/n"`), and '
            "subscribe only to their topics; several daemons then share one feed. "
            '`""` runs every model.'),
    Setting("daemon", "curve_secret_key", "curve_secret_key", PATH, "",
            "The daemon's CURVE key pair (a `NAME.key_secret` file from `posteriord keys new`, "
            'mode 0600). Set: publish and control are CURVE servers, the feed a CURVE client. '
            '`""`: no CURVE, and publish and control must bind to loopback or ipc.'),
    Setting("daemon", "curve_clients", "curve_clients", PATH, "",
            "Folder of the public keys (`*.key`) allowed to subscribe to the publish socket "
            "(re-read on SIGHUP)."),
    Setting("daemon", "curve_admins", "curve_admins", PATH, "",
            "Folder of the public keys allowed to send control commands (re-read on SIGHUP)."),
    Setting("daemon", "curve_feed_server_key", "curve_feed_server_key", PATH, "",
            "Public key of the feed publisher when it is a CURVE server; `\"\"` connects "
            "without CURVE."),
    # [[model]]
    Setting("model", "name", "name", NAME, REQUIRED,
            "Model name, unique across models; also the topic of its messages."),
    Setting("model", "level", "level", NUMBER, 0.95,
            "Probability of the published prediction interval.", OPEN01),
    Setting("model", "target", "target", STRING, None,
            "The lab column of the historian export this model predicts (its tag, as "
            "`tune` prints it). Written by `tune`; `tune`, `backtest` and `replay` read it, "
            "so `--target` need not be repeated (`--target` still overrides)."),
    Setting("model", "unit", "unit", STRING, None,
            'Engineering unit of the target, e.g. `"ppm"` or `"%"` (written by `tune` from '
            "the export's units row or `--unit`). Shown in the tables of `tune`, `backtest`, "
            "`ctl`, in `watch`, in record files and on the report's axes."),
    # inputs = [{...}, ...]
    Setting("model.inputs", "tag", "tag", TAG, REQUIRED, "Tag name of the reading.",
            learning=True),
    Setting("model.inputs", "lo", "lo", NUMBER, REQUIRED,
            "Low end of the instrument range, in engineering units. Polynomial bases map "
            "[lo, hi] to [-1, 1]; readings outside the range are flagged.", learning=True),
    Setting("model.inputs", "hi", "hi", NUMBER, REQUIRED,
            "High end of the instrument range; greater than `lo`.", learning=True),
    Setting("model.inputs", "dead_time", "dead_time", DURATION, 0.0,
            "Transport delay: a lab sample drawn at time t is matched with this input's "
            "reading at t - dead_time.", GE0, learning=True),
    # [model.basis]
    Setting("model.basis", "kind", "basis_kind", _choice("identity", "polynomial"),
            "polynomial",
            "`identity`: 1 and the raw readings (weights are sensitivities in engineering "
            "units); `polynomial`: products of 1-D polynomials of the scaled readings.",
            learning=True),
    Setting("model.basis", "degree", "degree", INTEGER, 1,
            "Largest total degree of a polynomial term.", GE1, learning=True),
    Setting("model.basis", "interactions", "interactions", BOOLEAN, True,
            "Include cross terms (TI-104*FI-201); false keeps only powers of single inputs.",
            learning=True),
    Setting("model.basis", "family", "family", _choice(*FAMILIES), "legendre",
            "1-D polynomial family; Legendre and Chebyshev are better conditioned than "
            "monomials on [-1, 1].", learning=True),
    # [model.prior]
    Setting("model.prior", "alpha", "alpha", NUMBER, 1.0,
            "Prior precision of each weight, in 1/(target unit)^2 when the noise is at its "
            "guess: the prior standard deviation of a weight is 1/sqrt(alpha). The constant "
            "term always has a flat prior. 0 gives a flat prior on every weight.", GE0,
            learning=True),
    Setting("model.prior", "mean", "prior_mean", NUMBERS, None,
            "Prior mean of the weights (e.g. a commissioning model), one number per basis "
            "term in the order `check-config` lists them.", learning=True,
            default_doc="zeros"),
    # [model.noise]
    Setting("model.noise", "std", "noise_std", NUMBER, None,
            "Known lab noise standard deviation, in target units; when set the noise is not "
            "learned and predictions are Gaussian.", GT0, learning=True,
            default_doc="not set (learned)"),
    Setting("model.noise", "guess", "noise_guess", NUMBER, 1.0,
            "Prior guess of the noise standard deviation, in target units (learned noise).",
            GT0, learning=True),
    Setting("model.noise", "strength", "noise_strength", NUMBER, 2.0,
            "Weight of the guess, in lab results (pseudo-observations); 0 is the "
            "uninformative prior.", GE0, learning=True),
    Setting("model.noise", "adaptive", "noise_adaptive", BOOLEAN, False,
            "Learn the noise level online with the variational-Bayes adaptive Kalman filter "
            "(Särkkä and Nummenmaa, 2009): the weights get an absolute covariance (drift "
            "rates in target units whatever the noise), the noise variance its own "
            "inverse-gamma posterior, starting from `guess` worth `strength` results and "
            "forgotten with `adaptive_half_life`. Needs learned noise (no `std`). Off by "
            "default: on the simulated plants it did not lower the error (README, "
            "\"Drift and forgetting\").", learning=True),
    Setting("model.noise", "adaptive_half_life", "noise_half_life", DURATION, None,
            "With `adaptive = true`: time after which the noise statistics count half "
            "(the forgetting of the inverse-gamma parameters, toward the prior); not set: "
            "they are kept (a noise level assumed constant).", GT0, learning=True),
    Setting("model.noise", "iterations", "vb_iterations", INTEGER, 3,
            "With `adaptive = true`: fixed-point iterations of the variational update per "
            "lab result.", GE1, learning=True),
    # [model.forgetting]
    Setting("model.forgetting", "policy", "forgetting",
            _choice("stabilized", "exponential", "random_walk", "offset", "term_drift", "none"),
            "stabilized",
            "`stabilized`: old information decays toward the prior (never less certain than "
            "the prior); `exponential`: all information decays (can wind up when inputs do "
            "not move); `random_walk`: every weight drifts with variance `q` per second; "
            "`offset`: the constant term (the offset: feed composition, analyzer zero, "
            "fouling) drifts at `offset_drift` while the whole model is also flattened toward "
            "the prior with `half_life`, so the sensitivities change slowly and the offset "
            "follows fast; `term_drift`: each group of terms drifts at its own rate "
            "(`offset_drift`, `linear_drift`, `higher_drift`), with stabilized forgetting "
            "only if `half_life` is set; `none`: no forgetting.", learning=True),
    Setting("model.forgetting", "half_life", "half_life", DURATION, 5 * _day,
            "Time after which a lab result counts half. With `random_walk` it is optional and "
            "applies to the noise estimate only; with `term_drift` it is optional (not set: "
            "only the drift); not allowed with `none`.", GT0,
            learning=True,
            default_doc='`"5d"` (not set for `random_walk`, `term_drift` and `none`)'),
    Setting("model.forgetting", "q", "q", NUMBER, None,
            "Random-walk variance added to each weight per second, in the weights' units "
            "squared; required with `random_walk`, not allowed otherwise.", GT0,
            learning=True),
    Setting("model.forgetting", "offset_drift", "offset_drift", DRIFT, None,
            'How fast the offset (the constant term) wanders, as `"<s> per <T>"`: over a '
            "time T its change has a standard deviation of about s target units (a random "
            "walk, so over 4T about 2s). It is read as the variance rate q = s^2 / T per "
            'second: `"0.5 per 1h"` is q = 0.25 / 3600 per second. With learned noise the '
            "rate holds at the noise guess and scales with the learned noise variance. "
            "Required with `offset`; with `term_drift` optional (not set: 0).", learning=True),
    Setting("model.forgetting", "linear_drift", "linear_drift", DRIFT, None,
            'Drift of each linear term\'s weight (degree 1), as `"<s> per <T>"` in the '
            "weight's units (target units per unit of the scaled input for a polynomial "
            "basis, per engineering unit for identity), q = s^2 / T; only with `term_drift` "
            "(not set: 0).", learning=True),
    Setting("model.forgetting", "adapt_offset", "adapt_offset", BOOLEAN, False,
            "Adapt the offset's drift rate online by covariance matching of the lab "
            "residuals (Mehra, 1972): the rate that makes the weighted mean of the squared "
            "residuals equal their predicted variance, within `offset_drift_min` .. "
            "`offset_drift_max`; starts at `offset_drift`. Only with `offset` and "
            "`term_drift`. Off by default; `tune` turns it on, with the bounds, when the "
            "training data do not determine the offset rate (README, \"Drift and "
            "forgetting\", has the figures).", learning=True),
    Setting("model.forgetting", "offset_drift_min", "offset_drift_min", DRIFT, None,
            'Lowest adapted offset drift, as `"<s> per <T>"`; only with `adapt_offset`.',
            learning=True, default_doc="`offset_drift` / 100 (in q = s^2 / T)"),
    Setting("model.forgetting", "offset_drift_max", "offset_drift_max", DRIFT, None,
            'Highest adapted offset drift, as `"<s> per <T>"`; only with `adapt_offset`.',
            learning=True, default_doc="`offset_drift` * 100 (in q = s^2 / T)"),
    Setting("model.forgetting", "adapt_window", "adapt_window", NUMBER, 30.0,
            "Half-life, in lab results, of the weighted means the adapted offset drift is "
            "matched on; only with `adapt_offset`.", GT0, learning=True),
    Setting("model.forgetting", "higher_drift", "higher_drift", DRIFT, None,
            "Drift of each weight of degree 2 or more (squares and cross terms), as "
            '`"<s> per <T>"`, q = s^2 / T; only with `term_drift` (not set: 0).',
            learning=True),
    # [model.gate]
    Setting("model.gate", "k", "gate", NUMBER, 4.0,
            "A lab result whose standardized residual |z| exceeds k is not learned from; 0 "
            "turns the gate off.", GE0, learning=True),
    Setting("model.gate", "release", "gate_release", INTEGER, 3,
            "After this many consecutive same-sign rejections the gate opens and learns "
            "again; 0 keeps it shut.", GE0, learning=True),
    # [model.lab]
    Setting("model.lab", "keep", "keep", DURATION, 12 * _hour,
            "How long input readings are kept for matching late lab results.", GT0),
    Setting("model.lab", "keep_count", "keep_count", INTEGER, 5000,
            "Most input rows kept per model.", GE1),
    Setting("model.lab", "tolerance", "tolerance", DURATION, 120.0,
            "Largest gap between a lab sample time and the input row matched with it.", GE0),
    Setting("model.lab", "stale_after", "stale_after", DURATION, None,
            'Predictions are marked "stale" when no lab result was accepted for this long '
            "(also the staleness alert, reason `stale`). Not set: derived from the lab "
            "schedule the model observes, `stale_factor` times the median interval between "
            "lab samples plus their median delay, within `stale_min` .. `stale_max` (12 h "
            "until three intervals are seen, and always with alerts disabled).", GT0,
            default_doc="not set (from the observed lab interval)"),
    Setting("model.lab", "stale_factor", "stale_factor", NUMBER, 3.0,
            "Intervals between lab samples without an accepted result before the model is "
            "stale, when `stale_after` is not set: at 3, two results in a row may be missing "
            "or rejected.", GT1),
    Setting("model.lab", "stale_min", "stale_min", DURATION, _hour,
            "Shortest derived `stale_after`.", GT0),
    Setting("model.lab", "stale_max", "stale_max", DURATION, 7 * _day,
            "Longest derived `stale_after`; at least `stale_min`.", GT0),
    # [model.alerts]
    Setting("model.alerts", "enabled", "alerts", BOOLEAN, True,
            "Run the detectors and the trust state; false publishes no alerts."),
    Setting("model.alerts", "cusum_k", "cusum_k", NUMBER, 0.5,
            "Reference value k of the two-sided tabular CUSUM on z (mean shift), in units "
            "of z.", GT0),
    Setting("model.alerts", "cusum_h", "cusum_h", NUMBER, 5.0,
            "Decision interval h of the mean-shift CUSUM (reason `mean_shift`, untrusted).",
            GT0),
    Setting("model.alerts", "head_start", "head_start", NUMBER, 0.0,
            "Fast-initial-response head start of the CUSUM, in [0, h).", GE0),
    Setting("model.alerts", "spread_sigma", "spread_sigma", NUMBER, 1.5,
            "Standard deviation of z the spread CUSUM is tuned to detect (reason `spread`, "
            "caution).", GT1),
    Setting("model.alerts", "spread_h", "spread_h", NUMBER, 5.0,
            "Decision interval of the spread CUSUM.", GT0),
    Setting("model.alerts", "hold", "hold", INTEGER, 5,
            "Lab results during which a CUSUM signal stays an active reason.", GE1),
    Setting("model.alerts", "calibration_half_life", "calibration_half_life", NUMBER, 50.0,
            "Half-life, in lab results, of the weighted interval coverage, log score and "
            "CRPS.", GT0),
    Setting("model.alerts", "coverage_min", "coverage_min", NUMBER, 0.8,
            "Weighted coverage of the interval below which the model is `miscalibrated` "
            "(caution); judged after 20 lab results.", UNIT01),
    Setting("model.alerts", "std_limit", "std_limit", NUMBER, None,
            "Predictive std above which the model is untrusted (reason `uncertainty`), in "
            "the target's units; not set: no absolute limit.", GT0),
    Setting("model.alerts", "std_ratio", "std_ratio", NUMBER, 3.0,
            "Predictive std over its own typical value above which the model is in caution "
            "(reason `uncertainty_ratio`); 0 disables.", ZERO_OR_GT1),
    Setting("model.alerts", "std_half_life", "std_half_life", NUMBER, 50.0,
            "Half-life, in lab results, of the typical predictive std (taken at lab times).",
            GT0),
    Setting("model.alerts", "leverage_limit", "leverage_limit", NUMBER, 3.0,
            "Leverage phi'V phi (weight uncertainty in units of the noise variance) above "
            "which the inputs are an extrapolation (reason `extrapolation`, caution); 0 "
            "disables.", GE0),
    Setting("model.alerts", "region_limit", "region_limit", NUMBER, 5.0,
            "Mahalanobis distance of the inputs from those the model learned on above which "
            "they are outside the learned region (reason `outside_region`, caution); 0 "
            "disables.", GE0),
    Setting("model.alerts", "region_half_life", "region_half_life", NUMBER, 200.0,
            "Half-life, in lab results, of the learned-region mean and covariance.", GT0),
    Setting("model.alerts", "region_min_samples", "region_min_samples", INTEGER, 40,
            "Lab results learned before the learned region is judged (at least one more "
            "than the inputs); until then the region is the instrument ranges (`lo`, `hi`) "
            "and inputs outside it are `out_of_range`.", GE1),
    Setting("model.alerts", "drift_window", "drift_window", DURATION, 7 * _day,
            "Window over which the movement of the weight posterior is measured.", GT0),
    Setting("model.alerts", "drift_limit", "drift_limit", NUMBER, 6.0,
            "Mahalanobis distance of the weight change over the window, in the older "
            "posterior's metric, above which the model is drifting (reason `param_drift`, "
            "caution); 0 disables.", GE0),
    Setting("model.alerts", "clear_count", "clear_count", INTEGER, 3,
            "Evaluations a reason must be absent before it clears (hysteresis).", GE1),
    Setting("model.alerts", "clear_time", "clear_time", DURATION, _hour,
            "Time a reason must also be absent before it clears.", GE0),
    Setting("model.alerts", "commissioning_labs", "commissioning_labs", INTEGER, 30,
            "A new model is `commissioning` (its trust published as that, no trust alert "
            "raised, the detectors learning their baselines) until it has learned this many "
            "lab results or `commissioning_time` has passed since its first sample, "
            "whichever comes first; 0 turns this criterion off.", GE0),
    Setting("model.alerts", "commissioning_time", "commissioning_time", DURATION, 7 * _day,
            "Longest commissioning, from the model's first sample (feed time); 0 turns this "
            "criterion off, and with `commissioning_labs = 0` too there is none.", GE0),
    Setting("model.alerts", "auto_flatten", "auto_flatten", BOOLEAN, False,
            "On a mean-shift signal, apply one extra forgetting step toward the prior so the "
            "model re-learns quickly, and publish that it did.", learning=True),
    Setting("model.alerts", "flatten_keep", "flatten_keep", NUMBER, 0.2,
            "Share of the learned information kept by that step.", UNIT01, learning=True),
)

# Rules that involve more than one key; checked in _finish_model / _finish_daemon.
RULES: tuple[str, ...] = (
    "`daemon.control` differs from `daemon.publish` (both are bound).",
    "`daemon.reconnect_ivl_max` >= `daemon.reconnect_ivl`.",
    "Model names are unique; each model has at least one input; tags are unique within a "
    "model; `hi` > `lo`.",
    "`prior.mean`, when given, has one number per basis term.",
    "With `basis.kind = \"identity\"`, `degree`, `interactions` and `family` are not allowed.",
    "`noise.std` excludes `noise.guess` and `noise.strength`.",
    "`forgetting.q` is required with `policy = \"random_walk\"` and not allowed otherwise; "
    "`forgetting.half_life` is not allowed with `policy = \"none\"`.",
    "`forgetting.offset_drift` is required with `policy = \"offset\"`; the drift keys are only "
    "allowed with `offset` (`offset_drift`) and `term_drift` (all three, at least one rate "
    "above 0).",
    "`noise.adaptive` needs learned noise (no `noise.std`); `noise.adaptive_half_life` and "
    "`noise.iterations` only apply with it.",
    "`forgetting.adapt_offset` needs `policy = \"offset\"` or `\"term_drift\"`, and an "
    "`offset_drift` above 0 or both bounds; `offset_drift_min`, `offset_drift_max` and "
    "`adapt_window` only apply with it; `offset_drift_min` <= `offset_drift_max`.",
    "`gate.release` is not allowed with `gate.k = 0`.",
    "`alerts.head_start` < `alerts.cusum_h`.",
    "`lab.stale_max` >= `lab.stale_min`.",
)

_BY_SECTION: dict[str, tuple[Setting, ...]] = {
    s.name: tuple(r for r in SETTINGS if r.section == s.name) for s in SECTIONS
}
_SECTION: dict[str, Section] = {s.name: s for s in SECTIONS}


def _children(section: str) -> dict[str, Section]:
    return {s.key: s for s in SECTIONS if s.parent == section}


def _default(section: str, key: str) -> Any:
    for row in _BY_SECTION[section]:
        if row.key == key:
            return row.default
    raise KeyError(f"{section}.{key}")
