"""Prometheus exposition: everything is computed at scrape time from the runners' snapshot.

The hot path only bumps plain integer counters on the runners; this collector turns them,
and the model state, into metric families when Prometheus scrapes. The registry is passed
in explicitly, never the process-global default.
"""

from __future__ import annotations

import math

from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

from daemon.runtime.monitor import REASONS, STATES, _calibration_means

PREFIX = "posteriord"


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
        yield from self._detectors(runners)
        yield from svc.extra_metrics()

    def _detectors(self, runners):
        g = GaugeMetricFamily
        level = g(f"{PREFIX}_model_trust_level", "Trust level: 0 normal, 1 caution, "
                  "2 untrusted.", labels=["model"])
        state = g(f"{PREFIX}_model_trust_state", "1 for the model's current trust state.",
                  labels=["model", "state"])
        reason = g(f"{PREFIX}_model_alert_reason", "Level at which each alert reason is held "
                   "(0 when not held).", labels=["model", "reason"])
        acked = g(f"{PREFIX}_model_alert_acknowledged", "1 when every held reason has been "
                  "acknowledged.", labels=["model"])
        names = {
            "cusum_upper": "Upper mean-shift CUSUM statistic on z.",
            "cusum_lower": "Lower mean-shift CUSUM statistic on z.",
            "spread_statistic": "Spread (variance increase) CUSUM statistic on z.",
            "coverage_ratio": "Exponentially weighted coverage of the prediction interval.",
            "log_score": "Exponentially weighted negative log predictive density at lab results.",
            "crps": "Exponentially weighted CRPS at lab results, in the target's units.",
            "std_ratio": "Predictive std over its typical value.",
            "leverage": "Largest leverage phi'V phi in the last prediction batch.",
            "region_distance": "Largest Mahalanobis distance of the inputs from the learned "
                               "region in the last prediction batch.",
            "param_drift": "Mahalanobis distance of the weight change over the drift window.",
        }
        fams = {k: g(f"{PREFIX}_model_{k}", v, labels=["model"]) for k, v in names.items()}
        for r in runners:
            mon = r.monitor
            if mon is None:
                continue
            m = [r.name]
            level.add_metric(m, mon.trust.level)
            for st in STATES:
                state.add_metric([r.name, st], 1.0 if mon.trust.state == st else 0.0)
            held = {name: lvl for name, lvl, _v, _l in mon.trust.reasons}
            for name in REASONS:
                reason.add_metric([r.name, name], held.get(name, 0))
            acked.add_metric(m, 1.0 if mon.trust.acknowledged else 0.0)
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
                fams[k].add_metric(m, v)
        yield from (level, state, reason, acked, *fams.values())
