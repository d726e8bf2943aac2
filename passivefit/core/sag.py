"""Sag and rebound of one current-step sweep.

Sag ratio = steady-state deflection / peak deflection (1 = no sag), the definition of
Lübke, Frotscher & Spruston 1998 (J Neurophysiol), with both deflections from the
pre-step baseline. The peak is taken on a trace smoothed with a centred moving average
that never reaches across the step edges, so noise does not make a peak; the
steady state is the mean over the end of the step. Rebound is the overshoot beyond the
baseline after the step, opposite to the step's direction (depolarizing after a
hyperpolarizing step).

All quantities are SI (V, s, Hz).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from passivefit.core.qc import robust_sd

__all__ = ["Sag", "measure_sag", "sag_free_end_s"]

SAG_NOISE_FACTOR = 4.0
"""A peak beyond the steady state by less than this many sds of the smoothed trace is
taken as no sag (has_sag False)."""


@dataclass(frozen=True)
class Sag:
    """Sag and rebound measures of one step.

    Parameters
    ----------
    baseline_V : float
        Pre-step baseline, in V.
    peak_V : float
        Peak deflection from baseline during the step, signed (negative for a
        hyperpolarizing step), in V.
    peak_time_s : float
        Time of the peak from the step onset, in s.
    steady_V : float
        Steady-state deflection from baseline (mean over the step's end), signed, in V.
    ratio : float or None
        steady_V / peak_V (1 = no sag, smaller with more sag); None without a peak in
        the step's direction.
    noise_V : float
        Robust sd of the smoothed baseline and step end (each about its median), in V.
    has_sag : bool
        Whether the peak lies beyond the steady state by more than SAG_NOISE_FACTOR
        noise_V.
    rebound_V : float or None
        Largest excursion beyond the baseline after the step, in the direction opposite
        to the step, signed (positive after a hyperpolarizing step), 0 if the trace
        never crosses the baseline; None when nothing is recorded after the step.
    rebound_time_s : float or None
        Time of that excursion from the step end, in s; None without rebound.
    """

    baseline_V: float
    peak_V: float
    peak_time_s: float
    steady_V: float
    ratio: float | None
    noise_V: float
    has_sag: bool
    rebound_V: float | None
    rebound_time_s: float | None


def _smooth(v: np.ndarray, width: int) -> np.ndarray:
    """Centred moving average over `width` samples, only where the window is complete."""
    width = max(1, min(int(width), v.size))
    csum = np.concatenate(([0.0], np.cumsum(v)))
    return (csum[width:] - csum[:-width]) / width



def _refine_peak(x: np.ndarray, centre: int, half: int) -> tuple[float, float] | None:
    """(value, index) of the vertex of a parabola fitted to x around `centre`.

    None when the parabola has no maximum inside its window. Fitting the raw samples
    keeps noise from biasing the peak outward as the extreme of a smoothed trace does.
    """
    lo, hi = max(0, centre - half), min(x.size, centre + half + 1)
    if hi - lo < 5:
        return None
    k = np.arange(lo, hi) - centre
    c2, c1, c0 = np.polyfit(k, x[lo:hi], 2)
    if c2 >= 0:
        return None
    vertex = -c1 / (2 * c2)
    if not lo - centre <= vertex <= hi - 1 - centre:
        return None
    return float(c0 - c1 * c1 / (4 * c2)), float(centre + vertex)


def measure_sag(
    voltage_V: np.ndarray,
    fs_hz: float,
    onset_s: float,
    offset_s: float,
    *,
    baseline_V: float | None = None,
    direction: float | None = None,
    smooth_s: float = 5e-3,
    steady_s: float = 50e-3,
    rebound_s: float = 0.3,
) -> Sag:
    """Sag and rebound of one sweep with a current step from `onset_s` to `offset_s`.

    Parameters
    ----------
    voltage_V : ndarray
        Membrane potential of the whole sweep, in V.
    fs_hz : float
        Sampling rate, in Hz.
    onset_s, offset_s : float
        Step onset and end, from the sweep start, in s.
    baseline_V : float, optional
        Pre-step baseline, in V; by default the median of the sweep before the onset.
    direction : float, optional
        Sign of the step current (negative: hyperpolarizing); by default the sign of
        the steady-state deflection.
    smooth_s : float
        Width of the moving average used for the peaks, in s.
    steady_s : float
        Length of the step's end averaged for the steady state, in s (at most a fifth
        of the step).
    rebound_s : float
        How long after the step the rebound is looked for, in s.

    Returns
    -------
    Sag

    Raises
    ------
    ValueError
        If the step does not lie in the sweep or is too short to smooth, or there is no
        baseline.
    """
    v = np.asarray(voltage_V, dtype=float)
    if not (math.isfinite(fs_hz) and fs_hz > 0):
        raise ValueError(f"`fs_hz` must be a finite positive number, got {fs_hz!r}")
    on, off = int(round(onset_s * fs_hz)), int(round(offset_s * fs_hz))
    width = max(1, int(round(smooth_s * fs_hz)))
    if not 0 <= on < off <= v.size:
        raise ValueError(
            f"the step ({onset_s:g} s to {offset_s:g} s) does not lie in the sweep "
            f"({v.size / fs_hz:g} s)"
        )
    if off - on < 3 * width:
        raise ValueError(
            f"the step ({(off - on) / fs_hz * 1e3:g} ms) is too short for smoothing over "
            f"{smooth_s * 1e3:g} ms"
        )
    if baseline_V is None:
        if on < 2:
            raise ValueError("there is no baseline before the step: give `baseline_V`")
        baseline_V = float(np.median(v[:on]))
    n_steady = max(1, min(int(round(steady_s * fs_hz)), (off - on) // 5))
    steady = float(np.mean(v[off - n_steady : off])) - baseline_V
    sign = float(np.sign(direction if direction is not None else steady)) or 1.0

    step = sign * (_smooth(v[on:off], width) - baseline_V)
    i = int(np.argmax(step))
    peak = sign * float(step[i])
    peak_time = (i + (width - 1) / 2) / fs_hz
    half = max(2 * width, int(round(10e-3 * fs_hz)))
    centre = i + (width - 1) // 2
    refined = _refine_peak(sign * (v[on:off] - baseline_V), centre, half)
    if refined is not None and centre >= half:  # a peak clear of the onset's fast rise
        peak, peak_time = sign * refined[0], refined[1] / fs_hz
    # the smoothed trace's noise over both flat stretches, the baseline and the step's
    # end: a short baseline alone (a few smoothing widths) hides its slow noise
    flat = [_smooth(x, width) for x in (v[:on], v[off - n_steady:off]) if x.size >= 2 * width]
    deviations = np.concatenate([x - np.median(x) for x in flat] or [np.zeros(0)])
    noise = robust_sd(deviations) if deviations.size else 0.0
    ratio = steady / peak if sign * peak > 0 else None
    has_sag = sign * (peak - steady) > SAG_NOISE_FACTOR * noise

    rebound, rebound_time = None, None
    after = v[off : off + int(round(rebound_s * fs_hz))]
    if after.size >= width:
        tail = -sign * (_smooth(after, width) - baseline_V)
        j = int(np.argmax(tail))
        rebound = 0.0
        if tail[j] > 0:
            rebound = -sign * float(tail[j])
            rebound_time = (j + (width - 1) / 2) / fs_hz
            centre = j + (width - 1) // 2
            refined = _refine_peak(-sign * (after - baseline_V), centre, half)
            if refined is not None and centre >= half and refined[0] > 0:
                rebound, rebound_time = -sign * refined[0], refined[1] / fs_hz
    return Sag(
        float(baseline_V), peak, peak_time, steady, ratio, noise, bool(has_sag), rebound,
        rebound_time,
    )


def sag_free_end_s(
    voltage_V: np.ndarray,
    fs_hz: float,
    onset_s: float,
    offset_s: float,
    *,
    sag: Sag | None = None,
    fraction: float = 0.9,
    smooth_s: float = 5e-3,
) -> float:
    """How long after the onset a fit of the step response can run before sag shapes it.

    With a sag (has_sag), the time from the onset at which the smoothed deflection first
    reaches `fraction` of the peak deflection; without one, the whole step. The Ih that
    makes the sag acts from the onset on, so nothing is entirely free of it; the
    fraction trades fit length against its share (tests/test_sag.py measures it).

    Parameters
    ----------
    voltage_V : ndarray
        Membrane potential of the whole sweep, in V.
    fs_hz : float
        Sampling rate, in Hz.
    onset_s, offset_s : float
        Step onset and end, from the sweep start, in s.
    sag : Sag, optional
        The sweep's :func:`measure_sag` result (computed when not given).
    fraction : float
        Share of the peak deflection, between 0 and 1.
    smooth_s : float
        Width of the moving average, in s.

    Returns
    -------
    float
        Time from the onset, in s.
    """
    if not 0 < fraction <= 1:
        raise ValueError(f"`fraction` must lie in (0, 1], got {fraction!r}")
    if sag is None:
        sag = measure_sag(voltage_V, fs_hz, onset_s, offset_s, smooth_s=smooth_s)
    if not sag.has_sag:
        return float(offset_s - onset_s)
    v = np.asarray(voltage_V, dtype=float)
    on, off = int(round(onset_s * fs_hz)), int(round(offset_s * fs_hz))
    width = max(1, int(round(smooth_s * fs_hz)))
    sign = 1.0 if sag.peak_V > 0 else -1.0
    step = sign * (_smooth(v[on:off], width) - sag.baseline_V)
    reached = np.flatnonzero(step >= fraction * sign * sag.peak_V)
    i = int(reached[0]) if reached.size else int(np.argmax(step))
    return (i + (width - 1) / 2) / fs_hz
