"""The stable-baselines3 style call shared by blanket's agents."""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["PredictMixin"]


class PredictMixin:
    """``predict(obs, state, episode_start, deterministic) -> (action, state)`` on top of a
    class's ``act(obs)`` and ``reset()``, so one benchmark loop runs agents beside RL policies
    (the ``PolicyPredictor`` protocol of stable-baselines3)."""

    def predict(
        self,
        observation: Any,
        state: Any = None,
        episode_start: Any = None,
        deterministic: bool = True,
    ) -> tuple[np.ndarray, Any]:
        """Stable-baselines3 style: ``(action, state)``; resets where ``episode_start``."""
        if episode_start is not None and bool(np.any(episode_start)):
            self.reset()  # type: ignore[attr-defined]
        return self.act(observation), state  # type: ignore[attr-defined]
