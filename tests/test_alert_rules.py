"""Checks of docs/prometheus-alerts.yml, the example alerting rules.

The metric names, label names and label values the rules use are checked against what a real
:class:`daemon.runtime.service.Service` exports: its collector is scraped through
``prometheus_client.generate_latest`` after a short simulated feed (with gross lab errors, a
malformed message and failed reloads, so that every family has samples). The structure is
checked with PyYAML against the Prometheus rule-file format (groups, alert, expr, for, labels,
annotations). When ``promtool`` (Debian package ``prometheus``) is on the PATH, the file is
also checked by ``promtool check rules`` and some rules are run through ``promtool test rules``
on series that carry the exported label sets; without it those two tests are skipped.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from collections import defaultdict
from pathlib import Path

import msgpack
import pytest
import yaml
from conftest import MODEL, c301_model, toml_config
from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.parser import text_string_to_metric_families

from daemon.config import loads
from daemon.runtime import wire
from daemon.runtime.monitor import REASONS, STATES
from daemon.runtime.service import Service
from daemon.workbench import plant

RULES = Path(__file__).resolve().parent.parent / "docs" / "prometheus-alerts.yml"
PROMTOOL = shutil.which("promtool")
SEVERITIES = {"critical", "warning", "info"}
# Prometheus durations: units from largest to smallest, each at most once
DURATION = re.compile(r"^(\d+y)?(\d+w)?(\d+d)?(\d+h)?(\d+m)?(\d+s)?(\d+ms)?$")
PROMQL_WORDS = {
    # operators and modifiers
    "and", "or", "unless", "by", "without", "on", "ignoring", "group_left", "group_right",
    "bool", "offset",
    # aggregations and functions used, or likely to be
    "sum", "min", "max", "avg", "count", "topk", "bottomk", "quantile", "rate", "irate",
    "increase", "delta", "absent", "absent_over_time", "changes", "resets", "time",
    "max_over_time", "min_over_time", "avg_over_time", "clamp_min", "clamp_max", "vector",
}
# labels Prometheus adds to every scraped series
TARGET_LABELS = {"instance", "job"}


class Recorder:
    def send_multipart(self, frames) -> None:
        msgpack.unpackb(bytes(frames[1]), raw=False)


# ---------------------------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def exported(tmp_path_factory) -> dict[str, dict[str, set]]:
    """Sample name -> {label name -> values seen} from a real Service's collector."""
    models = [c301_model(), c301_model(name="quiet", alerts={"enabled": False})]
    config = loads(toml_config({"metrics": ""}, models), "<test>")
    svc = Service(config, registry=CollectorRegistry())
    svc.pub = Recorder()
    run = plant.simulate(plant.Scenario(seed=2, days=2.0, sample_period_s=600.0, blunders=3))
    frames = []
    for ev in plant.events(run):
        body = {"t": ev[1], "x": list(ev[2])} if ev[0] == "x" else {"t": ev[1], "y": ev[2]}
        frames.append([MODEL.encode(), wire.pack(body)])
    frames.append([MODEL.encode(), wire.pack({"t": 1.0, "x": [1.0, 2.0]})])  # bad_x
    frames.append([b"nobody", wire.pack({"t": 1.0, "x": [1.0]})])  # unknown_model
    svc.process(frames)
    assert svc.reload()[0] is False  # no config file: "unavailable"
    bad = tmp_path_factory.mktemp("cfg") / "bad.toml"
    bad.write_text("[daemon]\nno_such_key = 1\n")
    svc.config_path = str(bad)
    assert svc.reload()[0] is False  # "error"
    out: dict[str, dict[str, set]] = defaultdict(lambda: defaultdict(set))
    for family in text_string_to_metric_families(generate_latest(svc.registry).decode()):
        assert family.samples, f"family {family.name} has no samples in this run"
        for s in family.samples:
            out[s.name]
            for k, v in s.labels.items():
                out[s.name][k].add(v)
    return out


@pytest.fixture(scope="module")
def fresh() -> list[tuple[str, dict]]:
    """(sample name, labels) of every sample of a Service that has seen nothing yet."""
    models = [c301_model(), c301_model(name="quiet", alerts={"enabled": False})]
    svc = Service(loads(toml_config({"metrics": ""}, models), "<test>"),
                  registry=CollectorRegistry())
    return [(s.name, s.labels)
            for family in text_string_to_metric_families(generate_latest(svc.registry).decode())
            for s in family.samples]


@pytest.fixture(scope="module")
def rules() -> list[dict]:
    doc = yaml.safe_load(RULES.read_text())
    assert set(doc) == {"groups"}
    out = []
    for g in doc["groups"]:
        for r in g["rules"]:
            out.append({**r, "group": g["name"]})
    return out


# ---------------------------------------------------------------------------------- helpers
def strip_expr(expr: str) -> str:
    """The expression without strings, label matchers, ranges and grouping label lists."""
    e = re.sub(r'"(?:[^"\\]|\\.)*"', '""', expr)
    e = re.sub(r"\{[^}]*\}", "", e)
    e = re.sub(r"\[[^\]]*\]", "", e)
    return re.sub(r"\b(by|without|on|ignoring|group_left|group_right)\s*\([^)]*\)", r"\1", e)


def metric_names(expr: str) -> set[str]:
    return {w for w in re.findall(r"[A-Za-z_:][A-Za-z0-9_:]*", strip_expr(expr))
            if w not in PROMQL_WORDS}


def matchers(expr: str) -> list[tuple[str, str, str, str]]:
    """(metric, label, operator, value) of every label matcher."""
    out = []
    for name, body in re.findall(r"([A-Za-z_:][A-Za-z0-9_:]*)\s*\{([^}]*)\}", expr):
        for label, op, value in re.findall(r'(\w+)\s*(=~|!~|!=|=)\s*"([^"]*)"', body):
            out.append((name, label, op, value))
    return out


def grouping_labels(expr: str) -> list[tuple[str, list[str]]]:
    return [(kw, [x.strip() for x in body.split(",") if x.strip()])
            for kw, body in re.findall(
                r"\b(by|without|on|ignoring|group_left|group_right)\s*\(([^)]*)\)", expr)]


def result_labels(expr: str, exported) -> set[str]:
    """Labels the alerts of an expression can carry (enough for the templates used here)."""
    if expr.strip().startswith("absent("):
        return set()
    names = metric_names(expr)
    labels = set().union(*(set(exported[n]) for n in names)) | TARGET_LABELS
    for kw, ls in grouping_labels(expr):
        if kw == "without":
            labels -= set(ls)
        elif kw == "by":
            labels &= set(ls)
    return labels


def render(text: str, labels: dict) -> str:
    """Expand the {{ $labels.x }} templates, the only ones in the rules tested with promtool."""
    out = re.sub(r"\{\{\s*\$labels\.(\w+)\s*\}\}", lambda m: labels[m.group(1)], text)
    assert "{{" not in out, f"unexpanded template in {text!r}"
    return out


# ---------------------------------------------------------------------------------- structure
def test_rule_file_structure(rules):
    doc = yaml.safe_load(RULES.read_text())
    groups = [g["name"] for g in doc["groups"]]
    assert len(groups) == len(set(groups))
    for g in doc["groups"]:
        assert set(g) == {"name", "rules"} and g["rules"]
    names = [r["alert"] for r in rules]
    assert len(names) == len(set(names)), "alert names must be unique"
    for r in rules:
        assert set(r) == {"alert", "expr", "for", "labels", "annotations", "group"}, r["alert"]
        assert re.fullmatch(r"Posteriord[A-Z][A-Za-z]+", r["alert"]), r["alert"]
        assert isinstance(r["expr"], str) and r["expr"].strip()
        assert isinstance(r["for"], str) and DURATION.match(r["for"]) and r["for"], r["alert"]
        assert set(r["labels"]) == {"severity"} and r["labels"]["severity"] in SEVERITIES
        ann = r["annotations"]
        assert set(ann) == {"summary", "description", "action"}, r["alert"]
        for key, text in ann.items():
            assert isinstance(text, str) and len(text.split()) >= 4, (r["alert"], key)
        assert len(ann["summary"]) <= 100, r["alert"]


def test_exprs_name_only_exported_metrics(rules, exported):
    for r in rules:
        names = metric_names(r["expr"])
        assert names, r["alert"]
        missing = names - set(exported)
        assert not missing, f"{r['alert']}: {sorted(missing)} not exported"


def test_label_matchers_use_exported_labels_and_values(rules, exported):
    documented = {("posteriord_rejected_total", "reason"): set(wire.REASONS),
                  ("posteriord_model_alert_reason", "reason"): set(REASONS),
                  ("posteriord_model_trust_state", "state"): set(STATES)}
    for r in rules:
        for name, label, op, value in matchers(r["expr"]):
            assert label in exported[name], f"{r['alert']}: {name} has no label {label}"
            if op in ("=~", "!~"):
                assert re.fullmatch(r"[\w|]+", value), f"{r['alert']}: keep regexes simple"
                values = value.split("|")
            else:
                values = [value]
            allowed = exported[name][label] | documented.get((name, label), set())
            for v in values:
                assert v in allowed, f"{r['alert']}: {name}{{{label}}} never has {v!r}"
        names = metric_names(r["expr"])
        for _kw, ls in grouping_labels(r["expr"]):
            for label in ls:
                assert any(label in exported[n] for n in names) or label in TARGET_LABELS, \
                    f"{r['alert']}: grouping label {label} on none of {sorted(names)}"


def test_templates_use_labels_the_alert_carries(rules, exported):
    for r in rules:
        have = result_labels(r["expr"], exported)
        for text in r["annotations"].values():
            for label in re.findall(r"\$labels\.(\w+)", text):
                assert label in have, f"{r['alert']}: template uses {label}, alert has {have}"
            for tmpl in re.findall(r"\{\{(.*?)\}\}", text):
                assert re.fullmatch(r"\s*\$(labels\.\w+|value)(\s*\|\s*humanize)?\s*", tmpl), \
                    f"{r['alert']}: unexpected template {tmpl!r}"


def test_every_trust_reason_has_a_rule(rules):
    covered = set()
    for r in rules:
        for name, label, op, value in matchers(r["expr"]):
            if name == "posteriord_model_alert_reason" and label == "reason":
                assert op in ("=", "=~")
                covered |= set(value.split("|"))
    assert covered == set(REASONS)


def test_counters_in_rate_and_increase_exist_at_zero_before_their_first_event(rules, fresh):
    """increase() and rate() need two samples of a series: a counter series that appears
    with its first event would let that event pass unseen (the first failed reload would
    not fire PosteriordConfigReloadFailed). Every series a rule takes the rate or increase
    of must be exported, at zero, before anything happened."""
    checked = 0
    for r in rules:
        for name, body in re.findall(r"\b(?:rate|increase)\(\s*([A-Za-z_:][A-Za-z0-9_:]*)"
                                     r"\s*(\{[^}]*\})?\s*\[", r["expr"]):
            want = [(label, op, value) for _n, label, op, value in matchers(name + body)]

            def match(labels, want=want):
                for label, op, value in want:
                    got = labels.get(label, "")
                    ok = {"=": got == value, "!=": got != value,
                          "=~": re.fullmatch(value, got) is not None,
                          "!~": re.fullmatch(value, got) is None}[op]
                    if not ok:
                        return False
                return True

            series = [labels for n, labels in fresh if n == name and match(labels)]
            assert series, f"{r['alert']}: no {name}{body} series before the first event"
            checked += 1
    assert checked >= 5


def test_no_exported_label_is_empty(exported):
    """Prometheus stores a label with an empty value as no label at all."""
    for name, labels in exported.items():
        for label, values in labels.items():
            assert "" not in values, f"{name}{{{label}=\"\"}}"


# ---------------------------------------------------------------------------------- promtool
needs_promtool = pytest.mark.skipif(PROMTOOL is None, reason="promtool is not installed "
                                    "(Debian package prometheus)")


@needs_promtool
def test_promtool_check_rules():
    res = subprocess.run([PROMTOOL, "check", "rules", str(RULES)], capture_output=True,
                         text=True, timeout=60)
    assert res.returncode == 0, res.stdout + res.stderr
    assert "SUCCESS" in res.stdout + res.stderr


def _series(name: str, labels: dict, values: str) -> dict:
    body = ", ".join(f'{k}="{v}"' for k, v in sorted(labels.items()))
    return {"series": f"{name}{{{body}}}", "values": values}


@needs_promtool
def test_promtool_rule_unit_tests(rules, exported, tmp_path):
    by_name = {r["alert"]: r for r in rules}
    # the label sets of the series are those the daemon exports, plus the scrape target's
    assert set(exported["posteriord_model_alert_reason"]) == {"model", "reason"}
    assert set(exported["posteriord_model_alert_acknowledged"]) == {"model"}
    target = {"instance": "plant-a:9108", "job": "posteriord"}
    a, b = {**target, "model": MODEL}, {**target, "model": "other"}
    reason = "posteriord_model_alert_reason"
    acked = "posteriord_model_alert_acknowledged"

    def expect(alert: str, labels: dict) -> dict:
        r = by_name[alert]
        full = {**labels, "severity": r["labels"]["severity"]}
        return {"exp_labels": full,
                "exp_annotations": {k: render(v, full) for k, v in r["annotations"].items()}}

    tests = [
        {   # mean shift: fires after its 5 minutes, not for an acknowledged model
            "interval": "1m",
            "input_series": [
                _series(reason, {**a, "reason": "mean_shift"}, "0 2x40"),
                _series(acked, a, "0x40"),
                _series(reason, {**b, "reason": "mean_shift"}, "0 2x40"),
                _series(acked, b, "0 1x40"),
                _series(reason, {**a, "reason": "stale"}, "0x10 1x30"),
                _series(reason, {**a, "reason": "out_of_range"}, "0 1x40"),
                _series("posteriord_model_trust_level", a, "2x1600"),
            ],
            "alert_rule_test": [
                {"eval_time": "4m", "alertname": "PosteriordMeanShift", "exp_alerts": []},
                {"eval_time": "7m", "alertname": "PosteriordMeanShift",
                 "exp_alerts": [expect("PosteriordMeanShift", {**a, "reason": "mean_shift"})]},
                {"eval_time": "30m", "alertname": "PosteriordLabResultsStale", "exp_alerts": []},
                {"eval_time": "41m", "alertname": "PosteriordLabResultsStale",
                 "exp_alerts": [expect("PosteriordLabResultsStale", {**a, "reason": "stale"})]},
                {"eval_time": "35m", "alertname": "PosteriordInputsOutsideLearnedRegion",
                 "exp_alerts": [expect("PosteriordInputsOutsideLearnedRegion",
                                       {**a, "reason": "out_of_range"})]},
                {"eval_time": "23h", "alertname": "PosteriordModelUntrustedForADay",
                 "exp_alerts": []},
                {"eval_time": "25h", "alertname": "PosteriordModelUntrustedForADay",
                 "exp_alerts": [expect("PosteriordModelUntrustedForADay", a)]},
            ],
        },
        {   # no posteriord series at all
            "interval": "1m",
            "input_series": [],
            "alert_rule_test": [
                {"eval_time": "6m", "alertname": "PosteriordMetricsAbsent",
                 "exp_alerts": [expect("PosteriordMetricsAbsent", {})]},
            ],
        },
        {   # the feed stops: the prediction counter no longer moves
            "interval": "1m",
            "input_series": [
                _series("posteriord_predictions_published_total", a, "0+60x20 1200x40"),
                _series("posteriord_model_identified", a, "1x60"),
                _series("posteriord_models", target, "1x60"),
            ],
            "alert_rule_test": [
                {"eval_time": "15m", "alertname": "PosteriordNoPredictions", "exp_alerts": []},
                {"eval_time": "55m", "alertname": "PosteriordNoPredictions",
                 "exp_alerts": [expect("PosteriordNoPredictions", a)]},
                {"eval_time": "55m", "alertname": "PosteriordMetricsAbsent", "exp_alerts": []},
            ],
        },
    ]
    spec = tmp_path / "rules-test.yml"
    spec.write_text(yaml.safe_dump({"rule_files": [str(RULES)], "evaluation_interval": "1m",
                                    "tests": tests}, sort_keys=False))
    res = subprocess.run([PROMTOOL, "test", "rules", str(spec)], capture_output=True,
                         text=True, timeout=60)
    assert res.returncode == 0, res.stdout + res.stderr
