"""The benchmark script: its yardsticks against textbook results, and a quick run."""

import importlib.util
import math
import os
import pathlib
import re
import subprocess
import sys

import numpy as np
import pytest
import scipy.signal

from passby.simulation import Scene, render, speed_of_sound_iso

ROOT = pathlib.Path(__file__).resolve().parents[1]
BENCH = ROOT / "tools" / "bench.py"


@pytest.fixture(scope="module")
def bench():
    spec = importlib.util.spec_from_file_location("passby_bench", BENCH)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up there
    spec.loader.exec_module(module)
    return module


def test_oiml_tolerance(bench):
    # OIML R 91: +-1 km/h up to 100 km/h, +-1 % above (from memory).
    assert bench.oiml_tolerance_kmh(80.0) == 1.0
    assert bench.oiml_tolerance_kmh(100.0) == 1.0
    assert bench.oiml_tolerance_kmh(150.0) == pytest.approx(1.5)
    assert bench.oiml_tolerance_kmh(200.0, 3.0) == pytest.approx(6.0)


def test_fisher_of_a_steady_tone_matches_the_textbook_bound(bench):
    # Kay, Fundamentals of Statistical Signal Processing I (1993), Example
    # 3.14 (from memory): a real sinusoid A cos(2 pi f n + phi) in white
    # noise of variance s2, unknown (A, f, phi):
    # var(f) >= 12 / ((2 pi)^2 eta N (N^2 - 1)), eta = A^2 / (2 s2), f in cycles/sample.
    fs, n, amp, s2 = 8000.0, 16000, 0.3, 0.01
    t = np.arange(n) / fs
    n1 = 2.0 * s2 / fs  # one-sided PSD of white noise of variance s2 sampled at fs

    def model(theta, tt):
        f, a, phi = theta
        return np.full_like(tt, math.log(a)), 2.0 * np.pi * f * tt + phi

    fim = bench.fisher_baseband(model, (440.0, amp, 0.3), t, n1)
    var_hz2 = bench.crb_from_fim(fim)[0]
    eta = amp ** 2 / (2.0 * s2)
    kay = fs ** 2 * 12.0 / ((2.0 * np.pi) ** 2 * eta * n * (n * n - 1.0))
    assert var_hz2 == pytest.approx(kay, rel=2e-3)


def test_baseband_fisher_matches_the_sample_by_sample_definition(bench):
    # Kay (1993), ch. 3 (from memory): I = J^T J / sigma^2 over the real
    # samples of the signal in white Gaussian noise. The benchmark's reduced
    # form (fast phase averaged out, coarse grid) must give the same bound.
    fs, dur, c = 8000, 6.0, speed_of_sound_iso(10.0)
    theta = np.array([20.0, 6.0, 3.0, 700.0, 1.0, 0.4])  # v, d, t0, f0, a, phi
    n1 = 1e-6
    model = lambda th, tt: bench._tone_model(th, tt, c)[:2]  # noqa: E731
    t_coarse = np.arange(0.0, dur, 2e-3)
    crb_base = bench.crb_from_fim(bench.fisher_baseband(model, theta, t_coarse, n1))
    t = np.arange(int(dur * fs)) / fs
    jac = []
    for i in range(theta.size):
        h = 1e-6 * abs(theta[i])
        hi, lo = theta.copy(), theta.copy()
        hi[i] += h
        lo[i] -= h
        (la_p, ph_p), (la_m, ph_m) = model(hi, t), model(lo, t)
        jac.append((np.exp(la_p) * np.cos(ph_p) - np.exp(la_m) * np.cos(ph_m)) / (2 * h))
    jac = np.array(jac).T
    sigma2 = fs * n1 / 2.0
    crb_full = bench.crb_from_fim(jac.T @ jac / sigma2)
    assert crb_base[0] == pytest.approx(crb_full[0], rel=5e-3)  # speed
    assert crb_base[1] == pytest.approx(crb_full[1], rel=5e-3)  # distance


@pytest.mark.parametrize("kind", ["road", "pink", "white"])
def test_noise_psd_matches_welch_of_the_simulated_noise(bench, kind):
    # scipy.signal.welch as the reference estimate of the one-sided PSD.
    fs = 16000
    x = render(Scene((), 30.0, fs, noise=kind, snr_db=None, noise_level=0.5, seed=11))
    f, pxx = scipy.signal.welch(x, fs, nperseg=4096)
    for f0 in (300.0, 1000.0, 3000.0):
        band = (f > 0.9 * f0) & (f < 1.1 * f0)
        expected = np.mean([bench.noise_psd_one_sided(kind, 0.5, fs, fk) for fk in f[band]])
        assert np.mean(pxx[band]) == pytest.approx(expected, rel=0.06)


def test_naive_method_applies_the_two_plateau_formula(bench):
    # Ferguson & Quinn (1994), J. Acoust. Soc. Am. 96(2): v = c (fa - fr) / (fa + fr),
    # f0 = 2 fa fr / (fa + fr). Two steady tones on bin centres of the naive spectrogram.
    fs = 8000
    n = bench.naive_nperseg(fs)
    fa, fr = 128 * fs / n, 115 * fs / n
    t = np.arange(10 * fs) / fs
    x = np.where(t < 5.0, np.cos(2 * np.pi * fa * t), np.cos(2 * np.pi * fr * t))
    x = x + 1e-3 * np.random.default_rng(5).standard_normal(t.size)
    c = 343.2
    res = bench.naive_estimate(x, fs, (800.0, 1200.0), c)
    assert res.f_approach_hz == fa and res.f_recede_hz == fr
    assert res.speed_mps == pytest.approx(c * (fa - fr) / (fa + fr), rel=1e-12)
    assert res.f0_hz == pytest.approx(2 * fa * fr / (fa + fr), rel=1e-12)
    # A pure noise recording has no loud frames: no estimate.
    assert bench.naive_estimate(np.random.default_rng(6).standard_normal(8 * fs), fs, (800.0, 1200.0), c) is None


def test_crb_of_a_case_falls_as_the_snr_rises(bench):
    # Fisher information scales with the signal-to-noise ratio: +20 dB of SNR
    # divides the bound's standard deviation by 10 (Kay 1993, ch. 3; from memory).
    p = bench.case_params("main", 3, 1)
    lo = dict(p, snr_db=0.0)
    hi = dict(p, snr_db=20.0)
    assert bench.crb_speed_mps(lo) / bench.crb_speed_mps(hi) == pytest.approx(10.0, rel=1e-6)


def test_wander_floor_is_zero_without_wander_and_grows_with_it(bench):
    # Without wander the simulator's retarded-time pitch is the exact moving-source
    # model (Ferguson & Quinn 1994), so the fit recovers the speed; a 0.3 % wander over
    # a stretch of +-1 s about the pass moves it (the stretch is too short to average it).
    p = bench.case_params("hard", 7, 1)
    clean = dict(p, wander=0.0)
    t0 = p["pass_time_s"]
    assert bench.wander_floor_kmh(clean, bench.build_scene(clean), t0 - 1.0, t0 + 1.0, 1) < 1e-3
    assert bench.wander_floor_kmh(p, bench.build_scene(p), t0 - 1.0, t0 + 1.0, 1) > 0.01
    assert math.isnan(bench.wander_floor_kmh(p, bench.build_scene(p), t0, t0 + 0.05, 1))


def test_readme_markers(bench, tmp_path):
    readme = tmp_path / "README.md"
    readme.write_text("intro\n<!-- bench:begin -->\nold\n<!-- bench:end -->\noutro\n")
    assert bench.replace_readme("| a |\n| --- |\n| 1 |", str(readme))
    assert readme.read_text() == "intro\n<!-- bench:begin -->\n\n| a |\n| --- |\n| 1 |\n\n<!-- bench:end -->\noutro\n"
    plain = tmp_path / "plain.md"
    plain.write_text("no markers here\n")
    assert not bench.replace_readme("x", str(plain))
    assert plain.read_text() == "no markers here\n"


def _table_after(text, heading):
    """Rows (lists of cells) of the first table after a heading."""
    part = text.split(heading, 1)[1]
    rows = []
    for line in part.splitlines():
        if line.startswith("|"):
            cells = [c.strip() for c in line.strip("|").split(" | ")]
            if not set(line) <= set("|- "):
                rows.append(cells)
        elif rows:
            break
    return rows[0], rows[1:]


def _number(cell):
    m = re.match(r"^-?\d+(\.\d+)?(e[-+]?\d+)?( %)?$", cell)
    return float(cell.rstrip(" %")) if m else None


def test_quick_run_writes_the_tables(tmp_path):
    out = tmp_path / "bench.md"
    readme = ROOT / "README.md"
    before = readme.read_bytes() if readme.exists() else None
    env = dict(os.environ)
    done = subprocess.run([sys.executable, str(BENCH), "--quick", "--no-readme", "--jobs", "2", "--out", str(out)],
                          cwd=str(ROOT), env=env, capture_output=True, text=True, timeout=900)
    assert done.returncode == 0, done.stderr[-3000:]
    text = out.read_text()
    assert (readme.read_bytes() if readme.exists() else None) == before  # --no-readme
    assert "Machine:" in text and "Command: `python tools/bench.py --quick" in text

    head, rows = _table_after(text, "### Targets")
    assert head == ["target", "measured", "pass"]
    assert len(rows) == 8 and all(r[2] in ("PASS", "FAIL") for r in rows)

    head, rows = _table_after(text, "### Speed accuracy")
    named = {r[0]: r for r in rows}
    assert named["all (main grid)"][1] == "40" and named["hard"][1] == "12"
    for r in rows:
        if int(r[1]) > 0:
            assert all(_number(c) is not None or c == "-" for c in r[2:]), r
    medians = [_number(r[4]) for r in rows if _number(r[4]) is not None]
    assert medians and all(m >= 0 for m in medians)

    head, rows = _table_after(text, "### Closest distance and rest frequency")
    assert len(rows) == len(named)

    head, rows = _table_after(text, "### Detection and false events")
    assert [r[0] for r in rows] == list(named) + ["noise only"]
    assert rows[-1][1] == "4" and _number(rows[-1][2]) == pytest.approx(4 * 60 / 3600, abs=0.01)  # hours
    for r in rows[:-1]:
        assert int(r[3]) + int(r[4]) == int(r[1])  # detected + missed = vehicles

    head, rows = _table_after(text, "### Against the physical floor")
    assert any(_number(r[2]) is not None and _number(r[2]) > 0 for r in rows)

    head, rows = _table_after(text, "### Cost")
    assert [r[0] for r in rows] == ["8 kHz", "16 kHz", "44.1 kHz", "48 kHz"]
    for r in rows:
        assert _number(r[1]) == 60.0
        assert all(_number(c) is not None and _number(c) >= 0 for c in r[2:10]), r

    head, rows = _table_after(text, "### Growth with record length")
    assert [r[0] for r in rows] == ["1", "3"]
    assert all(_number(r[1]) > 0 for r in rows)


@pytest.mark.parametrize("index", [281, 337, 77, 186, 414])
def test_close_fast_hard_cases_are_found_by_the_matched_search(bench, index):
    # Close, fast passes of the hard subset (seed 1) that only the matched search finds:
    # the speed within the subset's target, +-3 km/h or 3 % (the OIML R 91 form, from memory).
    # In case 77 the likeliest maximum lies along the steady line near the approach pitch
    # (142.6 km/h for 198.7); in case 414 the chosen start, refined, moved 3.3 % from its
    # own start's speed and was once taken for its own rival; case 186's vote has 4 votes,
    # 1 of them by chance.
    from passby import analyze
    p = bench.case_params("hard", index, 1)
    x = render(bench.build_scene(p))
    x *= 0.5 / np.max(np.abs(x))
    events = analyze(x, sample_rate=p["fs"], temperature_c=p["temperature_c"]).events
    found = [e for e in events if e.quality != "rejected"]
    assert len(found) == 1 and found[0].method == "matched" and found[0].quality == "fair"
    v_kmh = 3.6 * p["speed_mps"]
    assert abs(3.6 * found[0].speed_mps - v_kmh) <= bench.oiml_tolerance_kmh(v_kmh, 3.0)


def test_close_fast_pass_beside_a_steady_line_gives_no_wrong_speed(bench):
    # Hard case 321 (seed 1): a harmonic source at 194 km/h, 3.7 m away, with a steady
    # 1090 Hz line near its approach pitch; a course drawn along the line once gave 130 km/h.
    # Any speed reported must be within +-3 km/h or 3 % (the OIML R 91 form, from memory)
    from passby import analyze
    p = bench.case_params("hard", 321, 1)
    x = render(bench.build_scene(p))
    x *= 0.5 / np.max(np.abs(x))
    events = analyze(x, sample_rate=p["fs"], temperature_c=p["temperature_c"]).events
    v_kmh = 3.6 * p["speed_mps"]
    assert all(abs(3.6 * e.speed_mps - v_kmh) <= bench.oiml_tolerance_kmh(v_kmh, 3.0)
               for e in events if e.quality != "rejected")


def test_hard_case_heard_only_at_its_pass_is_confirmed_by_following(bench):
    # Hard case 197 (seed 1): 52.5 km/h at 3.5 m, tracked for 0.4 s around its pass only,
    # so the first fit is rejected as too uncertain (+-16 km/h); following its course
    # finds the plateaus of its 925 Hz tone. Within +-3 km/h (the OIML R 91 form, from
    # memory), graded fair.
    from passby import analyze
    from passby.pipeline import UNHEARD_PLATEAUS
    p = bench.case_params("hard", 197, 1)
    x = render(bench.build_scene(p))
    x *= 0.5 / np.max(np.abs(x))
    events = analyze(x, sample_rate=p["fs"], temperature_c=p["temperature_c"]).events
    found = [e for e in events if e.quality != "rejected"]
    assert len(found) == 1 and found[0].quality == "fair" and found[0].reason == UNHEARD_PLATEAUS
    v_kmh = 3.6 * p["speed_mps"]
    assert abs(3.6 * found[0].speed_mps - v_kmh) <= bench.oiml_tolerance_kmh(v_kmh, 3.0)


def test_hard_case_whose_track_broke_in_its_fall_is_joined_across_the_break(bench):
    # Hard case 23 (seed 1): 172 km/h at 5 m. The tracker lost the 314 Hz tone in the
    # steepest part of its fall (364 -> 340 Hz, then 320 -> 278 Hz a frame later); the
    # later piece alone once fitted 96 km/h, graded good. Within +-3 % (the OIML R 91
    # form, from memory).
    from passby import analyze
    p = bench.case_params("hard", 23, 1)
    x = render(bench.build_scene(p))
    x *= 0.5 / np.max(np.abs(x))
    events = analyze(x, sample_rate=p["fs"], temperature_c=p["temperature_c"]).events
    found = [e for e in events if e.quality != "rejected"]
    v_kmh = 3.6 * p["speed_mps"]
    assert len(found) == 1
    assert abs(3.6 * found[0].speed_mps - v_kmh) <= bench.oiml_tolerance_kmh(v_kmh, 3.0)


def test_fan_spinning_down_gives_no_matched_event(bench):
    # Noise case 3 (seed 1, 60 s): steady lines and two fans, one switched off at 33.8 s.
    # Its spin-down left a brief falling track; a matched search from that track's fit
    # once ran to the largest distance it allows and gave a vehicle at 136 km/h. Noise
    # alone must give no event (the analysis target).
    from passby import analyze
    p = bench.case_params("noise", 3, 1)
    p["duration_s"] = 60.0
    x = render(bench.build_scene(p))
    x *= 0.5 / np.max(np.abs(x))
    assert analyze(x, sample_rate=p["fs"], temperature_c=p["temperature_c"]).events == ()
