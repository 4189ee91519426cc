"""From MIDI velocity to hammer speed, and the velocity layers of the modal tables.

Russell & Rossing (1998, Acustica 84, 967) give hammer speeds of roughly 1-6 m/s over the
dynamic range of a grand; softer playing goes lower. The map is set per preset:
``log(speed)`` runs from ``speed_at_velocity_1_m_s`` to ``speed_at_velocity_127_m_s`` as
``((velocity - 1) / 126) ** velocity_curve`` (1 = geometric steps).
"""

from __future__ import annotations

__all__ = ["DYNAMIC_VELOCITY", "DEFAULT_LAYERS", "DEFAULT_MIN_SPEED_M_S", "DEFAULT_MAX_SPEED_M_S", "layer_speeds", "hammer_speed"]

from typing import Mapping

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..errors import ParameterError

#: MIDI velocities taken for dynamic markings (common practice, approximate: the markings
#: are the player's, the velocities a middle reading of each).
DYNAMIC_VELOCITY = {"ppp": 16, "pp": 28, "p": 44, "mp": 58, "mf": 72, "f": 88, "ff": 104, "fff": 118}
DEFAULT_LAYERS = 16
DEFAULT_MIN_SPEED_M_S = 0.5
DEFAULT_MAX_SPEED_M_S = 6.0


def layer_speeds(layers: int = DEFAULT_LAYERS, min_speed_m_s: float = DEFAULT_MIN_SPEED_M_S,
                 max_speed_m_s: float = DEFAULT_MAX_SPEED_M_S) -> NDArray[np.float64]:
    """Geometrically spaced hammer speeds of the velocity layers."""
    if layers < 2:
        raise ParameterError(f"layers={layers} must be >= 2")
    if not 0 < min_speed_m_s < max_speed_m_s:
        raise ParameterError(f"layer speeds {min_speed_m_s}..{max_speed_m_s} m/s must satisfy 0 < min < max")
    return np.geomspace(min_speed_m_s, max_speed_m_s, layers)


def hammer_speed(velocity: ArrayLike, instrument: Mapping[str, float]) -> NDArray[np.float64]:
    """Hammer speed in m/s for MIDI velocity 1..127 under the preset's velocity map."""
    vel = np.asarray(velocity, dtype=float)
    if np.any((vel < 1) | (vel > 127)):
        raise ParameterError(f"MIDI velocity {velocity} must lie in 1..127")
    lo, hi = instrument["speed_at_velocity_1_m_s"], instrument["speed_at_velocity_127_m_s"]
    x = ((vel - 1.0) / 126.0) ** instrument["velocity_curve"]
    return lo * (hi / lo) ** x
