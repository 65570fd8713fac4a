"""The station log (SQLite) and ``passby export``."""

from __future__ import annotations

import csv
import io
import json
import math
import sqlite3
from datetime import datetime, timezone

import pytest

import passby
from passby import store
from passby.cli import main
from passby.errors import LogError
from passby.events import PassEvent
from passby.store import EventLog, InputLoss, parse_utc, utc_iso


def event(t=12.5, speed=13.9, **kw):
    base = dict(pass_time_s=t, speed_mps=speed, speed_std_mps=0.21, tones_hz=(421.25, 842.5),
                closest_approach_m=6.04, closest_approach_std_m=0.33,
                speed_of_sound_mps=343.2, temperature_c=20.0, quality="good")
    base.update(kw)
    return PassEvent(**base)


def test_every_field_survives_the_round_trip(tmp_path):
    full = event(reason="one tone", residual_hz=0.71, start_s=9.5, end_s=15.25, n_frames=188,
                 method="plateaus", humidity_pct=64.0, laf_max_db=78.4, level_calibrated=True,
                 dropped_blocks=3)
    rejected = event(t=30.0, speed=float("nan"), speed_std_mps=float("nan"), tones_hz=(),
                     closest_approach_m=float("nan"), closest_approach_std_m=float("nan"),
                     quality="rejected", reason="no plateau")
    with EventLog(tmp_path / "road.db", create=True) as log:
        a = log.add(full, "2031-05-04T07:12:03.250Z", "north-lane", clip_path="clips/a.wav",
                    overflows=2)
        b = log.add(rejected, "2031-05-04T07:12:20.750Z", "north-lane")
        got = log.events()
    assert (a, b) == (1, 2)
    assert got[0].event == full
    assert (got[0].clip_path, got[0].overflows) == ("clips/a.wav", 2)
    assert got[0].software_version == passby.__version__
    r = got[1].event
    assert math.isnan(r.speed_mps) and math.isnan(r.closest_approach_m) and r.tones_hz == ()
    assert (r.quality, r.reason, got[1].clip_path) == ("rejected", "no plateau", None)
    # The columns an outside reader sees.
    conn = sqlite3.connect(tmp_path / "road.db")
    row = conn.execute("SELECT emitted_hz, tones_hz, speed_mps, stream_offset_s, "
                       "software_version FROM events WHERE id = 1").fetchone()
    assert row == (421.25, "[421.25, 842.5]", 13.9, 12.5, passby.__version__)
    assert conn.execute("SELECT speed_mps FROM events WHERE id = 2").fetchone() == (None,)


def test_log_is_wal_synced_and_versioned(tmp_path):
    path = tmp_path / "road.db"
    with EventLog(path, create=True) as log:
        # SQLite documentation, PRAGMA synchronous: 2 = FULL.
        assert log._conn.execute("PRAGMA synchronous").fetchone()[0] == 2
        assert log.schema_version == store.SCHEMA_VERSION == 1
        assert log.get_meta("schema_version") == "1"
    conn = sqlite3.connect(path)
    assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert conn.execute("PRAGMA user_version").fetchone()[0] == 1
    tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    assert tables == {"meta", "runs", "events", "input_losses"}


def test_one_transaction_per_event(tmp_path):
    with EventLog(tmp_path / "road.db", create=True) as log:
        statements = []
        log._conn.set_trace_callback(statements.append)
        log.add(event(), "2031-05-04T07:12:03.250Z", "north-lane",
                losses=[InputLoss("2031-05-04T07:12:01.000Z", 10.0, 4800, 1, "overflow")])
    kinds = [s.split()[0].upper() for s in statements]
    assert kinds == ["BEGIN", "INSERT", "INSERT", "COMMIT"]


def test_events_come_in_time_order_and_filter(tmp_path):
    with EventLog(tmp_path / "road.db", create=True) as log:
        log.add(event(t=3), "2031-05-04T09:00:00.000Z", "b")
        log.add(event(t=1), "2031-05-04T07:00:00.000Z", "a")
        log.add(event(t=2), "2031-05-04T08:00:00.000Z", "a")
        assert [e.event.pass_time_s for e in log.events()] == [1, 2, 3]
        assert [e.event.pass_time_s for e in log.events(since="2031-05-04T08:00Z")] == [2, 3]
        assert [e.event.pass_time_s for e in log.events(until="2031-05-04T08:00Z")] == [1]
        # 10:00+02:00 is 08:00 UTC
        assert [e.event.pass_time_s for e in log.events(since="2031-05-04T10:00+02:00")] == [2, 3]
        assert [e.event.pass_time_s for e in log.events(station_id="a")] == [1, 2]
        with pytest.raises(LogError, match="not an ISO 8601"):
            log.events(since="yesterday")


def test_utc_text_matches_the_standard_library():
    for epoch in (0.0, 951782400.0, 1000000000.25, 1955000000.999):  # incl. 2000-02-29
        expected = datetime.fromtimestamp(round(epoch, 3), tz=timezone.utc)
        assert utc_iso(epoch) == expected.strftime("%Y-%m-%dT%H:%M:%S.") + \
            f"{expected.microsecond // 1000:03d}Z"
        assert parse_utc(utc_iso(epoch)) == pytest.approx(round(epoch, 3), abs=1e-6)
    assert parse_utc("2000-02-29") == 951782400.0


def test_missing_foreign_newer_and_damaged_logs_are_refused(tmp_path):
    with pytest.raises(LogError, match="no such log"):
        EventLog(tmp_path / "none.db")
    junk = tmp_path / "junk.db"
    junk.write_bytes(b"RIFF\x00\x00\x00\x00WAVEfmt " + bytes(200))
    with pytest.raises(LogError, match="not a passby log"):
        EventLog(junk, create=True)
    other = tmp_path / "other.db"
    c = sqlite3.connect(other)
    c.execute("CREATE TABLE vehicles (plate TEXT)")
    c.commit()
    c.close()
    with pytest.raises(LogError, match="not a passby log"):
        EventLog(other, create=True)
    newer = tmp_path / "newer.db"
    EventLog(newer, create=True).close()
    c = sqlite3.connect(newer)
    c.execute("PRAGMA user_version = 2")
    c.commit()
    c.close()
    with pytest.raises(LogError, match="newer than this passby reads") as exc:
        EventLog(newer, create=True)
    assert str(exc.value).startswith(f"{newer}: log has schema version 2")
    with pytest.raises(LogError, match="newer"):
        EventLog(newer, readonly=True)


def test_a_locked_log_is_a_one_line_error(tmp_path, monkeypatch):
    monkeypatch.setattr(store, "BUSY_TIMEOUT_S", 0.05)
    path = tmp_path / "road.db"
    EventLog(path, create=True).close()
    holder = sqlite3.connect(path, isolation_level=None)
    holder.execute("BEGIN EXCLUSIVE")
    try:
        with pytest.raises(LogError, match="locked by another process"):
            EventLog(path, create=True)
    finally:
        holder.execute("ROLLBACK")
        holder.close()


def test_a_reader_sees_committed_events_while_a_writer_works(tmp_path):
    path = tmp_path / "road.db"
    with EventLog(path, create=True) as w:
        w.add(event(t=1), "2031-05-04T07:00:00.000Z", "a")
        w._conn.execute("BEGIN IMMEDIATE")
        w._conn.execute("UPDATE events SET quality = 'fair'")
        with EventLog(path, readonly=True) as r:
            got = r.events()
        w._conn.execute("ROLLBACK")
    assert [e.event.quality for e in got] == ["good"]


def test_runs_and_losses(tmp_path):
    path = tmp_path / "road.db"
    with EventLog(path, create=True) as log:
        run1, unclean = log.start_run("a", "live", "default", 48000, 1)
        assert unclean == []
        log.add_losses([InputLoss("2031-05-04T07:00:01.000Z", 1.0, 4800, 1, "overflow", run1)])
    with EventLog(path, create=True) as log:  # run 1 never ended: a power cut
        run2, unclean = log.start_run("a", "live", "default", 48000, 1)
        log.heartbeat(run2, [InputLoss("2031-05-04T08:00:00.000Z", 5.0, 9600, 2,
                                       "queue_full", run2)])
        log.end_run(run2, "stopped")
        runs = log.runs()
        losses = log.losses()
    assert [r.id for r in unclean] == [1]
    assert [(r.id, r.stop_reason) for r in runs] == [(1, "unclean"), (2, "stopped")]
    assert runs[0].stop_utc is None and runs[1].stop_utc is not None
    assert [(x.kind, x.samples, x.run_id) for x in losses] == [("overflow", 4800, 1),
                                                               ("queue_full", 9600, 2)]


# --------------------------------------------------------------------------
# passby export


@pytest.fixture
def log3(tmp_path):
    path = tmp_path / "road.db"
    with EventLog(path, create=True) as log:
        log.add(event(t=2, speed=25.0), "2031-05-04T07:10:00.000Z", "north-lane")
        log.add(event(t=1, speed=12.5, laf_max_db=81.0), "2031-05-04T07:00:00.000Z",
                "north-lane", overflows=1)
        log.add(event(t=3, speed=float("nan"), quality="rejected", reason="no plateau"),
                "2031-05-04T07:20:00.000Z", "north-lane")
    return path


def test_export_csv(log3, capsys):
    assert main(["export", str(log3), "--csv"]) == 0
    rows = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    for column in ("time_utc", "station_id", "speed_kmh", "speed_std_kmh", "emitted_hz",
                   "tones_hz", "closest_approach_m", "quality", "reason", "temperature_c",
                   "speed_of_sound_mps", "dropped_blocks", "software_version"):
        assert column in rows[0]
    assert [r["time_utc"] for r in rows] == ["2031-05-04T07:00:00.000Z",
                                             "2031-05-04T07:10:00.000Z",
                                             "2031-05-04T07:20:00.000Z"]
    # 1 m/s = 3.6 km/h exactly (SI Brochure, 9th ed., Table 8: 1 km/h = (1000/3600) m/s).
    assert float(rows[0]["speed_kmh"]) == pytest.approx(45.0)
    assert float(rows[1]["speed_kmh"]) == pytest.approx(90.0)
    assert float(rows[0]["speed_std_kmh"]) == pytest.approx(0.21 * 3.6)
    assert rows[2]["speed_kmh"] == "" and rows[2]["reason"] == "no plateau"
    assert rows[0]["tones_hz"] == "421.25 842.5" and rows[0]["emitted_hz"] == "421.25"
    assert rows[0]["laf_max_db"] == "81.0" and rows[1]["laf_max_db"] == ""
    assert rows[0]["overflows"] == "1" and rows[0]["software_version"] == passby.__version__


def test_export_json_with_a_time_window_to_a_file(log3, tmp_path, capsys):
    out = tmp_path / "week.json"
    assert main(["export", str(log3), "--json", "--since", "2031-05-04T07:05Z",
                 "--until", "2031-05-04T07:20Z", "--out", str(out)]) == 0
    doc = json.loads(out.read_text())
    assert [e["time_utc"] for e in doc["events"]] == ["2031-05-04T07:10:00.000Z"]
    e = doc["events"][0]
    assert e["speed_kmh"] == pytest.approx(90.0) and e["tones_hz"] == [421.25, 842.5]
    assert e["laf_max_db"] is None and e["level_calibrated"] is False
    assert "1 events written" in capsys.readouterr().err


def test_export_of_a_missing_log_is_one_line(tmp_path, capsys):
    assert main(["export", str(tmp_path / "none.db"), "--csv"]) == 2
    assert capsys.readouterr().err.splitlines() == [
        f"passby: error: {tmp_path / 'none.db'}: no such log"]
