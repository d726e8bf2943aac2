"""Synthetic replicas of current-clamp step protocols of public ABF files we do not hold.

Each replica copies one file's protocol as its header dump shows it (sweep count and
length, rate, channels, DAC epoch table: levels, increments, durations, the 1/64 of the
sweep at holding before epoch A) and fills it with a simulated cell. Sources: the
`.abfinfo` header dumps of repository swharden/pyABF, folder data/abfs (MIT licence),
as summarised in the project notes; cells, labs and values are invented.

What a replica models: a ball-and-stick cell driven by the whole multi-epoch command of
each sweep (the exact passive cable response, with an Ih-like sag conductance and/or an
inward rectifier fed back as somatic currents; passivefit.simulate.active), action
potentials pasted where the potential crosses threshold, Bessel-filtered noise, a slow
drift of the resting potential over the sweeps and within each sweep, spontaneous
synaptic events, optionally a residual bridge and a drift of the input resistance.
What it does not: spikes do not feed back on the membrane (above threshold the mean
depolarization is compressed by a tanh to stand for the spike currents' hold on it), no
adaptation beyond the AHP, no capacitance neutralisation or electrode artefacts other
than the bridge, the filter is digitised at the sample rate (its corner is not exact).
The files are written with the minimal ABF writers of tests/io_fixtures.py.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from io_fixtures import abf1_channels_bytes, abf2_channels_bytes

from passivefit.simulate import BallStick, RectifyingLeak, SagConductance, Spiking
from passivefit.simulate.active import _active_responses
from passivefit.simulate.recording import _apply_filter, _bessel, _electrode_lag, _events

PRE_SWEEP_FRACTION = 64  # ABF sweeps hold 1/64 of their samples at holding before epoch A
STEP = 1  # nEpochType of a step
SOURCE = "swharden/pyABF data/abfs, MIT"


@dataclass(frozen=True)
class CellModel:
    """A simulated cell: passive cable plus optional sag, rectifier and spikes."""

    cell: BallStick
    v_rest_V: float
    sag: SagConductance | None = None
    rectifier: RectifyingLeak | None = None
    spiking: Spiking | None = None
    spike_drive_V: float = 0.010  # tanh scale of the depolarization kept above threshold


@dataclass(frozen=True)
class Chain:
    """The recording around the cell."""

    noise_sd_V: float = 0.15e-3
    filter_hz: float | None = 5_000.0
    rest_drift_V: float = 0.0  # change of the resting potential from first to last sweep
    drift_V_per_s: float = 0.0  # linear drift within each sweep
    events_per_s: float = 0.0
    event_amplitude_V: tuple[float, float] = (0.5e-3, 2e-3)
    bridge_ohm: float = 0.0
    r_in_final_factor: float = 1.0  # R_in of the last sweep over that of the first
    seed: int = 0


@dataclass
class Replica:
    """A written replica and the truth it was built from."""

    name: str
    path: Path
    truth: dict = field(default_factory=dict)


def epoch_command(rows: list[tuple[float, float, int]], n_sweeps: int, n_samples: int,
                  unit_A: float = 1e-12) -> np.ndarray:
    """Command of every sweep (A) from step epochs (first level, increment, samples).

    The epochs follow the first n_samples // 64 samples at holding (0), as in ABF files;
    sweep k plays level + k * increment.
    """
    out = np.zeros((n_sweeps, n_samples))
    for k in range(n_sweeps):
        at = n_samples // PRE_SWEEP_FRACTION
        for level, increment, samples in rows:
            out[k, at: at + samples] = (level + k * increment) * unit_A
            at += samples
    return out


def epoch_windows(rows: list[tuple[float, float, int]], n_samples: int) -> list[tuple[int, int]]:
    """(first, end) sample of every epoch."""
    at, out = n_samples // PRE_SWEEP_FRACTION, []
    for _, _, samples in rows:
        out.append((at, at + samples))
        at += samples
    return out


def simulate_sweeps(model: CellModel, command_A: np.ndarray, rate_hz: float, chain: Chain,
                    window: tuple[int, int]) -> tuple[np.ndarray, dict]:
    """Recorded membrane potential (V, one row per sweep) and the truth of one step window.

    Truth per sweep, from the noiseless membrane potential before spikes are pasted:
    base_mV (resting potential of that sweep), steady_mV (mean over the window's last
    10 ms, from rest), peak_mV (extreme deflection in the step's direction), sag_ratio
    (steady/peak, hyperpolarizing steps), r_in_MOhm (|steady| / |I|), fires (a spike in
    the window) and spikes (count in the whole sweep).
    """
    n_sweeps, n = command_A.shape
    dt = 1.0 / rate_hz
    rng = np.random.default_rng(chain.seed)
    scales = np.linspace(1.0, chain.r_in_final_factor, n_sweeps)
    membrane = _active_responses(model.cell, command_A, np.ones(n_sweeps), scales, dt,
                                 model.v_rest_V, model.sag, model.rectifier)
    on, off = window
    steady_n = int(round(0.010 * rate_hz))
    rests = model.v_rest_V + np.linspace(0.0, chain.rest_drift_V, n_sweeps)
    ba = None if chain.filter_hz is None else _bessel(chain.filter_hz, rate_hz)
    t = np.arange(n) * dt
    out = np.empty((n_sweeps, n))
    per_sweep: dict[str, list] = {k: [] for k in (
        "step_pA", "base_mV", "steady_mV", "peak_mV", "sag_ratio", "r_in_MOhm", "fires",
        "spikes", "event_times_ms")}
    for k in range(n_sweeps):
        dv = membrane[k]
        amp = float(command_A[k, on + 1])
        steady = float(dv[off - steady_n: off].mean())
        step = dv[on:off] * (1.0 if amp >= 0 else -1.0)
        peak = float(step.max()) * (1.0 if amp >= 0 else -1.0)
        v = model.v_rest_V + dv
        spikes = np.zeros(0)
        if model.spiking is not None:
            thr, s = model.spiking.threshold_V, model.spike_drive_V
            v = np.where(v > thr, thr + s * np.tanh((v - thr) / s), v)
            v, spikes = model.spiking.paste(v, dt)
        fires = bool(np.any((spikes >= on * dt) & (spikes < off * dt)))
        events, ev_times, _ = _events(rng, chain.events_per_s, n, dt, chain.event_amplitude_V)
        bridge = chain.bridge_ohm * _electrode_lag(command_A[k], dt, 50e-6)
        signal = (v - model.v_rest_V) + bridge + events + chain.drift_V_per_s * t
        noise = rng.normal(0.0, 1.0, n)
        noise = _apply_filter(ba, noise)
        noise *= chain.noise_sd_V / noise.std()
        out[k] = rests[k] + _apply_filter(ba, signal) + noise
        per_sweep["step_pA"].append(round(amp * 1e12, 6))
        per_sweep["base_mV"].append(float(rests[k] * 1e3))
        per_sweep["steady_mV"].append(steady * 1e3)
        per_sweep["peak_mV"].append(peak * 1e3)
        per_sweep["sag_ratio"].append(steady / peak if amp < 0 and peak != 0 else None)
        per_sweep["r_in_MOhm"].append(abs(steady / amp) * 1e-6 if amp else None)
        per_sweep["fires"].append(fires)
        per_sweep["spikes"].append(int(spikes.size))
        per_sweep["event_times_ms"].append([float(x * 1e3) for x in ev_times])
    summary = model.cell.summary()
    truth = {
        "v_rest_mV": float(np.mean(rests) * 1e3),
        "tau0_ms": summary["tau0_ms"],
        "r_in_passive_MOhm": summary["r_in_MOhm"],
        "c_tau_pF": summary["c_tau_pF"],
        "L": summary["L"],
        "rho": summary["rho"],
        "r_in_scales": scales.tolist(),
        "sweeps": per_sweep,
    }
    if model.sag is not None:
        truth["ih_m_rest"] = float(model.sag.m_inf(model.v_rest_V))
    return out, truth


def counts(volt_V: np.ndarray, per_count_mV: float) -> np.ndarray:
    """int16 counts of a potential in V at `per_count_mV` mV per count."""
    return np.clip(np.round(volt_V * 1e3 / per_count_mV), -32768, 32767).astype("<i2")


# ------------------------------------------------------------------------------ cells

def pyramidal(r_in_ohm: float = 130e6, tau_s: float = 0.030, v_rest_V: float = -0.066,
              g_h_S: float = 6e-9, threshold_V: float = -0.050) -> CellModel:
    """A pyramidal-like cell: h-sag and rebound, regular firing above rheobase."""
    return CellModel(
        BallStick.from_electrotonic(tau_s, L=0.9, rho=3.0, r_in_ohm=r_in_ohm),
        v_rest_V,
        sag=SagConductance(g_h_S, tau_s=0.080, v_half_V=-0.090, slope_V=0.008),
        spiking=Spiking(threshold_V=threshold_V, peak_V=0.035, ahp_V=0.010, ahp_tau_s=0.020,
                        refractory_s=0.006),
    )


def fast_spiking() -> CellModel:
    """A fast-spiking interneuron: tau 8 ms, R_in about 100 MOhm, little sag, a weak
    inward rectifier, high rheobase and brief, high-frequency firing."""
    return CellModel(
        BallStick.from_electrotonic(0.008, L=0.6, rho=1.5, r_in_ohm=100e6),
        -0.070,
        sag=SagConductance(0.4e-9, tau_s=0.060, v_half_V=-0.095, slope_V=0.008),
        rectifier=RectifyingLeak(1.0e-9, v_half_V=-0.085, slope_V=0.010),
        spiking=Spiking(threshold_V=-0.043, peak_V=0.020, ahp_V=0.015, ahp_tau_s=0.004,
                        refractory_s=0.002),
        spike_drive_V=0.008,
    )


def human_like() -> CellModel:
    """A large human-like pyramidal cell: tau 30 ms, R_in about 60 MOhm, strong sag."""
    return CellModel(
        BallStick.from_electrotonic(0.030, L=1.0, rho=5.0, r_in_ohm=60e6),
        -0.071,
        sag=SagConductance(8e-9, tau_s=0.060, v_half_V=-0.088, slope_V=0.008),
        spiking=Spiking(threshold_V=-0.055, peak_V=0.030, ahp_V=0.008, ahp_tau_s=0.025,
                        refractory_s=0.008),
    )


# ---------------------------------------------------------------------------- replicas

def _abf2(path: Path, volt_V: np.ndarray, rate_hz: float, rows: list[tuple[float, float, int]],
          name: str) -> None:
    """One channel IN 0 (mV, 0.02 mV per count), DAC 0 in pA playing `rows`."""
    epochs = [(STEP, float(level), float(inc), int(n)) for level, inc, n in rows]
    path.write_bytes(abf2_channels_bytes(
        [(b"IN 0", b"mV", 0.02, counts(volt_V, 0.02))], rate_hz, epochs,
        protocol_path=f"C:\\protocols\\lol-{name}.pro".encode(),
        comment=b"LOL-2026-11-03 invented cell"))


def _dual_steps(name: str, folder: Path, model: CellModel, chain: Chain, n_sweeps: int,
                first_pA: float, inc_pA: float, fixed_pA: float) -> Replica:
    """The "dual steps" layout at 20 kHz, 3 s sweeps: A 0 (100 ms), B variable (500 ms),
    C 0 (500 ms), D fixed (500 ms), E variable (500 ms) at once after D."""
    rate, n = 20_000.0, 60_000
    rows = [(0.0, 0.0, 2000), (first_pA, inc_pA, 10_000), (0.0, 0.0, 10_000),
            (fixed_pA, 0.0, 10_000), (first_pA, inc_pA, 10_000)]
    command = epoch_command(rows, n_sweeps, n)
    windows = epoch_windows(rows, n)
    volt, truth = simulate_sweeps(model, command, rate, chain, windows[1])
    truth.update(step_onset_ms=windows[1][0] / rate * 1e3, step_ms=500.0,
                 second_step_onset_ms=windows[3][0] / rate * 1e3)
    path = folder / f"{name}_replica.abf"
    _abf2(path, volt, rate, rows, name)
    return Replica(name, path, truth)


def replica_171116sh_0019(folder: Path, seed: int = 19) -> Replica:
    """22 sweeps x 3 s at 20 kHz; B -100 pA +100/sweep, D -100 fixed, E as B; a
    pyramidal cell with sag and rebound that fires from +100 pA."""
    chain = Chain(noise_sd_V=0.12e-3, rest_drift_V=-0.8e-3, drift_V_per_s=0.15e-3,
                  events_per_s=1.5, seed=seed)
    return _dual_steps("171116sh_0019", folder, pyramidal(), chain, 22, -100.0, 100.0, -100.0)


def replica_17o05028(folder: Path, seed: int = 28) -> Replica:
    """16 sweeps x 3 s at 20 kHz; B -50 pA +10/sweep, D -50 fixed, E as B; a small
    pyramidal cell (R_in 220 MOhm) with sag that fires from about +70 pA."""
    model = pyramidal(r_in_ohm=220e6, tau_s=0.022, v_rest_V=-0.068, g_h_S=2.5e-9,
                      threshold_V=-0.053)
    chain = Chain(noise_sd_V=0.15e-3, rest_drift_V=0.6e-3, events_per_s=1.0, seed=seed)
    return _dual_steps("17o05028_ic_steps", folder, model, chain, 16, -50.0, 10.0, -50.0)


def replica_2019_07_24_0055_fsi(folder: Path, seed: int = 55) -> Replica:
    """17 sweeps x 3 s at 20 kHz; B -100 pA +25/sweep, D -100 fixed, E as B; a
    fast-spiking interneuron firing from about +250 pA, a 5 MOhm residual bridge."""
    chain = Chain(noise_sd_V=0.10e-3, rest_drift_V=-0.4e-3, events_per_s=3.0,
                  event_amplitude_V=(0.3e-3, 1.2e-3), bridge_ohm=5e6, seed=seed)
    return _dual_steps("2019_07_24_0055_fsi", folder, fast_spiking(), chain, 17, -100.0, 25.0,
                       -100.0)


def replica_18713001(folder: Path, seed: int = 13) -> Replica:
    """30 sweeps x 1.5 s at 20 kHz; -100 pA for 300 ms right after the 23.4 ms at holding,
    0 (500 ms), 0 pA +10/sweep (500 ms); a pyramidal cell whose R_in drifts up 15 % and
    whose rest drifts 1.5 mV over the sweeps, firing from about +100 pA."""
    rate, n = 20_000.0, 30_000
    rows = [(-100.0, 0.0, 6000), (0.0, 0.0, 10_000), (0.0, 10.0, 10_000)]
    model = pyramidal(r_in_ohm=160e6, tau_s=0.025, v_rest_V=-0.064, g_h_S=3e-9,
                      threshold_V=-0.049)
    chain = Chain(noise_sd_V=0.15e-3, rest_drift_V=1.5e-3, drift_V_per_s=-0.3e-3,
                  events_per_s=1.0, r_in_final_factor=1.15, seed=seed)
    command = epoch_command(rows, 30, n)
    windows = epoch_windows(rows, n)
    volt, truth = simulate_sweeps(model, command, rate, chain, windows[0])
    truth.update(step_onset_ms=windows[0][0] / rate * 1e3, step_ms=300.0)
    path = folder / "18713001_replica.abf"
    _abf2(path, volt, rate, rows, "18713001")
    return Replica("18713001", path, truth)


def replica_19122043(folder: Path, seed: int = 43) -> Replica:
    """ABF 1, 16 sweeps x 51612 samples at 10 kHz, four channels IN 1 [A], IN 2 [mV],
    Iclamp [mV], Current_in [pA] on ADC slots 1, 2, 4, 14; the steps (-400 pA +50/sweep,
    600 ms) on DAC 1 while nActiveDACChannel is 0 and DAC 0 (waveform off) holds a
    500 pA 300-sample pulse. A human-like cell on Iclamp; IN 2 an idle input near 0 mV;
    IN 1 an idle input; Current_in the command with an offset and noise."""
    rate, n, n_sweeps = 10_000.0, 51_612, 16
    rows = [(0.0, 0.0, 1000), (-400.0, 50.0, 6000), (0.0, 0.0, 20)]
    command = epoch_command(rows, n_sweeps, n)
    windows = epoch_windows(rows, n)
    chain = Chain(noise_sd_V=0.2e-3, filter_hz=2_000.0, rest_drift_V=-1.0e-3,
                  events_per_s=0.5, seed=seed)
    volt, truth = simulate_sweeps(human_like(), command, rate, chain, windows[1])
    truth.update(step_onset_ms=windows[1][0] / rate * 1e3, step_ms=600.0)
    rng = np.random.default_rng(seed + 1)
    idle_mV = rng.normal(0.0, 0.05, volt.shape) + 0.3
    idle_A = rng.normal(0.0, 1.0, volt.shape)  # counts of an unused input labelled A
    current_pA = command * 1e12 + 4.0 + rng.normal(0.0, 2.0, volt.shape)
    channels = [
        (1, b"IN 1", b"A", 1e-12, idle_A.astype("<i2")),
        (2, b"IN 2", b"mV", 0.02, counts(idle_mV * 1e-3, 0.02)),
        (4, b"Iclamp", b"mV", 0.02, counts(volt, 0.02)),
        (14, b"Current_in", b"pA", 0.1, np.round(current_pA / 0.1).astype("<i2")),
    ]
    dac0 = [(STEP, 0.0, 0.0, 1000), (STEP, 500.0, 0.0, 300), (STEP, 0.0, 0.0, 1000)]
    dac1 = [(STEP, float(a), float(b), int(c)) for a, b, c in rows]
    path = folder / "19122043_replica.abf"
    path.write_bytes(abf1_channels_bytes(channels, rate, {0: dac0, 1: dac1},
                                         waveform_enabled=(0, 1), active_dac=0))
    return Replica("19122043", path, truth)


def _wideband(rng: np.random.Generator, n: int, rate_hz: float, kind: str) -> np.ndarray:
    """A unit-sd wide-band current waveform of `n` samples: "noise" (white Gaussian noise
    low-passed at 200 Hz, 4-pole Butterworth) or "chirp" (a sine sweeping 1-40 Hz)."""
    if kind == "chirp":
        t = np.arange(n) / rate_hz
        span_s = n / rate_hz
        phase = 2 * np.pi * (1.0 * t + 0.5 * (40.0 - 1.0) / span_s * t ** 2)
        return np.sqrt(2.0) * np.sin(phase)
    from scipy.signal import butter, sosfiltfilt

    x = sosfiltfilt(butter(4, 200.0, fs=rate_hz, output="sos"), rng.normal(0.0, 1.0, n))
    return x / x.std()


def replica_test_pulse_then_noise(folder: Path, pulse_ms: float = 100.0,
                                  pulse_pA: float = -50.0, wideband: str = "noise",
                                  wideband_sd_pA: float = 120.0, seed: int = 11) -> Replica:
    """A test pulse from rest, then seconds of a wide-band stimulus from a stimulus file.

    The layout of survey row H19_29_150_11_21_01_0011 (project notes, abf-survey.md):
    ABF 2, IN 0 [mV] and IN 4 [pA] (the recorded current), DAC 0 in pA replaying a
    stimulus file (nWaveformSource 2), so its epoch table (112 pA -20/sweep) is not
    played and only the recorded current shows the stimulus. Shorter here: 3 sweeps x
    4 s at 20 kHz (the row: 2 x 13 s at 50 kHz). Each sweep: 100 ms at 0, the test
    pulse, 0 until 600 ms, the wide-band current (`wideband`, sd `wideband_sd_pA`, new
    each sweep) from 600 ms to 3.6 s, 0 to the end. A pyramidal cell (R_in 150 MOhm,
    tau0 25 ms, weak sag) that the noise makes fire. The recorded current is the command
    plus a 2 pA offset and 1.5 pA of white noise at 0.1 pA per count. Truth as for every
    replica (`simulate_sweeps`), for the test pulse's window; truth["wideband_ms"] holds
    the stretch of the wide-band current.
    """
    rate, n, n_sweeps = 20_000.0, 80_000, 3
    on = 2000
    off = on + int(round(pulse_ms * 1e-3 * rate))
    wide = (12_000, 72_000)
    rng = np.random.default_rng(seed)
    command = np.zeros((n_sweeps, n))
    for k in range(n_sweeps):
        command[k, on:off] = pulse_pA * 1e-12
        command[k, wide[0]:wide[1]] = (wideband_sd_pA * 1e-12
                                       * _wideband(rng, wide[1] - wide[0], rate, wideband))
    model = pyramidal(r_in_ohm=150e6, tau_s=0.025, v_rest_V=-0.065, g_h_S=1e-9,
                      threshold_V=-0.052)
    chain = Chain(noise_sd_V=0.12e-3, rest_drift_V=0.5e-3, events_per_s=0.5, seed=seed)
    volt, truth = simulate_sweeps(model, command, rate, chain, (on, off))
    truth.update(step_onset_ms=on / rate * 1e3, step_ms=pulse_ms,
                 wideband_ms=(wide[0] / rate * 1e3, wide[1] / rate * 1e3))
    current_pA = command * 1e12 + 2.0 + rng.normal(0.0, 1.5, command.shape)
    name = f"pulse{pulse_ms:g}ms_{wideband}"
    path = folder / f"{name}_replica.abf"
    epochs = [(STEP, 112.0, -20.0, 20_000)]   # in the header, not played
    path.write_bytes(abf2_channels_bytes(
        [(b"IN 0", b"mV", 0.02, counts(volt, 0.02)),
         (b"IN 4", b"pA", 0.1, np.round(current_pA / 0.1).astype("<i2"))],
        rate, epochs, waveform_source=2,
        protocol_path=b"C:\\protocols\\lol-pulse-then-noise.pro",
        comment=b"LOL-2026-11-03 invented cell, noise from a stimulus file"))
    return Replica(name, path, truth)


REPLICAS = {
    "171116sh_0019": replica_171116sh_0019,
    "17o05028_ic_steps": replica_17o05028,
    "2019_07_24_0055_fsi": replica_2019_07_24_0055_fsi,
    "18713001": replica_18713001,
    "19122043": replica_19122043,
}


def chord_r_in(truth: dict, sweeps: list[int]) -> float:
    """Mean chord input resistance (MOhm) of the noiseless steps of `sweeps`."""
    values = [truth["sweeps"]["r_in_MOhm"][k] for k in sweeps]
    return float(np.mean(values)) if values else math.nan
