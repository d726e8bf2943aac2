"""Opt-in active properties of simulated cells: Ih-like sag, rectifier, spikes, R_in drift."""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.integrate import solve_ivp
from scipy.sparse import diags

from passivefit.simulate import (
    BallStick,
    RectifyingLeak,
    SagConductance,
    Spiking,
    StepProtocol,
    simulate_recording,
    truth_to_json,
)
from passivefit.simulate.active import _active_responses

CELL = BallStick.from_electrotonic(0.02, 1.0, 5.0, 128e6)
STEPS = StepProtocol(0.1, 0.5, (-150e-12, -100e-12, -50e-12, 50e-12))
FS = 20_000


def simulate(**kwargs):
    args = dict(protocol=STEPS, sweep_duration_s=1.0, n_sweeps=4, seed=2, noise_sd_V=0.0)
    args.update(kwargs)
    return simulate_recording(CELL, **args)


def compartmental_reference(sag, rect, amp, t_end, on_s, off_s, v_rest, n_comp=40):
    """Independent method: compartmental cable plus somatic Ih/rectifier, stiff ODE solver."""
    dx = CELL.L / n_comp
    w = np.ones(n_comp + 1)
    w[[0, -1]] = 0.5
    cap = CELL.tau_m_s * CELL.g_inf_S * dx * w
    cap[0] += CELL.tau_m_s * CELL.g_soma_S
    ga = CELL.g_inf_S / dx
    links = np.full(n_comp + 1, 2.0)
    links[[0, -1]] = 1.0
    g = diags([cap / CELL.tau_m_s + ga * links, -ga * np.ones(n_comp), -ga * np.ones(n_comp)],
              [0, 1, -1]).tocsr()
    m0 = float(sag.m_inf(v_rest)) if sag else 0.0

    def rhs(current):
        def f(t, y):
            v, m = y[:-1], y[-1]
            inj = np.zeros_like(v)
            vs = v_rest + v[0]
            inj[0] = current
            if sag:
                inj[0] -= sag.g_max_S * (m * (vs - sag.e_rev_V) - m0 * (v_rest - sag.e_rev_V))
            if rect:
                inj[0] -= float(rect.conductance_S(vs)) * (vs - v_rest)
            dm = (float(sag.m_inf(vs)) - m) / sag.tau_s if sag else 0.0
            return np.append((inj - g @ v) / cap, dm)
        return f

    t = np.arange(int(round(t_end * FS))) / FS
    y = np.zeros(n_comp + 2)
    y[-1] = m0
    out = np.zeros(t.size)
    for lo, hi, cur in ((0.0, on_s, 0.0), (on_s, off_s, amp), (off_s, t_end, 0.0)):
        sel = (t >= lo) & (t < hi)
        sol = solve_ivp(rhs(cur), (lo, hi), y, t_eval=t[sel], method="BDF", rtol=1e-9,
                        atol=1e-13, dense_output=True)
        out[sel] = sol.y[0]
        y = sol.sol(hi)
    return out


@pytest.mark.parametrize("which", ["sag", "rectifier", "both"])
def test_active_cell_matches_an_independent_compartmental_solution(which):
    sag = SagConductance(3e-9, tau_s=0.08) if which in ("sag", "both") else None
    rect = RectifyingLeak(4e-9) if which in ("rectifier", "both") else None
    n = int(0.3 * FS)
    unit = np.zeros(n)
    unit[int(0.02 * FS) : int(0.2 * FS)] = 1.0
    ours = _active_responses(CELL, unit, np.array([-100e-12]), np.array([1.0]), 1 / FS, -0.07,
                             sag, rect)[0]
    ref = compartmental_reference(sag, rect, -100e-12, 0.3, 0.02, 0.2, -0.07)
    passive = _active_responses(CELL, unit, np.array([-100e-12]), np.array([1.0]), 1 / FS,
                                -0.07, None, None)[0]
    effect = np.max(np.abs(ours - passive))
    assert effect > 2e-3  # the active conductance changes the response by mV
    assert np.max(np.abs(ours - ref)) < 0.01 * effect


def test_one_command_per_row_equals_each_row_alone():
    # sweeps of several epochs (tests/protocol_replicas.py): a 2-d command, one per row,
    # gives each row's 1-d response, with its own amplitude and scale
    sag, n = SagConductance(3e-9, tau_s=0.08), int(0.3 * FS)
    rows = np.zeros((2, n))
    rows[0, 400:2000] = 1.0
    rows[1, 400:2000], rows[1, 3000:5000] = -1.0, 0.5
    amps, scales = np.array([-80e-12, 120e-12]), np.array([1.0, 1.2])
    both = _active_responses(CELL, rows, amps, scales, 1 / FS, -0.07, sag, None)
    for k in range(2):
        alone = _active_responses(CELL, rows[k], amps[k:k + 1], scales[k:k + 1], 1 / FS,
                                  -0.07, sag, None)[0]
        assert_allclose(both[k], alone, rtol=0, atol=1e-12)
    assert np.ptp(both[1, 3000:5000]) > 1e-3   # the second epoch is played


def test_defaults_leave_the_recording_unchanged():
    # the opt-in options off: bit-identical to the plain passive simulation
    a, ta = simulate_recording(CELL, protocol=STEPS, sweep_duration_s=1.0, n_sweeps=3)
    b, tb = simulate_recording(CELL, protocol=STEPS, sweep_duration_s=1.0, n_sweeps=3,
                               sag=None, rectifier=None, spiking=None, r_in_final_ohm=None)
    assert a.sha256 == b.sha256 and truth_to_json(ta) == truth_to_json(tb)
    assert "sweep_sag_ratio" not in ta and "event_times_ms" not in ta


def test_sag_and_rebound_truth():
    rec, truth = simulate(sag=SagConductance(3e-9), filter_hz=None)
    ratios = truth["sweep_sag_ratio"]
    # more hyperpolarization opens more Ih: deeper sag (smaller ratio), larger rebound
    assert ratios[0] < ratios[1] < ratios[2] < 1.0
    assert 0.7 < ratios[0] < 0.9
    assert truth["sweep_rebound_mV"][0] > truth["sweep_rebound_mV"][1] > 0.3
    assert all(40 < t < 100 for t in truth["sweep_peak_ms"][:3])
    # the truth is read off the recorded (noiseless, unfiltered) trace
    v = rec.sweeps[0].voltage + 0.070
    step = v[2000:12000]
    assert_allclose(step.min() * 1e3, truth["sweep_peak_mV"][0], rtol=1e-12)
    assert_allclose(v[11980:12000].mean() / step.min(), ratios[0], rtol=1e-12)
    assert_allclose(v[12000:].max() * 1e3, truth["sweep_rebound_mV"][0], rtol=1e-12)
    # the standing Ih at rest lowers the small-signal input resistance
    sag = SagConductance(3e-9)
    expected = 1 / (1 / 128e6 + sag.steady_slope_S(-0.070)) * 1e-6
    assert_allclose(truth["r_in_rest_MOhm"], expected, rtol=1e-12)
    assert truth["r_in_rest_MOhm"] < truth["r_in_MOhm"] and truth["ih_tau_ms"] == 100.0
    # small steps: steady deflection close to I * r_in_rest (linear regime)
    small, t_small = simulate(sag=sag, filter_hz=None,
                              protocol=StepProtocol(0.1, 0.8, (-2e-12,)), sweep_duration_s=1.2)
    assert_allclose(t_small["sweep_steady_mV"][0], -2e-12 * expected * 1e9, rtol=0.01)


def test_rectifier_lowers_resistance_with_hyperpolarization_and_does_not_sag():
    _, truth = simulate(rectifier=RectifyingLeak(5e-9), filter_hz=None)
    chord = np.array(truth["sweep_steady_mV"]) / np.array([-150, -100, -50, 50])
    assert chord[0] < chord[1] < chord[2] < chord[3]  # GOhm; falls with hyperpolarization
    assert_allclose(truth["sweep_sag_ratio"], 1.0, atol=1e-3)  # instantaneous: no sag
    assert "rect_g_nS" in truth and truth["rect_e_rev_mV"] == -70.0


def test_spikes_on_depolarizing_steps_only():
    steps = StepProtocol(0.1, 0.5, (-100e-12, 100e-12, 250e-12))
    rec, truth = simulate(protocol=steps, n_sweeps=3, spiking=Spiking(), filter_hz=None,
                          sag=SagConductance(1e-9))
    counts = [len(t) for t in truth["spike_times_ms"]]
    assert counts[0] == 0 and 0 <= counts[1] < counts[2]
    assert counts[2] >= 3
    v = rec.sweeps[2].voltage
    assert 0.025 < v.max() < 0.035  # peak ~ +30 mV
    first = truth["spike_times_ms"][2][0] * 1e-3
    window = v[int(first * FS) : int((first + 2e-3) * FS)]
    assert np.sum(window > -0.020) * 1e3 / FS < 1.5  # above -20 mV for about 1 ms or less
    after = v[int((first + 3e-3) * FS) : int((first + 10e-3) * FS)]
    assert after.min() < -0.050  # afterhyperpolarization below threshold
    # sag measures only for sweeps that do not fire
    fired = [c > 0 for c in counts]
    assert [r is None for r in truth["sweep_sag_ratio"]] == fired


def test_input_resistance_drifts_linearly_over_sweeps():
    steps = StepProtocol(0.1, 0.5, (-50e-12,))
    rec, truth = simulate(protocol=steps, n_sweeps=5, r_in_final_ohm=200e6, filter_hz=None)
    assert_allclose(truth["sweep_r_in_MOhm"], [128, 146, 164, 182, 200], rtol=1e-12)
    # 500 ms = 25 tau0: the steady state is I * R_in of that sweep
    steady = [s.voltage[11900:12000].mean() + 0.070 for s in rec.sweeps]
    assert_allclose(np.array(steady) / -50e-12 * 1e-6, truth["sweep_r_in_MOhm"], rtol=1e-5)


def test_event_options_and_truth():
    rec, truth = simulate(events_per_s=5.0, event_amplitude_V=(-1e-3, -1e-3),
                          event_decay_s=20e-3, filter_hz=None, protocol=StepProtocol(
                              0.1, 0.5, (0.0,)), n_sweeps=3)
    for sweep, times, amps in zip(rec.sweeps, truth["event_times_ms"],
                                  truth["event_amplitudes_mV"], strict=True):
        assert amps == [-1.0] * len(times)
        for t in times:  # an isolated IPSP-like event peaks near -1 mV
            i = int(t * 1e-3 * FS)
            others = [u for u in times if u != t]
            if all(abs(u - t) > 150 for u in others) and i + 2000 < sweep.voltage.size:
                assert_allclose(sweep.voltage[i : i + 400].min() + 0.070, -1e-3, rtol=0.02)
    assert sum(len(t) for t in truth["event_times_ms"]) > 5
    digest = hashlib.sha256(truth_to_json(truth).encode()).hexdigest()
    assert digest == hashlib.sha256(truth_to_json(simulate(
        events_per_s=5.0, event_amplitude_V=(-1e-3, -1e-3), event_decay_s=20e-3,
        filter_hz=None, protocol=StepProtocol(0.1, 0.5, (0.0,)), n_sweeps=3)[1]).encode()
    ).hexdigest()


def test_bad_active_arguments():
    with pytest.raises(ValueError, match="`g_max_S` must be a finite positive"):
        SagConductance(0.0)
    with pytest.raises(ValueError, match="`peak_V`"):
        Spiking(threshold_V=0.04)
    with pytest.raises(ValueError, match="`r_in_final_ohm` must be finite and positive"):
        simulate(r_in_final_ohm=-1.0)
    with pytest.raises(ValueError, match="`event_decay_s` must be longer"):
        simulate(event_decay_s=0.5e-3)


@pytest.mark.parametrize("g_S", [1e-9, 10e-9, 100e-9])
def test_a_constant_extra_conductance_gives_the_parallel_resistance(g_S):
    # a rectifier with v_half far above is a plain somatic conductance: the steady state
    # is I / (G_N + g) (conductances in parallel)
    steps = StepProtocol(0.1, 0.4, (-100e-12,))
    rec, truth = simulate(protocol=steps, n_sweeps=1, filter_hz=None, sweep_duration_s=0.6,
                          rectifier=RectifyingLeak(g_S, v_half_V=1.0))
    expected = -100e-12 / (1 / 128e6 + g_S)
    assert rec.sweeps[0].voltage[9900:10000].mean() + 0.070 == pytest.approx(expected, rel=1e-6)
    assert truth["r_in_rest_MOhm"] == pytest.approx(1e-6 / (1 / 128e6 + g_S), rel=1e-9)


def test_too_large_a_conductance_for_the_sampling_rate_is_refused():
    # the explicit feedback would oscillate: a clear error instead
    with pytest.raises(ValueError, match="too large for a sampling interval of 100 us"):
        simulate(sample_rate_hz=10_000, filter_hz=None, n_sweeps=1,
                 rectifier=RectifyingLeak(1e-6, v_half_V=1.0))
