"""A passive ball-and-stick cell simulated by NEURON, and its values from morphology.

NEURON (https://neuron.yale.edu; test extra) is used only to simulate the passive cable:
an isopotential soma section plus one 101-segment dendrite, ``pas`` membrane, an
``IClamp`` at the soma, fixed-step backward Euler. Nothing else from it is used.
"""

from __future__ import annotations

import math

import numpy as np

RM_OHM_CM2 = 20e3
CM_UF_CM2 = 1.0
RI_OHM_CM = 100.0


def neuron_step_mV(soma_um: float, dend_diam_um: float, dend_len_um: float, *,
                   delay_ms: float, duration_ms: float, amp_nA: float, tstop_ms: float,
                   dt_ms: float = 0.025) -> np.ndarray:
    """Somatic voltage (mV) of the NEURON cell for one current step, every dt_ms from 0."""
    import neuron

    h = neuron.h
    h.load_file("stdrun.hoc")
    soma, dend = h.Section(name="soma"), h.Section(name="dend")
    soma.L = soma.diam = soma_um  # lateral area pi*d^2, the area of a sphere of diameter d
    soma.nseg, soma.Ra = 1, 1e-6  # a lumped (isopotential) soma
    dend.L, dend.diam, dend.nseg, dend.Ra = dend_len_um, dend_diam_um, 101, RI_OHM_CM
    dend.connect(soma(1))
    for sec in (soma, dend):
        sec.cm = CM_UF_CM2
        sec.insert("pas")
        for seg in sec:
            seg.pas.g, seg.pas.e = 1.0 / RM_OHM_CM2, -70.0
    stim = h.IClamp(soma(0.5))
    stim.delay, stim.dur, stim.amp = delay_ms, duration_ms, amp_nA
    h.CVode().active(0)
    h.secondorder, h.dt, h.steps_per_ms = 0, dt_ms, 1.0 / dt_ms
    v = h.Vector().record(soma(0.5)._ref_v)
    h.finitialize(-70.0)
    h.continuerun(tstop_ms)
    return np.array(v)


def morphology_truth(soma_um: float, dend_diam_um: float, dend_len_um: float) -> dict:
    """τ0 (s), L, ρ and C_total (F) of the cell from its morphology and membrane constants.

    λ = √(Rm·d/(4·Ri)), G∞ = (π/2)·d^(3/2)/√(Rm·Ri) (docs/references.md §1 notation, Rall 1959
    [mem], re-derived [der]); ρ = G∞·tanh(L)/G_soma (Rall 1969 definition [pub]);
    τ0 = Rm·Cm; C_total = membrane area × Cm.
    """
    d_cm, ds_cm, ell_cm = dend_diam_um * 1e-4, soma_um * 1e-4, dend_len_um * 1e-4
    L = ell_cm / math.sqrt(RM_OHM_CM2 * d_cm / (4 * RI_OHM_CM))
    g_inf = 0.5 * math.pi * d_cm**1.5 / math.sqrt(RM_OHM_CM2 * RI_OHM_CM)
    rho = g_inf * math.tanh(L) / (math.pi * ds_cm**2 / RM_OHM_CM2)
    area_cm2 = math.pi * ds_cm**2 + math.pi * d_cm * ell_cm
    return {"tau0_s": RM_OHM_CM2 * CM_UF_CM2 * 1e-6, "L": L, "rho": rho,
            "c_total_F": area_cm2 * CM_UF_CM2 * 1e-6}
