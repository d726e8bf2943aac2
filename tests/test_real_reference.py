"""Sanity checks of the independent transparent estimate in real_reference.py.

These test the reference itself (not passivefit): that the hand-determined protocol facts
match the files and that the estimates are physiologically plausible. The plausibility
ranges are facts of the trade, from memory, common practice, no source.
"""

from __future__ import annotations

import math

import numpy as np
import pyabf
import pytest
from real_reference import (
    DATA_DIR,
    FACTS,
    file_summary,
    load_vm,
    measure_step,
    sweep_estimate,
    vi_slope_MOhm,
)

NAMES = sorted(FACTS)


def test_all_nine_files_and_their_licence_are_present():
    abfs = sorted(p.name for p in DATA_DIR.glob("*.abf"))
    assert len(abfs) == 9
    licence = (DATA_DIR / "LICENSE").read_text()
    assert "MIT License" in licence and "Scott W Harden" in licence
    assert "swharden/pyABF" in (DATA_DIR / "README.md").read_text()


@pytest.mark.parametrize("name", NAMES)
def test_facts_match_the_file_header(name):
    facts = FACTS[name]
    abf = pyabf.ABF(str(DATA_DIR / facts.file))
    assert abf.sweepCount == len(facts.amplitudes_pA)
    assert abf.adcUnits[facts.vm_channel].strip("\x00 ") == "mV"
    assert facts.onset_ms + facts.duration_ms < abf.sweepLengthSec * 1e3
    assert facts.onset_ms - 0.5 - facts.baseline_ms >= 0.0
    assert set(facts.rin_sweeps) <= set(facts.passive_sweeps)
    assert all(facts.amplitudes_pA[s] < 0 for s in facts.passive_sweeps)


@pytest.mark.parametrize("name", ["171116sh_0018", "18711001", "File_axon_5", "190619B_0003"])
def test_step_times_and_amplitudes_match_the_command_waveform(name):
    """Without a recorded current, the epoch table is the witness: the command pyabf draws
    must change level at the hand-found onset and end, by the hand-found amplitude."""
    facts = FACTS[name]
    abf = pyabf.ABF(str(DATA_DIR / facts.file))
    for sweep, amp in enumerate(facts.amplitudes_pA):
        abf.setSweep(sweep, channel=facts.vm_channel)
        t_ms, c = abf.sweepX * 1e3, abf.sweepC
        inside = (t_ms > facts.onset_ms + 1) & (t_ms < facts.onset_ms + facts.duration_ms - 1)
        before = (t_ms > facts.onset_ms - 5) & (t_ms < facts.onset_ms - 0.1)
        assert np.ptp(c[inside]) == 0.0
        assert c[inside][0] - c[before][-1] == pytest.approx(amp, abs=1e-6)


def test_18425108_amplitude_is_the_recorded_current():
    abf = pyabf.ABF(str(DATA_DIR / "18425108.abf"))
    abf.setSweep(0, channel=0)  # 'Imemb', nA
    t_ms, i_nA = abf.sweepX * 1e3, abf.sweepY
    step = np.mean(i_nA[(t_ms >= 300) & (t_ms < 499.5)])
    base = np.mean(i_nA[(t_ms >= 150) & (t_ms < 249.5)])
    assert (step - base) * 1e3 == pytest.approx(FACTS["18425108"].amplitudes_pA[0], abs=0.5)
    assert base * 1e3 == pytest.approx(79.0, abs=2.0)  # the holding offset the pulse sits on


def test_190619B_second_channel_is_a_copy_of_the_command_not_vm():
    """IN 2 (labelled mV) steps linearly with the command current and stays near 0."""
    abf = pyabf.ABF(str(DATA_DIR / "190619B_0003.abf"))
    steps = []
    for sweep in range(abf.sweepCount):
        abf.setSweep(sweep, channel=1)
        t_ms, y = abf.sweepX * 1e3, abf.sweepY
        steps.append(np.mean(y[(t_ms > 1100) & (t_ms < 2000)]) - np.mean(y[t_ms < 1000]))
    slope = np.polyfit(FACTS["190619B_0003"].amplitudes_pA, steps, 1)[0]
    assert np.allclose(steps, slope * np.asarray(FACTS["190619B_0003"].amplitudes_pA), atol=2e-3)
    assert abs(np.mean(y)) < 1.0  # never near a membrane potential


@pytest.mark.parametrize("name", NAMES)
def test_passive_sweeps_do_not_fire_and_hyperpolarize(name):
    for sweep in FACTS[name].passive_sweeps:
        est = sweep_estimate(name, sweep)
        assert not est.fired
        assert est.steady_mV < est.baseline_mV
        assert est.peak_mV <= est.steady_mV


def test_depolarizing_sweeps_that_fire_are_seen_to_fire():
    assert sweep_estimate("171116sh_0018", 8).fired  # +100 pA, spikes seen in plots
    assert sweep_estimate("File_axon_5", 8).fired  # +300 pA
    assert sweep_estimate("190619B_0003", 6).fired  # +240 pA
    assert not sweep_estimate("171116sh_0018", 4).fired  # 0 pA


@pytest.mark.parametrize("name", NAMES)
def test_summary_is_physiologically_plausible(name):
    s = file_summary(name)
    # Facts of the trade, from memory: a healthy whole-cell neuron rests between -100 and
    # -40 mV, has R_in of 20-2000 MΩ and a membrane time constant of 2-200 ms.
    assert -100.0 < s.v_rest_mV.low <= s.v_rest_mV.median <= s.v_rest_mV.high < -40.0
    assert 20.0 < s.r_in_MOhm.low <= s.r_in_MOhm.median <= s.r_in_MOhm.high < 2000.0
    assert 2.0 < s.tau0_ms.low <= s.tau0_ms.median <= s.tau0_ms.high < 200.0
    assert s.v_rest_mV.n == len(FACTS[name].passive_sweeps)
    assert s.tau0_ms.n == len(FACTS[name].passive_sweeps)  # every fit converged
    # Sag ratio lies in [0, 1) by construction when the peak is below the steady state.
    assert 0.0 <= s.sag_ratio.low <= s.sag_ratio.high < 1.0


def test_sagging_cell_sags_more_than_the_others():
    """171116sh_0018 shows Ih sag on its second, fixed -100 pA step in the first sweeps
    (seen in plots); the cleanest non-sagging cell (18711001) hardly does."""
    t, v = load_vm("171116sh_0018", 0)
    second = measure_step(t, v, 1146.85, 500.0, -100.0, 100.0, True)
    assert second.sag_ratio > 0.15
    assert file_summary("18711001").sag_ratio.median < 0.08


def test_18711001_drifts_over_the_recording():
    """Per-sweep R_in rises over the 30 sweeps (the drift the README describes)."""
    r = [sweep_estimate("18711001", s).r_in_MOhm for s in range(30)]
    assert np.mean(r[-5:]) - np.mean(r[:5]) > 15.0


def test_vi_slope_agrees_with_the_per_sweep_r_in():
    for name in ("171116sh_0018", "File_axon_5", "190619B_0003"):
        s = file_summary(name)
        slope = vi_slope_MOhm(name)
        assert 0.7 * s.r_in_MOhm.low < slope < 1.3 * s.r_in_MOhm.high
    assert math.isnan(vi_slope_MOhm("18425108"))  # one current level only


def test_tau_fit_recovers_a_known_exponential():
    """The fitting routine itself on a clean synthetic step (τ 20 ms, R 150 MΩ)."""
    t = np.arange(0.0, 600.0, 0.05)
    v = np.full_like(t, -70.0)
    on = t >= 100.0
    v[on] = -70.0 - 15.0 * (1.0 - np.exp(-(t[on] - 100.0) / 20.0))
    v[t >= 400.0] = -70.0 - 15.0 * (1 - np.exp(-300.0 / 20.0)) * np.exp(
        -(t[t >= 400.0] - 400.0) / 20.0)
    v = v + np.random.default_rng(3).normal(0, 0.1, t.size)
    est = measure_step(t, v, 100.0, 300.0, -100.0, 50.0, False)
    assert est.tau_ms == pytest.approx(20.0, rel=0.03)
    assert est.r_in_MOhm == pytest.approx(150.0, rel=0.02)
    assert est.sag_ratio < 0.05


def test_time_to_63_percent_is_near_tau_for_a_clean_non_sagging_cell():
    """For a single exponential, 63 % of the deflection is reached at τ (common practice,
    no source); 18711001 is clean and sag-free, so the two must agree within 25 %."""
    for sweep in (0, 10, 29):
        est = sweep_estimate("18711001", sweep)
        assert est.t63_ms == pytest.approx(est.tau_ms, rel=0.25)
