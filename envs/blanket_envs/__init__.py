"""The blanket environment suite: gymnasium envs over the simulated worlds and sensors.

The env ids are registered by ``import blanket`` (see :data:`blanket.ENV_IDS`); importing this
package imports blanket, so either import registers them. Dependencies point one way: this
package imports blanket's world side (``blanket.sim``, ``blanket.sensors``), never the reverse.
"""

from __future__ import annotations

import blanket  # noqa: F401  (registers the env ids)

__all__: list[str] = []
