"""Simulated recordings: step and pulse protocols, the recording chain (noise, a 4-pole
Bessel filter, residual bridge, electrode lag, drift, hum, spontaneous events) and the
ground truth beside each recording."""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass

import numpy as np

from passivefit.model import schema as S
from passivefit.model.recording import Recording, Sweep
from passivefit.simulate.active import RectifyingLeak, SagConductance, Spiking, _active_responses
from passivefit.simulate.cell import LAB_NAME, BallStick


@dataclass(frozen=True)
class StepProtocol:
    """Current steps; sweep k gets amplitudes_A[k % len(amplitudes_A)].

    Parameters
    ----------
    onset_s, duration_s : float
        Step edge from sweep start and step duration, in s.
    amplitudes_A : tuple of float
        Step amplitudes, in A (hyperpolarizing negative).
    """

    onset_s: float
    duration_s: float
    amplitudes_A: tuple[float, ...]

    kind = "step"

    def amplitude_of(self, sweep_index: int) -> float:
        return float(self.amplitudes_A[sweep_index % len(self.amplitudes_A)])

    def describe(self) -> str:
        amps = ", ".join(f"{a * 1e12:+g}" for a in self.amplitudes_A)
        return (
            f"current steps at {self.onset_s * 1e3:g} ms for {self.duration_s * 1e3:g} ms, "
            f"amplitudes cycling through {amps} pA"
        )


@dataclass(frozen=True)
class PulseProtocol:
    """A brief square current pulse, the same in every sweep.

    Parameters
    ----------
    onset_s, duration_s : float
        Pulse start from sweep start and pulse duration (e.g. 0.5e-3), in s.
    amplitude_A : float
        Pulse amplitude, in A.
    """

    onset_s: float
    duration_s: float
    amplitude_A: float

    kind = "pulse"

    @property
    def amplitudes_A(self) -> tuple[float, ...]:
        return (float(self.amplitude_A),)

    def amplitude_of(self, sweep_index: int) -> float:
        return float(self.amplitude_A)

    def describe(self) -> str:
        return (
            f"brief current pulse at {self.onset_s * 1e3:g} ms, "
            f"{self.duration_s * 1e3:g} ms of {self.amplitude_A * 1e12:+g} pA"
        )


def _unit_command(
    protocol: StepProtocol | PulseProtocol, n_samples: int, sample_rate_hz: float
) -> np.ndarray:
    """1 while the step/pulse is on, else 0 (same sampling rule as StepSpec.command)."""
    t = np.arange(n_samples) / sample_rate_hz
    on = (t >= protocol.onset_s) & (t < protocol.onset_s + protocol.duration_s)
    return on.astype(float)


# --------------------------------------------------------------------------- recording


#: The passive response is filtered at this many times the sampling rate.
OVERSAMPLE = 8


def _bessel(filter_hz: float, sample_rate_hz: float) -> tuple[np.ndarray, np.ndarray]:
    """An amplifier's analog 4-pole Bessel low-pass (−3 dB at `filter_hz`), digitised.

    The analog filter is mapped by the bilinear transform without pre-warping, which keeps
    its low-frequency group delay (0.336/fc) — the delay that shifts a recorded transient.
    """
    from scipy.signal import bessel, bilinear

    if not 0 < filter_hz < sample_rate_hz / 2:
        raise ValueError(
            f"`filter_hz` ({filter_hz} Hz) must be between 0 and half the "
            f"sampling rate ({sample_rate_hz / 2:g} Hz), or None for no filter"
        )
    b, a = bessel(4, 2 * np.pi * filter_hz, btype="low", norm="mag", analog=True)
    return bilinear(b, a, fs=sample_rate_hz)


def _apply_filter(ba: tuple[np.ndarray, np.ndarray] | None, x: np.ndarray) -> np.ndarray:
    from scipy.signal import lfilter, lfilter_zi

    if ba is None:
        return x
    b, a = ba
    y, _ = lfilter(b, a, x, zi=lfilter_zi(b, a) * x[0])
    return y


def _noise_gain(ba: tuple[np.ndarray, np.ndarray] | None) -> float:
    """sd of the filter's output for unit-sd white noise input."""
    from scipy.signal import lfilter

    if ba is None:
        return 1.0
    impulse = np.zeros(4096)
    impulse[0] = 1.0
    return float(np.sqrt(np.sum(lfilter(*ba, impulse) ** 2)))


def _electrode_lag(current: np.ndarray, dt_s: float, tau_s: float) -> np.ndarray:
    """Current seen through a first-order electrode lag (zero-order hold, exact)."""
    from scipy.signal import lfilter

    if tau_s <= 0:
        return current
    a = math.exp(-dt_s / tau_s)
    return lfilter([0.0, 1.0 - a], [1.0, -a], current)


def noiseless_sweep(
    cell: BallStick,
    protocol: StepProtocol | PulseProtocol,
    *,
    amplitude_A: float,
    sample_rate_hz: float,
    sweep_duration_s: float,
    filter_hz: float | None = None,
    bridge_ohm: float = 0.0,
    electrode_tau_s: float = 50e-6,
    oversample: int = 0,
) -> np.ndarray:
    """The recorded voltage deviation of one sweep without noise, drift, hum or events.

    The same chain as :func:`simulate_recording` (cell response, residual bridge through
    the electrode lag, the Bessel filter), for a current of `amplitude_A` (A) during the
    protocol's step or pulse; in V, from the resting potential. `oversample` > 0 filters
    at that many times the rate instead of OVERSAMPLE (faster, the corner less exact).
    """
    n = int(round(sweep_duration_s * sample_rate_hz))
    unit = _unit_command(protocol, n, sample_rate_hz)
    return amplitude_A * _passive_unit(cell, unit, sample_rate_hz, filter_hz, bridge_ohm,
                                       electrode_tau_s, oversample or OVERSAMPLE)


def _passive_unit(cell: BallStick, unit: np.ndarray, sample_rate_hz: float,
                  filter_hz: float | None, bridge_ohm: float, electrode_tau_s: float,
                  oversample: int = 0) -> np.ndarray:
    """The recorded response (V) to the unit command `unit`: the cell, the bridge through
    the electrode lag and the filter, computed at OVERSAMPLE times the rate, where the
    digitised filter is the analog one within 0.2 % (the bilinear map at the rate itself
    would move a 5 kHz corner at 20 kHz down by 15 %), then sampled."""
    up = 1 if filter_hz is None else oversample or OVERSAMPLE
    fine, dt = np.repeat(unit, up), 1.0 / (up * sample_rate_hz)
    v = cell.soma_response(fine, dt) + bridge_ohm * _electrode_lag(fine, dt, electrode_tau_s)
    ba = None if filter_hz is None else _bessel(filter_hz, up * sample_rate_hz)
    return _apply_filter(ba, v)[::up]


def filtered_noise_acf(filter_hz: float | None, sample_rate_hz: float, lags: int) -> np.ndarray:
    """Autocorrelation (lag 0 = 1) of white noise after the recording's Bessel filter, at
    lags 0..`lags` samples (the noise model of :func:`simulate_recording`: the analog
    filter at OVERSAMPLE times the rate, then sampled)."""
    if filter_hz is None:
        out = np.zeros(lags + 1)
        out[0] = 1.0
        return out
    from scipy.signal import lfilter

    impulse = np.zeros(OVERSAMPLE * max(4096, 8 * (lags + 1)))
    impulse[0] = 1.0
    h = lfilter(*_bessel(filter_hz, OVERSAMPLE * sample_rate_hz), impulse)
    power = np.abs(np.fft.rfft(h, 2 * h.size)) ** 2      # autocorrelation by FFT
    acf = np.fft.irfft(power)[: OVERSAMPLE * (lags + 1): OVERSAMPLE]
    return acf / acf[0]


def _events(
    rng: np.random.Generator,
    rate_per_s: float,
    n_samples: int,
    dt_s: float,
    amplitude_V: tuple[float, float] = (0.5e-3, 2e-3),
    rise_s: float = 1e-3,
    decay_s: float = 8e-3,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Spontaneous synaptic events: biexponential, peaks uniform in `amplitude_V` (V).

    Returns the summed trace (V), and the onset times (s) and peak amplitudes (V) of the
    events, sorted by time. The defaults (rise 1 ms, decay 8 ms, 0.5–2 mV) are the
    simulator's original events, drawn from `rng` in the same order.
    """
    from scipy.signal import oaconvolve

    trace = np.zeros(n_samples)
    if rate_per_s <= 0:
        return trace, np.zeros(0), np.zeros(0)
    count = rng.poisson(rate_per_s * n_samples * dt_s)
    where = rng.integers(0, n_samples, size=count)
    amps = rng.uniform(amplitude_V[0], amplitude_V[1], size=count)
    np.add.at(trace, where, amps)
    t = np.arange(max(int(0.08 / dt_s), int(10 * decay_s / dt_s))) * dt_s
    shape = np.exp(-t / decay_s) - np.exp(-t / rise_s)
    order = np.argsort(where, kind="stable")
    return oaconvolve(trace, shape / shape.max())[:n_samples], where[order] * dt_s, amps[order]


def _date_from_cell_id(cell_id: str) -> str:
    parts = cell_id.split("-")
    if len(parts) >= 4 and all(p.isdigit() for p in parts[1:4]):
        return "-".join(parts[1:4])
    return "2026-11-03"


def _protocol_truth(
    cell: BallStick, protocol: StepProtocol | PulseProtocol, dt_s: float, n_samples: int
) -> dict:
    """Protocol settings and the amplitudes they should produce, plain types."""
    out: dict = {
        "protocol": protocol.kind,
        "onset_ms": float(protocol.onset_s * 1e3),
        "duration_ms": float(protocol.duration_s * 1e3),
        "amplitudes_pA": [float(a * 1e12) for a in protocol.amplitudes_A],
    }
    if isinstance(protocol, PulseProtocol):
        d = float(_unit_command(protocol, n_samples, 1.0 / dt_s).sum() * dt_s)
        taus, gains = cell.modes(2)
        held = gains * taus * -np.expm1(-d / taus) * protocol.amplitude_A
        out["charge_pC"] = float(protocol.amplitude_A * d * 1e12)
        out[S.C0.key] = float(held[0] * 1e3)  # decay amplitudes, time zero at pulse end
        out[S.C1.key] = float(held[1] * 1e3)
        out["c1_over_c0_square"] = float(held[1] / held[0])
    return out


def _sweep_scales(n_sweeps: int, r_in_ohm: float, r_in_final_ohm: float | None) -> np.ndarray:
    """Per-sweep factor on the input resistance: linear from 1 to r_in_final/r_in."""
    if r_in_final_ohm is None:
        return np.ones(n_sweeps)
    if not (math.isfinite(r_in_final_ohm) and r_in_final_ohm > 0):
        raise ValueError(f"`r_in_final_ohm` must be finite and positive, got {r_in_final_ohm!r}")
    return np.linspace(1.0, r_in_final_ohm / r_in_ohm, n_sweeps)


def _sag_truth(dv_V: np.ndarray, amp_A: float, on: int, off: int, dt_s: float) -> dict:
    """Sag measures of one noiseless, spike-free deviation from rest (V), in display units.

    Peak: the extreme deflection during the step in the step's direction; steady: the
    mean over the step's last ms; rebound: the extreme overshoot beyond rest opposite to
    the step after it ends (0 and no time when there is none).
    """
    sign = 1.0 if amp_A > 0 else -1.0
    step = sign * dv_V[on:off]
    peak_i = int(np.argmax(step))
    steady = float(np.mean(step[-max(1, int(round(1e-3 / dt_s))):]))
    after = -sign * dv_V[off:]
    reb_i = int(np.argmax(after)) if after.size else 0
    rebound = float(after[reb_i]) if after.size and after[reb_i] > 0 else 0.0
    return {
        "peak_mV": sign * float(step[peak_i]) * 1e3,
        "peak_ms": peak_i * dt_s * 1e3,
        "steady_mV": sign * steady * 1e3,
        S.SAG_RATIO.key: steady / float(step[peak_i]) if step[peak_i] > 0 else None,
        S.REBOUND.key: -sign * rebound * 1e3,
        "rebound_ms": reb_i * dt_s * 1e3 if rebound > 0 else None,
    }


def simulate_recording(
    cell: BallStick,
    *,
    protocol: StepProtocol | PulseProtocol,
    sample_rate_hz: float = 20_000,
    sweep_duration_s: float = 1.0,
    n_sweeps: int = 20,
    v_rest_V: float = -0.070,
    noise_sd_V: float = 0.2e-3,
    filter_hz: float | None = 5_000,
    bridge_ohm: float = 0.0,
    electrode_tau_s: float = 50e-6,
    drift_V_per_s: float = 0.0,
    hum_V: float = 0.0,
    events_per_s: float = 0.0,
    seed: int = 0,
    cell_id: str = "LOL-2026-11-03-c1",
    metadata: dict | None = None,
    event_amplitude_V: tuple[float, float] = (0.5e-3, 2e-3),
    event_rise_s: float = 1e-3,
    event_decay_s: float = 8e-3,
    sag: SagConductance | None = None,
    rectifier: RectifyingLeak | None = None,
    spiking: Spiking | None = None,
    r_in_final_ohm: float | None = None,
) -> tuple[Recording, dict]:
    """A simulated current-clamp recording of `cell` and its ground truth.

    Parameters
    ----------
    cell : BallStick
    protocol : StepProtocol or PulseProtocol
    sample_rate_hz : float
        Sampling rate, in Hz.
    sweep_duration_s : float
        Sweep length, in s.
    n_sweeps : int
    v_rest_V : float
        Resting potential, in V.
    noise_sd_V : float
        Standard deviation of the recorded (after filtering) white noise, in V.
    filter_hz : float or None
        -3 dB corner of a 4-pole Bessel low-pass applied to the voltage, in Hz; None
        for no filter.
    bridge_ohm : float
        Residual bridge imbalance: adds I*R through the electrode lag, in Ohm.
    electrode_tau_s : float
        Electrode time constant of that artefact, in s.
    drift_V_per_s : float
        Linear drift within each sweep, in V/s.
    hum_V : float
        Peak amplitude of 50 Hz hum (random phase per sweep), in V.
    events_per_s : float
        Mean rate of spontaneous synaptic events (Poisson, anywhere in the sweep), in 1/s.
    seed : int
        Seed of the random generator: equal seeds give equal recordings.
    cell_id : str
    metadata : dict, optional
        Extra metadata; overrides the defaults.
    event_amplitude_V : (float, float)
        Range of the events' peak amplitudes (uniform), in V; negative for IPSP-like
        events.
    event_rise_s, event_decay_s : float
        Rise and decay time constants of the biexponential events, in s.
    sag : SagConductance, optional
        An Ih-like somatic conductance (sag during hyperpolarizing steps, rebound after).
    rectifier : RectifyingLeak, optional
        An instantaneous inwardly rectifying somatic leak.
    spiking : Spiking, optional
        Action potentials wherever the membrane potential crosses the threshold.
    r_in_final_ohm : float, optional
        Input resistance of the last sweep, in Ohm: the passive cell's R_in changes
        linearly over the sweeps from the cell's own to this (all its conductances and
        capacitances scaled together, so tau0, L and rho stay fixed).

    Returns
    -------
    recording : Recording
        format "simulated"; each sweep carries its ideal command current.
    truth : dict
        Plain floats (units in the keys): cell properties (tau0_ms, tau1_ms, tau2_ms,
        tau3_ms, L, rho, r_in_MOhm, c_total_pF, c_tau_pF, b1_over_b0, c1_over_c0,
        b0_over_vinf, L_cyl_naive), recording settings (v_rest_mV, bridge_MOhm,
        noise_sd_mV, ...) and protocol values. With events, the per-sweep lists
        event_times_ms (onsets, before the filter) and event_amplitudes_mV. With the
        options above also: their parameters (ih_*, rect_*, spike_*); r_in_rest_MOhm
        (small-signal steady input resistance at rest with the active conductances);
        per-sweep lists sweep_r_in_MOhm (passive R_in), spike_times_ms and, for steps
        with sag or rectifier, sweep_peak_mV, sweep_peak_ms (from the step onset),
        sweep_steady_mV (mean of the step's last ms), sweep_sag_ratio (steady/peak),
        sweep_rebound_mV and sweep_rebound_ms (from the step end), all from the
        noiseless, unfiltered membrane potential (None for sweeps that fire).
    """
    if n_sweeps < 1:
        raise ValueError(f"`n_sweeps` must be >= 1, got {n_sweeps}")
    if protocol.onset_s < 0 or protocol.onset_s + protocol.duration_s > sweep_duration_s:
        raise ValueError(
            f"the {protocol.kind} ({protocol.onset_s:g} s + {protocol.duration_s:g} s) does not "
            f"fit in a sweep of {sweep_duration_s:g} s: lengthen `sweep_duration_s`"
        )
    for name, value in (("event_rise_s", event_rise_s), ("event_decay_s", event_decay_s)):
        if not (math.isfinite(value) and value > 0):
            raise ValueError(f"`{name}` must be a finite positive number, got {value!r}")
    if not event_decay_s > event_rise_s:
        raise ValueError("`event_decay_s` must be longer than `event_rise_s`")
    n = int(round(sweep_duration_s * sample_rate_hz))
    dt = 1.0 / sample_rate_hz
    t = np.arange(n) * dt
    unit = _unit_command(protocol, n, sample_rate_hz)
    if not unit.any():
        raise ValueError(f"the {protocol.kind} is shorter than one sample at {sample_rate_hz:g} Hz")
    ba = None if filter_hz is None else _bessel(filter_hz, sample_rate_hz)
    up = 1 if ba is None else OVERSAMPLE   # noise and passive response: the analog filter
    ba_fine = None if ba is None else _bessel(filter_hz, up * sample_rate_hz)
    unit_response = _passive_unit(cell, unit, sample_rate_hz, filter_hz, bridge_ohm,
                                  electrode_tau_s)
    white_sd = noise_sd_V / _noise_gain(ba_fine)
    rng = np.random.default_rng(seed)

    # Membrane potentials (deviation from rest) of the extended cell, one per sweep.
    scales = _sweep_scales(n_sweeps, cell.r_in_ohm, r_in_final_ohm)
    amps = np.array([protocol.amplitude_of(k) for k in range(n_sweeps)])
    extended = sag is not None or rectifier is not None or spiking is not None
    extended = extended or r_in_final_ohm is not None
    membrane = None
    if extended:
        keys = sorted(set(zip(amps.tolist(), scales.tolist(), strict=True)))
        if sag is not None or rectifier is not None:
            rows = _active_responses(
                cell, unit, np.array([k[0] for k in keys]), np.array([k[1] for k in keys]),
                dt, v_rest_V, sag, rectifier,
            )
        else:
            passive = cell.soma_response(unit, dt)
            rows = np.array([a * s * passive for a, s in keys])
        row_of = {key: i for i, key in enumerate(keys)}
        membrane = [rows[row_of[key]] for key in zip(amps.tolist(), scales.tolist(), strict=True)]
        bridge_v = bridge_ohm * _electrode_lag(unit, dt, electrode_tau_s)
    spike_times: list[list[float]] = []
    sag_truth: list[dict] = []

    sweeps = []
    event_times, event_amps = [], []
    for k in range(n_sweeps):
        amp = protocol.amplitude_of(k)
        if membrane is None:
            cell_v = 0.0
        else:
            if (sag is not None or rectifier is not None) and protocol.kind == "step":
                on, off = np.flatnonzero(unit)[[0, -1]]
                sag_truth.append(_sag_truth(membrane[k], amp, int(on), int(off) + 1, dt))
            if spiking is not None:
                fired, times = spiking.paste(v_rest_V + membrane[k], dt)
                if times.size and sag_truth:
                    sag_truth[-1] = dict.fromkeys(sag_truth[-1])
                membrane[k] = fired - v_rest_V
                spike_times.append([float(x * 1e3) for x in times])
            cell_v = membrane[k] + amp * bridge_v
        signal = cell_v + drift_V_per_s * t
        if hum_V:
            signal = signal + hum_V * np.sin(2 * np.pi * 50.0 * t + rng.uniform(0, 2 * np.pi))
        events, times, sizes = _events(
            rng, events_per_s, n, dt, event_amplitude_V, event_rise_s, event_decay_s
        )
        event_times.append([float(x * 1e3) for x in times])
        event_amps.append([float(x * 1e3) for x in sizes])
        signal = signal + events
        # the amplifier's white noise through its analog filter, then sampled
        noise = (_apply_filter(ba_fine, rng.normal(0.0, white_sd, n * up))[::up]
                 if noise_sd_V > 0 else 0.0)
        voltage = v_rest_V + _apply_filter(ba, signal) + noise
        if membrane is None:
            voltage += amp * unit_response
        sweeps.append(Sweep(k, voltage, amp * unit))

    digest = hashlib.sha256(b"".join(s.voltage.tobytes() for s in sweeps)).hexdigest()
    meta = {
        "cell_id": cell_id,
        "date": _date_from_cell_id(cell_id),
        "temperature_C": 32.0,
        "lab": LAB_NAME,
        "simulated": True,
        "protocol": protocol.describe(),
        "filter_hz": None if filter_hz is None else float(filter_hz),
    }
    meta.update(metadata or {})
    recording = Recording(
        sweeps,
        float(sample_rate_hz),
        path=f"<simulated {cell_id}>",
        sha256=digest,
        format="simulated",
        metadata=meta,
    )

    truth = cell.summary()
    truth.update(
        {
            "cell_id": cell_id,
            S.V_REST.key: float(v_rest_V * 1e3),
            S.BRIDGE.key: float(bridge_ohm * 1e-6),
            "electrode_tau_ms": float(electrode_tau_s * 1e3),
            "noise_sd_mV": float(noise_sd_V * 1e3),
            "filter_hz": None if filter_hz is None else float(filter_hz),
            "drift_mV_per_s": float(drift_V_per_s * 1e3),
            S.HUM.key: float(hum_V * 1e3),
            "events_per_s": float(events_per_s),
            "sample_rate_hz": float(sample_rate_hz),
            "sweep_duration_ms": float(sweep_duration_s * 1e3),
            "n_sweeps": int(n_sweeps),
            "seed": int(seed),
        }
    )
    truth.update(_protocol_truth(cell, protocol, dt, n))
    if events_per_s > 0:
        truth["event_times_ms"] = event_times
        truth["event_amplitudes_mV"] = event_amps
    if extended:
        truth.update(_extension_truth(cell, scales, v_rest_V, sag, rectifier, spiking))
        if spiking is not None:
            truth["spike_times_ms"] = spike_times
        for key in sag_truth[0] if sag_truth else ():
            truth[f"sweep_{key}"] = [row[key] for row in sag_truth]
    return recording, truth


def _extension_truth(
    cell: BallStick,
    scales: np.ndarray,
    v_rest_V: float,
    sag: SagConductance | None,
    rectifier: RectifyingLeak | None,
    spiking: Spiking | None,
) -> dict:
    """Parameters of the opt-in extensions and the resting input resistance, display units."""
    out: dict = {"sweep_r_in_MOhm": [float(cell.r_in_ohm * s * 1e-6) for s in scales]}
    g_rest = 0.0
    if sag is not None:
        out.update(sag.summary())
        g_rest += sag.steady_slope_S(v_rest_V)
    if rectifier is not None:
        out.update(rectifier.summary(v_rest_V))
        g_rest += rectifier.slope_S(v_rest_V, v_rest_V)
    if spiking is not None:
        out.update(spiking.summary())
    out["r_in_rest_MOhm"] = float(1e-6 / (1.0 / cell.r_in_ohm + g_rest))
    return out


def truth_to_json(truth: dict) -> str:
    """The truth dict as JSON text (sorted keys, 2-space indent, non-finite as null)."""

    def plain(v):
        if isinstance(v, float | np.floating) and not math.isfinite(v):
            return None
        if isinstance(v, np.generic):
            return v.item()
        if isinstance(v, list | tuple):
            return [plain(x) for x in v]
        return v

    return json.dumps({k: plain(v) for k, v in truth.items()}, sort_keys=True, indent=2)
