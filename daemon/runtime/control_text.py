"""Control replies and predictions as text for people: ISO times, digits that mean something.

``posteriord ctl`` prints these tables (``--json`` prints the reply itself); ``watch`` uses
the same number rules. Pure functions of the reply; nothing here talks to a socket.
"""

from __future__ import annotations

import math
from datetime import UTC, datetime

__all__ = ["decimals_for", "fmt_number", "fmt_time", "reply_text"]


def fmt_time(t) -> str:
    """Epoch seconds as ISO 8601 UTC to the second (``2026-01-05T02:00:00Z``); ``-`` if none."""
    if not isinstance(t, int | float) or isinstance(t, bool) or not math.isfinite(t):
        return "-"
    try:
        return datetime.fromtimestamp(float(t), UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    except (OverflowError, OSError, ValueError):
        return repr(t)


def decimals_for(scale) -> int:
    """Decimals that show ``scale`` (a std, a spread) with two significant digits.

    Common practice for a value with its uncertainty: the uncertainty to two significant
    digits and the value to the same decimal place (3.42 ± 0.10 %, 187.2 ± 6.1 ppm,
    1870 ± 61). Between 0 and 8 decimals; 1 when the scale is unknown.
    """
    if not isinstance(scale, int | float) or not math.isfinite(scale) or scale <= 0:
        return 1
    return max(0, min(8, 1 - math.floor(math.log10(float(scale)))))


def fmt_number(v, decimals: int | None = None, *, sign: bool = False) -> str:
    """``v`` with ``decimals`` places, or four significant digits; ``-`` for none/nan/inf."""
    if v is None or isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
        return "-"
    plus = "+" if sign else ""
    if decimals is None:
        text = f"{v:{plus}.4g}"
        return text if "e" not in text or abs(v) < 1e-3 else f"{v:{plus}.0f}"
    return f"{v:{plus}.{decimals}f}"


def _u(unit) -> str:
    return f" {unit}" if unit else ""


def _status(reply: dict, endpoint: str) -> list[str]:
    models = reply.get("models") or {}
    st = reply.get("state")
    lines = [f"daemon at {endpoint}: {len(models)} model{'s' if len(models) != 1 else ''}"]
    if isinstance(st, dict):
        lines[0] += (f"; state folder {st.get('dir')}, log record {st.get('last_seq')}, "
                     f"checkpoint at {st.get('checkpoint_seq')}, {st.get('replayed')} "
                     f"replayed at start, fsync {st.get('fsync')}")
    if not models:
        return lines
    width = max(12, *(len(n) for n in models))
    lines.append(f"{'model':<{width}}  {'status':<12} {'trust':<9} {'updates':>7}  "
                 f"{'prediction':<22} {'last sample (UTC)':<20}  last lab (UTC)")
    detail = []
    for name in sorted(models):
        m = models[name]
        unit = m.get("unit") or ""
        std = m.get("std")
        d = decimals_for(std if isinstance(std, int | float) and std
                         else m.get("noise_std"))
        pred = "-"
        if isinstance(m.get("mean"), int | float):
            pred = f"{fmt_number(m.get('mean'), d)} ± {fmt_number(std, d)}{_u(unit)}"
        lines.append(f"{name:<{width}}  {str(m.get('status') or '-'):<12} "
                     f"{str(m.get('trust') or '-'):<9} {m.get('updates', 0):>7}  {pred:<22} "
                     f"{fmt_time(m.get('last_sample_t')):<20}  {fmt_time(m.get('last_lab_t'))}")
        extra = []
        if m.get("target"):
            extra.append(f"target {m['target']}")
        extra.append(f"{m.get('features', 0)} samples, {m.get('lab_results', 0)} lab results, "
                     f"{m.get('learned', 0)} learned")
        if m.get("noise_std") is not None:
            extra.append(f"noise std {fmt_number(m.get('noise_std'), d)}{_u(unit)}")
        rejected = {k: v for k, v in (m.get("rejected") or {}).items() if v}
        if rejected:
            extra.append("rejected: " + ", ".join(f"{k} {v}" for k, v in
                                                 sorted(rejected.items())))
        reasons = m.get("reasons") or []
        if reasons:
            extra.append("reasons: " + ", ".join(_reason(r) for r in reasons))
        detail.append(f"  {name}: " + "; ".join(extra))
        note = m.get("learning_note")
        if isinstance(note, dict) and (m.get("frozen") or note.get("reason")):
            detail.append(f"  {name}: {_note(note)}")
    return lines + detail


def _reason(r) -> str:
    if isinstance(r, dict):
        return str(r.get("name", "?"))
    return str(r)


def _note(note: dict) -> str:
    what = {"freeze": "frozen", "resume": "resumed"}.get(note.get("action"), note.get("action"))
    by = f" by {note['by']}" if note.get("by") else ""
    at = f" at {fmt_time(note.get('at'))}" if note.get("at") is not None else ""
    reason = note.get("reason") or "(no reason given)"
    return f"{what}{by}{at}: {reason}"


def _sensitivities(s: dict, unit: str) -> list[str]:
    at = s.get("at") or {}
    tags = s.get("inputs") or []
    x = at.get("x") or []
    where = {"last sample": f"the last sample ({fmt_time(at.get('t'))})",
             "range centre": "the centre of the instrument ranges (no sample yet)",
             "given": "the given point"}.get(at.get("source"), str(at.get("source")))
    lines = ["sensitivities dy/dx in engineering units"]
    if s.get("depends_on_point"):
        lines[0] += f", at {where}:"
        lines.append("  " + ", ".join(f"{t} = {fmt_number(v)}"
                                      for t, v in zip(tags, x, strict=False)))
    else:
        lines[0] += " (degree 1: the same at every point)"
    width = max(6, *(len(t) for t in tags)) if tags else 6
    lines.append(f"  {'input':<{width}}  {'dy/dx':>12}  {'± std':>10}  unit")
    for tag, v, sd in zip(tags, s.get("sensitivity") or [], s.get("std") or [], strict=False):
        d = decimals_for(sd)
        lines.append(f"  {tag:<{width}}  {fmt_number(v, d):>12}  {fmt_number(sd, d):>10}  "
                     f"{unit or 'target units'} per unit of {tag}")
    return lines


def _posterior(r: dict) -> list[str]:
    unit = r.get("unit") or ""
    noise = r.get("noise_var")
    noise_sd = math.sqrt(noise) if isinstance(noise, int | float) and noise >= 0 else None
    lines = [f"{r.get('model')}: {r.get('updates')} updates, last at {fmt_time(r.get('t_last'))}"
             f", noise std {fmt_number(noise_sd)}{_u(unit)}, dof {fmt_number(r.get('dof'))}"]
    terms = r.get("terms") or []
    mean = r.get("mean") or []
    cov = r.get("cov") or []
    width = max(4, *(len(t) for t in terms)) if terms else 4
    lines.append("weights (on the basis terms; sensitivities below are in engineering units)")
    lines.append(f"  {'term':<{width}}  {'mean':>12}  {'± std':>10}")
    for i, term in enumerate(terms):
        var = cov[i][i] if i < len(cov) and i < len(cov[i]) else None
        sd = math.sqrt(var) if isinstance(var, int | float) and var >= 0 else None
        d = decimals_for(sd)
        m = mean[i] if i < len(mean) else None
        lines.append(f"  {term:<{width}}  {fmt_number(m, d):>12}  {fmt_number(sd, d):>10}")
    if isinstance(r.get("sensitivities"), dict):
        lines += _sensitivities(r["sensitivities"], unit)
    return lines


def _flat(value, prefix: str = "") -> list[str]:
    if isinstance(value, dict):
        out = []
        for k, v in value.items():
            out += _flat(v, f"{prefix}{k}." if isinstance(v, dict) else f"{prefix}{k}")
        return out
    key = prefix.rstrip(".")
    if isinstance(value, float) and (key == "t" or key.endswith("_t") or key.endswith(".t")):
        return [f"  {key}: {fmt_time(value)}"]
    if isinstance(value, float):
        return [f"  {key}: {fmt_number(value)}"]
    if isinstance(value, list) and all(isinstance(v, int | float) for v in value):
        return [f"  {key}: " + ", ".join(fmt_number(v) for v in value)]
    return [f"  {key}: {value}"]


def reply_text(cmd: str, reply: dict, endpoint: str = "") -> str:
    """A successful reply as a few lines for a terminal."""
    if cmd == "ping":
        lines = [f"ok: the daemon at {endpoint} answers"]
    elif cmd == "status":
        lines = _status(reply, endpoint)
    elif cmd == "posterior":
        lines = _posterior(reply)
    elif cmd == "sensitivities":
        lines = [f"{reply.get('model')}:"] + _sensitivities(reply, reply.get("unit") or "")
    elif cmd == "checkpoint":
        lines = [f"checkpoint written: it covers log records 1..{reply.get('seq')}"]
    elif cmd == "reload":
        lines = ["reloaded the config file"]
    elif cmd in ("freeze", "resume", "reset", "acknowledge"):
        done = {"freeze": "frozen (learning stopped; predictions go on)",
                "resume": "learning again", "reset": "back to its prior",
                "acknowledge": "current alert reasons acknowledged"}[cmd]
        lines = [f"{reply.get('model')}: {done}"]
        if isinstance(reply.get("note"), dict):
            lines.append(f"  {_note(reply['note'])}")
        if cmd == "acknowledge" and reply.get("state"):
            lines.append(f"  trust state {reply['state']}")
    else:
        lines = [f"{reply.get('model', cmd)}:"]
        body = {k: v for k, v in reply.items() if k not in ("ok", "model")}
        lines += _flat(body)
    return "\n".join(lines)
