"""The unattended station: audio in, events into the durable log, for days.

The shell around :class:`~passby.pipeline.Pipeline` for a board left beside
a road or a track. It reads a sound card through PortAudio (the
``sounddevice`` package, imported only here and only for live input) or
replays a WAV file through exactly the same path, and writes each pass-by
to the :class:`~passby.store.EventLog`.

Threads and the time base
-------------------------
The audio callback only copies its block into a bounded queue and returns.
The main thread takes the blocks off the queue and runs the pipeline. When
audio is lost -- PortAudio reports an input overflow, or the queue is full
because the analysis fell behind -- the loss is counted and handed to
:meth:`Pipeline.push_gap` in its place in the stream, so the time base
stays right; each loss is logged, stored in ``input_losses`` (in batches)
and counted in the ``overflows`` of the events it touches. The length of an
overflow is taken from PortAudio's ADC timestamps when they are usable, and
is otherwise assumed to be one block.

Event times: ``time_utc`` = the UTC time of the first sample of the stream
(the board's clock when the first block arrived, less its duration) plus
the event's ``pass_time_s``. It is as good as the board's clock: keep it
synchronised (NTP, or a real-time clock module; a board without either
boots with a wrong time after a power cut). In a replay, the stream starts
at the moment the replay starts.

Device lost
-----------
When the stream stops or no block arrives for a few seconds (a USB
microphone pulled out), the open events are finished, the stream is closed
and opened again after a pause that doubles from 1 s up to 60 s; every try
is logged. Each new stream starts a new pipeline and a new time base; the
outage is stored as an input loss of kind ``"device"``.

Air temperature
---------------
With ``temperature_file`` the file is read again every five minutes. A new
reading (changed by 0.1 degrees C or more) replaces the pipeline's
``settings`` between two blocks (the simplest hand-over: no restart, no
lost track). The events completed after that use the new temperature,
provided the pipeline takes its speed of sound from ``self.settings`` when
it fits an event; every event row stores the temperature and speed of sound
the fit actually used. A failed or implausible reading keeps the previous
value and is logged.

Stopping
--------
SIGTERM or SIGINT (see :mod:`passby.cli.station`) calls :meth:`Station.stop`:
the input is closed, the blocks already queued are analysed, the events
still open are finished (:meth:`Pipeline.finish`) and logged, the run is
closed in the log, and the process exits with status 0. A power cut or a
``kill -9`` loses at most the event being analysed (see
:mod:`passby.store`).

Log lines
---------
Lines go to stderr through :mod:`logging`. Under systemd (stderr is the
stream named by ``JOURNAL_STREAM``) each line carries a syslog priority
prefix (``<6>``, ``<4>``, ``<3>``) that journald turns into the line's
priority, and no time (journald adds it); on a terminal each line starts with an ISO 8601 local time; otherwise
lines are bare, with ``warning:`` or ``error:`` in front where it applies.
"""

from __future__ import annotations

import contextlib
import logging
import math
import os
import queue
import re
import socket
import sys
import threading
import time
from dataclasses import dataclass, field

import numpy as np

from passby.errors import ConfigError, DeviceError, InputError, LogError, PassbyError
from passby.settings import AnalysisSettings
from passby.store import EventLog, InputLoss, utc_iso

__all__ = [
    "StationOptions",
    "station_options",
    "Station",
    "Intake",
    "RingBuffer",
    "ClipKeeper",
    "import_sounddevice",
    "parse_temperature_text",
    "default_temperature_unit",
    "read_temperature",
    "format_event_line",
    "configure_logging",
    "SAFETY_CAUTIONS",
]

log = logging.getLogger("passby.station")

#: Printed once, on the first start of a station with a new log.
SAFETY_CAUTIONS = (
    "safety: setting up and servicing a station beside live traffic or track "
    "follows the site's safety rules and local codes (lookout, protection, "
    "high-visibility clothing, safe distance from the running line).",
    "safety: the speeds are for engineering studies, not for legal enforcement, "
    "unless the local authority has approved the method.",
    "safety: sound levels from an uncertified microphone are indicative only.",
)

_META_CAUTIONS = "cautions_shown_utc"

#: A clip holds the event's span and this much more on each side, s.
CLIP_MARGIN_S = 1.0

#: 1 m/s = 3.6 km/h (exact, from the definitions of the units).
_KMH_PER_MPS = 3.6


# --------------------------------------------------------------------------
# sounddevice, only when live input is used


def import_sounddevice():
    """The ``sounddevice`` module, or a one-line :class:`DeviceError`.

    Raises
    ------
    DeviceError
        The PortAudio library is missing (``sounddevice`` raises OSError
        when it cannot load it) or the package itself is not installed.
    """
    try:
        import sounddevice
    except OSError:
        raise DeviceError("the PortAudio library is missing: install it "
                          "(sudo apt install libportaudio2)", where="audio input") from None
    except ImportError:
        raise DeviceError("the sounddevice package is not installed "
                          "(pip install sounddevice)", where="audio input") from None
    return sounddevice


# --------------------------------------------------------------------------
# Air temperature from a file


def default_temperature_unit(path: str) -> str:
    """``"mC"`` for the kernel's 1-Wire attributes, ``"C"`` otherwise.

    Examples
    --------
    >>> default_temperature_unit("/sys/bus/w1/devices/28-00000a1b2c3d/temperature")
    'mC'
    >>> default_temperature_unit("/run/air/temperature_c.txt")
    'C'
    """
    return "mC" if os.path.basename(str(path)) in ("temperature", "w1_slave") else "C"


_W1_T = re.compile(r"\bt=(-?\d+)\b")


def parse_temperature_text(text: str, unit: str = "C") -> float:
    """Air temperature in degrees C from the text of a thermometer file.

    Parameters
    ----------
    text : str
        The file's content: a number, or the two lines of a 1-Wire
        ``w1_slave`` file (``... : crc=.. YES`` then ``... t=12875``).
    unit : {"C", "mC"}
        Degrees C, or millidegrees C (the Linux ``w1_therm`` driver's unit).

    Returns
    -------
    float
        Degrees C.

    Raises
    ------
    ValueError
        Text that holds no number, a ``w1_slave`` reading whose CRC check
        failed (``NO``), or a temperature outside -60..60 degrees C (such as
        85.000, the DS18B20's power-on value).

    Notes
    -----
    The DS18B20 reads 85 degrees C after a power-on reset before its first
    conversion (Maxim Integrated, DS18B20 data sheet, 19-7487, "Operation --
    Measuring Temperature": power-on value +85 degrees C).

    Examples
    --------
    >>> parse_temperature_text("12875\\n", "mC")
    12.875
    >>> parse_temperature_text("7.5")
    7.5
    >>> w1 = "c8 01 4b 46 7f ff 08 10 1c : crc=1c YES\\nc8 01 4b 46 7f ff 08 10 1c t=28500\\n"
    >>> parse_temperature_text(w1, "mC")
    28.5
    """
    s = str(text).strip()
    if "crc=" in s:
        first = s.splitlines()[0]
        if not first.rstrip().endswith("YES"):
            raise ValueError("the thermometer's CRC check failed")
        m = _W1_T.search(s)
        if not m:
            raise ValueError("no t=... reading in the 1-Wire file")
        value = int(m.group(1)) / 1000.0
    else:
        try:
            value = float(s.split()[0]) if s else float("nan")
        except ValueError:
            raise ValueError(f"not a number: {s[:40]!r}") from None
        if unit == "mC":
            value /= 1000.0
    if not (math.isfinite(value) and -60.0 <= value <= 60.0):
        raise ValueError(f"implausible air temperature {value:g} degrees C")
    return value


def read_temperature(path: str, unit: str | None = None) -> float:
    """Read a thermometer file (see :func:`parse_temperature_text`).

    Raises
    ------
    ValueError
        The file cannot be read or holds no plausible temperature.
    """
    try:
        with open(path, "r", encoding="ascii", errors="replace") as f:
            text = f.read(4096)
    except OSError as exc:
        raise ValueError(f"cannot read {path}: {exc.strerror or exc}") from None
    return parse_temperature_text(text, unit or default_temperature_unit(path))


# --------------------------------------------------------------------------
# Logging


class _Formatter(logging.Formatter):
    _PRIORITY = {logging.DEBUG: 7, logging.INFO: 6, logging.WARNING: 4,
                 logging.ERROR: 3, logging.CRITICAL: 2}

    def __init__(self, style: str):
        super().__init__()
        self.style_ = style

    def format(self, record):
        msg = record.getMessage()
        if self.style_ == "journal":
            prio = self._PRIORITY.get(record.levelno, 6)
            return f"<{prio}>{msg}"
        prefix = ""
        if record.levelno >= logging.ERROR:
            prefix = "error: "
        elif record.levelno >= logging.WARNING:
            prefix = "warning: "
        if self.style_ == "tty":
            stamp = time.strftime("%Y-%m-%dT%H:%M:%S%z", time.localtime(record.created))
            return f"{stamp} {prefix}{msg}"
        return prefix + msg


def _is_journal(stream) -> bool:
    """Whether ``stream`` is the journal's stream (systemd.exec(5), JOURNAL_STREAM:
    ``device:inode`` of the stream systemd connected; compare with fstat)."""
    value = os.environ.get("JOURNAL_STREAM", "")
    try:
        dev, ino = (int(v) for v in value.split(":"))
        st = os.fstat(stream.fileno())
    except (ValueError, OSError, AttributeError):
        return False
    return (st.st_dev, st.st_ino) == (dev, ino)


def configure_logging(stream=None) -> logging.Handler:
    """Send the station's log lines to ``stream`` (stderr), once.

    Returns the handler (remove it from ``logging.getLogger("passby")`` to
    undo).
    """
    stream = sys.stderr if stream is None else stream
    if _is_journal(stream):
        style = "journal"
    elif hasattr(stream, "isatty") and stream.isatty():
        style = "tty"
    else:
        style = "plain"
    handler = logging.StreamHandler(stream)
    handler.setFormatter(_Formatter(style))
    root = logging.getLogger("passby")
    for h in list(root.handlers):
        if getattr(h, "_passby_station", False):
            root.removeHandler(h)
    handler._passby_station = True
    root.addHandler(handler)
    root.setLevel(logging.INFO)
    return handler


def format_event_line(e, time_utc: str) -> str:
    """The one log line of an event.

    Examples
    --------
    >>> from passby.events import PassEvent
    >>> e = PassEvent(12.0, 13.89, 0.21, (421.3,), 6.04, 0.3, 343.2, 20.0, "good")
    >>> format_event_line(e, "2031-05-04T07:12:03.250Z")
    'event 2031-05-04T07:12:03.250Z 50.0 km/h +- 0.8 tone 421 Hz at 6.0 m good'
    """
    parts = [f"event {time_utc}"]
    if math.isfinite(e.speed_mps):
        parts.append(f"{e.speed_mps * _KMH_PER_MPS:.1f} km/h")
        if math.isfinite(e.speed_std_mps):
            parts.append(f"+- {e.speed_std_mps * _KMH_PER_MPS:.1f}")
    if e.tones_hz:
        parts.append(f"tone {e.emitted_hz:.0f} Hz")
    if math.isfinite(e.closest_approach_m):
        parts.append(f"at {e.closest_approach_m:.1f} m")
    if e.laf_max_db is not None:
        unit = "dB(A)" if e.level_calibrated else "dB(A) uncalibrated"
        parts.append(f"LAFmax {e.laf_max_db:.1f} {unit}")
    parts.append(e.quality)
    if e.reason:
        parts.append(f"({e.reason})")
    if e.dropped_blocks:
        parts.append(f"[{e.dropped_blocks} input blocks lost]")
    return " ".join(parts)


# --------------------------------------------------------------------------
# The callback side


_END = object()


class Intake:
    """The audio callback: copy the block into a bounded queue, nothing more.

    Parameters
    ----------
    maxsize : int
        Blocks the queue holds (the analysis may fall this far behind).
    channel_index : int
        0-based column of the callback's ``indata`` to keep.
    sample_rate : int
        For the overflow estimate from ADC timestamps.
    blocking : bool
        Wait for room instead of dropping (a replay as fast as possible:
        no block is lost, the reader waits for the analysis).
    stop_event : threading.Event, optional
        Ends a blocking wait.

    Notes
    -----
    Each queued item is ``(samples, losses, wall_time)``: the float32
    samples, the losses that happened just before them as
    ``(kind, frames, blocks)`` tuples, and :func:`time.time` at the call.
    A block that finds the queue full is counted as a ``"queue_full"`` loss
    carried by the next block that gets in; consecutive losses of one kind
    merge into one incident.
    """

    def __init__(self, maxsize: int, channel_index: int = 0, sample_rate: int = 48000,
                 blocking: bool = False, stop_event: threading.Event | None = None,
                 clock=time.time):
        self.queue = queue.Queue(maxsize=int(maxsize))
        self.channel_index = int(channel_index)
        self.sample_rate = int(sample_rate)
        self.blocking = bool(blocking)
        self.stop_event = stop_event or threading.Event()
        self.clock = clock
        self.calls = 0
        self.frames = 0
        self._pending = []
        self._next_adc = None

    def _add_loss(self, kind, frames, blocks):
        if self._pending and self._pending[-1][0] == kind:
            k, f, b = self._pending[-1]
            self._pending[-1] = (k, f + frames, b + blocks)
        else:
            self._pending.append((kind, frames, blocks))

    def _overflow_frames(self, time_info, frames):
        adc = getattr(time_info, "inputBufferAdcTime", None) if time_info is not None else None
        expected, lost = self._next_adc, frames
        if adc and expected and adc > expected:
            gap = (adc - expected) * self.sample_rate
            if 0.5 <= gap <= 60.0 * self.sample_rate:
                lost = int(round(gap))
        return lost

    def callback(self, indata, frames, time_info, status) -> None:
        """The PortAudio callback (``sounddevice`` signature)."""
        self.calls += 1
        now = self.clock()
        frames = int(frames)
        if status is not None and getattr(status, "input_overflow", False):
            lost = self._overflow_frames(time_info, frames)
            self._add_loss("overflow", lost, max(1, int(round(lost / max(frames, 1)))))
        adc = getattr(time_info, "inputBufferAdcTime", None) if time_info is not None else None
        self._next_adc = (adc + frames / self.sample_rate) if adc else None
        x = np.array(indata[:, self.channel_index] if np.ndim(indata) == 2 else indata,
                     dtype=np.float32, copy=True)
        item = (x, tuple(self._pending), now)
        if self.blocking:
            while not self.stop_event.is_set():
                try:
                    self.queue.put(item, timeout=0.1)
                    break
                except queue.Full:
                    continue
            else:
                return
        else:
            try:
                self.queue.put_nowait(item)
            except queue.Full:
                self._add_loss("queue_full", frames, 1)
                return
        self._pending = []
        self.frames += frames

    def take_pending(self) -> tuple:
        """Losses not yet carried by a block (the stream ended after them)."""
        out, self._pending = tuple(self._pending), []
        return out

    def end(self) -> None:
        """Mark the end of the stream (a replay reached the end of its file)."""
        while not self.stop_event.is_set():
            try:
                self.queue.put(_END, timeout=0.1)
                return
            except queue.Full:
                continue


# --------------------------------------------------------------------------
# Raw audio for clips


class RingBuffer:
    """The last ``seconds`` of raw input, addressed by absolute sample index.

    Examples
    --------
    >>> r = RingBuffer(10, 1.0)           # 10 samples
    >>> r.push(np.arange(8, dtype=np.float32)); r.gap(2); r.push(np.ones(5, np.float32))
    >>> r.end, r.start
    (15, 5)
    >>> r.span(4, 12).tolist()            # clamped to what is kept; lost samples are 0
    [5.0, 6.0, 7.0, 0.0, 0.0, 1.0, 1.0]
    """

    def __init__(self, sample_rate: float, seconds: float):
        self.size = max(1, int(round(sample_rate * seconds)))
        self.data = np.zeros(self.size, dtype=np.float32)
        self.end = 0  # absolute index one past the newest sample

    @property
    def start(self) -> int:
        return max(0, self.end - self.size)

    def push(self, x) -> None:
        x = np.asarray(x, dtype=np.float32)
        n = len(x)
        if n >= self.size:
            x, self.end = x[-self.size:], self.end + n - self.size
            n = self.size
        i = self.end % self.size
        first = min(n, self.size - i)
        self.data[i:i + first] = x[:first]
        self.data[:n - first] = x[first:]
        self.end += n

    def gap(self, n: int) -> None:
        """Lost samples: kept as zeros so indices stay right."""
        n = int(n)
        if n >= self.size:
            self.data[:] = 0
            self.end += n
        else:
            self.push(np.zeros(n, dtype=np.float32))

    def span(self, a: int, b: int) -> np.ndarray:
        """Samples ``a`` (inclusive) to ``b`` (exclusive), clamped to those kept."""
        a, b = max(int(a), self.start), min(int(b), self.end)
        if b <= a:
            return np.zeros(0, dtype=np.float32)
        idx = np.arange(a, b) % self.size
        return self.data[idx]


class ClipKeeper:
    """Event clips as WAV files in one directory, under a disk quota.

    Parameters
    ----------
    directory : str
        Created if missing.
    quota_bytes : int
        When the clips together exceed it, the oldest are deleted (never
        the newest one).
    relative_to : str, optional
        Paths are returned relative to this directory when the clip lies
        beneath it (the log's directory: a log and its clips move together).
    """

    SUFFIX = ".wav"

    def __init__(self, directory: str, quota_bytes: int, relative_to: str | None = None):
        self.directory = os.path.abspath(directory)
        self.quota_bytes = int(quota_bytes)
        self.relative_to = os.path.abspath(relative_to) if relative_to else None
        try:
            os.makedirs(self.directory, exist_ok=True)
        except OSError as exc:
            raise PassbyError(f"cannot create the clip directory: {exc.strerror or exc}",
                              where=self.directory) from None

    def _stored(self, path):
        if self.relative_to:
            rel = os.path.relpath(path, self.relative_to)
            if not rel.startswith(os.pardir):
                return rel
        return path

    def save(self, samples, sample_rate: int, time_utc: str, station_id: str):
        """Write one clip; return ``(stored_path, deleted_stored_paths)``."""
        from passby.wavio import write_wav

        stamp = time_utc.replace("-", "").replace(":", "")
        name = f"{stamp}-{station_id}"
        path = os.path.join(self.directory, name + self.SUFFIX)
        k = 1
        while os.path.exists(path):
            k += 1
            path = os.path.join(self.directory, f"{name}-{k}{self.SUFFIX}")
        write_wav(path, np.asarray(samples, dtype=np.float64), int(sample_rate), "pcm16")
        deleted = self.enforce_quota(keep=path)
        return self._stored(path), [self._stored(p) for p in deleted]

    def enforce_quota(self, keep=None) -> list:
        """Delete the oldest clips beyond the quota; the paths deleted."""
        clips = []
        with os.scandir(self.directory) as it:
            for entry in it:
                if entry.is_file() and entry.name.endswith(self.SUFFIX) \
                        and not entry.name.startswith("."):
                    st = entry.stat()
                    clips.append((st.st_mtime, entry.name, entry.path, st.st_size))
        clips.sort()
        total = sum(c[3] for c in clips)
        deleted = []
        for _, _, path, size in clips:
            if total <= self.quota_bytes:
                break
            if keep is not None and os.path.abspath(path) == os.path.abspath(keep):
                continue
            try:
                os.unlink(path)
            except OSError:
                continue
            total -= size
            deleted.append(path)
        return deleted


# --------------------------------------------------------------------------
# Options


@dataclass(frozen=True)
class StationOptions:
    """Everything a station run needs, resolved from the file and the options.

    Attributes
    ----------
    log_path : str
    station_id : str
    settings : AnalysisSettings
        Initial analysis settings (the temperature may change later).
    device : int, str or None
        PortAudio device (None: the default input).
    rate : int or None
        Sampling rate (None: the device's default).
    channel : int
        1-based input channel.
    replay : str or None
        A WAV file to replay instead of live input.
    realtime : bool
        Replay at the recording's pace (else as fast as the analysis goes).
    temperature_file, temperature_unit : str or None
    temperature_fallback_c : float
        Used until (and whenever) the file gives no good reading.
    clips_dir : str or None
        Keep event clips there (None: no clips).
    clip_quota_mb : float
    block_s : float
        Audio block length, s.
    queue_blocks : int
        Queue length, blocks.
    ring_s : float
        Raw audio kept for clips, s.
    temperature_period_s, flush_period_s, heartbeat_period_s : float
        How often (wall-clock seconds) the temperature file is read, input
        losses are written when no event carries them, and the run's
        ``last_seen_utc`` is refreshed when nothing else was written.
    stall_s : float
        No block for this long means the device is lost.
    max_retry_s : float
        Longest pause between two tries to open the device.
    """

    log_path: str
    station_id: str
    settings: AnalysisSettings = field(default_factory=AnalysisSettings)
    device: int | str | None = None
    rate: int | None = None
    channel: int = 1
    replay: str | None = None
    realtime: bool = False
    temperature_file: str | None = None
    temperature_unit: str | None = None
    clips_dir: str | None = None
    clip_quota_mb: float = 500.0
    block_s: float = 0.1
    queue_blocks: int = 100
    ring_s: float = 60.0
    temperature_period_s: float = 300.0
    flush_period_s: float = 300.0
    heartbeat_period_s: float = 600.0
    stall_s: float = 5.0
    max_retry_s: float = 60.0
    poll_s: float = 0.25


def default_station_id() -> str:
    """The host name, cut to the characters a station id may hold."""
    name = re.sub(r"[^A-Za-z0-9._-]", "-", socket.gethostname() or "station")[:64]
    return name if name and name[0].isalnum() else "station"


def station_options(cfg=None, *, log=None, temperature_c=None, device=None, rate=None,
                    channel=None, replay=None, realtime=False, clips=None,
                    clip_quota_mb=None, station_id=None, **tuning) -> StationOptions:
    """Resolve a configuration and command-line values into StationOptions.

    Command-line values (keyword arguments, None when not given) override
    the configuration file; ``temperature_c`` given here also overrides the
    file's ``temperature_file``. Clips are kept when ``clips`` (a directory)
    is given or the file says ``[clips] keep = true``; their default
    directory is ``<log name>-clips`` beside the log. ``tuning`` sets the
    remaining StationOptions fields (block length, periods).

    Raises
    ------
    ConfigError
        A bad value, named by its option (``--rate``) or key; no log given.

    Examples
    --------
    >>> o = station_options(log="road.db", rate=44100, station_id="north-lane")
    >>> o.rate, o.channel, o.station_id, o.clips_dir
    (44100, 1, 'north-lane', None)
    """
    from passby.config import StationConfig, check_value, settings_from_config

    cfg = cfg or StationConfig()

    def checked(option, table, key, value):
        if value is None:
            return None
        try:
            return check_value(table, key, value)
        except ValueError as exc:
            raise ConfigError(str(exc), where=option) from None

    log_path = checked("--log", "station", "log", log) or cfg.log
    if not log_path:
        raise ConfigError("no log given: use --log PATH or [station] log in the "
                          "configuration file", where="station")
    temperature_file = cfg.temperature_file if temperature_c is None else None
    try:
        settings = settings_from_config(cfg, temperature_c=temperature_c)
    except ConfigError as exc:
        if temperature_c is not None and exc.where is None:
            raise ConfigError(exc.message.split(" ", 1)[-1], where="--temperature") from None
        raise
    clips_dir = checked("--clips", "clips", "dir", clips)
    if clips_dir is None and cfg.clips_keep:
        clips_dir = cfg.clips_dir or os.path.splitext(os.path.abspath(log_path))[0] + "-clips"
    quota = checked("--clip-quota-mb", "clips", "quota_mb", clip_quota_mb)
    return StationOptions(
        log_path=log_path,
        station_id=(checked("--station-id", "station", "id", station_id)
                    or cfg.station_id or default_station_id()),
        settings=settings,
        device=checked("--device", "audio", "device", device) if device is not None
        else cfg.device,
        rate=checked("--rate", "audio", "rate", rate) or cfg.rate,
        channel=checked("--channel", "audio", "channel", channel) or cfg.channel,
        replay=replay,
        realtime=bool(realtime),
        temperature_file=temperature_file,
        temperature_unit=cfg.temperature_unit,
        clips_dir=clips_dir,
        clip_quota_mb=quota if quota is not None else cfg.clips_quota_mb,
        **tuning,
    )


# --------------------------------------------------------------------------
# Sources


class _ReplaySource:
    """A WAV file fed block by block to the same callback as a device."""

    def __init__(self, path, channel, block_s, realtime, intake_factory):
        from passby.wavio import WavReader

        self.reader = WavReader(path)  # InputError for a bad file, before anything starts
        info = self.reader.info
        if channel > info.channels:
            self.reader.close()
            raise InputError(f"channel {channel} asked for, but the file has "
                             f"{info.channels} channel(s)", where=path)
        self.channel_index = channel - 1 if info.channels > 1 else None
        self.info = info
        self.sample_rate = info.sample_rate
        self.block_frames = max(1, int(round(block_s * self.sample_rate)))
        self.realtime = realtime
        self.halt = threading.Event()
        self.intake = intake_factory(self.sample_rate, blocking=not realtime, channel_index=0,
                                     stop_event=self.halt)
        self.error = None
        self._thread = threading.Thread(target=self._run, name="passby-replay", daemon=True)

    def start(self):
        self._thread.start()

    def _run(self):
        t0 = time.monotonic()
        n = 0
        try:
            for block in self.reader.blocks(self.block_frames, channel=self.channel_index):
                if self.halt.is_set():
                    return
                if self.realtime:
                    delay = t0 + (n + len(block)) / self.sample_rate - time.monotonic()
                    if delay > 0 and self.halt.wait(delay):
                        return
                self.intake.callback(block[:, None], len(block), None, None)
                n += len(block)
        except BaseException as exc:  # handed to the main thread
            self.error = exc
        finally:
            self.intake.end()

    def close(self):
        self.halt.set()
        self._thread.join(timeout=5)
        self.reader.close()


# --------------------------------------------------------------------------
# The station


class Station:
    """One station run: open the input, analyse, log, until stopped.

    Parameters
    ----------
    options : StationOptions
    pipeline_factory : callable, optional
        ``factory(sample_rate, settings)`` returning an object with the
        :class:`~passby.pipeline.Pipeline` interface (default: Pipeline).
    sounddevice : module, optional
        Stand-in for the ``sounddevice`` module (tests); imported on first
        live use otherwise.
    wait : callable, optional
        ``wait(seconds) -> bool`` pause between device retries, returning
        True when the station is being stopped (default: the stop event's
        ``wait``).

    Examples
    --------
    See ``tests/test_station.py``; ``passby station --help`` for the command.
    """

    def __init__(self, options: StationOptions, pipeline_factory=None, sounddevice=None,
                 wait=None):
        self.opts = options
        if pipeline_factory is None:
            from passby.pipeline import Pipeline as pipeline_factory
        self.pipeline_factory = pipeline_factory
        self._sd = sounddevice
        self.stop_event = threading.Event()
        self._wait = wait or self.stop_event.wait
        self.settings = options.settings
        self.log_db = None
        self.run_id = None
        self.exit_reason = "stopped"
        # Per segment (one open stream)
        self.pipeline = None
        self.sample_rate = None
        self.segment_start = None
        self.samples = 0
        self.ring = None
        self.segment_losses = []
        # Buffered writes
        self.pending_losses = []
        self.unwritten = []  # (event, time_utc, clip, overflows) that failed to write
        self.events_logged = 0
        self.loss_incidents = 0
        self.writes = 0
        self.clips = None
        self._last_write = time.monotonic()
        self._last_flush = time.monotonic()
        self._next_temperature = 0.0
        self._temperature_failing = False
        self._last_loss_log = -math.inf
        self._quiet_losses = [0, 0]

    # -- control --------------------------------------------------------
    def stop(self) -> None:
        """Ask the station to finish and exit (safe from a signal handler)."""
        self.stop_event.set()

    @property
    def stopping(self) -> bool:
        return self.stop_event.is_set()

    # -- run ------------------------------------------------------------
    def run(self) -> int:
        """Run until stopped (or the replay ends); the exit status (0)."""
        o = self.opts
        if o.replay:
            from passby.wavio import probe_wav

            probe_wav(o.replay)  # a bad file is refused before the log is touched
        self.log_db = EventLog(o.log_path, create=True)
        try:
            self._first_start_cautions()
            if o.clips_dir:
                self.clips = ClipKeeper(o.clips_dir, int(o.clip_quota_mb * 1e6),
                                        relative_to=os.path.dirname(os.path.abspath(o.log_path)))
            source = "replay" if o.replay else "live"
            device = f"replay:{os.path.basename(o.replay)}" if o.replay else str(o.device or "default")
            self.run_id, unclean = self.log_db.start_run(o.station_id, source, device,
                                                         o.rate or 0, o.channel)
            self.writes += 1
            for r in unclean:
                log.warning("run %d (started %s) did not stop cleanly; last seen %s "
                            "(power cut or kill?)", r.id, r.start_utc, r.last_seen_utc)
            log.info("station %s: log %s, run %d, passby %s", o.station_id, o.log_path,
                     self.run_id, _version())
            self._read_temperature(force=True)
            error = None
            try:
                if o.replay:
                    self._run_replay()
                else:
                    self._run_live()
            except PassbyError as exc:
                error = exc
                self.exit_reason = "error"
            except Exception:
                # An internal fault: close the run for the record, then let
                # it out (exit status 1; systemd restarts the station).
                with contextlib.suppress(PassbyError):
                    self.log_db.end_run(self.run_id, "fault", self._take_losses())
                raise
            self._close_segment()
            self._flush_unwritten()
            self.log_db.end_run(self.run_id, self.exit_reason, self._take_losses())
            self.writes += 1
            log.info("station stopped (%s): %d events logged, %d input-loss incidents",
                     self.exit_reason, self.events_logged, self.loss_incidents)
            if error is not None:
                raise error
            return 0
        finally:
            self.log_db.close()

    def _first_start_cautions(self):
        if self.log_db.get_meta(_META_CAUTIONS) is None:
            for line in SAFETY_CAUTIONS:
                log.warning("%s", line)
            self.log_db.set_meta(_META_CAUTIONS, utc_iso(time.time()))
            self.writes += 1

    # -- replay ---------------------------------------------------------
    def _intake_factory(self, rate, blocking=False, channel_index=0, stop_event=None):
        return Intake(max(2, self.opts.queue_blocks), channel_index=channel_index,
                      sample_rate=rate, blocking=blocking,
                      stop_event=stop_event or self.stop_event)

    def _run_replay(self):
        o = self.opts
        src = _ReplaySource(o.replay, o.channel, o.block_s, o.realtime, self._intake_factory)
        info = src.info
        if o.rate and o.rate != info.sample_rate:
            log.warning("--rate %d ignored: the replay runs at the file's %d Hz",
                        o.rate, info.sample_rate)
        log.info("input: replay of %s, %d Hz, %d channel(s), %.1f s%s%s", o.replay,
                 info.sample_rate, info.channels, info.duration_s,
                 ", at the recording's pace" if o.realtime else "",
                 " (file cut short)" if info.truncated else "")
        self._update_run(f"replay:{os.path.basename(o.replay)}", info.sample_rate)
        self._open_segment(info.sample_rate)
        self.segment_start = time.time()  # a replay's stream starts now
        src.start()
        try:
            outcome = self._consume(src.intake, lambda: True)
        finally:
            src.close()
        if src.error is not None:
            raise src.error
        self.exit_reason = "end of replay" if outcome == "end" else "stopped"

    def _update_run(self, device, rate):
        try:
            self.log_db.update_run(self.run_id, device, rate)
            self.writes += 1
        except LogError as exc:
            log.error("cannot write to the log: %s", exc)

    # -- live -----------------------------------------------------------
    def _sounddevice(self):
        if self._sd is None:
            self._sd = import_sounddevice()
        return self._sd

    def _open_live(self):
        """Open and start the input stream: ``(stream, intake, rate, name)``."""
        sd = self._sounddevice()
        o = self.opts
        info = sd.query_devices(o.device, "input")
        name = str(info.get("name", o.device))
        max_ch = int(info.get("max_input_channels", 0))
        if max_ch < o.channel:
            raise ValueError(f"device {name!r} has {max_ch} input channel(s), "
                             f"channel {o.channel} asked for")
        rate = int(o.rate or round(float(info.get("default_samplerate", 48000))))
        intake = self._intake_factory(rate, blocking=False, channel_index=o.channel - 1)
        blocksize = max(1, int(round(o.block_s * rate)))
        stream = sd.InputStream(device=o.device, channels=o.channel, samplerate=rate,
                                blocksize=blocksize, dtype="float32",
                                callback=intake.callback)
        try:
            stream.start()
        except BaseException:
            _close_quietly(stream)
            raise
        rate = int(round(float(getattr(stream, "samplerate", rate) or rate)))
        intake.sample_rate = rate
        return stream, intake, rate, name

    def _run_live(self):
        sd = self._sounddevice()
        o = self.opts
        errors = (getattr(sd, "PortAudioError", OSError), ValueError, OSError)
        pause = 1.0
        lost_at = None
        first = True
        tries = 0
        while not self.stopping:
            try:
                if tries:
                    _rescan(sd)
                tries += 1
                stream, intake, rate, name = self._open_live()
            except errors as exc:
                log.warning("audio input %s unavailable: %s; trying again in %g s",
                            _device_text(o.device), _one_line(exc), pause)
                if self._wait(pause):
                    break
                pause = min(pause * 2.0, o.max_retry_s)
                continue
            if lost_at is not None:
                outage_s = max(0.0, time.time() - lost_at)
                self._note_loss("device", int(round(outage_s * rate)), 0, offset_s=None,
                                when=lost_at)
                log.info("audio input back after %.0f s", outage_s)
                lost_at = None
            log.info("input: %s, %d Hz, channel %d, blocks of %d ms", name, rate, o.channel,
                     round(o.block_s * 1000))
            if first:
                self._update_run(name, rate)
                first = False
            self._open_segment(rate)

            def alive(s=stream):
                try:
                    return bool(getattr(s, "active", True))
                except Exception:  # PortAudio may raise once the device is gone
                    return False

            try:
                outcome = self._consume(intake, alive)
            finally:
                _close_quietly(stream)
            self._drain(intake.queue)
            self._account_losses(intake.take_pending())
            # Queued blocks were drained by _consume; close the events.
            audio_s = self.samples / rate
            self._close_segment()
            if outcome == "stopped" or self.stopping:
                break
            lost_at = time.time()
            if audio_s >= 60.0:
                pause = 1.0
            log.warning("audio input lost (%s); trying again in %g s", outcome, pause)
            if self._wait(pause):
                break
            pause = min(pause * 2.0, o.max_retry_s)
        self.exit_reason = "stopped"

    # -- the analysis loop ----------------------------------------------
    def _open_segment(self, rate):
        self.sample_rate = int(rate)
        self.pipeline = self.pipeline_factory(self.sample_rate, self.settings)
        self.samples = 0
        self.segment_start = None
        self.segment_losses = []
        self._waiting = []
        self.ring = RingBuffer(rate, self.opts.ring_s) if self.clips else None

    def _close_segment(self):
        if self.pipeline is None:
            return
        try:
            events = self.pipeline.finish()
        finally:
            pipeline, self.pipeline = self.pipeline, None
        if self.segment_start is None:
            self.segment_start = time.time() - self.samples / self.sample_rate
        self._awaited(events, final=True)
        del pipeline

    def _consume(self, intake, alive):
        """Analyse queued blocks until the stream ends, is lost, or stop."""
        q = intake.queue
        last_block = time.monotonic()
        o = self.opts
        while True:
            if self.stopping:
                self._drain(q)
                return "stopped"
            try:
                item = q.get(timeout=o.poll_s)
            except queue.Empty:
                self._housekeeping()
                if not alive():
                    self._drain(q)
                    return "the stream stopped"
                if time.monotonic() - last_block > o.stall_s:
                    return f"no audio for {o.stall_s:g} s"
                continue
            if item is _END:
                return "end"
            self._process(item)
            last_block = time.monotonic()
            self._housekeeping()

    def _drain(self, q):
        while True:
            try:
                item = q.get_nowait()
            except queue.Empty:
                return
            if item is _END:
                return
            self._process(item)

    def _process(self, item):
        samples, losses, wall = item
        if self.segment_start is None:
            lost_before = sum(f for _, f, _ in losses)
            self.segment_start = wall - (len(samples) + lost_before) / self.sample_rate
        events = self._account_losses(losses, record=False)
        events += self.pipeline.push(samples.astype(np.float64))
        if self.ring is not None:
            self.ring.push(samples)
        self.samples += len(samples)
        self._awaited(events)

    def _awaited(self, events, final=False):
        """Record events; with clips, once their audio is in (end_s + 1 s)."""
        if self.clips is None:
            for e in events:
                self._record(e)
            return
        self._waiting.extend(events)
        now_s = self.samples / self.sample_rate
        ready = [e for e in self._waiting if final or not math.isfinite(e.end_s)
                 or e.end_s + CLIP_MARGIN_S <= now_s]
        if ready:
            self._waiting = [e for e in self._waiting if e not in ready]
            for e in ready:
                self._record(e)

    # -- losses -----------------------------------------------------------
    def _account_losses(self, losses, record=True):
        """Hand lost samples to the pipeline in their place; its events."""
        events = []
        if self.segment_start is None and losses:
            self.segment_start = time.time() - sum(f for _, f, _ in losses) / self.sample_rate
        for kind, frames, blocks in losses:
            self._note_loss(kind, frames, blocks, offset_s=self.samples / self.sample_rate)
            events += self.pipeline.push_gap(int(frames), int(blocks))
            if self.ring is not None:
                self.ring.gap(frames)
            self.samples += int(frames)
        if record:
            self._awaited(events)
        return events

    def _note_loss(self, kind, frames, blocks, offset_s, when=None):
        self.loss_incidents += 1
        rate = self.sample_rate or 1
        if when is None:
            base = self.segment_start if self.segment_start is not None else time.time()
            when = base + (offset_s or 0.0)
        if offset_s is not None:
            self.segment_losses.append((offset_s, offset_s + frames / rate))
        self.pending_losses.append(InputLoss(utc_iso(when), float("nan") if offset_s is None
                                             else offset_s, int(frames), int(blocks), kind,
                                             self.run_id))
        what = {"overflow": "device input overflow", "queue_full": "analysis fell behind",
                "device": "device away"}.get(kind, kind)
        now = time.monotonic()
        if kind == "device" or now - self._last_loss_log >= 10.0:
            extra = ""
            if self._quiet_losses[0]:
                extra = (f" (and {self._quiet_losses[0]} more incidents, "
                         f"{self._quiet_losses[1]} samples, since the last line)")
            log.warning("input lost: %d samples (%s)%s", frames, what, extra)
            self._last_loss_log = now
            self._quiet_losses = [0, 0]
        else:
            self._quiet_losses[0] += 1
            self._quiet_losses[1] += int(frames)

    def _take_losses(self):
        out, self.pending_losses = self.pending_losses, []
        return out

    def _overflows_within(self, e):
        a, b = e.start_s, e.end_s
        if not (math.isfinite(a) and math.isfinite(b)):
            a = b = e.pass_time_s
        return sum(1 for s, t in self.segment_losses if s <= b and t >= a)

    # -- events -----------------------------------------------------------
    def _record(self, e):
        o = self.opts
        time_utc = utc_iso(self.segment_start + e.pass_time_s)
        overflows = self._overflows_within(e)
        clip = None
        if self.clips is not None and self.ring is not None:
            clip = self._save_clip(e, time_utc)
        self._flush_unwritten()
        losses = self._take_losses()
        try:
            self.log_db.add(e, time_utc, o.station_id, clip, overflows, run_id=self.run_id,
                            losses=losses, seen_utc=utc_iso(time.time()))
            self.writes += 1
            self.events_logged += 1
            self._last_write = self._last_flush = time.monotonic()
        except LogError as exc:
            log.error("cannot write the event to the log: %s (kept in memory, "
                      "written when the log works again)", exc)
            self.pending_losses = losses + self.pending_losses
            self.unwritten.append((e, time_utc, clip, overflows))
            del self.unwritten[:-1000]
        log.info("%s", format_event_line(e, time_utc))

    def _flush_unwritten(self):
        while self.unwritten:
            e, time_utc, clip, overflows = self.unwritten[0]
            try:
                self.log_db.add(e, time_utc, self.opts.station_id, clip, overflows,
                                run_id=self.run_id)
            except LogError:
                return
            self.writes += 1
            self.events_logged += 1
            self.unwritten.pop(0)

    def _save_clip(self, e, time_utc):
        rate = self.sample_rate
        if math.isfinite(e.start_s) and math.isfinite(e.end_s):
            a, b = e.start_s - CLIP_MARGIN_S, e.end_s + CLIP_MARGIN_S
        else:
            a, b = e.pass_time_s - 5.0, e.pass_time_s + 5.0
        x = self.ring.span(int(a * rate), int(b * rate))
        if len(x) == 0:
            return None
        try:
            path, deleted = self.clips.save(x, rate, time_utc, self.opts.station_id)
        except PassbyError as exc:
            log.warning("clip not kept: %s", exc)
            return None
        if deleted:
            try:
                self.log_db.forget_clips(deleted)
                self.writes += 1
            except LogError as exc:
                log.error("cannot write to the log: %s", exc)
            log.info("clip quota: deleted %d old clip(s)", len(deleted))
        return path

    # -- every few minutes --------------------------------------------------
    def _housekeeping(self):
        now = time.monotonic()
        o = self.opts
        if o.temperature_file and now >= self._next_temperature:
            self._read_temperature()
        if (self.pending_losses and now - self._last_flush >= o.flush_period_s) or \
                now - self._last_write >= o.heartbeat_period_s:
            try:
                self.log_db.heartbeat(self.run_id, self.pending_losses)
                self.pending_losses = []
                self.writes += 1
            except LogError as exc:
                log.error("cannot write to the log: %s", exc)
            self._last_write = self._last_flush = now

    def _read_temperature(self, force=False):
        o = self.opts
        if not o.temperature_file:
            return
        self._next_temperature = time.monotonic() + o.temperature_period_s
        try:
            t = read_temperature(o.temperature_file, o.temperature_unit)
        except ValueError as exc:
            if not self._temperature_failing or force:
                log.warning("air temperature: %s; keeping %.1f degrees C", exc,
                            self.settings.temperature_c)
            self._temperature_failing = True
            return
        if self._temperature_failing:
            log.info("air temperature: the file reads again")
        self._temperature_failing = False
        if force or abs(t - self.settings.temperature_c) >= 0.1:
            self.settings = self.settings.with_(temperature_c=round(t, 2))
            if self.pipeline is not None:
                self.pipeline.settings = self.settings
            log.info("air temperature %.1f degrees C (from %s)", self.settings.temperature_c,
                     o.temperature_file)


def _version():
    from passby import __version__

    return __version__


def _device_text(device):
    return "(default)" if device is None else repr(device)


def _one_line(exc):
    return " ".join(str(exc).split()) or type(exc).__name__


def _rescan(sd):
    """Let PortAudio enumerate the devices again (a microphone plugged back in).

    PortAudio lists the devices once, when it is initialised; sounddevice's
    ``_terminate`` and ``_initialize`` redo that. Called only while no
    stream is open.
    """
    terminate, initialize = getattr(sd, "_terminate", None), getattr(sd, "_initialize", None)
    if terminate is None or initialize is None:
        return
    try:
        terminate()
    except Exception:
        pass
    initialize()


def _close_quietly(stream):
    for name in ("stop", "close"):
        try:
            getattr(stream, name)()
        except Exception:
            pass
