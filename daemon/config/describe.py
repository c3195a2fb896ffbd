"""Text about a configuration: :func:`describe` for one file, :func:`settings_markdown` for
the settings reference (``docs/settings.md``)."""

from __future__ import annotations

import math

from daemon.config.durations import drift_change, format_drift, format_duration
from daemon.config.model import Config, ModelConfig
from daemon.config.settings import _BY_SECTION, RULES, SECTIONS
from daemon.endpoints import is_loopback


def _num(v: float) -> str:
    return f"{v:g}"


def _bind(endpoint: str) -> str:
    return endpoint if is_loopback(endpoint) else f"{endpoint}  (reachable from other hosts)"


def describe(config: Config) -> str:
    """Human-readable summary: the daemon endpoints, then each model and its terms."""
    d = config.daemon
    lines = [f"configuration: {config.source}", "", "daemon:"]
    for ep in d.feeds:
        lines.append(f"  feed (SUB connects)    {ep}")
    lines.append(f"  publish (PUB binds)    {_bind(d.publish)}")
    lines.append(f"  control (REP binds)    {_bind(d.control)}")
    if d.metrics:
        note = "" if is_loopback(f"tcp://{d.metrics}") else "  (reachable from other hosts)"
        lines.append(f"  metrics (HTTP)         http://{d.metrics}/metrics{note}")
    else:
        lines.append("  metrics (HTTP)         disabled")
    lines.append(f"  state_dir              {d.state_dir}")
    lines.append(f"  log                    {d.log_level}, {d.log_format}")
    lines.append(f"  batch_limit            {d.batch_limit} messages, {d.batch_bytes} bytes per "
                 f"wake-up")
    lines.append(f"  max_message_bytes      {d.max_message_bytes}")
    lines.append(f"  hwm                    {d.hwm}" + (" (no limit)" if d.hwm == 0 else ""))
    lines.append(f"  reconnect              {format_duration(d.reconnect_ivl)} .. "
                 f"{format_duration(d.reconnect_ivl_max)}")
    lines.append(f"  checkpoint every       {format_duration(d.checkpoint_every)}"
                 + (f" or {d.checkpoint_wal_bytes} bytes of log" if d.checkpoint_wal_bytes
                    else ""))
    sync = "every record" if d.fsync == "always" else \
        f"grouped, at most {format_duration(d.group_commit)} apart"
    lines.append(f"  fsync                  {sync}")
    lines.append(f"  on corruption          {d.on_corruption}")
    lines.append("")
    n = len(config.models)
    lines.append(f"{n} model{'s' if n != 1 else ''}" + (":" if n else ""))
    for m in config.models:
        lines.extend(_describe_model(m))
    return "\n".join(lines)


def _describe_model(m: ModelConfig) -> list[str]:
    basis = m.build_basis()
    lines = ["", f"model {m.name}  (fingerprint {m.fingerprint()})", "  inputs:"]
    width = max(len(i.tag) for i in m.inputs)
    for i in m.inputs:
        lines.append(f"    {i.tag:<{width}}  range {_num(i.lo)} .. {_num(i.hi)}"
                     f"  dead time {format_duration(i.dead_time)}")
    if m.basis_kind == "identity":
        lines.append(f"  basis: identity (raw engineering units), {basis.n_features} terms:")
    else:
        lines.append(f"  basis: polynomial, {m.family}, degree {m.degree}, "
                     f"{'with' if m.interactions else 'without'} interactions, inputs scaled "
                     f"to [-1, 1], {basis.n_features} terms:")
    mean = m.prior_mean if m.prior_mean is not None else (0.0,) * basis.n_features
    width = max(len(t) for t in basis.names)
    alphas = basis.alpha_vector(m.alpha)
    for j, term in enumerate(basis.names):
        prior = "flat prior" if alphas[j] == 0 else \
            f"prior mean {_num(mean[j])}, prior sd {_num(1.0 / math.sqrt(alphas[j]))}"
        lines.append(f"    {j:>3}  {term:<{width}}  {prior}")
    lines.append(f"  prior: alpha {_num(m.alpha)} (flat on the constant term)"
                 + ("" if m.prior_mean is not None else ", mean zero"))
    if m.noise_std is not None:
        lines.append(f"  noise: known, std {_num(m.noise_std)} (Gaussian predictions)")
    else:
        lines.append(f"  noise: learned, guess {_num(m.noise_guess)} worth "
                     f"{_num(m.noise_strength)} lab results (Student-t predictions)")
    if m.forgetting == "none":
        lines.append("  forgetting: none")
    elif m.forgetting == "random_walk":
        noise = "noise estimate kept" if m.half_life is None else \
            f"noise half-life {format_duration(m.half_life)}"
        lines.append(f"  forgetting: random walk, q {_num(m.q)} per second, {noise}")
    elif m.forgetting in ("offset", "term_drift"):
        lines.append("  forgetting: " + ("offset drift" if m.forgetting == "offset"
                                         else "drift per term group") + ", "
                     + ("with stabilized forgetting of all terms, half-life "
                        f"{format_duration(m.half_life)}" if m.half_life is not None
                        else "no other forgetting (noise estimate kept)"))
        ref = "known noise std" if m.noise_std is not None else "noise guess"
        for label, q in (("offset (constant)", m.offset_drift),
                         ("linear terms", m.linear_drift), ("higher terms", m.higher_drift)):
            if q:
                lines.append(f"    {label:<18} drifts {format_drift(q)} "
                             f"({drift_change(q, 86400.0):.3g} per 1d; q = {q:.4g} per second "
                             f"at the {ref})")
    else:
        lines.append(f"  forgetting: {m.forgetting}, half-life {format_duration(m.half_life)}")
    if m.gate is None:
        lines.append("  gate: off")
    else:
        rel = "never opens" if m.gate_release == 0 else \
            f"opens after {m.gate_release} same-sign rejections"
        lines.append(f"  gate: |z| > {_num(m.gate)} rejected, {rel}")
    lines.append(f"  interval level: {_num(m.level)}")
    lines.append(f"  lab matching: tolerance {format_duration(m.tolerance)}, keep "
                 f"{format_duration(m.keep)} or {m.keep_count} rows, stale after "
                 + (format_duration(m.stale_after) if m.stale_after is not None else
                    f"{_num(m.stale_factor)} lab intervals + the lab delay (within "
                    f"{format_duration(m.stale_min)} .. {format_duration(m.stale_max)})"))
    if m.alerts and (m.commissioning_labs or m.commissioning_time):
        ends = [f"{m.commissioning_labs} lab results learned" if m.commissioning_labs else "",
                format_duration(m.commissioning_time) if m.commissioning_time else ""]
        lines.append(f"  commissioning until {' or '.join(e for e in ends if e)}")
    return lines


_INTRO = """\
# Settings

<!-- Generated by daemon.config.settings_markdown(); edit the table in daemon/config/settings.py and
regenerate, do not edit by hand. -->

posteriord reads one TOML file (`posteriord run --config FILE`; `posteriord check-config
FILE` checks it and prints what it understood). `daemon/config/demo.toml` is a complete example.

* Durations are a string of `<number><unit>` parts, largest unit first, each unit once:
  `"250ms"`, `"90s"`, `"5m"`, `"36h"`, `"1.5d"`, `"2w"`, `"1h30m"`. A number without a unit
  is an error (`half_life = 27` could mean hours or days), except `0`.
* Drift rates are `"<s> per <T>"`, e.g. `"0.5 per 1h"`: a random walk whose change over a
  time T has a standard deviation of s (in the units of the drifting weight; target units
  for the offset). Since a random walk's spread grows with the square root of the time,
  `"0.5 per 1h"`, `"1 per 4h"` and `"2.449 per 1d"` are the same rate; it is used as the
  variance rate q = s^2 / T per second.
* Unknown keys are errors (with a suggestion when a known key is close), and so are keys that
  would have no effect given the other settings.
* Errors name the file, the model (`model[0]` is the first `[[model]]` table) and the key,
  and say what was expected and what was found.
* Settings marked *learning* enter the model's fingerprint: when a reload changes one of
  them, that model starts again from its prior; other changes keep what it has learned.
"""


def _cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def settings_markdown() -> str:
    """The documentation of every setting (the text of ``docs/settings.md``)."""
    out = [_INTRO]
    for sec in SECTIONS:
        rows = _BY_SECTION[sec.name]
        title = f"`{sec.noun}`" if sec.noun.startswith("[") else f"`{sec.name}`"
        out.append(f"## {title}\n")
        out.append(sec.help + "\n")
        if not rows:
            continue
        model = sec.name.startswith("model")
        head = "| key | type | default | meaning |" + (" learning |" if model else "")
        rule = "|---|---|---|---|" + ("---|" if model else "")
        out.append(head)
        out.append(rule)
        for r in rows:
            line = (f"| `{r.key}` | {_cell(r.type_doc())} | {_cell(r.default_text())} | "
                    f"{_cell(r.help)} |")
            if model:
                line += " yes |" if r.learning else " no |"
            out.append(line)
        out.append("")
    out.append("## Rules between settings\n")
    out.extend(f"* {rule}" for rule in RULES)
    out.append("")
    return "\n".join(out)
