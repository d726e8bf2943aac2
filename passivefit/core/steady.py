"""Baseline, steady state, input resistance and the V–I slope (sag: core.sag)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from passivefit.core.qc import t975


def robust_level(v: np.ndarray, trim: float = 0.2) -> float:
    """Trimmed mean of a window (drops `trim` of the samples at each end), in the input's
    unit; NaN samples (cut out) are left out."""
    v = np.sort(np.asarray(v, dtype=np.float64))
    v = v[: np.count_nonzero(np.isfinite(v))]   # NaN sorts last
    k = int(trim * v.size)
    return float(v[k: v.size - k].mean())


def noise_sd(v: np.ndarray) -> float:
    """Robust sd of a window about its linear trend (MAD × 1.4826), in the input's unit.

    The trend is fitted twice, the second time without the samples beyond 5 MADs, so a
    spike does not tilt it. NaN samples (cut out) are left out; NaN when none is left.
    """
    v = np.asarray(v, dtype=np.float64)
    x = np.arange(v.size) - (v.size - 1) / 2.0
    finite = np.isfinite(v)
    if not finite.all():
        if not finite.any():
            return math.nan
        v, x = v[finite], x[finite]
    keep = np.ones(v.size, dtype=bool)
    for _ in range(2):
        xk, vk = x[keep], v[keep]
        slope = np.dot(xk - xk.mean(), vk) / max(np.dot(xk - xk.mean(), xk - xk.mean()), 1e-30)
        detrended = v - slope * x
        deviation = np.abs(detrended - np.median(detrended))
        mad = np.median(deviation)
        keep = deviation <= 5 * mad
    return float(1.4826 * mad)


def smooth(v: np.ndarray, width: int) -> np.ndarray:
    """Moving average over `width` samples (same length; edges use shorter windows)."""
    v = np.asarray(v, dtype=np.float64)
    width = max(1, min(int(width), v.size))
    if width == 1:
        return v
    csum = np.concatenate(([0.0], np.cumsum(v)))
    centre = np.arange(v.size)
    lo = np.clip(centre - width // 2, 0, v.size)
    hi = np.clip(centre - width // 2 + width, 0, v.size)
    return (csum[hi] - csum[lo]) / (hi - lo)


@dataclass(frozen=True)
class VISlope:
    """Linear regression of steady-state deflection on step current.

    slope_ohm is the input resistance in Ω; r2 the coefficient of determination;
    curvature the relative change of slope across the current range (0 = linear), from a
    quadratic fit; curvature_t its quadratic term over that term's standard error (inf
    when the quadratic leaves no residual degree of freedom to judge it by).
    """

    slope_ohm: float
    slope_se_ohm: float
    intercept_V: float
    r2: float
    curvature: float
    n_levels: int
    curvature_t: float = math.inf
    n_points: int = 0

    @property
    def bends(self) -> bool:
        """Whether the relation bends: a curvature above 0.15 that stands out of the
        points' scatter (two-sided t-test at 95 %, n − 3 degrees of freedom); with
        three points, where nothing is left to judge it by, the curvature alone
        (common practice, no source). Scatter alone does not bend it."""
        dof = self.n_points - 3
        return self.curvature > 0.15 and (dof < 1 or abs(self.curvature_t) > t975(dof))


#: Currents closer than this share of the largest one are one level of the V–I relation:
#: a step repeated sweep after sweep (a test pulse) and read from a recorded current
#: differs by its noise, a few hundredths of a pA, not by a step of a family (no source).
SAME_CURRENT_SHARE = 0.02


def current_levels(currents_A: np.ndarray) -> int:
    """How many levels of the V–I relation the step currents hold: currents closer than
    SAME_CURRENT_SHARE of the largest are one level (0 without currents)."""
    i = np.asarray(currents_A, dtype=np.float64)
    if i.size == 0:
        return 0
    gaps = np.diff(np.sort(i))
    return 1 + int(np.count_nonzero(gaps > SAME_CURRENT_SHARE * np.max(np.abs(i))))


def vi_slope(currents_A: np.ndarray, deflections_V: np.ndarray) -> VISlope | None:
    """Input resistance from the V–I relation; None with fewer than 3 levels of current
    (`current_levels`)."""
    i = np.asarray(currents_A, dtype=np.float64)
    v = np.asarray(deflections_V, dtype=np.float64)
    n_levels = current_levels(i)
    if n_levels < 3:
        return None
    slope, intercept = np.polyfit(i, v, 1)
    rss = float(np.sum((v - (slope * i + intercept)) ** 2))
    # the least-squares slope's standard error, RSS/(n − 2) over Σ(i − ī)² (textbook;
    # numpy's polyfit gives the same with cov=True, but only from 4 points)
    slope_se = math.sqrt(rss / (i.size - 2) / np.sum((i - i.mean()) ** 2))
    total = np.sum((v - v.mean()) ** 2)
    r2 = 1.0 - rss / total if total > 0 else float("nan")
    quad, unscaled = np.polyfit(i, v, 2, cov="unscaled")
    curvature = abs(2 * quad[0] * np.ptp(i) / slope) if slope != 0 else float("inf")
    curvature_t = math.inf
    if i.size > 3:   # the quadratic term's standard error from the residual scatter
        rest = v - np.polyval(quad, i)
        se = math.sqrt(float(rest @ rest) / (i.size - 3) * unscaled[0, 0])
        curvature_t = quad[0] / se if se > 0 else math.inf
    return VISlope(float(slope), slope_se, float(intercept), float(r2),
                   float(curvature), n_levels, float(curvature_t), int(i.size))
