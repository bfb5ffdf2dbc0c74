"""The one success rule of every task: inside the tolerance, held for a while.

Envs apply it step by step (:class:`HeldInside`) and report ``info["success"]`` and
``info["time_to_success_s"]``; every consumer (the run summary, ``blanket inspect``, the
benchmark's metrics) reads those, or applies :func:`time_to_success` -- the same rule -- to a
recorded trace, e.g. for a second tolerance. Holding a goal state for a dwell time before it
counts is common practice in reaching benchmarks (no source).

The rule: the task is inside its tolerance after control step ``s`` (time ``s dt``) and at every
step up to ``s + hold``, with ``hold = max(1, round(hold_s / dt))``. Success is then declared at
step ``s + hold`` and the time to success is the entry time ``s dt``.
"""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np

__all__ = ["HOLD_S", "HeldInside", "time_to_success"]

#: How long a task must stay inside its tolerance to count as reached (s).
HOLD_S = 0.25


class HeldInside:
    """Step-by-step success test: ``update(inside)`` once per control step.

    Parameters
    ----------
    dt : float
        Control period (s), > 0.
    hold_s : float
        How long the task must stay inside (s), >= 0.
    """

    def __init__(self, dt: float, hold_s: float = HOLD_S) -> None:
        if not dt > 0:
            raise ValueError(f"dt must be > 0 s, got {dt!r}")
        if not hold_s >= 0:
            raise ValueError(f"hold_s must be >= 0 s, got {hold_s!r}")
        self.dt = float(dt)
        # times are step / rate, as envs count ``time_s`` (step * dt can differ in the last bit)
        self._rate_hz = 1.0 / self.dt
        self.hold_steps = max(1, int(round(hold_s / dt)))
        self.reset()

    def reset(self) -> None:
        """Start a new episode."""
        self.steps = 0
        self._inside_since: int | None = None
        self._entry_step: int | None = None

    def update(self, inside: bool) -> bool:
        """Record whether the task is inside after this control step; True once reached."""
        self.steps += 1
        if inside:
            if self._inside_since is None:
                self._inside_since = self.steps
        else:
            self._inside_since = None
        if self._entry_step is None and self.held:
            self._entry_step = self._inside_since
        return self._entry_step is not None

    @property
    def held(self) -> bool:
        """Whether the current stay inside has lasted the hold (drops when the task leaves)."""
        return self._inside_since is not None and self.steps - self._inside_since >= self.hold_steps

    @property
    def success(self) -> bool:
        """Whether the task has been reached in this episode."""
        return self._entry_step is not None

    @property
    def time_to_success_s(self) -> float | None:
        """Entry time of the first stay that was held (s), or None."""
        return None if self._entry_step is None else self._entry_step / self._rate_hz


def time_to_success(inside: Iterable[bool], dt: float, hold_s: float = HOLD_S) -> float | None:
    """:class:`HeldInside` over a whole trace; ``inside[k]`` is after control step ``k + 1``.

    Returns the time to success (s) or None when the trace never reaches it.
    """
    rule = HeldInside(dt, hold_s)
    for ok in np.asarray(list(inside) if not isinstance(inside, np.ndarray) else inside, bool):
        if rule.update(bool(ok)):
            break
    return rule.time_to_success_s
