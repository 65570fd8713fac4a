"""From spectral peaks to tone tracks, and from tracks to sources.

A *track* is one tone followed from frame to frame. A *source* is the set
of tracks that one vehicle makes: the harmonics of an engine or the tones
of a horn chord. At every instant all tones of one source carry the same
Doppler factor, so in log-frequency they are parallel curves: two tracks
belong to one source when the difference of their log-frequencies stays
constant while both sweep through the pass.

Everything here runs frame by frame and never looks back at audio, so the
live station and the offline analysis find the same tracks.
"""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass

import numpy as np

from passby.spectral import Peaks, Timebase


@dataclass(frozen=True)
class Track:
    """One tone followed over time.

    Attributes
    ----------
    frame : ndarray of int
        Frame indices (increasing, gaps allowed).
    freq_hz : ndarray
        Sub-bin frequency in each frame.
    snr_db : ndarray
        Height of the peak above the whitened background.
    level_db : ndarray
        Height of the peak in the raw spectrum (follows the received level).
    """

    frame: np.ndarray
    freq_hz: np.ndarray
    snr_db: np.ndarray
    level_db: np.ndarray = None

    @property
    def start(self) -> int:
        return int(self.frame[0])

    @property
    def end(self) -> int:
        return int(self.frame[-1])

    @property
    def strength(self) -> float:
        """Sum of the linear SNR over the track (its total evidence)."""
        return float(np.sum(10.0 ** (np.minimum(self.snr_db, 40.0) / 10.0)))

    def take(self, index) -> "Track":
        """The points at ``index`` (a slice or an index array, in frame order)."""
        return Track(self.frame[index], self.freq_hz[index], self.snr_db[index],
                     None if self.level_db is None else self.level_db[index])

    @staticmethod
    def joined(tracks) -> "Track":
        """The points of ``tracks`` (any overlap) as one series in frame order."""
        cat = [np.concatenate([getattr(t, a) for t in tracks]) for a in ("frame", "freq_hz", "snr_db")]
        lv = (None if any(t.level_db is None for t in tracks)
              else np.concatenate([t.level_db for t in tracks]))
        o = np.argsort(cat[0], kind="stable")
        return Track(cat[0][o], cat[1][o], cat[2][o], None if lv is None else lv[o])

    def then(self, later: "Track") -> "Track":
        """This track followed by ``later`` (all of whose frames come after), as one."""
        lv = (None if self.level_db is None or later.level_db is None
              else np.r_[self.level_db, later.level_db])
        return Track(np.r_[self.frame, later.frame], np.r_[self.freq_hz, later.freq_hz],
                     np.r_[self.snr_db, later.snr_db], lv)


#: The smallest ratio by which a source's pitch falls across its whole pass:
#: (c - v) / (c + v) = 0.6 for a source at 0.25 c (about 300 km/h; the
#: moving-source Doppler relation). No step of a track, over any gap, falls
#: by more (a machine spinning down falls further, but step by step), and
#: no pairing across a pass assumes a steeper fall.
MIN_PASS_RATIO = 0.6


class _Open:
    """A track still being followed (mutable, internal)."""

    __slots__ = ("frame", "freq", "snr", "level", "slope")

    def __init__(self, frame, freq, snr, level):
        self.frame, self.freq, self.snr, self.level = [frame], [freq], [snr], [level]
        self.slope = 0.0

    def add(self, frame, freq, snr, level):
        fr, fq = self.frame, self.freq
        fr.append(frame)
        fq.append(freq)
        self.snr.append(snr)
        self.level.append(level)
        k = 3 if len(fr) > 3 else len(fr) - 1
        self.slope = (freq - fq[-1 - k]) / (frame - fr[-1 - k])

    def freeze(self) -> Track:
        return Track(np.asarray(self.frame), np.asarray(self.freq), np.asarray(self.snr),
                     np.asarray(self.level))


class Tracker:
    """Frame-to-frame continuity of spectral peaks.

    Each open track predicts its next frequency from its last frequency and
    slope. A peak continues the track whose prediction is nearest, within a
    tolerance of ``max(2 bins, rel_tol * f)`` that widens a little with the
    gap (to twice at most) and, downwards only, with the track's fall rate
    (a passing source's pitch only falls, and at a close pass it falls
    fast), but never below MIN_PASS_RATIO of its last pitch: one step
    between two nearby tones gives a steady line a steep slope that,
    carried over a gap, could reach a tone an octave down. A track not
    continued for ``max_gap_s`` ends; tracks shorter than ``min_track_s``
    are set aside (:attr:`brief` and :attr:`loose`), not returned.

    Parameters
    ----------
    timebase : Timebase
    bin_hz_at : callable
        Bin spacing (Hz) of the analysis at a frequency.
    min_track_s, max_gap_s, max_track_s : float
        A track longer than ``max_track_s`` (a steady line) is cut there.
    rel_tol : float
    """

    #: A track too short to keep is kept apart in :attr:`brief` when it spans
    #: BRIEF_MIN_S and falls by BRIEF_FALL from its first to its last frame:
    #: the steep sweep of a close, fast pass heard only around the pass.
    BRIEF_MIN_S, BRIEF_FALL = 0.1, 1.03

    def __init__(self, timebase: Timebase, bin_hz_at, min_track_s: float = 0.3,
                 max_gap_s: float = 0.3, max_track_s: float = 120.0, rel_tol: float = 0.01):
        self.bin_hz_at = bin_hz_at
        self.min_frames = max(3, int(round(min_track_s / timebase.hop_s)))
        self.brief_frames = max(3, int(round(self.BRIEF_MIN_S / timebase.hop_s)))
        #: Brief steep tracks ended so far (see BRIEF_FALL); the caller empties it.
        self.brief: list[Track] = []
        #: The other tracks too short to keep (single peaks too), ended so
        #: far; the caller empties it (see :func:`passby.fitting.sweep_search`).
        self.loose: list[Track] = []
        self.max_gap = max(1, int(round(max_gap_s / timebase.hop_s)))
        self.max_frames = int(round(max_track_s / timebase.hop_s))
        self.max_overlap = max(1, int(round(0.1 / timebase.hop_s)))
        self.max_cross = max(1, int(round(0.5 / timebase.hop_s)))
        self.rel_tol = float(rel_tol)
        self.open: list[_Open] = []
        self.frame = -1   # last frame processed

    def push(self, peaks: Peaks) -> list:
        """Process a run of frames' peaks; returns the tracks that ended."""
        done = []
        fr, f, s, lv = peaks.frame, peaks.freq_hz, peaks.snr_db, peaks.level_db
        bounds = np.flatnonzero(np.diff(fr)) + 1 if fr.size else np.empty(0, int)
        starts = np.concatenate(([0], bounds)) if fr.size else np.empty(0, int)
        stops = np.concatenate((bounds, [fr.size])) if fr.size else np.empty(0, int)
        frl, fl, sl, ll = fr.tolist(), f.tolist(), s.tolist(), lv.tolist()
        for a, b in zip(starts.tolist(), stops.tolist()):
            frame = frl[a]
            self._expire(frame, done)
            self._assign(frame, fl[a:b], sl[a:b], ll[a:b])
            self.frame = frame
        self.frame = max(self.frame, peaks.first_frame + peaks.n_frames - 1)
        self._expire(self.frame + 1, done)
        return done

    def finish(self) -> list:
        """End of stream: close every open track."""
        done = []
        for t in self.open:
            self._close(t, done)
        self.open = []
        return done

    def _close(self, t: _Open, done: list):
        if len(t.frame) >= self.min_frames:
            done.append(t.freeze())
        elif (t.frame[-1] - t.frame[0] >= self.brief_frames and len(t.frame) >= self.brief_frames // 2
              and t.freq[0] >= self.BRIEF_FALL * t.freq[-1]):
            self.brief.append(t.freeze())
        else:
            self.loose.append(t.freeze())

    def _expire(self, frame: int, done: list):
        keep, ended = [], []
        max_gap, max_frames = self.max_gap, self.max_frames
        for t in self.open:
            if frame - t.frame[-1] > max_gap:
                ended.append(t)
            elif len(t.frame) >= max_frames:
                self._close(t, done)
            else:
                keep.append(t)
        if not ended:
            self.open = keep
            return
        for t in ended:
            succ, crossing = self._successor(t, keep)
            if succ is None:
                self._close(t, done)
            elif not crossing:   # the same tone after a dropout: one track
                n = int(np.searchsorted(t.frame, succ.frame[0]))
                succ.frame[:0], succ.freq[:0], succ.snr[:0] = t.frame[:n], t.freq[:n], t.snr[:n]
                succ.level[:0] = t.level[:n]
            else:   # two pieces of one pass that overlap: the overlap is ambiguous, drop it
                n = int(np.searchsorted(t.frame, succ.frame[0]))
                m = int(np.searchsorted(succ.frame, t.frame[-1], side="right"))
                del succ.frame[:m], succ.freq[:m], succ.snr[:m], succ.level[:m]
                succ.frame[:0], succ.freq[:0], succ.snr[:0] = t.frame[:n], t.freq[:n], t.snr[:n]
                succ.level[:0] = t.level[:n]
        self.open = keep

    def _successor(self, t: _Open, candidates: list):
        """A track that continues ``t``, and whether the two cross in time.

        At a close, fast pass the pitch falls faster than a frame can
        follow, and an interference null can hide a tone for a moment: the
        piece after the break continues the piece before it. Either it
        starts (up to 0.1 s before t's end, or after it) where ``t`` was
        heading; or the two overlap by up to ``max_cross_s`` around the
        pass: it starts below where ``t`` then was and, at t's last frame,
        is where ``t`` ended (a frame holding both the approaching and the
        receding pitch).

        Returns
        -------
        (track or None, crossing)
        """
        best, best_key, crossing = None, None, False
        end, f_end = t.frame[-1], t.freq[-1]
        for o in candidates:
            s = o.frame[0]
            if not (end - self.max_cross < s <= end + self.max_gap) or o.frame[-1] <= end:
                continue
            # Where t was just before o began (they may overlap).
            n = int(np.searchsorted(t.frame, s))
            if n < 2:
                continue
            ref_frame, ref_f = t.frame[n - 1], t.freq[n - 1]
            if o.freq[0] < MIN_PASS_RATIO * ref_f:
                continue    # a fall steeper than any pass's
            k = min(3, n - 1)
            slope = (ref_f - t.freq[n - 1 - k]) / (ref_frame - t.frame[n - 1 - k])
            pred = max(ref_f + slope * (s - ref_frame), 0.5 * ref_f)
            tol = max(2.0 * self.bin_hz_at(ref_f), 0.05 * ref_f)
            if s > end - self.max_overlap and abs(o.freq[0] - pred) <= tol and o.freq[0] <= ref_f * 1.003:
                key = (0, s - end, abs(o.freq[0] - pred))
                cross = False
            elif s <= end and o.freq[0] <= ref_f * 1.003:
                i = int(np.searchsorted(o.frame, end))
                i = min(i, len(o.frame) - 1)
                meet_tol = max(2.0 * self.bin_hz_at(f_end), 0.02 * f_end)
                if abs(o.frame[i] - end) > 2 or abs(o.freq[i] - f_end) > meet_tol:
                    continue
                key = (1, end - s, abs(o.freq[i] - f_end))
                cross = True
            else:
                continue
            if best_key is None or key < best_key:
                best, best_key, crossing = o, key, cross
        return best, crossing

    def _assign(self, frame: int, freqs: list, snrs: list, levels: list):
        # (the hottest loop of the analysis: plain floats and lists, no numpy)
        pairs = []
        rel_tol, bin_hz_at = self.rel_tol, self.bin_hz_at
        opened = self.open
        for i, t in enumerate(opened):
            f_last, slope = t.freq[-1], t.slope
            gap = frame - t.frame[-1]
            pred = f_last + slope * gap
            tol = 2.0 * bin_hz_at(pred)
            if rel_tol * pred > tol:
                tol = rel_tol * pred
            if gap > 1:
                tol *= min(1.0 + 0.1 * (gap - 1), 2.0)
            hi = pred + tol
            lo = pred - tol
            if slope < 0.0:
                lo += 2.0 * slope * (gap if gap < 3 else 3)
            if lo < MIN_PASS_RATIO * f_last:
                lo = MIN_PASS_RATIO * f_last
            for j, fj in enumerate(freqs):
                if lo <= fj <= hi:
                    pairs.append((abs(fj - pred) / tol, i, j))
        if not pairs:
            for j, fj in enumerate(freqs):
                opened.append(_Open(frame, fj, snrs[j], levels[j]))
            return
        used_t, used_p = set(), set()
        if len(pairs) > 1:
            pairs.sort()
        for _, i, j in pairs:
            if i in used_t or j in used_p:
                continue
            opened[i].add(frame, freqs[j], snrs[j], levels[j])
            used_t.add(i)
            used_p.add(j)
        for j, fj in enumerate(freqs):
            if j not in used_p:
                opened.append(_Open(frame, fj, snrs[j], levels[j]))


def log_ratio_stability(a: Track, b: Track, min_overlap: int):
    """How parallel two tracks are in log-frequency over their common frames.

    Returns
    -------
    (median_ratio, spread, noise, sweep) or None
        ``median_ratio`` is the median of ``d = ln f_a - ln f_b``, ``spread``
        the robust standard deviation (1.4826 MAD) of ``d``, ``noise`` the
        spread expected of ``d`` from the tracks' own frame-to-frame scatter
        (robust s.d. of first differences over sqrt 2, summed in quadrature),
        and ``sweep`` the 10-90 % range of ``ln f_a``. None when they share
        fewer than ``min_overlap`` frames.
    """
    common, ia, ib = np.intersect1d(a.frame, b.frame, assume_unique=True, return_indices=True)
    if common.size < min_overlap:
        return None
    la, lb = np.log(a.freq_hz[ia]), np.log(b.freq_hz[ib])
    d = la - lb
    med = float(np.median(d))
    spread = _robust_sd(d - med)
    noise = math.hypot(_robust_sd(np.diff(la)), _robust_sd(np.diff(lb))) / math.sqrt(2.0)
    lo, hi = np.percentile(la, [10, 90])
    return med, spread, noise, float(hi - lo)


def _robust_sd(x: np.ndarray) -> float:
    """1.4826 times the median absolute deviation (normal consistency)."""
    return 1.4826 * float(np.median(np.abs(x - np.median(x)))) if x.size else 0.0


def same_source(a: Track, b: Track, min_overlap: int, max_spread: float = 0.003,
                min_sweep: float = 0.004) -> bool:
    """Whether two tracks are tones of one source (parallel in log-frequency).

    They must share ``min_overlap`` frames; the difference of their
    log-frequencies must stay constant within ``max_spread`` or four times
    the scatter the tracks themselves show, whichever is larger; the tracks
    must sweep together by ``min_sweep`` and by five times that tolerance
    (two unrelated steady lines are parallel too, so only a shared sweep
    is evidence); and they must be different tones (ratio at least 2 %).
    """
    r = log_ratio_stability(a, b, min_overlap)
    if r is None:
        return False
    med, spread, noise, sweep = r
    tol = max(max_spread, 4.0 * noise)
    return abs(med) > 0.02 and spread < tol and sweep > max(min_sweep, 5.0 * tol)


def linked_groups(items: list, related) -> list:
    """The items split into groups linked by ``related(a, b)`` (transitively).

    Union-find over all pairs; groups keep the items' order.

    Examples
    --------
    >>> linked_groups([1, 2, 10, 11, 30], lambda a, b: abs(a - b) <= 1)
    [[1, 2], [10, 11], [30]]
    """
    parent = list(range(len(items)))

    def root(i):
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    for i in range(len(items)):
        for j in range(i + 1, len(items)):
            if related(items[i], items[j]):
                parent[root(i)] = root(j)
    groups = {}
    for i, item in enumerate(items):
        groups.setdefault(root(i), []).append(item)
    return list(groups.values())


class SourceGrouper:
    """Collects ended tracks and releases them grouped by source.

    A group is released once none of its tracks is open any more, no open
    track is parallel to one of its tracks (it would belong to the group),
    and ``settle_s`` has passed since its last frame.

    Parameters
    ----------
    timebase : Timebase
    settle_s : float
    max_wait_s : float
        A track is released at the latest this long after it ended.
    """

    def __init__(self, timebase: Timebase, settle_s: float = 1.0, max_wait_s: float = 90.0):
        self.settle = int(round(settle_s / timebase.hop_s))
        self.max_wait = int(round(max_wait_s / timebase.hop_s))
        self.min_overlap = max(5, int(round(0.4 / timebase.hop_s)))
        self.pool: list[Track] = []
        # Whether two tracks of the pool are related, by their ids: tracks
        # are frozen, so each pair is compared once however long it waits.
        # Only pairs of tracks still pooled are kept, so an id is never
        # that of a track gone and replaced.
        self._related = {}
        # Whether an open track is related to a pooled one, by the open
        # track, its first frame and how many of its frames reach no later
        # than the pooled track's group ends (only those frames can be
        # common to the two, so the answer stays while the open track grows).
        self._open_related = {}

    def _related_to_open(self, o, end: int, m: Track) -> bool:
        n = bisect.bisect_right(o.frame, end)
        key = (o, o.frame[0], n, id(m))
        r = self._open_related.get(key)
        if r is None:
            prefix = Track(np.asarray(o.frame[:n]), np.asarray(o.freq[:n]), np.asarray(o.snr[:n]))
            r = self._open_related[key] = same_source(prefix, m, self.min_overlap)
        return r

    def push(self, ended: list, open_tracks: list, frame: int, final: bool = False) -> list:
        """Add ended tracks; returns the groups (lists of Track) now complete."""
        self.pool.extend(ended)
        if not self.pool:
            return []
        known = self._related

        def related(a, b):
            key = (id(a), id(b))
            r = known.get(key)
            if r is None:
                r = known[key] = (not (a.end < b.start or b.end < a.start)
                                  and same_source(a, b, self.min_overlap))
            return r

        groups = linked_groups(self.pool, related)
        out, keep = [], []
        for members in groups:
            end = max(t.end for t in members)
            start = min(t.start for t in members)
            ready = final or frame - end >= self.max_wait
            if not ready and frame - end >= self.settle:
                # The group's tracks have ended, so what they share with an
                # open track is already known: wait only for a related one.
                ready = True
                for o in open_tracks:
                    if o.frame[0] <= end and o.frame[-1] >= start:
                        if any(self._related_to_open(o, end, m) for m in members):
                            ready = False
                            break
            if ready:
                out.append(sorted(members, key=lambda t: -t.strength))
            else:
                keep.extend(members)
        self.pool = keep
        alive = {id(t) for t in keep}
        self._related = {k: r for k, r in known.items() if k[0] in alive and k[1] in alive}
        if self._open_related:
            still = {id(o) for o in open_tracks}
            self._open_related = {k: r for k, r in self._open_related.items()
                                  if id(k[0]) in still and k[3] in alive}
        out.sort(key=lambda m: min(t.start for t in m))
        return out


def fall_ratio(track: Track, part: float = 0.2) -> float:
    """Ratio of the track's early to late frequency (medians of the ends).

    Greater than one for a passing source; about one for a steady line.

    Examples
    --------
    >>> t = Track(np.arange(10), np.r_[[110.0] * 5, [90.0] * 5], np.zeros(10))
    >>> round(fall_ratio(t), 4)
    1.2222
    """
    n = max(1, int(math.ceil(part * track.frame.size)))
    return float(np.median(track.freq_hz[:n]) / np.median(track.freq_hz[-n:]))


def pass_ratio(approach, recession, min_ratio: float = MIN_PASS_RATIO, max_ratio: float = 0.95,
               rel_tol: float = 0.004):
    """The one ratio by which a source's tones fall across its pass.

    At the pass every tone of a source falls by the same factor
    ``rho = f_recede / f_approach`` (the plateaus of
    :func:`passby.physics.plateau_solution`), so the tones heard just
    after a close, fast pass are those heard just before it, scaled by
    ``rho``. When the fall is too quick to track, which approaching piece
    goes on as which receding piece is unknown; the ratio that pairs the
    most pieces (a shift of the receding pattern in log-frequency onto the
    approaching one) tells.

    Parameters
    ----------
    approach, recession : sequence of (frequency_hz, weight)
        Edge frequencies of the pieces just before and just after the pass.
    min_ratio, max_ratio : float
        Ratios considered: from 0.6 (a source at about 0.25 c); a best
        ratio above 0.95 (about 32 km/h) is no pass too fast to track (its
        pitch falls at most ``f0 v^2 / (c d)`` per second, under 0.8 % of
        f0 per 10 ms frame even at 0.3 m), and gives None.
    rel_tol : float
        How far (relative) a pair's ratio may lie from the common one.

    Returns
    -------
    (rho, pairs) or None
        ``pairs`` are index pairs ``(i, j)`` into ``approach`` and
        ``recession``, each piece in one pair at most; the most pairs win,
        then the greater sum of the pairs' smaller weights. ``rho`` is the
        median ratio of the pairs. None when no pair falls, or the best
        ratio is above ``max_ratio``.

    Examples
    --------
    Harmonics of 100 Hz heard at 1.2 and 0.85 times their pitch, and a
    stray piece at 333 Hz:

    >>> a = [(120.0, 1), (240.0, 1), (360.0, 1)]
    >>> r = [(85.0, 1), (170.0, 1), (255.0, 1), (333.0, 1)]
    >>> rho, pairs = pass_ratio(a, r)
    >>> round(rho, 4), pairs
    (0.7083, [(0, 0), (1, 1), (2, 2)])
    """
    la = np.log([f for f, _ in approach]) if len(approach) else np.empty(0)
    lr = np.log([f for f, _ in recession]) if len(recession) else np.empty(0)
    wa = [w for _, w in approach]
    wr = [w for _, w in recession]
    best, best_key = None, None
    tol = math.log1p(rel_tol)
    diff = lr[None, :] - la[:, None]          # ln(r_j / a_i)
    for i, j in zip(*np.nonzero((diff >= math.log(min_ratio)) & (diff < -tol))):
        q = diff[i, j]
        # Pairs within tol of this ratio, closest first, each piece once.
        off = np.abs(diff - q)
        cand = sorted((off[a, b], a, b) for a, b in zip(*np.nonzero(off <= tol)))
        ua, ub, pairs = set(), set(), []
        for _, a, b in cand:
            if a not in ua and b not in ub:
                ua.add(a)
                ub.add(b)
                pairs.append((int(a), int(b)))
        key = (len(pairs), sum(min(wa[a], wr[b]) for a, b in pairs))
        if best_key is None or key > best_key:
            best_key, best = key, sorted(pairs)
    if best is None:
        return None
    rho = float(np.exp(np.median([lr[b] - la[a] for a, b in best])))
    # The pieces of a slow pass line up best at its slow fall: then no pairing
    # (a ratio excluded beforehand would leave coincidences to win).
    return (rho, best) if rho <= max_ratio else None
