"""Prometheus exposition: everything is computed at scrape time from the runners' snapshot.

The hot path only bumps plain integer counters on the runners; this collector turns them,
and the model state, into metric families when Prometheus scrapes. The registry is passed
in explicitly, never the process-global default.

Every family is declared once, in :data:`METRICS`; the collector builds its families from
that table and :func:`metrics_markdown` documents it (committed as ``docs/metrics.md``; a test
checks that a real scrape exports exactly these families, and that the file is up to date).

Series whose label values are known in advance exist from the first scrape on, at zero:
``increase()`` and ``rate()`` see nothing of a counter's first event if the series appears
with it. That covers the rejection reasons of every model, the reload results, the reasons
of messages for unknown topics and the feed endpoints with their causes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

from daemon.runtime import wire
from daemon.runtime.monitor import REASONS, TRUST_STATES, _calibration_means

PREFIX = "posteriord"

# Rejection reasons counted per model: all but unknown_model, which names no model.
MODEL_REASONS = tuple(r for r in wire.REASONS if r != "unknown_model")
# Reasons a message can be refused for before its topic is known to name a model.
UNKNOWN_TOPIC_REASONS = ("frames", "unknown_model")
RELOAD_RESULTS = ("ok", "error", "unavailable")


@dataclass(frozen=True)
class Metric:
    """One metric family: ``name`` without the prefix (and without ``_total``)."""

    name: str
    kind: str  # "counter" or "gauge"
    help: str
    labels: tuple[str, ...] = ()

    @property
    def full_name(self) -> str:
        return f"{PREFIX}_{self.name}"

    @property
    def exposed(self) -> str:
        """The sample name Prometheus stores (counters get ``_total``)."""
        return self.full_name + ("_total" if self.kind == "counter" else "")

    def family(self):
        cls = CounterMetricFamily if self.kind == "counter" else GaugeMetricFamily
        return cls(self.full_name, self.help, labels=list(self.labels))


_M = ("model",)
_DETECTOR_HELP = {
    "cusum_upper": "Upper mean-shift CUSUM statistic on z.",
    "cusum_lower": "Lower mean-shift CUSUM statistic on z.",
    "spread_statistic": "Spread (variance increase) CUSUM statistic on z.",
    "coverage_ratio": "Exponentially weighted coverage of the prediction interval.",
    "log_score": "Exponentially weighted negative log predictive density at lab results.",
    "crps": "Exponentially weighted CRPS at lab results, in the target's units.",
    "std_ratio": "Predictive std over its typical value.",
    "leverage": "Largest leverage phi'V phi in the last prediction batch.",
    "region_distance": "Largest Mahalanobis distance of the inputs from the learned region in "
                       "the last prediction batch.",
    "param_drift": "Mahalanobis distance of the weight change over the drift window.",
}

METRICS: tuple[Metric, ...] = (
    # per model, counted on the hot path
    Metric("messages_received", "counter", "Feed messages received for the model.", _M),
    Metric("feature_samples", "counter", "Feature samples accepted.", _M),
    Metric("predictions_published", "counter", "Predictions published.", _M),
    Metric("lab_results_received", "counter", "Lab results received.", _M),
    Metric("lab_results_learned", "counter", "Lab results learned from.", _M),
    Metric("rejected", "counter", "Messages, samples or lab results of the model rejected, by "
           "reason.", ("model", "reason")),
    Metric("feed_gaps", "counter", "Gaps seen in publisher sequence numbers.", _M),
    Metric("feed_lost_messages", "counter", "Messages missing according to sequence numbers.",
           _M),
    # per model, from its state
    Metric("model_predictive_std", "gauge", "Predictive standard deviation of the last "
           "prediction, in the target's units.", _M),
    Metric("model_noise_std", "gauge", "Estimated (or known) noise standard deviation (the "
           "adapted one with noise.adaptive).", _M),
    Metric("model_offset_drift_rate", "gauge", "Variance rate of the offset's random walk in "
           "use, in the target's units squared per second (adapted with "
           "forgetting.adapt_offset; nan without an offset drift).", _M),
    Metric("model_updates", "gauge", "Lab results in the posterior since the last reset.", _M),
    Metric("model_lab_age_seconds", "gauge", "Sample time of the newest features minus that "
           "of the last accepted lab result (feed clock, not wall clock).", _M),
    Metric("model_stale_after_seconds", "gauge", "Lab age beyond which the model is stale: "
           "[model.lab] stale_after, or derived from the observed lab interval.", _M),
    Metric("model_identified", "gauge", "1 when the model can predict.", _M),
    Metric("model_frozen", "gauge", "1 while learning is frozen.", _M),
    # per model, from its detectors (models with alerts enabled)
    Metric("model_trust_level", "gauge", "Trust level: 0 normal, 1 caution, 2 untrusted "
           "(0 while commissioning, when no reason is held).", _M),
    Metric("model_trust_state", "gauge", "1 for the model's current trust state "
           "(`commissioning` until its trust alerts count).", ("model", "state")),
    Metric("model_alert_reason", "gauge", "Level at which each alert reason is held (0 when "
           "not held).", ("model", "reason")),
    Metric("model_alert_acknowledged", "gauge", "1 when every held reason has been "
           "acknowledged.", _M),
    *(Metric(f"model_{k}", "gauge", v, _M) for k, v in _DETECTOR_HELP.items()),
    # the service
    Metric("models", "gauge", "Configured models."),
    Metric("unknown_topic_messages", "counter", "Feed messages that name no configured model, "
           "by reason (frames: not two frames; unknown_model: the topic is no model's "
           "name).", ("reason",)),
    Metric("config_reloads", "counter", "Configuration reloads, by result (ok, error: the "
           "file is invalid, unavailable: no config file).", ("result",)),
    Metric("feed_disconnects", "counter", "Feed connections dropped, per feed endpoint "
           "(whatever the cause).", ("endpoint",)),
    Metric("feed_connection_failures", "counter", "Feed connections lost, per endpoint and "
           "cause: handshake_failed (the CURVE keys do not match, or one side is not using "
           "CURVE), protocol_error (usually a message over ZMQ_MAXMSGSIZE), publisher_gone "
           "(the publisher stopped; not a fault).", ("endpoint", "cause")),
    Metric("feed_reconnects", "counter", "Reconnections the daemon started itself, after its "
           "back-off (libzmq gives an endpoint up after a protocol error).", ("endpoint",)),
    # the state folder (only when one is open)
    Metric("wal_records", "counter", "Write-ahead log records appended by this process."),
    Metric("checkpoints", "counter", "Checkpoints written by this process."),
    Metric("wal_replayed_records", "gauge", "Write-ahead log records replayed at start-up."),
    Metric("wal_pending_records", "gauge", "Records written but not fsynced yet."),
)
BY_NAME = {m.name: m for m in METRICS}


def metrics_markdown() -> str:
    """``docs/metrics.md``: every metric family with its type, labels and help."""
    lines = [
        "# Metrics",
        "",
        "<!-- Generated by daemon.runtime.metrics.metrics_markdown(); edit METRICS in",
        "daemon/runtime/metrics.py and regenerate, do not edit by hand. -->",
        "",
        "The daemon serves these on its Prometheus endpoint (`[daemon] metrics`). Counters are",
        "plain integers bumped on the hot path; gauges are computed from the model state when",
        "Prometheus scrapes. Every series whose label values are known in advance (each",
        "model's rejection reasons, the reload results, the feed endpoints and causes) exists",
        "from the first scrape on, at zero, so `increase()` and `rate()` see the first event.",
        "The detector gauges (`model_trust_*` to `model_param_drift`) exist for models with",
        "alerts enabled; the `wal_*` and `checkpoints` series when a state folder is open.",
        "",
        f"Rejection reasons (`reason` of `{PREFIX}_rejected_total`): "
        + ", ".join(f"`{r}`" for r in MODEL_REASONS) + ".",
        "",
        f"Trust states (`state`): {', '.join(f'`{s}`' for s in TRUST_STATES)}. Alert reasons "
        f"(`reason` of `{PREFIX}_model_alert_reason`): {', '.join(f'`{r}`' for r in REASONS)}.",
        "",
        "| Metric | Type | Labels | Help |",
        "|---|---|---|---|",
    ]
    for m in METRICS:
        labels = ", ".join(f"`{x}`" for x in m.labels) or "-"
        lines.append(f"| `{m.exposed}` | {m.kind} | {labels} | {m.help} |")
    return "\n".join(lines) + "\n"


def _offset_rate(r) -> float:
    """The constant term's drift rate of the policy in use (nan when it has none)."""
    adapted = r.post.adapted
    if adapted is not None and adapted["rate"] is not None:
        return adapted["rate"]
    q = getattr(r.post.forgetting, "q", None)
    if isinstance(q, tuple):
        const = r.basis.exponents.sum(axis=1) == 0
        for qj, c in zip(q, const.tolist(), strict=True):
            if c and qj > 0:
                return qj
    return math.nan


class ServiceCollector:
    """Custom collector over a :class:`daemon.runtime.service.Service`."""

    def __init__(self, service):
        self._service = service

    def describe(self):
        # Families are dynamic (per model); an empty describe keeps registration cheap.
        return []

    def collect(self):
        svc = self._service
        runners = list(svc.runners.values())
        f = {m.name: m.family() for m in METRICS}
        for r in runners:
            m = [r.name]
            f["messages_received"].add_metric(m, svc.received.get(r.name, 0))
            f["feature_samples"].add_metric(m, r.n_features)
            f["predictions_published"].add_metric(m, r.n_predictions)
            f["lab_results_received"].add_metric(m, r.n_lab)
            f["lab_results_learned"].add_metric(m, r.n_learned)
            f["feed_gaps"].add_metric(m, r.n_gaps)
            f["feed_lost_messages"].add_metric(m, r.n_lost)
            counts = r.rejected
            for reason in MODEL_REASONS:
                f["rejected"].add_metric([r.name, reason], counts.get(reason, 0))
            for reason in sorted(set(counts) - set(MODEL_REASONS)):
                f["rejected"].add_metric([r.name, reason], counts[reason])
            f["model_predictive_std"].add_metric(m, r.last_std)
            nv = r.post.noise_var
            f["model_noise_std"].add_metric(m, math.sqrt(nv) if nv == nv else math.nan)
            f["model_offset_drift_rate"].add_metric(m, _offset_rate(r))
            f["model_updates"].add_metric(m, r.post.n_updates)
            if r.last_lab_t is not None and r.last_x_t is not None:
                f["model_lab_age_seconds"].add_metric(m, max(0.0, r.last_x_t - r.last_lab_t))
            else:
                f["model_lab_age_seconds"].add_metric(m, math.nan)
            f["model_stale_after_seconds"].add_metric(m, r.stale_after)
            f["model_identified"].add_metric(m, 1.0 if r.post.identified else 0.0)
            f["model_frozen"].add_metric(m, 1.0 if r.frozen else 0.0)
            if r.monitor is not None:
                self._detectors(f, r)
        f["models"].add_metric([], len(runners))
        unknown = svc.rejected_unknown
        for reason in (*UNKNOWN_TOPIC_REASONS,
                       *sorted(set(unknown) - set(UNKNOWN_TOPIC_REASONS))):
            f["unknown_topic_messages"].add_metric([reason], unknown.get(reason, 0))
        for result in (*RELOAD_RESULTS, *sorted(set(svc.reloads) - set(RELOAD_RESULTS))):
            f["config_reloads"].add_metric([result], svc.reloads.get(result, 0))
        stats = svc.feed_stats
        # copies: the feed watcher thread writes these counters
        for ep, n in sorted(dict(stats.disconnects).items()):
            f["feed_disconnects"].add_metric([ep], n)
        for ep, n in sorted(dict(stats.reconnects).items()):
            f["feed_reconnects"].add_metric([ep], n)
        for (ep, cause), n in sorted(dict(stats.failures).items()):
            f["feed_connection_failures"].add_metric([ep, cause], n)
        store = svc.store
        for m in METRICS:
            if m.name.startswith(("wal_", "checkpoints")) and store is None:
                continue
            if m.name == "wal_records":
                f[m.name].add_metric([], svc.wal_records)
            elif m.name == "checkpoints":
                f[m.name].add_metric([], svc.checkpoints)
            elif m.name == "wal_replayed_records":
                f[m.name].add_metric([], svc.replayed)
            elif m.name == "wal_pending_records":
                f[m.name].add_metric([], store.pending)
            yield f[m.name]
        yield from svc.extra_metrics()

    @staticmethod
    def _detectors(f: dict, r) -> None:
        mon = r.monitor
        m = [r.name]
        f["model_trust_level"].add_metric(m, mon.trust.level)
        state = mon.state
        for st in TRUST_STATES:
            f["model_trust_state"].add_metric([r.name, st], 1.0 if state == st else 0.0)
        held = {name: lvl for name, lvl, _v, _l in mon.trust.reasons}
        for name in REASONS:
            f["model_alert_reason"].add_metric([r.name, name], held.get(name, 0))
        f["model_alert_acknowledged"].add_metric(m, 1.0 if mon.trust.acknowledged else 0.0)
        cs = mon.cusum.to_state()
        cal = _calibration_means(mon.calibration)
        values = {
            "cusum_upper": cs["upper"], "cusum_lower": cs["lower"],
            "spread_statistic": mon.spread.statistic, "coverage_ratio": cal["coverage"],
            "log_score": cal["log_score"], "crps": cal["crps"],
            "std_ratio": mon.last["std_ratio"], "leverage": mon.last["leverage"],
            "region_distance": mon.last["region"], "param_drift": mon.last["drift"],
        }
        for k, v in values.items():
            f[f"model_{k}"].add_metric(m, v)
