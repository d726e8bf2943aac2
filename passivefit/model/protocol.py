"""The stimulus protocol of a recording: each sweep's epochs, and where they came from.

A protocol can come from an acquisition file's epoch table, an NWB stimulus series,
a recorded current channel or the user's `--step`. Where two sources exist they are
checked against each other (`compare_steps`) and every disagreement becomes a
`Flag` on the Recording (codes and words in `passivefit.model.schema`).

Pure functions and frozen dataclasses only (numpy, no file access).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from passivefit.core.qc import Flag
from passivefit.core.steps import Step
from passivefit.model import schema as S

# ------------------------------------------------------------------ current sources
SOURCE_RECORDED = "recorded channel"
SOURCE_EPOCH_TABLE = "epoch table"
SOURCE_STIMULUS = "stimulus series"
SOURCE_USER = "user step"
SOURCE_TABLE = "current column"  # a sweep table's I<k> column: command or recorded
SOURCE_NONE = "none"

# ------------------------------------------------------------------ clamp modes
CURRENT_CLAMP = "current clamp"
VOLTAGE_CLAMP = "voltage clamp"

# a recorded step agrees with the protocol within this fraction of its amplitude
# (amplifier gain tolerances are a few %; common practice, no source) ...
AMPLITUDE_RTOL = 0.1
# ... and its edges within this time, in s
TIMING_TOL_S = 1e-3
# a holding offset smaller than this fraction of the smallest step is not reported
HOLDING_RTOL = 0.1


@dataclass(frozen=True)
class Epoch:
    """One epoch of a sweep's command: a level held (or ramped to) for a while.

    Parameters
    ----------
    onset_s : float
        Start from the beginning of the sweep, in s.
    duration_s : float
        Length, in s.
    level_A : float
        Current during the epoch (a ramp's end level), in A.
    kind : str
        "step", "pulse" (at most `core.steps.PULSE_MAX_S`), "ramp", "pulse train"
        or "other" (a shape passivefit does not draw).
    pulse_period_s, pulse_width_s : float
        For a pulse train: period and width of its pulses, in s (0 otherwise).
    """

    onset_s: float
    duration_s: float
    level_A: float
    kind: str = "step"
    pulse_period_s: float = 0.0
    pulse_width_s: float = 0.0


@dataclass(frozen=True)
class SweepProtocol:
    """The epochs of one sweep and the holding level between them.

    Parameters
    ----------
    epochs : tuple of Epoch
        In time order.
    holding_A : float
        Current outside the epochs, in A.
    """

    epochs: tuple[Epoch, ...]
    holding_A: float = 0.0

    @property
    def kinds(self) -> set[str]:
        return {e.kind for e in self.epochs if e.duration_s > 0}

    def command(self, n_samples: int, sample_rate_hz: float) -> np.ndarray:
        """The command current as a sampled waveform, in A.

        Steps and pulse trains are drawn exactly; a ramp runs linearly from the
        previous level to its own; an "other" epoch is drawn at its level.
        """
        fs = float(sample_rate_hz)
        out = np.full(n_samples, self.holding_A, dtype=np.float64)
        previous = self.holding_A
        for e in self.epochs:
            a = int(round(e.onset_s * fs))
            b = min(int(round((e.onset_s + e.duration_s) * fs)), n_samples)
            if b <= a or a >= n_samples:
                continue
            if e.kind == "ramp":
                out[a:b] = previous + (e.level_A - previous) * (np.arange(1, b - a + 1) / (b - a))
            elif e.kind == "pulse train" and e.pulse_period_s > 0 and e.pulse_width_s > 0:
                t = (np.arange(a, b) - a) / fs
                on = np.mod(t, e.pulse_period_s) < e.pulse_width_s - 0.5 / fs
                out[a:b] = np.where(on, e.level_A, previous)
                continue  # the level after a train is the one before its pulses
            else:
                out[a:b] = e.level_A
            previous = e.level_A
        return out


@dataclass(frozen=True)
class Protocol:
    """The stimulus protocol of a recording.

    Parameters
    ----------
    sweeps : tuple of SweepProtocol
        One per sweep.
    source : str
        Where it came from: one of the SOURCE_* names.
    """

    sweeps: tuple[SweepProtocol, ...]
    source: str

    @property
    def kinds(self) -> set[str]:
        return set().union(*(s.kinds for s in self.sweeps)) if self.sweeps else set()


def protocol_from_steps(per_sweep: list[list[Step]], source: str) -> Protocol:
    """A protocol whose epochs are the steps found in each sweep's current.

    Parameters
    ----------
    per_sweep : list of list of Step
        `find_steps` of every sweep.
    source : str
        One of the SOURCE_* names.
    """
    sweeps = []
    for steps in per_sweep:
        holding = steps[0].holding_A if steps else 0.0
        epochs = tuple(Epoch(s.onset_s, s.duration_s, s.level_A,
                             "step" if s.kind == "step" else "pulse") for s in steps)
        sweeps.append(SweepProtocol(epochs, holding))
    return Protocol(tuple(sweeps), source)


def pA(value_A: float) -> str:
    """A current in pA for messages, e.g. ``"-48.8 pA"``."""
    return f"{value_A * 1e12:.1f} pA"


def ms(value_s: float) -> str:
    return f"{value_s * 1e3:.1f} ms"


def compare_steps(sweep: int, protocol: list[Step], recorded: list[Step],
                  protocol_source: str = SOURCE_EPOCH_TABLE) -> list[Flag]:
    """Disagreements between a sweep's protocol steps and its recorded current's steps.

    Parameters
    ----------
    sweep : int
        Sweep number, for the messages.
    protocol : list of Step
        Steps of the command (epoch table, stimulus series or user step).
    recorded : list of Step
        Steps found in the recorded current channel.
    protocol_source : str
        Name of the protocol's source, for the messages.

    Returns
    -------
    list of Flag
        One per disagreement: amplitude beyond `AMPLITUDE_RTOL`, edges beyond
        `TIMING_TOL_S`, holding level beyond `HOLDING_RTOL` of the smallest step, or a
        step found in only one of the two. Values are in A or s, as the message says.
    """
    flags: list[Flag] = []
    unmatched = list(recorded)
    for p in protocol:
        match = min(unmatched, key=lambda r: abs(r.onset_s - p.onset_s), default=None)
        if match is None or abs(match.onset_s - p.onset_s) > max(TIMING_TOL_S, 0.5 * p.duration_s):
            flags.append(S.PROTOCOL_STEP_MISSING.make(
                p.amplitude_A / S.PA, reason="not_recorded", sweep=sweep, source=protocol_source,
                amplitude=pA(p.amplitude_A), at=ms(p.onset_s)))
            continue
        unmatched.remove(match)
        if abs(match.amplitude_A - p.amplitude_A) > AMPLITUDE_RTOL * abs(p.amplitude_A):
            flags.append(S.PROTOCOL_AMPLITUDE.make(
                (match.amplitude_A - p.amplitude_A) / S.PA, sweep=sweep, at=ms(p.onset_s),
                planned=pA(p.amplitude_A), source=protocol_source,
                recorded=pA(match.amplitude_A)))
        shift = max(abs(match.onset_s - p.onset_s), abs(match.offset_s - p.offset_s))
        if shift > TIMING_TOL_S:
            flags.append(S.PROTOCOL_TIMING.make(
                shift / S.MS, sweep=sweep, source=protocol_source,
                planned=f"{ms(p.onset_s)}–{ms(p.offset_s)}",
                recorded=f"{ms(match.onset_s)}–{ms(match.offset_s)}"))
    for r in unmatched:
        flags.append(S.PROTOCOL_STEP_MISSING.make(
            r.amplitude_A / S.PA, reason="not_planned", sweep=sweep, source=protocol_source,
            amplitude=pA(r.amplitude_A), at=ms(r.onset_s)))
    if protocol and recorded:
        smallest = min(abs(s.amplitude_A) for s in [*protocol, *recorded])
        offset = recorded[0].holding_A - protocol[0].holding_A
        if abs(offset) > HOLDING_RTOL * smallest:
            flags.append(S.PROTOCOL_HOLDING.make(
                offset / S.PA, sweep=sweep, source=protocol_source,
                recorded=pA(recorded[0].holding_A), planned=pA(protocol[0].holding_A),
                offset=pA(offset)))
    return flags


def summarize(flags: list[Flag]) -> tuple[Flag, ...]:
    """One flag per code when many sweeps repeat it.

    The first flag of each code is kept (its message names its sweep and values);
    when more flags share the code, its message gains "(and N more like it)".
    """
    by_code: dict[str, list[Flag]] = {}
    for f in flags:
        by_code.setdefault(f.code, []).append(f)
    out = []
    for code, group in by_code.items():
        first = group[0]
        more = len(group) - 1
        message = first.message + (f" (and {more} more like it)" if more else "")
        out.append(Flag(code, message, first.value))
    return tuple(out)
