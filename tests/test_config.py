"""The station's TOML configuration and ``write_level_offset``."""

from __future__ import annotations

import os
import tomllib

import pytest

from passby.config import (StationConfig, load_config, settings_from_config,
                           write_level_offset)
from passby.errors import ConfigError

FULL = """\
# Example Road, km 3.2 -- an invented site
[station]
id = "north-lane"
site = "Example Road, km 3.2, northbound"
posted_limit_kmh = 50
log = "logs/road.db"

[audio]
device = "USB"
rate = 48000
channel = 2

[air]
temperature_file = "/sys/bus/w1/devices/28-00000a1b2c3d/temperature"
temperature_c = 11.5
humidity_pct = 72

[detection]
threshold_db = 14
min_track_s = 1.2
f_min_hz = 80
f_max_hz = 3000

[clips]
keep = true
dir = "clips"
quota_mb = 250

[level]
measure = true
offset_db = 127.25  # from passby calibrate
"""


def write(tmp_path, text, name="site.toml"):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_every_key_is_read(tmp_path):
    path = write(tmp_path, FULL)
    cfg = load_config(path)
    assert cfg == StationConfig(
        path=str(path), station_id="north-lane", site="Example Road, km 3.2, northbound",
        posted_limit_kmh=50.0, log=str(tmp_path / "logs" / "road.db"), device="USB",
        rate=48000, channel=2,
        temperature_c=11.5, temperature_file="/sys/bus/w1/devices/28-00000a1b2c3d/temperature",
        humidity_pct=72.0, threshold_db=14.0, min_track_s=1.2, f_min_hz=80.0, f_max_hz=3000.0,
        clips_keep=True, clips_dir=str(tmp_path / "clips"), clips_quota_mb=250.0,
        level_measure=True, level_offset_db=127.25)
    s = settings_from_config(cfg)
    assert (s.temperature_c, s.humidity_pct, s.threshold_db, s.min_track_s) == (11.5, 72.0, 14.0, 1.2)
    assert (s.f_min_hz, s.f_max_hz, s.level, s.level_offset_db) == (80.0, 3000.0, True, 127.25)
    # Command-line values override the file.
    assert settings_from_config(cfg, temperature_c=3.0, threshold_db=None).temperature_c == 3.0
    assert settings_from_config(cfg, temperature_c=3.0, threshold_db=None).threshold_db == 14.0


def test_an_empty_file_gives_the_defaults(tmp_path):
    cfg = load_config(write(tmp_path, "# nothing yet\n"))
    assert (cfg.channel, cfg.rate, cfg.device, cfg.clips_keep) == (1, None, None, False)
    assert settings_from_config(cfg).temperature_c == 20.0


@pytest.mark.parametrize("text, message", [
    ("[audio]\nrate = 1000\n", "[audio] rate: must be an integer from 8000 to 192000"),
    ("[audio]\nrate = 48000.0\n", "[audio] rate: must be an integer from 8000 to 192000"),
    ("[audio]\nchannel = 0\n", "[audio] channel: must be an integer from 1 to 64"),
    ("[audio]\ndevice = true\n",
     "[audio] device: must be a device index (integer) or part of a device name"),
    ("[audio]\nrat = 48000\n", "[audio] rat: unknown key (known: device, rate, channel)"),
    ("[microphone]\ngain = 3\n",
     "[microphone]: unknown table (known: station, audio, air, detection, clips, level)"),
    ("audio = 3\n", "[audio]: must be a table, not a value"),
    ("[station]\nid = \"north lane\"\n",
     "[station] id: must be 1 to 64 letters, digits, '.', '_' or '-' (starting with a "
     "letter or digit)"),
    ("[air]\ntemperature_c = 75\n",
     "[air] temperature_c: must lie between -60 and 60 degrees C"),
    ("[air]\ntemperature_c = \"warm\"\n", "[air] temperature_c: must be a number"),
    ("[air]\nhumidity_pct = 120\n", "[air] humidity_pct: must be a number from 0 to 100 %"),
    ("[air]\ntemperature_unit = \"F\"\n",
     "[air] temperature_unit: must be \"C\" (degrees) or \"mC\" (millidegrees)"),
    ("[detection]\nf_min_hz = 5000\nf_max_hz = 3000\n",
     "[detection] f_min_hz: must be at least 20 Hz and below f_max_hz"),
    ("[clips]\nkeep = \"yes\"\n", "[clips] keep: must be true or false"),
    ("[level]\noffset_db = -5\n", "[level] offset_db: must be a number from 0 to 250 dB"),
])
def test_bad_values_name_their_key(tmp_path, text, message):
    path = write(tmp_path, text)
    with pytest.raises(ConfigError) as exc:
        load_config(path)
    assert str(exc.value) == f"{path}: {message}"


def test_not_toml_and_missing_files(tmp_path):
    path = write(tmp_path, "[audio\nrate = 48000\n")
    with pytest.raises(ConfigError, match=r"not valid TOML: .*line 1"):
        load_config(path)
    with pytest.raises(ConfigError, match="cannot read"):
        load_config(tmp_path / "none.toml")


def test_bad_config_through_the_command_line_is_exit_2(tmp_path, capsys):
    from passby.cli import main

    path = write(tmp_path, "[audio]\nchannel = 0\n")
    assert main(["station", "--config", str(path), "--log", str(tmp_path / "x.db")]) == 2
    assert capsys.readouterr().err == \
        f"passby: error: {path}: [audio] channel: must be an integer from 1 to 64\n"


# --------------------------------------------------------------------------
# write_level_offset


def test_offset_replaces_only_its_line(tmp_path):
    path = write(tmp_path, FULL)
    write_level_offset(path, 126.4)
    text = path.read_text()
    assert text == FULL.replace("offset_db = 127.25  # from passby calibrate",
                                "offset_db = 126.40  # from passby calibrate")
    assert load_config(path).level_offset_db == 126.4


def test_offset_is_added_to_an_existing_level_table(tmp_path):
    path = write(tmp_path, "[level]\nmeasure = true\n\n[audio]\nrate = 44100\n")
    write_level_offset(path, 120)
    assert path.read_text() == "[level]\noffset_db = 120.00\nmeasure = true\n\n[audio]\nrate = 44100\n"


def test_offset_in_a_new_file_and_with_windows_line_ends(tmp_path):
    fresh = tmp_path / "new.toml"
    write_level_offset(fresh, 94.0)
    assert fresh.read_text() == "[level]\noffset_db = 94.00\n"
    crlf = tmp_path / "crlf.toml"
    crlf.write_bytes(b"[audio]\r\nrate = 48000")
    write_level_offset(crlf, 100.5)
    assert crlf.read_bytes() == b"[audio]\r\nrate = 48000\r\n\r\n[level]\r\noffset_db = 100.50\r\n"
    assert tomllib.loads(crlf.read_text())["level"]["offset_db"] == 100.5


def test_offset_leaves_a_broken_file_alone(tmp_path):
    path = write(tmp_path, "[audio\nrate = 48000\n")
    with pytest.raises(ConfigError, match="left unchanged"):
        write_level_offset(path, 100.0)
    assert path.read_text() == "[audio\nrate = 48000\n"
    with pytest.raises(ConfigError, match="offset_db"):
        write_level_offset(tmp_path / "x.toml", float("nan"))
    assert not (tmp_path / "x.toml").exists()


def test_offset_write_keeps_the_permissions_and_leaves_no_temporary(tmp_path):
    path = write(tmp_path, FULL)
    os.chmod(path, 0o640)
    write_level_offset(path, 130.0)
    assert os.stat(path).st_mode & 0o777 == 0o640
    assert os.listdir(tmp_path) == ["site.toml"]
