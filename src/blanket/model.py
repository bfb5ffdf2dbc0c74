"""Parts of a generative model: sensory channels and prior dynamics.

The agent's belief ``z`` is a flattened stack of generalized coordinates (order-major, see
:mod:`blanket.gcoords`). A *term* of the Laplace-encoded free energy is anything that, at the
current belief, yields a prediction error ``e = y - g(z)``, the Jacobian ``G = dg/dz`` and a
precision ``P``; its contribution is ``1/2 e' P e - 1/2 ln|P|`` (Friston 2008, "Hierarchical
models in the brain", PLoS Comput Biol, eq. 9). Sensory channels and prior dynamics are both
terms; they differ only in what plays the role of ``y`` (a sensation, or zero for a prior on
motion ``D z - f(z)``).

To add a channel or a goal of your own, write a class with ``name``, ``size`` and an
``evaluate`` method returning :class:`Term` (or ``None`` when it has nothing this step), and
pass it to :class:`blanket.agent.ArmAgent` via ``extra_terms``. The agent's own channels
(:mod:`blanket.agent.generative_model`) are terms of the same kind, whose ``evaluate`` takes
one more argument, the step's context (last command, precisions in force, attractor); the
step assembles all of them alike (:mod:`blanket.agent.step`), on either backend.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Protocol, runtime_checkable

import numpy as np

__all__ = ["Term", "BodyState", "ModelTerm"]


@dataclass
class Term:
    """One precision-weighted prediction error and its linearisation.

    Attributes
    ----------
    error : numpy.ndarray
        ``y - g(z)``, shape ``(m,)``.
    jacobian : numpy.ndarray
        ``dg/dz`` with respect to the flattened belief, shape ``(m, N)``.
    precision : numpy.ndarray
        Diagonal precision, shape ``(m,)`` (full precisions are not needed by the built-in
        channels; pass the diagonal).
    """

    error: np.ndarray
    jacobian: np.ndarray
    precision: np.ndarray


@dataclass
class BodyState:
    """Kinematics of the believed posture, computed once per step and shared by terms.

    Attributes
    ----------
    tip_position_m : numpy.ndarray
        Believed tool-tip position in the base frame, shape (3,).
    tip_jacobian : numpy.ndarray
        ``d tip / d q`` at the believed posture, shape (3, n).
    """

    tip_position_m: np.ndarray
    tip_jacobian: np.ndarray


@runtime_checkable
class ModelTerm(Protocol):
    """Protocol for a sensory channel or a prior-dynamics term of the generative model."""

    name: str
    size: int

    def evaluate(self, obs: Mapping[str, Any], belief: np.ndarray, body: BodyState) -> Term | None:
        """Prediction error, Jacobian and precision at ``belief`` (shape (order+1, n))."""
        ...
