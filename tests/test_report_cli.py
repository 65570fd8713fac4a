"""``passby report``, ``passby calibrate`` and ``passby plot`` end to end."""

import csv
import io
import json
import math
import os
import re
import statistics

import numpy as np
import pytest

from passby.cli import main
from passby.events import PassEvent
from passby.store import EventLog, utc_iso
from passby.wavio import write_wav

T0 = 1967241600.0  # 2032-05-04T00:00:00Z, a made-up study day


def make_event(speed_mps, quality="good", **kw):
    base = dict(pass_time_s=10.0, speed_mps=speed_mps, speed_std_mps=0.2,
                tones_hz=(320.0, 640.0), closest_approach_m=8.0, closest_approach_std_m=0.3,
                speed_of_sound_mps=343.2, temperature_c=15.0, quality=quality,
                laf_max_db=80.0, level_calibrated=False)
    base.update(kw)
    return PassEvent(**base)


@pytest.fixture
def study_log(tmp_path):
    """60 vehicles at 52 +- 5 km/h between 07:00 and 10:00 UTC (none 08:xx), 3 rejected."""
    rng = np.random.default_rng(42)
    speeds_kmh = rng.normal(52.0, 5.0, 60)
    hours = np.concatenate([np.full(30, 7), np.full(30, 9)])
    minutes = rng.uniform(0, 59, 60)
    path = tmp_path / "road.db"
    with EventLog(path, create=True) as log:
        for v, h, m in sorted(zip(speeds_kmh, hours, minutes), key=lambda r: (r[1], r[2])):
            log.add(make_event(v / 3.6), utc_iso(T0 + h * 3600 + m * 60), "test-lane")
        for k in range(3):
            log.add(make_event(float("nan"), "rejected", reason="no fit"),
                    utc_iso(T0 + 7 * 3600 + 600 * k), "test-lane")
        log.add(make_event(20.0), utc_iso(T0 + 86400 * 3), "other-lane")
    return path, speeds_kmh


def run_cli(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_report_json_matches_numpy(study_log, capsys):
    path, v = study_log
    code, out, _ = run_cli(capsys, "report", path, "--station", "test-lane", "--limit", 50, "--json")
    assert code == 0
    d = json.loads(out)
    assert d["count"] == 60 and d["rejected_count"] == 3
    # numpy's default percentile ('linear', Hyndman & Fan type 7).
    p15, p50, p85 = np.percentile(v, [15, 50, 85])
    assert d["p15_kmh"] == pytest.approx(p15, abs=2e-3)
    assert d["p50_kmh"] == pytest.approx(p50, abs=2e-3)
    assert d["p85_kmh"] == pytest.approx(p85, abs=2e-3)
    assert d["mean_kmh"] == pytest.approx(statistics.fmean(v), abs=2e-3)
    assert d["std_kmh"] == pytest.approx(statistics.stdev(v), abs=2e-3)
    assert d["over_limit_share"] == pytest.approx(np.mean(v > 50.0), abs=1e-4)
    pace = d["pace_kmh"]
    assert pace["high"] - pace["low"] == pytest.approx(10.0)
    assert pace["count"] == np.count_nonzero((v >= pace["low"] - 1e-3) & (v < pace["high"] - 1e-3))
    assert d["pace_share"] == pytest.approx(pace["count"] / 60, abs=1e-4)
    # ITE sample size with E = 2 km/h.
    n = statistics.stdev(v) ** 2 * 1.96 ** 2 * (2 + 1.04 ** 2) / (2 * 2.0 ** 2)
    assert d["min_sample_size"] == math.ceil(n)
    assert [h["count"] for h in d["per_hour"]] == [30, 0, 30]
    assert [h["rejected"] for h in d["per_hour"]] == [3, 0, 0]
    assert d["per_hour"][1]["hour_utc"] == "2032-05-04T08:00:00.000Z"
    assert "enforcement" in d["notice"]


def test_report_mph_has_both_units(study_log, capsys):
    path, v = study_log
    code, out, _ = run_cli(capsys, "report", path, "--station", "test-lane", "--units", "mph", "--json")
    assert code == 0
    d = json.loads(out)
    # 1 mph = 1.609344 km/h (international mile).
    assert d["p85_mph"] == pytest.approx(d["p85_kmh"] / 1.609344, abs=2e-3)
    assert d["pace_mph"]["high"] - d["pace_mph"]["low"] == pytest.approx(10.0)
    assert d["pace_kmh"]["high"] - d["pace_kmh"]["low"] == pytest.approx(10.0)
    assert d["permitted_error_mph"] == pytest.approx(1.5)
    assert d["unit"] == "mph"


def test_report_text_and_small_sample_warning(study_log, capsys):
    path, v = study_log
    code, out, _ = run_cli(capsys, "report", path, "--station", "test-lane")
    assert code == 0
    assert f"{np.percentile(v, 85):.1f} km/h" in out
    assert "Vehicles per hour (UTC)" in out and "2032-05-04 08:00      0" in out
    assert "warning" not in out and "enforcement" in out
    # The first 30 vehicles only: below the rule of thumb of 50.
    code, out, _ = run_cli(capsys, "report", path, "--station", "test-lane",
                           "--until", "2032-05-04T08:00Z")
    assert code == 0 and "warning: sample too small: 30 vehicles, 50 needed" in out
    # Without --station the two stations of the log would be mixed.
    code, out, _ = run_cli(capsys, "report", path)
    assert code == 0 and "mixes 2 stations (other-lane, test-lane)" in out


def test_report_csv_is_one_row(study_log, capsys):
    path, _ = study_log
    code, out, _ = run_cli(capsys, "report", path, "--station", "test-lane", "--csv")
    assert code == 0
    rows = list(csv.DictReader(io.StringIO(out)))
    assert [r["count"] for r in rows] == ["30", "0", "30"]
    assert [r["rejected"] for r in rows] == ["3", "0", "0"]
    assert rows[0]["station"] == "test-lane" and rows[1]["hour_utc"] == "2032-05-04T08:00:00.000Z"


def test_report_limit_and_log_from_config(study_log, tmp_path, capsys):
    path, v = study_log
    cfg = tmp_path / "site.toml"
    cfg.write_text('[station]\nid = "test-lane"\nposted_limit_kmh = 55\nlog = "road.db"\n')
    code, out, _ = run_cli(capsys, "report", "--config", cfg, "--station", "test-lane", "--json")
    assert code == 0
    d = json.loads(out)
    assert d["posted_limit_kmh"] == pytest.approx(55.0)
    assert d["over_limit_count"] == int(np.count_nonzero(v > 55.0))


def test_report_tones(tmp_path, capsys):
    path = tmp_path / "line.db"
    with EventLog(path, create=True) as log:
        log.add(make_event(30.0, tones_hz=(311.0, 370.0), closest_approach_m=12.5,
                           laf_max_db=101.0, level_calibrated=True), "2032-05-04T07:00:00.000Z", "branch-line")
        log.add(make_event(28.0, tones_hz=(330.0,), closest_approach_m=25.0,
                           laf_max_db=90.0, level_calibrated=True), "2032-05-04T08:00:00.000Z", "branch-line")
    code, out, _ = run_cli(capsys, "report", path, "--tones", "--tone-band", "300:360",
                           "--level-band", "92:100", "--reference-distance", 25, "--json")
    assert code == 0
    rows = json.loads(out)["tones"]["events"]
    # ISO 9613-2 geometric divergence: 20 log10(12.5 / 25) = -6.02 dB.
    assert rows[0]["level_at_reference_db"] == pytest.approx(101.0 - 6.02, abs=0.01)
    assert rows[0]["tones_outside"] == [370.0] and rows[0]["level_outside"] is False
    assert rows[1]["level_at_reference_db"] == pytest.approx(90.0)
    assert rows[1]["level_outside"] is True and rows[1]["tones_outside"] == []
    code, out, _ = run_cli(capsys, "report", path, "--tones", "--tone-band", "300:360",
                           "--reference-distance", 25)
    assert code == 0
    assert "tone 370.0 outside 300-360 Hz" in out and "at 25 m dB" in out
    assert "IEC 61672-1" in out


def test_report_plot(study_log, tmp_path, capsys):
    pytest.importorskip("matplotlib")
    path, _ = study_log
    png = tmp_path / "study.png"
    code, out, _ = run_cli(capsys, "report", path, "--plot", png)
    assert code == 0 and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


@pytest.mark.parametrize("argv, text", [
    (["report", "missing.db"], "no such log"),
    (["report", "{log}", "--since", "yesterday"], "--since"),
    (["report", "{log}", "--level-band", "90:100"], "go with --tones"),
    (["report", "{log}", "--since", "2032-05-05", "--until", "2032-05-04"], "later than"),
    (["report"], "no log given"),
])
def test_report_user_errors_are_one_line(study_log, capsys, argv, text, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    path, _ = study_log
    code, out, err = run_cli(capsys, *[a.format(log=path) for a in argv])
    assert code == 2 and text in err
    assert err.startswith("passby: error: ") and err.count("\n") == 1


def calibrator_wav(path, fs=48000, gain=0.05, spl_db=94.0, seconds=4.0):
    # p_rms = 20 uPa * 10^(L/20) (ISO 1683 reference pressure).
    p_rms = 20e-6 * 10 ** (spl_db / 20)
    t = np.arange(int(seconds * fs)) / fs
    rng = np.random.default_rng(9)
    x = math.sqrt(2) * p_rms * gain * np.sin(2 * np.pi * 1000 * t) + 1e-4 * rng.standard_normal(t.size)
    write_wav(path, x, fs, "pcm24")
    return -20 * math.log10(gain * 20e-6)


def test_calibrate_writes_the_offset(tmp_path, capsys):
    import tomllib

    wav = tmp_path / "cal.wav"
    want = calibrator_wav(wav)
    cfg = tmp_path / "site.toml"
    cfg.write_text('[station]\nid = "test-lane"\n\n[level]\nmeasure = true\n')
    code, out, _ = run_cli(capsys, "calibrate", wav, "--reference-db", 94, "--config", cfg)
    assert code == 0
    assert "IEC 61672" in out and "indicative" in out
    offset = tomllib.loads(cfg.read_text())["level"]["offset_db"]
    assert offset == pytest.approx(want, abs=0.05)
    code, out, _ = run_cli(capsys, "calibrate", wav)
    assert code == 0 and f"{want:.1f}" in out and "not written" in out


def test_calibrate_rejects_a_recording_without_tone(tmp_path, capsys):
    wav = tmp_path / "noise.wav"
    write_wav(wav, 0.1 * np.random.default_rng(2).standard_normal(4 * 16000), 16000)
    code, _, err = run_cli(capsys, "calibrate", wav)
    assert code == 2 and "noise.wav" in err


@pytest.fixture
def passby_wav(tmp_path):
    from passby.simulation import Scene, Vehicle, harmonic_tones, render, scale_to_peak

    # A made-up car at 22 m/s passing 7 m from the microphone at t = 5 s.
    scene = scale_to_peak(Scene((Vehicle(22.0, 7.0, 5.0, harmonic_tones(180.0, [1.0, 0.6])),),
                                10.0, 16000, snr_db=20.0, seed=3), 0.5)
    path = tmp_path / "pass.wav"
    write_wav(path, render(scene), 16000)
    return path


def test_plot_wav(passby_wav, tmp_path, capsys):
    pytest.importorskip("matplotlib")
    png = tmp_path / "out.png"
    code, out, _ = run_cli(capsys, "plot", passby_wav, "--temperature", 20, "--out", png)
    assert code == 0 and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # The simulated vehicle: 22 m/s = 79.2 km/h, 7 m away, passing at 5 s
    # (loose bounds: this checks the command, the analysis has its own tests).
    m = re.search(r"pass-by at ([\d.]+) s: ([\d.]+) km/h, closest ([\d.]+) m", out)
    assert m, out
    t0, kmh, d = (float(g) for g in m.groups())
    assert t0 == pytest.approx(5.0, abs=0.1)
    assert kmh == pytest.approx(79.2, rel=0.02)
    assert d == pytest.approx(7.0, abs=0.5)


def test_plot_logged_event(passby_wav, tmp_path, capsys):
    pytest.importorskip("matplotlib")
    clips = tmp_path / "clips"
    clips.mkdir()
    os.replace(passby_wav, clips / "e1.wav")
    log_path = tmp_path / "road.db"
    with EventLog(log_path, create=True) as log:
        first = log.add(make_event(22.0, temperature_c=20.0), "2032-05-04T07:00:00.000Z",
                        "test-lane", clip_path="clips/e1.wav")
        second = log.add(make_event(22.0), "2032-05-04T07:01:00.000Z", "test-lane")
    png = tmp_path / "e1.png"
    code, out, _ = run_cli(capsys, "plot", "--log", log_path, "--event", first, "--out", png)
    assert code == 0 and png.exists()
    code, _, err = run_cli(capsys, "plot", "--log", log_path, "--event", second)
    assert code == 2 and "no audio clip" in err
    code, _, err = run_cli(capsys, "plot", "--log", log_path, "--event", 99)
    assert code == 2 and "no event 99" in err
