"""``passby analyze`` on files: formats, output, and every kind of bad input."""

import json
import os
import struct
import subprocess
import sys

import numpy as np
import pytest

from passby.cli import main
from passby.simulation import Scene, Tone, Vehicle, render
from passby.wavio import write_wav

TRUE_KMH = 72.0


@pytest.fixture(scope="module")
def pass_audio():
    scene = Scene((Vehicle(TRUE_KMH / 3.6, 7.0, 8.0, (Tone(650.0),)),), 16.0, 16000,
                  temperature_c=15.0, snr_db=15.0, seed=21)
    x = render(scene)
    return x / np.max(np.abs(x)) * 0.8


def run_cli(*args):
    """Run the real console entry point in a subprocess (exit status, stdout, stderr)."""
    p = subprocess.run([sys.executable, "-m", "passby", *args], capture_output=True, text=True)
    return p.returncode, p.stdout, p.stderr


@pytest.mark.parametrize("encoding", ["pcm8", "pcm16", "pcm24", "pcm32", "float32", "float64"])
def test_every_encoding_gives_the_speed(tmp_path, pass_audio, encoding, capsys):
    path = tmp_path / f"pass_{encoding}.wav"
    write_wav(path, pass_audio, 16000, encoding)
    assert main(["analyze", str(path), "--temperature", "15", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    ev = doc["files"][0]["events"]
    assert len(ev) == 1
    tol = 1.0 if encoding != "pcm8" else 2.0   # 8-bit PCM: about 48 dB of dynamic range
    assert abs(ev[0]["speed_kmh"] - TRUE_KMH) <= tol


@pytest.mark.parametrize("rate", [8000, 44100, 48000])
def test_sample_rates(tmp_path, rate):
    scene = Scene((Vehicle(TRUE_KMH / 3.6, 7.0, 8.0, (Tone(650.0),)),), 16.0, rate, snr_db=15.0, seed=22)
    x = render(scene)
    path = tmp_path / f"r{rate}.wav"
    write_wav(path, x / np.max(np.abs(x)) * 0.8, rate, "pcm16")
    from passby import analyze
    ev = analyze(path).events
    assert len(ev) == 1 and abs(ev[0].speed_mps * 3.6 - TRUE_KMH) <= 1.0


def test_json_fields(tmp_path, pass_audio, capsys):
    path = tmp_path / "p.wav"
    write_wav(path, pass_audio, 16000)
    assert main(["analyze", str(path), "--temperature", "15", "--json", "--units", "mph"]) == 0
    doc = json.loads(capsys.readouterr().out)
    f = doc["files"][0]
    assert f["path"] == str(path) and f["sample_rate_hz"] == 16000
    assert f["duration_s"] == pytest.approx(16.0)
    ev = f["events"][0]
    for key in ("pass_time_s", "speed_mps", "speed_kmh", "speed_std_mps", "emitted_hz",
                "closest_approach_m", "speed_of_sound_mps", "quality", "speed_mph"):
        assert key in ev
    # 1 mile = 1609.344 m (international yard and pound agreement, 1959)
    assert ev["speed_mph"] == pytest.approx(ev["speed_mps"] * 3600 / 1609.344)
    # ISO 9613-1 at 15 C
    assert ev["speed_of_sound_mps"] == pytest.approx(343.2 * np.sqrt(288.15 / 293.15))
    assert ev["quality"] in ("good", "fair")


def test_table_output_names_the_temperature(tmp_path, pass_audio):
    path = tmp_path / "p.wav"
    write_wav(path, pass_audio, 16000)
    code, out, err = run_cli("analyze", str(path), "--temperature", "15")
    assert code == 0, err
    assert "340.3 m/s (15 C)" in out and "km/h" in out
    assert "good" in out or "fair" in out


def test_folder_and_batch_going_on_past_a_bad_file(tmp_path, pass_audio):
    write_wav(tmp_path / "a.wav", pass_audio, 16000)
    (tmp_path / "b.wav").write_bytes(b"not audio at all")
    write_wav(tmp_path / "c.wav", pass_audio, 16000)
    code, out, err = run_cli("analyze", str(tmp_path), "--temperature", "15", "--json")
    assert code == 2
    doc = json.loads(out)
    assert [os.path.basename(f["path"]) for f in doc["files"]] == ["a.wav", "b.wav", "c.wav"]
    assert "error" in doc["files"][1] and len(doc["files"][2]["events"]) == 1
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("passby: error: ") and "b.wav" in lines[0]


def _header(fmt_tag=1, channels=1, rate=16000, bits=16, data_bytes=0):
    block = channels * bits // 8
    fmt = struct.pack("<HHIIHH", fmt_tag, channels, rate, rate * block, block, bits)
    return (b"RIFF" + struct.pack("<I", 36 + data_bytes) + b"WAVE" + b"fmt " + struct.pack("<I", 16)
            + fmt + b"data" + struct.pack("<I", data_bytes))


@pytest.mark.parametrize("content, words", [
    (b"", "WAV"),
    (os.urandom(4000), "WAV"),
    (_header(), "no audio samples"),
    (_header(rate=0, data_bytes=4) + b"\0" * 4, "sample rate"),
    (_header(fmt_tag=2, bits=4, data_bytes=8) + b"\0" * 8, "unsupported encoding"),
    (_header(fmt_tag=3, bits=32, data_bytes=8) + struct.pack("<ff", 0.0, float("nan")), "NaN"),
    (_header(fmt_tag=3, bits=32, data_bytes=8) + struct.pack("<ff", float("inf"), 0.0), "non-finite"),
])
def test_bad_input_is_one_line_and_exit_2(tmp_path, content, words):
    path = tmp_path / "bad.wav"
    path.write_bytes(content)
    code, out, err = run_cli("analyze", str(path))
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith(f"passby: error: {path}: ") and words.lower() in lines[0].lower()
    assert "Traceback" not in err


def test_missing_file_and_bad_option(tmp_path):
    code, _, err = run_cli("analyze", str(tmp_path / "nothing.wav"))
    assert code == 2 and err.startswith("passby: error: ") and "Traceback" not in err
    code, _, err = run_cli("analyze", str(tmp_path), "--temperature", "900")
    assert code == 2 and "temperature" in err and "Traceback" not in err
    code, _, err = run_cli("analyze", "--units", "furlongs", "x.wav")
    assert code == 2 and "Traceback" not in err


def test_file_cut_short_is_analysed_as_far_as_it_goes(tmp_path, pass_audio):
    path = tmp_path / "cut.wav"
    write_wav(path, pass_audio, 16000)
    data = path.read_bytes()
    path.write_bytes(data[: 44 + 2 * 12 * 16000])      # the recorder lost power at 12 s
    code, out, err = run_cli("analyze", str(path), "--temperature", "15", "--json")
    assert code == 0
    assert err.count("\n") == 1 and err.startswith("passby: warning: ") and "cut short" in err
    f = json.loads(out)["files"][0]
    assert f["duration_s"] == pytest.approx(12.0)
    assert len(f["events"]) == 1 and abs(f["events"][0]["speed_kmh"] - TRUE_KMH) <= 1.0


def test_channel_option_counts_from_one(tmp_path, pass_audio):
    stereo = np.column_stack([np.zeros_like(pass_audio), pass_audio])
    path = tmp_path / "st.wav"
    write_wav(path, stereo, 16000)
    code, out, _ = run_cli("analyze", str(path), "--channel", "2", "--temperature", "15", "--json")
    assert code == 0 and len(json.loads(out)["files"][0]["events"]) == 1
    code, _, err = run_cli("analyze", str(path), "--channel", "3")
    assert code == 2 and "channel" in err
