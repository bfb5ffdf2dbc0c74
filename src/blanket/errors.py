"""Errors raised for bad user input."""

from __future__ import annotations

__all__ = ["ConfigError"]


class ConfigError(ValueError):
    """A scenario file, option or argument is invalid; the message is one line naming the field."""
