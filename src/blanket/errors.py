"""Errors raised for bad user input, and the one helper that suggests a valid name."""

from __future__ import annotations

import difflib
from collections.abc import Iterable

__all__ = ["ConfigError", "did_you_mean", "shorten"]


class ConfigError(ValueError):
    """A scenario file, option or argument is invalid; the message is one line naming the field."""


def shorten(value: object, limit: int = 60) -> str:
    """``repr(value)`` cut to ``limit`` characters, with the full length shown when cut."""
    text = repr(value)
    if len(text) <= limit:
        return text
    return f"{text[: limit - 1]}... ({len(text)} characters)"


def did_you_mean(
    name: str, valid: Iterable[str], n: int = 3, cutoff: float = 0.6, list_valid: bool = False
) -> str:
    """``"did you mean a, b?"`` for the closest valid names, else ``"valid: ..."``.

    Used by every error about an unknown name (options, conditions, policies, metrics, ...),
    so the hints read alike everywhere. ``list_valid=True`` lists the valid names after a
    suggestion too (``"did you mean a? valid: ..."``), for short lists worth seeing whole.
    """
    valid = [str(v) for v in valid]
    listed = f"valid: {', '.join(sorted(valid))}"
    close = difflib.get_close_matches(str(name), valid, n=n, cutoff=cutoff)
    if close:
        return f"did you mean {', '.join(close)}?" + (f" {listed}" if list_valid else "")
    return listed
