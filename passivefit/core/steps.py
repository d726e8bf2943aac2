"""Find the current step (or brief pulse) in a sweep's command waveform."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: A step shorter than this is treated as a brief pulse: only its decay is fitted.
PULSE_MAX_S = 5e-3


@dataclass(frozen=True)
class Step:
    """A rectangular current step found in (or given for) one sweep.

    Parameters
    ----------
    onset : int
        Index of the first sample at the new current level.
    offset : int
        Index of the first sample after the step.
    amplitude_A : float
        Step amplitude relative to the holding current, in A.
    sample_rate_hz : float
        Sampling rate, in Hz.
    """

    onset: int
    offset: int
    amplitude_A: float
    sample_rate_hz: float

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
    def kind(self) -> str:
        """"step" when the charging phase can be fitted, "pulse" for a brief pulse."""
        return "pulse" if self.duration_s < PULSE_MAX_S else "step"


def find_step(current: np.ndarray, sample_rate_hz: float,
              min_amplitude_A: float = 0.5e-12) -> Step | None:
    """The longest rectangular deviation of `current` from its holding level.

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
        None when the sweep holds no step of at least `min_amplitude_A`.
    """
    current = np.asarray(current, dtype=np.float64)
    holding = float(np.median(current[: max(3, current.size // 20)]))
    deviation = current - holding
    peak = float(np.max(np.abs(deviation)))
    if peak < min_amplitude_A:
        return None
    sign = np.sign(deviation[np.argmax(np.abs(deviation))])
    inside = sign * deviation > 0.5 * peak
    edges = np.flatnonzero(np.diff(np.concatenate(([0], inside.view(np.int8), [0]))))
    starts, stops = edges[0::2], edges[1::2]
    longest = int(np.argmax(stops - starts))
    onset, offset = int(starts[longest]), int(stops[longest])
    if onset == 0:
        return None
    amplitude = float(np.median(deviation[onset:offset]))
    return Step(onset, offset, amplitude, sample_rate_hz)
