"""Argument and state checks shared by the detectors: value conversion with errors that name
the value, the state schema tag and the helpers that validate and rebuild a saved state."""

import math
from typing import Any

import numpy as np

SCHEMA = 1

_INF = math.inf


def _real(name: str, value: Any) -> float:
    """Convert to float, turning type errors into ValueError that names the value."""
    if isinstance(value, bool):
        raise ValueError(f"{name} must be a real number, got {value!r}")
    try:
        return float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a real number, got {value!r}") from None


def _finite(name: str, value: Any) -> float:
    v = _real(name, value)
    if not math.isfinite(v):
        raise ValueError(f"{name} must be finite, got {value!r}")
    return v


def _positive(name: str, value: Any) -> float:
    v = _finite(name, value)
    if not v > 0.0:
        raise ValueError(f"{name} must be finite and > 0, got {value!r}")
    return v


def _nonnegative(name: str, value: Any) -> float:
    v = _finite(name, value)
    if not v >= 0.0:
        raise ValueError(f"{name} must be finite and >= 0, got {value!r}")
    return v


def _count(name: str, value: Any, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise ValueError(f"{name} must be an integer >= {minimum}, got {value!r}")
    if value < minimum:
        raise ValueError(f"{name} must be an integer >= {minimum}, got {value!r}")
    return int(value)


def _decay(half_life: float) -> float:
    """Per-sample weight factor for a half-life in samples."""
    return 2.0 ** (-1.0 / half_life)


def _check_state(state: Any, kind: str) -> dict:
    if not isinstance(state, dict):
        raise ValueError(f"state must be a dict, got {type(state).__name__}")
    if state.get("schema") != SCHEMA:
        raise ValueError(f"unsupported state schema {state.get('schema')!r}, expected {SCHEMA}")
    if state.get("kind") != kind:
        raise ValueError(f"state is for {state.get('kind')!r}, expected {kind!r}")
    if not isinstance(state.get("params"), dict):
        raise ValueError(f"state has no params dict: {state.get('params')!r}")
    return state


def _construct(cls: type, params: dict) -> Any:
    """Build a detector from saved parameters; unknown or missing names are a ValueError."""
    try:
        return cls(**params)
    except TypeError as exc:
        raise ValueError(f"bad parameters for {cls.__name__}: {params!r} ({exc})") from None


def _get(state: dict, key: str) -> Any:
    try:
        return state[key]
    except KeyError:
        raise ValueError(f"state is missing {key!r}") from None
