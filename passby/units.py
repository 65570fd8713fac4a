"""Speed units at the edges of the program (inside, everything is m/s).

References
----------
International yard and pound agreement (1959): 1 mile = 1609.344 m exactly.

Examples
--------
>>> round(to_unit(27.7778, "kmh"), 2), round(to_unit(26.8224, "mph"), 3)
(100.0, 60.0)
"""

from __future__ import annotations

#: Metres per mile (exact, 1959 agreement).
METRES_PER_MILE = 1609.344
#: Factors from m/s to each unit.
FACTORS = {"ms": 1.0, "kmh": 3.6, "mph": 3600.0 / METRES_PER_MILE}
#: How each unit is written in tables.
LABELS = {"ms": "m/s", "kmh": "km/h", "mph": "mph"}


def to_unit(speed_mps, unit: str):
    """Convert a speed (or array of speeds) from m/s to ``unit``."""
    return speed_mps * FACTORS[unit]


def from_unit(speed, unit: str):
    """Convert a speed in ``unit`` to m/s."""
    return speed / FACTORS[unit]
