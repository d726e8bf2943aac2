"""Automated exponential peeling on the semilog plot (Rall's method).

On ``log|y - y_inf|`` the slowest exponential is a straight line at late times.
Fit that line (weighted least squares on the log), subtract its extrapolation,
and repeat on the early part for the next, faster exponential. The result is a
starting guess for :mod:`passivefit.core.expfit` and a picture to draw; it is
never the final answer: peeling is biased relative to least squares
(docs/references.md §7, D'Aguanno et al. 1986 [mem]).

Peeling runs on geometric bins of the data (:func:`geometric_bins`; widths grow
in proportion to time, so early samples stay single and late ones are averaged),
which suits exponentials on several time scales and makes it cheap. Windows are
chosen from the noise level: a stage uses the bins up to where the remainder
(averaged with the next four bins) falls below ``snr`` noise standard deviations
or 1/1000 of its peak (three bins running; a semilog line drawn by eye rarely
spans more than three decades); every stage except the last keeps only the
late part of that span (from ``late_start`` of the way along it), where faster
components have died out.

All quantities are SI (s, V); logs are natural logs of volts.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

_MIN_LINE_POINTS = 3
_DYNAMIC_RANGE = 1e-3  # a stage's span also ends where the remainder falls below this x its peak
_AHEAD = 5  # the span test averages each bin with the next four
_BIN_FACTOR = 1.02  # peel works on geometric bins whose edges grow by this ratio


@dataclass(frozen=True)
class PeelLine:
    """One straight line of the semilog view: ``log|V| = intercept_log + slope * t``.

    Attributes
    ----------
    t_start, t_end : float
        The window (s) the line was fitted on.
    intercept_log : float
        Natural log of the component's magnitude (log V) at t = 0.
    slope : float
        Slope (1/s); the time constant is ``-1/slope``.
    """

    t_start: float
    t_end: float
    intercept_log: float
    slope: float


@dataclass(frozen=True, eq=False)
class Peel:
    """Result of peeling.

    Attributes
    ----------
    taus : numpy.ndarray
        Time constants (s), descending.
    amplitudes : numpy.ndarray
        Signed amplitudes (V) at t = 0, in ``taus`` order.
    y_inf : float
        Asymptote used (V), given or estimated.
    noise_sd : float
        Per-sample noise standard deviation used for the windows (V).
    lines : list of PeelLine
        One line per stage, slowest first.
    residual_log : list of (numpy.ndarray, numpy.ndarray)
        Per stage, ``(t, log|remainder|)`` of the samples the stage looked at
        (the remainder before that stage's line was subtracted; zeros omitted).
    """

    taus: np.ndarray
    amplitudes: np.ndarray
    y_inf: float
    noise_sd: float
    lines: list[PeelLine]
    residual_log: list[tuple[np.ndarray, np.ndarray]]


def check_samples(t, y, weight, label: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Validated float arrays ``(t, y, weight)``; raise ValueError naming ``label``.

    ``t`` must be finite and strictly increasing, ``y`` finite, ``weight``
    (default ones) positive and finite, all of one length.
    """
    t = np.asarray(t, dtype=float).ravel()
    y = np.asarray(y, dtype=float).ravel()
    if t.shape != y.shape:
        raise ValueError(
            f"{label}: `t` has {t.size} samples but `y` has {y.size}; pass equal lengths"
        )
    if t.size == 0 or np.all(np.isnan(y)):
        raise ValueError(f"{label}: no data (empty or all-NaN `y`); pass a recorded transient")
    bad = ~np.isfinite(y)
    if bad.any():
        raise ValueError(
            f"{label}: {int(bad.sum())} of {y.size} samples of `y` are NaN or infinite; "
            "remove or interpolate them before fitting"
        )
    if not np.all(np.isfinite(t)) or np.any(np.diff(t) <= 0):
        raise ValueError(
            f"{label}: `t` must be finite and strictly increasing; sort or clean the time axis"
        )
    if weight is None:
        return t, y, np.ones_like(t)
    w = np.asarray(weight, dtype=float).ravel()
    if w.shape != t.shape or not np.all(np.isfinite(w)) or np.any(w <= 0):
        raise ValueError(f"{label}: `weight` must be positive, finite and the same length as `t`")
    return t, y, w


def estimate_asymptote(t: np.ndarray, y: np.ndarray, weight: np.ndarray | None = None) -> float:
    """Asymptote (V) of a decay from its tail, by Aitken extrapolation of block means.

    The last half of the record is cut into three equal blocks (equal sample
    counts for uniform sampling, equal durations otherwise). For a single
    exponential tail their means ``m1, m2, m3`` form a geometric sequence, so
    ``m3 - (m3 - m2)**2 / ((m3 - m2) - (m2 - m1))`` is the exact asymptote. When
    the steps do not shrink geometrically (already flat, or noise dominates) the
    last block mean ``m3`` is returned.
    """
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    w = np.ones_like(t) if weight is None else np.asarray(weight, dtype=float)
    n = t.size
    if n >= 6 and np.allclose(np.diff(t), t[1] - t[0], rtol=1e-6):
        size = (n - n // 2) // 3  # uniform: three equal-count blocks ending at the last sample
        idx = n - size * np.arange(3, -1, -1)
    else:
        idx = np.searchsorted(t, np.linspace(t[0] + 0.5 * (t[-1] - t[0]), t[-1], 4))
        idx[-1] = n
    if np.any(np.diff(idx) <= 0):
        return float(np.average(y, weights=w))
    means = [np.average(y[a:b], weights=w[a:b]) for a, b in zip(idx[:-1], idx[1:], strict=True)]
    m1, m2, m3 = means
    d1, d2 = m2 - m1, m3 - m2
    if d1 == 0 or not 0 < d2 / d1 < 0.9:
        return float(m3)
    return float(m3 - d2 * d2 / (d2 - d1))


def estimate_noise(y: np.ndarray, weight: np.ndarray | None = None) -> float:
    """Robust per-unit-weight noise sd (V) from second differences of neighbours.

    ``median(|y[k-1] - 2 y[k] + y[k+1]| / s_k) / 0.6745`` with
    ``s_k = sqrt(1/w[k-1] + 4/w[k] + 1/w[k+1])``; smooth signals hardly contribute.
    """
    y = np.asarray(y, dtype=float)
    if y.size < 3:
        return 0.0
    w = np.ones_like(y) if weight is None else np.asarray(weight, dtype=float)
    d2 = y[:-2] - 2.0 * y[1:-1] + y[2:]
    scale = np.sqrt(1.0 / w[:-2] + 4.0 / w[1:-1] + 1.0 / w[2:])
    return float(np.median(np.abs(d2) / scale) / 0.6745)


def geometric_bins(
    t: np.ndarray, y: np.ndarray, weight: np.ndarray, t_keep: float, factor: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Keep samples with ``t <= t_keep``; average later ones into geometric bins.

    Bin edges are ``base * factor**k`` with ``base = max(t_keep, first later t)``,
    so a bin's width grows in proportion to its time; a bin never holds less than
    one sample. Each bin gets the weighted mean of its times and values and the
    sum of its weights (so a bin of n unit-weight samples has weight n: the
    inverse of its mean's variance in units of one sample's variance).

    Parameters
    ----------
    t, y, weight : numpy.ndarray
        Validated samples (s, V, dimensionless); ``t`` strictly increasing. ``y`` may
        hold several responses on the same times (shape (k, n)): each row is binned.
    t_keep : float
        Samples up to this time (s) are returned unchanged.
    factor : float
        Ratio of successive bin edges, > 1.

    Returns
    -------
    (t, y, weight) : tuple of numpy.ndarray
    """
    if not factor > 1:
        raise ValueError(f"`bin_factor` must be > 1, got {factor}")
    first = int(np.searchsorted(t, t_keep, side="right"))
    if first >= t.size or t[-1] <= 0:
        return t, y, weight
    base = max(float(t_keep), float(t[first]))
    if base <= 0:
        base = float(t[np.searchsorted(t, 0.0, side="right")])
    n_edges = int(np.ceil(np.log(t[-1] / base) / np.log(factor))) + 2
    edges = base * factor ** np.arange(n_edges)
    starts = np.unique(np.concatenate([[first], np.searchsorted(t, edges)]))
    starts = starts[(starts >= first) & (starts < t.size)]
    sw = np.add.reduceat(weight[first:], starts - first)
    tb = np.add.reduceat((weight * t)[first:], starts - first) / sw
    yb = np.add.reduceat((weight * y)[..., first:], starts - first, axis=-1) / sw
    return (
        np.concatenate([t[:first], tb]),
        np.concatenate([y[..., :first], yb], axis=-1),
        np.concatenate([weight[:first], sw]),
    )


def _mean_ahead(a: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weighted mean of each bin and the next ``_AHEAD - 1``, and their total weight."""
    n = a.size
    cw = np.concatenate([[0.0], np.cumsum(w)])
    cwa = np.concatenate([[0.0], np.cumsum(w * a)])
    stop = np.minimum(np.arange(n) + _AHEAD, n)
    total = cw[stop] - cw[:n]
    return (cwa[stop] - cwa[:n]) / total, total


def _end_above(a: np.ndarray, threshold: np.ndarray) -> int:
    """Index where ``a`` first stays at or below ``threshold`` for 3 points running."""
    below = a <= threshold
    run = below[:-2] & below[1:-1] & below[2:]
    hits = np.flatnonzero(run)
    return int(hits[0]) if hits.size else a.size


def _line_fit(t: np.ndarray, log_a: np.ndarray, wts: np.ndarray) -> tuple[float, float]:
    """Weighted straight line through (t, log_a); returns (slope, intercept)."""
    sw = wts / wts.sum()
    tm = sw @ t
    lm = sw @ log_a
    dt = t - tm
    slope = float((sw * dt) @ (log_a - lm) / ((sw * dt) @ dt))
    return slope, float(lm - slope * tm)


def peel(
    t: np.ndarray,
    y: np.ndarray,
    y_inf: float | None = None,
    n_components: int = 2,
    *,
    weight: np.ndarray | None = None,
    noise_sd: float | None = None,
    snr: float = 3.0,
    late_start: float = 0.3,
) -> Peel:
    """Peel ``n_components`` exponentials off a decay toward ``y_inf``.

    Parameters
    ----------
    t : numpy.ndarray
        Sample times (s) from the edge, strictly increasing.
    y : numpy.ndarray
        Potential (V).
    y_inf : float or None
        Asymptote (V). ``None`` estimates it with :func:`estimate_asymptote`
        (Aitken extrapolation of the tail; use a record of several tau0).
    n_components : int
        Number of lines to peel (1–3 is sensible).
    weight : numpy.ndarray or None
        Per-sample weights (binned samples count their size); ``None`` = ones.
    noise_sd : float or None
        Per-sample noise sd (V); ``None`` estimates it with :func:`estimate_noise`.
    snr : float
        A stage's span ends where the remainder stays below ``snr`` times the
        noise sd of its bins.
    late_start : float
        Every stage but the last fits from this fraction of its above-noise span on.

    Returns
    -------
    Peel

    Raises
    ------
    ValueError
        Bad input, or too few samples above the noise for a stage.
    """
    t, y, w = check_samples(t, y, weight, "peel")
    return peel_checked(t, y, w, y_inf, n_components, noise_sd, snr, late_start)


def peel_checked(
    t: np.ndarray,
    y: np.ndarray,
    w: np.ndarray,
    y_inf: float | None,
    n_components: int,
    noise_sd: float | None = None,
    snr: float = 3.0,
    late_start: float = 0.3,
) -> Peel:
    """:func:`peel` on samples already validated by :func:`check_samples`."""
    if n_components < 1:
        raise ValueError(f"`n_components` must be at least 1, got {n_components}")
    y_inf = estimate_asymptote(t, y, w) if y_inf is None else float(y_inf)
    sigma = estimate_noise(y, w) if noise_sd is None else float(noise_sd)
    sigma = max(sigma, 1e-12 * float(np.max(np.abs(y - y_inf))))
    tb, yb, wb = geometric_bins(t, y, w, float(t[0]), _BIN_FACTOR)
    rem_b, rem = yb - y_inf, y - y_inf
    limit = tb.size  # each stage looks only before the previous stage's window
    taus, amps, lines, logs = [], [], [], []
    for stage in range(n_components):
        a = rem_b[:limit]
        sign = 1.0 if wb[: max(3, limit // 10)] @ a[: max(3, limit // 10)] >= 0 else -1.0
        a = sign * a
        a_ahead, w_ahead = _mean_ahead(a, wb[:limit])
        floor = np.maximum(snr * sigma / np.sqrt(w_ahead), _DYNAMIC_RANGE * np.max(a_ahead))
        end = _end_above(a_ahead, floor)
        start = 0
        if stage < n_components - 1 and end > 0:
            start = int(np.searchsorted(tb, tb[0] + late_start * (tb[end - 1] - tb[0])))
        use = np.arange(start, end)[a[start:end] > 0]
        if use.size < _MIN_LINE_POINTS:
            raise ValueError(
                f"peel stage {stage + 1}: only {use.size} points above {snr:g} noise sd; "
                "use fewer components or less noisy data"
            )
        shown = (t < tb[limit - 1]) & (rem != 0)
        logs.append((t[shown], np.log(np.abs(rem[shown]))))
        slope, icpt = _line_fit(tb[use], np.log(a[use]), a_ahead[use] ** 2 * wb[use])
        if slope >= 0:
            raise ValueError(
                f"peel stage {stage + 1}: the semilog line does not decay; check `y_inf`"
            )
        lines.append(PeelLine(float(tb[use[0]]), float(tb[use[-1]]), icpt, slope))
        taus.append(-1.0 / slope)
        amps.append(sign * np.exp(icpt))
        rem_b = rem_b - amps[-1] * np.exp(-tb / taus[-1])
        rem = rem - amps[-1] * np.exp(-t / taus[-1])
        limit = max(start, _MIN_LINE_POINTS)
    return Peel(
        taus=np.array(taus),
        amplitudes=np.array(amps),
        y_inf=y_inf,
        noise_sd=sigma,
        lines=lines,
        residual_log=logs,
    )
