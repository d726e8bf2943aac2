"""Quality flags: a code of our own, a plain-words message and the value behind it."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Flag:
    """One quality observation about a sweep or a cell.

    Parameters
    ----------
    code : str
        Stable identifier, ``<where>.<what>`` (see passivefit.model.schema.FLAGS).
    message : str
        What was seen and what it means, in plain words.
    value : float or None
        The number that triggered the flag (units given in the message).
    """

    code: str
    message: str
    value: float | None = None

    def to_dict(self) -> dict:
        value = None if self.value is None or not np.isfinite(self.value) else float(self.value)
        return {"code": self.code, "message": self.message, "value": value}


def runs_test_z(residuals: np.ndarray) -> float:
    """Wald–Wolfowitz runs test on the signs of the residuals, as a z score.

    Strongly negative z means too few sign changes: structure left in the residuals.
    """
    signs = np.asarray(residuals) > 0
    n_pos = int(signs.sum())
    n_neg = signs.size - n_pos
    if n_pos == 0 or n_neg == 0:
        return float("-inf")
    runs = 1 + int(np.count_nonzero(signs[1:] != signs[:-1]))
    n = n_pos + n_neg
    mean = 2.0 * n_pos * n_neg / n + 1.0
    var = (mean - 1.0) * (mean - 2.0) / (n - 1.0)
    return float((runs - mean) / np.sqrt(var)) if var > 0 else 0.0


def percentile_halfwidth(samples: np.ndarray) -> float | None:
    """95 % CI half-width from bootstrap samples (None with fewer than 10).

    Half the central 95 % range with 40 or more samples; 1.96 sd with fewer, where the
    extreme percentiles are too rough.
    """
    samples = samples[np.isfinite(samples)]
    if samples.size < 10:
        return None
    if samples.size < 40:
        return float(1.96 * np.std(samples, ddof=1))
    lo, hi = np.percentile(samples, [2.5, 97.5])
    return float((hi - lo) / 2)


def mains_hum(segments, fs: float, freqs_hz=(50.0, 60.0)) -> tuple[float, float, float]:
    """The mains hum in baseline segments: (frequency in Hz, amplitude, its noise floor).

    Each segment (one sweep's baseline, linear trend removed) is projected onto a sine
    and a cosine at each frequency by least squares; the amplitudes are averaged over
    segments (their phases differ from sweep to sweep). For white noise of sd σ the
    amplitude from n samples averages σ·√(π/n) (Rayleigh), the floor returned, in the
    units of the segments. The frequency with the larger amplitude is returned.
    """
    best = (freqs_hz[0], 0.0, 0.0)
    for f in freqs_hz:
        amps, floors = [], []
        for y in segments:
            y = np.asarray(y, dtype=float)
            y = y[np.isfinite(y)]
            if y.size < 0.04 * fs:   # less than two mains periods
                continue
            t = np.arange(y.size) / fs
            basis = np.column_stack([np.sin(2 * np.pi * f * t), np.cos(2 * np.pi * f * t),
                                     np.ones_like(t), t - t.mean()])
            coef, *_ = np.linalg.lstsq(basis, y, rcond=None)
            rest = y - basis @ coef
            amps.append(float(np.hypot(coef[0], coef[1])))
            floors.append(float(np.std(rest) * np.sqrt(np.pi / y.size)))
        if amps and np.mean(amps) > best[1]:
            best = (f, float(np.mean(amps)), float(np.mean(floors)))
    return best


def robust_sd(x: np.ndarray) -> float:
    """Median absolute deviation × 1.4826, the sd of normal data that it estimates, in the
    input's unit (0 for no data)."""
    x = np.asarray(x, dtype=float)
    return float(1.4826 * np.median(np.abs(x - np.median(x)))) if x.size else 0.0


def correlated_noise_factor(x: np.ndarray, max_lag: int) -> float:
    """Variance inflation of a smooth fit's parameters by correlated noise (>= 1).

    The long-run variance of the detrended noise `x` over its sample variance,
    1 + 2 sum_k (1 - k/(K+1)) r_k with the Bartlett taper up to lag K = `max_lag` (common
    practice, no source: the Newey–West estimate of the variance of a mean of correlated
    samples). 1 for white noise, larger for noise through a low-pass filter.
    """
    x = np.asarray(x, dtype=float)
    x = x[np.isfinite(x)]
    lags = min(int(max_lag), x.size // 4)
    if lags < 1:
        return 1.0
    k = np.arange(x.size)
    x = x - np.polyval(np.polyfit(k, x, 1), k)
    var = float(x @ x) / x.size
    if var <= 0:
        return 1.0
    r = np.array([float(x[:-j] @ x[j:]) / x.size / var for j in range(1, lags + 1)])
    taper = 1 - np.arange(1, lags + 1) / (lags + 1)
    return float(max(1.0, 1 + 2 * np.sum(taper * r)))
