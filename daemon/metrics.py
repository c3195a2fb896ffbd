"""Prometheus exposition: everything is computed at scrape time from the runners' snapshot.

The hot path only bumps plain integer counters on the runners; this collector turns them,
and the model state, into metric families when Prometheus scrapes. The registry is passed
in explicitly, never the process-global default.
"""

from __future__ import annotations

import math

from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

PREFIX = "posteriord"


class ServiceCollector:
    """Custom collector over a :class:`daemon.service.Service`."""

    def __init__(self, service):
        self._service = service

    def describe(self):
        # Families are dynamic (per model); an empty describe keeps registration cheap.
        return []

    def collect(self):
        svc = self._service
        runners = list(svc.runners.values())
        c = CounterMetricFamily
        g = GaugeMetricFamily
        received = c(f"{PREFIX}_messages_received", "Feed messages received, per model "
                     "(model=\"\" for messages that name no model).", labels=["model"])
        features = c(f"{PREFIX}_feature_samples", "Feature samples accepted.", labels=["model"])
        preds = c(f"{PREFIX}_predictions_published", "Predictions published.", labels=["model"])
        lab = c(f"{PREFIX}_lab_results_received", "Lab results received.", labels=["model"])
        learned = c(f"{PREFIX}_lab_results_learned", "Lab results learned from.",
                    labels=["model"])
        rejected = c(f"{PREFIX}_rejected", "Messages, samples or lab results rejected, by "
                     "reason.", labels=["model", "reason"])
        gaps = c(f"{PREFIX}_feed_gaps", "Gaps seen in publisher sequence numbers.",
                 labels=["model"])
        lost = c(f"{PREFIX}_feed_lost_messages", "Messages missing according to sequence "
                 "numbers.", labels=["model"])
        std = g(f"{PREFIX}_model_predictive_std", "Predictive standard deviation of the last "
                "prediction, in the target's units.", labels=["model"])
        noise = g(f"{PREFIX}_model_noise_std", "Estimated (or known) noise standard deviation.",
                  labels=["model"])
        updates = g(f"{PREFIX}_model_updates", "Lab results in the posterior since the last "
                    "reset.", labels=["model"])
        age = g(f"{PREFIX}_model_lab_age_seconds", "Sample time of the newest features minus "
                "that of the last accepted lab result (feed clock, not wall clock).",
                labels=["model"])
        ident = g(f"{PREFIX}_model_identified", "1 when the model can predict.", labels=["model"])
        frozen = g(f"{PREFIX}_model_frozen", "1 while learning is frozen.", labels=["model"])
        for r in runners:
            m = [r.name]
            received.add_metric(m, svc.received.get(r.name, 0))
            features.add_metric(m, r.n_features)
            preds.add_metric(m, r.n_predictions)
            lab.add_metric(m, r.n_lab)
            learned.add_metric(m, r.n_learned)
            gaps.add_metric(m, r.n_gaps)
            lost.add_metric(m, r.n_lost)
            for reason, n in sorted(r.rejected.items()):
                rejected.add_metric([r.name, reason], n)
            std.add_metric(m, r.last_std)
            nv = r.post.noise_var
            noise.add_metric(m, math.sqrt(nv) if nv == nv else math.nan)
            updates.add_metric(m, r.post.n_updates)
            if r.last_lab_t is not None and r.last_x_t is not None:
                age.add_metric(m, max(0.0, r.last_x_t - r.last_lab_t))
            else:
                age.add_metric(m, math.nan)
            ident.add_metric(m, 1.0 if r.post.identified else 0.0)
            frozen.add_metric(m, 1.0 if r.frozen else 0.0)
        received.add_metric([""], svc.received.get("", 0))
        for reason, n in sorted(svc.rejected_unknown.items()):
            rejected.add_metric(["", reason], n)
        up = g(f"{PREFIX}_models", "Configured models.")
        up.add_metric([], len(runners))
        reloads = c(f"{PREFIX}_config_reloads", "Configuration reloads, by result.",
                    labels=["result"])
        for result, n in sorted(svc.reloads.items()):
            reloads.add_metric([result], n)
        yield from (received, features, preds, lab, learned, rejected, gaps, lost, std, noise,
                    updates, age, ident, frozen, up, reloads)
        yield from svc.extra_metrics()
