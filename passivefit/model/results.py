"""What an analysis returns: one frozen result type per level, each with `to_dict()`.

`RecordingResult.to_dict()` is the JSON contract; sheets, report, database, command
line and window all read it (names from `passivefit.model.schema`).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from passivefit import __version__
from passivefit.core.qc import Flag
from passivefit.core.steps import Step
from passivefit.model import schema as S
from passivefit.model.settings import Settings


@dataclass(frozen=True)
class Segment:
    """Where one fitted transient lies in its sweep (for drawing and refits)."""

    edge_s: float       # time of the step edge the transient starts from
    start_s: float      # fit start (absolute sweep time)
    end_s: float        # fit end (absolute sweep time)
    index: int          # segment index in the ExpFit
    charging: bool = True  # a step's charging transient (else the decay after it ends)

    def samples(self, fs: float) -> slice:
        """The sweep samples this segment covers."""
        return slice(int(round(self.start_s * fs)), int(round(self.end_s * fs)) + 1)


def mask(v: np.ndarray, intervals, fs: float, start: int = 0) -> np.ndarray:
    """A copy of `v` with the samples inside the (start, end) times (s) set to NaN; `v`
    itself when there are none. `v` may be a stretch of a sweep from sample `start`."""
    if not intervals:
        return v
    out = np.array(v, dtype=float)
    for a, b in intervals:
        out[max(0, int(a * fs) - start): max(0, int(np.ceil(b * fs)) - start)] = np.nan
    return out


def fit_curves(fit, segments: tuple[Segment, ...], n: int = 400):
    """(time in s, model voltage in V) of `fit` over each segment."""
    curves = []
    for seg in segments:
        t = np.linspace(seg.start_s, seg.end_s, n)
        curves.append((t, fit.evaluate(seg.index, t - seg.edge_s)))
    return curves


@dataclass(frozen=True)
class SweepFit:
    """The analysis of one sweep."""

    index: int
    accepted: bool
    reject_reason: str | None
    step: Step | None
    v_rest_V: float | None = None
    dv_ss_V: float | None = None
    r_in_ohm: float | None = None
    taus_s: tuple[float, ...] = ()
    amps_V: tuple[float, ...] = ()       # signed in the direction of the response, at the edge
    rmse_V: float | None = None
    bridge_ohm: float | None = None
    sag: float | None = None
    r_in_peak_ohm: float | None = None               # R_in at the peak of a sagging response
    rebound_V: float | None = None                   # overshoot past the baseline after the step
    noise_V: float | None = None
    drift_V: float | None = None                     # end-of-sweep level − baseline
    trend: tuple[float, float] = (0.0, 0.0)          # (V/s, reference time s) subtracted
    windows_s: dict = field(default_factory=dict)   # name -> (start, end) absolute times
    masked_s: tuple[tuple[float, float], ...] = ()   # spontaneous events cut out (abs. times)
    segments: tuple[Segment, ...] = ()
    fit: object | None = None            # core.expfit.ExpFit
    flags: tuple[Flag, ...] = ()

    def tau(self, n: int) -> float | None:
        """τn in s; None when not fitted or not resolved: 95 % CI wider than the value, or
        so short that the component was gone (< 1 %) before the fit window opened."""
        if n >= len(self.taus_s) or self.fit is None:
            return None
        tau = self.taus_s[n]
        start = self.segments[0].start_s - self.segments[0].edge_s if self.segments else 0.0
        return None if not self.fit.tau_ci95[n] < tau or tau < start / 4.6 else tau

    def amp(self, n: int) -> float | None:
        """Amplitude of component n in V; None when its τ is not resolved."""
        return self.amps_V[n] if self.tau(n) is not None else None

    @property
    def resolved(self) -> bool:
        """Whether every fitted time constant is resolved and every component is a
        membrane mode (none of the opposite sign)."""
        clean = self.fit is None or len(self.fit.keep) == self.fit.n_total
        return clean and all(self.tau(n) is not None for n in range(len(self.taus_s)))

    def model_curves(self) -> list[tuple[np.ndarray, np.ndarray]]:
        """(time in s, fitted voltage in V) over each fit segment, on the recorded trace
        (the subtracted drift added back), for drawing; none for a fit whose values are
        not shown (one through a spike)."""
        if self.fit is None or not self.taus_s:
            return []
        slope, t_ref = self.trend
        return [(t, v + slope * (t - t_ref)) for t, v in fit_curves(self.fit, self.segments)]

    def corrected(self, v: np.ndarray, fs: float, start: int = 0) -> np.ndarray:
        """The sweep's voltage as the fit saw it: its subtracted drift taken out and its
        spontaneous events cut out (NaN). `v` may be a stretch of the sweep from sample
        `start`."""
        slope, t_ref = self.trend
        v = v - slope * (np.arange(start, start + v.size) / fs - t_ref) if slope else v
        return mask(v, self.masked_s, fs, start)

    def to_dict(self) -> dict:
        """The sweep's entry of the JSON `sweeps` list (display units, schema keys)."""
        values = {
            S.INDEX: self.index,
            S.ACCEPTED: self.accepted,
            S.REJECT_REASON: self.reject_reason,
            S.STEP: self.step.amplitude_A if self.step else None,
            S.V_REST: self.v_rest_V,
            S.R_IN: self.r_in_ohm,
            S.TAU0: self.tau(0),
            S.TAU1: self.tau(1),
            S.TAU2: self.tau(2),
            S.C0: self.amp(0),
            S.C1: self.amp(1),
            S.RMSE: self.rmse_V,
            S.BRIDGE: self.bridge_ohm if self.resolved else None,
            S.SAG_RATIO: self.sag,
            S.N_COMPONENTS: len(self.taus_s),
            S.TAU_SAG: self.fit.sag_tau if self.fit is not None else None,
            S.R_IN_PEAK: self.r_in_peak_ohm,
            S.REBOUND: self.rebound_V,
        }
        out = {q.key: q.display(values[q]) for q in S.SWEEP}
        out[S.FLAGS_KEY] = [f.to_dict() for f in self.flags]
        return out


@dataclass(frozen=True)
class CellResult:
    """Cell-level values in display units (the JSON `cell` object) plus extras."""

    values: dict

    @classmethod
    def from_si(cls, values: Mapping[S.Quantity, object]) -> CellResult:
        """From SI values keyed by quantity: every contract key present (None when not
        estimated), then the extras that were estimated."""
        out = {q.key: q.display(values.get(q)) for q in S.CELL_CORE}
        out.update({q.key: q.display(v) for q, v in values.items() if q not in S.CELL_CORE})
        return cls(out)

    def __getitem__(self, key: str | S.Quantity):
        return self.values[key.key if isinstance(key, S.Quantity) else key]

    def to_dict(self) -> dict:
        return dict(self.values)

    def tau1_caption(self) -> str | None:
        """"cell τ1 2.58 ms (ball-and-stick fit)": the one τ1 every view shows, with its
        source; None when τ1 was not resolved."""
        tau1 = self.values.get(S.TAU1.key)
        if tau1 is None:
            return None
        return f"cell τ1 {tau1:.3g} ms ({self.values.get(S.TAU1_SOURCE.key) or 'fit'})"


@dataclass(frozen=True)
class GroupAverage:
    """The accepted sweeps combined into one response to the step `step` (see SweepPool).

    ``segments`` index into the cell-level fit (`RecordingResult.cell_fit`).
    """

    step: Step
    sweep_indices: tuple[int, ...]
    v_V: np.ndarray          # averaged voltage, V
    v_base_V: float
    windows_s: dict
    segments: tuple[Segment, ...] = ()

    @property
    def amplitude_A(self) -> float:
        return self.step.amplitude_A

    @property
    def edge_s(self) -> float:
        """The edge the first fitted transient starts from: step onset, or a pulse's end."""
        return self.step.onset_s if self.step.kind == "step" else self.step.offset_s

    @property
    def fit_start_s(self) -> float:
        """Start of the first fitted transient after its edge, in s."""
        return self.windows_s["fit" if self.step.kind == "step" else "fit_off"][0] - self.edge_s

    def model_curves(self, fit) -> list[tuple[np.ndarray, np.ndarray]]:
        """(time in s, fitted voltage in V) of the cell-level fit over this average."""
        return fit_curves(fit, self.segments)


@dataclass(frozen=True)
class RecordingResult:
    """Everything one analysis produced; `to_dict()` is the JSON contract."""

    source: dict
    settings: Settings
    sweeps: tuple[SweepFit, ...]
    cell: CellResult
    flags: tuple[Flag, ...]
    average: GroupAverage | None = None     # the accepted sweeps combined (SweepPool)
    cell_fit: object | None = None          # ExpFit of the combined response
    peel: object | None = None              # core.peel.Peel of the reference average
    scan: dict | None = None                # fit-start scan (arrays)
    vi: dict | None = None                  # V–I points and regression
    protocol: str = "step"
    effective_settings: Settings | None = None  # settings with the automatic fit start filled in
    cable_fit: object | None = None         # core.cablefit.BallStickFit of the combined response
    design: object | None = None            # analysis.design.DesignAdvice: what to record next

    def to_dict(self) -> dict:
        return {
            "passivefit_version": __version__,
            "source": dict(self.source),
            "settings": self.settings.to_dict(),
            "cell": self.cell.to_dict(),
            "sweeps": [s.to_dict() for s in self.sweeps],
            "flags": [f.to_dict() for f in self.flags],
            "design": None if self.design is None else self.design.to_dict(),
        }
