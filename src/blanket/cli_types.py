"""argparse value types shared by the ``blanket`` sub-commands (one-line messages)."""

from __future__ import annotations

import argparse

__all__ = ["positive_int", "seed", "positive_float"]


def _whole(text: str, low: int) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a whole number >= {low}, got {text!r}") from None
    if v < low:
        raise argparse.ArgumentTypeError(f"must be a whole number >= {low}, got {text!r}")
    return v


def positive_int(text: str) -> int:
    """A whole number >= 1."""
    return _whole(text, 1)


def seed(text: str) -> int:
    """A whole number >= 0."""
    return _whole(text, 0)


def positive_float(text: str) -> float:
    """A finite number > 0."""
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number > 0, got {text!r}") from None
    if not (v > 0 and v < float("inf")):
        raise argparse.ArgumentTypeError(f"must be a finite number > 0, got {text!r}")
    return v
