"""The station's durable log: one SQLite database of pass-by events.

A station beside a road or a track runs for days on an SD card and loses
power without warning. The log is built for that:

* **Never corrupted by a power cut.** SQLite in write-ahead-log mode
  (``PRAGMA journal_mode=WAL``) only ever appends to the ``-wal`` file and
  copies pages back at a checkpoint, so a cut at any moment leaves the last
  committed state (SQLite documentation, "Write-Ahead Logging" and "Atomic
  Commit In SQLite").
* **Loses at most the event being analysed.** ``PRAGMA synchronous=FULL``:
  every commit syncs the WAL before it returns. With ``NORMAL`` the WAL is
  synced only at checkpoints, so a cut could roll back every event since
  the last one (up to a thousand pages) -- durable enough for a cache, not
  for a log. One event is one transaction, so the cost is one sync per
  vehicle, a few pages written.
* **Writes little and rarely** (SD wear). Nothing is written per audio
  block: one transaction per event, input losses buffered and written in
  batches with the next event (or at most every few minutes by the station),
  and the run's ``last_seen_utc`` refreshed at the same times.

The schema is versioned twice over: ``PRAGMA user_version`` (what SQLite
tools see) and the ``meta`` table (``schema_version``, creation time and
software version). :func:`migrate` brings an older log up to
:data:`SCHEMA_VERSION` step by step; a log written by a newer passby is
refused with :class:`~passby.errors.LogError` rather than misread.

Times are ISO 8601 UTC strings with a ``Z`` and milliseconds
(``2031-05-04T07:12:03.250Z``), so that text order is time order.

Examples
--------
>>> import os, tempfile
>>> from passby.events import PassEvent
>>> e = PassEvent(pass_time_s=12.5, speed_mps=13.9, speed_std_mps=0.2,
...               tones_hz=(420.0,), closest_approach_m=6.0,
...               closest_approach_std_m=0.4, speed_of_sound_mps=343.2,
...               temperature_c=20.0, quality="good")
>>> with tempfile.TemporaryDirectory() as d:
...     path = os.path.join(d, "road.db")
...     with EventLog(path, create=True) as log:
...         row = log.add(e, "2031-05-04T07:12:03.250Z", "north-lane")
...         logged = log.events()
>>> row, len(logged), logged[0].event.speed_mps, logged[0].station_id
(1, 1, 13.9, 'north-lane')
"""

from __future__ import annotations

import json
import math
import os
import sqlite3
from dataclasses import dataclass
from datetime import datetime, timezone

from passby.errors import LogError
from passby.events import PassEvent

__all__ = [
    "SCHEMA_VERSION",
    "EventLog",
    "LoggedEvent",
    "RunRecord",
    "InputLoss",
    "migrate",
    "utc_iso",
    "parse_utc",
]

#: Version of the log's schema this passby writes and reads.
SCHEMA_VERSION = 1

#: Seconds a writer waits for another process's lock before giving up.
BUSY_TIMEOUT_S = 2.0


# --------------------------------------------------------------------------
# Times


def utc_iso(epoch_s: float) -> str:
    """ISO 8601 UTC text with milliseconds and a ``Z`` for a POSIX time.

    Parameters
    ----------
    epoch_s : float
        Seconds since 1970-01-01T00:00:00Z.

    Returns
    -------
    str

    Examples
    --------
    >>> utc_iso(0.0)
    '1970-01-01T00:00:00.000Z'
    >>> utc_iso(1000000000.25)
    '2001-09-09T01:46:40.250Z'
    """
    ms = int(round(float(epoch_s) * 1000.0))
    dt = datetime.fromtimestamp(ms // 1000, tz=timezone.utc)
    return dt.strftime("%Y-%m-%dT%H:%M:%S") + f".{ms % 1000:03d}Z"


def parse_utc(text: str, where: str | None = None) -> float:
    """POSIX time of an ISO 8601 date or date-time (UTC unless it says).

    Accepts ``2031-05-04``, ``2031-05-04T07:12``, ``2031-05-04 07:12:03.5``,
    with ``Z`` or an offset such as ``+02:00``; a time without zone is UTC.

    Parameters
    ----------
    text : str
    where : str, optional
        Named in the error (for example ``"--since"``).

    Returns
    -------
    float
        Seconds since 1970-01-01T00:00:00Z.

    Raises
    ------
    LogError
        Text that is not an ISO 8601 date or date-time.

    Examples
    --------
    >>> parse_utc("1970-01-02")
    86400.0
    >>> parse_utc("1970-01-01T02:00:00+02:00")
    0.0
    >>> utc_iso(parse_utc("2031-05-04T07:12:03.25Z"))
    '2031-05-04T07:12:03.250Z'
    """
    s = str(text).strip()
    if s.endswith(("Z", "z")):
        s = s[:-1] + "+00:00"
    try:
        dt = datetime.fromisoformat(s)
    except ValueError:
        raise LogError(f"not an ISO 8601 date or time: {text!r} "
                       "(for example 2031-05-04T07:00Z)", where=where) from None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=timezone.utc)
    return dt.timestamp()


def _now_iso() -> str:
    return utc_iso(datetime.now(timezone.utc).timestamp())


# --------------------------------------------------------------------------
# Records


@dataclass(frozen=True)
class LoggedEvent:
    """One event as the log holds it.

    Attributes
    ----------
    id : int
        Row number in the log (grows with each event added).
    time_utc : str
        Closest-approach time, ISO 8601 UTC (stream start + ``pass_time_s``).
    station_id : str
    event : PassEvent
        The event as the pipeline made it (``pass_time_s`` counts from the
        start of the station's input stream).
    clip_path : str or None
        The event's audio clip, relative to the log's directory when it lies
        beneath it (it may since have been deleted by the clip quota).
    overflows : int
        Input-loss incidents (device overflow, full queue) within the event.
    software_version : str
        passby version that analysed the event.
    run_id : int or None
        The station run (``runs`` table) that logged it.
    """

    id: int
    time_utc: str
    station_id: str
    event: PassEvent
    clip_path: str | None = None
    overflows: int = 0
    software_version: str = ""
    run_id: int | None = None


@dataclass(frozen=True)
class RunRecord:
    """One start-to-stop run of the station (``runs`` table).

    ``stop_utc`` is None while the run goes on, or when it ended without
    a clean stop (power cut, kill); ``stop_reason`` is then ``"unclean"``
    once a later run has noticed it.
    """

    id: int
    start_utc: str
    stop_utc: str | None
    last_seen_utc: str | None
    station_id: str
    source: str
    device: str
    sample_rate: int
    channel: int
    software_version: str
    stop_reason: str | None


@dataclass(frozen=True)
class InputLoss:
    """Audio lost before it reached the analysis (``input_losses`` table).

    Attributes
    ----------
    time_utc : str
        When the loss happened (stream time converted to UTC).
    stream_offset_s : float
        Where in the stream, seconds from its start.
    samples, blocks : int
        How much was lost.
    kind : str
        ``"overflow"`` (the device reported an input overflow),
        ``"queue_full"`` (the analysis fell behind) or ``"device"`` (the
        device went away; ``samples`` from the wall-clock outage).
    run_id : int or None
    """

    time_utc: str
    stream_offset_s: float
    samples: int
    blocks: int
    kind: str
    run_id: int | None = None


# --------------------------------------------------------------------------
# Schema

_EVENT_COLUMNS = (
    # name, SQL type
    ("time_utc", "TEXT NOT NULL"),
    ("station_id", "TEXT NOT NULL"),
    ("speed_mps", "REAL"),
    ("speed_std_mps", "REAL"),
    ("tones_hz", "TEXT NOT NULL"),
    ("emitted_hz", "REAL"),
    ("closest_approach_m", "REAL"),
    ("closest_approach_std_m", "REAL"),
    ("quality", "TEXT NOT NULL"),
    ("reason", "TEXT"),
    ("temperature_c", "REAL"),
    ("humidity_pct", "REAL"),
    ("speed_of_sound_mps", "REAL"),
    ("residual_hz", "REAL"),
    ("method", "TEXT"),
    ("laf_max_db", "REAL"),
    ("level_calibrated", "INTEGER NOT NULL"),
    ("dropped_blocks", "INTEGER NOT NULL"),
    ("overflows", "INTEGER NOT NULL"),
    ("software_version", "TEXT NOT NULL"),
    ("stream_offset_s", "REAL"),
    ("start_s", "REAL"),
    ("end_s", "REAL"),
    ("n_frames", "INTEGER"),
    ("clip_path", "TEXT"),
    ("run_id", "INTEGER REFERENCES runs(id)"),
)

_SCHEMA_V1 = f"""
CREATE TABLE meta (
    key   TEXT PRIMARY KEY,
    value TEXT NOT NULL
);
CREATE TABLE runs (
    id               INTEGER PRIMARY KEY,
    start_utc        TEXT NOT NULL,
    stop_utc         TEXT,
    last_seen_utc    TEXT,
    station_id       TEXT NOT NULL,
    source           TEXT NOT NULL,
    device           TEXT NOT NULL,
    sample_rate      INTEGER NOT NULL,
    channel          INTEGER NOT NULL,
    software_version TEXT NOT NULL,
    stop_reason      TEXT
);
CREATE TABLE events (
    id INTEGER PRIMARY KEY,
    {(',' + chr(10) + '    ').join(f'{n} {t}' for n, t in _EVENT_COLUMNS)}
);
CREATE INDEX events_time ON events(time_utc);
CREATE TABLE input_losses (
    id              INTEGER PRIMARY KEY,
    run_id          INTEGER REFERENCES runs(id),
    time_utc        TEXT NOT NULL,
    stream_offset_s REAL,
    samples         INTEGER NOT NULL,
    blocks          INTEGER NOT NULL,
    kind            TEXT NOT NULL
);
"""


def _create_v1(conn: sqlite3.Connection) -> None:
    from passby import __version__

    for statement in _SCHEMA_V1.split(";"):
        if statement.strip():
            conn.execute(statement)
    conn.executemany(
        "INSERT INTO meta(key, value) VALUES (?, ?)",
        [("created_utc", _now_iso()), ("created_by", f"passby {__version__}")],
    )


#: ``MIGRATIONS[v]`` turns a log of schema ``v`` into ``v + 1`` (0: empty file).
MIGRATIONS = {0: _create_v1}


def _has_foreign_tables(conn) -> bool:
    rows = conn.execute("SELECT name FROM sqlite_master WHERE type='table'").fetchall()
    return bool(rows)


def migrate(conn: sqlite3.Connection, where: str | None = None) -> int:
    """Bring a log's schema up to :data:`SCHEMA_VERSION`, in one transaction.

    Parameters
    ----------
    conn : sqlite3.Connection
        Open on the log, in autocommit mode (``isolation_level=None``).
    where : str, optional
        The log's path, for error messages.

    Returns
    -------
    int
        The schema version the log had before (0 for a new, empty file).

    Raises
    ------
    LogError
        The log was written by a newer passby, or the file is an SQLite
        database of something else.

    Examples
    --------
    >>> conn = sqlite3.connect(":memory:", isolation_level=None)
    >>> migrate(conn), conn.execute("PRAGMA user_version").fetchone()[0]
    (0, 1)
    >>> migrate(conn)
    1
    """
    conn.execute("BEGIN IMMEDIATE")
    try:
        version = conn.execute("PRAGMA user_version").fetchone()[0]
        if version > SCHEMA_VERSION:
            raise LogError(
                f"log has schema version {version}, newer than this passby reads "
                f"(up to {SCHEMA_VERSION}): update passby", where=where)
        if version == 0 and _has_foreign_tables(conn):
            raise LogError("not a passby log (an SQLite database of something else)",
                           where=where)
        start = version
        while version < SCHEMA_VERSION:
            MIGRATIONS[version](conn)
            version += 1
            conn.execute(f"PRAGMA user_version = {version}")
            conn.execute("INSERT OR REPLACE INTO meta(key, value) VALUES ('schema_version', ?)",
                         (str(version),))
        conn.execute("COMMIT")
        return start
    except BaseException:
        conn.execute("ROLLBACK")
        raise


# --------------------------------------------------------------------------
# The log


def _num(x):
    """A float for SQLite: NaN and None become NULL."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _nan(x):
    return float("nan") if x is None else float(x)


def _sql_error(exc: sqlite3.Error, path: str) -> LogError:
    text = str(exc)
    if "locked" in text or "busy" in text:
        return LogError("log is locked by another process (is a station already "
                        "writing to it?)", where=path)
    if "not a database" in text or "malformed" in text or "encrypted" in text:
        return LogError("not a passby log (not an SQLite database, or damaged)", where=path)
    if "readonly" in text or "read-only" in text:
        return LogError("log is read-only here (check the file's and its "
                        "directory's permissions)", where=path)
    if "unable to open" in text:
        return LogError("cannot open the log (missing directory or no permission)",
                        where=path)
    return LogError(f"log error: {text}", where=path)


class EventLog:
    """The station's log of pass-by events (an SQLite file).

    Parameters
    ----------
    path : str or os.PathLike
        The database file.
    create : bool
        Create the file if it does not exist (a station does; ``export``
        does not).
    readonly : bool
        Open for reading only (never writes, never migrates; it can read
        while a station writes).

    Raises
    ------
    LogError
        Missing file (without ``create``), a file that is not a passby log,
        a log from a newer passby, or one locked by another writer.

    Notes
    -----
    Use it as a context manager. Every ``add`` is one transaction, synced
    to the medium before it returns (see the module notes on power cuts).
    """

    def __init__(self, path, create: bool = False, readonly: bool = False):
        self.path = os.fspath(path)
        self.readonly = bool(readonly)
        self._conn = None
        exists = os.path.exists(self.path)
        if not exists and (readonly or not create):
            raise LogError("no such log", where=self.path)
        if exists and os.path.isdir(self.path):
            raise LogError("is a directory, not a log", where=self.path)
        try:
            if self.readonly:
                uri = "file:" + _uri_path(self.path) + "?mode=ro"
                conn = sqlite3.connect(uri, uri=True, isolation_level=None,
                                       timeout=BUSY_TIMEOUT_S, check_same_thread=False)
            else:
                conn = sqlite3.connect(self.path, isolation_level=None,
                                       timeout=BUSY_TIMEOUT_S, check_same_thread=False)
            self._conn = conn
            if self.readonly:
                version = conn.execute("PRAGMA user_version").fetchone()[0]
                if version > SCHEMA_VERSION:
                    raise LogError(
                        f"log has schema version {version}, newer than this passby "
                        f"reads (up to {SCHEMA_VERSION}): update passby", where=self.path)
                if version < 1:
                    raise LogError("not a passby log", where=self.path)
                if version < SCHEMA_VERSION:
                    raise LogError(f"log has the old schema version {version}: open it "
                                   "once with a station to update it", where=self.path)
            else:
                mode = conn.execute("PRAGMA journal_mode=WAL").fetchone()[0]
                if str(mode).lower() != "wal":
                    raise LogError(f"cannot use write-ahead logging (journal mode {mode})",
                                   where=self.path)
                conn.execute("PRAGMA synchronous=FULL")
                # Keep the -wal file small after checkpoints (bytes).
                conn.execute("PRAGMA journal_size_limit=4194304")
                migrate(conn, where=self.path)
            conn.execute("PRAGMA foreign_keys=ON")
        except LogError:
            self.close()
            raise
        except sqlite3.Error as exc:
            self.close()
            raise _sql_error(exc, self.path) from None

    # -- context manager ------------------------------------------------
    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def close(self) -> None:
        """Close the database (idempotent)."""
        if self._conn is not None:
            try:
                self._conn.close()
            finally:
                self._conn = None

    # -- internals -------------------------------------------------------
    def _db(self) -> sqlite3.Connection:
        if self._conn is None:
            raise LogError("log is closed", where=self.path)
        return self._conn

    def _write(self, fn):
        """Run ``fn(conn)`` in one IMMEDIATE transaction; its result."""
        if self.readonly:
            raise LogError("log is open read-only", where=self.path)
        conn = self._db()
        try:
            conn.execute("BEGIN IMMEDIATE")
            try:
                result = fn(conn)
            except BaseException:
                conn.execute("ROLLBACK")
                raise
            conn.execute("COMMIT")
            return result
        except sqlite3.Error as exc:
            raise _sql_error(exc, self.path) from None

    def _read(self, sql, params=()):
        try:
            return self._db().execute(sql, params).fetchall()
        except sqlite3.Error as exc:
            raise _sql_error(exc, self.path) from None

    # -- meta -----------------------------------------------------------
    def get_meta(self, key: str) -> str | None:
        """The value of a ``meta`` key, or None."""
        rows = self._read("SELECT value FROM meta WHERE key = ?", (key,))
        return rows[0][0] if rows else None

    def set_meta(self, key: str, value: str) -> None:
        """Set a ``meta`` key (one transaction)."""
        self._write(lambda c: c.execute(
            "INSERT OR REPLACE INTO meta(key, value) VALUES (?, ?)", (key, str(value))))

    @property
    def schema_version(self) -> int:
        return int(self._read("PRAGMA user_version")[0][0])

    # -- events ---------------------------------------------------------
    def add(self, event: PassEvent, time_utc: str, station_id: str, clip_path=None,
            overflows: int = 0, *, run_id: int | None = None, losses=(),
            seen_utc: str | None = None) -> int:
        """Append one event, in one synced transaction.

        Parameters
        ----------
        event : PassEvent
        time_utc : str
            Its closest-approach time, ISO 8601 UTC (see :func:`utc_iso`).
        station_id : str
        clip_path : str, optional
        overflows : int
            Input-loss incidents within the event.
        run_id : int, optional
            The current run (see :meth:`start_run`).
        losses : iterable of InputLoss
            Buffered input losses to write in the same transaction.
        seen_utc : str, optional
            Also refresh the run's ``last_seen_utc``.

        Returns
        -------
        int
            The new row's id.
        """
        from passby import __version__

        row = {
            "time_utc": str(time_utc),
            "station_id": str(station_id),
            "speed_mps": _num(event.speed_mps),
            "speed_std_mps": _num(event.speed_std_mps),
            "tones_hz": json.dumps([float(f) for f in event.tones_hz]),
            "emitted_hz": _num(event.emitted_hz),
            "closest_approach_m": _num(event.closest_approach_m),
            "closest_approach_std_m": _num(event.closest_approach_std_m),
            "quality": str(event.quality),
            "reason": event.reason,
            "temperature_c": _num(event.temperature_c),
            "humidity_pct": _num(event.humidity_pct),
            "speed_of_sound_mps": _num(event.speed_of_sound_mps),
            "residual_hz": _num(event.residual_hz),
            "method": event.method,
            "laf_max_db": _num(event.laf_max_db),
            "level_calibrated": int(bool(event.level_calibrated)),
            "dropped_blocks": int(event.dropped_blocks),
            "overflows": int(overflows),
            "software_version": __version__,
            "stream_offset_s": _num(event.pass_time_s),
            "start_s": _num(event.start_s),
            "end_s": _num(event.end_s),
            "n_frames": int(event.n_frames),
            "clip_path": None if clip_path is None else str(clip_path),
            "run_id": run_id,
        }
        names = ", ".join(row)
        marks = ", ".join("?" * len(row))
        losses = list(losses)

        def write(conn):
            cur = conn.execute(f"INSERT INTO events({names}) VALUES ({marks})",
                               tuple(row.values()))
            if losses:
                self._insert_losses(conn, losses)
            if seen_utc is not None and run_id is not None:
                conn.execute("UPDATE runs SET last_seen_utc = ? WHERE id = ?",
                             (seen_utc, run_id))
            return cur.lastrowid

        return int(self._write(write))

    def events(self, since=None, until=None, station_id=None) -> list:
        """The logged events in time order (then in the order logged).

        Parameters
        ----------
        since, until : str or float, optional
            Keep events with ``since <= time < until``: ISO 8601 text (see
            :func:`parse_utc`) or POSIX seconds.
        station_id : str, optional
            Keep this station's events only.

        Returns
        -------
        list of LoggedEvent
        """
        where, params = [], []
        if since is not None:
            where.append("time_utc >= ?")
            params.append(_bound(since, "since"))
        if until is not None:
            where.append("time_utc < ?")
            params.append(_bound(until, "until"))
        if station_id is not None:
            where.append("station_id = ?")
            params.append(str(station_id))
        sql = "SELECT * FROM events"
        if where:
            sql += " WHERE " + " AND ".join(where)
        sql += " ORDER BY time_utc, id"
        conn = self._db()
        try:
            cur = conn.execute(sql, params)
            names = [d[0] for d in cur.description]
            return [_logged(dict(zip(names, r))) for r in cur.fetchall()]
        except sqlite3.Error as exc:
            raise _sql_error(exc, self.path) from None

    def count(self) -> int:
        """Number of events in the log."""
        return int(self._read("SELECT COUNT(*) FROM events")[0][0])

    def forget_clips(self, paths) -> int:
        """Clear ``clip_path`` of the rows whose clip was deleted; rows changed."""
        paths = [str(p) for p in paths]
        if not paths:
            return 0
        return self._write(lambda c: c.executemany(
            "UPDATE events SET clip_path = NULL WHERE clip_path = ?",
            [(p,) for p in paths]).rowcount)

    # -- runs -----------------------------------------------------------
    def start_run(self, station_id: str, source: str, device: str, sample_rate: int,
                  channel: int) -> tuple:
        """Record the start of a station run.

        Returns
        -------
        run_id : int
        unclean : list of RunRecord
            Earlier runs that never stopped cleanly (power cut, kill); they
            are marked ``stop_reason = 'unclean'`` in the same transaction.
        """
        from passby import __version__

        now = _now_iso()

        def write(conn):
            rows = conn.execute(
                "SELECT * FROM runs WHERE stop_utc IS NULL AND stop_reason IS NULL "
                "ORDER BY id").fetchall()
            conn.execute("UPDATE runs SET stop_reason = 'unclean' "
                         "WHERE stop_utc IS NULL AND stop_reason IS NULL")
            cur = conn.execute(
                "INSERT INTO runs(start_utc, last_seen_utc, station_id, source, device, "
                "sample_rate, channel, software_version) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (now, now, str(station_id), str(source), str(device), int(sample_rate),
                 int(channel), __version__))
            return cur.lastrowid, [RunRecord(*r) for r in rows]

        return self._write(write)

    def update_run(self, run_id: int, device: str, sample_rate: int) -> None:
        """Record the device and rate a run actually opened."""
        self._write(lambda c: c.execute(
            "UPDATE runs SET device = ?, sample_rate = ? WHERE id = ?",
            (str(device), int(sample_rate), int(run_id))))

    def end_run(self, run_id: int, reason: str = "stopped", losses=()) -> None:
        """Record the clean end of a run (with any buffered losses)."""
        now = _now_iso()
        losses = list(losses)

        def write(conn):
            if losses:
                self._insert_losses(conn, losses)
            conn.execute("UPDATE runs SET stop_utc = ?, last_seen_utc = ?, stop_reason = ? "
                         "WHERE id = ?", (now, now, str(reason), int(run_id)))

        self._write(write)

    def heartbeat(self, run_id: int, losses=()) -> None:
        """Write buffered losses and refresh the run's ``last_seen_utc``."""
        now = _now_iso()
        losses = list(losses)

        def write(conn):
            if losses:
                self._insert_losses(conn, losses)
            conn.execute("UPDATE runs SET last_seen_utc = ? WHERE id = ?", (now, int(run_id)))

        self._write(write)

    def runs(self) -> list:
        """All runs, oldest first (list of RunRecord)."""
        return [RunRecord(*r) for r in self._read("SELECT * FROM runs ORDER BY id")]

    # -- input losses ---------------------------------------------------
    @staticmethod
    def _insert_losses(conn, losses):
        conn.executemany(
            "INSERT INTO input_losses(run_id, time_utc, stream_offset_s, samples, blocks, kind) "
            "VALUES (?, ?, ?, ?, ?, ?)",
            [(x.run_id, x.time_utc, _num(x.stream_offset_s), int(x.samples), int(x.blocks),
              str(x.kind)) for x in losses])

    def add_losses(self, losses) -> None:
        """Write a batch of :class:`InputLoss` in one transaction."""
        losses = list(losses)
        if losses:
            self._write(lambda c: self._insert_losses(c, losses))

    def losses(self) -> list:
        """All recorded input losses, in time order (list of InputLoss)."""
        rows = self._read("SELECT time_utc, stream_offset_s, samples, blocks, kind, run_id "
                          "FROM input_losses ORDER BY time_utc, id")
        return [InputLoss(t, _nan(o), s, b, k, r) for t, o, s, b, k, r in rows]

    # -- maintenance ----------------------------------------------------
    def integrity_check(self) -> str:
        """SQLite's ``PRAGMA integrity_check``: ``'ok'`` for a sound file."""
        return "; ".join(r[0] for r in self._read("PRAGMA integrity_check"))


def _uri_path(path: str) -> str:
    from urllib.parse import quote

    return quote(os.path.abspath(path))


def _bound(value, where) -> str:
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return utc_iso(value)
    return utc_iso(parse_utc(value, where=where))


def _logged(r: dict) -> LoggedEvent:
    event = PassEvent(
        pass_time_s=_nan(r["stream_offset_s"]),
        speed_mps=_nan(r["speed_mps"]),
        speed_std_mps=_nan(r["speed_std_mps"]),
        tones_hz=tuple(float(f) for f in json.loads(r["tones_hz"] or "[]")),
        closest_approach_m=_nan(r["closest_approach_m"]),
        closest_approach_std_m=_nan(r["closest_approach_std_m"]),
        speed_of_sound_mps=_nan(r["speed_of_sound_mps"]),
        temperature_c=_nan(r["temperature_c"]),
        quality=r["quality"],
        reason=r["reason"],
        residual_hz=_nan(r["residual_hz"]),
        start_s=_nan(r["start_s"]),
        end_s=_nan(r["end_s"]),
        n_frames=int(r["n_frames"] or 0),
        method=r["method"] or "curve",
        humidity_pct=r["humidity_pct"],
        laf_max_db=r["laf_max_db"],
        level_calibrated=bool(r["level_calibrated"]),
        dropped_blocks=int(r["dropped_blocks"]),
    )
    return LoggedEvent(
        id=int(r["id"]), time_utc=r["time_utc"], station_id=r["station_id"], event=event,
        clip_path=r["clip_path"], overflows=int(r["overflows"]),
        software_version=r["software_version"], run_id=r["run_id"])
