"""The amplifier's low-pass filter, applied exactly to sums of exponentials.

A recording amplifier filters the voltage with an analog 4-pole Bessel low-pass before it
is sampled. Its transfer function has four poles ``p_k`` and no zeros,
``H(s) = prod_k p_k / (p_k - s)`` (unit gain at DC), so by partial fractions the response
to a unit exponential that starts at an edge, ``x(t) = exp(-lam t)`` for ``t > 0``, is

    y(t) = H(-lam) exp(-lam t) + sum_k c_k / (p_k + lam) exp(p_k t),

with ``c_k`` the residues of ``H`` at its poles (docs/references.md §11). ``y(0) = 0``: the
filtered response starts continuously at the edge. A step is the case ``lam = 0``. The
membrane response, the bridge jump and its electrode lag are all sums of such
exponentials, so the filtered model is exact — no time shift stands in for the filter.

Units: Hz for the corner, s and 1/s elsewhere.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cache, cached_property

import numpy as np

from passivefit.core.qc import detrended

__all__ = ["Lowpass", "filtered_exponential_slopes", "filtered_exponentials"]


#: The reverse Bessel polynomial of order 4, highest power first: H(s) = 105/θ4(s) has the
#: flattest group delay of any 4-pole low-pass (docs/references.md §11).
_THETA4 = np.array([1.0, 10.0, 45.0, 105.0, 105.0])


@cache
def _unit_bessel() -> tuple[np.ndarray, np.ndarray]:
    """Poles and residues of the 4-pole Bessel with its −3 dB corner at 1 rad/s.

    The roots of θ4 are scaled by the frequency w3 where |H(iw3)|² = 1/2. With x = w²,
    |θ4(iw)|² = (x² − 45x + 105)² + x(105 − 10x)², so w3² is the positive root of
    |θ4(iw)|² − 2·105² (a quartic in x).
    """
    real = np.polymul([1.0, -45.0, 105.0], [1.0, -45.0, 105.0])
    imag = np.polymul([1.0, 0.0], np.polymul([-10.0, 105.0], [-10.0, 105.0]))
    magnitude = np.polyadd(real, imag)
    magnitude[-1] -= 2 * 105.0**2
    x = np.roots(magnitude)
    w3 = math.sqrt(min(r.real for r in x if abs(r.imag) < 1e-9 and r.real > 0))
    poles = np.roots(_THETA4) / w3
    gain = float(np.real(np.prod(-poles)))
    residues = np.array([gain / np.prod(p - np.delete(poles, k)) for k, p in enumerate(poles)])
    return poles, residues


@dataclass(frozen=True)
class Lowpass:
    """A 4-pole Bessel low-pass with its −3 dB corner at ``corner_hz``."""

    corner_hz: float

    def __post_init__(self):
        if not (np.isfinite(self.corner_hz) and self.corner_hz > 0):
            raise ValueError(f"the filter corner must be a positive frequency in Hz, "
                             f"got {self.corner_hz!r}")

    @cached_property
    def poles(self) -> np.ndarray:
        """Poles (1/s, complex): the unit poles scaled by the corner in rad/s."""
        return _unit_bessel()[0] * (2 * np.pi * self.corner_hz)

    @cached_property
    def residues(self) -> np.ndarray:
        """Residues of H at its poles (1/s, complex)."""
        return _unit_bessel()[1] * (2 * np.pi * self.corner_hz)

    def gain(self, rates: np.ndarray) -> np.ndarray:
        """H(-lam) for decay rates ``lam`` >= 0 (1/s): the factor on exp(-lam t)."""
        p = self.poles
        return np.real(np.prod(p / (p + np.asarray(rates, float)[..., None]), axis=-1))

    def pole_weights(self, rates: np.ndarray) -> np.ndarray:
        """c_k/(p_k + lam), shape (n_rates, 4): the factor on exp(p_k t) per rate."""
        return self.residues / (self.poles + np.asarray(rates, float)[..., None])

    def response(self, rates: np.ndarray, amplitudes: np.ndarray, t: np.ndarray) -> np.ndarray:
        """Filtered ``sum_m a_m exp(-lam_m t)`` (0 before the edge), at times ``t`` (s)."""
        return filtered_exponentials(t, rates, amplitudes, self)

    def noise_acf(self, lags_s: np.ndarray) -> np.ndarray:
        """Autocorrelation (1 at lag 0) of white noise after the filter, at lags >= 0 (s):
        with h(t) = sum_k c_k exp(p_k t), R(tau) = sum_jk c_k c_j exp(p_j tau)/-(p_k + p_j)
        (docs/references.md §11)."""
        p, c = self.poles, self.residues
        weights = c[:, None] * c[None, :] / -(p[:, None] + p[None, :])
        acf = np.real(np.exp(np.asarray(lags_s, float)[:, None] * p) @ weights.sum(axis=0))
        return acf / float(np.real(weights.sum()))

    def group_delay_s(self) -> float:
        """Low-frequency group delay, sum_k -1/p_k (s); 0.336/fc for this filter."""
        return float(np.real(np.sum(-1.0 / self.poles)))


_NEGLIGIBLE = 40.0   # an exponential past 40 time constants (e^-40) is left out of a sum
_SHORT = 512   # exponentials kept for at most this many samples are summed as one product


def filtered_exponentials(t: np.ndarray, rates: np.ndarray, amplitudes: np.ndarray,
                          lowpass: Lowpass | None) -> np.ndarray:
    """``sum_m a_m exp(-lam_m t)`` from an edge at t = 0 (0 up to it) through `lowpass`
    (None: unfiltered), at times ``t`` (s, any order). Each exponential, the filter's own
    included, is summed only where it is above e^-40 of its amplitude, so fast modes cost
    only the samples just after the edge."""
    t = np.asarray(t, float)
    rates, amplitudes = np.asarray(rates, float), np.asarray(amplitudes, float)
    u, order = _after_edge(t)
    terms = list(zip(rates, amplitudes * (1.0 if lowpass is None else lowpass.gain(rates)),
                     strict=True))
    if lowpass is not None:
        terms += zip(-lowpass.poles, amplitudes @ lowpass.pole_weights(rates), strict=True)
    total = np.zeros(u.size)
    kept = _kept(u, np.array([rate for rate, _ in terms]))
    for (rate, a), n in zip(terms, kept, strict=True):   # (rate 0: a step, its constant)
        total[:n] += np.real(a) if rate == 0 else np.real(a * np.exp(-rate * u[:n]))
    return _in_time_order(total, order).reshape(t.shape)


def filtered_exponential_slopes(t: np.ndarray, rates: np.ndarray, amplitudes: np.ndarray,
                                d_rates: np.ndarray, d_amplitudes: np.ndarray,
                                lowpass: Lowpass | None) -> np.ndarray:
    """Derivatives of :func:`filtered_exponentials` (the same `t`, `rates`, `amplitudes`
    and `lowpass`) in P parameters, given those of the rates and amplitudes, `d_rates`
    and `d_amplitudes` of shape (P, n_rates). Returns shape ``t.shape + (P,)``.

    With F(u; lam) = H(-lam) e^(-lam u) + sum_k c_k/(p_k + lam) e^(p_k u) the filtered unit
    exponential, the derivative is sum_m [da_m F(u; lam_m) + a_m dlam_m dF/dlam(u; lam_m)],
    dF/dlam = (H'(-lam) - u H(-lam)) e^(-lam u) - sum_k c_k/(p_k + lam)^2 e^(p_k u), with
    H'(-lam) = -H(-lam) sum_k 1/(p_k + lam) (docs/references.md §11). Each exponential is
    summed where :func:`filtered_exponentials` sums it.
    """
    t = np.asarray(t, float)
    rates, amplitudes = np.asarray(rates, float), np.asarray(amplitudes, float)
    d_rates, d_amplitudes = np.asarray(d_rates, float), np.asarray(d_amplitudes, float)
    u, order = _after_edge(t)
    moved = amplitudes * d_rates   # a_m dlam_m, (P, n_rates)
    if lowpass is None:
        gain, d_gain = np.ones(rates.size), np.zeros(rates.size)
    else:
        gain = lowpass.gain(rates)
        d_gain = -gain * np.real(np.sum(1.0 / (lowpass.poles + rates[:, None]), axis=-1))
    # per rate: the factors on e^(-lam u) and on u e^(-lam u), shape (n_rates, P)
    flat = (d_amplitudes * gain + moved * d_gain).T
    sloped = (-moved * gain).T
    total = np.zeros((d_rates.shape[0], u.size))   # parameters first: rows contiguous
    kept = _kept(u, rates)
    short = kept <= _SHORT
    for rate, n, a, b in zip(rates[~short], kept[~short], flat[~short], sloped[~short],
                             strict=True):
        e = np.exp(-rate * u[:n]) if rate != 0 else 1.0   # (rate 0: a step)
        total[:, :n] += a[:, None] * e
        if np.any(b):   # the rate moves
            total[:, :n] += b[:, None] * (e * u[:n])
    if np.any(short):   # the fast ones at once, each up to its own end
        n = int(np.max(kept[short]))
        e = np.exp(-np.outer(rates[short], u[:n]))
        e[np.arange(n) >= kept[short, None]] = 0.0
        total[:, :n] += flat[short].T @ e + sloped[short].T @ (e * u[:n])
    if lowpass is not None:
        weights = lowpass.pole_weights(rates)   # c_k/(p_k + lam_m), (n_rates, 4)
        rings = d_amplitudes @ weights - moved @ (weights / (lowpass.poles + rates[:, None]))
        for k, (pole, n) in enumerate(zip(lowpass.poles, _kept(u, -lowpass.poles),
                                          strict=True)):
            total[:, :n] += np.real(rings[:, k, None] * np.exp(pole * u[:n]))
    return np.moveaxis(_in_time_order(total, order), -1, 0).reshape(
        t.shape + (d_rates.shape[0],))


def _after_edge(t: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
    """The times after the edge in ascending order (inf where before it, where the sums
    are 0), so that each exponential's samples are a leading slice; and the order that
    sorted them (None: already in order)."""
    after = np.where(t > 0, t, np.inf).ravel()
    order = None if np.all(after[1:] >= after[:-1]) else np.argsort(after, kind="stable")
    return (after if order is None else after[order]), order


def _kept(u: np.ndarray, rates: np.ndarray) -> np.ndarray:
    """Per rate, the leading samples of ascending `u` where exp(-rate u) is above e^-40
    (all the samples after the edge for a rate 0)."""
    rates = np.asarray(rates)
    limit = np.full(rates.shape, np.inf)
    decays = rates.real > 0
    limit[decays] = _NEGLIGIBLE / rates.real[decays]
    return np.searchsorted(u, limit)


def _in_time_order(total: np.ndarray, order: np.ndarray | None) -> np.ndarray:
    """`total` (along the sorted times of :func:`_after_edge`, its last axis) back in the
    order of t."""
    if order is not None:
        total[..., order] = total.copy()
    return total


def corner_from_noise(segments: list[np.ndarray], sample_rate_hz: float) -> float | None:
    """The corner (Hz) of the 4-pole Bessel that shaped the noise of `segments` (V), from
    their averaged power spectrum; None when the spectrum shows no roll-off between 0.05
    and 0.45 of the sampling rate (the filter acts beyond what the samples show, or the
    noise is not white before the filter: biological noise falls with frequency).

    The amplifier's noise is white before its filter, so its spectrum is a·|H(f)|² + b,
    with b the noise added after the filter (the converter's). For each corner on a fine
    logarithmic grid a and b are solved by least squares relative to the spectrum, and
    the corner with the smallest misfit is kept. Frequencies below 2 % of the sampling
    rate are left out (slow drift, mains hum, 1/f noise).
    """
    fs = float(sample_rate_hz)
    usable = [np.asarray(s, float) for s in segments if np.size(s) >= 64]
    usable = [s[np.isfinite(s)] for s in usable]
    usable = [s for s in usable if s.size >= 64]
    if not usable:
        return None
    n = min(256, min(s.size for s in usable))
    f, p = np.fft.rfftfreq(n, 1.0 / fs), np.mean([_welch(s, n) for s in usable], axis=0)
    keep = (f > 0.02 * fs) & (p > 0)
    f, p = f[keep], p[keep]
    if f.size < 8:
        return None
    band = p > 1e-4 * p.max()   # below, the spectrum is the converter's floor or nothing
    f, p = f[band], p[band]
    best = None
    for corner in np.geomspace(0.01 * fs, 0.6 * fs, 160):
        h2 = np.abs(_response(f, corner)) ** 2
        design = np.column_stack([h2, np.ones_like(h2)]) / p[:, None]
        coef, *_ = np.linalg.lstsq(design, np.ones_like(p), rcond=None)
        model = design @ np.clip(coef, 0.0, None)
        if coef[0] * h2[0] <= 3 * max(coef[1], 0.0) or np.any(model <= 0):
            continue   # a roll-off must show: the filtered noise well above the floor
        misfit = float(np.sum(np.log(model) ** 2))   # on the log scale, relative to p
        if best is None or misfit < best[0]:
            best = (misfit, corner)
    if best is None or not 0.05 * fs <= best[1] <= 0.45 * fs:
        return None   # no roll-off, or one no amplifier would be set to (coloured noise)
    return float(best[1])


def _welch(x: np.ndarray, n: int) -> np.ndarray:
    """Welch's averaged periodogram of `x` (to a constant factor, which the corner search
    does not see): segments of `n` samples overlapping by half, each detrended by a
    straight line and tapered by a periodic Hann window."""
    step = n - n // 2
    starts = np.arange(0, x.size - n + 1, step)
    segments = detrended(x[starts[:, None] + np.arange(n)])
    window = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(n) / n)
    power = np.mean(np.abs(np.fft.rfft(segments * window, axis=1)) ** 2, axis=0)
    power[1:(n + 1) // 2] *= 2   # one-sided: the negative frequencies folded in
    return power


def _response(f_hz: np.ndarray, corner_hz: float) -> np.ndarray:
    """H(i 2π f) of the 4-pole Bessel with its corner at `corner_hz` (complex)."""
    p = Lowpass(corner_hz).poles
    s = 2j * np.pi * np.asarray(f_hz, float)[:, None]
    return np.prod(p / (p - s), axis=1)
