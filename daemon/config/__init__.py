"""The daemon's TOML configuration: one table of settings, parsed into frozen dataclasses.

Every setting is declared once, as a :class:`Setting` row in :data:`SETTINGS` (section, key,
type, default, check, help, and whether it affects learning). The parser, the error messages,
the model fingerprint and the generated documentation (:func:`settings_markdown`, committed as
``docs/settings.md``) all read that table, so they cannot disagree. Adding a section (say
``[model.alerts]``) means adding a :class:`Section`, its rows, and the matching dataclass fields.

Errors are :class:`ConfigError` and say where (file, model, key), what was expected and what
arrived. Unknown keys are errors, with a suggestion when a known key is close.
"""

from daemon.config.describe import describe, settings_markdown
from daemon.config.durations import format_duration, parse_duration
from daemon.config.errors import REQUIRED as REQUIRED  # tests and callers compare defaults to it
from daemon.config.errors import ConfigError
from daemon.config.loader import demo_config, load, loads
from daemon.config.model import Config, DaemonConfig, InputConfig, ModelConfig
from daemon.config.settings import SECTIONS, SETTINGS, Section, Setting

__all__ = [
    "SECTIONS",
    "SETTINGS",
    "Config",
    "ConfigError",
    "DaemonConfig",
    "InputConfig",
    "ModelConfig",
    "Section",
    "Setting",
    "demo_config",
    "describe",
    "format_duration",
    "load",
    "loads",
    "parse_duration",
    "settings_markdown",
]
