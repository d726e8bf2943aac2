"""Find the current steps and pulses of a sweep's command or recorded current.

A sweep's current is read as a sequence of flat levels separated by edges. Every
level that differs from the sweep's holding level (the level the sweep starts at) is
one `Step`, whose amplitude is measured against the level just before it, so a step
that starts early, or follows another step at once, keeps its true sign and size.

The same code reads a clean command waveform and a noisy recorded current: a
recorded current is first passed through a short running median, which removes
noise blips and capacitive spikes shorter than `MIN_DURATION_S`, and edges must
exceed a threshold set by the trace's own noise (a robust, median-based estimate).
Ramps, sine waves and other non-rectangular waveforms are recognised and never
returned as steps; `classify_stimulus` names what a sweep holds.

A sweep that plays a wide-band stimulus (noise, a chirp) over most of its length after
a test pulse from rest has a threshold set by that stimulus, far above the pulse. When
the whole sweep shows no step, the stretch before the first wide-band stretch is read
again with the threshold of the sweep's quiet parts; steps found there carry where the
waveform begins (`Step.waveform_from`), and nothing from there on is read.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, replace

import numpy as np

#: A step this long or shorter is treated as a brief pulse: only its decay is fitted (the
#: common 5 ms pulse charges a cell to a fifth of its steady state or less)
PULSE_MAX_S = 5e-3
#: Levels and pulses shorter than this are not steps (noise blips, capacitive spikes).
MIN_DURATION_S = 0.2e-3
#: Default smallest step, in A, for a noise-free command waveform.
MIN_AMPLITUDE_A = 0.5e-12
#: Baseline at the pre-step level that `find_step` wants before the step it returns.
MIN_BASELINE_S = 5e-3
#: A step this long can show a steady state (several τ0 of 10–60 ms, docs/references.md
#: §7); a shorter one before it (a 10–20 ms test pulse) is not the one analysed.
SETTLED_STEP_S = 50e-3
#: An edge is this many noise standard deviations of the edge detector (common
#: practice for robust change detection, no source).
EDGE_NOISE_SD = 8.0
#: Half-width of the edge detector (difference of the running median this far
#: either side), in s: long enough for a filtered amplifier edge, short enough that
#: mains hum barely moves it.
EDGE_HALF_WIDTH_S = 0.5e-3
#: An edge that takes longer than this to change level is part of a ramp, in s.
MAX_EDGE_RISE_S = 2e-3
#: Stimulus kinds `classify_stimulus` returns.
STIMULUS_KINDS = ("step", "pulse", "ramp", "waveform", "none")
# relative level tolerance for "the same level" (rest, from-rest checks)
_SAME_LEVEL_FRACTION = 0.1
# steps of different sweeps starting this close together are at the same position, in s
_SAME_ONSET_S = 1e-3
#: Blocks in which the edge detector's noise is measured to tell a sweep's quiet parts
#: from a wide-band stimulus, in s.
QUIET_BLOCK_S = 20e-3
#: A block whose edge threshold is this many times that of the quietest block belongs to
#: a wide-band stimulus. Quiet blocks of one recording scatter by less than 2x (about 1.4x
#: in a simulated recorded current; no source), a noise stimulus of tens of pA by 10-100x.
LOUD_FACTOR = 4.0
#: A wide-band stretch lasts at least this long, in s; the edges of a test pulse make
#: one or two blocks loud, not five.
MIN_LOUD_S = 0.1


@dataclass(frozen=True)
class Step:
    """A rectangular current step found in (or given for) one sweep.

    Parameters
    ----------
    onset : int
        Index of the first sample at the new current level.
    offset : int
        Index of the first sample after the step (the next level starts there).
    amplitude_A : float
        Step amplitude relative to the level just before the step, in A.
    sample_rate_hz : float
        Sampling rate, in Hz.
    holding_A : float
        The sweep's holding level (the level it starts at), in A.
    baseline_start : int
        Index where the flat level before the step begins (its pre-step baseline
        runs from here to `onset`); 0 when unknown.
    level_before_A : float or None
        The current just before the step, in A; None means `holding_A`.
    region_end : int or None
        Index where the sweep's next step begins: the step's response (its tail
        included) is read up to here. None: up to the end of the sweep.
    waveform_from : int or None
        Index where a wide-band or otherwise non-rectangular current (noise, a chirp)
        begins after the step, found by reading only the sweep's quiet stretch before
        it; the step's response is read no further. None: no such waveform was cut off.
    """

    onset: int
    offset: int
    amplitude_A: float
    sample_rate_hz: float
    holding_A: float = 0.0
    baseline_start: int = 0
    level_before_A: float | None = None
    region_end: int | None = None
    waveform_from: int | None = None

    @property
    def duration_s(self) -> float:
        return (self.offset - self.onset) / self.sample_rate_hz

    @property
    def onset_s(self) -> float:
        return self.onset / self.sample_rate_hz

    @property
    def offset_s(self) -> float:
        return self.offset / self.sample_rate_hz

    @property
    def baseline_s(self) -> float:
        """Length of the flat baseline before the step, in s."""
        return (self.onset - self.baseline_start) / self.sample_rate_hz

    @property
    def level_A(self) -> float:
        """The current during the step, in A."""
        return self.before_A + self.amplitude_A

    @property
    def before_A(self) -> float:
        """The current just before the step, in A."""
        return self.holding_A if self.level_before_A is None else self.level_before_A

    @property
    def from_rest(self) -> bool:
        """Whether the step leaves the holding level (not another step's level)."""
        tolerance = _SAME_LEVEL_FRACTION * abs(self.amplitude_A)
        return abs(self.before_A - self.holding_A) <= tolerance

    @property
    def kind(self) -> str:
        """"step" when the charging phase can be fitted, "pulse" for a brief pulse."""
        return "pulse" if self.duration_s <= PULSE_MAX_S * (1 + 1e-9) else "step"


@dataclass(frozen=True)
class Segment:
    """One stretch of a sweep's current between two edges.

    Parameters
    ----------
    start, stop : int
        First sample and the sample after the last one.
    level_A : float
        Robust (median) level, in A.
    trend_A : float
        Change across the segment of a straight line fitted to it, in A: large for
        a ramp, near zero for a flat level.
    flat : bool
        Whether the segment is a flat level (not part of a ramp or other waveform).
    spread_A : float
        Range between the 1st and 99th percentile of the (median-filtered) current
        within the segment, in A.
    sloped : bool
        Whether the segment is a change too slow to be an edge (part of a ramp).
    """

    start: int
    stop: int
    level_A: float
    trend_A: float
    flat: bool
    spread_A: float = 0.0
    sloped: bool = False


def noise_sd(x: np.ndarray) -> float:
    """Sample-to-sample noise of a trace, from the median absolute first difference.

    Parameters
    ----------
    x : ndarray
        Any sampled trace (e.g. a current, in A).

    Returns
    -------
    float
        Robust standard deviation of white noise on `x`, in the units of `x`;
        0 for a piecewise-constant (command) waveform.
    """
    d = np.diff(np.asarray(x, dtype=np.float64))
    if d.size == 0:
        return 0.0
    return float(np.median(np.abs(d - np.median(d))) / 0.6745 / np.sqrt(2.0))


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    edges = np.flatnonzero(np.diff(np.concatenate(([0], mask.view(np.int8), [0]))))
    return list(zip(edges[0::2].tolist(), edges[1::2].tolist(), strict=True))


def _median_window(x: np.ndarray, fs: float) -> int:
    """Running-median width: 1 for a clean command, ~MIN_DURATION_S for a noisy trace."""
    if noise_sd(x) == 0.0:
        return 1
    return max(3, int(round(MIN_DURATION_S * fs)) | 1)


def _threshold(d: np.ndarray, min_amplitude_A: float):
    """Edge threshold from the detector's own noise (robust to edges and spikes), over
    the last axis of `d`: a float for one trace, one per row for blocks of it.

    The median absolute deviation is 0 for a current quantized coarser than its
    noise, so the 90th percentile of the absolute deviation (1.645 sd for Gaussian
    noise) stands in for it then.
    """
    spread = np.abs(d - np.median(d, axis=-1, keepdims=True))
    sd = np.maximum(np.median(spread, axis=-1) / 0.6745,
                    np.percentile(spread, 90, axis=-1) / 1.645)
    out = np.maximum(min_amplitude_A, EDGE_NOISE_SD * sd)
    return float(out) if out.ndim == 0 else out


def _edges(f: np.ndarray, fs: float, threshold: float) -> tuple[list[int], list[tuple[int, int]]]:
    """Sharp level changes of the filtered trace `f`, and the spans of slow ones."""
    n = f.size
    h = max(1, int(round(EDGE_HALF_WIDTH_S * fs)))
    if n <= 2 * h + 1:
        return [], []
    d = np.zeros(n)
    d[h : n - h] = f[2 * h :] - f[: n - 2 * h]
    edges, slow = [], []
    max_run = 2 * h + int(round(MAX_EDGE_RISE_S * fs))
    for sign in (1.0, -1.0):
        for a, b in _runs(sign * d > threshold):
            if b - a > max_run:
                slow.append((a, b))
                continue
            peak = a + int(np.argmax(sign * d[a:b]))
            before, after = f[max(peak - h, 0)], f[min(peak + h, n - 1)]
            mid = 0.5 * (before + after)
            lo, hi = max(a - h, 1), min(b + h, n)
            crossed = np.flatnonzero(sign * (f[lo:hi] - mid) > 0)
            edges.append(lo + int(crossed[0]) if crossed.size else peak)
    return sorted(set(edges)), slow


def _trimmed_mean(part: np.ndarray, share: float = 0.1) -> float:
    """Mean of `part` without its `share` lowest and highest values: as robust as the
    median to brief capacitive spikes, but not snapped to the quantization of a coarsely
    digitized recorded current (3 pA steps put a median 1.3 pA off a −50 pA step)."""
    n = part.size
    cut = int(share * n)
    if cut == 0 or n - 2 * cut < 1:
        return float(np.median(part))
    kept = np.partition(part, (cut, n - cut - 1))[cut:n - cut]
    return float(np.mean(kept))


def _segment(x: np.ndarray, f: np.ndarray, start: int, stop: int, trim: int,
             threshold: float) -> Segment:
    """A segment's level, trend and flatness (trend and 1–99 % spread within threshold)."""
    k = min(trim, (stop - start) // 4)
    part = x[start + k : stop - k]
    level = _trimmed_mean(part)
    trend, spread = 0.0, 0.0
    if part.size > 2:
        t = np.arange(part.size, dtype=np.float64) - (part.size - 1) / 2   # centred
        trend = float(t @ part / (t @ t)) * (stop - start)   # least-squares slope
        low, high = np.percentile(f[start + k : stop - k], [1, 99])
        spread = float(high - low)
    flat = abs(trend) <= threshold and spread <= threshold
    return Segment(start, stop, level, trend, flat, spread)


def segments(current: np.ndarray, sample_rate_hz: float,
             min_amplitude_A: float = MIN_AMPLITUDE_A) -> list[Segment]:
    """Split a sweep's current into flat levels (and non-flat stretches) at its edges.

    Parameters
    ----------
    current : ndarray
        Command or recorded current of one sweep, in A.
    sample_rate_hz : float
        Sampling rate, in Hz.
    min_amplitude_A : float
        Level changes smaller than this are not edges, in A (a noisy trace sets a
        higher threshold from its own noise).

    Returns
    -------
    list of Segment
        Consecutive segments covering the sweep; adjacent flat segments differ by
        more than the threshold; none is shorter than `MIN_DURATION_S` unless the
        sweep is.
    """
    return _split(current, sample_rate_hz, min_amplitude_A)[0]


def _filtered(x: np.ndarray, fs: float) -> tuple[np.ndarray, int]:
    """The trace after the running median (`_median_window`), and the median's width."""
    width = _median_window(x, fs)
    if width == 1:
        return x, width
    from scipy.ndimage import median_filter  # lazy: reading a file needs no scipy

    return median_filter(x, size=width, mode="nearest"), width


def _differences(f: np.ndarray, fs: float) -> np.ndarray:
    """The edge detector: the filtered trace's change across 2 x EDGE_HALF_WIDTH_S."""
    n = f.size
    h = max(1, int(round(EDGE_HALF_WIDTH_S * fs)))
    return f[2 * h :] - f[: n - 2 * h] if n > 2 * h else np.zeros(1)


def _split(current: np.ndarray, sample_rate_hz: float, min_amplitude_A: float,
           threshold: float | None = None) -> tuple[list[Segment], float]:
    """`segments` and the edge threshold they were cut with, in A (the trace's own, from
    `_threshold`, unless `threshold` is given)."""
    x = np.asarray(current, dtype=np.float64)
    n = x.size
    fs = float(sample_rate_hz)
    if n == 0:
        return [], min_amplitude_A
    f, width = _filtered(x, fs)
    if threshold is None:
        threshold = _threshold(_differences(f, fs), min_amplitude_A)
    edges, slow = _edges(f, fs, threshold)
    cuts = sorted({0, n, *edges, *(c for span in slow for c in span)})
    trim = width + 1
    slow_set = set(slow)
    segs = []
    for a, b in zip(cuts[:-1], cuts[1:], strict=True):
        if b > a:
            seg = _segment(x, f, a, b, trim, threshold)
            if (a, b) in slow_set:
                seg = Segment(a, b, seg.level_A, seg.trend_A, False, seg.spread_A, True)
            segs.append(seg)
    merged = _merge(x, f, segs, threshold, int(round(MIN_DURATION_S * fs)), trim)
    return _allow_drift(merged, threshold), threshold


def _allow_drift(segs: list[Segment], threshold: float) -> list[Segment]:
    """Count a level as flat when it wanders by less than half the edges beside it.

    A recorded holding current may drift over a long sweep by more than the edge
    threshold; beside a step of 50 pA a 10 pA drift is still a flat level, while a
    ramp changes by about as much as the edge that ends it.
    """
    out = []
    for k, s in enumerate(segs):
        if s.flat or s.sloped:
            out.append(s)
            continue
        beside = [abs(segs[j].level_A - s.level_A) for j in (k - 1, k + 1)
                  if 0 <= j < len(segs) and not segs[j].sloped]
        tolerance = max(threshold, 0.5 * max(beside, default=0.0))
        flat = abs(s.trend_A) <= tolerance and s.spread_A <= tolerance
        out.append(Segment(s.start, s.stop, s.level_A, s.trend_A, flat, s.spread_A, s.sloped))
    return out


def _merge(x: np.ndarray, f: np.ndarray, segs: list[Segment], threshold: float,
           min_len: int, trim: int) -> list[Segment]:
    """Join neighbours at the same level and absorb segments shorter than `min_len`."""
    changed = True
    while changed and len(segs) > 1:
        changed = False
        for k, s in enumerate(segs):
            short = s.stop - s.start < min_len
            nxt = segs[k + 1] if k + 1 < len(segs) else None
            same = (nxt is not None and s.flat and nxt.flat
                    and abs(nxt.level_A - s.level_A) < 0.5 * threshold)
            if not (short or same):
                continue
            if same:
                j = k + 1
            else:  # a short segment joins the neighbour closest in level
                options = [j for j in (k - 1, k + 1) if 0 <= j < len(segs)]
                j = min(options, key=lambda i: abs(segs[i].level_A - s.level_A))
            a, b = sorted((k, j))
            joined = _segment(x, f, segs[a].start, segs[b].stop, trim, threshold)
            flat = (segs[a].flat or short) and (segs[b].flat or short) and joined.flat
            sloped = (segs[a].sloped and not short) or (segs[b].sloped and not short)
            segs = [*segs[:a], Segment(joined.start, joined.stop, joined.level_A,
                                       joined.trend_A, flat, joined.spread_A, sloped),
                    *segs[b + 1:]]
            changed = True
            break
    return segs


def find_steps(current: np.ndarray, sample_rate_hz: float,
               min_amplitude_A: float = MIN_AMPLITUDE_A) -> list[Step]:
    """Every step and pulse of one sweep, in time order.

    Each flat level that differs from the holding level (the sweep's first level) is
    one step, measured against the level just before it. A level entered straight
    from another step (a second step that follows the first at once) is listed as a
    step of its own, not from rest. Ramps and other non-flat stretches are never
    steps, and neither is a flat level next to one.

    Parameters
    ----------
    current : ndarray
        Command or recorded current of one sweep, in A.
    sample_rate_hz : float
        Sampling rate, in Hz.
    min_amplitude_A : float
        Smaller level changes are not steps, in A (noisy traces need more: see
        `segments`).

    Returns
    -------
    list of Step
        Empty when the sweep holds no step.
    """
    x = np.ascontiguousarray(current, dtype=np.float64)
    key = (hashlib.sha256(x).digest(), x.size, float(sample_rate_hz),   # sha256: SHA instructions
           float(min_amplitude_A))
    if key not in _FOUND:   # the reader and the analysis both ask, for every sweep
        if len(_FOUND) >= _FOUND_SIZE:
            del _FOUND[next(iter(_FOUND))]
        _FOUND[key] = tuple(_find_steps(x, float(sample_rate_hz), min_amplitude_A))
    return list(_FOUND[key])


#: Steps found per sweep, by the digest of its current (oldest dropped first)
_FOUND: dict[tuple, tuple[Step, ...]] = {}
_FOUND_SIZE = 1024


def _find_steps(current: np.ndarray, sample_rate_hz: float,
                min_amplitude_A: float) -> list[Step]:
    segs, threshold = _split(current, sample_rate_hz, min_amplitude_A)
    steps = _steps_of(segs, threshold, sample_rate_hz)
    if _first_analysable(steps) is None:
        return _before_waveform(current, sample_rate_hz, min_amplitude_A) or steps
    return steps


def _steps_of(segs: list[Segment], threshold: float, sample_rate_hz: float) -> list[Step]:
    """The steps among a sweep's segments (`find_steps`' rule)."""
    if len(segs) < 2 or not segs[0].flat:
        return []
    holding = segs[0].level_A
    steps = []
    for k in range(1, len(segs)):
        before, seg = segs[k - 1], segs[k]
        if not (seg.flat and before.flat):
            continue
        drift = 0.5 * (abs(seg.trend_A) + abs(segs[0].trend_A))
        if abs(seg.level_A - holding) <= max(threshold, drift):
            continue  # back to rest (within noise and drift): the end of the step before
        nxt = segs[k + 1] if k + 1 < len(segs) else None
        if nxt is not None and not nxt.flat:
            continue  # a plateau running into a ramp
        steps.append(Step(seg.start, seg.stop, seg.level_A - before.level_A,
                          float(sample_rate_hz), holding, before.start, before.level_A))
    return steps


def _quantum(x: np.ndarray) -> float:
    """The smallest change between two of the trace's values (its digitization step)."""
    gaps = np.diff(np.unique(x))
    return float(gaps[gaps > 0].min()) if np.any(gaps > 0) else 0.0


def _loud_start(d: np.ndarray, fs: float, min_amplitude_A: float,
                quantum: float) -> tuple[int | None, float]:
    """Where the first wide-band stretch of a sweep begins in the detector `d`, and the
    edge threshold of the quiet blocks before it, in A.

    Each QUIET_BLOCK_S block gets its own edge threshold (`_threshold` of its rows); the quietest
    block, though never below what one digitization step gives, is the reference. The
    first run of MIN_LOUD_S of blocks above LOUD_FACTOR times it is the wide-band
    stretch. (None, 0) when there is none; (0, 0) when it starts the sweep.
    """
    m = max(1, int(round(QUIET_BLOCK_S * fs)))
    n_blocks = d.size // m
    if n_blocks < 2:
        return None, 0.0
    thresholds = _threshold(d[: n_blocks * m].reshape(n_blocks, m), min_amplitude_A)
    reference = max(float(thresholds.min()), EDGE_NOISE_SD * quantum / 1.645)
    loud = thresholds > LOUD_FACTOR * reference
    run = max(1, int(np.ceil(MIN_LOUD_S / QUIET_BLOCK_S)))
    first = next((a for a, b in _runs(loud) if b - a >= run), None)
    if first is None:
        return None, 0.0
    return first * m, float(np.median(thresholds[:first])) if first else 0.0


def _wideband_start(x: np.ndarray, fs: float, min_amplitude_A: float
                    ) -> tuple[int | None, float, np.ndarray, int]:
    """`_loud_start` of a trace, with its filtered trace and the running median's width."""
    f, width = _filtered(x, fs)
    loud, threshold = _loud_start(_differences(f, fs), fs, min_amplitude_A, _quantum(x))
    return loud, threshold, f, width


def _before_waveform(current: np.ndarray, sample_rate_hz: float,
                     min_amplitude_A: float) -> list[Step]:
    """The steps of the quiet stretch before a sweep's first wide-band stretch.

    The stretch runs from the sweep's start to the first wide-band stretch
    (`_loud_start`) and is cut with the edge threshold of its quiet blocks; it ends
    where the waveform begins (`_quiet_part`). Its steps carry that end as
    `Step.waveform_from`; a level running straight into the waveform is not a step.
    Empty when there is no such stretch or it holds no analysable step.
    """
    x = np.asarray(current, dtype=np.float64)
    fs = float(sample_rate_hz)
    loud, threshold, f, width = _wideband_start(x, fs, min_amplitude_A)
    if not loud:   # no wide-band stretch, or one from the sweep's start
        return []
    end = loud + max(1, int(round(EDGE_HALF_WIDTH_S * fs)))   # d[i] is centred on f[i + h]
    segs, threshold = _split(x[:end], fs, min_amplitude_A, threshold)
    quiet, stop = _quiet_part(x[:end], f[:end], segs, threshold, width + 1, fs)
    if len(quiet) < 2:
        return []
    waveform = Segment(stop, end, quiet[-1].level_A, 0.0, False)
    steps = [replace(s, waveform_from=stop)
             for s in _steps_of([*quiet, waveform], threshold, fs) if s.offset <= stop]
    return steps if _first_analysable(steps) is not None else []


def _quiet_part(x: np.ndarray, f: np.ndarray, segs: list[Segment], threshold: float,
                trim: int, fs: float) -> tuple[list[Segment], int]:
    """The flat levels of a stretch up to where a waveform begins, and that sample.

    The waveform begins at the first segment that is not a flat level, or, when that
    segment starts smoothly (a chirp's or a sine's first slow cycle, with no edge), where
    it first leaves its opening level by half the edge threshold; with no such segment,
    at the last level unless that is the holding level (the stretch was cut a little
    into the waveform).
    """
    k = next((i for i, s in enumerate(segs) if not s.flat), None)
    if k is None:
        last = segs[-1]
        if abs(last.level_A - segs[0].level_A) <= threshold:
            return segs, last.stop
        return segs[:-1], last.start
    s = segs[k]
    opening = float(np.median(f[s.start : s.start + int(round(QUIET_BLOCK_S * fs))]))
    away = np.flatnonzero(np.abs(f[s.start : s.stop] - opening) > 0.5 * threshold)
    leaves = s.start + (int(away[0]) if away.size else s.stop - s.start)
    if leaves - s.start >= int(round(MIN_BASELINE_S * fs)):
        level = _segment(x, f, s.start, leaves, trim, threshold)
        if level.flat:
            return [*segs[:k], level], leaves
    return segs[:k], s.start


def analysable(step: Step, min_baseline_s: float = MIN_BASELINE_S) -> bool:
    """Whether a step is one to analyse: from rest, with a baseline of `min_baseline_s`."""
    return step.from_rest and step.baseline_s >= min_baseline_s


def _first_analysable(steps: list[Step], min_baseline_s: float = MIN_BASELINE_S
                      ) -> Step | None:
    """The first analysable step of at least SETTLED_STEP_S, else the first analysable
    one of any length (a brief pulse, a short step)."""
    usable = [s for s in steps if analysable(s, min_baseline_s)]
    return next((s for s in usable if s.duration_s >= SETTLED_STEP_S), None) or next(
        iter(usable), None)


def find_step(current: np.ndarray, sample_rate_hz: float,
              min_amplitude_A: float = MIN_AMPLITUDE_A) -> Step | None:
    """The step of a sweep that a physiologist would analyse.

    The rule: of all steps and pulses (`find_steps`), the first that leaves the
    holding level (not another step's level) after at least `MIN_BASELINE_S` of flat
    baseline and lasts at least `SETTLED_STEP_S`; without one that long, the first of
    any length. A test pulse before a train is therefore chosen over the train, the
    first of two consecutive steps over the second, and a long step over a brief test
    pulse before it.

    Parameters
    ----------
    current : ndarray
        Command or recorded current of one sweep, in A.
    sample_rate_hz : float
        Sampling rate, in Hz.
    min_amplitude_A : float
        Smaller deviations are not a step, in A.

    Returns
    -------
    Step or None
        None when the sweep holds no such step.
    """
    return _first_analysable(find_steps(current, sample_rate_hz, min_amplitude_A))


def common_steps(per_sweep: list[list[Step]],
                 min_baseline_s: float = MIN_BASELINE_S) -> list[Step | None]:
    """One step per sweep, all at the protocol's analysed position.

    Each sweep's analysable step (`find_step`'s rule) votes for its onset; the
    onset with most votes wins, and every sweep gets its analysable step starting
    there (within 1 ms), or None. A sweep whose variable step is 0 pA then gives None
    instead of the next step in its sweep. Where some sweeps hold a step of
    SETTLED_STEP_S or longer, only those vote: in a file of several protocols whose
    sweeps all begin with a brief test pulse, the long steps are analysed, not the
    pulses of the ramps and noise sweeps.

    Parameters
    ----------
    per_sweep : list of list of Step
        `find_steps` of every sweep.
    min_baseline_s : float
        Baseline wanted before a step, in s.

    Returns
    -------
    list of (Step or None)
        One entry per sweep.
    """
    firsts = [s for s in (_first_analysable(steps, min_baseline_s) for steps in per_sweep)
              if s is not None]
    settled = [s for s in firsts if s.duration_s >= SETTLED_STEP_S]
    onsets = np.asarray([s.onset_s for s in settled or firsts])
    if onsets.size == 0:
        return [None] * len(per_sweep)
    votes = [int(np.count_nonzero(np.abs(onsets - t) <= _SAME_ONSET_S)) for t in onsets]
    chosen = float(onsets[int(np.argmax(votes))])
    out: list[Step | None] = []
    for steps in per_sweep:
        near = [s for s in steps if analysable(s, min_baseline_s)
                and abs(s.onset_s - chosen) <= _SAME_ONSET_S]
        out.append(near[0] if near else None)
    return out


def classify_stimulus(current: np.ndarray | None, sample_rate_hz: float,
                      min_amplitude_A: float = MIN_AMPLITUDE_A) -> str:
    """What a sweep's current holds: "step", "pulse", "ramp", "waveform" or "none".

    Parameters
    ----------
    current : ndarray or None
        Command or recorded current of one sweep, in A; None gives "none".
    sample_rate_hz : float
        Sampling rate, in Hz.
    min_amplitude_A : float
        Smaller changes are not a stimulus, in A.

    Returns
    -------
    str
        "step" when an analysable step longer than `PULSE_MAX_S` exists, "pulse"
        when only brief pulses do, "ramp" when the current changes steadily in one
        direction over a long stretch, "waveform" for other changes (sines, noise
        stimuli), "none" for a flat current.
    """
    if current is None:
        return "none"
    steps = [s for s in find_steps(current, sample_rate_hz, min_amplitude_A) if analysable(s)]
    if any(s.kind == "step" for s in steps):
        return "step"
    if steps:
        return "pulse"
    segs = segments(current, sample_rate_hz, min_amplitude_A)
    bent = [s for s in segs if not s.flat]
    x = np.asarray(current, dtype=np.float64)
    if not bent and len(segs) < 2:
        # flat at the whole sweep's threshold, unless a wide-band stretch (noise) set it
        wide = _wideband_start(x, float(sample_rate_hz), min_amplitude_A)[0]
        return "none" if wide is None else "waveform"
    for s in bent:
        part = x[s.start:s.stop]
        if part.size > 2 and _monotone(part):
            return "ramp"
    return "waveform"  # levels but none usable as a step from rest, or a sine, noise...


def _monotone(part: np.ndarray, bins: int = 10) -> bool:
    """A stretch that moves one way: the medians of its tenths rise (or fall) in turn."""
    if part.size < 2 * bins:
        d = np.diff(part)
    else:
        d = np.diff([np.median(c) for c in np.array_split(part, bins)])
    moving = d[d != 0]
    return moving.size > 0 and (bool(np.all(moving > 0)) or bool(np.all(moving < 0)))
