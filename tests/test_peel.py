"""Tests of automated semilog peeling (passivefit.core.peel)."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from passivefit.core.peel import (
    Peel,
    estimate_asymptote,
    estimate_noise,
    geometric_bins,
    peel,
)

DT = 1.0 / 20_000


def two_exp(t, y_inf=-0.065, a0=-4e-3, tau0=0.020, a1=-0.8e-3, tau1=0.0015):
    return y_inf + a0 * np.exp(-t / tau0) + a1 * np.exp(-t / tau1)


def test_clean_two_exponentials():
    t = np.arange(0.5e-3, 0.5, DT)
    p = peel(t, two_exp(t), y_inf=-0.065, n_components=2)
    assert isinstance(p, Peel)
    assert p.taus[0] == pytest.approx(0.020, rel=0.02)
    assert p.taus[1] == pytest.approx(0.0015, rel=0.15)
    assert_allclose(p.amplitudes, [-4e-3, -0.8e-3], rtol=0.15)
    assert p.taus[0] > p.taus[1]


def test_lines_are_consistent_with_taus():
    t = np.arange(0.5e-3, 0.5, DT)
    y = two_exp(t)
    p = peel(t, y, y_inf=-0.065, n_components=2)
    assert len(p.lines) == 2 and len(p.residual_log) == 2
    for line, tau, amp in zip(p.lines, p.taus, p.amplitudes, strict=True):
        assert line.slope == pytest.approx(-1.0 / tau)
        assert np.exp(line.intercept_log) == pytest.approx(abs(amp))
        assert t[0] <= line.t_start < line.t_end <= t[-1]
    # the slow line fits later data than the fast one, and is drawn on log|y - y_inf|
    assert p.lines[0].t_start > p.lines[1].t_end * 0.5
    t0, log0 = p.residual_log[0]
    assert_allclose(log0, np.log(np.abs(y - p.y_inf))[: t0.size])
    # inside its window the slow line follows the first-stage data closely (clean data)
    inside = (t0 >= p.lines[0].t_start) & (t0 <= p.lines[0].t_end)
    line0 = p.lines[0].intercept_log + p.lines[0].slope * t0[inside]
    assert np.max(np.abs(line0 - log0[inside])) < 0.02


def test_unknown_asymptote_is_estimated():
    t = np.arange(0.5e-3, 0.3, DT)
    y = two_exp(t, y_inf=-0.070, a0=3e-3, a1=1e-3)
    p = peel(t, y, y_inf=None, n_components=2)
    assert p.y_inf == pytest.approx(-0.070, abs=2e-6)
    assert p.taus[0] == pytest.approx(0.020, rel=0.03)


def test_aitken_asymptote_exact_for_single_exponential():
    # Aitken's delta-squared extrapolation is exact for a geometric sequence (from memory)
    t = np.arange(0.0, 0.05, DT)
    y = 0.012 - 0.004 * np.exp(-t / 0.02)
    assert estimate_asymptote(t, y) == pytest.approx(0.012, abs=1e-12)
    flat = np.full_like(t, 0.003)
    assert estimate_asymptote(t, flat) == pytest.approx(0.003)


def test_noise_estimate():
    rng = np.random.default_rng(5)
    t = np.arange(0.0, 0.3, DT)
    y = two_exp(t) + rng.normal(0, 2e-4, t.size)
    assert estimate_noise(y) == pytest.approx(2e-4, rel=0.05)


def test_noisy_single_exponential_window_stops_at_noise():
    rng = np.random.default_rng(6)
    t = np.arange(0.5e-3, 0.3, DT)
    y = -0.065 - 4e-3 * np.exp(-t / 0.025) + rng.normal(0, 2e-4, t.size)
    p = peel(t, y, y_inf=-0.065, n_components=1)
    assert p.taus[0] == pytest.approx(0.025, rel=0.1)
    # 4 mV decays to 3 noise sd (of a few averaged bins) well before the record ends
    assert p.lines[0].t_end < 0.15


def test_weighted_binned_input_gives_same_taus():
    t = np.arange(0.5e-3, 0.5, DT)
    y = two_exp(t)
    tb, yb, wb = geometric_bins(t, y, np.ones_like(t), 5e-3, 1.05)
    p_full = peel(t, y, y_inf=-0.065)
    p_bin = peel(tb, yb, y_inf=-0.065, weight=wb)
    assert_allclose(p_bin.taus, p_full.taus, rtol=0.03)


def test_bad_input():
    t = np.arange(0.0, 0.01, DT)
    with pytest.raises(ValueError, match="all-NaN"):
        peel(t, np.full_like(t, np.nan), 0.0)
    with pytest.raises(ValueError, match="strictly increasing"):
        peel(t[::-1], np.exp(-t / 0.003), 0.0)
    with pytest.raises(ValueError, match="noise sd"):
        peel(t, np.zeros_like(t) + np.random.default_rng(0).normal(0, 1e-3, t.size), 0.0, 2)
    with pytest.raises(ValueError, match="n_components"):
        peel(t, np.exp(-t / 0.003), 0.0, 0)
