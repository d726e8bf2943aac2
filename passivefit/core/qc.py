"""Quality flags: a code of our own, a plain-words message and the value behind it."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache

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


def _runs(residuals: np.ndarray) -> tuple[int, float, float]:
    """(runs of one sign, their mean and variance for independent signs); mean 0 when
    every sign is the same."""
    signs = np.asarray(residuals) > 0
    n_pos = int(signs.sum())
    n_neg = signs.size - n_pos
    if n_pos == 0 or n_neg == 0:
        return 1, 0.0, 0.0
    runs = 1 + int(np.count_nonzero(signs[1:] != signs[:-1]))
    n = n_pos + n_neg
    mean = 2.0 * n_pos * n_neg / n + 1.0
    return runs, mean, (mean - 1.0) * (mean - 2.0) / (n - 1.0)


def runs_test_z(residuals: np.ndarray, noise_ratio: float = 1.0) -> float:
    """Wald–Wolfowitz runs test on the signs of the residuals, as a z score.

    Strongly negative z means too few sign changes: structure left in the residuals.
    `noise_ratio`: the :func:`runs_ratio` that the noise alone gives (1 for independent
    noise); the runs expected, and their variance, are scaled by it (an effective number
    of independent signs; common practice, no source).
    """
    runs, mean, var = _runs(residuals)
    if mean == 0:
        return float("-inf")
    mean, var = mean * noise_ratio, var * noise_ratio
    return float((runs - mean) / np.sqrt(var)) if var > 0 else 0.0


def runs_ratio(values: np.ndarray) -> float:
    """Runs of one sign over the number independent signs would give (1 for white noise,
    small for slow noise or structure; 0 when every sign is the same)."""
    runs, mean, _ = _runs(values)
    return runs / mean if mean > 0 else 0.0


def bootstrap_halfwidth(samples: np.ndarray, n_units: int | None = None) -> float | None:
    """95 % CI half-width from bootstrap samples (None with fewer than 10).

    1.96 times their sd below 200 samples, half the central 95 % range from 200 on: a
    standard error is steady from a few tens of resamples, the extreme percentiles need
    about a thousand (docs/references.md §6). With `n_units`, the number of units
    resampled (sweeps), widened by `few_units_factor` for the bootstrap's narrowness with
    few of them.
    """
    samples = samples[np.isfinite(samples)]
    if samples.size < 10:
        return None
    if samples.size < 200:
        half = float(1.96 * np.std(samples, ddof=1))
    else:
        lo, hi = np.percentile(samples, [2.5, 97.5])
        half = float((hi - lo) / 2)
    return half if n_units is None else half * few_units_factor(n_units)


def few_units_factor(n: int) -> float:
    """How much wider a 95 % bootstrap interval over `n` resampled units must be: the
    resamples' sd is √((n − 1)/n) of the standard error, and with few units the error is
    itself uncertain, so t(n − 1) stands for 1.96; for a mean this makes the interval
    Student's t interval exactly (docs/references.md §6). 1 for n < 2."""
    if n < 2:
        return 1.0
    return t975(n - 1) / Z95 * math.sqrt(n / (n - 1))


def mains_hum(segments, fs: float, freqs_hz=(50.0, 60.0)
              ) -> tuple[float, float, float, float]:
    """The mains hum in baseline segments: (frequency in Hz, amplitude, its noise floor,
    the amplitude at its spectral neighbours).

    Each segment (one sweep's baseline, linear trend removed) is projected onto a sine
    and a cosine at each frequency by least squares; the amplitudes are averaged over
    segments (their phases differ from sweep to sweep). For white noise of sd σ the
    amplitude from n samples averages σ·√(π/n) (Rayleigh), the floor returned, in the
    units of the segments. The frequency with the larger amplitude is returned. Segments
    of one length share their least-squares solve.

    Real noise is not white: synaptic events and slow fluctuations put far more power
    near 50–60 Hz than the white floor says, most of all in short baselines. The last
    value is what that noise gives at the returned frequency: the median amplitude at
    neighbouring frequencies (:func:`_neighbours`), averaged over segments like the
    amplitude (docs/references.md §7, "Mains hum"; 0 where a segment has none).
    """
    by_length: dict[int, list[np.ndarray]] = {}
    for y in segments:
        y = np.asarray(y, dtype=float)
        y = y[np.isfinite(y)]
        if y.size >= 0.04 * fs:   # at least two mains periods
            by_length.setdefault(y.size, []).append(y)
    blocks = {size: np.column_stack(ys) for size, ys in by_length.items()}
    best = (freqs_hz[0], 0.0, 0.0)
    for f in freqs_hz:
        amps, floors = [], []
        for size, block in blocks.items():
            pair, rest = _sine_fit(block, fs, [f])
            amps += list(np.hypot(*pair))
            floors += list(np.std(rest, axis=0) * np.sqrt(np.pi / size))
        if amps and np.mean(amps) > best[1]:
            best = (f, float(np.mean(amps)), float(np.mean(floors)))
    local = []
    for size, block in blocks.items():
        near = _neighbours(best[0], size, fs)
        if near:
            pairs = _sine_fit(block, fs, near)[:-1]
            local += list(np.median([np.hypot(*pair) for pair in pairs], axis=0))
    return (*best, float(np.mean(local)) if local else 0.0)


def _sine_fit(block: np.ndarray, fs: float, freqs: list[float]) -> list[np.ndarray]:
    """Least squares of each column of `block` on a sine and a cosine at each of `freqs`,
    a level and a slope: the (sine, cosine) coefficients per frequency, then the
    residuals."""
    size = block.shape[0]
    t = np.arange(size) / fs
    waves = [g(2 * np.pi * f * t) for f in freqs for g in (np.sin, np.cos)]
    basis = np.column_stack([*waves, np.ones_like(t), t - t.mean()])
    coef, *_ = np.linalg.lstsq(basis, block, rcond=None)
    pairs = [coef[2 * k:2 * k + 2] for k in range(len(freqs))]
    return [*pairs, block - basis @ coef]


def _neighbours(f: float, size: int, fs: float) -> list[float]:
    """Frequencies 2–5 resolution steps (fs/size) either side of `f`, none within 1.5
    steps of 0 Hz or of a multiple of 50 or 60 Hz (where hum or its leakage would be) and
    none above fs/4."""
    step = fs / size
    out = []
    for m in (2, 3, 4, 5):
        for c in (f - m * step, f + m * step):
            lines = [k * mains for mains in (50.0, 60.0) for k in range(1, int(c / mains) + 2)]
            if 1.5 * step <= c <= fs / 4 and all(abs(c - x) >= 1.5 * step for x in lines):
                out.append(c)
    return out


def robust_sd(x: np.ndarray) -> float:
    """Median absolute deviation × 1.4826, the sd of normal data that it estimates, in the
    input's unit (0 for no data)."""
    x = np.asarray(x, dtype=float)
    return float(1.4826 * np.median(np.abs(x - np.median(x)))) if x.size else 0.0


def normal_inverse(jac: np.ndarray) -> np.ndarray:
    """(JᵀJ)⁺ of a Jacobian `jac` (points × parameters), through the column-scaled
    matrix: a parameter whose column is tiny in absolute terms (a collapsed component's
    tau, a lag far below the sampling interval) keeps the large variance it has, where
    the unscaled pseudo-inverse drops its direction and gives it none. A zero column gets
    zero (such a parameter must be treated by the caller)."""
    norms = np.sqrt(np.sum(jac * jac, axis=0))
    norms = np.where(norms > 0, norms, 1.0)
    scaled = jac / norms
    return np.linalg.pinv(scaled.T @ scaled) / np.outer(norms, norms)


@lru_cache(maxsize=256)
def fft_length(n: int) -> int:
    """The least 2^a 3^b 5^c >= n: numpy's FFT is fast on any such length, and one near n
    costs up to half of the next power of 2 (scipy.fft.next_fast_len's lengths for real
    transforms; importing scipy.fft costs more than most of the FFTs it would serve)."""
    best = 1 << (n - 1).bit_length()
    p5 = 1
    while p5 < best:
        p35 = p5
        while p35 < best:
            p = p35
            while p < n:
                p *= 2
            best = min(best, p)
            p35 *= 3
        p5 *= 5
    return best


def detrended(x: np.ndarray) -> np.ndarray:
    """`x` less its least-squares straight line over the sample index, along its last
    axis (each row of a 2-d array on its own)."""
    x = np.asarray(x, dtype=float)
    n = x.shape[-1]
    t = np.arange(n) - (n - 1) / 2   # centred: the slope and the mean apart
    slope = x @ t / (t @ t) if n > 1 else np.zeros(x.shape[:-1])
    return x - x.mean(axis=-1, keepdims=True) - np.multiply.outer(slope, t)


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
    x = detrended(x)
    var = float(x @ x) / x.size
    if var <= 0:
        return 1.0
    r = np.array([float(x[:-j] @ x[j:]) / x.size / var for j in range(1, lags + 1)])
    taper = 1 - np.arange(1, lags + 1) / (lags + 1)
    return float(max(1.0, 1 + 2 * np.sum(taper * r)))


#: The normal distribution's 97.5 % quantile: the factor of a two-sided 95 % interval.
Z95 = 1.959963984540054


@lru_cache(maxsize=512)
def t975(dof: int) -> float:
    """The 97.5 % quantile of Student's t with `dof` degrees of freedom (at least 1): the
    factor on a standard error for a two-sided 95 % interval (docs/references.md §12).

    For up to 1000 degrees of freedom Newton's method on the exact distribution function,
    a finite series for integer dof; beyond, the Cornish–Fisher expansion about the normal
    quantile to 1/dof⁴ (its error is far below round-off there).
    """
    nu = max(int(dof), 1)
    z = Z95
    if nu > 1000:
        return (z + (z**3 + z) / (4 * nu) + (5 * z**5 + 16 * z**3 + 3 * z) / (96 * nu**2)
                + (3 * z**7 + 19 * z**5 + 17 * z**3 - 15 * z) / (384 * nu**3)
                + (79 * z**9 + 776 * z**7 + 1482 * z**5 - 1920 * z**3 - 945 * z)
                / (92160 * nu**4))
    log_norm = (math.lgamma((nu + 1) / 2) - math.lgamma(nu / 2)
                - 0.5 * math.log(nu * math.pi))
    t = 12.7 if nu == 1 else z + (z**3 + z) / (4 * nu)
    for _ in range(100):
        density = math.exp(log_norm - (nu + 1) / 2 * math.log1p(t * t / nu))
        step = (_central_probability(t, nu) - 0.95) / (2 * density)
        t -= step
        if abs(step) < 1e-13 * t:
            break
    return t


def _central_probability(t: float, nu: int) -> float:
    """P(|T| < t) for Student's t with integer `nu` dof (Abramowitz & Stegun 26.7.3–4)."""
    theta = math.atan(t / math.sqrt(nu))
    c = math.cos(theta) ** 2
    if nu % 2:   # odd: (2/π)(θ + sinθ cosθ Σ_{k<(ν−1)/2} (2·4···2k)/(3·5···(2k+1)) cos^{2k}θ)
        if nu == 1:
            return 2 / math.pi * theta
        k = np.arange(1, (nu - 1) // 2)
        series = 1.0 + float(np.cumprod(2 * k / (2 * k + 1) * c).sum())
        return 2 / math.pi * (theta + math.sin(theta) * math.cos(theta) * series)
    k = np.arange(1, nu // 2)   # even: sinθ Σ_{k<ν/2} (1·3···(2k−1))/(2·4···2k) cos^{2k}θ
    return math.sin(theta) * (1.0 + float(np.cumprod((2 * k - 1) / (2 * k) * c).sum()))


def f_survival(d1: float, d2: float, f: float) -> float:
    """P(F > f) for Fisher's F with (d1, d2) degrees of freedom: the regularized incomplete
    beta I_x(d2/2, d1/2) at x = d2/(d2 + d1 f) (docs/references.md §12)."""
    if not f > 0:
        return 1.0
    return _incomplete_beta(d2 / 2, d1 / 2, d2 / (d2 + d1 * f))


def _incomplete_beta(a: float, b: float, x: float) -> float:
    """Regularized incomplete beta I_x(a, b) by its continued fraction, evaluated with
    Lentz's method (Abramowitz & Stegun 26.5.8), on the side of x where it converges."""
    if x <= 0.0 or x >= 1.0:
        return 0.0 if x <= 0.0 else 1.0
    if x > (a + 1) / (a + b + 2):
        return 1.0 - _incomplete_beta(b, a, 1.0 - x)
    tiny = 1e-300
    front = math.exp(a * math.log(x) + b * math.log1p(-x) + math.lgamma(a + b)
                     - math.lgamma(a) - math.lgamma(b)) / a
    d = 1.0 - (a + b) * x / (a + 1)
    c, d = 1.0, 1.0 / (d if abs(d) > tiny else tiny)
    value = d
    for m in range(1, 10_000):
        for numerator in (m * (b - m) * x / ((a + 2 * m - 1) * (a + 2 * m)),
                          -(a + m) * (a + b + m) * x / ((a + 2 * m) * (a + 2 * m + 1))):
            d = 1.0 + numerator * d
            d = 1.0 / (d if abs(d) > tiny else tiny)
            c = 1.0 + numerator / c
            c = c if abs(c) > tiny else tiny
            value *= c * d
        if abs(c * d - 1.0) < 1e-15:
            break
    return front * value


#: An action potential reaching this potential is caught by its peak alone (V).
SPIKE_PEAK_V = -0.010
#: Else by its upstroke: a rise at least this fast (V/s) over `SPIKE_SMOOTH_S`, that
#: climbs `SPIKE_RISE_V` within `SPIKE_RISE_S`. Passive charging rises at ΔV/τ, a few
#: V/s; an action potential's upstroke at tens to hundreds of V/s even after a 2 kHz
#: filter (common practice, no source).
SPIKE_DVDT = 20.0
SPIKE_RISE_V = 0.020
SPIKE_SMOOTH_S = 0.2e-3
SPIKE_RISE_S = 2e-3


def first_spike(v: np.ndarray, fs: float, quiet: Sequence[tuple[int, int]] = ()) -> int | None:
    """The sample of the first action potential's peak in `v` (V), or None.

    A spike reaches `SPIKE_PEAK_V`, or, lower (an offset, a small spike), rises at
    least `SPIKE_DVDT` and climbs `SPIKE_RISE_V` within `SPIKE_RISE_S`. Upstrokes that
    start in a `quiet` span (start, stop samples: a stimulus edge and its settling, a
    brief pulse) are the stimulus, the electrode's jump and the filter's ringing.
    """
    rise = max(1, round(SPIKE_RISE_S * fs))
    high = np.flatnonzero(v >= SPIKE_PEAK_V)
    if high.size:                    # the first spike's peak, not the tallest
        return int(high[0] + np.argmax(v[high[0]:high[0] + rise]))
    k = max(1, round(SPIKE_SMOOTH_S * fs))
    fast = (v[k:] - v[:-k]) * (fs / k) >= SPIKE_DVDT
    for a, b in quiet:
        fast[max(0, a - k):max(0, b)] = False
    for start in np.flatnonzero(fast & ~np.r_[False, fast[:-1]]):   # each upstroke's start
        window = v[start:start + rise + k]
        peak = int(np.argmax(window))
        if window[peak] - v[start] >= SPIKE_RISE_V:
            return int(start + peak)
    return None
