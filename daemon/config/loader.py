"""Reading TOML into a :class:`~daemon.config.model.Config`: every table checked against the
settings table, then the rules that involve more than one key."""

from __future__ import annotations

import contextlib
import difflib
import json
import tomllib
from importlib import resources
from pathlib import Path
from typing import Any

from daemon.config.bridges import BRIDGE_SECTIONS, BridgeConfig, parse_bridge
from daemon.config.durations import format_duration
from daemon.config.errors import REQUIRED, ConfigError, _Bad, _Ctx, _show
from daemon.config.kinds import _write_number
from daemon.config.model import Config, DaemonConfig, InputConfig, ModelConfig
from daemon.config.settings import _BY_SECTION, _SECTION, SECTIONS, SETTINGS, _children
from daemon.endpoints import is_loopback
from recursive.basis import MAX_TERMS


def _unknown(ctx: _Ctx, local: str, key: str, allowed: list[str], noun: str) -> ConfigError:
    close = difflib.get_close_matches(key, allowed, n=1, cutoff=0.6)
    hint = f'did you mean "{close[0]}"?' if close else ""
    return ctx.error(local, f"a key of {noun} ({', '.join(allowed)})",
                     f"unknown key {json.dumps(key, ensure_ascii=False)}", hint)


def _parse_table(section: str, table: dict, ctx: _Ctx, local_prefix: str
                 ) -> tuple[dict[str, Any], set[str]]:
    """Values (by field) and the set of fields given explicitly, for one TOML table."""
    rows = _BY_SECTION[section]
    allowed = [r.key for r in rows] + list(_children(section))
    for key in table:
        if key not in allowed:
            raise _unknown(ctx, local_prefix + key, key, allowed, _SECTION[section].noun)
    values: dict[str, Any] = {}
    present: set[str] = set()
    for row in rows:
        local = local_prefix + row.key
        if row.key in table:
            raw = table[row.key]
            try:
                values[row.field] = row.parse(raw)
            except _Bad as bad:
                raise ctx.error(local, bad.expected, _show(raw), bad.hint) from None
            present.add(row.field)
        elif row.default is REQUIRED:
            raise ctx.error(local, row.kind.expected, _show(REQUIRED))
        else:
            values[row.field] = row.default
    return values, present


def _subtable(table: dict, key: str, ctx: _Ctx, local: str) -> dict:
    raw = table.get(key, {})
    if not isinstance(raw, dict):
        raise ctx.error(local, f"a table ({_SECTION['model.' + key].noun})", _show(raw))
    return raw


def _parse_daemon(doc: dict, file: str | None) -> DaemonConfig:
    ctx = _Ctx(file)
    raw = doc.get("daemon", {})
    if not isinstance(raw, dict):
        raise ctx.error("daemon", "a table ([daemon])", _show(raw))
    values, _ = _parse_table("daemon", raw, ctx, "daemon.")
    if values["control"] == values["publish"]:
        raise ctx.error("daemon.control", "an endpoint different from daemon.publish",
                        _show(values["control"]))
    if values["curve_secret_key"]:
        for key in ("curve_clients", "curve_admins"):
            if not values[key]:
                raise ctx.error(f"daemon.{key}", "a folder of allowed public keys (required "
                                "with daemon.curve_secret_key)", _show(REQUIRED))
    else:
        for key in ("curve_clients", "curve_admins", "curve_feed_server_key"):
            if values[key]:
                raise ctx.error(f"daemon.{key}", 'no value (daemon.curve_secret_key is "")',
                                _show(values[key]))
        for key in ("publish", "control"):
            if not is_loopback(values[key]):
                raise ctx.error(f"daemon.{key}", "a loopback or ipc endpoint, or CURVE "
                                "(daemon.curve_secret_key): without it anyone on the network "
                                "could " + ("read the predictions" if key == "publish"
                                            else "send commands"), _show(values[key]))
    if values["reconnect_ivl_max"] < values["reconnect_ivl"]:
        raise ctx.error("daemon.reconnect_ivl_max",
                        f"a duration >= daemon.reconnect_ivl "
                        f"({format_duration(values['reconnect_ivl'])})",
                        _show(raw.get("reconnect_ivl_max")))
    return DaemonConfig(**values)


_INPUTS_EXPECTED = 'an array of input tables like [{tag = "TI-104", lo = 95, hi = 125}]'


def _parse_inputs(table: dict, ctx: _Ctx) -> tuple[InputConfig, ...]:
    raw = table.get("inputs", REQUIRED)
    if raw is REQUIRED or not isinstance(raw, list) or not raw:
        raise ctx.error("inputs", _INPUTS_EXPECTED, _show(raw))
    out: list[InputConfig] = []
    first: dict[str, int] = {}
    for j, item in enumerate(raw):
        base = f"inputs[{j}]"
        if not isinstance(item, dict):
            raise ctx.error(base, 'an input table like {tag = "TI-104", lo = 95, hi = 125}',
                            _show(item))
        values, _ = _parse_table("model.inputs", item, ctx, base + ".")
        if values["tag"] in first:
            raise ctx.error(f"{base}.tag",
                            f"a tag not used by an earlier input (inputs[{first[values['tag']]}])",
                            _show(item["tag"]))
        first[values["tag"]] = j
        if not values["hi"] > values["lo"]:
            raise ctx.error(f"{base}.hi", f"a number > lo ({_write_number(values['lo'])})",
                            _show(item["hi"]))
        out.append(InputConfig(**values))
    return tuple(out)


def _local(fieldname: str) -> str:
    """The key of a model field relative to its ``[[model]]`` table (``"forgetting.q"``)."""
    for row in SETTINGS:
        if row.field == fieldname and row.section.startswith("model"):
            sub = row.section.partition(".")[2]
            return f"{sub}.{row.key}" if sub else row.key
    raise KeyError(fieldname)


def _parse_model(i: int, raw: Any, file: str | None) -> ModelConfig:
    ctx = _Ctx(file, f"model[{i}]", f"model[{i}]")
    if not isinstance(raw, dict):
        raise ConfigError(file, f"model[{i}]", "a [[model]] table", _show(raw))
    name_row = next(r for r in _BY_SECTION["model"] if r.key == "name")
    # a valid name makes the error messages clearer; a bad one is reported by _parse_table
    with contextlib.suppress(_Bad):
        name = name_row.parse(raw.get("name"))
        ctx = _Ctx(file, f'model[{i}] "{name}"', f"model[{i}]")
    values, present = _parse_table("model", raw, ctx, "")
    values["inputs"] = _parse_inputs(raw, ctx)
    for sub in SECTIONS:
        if sub.parent != "model" or sub.array:
            continue
        table = _subtable(raw, sub.key, ctx, sub.key)
        v, p = _parse_table(sub.name, table, ctx, sub.key + ".")
        values.update(v)
        present |= p
    return _finish_model(values, present, raw, ctx)


def _given(raw: dict, fieldname: str) -> Any:
    """The raw TOML value of a model field (for messages)."""
    node: Any = raw
    for part in _local(fieldname).split("."):
        node = node.get(part, REQUIRED) if isinstance(node, dict) else REQUIRED
    return node


def _finish_model(values: dict, present: set[str], raw: dict, ctx: _Ctx) -> ModelConfig:
    def not_allowed(fieldname: str, why: str) -> ConfigError:
        return ctx.error(_local(fieldname), f"no value ({why})", _show(_given(raw, fieldname)))

    if values["basis_kind"] == "identity":
        for f in ("degree", "interactions", "family"):
            if f in present:
                raise not_allowed(f, 'it only applies to basis.kind = "polynomial"')
    if values["noise_std"] is not None:
        for f in ("noise_guess", "noise_strength"):
            if f in present:
                raise not_allowed(f, "noise.std is set, so the noise is not learned")
    policy = values["forgetting"]
    drift_keys = ("offset_drift", "linear_drift", "higher_drift")
    allowed_drift = {"offset": ("offset_drift",), "term_drift": drift_keys}.get(policy, ())
    for f in drift_keys:
        if f in present and f not in allowed_drift:
            where = ('policy = "term_drift"' if f != "offset_drift" else
                     'policy = "offset" or "term_drift"')
            raise not_allowed(f, f'{f} only applies to {where}, policy is "{policy}"')
    if policy == "offset" and values["offset_drift"] is None:
        raise ctx.error("forgetting.offset_drift", 'a drift rate like "0.5 per 1h" (required '
                        'with policy = "offset")', _show(REQUIRED))
    if policy == "offset" and not values["offset_drift"] > 0:
        raise ctx.error("forgetting.offset_drift", 'a drift rate above 0 (policy = "offset" '
                        'without drift is "stabilized")', _show(_given(raw, "offset_drift")))
    if policy == "term_drift":
        if not any(values[f] for f in drift_keys):
            given = next((f for f in drift_keys if f in present), "offset_drift")
            raise ctx.error(f"forgetting.{given}", "at least one of offset_drift, linear_drift, "
                            'higher_drift above 0 (required with policy = "term_drift")',
                            _show(_given(raw, given)))
        if "half_life" not in present:
            values["half_life"] = None
    if policy == "random_walk":
        if values["q"] is None:
            raise ctx.error("forgetting.q", 'a number > 0 (required with policy = '
                            '"random_walk")', _show(REQUIRED))
        if "half_life" not in present:
            values["half_life"] = None
    else:
        if "q" in present:
            raise not_allowed("q", f'q only applies to policy = "random_walk", '
                              f'policy is "{policy}"')
        if policy == "none":
            if "half_life" in present:
                raise not_allowed("half_life", 'policy is "none"')
            values["half_life"] = None
    _finish_adaptive(values, present, raw, ctx, not_allowed)
    if values["gate"] == 0.0:
        if "gate_release" in present:
            raise not_allowed("gate_release", "gate.k = 0 turns the gate off")
        values["gate"] = None
    if values["head_start"] >= values["cusum_h"]:
        raise ctx.error("alerts.head_start", f"a number in [0, cusum_h = {values['cusum_h']:g})",
                        _show(_given(raw, "head_start")))
    if values["stale_max"] < values["stale_min"]:
        raise ctx.error("lab.stale_max", f"a duration of at least stale_min = "
                        f"{format_duration(values['stale_min'])}",
                        _show(_given(raw, "stale_max")))
    model = ModelConfig(**values)
    names = model.build_basis().names
    if len(names) > MAX_TERMS:
        shape = (f"{len(model.inputs)} inputs at degree {model.degree}"
                 + (" with interactions" if model.interactions else ""))
        raise ctx.error("basis.degree", f"a basis of at most {MAX_TERMS} terms",
                        f"{len(names)} terms ({shape})",
                        "lower the degree, set interactions = false, or split the inputs "
                        "over several models")
    if model.prior_mean is not None:
        if len(model.prior_mean) != len(names):
            raise ctx.error("prior.mean",
                            f"an array of {len(names)} numbers, one per basis term "
                            f"({', '.join(names)})", _show(_given(raw, "prior_mean")))
    return model


def _finish_adaptive(values: dict, present: set[str], raw: dict, ctx: _Ctx,
                     not_allowed) -> None:
    """The rules of the adaptive noise and offset drift (settings.RULES)."""
    if values["noise_adaptive"]:
        if values["noise_std"] is not None:
            raise ctx.error("noise.adaptive", "false (noise.std is set, so the noise is known; "
                            "adaptive noise learns it from a guess)", _show(True))
    else:
        for f in ("noise_half_life", "vb_iterations"):
            if f in present:
                raise not_allowed(f, "it only applies with noise.adaptive = true")
    if values["adapt_offset"]:
        policy = values["forgetting"]
        if policy not in ("offset", "term_drift"):
            raise ctx.error("forgetting.adapt_offset", f'false (an adapted offset drift needs '
                            f'policy = "offset" or "term_drift", policy is "{policy}")',
                            _show(True))
        lo, hi = values["offset_drift_min"], values["offset_drift_max"]
        if not values["offset_drift"] and (lo is None or hi is None):
            raise ctx.error("forgetting.offset_drift", "a drift rate above 0 to start the "
                            "adapted offset drift from (or set both offset_drift_min and "
                            "offset_drift_max)", _show(_given(raw, "offset_drift")))
        q = values["offset_drift"] or 0.0
        lo = q / 100.0 if lo is None else lo
        hi = q * 100.0 if hi is None else hi
        if not lo <= hi:
            raise ctx.error("forgetting.offset_drift_min", "a drift rate not above "
                            "offset_drift_max", _show(_given(raw, "offset_drift_min")))
    else:
        for f in ("offset_drift_min", "offset_drift_max", "adapt_window"):
            if f in present:
                raise not_allowed(f, "it only applies with forgetting.adapt_offset = true")


def _parse_document(doc: dict, source: str) -> Config:
    file = source
    top = [s.name for s in (*SECTIONS, *BRIDGE_SECTIONS) if not s.parent]  # bridges' own
    for key in doc:
        if key not in top:
            close = difflib.get_close_matches(key, top, n=1, cutoff=0.6)
            raise ConfigError(file, key, f"a top-level key ({', '.join(top)})",
                              f"unknown key {json.dumps(key, ensure_ascii=False)}",
                              hint=f'did you mean "{close[0]}"?' if close else "")
    daemon = _parse_daemon(doc, file)
    raw_models = doc.get("model", [])
    if not isinstance(raw_models, list):
        raise ConfigError(file, "model", "an array of [[model]] tables", _show(raw_models))
    models = []
    seen: dict[str, int] = {}
    for i, raw in enumerate(raw_models):
        m = _parse_model(i, raw, file)
        if m.name in seen:
            ctx = _Ctx(file, f'model[{i}] "{m.name}"', f"model[{i}]")
            raise ctx.error("name",
                            f"a name not used by an earlier model (model[{seen[m.name]}])",
                            _show(m.name))
        seen[m.name] = i
        models.append(m)
    return Config(daemon=daemon, models=tuple(models), source=source)


def loads(text: str, source: str = "<string>") -> Config:
    """Parse a configuration from TOML text; ``source`` names it in error messages."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(source, None, "valid TOML", str(exc)) from None
    return _parse_document(doc, source)


def load(path: str | Path) -> Config:
    """Read and parse a configuration file.

    Raises
    ------
    ConfigError
        If the file cannot be read, is not UTF-8 TOML, or holds a bad setting.
    """
    source = str(path)
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise ConfigError(source, None, "a readable file", exc.strerror or str(exc)) from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError(source, None, "UTF-8 text", str(exc)) from None
    return loads(text, source)


def demo_config() -> Config:
    """The built-in demo configuration (the packaged ``daemon/config/demo.toml``)."""
    text = resources.files("daemon.config").joinpath("demo.toml").read_text(encoding="utf-8")
    return loads(text, "<demo>")


def loads_bridge(text: str, section: str, source: str = "<string>") -> BridgeConfig:
    """The ``[section]`` bridge table of a configuration text, checked against its models."""
    config = loads(text, source)  # the daemon's own checks first (and its models)
    doc = tomllib.loads(text)
    return parse_bridge(doc, section, source, config.models)


def load_bridge(path: str | Path, section: str) -> BridgeConfig:
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(str(path), None, "a readable file", exc.strerror or str(exc)) from None
    except UnicodeDecodeError as exc:
        raise ConfigError(str(path), None, "UTF-8 text", str(exc)) from None
    return loads_bridge(text, section, str(path))
