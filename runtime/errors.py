"""Errors of the runtime area. Each subclasses a builtin so callers can catch broadly.

A message names the thing, the value with its unit, what was expected and how to fix it.
"""


class ScenarioError(ValueError):
    """A scenario file is malformed: unknown key, wrong type, out-of-range or wrong-unit value."""


class UnitError(ValueError):
    """A quantity string could not be read, or carries the wrong unit."""


class PluginError(LookupError):
    """A plugin could not be found, loaded, or does not follow the plugin contract."""


class RecordingError(OSError):
    """A run folder or recording is missing or unreadable."""
