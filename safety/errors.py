"""Errors of the safety area."""


class InterlockConfigError(ValueError):
    """An interlock definition names an unknown signal or an invalid threshold."""
