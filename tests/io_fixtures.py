"""Small synthetic recordings for the reader/writer tests (no simulator needed)."""

from __future__ import annotations

import numpy as np

from passivefit.io import Recording, Sweep

CELL_ID = "LOL-2026-11-03-c1"  # invented scenario (helper_rules.md)
LAB = "Lindqvist-Okafor Lab of Dendritic Physiology"
DATE = "2026-11-03T14:22:05.250"


def charging_recording(
    n_sweeps: int = 3,
    n_samples: int = 4000,
    rate_hz: float = 20_000.0,
    with_current: bool = True,
    seed: int = 0,
) -> Recording:
    """Sweeps of a single-exponential charge to a hyperpolarizing step, with noise.

    Step from 10 % of the sweep for half the sweep; -40 pA, -60 pA, ...; R_in 150 MOhm, tau 15 ms,
    rest -68 mV, 0.1 mV noise. Values are not used for fitting, only round trips.
    """
    rng = np.random.default_rng(seed)
    t = np.arange(n_samples) / rate_hz
    length_s = n_samples / rate_hz
    onset, duration = 0.1 * length_s, 0.5 * length_s
    on = (t >= onset) & (t < onset + duration)
    sweeps = []
    for k in range(n_sweeps):
        amp = -40e-12 - 20e-12 * k
        current = np.where(on, amp, 0.0)
        rise = 1.0 - np.exp(-np.clip(t - onset, 0.0, None) / 0.015)
        fall = np.exp(-np.clip(t - onset - duration, 0.0, None) / 0.015)
        response = np.where(t < onset, 0.0, np.where(on, rise, rise[on][-1] * fall))
        voltage = -0.068 + 150e6 * amp * response + rng.normal(0.0, 1e-4, n_samples)
        sweeps.append(Sweep(k, voltage, current if with_current else None))
    metadata = {"cell_id": CELL_ID, "date": DATE, "temperature_C": 32.0, "lab": LAB}
    return Recording(sweeps, rate_hz, metadata=metadata)
