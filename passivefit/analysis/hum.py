"""Mains hum seen in the sweeps' flat stretches (core.qc.mains_hum), and taken out of every
sweep before it is fitted (core.hum): a few sweeps of random hum phase do not average it
out, and a 0.5 mV hum moves τ0 of a three-sweep cell by 10–15 %."""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from passivefit.analysis.sweep import spike_in
from passivefit.core import hum as mains
from passivefit.core.qc import mains_hum
from passivefit.core.steps import Step

#: Hum is reported, and taken out, when its amplitude is this many times its white-noise
#: floor, HUM_LOCAL_FACTOR times the amplitude at its spectral neighbours (the noise that
#: is really there) and at least HUM_MIN_V (common practice, no source).
HUM_FLOOR_FACTOR, HUM_LOCAL_FACTOR, HUM_MIN_V = 4.0, 3.0, 20e-6
#: Sweeps whose residual sets the mains frequency (core.hum.refine_frequency).
_FREQUENCY_SWEEPS = 8
_EDGE_S = 1e-3   # flat stretches keep this far from a step's edges
MAINS_HZ = (50.0, 60.0)
#: The mains frequency stays within this of its nominal value (common practice, no source:
#: grids hold it within about ±0.2 Hz); a best fit beyond it is not mains hum.
FREQUENCY_SPAN_HZ = 0.3


@dataclass(frozen=True)
class Hum:
    """Hum found in the flat stretches: its frequency (Hz, refined when taken out), mean
    amplitude (V), its white-noise floor (V), the amplitude at its neighbouring
    frequencies (V; core.qc.mains_hum), and whether it was taken out."""

    freq_hz: float
    amplitude_V: float
    floor_V: float
    local_V: float = 0.0
    removed: bool = False

    @property
    def seen(self) -> bool:
        return self.floor_V > 0 and self.amplitude_V >= max(
            HUM_FLOOR_FACTOR * self.floor_V, HUM_LOCAL_FACTOR * self.local_V, HUM_MIN_V)


def flat_stretches(step: Step, n: int, fs: float, shortest_s: float) -> list[tuple[int, int]]:
    """Where a sweep rests on a level (samples): the baseline, the last 30 % of a step
    and the second half of what follows it; stretches shorter than `shortest_s` left out."""
    edge = round(_EDGE_S * fs)
    parts = [(step.baseline_start, step.onset - edge)]
    if step.kind == "step":
        parts.append((step.offset - round(0.3 * (step.offset - step.onset)), step.offset - edge))
    parts.append(((step.offset + n) // 2, n))
    return [(a, b) for a, b in parts if b - a >= shortest_s * fs]


def without_hum(voltages: dict[int, np.ndarray], steps: dict[int, Step], fs: float
                ) -> tuple[dict[int, np.ndarray], Hum]:
    """`voltages` with the hum taken out of every sweep with a step and no action
    potential, when their flat stretches show it (Hum.seen); the hum found."""
    periods = 2.0 / min(MAINS_HZ)   # a stretch holds at least two cycles
    flat = {k: flat_stretches(st, voltages[k].size, fs, periods) for k, st in steps.items()
            if spike_in(voltages[k], st, fs) is None}   # a spike's stretches are not flat
    found = Hum(*mains_hum([voltages[k][a:b] for k, parts in flat.items() for a, b in parts],
                           fs, MAINS_HZ))
    if not found.seen:
        return voltages, found
    longest = sorted(flat, key=lambda k: -sum(b - a for a, b in flat[k]))[:_FREQUENCY_SWEEPS]
    freq = mains.refine_frequency([(voltages[k], flat[k]) for k in longest if flat[k]], fs,
                                  found.freq_hz, FREQUENCY_SPAN_HZ)
    if abs(freq - found.freq_hz) > 0.8 * FREQUENCY_SPAN_HZ:   # no mains line: noise
        return voltages, replace(found, removed=False)
    out = dict(voltages)
    for k, stretches in flat.items():
        if stretches:
            coef, _ = mains.fit_hum(voltages[k], fs, stretches, freq)
            out[k] = voltages[k] - mains.hum_wave(voltages[k].size, fs, freq, coef)
    return out, replace(found, freq_hz=freq, removed=True)
