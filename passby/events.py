"""Results of an analysis: small frozen dataclasses, SI units throughout.

Conversions to km/h or mph happen only at the edges (:mod:`passby.units`,
the table, JSON and CSV writers).
"""

from __future__ import annotations

from dataclasses import dataclass, field, asdict

#: Quality grades an event can carry, best first.
QUALITIES = ("good", "fair", "rejected")


@dataclass(frozen=True)
class PassEvent:
    """One vehicle passing the microphone.

    Attributes
    ----------
    pass_time_s : float
        Time of closest approach ``t0``, seconds from the start of the stream.
    speed_mps, speed_std_mps : float
        Speed along its track and its standard uncertainty (k = 1), m/s.
        NaN when the event is rejected before any fit.
    tones_hz : tuple of float
        Rest (emitted) frequency of each tone of the source, strongest first.
    closest_approach_m, closest_approach_std_m : float
        Fitted closest distance ``d`` between the source line and the
        microphone, and its standard uncertainty.
    speed_of_sound_mps, temperature_c : float
        The speed of sound the fit used and the air temperature it came from.
    quality : str
        ``"good"``, ``"fair"`` or ``"rejected"``.
    reason : str or None
        Why the event was rejected or graded fair, in a few words.
    residual_hz : float
        Robust RMS of the fit's frequency residuals, Hz.
    start_s, end_s : float
        First and last analysis frame of the tracks used, seconds.
    n_frames : int
        Number of frequency samples (all tones) that entered the fit.
    method : str
        ``"curve"`` (the exact model fitted to the whole curve),
        ``"plateaus"`` (closed form from the two plateaus only) or
        ``"matched"`` (the course searched in the samples of a close, fast
        pass, :func:`passby.matched.matched_course`; no residual).
    humidity_pct : float or None
        Relative humidity used for the speed of sound, if any.
    laf_max_db : float or None
        A-weighted, Fast-weighted maximum level over the event, dB, when
        levels were asked for.
    level_calibrated : bool
        Whether ``laf_max_db`` is in dB re 20 uPa (calibrated chain) or in
        dB re full scale plus an assumed offset.
    dropped_blocks : int
        Input blocks lost (device overflow or a full queue) within the event.
    """

    pass_time_s: float
    speed_mps: float
    speed_std_mps: float
    tones_hz: tuple
    closest_approach_m: float
    closest_approach_std_m: float
    speed_of_sound_mps: float
    temperature_c: float
    quality: str
    reason: str | None = None
    residual_hz: float = float("nan")
    start_s: float = float("nan")
    end_s: float = float("nan")
    n_frames: int = 0
    method: str = "curve"
    humidity_pct: float | None = None
    laf_max_db: float | None = None
    level_calibrated: bool = False
    dropped_blocks: int = 0

    @property
    def emitted_hz(self) -> float:
        """Rest frequency of the strongest tone, Hz (NaN if there is none)."""
        return self.tones_hz[0] if self.tones_hz else float("nan")

    def to_dict(self) -> dict:
        """The event as plain JSON-ready values, with the km/h fields added."""
        d = asdict(self)
        d["tones_hz"] = list(self.tones_hz)
        d["emitted_hz"] = self.emitted_hz
        d["speed_kmh"] = self.speed_mps * 3.6
        d["speed_std_kmh"] = self.speed_std_mps * 3.6
        return d


@dataclass(frozen=True)
class FileResult:
    """The events found in one recording.

    Attributes
    ----------
    path : str
        The file (or ``"<array>"`` for an array given directly).
    sample_rate_hz : int
    duration_s : float
        Duration of the audio actually read.
    events : tuple of PassEvent
    warnings : tuple of str
        Non-fatal problems (for example a file cut short).
    """

    path: str
    sample_rate_hz: int
    duration_s: float
    events: tuple = field(default_factory=tuple)
    warnings: tuple = field(default_factory=tuple)

    def to_dict(self) -> dict:
        return {
            "path": self.path,
            "sample_rate_hz": self.sample_rate_hz,
            "duration_s": self.duration_s,
            "warnings": list(self.warnings),
            "events": [e.to_dict() for e in self.events],
        }
