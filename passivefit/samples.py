"""The bundled sample recordings: an invented scenario, simulated (see `passivefit demo`).

The Lindqvist-Okafor Lab of Dendritic Physiology recorded four cells in November 2026.
Every trace is simulated by `passivefit.simulate`; the `.truth.json` beside each file
holds the values the simulation was made with.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

DEFAULT_SAMPLE = "LOL-2026-11-03-c1_CA1.nwb"
REPO_SAMPLES = Path(__file__).resolve().parent.parent / "sample_recordings"


def sample_folder() -> Path:
    """The sample folder of a source checkout, else a cache folder written on first use."""
    if (REPO_SAMPLES / DEFAULT_SAMPLE).exists():
        return REPO_SAMPLES
    cache_home = Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache"))
    cache = cache_home / "passivefit" / "samples"
    if not (cache / DEFAULT_SAMPLE).exists():
        write_samples(cache)
    return cache


def bundled_sample() -> Path:
    """The recording the window opens when no path is given."""
    return sample_folder() / DEFAULT_SAMPLE


LAB = "Lindqvist-Okafor Lab of Dendritic Physiology (invented)"


@dataclass(frozen=True)
class SampleCell:
    """One invented cell of the demo scenario and how its recording is simulated."""

    file: str
    cell_id: str
    region: str
    cell_type: str
    tau_m_ms: float
    L: float
    rho: float
    r_in_MOhm: float
    protocol: str           # "steps" or "pulse"
    sample_rate_hz: float
    sweep_s: float
    n_sweeps: int
    noise_mV: float = 0.2
    bridge_MOhm: float = 0.0
    events_per_s: float = 0.0
    hum_mV: float = 0.0
    temperature_C: float = 32.0
    filter_hz: float = 5_000
    give_step: str = ""      # the --step a user must give (ABF1 carries no command)


SAMPLES = (
    SampleCell("LOL-2026-11-03-c1_CA1.nwb", "LOL-2026-11-03-c1", "CA1", "pyramidal",
               tau_m_ms=22.0, L=1.0, rho=5.0, r_in_MOhm=110.0, protocol="steps",
               sample_rate_hz=20_000, sweep_s=0.8, n_sweeps=20, bridge_MOhm=8.0,
               events_per_s=0.5),
    SampleCell("LOL-2026-11-05-c2_DG.csv", "LOL-2026-11-05-c2", "dentate gyrus", "granule",
               tau_m_ms=31.0, L=0.8, rho=3.0, r_in_MOhm=290.0, protocol="steps",
               sample_rate_hz=10_000, sweep_s=0.6, n_sweeps=8, noise_mV=0.25, hum_mV=0.1,
               filter_hz=2_000),
    SampleCell("LOL-2026-11-12-c3_CA3.abf", "LOL-2026-11-12-c3", "CA3", "pyramidal",
               tau_m_ms=24.0, L=0.95, rho=2.0, r_in_MOhm=140.0, protocol="steps",
               sample_rate_hz=20_000, sweep_s=0.6, n_sweeps=10, noise_mV=0.3,
               give_step="100 300 -40"),
    SampleCell("LOL-2026-11-19-c4_L5-pulses.nwb", "LOL-2026-11-19-c4", "cortex L5",
               "pyramidal", tau_m_ms=18.0, L=1.3, rho=8.0, r_in_MOhm=60.0, protocol="pulse",
               sample_rate_hz=20_000, sweep_s=0.2, n_sweeps=30, noise_mV=0.1),
)


def simulate_sample(sample: SampleCell, seed: int = 0):
    """The recording and ground truth of one sample cell."""
    from passivefit.simulate import BallStick, PulseProtocol, StepProtocol, simulate_recording

    cell = BallStick.from_electrotonic(sample.tau_m_ms * 1e-3, sample.L, sample.rho,
                                       sample.r_in_MOhm * 1e6)
    if sample.protocol == "steps":
        amps = (-40e-12,) if sample.give_step else (-50e-12, -30e-12, -10e-12, 10e-12)
        protocol = StepProtocol(0.1, 0.3 if sample.sweep_s < 0.7 else 0.4, amps)
    else:
        protocol = PulseProtocol(0.02, 0.5e-3, 1e-9)
    metadata = {"lab": LAB, "region": sample.region, "cell_type": sample.cell_type,
                "temperature_C": sample.temperature_C, "preparation": "acute slice (simulated)"}
    return simulate_recording(
        cell, protocol=protocol, sample_rate_hz=sample.sample_rate_hz,
        sweep_duration_s=sample.sweep_s, n_sweeps=sample.n_sweeps, filter_hz=sample.filter_hz,
        noise_sd_V=sample.noise_mV * 1e-3, bridge_ohm=sample.bridge_MOhm * 1e6,
        events_per_s=sample.events_per_s, hum_V=sample.hum_mV * 1e-3, seed=seed,
        cell_id=sample.cell_id, metadata=metadata)


def write_samples(folder: str | Path) -> list[Path]:
    """Write every sample recording and its `.truth.json` into `folder`."""
    import json

    from passivefit.io import save
    from passivefit.simulate import truth_to_json

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    written = []
    for k, sample in enumerate(SAMPLES):
        recording, truth = simulate_sample(sample, seed=2026 + k)
        path = folder / sample.file
        save(recording, path)
        truth = json.loads(truth_to_json(truth))
        truth.update(cell_id=sample.cell_id, simulated=True, lab=LAB)
        if sample.give_step:
            truth["analyze_with"] = f"--step {sample.give_step}"
        (folder / (path.name + ".truth.json")).write_text(json.dumps(truth, indent=2) + "\n")
        written.append(path)
    return written
