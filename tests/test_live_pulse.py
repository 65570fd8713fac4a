"""The live path end to end: PortAudio, a sound server, the station, the log.

A private PulseAudio server with a null sink stands in for the microphone:
a simulated pass-by is played into the sink with ``paplay`` and
``passby station`` records the sink's monitor as its default input (ALSA's
``pulse`` plugin, through PortAudio and sounddevice). The logged speed is
checked against the simulation's truth.

Needs the Debian packages libportaudio2, pulseaudio, pulseaudio-utils and
libasound2-plugins, and the sounddevice package; skipped, with the reason,
where any is missing. The server runs with a temporary HOME and
XDG_RUNTIME_DIR and is stopped by its own pid.
"""

from __future__ import annotations

import ctypes.util
import importlib.util
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from passby.settings import AnalysisSettings
from passby.store import EventLog
from passby.wavio import write_wav

REPO = Path(__file__).resolve().parents[1]


def _missing():
    for tool in ("pulseaudio", "pactl", "paplay"):
        if shutil.which(tool) is None:
            return f"{tool} not found (apt-get install pulseaudio pulseaudio-utils)"
    if ctypes.util.find_library("portaudio") is None:
        return "the PortAudio library is missing (apt-get install libportaudio2)"
    if importlib.util.find_spec("sounddevice") is None:
        return "the sounddevice package is not installed"
    if not any(Path(p).exists() for p in (
            "/usr/lib/x86_64-linux-gnu/alsa-lib/libasound_module_pcm_pulse.so",
            "/usr/lib/aarch64-linux-gnu/alsa-lib/libasound_module_pcm_pulse.so",
            "/usr/lib/arm-linux-gnueabihf/alsa-lib/libasound_module_pcm_pulse.so",
            "/usr/lib/alsa-lib/libasound_module_pcm_pulse.so")):
        return "ALSA's pulse plugin is missing (apt-get install libasound2-plugins)"
    from passby.pipeline import Pipeline

    try:
        Pipeline(8000, AnalysisSettings()).push(np.zeros(800))
    except NotImplementedError:
        return "passby.pipeline.Pipeline is not implemented yet"
    return None


pytestmark = pytest.mark.skipif(_missing() is not None, reason=str(_missing()))

RATE = 44100
SPEED_MPS = 22.0  # simulated truth (79.2 km/h)


class PulseServer:
    """A private PulseAudio server with a null sink 'road' (start, stop by pid)."""

    def __init__(self, tmp_path):
        runtime = tmp_path / "runtime"
        home = tmp_path / "home"
        runtime.mkdir(mode=0o700)
        home.mkdir()
        # ALSA's default device goes to the sound server (libasound2-plugins).
        (home / ".asoundrc").write_text(
            "pcm.!default { type pulse }\nctl.!default { type pulse }\n")
        self.env = dict(os.environ, HOME=str(home), XDG_RUNTIME_DIR=str(runtime),
                        PYTHONPATH=str(REPO))
        self.env.pop("PULSE_SERVER", None)
        self.env.pop("JOURNAL_STREAM", None)
        self.pid_file = runtime / "pulse" / "pid"
        self.pid = None

    def start(self):
        subprocess.run(["pulseaudio", "--daemonize=yes", "--exit-idle-time=-1", "-n",
                        "--load=module-null-sink sink_name=road",
                        "--load=module-native-protocol-unix"],
                       env=self.env, check=True, capture_output=True, timeout=30)
        for _ in range(100):
            if self.pid_file.exists() and self.pid_file.read_text().strip():
                break
            time.sleep(0.05)
        self.pid = int(self.pid_file.read_text().split()[0])
        subprocess.run(["pactl", "set-default-source", "road.monitor"], env=self.env,
                       check=True, capture_output=True, timeout=30)

    def stop(self):
        if self.pid is None:
            return
        try:
            os.kill(self.pid, signal.SIGTERM)
        except ProcessLookupError:
            pass
        for _ in range(200):
            try:
                os.kill(self.pid, 0)
            except ProcessLookupError:
                break
            time.sleep(0.05)
        self.pid = None


@pytest.fixture
def server(tmp_path):
    s = PulseServer(tmp_path)
    s.start()
    try:
        yield s
    finally:
        s.stop()


@pytest.fixture
def pulse(server):
    return server.env


def _simulated_pass(path):
    from passby import simulation as sim

    scene = sim.Scene(
        vehicles=(sim.Vehicle(speed_mps=SPEED_MPS, closest_m=7.5, pass_time_s=7.0,
                              tones=sim.harmonic_tones(160.0, (1.0, 0.7, 0.5))),),
        duration_s=14.0, sample_rate=RATE, temperature_c=20.0, snr_db=30.0, seed=11)
    scene = sim.scale_to_peak(scene, 0.5)
    write_wav(path, sim.render(scene), RATE)


def test_station_logs_a_pass_by_played_into_a_sound_server(pulse, tmp_path):
    wav = tmp_path / "pass.wav"
    _simulated_pass(wav)
    db = tmp_path / "road.db"
    station = subprocess.Popen(
        [sys.executable, "-m", "passby", "station", "--log", str(db), "--rate", str(RATE),
         "--temperature", "20", "--station-id", "sound-server"],
        cwd=REPO, env=pulse, stderr=subprocess.PIPE, text=True)
    lines = []
    try:
        # Wait until the input is open before playing.
        for line in station.stderr:
            lines.append(line.rstrip("\n"))
            if line.startswith("input: "):
                break
        else:
            pytest.fail(f"the station did not open its input: {lines}")
        subprocess.run(["paplay", "--device=road", str(wav)], env=pulse, check=True,
                       timeout=60)
        time.sleep(0.5)
    finally:
        station.send_signal(signal.SIGTERM)
        _, rest = station.communicate(timeout=60)
        lines += rest.splitlines()
    assert station.returncode == 0, lines
    with EventLog(db) as log:
        events = log.events()
        runs = log.runs()
    good = [e for e in events if e.event.quality != "rejected"]
    assert len(good) == 1, lines
    # Simulated truth: 22 m/s; a tone through the server, the ALSA plugin,
    # PortAudio and the station's queue keeps its frequencies.
    assert good[0].event.speed_mps == pytest.approx(SPEED_MPS, abs=0.5)
    assert good[0].station_id == "sound-server"
    assert runs[0].source == "live" and runs[0].sample_rate == RATE


def test_station_rides_out_the_sound_server_going_away(server, tmp_path):
    """The input vanishes (server stopped), the station retries, then records again."""
    import queue
    import threading

    db = tmp_path / "road.db"
    station = subprocess.Popen(
        [sys.executable, "-m", "passby", "station", "--log", str(db), "--rate", str(RATE),
         "--station-id", "sound-server"],
        cwd=REPO, env=server.env, stderr=subprocess.PIPE, text=True)
    lines, seen = queue.Queue(), []

    def read():
        for line in station.stderr:
            lines.put(line.rstrip("\n"))
        lines.put(None)

    threading.Thread(target=read, daemon=True).start()

    def wait_for(prefix, timeout=60.0):
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            try:
                line = lines.get(timeout=0.2)
            except queue.Empty:
                continue
            if line is None:
                break
            seen.append(line)
            if line.startswith(prefix):
                return line
        pytest.fail(f"no line starting {prefix!r}: {seen}")

    try:
        wait_for("input: ")
        server.stop()
        wait_for("warning: audio input lost")
        server.start()
        wait_for("audio input back after")
        wait_for("input: ")
    finally:
        station.send_signal(signal.SIGTERM)
        station.wait(timeout=60)
    assert station.returncode == 0, seen
    with EventLog(db) as log:
        kinds = [x.kind for x in log.losses()]
        runs = log.runs()
    assert kinds == ["device"]
    assert runs[0].stop_reason == "stopped"
