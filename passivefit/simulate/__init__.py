"""Simulated ball-and-stick neurons under somatic current clamp, and simulated recordings.

A :class:`BallStick` is a lumped soma plus one uniform equivalent cylinder with a
sealed far end, uniform Rm, Cm and Ri. Its somatic impulse response is the exact
eigen-expansion h(t) = sum_n g_n exp(-t/tau_n) (docs/references.md §3);
:func:`compartmental_modes` gives the same modes by an independent route (a fine
compartmental discretisation, eigen-decomposed). :meth:`BallStick.soma_response`
is exact for a current held constant over each sample (zero-order hold).

:func:`simulate_recording` wraps a cell into a :class:`~passivefit.io.recording.Recording`
with the usual recording imperfections (noise, low-pass filter, residual bridge
imbalance, drift, mains hum, spontaneous events) and returns the ground truth beside it.
Opt-in, what real cells add: an Ih-like sag conductance (:class:`SagConductance`), an
inwardly rectifying leak (:class:`RectifyingLeak`), both fed back as somatic currents into
the exact passive response; action potentials (:class:`Spiking`); and a drift of the
input resistance over the sweeps. With all of them off the output is unchanged.
All quantities are SI inside; the truth dict carries display units in its keys.
"""


from passivefit.simulate.active import RectifyingLeak, SagConductance, Spiking
from passivefit.simulate.cell import LAB_NAME, BallStick, compartmental_modes
from passivefit.simulate.recording import (
    PulseProtocol,
    StepProtocol,
    filtered_noise_acf,
    noiseless_sweep,
    simulate_recording,
    truth_to_json,
)

__all__ = [
    "LAB_NAME",
    "BallStick",
    "PulseProtocol",
    "RectifyingLeak",
    "SagConductance",
    "Spiking",
    "StepProtocol",
    "compartmental_modes",
    "filtered_noise_acf",
    "noiseless_sweep",
    "simulate_recording",
    "truth_to_json",
]
