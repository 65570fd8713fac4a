"""Tone identity across a pass: the common ratio of a source's fall."""

import numpy as np
import pytest

from passby import physics
from passby.tracking import pass_ratio


def plateaus(f0s, v, c):
    # Moving-source Doppler relation f = f0 c / (c -+ v) (OpenStax College Physics,
    # sec. 17.4, eq. 17.9, from memory; checked in test_physics against its worked example).
    a = [physics.doppler_moving_source(f, v, c) for f in f0s]
    r = [physics.doppler_moving_source(f, -v, c) for f in f0s]
    return a, r


def test_harmonic_series_paired_at_its_plateau_ratio():
    c, v = 343.2, 45.0
    f0s = [180.0 * k for k in (1, 2, 3, 4, 5)]
    a, r = plateaus(f0s, v, c)
    rng = np.random.default_rng(7)
    order = rng.permutation(len(r))
    recession = [(r[i], 1.0) for i in order] + [(517.0, 5.0)]   # and a stray piece
    rho, pairs = pass_ratio([(f, 1.0) for f in a], recession)
    # (c - v) / (c + v): the ratio of the two Doppler plateaus, same textbook relation
    assert rho == pytest.approx((c - v) / (c + v), rel=1e-12)
    assert sorted((i, int(order[j])) for i, j in pairs) == [(k, k) for k in range(5)]
    # and the two-plateau closed form (Ferguson & Quinn 1994) gives the speed back
    speed, _ = physics.plateau_solution(1.0, rho, c)
    assert speed == pytest.approx(v, rel=1e-9)


def test_chord_with_a_coincidence_still_pairs_the_most_tones():
    # A horn chord (equal-tempered ratios 1, 2^(4/12), 2^(7/12); common practice, no source)
    # at 50 m/s, and a loud stray piece 2 % below the approaching middle tone (a pair at
    # a small fall, heavier than any other); the common ratio pairs all three tones.
    c, v = 343.2, 50.0
    f0s = [400.0, 400.0 * 2 ** (4 / 12), 400.0 * 2 ** (7 / 12)]
    a, r = plateaus(f0s, v, c)
    rho, pairs = pass_ratio([(f, 1.0) for f in a], [(f, 1.0) for f in r] + [(a[1] * 0.98, 9.0)])
    assert rho == pytest.approx((c - v) / (c + v), rel=1e-12)
    assert pairs == [(0, 0), (1, 1), (2, 2)]


def test_nothing_falls_no_pair():
    # Pieces that rise, or fall by less than 5 % (a pass slower than about 32 km/h,
    # whose fall the tracker follows), are no pass too fast to track.
    assert pass_ratio([(500.0, 1.0)], [(501.0, 1.0), (499.5, 1.0), (480.0, 1.0)]) is None
    # A harmonic series passing at 20 km/h: its own fall pairs all four tones and wins
    # over the coincidence of one tone's approach with another's recession (ratio
    # about 2/3, a "pass" at 200 km/h); being slow, it gives no pairing at all.
    a, r = plateaus([150.0 * k for k in (2, 3, 4, 5)], 20 / 3.6, 343.2)
    assert pass_ratio([(f, 1.0) for f in a], [(f, 1.0) for f in r]) is None
    assert pass_ratio([], [(400.0, 1.0)]) is None
    # A fall steeper than the smallest ratio (a source at about 0.25 c) is no pass either.
    assert pass_ratio([(500.0, 1.0)], [(250.0, 1.0)]) is None


def test_tracks_too_short_to_keep_are_set_aside_not_lost():
    # A 0.05 s piece (5 frames of 10 ms) is too short for a track (0.3 s) and too flat
    # for a brief sweep; it comes back in Tracker.loose, whole, for the course vote.
    from passby.spectral import Peaks, Timebase
    from passby.tracking import Tracker
    tb = Timebase(0.01, 0.0)
    tr = Tracker(tb, lambda f: 4.0)
    frames = np.arange(100, 105)
    pk = Peaks(frames, np.full(5, 1000.0), np.full(5, 20.0), 100, 5, np.full(5, 60.0))
    assert tr.push(pk) == [] and tr.finish() == []
    assert tr.brief == []
    assert len(tr.loose) == 1 and tr.loose[0].frame.tolist() == frames.tolist()


def _tracks_of(frames, freqs, bin_hz=1.5):
    from passby.spectral import Peaks, Timebase
    from passby.tracking import Tracker
    frames, freqs = np.asarray(frames), np.asarray(freqs, dtype=float)
    tr = Tracker(Timebase(0.01, 0.0), lambda f: bin_hz)
    n = int(frames[-1] - frames[0] + 1)
    pk = Peaks(frames, freqs, np.full(frames.size, 12.0), int(frames[0]), n, np.full(frames.size, 60.0))
    return tr.push(pk) + tr.finish()


def test_one_step_to_a_neighbouring_tone_does_not_send_a_steady_line_an_octave_down():
    # A steady 165 Hz line whose peak is taken for a few frames by a tone gliding past
    # 4 % above it, then a 0.28 s gap, then a tone at 86-88 Hz. The line's last three
    # steps average -2.2 Hz per frame; carried over the gap, that slope reaches the low
    # tone. But a source whose pitch falls from 165 to 86 Hz, more than across its
    # whole pass, would move at c (1 - r) / (1 + r) = 0.31 c (moving-source Doppler
    # relation, OpenStax College Physics sec. 17.4 eq. 17.9, from memory): the two are
    # not one track.
    line = [165.0 + 0.3 * (-1) ** k for k in range(30)] + [170.5, 172.1, 172.9, 172.9, 172.1,
                                                           170.6, 164.9, 165.5]
    low = [86.4] + [87.3 + 0.1 * (-1) ** k for k in range(34)]
    frames = list(range(100, 138)) + list(range(166, 201))
    tracks = _tracks_of(frames, line + low, bin_hz=4.0)
    assert sorted(t.frame.size for t in tracks) == [35, 38]
    assert min(np.ptp(t.freq_hz) for t in tracks) < 2.0


def test_a_close_pass_stays_one_track_across_a_dropout_at_its_pass():
    # 500 Hz at 30 m/s passing 3 m away, by the retarded-time model (Ferguson & Quinn 1994),
    # sampled every 10 ms over +-0.6 s with four frames missing at the pass (an
    # interference null): the steep fall is still followed as one track.
    c = 343.2
    frames = np.arange(-60, 61)
    keep = (frames < -1) | (frames > 2)
    f = physics.received_frequency(frames * 0.01, 500.0, 30.0, 3.0, 0.0, c)
    tracks = _tracks_of(frames[keep] + 1000, f[keep], bin_hz=2.7)
    assert [t.frame.size for t in tracks] == [int(keep.sum())]


def test_a_fan_spinning_down_falls_further_than_a_pass_but_stays_one_track():
    # A fan line falling from 160 to 40 Hz over 3 s, frame by frame (its rotation rate
    # decays; common practice, no source): four times further than any pass falls
    # (MIN_PASS_RATIO), but step by step, so it stays one track, and the pipeline's
    # level check (a spin-down gets quieter) can tell it is no pass.
    frames = np.arange(300)
    f = 160.0 * 0.25 ** (frames / 299.0)
    tracks = _tracks_of(frames + 500, f, bin_hz=4.0)
    assert [t.frame.size for t in tracks] == [300]
