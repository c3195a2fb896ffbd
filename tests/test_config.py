"""Tests for daemon.config: defaults, checks and their messages, durations, endpoints,
building the numerical objects (checked against scikit-learn and statsmodels), the demo
config, fingerprints and the generated settings documentation."""

from __future__ import annotations

import ipaddress
import json
import math
import os
import subprocess
import sys
import tomllib
from datetime import timedelta
from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.special import comb
from sklearn.linear_model import Ridge

from daemon.config import (
    REQUIRED,
    SECTIONS,
    SETTINGS,
    Config,
    ConfigError,
    DaemonConfig,
    InputConfig,
    ModelConfig,
    demo_config,
    describe,
    format_duration,
    load,
    loads,
    parse_duration,
    settings_markdown,
)
from daemon.config.durations import format_drift, parse_drift
from daemon.endpoints import is_loopback
from daemon.workbench import plant
from recursive import Posterior
from recursive.basis import Identity, Polynomial
from recursive.forgetting import TermDrift

ROOT = Path(__file__).resolve().parents[1]

MINIMAL = """
[[model]]
name = "m1"
inputs = [{tag = "A", lo = 0, hi = 1}]
"""


def _model(text: str = "") -> ModelConfig:
    """The single model of MINIMAL with ``text`` (TOML tables) appended."""
    return loads(MINIMAL + text).models[0]


def _err(text: str, source: str = "plant.toml") -> ConfigError:
    with pytest.raises(ConfigError) as info:
        loads(text, source)
    return info.value


def _place(section: str, key: str, literal: str) -> str:
    """A config with the one-model MINIMAL layout and ``key = literal`` in ``section``."""
    inp = {"tag": '"A"', "lo": "0", "hi": "1"}
    top = {"name": '"m1"'}
    extra = ""
    daemon = ""
    if section == "daemon":
        daemon = f"[daemon]\n{key} = {literal}\n"
    elif section == "model.inputs":
        inp[key] = literal
    elif section == "model":
        top[key] = literal
    else:
        extra = f"[{section}]\n{key} = {literal}\n"
    inputs = "inputs = [{" + ", ".join(f"{k} = {v}" for k, v in inp.items()) + "}]"
    head = "\n".join(f"{k} = {v}" for k, v in top.items())
    return f"{daemon}[[model]]\n{head}\n{inputs}\n{extra}"


def _full_key(section: str, key: str) -> str:
    if section == "daemon":
        return f"daemon.{key}"
    if section == "model":
        return f"model[0].{key}"
    if section == "model.inputs":
        return f"model[0].inputs[0].{key}"
    return f"model[0].{section.partition('.')[2]}.{key}"


# ------------------------------------------------------------------------------- defaults
DAY = timedelta(days=1).total_seconds()
HOUR = timedelta(hours=1).total_seconds()

# The defaults as the specification states them, written out independently of the table.
DAEMON_DEFAULTS = {
    "feeds": ("tcp://127.0.0.1:5555",),
    "publish": "tcp://127.0.0.1:5556",
    "control": "tcp://127.0.0.1:5557",
    "metrics": "127.0.0.1:9108",
    "state_dir": "state",
    "log_level": "info",
    "log_format": "text",
    "batch_limit": 65536,
    "batch_bytes": 64 * 1024 * 1024,
    "max_message_bytes": 2**20,
    "reconnect_ivl": 0.1,
    "reconnect_ivl_max": 10.0,
    "hwm": 100000,
    "checkpoint_every": 300.0,
    "checkpoint_wal_bytes": 512 * 1024,
    "fsync": "group",
    "group_commit": 0.05,
    "future_tolerance": 3600.0,
    "on_corruption": "refuse",
    "shard": "",
    "curve_secret_key": "",
    "curve_clients": "",
    "curve_admins": "",
    "curve_feed_server_key": "",
}
MODEL_DEFAULTS = {
    "target": None,
    "unit": None,
    "basis_kind": "polynomial",
    "degree": 1,
    "interactions": True,
    "family": "legendre",
    "alpha": 1.0,
    "prior_mean": None,
    "noise_std": None,
    "noise_guess": 1.0,
    "noise_strength": 2.0,
    "forgetting": "stabilized",
    "half_life": 5 * DAY,
    "q": None,
    "offset_drift": None,
    "linear_drift": None,
    "higher_drift": None,
    # adaptive rates (docs/settings.md: off unless asked for)
    "noise_adaptive": False,
    "noise_half_life": None,
    "vb_iterations": 3,
    "adapt_offset": False,
    "offset_drift_min": None,
    "offset_drift_max": None,
    "adapt_window": 30.0,
    "gate": 4.0,
    "gate_release": 3,
    "level": 0.95,
    "keep": 12 * HOUR,
    "keep_count": 5000,
    "tolerance": 120.0,
    "stale_after": None,
    "stale_factor": 3.0,
    "stale_min": HOUR,
    "stale_max": 7 * DAY,
    "alerts": True,
    "cusum_k": 0.5,
    "cusum_h": 5.0,
    "head_start": 0.0,
    "spread_sigma": 1.5,
    "spread_h": 5.0,
    "hold": 5,
    "calibration_half_life": 50.0,
    "coverage_min": 0.8,
    "std_limit": None,
    "std_ratio": 3.0,
    "std_half_life": 50.0,
    "leverage_limit": 3.0,
    "region_limit": 5.0,
    "region_half_life": 200.0,
    "region_min_samples": 40,
    "drift_window": 7 * DAY,
    "drift_limit": 6.0,
    "clear_count": 3,
    "clear_time": HOUR,
    "commissioning_labs": 30,
    "commissioning_time": 7 * DAY,
    "auto_flatten": False,
    "flatten_keep": 0.2,
}


@pytest.mark.parametrize("field,value", sorted(DAEMON_DEFAULTS.items()))
def test_daemon_default(field, value):
    assert getattr(loads("").daemon, field) == value
    assert getattr(DaemonConfig(), field) == value
    assert type(getattr(loads("").daemon, field)) is type(value)


@pytest.mark.parametrize("field,value", sorted(MODEL_DEFAULTS.items()))
def test_model_default(field, value):
    m = _model()
    assert getattr(m, field) == value
    if value is not None:
        assert type(getattr(m, field)) is type(value)


def test_every_setting_has_a_stated_default():
    stated = {**DAEMON_DEFAULTS, **MODEL_DEFAULTS, "dead_time": 0.0}
    for row in SETTINGS:
        if row.default is REQUIRED:
            assert row.field in {"name", "tag", "lo", "hi"}
        else:
            assert stated[row.field] == row.default, row.field


def test_minimal_model_and_empty_file():
    m = _model()
    assert m.name == "m1"
    assert m.inputs == (InputConfig("A", 0.0, 1.0, 0.0),)
    assert loads("") == Config(DaemonConfig(), (), "<string>")
    assert loads("", "x.toml").source == "x.toml"


# ------------------------------------------------------------------------------- durations
# Expected values from the standard library (datetime.timedelta), not from the parser.
DURATIONS = [
    ("250ms", timedelta(milliseconds=250)),
    ("90s", timedelta(seconds=90)),
    ("5m", timedelta(minutes=5)),
    ("36h", timedelta(hours=36)),
    ("5d", timedelta(days=5)),
    ("2w", timedelta(weeks=2)),
    ("1h30m", timedelta(hours=1, minutes=30)),
    ("1.5h", timedelta(hours=1.5)),
    (".5s", timedelta(seconds=0.5)),
    ("1d 12h", timedelta(days=1, hours=12)),
    (" 10d ", timedelta(days=10)),
    ("2w3d4h5m6s7ms", timedelta(weeks=2, days=3, hours=4, minutes=5, seconds=6,
                                milliseconds=7)),
    ("0s", timedelta(0)),
    (0, timedelta(0)),
    (0.0, timedelta(0)),
    ("0", timedelta(0)),
]


@pytest.mark.parametrize("text,expected", DURATIONS)
def test_parse_duration(text, expected):
    got = parse_duration(text)
    assert isinstance(got, float)
    assert got == pytest.approx(expected.total_seconds(), rel=1e-12, abs=0)


@pytest.mark.parametrize("bad", [
    -1, -0.5, math.nan, math.inf, "", "   ", "5", "-5m", "+5m", "5x", "5 mins", "m", "5M",
    "1m1h", "1h1h", "1e3s", "5s5ms5s", "tomorrow", True, None, [1], "1,5h", 90, 2.5, "27",
])
def test_parse_duration_rejects(bad):
    with pytest.raises(ValueError) as info:
        parse_duration(bad)
    assert repr(bad) in str(info.value)


@pytest.mark.parametrize("seconds,text", [
    (10 * DAY, "10d"), (5400.0, "1h30m"), (0.25, "250ms"), (0.0, "0s"), (300.0, "5m"),
    (timedelta(days=1, hours=1, minutes=1, seconds=1.5).total_seconds(), "1d1h1m1s500ms"),
    (1e-4, "0.0001s"), (14 * DAY, "14d"),
])
def test_format_duration(seconds, text):
    assert format_duration(seconds) == text
    assert parse_duration(text) == pytest.approx(seconds, rel=1e-12)


@pytest.mark.parametrize("bad", [-1.0, math.nan, math.inf])
def test_format_duration_rejects(bad):
    with pytest.raises(ValueError, match=repr(bad).replace("(", r"\(")):
        format_duration(bad)


def test_durations_in_config_use_parse_duration():
    m = _model('[model.forgetting]\nhalf_life = "1h30m"\n[model.lab]\ntolerance = "90s"\n')
    assert m.half_life == timedelta(hours=1, minutes=30).total_seconds()
    assert m.tolerance == 90.0
    assert _model("[model.lab]\ntolerance = 0\n").tolerance == 0.0


@pytest.mark.parametrize("raw,number", [("27", "27"), ("2.5", "2.5"), ('"27"', "27")])
def test_bare_number_duration_is_an_error_that_suggests_units(raw, number):
    with pytest.raises(ConfigError) as info:
        _model(f"[model.forgetting]\nhalf_life = {raw}\n")
    err = info.value
    assert err.key == "model[0].forgetting.half_life"
    assert "unit" in err.expected
    assert f'did you mean "{number}h"?' in str(err) and f'"{number}s"' in str(err)


@pytest.mark.parametrize("value", [27, 27.0, "27", " 3 "])
def test_parse_duration_bare_number_suggests_units(value):
    with pytest.raises(ValueError, match='did you mean "'):
        parse_duration(value)


# ------------------------------------------------------------------------------- endpoints
@pytest.mark.parametrize("endpoint", [
    "tcp://127.0.0.1:5556", "tcp://127.3.4.5:1", "tcp://[::1]:5556", "tcp://0.0.0.0:5556",
    "tcp://192.168.1.10:5556", "tcp://[::]:5556", "tcp://10.0.0.1;127.0.0.1:5556",
    "tcp://[::ffff:7f00:1]:5556",
])
def test_is_loopback_ip_literals_match_ipaddress(endpoint):
    # reference: the standard library's ipaddress.is_loopback on the destination host
    host = endpoint.rpartition(";")[2].removeprefix("tcp://").rpartition(":")[0].strip("[]")
    assert is_loopback(endpoint) is ipaddress.ip_address(host).is_loopback


@pytest.mark.parametrize("endpoint,expected", [
    ("tcp://localhost:5556", True), ("tcp://LocalHost:1", True), ("ipc:///tmp/x.sock", True),
    ("inproc://feed", True), ("tcp://*:5556", False), ("tcp://eth0:5556", False),
    ("tcp://plant-historian.example:5555", False),
])
def test_is_loopback_names(endpoint, expected):
    assert is_loopback(endpoint) is expected


@pytest.mark.parametrize("bad", ["udp://127.0.0.1:1", "127.0.0.1:5556", 5, None])
def test_is_loopback_rejects(bad):
    with pytest.raises(ValueError, match=repr(bad)):
        is_loopback(bad)


@pytest.mark.parametrize("endpoint", [
    "tcp://127.0.0.1:5556", "tcp://*:5556", "tcp://127.0.0.1:*", "tcp://[::1]:1",
    "tcp://eth0:65535", "ipc:///run/p.sock", "inproc://x",
])
def test_endpoint_accepted(endpoint):
    curve = ('curve_secret_key = "k/d.key_secret"\ncurve_clients = "c"\ncurve_admins = "a"\n'
             if not is_loopback(endpoint) else "")
    assert loads(f'[daemon]\npublish = "{endpoint}"\n{curve}').daemon.publish == endpoint


@pytest.mark.parametrize("key", ["publish", "control"])
def test_non_loopback_bind_without_curve_is_refused(key):
    e = _err(f'[daemon]\n{key} = "tcp://0.0.0.0:5599"\n')
    assert e.key == f"daemon.{key}"
    assert e.expected.startswith("a loopback or ipc endpoint, or CURVE")
    e = _err('[daemon]\ncurve_clients = "c"\n')
    assert e.key == "daemon.curve_clients"
    e = _err('[daemon]\ncurve_secret_key = "k"\ncurve_admins = "a"\n')
    assert e.key == "daemon.curve_clients"


def test_shard_setting():
    assert loads('[daemon]\nshard = " 1 / 3 "\n').daemon.shard_spec() == (1, 3)
    assert loads("").daemon.shard_spec() is None
    e = _err('[daemon]\nshard = "3/3"\n')
    assert e.key == "daemon.shard" and e.got == '"3/3"'


@pytest.mark.parametrize("endpoint", [
    "udp://127.0.0.1:5556", "127.0.0.1:5556", "tcp://127.0.0.1", "tcp://127.0.0.1:0",
    "tcp://127.0.0.1:65536", "tcp://:5556", "inproc://", "ipc://", "tcp://[::1]5556",
])
def test_endpoint_rejected(endpoint):
    e = _err(f'[daemon]\npublish = "{endpoint}"\n')
    assert e.key == "daemon.publish"
    assert e.got == f'"{endpoint}"'
    assert e.expected.startswith("a ZeroMQ endpoint like")


@pytest.mark.parametrize("value", ["", "127.0.0.1:9108", "[::1]:9108", "0.0.0.0:1"])
def test_metrics_accepted(value):
    assert loads(f'[daemon]\nmetrics = "{value}"\n').daemon.metrics == value


@pytest.mark.parametrize("value", ["localhost", "127.0.0.1:", ":9108", "h:0", "h:70000",
                                   "h:port"])
def test_metrics_rejected(value):
    e = _err(f'[daemon]\nmetrics = "{value}"\n')
    assert (e.key, e.got) == ("daemon.metrics", f'"{value}"')
    assert '"host:port"' in e.expected


# ------------------------------------------------------------------------------- messages
def test_message_names_file_model_key_expected_and_got(tmp_path, monkeypatch):
    text = "".join(
        f'[[model]]\nname = "{n}"\ninputs = [{{tag = "A", lo = 0, hi = 1}}]\n'
        for n in ("a", "b")
    ) + ('[[model]]\nname = "c301.solvent"\ninputs = [{tag = "A", lo = 0, hi = 1}]\n'
         '[model.forgetting]\nhalf_life = "tomorrow"\n')
    (tmp_path / "plant.toml").write_text(text)
    monkeypatch.chdir(tmp_path)
    with pytest.raises(ConfigError) as info:
        load("plant.toml")
    e = info.value
    assert str(e) == ('plant.toml: model[2] "c301.solvent" key forgetting.half_life: '
                      'expected a duration like "36h" or "5d", got "tomorrow"')
    assert isinstance(e, ValueError)
    assert (e.file, e.key, e.expected, e.got) == (
        "plant.toml", "model[2].forgetting.half_life", 'a duration like "36h" or "5d"',
        '"tomorrow"')


# A value of the wrong type for every setting: a TOML inline table fits none of them.
@pytest.mark.parametrize("row", SETTINGS, ids=lambda r: f"{r.section}.{r.key}")
def test_every_setting_rejects_wrong_type(row):
    e = _err(_place(row.section, row.key, "{bad = 1}"))
    assert e.file == "plant.toml"
    assert e.key == _full_key(row.section, row.key)
    assert e.got == "{bad = 1}"
    assert e.expected
    assert str(e).startswith("plant.toml: ")
    assert f"expected {e.expected}, got {{bad = 1}}" in str(e)


_VIOLATING = {"> 0": "0", ">= 0": "-1", ">= 1": "0", "in (0, 1)": "1.0", "> 1": "1.0",
              "0 or > 1": "0.5",
              "in [0, 1]": "1.5"}


@pytest.mark.parametrize("row", [r for r in SETTINGS if r.check is not None],
                         ids=lambda r: f"{r.section}.{r.key}")
def test_every_check_rejects_out_of_range(row):
    literal = _VIOLATING[row.check.text]
    e = _err(_place(row.section, row.key, literal))
    assert e.key == _full_key(row.section, row.key)
    assert e.got == literal
    if row.kind.doc == "duration" and literal.startswith("-"):
        # a negative duration is not a duration at all
        assert e.expected == 'a duration like "36h" or "5d"'
    else:
        assert e.expected == f"{row.kind.noun} {row.check.text}"


# Explicit cases: (TOML appended to MINIMAL or whole document, full key, expected, got).
CASES = [
    ('[daemon]\nlog_level = "verbose"\n', "daemon.log_level",
     'one of "debug", "info", "warning", "error"', '"verbose"'),
    ('[daemon]\nlog_format = "xml"\n', "daemon.log_format", 'one of "text", "json"', '"xml"'),
    ("[daemon]\nbatch_limit = 0\n", "daemon.batch_limit", "an integer >= 1", "0"),
    ("[daemon]\nbatch_limit = 2.0\n", "daemon.batch_limit", "an integer", "2.0"),
    ("[daemon]\nhwm = -1\n", "daemon.hwm", "an integer >= 0", "-1"),
    ("[daemon]\nmax_message_bytes = true\n", "daemon.max_message_bytes", "an integer", "true"),
    ('[daemon]\nreconnect_ivl = "0s"\n', "daemon.reconnect_ivl", "a duration > 0", '"0s"'),
    ('[daemon]\nreconnect_ivl = "1s"\nreconnect_ivl_max = "500ms"\n',
     "daemon.reconnect_ivl_max", "a duration >= daemon.reconnect_ivl (1s)", '"500ms"'),
    ('[daemon]\ncontrol = "tcp://127.0.0.1:5556"\n', "daemon.control",
     "an endpoint different from daemon.publish", '"tcp://127.0.0.1:5556"'),
    ("[daemon]\nfeeds = []\n", "daemon.feeds",
     'a non-empty array of ZeroMQ endpoints like ["tcp://127.0.0.1:5555"]', "[]"),
    ('[daemon]\nfeeds = "tcp://127.0.0.1:5555"\n', "daemon.feeds",
     'a non-empty array of ZeroMQ endpoints like ["tcp://127.0.0.1:5555"]',
     '"tcp://127.0.0.1:5555"'),
    ('[daemon]\nstate_dir = ""\n', "daemon.state_dir", "a non-empty string", '""'),
    ("[daemon]\ncheckpoint_every = nan\n", "daemon.checkpoint_every",
     'a duration like "36h" or "5d"', "nan"),
    ("daemon = 3\n", "daemon", "a table ([daemon])", "3"),
    ("model = 3\n", "model", "an array of [[model]] tables", "3"),
    ('[[model]]\nname = "has space"\ninputs = [{tag = "A", lo = 0, hi = 1}]\n', "model[0].name",
     'a name of 1 to 100 ASCII letters, digits, ".", "_" or "-"', '"has space"'),
    (f'[[model]]\nname = "{"x" * 101}"\ninputs = [{{tag = "A", lo = 0, hi = 1}}]\n',
     "model[0].name", 'a name of 1 to 100 ASCII letters, digits, ".", "_" or "-"',
     '"' + "x" * 101 + '"'),
    ('[[model]]\ninputs = [{tag = "A", lo = 0, hi = 1}]\n', "model[0].name",
     'a name of 1 to 100 ASCII letters, digits, ".", "_" or "-"',
     "nothing (the key is missing)"),
    ('[[model]]\nname = "m"\n', "model[0].inputs",
     'an array of input tables like [{tag = "TI-104", lo = 95, hi = 125}]',
     "nothing (the key is missing)"),
    ('[[model]]\nname = "m"\ninputs = []\n', "model[0].inputs",
     'an array of input tables like [{tag = "TI-104", lo = 95, hi = 125}]', "[]"),
    ('[[model]]\nname = "m"\ninputs = ["A"]\n', "model[0].inputs[0]",
     'an input table like {tag = "TI-104", lo = 95, hi = 125}', '"A"'),
    ('[[model]]\nname = "m"\ninputs = [{tag = "A", lo = 0}]\n', "model[0].inputs[0].hi",
     "a finite number", "nothing (the key is missing)"),
    ('[[model]]\nname = "m"\ninputs = [{tag = "A", lo = 1, hi = 1}]\n', "model[0].inputs[0].hi",
     "a number > lo (1)", "1"),
    ('[[model]]\nname = "m"\ninputs = [{tag = "A", lo = 0, hi = 1}, {tag = "A", lo = 0, '
     'hi = 2}]\n', "model[0].inputs[1].tag",
     "a tag not used by an earlier input (inputs[0])", '"A"'),
    ('[[model]]\nname = "m"\ninputs = [{tag = "T I", lo = 0, hi = 1}]\n',
     "model[0].inputs[0].tag", "a non-empty tag name without spaces", '"T I"'),
    ('[[model]]\nname = "m"\ninputs = [{tag = "A", lo = 0, hi = inf}]\n',
     "model[0].inputs[0].hi", "a finite number", "inf"),
    ('[[model]]\nname = "m"\ninputs = [{tag = "A", lo = 0, hi = 1, dead_time = "-5m"}]\n',
     "model[0].inputs[0].dead_time", 'a duration like "36h" or "5d"', '"-5m"'),
    (MINIMAL + MINIMAL, "model[1].name", "a name not used by an earlier model (model[0])",
     '"m1"'),
    (MINIMAL + "basis = 2\n", "model[0].basis", "a table ([model.basis])", "2"),
    (MINIMAL + '[model.basis]\nkind = "spline"\n', "model[0].basis.kind",
     'one of "identity", "polynomial"', '"spline"'),
    (MINIMAL + '[model.basis]\nfamily = "hermite"\n', "model[0].basis.family",
     'one of "legendre", "chebyshev", "monomial"', '"hermite"'),
    (MINIMAL + "[model.basis]\ndegree = 1.5\n", "model[0].basis.degree", "an integer", "1.5"),
    (MINIMAL + '[model.basis]\ninteractions = "yes"\n', "model[0].basis.interactions",
     "true or false", '"yes"'),
    (MINIMAL + '[model.basis]\nkind = "identity"\ndegree = 2\n', "model[0].basis.degree",
     'no value (it only applies to basis.kind = "polynomial")', "2"),
    (MINIMAL + '[model.basis]\nkind = "identity"\nfamily = "legendre"\n',
     "model[0].basis.family", 'no value (it only applies to basis.kind = "polynomial")',
     '"legendre"'),
    (MINIMAL + "[model.prior]\nmean = [1, 2, 3]\n", "model[0].prior.mean",
     "an array of 2 numbers, one per basis term (1, A)", "[1, 2, 3]"),
    (MINIMAL + '[model.prior]\nmean = [1, "x"]\n', "model[0].prior.mean",
     "an array of finite numbers", '[1, "x"]'),
    (MINIMAL + "[model.prior]\nalpha = -0.1\n", "model[0].prior.alpha", "a number >= 0",
     "-0.1"),
    (MINIMAL + "[model.noise]\nstd = 2\nguess = 3\n", "model[0].noise.guess",
     "no value (noise.std is set, so the noise is not learned)", "3"),
    (MINIMAL + "[model.noise]\nstd = 2\nstrength = 0\n", "model[0].noise.strength",
     "no value (noise.std is set, so the noise is not learned)", "0"),
    (MINIMAL + '[model.forgetting]\npolicy = "random_walk"\n', "model[0].forgetting.q",
     'a number > 0 (required with policy = "random_walk")', "nothing (the key is missing)"),
    (MINIMAL + "[model.forgetting]\nq = 1e-6\n", "model[0].forgetting.q",
     'no value (q only applies to policy = "random_walk", policy is "stabilized")', "1e-06"),
    (MINIMAL + '[model.forgetting]\npolicy = "none"\nhalf_life = "1d"\n',
     "model[0].forgetting.half_life", 'no value (policy is "none")', '"1d"'),
    (MINIMAL + '[model.forgetting]\npolicy = "kalman"\n', "model[0].forgetting.policy",
     'one of "stabilized", "exponential", "random_walk", "offset", "term_drift", "none"',
     '"kalman"'),
    (MINIMAL + "[model.gate]\nk = 0\nrelease = 2\n", "model[0].gate.release",
     "no value (gate.k = 0 turns the gate off)", "2"),
    (MINIMAL + "[model.gate]\nrelease = -1\n", "model[0].gate.release", "an integer >= 0",
     "-1"),
    (MINIMAL + "level = 0\n", "model[0].level", "a number in (0, 1)", "0"),
    (MINIMAL + '[model.lab]\nkeep_count = 0\n', "model[0].lab.keep_count", "an integer >= 1",
     "0"),
    (MINIMAL + '[model.lab]\nstale_after = "soon"\n', "model[0].lab.stale_after",
     'a duration like "36h" or "5d"', '"soon"'),
]


@pytest.mark.parametrize("text,key,expected,got", CASES)
def test_error_cases(text, key, expected, got):
    e = _err(text)
    assert (e.file, e.key, e.expected, e.got) == ("plant.toml", key, expected, got)
    msg = str(e)
    assert msg.startswith("plant.toml: ")
    assert msg.endswith(f"expected {expected}, got {got}")
    local = key.split(".", 1)[1] if key.startswith("model[") and "." in key else key
    assert f"key {local}: " in msg


def test_model_named_in_message_once_its_name_is_known():
    e = _err(MINIMAL.replace('"m1"', '"c301.x"') + "[model.gate]\nk = -1\n")
    assert e.where == 'model[0] "c301.x"'
    assert str(e).startswith('plant.toml: model[0] "c301.x" key gate.k: expected')
    e = _err(MINIMAL.replace('"m1"', '"bad name"') + "[model.gate]\nk = -1\n")
    assert e.where == "model[0]" and e.key == "model[0].name"


def test_daemon_message_has_no_model_part():
    e = _err("[daemon]\nhwm = -5\n")
    assert str(e) == "plant.toml: key daemon.hwm: expected an integer >= 0, got -5"
    assert e.where == ""


# ------------------------------------------------------------------------------- unknown keys
@pytest.mark.parametrize("text,key,suggestion", [
    ("modle = 1\n", "modle", "model"),
    ("[deamon]\n", "deamon", "daemon"),
    ("[daemon]\npublsh = 'tcp://127.0.0.1:1'\n", "daemon.publsh", "publish"),
    (MINIMAL + "[model.forgetting]\nhalf_lfie = '3d'\n", "model[0].forgetting.half_lfie",
     "half_life"),
    (MINIMAL + "[model.basis]\ndegre = 2\n", "model[0].basis.degre", "degree"),
    (MINIMAL + "[model.forgeting]\npolicy = 'none'\n", "model[0].forgeting", "forgetting"),
    (MINIMAL + "[model.lab]\nstale_aftr = '1h'\n", "model[0].lab.stale_aftr", "stale_after"),
    (MINIMAL + "levle = 0.9\n", "model[0].levle", "level"),
    ('[[model]]\nname = "m"\ninputs = [{tag = "A", lo = 0, hi = 1, dead_tme = 5}]\n',
     "model[0].inputs[0].dead_tme", "dead_time"),
])
def test_unknown_key_with_suggestion(text, key, suggestion):
    e = _err(text)
    bad = key.rpartition(".")[2] if "." in key else key
    assert e.key == key
    assert e.got == f'unknown key "{bad}"'
    assert e.hint == f'did you mean "{suggestion}"?'
    assert str(e).endswith(f'; did you mean "{suggestion}"?')
    assert suggestion in e.expected


def test_unknown_key_without_close_match():
    e = _err(MINIMAL + "[model.gate]\nzzzz = 1\n")
    assert e.key == "model[0].gate.zzzz"
    assert e.hint == ""
    assert e.expected == "a key of [model.gate] (k, release)"
    assert "did you mean" not in str(e)


def test_unknown_key_is_reported_before_missing_required():
    e = _err('[[model]]\nnmae = "m"\ninputs = [{tag = "A", lo = 0, hi = 1}]\n')
    assert e.key == "model[0].nmae" and e.hint == 'did you mean "name"?'


# ------------------------------------------------------------------------------- file errors
def test_bad_toml_and_missing_file(tmp_path):
    e = _err("[daemon\n")
    assert e.key is None and e.expected == "valid TOML" and e.file == "plant.toml"
    with pytest.raises(tomllib.TOMLDecodeError) as ref:
        tomllib.loads("[daemon\n")
    assert e.got == str(ref.value)
    missing = tmp_path / "nope.toml"
    with pytest.raises(ConfigError) as info:
        load(missing)
    assert info.value.file == str(missing) and info.value.key is None
    raw = tmp_path / "latin1.toml"
    raw.write_bytes(b'[daemon]\nstate_dir = "\xe9"\n')
    with pytest.raises(ConfigError, match="UTF-8"):
        load(raw)


def test_load_reads_a_file(tmp_path):
    path = tmp_path / "plant.toml"
    path.write_text(MINIMAL)
    cfg = load(path)
    assert cfg.source == str(path)
    assert cfg.models == loads(MINIMAL).models


# ------------------------------------------------------------------------------- building
def test_build_basis_kinds():
    m = _model('[model.basis]\ndegree = 3\ninteractions = false\nfamily = "chebyshev"\n')
    b = m.build_basis()
    assert isinstance(b, Polynomial) and b.scale
    assert (b.degree, b.interactions, b.family) == (3, False, "chebyshev")
    i = _model('[model.basis]\nkind = "identity"\n').build_basis()
    assert isinstance(i, Identity) and i.names == ("1", "A")


def test_build_posterior_config_matches():
    m = loads(
        '[[model]]\nname = "m"\ninputs = [{tag = "A", lo = 0, hi = 10}, '
        '{tag = "B", lo = -5, hi = 5, dead_time = "5m"}]\n'
        "[model.basis]\ndegree = 2\n[model.prior]\nalpha = 0.25\n"
        "[model.noise]\nguess = 10\nstrength = 3\n"
        '[model.forgetting]\nhalf_life = "10d"\n[model.gate]\nk = 3.5\nrelease = 2\n'
    ).models[0]
    p = m.build_posterior()
    assert isinstance(p, Posterior)
    cfg = p.config()
    n = int(comb(2 + 2, 2))  # stars and bars: C(d + degree, degree) terms
    assert cfg["n_features"] == n == len(m.build_basis().names)
    assert cfg["alpha"] == [0.0] + [0.25] * (n - 1)  # constant term unpenalized
    assert cfg["prior_mean"] == [0.0] * n
    assert cfg["noise_std"] is None and cfg["noise_prior"] == [10.0, 3.0]
    assert cfg["forgetting"] == {"kind": "stabilized",
                                 "half_life": timedelta(days=10).total_seconds()}
    assert cfg["gate"] == {"k": 3.5, "release": 2}
    assert m.inputs[1].dead_time == timedelta(minutes=5).total_seconds()


@pytest.mark.parametrize("text,forgetting,gate", [
    ('[model.forgetting]\npolicy = "exponential"\nhalf_life = "36h"\n',
     {"kind": "exponential", "half_life": timedelta(hours=36).total_seconds()},
     {"k": 4.0, "release": 3}),
    ('[model.forgetting]\npolicy = "random_walk"\nq = 2e-9\n',
     {"kind": "random_walk", "q": 2e-9, "noise_half_life": None}, {"k": 4.0, "release": 3}),
    ('[model.forgetting]\npolicy = "random_walk"\nq = 2e-9\nhalf_life = "2w"\n',
     {"kind": "random_walk", "q": 2e-9, "noise_half_life": timedelta(weeks=2).total_seconds()},
     {"k": 4.0, "release": 3}),
    ('[model.forgetting]\npolicy = "none"\n[model.gate]\nk = 0\n', None, None),
    ("[model.gate]\nrelease = 0\n",
     {"kind": "stabilized", "half_life": timedelta(days=5).total_seconds()},
     {"k": 4.0, "release": None}),
])
def test_build_posterior_policies(text, forgetting, gate):
    cfg = _model(text).build_posterior().config()
    assert cfg["forgetting"] == forgetting
    assert cfg["gate"] == gate


def test_build_posterior_known_noise_and_prior_mean():
    m = _model("[model.noise]\nstd = 8\n[model.prior]\nmean = [100, -5]\n")
    cfg = m.build_posterior().config()
    assert cfg["noise_std"] == 8.0 and cfg["noise_prior"] is None
    assert cfg["prior_mean"] == [100.0, -5.0]
    assert m.prior_mean == (100.0, -5.0)


def _data(m: ModelConfig, n: int, seed: int):
    rng = np.random.default_rng(seed)
    X = np.column_stack([rng.uniform(i.lo, i.hi, n) for i in m.inputs])
    Phi = m.build_basis()(X)
    w = rng.normal(0.0, 3.0, Phi.shape[1])
    y = Phi @ w + rng.normal(0.0, 2.0, n)
    return Phi, y


RIDGE_MODEL = """
[[model]]
name = "ridge"
inputs = [{tag = "A", lo = 0, hi = 10}, {tag = "B", lo = -5, hi = 5}, {tag = "C", lo = 1, hi = 2}]
[model.basis]
degree = 2
[model.prior]
alpha = 0.5
[model.noise]
std = 2.0
[model.forgetting]
policy = "none"
[model.gate]
k = 0
"""


def test_posterior_mean_is_ridge_with_unpenalized_intercept():
    # reference: scikit-learn Ridge with fit_intercept=True leaves the intercept unpenalized;
    # with known noise sigma the posterior mode is ridge with lambda = alpha * sigma^2
    m = loads(RIDGE_MODEL).models[0]
    Phi, y = _data(m, 60, seed=11)
    post = m.build_posterior()
    for phi, yi in zip(Phi, y, strict=True):
        post.update(phi, yi)
    ref = Ridge(alpha=0.5 * 2.0**2, fit_intercept=True, solver="cholesky").fit(Phi[:, 1:], y)
    np.testing.assert_allclose(post.mean[0], ref.intercept_, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(post.mean[1:], ref.coef_, rtol=1e-8, atol=1e-9)


def test_flat_prior_learned_noise_is_ols():
    # reference: statsmodels OLS; with alpha = 0 and strength = 0 the posterior mean is the
    # least-squares fit and the noise estimate is SSE / (N - p)
    text = RIDGE_MODEL.replace("alpha = 0.5", "alpha = 0").replace(
        "std = 2.0", "guess = 5.0\nstrength = 0")
    m = loads(text).models[0]
    Phi, y = _data(m, 80, seed=12)
    post = m.build_posterior()
    for phi, yi in zip(Phi, y, strict=True):
        post.update(phi, yi)
    ols = sm.OLS(y, Phi).fit()
    np.testing.assert_allclose(post.mean, ols.params, rtol=1e-8, atol=1e-9)
    np.testing.assert_allclose(post.noise_var, ols.scale, rtol=1e-8)
    assert post.dof == ols.df_resid


# ------------------------------------------------------------------------------- demo
def test_demo_config():
    cfg = demo_config()
    assert cfg.source == "<demo>"
    (m,) = cfg.models
    assert m.name == "c301.bottoms_solvent"
    assert tuple(i.tag for i in m.inputs) == plant.TAGS
    assert {i.tag: (i.lo, i.hi) for i in m.inputs} == plant.RANGES
    assert (m.basis_kind, m.degree, m.interactions, m.family) == (
        "polynomial", 2, True, "legendre")
    assert m.noise_std is None and m.noise_guess == 10.0
    assert m.forgetting == "stabilized" and m.half_life == timedelta(days=10).total_seconds()
    assert (m.gate, m.level) == (4.0, 0.95)
    d = cfg.daemon
    for ep in (*d.feeds, d.publish, d.control, f"tcp://{d.metrics}"):
        assert ep.startswith("tcp://127.0.0.1:")
        assert is_loopback(ep)
    text = (ROOT / "daemon" / "config" / "demo.toml").read_text()
    assert "fictitious" in text


def test_demo_toml_is_package_data():
    pyproject = tomllib.loads((ROOT / "pyproject.toml").read_text())
    patterns = pyproject["tool"]["setuptools"]["package-data"]["daemon.config"]
    assert any(Path("demo.toml").match(p) for p in patterns)


def test_describe_demo_mentions_every_term_and_setting():
    cfg = demo_config()
    text = describe(cfg)
    m = cfg.models[0]
    names = m.build_basis().names
    assert len(names) == int(comb(4 + 2, 2))  # stars and bars, C(d + degree, degree)
    for term in names:
        assert f" {term} " in text, term
    for i in m.inputs:
        assert f"{i.tag}  range {i.lo:g} .. {i.hi:g}" in text
    for piece in ("c301.bottoms_solvent", "legendre", "degree 2", "stabilized", "10d",
                  "guess 10", "|z| > 4", "0.95", "tcp://127.0.0.1:5555", "tcp://127.0.0.1:5556",
                  "tcp://127.0.0.1:5557", "127.0.0.1:9108", "tolerance 2m",
                  "stale after 3 lab intervals + the lab delay",
                  "commissioning until 30 lab results learned or 7d",
                  m.fingerprint()):
        assert piece in text, piece
    assert "reachable from other hosts" not in text


def test_describe_variants():
    text = describe(loads(
        '[daemon]\npublish = "tcp://*:5556"\nmetrics = ""\ncurve_secret_key = "k"\n'
        'curve_clients = "c"\ncurve_admins = "a"\n' + MINIMAL
        + '[model.basis]\nkind = "identity"\n[model.noise]\nstd = 3\n'
        '[model.forgetting]\npolicy = "random_walk"\nq = 1e-7\n[model.gate]\nk = 0\n'))
    assert "tcp://*:5556  (reachable from other hosts)" in text
    assert "metrics (HTTP)         disabled" in text
    assert "identity" in text and "known, std 3" in text
    assert "random walk, q 1e-07 per second" in text and "gate: off" in text
    assert describe(loads("")).endswith("0 models")


# ------------------------------------------------------------------------------- fingerprint
FULL = """
[[model]]
name = "fp"
level = 0.9
inputs = [{tag = "A", lo = 0, hi = 10, dead_time = "1m"}, {tag = "B", lo = -1, hi = 1}]
[model.basis]
degree = 2
[model.prior]
alpha = 0.01
[model.noise]
guess = 5
strength = 2
[model.forgetting]
half_life = "10d"
[model.gate]
k = 4
release = 3
[model.lab]
keep = "12h"
keep_count = 5000
tolerance = "2m"
stale_after = "12h"
"""


def _fp(text: str) -> str:
    return loads(text).models[0].fingerprint()


def test_fingerprint_stable_across_loads_and_spellings(tmp_path):
    path = tmp_path / "a.toml"
    path.write_text(FULL)
    fp = load(path).models[0].fingerprint()
    assert fp == load(path).models[0].fingerprint() == _fp(FULL)
    assert len(fp) == 16 and int(fp, 16) >= 0
    assert _fp(FULL.replace('"10d"', '"240h"')) == fp
    assert _fp(FULL.replace('"10d"', '"864000s"')) == fp
    assert _fp(FULL.replace('dead_time = "1m"', 'dead_time = "60s"')) == fp
    assert _fp(FULL.replace("[model.gate]\nk = 4\nrelease = 3\n", "")) == fp  # defaults


def test_fingerprint_independent_of_the_process():
    code = ("import sys; from daemon.config import loads; "
            "print(loads(sys.stdin.read()).models[0].fingerprint())")
    outs = set()
    for seed in ("1", "2"):
        env = {**os.environ, "PYTHONHASHSEED": seed}
        run = subprocess.run([sys.executable, "-c", code], input=FULL, capture_output=True,
                             text=True, cwd=ROOT, env=env, check=True)
        outs.add(run.stdout.strip())
    assert outs == {_fp(FULL)}


@pytest.mark.parametrize("old,new,changes", [
    ("degree = 2", "degree = 3", True),
    ("degree = 2", 'degree = 2\nfamily = "chebyshev"', True),
    ("degree = 2", "degree = 2\ninteractions = false", True),
    ("[model.basis]\ndegree = 2", '[model.basis]\nkind = "identity"', True),
    ("alpha = 0.01", "alpha = 0.02", True),
    ("alpha = 0.01", "alpha = 0.01\nmean = [1, 0, 0, 0, 0, 0]", True),
    ("guess = 5\nstrength = 2", "std = 5", True),
    ("guess = 5", "guess = 6", True),
    ("strength = 2", "strength = 0", True),
    ('half_life = "10d"', 'half_life = "9d"', True),
    ('half_life = "10d"', 'half_life = "10d"\npolicy = "exponential"', True),
    ("k = 4", "k = 5", True),
    ("release = 3", "release = 4", True),
    ("k = 4\nrelease = 3", "k = 0", True),
    ("hi = 10", "hi = 11", True),
    ('tag = "B"', 'tag = "C"', True),
    ('dead_time = "1m"', 'dead_time = "2m"', True),
    ("level = 0.9", "level = 0.99", False),
    ('stale_after = "12h"', 'stale_after = "1d"', False),
    ('keep = "12h"', 'keep = "1d"', False),
    ("keep_count = 5000", "keep_count = 10", False),
    ('tolerance = "2m"', 'tolerance = "5m"', False),
    ('name = "fp"', 'name = "renamed"', False),
])
def test_fingerprint_changes_only_with_learning_settings(old, new, changes):
    assert old in FULL
    changed = FULL.replace(old, new, 1)
    assert (_fp(changed) != _fp(FULL)) is changes


def test_fingerprint_random_walk_settings():
    rw = FULL.replace('half_life = "10d"', 'policy = "random_walk"\nq = 1e-6')
    assert _fp(rw) != _fp(FULL)
    assert _fp(rw.replace("q = 1e-6", "q = 2e-6")) != _fp(rw)
    assert _fp(rw.replace("q = 1e-6", 'q = 1e-6\nhalf_life = "3d"')) != _fp(rw)


def test_learning_flags_are_what_the_fingerprint_uses():
    learning = {r.field for r in SETTINGS if r.learning}
    assert "level" not in learning and "stale_after" not in learning
    settings = loads(FULL).models[0].learning_settings()
    inputs_fields = {r.field for r in SETTINGS if r.section == "model.inputs"}
    # the drift rates enter only when set (fingerprints from before they existed hold)
    later = {"offset_drift", "linear_drift", "higher_drift", "noise_adaptive", "noise_half_life",
             "vb_iterations", "adapt_offset", "offset_drift_min", "offset_drift_max",
             "adapt_window"}
    assert set(settings) == (learning - inputs_fields - later) | {"inputs"}
    assert set(settings["inputs"][0]) == inputs_fields


# ------------------------------------------------------------------------------- docs
def test_docs_settings_md_is_generated():
    committed = (ROOT / "docs" / "settings.md").read_text(encoding="utf-8")
    assert committed == settings_markdown(), (
        "docs/settings.md is out of date; regenerate it with: python -c \"from daemon.config "
        "import settings_markdown; open('docs/settings.md', 'w').write(settings_markdown())\"")


def test_docs_list_every_setting_and_section():
    text = settings_markdown()
    for sec in SECTIONS:
        assert f"## `{sec.noun if sec.noun.startswith('[') else sec.name}`" in text
    for row in SETTINGS:
        assert f"| `{row.key}` |" in text, row.key


def test_alerts_head_start_must_be_below_the_decision_interval():
    e = _err(MINIMAL + "[model.alerts]\ncusum_h = 4.0\nhead_start = 4.0\n")
    assert e.key == "model[0].alerts.head_start"
    assert e.expected == "a number in [0, cusum_h = 4)"
    assert e.got == "4.0"
    m = loads(MINIMAL + "[model.alerts]\ncusum_h = 4.0\nhead_start = 2.0\nauto_flatten = true\n")
    assert (m.models[0].cusum_h, m.models[0].head_start) == (4.0, 2.0)
    # the automatic response changes what is learned; a detector limit does not
    base = loads(MINIMAL).models[0].fingerprint()
    assert m.models[0].fingerprint() != base
    assert loads(MINIMAL + "[model.alerts]\ncusum_h = 4.0\n").models[0].fingerprint() == base


# ------------------------------------------------------------------------------- drift rates
TWO = """
[[model]]
name = "m2"
inputs = [{tag = "A", lo = 0, hi = 1}, {tag = "B", lo = -1, hi = 1}]
[model.basis]
degree = 2
"""


def _two(forgetting: str) -> ModelConfig:
    return loads(TWO + "[model.forgetting]\n" + forgetting).models[0]


@pytest.mark.parametrize("text,s,span", [
    ("0.5 per 1h", 0.5, timedelta(hours=1)), ("2 per 4h", 2.0, timedelta(hours=4)),
    ("  1.5e-3 per 1d12h ", 1.5e-3, timedelta(days=1, hours=12)),
    ("0 per 1h", 0.0, timedelta(hours=1)), (".3 per 90s", 0.3, timedelta(seconds=90)),
])
def test_parse_drift_is_s_squared_over_t(text, s, span):
    # a random walk with variance rate q has Var(w(t+T) - w(t)) = q T (common practice:
    # the Wiener process), so a change of standard deviation s over T is q = s^2 / T
    assert parse_drift(text) == pytest.approx(s * s / span.total_seconds(), rel=1e-15)


def test_drift_rates_scale_with_the_square_root_of_time():
    assert parse_drift("0.5 per 1h") == pytest.approx(parse_drift("1 per 4h"), rel=1e-15)
    assert parse_drift(format_drift(parse_drift("0.37 per 5h"))) == pytest.approx(
        parse_drift("0.37 per 5h"), rel=1e-6)


@pytest.mark.parametrize("bad", ["0.5", "0.5 per", "per 1h", "0.5 per 1", "-1 per 1h",
                                 "0.5 per 0s", "0.5 per -1h", "x per 1h", "0.5per1h", 0.5, None,
                                 True, ["0.5 per 1h"]])
def test_parse_drift_rejects(bad):
    with pytest.raises(ValueError) as info:
        parse_drift(bad)
    assert repr(bad) in str(info.value)


def test_offset_policy_builds_term_drift_on_the_constant_only():
    m = _two('policy = "offset"\noffset_drift = "0.5 per 1h"\n')
    assert m.forgetting == "offset" and m.half_life == 5 * DAY
    assert m.offset_drift == 0.25 / 3600.0
    post = m.build_posterior()
    f = post.forgetting
    assert isinstance(f, TermDrift) and f.half_life == 5 * DAY
    names = m.build_basis().names
    assert names[0] == "1"
    assert f.q == (0.25 / 3600.0,) + (0.0,) * (len(names) - 1)
    m2 = _two('policy = "offset"\noffset_drift = "0.5 per 1h"\nhalf_life = "2d"\n')
    assert m2.build_posterior().forgetting.half_life == 2 * DAY


def test_term_drift_groups_by_degree():
    m = _two('policy = "term_drift"\noffset_drift = "1 per 1h"\nlinear_drift = "0.1 per 1d"\n'
             'higher_drift = "0.2 per 1d"\n')
    basis = m.build_basis()
    degree = basis.exponents.sum(axis=1)
    q = np.array(m.build_posterior().forgetting.q)
    assert m.half_life is None and m.build_posterior().forgetting.half_life is None
    np.testing.assert_array_equal(q[degree == 0], [1.0 / 3600.0])
    np.testing.assert_allclose(q[degree == 1], 0.01 / DAY, rtol=1e-15)
    np.testing.assert_allclose(q[degree >= 2], 0.04 / DAY, rtol=1e-15)
    assert (degree == 1).sum() == 2 and (degree >= 2).sum() == 3
    only_linear = _two('policy = "term_drift"\nlinear_drift = "0.1 per 1d"\nhalf_life = "3d"\n')
    f = only_linear.build_posterior().forgetting
    assert f.half_life == 3 * DAY and f.q[0] == 0.0


@pytest.mark.parametrize("forgetting,key,expected_part,got", [
    ('policy = "offset"\n', "offset_drift", "required with policy", "nothing (the key is "
     "missing)"),
    ('policy = "offset"\noffset_drift = 0.5\n', "offset_drift", "a drift rate like", "0.5"),
    ('policy = "offset"\noffset_drift = "0 per 1h"\n', "offset_drift", "above 0",
     '"0 per 1h"'),
    ('policy = "offset"\noffset_drift = "1 per 1h"\nlinear_drift = "1 per 1h"\n',
     "linear_drift", "no value", '"1 per 1h"'),
    ('policy = "stabilized"\noffset_drift = "1 per 1h"\n', "offset_drift", "no value",
     '"1 per 1h"'),
    ('policy = "random_walk"\nq = 1e-6\nhigher_drift = "1 per 1h"\n', "higher_drift",
     "no value", '"1 per 1h"'),
    ('policy = "term_drift"\n', "offset_drift", "at least one", "nothing (the key is missing)"),
    ('policy = "term_drift"\nlinear_drift = "0 per 1h"\n', "linear_drift", "at least one",
     '"0 per 1h"'),
    ('policy = "offset"\noffset_drift = "1 per 2"\n', "offset_drift", "a drift rate like",
     '"1 per 2"'),
])
def test_drift_errors_say_expected_got_where(forgetting, key, expected_part, got):
    e = _err(TWO + "[model.forgetting]\n" + forgetting)
    assert e.file == "plant.toml" and e.key == f"model[0].forgetting.{key}"
    assert e.where == 'model[0] "m2"'
    assert expected_part in e.expected and e.got == got


def test_drift_hints():
    assert 'did you mean "0.5 per 1h"?' in str(_err(TWO + '[model.forgetting]\n'
                                                       'policy = "offset"\noffset_drift = 0.5\n'))
    assert 'did you mean "1 per 2h"?' in str(_err(TWO + '[model.forgetting]\n'
                                                     'policy = "offset"\n'
                                                     'offset_drift = "1 per 2"\n'))


def test_drift_settings_round_trip_and_fingerprint():
    m = _two('policy = "term_drift"\noffset_drift = "1 per 1h"\nhigher_drift = "0.2 per 1d"\n'
             'half_life = "3d"\n')
    assert ModelConfig.from_state(m.to_state()) == m
    assert ModelConfig.from_state(json.loads(json.dumps(m.to_state()))) == m
    fp = m.fingerprint()
    same = _two('policy = "term_drift"\noffset_drift = "2 per 4h"\n'
                'higher_drift = "0.4 per 4d"\nhalf_life = "72h"\n')
    assert same.fingerprint() == fp  # the same rates spelled differently
    other = _two('policy = "term_drift"\noffset_drift = "1.1 per 1h"\n'
                 'higher_drift = "0.2 per 1d"\nhalf_life = "3d"\n')
    assert other.fingerprint() != fp
    assert {"offset_drift", "higher_drift"} <= set(m.learning_settings())


def test_describe_drift():
    text = describe(loads(TWO + '[model.forgetting]\npolicy = "offset"\n'
                          'offset_drift = "0.5 per 1h"\n'))
    assert "offset drift, with stabilized forgetting of all terms, half-life 5d" in text
    # 0.5 per sqrt(1h) is 0.5 * sqrt(24) per sqrt(1d) (from memory: sqrt(24) = 4.89898)
    assert "drifts 0.5 per 1h (2.45 per 1d; q = 6.944e-05 per second at the noise guess)" in text
    text = describe(loads(TWO + '[model.noise]\nstd = 0.3\n[model.forgetting]\n'
                          'policy = "term_drift"\nlinear_drift = "0.1 per 1d"\n'))
    assert "drift per term group, no other forgetting" in text
    assert "linear terms" in text and "known noise std" in text and "offset (constant)" not in text


def test_models_without_drift_keep_their_fingerprint_and_old_states_load():
    # fingerprints computed by the code before the drift settings existed (commit f8ae32b):
    # a restart after the upgrade must not throw learned state away
    assert _model().fingerprint() == "65c741c971cc7fd4"
    assert demo_config().models[0].fingerprint() == "ca8f80eaa75e75b5"
    m = _model()
    old = {k: v for k, v in m.to_state().items()
           if k not in ("offset_drift", "linear_drift", "higher_drift")}
    assert ModelConfig.from_state(old) == m
    drifting = _two('policy = "offset"\noffset_drift = "0.5 per 1h"\n')
    assert "offset_drift" in drifting.learning_settings()
    assert "offset_drift" not in m.learning_settings()
