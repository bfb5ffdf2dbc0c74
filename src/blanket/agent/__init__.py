"""Active-inference agents: :class:`ArmAgent` for arms, :class:`BaseAgent` for rovers.

The arm agent's pieces: :class:`GenerativeModel` (built once), :class:`Belief` and
:class:`EpisodeState` (what changes), :func:`blanket.agent.step.step` (the one step).
"""

from __future__ import annotations

from typing import Any

from blanket.agent.arm import AgentOptions, ArmAgent
from blanket.agent.belief import Belief, EpisodeState
from blanket.agent.generative_model import GenerativeModel

__all__ = [
    "ArmAgent",
    "AgentOptions",
    "BaseAgent",
    "Belief",
    "EpisodeState",
    "GenerativeModel",
    "agent_for_env",
]


def __getattr__(name: str) -> Any:
    if name == "BaseAgent":
        from blanket.agent.mobile_base import BaseAgent

        return BaseAgent
    raise AttributeError(name)


def agent_for_env(env: Any, **options: Any) -> Any:
    """The built-in agent that fits ``env``: an ArmAgent for arms, a BaseAgent for bases."""
    from blanket.description import ArmDescription

    if isinstance(getattr(env.unwrapped, "description", None), ArmDescription):
        return ArmAgent.from_env(env, **options)
    from blanket.agent.mobile_base import BaseAgent

    return BaseAgent.from_env(env, **options)
