"""Spontaneous synaptic events in a fit residual, told apart from sag, rebound, hum and noise.

The detector is a centred matched filter. At every candidate onset t0 it fits, by least
squares over a window from `pre_s` before to `post_s` after t0, an event template
(biexponential: fast rise, decay of tens of ms, onset at t0) plus a local polynomial
background (quadratic by default). The template amplitude is the detector's output.
Because the background is fitted on both sides of t0, anything smooth over the window
— sag and rebound (relaxations of 50–150 ms), slow drift, slow misfit — is absorbed by
the polynomial and barely moves the amplitude; an event's sharp onset cannot be. The
same filter run over event-free baseline gives the noise model: the robust sd of the
amplitude there, which includes whatever the recording's noise is made of (white,
low-pass filtered, correlated, mains hum), so z = amplitude / that sd needs no
assumption about the noise spectrum.

Windows are never padded or truncated at the start of a segment: the first `skip_s`
are ignored (misfit of fast components right after an edge) and the first onset
considered is `pre_s` later. At the end of a segment the window is shortened (down to
`min_post_s`) and the fit and its noise are recomputed for the shorter window.

All quantities are SI (V, s, Hz).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from passivefit.core.qc import fft_length, robust_sd

__all__ = [
    "EVENT_Z",
    "Event",
    "EventShape",
    "NoiseModel",
    "detect_events",
    "detect_events_many",
    "event_scan",
    "largest_event_z",
    "noise_model",
]

EVENT_Z = 8.0
"""Default detection threshold, in detector noise sds (see tests/test_events.py for the
false-detection and detection rates measured with it)."""

_SHORT_LAG_S = 3e-3  # noise correlation beyond this lag is left to the direct estimate


@dataclass(frozen=True)
class EventShape:
    """Template and window of the detector.

    Parameters
    ----------
    rise_s : float
        Rise time constant of the event template, in s.
    decay_s : float
        Decay time constant of the event template, in s.
    pre_s : float
        Window before the onset on which the background is fitted, in s.
    post_s : float
        Window after the onset, in s.
    min_post_s : float
        Shortest window after the onset at the end of a segment, in s.
    degree : int
        Degree of the local polynomial background (2: quadratic).
    hum_hz : tuple of float
        Mains frequencies (and harmonics) whose sine and cosine are fitted with the
        background, in Hz; () for none.
    """

    rise_s: float = 1e-3
    decay_s: float = 15e-3
    pre_s: float = 5e-3
    post_s: float = 40e-3
    min_post_s: float = 10e-3
    degree: int = 2
    hum_hz: tuple[float, ...] = (50.0,)

    def __post_init__(self) -> None:
        for name in ("rise_s", "decay_s", "pre_s", "post_s", "min_post_s"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0):
                raise ValueError(f"`{name}` must be a finite positive number, got {value!r}")
        if not self.decay_s > self.rise_s:
            raise ValueError("`decay_s` must be longer than `rise_s`")
        if not self.min_post_s <= self.post_s:
            raise ValueError("`min_post_s` must not exceed `post_s`")
        if self.degree not in (0, 1, 2, 3):
            raise ValueError(f"`degree` must be 0, 1, 2 or 3, got {self.degree!r}")

    def template(self, fs_hz: float, duration_s: float) -> np.ndarray:
        """The event from its onset, peak 1, sampled at `fs_hz` for `duration_s`."""
        t = np.arange(max(1, int(round(duration_s * fs_hz)))) / fs_hz
        shape = np.exp(-t / self.decay_s) - np.exp(-t / self.rise_s)
        ratio = self.decay_s / self.rise_s
        t_peak = self.rise_s * self.decay_s / (self.decay_s - self.rise_s) * math.log(ratio)
        peak = math.exp(-t_peak / self.decay_s) - math.exp(-t_peak / self.rise_s)
        return shape / peak

    def samples(self, fs_hz: float) -> tuple[int, int, int]:
        """(pre, post, min_post) in samples at `fs_hz`."""
        return (
            max(1, int(round(self.pre_s * fs_hz))),
            max(2, int(round(self.post_s * fs_hz))),
            max(2, int(round(self.min_post_s * fs_hz))),
        )


@dataclass(frozen=True)
class NoiseModel:
    """What the detector sees in event-free baseline.

    Parameters
    ----------
    sd_V : float
        Robust sd of the baseline after a 5-ms centred high-pass (raw noise level), in V.
    detector_sd_V : float
        Robust sd of the detector's amplitude on the baseline (full window), in V.
    n_samples : int
        Number of detector outputs the estimate rests on.
    fs_hz : float
        Sampling rate the model was made at, in Hz.
    shape : EventShape
        The detector the model belongs to.
    """

    sd_V: float
    detector_sd_V: float
    n_samples: int
    fs_hz: float
    shape: EventShape


@dataclass(frozen=True)
class Event:
    """One detected event.

    Parameters
    ----------
    time_s : float
        Onset, from the first sample of the residual given, in s.
    amplitude_V : float
        Peak amplitude of the fitted template, in V (positive: depolarizing).
    z : float
        amplitude_V over the detector's noise sd for its window (signed).
    """

    time_s: float
    amplitude_V: float
    z: float


# --------------------------------------------------------------------------- internals


def _window_kernels(shape: EventShape, fs_hz: float, n_pre: int, posts: np.ndarray
                    ) -> np.ndarray:
    """Row i: weights w over a window of `n_pre` samples before an onset and `posts[i]`
    after it (zero-padded to the longest), so that w · r is the least-squares template
    amplitude with the window's background (polynomial and mains hum) projected out.
    The windows' background bases are zero-padded to one length and orthonormalised
    together (numpy's QR works on stacks of matrices)."""
    width = n_pre + int(np.max(posts))
    rows = np.arange(width)
    n = n_pre + np.asarray(posts)[:, None]             # samples in each window
    inside = rows < n
    x = np.where(inside, -1.0 + 2.0 * rows / np.maximum(n - 1, 1), 0.0)
    columns = [np.where(inside, x**k, 0.0) for k in range(shape.degree + 1)]
    t = rows / fs_hz
    for f in shape.hum_hz:
        columns += [np.where(inside, np.sin(2 * np.pi * f * t), 0.0),
                    np.where(inside, np.cos(2 * np.pi * f * t), 0.0)]
    q, _ = np.linalg.qr(np.stack(columns, axis=-1))
    template = shape.template(fs_hz, (width - n_pre) / fs_hz)
    e = np.where(inside & (rows >= n_pre),
                 template[np.clip(rows - n_pre, 0, template.size - 1)], 0.0)
    e_perp = e - np.einsum("wnc,wc->wn", q, np.einsum("wnc,wn->wc", q, e))
    return e_perp / np.sum(e_perp**2, axis=1, keepdims=True)


@lru_cache(maxsize=4096)
def _kernel(shape: EventShape, fs_hz: float, n_pre: int, n_post: int) -> np.ndarray:
    """Weights w over the window so that w . r is the least-squares template amplitude."""
    kernel = _window_kernels(shape, fs_hz, n_pre, np.array([n_post]))[0]
    kernel.setflags(write=False)
    return kernel


@lru_cache(maxsize=64)
def _tail_kernels(shape: EventShape, fs_hz: float, n_pre: int, n_post: int, n_min: int
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Row m: the kernel of a window with m samples after the onset (n_min <= m < n_post),
    zero-padded to the full window; and its norm. Made 64 windows at a time."""
    kernels, norms = np.zeros((n_post, n_pre + n_post)), np.zeros(n_post)
    for a in range(n_min, n_post, 64):
        m = np.arange(a, min(a + 64, n_post))
        block = _window_kernels(shape, fs_hz, n_pre, m)
        kernels[m, :block.shape[1]] = block
        norms[m] = np.linalg.norm(block, axis=1)
    return kernels, norms


def _remove_background(x: np.ndarray, shape: EventShape, fs_hz: float) -> np.ndarray:
    """`x` less its least-squares straight line and mains hum (shape.hum_hz), along its
    last axis (each row of a 2-d `x` on its own)."""
    t = np.arange(x.shape[-1]) / fs_hz
    columns = [np.ones_like(t), t - t.mean()]
    for f in shape.hum_hz:
        columns += [np.sin(2 * np.pi * f * t), np.cos(2 * np.pi * f * t)]
    design = np.column_stack(columns)
    coef, *_ = np.linalg.lstsq(design, x.T, rcond=None)
    return x - (design @ coef).T


def _quadratic_form(acov: np.ndarray, kac: np.ndarray) -> float:
    """k' C k for a Toeplitz C from autocovariance `acov`, k's autocorrelation `kac`."""
    return float(acov[0] * kac[0] + 2.0 * (acov[1:] @ kac[1:]))


def _correlate_valid(x: np.ndarray, shape: EventShape, fs_hz: float, n_pre: int,
                     n_post: int) -> np.ndarray:
    """out[j] = sum_i w[i] * x[j + i] for every full overlap of the detector's full-window
    kernel w (:func:`_kernel`), along the last axis of `x` (each row of a 2-d `x` alike),
    by FFT (numpy's: the scipy.signal import alone costs more than a whole scan)."""
    n, k = x.shape[-1], n_pre + n_post
    if n < k:
        return np.zeros(x.shape[:-1] + (0,))
    size = fft_length(n + k - 1)
    spectrum = _kernel_spectrum(shape, fs_hz, n_pre, n_post, size)
    return np.fft.irfft(np.fft.rfft(x, size) * spectrum, size)[..., k - 1: n]


@lru_cache(maxsize=32)
def _kernel_spectrum(shape: EventShape, fs_hz: float, n_pre: int, n_post: int, size: int
                     ) -> np.ndarray:
    """rfft of the reversed full-window kernel, zero-padded to `size` (scans of one
    recording repeat the same few sizes)."""
    return np.fft.rfft(_kernel(shape, fs_hz, n_pre, n_post)[::-1], size)


def _as_noise(noise: NoiseModel | float, fs_hz: float, shape: EventShape) -> NoiseModel:
    """A NoiseModel; a bare sd (V) is taken as white noise of that sd."""
    if isinstance(noise, NoiseModel):
        if not math.isclose(noise.fs_hz, fs_hz, rel_tol=1e-9):
            raise ValueError(
                f"the noise model was made at {noise.fs_hz:g} Hz, the residual is at {fs_hz:g} Hz"
            )
        return noise
    sd = float(noise)
    if not (math.isfinite(sd) and sd > 0):
        raise ValueError(f"`noise` must be a NoiseModel or a positive sd in V, got {noise!r}")
    n_pre, n_post, _ = shape.samples(fs_hz)
    kernel = _kernel(shape, fs_hz, n_pre, n_post)
    return NoiseModel(sd, sd * float(np.linalg.norm(kernel)), 0, float(fs_hz), shape)


# --------------------------------------------------------------------------------- API


def noise_model(
    baseline_V: np.ndarray | Sequence[np.ndarray],
    fs_hz: float,
    *,
    shape: EventShape | None = None,
) -> NoiseModel:
    """Noise model of the detector from event-free baseline.

    Parameters
    ----------
    baseline_V : ndarray or sequence of ndarray
        Baseline voltage, in V: one segment, or several (e.g. the pre-step baseline of
        every sweep) pooled for a steadier estimate. Each segment must be longer than the
        detector window (pre_s + post_s, 45 ms by default); shorter ones are skipped.
    fs_hz : float
        Sampling rate, in Hz.
    shape : EventShape, optional
        Detector template and window (default EventShape()).

    Returns
    -------
    NoiseModel

    Raises
    ------
    ValueError
        If the segments give fewer than 100 detector outputs in all.
    """
    shape = shape or EventShape()
    if not (math.isfinite(fs_hz) and fs_hz > 0):
        raise ValueError(f"`fs_hz` must be a finite positive number, got {fs_hz!r}")
    segments = [baseline_V] if isinstance(baseline_V, np.ndarray) else list(baseline_V)
    n_pre, n_post, _ = shape.samples(fs_hz)
    kernel = _kernel(shape, fs_hz, n_pre, n_post)
    width = max(1, int(round(5e-3 * fs_hz)))
    max_lag = max(1, int(round(_SHORT_LAG_S * fs_hz)))
    outputs, highpassed, segment_sd = [], [], []
    acov, n_acov = np.zeros(max_lag + 1), 0
    kac = np.correlate(kernel, kernel, mode="full")[kernel.size - 1 : kernel.size + max_lag]
    by_size: dict[int, list[np.ndarray]] = {}   # segments of one length are done together
    for seg in segments:
        seg = np.asarray(seg, dtype=float)
        if seg.ndim != 1 or not np.all(np.isfinite(seg)):
            raise ValueError("each baseline segment must be a 1-d array of finite voltages")
        if seg.size >= kernel.size:
            by_size.setdefault(seg.size, []).append(seg)
    for size, group in by_size.items():
        rows = np.stack(group)
        outputs += list(_correlate_valid(rows, shape, fs_hz, n_pre, n_post))
        for seg in group:
            highpassed.append(seg[width // 2 : size - width + 1 + width // 2] - np.convolve(
                seg, np.ones(width) / width, mode="valid"))
        x = _remove_background(rows, shape, fs_hz)
        # the autocovariance of each row, lag by lag
        group_acov = np.stack([np.einsum("ij,ij->i", x[:, : size - lag], x[:, lag:])
                               for lag in range(max_lag + 1)], axis=1)
        for seg_acov in group_acov:
            acov += seg_acov
            n_acov += size
            segment_sd.append(math.sqrt(max(_quadratic_form(seg_acov / size, kac), 0.0)))
    n_out = sum(o.size for o in outputs)
    if n_out < 100:
        raise ValueError(
            f"the baseline is too short for the event detector: it needs segments of at "
            f"least {(kernel.size + 100) / fs_hz * 1e3:.0f} ms (window "
            f"{kernel.size / fs_hz * 1e3:.0f} ms)"
        )
    # Two estimates of the detector's noise sd, the larger kept: the robust sd of its
    # output (sees every kind of noise, but rests on few independent values in a short
    # baseline) and k' C k with C the baseline's autocovariance up to _SHORT_LAG_S and
    # zero beyond (precise for white or low-pass filtered noise).
    short_var = _quadratic_form(acov / n_acov, kac)
    detector_sd = max(robust_sd(np.concatenate(outputs)), math.sqrt(max(short_var, 0.0)))
    if len(outputs) >= 3:  # the median over segments resists an event in one of them
        per_segment = [max(robust_sd(o), sd) for o, sd in zip(outputs, segment_sd, strict=True)]
        detector_sd = float(np.median(per_segment))
    raw_sd = robust_sd(np.concatenate(highpassed))
    return NoiseModel(raw_sd, detector_sd, int(n_out), float(fs_hz), shape)


def event_scan(
    residual_V: np.ndarray,
    fs_hz: float,
    noise: NoiseModel | float,
    *,
    skip_s: float = 1e-3,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Detector output at every candidate onset.

    Parameters
    ----------
    residual_V : ndarray
        Data minus model over one segment, in V (an event-free baseline works too).
    fs_hz : float
        Sampling rate, in Hz.
    noise : NoiseModel or float
        From :func:`noise_model`; a bare float is taken as the sd (V) of white noise.
    skip_s : float
        Time at the start of the segment that is ignored, in s.

    Returns
    -------
    onset_s : ndarray
        Candidate onsets, from the first sample of `residual_V`, in s.
    amplitude_V : ndarray
        Least-squares template amplitude at each onset, in V.
    z : ndarray
        amplitude_V over its noise sd.
    """
    residual_V = np.asarray(residual_V, dtype=float)
    if residual_V.ndim != 1:
        raise ValueError("`residual_V` must be a 1-d array")
    noise = _as_noise(noise, fs_hz, noise.shape if isinstance(noise, NoiseModel) else EventShape())
    return _scan_rows(residual_V[None], fs_hz, noise, skip_s)[0]


def _scan_rows(rows: np.ndarray, fs_hz: float, noise: NoiseModel, skip_s: float
               ) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """:func:`event_scan` of each row of `rows` (residuals of one length, shape (m, N)),
    made together: one FFT and one product over the stack."""
    shape = noise.shape
    n_pre, n_post, n_min = shape.samples(fs_hz)
    start = max(0, int(round(skip_s * fs_hz)))
    r = rows[:, start:]
    n = r.shape[1]
    empty = np.zeros(0)
    if n < n_pre + n_min:
        return [(empty, empty, empty)] * rows.shape[0]
    full = _kernel(shape, fs_hz, n_pre, n_post)
    full_norm = float(np.linalg.norm(full))
    amp = np.full(r.shape, np.nan)
    sd = np.full(n, noise.detector_sd_V)
    if n >= full.size:
        amp[:, n_pre : n - n_post + 1] = _correlate_valid(r, shape, fs_hz, n_pre, n_post)
    # shortened windows at the end of the segment (m samples left after the onset)
    first, last = max(n_pre, n - n_post + 1), n - n_min   # onsets j, m = N - j
    if last >= first:
        kernels, norms = _tail_kernels(shape, fs_hz, n_pre, n_post, n_min)
        tail = slice(n - first, n - last - 1 if n - last > 0 else None, -1)
        end = np.concatenate((r[:, first - n_pre:], np.zeros((r.shape[0], n_post))), axis=1)
        windows = np.lib.stride_tricks.sliding_window_view(
            end, n_pre + n_post, axis=1)[:, :last - first + 1]
        # row-wise dot products, as a stack of (1 x n) @ (n x 1) products (BLAS)
        amp[:, first:last + 1] = np.matmul(kernels[tail][:, None, :],
                                           windows[..., None])[..., 0, 0]
        sd[first:last + 1] = noise.detector_sd_V * norms[tail] / full_norm
    valid = np.isfinite(amp)
    if not (valid == valid[0]).all():   # NaN in some residuals: each row apart
        return [((np.flatnonzero(ok) + start) / fs_hz, a[ok], a[ok] / sd[ok])
                for a, ok in zip(amp, valid, strict=True)]
    cols = np.flatnonzero(valid[0])   # the same onsets in every row
    onset, amp = (cols + start) / fs_hz, amp[:, cols]
    z = amp / sd[cols]
    return [(onset, a, row_z) for a, row_z in zip(amp, z, strict=True)]


def _onset_confirmed(
    r: np.ndarray, fs_hz: float, onset_s: np.ndarray, amp_V: np.ndarray, shape: EventShape
) -> np.ndarray:
    """Whether the local step at each onset is at least half the template's."""
    n_before = max(1, int(round(3e-3 * fs_hz)))
    a, b = max(1, int(round(1e-3 * fs_hz))), max(2, int(round(4e-3 * fs_hz)))
    expected = float(np.mean(shape.template(fs_hz, b / fs_hz)[a:b]))
    csum = np.concatenate(([0.0], np.cumsum(r)))
    j = np.round(onset_s * fs_hz).astype(int)
    lo, hi = np.clip(j - n_before, 0, r.size), np.clip(j + b, 0, r.size)
    before = (csum[j] - csum[lo]) / np.maximum(j - lo, 1)
    after = (csum[hi] - csum[np.minimum(j + a, hi)]) / np.maximum(hi - np.minimum(j + a, hi), 1)
    return (after - before) * np.sign(amp_V) >= 0.5 * expected * np.abs(amp_V)


def largest_event_z(
    residual_V: np.ndarray,
    fs_hz: float,
    noise: NoiseModel | float,
    *,
    skip_s: float = 1e-3,
) -> float:
    """Largest |z| of the detector over a segment (0 when the segment is too short).

    Parameters are those of :func:`event_scan`. Compare with :data:`EVENT_Z`.
    """
    _, _, z = event_scan(residual_V, fs_hz, noise, skip_s=skip_s)
    return float(np.max(np.abs(z))) if z.size else 0.0


def detect_events(
    residual_V: np.ndarray,
    fs_hz: float,
    noise: NoiseModel | float,
    *,
    threshold_z: float = EVENT_Z,
    skip_s: float = 1e-3,
    max_events: int = 50,
) -> tuple[Event, ...]:
    """Spontaneous synaptic events in a residual, largest first.

    Greedy: the onset of largest |z| is taken, its fitted template subtracted from the
    residual, and the scan repeated until no |z| reaches `threshold_z`. An onset counts
    only if the residual really steps there: the mean over 1–4 ms after it, less the
    mean over the 3 ms before it, must reach half of what the fitted template predicts
    (this drops the filter's opposite-sign side lobes ahead of a large event).

    Parameters
    ----------
    residual_V : ndarray
        Data minus model over one segment, in V.
    fs_hz : float
        Sampling rate, in Hz.
    noise : NoiseModel or float
        From :func:`noise_model` (preferred); a bare float is the sd (V) of white noise.
    threshold_z : float
        Detection threshold, in detector noise sds.
    skip_s : float
        Time at the start of the segment that is ignored, in s.
    max_events : int
        Most events returned.

    Returns
    -------
    tuple of Event
        In the order found (largest |z| first); times from the first sample of
        `residual_V`.
    """
    return detect_events_many([residual_V], fs_hz, noise, threshold_z=threshold_z,
                              skip_s=skip_s, max_events=max_events)[0]


def detect_events_many(
    residuals_V: Sequence[np.ndarray],
    fs_hz: float,
    noise: NoiseModel | float,
    *,
    threshold_z: float = EVENT_Z,
    skip_s: float = 1e-3,
    max_events: int = 50,
) -> list[tuple[Event, ...]]:
    """:func:`detect_events` of each residual, the first scans of residuals of one length
    made together (e.g. the same stretch of every sweep).

    Parameters are those of :func:`detect_events`, `residuals_V` a sequence of 1-d
    residuals; returns what it returns for each, in order.
    """
    if not (math.isfinite(threshold_z) and threshold_z > 0):
        raise ValueError(f"`threshold_z` must be a finite positive number, got {threshold_z!r}")
    noise = _as_noise(noise, fs_hz, noise.shape if isinstance(noise, NoiseModel) else EventShape())
    rows = [np.array(r, dtype=float) for r in residuals_V]
    if any(r.ndim != 1 for r in rows):
        raise ValueError("`residual_V` must be a 1-d array")
    by_size: dict[int, list[int]] = {}
    for i, r in enumerate(rows):
        by_size.setdefault(r.size, []).append(i)
    out: list = [None] * len(rows)
    for members in by_size.values():   # each group searched as soon as it is scanned
        scans = _scan_rows(np.stack([rows[i] for i in members]), fs_hz, noise, skip_s)
        for i, scan in zip(members, scans, strict=True):
            out[i] = _greedy(rows[i], fs_hz, noise, threshold_z, skip_s, max_events, scan)
    return out


def _greedy(r: np.ndarray, fs_hz: float, noise: NoiseModel, threshold_z: float,
            skip_s: float, max_events: int, scan: tuple) -> tuple[Event, ...]:
    """The greedy search of :func:`detect_events` in `r` (changed in place), from its
    first `scan` (:func:`event_scan`)."""
    template = None   # made when the first event is found
    events: list[Event] = []
    for _ in range(max_events):
        onset, amp, z = scan
        if z.size == 0:
            break
        strong = np.flatnonzero(np.abs(z) >= threshold_z)   # only these can be taken
        if strong.size == 0:
            break
        confirmed = strong[_onset_confirmed(r, fs_hz, onset[strong], amp[strong], noise.shape)]
        if confirmed.size == 0:
            break
        i = int(confirmed[np.argmax(np.abs(z[confirmed]))])
        events.append(Event(float(onset[i]), float(amp[i]), float(z[i])))
        if template is None:
            template = noise.shape.template(fs_hz, r.size / fs_hz)
        j = int(round(onset[i] * fs_hz))
        r[j:] -= amp[i] * template[: r.size - j]
        scan = _scan_rows(r[None], fs_hz, noise, skip_s)[0]
    return tuple(events)
