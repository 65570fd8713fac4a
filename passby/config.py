"""The station's configuration file (TOML, read with the standard library).

A station is set up once in a small TOML file and then left alone; every
key is checked when the file is loaded, so a typing mistake stops the
station at once with one line naming the key, instead of hours later.

Schema (every table and key optional)::

    [station]
    id = "north-lane"          # written into every event row
    site = "Example Road, km 3.2, northbound"
    posted_limit_kmh = 50      # kept for reports
    log = "road.db"            # the event log (SQLite)

    [audio]
    device = 2                 # PortAudio index, or part of the device name
    rate = 48000               # Hz, 8000..192000 (default: the device's)
    channel = 1                # 1-based input channel

    [air]
    temperature_c = 12.0       # fixed air temperature, degrees C
    temperature_file = "/sys/bus/w1/devices/28-0000012345ab/temperature"
    temperature_unit = "mC"    # "mC" (millidegrees) or "C"
    humidity_pct = 70          # relative humidity, %

    [detection]
    threshold_db = 12
    min_track_s = 0.3
    f_min_hz = 60
    f_max_hz = 4500

    [clips]
    keep = true                # keep each event's audio as a WAV
    dir = "clips"
    quota_mb = 500             # oldest clips are deleted beyond this

    [level]
    measure = true             # LAFmax of each event
    offset_db = 127.3          # written by ``passby calibrate``

Relative paths (``log``, ``temperature_file``, ``dir``) are taken from the
directory of the configuration file, so a site folder can be moved whole.

The temperature file is read again every few minutes by the station. Two
forms are understood: the kernel's 1-Wire thermometer attributes (a
DS18B20 under ``/sys/bus/w1/devices/28-*/``: ``temperature`` holds
millidegrees C as an integer, ``w1_slave`` holds a CRC line and
``t=<millidegrees>``), and a plain text file holding degrees C (for example
written by another logger). ``temperature_unit`` says which; by default it
is ``"mC"`` for files named ``temperature`` or ``w1_slave`` and ``"C"`` for
any other name. ``temperature_c``, when also given, is used until the file
gives a good reading.

Command-line options override the file (see ``passby station --help``).

Examples
--------
>>> import os, tempfile
>>> with tempfile.TemporaryDirectory() as d:
...     path = os.path.join(d, "site.toml")
...     with open(path, "w") as f:
...         _ = f.write('[audio]\\nrate = 44100\\n[air]\\ntemperature_c = 8.5\\n')
...     cfg = load_config(path)
>>> cfg.rate, cfg.channel, settings_from_config(cfg).temperature_c
(44100, 1, 8.5)
"""

from __future__ import annotations

import math
import os
import re
import tempfile
import tomllib
from dataclasses import dataclass, fields

from passby.errors import ConfigError
from passby.settings import AnalysisSettings
from passby.wavio import MAX_SAMPLE_RATE, MIN_SAMPLE_RATE

__all__ = ["StationConfig", "load_config", "settings_from_config", "write_level_offset",
           "write_text_atomic", "check_value", "DEFAULT_CLIP_QUOTA_MB"]

#: Clip quota when ``[clips] quota_mb`` is not given, MB (10**6 bytes).
DEFAULT_CLIP_QUOTA_MB = 500.0


@dataclass(frozen=True)
class StationConfig:
    """A checked station configuration (None: not given, use the default).

    Attributes
    ----------
    path : str or None
        The file it came from (None for the defaults).
    station_id, site, posted_limit_kmh, log
        ``[station]`` keys (``log`` resolved against the file's directory).
    device, rate, channel
        ``[audio]`` keys; ``channel`` is 1-based.
    temperature_c, temperature_file, temperature_unit, humidity_pct
        ``[air]`` keys.
    threshold_db, min_track_s, f_min_hz, f_max_hz
        ``[detection]`` keys.
    clips_keep, clips_dir, clips_quota_mb
        ``[clips]`` keys.
    level_measure, level_offset_db
        ``[level]`` keys.
    """

    path: str | None = None
    station_id: str | None = None
    site: str | None = None
    posted_limit_kmh: float | None = None
    log: str | None = None
    device: int | str | None = None
    rate: int | None = None
    channel: int = 1
    temperature_c: float | None = None
    temperature_file: str | None = None
    temperature_unit: str | None = None
    humidity_pct: float | None = None
    threshold_db: float | None = None
    min_track_s: float | None = None
    f_min_hz: float | None = None
    f_max_hz: float | None = None
    clips_keep: bool = False
    clips_dir: str | None = None
    clips_quota_mb: float = DEFAULT_CLIP_QUOTA_MB
    level_measure: bool = True
    level_offset_db: float | None = None


# --------------------------------------------------------------------------
# Checks of single values: each returns the value to keep or raises
# ValueError with the text that follows "[table] key: ".

_ID_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")


def _number(lo, hi, unit=""):
    def check(v):
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) \
                or not lo <= v <= hi:
            raise ValueError(f"must be a number from {lo:g} to {hi:g}{unit}")
        return float(v)
    return check


def _integer(lo, hi):
    def check(v):
        if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
            raise ValueError(f"must be an integer from {lo} to {hi}")
        return int(v)
    return check


def _text(v):
    if not isinstance(v, str) or not v.strip():
        raise ValueError("must be a non-empty string")
    return v


def _station_id(v):
    if not isinstance(v, str) or not _ID_RE.match(v):
        raise ValueError("must be 1 to 64 letters, digits, '.', '_' or '-' "
                         "(starting with a letter or digit)")
    return v


def _boolean(v):
    if not isinstance(v, bool):
        raise ValueError("must be true or false")
    return v


def _device(v):
    if isinstance(v, bool):
        raise ValueError("must be a device index (integer) or part of a device name")
    if isinstance(v, int):
        if v < 0:
            raise ValueError("must be a device index (0 or more) or part of a device name")
        return v
    if isinstance(v, str) and v.strip():
        return v
    raise ValueError("must be a device index (integer) or part of a device name")


def device_option(text: str):
    """A ``--device`` value: an index when the text is a whole number, else part of a name.

    Examples
    --------
    >>> device_option(" 2 "), device_option("USB")
    (2, 'USB')
    """
    text = text.strip()
    return int(text) if text.isdigit() else text


def _unit(v):
    if v not in ("C", "mC"):
        raise ValueError('must be "C" (degrees) or "mC" (millidegrees)')
    return v


def _anything_numeric(v):
    """Type check only; the range is AnalysisSettings' to judge."""
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise ValueError("must be a number")
    return float(v)


# (table, key) -> (StationConfig field, check, is a path)
_SCHEMA = {
    "station": {
        "id": ("station_id", _station_id, False),
        "site": ("site", _text, False),
        "posted_limit_kmh": ("posted_limit_kmh", _number(5, 400, " km/h"), False),
        "log": ("log", _text, True),
    },
    "audio": {
        "device": ("device", _device, False),
        "rate": ("rate", _integer(MIN_SAMPLE_RATE, MAX_SAMPLE_RATE), False),
        "channel": ("channel", _integer(1, 64), False),
    },
    "air": {
        "temperature_c": ("temperature_c", _anything_numeric, False),
        "temperature_file": ("temperature_file", _text, True),
        "temperature_unit": ("temperature_unit", _unit, False),
        "humidity_pct": ("humidity_pct", _anything_numeric, False),
    },
    "detection": {
        "threshold_db": ("threshold_db", _anything_numeric, False),
        "min_track_s": ("min_track_s", _anything_numeric, False),
        "f_min_hz": ("f_min_hz", _anything_numeric, False),
        "f_max_hz": ("f_max_hz", _anything_numeric, False),
    },
    "clips": {
        "keep": ("clips_keep", _boolean, False),
        "dir": ("clips_dir", _text, True),
        "quota_mb": ("clips_quota_mb", _number(1, 10**7, " MB"), False),
    },
    "level": {
        "measure": ("level_measure", _boolean, False),
        "offset_db": ("level_offset_db", _number(0, 250, " dB"), False),
    },
}

#: AnalysisSettings field -> the configuration key that sets it.
_SETTING_KEYS = {
    "temperature_c": "[air] temperature_c",
    "humidity_pct": "[air] humidity_pct",
    "threshold_db": "[detection] threshold_db",
    "min_track_s": "[detection] min_track_s",
    "f_min_hz": "[detection] f_min_hz",
    "f_max_hz": "[detection] f_max_hz",
    "level_offset_db": "[level] offset_db",
}


def load_config(path) -> StationConfig:
    """Read and check a station configuration file.

    Parameters
    ----------
    path : str or os.PathLike

    Returns
    -------
    StationConfig

    Raises
    ------
    ConfigError
        The file cannot be read, is not TOML, or has an unknown table or
        key, a value of the wrong type or out of range. The message names
        the key, e.g. ``[audio] rate: must be an integer from 8000 to
        192000``, and ``where`` is the file.
    """
    path = os.fspath(path)
    try:
        with open(path, "rb") as f:
            raw = f.read()
    except OSError as exc:
        raise ConfigError(f"cannot read: {exc.strerror or exc}", where=path) from None
    try:
        doc = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise ConfigError("not UTF-8 text", where=path) from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"not valid TOML: {exc}", where=path) from None
    base = os.path.dirname(os.path.abspath(path))
    values = {"path": path}
    for table, content in doc.items():
        if table not in _SCHEMA:
            raise ConfigError(f"[{table}]: unknown table (known: {', '.join(_SCHEMA)})",
                              where=path)
        if not isinstance(content, dict):
            raise ConfigError(f"[{table}]: must be a table, not a value", where=path)
        keys = _SCHEMA[table]
        for key, value in content.items():
            if key not in keys:
                raise ConfigError(f"[{table}] {key}: unknown key (known: {', '.join(keys)})",
                                  where=path)
            name, check, is_path = keys[key]
            try:
                value = check(value)
            except ValueError as exc:
                raise ConfigError(f"[{table}] {key}: {exc}", where=path) from None
            if is_path:
                value = os.path.join(base, os.path.expanduser(value))
            values[name] = value
    cfg = StationConfig(**values)
    if cfg.humidity_pct is not None and not 0 <= cfg.humidity_pct <= 100:
        raise ConfigError("[air] humidity_pct: must be a number from 0 to 100 %", where=path)
    settings_from_config(cfg)  # the analysis settings judge their own ranges
    return cfg


def check_value(table: str, key: str, value):
    """Check one value as the file's ``[table] key`` would be checked.

    For command-line options that override the file.

    Returns
    -------
    The value to use.

    Raises
    ------
    ValueError
        With the text that follows ``[table] key:`` in a file's error.

    Examples
    --------
    >>> check_value("audio", "rate", 44100)
    44100
    >>> check_value("audio", "channel", 0)
    Traceback (most recent call last):
    ...
    ValueError: must be an integer from 1 to 64
    """
    return _SCHEMA[table][key][1](value)


_SETTINGS_MESSAGE = re.compile(r"^(\w+)=\S+ (.*)$")


def settings_from_config(cfg: StationConfig, **overrides) -> AnalysisSettings:
    """The analysis settings a configuration asks for.

    Parameters
    ----------
    cfg : StationConfig
    **overrides
        AnalysisSettings fields to set instead (command-line options);
        ``None`` values are ignored.

    Returns
    -------
    AnalysisSettings
        Defaults for every key the file leaves out. ``level`` follows
        ``[level] measure``.

    Raises
    ------
    ConfigError
        A value out of range; the message names the configuration key (or
        the settings field, for an override) and ``where`` is the file.

    Examples
    --------
    >>> s = settings_from_config(StationConfig(temperature_c=5.0), threshold_db=15)
    >>> s.temperature_c, s.threshold_db, s.level
    (5.0, 15, True)
    """
    kw = {"level": bool(cfg.level_measure)}
    for name in _SETTING_KEYS:
        value = getattr(cfg, name)
        if value is not None:
            kw[name] = value
    known = {f.name for f in fields(AnalysisSettings)}
    for name, value in overrides.items():
        if name not in known:
            raise TypeError(f"AnalysisSettings has no field {name!r}")
        if value is not None:
            kw[name] = value
    try:
        return AnalysisSettings(**kw)
    except ConfigError as exc:
        m = _SETTINGS_MESSAGE.match(exc.message)
        if m and m.group(1) in _SETTING_KEYS and m.group(1) not in overrides:
            raise ConfigError(f"{_SETTING_KEYS[m.group(1)]}: {m.group(2)}",
                              where=cfg.path) from None
        raise


# --------------------------------------------------------------------------
# Writing


def write_text_atomic(path, text: str) -> None:
    """Replace a text file so that a power cut leaves the old or the new one.

    The text goes to a temporary file in the same directory, which is
    synced and renamed over ``path`` (POSIX ``rename`` is atomic); the
    directory is synced after. The old file's permission bits are kept.

    Raises
    ------
    ConfigError
        The file cannot be written (``where`` is the path).
    """
    path = os.fspath(path)
    directory = os.path.dirname(os.path.abspath(path))
    try:
        mode = os.stat(path).st_mode & 0o7777
    except OSError:
        mode = None
    tmp = None
    try:
        fd, tmp = tempfile.mkstemp(prefix="." + os.path.basename(path) + ".", dir=directory)
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as f:
            f.write(text)
            f.flush()
            os.fsync(f.fileno())
        if mode is not None:
            os.chmod(tmp, mode)
        os.replace(tmp, path)
        tmp = None
        try:
            dfd = os.open(directory, os.O_RDONLY)
        except OSError:
            return
        try:
            os.fsync(dfd)
        except OSError:
            pass
        finally:
            os.close(dfd)
    except OSError as exc:
        raise ConfigError(f"cannot write: {exc.strerror or exc}", where=path) from None
    finally:
        if tmp is not None:
            try:
                os.unlink(tmp)
            except OSError:
                pass


_HEADER = re.compile(r"^\s*\[\s*([^\]\s]+)\s*\]\s*(#.*)?$")
_OFFSET_LINE = re.compile(r"^(\s*offset_db\s*=\s*)([^#\r\n]*?)(\s*#.*)?$")


def write_level_offset(path, offset_db: float) -> None:
    """Set ``[level] offset_db`` in a configuration file, keeping the rest.

    Only the ``offset_db`` line changes (or is added, with the ``[level]``
    table if the file has none); comments and the other keys stay as they
    were. The file is replaced atomically (:func:`write_text_atomic`) and
    created if it does not exist.

    Parameters
    ----------
    path : str or os.PathLike
    offset_db : float
        dB re 20 uPa that a full-scale sine reads (see
        :attr:`passby.settings.AnalysisSettings.level_offset_db`); written
        with two decimals.

    Raises
    ------
    ConfigError
        The offset is not a finite number from 0 to 250 dB, the existing
        file is not valid TOML, or it cannot be written.

    Examples
    --------
    >>> import os, tempfile
    >>> with tempfile.TemporaryDirectory() as d:
    ...     path = os.path.join(d, "site.toml")
    ...     with open(path, "w") as f:
    ...         _ = f.write('# north lane\\n[audio]\\nrate = 48000\\n')
    ...     write_level_offset(path, 127.254)
    ...     write_level_offset(path, 126.5)
    ...     text = open(path).read()
    >>> print(text, end="")
    # north lane
    [audio]
    rate = 48000
    <BLANKLINE>
    [level]
    offset_db = 126.50
    """
    path = os.fspath(path)
    try:
        value = _number(0, 250, " dB")(offset_db)
    except ValueError as exc:
        raise ConfigError(f"[level] offset_db: {exc}", where=path) from None
    try:
        with open(path, "r", encoding="utf-8", newline="") as f:
            text = f.read()
    except FileNotFoundError:
        text = ""
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"cannot read: {getattr(exc, 'strerror', None) or exc}",
                          where=path) from None
    try:
        tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"not valid TOML, left unchanged: {exc}", where=path) from None

    nl = "\r\n" if "\r\n" in text else "\n"
    lines = text.splitlines(keepends=True)
    new_value = f"{value:.2f}"
    table, header_at, done = None, None, False
    for i, line in enumerate(lines):
        h = _HEADER.match(line.rstrip("\r\n"))
        if h:
            table = h.group(1)
            if table == "level":
                header_at = i
            continue
        if table == "level":
            m = _OFFSET_LINE.match(line.rstrip("\r\n"))
            if m:
                ending = line[len(line.rstrip("\r\n")):]
                lines[i] = m.group(1) + new_value + (m.group(3) or "") + ending
                done = True
                break
    if not done:
        if header_at is not None:
            lines.insert(header_at + 1, f"offset_db = {new_value}{nl}")
        else:
            if lines and not lines[-1].endswith(("\n", "\r")):
                lines[-1] += nl
            if lines and lines[-1].strip():
                lines.append(nl)
            lines.append(f"[level]{nl}")
            lines.append(f"offset_db = {new_value}{nl}")
    new_text = "".join(lines)
    try:
        check = tomllib.loads(new_text).get("level", {}).get("offset_db")
    except tomllib.TOMLDecodeError:
        check = None
    if check is None or abs(float(check) - float(new_value)) > 1e-9:
        raise ConfigError("cannot set [level] offset_db in this file's layout "
                          "(write it as 'offset_db = ...' under a [level] table)",
                          where=path)
    write_text_atomic(path, new_text)
