"""The main job end to end: simulated pass-bys with known truth.

The simulator (passby.simulation) synthesises pressure from the retarded
time solved numerically, independently of the analysis model. The accuracy
figures checked here are those of type-approved traffic radar, OIML R 91:
+-1 km/h up to 100 km/h and +-1 % above (from memory of the
recommendation's usual figures).
"""

import math

import numpy as np
import pytest

from passby import analyze
from passby import pipeline
from passby.pipeline import Pipeline
from passby.settings import AnalysisSettings
from passby.simulation import Interferer, Scene, Tone, Vehicle, harmonic_tones, render


def oiml_tolerance_kmh(v_kmh):
    # OIML R 91 maximum permissible error (from memory): 1 km/h to 100 km/h, 1 % above
    return max(1.0, 0.01 * v_kmh)


def normalised(x, peak=0.8):
    return x / np.max(np.abs(x)) * peak


def run(scene, **kw):
    x = normalised(render(scene))
    return analyze(x, sample_rate=scene.sample_rate, temperature_c=scene.temperature_c, **kw)


def accepted(result):
    return [e for e in result.events if e.quality != "rejected"]


def stable_grid(n=24, seed=20261201):
    """A seeded grid of stable tones within the documented operating envelope.

    Speeds 10-200 km/h, closest distances 2-50 m, tones 150-3000 Hz, SNR
    0-30 dB, temperatures -20..40 C, rates 8-48 kHz; pure tones, engine
    harmonics and horn chords. Envelope (README, limits): the pass takes at
    least 0.08 s (d / v), and slow distant passes whose pitch changes by less
    than a bin over the record are outside it.
    """
    rng = np.random.default_rng(seed)
    cases = []
    while len(cases) < n:
        v = rng.uniform(10, 200) / 3.6
        d = float(np.exp(rng.uniform(np.log(2), np.log(50))))
        if d / v < 0.08 or (v < 15 / 3.6 and d > 20):
            continue
        f = float(np.exp(rng.uniform(np.log(150), np.log(3000))))
        kind = len(cases) % 3
        if kind == 0:
            tones = (Tone(f),)
        elif kind == 1:
            tones = harmonic_tones(max(f / 4, 40.0), [0.3, 1.0, 0.5, 0.3])
        else:
            base = max(f / 1.78, 150.0)
            tones = tuple(Tone(base * r) for r in (1.0, 1.19, 1.5, 1.78)[: 3 + len(cases) % 2])
        fs = int(rng.choice([8000, 16000, 22050, 44100, 48000]))
        scene = Scene((Vehicle(v, d, 10.0, tones),), 20.0, fs,
                      temperature_c=float(rng.uniform(-20, 40)),
                      snr_db=float(rng.uniform(0, 30)), seed=int(rng.integers(1 << 30)))
        cases.append(scene)
    return cases


@pytest.fixture(scope="module")
def grid_results():
    out = []
    for scene in stable_grid():
        r = run(scene)
        out.append((scene, r))
    return out


def test_stable_grid_speeds_within_radar_tolerance(grid_results):
    errors = []
    for scene, r in grid_results:
        veh = scene.vehicles[0]
        ev = accepted(r)
        assert len(ev) == 1, (scene, r.events)
        err = (ev[0].speed_mps - veh.speed_mps) * 3.6
        errors.append(abs(err))
        assert abs(err) <= oiml_tolerance_kmh(veh.speed_mps * 3.6), (scene, ev[0])
    # median speed error at most 0.3 km/h on the grid
    assert np.median(errors) <= 0.3


def test_stable_grid_distance_and_rest_frequency(grid_results):
    for scene, r in grid_results:
        veh = scene.vehicles[0]
        ev = accepted(r)[0]
        assert abs(ev.closest_approach_m - veh.closest_m) <= 0.10 * veh.closest_m, (scene, ev)
        true = [t.freq_hz for t in veh.tones]
        for f in ev.tones_hz:
            assert min(abs(f - x) / x for x in true) <= 1e-3, (scene, ev)
        assert abs(ev.pass_time_s - veh.pass_time_s) < 0.05


def test_uncertainty_is_honest_on_the_grid(grid_results):
    # the standard uncertainty (k = 1) covers the error at k = 3 for nearly all cases
    z = [abs(accepted(r)[0].speed_mps - s.vehicles[0].speed_mps) / accepted(r)[0].speed_std_mps
         for s, r in grid_results]
    assert np.mean(np.array(z) <= 3.0) >= 0.9


def test_speed_of_sound_used_is_reported():
    scene = Scene((Vehicle(15.0, 6.0, 10.0, (Tone(600.0),)),), 20.0, 16000, temperature_c=-10.0, seed=3)
    ev = run(scene).events[0]
    # ISO 9613-1: c = 343.2 sqrt(T / 293.15 K)
    assert ev.speed_of_sound_mps == pytest.approx(343.2 * math.sqrt(263.15 / 293.15))
    assert ev.temperature_c == -10.0


def test_wrong_temperature_biases_speed_as_expected():
    # v = c (fa - fr)/(fa + fr) is proportional to c: analysing at 0 C a pass recorded at
    # 30 C scales the speed by c(0)/c(30) (ISO 9613-1 ideal-gas form)
    scene = Scene((Vehicle(25.0, 8.0, 10.0, (Tone(700.0),)),), 20.0, 16000, temperature_c=30.0, seed=4)
    x = normalised(render(scene))
    hot = analyze(x, sample_rate=16000, temperature_c=30.0).events[0]
    cold = analyze(x, sample_rate=16000, temperature_c=0.0).events[0]
    ratio = math.sqrt(273.15 / 303.15)
    assert cold.speed_mps / hot.speed_mps == pytest.approx(ratio, rel=2e-3)


def test_two_vehicles_in_one_file():
    cars = (Vehicle(50 / 3.6, 6.0, 8.0, harmonic_tones(55.0, [0.3, 1.0, 0.6])),
            Vehicle(90 / 3.6, 10.0, 11.0, (Tone(900.0),)))
    scene = Scene(cars, 22.0, 16000, temperature_c=12.0, snr_db=15.0, seed=11)
    ev = accepted(run(scene))
    assert len(ev) == 2
    for e, car in zip(ev, cars):
        assert abs(e.speed_mps - car.speed_mps) * 3.6 <= 1.0
        assert abs(e.pass_time_s - car.pass_time_s) < 0.1


def test_horn_chord_is_one_source_with_every_tone():
    chord = (Tone(311.0, 1.0), Tone(370.0, 0.9), Tone(440.0, 0.8), Tone(523.0, 0.7), Tone(622.0, 0.6))
    scene = Scene((Vehicle(100 / 3.6, 15.0, 10.0, chord),), 20.0, 22050, temperature_c=8.0,
                  snr_db=10.0, ground_reflection=0.7, seed=5)
    ev = accepted(run(scene))
    assert len(ev) == 1
    assert abs(ev[0].speed_mps * 3.6 - 100.0) <= 1.0
    found = sorted(ev[0].tones_hz)
    for t in chord:
        assert min(abs(f - t.freq_hz) / t.freq_hz for f in found) < 1e-3


def test_weak_fundamental_harmonic_source():
    tones = harmonic_tones(45.0, [0.05, 1.0, 0.4, 0.7, 0.3])   # fundamental 26 dB below the 2nd
    scene = Scene((Vehicle(60 / 3.6, 7.0, 10.0, tones),), 20.0, 16000, snr_db=12.0, seed=6)
    ev = accepted(run(scene))
    assert len(ev) == 1
    assert abs(ev[0].speed_mps * 3.6 - 60.0) <= 1.0


@pytest.mark.parametrize("seed", [1, 2])
def test_hard_conditions(seed):
    # SNR -5 dB, ground reflection, a steady interferer 8 % above the tone
    scene = Scene((Vehicle(70 / 3.6, 9.0, 10.0, (Tone(800.0),)),), 20.0, 16000, snr_db=-5.0,
                  ground_reflection=0.7, interferers=(Interferer(864.0, 0.02),), seed=seed)
    ev = accepted(run(scene))
    assert len(ev) == 1
    assert abs(ev[0].speed_mps * 3.6 - 70.0) <= 3.0


@pytest.mark.parametrize("seed", [3, 4])
def test_following_hears_a_faint_pass_longer(seed, monkeypatch):
    # SNR -5 dB at 9 m: the 12 dB tracks cover a few seconds around the pass;
    # following the fitted course in narrow-band spectra reaches well into
    # the plateaus, and the speed stays within +-3 km/h of the simulated truth.
    scene = Scene((Vehicle(60 / 3.6, 9.0, 15.0, harmonic_tones(110.0, [0.3, 1.0, 0.7, 0.5])),), 30.0,
                  16000, snr_db=-5.0, ground_reflection=0.7, seed=seed)
    followed = accepted(run(scene))
    monkeypatch.setattr(pipeline, "FOLLOW_ROUNDS", 0)
    plain = accepted(run(scene))
    assert len(followed) == len(plain) == 1
    span = lambda e: e.end_s - e.start_s
    assert span(followed[0]) >= 1.5 * span(plain[0])
    assert followed[0].n_frames > plain[0].n_frames
    assert abs(followed[0].speed_mps * 3.6 - 60.0) <= 3.0


CHORD_205 = tuple(Tone(205.0 * r) for r in (1.0, 1.19, 1.5, 1.59, 2.0))


@pytest.mark.parametrize("kmh, d, tones, snr, refl, seed", [
    (158.0, 3.5, (Tone(342.0),), 3.0, 0.5, 11),
    (158.0, 3.5, (Tone(342.0),), 3.0, 0.5, 14),
    (170.0, 2.0, CHORD_205, 20.0, 0.7, 12),
    (170.0, 2.0, CHORD_205, 20.0, 0.7, 16),
])
def test_close_fast_pass_tones_paired_across_the_pass(kmh, d, tones, snr, refl, seed):
    # d / v of 0.04-0.08 s: each tone falls by a fifth to a quarter within about 0.1 s,
    # faster than the tracker follows, so the pieces before and after the pass are
    # separate tracks (or another tone's piece carries one on: the chord's tones lie
    # close to each other's Doppler-shifted pitches); paired by their common ratio they
    # give the speed within the OIML R 91 tolerance (from memory). Without the pairing
    # these cases gave 64 and 112 km/h for the tone and 29-64 km/h for the chord.
    scene = Scene((Vehicle(kmh / 3.6, d, 9.0, tones, source_height_m=0.5),), 18.0, 16000,
                  snr_db=snr, ground_reflection=refl, seed=seed)
    ev = accepted(run(scene))
    assert len(ev) == 1
    assert abs(ev[0].speed_mps * 3.6 - kmh) <= oiml_tolerance_kmh(kmh)


@pytest.mark.parametrize("seed", [1, 5, 6])
def test_close_fast_pass_in_noise_found_from_its_brief_sweep(seed):
    # 160 km/h at 4 m (d/v 0.09 s), SNR -5 dB: every tone stands above the tracking
    # threshold for about 0.2 s, too briefly for a track; the steep fragment is a
    # candidate, followed along its fitted course into both plateaus and confirmed there.
    # Graded fair at best; the speed within +-3 km/h or 3 % (in-service tolerance of
    # traffic radar, common practice, no source).
    scene = Scene((Vehicle(160 / 3.6, 4.0, 10.0, harmonic_tones(390.0, [0.3, 1.0, 0.7, 0.6, 0.5]),
                           source_height_m=0.5),), 20.0, 16000, snr_db=-5.0, ground_reflection=0.7,
                  seed=seed)
    ev = accepted(run(scene))
    assert len(ev) == 1
    assert ev[0].quality == "fair"
    assert abs(ev[0].speed_mps * 3.6 - 160.0) <= max(3.0, 0.03 * 160.0)


@pytest.mark.parametrize("seed", [5, 8, 13])
def test_close_fast_pass_heard_in_scraps_found_by_its_course_vote(seed, monkeypatch):
    # 180 km/h at 3 m (d/v 0.06 s), SNR -5 dB, 0.3 % pitch wander, a ground reflection,
    # weak fundamental: the tones stand above the threshold for a few frames at a time,
    # no track and no brief sweep forms. The scattered peaks vote for a pass course
    # (fitting.sweep_search); the candidate is followed and confirmed like a brief
    # sweep's. Speed within +-3 km/h or 3 % (in-service tolerance of traffic radar,
    # common practice, no source); graded fair at best. At these conditions only some
    # passes are found this way (the benchmark's hard subset measures how many); the
    # seeds are ones it finds, and without the vote none of them is found.
    scene = Scene((Vehicle(180 / 3.6, 3.0, 10.0, harmonic_tones(400.0, [0.3, 1.0, 0.7, 0.6, 0.5]),
                           source_height_m=0.5, wander_rms=0.003),), 20.0, 16000, snr_db=-5.0,
                  ground_reflection=0.7, noise="road", seed=seed)
    ev = accepted(run(scene))
    assert len(ev) == 1
    assert ev[0].quality == "fair"
    assert abs(ev[0].speed_mps * 3.6 - 180.0) <= max(3.0, 0.03 * 180.0)
    monkeypatch.setattr(pipeline, "SWEEP_MIN_POINTS", 10**9)
    assert accepted(run(scene)) == []


def test_brief_chirps_that_are_no_pass_give_no_event():
    # Down-chirps of two harmonics (10 % fall in 0.2 s, as steep as a close fast pass;
    # a bird or a squeal) with nothing before or after them: following finds no plateau.
    fs, rng = 16000, np.random.default_rng(8)
    x = rng.normal(0.0, 0.05, 20 * fs)
    t = np.arange(int(0.2 * fs)) / fs
    for start in (4.0, 9.5, 15.0):
        f = 1200.0 * (1.0 - 0.5 * t)          # 1200 -> 1080 Hz in 0.2 s
        phase = 2 * np.pi * np.cumsum(f) / fs
        i = int(start * fs)
        x[i:i + t.size] += 0.3 * np.sin(phase) + 0.2 * np.sin(2 * phase)
    r = analyze(x, sample_rate=fs, temperature_c=20.0)
    assert accepted(r) == []


def test_pitch_wander_uncertainty_covers_the_error():
    # 0.3 % slow pitch wander limits the accuracy; the stated uncertainty must say so
    for seed in (1, 2, 3):
        veh = Vehicle(60 / 3.6, 8.0, 10.0, harmonic_tones(50.0, [0.3, 1.0, 0.6, 0.4]), wander_rms=0.003)
        ev = accepted(run(Scene((veh,), 20.0, 16000, snr_db=15.0, seed=seed)))
        assert len(ev) == 1
        assert abs(ev[0].speed_mps - veh.speed_mps) <= 4.0 * ev[0].speed_std_mps + 0.1


def test_recording_starting_after_the_approach():
    # the file begins 2 s before the pass: an estimate from the part present
    scene = Scene((Vehicle(80 / 3.6, 8.0, 2.0, (Tone(700.0),)),), 12.0, 16000, snr_db=15.0, seed=7)
    ev = accepted(run(scene))
    assert len(ev) == 1
    e = ev[0]
    assert abs(e.speed_mps - scene.vehicles[0].speed_mps) <= max(3.0 * e.speed_std_mps, 0.3)


def test_recording_of_the_recession_only_gives_no_speed():
    scene = Scene((Vehicle(80 / 3.6, 8.0, -3.0, (Tone(700.0),)),), 12.0, 16000, snr_db=15.0, seed=8)
    assert accepted(run(scene)) == []


@pytest.mark.parametrize("make", [
    lambda fs: np.zeros(fs * 12),                                              # silence
    lambda fs: 0.5 * np.sin(2 * np.pi * 440.0 * np.arange(fs * 12) / fs),      # steady tone
    lambda fs: np.clip(2.0 * np.sin(2 * np.pi * 300.0 * np.arange(fs * 12) / fs), -1, 1),  # clipped
    lambda fs: np.zeros(fs // 10),                                             # too short
])
def test_no_pass_by_is_no_event(make):
    r = analyze(make(16000), sample_rate=16000)
    assert r.events == ()


def test_noise_and_interferers_give_no_event():
    scene = Scene((), 60.0, 16000, snr_db=None, noise_level=0.05, seed=9,
                  interferers=(Interferer(100.0, 0.05), Interferer(180.0, 0.1, on_s=10.0, off_s=40.0, kind="fan"),
                               Interferer(1200.0, 0.02, on_s=20.0, off_s=50.0, kind="fan")))
    assert run(scene).events == ()


def test_block_size_does_not_change_the_numbers():
    # the station feeds microphone blocks of its own size: same audio, same numbers
    scene = Scene((Vehicle(70 / 3.6, 6.0, 8.0, harmonic_tones(60.0, [0.4, 1.0, 0.6])),), 16.0, 16000,
                  snr_db=10.0, seed=12)
    x = normalised(render(scene))

    def events(block):
        p = Pipeline(16000, AnalysisSettings())
        out = []
        for i in range(0, x.size, block):
            out += p.push(x[i:i + block])
        return out + p.finish()

    a, b = events(16000), events(1031)
    assert len(a) == len(b) == 1
    assert a[0] == b[0]


def test_block_size_does_not_change_the_numbers_mid_stream():
    # Two vehicles 25 s apart: the first is reported while the stream goes on, after
    # following its tones and pairing them across its pass; what it saw then must not
    # depend on the block size either.
    scene = Scene((Vehicle(70 / 3.6, 6.0, 8.0, harmonic_tones(60.0, [0.4, 1.0, 0.6])),
                   Vehicle(150 / 3.6, 3.0, 33.0, (Tone(520.0), Tone(655.0)))), 45.0, 16000,
                  snr_db=6.0, ground_reflection=0.6, seed=21)
    x = normalised(render(scene))

    def events(block):
        p = Pipeline(16000, AnalysisSettings())
        out, first_at = [], None
        for i in range(0, x.size, block):
            new = p.push(x[i:i + block])
            if new and first_at is None:
                first_at = (i + block) / 16000
            out += new
        return out + p.finish(), first_at

    (a, ta), (b, tb) = events(16000), events(1031)
    assert ta is not None and ta < 40.0 and tb < 40.0   # reported mid-stream
    assert len(a) == len(b) == 2
    assert a == b


def test_stereo_channel_selection():
    scene = Scene((Vehicle(60 / 3.6, 7.0, 8.0, (Tone(900.0),)),), 16.0, 16000, snr_db=15.0, seed=13)
    tone = normalised(render(scene), 0.5)
    rng = np.random.default_rng(0)
    noise = 0.05 * rng.standard_normal(tone.size)
    stereo = np.column_stack([noise, tone])
    assert accepted(analyze(stereo, sample_rate=16000, channel=0)) == []
    ev = accepted(analyze(stereo, sample_rate=16000, channel=1))
    assert len(ev) == 1 and abs(ev[0].speed_mps * 3.6 - 60.0) <= 1.0



def test_an_event_from_the_plateaus_alone_is_not_followed():
    # The two-plateau closed form (Ferguson & Quinn 1994) gives a speed and a rest
    # frequency but no closest distance: there is no whole course to follow the tones
    # along. Following must hand such an event back as it is; it used to build a
    # course from the NaN distance and stop the analysis with a ValueError.
    from passby.events import PassEvent
    from passby.tracking import Track
    p = Pipeline(16000, AnalysisSettings())
    p.push(np.random.default_rng(1).normal(0.0, 0.01, 16000 * 45))
    assert p.tracker.frame > 1400           # the stream has gone past the event
    tr = Track(np.arange(1000, 1400), np.r_[np.full(200, 1300.0), np.full(200, 1160.0)], np.full(400, 20.0))
    ev = PassEvent(pass_time_s=12.0, speed_mps=20.0, speed_std_mps=0.8, tones_hz=(1226.3,),
                   closest_approach_m=math.nan, closest_approach_std_m=math.nan,
                   speed_of_sound_mps=343.2, temperature_c=20.0, quality="fair",
                   reason="closest distance not resolved", start_s=10.0, end_s=14.0, method="plateaus")
    p.tracks_of[id(ev)] = [tr]
    assert p._followed(ev) is ev
    # Nor can it claim another vehicle's tone in its span as one of its own.
    other = Track(np.arange(1100, 1300), np.linspace(900.0, 800.0, 200), np.full(200, 20.0))
    assert p._explained([other], [ev]) is None


def test_slow_distant_pass_heard_in_pieces():
    # A vehicle at 10.7 km/h passing 41 m away: its pitch falls by 2 v / c = 1.8 % over
    # the whole 24 s record (moving-source relation, Ferguson & Quinn 1994), so each tone
    # lingers in one analysis bin and the background model hides it for seconds at a time.
    # The pieces, each too flat to be a pass, are one source: the speed comes out within
    # +-3 km/h of the simulated truth.
    tones = harmonic_tones(219.37, [0.93, 0.64, 1.0, 0.64, 0.82])
    car = Vehicle(10.7 / 3.6, 40.9, 11.4, tones, source_height_m=0.37)
    scene = Scene((car,), 24.5, 16000, temperature_c=4.2, snr_db=9.3, noise="road", seed=1101594)
    ev = accepted(run(scene))
    assert len(ev) == 1
    assert abs(ev[0].speed_mps - car.speed_mps) * 3.6 < 3.0
    assert abs(ev[0].pass_time_s - car.pass_time_s) < 1.0


def test_close_fast_loud_tone_heard_as_two_flat_pieces(monkeypatch):
    # 170 km/h at 2.5 m (d / v 0.05 s) and a loud tone (SNR 25 dB): the plateaus before
    # and after are flat for seconds and the fall between them takes a few hundredths of
    # a second; here the tracker leaves two flat tracks, neither a pass on its own (on
    # most seeds it follows the fall). Joined as pieces of one source they give the
    # speed within the OIML R 91 tolerance (from memory); without the quick join the
    # vehicle is missed.
    kmh = 170.0
    scene = Scene((Vehicle(kmh / 3.6, 2.5, 10.0, (Tone(320.0),), source_height_m=0.4),), 20.0, 16000,
                  snr_db=25.0, ground_reflection=0.8, noise="white", seed=26)
    ev = accepted(run(scene))
    assert len(ev) == 1
    assert abs(ev[0].speed_mps * 3.6 - kmh) <= oiml_tolerance_kmh(kmh)
    monkeypatch.setattr(pipeline, "MIN_PASS_RATIO", pipeline.CHAIN_RATIO[0])
    assert accepted(run(scene)) == []


@pytest.mark.parametrize("seed,gap_s,ratio", [(9, 3.5, 0.99), (9, 3.5, 0.97), (10, 0.5, 0.97), (11, 2.0, 0.99),
                                              (12, 0.0, 0.77), (13, 0.1, 0.85), (14, 0.25, 0.6)])
def test_two_steady_machines_one_after_the_other_are_no_pass(seed, gap_s, ratio):
    # A steady 600 Hz machine stops and another, 1-40 % lower, starts after a gap: each
    # is flat and their pitch steps down, which the two-plateau formula would read as a
    # slow pass. No pass is resolved across the gap, so there is no event (no event on
    # audio without a vehicle, as the requirements state).
    scene = Scene((), 30.0, 16000, snr_db=None, noise_level=0.05, noise="road", seed=seed,
                  interferers=(Interferer(600.0, 0.05, on_s=2.0, off_s=13.0),
                               Interferer(600.0 * ratio, 0.05, on_s=13.0 + gap_s, off_s=28.0)))
    assert run(scene).events == ()
