"""The Cramér–Rao bound behind the design advice (issue 16): against the closed form for
one exponential in white noise, against the exact C⁻¹ for filtered noise, against
Monte-Carlo fits, and the advice's arithmetic (sweeps needed, efficiency, unresolvable
values)."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

from passivefit.analysis import design
from passivefit.analysis.design import (
    advise,
    ar_whitener,
    covariance,
    fisher_information,
    jacobian,
    noise_autocorrelation,
)
from passivefit.simulate import filtered_noise_acf

DT, TAU, AMP = 50e-6, 20e-3, 5e-3


def _exponential(t: np.ndarray):
    """θ = (ln A, ln τ) → A·exp(−t/τ)."""
    return lambda theta: math.exp(theta[0]) * np.exp(-t / math.exp(theta[1]))


def _bound_tau(t: np.ndarray, sigma: float, acf=None) -> float:
    jac = jacobian(_exponential(t), [math.log(AMP), math.log(TAU)], [1e-4, 1e-4])
    cov = covariance(fisher_information(jac, sigma, acf))
    return TAU**2 * cov[1, 1]           # var(τ) = τ² var(ln τ)


def closed_form_var_tau(t: np.ndarray, sigma: float) -> float:
    """docs/references.md §10 [der]: var(τ̂) ≥ σ² Σe² / (Σe² (A²/τ⁴)Σt²e² − ((A/τ²)Σte²)²),
    e = exp(−t/τ); the CRLB definition is Kay 1993 ch. 3 (from memory)."""
    e2 = np.exp(-2 * t / TAU)
    s0, s1, s2 = e2.sum(), (t * e2).sum(), (t * t * e2).sum()
    return sigma**2 * s0 / (s0 * AMP**2 / TAU**4 * s2 - (AMP / TAU**2 * s1) ** 2)


@pytest.mark.parametrize("n", [50, 400, 4000])
def test_bound_of_one_exponential_matches_the_closed_form(n):
    t = np.arange(n) * DT
    sigma = 0.2e-3
    # closed form of docs/references.md §10 [der]
    assert _bound_tau(t, sigma) == pytest.approx(closed_form_var_tau(t, sigma), rel=1e-6)


@pytest.mark.parametrize("kind", ["step", "pulse"])
def test_sweep_jacobian_is_the_models_derivative(kind):
    # the analytic columns (R_in, bridge, baseline) against central differences of the
    # whole sweep model, and the model against the simulator's chain (docs/references.md
    # §11: the filter by partial fractions, the simulator's by an 8x oversampled digital
    # Bessel)
    from passivefit.simulate import BallStick, PulseProtocol, StepProtocol, noiseless_sweep

    duration = 0.4 if kind == "step" else 0.5e-3
    protocol = design.Protocol(kind, 0.1, duration, -50e-12, 0.6, 20_000.0, 5_000.0, 0.5e-3,
                               80e-6)
    theta = np.array([math.log(0.02), 0.0, math.log(3.0), math.log(150e6), 5e6, 1e-3])
    numeric = jacobian(design._forward(protocol), theta, [1e-4] * 4 + [1e3, 1e-6])
    analytic = design._sweep_jacobian(protocol, theta)
    for j in range(6):
        np.testing.assert_allclose(analytic[:, j], numeric[:, j],
                                   atol=1e-6 * np.max(np.abs(numeric[:, j])))
    shape = (StepProtocol(0.1, duration, (1.0,)) if kind == "step"
             else PulseProtocol(0.1, duration, 1.0))
    simulated = noiseless_sweep(BallStick.from_electrotonic(0.02, 1.0, 3.0, 150e6), shape,
                                amplitude_A=-50e-12, sample_rate_hz=20_000.0,
                                sweep_duration_s=0.6, filter_hz=5_000.0, bridge_ohm=5e6,
                                electrode_tau_s=80e-6)
    model = design._forward(protocol)(theta) - theta[5]
    np.testing.assert_allclose(model, simulated, atol=1e-3 * np.max(np.abs(simulated)))


CELLS = [(0.01, 0.3, 0.5), (0.02, 1.0, 3.0), (0.04, 2.0, 20.0), (0.015, 0.6, 10.0)]


@pytest.mark.parametrize("kind", ["step", "pulse"])
@pytest.mark.parametrize("filter_hz", [None, 2_000.0])
@pytest.mark.parametrize("cell", CELLS)
def test_analytic_membrane_jacobian_matches_central_differences(cell, filter_hz, kind):
    # the derivatives in ln τ0, ln L, ln ρ through the modes and the filter's partial
    # fractions (docs/references.md §11) against central differences of the same unit
    duration = 0.2 if kind == "step" else 0.5e-3
    protocol = design.Protocol(kind, 0.05, duration, 100e-12, 0.3, 10_000.0, filter_hz)
    log_cell = np.log(cell)
    unit = design._membrane_unit(protocol)
    numeric = jacobian(unit, log_cell, [1e-4] * 3)
    analytic = design._membrane_slopes(protocol, log_cell)
    for j in range(3):
        norm = np.linalg.norm(numeric[:, j])
        assert norm > 1e-3 * np.linalg.norm(unit(log_cell))   # the column carries the cell
        assert np.linalg.norm(analytic[:, j] - numeric[:, j]) < 1e-5 * norm, j
    # the last column, the derivative in ln R_in, is the unit itself
    np.testing.assert_allclose(analytic[:, 3], unit(log_cell), rtol=0, atol=1e-12)
    if filter_hz is not None:
        # the filter's terms matter far beyond the tolerance: a wrong one would show
        bare = design._membrane_slopes(replace(protocol, filter_hz=None), log_cell)
        for j in range(3):
            assert np.linalg.norm(bare[:, j] - analytic[:, j]) > 1e-3 * np.linalg.norm(
                analytic[:, j])


def test_long_record_gives_the_asymptotic_precision():
    t = np.arange(int(20 * TAU / DT)) * DT
    sigma = 0.2e-3
    relative_sd = math.sqrt(_bound_tau(t, sigma)) / TAU
    # docs/references.md §6 [der]: sd(τ)/τ ≈ (σ/A)·√(8Δt/τ), record much longer than τ
    assert relative_sd == pytest.approx(sigma / AMP * math.sqrt(8 * DT / TAU), rel=0.01)


def _filtered_step(t: np.ndarray, fc: float):
    """θ = (ln A, ln τ, offset) → A·exp(−(t − 10 ms)/τ) from 10 ms on, through the
    recording's Bessel filter, plus the offset (as a recorded transient)."""
    from scipy.signal import bessel, bilinear, lfilter, lfilter_zi

    b, a = bilinear(*bessel(4, 2 * np.pi * fc, norm="mag", analog=True), fs=1 / DT)
    on = t >= 0.01

    def model(theta):
        x = np.where(on, math.exp(theta[0]) * np.exp(-(t - 0.01) / math.exp(theta[1])), 0.0)
        return lfilter(b, a, x, zi=lfilter_zi(b, a) * 0.0)[0] + theta[2]

    return model


@pytest.mark.parametrize("fc", [5_000, 2_000])
def test_whitening_matches_the_exact_inverse_covariance_of_filtered_noise(fc):
    """An AR whitener of Bessel-filtered noise against Jᵀ C⁻¹ J with the full Toeplitz C
    (docs/references.md §10 [cp]); within 8 % at order 64."""
    from scipy.linalg import solve_toeplitz

    n = 3000
    t = np.arange(n) * DT
    acf_full = filtered_noise_acf(fc, 1 / DT, n - 1)
    sigma = 0.2e-3
    jac = jacobian(_filtered_step(t, fc), [math.log(AMP), math.log(TAU), 0.0],
                   [1e-4, 1e-4, 1e-6])
    exact = covariance(jac.T @ solve_toeplitz(acf_full, jac) / sigma**2)
    ar = covariance(fisher_information(jac, sigma, acf_full[: design.AR_ORDER + 1]))
    assert np.diag(ar) == pytest.approx(np.diag(exact), rel=0.08)
    white = covariance(fisher_information(jac, sigma))
    # the correlation matters: treating the noise as white would claim more precision
    assert white[1, 1] < 0.6 * exact[1, 1]


def test_white_noise_needs_no_whitening():
    b, ratio = ar_whitener([1.0, 0.0, 0.0, 0.0])
    assert list(b) == [1.0] and ratio == 1.0


def _fit_taus(model, truth, noises, start, whiten=None):
    """τ of a least-squares fit of `model` to truth + each noise (whitened residuals,
    the first p left out, when `whiten` is given)."""
    from scipy.optimize import least_squares
    from scipy.signal import lfilter

    out = []
    for w in noises:
        y = truth + w

        def residual(theta, y=y):
            r = model(theta) - y
            return r if whiten is None else lfilter(whiten, [1.0], r)[whiten.size - 1:]

        fit = least_squares(residual, start, xtol=1e-12, ftol=1e-12)
        out.append(math.exp(fit.x[1]))
    return np.array(out)


def test_monte_carlo_fits_reach_the_bound_in_white_noise():
    """Least squares is the ML estimator here and efficient at high SNR: the variance of
    τ̂ over 600 noisy records lies within ±20 % of the bound (sampling error of a
    variance from 600 draws: ±6 % sd)."""
    rng = np.random.default_rng(16)
    t = np.arange(400) * DT
    sigma = 0.5e-3
    truth = _exponential(t)([math.log(AMP), math.log(TAU)])
    taus = _fit_taus(_exponential(t), truth, rng.normal(0, sigma, (600, t.size)),
                     [math.log(AMP * 1.1), math.log(TAU * 0.9)])
    assert np.var(taus, ddof=1) / _bound_tau(t, sigma) == pytest.approx(1.0, abs=0.2)


def test_monte_carlo_fits_reach_the_whitened_bound_in_filtered_noise():
    """Filtered noise, a filtered transient with a free offset, fitted by least squares on
    whitened residuals (the Gaussian ML estimator): the variance of τ̂ over 300 records
    lies within ±25 % of the whitened bound."""
    from scipy.signal import bessel, bilinear, lfilter

    fc, sigma = 2_000, 0.5e-3
    rng = np.random.default_rng(17)
    t = np.arange(1500) * DT
    b, a = bilinear(*bessel(4, 2 * np.pi * fc, norm="mag", analog=True), fs=1 / DT)
    noise = lfilter(b, a, rng.normal(0, 1, (300, t.size + 500)), axis=1)[:, 500:]
    noise *= sigma / noise.std()
    acf = filtered_noise_acf(fc, 1 / DT, design.AR_ORDER)
    whiten, _ratio = ar_whitener(acf)
    model = _filtered_step(t, fc)
    theta = [math.log(AMP), math.log(TAU), 0.0]
    taus = _fit_taus(model, model(theta), noise, [math.log(AMP * 1.1), math.log(TAU * 0.9),
                                                  1e-4], whiten)
    jac = jacobian(model, theta, [1e-4, 1e-4, 1e-6])
    bound = TAU**2 * covariance(fisher_information(jac, sigma, acf))[1, 1]
    assert np.var(taus, ddof=1) / bound == pytest.approx(1.0, abs=0.25)


def test_noise_autocorrelation_of_filtered_noise():
    from scipy.signal import bessel, bilinear, lfilter

    rng = np.random.default_rng(3)
    # white noise through the analog filter (digitised at 8x the rate), then sampled
    b, a = bilinear(*bessel(4, 2 * np.pi * 2_000, norm="mag", analog=True), fs=160_000)
    x = lfilter(b, a, rng.normal(0, 1e-3, 1_600_000))[8000::8]
    sd, acf = noise_autocorrelation([x[:100_000] + 0.01, x[100_000:] - 0.07], lags=6)
    assert sd == pytest.approx(np.std(x), rel=0.01)
    assert acf == pytest.approx(filtered_noise_acf(2_000, 20_000, 6), abs=0.02)
    with pytest.raises(ValueError, match="no baseline"):
        noise_autocorrelation([np.zeros(5)])


# ----------------------------------------------------------------------------- advise
CELL = dict(tau0_s=20e-3, L=1.0, rho=3.0, r_in_ohm=150e6, bridge_ohm=0.0)
STEPS = dict(kind="step", onset_s=0.1, duration_s=0.4, sweep_s=0.8, sample_rate_hz=10_000,
             filter_hz=2_000, fit_start_s=0.5e-3)


@pytest.fixture(scope="module")
def advice():
    return advise(**CELL, **STEPS, amplitudes_A=[-50e-12, -30e-12], noise_sd_V=0.3e-3,
                  n_sweeps=10, achieved_ci={"tau0": 0.8e-3, "L": 0.05})


def test_advice_scales_with_sweeps_and_gives_efficiency(advice):
    more = advise(**CELL, **STEPS, amplitudes_A=[-50e-12, -30e-12], noise_sd_V=0.3e-3,
                  n_sweeps=40)
    for name in design.NAMES:
        # four times the sweeps halve the bound: information adds over independent sweeps
        assert more.bound(name).crlb_ci == pytest.approx(advice.bound(name).crlb_ci / 2,
                                                         rel=1e-6)
    tau0 = advice.bound("tau0")
    assert tau0.efficiency == pytest.approx(tau0.crlb_ci / 0.8e-3)
    assert 0 < tau0.efficiency
    # from the achieved CI: 0.8 ms now, 0.4 ms wanted → 4× the sweeps
    assert tau0.target_ci == pytest.approx(0.4e-3)
    assert tau0.sweeps_needed == 40 and "30 more" in tau0.note
    assert advice.bound("L").sweeps_needed == 10 and "already" in advice.bound("L").note
    assert advice.bound("rho").achieved_ci is None and advice.bound("rho").efficiency is None


def test_advice_to_dict_is_plain_display_units(advice):
    import json

    data = json.loads(json.dumps(advice.to_dict()))
    values = {v["quantity"]: v for v in data["values"]}
    from passivefit.model import schema as S

    assert values[S.TAU0.key]["value"] == 20.0 and values[S.TAU0.key]["achieved_ci95"] == 0.8
    assert values[S.TAU0.key]["target_ci95"] == 0.4
    changes = {c["change"]: c for c in data["changes"]}
    assert changes["half amplitude"]["L_narrower_by"] == 0.5
    assert set(changes) >= {"brief pulses instead of steps", "double sampling rate",
                            "wider filter", "double amplitude"}
    assert data["advice"] and data["assumptions"]


def test_amplitude_changes_match_a_recomputed_bound(advice):
    """The 'double amplitude' factor 2 is what the model gives when recomputed."""
    double = advise(**CELL, **STEPS, amplitudes_A=[-100e-12, -60e-12], noise_sd_V=0.3e-3,
                    n_sweeps=10)
    for name in ("L", "rho"):
        assert advice.bound(name).crlb_ci / double.bound(name).crlb_ci == pytest.approx(
            2.0, rel=1e-6)


def test_a_value_that_cannot_be_resolved_is_said_plainly():
    weak = advise(**CELL, **STEPS, amplitudes_A=[-1e-12], noise_sd_V=2e-3, n_sweeps=5)
    rho = weak.bound("rho")
    assert rho.sweeps_needed is None
    assert "cannot be resolved" in rho.note and "500" in rho.note
    assert "not resolvable" in weak.advice


@pytest.mark.parametrize("bad, match", [({"tau0_s": -1.0}, "tau0_s"),
                                        ({"kind": "ramp"}, "kind"),
                                        ({"amplitudes_A": [0.0]}, "every amplitude is 0")])
def test_bad_values_are_one_line_errors(bad, match):
    args = {**CELL, **STEPS, "amplitudes_A": [-50e-12], "noise_sd_V": 0.3e-3, "n_sweeps": 3,
            **bad}
    with pytest.raises(ValueError, match=match):
        advise(**args)


def test_text_lines_say_the_advice(advice):
    lines = design.text_lines(advice)
    assert lines[0].split()[:3] == ["value", "now", "bound"]
    assert any(line.startswith("τ0") and " 40" in line for line in lines)   # sweeps needed
    assert any("brief pulses instead of steps" in line for line in lines)
    assert advice.advice in lines and any(line.startswith("Assumptions:") for line in lines)


@pytest.mark.gui
def test_design_panel_shows_the_advice(qtbot, advice):
    pytest.importorskip("pytestqt")
    from passivefit.gui.design_panel import DesignPanel

    panel = DesignPanel()
    qtbot.addWidget(panel)
    assert panel.values.rowCount() == 0 and "No advice" in panel.advice.text()
    panel.show_advice(advice)
    assert panel.values.rowCount() == len(design.NAMES)
    assert panel.values.item(0, 0).text() == "τ0 (ms)"
    assert panel.values.item(0, 6).text() == "40"
    assert panel.changes.rowCount() == len(advice.changes)
    assert panel.advice.text() == advice.advice
    panel.show_advice(None)
    assert panel.values.rowCount() == 0


def test_protocol_changes_can_be_left_out(advice):
    quick = advise(**CELL, **STEPS, amplitudes_A=[-50e-12, -30e-12], noise_sd_V=0.3e-3,
                   n_sweeps=10, achieved_ci={"tau0": 0.8e-3, "L": 0.05},
                   protocol_changes=False)
    assert quick.changes == () and quick.to_dict()["changes"] == []
    assert quick.bounds == advice.bounds


def test_a_parameter_without_information_leaves_the_others_finite():
    fisher = np.diag([4.0, 0.0, 9.0])
    fisher[0, 2] = fisher[2, 0] = 1.0
    cov = covariance(fisher)
    assert np.isinf(cov[1, 1])
    assert cov[[0, 2]][:, [0, 2]] == pytest.approx(np.linalg.inv([[4.0, 1.0], [1.0, 9.0]]))


def test_a_known_bridge_can_only_narrow_the_bounds(advice):
    # fixing a nuisance parameter adds no uncertainty (the Schur complement is the smaller
    # information: Kay 1993 ch. 3); the analysis fits no jump when the data need none
    known = advise(**CELL, **STEPS, amplitudes_A=[-50e-12, -30e-12], noise_sd_V=0.3e-3,
                   n_sweeps=10, protocol_changes=False, bridge_known=True)
    for name in ("tau0", "tau1", "L", "rho", "r_in"):
        assert known.bound(name).crlb_ci <= advice.bound(name).crlb_ci * (1 + 1e-9)
    assert known.bound("rho").crlb_ci < 0.95 * advice.bound("rho").crlb_ci
    assert not math.isfinite(known.bound("bridge").crlb_ci)


def test_fast_fft_length_is_scipys():
    # the FFT length of the whitened sums and the event scans: the smallest 5-smooth length >= n, as
    # scipy.fft.next_fast_len gives for real transforms (checked against scipy itself)
    import scipy.fft

    from passivefit.core.qc import fft_length

    for n in (1, 2, 7, 11, 97, 1000, 12_345, 20_001, 20_065, 40_129, 100_003):
        assert fft_length(n) == scipy.fft.next_fast_len(n, real=True), n


def test_sweeps_needed_from_a_bootstrap_interval_widened_for_few_sweeps():
    """A bootstrap CI over n sweeps carries the few-sweeps widening (core.qc.
    few_units_factor): the count needed is where that factor over √m meets the target,
    not the widened CI scaled as 1/√m (which over 3 sweeps asked for 7× too many)."""
    from passivefit.analysis.design import _count
    from passivefit.core.qc import few_units_factor

    per_sweep, n, target = 1.0, 3, 0.2
    achieved = few_units_factor(n) * per_sweep / n**0.5
    m = _count(n, achieved, target, widened=True)
    assert few_units_factor(round(m)) * per_sweep / m**0.5 == pytest.approx(target, rel=0.02)
    assert _count(n, achieved, target, widened=False) > 5 * m
