"""The one data model every reader returns: a recording of current-clamp sweeps.

All arrays are in SI units (volts, amperes, seconds): float64, or float32 where the
file holds samples of a 16-bit ADC (ABF), which float32 keeps exactly to within
round-off at half the memory; the analysis computes sums and fits in float64.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from passivefit.core.qc import Flag
from passivefit.model.errors import LoadError
from passivefit.model.protocol import Protocol

# A membrane potential at rest (median of the sweeps' medians) reads about -120 to
# +20 mV; beyond these limits the voltage unit is wrong (common practice, no source).
REST_LIMITS_V = (-0.25, 0.1)
# no injected current in current clamp comes near this (common practice, no source)
MAX_CURRENT_A = 100e-9
# A membrane potential that never leaves ±2 mV of 0 mV in any sweep is not one: an
# unconnected channel, a copy of the command, or V values labelled mV (common
# practice, no source).
NEAR_ZERO_V = 2e-3


@dataclass(frozen=True)
class StepSpec:
    """A current step described by the user or a protocol, not by a recorded waveform.

    Parameters
    ----------
    onset_s : float
        Time of the step edge from the start of each sweep, in s.
    duration_s : float
        Step duration, in s.
    amplitude_A : float
        Step amplitude of the first sweep, in A (hyperpolarizing is negative).
    increment_A : float
        Change of amplitude from one sweep to the next, in A.
    """

    onset_s: float
    duration_s: float
    amplitude_A: float
    increment_A: float = 0.0

    def amplitude_of(self, sweep_index: int) -> float:
        return self.amplitude_A + sweep_index * self.increment_A

    def command(self, n_samples: int, sample_rate_hz: float, sweep_index: int) -> np.ndarray:
        """The command current of one sweep as a sampled waveform, in A."""
        t = np.arange(n_samples) / sample_rate_hz
        on = (t >= self.onset_s) & (t < self.onset_s + self.duration_s)
        return np.where(on, self.amplitude_of(sweep_index), 0.0)


def _as_float(x) -> np.ndarray:
    """`x` as float32 when it is float32 already (no copy), else as float64."""
    x = np.asarray(x)
    return x if x.dtype == np.float32 else np.asarray(x, dtype=np.float64)


@dataclass
class Sweep:
    """One sweep: the membrane voltage and, when known, the injected current.

    Parameters
    ----------
    index : int
        Sweep number within the recording, from 0.
    voltage : ndarray
        Membrane potential, in V: float64, or float32 as given (16-bit ADC data).
    current : ndarray or None
        Injected (command or recorded) current, in A, same length as `voltage`;
        None when the file carries no current and no step was given. float64, or
        float32 as given.
    """

    index: int
    voltage: np.ndarray
    current: np.ndarray | None = None

    def __post_init__(self) -> None:
        self.voltage = _as_float(self.voltage)
        if self.current is not None:
            self.current = _as_float(self.current)
            if self.current.shape != self.voltage.shape:
                raise ValueError(
                    f"sweep {self.index}: current has {self.current.size} samples, "
                    f"voltage {self.voltage.size}"
                )

    @property
    def n_samples(self) -> int:
        return int(self.voltage.size)


@dataclass
class Recording:
    """A current-clamp recording: sweeps at one sampling rate plus provenance.

    Parameters
    ----------
    sweeps : list of Sweep
    sample_rate_hz : float
        Sampling rate, in Hz.
    path : str
        Source file.
    sha256 : str
        Hex digest of the source file's bytes.
    format : str
        Reader name: "abf", "nwb" or "csv".
    metadata : dict
        Plain values the file carries: cell_id, date, temperature_C, ... .
    flags : tuple of Flag
        What reading noticed: source disagreements, the channel chosen.
    current_source : str
        Where `Sweep.current` came from: "recorded channel", "epoch table",
        "stimulus series", "current column" (sweep table), "user step", or "none"
        when there is no current ("" when not set by a reader).
    clamp_mode : str
        "current clamp" (voltage-clamp files are refused when read).
    voltage_channel : str
        The membrane-potential channel, e.g. ``"IN 0 [mV]"`` ('' when the format
        has only one).
    protocol : Protocol or None
        Each sweep's epochs as the file describes them (None when unknown).
    """

    sweeps: list[Sweep]
    sample_rate_hz: float
    path: str = ""
    sha256: str = ""
    format: str = ""
    metadata: dict = field(default_factory=dict)
    flags: tuple[Flag, ...] = ()
    current_source: str = ""
    clamp_mode: str = "current clamp"
    voltage_channel: str = ""
    protocol: Protocol | None = None

    @property
    def dt(self) -> float:
        return 1.0 / self.sample_rate_hz

    @property
    def has_current(self) -> bool:
        return all(s.current is not None for s in self.sweeps)

    def with_step(self, step: StepSpec) -> Recording:
        """A copy whose sweeps carry the command current of `step` ("user step").

        When the file carried a current of its own, the user's step is checked
        against it and each disagreement is added to `flags`.
        """
        from passivefit.core.steps import find_steps
        from passivefit.model.protocol import (
            SOURCE_USER,
            compare_steps,
            protocol_from_steps,
            summarize,
        )

        fs = self.sample_rate_hz
        # the command in the voltage's type: float32 beside 16-bit ADC data (half the
        # memory; the step's amplitude then reads to 1e-8 relative)
        sweeps = [
            Sweep(s.index, s.voltage,
                  step.command(s.n_samples, fs, k).astype(s.voltage.dtype, copy=False))
            for k, s in enumerate(self.sweeps)
        ]
        user = [find_steps(s.current, fs) for s in sweeps]
        found = []
        if self.has_current and self.current_source not in ("", SOURCE_USER):
            for k, s in enumerate(self.sweeps):
                found += compare_steps(k, user[k], find_steps(s.current, fs), "user step")
        metadata = dict(self.metadata)
        metadata["current_source"] = SOURCE_USER
        return Recording(sweeps, fs, self.path, self.sha256, self.format, metadata,
                         flags=(*self.flags, *summarize(found)), current_source=SOURCE_USER,
                         clamp_mode=self.clamp_mode, voltage_channel=self.voltage_channel,
                         protocol=protocol_from_steps(user, SOURCE_USER))

    def validate(self) -> None:
        """Raise LoadError when the data cannot be analysed (empty, NaN, too short)."""
        if not self.sweeps:
            raise LoadError(self.path, "the file holds no sweeps")
        if not (np.isfinite(self.sample_rate_hz) and self.sample_rate_hz > 0):
            raise LoadError(self.path, f"the sampling rate {self.sample_rate_hz!r} Hz is not valid")
        for s in self.sweeps:
            if s.n_samples < 100:
                raise LoadError(
                    self.path,
                    f"sweep {s.index} has only {s.n_samples} samples; at least 100 are needed",
                )
            if not np.all(np.isfinite(s.voltage)):
                raise LoadError(self.path, f"sweep {s.index} holds NaN or infinite voltages")
            if s.current is not None and not np.all(np.isfinite(s.current)):
                raise LoadError(self.path, f"sweep {s.index} holds NaN or infinite currents")
            if np.ptp(s.voltage) == 0.0:
                raise LoadError(self.path, f"sweep {s.index} is flat: the voltage never changes")
        self._check_units()

    def _check_units(self) -> None:
        """Raise LoadError when the values cannot be a membrane potential or a current.

        Voltages whose median is outside `REST_LIMITS_V`, or a current beyond
        `MAX_CURRENT_A`, mean a unit mistake in the file (mV values labelled V, pA
        values labelled nA or A). Voltages that stay within `NEAR_ZERO_V` of 0 V in every
        sweep are an unconnected or command channel, or V values labelled mV.
        """
        largest_v = max(float(np.max(np.abs(s.voltage))) for s in self.sweeps)
        if largest_v < NEAR_ZERO_V:
            raise LoadError(
                self.path,
                f"the voltages never leave ±{largest_v * 1e3:.3g} mV of 0 mV: this is not a "
                f"membrane potential (an unconnected or command channel, or V values "
                f"labelled mV); choose the membrane-potential channel or correct the "
                f"voltage unit in the file",
            )
        rest = float(np.median([np.median(s.voltage) for s in self.sweeps]))
        low, high = REST_LIMITS_V
        if not low <= rest <= high:
            as_mv = rest * 1e-3  # what the numbers would mean in mV
            guess = ("the file's mV values seem to be labelled V"
                     if low <= as_mv <= high and abs(as_mv) >= 1e-3
                     else "this is not a membrane potential")
            raise LoadError(
                self.path,
                f"the voltages read {rest * 1e3:.6g} mV at rest (median of the sweeps): {guess}; "
                f"correct the voltage unit in the file (a cell rests between about -120 "
                f"and +20 mV)",
            )
        currents = [s.current for s in self.sweeps if s.current is not None]
        largest_i = max((float(np.max(np.abs(c))) for c in currents), default=0.0)
        if largest_i > MAX_CURRENT_A:
            raise LoadError(
                self.path,
                f"the current reaches {largest_i * 1e9:.6g} nA, far beyond what current clamp "
                f"injects (at most {MAX_CURRENT_A * 1e9:.0f} nA): the current unit seems "
                f"wrong (pA values labelled nA or A?); correct the current unit in the file",
            )
