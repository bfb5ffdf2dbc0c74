"""blanket: test active-inference sensorimotor controllers on simulated robots, without ROS.

Importing blanket registers the environment suite (``blanket/arm-reach-v0`` and friends)
with gymnasium.
"""

from __future__ import annotations

__version__ = "0.1.0"

import blanket_envs as _blanket_envs  # noqa: F401  (registers the env ids)

__all__ = ["__version__"]
