"""What a person can choose about an analysis: windows, sweeps, decisions, options.

Saved with the review file and hashed into the database, so one set of settings always
gives the same numbers.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, astuple, dataclass, field, replace

import numpy as np

from passivefit.model.recording import StepSpec

SETTINGS_VERSION = 1


@dataclass(frozen=True)
class Windows:
    """Analysis windows in ms relative to the step onset; None = chosen automatically.

    ``fit_ms`` gives the start and end of the charging-transient fit; the decay after the
    step is fitted from the same start relative to the step's end. ``fit_end_ms`` ends
    the charging fit early (e.g. before a sag acts) while its start stays automatic;
    ``decay`` says whether the decay after the step is fitted (None: yes, unless the
    cell sags).
    """

    baseline_ms: tuple[float, float] | None = None
    steady_ms: tuple[float, float] | None = None
    fit_ms: tuple[float, float] | None = None
    fit_end_ms: float | None = None
    decay: bool | None = None

    def merged(self, other: Windows | None) -> Windows:
        """`other`'s windows where it sets them, ours elsewhere."""
        if other is None:
            return self
        return Windows(*(o if o is not None else s for s, o in
                         zip(astuple(self), astuple(other), strict=True)))


@dataclass(frozen=True)
class Settings:
    """Everything a person can choose about an analysis (saved with the review).

    Parameters
    ----------
    sweeps : tuple of int or None
        Sweep indices to analyse; None = all.
    step : StepSpec or None
        The step, for files without a command waveform.
    fit_start_ms : float or None
        Fit start after each step edge, in ms; None = after the detected artefact.
    components : str
        "auto", "1", "2" or "3" exponential components.
    correct_bridge : bool
        Subtract the instantaneous (bridge) jump from the steady-state deflection.
    windows : Windows
        Windows for all sweeps.
    sweep_windows : tuple of (int, Windows)
        Per-sweep window overrides.
    decisions : tuple of (int, bool, str)
        A person's accept (True) / reject (False) of a sweep, with a reason.
    bootstrap : int
        Resamples over sweeps for the cell-level CIs (0 = Jacobian CIs only).
    filter_hz : float or None
        Corner of the amplifier's 4-pole Bessel low-pass, in Hz, which the cable-model fit
        applies. None: from the file's metadata, else estimated.
    area_um2 : float or None
        Total membrane area of the cell, in µm², when known (e.g. from a reconstruction):
        gives the specific capacitance Cm = C_total/area and Rm = τ0/Cm.
    correct_drift : bool
        Subtract a sweep's linear baseline drift (baseline before the step to the end of
        a long tail) before fitting.
    remove_hum : bool
        Take 50/60 Hz mains hum, when the baselines show it, out of every sweep before
        fitting (analysis.hum).
    all_sweeps : bool
        Take the cell values from all accepted sweeps even when R_in drifts over the
        recording (default: from its longest stable stretch).
    channel : str or None
        The membrane-potential channel to read (name, or index as text); None: chosen
        by the reader.
    """

    sweeps: tuple[int, ...] | None = None
    step: StepSpec | None = None
    fit_start_ms: float | None = None
    components: str = "auto"
    correct_bridge: bool = True
    windows: Windows = field(default_factory=Windows)
    sweep_windows: tuple[tuple[int, Windows], ...] = ()
    decisions: tuple[tuple[int, bool, str], ...] = ()
    bootstrap: int = 40
    filter_hz: float | None = None
    area_um2: float | None = None
    correct_drift: bool = True
    remove_hum: bool = True
    all_sweeps: bool = False
    channel: str | None = None

    def __post_init__(self) -> None:
        if self.components not in ("auto", "1", "2", "3"):
            raise ValueError(f"`components` must be auto, 1, 2 or 3, not {self.components!r}")
        if self.fit_start_ms is not None and not self.fit_start_ms >= 0:
            raise ValueError(f"`fit_start_ms` must be >= 0, not {self.fit_start_ms!r}")
        if self.bootstrap < 0:
            raise ValueError(f"`bootstrap` must be 0 or more resamples, not {self.bootstrap}")
        for name in ("filter_hz", "area_um2"):
            value = getattr(self, name)
            if value is not None and not (np.isfinite(value) and value > 0):
                raise ValueError(f"`{name}` must be a positive number, not {value!r}")

    @property
    def reader_channel(self) -> int | str | None:
        """`channel` as the readers take it: an index when it is a number."""
        if self.channel is None:
            return None
        return int(self.channel) if self.channel.strip().isdigit() else self.channel

    def windows_for(self, index: int) -> Windows:
        override = dict(self.sweep_windows).get(index)
        return self.windows.merged(override)

    def decision_for(self, index: int) -> tuple[bool, str] | None:
        for i, accepted, reason in self.decisions:
            if i == index:
                return accepted, reason
        return None

    def with_decision(self, index: int, accepted: bool | None, reason: str = "") -> Settings:
        """A copy with sweep `index` accepted, rejected, or (None) left to the automatic tests."""
        kept = tuple(d for d in self.decisions if d[0] != index)
        new = () if accepted is None else ((index, accepted, reason),)
        return replace(self, decisions=tuple(sorted(kept + new)))

    def with_sweep_windows(self, index: int, windows: Windows | None) -> Settings:
        kept = tuple(w for w in self.sweep_windows if w[0] != index)
        new = () if windows is None else ((index, windows),)
        return replace(self, sweep_windows=tuple(sorted(kept + new, key=lambda w: w[0])))

    def to_dict(self) -> dict:
        d = asdict(self)
        d["sweeps"] = list(self.sweeps) if self.sweeps is not None else None
        d["step"] = asdict(self.step) if self.step else None
        d["windows"] = _windows_dict(self.windows)
        d["sweep_windows"] = [[i, _windows_dict(w)] for i, w in self.sweep_windows]
        d["decisions"] = [list(x) for x in self.decisions]
        return d

    @classmethod
    def from_dict(cls, d: dict) -> Settings:
        d = dict(d)
        d["sweeps"] = tuple(d["sweeps"]) if d.get("sweeps") is not None else None
        d["step"] = StepSpec(**d["step"]) if d.get("step") else None
        d["windows"] = _windows_from(d.get("windows") or {})
        d["sweep_windows"] = tuple((int(i), _windows_from(w))
                                   for i, w in d.get("sweep_windows", []))
        d["decisions"] = tuple((int(i), bool(a), str(r)) for i, a, r in d.get("decisions", []))
        return cls(**d)

    def settings_hash(self) -> str:
        """Stable hash of the settings that change numbers (decisions included)."""
        return settings_hash(self.to_dict())


def _windows_dict(w: Windows) -> dict:
    return {k: (list(v) if isinstance(v, tuple) else v) for k, v in asdict(w).items()}


def _windows_from(d: dict) -> Windows:
    return Windows(**{k: (tuple(v) if isinstance(v, list) else v) for k, v in d.items()})


def settings_hash(settings: dict) -> str:
    """Stable identity of settings given as plain JSON types (``Settings.to_dict()``):
    16 hex digits of the sha256 of the key-sorted JSON text."""
    text = json.dumps(settings, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:16]
