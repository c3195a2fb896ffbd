"""The bridges' tables of the configuration file: ``[opcua_in]``, ``[opcua_out]``, ``[mqtt]`` and
``[lab_folder]``, declared once like the daemon's settings (section, key, kind, default, check,
help), parsed with the same errors (file, key, expected, got).

The daemon accepts these tables and leaves them alone; each bridge reads its own with
:func:`daemon.config.loader.load_bridge` (which also reads the models, to check the tags
the bridge names).
``docs/bridges.md`` is generated from this table by :func:`bridges_markdown`.
"""

from __future__ import annotations

import difflib
import json
from dataclasses import dataclass
from typing import Any

from daemon.config.errors import REQUIRED, _Bad, _Ctx, _show
from daemon.config.kinds import (
    BOOLEAN,
    DURATION,
    ENDPOINT,
    GE0,
    GT0,
    HOST_PORT,
    INTEGER,
    NAME,
    PATH,
    STRING,
    TAG,
    _Check,
    _choice,
    _Kind,
)
from daemon.config.settings import Section, Setting
from daemon.endpoints import is_loopback


def _opc_url(v: Any) -> str:
    if not isinstance(v, str) or not v.startswith("opc.tcp://") or len(v) <= len("opc.tcp://"):
        raise _Bad('an OPC UA address like "opc.tcp://historian:4840"')
    return v


def _node_id(v: Any) -> str:
    # the forms of OPC UA Part 6 (ns=2;s=..., ns=3;i=..., i=2258); checked again by the library
    if not isinstance(v, str) or not any(p in v for p in ("i=", "s=", "g=", "b=")):
        raise _Bad('an OPC UA node id like "ns=2;s=C301.TI104.PV"')
    return v


OPC_URL = _Kind("OPC UA address", "an OPC UA address",
                'an OPC UA address like "opc.tcp://historian:4840"', _opc_url)
NODE_ID = _Kind("OPC UA node id", "a node id", 'an OPC UA node id like "ns=2;s=C301.TI104.PV"',
                _node_id)
QOS = _Check("0, 1 or 2", lambda v: v in (0, 1, 2))
PORT = _Check("in 1..65535", lambda v: 1 <= v <= 65535)
POLICY = _choice("none", "Basic256Sha256")
MODE = _choice("sign_and_encrypt", "sign")
# the variables of a model served by [opcua_out] (daemon/bridges/opcua_out.py)
VARIABLE = _choice("Mean", "Std", "Lo", "Hi", "Level", "Status", "Trust", "LabValue",
                   "LabTime")

BRIDGE_SECTIONS: tuple[Section, ...] = (
    Section("opcua_in", "[opcua_in]",
            "The OPC UA client bridge (`posteriord bridge opcua-in`): subscribes to the plant "
            "server's nodes and publishes input samples on the feed, stamped with the "
            "server's source timestamps. Good readings are used, Uncertain ones are used and "
            "counted, Bad ones are missing readings (no sample for the model until every "
            "input is usable again)."),
    Section("opcua_in.node", "[[opcua_in.node]]",
            "One node per model input. Every input of a model named here needs a node.",
            array=True),
    Section("opcua_in.lab", "[[opcua_in.lab]]",
            "A lab result as an OPC UA node pair: the value and the time the sample was drawn. "
            "A result is sent when the drawn time changes.", array=True),
    Section("opcua_out", "[opcua_out]",
            "The OPC UA server bridge (`posteriord bridge opcua-out`): serves the predictions "
            "of every model for the operator screens (see docs/connecting-a-plant.md for the "
            "variables and their status codes)."),
    Section("opcua_out.model", "[[opcua_out.model]]",
            "Engineering unit of a model's prediction (models not listed have none).",
            array=True),
    Section("opcua_out.write", "[[opcua_out.write]]",
            "Optionally, the same values written to a node of an existing server (a DCS, a "
            "historian, a plant-wide server), the bridge being its client (`write_server` and "
            "the `write_` keys of `[opcua_out]`). One table per node; each write carries the "
            "status code and source timestamp of the served variable unless "
            "`write_timestamps = false`.", array=True),
    Section("mqtt", "[mqtt]",
            "The MQTT bridge (`posteriord bridge mqtt`): JSON input samples and lab results "
            "from `<prefix>/in/<model>` to the feed, predictions to `<prefix>/pred/<model>` "
            "(retained), QoS as set."),
    Section("lab_folder", "[lab_folder]",
            "The lab-file bridge (`posteriord bridge lab-folder`): CSV files dropped in a "
            "folder, each read once and moved to `done/` or `rejected/` (with a reason file)."),
)

_SECURITY_HELP = ('"Basic256Sha256" signs (and with `security_mode = "sign_and_encrypt"` '
                  'encrypts) every message with the certificates below; "none" sends in clear.')

BRIDGE_SETTINGS: tuple[Setting, ...] = (
    # [opcua_in]
    Setting("opcua_in", "name", "name", NAME, "opcua-in",
            "Name of the bridge: `src` of its feed messages and `bridge` label of its metrics."),
    Setting("opcua_in", "server", "server", OPC_URL, REQUIRED, "Address of the plant's server."),
    Setting("opcua_in", "feed", "feed", ENDPOINT, "tcp://127.0.0.1:5555",
            "Endpoint the bridge binds its feed on (one of the daemon's `feeds`)."),
    Setting("opcua_in", "sampling_interval", "sampling_interval", DURATION, 1.0,
            "Sampling interval asked of the server for every node (deadband none).", GT0),
    Setting("opcua_in", "publishing_interval", "publishing_interval", DURATION, 1.0,
            "Publishing interval of the subscription.", GT0),
    Setting("opcua_in", "queue_size", "queue_size", INTEGER, 0,
            "Values the server keeps per node between two publications (the monitored "
            "item's queue; when it overflows the oldest is lost). A burst of changes "
            "between two publishing intervals arrives whole, one row per value. 0: twice "
            "the samplings in a publishing interval, so that a publication late by a whole "
            "interval loses nothing.", GE0,
            default_doc="0 (2 × publishing_interval / sampling_interval)"),
    Setting("opcua_in", "reconnect_ivl", "reconnect_ivl", DURATION, 1.0,
            "First wait before reconnecting; doubled on each failure.", GT0),
    Setting("opcua_in", "reconnect_ivl_max", "reconnect_ivl_max", DURATION, 60.0,
            "Longest wait between reconnection attempts.", GT0),
    Setting("opcua_in", "timeout", "timeout", DURATION, 4.0,
            "Request timeout; a server silent this long counts as lost.", GT0),
    Setting("opcua_in", "metrics", "metrics", HOST_PORT, "",
            'Address of the bridge\'s Prometheus endpoint; "" disables it.'),
    Setting("opcua_in", "security_policy", "security_policy", POLICY, "none", _SECURITY_HELP),
    Setting("opcua_in", "security_mode", "security_mode", MODE, "sign_and_encrypt",
            "Message security with a policy other than none."),
    Setting("opcua_in", "certificate", "certificate", PATH, "",
            "The bridge's application certificate (DER or PEM)."),
    Setting("opcua_in", "private_key", "private_key", PATH, "",
            "The private key of that certificate (PEM)."),
    Setting("opcua_in", "server_certificate", "server_certificate", PATH, "",
            "The plant server's certificate; the bridge refuses a server presenting another."),
    Setting("opcua_in", "user", "user", STRING, None,
            "User name for the session; not set: anonymous (needs `anonymous = true`)."),
    Setting("opcua_in", "password_file", "password_file", PATH, "",
            "File holding the password (first line), readable by the bridge only."),
    Setting("opcua_in", "anonymous", "anonymous", BOOLEAN, False,
            "Allow an anonymous session when no user is set."),
    # [[opcua_in.node]]
    Setting("opcua_in.node", "model", "model", NAME, REQUIRED, "The model."),
    Setting("opcua_in.node", "tag", "tag", TAG, REQUIRED, "The input of that model."),
    Setting("opcua_in.node", "node", "node", NODE_ID, REQUIRED, "The node holding its reading."),
    # [[opcua_in.lab]]
    Setting("opcua_in.lab", "model", "model", NAME, REQUIRED, "The model."),
    Setting("opcua_in.lab", "value", "value", NODE_ID, REQUIRED, "The node of the lab value."),
    Setting("opcua_in.lab", "drawn", "drawn", NODE_ID, REQUIRED,
            "The node of the time the sample was drawn (DateTime, or seconds since 1970)."),
    # [opcua_out]
    Setting("opcua_out", "name", "name", NAME, "opcua-out", "Name of the bridge (metrics)."),
    Setting("opcua_out", "endpoint", "endpoint", OPC_URL, "opc.tcp://127.0.0.1:4840",
            "Address the server listens on."),
    Setting("opcua_out", "subscribe", "subscribe", ENDPOINT, "tcp://127.0.0.1:5556",
            "The daemon's `publish` endpoint."),
    Setting("opcua_out", "namespace", "namespace", STRING, "urn:posteriord:predictions",
            "Namespace URI of the served variables."),
    Setting("opcua_out", "metrics", "metrics", HOST_PORT, "",
            'Address of the bridge\'s Prometheus endpoint; "" disables it.'),
    Setting("opcua_out", "security_policy", "security_policy", POLICY, "none",
            _SECURITY_HELP + " A non-loopback endpoint needs a policy."),
    Setting("opcua_out", "security_mode", "security_mode", MODE, "sign_and_encrypt",
            "Message security with a policy other than none."),
    Setting("opcua_out", "certificate", "certificate", PATH, "",
            "The server's application certificate (DER or PEM)."),
    Setting("opcua_out", "private_key", "private_key", PATH, "",
            "The private key of that certificate (PEM)."),
    Setting("opcua_out", "trusted_clients", "trusted_clients", PATH, "",
            "Folder of the client certificates allowed in (DER or PEM); others are refused."),
    Setting("opcua_out", "users", "users", PATH, "",
            "File of `name:scrypt$salt$hash` lines (see `posteriord bridge passwd`); "
            '"" allows no user name.'),
    Setting("opcua_out", "anonymous", "anonymous", BOOLEAN, False,
            "Allow anonymous sessions (read-only either way)."),
    Setting("opcua_out", "write_server", "write_server", OPC_URL, None,
            "Address of an existing server the values are also written to (see "
            "`[[opcua_out.write]]`); not set: none."),
    Setting("opcua_out", "write_security_policy", "write_security_policy", POLICY, "none",
            "Security policy of that connection (as `security_policy`)."),
    Setting("opcua_out", "write_security_mode", "write_security_mode", MODE,
            "sign_and_encrypt", "Message security of that connection."),
    Setting("opcua_out", "write_certificate", "write_certificate", PATH, "",
            "The bridge's client certificate for that server (DER or PEM)."),
    Setting("opcua_out", "write_private_key", "write_private_key", PATH, "",
            "The private key of that certificate (PEM)."),
    Setting("opcua_out", "write_server_certificate", "write_server_certificate", PATH, "",
            "That server's certificate; the bridge refuses a server presenting another."),
    Setting("opcua_out", "write_user", "write_user", STRING, None,
            "User name on that server; not set: anonymous (needs `write_anonymous = true`)."),
    Setting("opcua_out", "write_password_file", "write_password_file", PATH, "",
            "File holding that user's password (first line)."),
    Setting("opcua_out", "write_anonymous", "write_anonymous", BOOLEAN, False,
            "Write in an anonymous session when no `write_user` is set."),
    Setting("opcua_out", "write_timestamps", "write_timestamps", BOOLEAN, True,
            "Write the status code and the source timestamp with each value; false writes "
            "the value alone (for servers that refuse them: BadWriteNotSupported)."),
    Setting("opcua_out", "write_timeout", "write_timeout", DURATION, 4.0,
            "Request timeout of that connection; a server silent this long counts as lost.",
            GT0),
    Setting("opcua_out", "reconnect_ivl", "reconnect_ivl", DURATION, 1.0,
            "First wait before reconnecting to `write_server`; doubled on each failure.", GT0),
    Setting("opcua_out", "reconnect_ivl_max", "reconnect_ivl_max", DURATION, 60.0,
            "Longest wait between reconnection attempts.", GT0),
    # [[opcua_out.model]]
    Setting("opcua_out.model", "name", "name", NAME, REQUIRED, "The model."),
    Setting("opcua_out.model", "unit", "unit", STRING, REQUIRED,
            'Engineering unit of the prediction, e.g. "%wt" or "degC".'),
    # [[opcua_out.write]]
    Setting("opcua_out.write", "model", "model", NAME, REQUIRED, "The model."),
    Setting("opcua_out.write", "variable", "variable", VARIABLE, REQUIRED,
            "Which of its served variables."),
    Setting("opcua_out.write", "node", "node", NODE_ID, REQUIRED,
            "The node of the existing server written to (Double or Float for the numbers, "
            "String for Status and Trust, DateTime for LabTime)."),
    # [mqtt]
    Setting("mqtt", "name", "name", NAME, "mqtt", "Name of the bridge (`src`, metrics)."),
    Setting("mqtt", "host", "host", STRING, "127.0.0.1", "The broker's host."),
    Setting("mqtt", "port", "port", INTEGER, 1883, "The broker's port (8883 is usual with TLS).",
            PORT),
    Setting("mqtt", "tls", "tls", BOOLEAN, False, "Connect with TLS."),
    Setting("mqtt", "ca_file", "ca_file", PATH, "",
            'CA certificates to check the broker against ("" uses the system\'s).'),
    Setting("mqtt", "user", "user", STRING, None, "User name; not set: none."),
    Setting("mqtt", "password_file", "password_file", PATH, "", "File holding the password."),
    Setting("mqtt", "prefix", "prefix", STRING, "posteriord", "First level of every topic."),
    Setting("mqtt", "qos", "qos", INTEGER, 1, "QoS of subscriptions and publications.", QOS),
    Setting("mqtt", "feed", "feed", ENDPOINT, "tcp://127.0.0.1:5558",
            "Endpoint the bridge binds its feed on (one of the daemon's `feeds`)."),
    Setting("mqtt", "subscribe", "subscribe", ENDPOINT, "tcp://127.0.0.1:5556",
            "The daemon's `publish` endpoint."),
    Setting("mqtt", "reconnect_ivl", "reconnect_ivl", DURATION, 1.0,
            "First wait before reconnecting to the broker; doubled on each failure.", GT0),
    Setting("mqtt", "reconnect_ivl_max", "reconnect_ivl_max", DURATION, 60.0,
            "Longest wait between reconnection attempts.", GT0),
    Setting("mqtt", "metrics", "metrics", HOST_PORT, "",
            'Address of the bridge\'s Prometheus endpoint; "" disables it.'),
    # [lab_folder]
    Setting("lab_folder", "name", "name", NAME, "lab-folder", "Name of the bridge."),
    Setting("lab_folder", "folder", "folder", STRING, REQUIRED,
            "The watched folder; `done/` and `rejected/` are made inside it."),
    Setting("lab_folder", "feed", "feed", ENDPOINT, "tcp://127.0.0.1:5559",
            "Endpoint the bridge binds its feed on (one of the daemon's `feeds`)."),
    Setting("lab_folder", "poll", "poll", DURATION, 5.0, "How often the folder is looked at.",
            GT0),
    Setting("lab_folder", "metrics", "metrics", HOST_PORT, "",
            'Address of the bridge\'s Prometheus endpoint; "" disables it.'),
)

BRIDGE_RULES = (
    "`security_policy` other than `\"none\"` needs `certificate` and `private_key`.",
    "`[opcua_in]`: a `user` needs a `password_file`; without a user, `anonymous = true`.",
    "`[opcua_in]`: every `node` and `lab` names a configured model (and tag); a model named "
    "by one node has a node for every input.",
    "`[opcua_out]`: an endpoint other than loopback needs a security policy.",
    "`[opcua_out]`: `[[opcua_out.write]]` tables need a `write_server`, and a `write_server` "
    "at least one of them; a `write_user` needs a `write_password_file`; without one, "
    "`write_anonymous = true`; a `write_security_policy` other than `\"none\"` needs "
    "`write_certificate` and `write_private_key`.",
    "`reconnect_ivl_max` >= `reconnect_ivl`.",
)

_BY = {s.name: tuple(r for r in BRIDGE_SETTINGS if r.section == s.name) for s in BRIDGE_SECTIONS}
_SEC = {s.name: s for s in BRIDGE_SECTIONS}


@dataclass(frozen=True)
class BridgeConfig:
    """One bridge's table: ``values`` by key, ``items`` of its arrays (by array key), the
    daemon's models and the file it came from."""

    section: str
    values: dict
    items: dict
    models: tuple
    source: str

    def __getattr__(self, key: str):
        try:
            return self.__dict__["values"][key]
        except KeyError:
            raise AttributeError(key) from None


def _table(section: str, raw: Any, file: str, prefix: str) -> dict:
    ctx = _Ctx(file)
    if not isinstance(raw, dict):
        raise ctx.error(prefix, f"a table ({_SEC[section].noun})", _show(raw))
    rows = _BY[section]
    arrays = [s.key for s in BRIDGE_SECTIONS if s.parent == section]
    allowed = [r.key for r in rows] + arrays
    for key in raw:
        if key not in allowed:
            close = difflib.get_close_matches(key, allowed, n=1, cutoff=0.6)
            raise ctx.error(f"{prefix}.{key}", f"a key of {_SEC[section].noun} "
                            f"({', '.join(allowed)})",
                            f"unknown key {json.dumps(key, ensure_ascii=False)}",
                            f'did you mean "{close[0]}"?' if close else "")
    out = {}
    for row in rows:
        local = f"{prefix}.{row.key}"
        if row.key in raw:
            try:
                out[row.key] = row.parse(raw[row.key])
            except _Bad as bad:
                raise ctx.error(local, bad.expected, _show(raw[row.key])) from None
        elif row.default is REQUIRED:
            raise ctx.error(local, row.kind.expected, _show(REQUIRED))
        else:
            out[row.key] = row.default
    return out


def parse_bridge(doc: dict, section: str, file: str, models: tuple) -> BridgeConfig:
    """The checked ``[section]`` table of a parsed TOML document (raises ConfigError)."""
    ctx = _Ctx(file)
    if section not in doc:
        raise ctx.error(section, f"a {_SEC[section].noun} table", "nothing (no such table)")
    raw = doc[section]
    values = _table(section, raw, file, section)
    items: dict[str, tuple] = {}
    for sub in BRIDGE_SECTIONS:
        if sub.parent != section:
            continue
        arr = raw.get(sub.key, [])
        if not isinstance(arr, list):
            raise ctx.error(f"{section}.{sub.key}", f"an array of tables ({sub.noun})",
                            _show(arr))
        items[sub.key] = tuple(_table(sub.name, t, file, f"{section}.{sub.key}[{i}]")
                               for i, t in enumerate(arr))
    cfg = BridgeConfig(section, values, items, models, file)
    _rules(cfg, raw, ctx)
    return cfg


def _rules(cfg: BridgeConfig, raw: dict, ctx) -> None:
    s, v = cfg.section, cfg.values
    if v.get("security_policy", "none") != "none":
        for key in ("certificate", "private_key"):
            if not v[key]:
                raise ctx.error(f"{s}.{key}", f"a file (required with security_policy = "
                                f"\"{v['security_policy']}\")", _show(REQUIRED))
    if "reconnect_ivl_max" in v and v["reconnect_ivl_max"] < v["reconnect_ivl"]:
        raise ctx.error(f"{s}.reconnect_ivl_max", "a duration >= reconnect_ivl",
                        _show(raw.get("reconnect_ivl_max")))
    by_name = {m.name: m for m in cfg.models}
    if s == "opcua_in":
        if v["user"] is not None and not v["password_file"]:
            raise ctx.error(f"{s}.password_file", "a file (required with user)",
                            _show(REQUIRED))
        if v["user"] is None and not v["anonymous"]:
            raise ctx.error(f"{s}.user", "a user name, or anonymous = true", _show(REQUIRED))
        seen: dict[tuple, int] = {}
        for i, n in enumerate(cfg.items["node"]):
            m = by_name.get(n["model"])
            if m is None:
                raise ctx.error(f"{s}.node[{i}].model", "the name of a [[model]] "
                                f"({', '.join(by_name) or 'none configured'})",
                                _show(n["model"]))
            tags = [i.tag for i in m.inputs]
            if n["tag"] not in tags:
                raise ctx.error(f"{s}.node[{i}].tag", f"an input of {m.name} "
                                f"({', '.join(tags)})", _show(n["tag"]))
            key = (n["model"], n["tag"])
            if key in seen:
                raise ctx.error(f"{s}.node[{i}].tag", f"an input without a node yet "
                                f"(node[{seen[key]}] has it)", _show(n["tag"]))
            seen[key] = i
        for name in {n["model"] for n in cfg.items["node"]}:
            missing = [i.tag for i in by_name[name].inputs if (name, i.tag) not in seen]
            if missing:
                raise ctx.error(f"{s}.node", f"a node for every input of {name}",
                                f"none for {', '.join(missing)}")
        for i, lab in enumerate(cfg.items["lab"]):
            if lab["model"] not in by_name:
                raise ctx.error(f"{s}.lab[{i}].model", "the name of a [[model]]",
                                _show(lab["model"]))
        if not cfg.items["node"] and not cfg.items["lab"]:
            raise ctx.error(f"{s}.node", "at least one [[opcua_in.node]] or [[opcua_in.lab]]",
                            "nothing")
    if s == "opcua_out":
        host = v["endpoint"][len("opc.tcp://"):].rpartition(":")[0] or "?"
        if v["security_policy"] == "none" and not is_loopback(f"tcp://{host}:1"):
            raise ctx.error(f"{s}.security_policy", "\"Basic256Sha256\" (the endpoint can be "
                            "reached from other machines)", _show(v["security_policy"]))
        for i, m in enumerate(cfg.items["model"]):
            if m["name"] not in by_name:
                raise ctx.error(f"{s}.model[{i}].name", "the name of a [[model]]",
                                _show(m["name"]))
        _write_rules(cfg, ctx, by_name)
    if s == "mqtt" and v["user"] is not None and not v["password_file"]:
        raise ctx.error(f"{s}.password_file", "a file (required with user)", _show(REQUIRED))


def _write_rules(cfg: BridgeConfig, ctx, by_name: dict) -> None:
    s, v, writes = cfg.section, cfg.values, cfg.items["write"]
    for i, w in enumerate(writes):
        if w["model"] not in by_name:
            raise ctx.error(f"{s}.write[{i}].model", "the name of a [[model]] "
                            f"({', '.join(by_name) or 'none configured'})", _show(w["model"]))
    if v["write_server"] is None:
        if writes:
            raise ctx.error(f"{s}.write_server", "the address of the server that "
                            "[[opcua_out.write]] writes to", _show(REQUIRED))
        return
    if not writes:
        raise ctx.error(f"{s}.write", "at least one [[opcua_out.write]] (with write_server)",
                        "nothing")
    if v["write_user"] is not None and not v["write_password_file"]:
        raise ctx.error(f"{s}.write_password_file", "a file (required with write_user)",
                        _show(REQUIRED))
    if v["write_user"] is None and not v["write_anonymous"]:
        raise ctx.error(f"{s}.write_user", "a user name, or write_anonymous = true",
                        _show(REQUIRED))
    if v["write_security_policy"] != "none":
        for key in ("write_certificate", "write_private_key"):
            if not v[key]:
                raise ctx.error(f"{s}.{key}", "a file (required with write_security_policy = "
                                f"\"{v['write_security_policy']}\")", _show(REQUIRED))


def bridges_markdown() -> str:
    """The text of ``docs/bridges.md``."""
    out = ["# Bridge settings\n",
           "Generated from `daemon/config/bridges.py`; do not edit. The bridges read their "
           "tables from the daemon's configuration file (the daemon ignores them). Durations "
           'as in docs/settings.md ("500ms", "5s", "1h").\n']
    for sec in BRIDGE_SECTIONS:
        out.append(f"## `{sec.noun}`\n")
        out.append(sec.help + "\n")
        out.append("| key | type | default | meaning |")
        out.append("|---|---|---|---|")
        for r in _BY[sec.name]:
            cells = [f"`{r.key}`", r.type_doc(), r.default_text(), r.help]
            out.append("| " + " | ".join(c.replace("|", "\\|") for c in cells) + " |")
        out.append("")
    out.append("## Rules between settings\n")
    out.extend(f"* {rule}" for rule in BRIDGE_RULES)
    out.append("")
    return "\n".join(out)
