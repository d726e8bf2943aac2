"""Cross-check of the ball-and-stick solution against an independent simulator.

NEURON (https://neuron.yale.edu; test extra) is used only to simulate the same
passive cable: a soma section plus one dendrite, ``pas`` membrane, an ``IClamp`` at
the soma, fixed-step integration. Nothing else from it is used.
"""

from __future__ import annotations

import numpy as np
import pytest

from passivefit.simulate import BallStick

neuron = pytest.importorskip("neuron")
from neuron_cells import CM_UF_CM2, RI_OHM_CM, RM_OHM_CM2, neuron_step_mV  # noqa: E402

pytestmark = pytest.mark.neuron

DT_MS = 0.025
DELAY_MS = 20.0
DURATION_MS = 250.0
AMP_NA = -0.05


def neuron_soma_voltage(soma_um: float, dend_diam_um: float, dend_len_um: float) -> np.ndarray:
    """Somatic voltage (mV) of the NEURON ball-and-stick, sampled every DT_MS from t = 0."""
    return neuron_step_mV(soma_um, dend_diam_um, dend_len_um, delay_ms=DELAY_MS,
                          duration_ms=DURATION_MS, amp_nA=AMP_NA,
                          tstop_ms=DELAY_MS + DURATION_MS + 30.0, dt_ms=DT_MS)


@pytest.mark.parametrize(
    ("soma_um", "dend_diam_um", "dend_len_um"), [(20.0, 2.0, 1000.0), (15.0, 4.0, 600.0)]
)
def test_step_response_matches_neuron(soma_um, dend_diam_um, dend_len_um):
    v_nrn = neuron_soma_voltage(soma_um, dend_diam_um, dend_len_um)
    cell = BallStick.from_morphology(
        RM_OHM_CM2,
        CM_UF_CM2 * 1e-6,
        RI_OHM_CM,
        soma_um * 1e-6,
        dend_diam_um * 1e-6,
        dend_len_um * 1e-6,
    )
    dt = DT_MS * 1e-3
    onset, width = round(DELAY_MS / DT_MS), round(DURATION_MS / DT_MS)
    current = np.zeros(v_nrn.size)
    current[onset : onset + width] = AMP_NA * 1e-9
    ours_mV = -70.0 + 1e3 * cell.soma_response(current, dt)
    steady_mV = abs(AMP_NA * 1e-9 * cell.r_in_ohm * 1e3)
    error = np.abs(v_nrn - ours_mV) / steady_mV
    error[onset : onset + 3] = 0.0  # first samples after each edge: integrator start-up
    error[onset + width : onset + width + 3] = 0.0
    assert error.max() < 2e-3  # 0.2 % of the steady deflection at every other sample

    # NEURON's steady-state input resistance equals ours within 0.1 %
    r_in_nrn = (v_nrn[onset + width - 1] - v_nrn[onset - 1]) * 1e-3 / (AMP_NA * 1e-9)
    assert abs(r_in_nrn / cell.r_in_ohm - 1.0) < 1e-3
