"""Accuracy on simulated cells that are not ideal, beside the ideal one.

Run:  .venv/bin/python benchmarks/bench_active.py

Each row is one simulated cell (τm 20 ms, L 1, ρ 5, R_in 128 MΩ, 0.3 mV noise, 5 kHz
filter; steps −100/−50/+50 pA, 12 sweeps of 1 s) with one property real cells have, and
the error of what passivefit reports against the simulation's truth. For the sagging cell
the reference τ is the passive τm and R_in the small-signal R_in at rest (its Ih, open at
rest, lowers both); the rectifying cell's reference R_in is the chord of its smallest
step. Also the event detector on event-free cells: sweeps taken for an event.
"""

from __future__ import annotations

import os
import sys

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))

import numpy as np  # noqa: E402

from passivefit.analysis import Settings, analyze  # noqa: E402
from passivefit.simulate import (  # noqa: E402
    BallStick,
    RectifyingLeak,
    SagConductance,
    Spiking,
    StepProtocol,
    simulate_recording,
)

CELL = BallStick.from_electrotonic(0.020, 1.0, 5.0, 128e6)
STEPS = StepProtocol(0.1, 0.5, (-100e-12, -50e-12, 50e-12))
CASES = {
    "ideal": {},
    "spontaneous events (2/s, 1–3 mV)": dict(events_per_s=2.0, event_amplitude_V=(1e-3, 3e-3),
                                             event_decay_s=20e-3),
    "h-type sag (3 nS)": dict(sag=SagConductance(3e-9)),
    "firing on +50 pA": dict(spiking=Spiking(threshold_V=-0.065)),
    "R_in drift 128 → 180 MΩ": dict(r_in_final_ohm=180e6),
    "inward rectification (8 nS)": dict(rectifier=RectifyingLeak(8e-9)),
}


def row(name: str, extra: dict, seed: int = 5) -> str:
    rec, truth = simulate_recording(CELL, protocol=STEPS, n_sweeps=12, sweep_duration_s=1.0,
                                    noise_sd_V=0.3e-3, seed=seed, **extra)
    result = analyze(rec, Settings())
    cell = result.to_dict()["cell"]
    r_true = truth.get("r_in_rest_MOhm", truth["r_in_MOhm"])
    if "rectifier" in extra:
        r_true = truth["sweep_steady_mV"][1] / -50 * 1e3   # chord of the −50 pA step
    if "r_in_final_ohm" in extra:
        used = [s.index for s in result.sweeps if s.accepted]
        r_true = float(np.mean(np.array(truth["sweep_r_in_MOhm"])[used]))

    def err(value, ref):
        return "null" if value is None else f"{100 * (value / ref - 1):+.1f} %"

    codes = sorted({f.code for f in result.flags} - {"fit.residual_structure"})
    used = f"{cell['n_sweeps_used']}/12"
    sag = cell["sag_ratio"] if cell["sag_ratio"] is not None else "null"
    return (f"| {name} | {err(cell['tau0_ms'], truth['tau0_ms'])} | "
            f"{err(cell['r_in_MOhm'], r_true)} | {sag} | {used} | {', '.join(codes) or '—'} |")


def false_events(n_cells: int = 10) -> str:
    """Sweeps of event-free cells (0.2–1 mV noise, 0.1 mV hum) taken for an event."""
    taken = total = 0
    for k in range(n_cells):
        noise = (0.2e-3, 0.5e-3, 1e-3)[k % 3]
        rec, _ = simulate_recording(CELL, protocol=STEPS, n_sweeps=12, sweep_duration_s=1.0,
                                    noise_sd_V=noise, hum_V=0.1e-3, seed=100 + k)
        result = analyze(rec, Settings(bootstrap=0))
        taken += sum(bool(s.masked_s) for s in result.sweeps)
        total += len(result.sweeps)
    return f"event-free sweeps taken for an event: {taken} of {total}"


def main() -> None:
    print("command: .venv/bin/python benchmarks/bench_active.py\n")
    print("| cell | τ0 error | R_in error | sag ratio | sweeps used | flags |")
    print("|---|---|---|---|---|---|")
    for name, extra in CASES.items():
        print(row(name, extra))
    print()
    print(false_events())


if __name__ == "__main__":
    main()
