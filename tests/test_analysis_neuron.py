"""End to end against an independent simulator: NEURON simulates a ball-and-stick cell,
passivefit analyses the noisy sweeps and must recover the cell's passive properties.

NEURON is used only to simulate the cable (see test_neuron_crosscheck.py). The expected
values come from the cell's morphology and membrane constants, not from passivefit:
τ0 = Rm·Cm; L = ℓ/λ with λ = √(Rm·d/(4·Ri)) (docs/references.md §1 notation [der]); the total
capacitance = membrane area × Cm; τ1 and ρ from the ball-and-stick relations of
docs/references.md §3 [der] (Rall 1969, Biophys J 9:1483 [pub] for the definition of ρ).
"""

from __future__ import annotations

import numpy as np
import pytest

from passivefit.analysis import Settings, analyze
from passivefit.core import cable
from passivefit.io.recording import Recording, Sweep

neuron = pytest.importorskip("neuron")
from neuron_cells import morphology_truth  # noqa: E402
from test_neuron_crosscheck import (  # noqa: E402
    AMP_NA,
    DELAY_MS,
    DT_MS,
    DURATION_MS,
    neuron_soma_voltage,
)

pytestmark = pytest.mark.neuron
SOMA_UM, DEND_DIAM_UM, DEND_LEN_UM = 20.0, 2.0, 1000.0


@pytest.fixture(scope="module")
def result():
    v_mV = neuron_soma_voltage(SOMA_UM, DEND_DIAM_UM, DEND_LEN_UM)
    fs = 1e3 / DT_MS
    onset, width = round(DELAY_MS / DT_MS), round(DURATION_MS / DT_MS)
    current = np.zeros(v_mV.size)
    current[onset: onset + width] = AMP_NA * 1e-9
    rng = np.random.default_rng(5)
    sweeps = [Sweep(k, v_mV * 1e-3 + rng.normal(0, 0.1e-3, v_mV.size), current)
              for k in range(20)]
    rec = Recording(sweeps, fs, path="<NEURON ball-and-stick>", format="simulated")
    steady_mV = v_mV[onset + width - 1] - v_mV[onset - 1]
    return analyze(rec, Settings()).to_dict()["cell"], steady_mV


def expected():
    truth = morphology_truth(SOMA_UM, DEND_DIAM_UM, DEND_LEN_UM)
    L, rho, tau0 = truth["L"], truth["rho"], truth["tau0_s"]
    tau1 = tau0 / (1 + cable.ballstick_alphas(L, rho, 1)[0] ** 2)
    return dict(tau0_ms=tau0 * 1e3, tau1_ms=tau1 * 1e3, L=L, rho=rho,
                c_total_pF=truth["c_total_F"] * 1e12)


def test_time_constants_match_the_neuron_cell(result):
    cell, _ = result
    want = expected()
    assert cell["tau0_ms"] == pytest.approx(want["tau0_ms"], rel=0.02)
    assert cell["tau1_ms"] == pytest.approx(want["tau1_ms"], rel=0.05)


def test_cable_values_match_the_neuron_cell(result):
    cell, _ = result
    want = expected()
    assert cell["L_bs"] == pytest.approx(want["L"], rel=0.10)
    assert cell["rho"] == pytest.approx(want["rho"], rel=0.35)
    assert cell["c_total_pF"] == pytest.approx(want["c_total_pF"], rel=0.08)
    assert cell["L_cyl"] > want["L"]                    # docs/references.md §3 [der]
    assert cell["c_tau_pF"] < cell["c_total_pF"]        # docs/references.md §4 [der]


def test_input_resistance_matches_neuron_steady_state(result):
    cell, steady_mV = result
    assert cell["r_in_MOhm"] == pytest.approx(steady_mV / AMP_NA, rel=0.02)
