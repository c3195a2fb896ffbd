"""Configuration errors, and how a TOML value is shown in them."""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from typing import Any


class ConfigError(ValueError):
    """A configuration that cannot be used.

    Attributes
    ----------
    file : str or None
        The file (or ``"<string>"``, ``"<demo>"``) the setting came from.
    key : str or None
        Full path of the offending key, e.g. ``"model[2].forgetting.half_life"`` or
        ``"daemon.publish"``; None for errors about the whole file (unreadable, bad TOML).
    expected : str
        What a valid value looks like.
    got : str
        What arrived, written as TOML (``"tomorrow"``, ``-1``, ``nothing`` for a missing key).
    where : str
        The model the key belongs to, e.g. ``model[2] "c301.solvent"`` ("" outside models).
    hint : str
        A "did you mean" suggestion for an unknown key, or "".
    """

    def __init__(self, file: str | None, key: str | None, expected: str, got: str, *,
                 where: str = "", local_key: str | None = None, hint: str = ""):
        self.file = file
        self.key = key
        self.expected = expected
        self.got = got
        self.where = where
        self.hint = hint
        parts = []
        if file:
            parts.append(f"{file}: ")
        if where:
            parts.append(f"{where} ")
        shown = local_key if local_key is not None else key
        if shown:
            parts.append(f"key {shown}: ")
        parts.append(f"expected {expected}, got {got}")
        if hint:
            parts.append(f"; {hint}")
        super().__init__("".join(parts))


class _Bad(Exception):
    """A value failed a type or range check; ``expected`` says what would have passed."""

    def __init__(self, expected: str, hint: str = ""):
        super().__init__(expected)
        self.expected = expected
        self.hint = hint


class _Missing:
    def __repr__(self) -> str:
        return "REQUIRED"


#: Default of a setting that must be given.
REQUIRED: Any = _Missing()


def _show(value: Any, limit: int = 120) -> str:
    """``value`` written as TOML, shortened to about ``limit`` characters."""
    if value is REQUIRED:
        return "nothing (the key is missing)"
    if isinstance(value, str):
        text = json.dumps(value, ensure_ascii=False)
    elif isinstance(value, bool):
        text = "true" if value else "false"
    elif isinstance(value, int):
        text = str(value)
    elif isinstance(value, float):
        text = "nan" if math.isnan(value) else ("inf" if value > 0 else "-inf") \
            if math.isinf(value) else repr(value)
    elif isinstance(value, list | tuple):
        text = "[" + ", ".join(_show(v, limit) for v in value) + "]"
    elif isinstance(value, dict):
        text = "{" + ", ".join(f"{k} = {_show(v, limit)}" for k, v in value.items()) + "}"
    elif value is None:
        text = "nothing"
    elif hasattr(value, "isoformat"):
        text = value.isoformat()
    else:
        text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


@dataclass(frozen=True)
class _Ctx:
    """Where the keys being parsed live: ``prefix`` starts the full key path."""

    file: str | None
    where: str = ""
    prefix: str = ""

    def error(self, local: str, expected: str, got: str, hint: str = "") -> ConfigError:
        key = f"{self.prefix}.{local}" if self.prefix else local
        return ConfigError(self.file, key, expected, got, where=self.where, local_key=local,
                           hint=hint)
