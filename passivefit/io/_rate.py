"""Sampling-rate helpers shared by the readers (numpy only)."""

from __future__ import annotations

import numpy as np

# A rate within this relative distance of a whole number of Hz is that whole number:
# headers store the sample interval as float32 (~6e-8 relative) and text files round
# their time column, so 22050 Hz may arrive as 22049.99997 Hz.
_WHOLE_HZ_RTOL = 1e-6

# Largest deviation of a time column from an even grid, as a fraction of one interval,
# that still counts as uniform sampling (text files round their times).
_GRID_TOLERANCE = 0.1


def whole_hz(rate_hz: float) -> float:
    """Snap a sampling rate to the nearest whole hertz when it is that close.

    Parameters
    ----------
    rate_hz : float
        Sampling rate computed from a sample interval, in Hz.

    Returns
    -------
    float
        The nearest whole number of Hz when within 1e-6 relative, else `rate_hz`.
    """
    nearest = round(rate_hz)
    if nearest > 0 and abs(rate_hz - nearest) <= _WHOLE_HZ_RTOL * rate_hz:
        return float(nearest)
    return float(rate_hz)


def rate_from_times(t_s: np.ndarray) -> float:
    """Sampling rate of an evenly sampled time axis, in Hz.

    Parameters
    ----------
    t_s : ndarray
        Sample times, in s; at least two, strictly increasing, evenly spaced.

    Returns
    -------
    float
        Sampling rate, in Hz (snapped to whole Hz when that close).

    Raises
    ------
    ValueError
        When the times are too few, not finite, not increasing or not evenly spaced;
        the message says which sample breaks the rule.
    """
    t = np.asarray(t_s, dtype=np.float64)
    if t.size < 2:
        raise ValueError("the time column needs at least two samples")
    if not np.all(np.isfinite(t)):
        bad = int(np.flatnonzero(~np.isfinite(t))[0])
        raise ValueError(f"time value {bad} is not a finite number")
    steps = np.diff(t)
    if np.any(steps <= 0):
        bad = int(np.flatnonzero(steps <= 0)[0]) + 1
        raise ValueError(f"time does not increase at sample {bad} ({t[bad - 1]!r} then {t[bad]!r})")
    # least-squares line through (index, time): rounding of the times averages out
    index = np.arange(t.size) - 0.5 * (t.size - 1)
    dt = float(np.dot(index, t - t.mean()) / np.dot(index, index))
    off_grid = np.abs(t - (t.mean() + index * dt))
    worst = int(np.argmax(off_grid))
    if off_grid[worst] > _GRID_TOLERANCE * dt:
        raise ValueError(
            f"time is not evenly sampled: sample {worst} is {off_grid[worst] / dt:.2f} "
            f"intervals off an even grid of {dt!r} s; resample to a fixed rate"
        )
    return whole_hz(1.0 / dt)
