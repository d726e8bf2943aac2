"""Mains hum taken out of a sweep (docs/references.md §7, "Mains hum").

Hum is stationary over a sweep: a sine at the mains frequency and its first harmonics,
with one amplitude and phase each. It is fitted by least squares in the sweep's flat
stretches (the baseline, the end of the step, the end of the tail), each stretch with its
own level and slope, and the fitted wave is taken out of the whole sweep, the transients
included. The mains frequency drifts by a few hundredths of a hertz from its nominal
value, which over a second turns the phase by a sizeable fraction of a cycle: it is
refined by the least residual over a few sweeps.

All quantities are SI (V, s, Hz); stretches are (start, stop) sample indices.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

#: The fundamental and its first harmonics (the rectified part of mains pickup).
HARMONICS = 3


def _columns(fs: float, stretches: Sequence[tuple[int, int]], freq: float,
             ) -> tuple[np.ndarray, np.ndarray]:
    """The samples of the stretches and their design: sine and cosine of each harmonic
    (sweep time), then a level and a slope per stretch."""
    rows = np.concatenate([np.arange(a, b) for a, b in stretches])
    t = rows / fs
    waves = [f(2 * np.pi * h * freq * t) for h in range(1, HARMONICS + 1) for f in (np.sin, np.cos)]
    local = []
    for a, b in stretches:
        inside = (rows >= a) & (rows < b)
        local += [inside.astype(float), np.where(inside, t - (a + b) / (2 * fs), 0.0)]
    return rows, np.column_stack(waves + local)


def fit_hum(v: np.ndarray, fs: float, stretches: Sequence[tuple[int, int]], freq: float,
            ) -> tuple[np.ndarray, float]:
    """The hum's sine and cosine amplitudes (2·HARMONICS, V) in the flat `stretches` of
    `v`, and the residual sum of squares of the fit (V²)."""
    rows, design = _columns(fs, stretches, freq)
    coef, *_ = np.linalg.lstsq(design, np.asarray(v[rows], dtype=float), rcond=None)
    rest = v[rows] - design @ coef
    return coef[:2 * HARMONICS], float(rest @ rest)


def hum_wave(n: int, fs: float, freq: float, coef: np.ndarray) -> np.ndarray:
    """The fitted hum over n samples from the sweep's start (V)."""
    t = np.arange(n) / fs
    out = np.zeros(n)
    for h in range(HARMONICS):
        phase = 2 * np.pi * (h + 1) * freq * t
        out += coef[2 * h] * np.sin(phase) + coef[2 * h + 1] * np.cos(phase)
    return out


def refine_frequency(sweeps: Sequence[tuple[np.ndarray, Sequence[tuple[int, int]]]],
                     fs: float, nominal: float, span_hz: float = 0.3) -> float:
    """The mains frequency near `nominal` (Hz) with the least residual over `sweeps`
    ((voltage, flat stretches) pairs): a coarse grid over ±`span_hz`, then a fine one."""
    def cost(f: float) -> float:
        return sum(fit_hum(v, fs, stretches, f)[1] for v, stretches in sweeps)

    best = nominal
    for half, points in ((span_hz, 13), (span_hz / 6, 11)):
        grid = best + np.linspace(-half, half, points)
        best = float(grid[np.argmin([cost(f) for f in grid])])
    return best
