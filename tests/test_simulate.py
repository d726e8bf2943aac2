"""Simulated ball-and-stick cells and recordings (passivefit.simulate)."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.special import erf

from passivefit.core import cable
from passivefit.simulate import (
    BallStick,
    PulseProtocol,
    StepProtocol,
    compartmental_modes,
    simulate_recording,
    truth_to_json,
)

CELLS = {
    "L1-rho5": BallStick.from_electrotonic(0.02, 1.0, 5.0, 200e6),
    "L0.5-rho1": BallStick.from_electrotonic(0.03, 0.5, 1.0, 300e6),
    "L2-rho20": BallStick.from_electrotonic(0.015, 2.0, 20.0, 80e6),
    "cylinder-L1.5": BallStick.cylinder(0.02, 1.5, 100e6),
}
STEPS = StepProtocol(0.1, 0.4, (-50e-12, -30e-12, -10e-12, 10e-12))


def step_current(n: int, onset: int, amplitude: float) -> np.ndarray:
    current = np.zeros(n)
    current[onset:] = amplitude
    return current


@pytest.mark.parametrize("name", CELLS)
def test_analytic_and_compartmental_modes_agree(name):
    # independent method: 1000-compartment eigen-decomposition of the same cell
    cell = CELLS[name]
    taus, gains = cell.modes(400)
    taus_c, gains_c = compartmental_modes(cell, 1000)
    assert_allclose(taus_c[:4], taus[:4], rtol=1e-4)
    assert_allclose(gains_c[:4], gains[:4], rtol=1e-4)
    assert_allclose(np.sum(gains_c * taus_c), cell.r_in_ohm, rtol=1e-5)
    dt = 20e-6
    current = step_current(3000, 100, -20e-12)
    v = cell.soma_response(current, dt)
    v_c = cell.soma_response(current, dt, modes=(taus_c, gains_c))
    assert_allclose(v_c, v, rtol=0, atol=1e-4 * np.max(np.abs(v)))


@pytest.mark.parametrize("name", CELLS)
def test_impulse_modes_match_cable_theory(name):
    # g_0 = 1/C_total and the tau0 amplitude share B0/V_inf (docs/references.md §3/§4 [der])
    cell = CELLS[name]
    taus, gains = cell.modes(50)
    assert_allclose(gains[0], 1.0 / cell.c_total_F, rtol=1e-12)
    assert_allclose(gains[0] * taus[0] / cell.r_in_ohm, cell.b0_over_vinf(), rtol=1e-12)
    assert np.all(np.diff(taus) < 0) and np.all(gains > 0)


def test_step_response_of_a_cylinder_matches_rall_table():
    # docs/references.md §5.3: cylinder L = 1 at X = 0, V/V_inf = 0.2630/0.5375/0.7198/0.8969 [der]
    dt, tau = 1e-4, 1.0
    T = np.array([0.1, 0.5, 1.0, 2.0])
    idx = np.round(T / (dt / tau)).astype(int)
    cell = BallStick.cylinder(tau, 1.0, 1.0)
    v = cell.soma_response(np.ones(idx[-1] + 1), dt)
    assert_allclose(v[idx], [0.2630, 0.5375, 0.7198, 0.8969], atol=5e-5)
    # semi-infinite cylinder erf(sqrt T) (Jack, Noble & Tsien 1975 [mem]; docs/references.md §5.3):
    # a cylinder of L = 10 is semi-infinite for T <= 2 at this precision
    long_cell = BallStick.cylinder(tau, 10.0, 1.0)
    v = long_cell.soma_response(np.ones(idx[-1] + 1), dt) / long_cell.r_in_ohm
    assert_allclose(v[idx], erf(np.sqrt(T)), atol=1e-6)
    assert_allclose(v[idx], [0.3453, 0.6827, 0.8427, 0.9545], atol=5e-5)
    # isopotential cell 1 - exp(-T) (docs/references.md §5.3 [der]): vanishing dendrite
    iso = BallStick.from_electrotonic(tau, 1.0, 1e-9, 1.0)
    v = iso.soma_response(np.ones(idx[-1] + 1), dt)
    assert_allclose(v[idx], -np.expm1(-T), atol=1e-8)
    assert_allclose(v[idx], [0.0952, 0.3935, 0.6321, 0.8647], atol=5e-5)


def test_soma_response_is_exact_for_held_current():
    # Against the zero-order-hold convolution integral, term by term:
    # V(t_k) = sum_j I_j * g tau (exp(-(t_k - t_j - dt)/tau) - exp(-(t_k - t_j)/tau)), j < k
    taus = np.array([20e-3, 2e-3, 0.3e-3, 1e-7])  # the last relaxes within one sample
    gains = np.array([1e10, 1.5e10, 8e9, 5e12])
    dt = 50e-6
    current = np.random.default_rng(3).normal(0, 1e-11, 300)
    cell = CELLS["L1-rho5"]
    v = cell.soma_response(current, dt, modes=(taus, gains))
    k = np.arange(300)[:, None]
    j = np.arange(300)[None, :]
    age = np.where(k > j, k - j, 1)[..., None] * dt  # only j < k enters the sum
    kernel = np.where(
        k > j,
        np.sum(gains * taus * (np.exp(-(age - dt) / taus) - np.exp(-age / taus)), axis=-1),
        0.0,
    )
    assert_allclose(v, kernel @ current, rtol=1e-10, atol=1e-15)


@pytest.mark.parametrize("name", CELLS)
def test_steady_state_is_I_times_RN(name):
    cell = CELLS[name]
    dt = 50e-6
    n = int(12 * cell.tau0_s / dt)
    v = cell.soma_response(step_current(n, 10, -30e-12), dt)
    assert_allclose(v[-1], -30e-12 * cell.r_in_ohm, rtol=1e-5)
    # ... and the charging curve B0 is (B0/V_inf) V_inf: V_inf - V ~ B0 e^(-t/tau0) late on
    t = (np.arange(n) - 10) * dt
    late = t > 6 * cell.taus(2)[1] + 1e-3
    b0 = (-30e-12 * cell.r_in_ohm - v[late]) * np.exp(t[late] / cell.tau0_s)
    b0_expected = -30e-12 * cell.r_in_ohm * cable.b0_over_vinf(cell.L, cell.rho)
    assert_allclose(b0[-100:], b0_expected, rtol=1e-3)


def test_morphology_constructor_matches_electrotonic_one():
    cell = BallStick.from_morphology(20e3, 1e-6, 100.0, 20e-6, 2e-6, 1e-3)
    again = BallStick.from_electrotonic(cell.tau0_s, cell.L, cell.rho, cell.r_in_ohm)
    assert_allclose([again.g_soma_S, again.g_inf_S], [cell.g_soma_S, cell.g_inf_S], rtol=1e-12)
    assert_allclose(cell.tau0_s, 20e-3, rtol=1e-12)  # Rm*Cm = 20 kOhm cm2 * 1 uF/cm2


def simulate(**kwargs):
    args = dict(protocol=STEPS, sweep_duration_s=0.6, n_sweeps=8, seed=4)
    args.update(kwargs)
    return simulate_recording(CELLS["L1-rho5"], **args)


def test_recording_shape_units_and_metadata():
    rec, truth = simulate()
    rec.validate()
    assert rec.format == "simulated" and rec.sample_rate_hz == 20_000
    assert len(rec.sweeps) == 8 and rec.has_current
    assert all(s.n_samples == 12_000 for s in rec.sweeps)
    amps = [s.current[2500] for s in rec.sweeps]
    assert_allclose(amps, [-50e-12, -30e-12, -10e-12, 10e-12] * 2)
    assert all(
        s.current[1999] == 0 and s.current[2000] != 0 and s.current[10000] == 0 for s in rec.sweeps
    )
    assert abs(np.median(rec.sweeps[0].voltage) + 0.070) < 0.02  # volts, not mV
    meta = rec.metadata
    assert meta["cell_id"] == "LOL-2026-11-03-c1" and meta["date"] == "2026-11-03"
    assert meta["lab"] == "Lindqvist-Okafor Lab of Dendritic Physiology (invented)"
    assert meta["simulated"] is True and "-50, -30, -10, +10 pA" in meta["protocol"]
    assert "temperature_C" in meta
    cell = CELLS["L1-rho5"]
    assert_allclose(
        [
            truth["tau0_ms"],
            truth["tau1_ms"],
            truth["r_in_MOhm"],
            truth["L"],
            truth["rho"],
            truth["c_total_pF"],
            truth["c_tau_pF"],
        ],
        [20.0, cell.taus(2)[1] * 1e3, 200.0, 1.0, 5.0, cell.c_total_F * 1e12, 100.0],
        rtol=1e-12,
    )
    assert_allclose(truth["L_cyl_naive"], 1.1443, atol=5e-5)  # docs/references.md §5.2 [der]
    assert_allclose(truth["b1_over_b0"], 0.2034, atol=5e-5)  # docs/references.md §5.2 [der]
    assert_allclose(truth["c1_over_c0"], 1.7365, atol=5e-5)  # docs/references.md §5.2 [der]
    decoded = json.loads(truth_to_json(truth))
    assert decoded["tau0_ms"] == truth["tau0_ms"] and decoded["amplitudes_pA"][0] == -50.0
    assert simulate(metadata={"temperature_C": 22.0})[0].metadata["temperature_C"] == 22.0


def test_steady_state_and_noise_sd():
    rec, truth = simulate(noise_sd_V=0.5e-3, n_sweeps=40)
    baseline = np.concatenate([s.voltage[200:1900] for s in rec.sweeps])
    assert_allclose(baseline.std(), 0.5e-3, rtol=0.05)  # sd after the 5 kHz filter
    assert_allclose(baseline.mean(), -0.070, atol=0.05e-3)
    steady = np.mean([s.voltage[9000:9900].mean() for s in rec.sweeps[0::4]])
    assert_allclose(steady, -0.070 - 50e-12 * 200e6, atol=0.05e-3)
    unfiltered, _ = simulate(noise_sd_V=0.5e-3, n_sweeps=40, filter_hz=None)
    baseline = np.concatenate([s.voltage[200:1900] for s in unfiltered.sweeps])
    assert_allclose(baseline.std(), 0.5e-3, rtol=0.05)


def test_bridge_error_adds_a_fast_jump():
    quiet = dict(noise_sd_V=0.0, filter_hz=None)
    rec0, _ = simulate(**quiet)
    rec1, truth = simulate(bridge_ohm=20e6, electrode_tau_s=50e-6, **quiet)
    assert truth["bridge_MOhm"] == 20.0
    diff = rec1.sweeps[0].voltage - rec0.sweeps[0].voltage
    jump = -50e-12 * 20e6
    assert diff[2000] == 0.0
    assert_allclose(diff[2001], jump * -math.expm1(-50e-6 / 50e-6), rtol=1e-9)
    assert_allclose(diff[2040:9900], jump, rtol=1e-9)  # 2 ms = 40 electrode tau later
    assert abs(diff[11000]) < 1e-12  # gone after the step


def test_filter_delays_but_keeps_the_steady_state():
    quiet = dict(noise_sd_V=0.0, n_sweeps=1)
    raw = simulate(filter_hz=None, **quiet)[0].sweeps[0].voltage
    filtered = simulate(filter_hz=2_000, **quiet)[0].sweeps[0].voltage
    assert np.all(np.abs(filtered[2001:2004] - (-0.070)) < np.abs(raw[2001:2004] - (-0.070)))
    assert_allclose(filtered[9000:9900], raw[9000:9900], atol=1e-9)
    with pytest.raises(ValueError, match="half the sampling rate"):
        simulate(filter_hz=15_000)


def test_reproducible_by_seed():
    a, _ = simulate(hum_V=0.1e-3, events_per_s=3.0)
    b, _ = simulate(hum_V=0.1e-3, events_per_s=3.0)
    c, _ = simulate(hum_V=0.1e-3, events_per_s=3.0, seed=5)
    pairs = zip(a.sweeps, b.sweeps, strict=True)
    assert all(np.array_equal(x.voltage, y.voltage) for x, y in pairs)
    assert a.sha256 == b.sha256 != c.sha256
    assert not np.allclose(a.sweeps[0].voltage, c.sweeps[0].voltage)


def test_drift_hum_and_events():
    quiet = dict(noise_sd_V=0.0, filter_hz=None, n_sweeps=4)
    v = simulate(drift_V_per_s=2e-3, **quiet)[0].sweeps[0].voltage
    t = np.arange(v.size) / 20_000
    assert_allclose(np.polyfit(t[:1900], v[:1900], 1)[0], 2e-3, rtol=1e-9)
    hum = [s.voltage[:1800] for s in simulate(hum_V=0.3e-3, **quiet)[0].sweeps]
    assert_allclose([np.ptp(h) / 2 for h in hum], 0.3e-3, rtol=1e-3)  # 9 periods of 50 Hz
    assert len({round(float(h[0]), 9) for h in hum}) == 4  # a new phase each sweep
    rec, truth = simulate(events_per_s=20.0, **quiet)
    excursions = [s.voltage[:1900].max() + 0.070 for s in rec.sweeps]
    assert truth["events_per_s"] == 20.0
    assert max(excursions) > 0.4e-3 and all(e < 10e-3 for e in excursions)
    assert np.all(simulate(events_per_s=0.0, **quiet)[0].sweeps[0].voltage[:1900] == -0.070)


def test_pulse_protocol_truth():
    cell = CELLS["L1-rho5"]
    rec, truth = simulate_recording(
        cell,
        protocol=PulseProtocol(0.05, 0.5e-3, 1e-9),
        sweep_duration_s=0.3,
        n_sweeps=3,
        noise_sd_V=0.0,
        filter_hz=None,
    )
    assert truth["protocol"] == "pulse" and truth["charge_pC"] == pytest.approx(0.5)
    assert np.count_nonzero(rec.sweeps[0].current) == 10
    # square-pulse amplitudes at the pulse end: docs/references.md §2 duration factor [der]
    factor = cable.square_pulse_factor(cell.taus(2)[0], cell.taus(2)[1], 0.5e-3)
    assert_allclose(truth["c1_over_c0_square"], truth["c1_over_c0"] * factor, rtol=1e-12)
    # the simulated decay from the pulse end carries that C0 late on
    v = rec.sweeps[0].voltage + 0.070
    t_end = np.arange(v.size) / 20_000 - 0.0505
    late = (t_end > 0.02) & (t_end < 0.2)
    c0 = v[late] * np.exp(t_end[late] / cell.tau0_s)
    assert_allclose(c0, truth["c0_mV"] * 1e-3, rtol=1e-3)


def test_bad_arguments():
    with pytest.raises(ValueError, match="does not fit in a sweep"):
        simulate(sweep_duration_s=0.3)
    with pytest.raises(ValueError, match="`rho` must be finite and positive"):
        BallStick.from_electrotonic(0.02, 1.0, -1.0, 1e8)
    with pytest.raises(ValueError, match="`L` must be a finite positive"):
        BallStick(0.02, 0.0, 1e-9, 1e-9)


def test_cylinder_truth_is_json_ready():
    rec, truth = simulate_recording(
        CELLS["cylinder-L1.5"], protocol=STEPS, n_sweeps=1, sweep_duration_s=0.6
    )
    assert math.isinf(truth["rho"])
    assert json.loads(truth_to_json(truth))["rho"] is None
