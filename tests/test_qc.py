"""Student's t quantile and the F survival function (core.qc, computed without scipy on
the analysis path); the action-potential detector (core.qc.first_spike)."""

from __future__ import annotations

import numpy as np
import pytest

from passivefit.core.qc import (
    bootstrap_halfwidth,
    f_survival,
    first_spike,
    runs_ratio,
    runs_test_z,
    t975,
)


@pytest.mark.parametrize("dof", [*range(1, 60), 99, 100, 1000, 1001, 5000, 10**6])
def test_t975_is_scipys_student_quantile(dof):
    # against scipy.special.stdtrit (an outside reference), the exact series and Newton
    # (docs/references.md §12) up to 1000 dof, the Cornish-Fisher expansion beyond
    from scipy.special import stdtrit

    assert t975(dof) == pytest.approx(float(stdtrit(dof, 0.975)), rel=1e-11)


def test_t975_known_values():
    # printed t tables (from memory): 12.706 (1 dof), 2.228 (10 dof), 1.960 (normal limit)
    assert t975(1) == pytest.approx(12.706, abs=5e-4)
    assert t975(10) == pytest.approx(2.228, abs=5e-4)
    assert t975(10**7) == pytest.approx(1.960, abs=5e-4)
    assert t975(0) == t975(1)   # fewer than one degree of freedom is taken as one


@pytest.mark.parametrize("d1", [1, 2, 3, 5])
@pytest.mark.parametrize("d2", [1, 4, 60, 5000, 40_000])
def test_f_survival_is_scipys(d1, d2):
    # against scipy.special.fdtrc (an outside reference): the continued fraction of the
    # regularized incomplete beta (docs/references.md §12)
    from scipy.special import fdtrc

    for f in (0.05, 0.8, 1.0, 3.0, 9.0, 60.0):
        assert f_survival(d1, d2, f) == pytest.approx(float(fdtrc(d1, d2, f)), rel=1e-8)
    assert f_survival(d1, d2, 0.0) == 1.0


FS = 20_000.0


def _passive_step(jump_V: float, noise_V: float = 0.0, seed: int = 0) -> np.ndarray:
    """-70 mV, a +20 mV step response (τ 20 ms) from 100 ms with an instantaneous jump of
    `jump_V` (an unbalanced bridge) at both edges, 1 s at 20 kHz."""
    t = np.arange(int(FS)) / FS
    on, off = (t >= 0.1) & (t < 0.6), t >= 0.6
    v = np.full(t.size, -0.070)
    v[on] += 0.020 * (1 - np.exp(-(t[on] - 0.1) / 0.02)) + jump_V
    v[off] += 0.020 * (1 - np.exp(-0.5 / 0.02)) * np.exp(-(t[off] - 0.6) / 0.02)
    return v + np.random.default_rng(seed).normal(0, noise_V, t.size)


def _edges_quiet() -> list[tuple[int, int]]:
    return [(2000, 2020), (12000, 12020)]   # 1 ms after each edge


def test_first_spike_is_none_for_passive_charging_noise_and_an_unbalanced_bridge():
    # common practice, no source: passive charging rises at ΔV/τ (1 V/s here), white noise
    # of 1 mV sd does not climb 20 mV, and the bridge's jump sits at the step's edges
    assert first_spike(_passive_step(0.0, noise_V=1e-3), FS, _edges_quiet()) is None
    assert first_spike(_passive_step(0.025), FS, _edges_quiet()) is None
    assert first_spike(_passive_step(0.025), FS) is not None   # the jump, were the edge unknown


def test_first_spike_finds_a_spike_that_peaks_below_minus_10_mV():
    v = _passive_step(0.0, noise_V=0.2e-3)
    t = np.arange(v.size) / FS
    bump = np.exp(-0.5 * ((t - 0.3003) / 0.3e-3) ** 2)   # rises 30 mV in under 1 ms
    v_low = v + 0.030 * bump                             # peaks near -20 mV
    assert abs(first_spike(v_low, FS, _edges_quiet()) - 6006) <= 2
    v_high = v + 0.080 * bump                            # overshoots: found by its peak
    assert abs(first_spike(v_high, FS, _edges_quiet()) - 6006) <= 2
    assert first_spike(v + 0.005 * bump, FS, _edges_quiet()) is None   # a 5 mV bump: no


def test_runs_ratio_of_white_and_slow_noise():
    # independent signs give the expected number of runs (Wald–Wolfowitz; ratio ≈ 1 and
    # z ≈ 0); noise kept by a slow filter changes sign far less often
    rng = np.random.default_rng(11)
    white = rng.standard_normal(20_000)
    assert abs(runs_ratio(white) - 1) < 0.03 and abs(runs_test_z(white)) < 4
    slow = np.convolve(white, np.ones(50) / 50, mode="valid")
    assert runs_ratio(slow) < 0.2 and runs_test_z(slow) < -40
    # weighed against another stretch of the same slow noise, nothing is left to see
    other = np.convolve(rng.standard_normal(20_000), np.ones(50) / 50, mode="valid")
    assert abs(runs_test_z(slow, runs_ratio(other))) < 4
    assert runs_ratio(np.ones(10)) == 0.0 and runs_test_z(np.ones(10)) == float("-inf")
    # alternating signs: as many runs as values, twice what independence expects
    assert runs_ratio(np.tile([1.0, -1.0], 500)) == pytest.approx(2.0, rel=0.01)


@pytest.mark.parametrize("n", [3, 4, 6])
def test_bootstrap_interval_over_few_sweeps_holds_the_truth_95_percent(n):
    """A bootstrap over n units is too narrow by √((n − 1)/n) and by 1.96 against t(n − 1)
    (the narrowness of the bootstrap with few units; the textbook t interval of a mean,
    which the widened interval matches); checked by coverage on normal samples."""
    rng = np.random.default_rng(n)
    trials, resamples = 2000, 150
    data = rng.normal(0.0, 1.0, (trials, n))
    picks = rng.integers(0, n, (trials, resamples, n))
    means = np.take_along_axis(data[:, None, :], picks, axis=2).mean(axis=2)
    centre = data.mean(axis=1)

    def coverage(units):
        half = np.array([bootstrap_halfwidth(m, units) for m in means])
        return np.mean(np.abs(centre) <= half)

    assert coverage(n) == pytest.approx(0.95, abs=0.02)
    assert coverage(None) < 0.92   # without the widening: too narrow
