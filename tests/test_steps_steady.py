"""Step detection and steady-state measures."""

import numpy as np
import pytest

from passivefit.core import steady
from passivefit.core.steps import PULSE_MAX_S, find_step
from passivefit.io.recording import StepSpec

FS = 20_000.0


def test_find_step_recovers_a_commanded_step():
    current = StepSpec(0.1, 0.4, -50e-12).command(20_000, FS, 0)
    step = find_step(current, FS)
    assert (step.onset, step.offset) == (2000, 10_000)
    assert step.amplitude_A == pytest.approx(-50e-12)
    assert step.kind == "step"


def test_find_step_on_a_noisy_recorded_current_with_holding_offset():
    rng = np.random.default_rng(3)
    current = 20e-12 + StepSpec(0.05, 0.3, 40e-12).command(16_000, FS, 0)
    current += rng.normal(0, 2e-12, current.size)
    step = find_step(current, FS)
    assert abs(step.onset - 1000) <= 1 and abs(step.offset - 7000) <= 1
    assert step.amplitude_A == pytest.approx(40e-12, rel=0.02)


def test_brief_pulse_is_a_pulse_and_flat_command_has_no_step():
    pulse = StepSpec(0.02, 0.5e-3, 1e-9).command(4000, FS, 0)
    assert find_step(pulse, FS).kind == "pulse"
    assert find_step(np.zeros(4000), FS) is None
    assert PULSE_MAX_S < 0.01
    # the common 5 ms pulse (a train's, e.g.) is a pulse too, a sample longer is a step
    five = StepSpec(0.02, 5e-3, 1e-9).command(4000, FS, 0)
    assert find_step(five, FS).kind == "pulse"
    longer = StepSpec(0.02, 5e-3 + 1 / FS, 1e-9).command(4000, FS, 0)
    assert find_step(longer, FS).kind == "step"


def test_step_spec_increment_changes_amplitude_per_sweep():
    spec = StepSpec(0.1, 0.2, -50e-12, 20e-12)
    assert [spec.amplitude_of(k) * 1e12 for k in range(3)] == pytest.approx([-50, -30, -10])


def test_robust_level_ignores_a_spike_and_noise_sd_a_trend():
    rng = np.random.default_rng(0)
    v = -0.07 + rng.normal(0, 1e-4, 4000)
    v[100:110] += 0.02
    assert steady.robust_level(v) == pytest.approx(-0.07, abs=2e-5)
    ramp = v + np.linspace(0, 5e-3, v.size)
    assert steady.noise_sd(ramp) == pytest.approx(1e-4, rel=0.1)


def test_vi_slope_is_input_resistance_and_flags_curvature():
    i = np.repeat([-50e-12, -30e-12, -10e-12, 10e-12], 5)
    fit = steady.vi_slope(i, 110e6 * i)
    assert fit.slope_ohm == pytest.approx(110e6)
    assert fit.r2 == pytest.approx(1.0)
    assert fit.curvature == pytest.approx(0.0, abs=1e-9)
    bent = 110e6 * i + 4e17 * i**2  # rectifying: steeper for hyperpolarization
    assert steady.vi_slope(i, bent).curvature > 0.15
    assert steady.vi_slope(i[:10], 110e6 * i[:10]) is None  # two levels only


def test_vi_relation_bends_only_beyond_its_scatter():
    """A curvature is believed when its quadratic term stands out of the points' scatter
    (t-test, n - 3 degrees of freedom; textbook regression); with three points nothing is
    left to judge it by, so its size decides (common practice, no source)."""
    i = np.array([-100e-12, -75e-12, -50e-12, -25e-12])
    scattered = 116e6 * i + np.array([0.0, 0.2e-3, -1.0e-3, 0.4e-3])   # one point off
    fit = steady.vi_slope(i, scattered)
    assert fit.curvature > 0.15 and abs(fit.curvature_t) < 2
    assert not fit.bends
    five = np.linspace(-200e-12, -10e-12, 5)
    rectified = 110e6 * five + 3e17 * five**2
    noisy = rectified + np.random.default_rng(1).normal(0, 0.1e-3, five.size)
    assert steady.vi_slope(five, noisy).bends
    assert steady.vi_slope(i[:3], 110e6 * i[:3] + 4e17 * i[:3] ** 2).bends
    assert not steady.vi_slope(i[:3], 110e6 * i[:3]).bends


def test_a_repeated_step_read_from_a_recorded_current_is_one_vi_level():
    # a -50 pA test pulse in every sweep, read from a recorded current: its amplitude
    # differs by the current's noise (a few hundredths of a pA), which is no V-I relation
    i = np.array([-49.899, -49.939, -49.905, -49.95]) * 1e-12
    dv = np.array([-7.27, -7.26, -7.28, -7.27]) * 1e-3
    assert steady.vi_slope(i, dv) is None
    family = np.array([-50.0, -40.02, -29.97, -20.0]) * 1e-12   # 10 pA apart: four levels
    assert steady.vi_slope(family, 110e6 * family).n_levels == 4



def test_vi_slope_from_three_currents_has_its_error():
    # three currents leave one degree of freedom: the least-squares slope's standard
    # error sqrt(RSS/(n − 2) / Σ(i − ī)²) (textbook) is defined, and from four points it
    # is numpy.polyfit's own (cov=True)
    from passivefit.core.steady import vi_slope

    i = np.array([-100e-12, -50e-12, 50e-12])
    v = np.array([-16.2e-3, -7.9e-3, 8.2e-3])
    fit = vi_slope(i, v)
    slope, intercept = np.polyfit(i, v, 1)
    rss = np.sum((v - slope * i - intercept) ** 2)
    assert fit.slope_se_ohm == pytest.approx(np.sqrt(rss / 1 / np.sum((i - i.mean()) ** 2)))
    i4, v4 = np.append(i, 100e-12), np.append(v, 16.0e-3)
    _, cov = np.polyfit(i4, v4, 1, cov=True)
    assert vi_slope(i4, v4).slope_se_ohm == pytest.approx(np.sqrt(cov[0, 0]), rel=1e-9)
