"""The metrics a running daemon serves, read over HTTP with prometheus_client's own parser.

The families must be exactly those declared in daemon.runtime.metrics.METRICS (so the
generated docs/metrics.md cannot drift from what is served), and every series whose label
values are known in advance must be there at zero before its first event: Prometheus'
increase() and rate() need two samples of a series, so a series born with its first event
hides that event (Prometheus documentation, "Querying: functions", on increase()).
"""

from __future__ import annotations

import urllib.request
from pathlib import Path

import pytest
from conftest import MODEL, PROBE, c301_model, metric, scrape
from prometheus_client.parser import text_string_to_metric_families

from daemon.runtime.feed import CAUSES
from daemon.runtime.metrics import (
    METRICS,
    MODEL_REASONS,
    RELOAD_RESULTS,
    UNKNOWN_TOPIC_REASONS,
    metrics_markdown,
)

ROOT = Path(__file__).resolve().parent.parent


def families(address) -> dict:
    host, port = address
    with urllib.request.urlopen(f"http://{host}:{port}/metrics", timeout=10) as r:
        text = r.read().decode()
    return {f.name: f for f in text_string_to_metric_families(text)}


def test_docs_metrics_md_is_generated():
    committed = (ROOT / "docs" / "metrics.md").read_text(encoding="utf-8")
    assert committed == metrics_markdown(), (
        "docs/metrics.md is out of date; regenerate it with: python -c \"from "
        "daemon.runtime.metrics import metrics_markdown; "
        "open('docs/metrics.md', 'w').write(metrics_markdown())\"")


def test_the_table_lists_every_family_once():
    text = metrics_markdown()
    for m in METRICS:
        assert text.count(f"| `{m.exposed}` |") == 1, m.name
    for name in ("posteriord_models", "posteriord_wal_records_total",
                 "posteriord_checkpoints_total", "posteriord_wal_replayed_records",
                 "posteriord_wal_pending_records", "posteriord_unknown_topic_messages_total"):
        assert f"| `{name}` |" in text


@pytest.fixture
def daemon(start_service):
    return start_service([c301_model()])


def test_a_scrape_serves_exactly_the_declared_families(daemon):
    served = families(daemon.metrics_address)
    declared = {m.full_name: m for m in METRICS}
    assert set(served) == set(declared)
    for name, fam in served.items():
        m = declared[name]
        assert fam.type == m.kind, name
        assert fam.documentation == m.help, name
        assert fam.samples, name
        suffix = "_total" if m.kind == "counter" else ""
        for s in fam.samples:
            if s.name.endswith("_created"):
                continue
            assert s.name == name + suffix
            assert set(s.labels) == set(m.labels), (name, s.labels)


def test_series_known_in_advance_are_served_at_zero(daemon):
    h = daemon
    got = h.scrape()
    for model in (MODEL, PROBE):
        for reason in MODEL_REASONS:
            key = ("posteriord_rejected_total",
                   frozenset({("model", model), ("reason", reason)}))
            assert got.get(key) == 0.0, key
    for result in RELOAD_RESULTS:
        key = ("posteriord_config_reloads_total", frozenset({("result", result)}))
        assert got.get(key) == 0.0, key
    for reason in UNKNOWN_TOPIC_REASONS:
        key = ("posteriord_unknown_topic_messages_total", frozenset({("reason", reason)}))
        assert got.get(key) == 0.0, key
    ep = h.feed.endpoint
    for cause in CAUSES:
        key = ("posteriord_feed_connection_failures_total",
               frozenset({("endpoint", ep), ("cause", cause)}))
        assert got.get(key) == 0.0, key


def test_first_failed_reload_moves_a_series_that_was_at_zero(daemon, tmp_path):
    h = daemon
    key = ("posteriord_config_reloads_total", frozenset({("result", "error")}))
    assert h.scrape()[key] == 0.0
    bad = tmp_path / "bad.toml"
    bad.write_text("[daemon]\nno_such_key = 1\n")
    h.svc.config_path = str(bad)  # read by the loop thread at the next reload
    reply = h.ctl("reload")
    assert reply["ok"] is False and "no_such_key" in reply["error"]
    assert h.scrape()[key] == 1.0


def test_unknown_topics_have_a_metric_of_their_own(daemon):
    h = daemon
    extra = MODEL + "_extra"  # the subscription to MODEL matches it as a prefix
    h.feed.send(extra, {"t": 1.0, "x": [1.0]})
    h.feed.send_frames([extra.encode(), b"a", b"b"])  # three frames, no model either
    h.barrier()
    name = "posteriord_unknown_topic_messages_total"
    got = scrape(h.metrics_address)
    assert metric(got, name, reason="unknown_model") == 1.0
    assert metric(got, name, reason="frames") == 1.0
    assert metric(got, "posteriord_rejected_total", model=MODEL, reason="frames") == 0.0
    for (sample, labels), _v in got.items():
        assert all(v != "" for _k, v in labels), (sample, labels)
