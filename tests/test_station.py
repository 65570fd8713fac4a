"""The unattended station: replay, a scripted sound card, losses, retries,
temperature, clips, signals and kill -9, without a microphone.

The pipeline here is ``station_fakes.FakePipeline`` (one event every
``period_s`` of stream time), so these tests check the shell: the time base,
what reaches the log and when. The end-to-end speed checks with the real
pipeline are at the end of the file.
"""

from __future__ import annotations

import logging
import math
import os
import queue
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pytest

import station_fakes as F
from passby.errors import ConfigError, DeviceError
from passby.settings import AnalysisSettings
from passby.station import (Intake, RingBuffer, Station, StationOptions,
                            parse_temperature_text, station_options)
from passby.store import EventLog, parse_utc
from passby.wavio import WavReader, read_wav, write_wav

REPO = Path(__file__).resolve().parents[1]
FAKES = Path(__file__).with_name("station_fakes.py")


def tone_wav(path, seconds, rate=8000, freq=440.0, channels=1):
    """A plain tone (the fake pipeline does not look at the samples)."""
    t = np.arange(int(seconds * rate)) / rate
    x = 0.3 * np.sin(2 * np.pi * freq * t)
    if channels > 1:
        x = np.stack([x * (k + 1) / channels for k in range(channels)], axis=1)
    write_wav(path, x, rate)
    return x


def options(tmp_path, **kw):
    base = dict(log_path=str(tmp_path / "road.db"), station_id="north-lane", poll_s=0.005,
                block_s=0.1)
    base.update(kw)
    return StationOptions(**base)


@pytest.fixture(autouse=True)
def _fresh_fakes():
    F.FakePipeline.instances.clear()
    yield


def iso_to_dt(s):
    return datetime.fromisoformat(s.replace("Z", "+00:00"))


# --------------------------------------------------------------------------
# Replay


def test_replay_logs_every_event_with_the_stream_time_base(tmp_path):
    wav = tmp_path / "pass.wav"
    tone_wav(wav, 9.0)
    before = time.time()
    st = Station(options(tmp_path, replay=str(wav)), pipeline_factory=F.FakePipeline)
    assert st.run() == 0
    after = time.time()
    fp = F.FakePipeline.instances[-1]
    # Every sample of the file reached the pipeline exactly once, no gap.
    assert fp.pushed == 9 * 8000 and fp.gaps == [] and fp.finished
    with EventLog(tmp_path / "road.db") as log:
        events = log.events()
        runs = log.runs()
    # Events at 2, 4, 6, 8 s, and the one finish() closes at the end (9 s).
    assert [e.event.pass_time_s for e in events] == [2.0, 4.0, 6.0, 8.0, 9.0]
    assert events[-1].event.reason == "end of stream"
    # time_utc = stream start + pass_time_s: the differences are the pass
    # times' differences exactly (to the millisecond of the text).
    t = [iso_to_dt(e.time_utc) for e in events]
    assert [(b - t[0]).total_seconds() for b in t] == [0.0, 2.0, 4.0, 6.0, 7.0]
    start = t[0] - timedelta(seconds=2.0)
    assert before - 0.01 <= start.timestamp() <= after
    assert all(e.station_id == "north-lane" and e.run_id == 1 for e in events)
    assert runs[0].device == "replay:pass.wav" and runs[0].sample_rate == 8000
    assert runs[0].stop_reason == "end of replay" and runs[0].stop_utc is not None


def test_replay_uses_the_chosen_channel(tmp_path):
    wav = tmp_path / "two.wav"
    x = tone_wav(wav, 1.0, channels=2)
    seen = []

    class Recording(F.FakePipeline):
        def push(self, block):
            seen.append(block.copy())
            return super().push(block)

    st = Station(options(tmp_path, replay=str(wav), channel=2), pipeline_factory=Recording)
    assert st.run() == 0
    got = np.concatenate(seen)
    # pcm16 quantisation: within one step of 2**-15 of the source's channel 2
    assert np.max(np.abs(got - x[:, 1])) <= 2.0 ** -15


def test_replay_at_the_recordings_pace_is_paced(tmp_path):
    wav = tmp_path / "short.wav"
    tone_wav(wav, 0.5)
    t0 = time.monotonic()
    st = Station(options(tmp_path, replay=str(wav), realtime=True),
                 pipeline_factory=F.FakePipeline)
    assert st.run() == 0
    # A paced replay cannot end before the recording's own duration.
    assert time.monotonic() - t0 >= 0.5


def test_cautions_are_shown_on_the_first_start_only(tmp_path, caplog):
    wav = tmp_path / "pass.wav"
    tone_wav(wav, 1.0)
    caplog.set_level(logging.INFO, logger="passby")
    Station(options(tmp_path, replay=str(wav)), pipeline_factory=F.FakePipeline).run()
    first = [r.getMessage() for r in caplog.records if r.getMessage().startswith("safety:")]
    caplog.clear()
    Station(options(tmp_path, replay=str(wav)), pipeline_factory=F.FakePipeline).run()
    again = [r.getMessage() for r in caplog.records if r.getMessage().startswith("safety:")]
    assert len(first) == 3 and again == []
    assert any("legal enforcement" in m for m in first)
    assert any("indicative" in m for m in first)
    assert any("safety rules" in m for m in first)


# --------------------------------------------------------------------------
# A scripted sound card


BS = 4800  # frames per block at 48 kHz (0.1 s)


def live_station(tmp_path, sd, waits=None, stop_after_waits=None, **kw):
    waits = [] if waits is None else waits
    st = None

    def wait(seconds):
        waits.append(seconds)
        if stop_after_waits is not None and len(waits) >= stop_after_waits:
            st.stop()
            return True
        return False

    st = Station(options(tmp_path, **kw), pipeline_factory=F.FakePipeline, sounddevice=sd,
                 wait=wait)
    return st, waits


def test_callback_only_queues_and_keeps_the_chosen_channel():
    intake = Intake(maxsize=2, channel_index=1, sample_rate=48000)
    data = np.array([[0.1, 0.2], [0.3, 0.4]], dtype=np.float32)
    intake.callback(data, 2, None, None)
    data[:] = 9.0  # the device reuses its buffer: the queued copy must not change
    x, losses, _ = intake.queue.get_nowait()
    assert x.tolist() == pytest.approx([0.2, 0.4]) and losses == ()


def test_overflow_is_handed_to_the_pipeline_in_its_place(tmp_path):
    rate = 48000
    adc = [k * BS / rate for k in range(40)]
    blocks = [F.block(BS, adc=1.0 + adc[k]) for k in range(5)]
    # The device skipped two blocks (ADC time jumps by 3 blocks) and says so.
    blocks += [F.block(BS, adc=1.0 + adc[7], overflow=True)]
    blocks += [F.block(BS, adc=1.0 + adc[k]) for k in range(8, 40)]
    sd = F.FakeSoundDevice([{"phases": [blocks], "vanish": False}])
    st, _ = live_station(tmp_path, sd)
    sd.on_exhausted = st.stop
    assert st.run() == 0
    fp = F.FakePipeline.instances[-1]
    assert fp.gaps == [(5 * BS, 2 * BS, 2)]
    assert fp.pushed == 38 * BS and fp.n == 40 * BS
    with EventLog(tmp_path / "road.db") as log:
        losses = log.losses()
        events = log.events()
    assert [(x.kind, x.samples, x.blocks) for x in losses] == [("overflow", 2 * BS, 2)]
    assert losses[0].stream_offset_s == pytest.approx(0.5)
    # The event at 2 s spans 1.0..2.5 s: no loss inside. The gap at
    # 0.5..0.7 s lies before it. The final (finish) event at 4 s neither.
    assert [e.overflows for e in events] == [0, 0]
    assert [e.event.pass_time_s for e in events] == [2.0, 4.0]


def test_overflow_without_timestamps_counts_one_block(tmp_path):
    blocks = [F.block(BS) for _ in range(5)] + [F.block(BS, overflow=True)] + \
             [F.block(BS) for _ in range(20)]
    sd = F.FakeSoundDevice([{"phases": [blocks], "vanish": False}])
    st, _ = live_station(tmp_path, sd)
    sd.on_exhausted = st.stop
    st.run()
    assert F.FakePipeline.instances[-1].gaps == [(5 * BS, BS, 1)]


def test_full_queue_is_counted_and_keeps_the_time_base(tmp_path, caplog):
    caplog.set_level(logging.INFO, logger="passby")
    # 1.5 s of audio in steps the analysis keeps up with, then 10 blocks
    # arrive at once while it does not run; the queue holds 4, so 6 are
    # lost (1.9 .. 2.5 s).
    steady = [[F.block(BS) for _ in range(3)] for _ in range(5)]
    burst = [F.block(BS) for _ in range(10)]
    later = [[F.block(BS) for _ in range(2)] for _ in range(10)]
    sd = F.FakeSoundDevice([{"phases": [*steady, burst, *later], "vanish": False}])
    st, _ = live_station(tmp_path, sd, queue_blocks=4)
    sd.on_exhausted = st.stop
    assert st.run() == 0
    fp = F.FakePipeline.instances[-1]
    assert fp.gaps == [(19 * BS, 6 * BS, 6)]
    assert fp.n == 45 * BS and fp.pushed == 39 * BS
    with EventLog(tmp_path / "road.db") as log:
        losses = log.losses()
        events = log.events()
    assert [(x.kind, x.samples, x.blocks) for x in losses] == [("queue_full", 6 * BS, 6)]
    assert losses[0].stream_offset_s == pytest.approx(1.9)
    # The 2 s event (1.0 .. 2.5 s) holds the loss; the 4 s one (3.0 .. 4.5 s)
    # and the finish() one at 4.5 s do not.
    assert [e.event.pass_time_s for e in events] == [2.0, 4.0, 4.5]
    assert [e.overflows for e in events] == [1, 0, 0]
    assert [e.event.dropped_blocks for e in events] == [6, 0, 0]
    assert any("input lost: 28800 samples (analysis fell behind)" in r.getMessage()
               for r in caplog.records)


def test_device_vanishes_and_the_station_retries_with_growing_pauses(tmp_path, caplog):
    caplog.set_level(logging.INFO, logger="passby")
    err = F.FakePortAudioError
    stream_ok = {"phases": [[F.block(BS) for _ in range(25)]], "vanish": True}
    script = [err("Device unavailable [PaErrorCode -9985]"), err("Device unavailable"),
              stream_ok,
              err("Invalid device"), err("Invalid device"), err("Invalid device"),
              err("Invalid device"), err("Invalid device"), err("Invalid device"),
              stream_ok]
    sd = F.FakeSoundDevice(script)
    st, waits = live_station(tmp_path, sd, stop_after_waits=12)
    assert st.run() == 0
    # 1, 2 before the first stream; it is lost after 2.5 s of audio (too
    # short to reset): 4; then 8 .. 60 s for the six failures; the second
    # stream is lost: 60; then one more failed try with the script spent.
    assert waits == [1, 2, 4, 8, 16, 32, 60, 60, 60, 60, 60, 60]
    text = [r.getMessage() for r in caplog.records]
    # 2 + 6 failed opens, and 2 more once the script is spent
    assert sum("unavailable" in m and "trying again" in m for m in text) == 10
    assert sum(m.startswith("audio input lost (the stream stopped); trying again in") for m in text) == 2
    assert any("trying again in 60 s" in m for m in text)
    assert sum(m.startswith("input: Fake USB microphone, 48000 Hz") for m in text) == 2
    # Each stream had its own pipeline, finished when the stream was lost.
    assert len(F.FakePipeline.instances) == 2 and all(p.finished for p in F.FakePipeline.instances)
    with EventLog(tmp_path / "road.db") as log:
        events = log.events()
        kinds = [x.kind for x in log.losses()]
        runs = log.runs()
    assert len(events) == 4  # 2 s and finish, per stream
    assert kinds == ["device"]
    assert runs[0].device == "Fake USB microphone" and runs[0].sample_rate == 48000
    assert runs[0].stop_reason == "stopped"
    # The stream was opened with the chosen channel count at the device's rate.
    assert sd.opened[0]["channels"] == 1 and sd.opened[0]["samplerate"] == 48000


def test_silent_device_is_taken_as_lost(tmp_path, caplog):
    caplog.set_level(logging.INFO, logger="passby")
    sd = F.FakeSoundDevice([{"phases": [[F.block(BS)]], "vanish": False}])
    st, waits = live_station(tmp_path, sd, stop_after_waits=1, stall_s=0.05)
    assert st.run() == 0
    assert waits == [1]
    assert any("audio input lost (no audio for 0.05 s)" in r.getMessage()
               for r in caplog.records)


def test_missing_portaudio_is_a_device_error(tmp_path, monkeypatch):
    import builtins

    real_import = builtins.__import__

    def fake_import(name, *args, **kw):
        if name == "sounddevice":
            raise OSError("PortAudio library not found")
        return real_import(name, *args, **kw)

    monkeypatch.setattr(builtins, "__import__", fake_import)
    st = Station(options(tmp_path), pipeline_factory=F.FakePipeline)
    with pytest.raises(DeviceError, match="libportaudio2"):
        st.run()


def test_temperature_file_applies_to_later_events(tmp_path, caplog):
    caplog.set_level(logging.INFO, logger="passby")
    therm = tmp_path / "w1" / "28-00000a1b2c3d"
    therm.mkdir(parents=True)
    tfile = therm / "temperature"
    # Linux w1_therm driver: the 'temperature' attribute is in millidegrees C
    # (kernel Documentation/w1/slaves/w1_therm.rst).
    tfile.write_text("12500\n")

    def warmer():
        tfile.write_text("15250\n")

    phases = [[F.block(BS) for _ in range(25)], [warmer], [F.block(BS) for _ in range(20)]]
    sd = F.FakeSoundDevice([{"phases": phases, "vanish": False}])
    st, _ = live_station(tmp_path, sd, temperature_file=str(tfile), temperature_period_s=0.0)
    sd.on_exhausted = st.stop
    st.run()
    with EventLog(tmp_path / "road.db") as log:
        events = [e.event for e in log.events()]
    # 2 s event before the change, 4 s and finish after it.
    assert [e.temperature_c for e in events] == [12.5, 15.25, 15.25]
    # ISO 9613-1: c = 343.2 * sqrt(T / 293.15 K) m/s.
    for e in events:
        assert e.speed_of_sound_mps == pytest.approx(
            343.2 * math.sqrt((e.temperature_c + 273.15) / 293.15), rel=1e-9)


def test_bad_temperature_reading_keeps_the_previous_value(tmp_path, caplog):
    caplog.set_level(logging.INFO, logger="passby")
    tfile = tmp_path / "air.txt"
    tfile.write_text("8.0\n")

    def power_on_value():
        # DS18B20 data sheet: +85 degrees C is the power-on reset value.
        tfile.write_text("85.0\n")

    phases = [[F.block(BS) for _ in range(25)], [power_on_value], [F.block(BS) for _ in range(20)]]
    sd = F.FakeSoundDevice([{"phases": phases, "vanish": False}])
    st, _ = live_station(tmp_path, sd, temperature_file=str(tfile), temperature_period_s=0.0)
    sd.on_exhausted = st.stop
    st.run()
    with EventLog(tmp_path / "road.db") as log:
        assert [e.event.temperature_c for e in log.events()] == [8.0, 8.0, 8.0]
    assert any("implausible air temperature 85" in r.getMessage() for r in caplog.records)


@pytest.mark.parametrize("text, unit, expected", [
    ("21437\n", "mC", 21.437),          # w1_therm 'temperature' attribute, millidegrees
    ("-3062\n", "mC", -3.062),
    ("72 01 4b 46 7f ff 0e 10 57 : crc=57 YES\n72 01 4b 46 7f ff 0e 10 57 t=23125\n",
     "mC", 23.125),                     # w1_slave: 0x0172 = 370 * 0.0625 C = 23.125 C
    ("  4.75 \n", "C", 4.75),
])
def test_thermometer_files(text, unit, expected):
    # DS18B20 data sheet, Table 1: 12-bit reading 0x0172 -> +23.125 C, and
    # the 0.0625 C step per count (Maxim Integrated DS18B20, 19-7487).
    assert parse_temperature_text(text, unit) == pytest.approx(expected)


def test_thermometer_crc_failure_is_refused():
    with pytest.raises(ValueError, match="CRC"):
        parse_temperature_text("72 01 4b 46 7f ff 0e 10 57 : crc=57 NO\n"
                               "72 01 4b 46 7f ff 0e 10 57 t=23125\n", "mC")


# --------------------------------------------------------------------------
# Clips


def test_ring_buffer_returns_the_samples_by_absolute_index():
    r = RingBuffer(1000, 1.0)
    x = np.arange(2500, dtype=np.float32)
    for chunk in np.array_split(x, 7):
        r.push(chunk)
    assert r.start == 1500 and r.end == 2500
    np.testing.assert_array_equal(r.span(1400, 1600), x[1500:1600])
    r.gap(100)
    np.testing.assert_array_equal(r.span(2450, 2600), np.r_[x[2450:2500], np.zeros(100)])


def test_clips_hold_the_event_audio_under_a_quota(tmp_path):
    wav = tmp_path / "pass.wav"
    x = tone_wav(wav, 11.0)
    clips = tmp_path / "clips"
    # Each clip spans start_s - 1 .. end_s + 1 = 3.5 s of 8 kHz pcm16 = 56 kB;
    # a quota of 0.13 MB keeps the two newest.
    o = options(tmp_path, replay=str(wav), clips_dir=str(clips), clip_quota_mb=0.13)
    assert Station(o, pipeline_factory=F.FakePipeline).run() == 0
    files = sorted(os.listdir(clips))
    assert len(files) == 2
    with EventLog(tmp_path / "road.db") as log:
        events = log.events()
    kept = [e for e in events if e.clip_path]
    assert len(events) == 6 and len(kept) == 2
    assert [e.event.pass_time_s for e in kept] == [10.0, 11.0]
    # The 10 s event: 8.0 .. 11.5 s, cut at the end of the file (11 s).
    e = kept[0]
    y, rate = read_wav(tmp_path / e.clip_path)
    assert rate == 8000 and len(y) == 3 * 8000
    assert np.max(np.abs(y - x[8 * 8000:11 * 8000])) <= 2.0 ** -14


# --------------------------------------------------------------------------
# Options and configuration


def test_command_line_overrides_the_file(tmp_path):
    from passby.config import load_config

    toml = tmp_path / "site.toml"
    toml.write_text('[station]\nid = "from-file"\nlog = "logs/road.db"\n'
                    '[audio]\nrate = 44100\nchannel = 2\ndevice = "USB"\n'
                    '[air]\ntemperature_file = "therm"\ntemperature_c = 9.0\n'
                    '[clips]\nkeep = true\n')
    cfg = load_config(toml)
    o = station_options(cfg, rate=48000, station_id="cli-id")
    assert (o.rate, o.channel, o.device, o.station_id) == (48000, 2, "USB", "cli-id")
    assert o.log_path == str(tmp_path / "logs" / "road.db")
    assert o.temperature_file == str(tmp_path / "therm") and o.settings.temperature_c == 9.0
    assert o.clips_dir == str(tmp_path / "logs" / "road-clips")
    o = station_options(cfg, temperature_c=3.5)
    assert o.temperature_file is None and o.settings.temperature_c == 3.5
    with pytest.raises(ConfigError) as exc:
        station_options(cfg, rate=1000)
    assert str(exc.value) == "--rate: must be an integer from 8000 to 192000"
    with pytest.raises(ConfigError) as exc:
        station_options(cfg, temperature_c=99.0)
    assert str(exc.value).startswith("--temperature: must lie between -60 and 60")
    with pytest.raises(ConfigError, match="no log given"):
        station_options(None)


def run_cli(argv, **kw):
    env = dict(os.environ, PYTHONPATH=str(REPO))
    env.pop("JOURNAL_STREAM", None)
    return subprocess.run([sys.executable, "-m", "passby", *argv], cwd=REPO, env=env,
                          capture_output=True, text=True, timeout=60, **kw)


def test_bad_config_exits_2_with_one_line(tmp_path):
    toml = tmp_path / "site.toml"
    toml.write_text("[audio]\nrate = 1000\n")
    p = run_cli(["station", "--config", str(toml), "--log", str(tmp_path / "x.db")])
    assert p.returncode == 2
    assert p.stderr.splitlines() == [
        f"passby: error: {toml}: [audio] rate: must be an integer from 8000 to 192000"]
    assert not (tmp_path / "x.db").exists()


# --------------------------------------------------------------------------
# The process: SIGTERM and kill -9 (subprocesses with the fake pipeline)


class Child:
    """``passby station`` in a subprocess, its stderr read line by line."""

    def __init__(self, argv, period_s=1.0):
        env = dict(os.environ, PYTHONPATH=str(REPO), FAKE_PERIOD_S=str(period_s))
        env.pop("JOURNAL_STREAM", None)
        self.proc = subprocess.Popen([sys.executable, str(FAKES), "station", *argv], cwd=REPO,
                                     env=env, stderr=subprocess.PIPE, stdout=subprocess.DEVNULL,
                                     text=True)
        self.lines = queue.Queue()
        self.all = []
        threading.Thread(target=self._read, daemon=True).start()

    def _read(self):
        for line in self.proc.stderr:
            self.lines.put(line.rstrip("\n"))
        self.lines.put(None)

    def wait_for(self, prefix, timeout=30.0):
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            try:
                line = self.lines.get(timeout=0.2)
            except queue.Empty:
                continue
            if line is None:
                break
            self.all.append(line)
            if line.startswith(prefix):
                return line
        raise AssertionError(f"no line starting {prefix!r}; got {self.all}")

    def finish(self, timeout=30.0):
        rc = self.proc.wait(timeout=timeout)
        while True:
            line = self.lines.get(timeout=timeout)
            if line is None:
                return rc
            self.all.append(line)


def test_sigterm_finishes_the_open_event_and_exits_0(tmp_path):
    wav = tmp_path / "long.wav"
    tone_wav(wav, 60.0)
    db = tmp_path / "road.db"
    child = Child(["--replay", str(wav), "--realtime", "--log", str(db),
                   "--station-id", "north-lane"])
    child.wait_for("event ")
    child.proc.send_signal(signal.SIGTERM)
    assert child.finish() == 0
    logged = [line for line in child.all if line.startswith("event ")]
    with EventLog(db) as log:
        events = log.events()
        runs = log.runs()
        assert log.integrity_check() == "ok"
    # Every event line was flushed into the log, the last one from finish().
    assert len(events) == len(logged) >= 2
    assert events[-1].event.reason == "end of stream"
    assert runs[-1].stop_reason == "stopped" and runs[-1].stop_utc is not None
    assert child.all[-1].startswith("station stopped (stopped)")


def test_kill_9_leaves_a_sound_log_that_the_next_run_appends_to(tmp_path):
    wav = tmp_path / "long.wav"
    tone_wav(wav, 60.0)
    db = tmp_path / "road.db"
    child = Child(["--replay", str(wav), "--realtime", "--log", str(db)], period_s=0.5)
    child.wait_for("event ")
    child.wait_for("event ")
    child.proc.kill()  # SIGKILL: no handler runs, nothing is flushed on the way out
    child.proc.wait(timeout=10)
    # An independent reader (the sqlite3 module itself) finds the file sound.
    conn = sqlite3.connect(db)
    assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    n_before = conn.execute("SELECT COUNT(*) FROM events").fetchone()[0]
    conn.close()
    assert n_before >= 2
    short = tmp_path / "short.wav"
    tone_wav(short, 3.0)
    again = Child(["--replay", str(short), "--log", str(db)], period_s=0.5)
    assert again.finish() == 0
    assert any("did not stop cleanly" in line for line in again.all)
    with EventLog(db) as log:
        events = log.events()
        runs = log.runs()
        assert log.integrity_check() == "ok"
    # 3 s at 0.5 s: events at 0.5 .. 2.5 s, plus the one finish() closes.
    assert len(events) == n_before + 6
    assert [r.stop_reason for r in runs] == ["unclean", "end of replay"]
    assert [e.run_id for e in events[-6:]] == [2] * 6


# --------------------------------------------------------------------------
# With the real pipeline


def _simulated_pass(path, speed_mps=20.0, closest_m=8.0, seconds=16.0, rate=16000):
    from passby import simulation as sim

    scene = sim.Scene(
        vehicles=(sim.Vehicle(speed_mps=speed_mps, closest_m=closest_m,
                              pass_time_s=seconds / 2,
                              tones=sim.harmonic_tones(180.0, (1.0, 0.6, 0.4))),),
        duration_s=seconds, sample_rate=rate, temperature_c=20.0, snr_db=30.0, seed=7)
    scene = sim.scale_to_peak(scene, 0.5)
    write_wav(path, sim.render(scene), rate)


def test_replay_through_the_station_equals_analyze(tmp_path):
    import passby

    wav = tmp_path / "sim.wav"
    _simulated_pass(wav)
    o = options(tmp_path, replay=str(wav), settings=AnalysisSettings(temperature_c=20.0))
    assert Station(o).run() == 0
    with EventLog(tmp_path / "road.db") as log:
        logged = [e.event for e in log.events()]
    offline = passby.analyze(str(wav), temperature_c=20.0).events
    assert len(logged) == len(offline) == 1
    # Same samples, same pipeline: the same numbers (the log stores floats).
    for a, b in zip(logged, offline):
        assert a.speed_mps == pytest.approx(b.speed_mps, rel=1e-12)
        assert a.pass_time_s == pytest.approx(b.pass_time_s, rel=1e-12)
    # Simulated truth: 20 m/s.
    assert logged[0].speed_mps == pytest.approx(20.0, abs=0.5)


def test_a_new_temperature_reaches_the_next_event(tmp_path):
    from passby.pipeline import Pipeline

    wav = tmp_path / "sim.wav"
    _simulated_pass(wav)
    x, rate = read_wav(wav)
    p = Pipeline(rate, AnalysisSettings(temperature_c=20.0))
    p.settings = p.settings.with_(temperature_c=0.0)  # what the station does
    events = p.push(x) + p.finish()
    assert len(events) == 1 and events[0].temperature_c == 0.0
    # ISO 9613-1: c = 343.2 * sqrt(T / 293.15 K) m/s -> 331.5 m/s at 0 C.
    assert events[0].speed_of_sound_mps == pytest.approx(343.2 * math.sqrt(273.15 / 293.15))


# --------------------------------------------------------------------------
# passby devices


class _FakeDefault:
    device = [1, 3]


def test_devices_lists_the_inputs(monkeypatch, capsys):
    from passby.cli import main

    fake = F.FakeSoundDevice([])
    listing = [
        {"name": "HDMI out", "max_input_channels": 0, "default_samplerate": 48000.0},
        {"name": "USB measurement mic", "max_input_channels": 1, "default_samplerate": 48000.0},
        {"name": "Line in", "max_input_channels": 2, "default_samplerate": 44100.0},
    ]
    fake.query_devices = lambda *a, **k: listing
    fake.default = _FakeDefault()
    monkeypatch.setitem(sys.modules, "sounddevice", fake)
    assert main(["devices"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert len(out) == 3  # header and the two inputs; the output-only device is left out
    assert out[1].split() == ["*", "1", "1", "48000", "USB", "measurement", "mic"]
    assert out[2].split() == ["2", "2", "44100", "Line", "in"]


def test_devices_without_portaudio_is_one_line_and_exit_2(monkeypatch, capsys):
    import builtins

    from passby.cli import main

    real_import = builtins.__import__

    def fake_import(name, *args, **kw):
        if name == "sounddevice":
            raise OSError("cannot load library 'libportaudio.so.2'")
        return real_import(name, *args, **kw)

    monkeypatch.delitem(sys.modules, "sounddevice", raising=False)
    monkeypatch.setattr(builtins, "__import__", fake_import)
    assert main(["devices"]) == 2
    assert capsys.readouterr().err.splitlines() == [
        "passby: error: audio input: the PortAudio library is missing: install it "
        "(sudo apt install libportaudio2)"]
