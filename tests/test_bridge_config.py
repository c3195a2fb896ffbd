"""The bridges' config tables: same checks and error form as the daemon's settings."""

from __future__ import annotations

import copy
from pathlib import Path

import pytest
from conftest import _toml_value

from daemon.config import ConfigError, loads
from daemon.config.bridges import BRIDGE_SETTINGS, bridges_markdown
from daemon.config.loader import loads_bridge

ROOT = Path(__file__).resolve().parent.parent

BASE = """
[[model]]
name = "two"
inputs = [{tag = "A", lo = 0, hi = 10}, {tag = "B", lo = 0, hi = 10}]
"""
IN = """
[opcua_in]
server = "opc.tcp://historian:4840"
anonymous = true
[[opcua_in.node]]
model = "two"
tag = "A"
node = "ns=2;s=A"
[[opcua_in.node]]
model = "two"
tag = "B"
node = "ns=2;s=B"
"""


def _err(text: str, section: str) -> ConfigError:
    with pytest.raises(ConfigError) as info:
        loads_bridge(text, section, "plant.toml")
    return info.value


def test_daemon_accepts_and_ignores_bridge_tables():
    config = loads(BASE + IN + '[mqtt]\nport = 1883\n[lab_folder]\nfolder = "lab"\n')
    assert [m.name for m in config.models] == ["two"]
    with pytest.raises(ConfigError, match="unknown key"):
        loads(BASE + "[opcua_inn]\n")


def test_a_good_table_and_its_defaults():
    cfg = loads_bridge(BASE + IN, "opcua_in")
    assert cfg.server == "opc.tcp://historian:4840"
    assert cfg.sampling_interval == 1.0 and cfg.security_policy == "none"
    assert [n["tag"] for n in cfg.items["node"]] == ["A", "B"]


CASES = [
    (IN.replace('tag = "B"', 'tag = "C"'), "opcua_in", "opcua_in.node[1].tag",
     "an input of two (A, B)", '"C"'),
    (IN.replace('model = "two"\ntag = "B"', 'model = "one"\ntag = "B"'), "opcua_in",
     "opcua_in.node[1].model", "the name of a [[model]] (two)", '"one"'),
    (IN[:IN.index("[[opcua_in.node]]\nmodel = \"two\"\ntag = \"B\"")], "opcua_in",
     "opcua_in.node", "a node for every input of two", "none for B"),
    (IN.replace("anonymous = true", ""), "opcua_in", "opcua_in.user",
     "a user name, or anonymous = true", "nothing (the key is missing)"),
    (IN.replace('"ns=2;s=A"', '"TI-104"'), "opcua_in", "opcua_in.node[0].node",
     'an OPC UA node id like "ns=2;s=C301.TI104.PV"', '"TI-104"'),
    (IN.replace("opc.tcp://historian:4840", "http://historian"), "opcua_in",
     "opcua_in.server", 'an OPC UA address like "opc.tcp://historian:4840"',
     '"http://historian"'),
    (IN.replace("anonymous = true", 'anonymous = true\nsecurity_policy = "Basic256Sha256"'),
     "opcua_in", "opcua_in.certificate",
     'a file (required with security_policy = "Basic256Sha256")',
     "nothing (the key is missing)"),
    (IN.replace("anonymous = true", "anonymus = true"), "opcua_in", "opcua_in.anonymus",
     None, 'unknown key "anonymus"'),
    ('[opcua_out]\nendpoint = "opc.tcp://0.0.0.0:4840"\n', "opcua_out",
     "opcua_out.security_policy", '"Basic256Sha256" (the endpoint can be reached from other '
     'machines)', '"none"'),
    ('[opcua_out]\n[[opcua_out.write]]\nmodel = "two"\nvariable = "Mean"\nnode = "ns=2;s=X"\n',
     "opcua_out", "opcua_out.write_server",
     "the address of the server that [[opcua_out.write]] writes to",
     "nothing (the key is missing)"),
    ('[opcua_out]\nwrite_server = "opc.tcp://dcs:4840"\nwrite_anonymous = true\n', "opcua_out",
     "opcua_out.write", "at least one [[opcua_out.write]] (with write_server)", "nothing"),
    ('[opcua_out]\nwrite_server = "opc.tcp://dcs:4840"\n[[opcua_out.write]]\nmodel = "two"\n'
     'variable = "Mean"\nnode = "ns=2;s=X"\n', "opcua_out", "opcua_out.write_user",
     "a user name, or write_anonymous = true", "nothing (the key is missing)"),
    ('[opcua_out]\nwrite_server = "opc.tcp://dcs:4840"\nwrite_anonymous = true\n'
     'write_security_policy = "Basic256Sha256"\n[[opcua_out.write]]\nmodel = "two"\n'
     'variable = "Mean"\nnode = "ns=2;s=X"\n', "opcua_out", "opcua_out.write_certificate",
     'a file (required with write_security_policy = "Basic256Sha256")',
     "nothing (the key is missing)"),
    ('[opcua_out]\n[[opcua_out.write]]\nmodel = "two"\nvariable = "Median"\nnode = "ns=2;s=X"\n',
     "opcua_out", "opcua_out.write[0].variable", None, '"Median"'),
    ("[mqtt]\nqos = 3\n", "mqtt", "mqtt.qos", "an integer 0, 1 or 2", "3"),
    ('[mqtt]\nreconnect_ivl = "5s"\nreconnect_ivl_max = "1s"\n', "mqtt",
     "mqtt.reconnect_ivl_max", "a duration >= reconnect_ivl", '"1s"'),
    ("[lab_folder]\n", "lab_folder", "lab_folder.folder", "a non-empty string",
     "nothing (the key is missing)"),
]


@pytest.mark.parametrize("text, section, key, expected, got", CASES,
                         ids=[c[2] for c in CASES])
def test_errors_say_where_what_and_got(text, section, key, expected, got):
    e = _err(BASE + text, section)
    assert e.file == "plant.toml" and e.key == key and e.got == got
    if expected is not None:
        assert e.expected == expected
    assert str(e).startswith("plant.toml: ")


def test_unknown_key_suggests_the_close_one():
    e = _err(BASE + IN.replace("anonymous = true", "anonymus = true"), "opcua_in")
    assert e.hint == 'did you mean "anonymous"?'


VALID = {
    "opcua_in": {"server": "opc.tcp://h:4840", "anonymous": True,
                 "node": [{"model": "two", "tag": "A", "node": "ns=2;s=A"},
                          {"model": "two", "tag": "B", "node": "ns=2;s=B"}],
                 "lab": [{"model": "two", "value": "ns=2;s=Q", "drawn": "ns=2;s=D"}]},
    "opcua_out": {"model": [{"name": "two", "unit": "%wt"}],
                  "write_server": "opc.tcp://dcs:4840", "write_anonymous": True,
                  "write": [{"model": "two", "variable": "Mean", "node": "ns=2;s=QI.Mean"}]},
    "mqtt": {},
    "lab_folder": {"folder": "lab"},
}


@pytest.mark.parametrize("row", BRIDGE_SETTINGS, ids=lambda r: f"{r.section}.{r.key}")
def test_every_setting_rejects_a_wrong_type(row):
    section, _, array = row.section.partition(".")
    table = copy.deepcopy(VALID[section])
    (table[array][0] if array else table)[row.key] = {"bad": 1}
    e = _err(f"{section} = {_toml_value(table)}\n" + BASE, section)
    assert e.got == "{bad = 1}" and e.key.endswith(row.key), e
    assert e.expected and f"expected {e.expected}, got {{bad = 1}}" in str(e)


def test_the_valid_tables_are_valid():
    for section, table in VALID.items():
        assert loads_bridge(f"{section} = {_toml_value(table)}\n" + BASE, section)


def test_docs_bridges_md_is_generated():
    committed = (ROOT / "docs" / "bridges.md").read_text(encoding="utf-8")
    assert committed == bridges_markdown(), (
        "docs/bridges.md is out of date; regenerate it with: python -c \"from "
        "daemon.config.bridges import bridges_markdown; open('docs/bridges.md', 'w')"
        ".write(bridges_markdown())\"")


def test_docs_bridge_metrics_md_is_generated_and_complete():
    from prometheus_client import generate_latest

    from daemon.bridges.common import BRIDGE_METRICS, REASONS, Metrics, metrics_markdown

    committed = (ROOT / "docs" / "bridge-metrics.md").read_text(encoding="utf-8")
    assert committed == metrics_markdown(), (
        "docs/bridge-metrics.md is out of date; regenerate it with: python -c \"from "
        "daemon.bridges.common import metrics_markdown; open('docs/bridge-metrics.md', 'w')"
        ".write(metrics_markdown())\"")
    # what a bridge serves is what the table (and so the page) lists, every series of a
    # configured model at zero from the start
    m = Metrics("opcua-in", ["two"])
    m.subscribed.labels("opcua-in", "two").set(0)
    text = generate_latest(m.registry).decode()
    served = {line.split()[2] for line in text.splitlines() if line.startswith("# TYPE")
              and not line.split()[2].endswith("_created")}
    assert served == {name for _, _, name, _, _ in BRIDGE_METRICS}
    for reason in REASONS:
        assert m.value("posteriord_bridge_dropped_total", model="two", reason=reason) == 0
        assert f'reason="{reason}"' in text


PLANT_DOC = ROOT / "docs" / "connecting-a-plant.md"


def _after(marker: str, text: str) -> str:
    assert marker in text, f"{marker!r} is not in docs/connecting-a-plant.md"
    return text[text.index(marker) + len(marker):]


def test_the_plant_guide_example_config_loads():
    import re

    text = _after("<!-- the example config:", PLANT_DOC.read_text(encoding="utf-8"))
    example = re.search(r"```toml\n(.*?)```", text, re.S).group(1)
    config = loads(example, "connecting-a-plant.md")
    names = [m.name for m in config.models]
    for section in ("opcua_in", "opcua_out", "mqtt", "lab_folder"):
        cfg = loads_bridge(example, section, "connecting-a-plant.md")
        feed = cfg.values.get("feed")
        if feed is not None:  # every bridge's feed is one the daemon connects to
            assert feed in config.daemon.feeds, (section, feed)
        sub = cfg.values.get("subscribe")
        if sub is not None:
            assert sub == config.daemon.publish, section
    opcua_in = loads_bridge(example, "opcua_in")
    assert {n["model"] for n in opcua_in.items["node"]} == set(names)
    assert loads_bridge(example, "opcua_out").items["write"]


def test_the_plant_guide_names_every_unit():
    text = PLANT_DOC.read_text(encoding="utf-8")
    for unit in sorted((ROOT / "tools" / "systemd").glob("*.service")):
        assert unit.name in text, unit.name


def test_the_plant_guide_status_table_is_the_code():
    pytest.importorskip("asyncua", reason="the opcua extra (asyncua) is not installed")
    import re

    from daemon.bridges.opcua_out import quality

    text = _after("<!-- the status-code table:", PLANT_DOC.read_text(encoding="utf-8"))
    rows = [line for line in text.splitlines()[:12] if line.startswith("| ")]
    header = [c.strip() for c in rows[0].strip("|").split("|")]
    trusts = [h.removeprefix("trust ") for h in header[1:]]
    assert trusts == ["normal", "caution", "untrusted"]
    seen = set()
    for line in rows[2:]:
        cells = [c.strip() for c in line.strip("|").split("|")]
        status = cells[0]
        for trust, cell in zip(trusts, cells[1:], strict=True):
            code = int(re.search(r"\((0x[0-9A-F]{8})\)", cell).group(1), 16)
            assert quality(status, trust) == code, (status, trust, cell)
            seen.add(status)
        # a model without alerts has no trust state: the normal column
        assert quality(status, None) == quality(status, "normal")
    assert seen == {"learning", "stale", "frozen", "unidentified"}
