"""Tests of the direct ball-and-stick fit (passivefit.core.cablefit)."""

from __future__ import annotations

import json
import math
from functools import cache

import numpy as np
import pytest

from passivefit.core import cable, cablefit
from passivefit.core.cablefit import CableSegment, fit_ballstick
from passivefit.core.expfit import Segment, decimate_tail
from passivefit.simulate import BallStick, StepProtocol, simulate_recording

FS = 20_000.0
DT = 1.0 / FS
TAU_M = 0.022
R_IN = 110e6
I_STEP = -50e-12
ON, OFF, N = 2_000, 10_000, 16_000  # step from 100 ms to 500 ms in an 800-ms sweep
KEEP_FULL_S, BIN_FACTOR = 8e-3, 1.04


@cache
def noiseless_step(L: float, rho: float) -> np.ndarray:
    """Somatic voltage (V) of a simulated cell for the step, exact, no filter or noise."""
    cell = BallStick.from_electrotonic(TAU_M, L, rho, R_IN)
    current = np.zeros(N)
    current[ON:OFF] = I_STEP
    return -0.070 + cell.soma_response(current, DT)


def step_segments(v: np.ndarray, start_s: float, group=None,
                  baseline: float | None = None) -> list[CableSegment]:
    """Charging and decay segments from `start_s` after each edge, decimated as analysis does;
    with `baseline`, the charge is fitted from that level (with a bridge jump)."""
    segs = []
    for edge, kind, duration, end in ((ON, "charge", None, OFF), (OFF, "decay", 0.4, N)):
        a = edge + int(round(start_s * FS))
        t = np.arange(a, end) / FS - edge / FS
        t, y, w = decimate_tail(t, v[a:end], KEEP_FULL_S, BIN_FACTOR)
        segs.append(
            CableSegment(t, y, w, kind=kind, duration_s=duration, group=group, sample_interval_s=DT,
                         baseline=baseline if kind == "charge" else None)
        )
    return segs


# ------------------------------------------------------------------------ model pieces


@pytest.mark.parametrize("L", [0.05, 0.5, 1.0, 2.0, 5.0])
@pytest.mark.parametrize("rho", [0.01, 0.5, 5.0, 100.0, 1000.0])
def test_mode_table_matches_bracketed_roots(L, rho):
    # the vectorised Newton roots against cable.py's brentq roots and ratios
    rate, ratio = cablefit.mode_table(L, rho, 60)
    np.testing.assert_allclose(rate[1:], cable.ballstick_tau_ratios(L, rho, 60), rtol=1e-12)
    np.testing.assert_allclose(ratio[1:], cable.step_ratios(L, rho, 60), rtol=1e-11)
    assert rate[0] == 1.0 and ratio[0] == 1.0


# docs/references.md §5.2 ball-and-stick table [der]:
# L, rho, alpha1*L, tau0/tau1, step B1/B0, B0/V_inf
TABLE = [
    (1.0, 1.0, 2.1244, 5.5131, 0.1459, 0.8647),
    (1.0, 2.0, 2.4009, 6.7645, 0.1842, 0.8273),
    (1.0, 5.0, 2.7455, 8.5378, 0.2034, 0.7931),
    (1.0, 10.0, 2.9226, 9.5415, 0.2004, 0.7785),
    (1.5, 2.0, 2.4961, 3.7691, 0.3696, 0.6953),
    (0.5, 5.0, 2.6814, 29.7602, 0.0557, 0.9361),
]


@pytest.mark.parametrize(("L", "rho", "a1L", "t0_t1", "b1_b0", "b0_vinf"), TABLE)
def test_mode_table_reproduces_reference_table(L, rho, a1L, t0_t1, b1_b0, b0_vinf):
    # docs/references.md §5.2 ball-and-stick table [der]
    rate, ratio = cablefit.mode_table(L, rho, 3)
    assert math.sqrt(rate[1] - 1.0) * L == pytest.approx(a1L, abs=1e-4)
    assert rate[1] == pytest.approx(t0_t1, abs=1e-4)
    assert ratio[1] == pytest.approx(b1_b0, abs=1e-4)
    # sum of all charging amplitudes is V_inf: sum_n B_n/B_0 = V_inf/B0
    # (docs/references.md §3 [der])
    _, many = cablefit.mode_table(L, rho, 20_000)
    assert 1.0 / many.sum() == pytest.approx(b0_vinf, abs=1e-4)


def test_cylinder_limit_identity():
    # docs/references.md §2 identity [der]: 1 + 2*sum 1/(1 + (n pi/L)^2) = L coth L, i.e. for a
    # bare cylinder (rho = inf) sum_n B_n/B_0 = L coth L; the tail beyond 20000 modes ~ 1e-5
    for L in (0.5, 1.0, 2.0):
        rate, ratio = cablefit.mode_table(L, math.inf, 20_000)
        np.testing.assert_allclose(rate[1:4], 1 + (np.arange(1, 4) * np.pi / L) ** 2, rtol=1e-12)
        assert ratio.sum() == pytest.approx(L / math.tanh(L), rel=2e-5)


# ------------------------------------------------------------------- noiseless recovery

GRID = [(L, rho) for L, rho, *_ in TABLE] + [(2.0, 0.5), (0.3, 20.0), (3.0, 1.0)]


@pytest.mark.parametrize(("L", "rho"), GRID)
@pytest.mark.parametrize("start_ms", [0.2, 0.5, 1.0])
def test_exact_recovery_noiseless(L, rho, start_ms):
    cell = BallStick.from_electrotonic(TAU_M, L, rho, R_IN)
    v = noiseless_step(L, rho)
    fit = fit_ballstick(step_segments(v, start_ms * 1e-3))
    assert fit.success, fit.message
    assert fit.tau0_s == pytest.approx(TAU_M, rel=1e-4)
    assert fit.L == pytest.approx(L, rel=1e-4)
    assert fit.rho == pytest.approx(rho, rel=1e-4)
    np.testing.assert_allclose(fit.taus_s, cell.taus(4), rtol=1e-4)
    np.testing.assert_allclose(fit.b_ratios, cell.step_ratios(3), rtol=1e-4)
    # no bridge error was simulated: the offset is baseline + I*R_N exactly
    assert fit.bridge_jump_V(0, -0.070) / I_STEP == pytest.approx(0.0, abs=1e3)  # < 1 kOhm
    assert fit.v_inf_membrane_V[0] == pytest.approx(I_STEP * R_IN, rel=1e-4)
    # C_total = I*tau0/B0 (docs/references.md §4 [der]) against the simulated cell's capacitance
    assert fit.c_total_F(0, I_STEP) == pytest.approx(cell.c_total_F, rel=1e-4)
    assert fit.c_total_F(1, I_STEP) == pytest.approx(cell.c_total_F, rel=1e-4)


def test_evaluate_reproduces_data_and_edge():
    v = noiseless_step(1.0, 5.0)
    segs = step_segments(v, 0.3e-3, group="step")
    fit = fit_ballstick(segs)
    assert fit.b0_V[0] == fit.b0_V[1]  # one shared scale
    for k, edge in enumerate((ON, OFF)):
        idx = np.arange(edge + 6, edge + 400)
        model = fit.evaluate(k, idx / FS - edge / FS)
        np.testing.assert_allclose(model, v[idx], atol=1e-9)
    # at the edge the sum over all modes gives back the baseline (no bridge jump here)
    assert fit.evaluate(0, np.array([0.0]))[0] == pytest.approx(-0.070, abs=1e-7)
    # just after the end of a long step the voltage is still the full deflection
    assert fit.evaluate(1, np.array([0.0]))[0] == pytest.approx(v[OFF], abs=1e-7)
    json.dumps(fit.to_dict())


def test_known_offset_and_unbinned_samples():
    v = noiseless_step(1.5, 2.0)
    a, b = ON + 10, ON + 2_000  # 0.5–100 ms, every sample
    t = np.arange(a, b) / FS - ON / FS
    free = fit_ballstick([CableSegment(t, v[a:b])], init=(0.02, 1.2, 3.0))
    v_inf = float(-0.070 + I_STEP * R_IN)
    known = fit_ballstick([CableSegment(t, v[a:b], offset=v_inf)], init=(0.02, 1.2, 3.0))
    for fit in (free, known):
        assert fit.success, fit.message
        assert (fit.tau0_s, fit.L, fit.rho) == pytest.approx((TAU_M, 1.5, 2.0), rel=1e-4)
    assert known.offset_V[0] == v_inf
    assert known.n_params == free.n_params - 1


def test_decay_after_brief_square_pulse():
    # decay after a 0.5-ms pulse: amplitudes b0*r_n*(1 - exp(-D/tau_n)) (docs/references.md §2
    # square pulse [der]); b0 is still I*tau0/C_total
    L, rho, d = 1.0, 2.0, 0.5e-3
    cell = BallStick.from_electrotonic(TAU_M, L, rho, R_IN)
    current = np.zeros(6_000)
    end = 1_000 + int(round(d * FS))
    current[1_000:end] = 1e-9
    v = cell.soma_response(current, DT)
    a = end + 4
    t, y, w = decimate_tail(np.arange(a, v.size) / FS - end / FS, v[a:], KEEP_FULL_S, 1.04)
    fit = fit_ballstick([CableSegment(t, y, w, kind="decay", duration_s=d, sample_interval_s=DT)])
    assert fit.success, fit.message
    assert (fit.tau0_s, fit.L, fit.rho) == pytest.approx((TAU_M, L, rho), rel=1e-4)
    assert fit.c_total_F(0, 1e-9) == pytest.approx(cell.c_total_F, rel=1e-4)
    # at the pulse end the sum over all modes is the voltage the pulse left
    assert fit.evaluate(0, np.array([0.0]))[0] == pytest.approx(v[end], rel=1e-6)
    # square-pulse C1/C0 (docs/references.md §2 [der]) of the fit against the simulator's truth
    taus, gains = cell.modes(2)
    held = gains * taus * -np.expm1(-d / taus)
    c0, c1 = fit.b0_V[0] * np.array([1.0, fit.b_ratios[0]]) * -np.expm1(-d / fit.taus_s[:2])
    assert c1 / c0 == pytest.approx(held[1] / held[0], rel=1e-4)


def test_initial_guess_fallbacks():
    # cable.estimate_ballstick when it has a solution ...
    tau0, L, rho = cablefit.initial_guess(0.022, 0.022 / 8.5378, 0.2034)
    # docs/references.md §5.2 table row [der]
    assert (L, rho) == pytest.approx((1.0, 5.0), rel=1e-3)
    # ... else 0.9 x the cylinder L and rho = 3 (a ratio too large for a uniform cell)
    tau0, L, rho = cablefit.initial_guess(0.022, 0.022 / 10.0, 0.5)
    assert L == pytest.approx(0.9 * math.pi / 3.0) and rho == 3.0
    assert cablefit.initial_guess(0.022)[1:] == (1.0, 3.0)


# ---------------------------------------------------------- realistic recording, by seed


def _fit_recording(cell: BallStick, seed: int, start_s: float, corner_hz: float | None):
    rec, truth = simulate_recording(
        cell, protocol=StepProtocol(0.1, 0.4, (I_STEP,)), sweep_duration_s=0.8, n_sweeps=20,
        bridge_ohm=10e6, seed=seed,
    )  # fmt: skip  # 5 kHz Bessel, 0.2 mV noise, 50 µs electrode lag by default
    v = np.mean([s.voltage for s in rec.sweeps], axis=0)
    v_base = float(np.mean(v[: ON - 10]))
    fit = fit_ballstick(step_segments(v, start_s, group=0, baseline=v_base), corner_hz=corner_hz)
    return fit, fit.bridge_jump_V(0) / I_STEP, truth


def test_filtered_noisy_recordings_across_seeds():
    # L = 1, rho = 5, 110 MOhm, 22 ms, -50 pA (5.5 mV), 20 sweeps, 10 MOhm bridge error.
    # Over 5 seeds (fit from 0.3 ms, filter corner given) each value lies within its own
    # 95 % interval's reach (3 half-widths) and the mean error is small.
    cell = BallStick.from_electrotonic(TAU_M, 1.0, 5.0, R_IN)
    tau1 = cell.taus(2)[1]
    errors = []
    for seed in range(5):
        fit, bridge, truth = _fit_recording(cell, seed, 0.3e-3, 5_000.0)
        assert fit.success, fit.message
        assert fit.tau0_s == pytest.approx(TAU_M, rel=0.02)
        assert fit.L == pytest.approx(1.0, rel=0.10)
        assert fit.rho == pytest.approx(5.0, rel=0.5)
        assert fit.taus_s[1] == pytest.approx(tau1, rel=0.10)
        bridge_ci = 1.96 * fit.bridge_se_V[0] / abs(I_STEP)
        assert abs(bridge - 10e6) < 3 * bridge_ci
        assert fit.c_total_F(0, I_STEP) == pytest.approx(cell.c_total_F, rel=0.02)
        errors.append((fit.taus_s[1] / tau1 - 1, bridge - 10e6))
    mean_tau1, mean_bridge = np.mean(errors, axis=0)
    assert abs(mean_tau1) < 0.05
    assert abs(mean_bridge) < 1.5e6


def test_measurement_chain_is_recovered_exactly():
    # noiseless, through the simulator's analog 5 kHz Bessel (filtered at 8x the rate), with
    # a 12 MOhm bridge seen through an 80 µs electrode lag: the model of the whole chain
    # gives back every value, with the corner given and with it estimated; the same data
    # fitted as if unfiltered are biased
    cell = BallStick.from_electrotonic(TAU_M, 1.0, 5.0, R_IN)
    rec, _ = simulate_recording(
        cell, protocol=StepProtocol(0.1, 0.4, (I_STEP,)), sweep_duration_s=0.8, n_sweeps=1,
        noise_sd_V=0.0, bridge_ohm=12e6, electrode_tau_s=80e-6,
    )  # fmt: skip
    segs = step_segments(rec.sweeps[0].voltage, 0.1e-3, group=0, baseline=-0.070)
    for kwargs in ({"corner_hz": 5_000.0}, {"estimate_corner": True}):
        fit = fit_ballstick(segs, **kwargs)
        assert fit.success, fit.message
        assert fit.L == pytest.approx(1.0, rel=1e-3)
        assert fit.rho == pytest.approx(5.0, rel=2e-3)
        assert fit.tau0_s == pytest.approx(TAU_M, rel=1e-4)
        assert fit.bridge_jump_V(0) / I_STEP == pytest.approx(12e6, rel=2e-3)
        assert fit.lag_s == pytest.approx(80e-6, rel=0.02)
        assert fit.corner_hz == pytest.approx(5_000.0, rel=0.01)
    unfiltered = fit_ballstick(segs)
    assert abs(unfiltered.rho / 5.0 - 1) > 0.02 or abs(unfiltered.L - 1.0) > 0.01


@pytest.mark.parametrize("kwargs", [{}, {"corner_hz": 5_000.0}, {"estimate_corner": True}])
def test_jacobian_is_the_projected_residuals_derivative(kwargs):
    # the closed-form Golub–Pereyra Jacobian (rates and amplitudes by implicit
    # differentiation, the bins' exact means, the filter's gain and terms, the bridge's lag)
    # against central differences of the residual, away from the optimum, modes held fixed
    segs = step_segments(noiseless_step(1.0, 5.0), 0.1e-3, group=0, baseline=-0.070)
    prob = cablefit._check(segs, kwargs.get("corner_hz"), kwargs.get("estimate_corner", False),
                           True)
    theta = prob.start(np.log([0.02, 0.8, 3.0])) + 0.1
    prob.set_modes(theta)
    analytic = prob.jacobian(theta)
    numeric = np.empty_like(analytic)
    for j in range(theta.size):
        step = np.zeros(theta.size)
        step[j] = 1e-5
        numeric[:, j] = (prob.residual(theta + step) - prob.residual(theta - step)) / 2e-5
    assert analytic.shape == (prob.u.size, 4 + kwargs.get("estimate_corner", False))
    scale = np.max(np.abs(numeric), axis=0)
    assert np.all(scale > 0)
    np.testing.assert_array_less(np.max(np.abs(analytic - numeric), axis=0), 1e-6 * scale)


def test_profile_interval_is_asymmetric_where_the_likelihood_is():
    # rho's likelihood is skewed (large rho barely changes the response): with noise its
    # profile interval reaches further up than down, and it holds the truth
    cell = BallStick.from_electrotonic(TAU_M, 1.0, 5.0, R_IN)
    rec, _ = simulate_recording(
        cell, protocol=StepProtocol(0.1, 0.4, (I_STEP,)), sweep_duration_s=0.8, n_sweeps=10,
        noise_sd_V=0.3e-3, seed=4,
    )  # fmt: skip
    v = np.mean([s.voltage for s in rec.sweeps], axis=0)
    fit = fit_ballstick(step_segments(v, 0.2e-3, baseline=float(np.mean(v[: ON - 10]))),
                        corner_hz=5_000.0, profile=True)
    lo, hi = fit.rho_interval
    assert "rho" in fit.profiled
    assert lo < 5.0 < hi
    assert hi - fit.rho > 1.1 * (fit.rho - lo)
    assert fit.rho_ci95 == pytest.approx((hi - lo) / 2)


# ---------------------------------------------------------------------------- bad input


def _good(**changes) -> CableSegment:
    t = np.linspace(1e-3, 0.2, 50)
    base = dict(t=t, y=-0.07 - 0.005 * (1 - np.exp(-t / 0.02)))
    return CableSegment(**(base | changes))


@pytest.mark.parametrize(
    ("segments", "kwargs", "match"),
    [
        ([], {}, "no segments"),
        ([Segment(np.arange(10.0), np.zeros(10))], {}, "pass CableSegment"),
        ([_good(kind="rise")], {}, "`kind` must be 'charge' or 'decay'"),
        ([_good(duration_s=0.1)], {}, "applies to 'decay' segments only"),
        ([_good(kind="decay", duration_s=-1.0)], {}, "`duration_s` must be a positive"),
        ([_good(offset=math.nan)], {}, "known `offset` must be finite"),
        ([_good()], {"corner_hz": -5.0}, "`corner_hz` must be a positive"),
        ([_good(baseline=-0.07, offset=-0.075)], {}, "`baseline` applies to 'charge'"),
        ([_good(t=np.linspace(0.0, 0.2, 50))], {}, "not after the edge"),
        ([_good(t=np.linspace(1e-3, 0.2, 5), y=np.zeros(5))], {}, "too few"),
        ([_good(y=np.full(50, np.nan))], {}, "no data"),
        ([_good(weight=np.full(50, 1.5), sample_interval_s=5e-5)], {}, "whole numbers"),
        ([_good(sample_interval_s=0.0)], {}, "`sample_interval_s` must be a positive"),
        ([_good()], {"init": (0.02, 9.0, 1.0)}, "L = 9.0 is outside"),
        ([_good()], {"init": (0.02, 1.0, 0.0)}, "rho = 0.0 is outside"),
        ([_good()], {"init": (0.02, 1.0)}, "`init` must be"),
    ],
)
def test_bad_input_errors(segments, kwargs, match):
    with pytest.raises(ValueError, match=match):
        fit_ballstick(segments, **kwargs)


def test_bridge_jump_needs_a_charging_segment():
    fit = fit_ballstick(step_segments(noiseless_step(1.0, 2.0), 0.5e-3))
    with pytest.raises(ValueError, match="needs a charging"):
        fit.bridge_jump_V(1, -0.070)
    with pytest.raises(cable.CableFitError, match="same sign"):
        fit.c_total_F(0, -I_STEP)


def test_initial_guess_rejects_bad_tau0():
    with pytest.raises(ValueError, match="`tau0_s` must be a positive"):
        cablefit.initial_guess(-1.0)


# ------------------------------------------------------------------ NEURON cross-check

def _neuron_step(soma_um: float, dend_diam_um: float, dend_len_um: float, dt_ms: float):
    """Somatic voltage (V) of a NEURON ball-and-stick for a -50 pA step from 20 to 170 ms."""
    pytest.importorskip("neuron")
    from neuron_cells import neuron_step_mV

    return 1e-3 * neuron_step_mV(soma_um, dend_diam_um, dend_len_um, delay_ms=20.0,
                                 duration_ms=150.0, amp_nA=-0.05, tstop_ms=270.0, dt_ms=dt_ms)


@pytest.mark.neuron
@pytest.mark.parametrize(
    ("soma_um", "dend_diam_um", "dend_len_um"), [(20.0, 2.0, 1000.0), (30.0, 1.5, 700.0)]
)
def test_recovers_neuron_cell(soma_um, dend_diam_um, dend_len_um):
    dt_ms = 0.025
    v = _neuron_step(soma_um, dend_diam_um, dend_len_um, dt_ms)
    from neuron_cells import morphology_truth

    truth = morphology_truth(soma_um, dend_diam_um, dend_len_um)
    L, rho, tau_m = truth["L"], truth["rho"], truth["tau0_s"]
    fs = 1e3 / dt_ms
    on, off = round(20.0 / dt_ms), round(170.0 / dt_ms)
    segs = []
    for edge, kind, duration, end in ((on, "charge", None, off), (off, "decay", 0.15, v.size)):
        a = edge + round(0.5 / dt_ms)
        t, y, w = decimate_tail(np.arange(a, end) / fs - edge / fs, v[a:end], 8e-3, 1.04)
        segs.append(CableSegment(t, y, w, kind=kind, duration_s=duration,
                                 sample_interval_s=1 / fs))  # fmt: skip
    fit = fit_ballstick(segs)
    assert fit.success, fit.message
    # backward Euler at 25 us lengthens tau1 by ~dt/2: 0.1 % on L, 0.5 % on rho seen
    assert fit.tau0_s == pytest.approx(tau_m, rel=2e-3)
    assert fit.L == pytest.approx(L, rel=5e-3)
    assert fit.rho == pytest.approx(rho, rel=2e-2)
    assert fit.bridge_jump_V(0, -0.070) / -50e-12 == pytest.approx(0.0, abs=0.3e6)


def test_values_only_fit_equals_the_full_one():
    # without errors (a bootstrap's refits) the search and its values are the same; the
    # standard errors and intervals are left out (NaN)
    cell = BallStick.from_electrotonic(TAU_M, 1.0, 5.0, R_IN)
    rec, _ = simulate_recording(cell, protocol=StepProtocol(0.1, 0.4, (I_STEP,)),
                                sweep_duration_s=0.8, n_sweeps=20, bridge_ohm=10e6, seed=1)
    v = np.mean([s.voltage for s in rec.sweeps], axis=0)
    segs = step_segments(v, 0.3e-3, group=0, baseline=float(np.mean(v[: ON - 10])))
    full = fit_ballstick(segs, corner_hz=5_000.0)
    bare = fit_ballstick(segs, corner_hz=5_000.0, errors=False)
    for name in ("tau0_s", "L", "rho", "rss", "bridge_needed"):
        assert getattr(bare, name) == getattr(full, name), name
    assert np.array_equal(bare.taus_s, full.taus_s) and np.array_equal(bare.bridge_V,
                                                                       full.bridge_V)
    assert np.isnan(bare.L_se) and np.isnan(bare.tau0_ci95_s) and np.isnan(bare.L_ci95)
    assert np.isfinite(full.L_se)


def test_a_lag_far_below_the_sampling_interval_keeps_its_large_error():
    # a column a billion times smaller than the others (a lag that barely moves the
    # model): numpy's pseudo-inverse of the unscaled normal matrix drops it and gives
    # it no variance; the lag's error comes from the scaled matrix, where it is the large
    # 1/|column| it is (the exact inverse of the scaled matrix, checked here)
    from passivefit.core.cablefit import _lag_se

    rng = np.random.default_rng(2)
    jac = rng.normal(size=(200, 6))
    jac[:, 3] *= 1e-9
    unscaled = np.sqrt(np.linalg.pinv(jac.T @ jac)[3, 3])
    norms = np.linalg.norm(jac, axis=0)
    exact = np.sqrt(np.linalg.inv((jac / norms).T @ (jac / norms))[3, 3]) / norms[3]
    assert _lag_se(jac, 1.0) == pytest.approx(exact, rel=1e-9)
    assert unscaled < 1e-3 * exact
