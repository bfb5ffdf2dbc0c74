"""``clip_values``: numpy's clip, called as its ufunc.

``np.clip`` reaches the same ufunc (``numpy._core.umath.clip``) through two Python-level
dispatch layers that cost several times the clip of a small vector; the envs, sensors and the
safety wrapper clip a few small vectors every control step. Same values bit for bit (it *is*
the function ``np.clip`` ends in); with a numpy that hides the ufunc, ``np.clip`` itself.
"""

from __future__ import annotations

import numpy as np

__all__ = ["clip_values"]

try:
    from numpy._core.umath import clip as clip_values
except ImportError:  # pragma: no cover  (numpy < 2 or a future layout)
    clip_values = np.clip
