"""Settings of an analysis, shared by ``passby analyze`` and the station.

One frozen dataclass holds every number that changes the result, so the
offline and the live paths cannot drift apart: both build their
:class:`~passby.pipeline.Pipeline` from an :class:`AnalysisSettings`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

from passby.errors import ConfigError


@dataclass(frozen=True)
class AnalysisSettings:
    """Everything that sets the numbers of an analysis (SI units).

    Attributes
    ----------
    temperature_c : float
        Air temperature, degrees Celsius (default 20).
    humidity_pct : float or None
        Relative humidity, percent. When given, the speed of sound follows
        Cramer (1993) instead of the ideal-gas form of ISO 9613-1.
    pressure_pa : float
        Static pressure, Pa (used only with ``humidity_pct``).
    wind_mps : float
        Wind component along the direction of travel, m/s (positive: the
        wind blows the way the vehicle goes).
    f_min_hz, f_max_hz : float
        Band in which tones are tracked (heard frequencies).
    threshold_db : float
        How far a spectral peak must stand above the background, dB.
    min_track_s : float
        Shortest track that can make a pass-by, seconds.
    level : bool
        Also measure the A-weighted Fast maximum level of each event.
    level_offset_db : float or None
        Calibration offset: a signal of mean square 1 (digital full scale
        units) reads ``level_offset_db`` dB re 20 uPa, so a full-scale sine
        reads 3.01 dB less (None: uncalibrated, dB re full scale).
    """

    temperature_c: float = 20.0
    humidity_pct: float | None = None
    pressure_pa: float = 101325.0
    wind_mps: float = 0.0
    f_min_hz: float = 60.0
    f_max_hz: float = 4500.0
    threshold_db: float = 12.0
    min_track_s: float = 0.3
    level: bool = False
    level_offset_db: float | None = None

    def __post_init__(self):
        checks = [
            ("temperature_c", -60.0 <= self.temperature_c <= 60.0, "must lie between -60 and 60 degrees C"),
            ("pressure_pa", 30e3 <= self.pressure_pa <= 120e3, "must lie between 30 and 120 kPa"),
            ("wind_mps", abs(self.wind_mps) <= 40.0, "must lie between -40 and 40 m/s"),
            ("f_min_hz", 20.0 <= self.f_min_hz < self.f_max_hz, "must be at least 20 Hz and below f_max_hz"),
            ("f_max_hz", self.f_max_hz <= 20000.0, "must be at most 20 kHz"),
            ("threshold_db", 3.0 <= self.threshold_db <= 40.0, "must lie between 3 and 40 dB"),
            ("min_track_s", 0.1 <= self.min_track_s <= 30.0, "must lie between 0.1 and 30 s"),
        ]
        if self.humidity_pct is not None:
            checks.append(("humidity_pct", 0.0 <= self.humidity_pct <= 100.0, "must lie between 0 and 100 %"))
        for name, ok, what in checks:
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and math.isfinite(value) and ok):
                raise ConfigError(f"{name}={value!r} {what}")

    def with_(self, **changes) -> "AnalysisSettings":
        """A copy with some fields changed (validated again)."""
        return replace(self, **changes)
