"""Figures render off-screen to PNGs of the asked size that are not blank."""

import struct
import sys

import numpy as np
import pytest

from passby.errors import PassbyError
from passby.events import PassEvent
from passby.physics import received_frequency
from passby.study import speed_study
from passby.units import from_unit

pytest.importorskip("matplotlib")

from passby.plots import passby_figure, study_figure  # noqa: E402


def png_size(path):
    # PNG specification (ISO/IEC 15948), 11.2.2: the IHDR chunk follows the
    # 8-byte signature; width and height are big-endian 32-bit integers.
    with open(path, "rb") as f:
        head = f.read(24)
    assert head[:8] == b"\x89PNG\r\n\x1a\n" and head[12:16] == b"IHDR"
    return struct.unpack(">II", head[16:24])


def assert_not_blank(path):
    from matplotlib.image import imread

    img = imread(path)[..., :3]
    colours = np.unique((img * 255).astype(np.uint8).reshape(-1, 3), axis=0)
    assert len(colours) > 50          # more than a few flat fills
    assert np.mean(img < 0.9) > 0.05  # a good part of it is drawn on


def study_sample():
    rng = np.random.default_rng(21)
    v = from_unit(rng.normal(52.0, 6.0, 150).clip(20), "kmh")
    hours = [f"2031-05-04T{7 + (i * 6) // 150:02d}:{(i * 7) % 60:02d}:00Z" for i in range(150)]
    study = speed_study(v, posted_limit_mps=from_unit(50.0, "kmh"), times_utc=hours,
                        rejected_count=4, rejected_times_utc=["2031-05-04T09:30:00Z"] * 4)
    return study, v


def test_study_figure(tmp_path):
    study, v = study_sample()
    out = study_figure(study, v, tmp_path / "study.png", width_px=1000, height_px=700)
    assert png_size(out) == (1000, 700)
    assert_not_blank(out)


def test_study_figure_without_times_or_speeds(tmp_path):
    out = study_figure(speed_study([]), [], tmp_path / "empty.png")
    assert png_size(out) == (1200, 800)


def chirp(fs=16000, seconds=10.0, f0=400.0, v=25.0, d=8.0, t0=5.0, c=343.2):
    t = np.arange(int(seconds * fs)) / fs
    f = received_frequency(t, f0, v, d, t0, c)
    rng = np.random.default_rng(4)
    x = 0.3 * np.sin(2 * np.pi * np.cumsum(f) / fs) + 0.01 * rng.standard_normal(t.size)
    return x, t, f


def test_passby_figure(tmp_path):
    fs = 16000
    x, t, f = chirp(fs)
    e = PassEvent(pass_time_s=5.0, speed_mps=25.0, speed_std_mps=0.3, tones_hz=(400.0,),
                  closest_approach_m=8.0, closest_approach_std_m=0.4,
                  speed_of_sound_mps=343.2, temperature_c=20.0, quality="good",
                  start_s=1.0, end_s=9.0)
    tracks = [(t[::1600], f[::1600] + 1.0)]
    out = passby_figure(x, fs, [e], tmp_path / "pass.png", tracks=tracks, width_px=900,
                        height_px=600)
    assert png_size(out) == (900, 600)
    assert_not_blank(out)


def test_passby_figure_without_events(tmp_path):
    x, _, _ = chirp(8000, seconds=2.0)
    out = passby_figure(x, 8000, [], tmp_path / "none.png")
    assert png_size(out) == (1200, 700)


def test_missing_matplotlib_says_how_to_install(tmp_path, monkeypatch):
    for name in [m for m in sys.modules if m == "matplotlib" or m.startswith("matplotlib.")]:
        monkeypatch.delitem(sys.modules, name)
    monkeypatch.setitem(sys.modules, "matplotlib", None)
    study, v = study_sample()
    with pytest.raises(PassbyError, match=r"pip install 'passby\[plots\]'"):
        study_figure(study, v, tmp_path / "x.png")


def test_unwritable_path_is_a_user_error(tmp_path):
    study, v = study_sample()
    with pytest.raises(PassbyError):
        study_figure(study, v, tmp_path / "missing-dir" / "x.png")
