"""Recording + Settings → RecordingResult: per-sweep fits and the cell's passive properties.

The steps of one analysis:

1. find the step in every sweep (command waveform, or the user's step);
2. per sweep: baseline, steady state, a joint fit of the onset and offset transients
   with shared time constants, bridge jump, sag, rejection tests;
3. per cell: a joint fit of the averaged accepted sweeps of each amplitude, CIs by a
   bootstrap over sweeps, input resistance from the V–I slope, the fit-start scan;
4. cable interpretation (equivalent cylinder, ball-and-stick, capacitance) and flags.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, astuple, dataclass, field, replace

import numpy as np

from passivefit import __version__
from passivefit.core import steady
from passivefit.core.qc import Flag, runs_test_z
from passivefit.core.steps import Step, find_step
from passivefit.io.recording import LoadError, Recording, StepSpec

SETTINGS_VERSION = 1
MS, MV, PA, MOHM, PF = 1e-3, 1e-3, 1e-12, 1e6, 1e-12


# --------------------------------------------------------------------------- settings
@dataclass(frozen=True)
class Windows:
    """Analysis windows in ms relative to the step onset; None = chosen automatically.

    ``fit_ms`` gives the start and end of the charging-transient fit; the decay after the
    step is fitted from the same start relative to the step's end.
    """

    baseline_ms: tuple[float, float] | None = None
    steady_ms: tuple[float, float] | None = None
    fit_ms: tuple[float, float] | None = None

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
        Corner of the amplifier's 4-pole Bessel low-pass, in Hz; its delay (0.336/fc)
        shifts time zero of the cable-model fit. None: from the file's metadata, else 0.
    area_um2 : float or None
        Total membrane area of the cell, in µm², when known (e.g. from a reconstruction):
        gives the specific capacitance Cm = C_total/area and Rm = τ0/Cm.
    correct_drift : bool
        Subtract a sweep's linear baseline drift (baseline before the step to the end of
        a long tail) before fitting.
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
        text = json.dumps(self.to_dict(), sort_keys=True)
        return hashlib.sha256(text.encode()).hexdigest()[:16]


def _windows_dict(w: Windows) -> dict:
    return {k: (list(v) if v is not None else None) for k, v in asdict(w).items()}


def _windows_from(d: dict) -> Windows:
    return Windows(**{k: (tuple(v) if v is not None else None) for k, v in d.items()})


# --------------------------------------------------------------------------- results
def _num(x: float | None, scale: float = 1.0, digits: int = 6) -> float | None:
    """SI value → display unit, rounded to `digits` significant digits; None stays None."""
    if x is None or not np.isfinite(x):
        return None
    v = float(x) / scale
    return float(f"{v:.{digits}g}")


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
    noise_V: float | None = None
    drift_V: float | None = None                     # end-of-sweep level − baseline
    trend: tuple[float, float] = (0.0, 0.0)          # (V/s, reference time s) subtracted
    windows_s: dict = field(default_factory=dict)   # name -> (start, end) absolute times
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
        """Whether every fitted time constant is resolved."""
        return all(self.tau(n) is not None for n in range(len(self.taus_s)))

    def model_curves(self) -> list[tuple[np.ndarray, np.ndarray]]:
        """(time in s, fitted voltage in V) over each fit segment, on the recorded trace
        (the subtracted drift added back), for drawing."""
        if self.fit is None:
            return []
        slope, t_ref = self.trend
        return [(t, v + slope * (t - t_ref)) for t, v in fit_curves(self.fit, self.segments)]

    def corrected(self, v: np.ndarray, fs: float) -> np.ndarray:
        """The sweep's voltage with its subtracted drift taken out, as the fit saw it."""
        slope, t_ref = self.trend
        return v - slope * (np.arange(v.size) / fs - t_ref) if slope else v

    def to_dict(self) -> dict:
        return {
            "index": self.index,
            "accepted": self.accepted,
            "reject_reason": self.reject_reason,
            "step_pA": _num(self.step.amplitude_A if self.step else None, PA, 5),
            "v_rest_mV": _num(self.v_rest_V, MV),
            "r_in_MOhm": _num(self.r_in_ohm, MOHM),
            "tau0_ms": _num(self.tau(0), MS),
            "tau1_ms": _num(self.tau(1), MS),
            "tau2_ms": _num(self.tau(2), MS),
            "c0_mV": _num(self.amp(0), MV),
            "c1_mV": _num(self.amp(1), MV),
            "rmse_mV": _num(self.rmse_V, MV),
            "bridge_MOhm": _num(self.bridge_ohm if self.resolved else None, MOHM),
            "sag_ratio": _num(self.sag, 1.0, 4),
            "n_components": len(self.taus_s),
            "flags": [f.to_dict() for f in self.flags],
        }


CELL_KEYS = ("v_rest_mV", "r_in_MOhm", "tau0_ms", "tau0_ci95_ms", "tau1_ms", "tau1_ci95_ms",
             "c0_mV", "c1_mV", "L_cyl", "L_bs", "L_ci95", "rho", "rho_ci95", "c_tau_pF",
             "c_total_pF", "sag_ratio", "n_sweeps_used")


@dataclass(frozen=True)
class CellResult:
    """Cell-level values in display units (the JSON `cell` object) plus extras."""

    values: dict

    def __getitem__(self, key: str):
        return self.values[key]

    def to_dict(self) -> dict:
        return dict(self.values)


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

    def to_dict(self) -> dict:
        return {
            "passivefit_version": __version__,
            "source": dict(self.source),
            "settings": self.settings.to_dict(),
            "cell": self.cell.to_dict(),
            "sweeps": [s.to_dict() for s in self.sweeps],
            "flags": [f.to_dict() for f in self.flags],
        }


# --------------------------------------------------------------------------- steps
def sweep_steps(recording: Recording, settings: Settings) -> list[Step | None]:
    """The step of every sweep: from the user's StepSpec, else from the current trace."""
    fs = recording.sample_rate_hz
    if settings.step is not None:
        rec = recording.with_step(settings.step)
    elif recording.has_current:
        rec = recording
    else:
        raise LoadError(recording.path, "no step found: this file carries no command or current "
                        "waveform; give `--step ON_MS DURATION_MS AMPLITUDE_PA [INCREMENT_PA]`")
    steps = [find_step(s.current, fs) for s in rec.sweeps]
    if all(s is None for s in steps):
        raise LoadError(recording.path, "no current step found in any sweep; give `--step "
                        "ON_MS DURATION_MS AMPLITUDE_PA [INCREMENT_PA]` if the waveform is wrong")
    return steps


# --------------------------------------------------------------------------- windows
SPIKE_V = -0.010          # a sweep reaching this potential fired an action potential
GUARD_S = 0.5e-3         # keep windows this far from step edges
MIN_FIT_START_S = 0.3e-3  # earliest automatic fit start after an edge
KEEP_FULL_S, BIN_FACTOR = 5e-3, 1.05  # fit samples at full rate up to 5 ms, then 5 % bins


def artefact_end_s(v: np.ndarray, edge: int, fs: float, noise: float) -> float:
    """Time after a step edge at which the electrode/filter artefact has settled, in s.

    The artefact is the fast jump at the edge and the filter's ringing: the second
    difference of the voltage stays far above its baseline noise while it lasts.
    """
    n = min(int(5e-3 * fs), v.size - edge - 2)
    if n < 4:
        return MIN_FIT_START_S
    d2 = np.abs(np.diff(v[edge - 1: edge + n + 1], 2))
    pre = np.abs(np.diff(v[max(0, edge - int(0.02 * fs)): edge - 1], 2))
    level = 6.0 * (np.median(pre) / 0.6745 if pre.size > 10 else noise)
    loud = np.flatnonzero(d2 > level)
    settle = (loud[-1] + 3) / fs if loud.size else 0.0
    return float(np.clip(settle, max(MIN_FIT_START_S, 8 / fs), 3e-3))


def resolve_windows(step: Step, n_samples: int, fs: float, w: Windows,
                    fit_start_s: float) -> dict:
    """Absolute (start, end) times in s of the baseline, steady and fit windows."""
    on, off, end = step.onset / fs, step.offset / fs, n_samples / fs
    duration = off - on

    def absolute(rel_ms):
        return (on + rel_ms[0] * MS, on + rel_ms[1] * MS)

    base = absolute(w.baseline_ms) if w.baseline_ms else (max(0.0, on - 0.1), on - GUARD_S / 2)
    out = {"baseline": base}
    if step.kind == "step":
        out["steady"] = (absolute(w.steady_ms) if w.steady_ms
                         else (off - max(0.2 * duration, min(duration, 2e-3)), off - GUARD_S / 2))
        fit = absolute(w.fit_ms) if w.fit_ms else (on + fit_start_s, off - GUARD_S / 2)
        out["fit"] = fit
        tail = min(end, off + duration + 0.1)
        out["fit_off"] = (off + (fit[0] - on), tail)
    else:
        fit = absolute(w.fit_ms) if w.fit_ms else (off + fit_start_s, end)
        out["fit_off"] = fit
    return out


def _index(t_s: float, fs: float, n: int) -> int:
    return int(np.clip(round(t_s * fs), 0, n))


# --------------------------------------------------------------------------- sweep fit
def _segments(v: np.ndarray, fs: float, step: Step, wins: dict):
    """Fit segments (t from their edge, y) and their drawing records."""
    from passivefit.core.expfit import Segment as FitSegment
    from passivefit.core.expfit import decimate_tail

    segs, records = [], []
    edges = {"fit": step.onset_s, "fit_off": step.offset_s}
    for name in ("fit", "fit_off"):
        if name not in wins:
            continue
        a, b = (_index(t, fs, v.size) for t in wins[name])
        if b - a < 20:
            continue
        t = np.arange(a, b) / fs - edges[name]
        segs.append(FitSegment(*decimate_tail(t, v[a:b], KEEP_FULL_S, BIN_FACTOR)))
        records.append(Segment(edges[name], a / fs, (b - 1) / fs, len(records),
                               charging=name == "fit"))
    return segs, tuple(records)


def _fit(segs, components: str, tau_init=None, max_components: int = 3,
         choice: dict | None = None):
    """Fit 1–3 exponentials; with "auto", the chooser's record goes into `choice`."""
    from passivefit.core import expfit

    if components == "auto":
        fit, record = expfit.fit_auto(segs, max_components=max_components, tau_init=tau_init)
        if choice is not None:
            choice.update(record)
        return fit
    return expfit.fit_exponentials(segs, int(components), tau_init=tau_init)


def _response_amplitudes(fit, segment: int, kind: str) -> tuple[float, ...]:
    """Component amplitudes at the edge, signed in the direction of the response.

    Charging: V(t) = V∞ − Σ c_n e^(−t/τn); decay: V(t) = V_base + Σ c_n e^(−t/τn).
    """
    a = np.asarray(fit.amplitudes[segment], dtype=float)
    return tuple(float(x) for x in (-a if kind == "step" else a))


EVENT_Z = 6.0  # 1-ms-smoothed residual this many robust sds away: an event, not noise


def residual(v: np.ndarray, fit, seg: Segment, fs: float) -> tuple[np.ndarray, np.ndarray]:
    """(sample times in s, data − model in V) over one fitted segment at full resolution."""
    span = seg.samples(fs)
    t = np.arange(span.start, span.stop) / fs
    return t, v[span] - fit.evaluate(seg.index, t - seg.edge_s)


def _event_in(resid: np.ndarray, fs: float) -> float:
    """Largest fast excursion of the residual, in robust sds of itself.

    The residual smoothed over 1 ms minus its 25-ms running mean: events (ms rise,
    tens of ms decay) stand out, slow misfit such as sag does not. The first 10 ms are
    left out: misfit of the fast components lives there (see the residual-structure flag).
    """
    resid = resid[int(10e-3 * fs):]
    if resid.size < int(30e-3 * fs):
        return 0.0
    fast = steady.smooth(resid, max(1, int(1e-3 * fs))) - steady.smooth(resid, int(25e-3 * fs))
    centred = fast - np.median(fast)
    spread = 1.4826 * np.median(np.abs(centred))
    return float(np.max(np.abs(centred)) / max(spread, 1e-9))


DRIFT_V = 1e-3       # baseline change over a sweep beyond which the sweep is rejected
TAIL_S = 0.2         # the last tenth of a tail at least this long is back at baseline


def baseline_drift(v: np.ndarray, step: Step, fs: float, v_base: float,
                   base_window: tuple[int, int]) -> tuple[float, float, float] | None:
    """(drift in V, slope in V/s, reference time in s) of a sweep's baseline.

    The drift is the level at the end of the sweep minus the baseline before the step; the
    slope joins the centres of the two windows. Measured only when the sweep goes on for
    at least TAIL_S after the step, so the decay is over in its last tenth; None otherwise.
    """
    tail = v.size - step.offset
    if tail / fs < TAIL_S:
        return None
    drift = steady.robust_level(v[v.size - tail // 10:]) - v_base
    t_ref = 0.5 * (base_window[0] + base_window[1]) / fs
    t_end = (v.size - tail / 20) / fs
    return drift, drift / (t_end - t_ref), t_ref


def baseline_only(v: np.ndarray, step: Step | None, index: int, fs: float,
                  settings: Settings) -> SweepFit:
    """A sweep with its step and baseline only, unfitted: enough to pool sweeps."""
    if step is None:
        return SweepFit(index, False, "no step in this sweep", None)
    wins = resolve_windows(step, v.size, fs, settings.windows_for(index), MIN_FIT_START_S)
    b0, b1 = (_index(t, fs, v.size) for t in wins["baseline"])
    if b1 - b0 < 10:
        return SweepFit(index, False, "no baseline before the step", step)
    return SweepFit(index, np.max(v) < SPIKE_V, None, step, v_rest_V=steady.robust_level(v[b0:b1]))


def analyze_sweep(v: np.ndarray, step: Step | None, index: int, fs: float,
                  settings: Settings, tau_init: tuple[float, ...] | None = None) -> SweepFit:
    """Baseline, steady state, fitted transients and tests of one sweep.

    `tau_init` (s), from a fit of the combined sweeps, starts the fit there and fixes the
    number of components (at most two: single sweeps rarely resolve a third).
    """
    if step is None:
        return SweepFit(index, False, "no step in this sweep", None)
    flags: list[Flag] = []
    w = settings.windows_for(index)
    guess = resolve_windows(step, v.size, fs, w, MIN_FIT_START_S)
    b0, b1 = (_index(t, fs, v.size) for t in guess["baseline"])
    if b1 - b0 < 10:
        return SweepFit(index, False, "no baseline before the step", step)
    v_base = steady.robust_level(v[b0:b1])
    drift = baseline_drift(v, step, fs, v_base, (b0, b1))
    trend = (0.0, 0.0)
    if drift is not None and settings.correct_drift:
        trend = drift[1:]
        v = v - trend[0] * (np.arange(v.size) / fs - trend[1])
        v_base = steady.robust_level(v[b0:b1])
    noise = steady.noise_sd(v[b0:b1])
    if settings.fit_start_ms is not None:
        start = settings.fit_start_ms * MS
    else:
        start = artefact_end_s(v, step.onset, fs, noise)
        if step.kind == "pulse":
            start = max(start, artefact_end_s(v, step.offset, fs, noise))
    wins = resolve_windows(step, v.size, fs, w, start)
    fit_error = None
    try:
        segs, records = _segments(v, fs, step, wins)
        if not segs:
            raise ValueError("the fit window holds too few samples")
        if tau_init is not None and settings.components == "auto":
            n = min(len(tau_init), 2)
            fit = _fit(segs, str(n), tau_init=tau_init[:n])
            if not fit.success and n == 2:  # a small step may not show τ1: one exponential
                fit = _fit(segs, "1", tau_init=tau_init[:1])
        else:  # single sweeps rarely resolve a third component: "auto" stops at two here
            fit = _fit(segs, settings.components, max_components=2)
        if not fit.success:
            raise ValueError(fit.message)
    except (ValueError, np.linalg.LinAlgError, RuntimeError) as exc:
        fit, records, fit_error = None, (), f"fit failed: {exc}"

    v_ss = dv = r_in = bridge = sag = rmse = None
    amps: tuple[float, ...] = ()
    if step.kind == "step":
        s0, s1 = (_index(t, fs, v.size) for t in wins["steady"])
        v_ss = steady.robust_level(v[s0:s1]) if s1 - s0 >= 5 else None
        if fit is not None:
            amps = _response_amplitudes(fit, 0, "step")
            v_inf = float(fit.offsets[0])
            jump = float(fit.evaluate(0, np.zeros(1))[0]) - v_base
            bridge = jump / step.amplitude_A
            model_in_steady = fit.evaluate(0, np.arange(s0, s1) / fs - step.onset_s)
            unsettled = abs(np.mean(model_in_steady) - v_inf) / max(abs(v_inf - v_base), 1e-9)
            if v_ss is None or unsettled > 0.01:
                flags.append(Flag("steady.not_reached", "the voltage is still changing in the "
                                  "steady-state window; the fitted asymptote is used "
                                  "(fraction of the deflection left)", unsettled))
                v_ss = v_inf
        if v_ss is not None:
            dv = v_ss - v_base
            r_in = dv / step.amplitude_A    # the cell's bridge estimate is subtracted later
            width = max(1, int(2e-3 * fs))
            smooth_noise = steady.noise_sd(steady.smooth(v[b0:b1], width)[width:-width])
            sag = steady.sag_ratio(v[step.onset: step.offset], v_base, v_ss, width, smooth_noise)
    elif fit is not None:
        amps = _response_amplitudes(fit, 0, "pulse")

    drift = drift[0] if drift is not None else None
    if drift is not None and abs(drift) > 0.25 * DRIFT_V:
        done = "subtracted as a straight line" if settings.correct_drift else "not corrected"
        flags.append(Flag("sweep.drift", "the baseline at the end of the sweep differs from the "
                          f"one before the step ({done}) (mV)", drift / MV))
    accepted, reason = True, None
    if fit_error:
        accepted, reason = False, fit_error
    elif drift is not None and abs(drift) > max(DRIFT_V, 0.25 * abs(dv or 0.0)):
        accepted, reason = False, (f"the baseline drifts {drift / MV:+.1f} mV between the "
                                   "start and the end of the sweep")
    elif np.max(v) >= SPIKE_V:
        accepted, reason = False, f"action potential (peak {np.max(v) / MV:.0f} mV)"
    elif fit is not None:
        resids = [residual(v, fit, r, fs)[1] for r in records]
        rmse = float(np.sqrt(np.mean(np.concatenate(resids) ** 2)))
        worst = max(_event_in(r, fs) for r in resids)
        if worst > EVENT_Z:
            accepted, reason = False, "spontaneous event in the fit window"
            flags.append(Flag("sweep.event", "a spontaneous event or other excursion from the "
                              "fit (residual in noise units)", worst))
    return SweepFit(
        index=index, accepted=accepted, reject_reason=reason, step=step,
        v_rest_V=v_base, dv_ss_V=dv, r_in_ohm=r_in,
        taus_s=tuple(float(t) for t in fit.taus) if fit is not None else (),
        amps_V=amps, rmse_V=rmse,
        bridge_ohm=bridge, sag=sag, noise_V=noise, drift_V=drift, trend=trend, windows_s=wins,
        segments=records, fit=fit, flags=tuple(flags),
    )


def reject_outliers(fits: list[SweepFit]) -> list[SweepFit]:
    """Reject sweeps whose baseline or noise stands far from the others'."""
    ok = [f for f in fits if f.accepted]
    if len(ok) < 4:
        return fits
    base = np.array([f.v_rest_V for f in ok])
    noise = np.array([f.rmse_V for f in ok])
    med_base = np.median(base)
    spread = max(1.4826 * np.median(np.abs(base - med_base)), 0.5 * MV)
    med_noise = np.median(noise)
    out = []
    for f in fits:
        reason = None
        if f.accepted and abs(f.v_rest_V - med_base) > max(5 * spread, 3 * MV):
            reason = (f"baseline {f.v_rest_V / MV:.1f} mV far from the others' "
                      f"{med_base / MV:.1f} mV")
        elif f.accepted and f.rmse_V > 3 * med_noise:
            reason = f"noise {f.rmse_V / MV:.2f} mV, over 3× the others' {med_noise / MV:.2f} mV"
        out.append(replace(f, accepted=False, reject_reason=reason) if reason else f)
    return out


def apply_decisions(fits: list[SweepFit], settings: Settings) -> list[SweepFit]:
    """A person's accept/reject overrides the automatic tests."""
    out = []
    for f in fits:
        decision = settings.decision_for(f.index)
        if decision is None or f.step is None or (decision[0] and f.fit is None):
            out.append(f)
        else:
            accepted, reason = decision
            out.append(replace(f, accepted=accepted,
                               reject_reason=None if accepted else (reason or "rejected by hand")))
    return out


# --------------------------------------------------------------------------- cell level
@dataclass(frozen=True)
class SweepPool:
    """Accepted sweeps of one step timing, ready to be combined (and resampled).

    Under linearity sweep k is base_k + I_k·h(t); the least-squares h over a set of sweeps
    is Σ I_k (v_k − base_k) / Σ I_k². The combined response is shown and fitted as
    base + I_ref·h, scaled to the reference step I_ref (the largest hyperpolarizing step,
    else the largest step).
    """

    step: Step                  # timing of the pool, with amplitude I_ref
    indices: tuple[int, ...]
    currents: np.ndarray        # A, per sweep
    deflections: np.ndarray     # V, per sweep × sample, baseline removed
    base: float                 # V, mean baseline

    def combine(self, pick: np.ndarray | None = None) -> np.ndarray:
        """The combined response (V) of all sweeps, or of the sweeps at positions `pick`."""
        i = self.currents if pick is None else self.currents[pick]
        d = self.deflections if pick is None else self.deflections[pick]
        return self.base + self.step.amplitude_A * (i @ d) / (i @ i)


def sweep_pool(fits: list[SweepFit], voltages: dict[int, np.ndarray]) -> SweepPool | None:
    """The accepted sweeps of the most common step timing; None without any."""
    from collections import Counter

    used = [f for f in fits if f.accepted and f.step is not None]
    if not used:
        return None

    def timing(f: SweepFit) -> tuple:
        return (f.step.onset, f.step.offset, voltages[f.index].size)

    common = Counter(timing(f) for f in used).most_common(1)[0][0]
    members = [f for f in used if timing(f) == common]
    currents = np.array([f.step.amplitude_A for f in members])
    bases = np.array([f.v_rest_V for f in members])
    deflections = np.stack([f.corrected(voltages[f.index], members[0].step.sample_rate_hz)
                            for f in members]) - bases[:, None]
    i_ref = currents.min() if np.any(currents < 0) else currents.max()
    return SweepPool(replace(members[0].step, amplitude_A=float(i_ref)),
                     tuple(f.index for f in members), currents, deflections, float(bases.mean()))


def _average(step: Step, indices: list[int], v: np.ndarray, fs: float,
             settings: Settings) -> GroupAverage:
    w = settings.windows_for(indices[0])
    guess = resolve_windows(step, v.size, fs, w, MIN_FIT_START_S)
    b0, b1 = (_index(t, fs, v.size) for t in guess["baseline"])
    v_base = steady.robust_level(v[b0:b1])
    if settings.fit_start_ms is not None:
        start = settings.fit_start_ms * MS
    else:
        edge = step.onset if step.kind == "step" else step.offset
        start = artefact_end_s(v, edge, fs, steady.noise_sd(v[b0:b1]))
    wins = resolve_windows(step, v.size, fs, w, start)
    return GroupAverage(step, tuple(indices), v, v_base, wins)


def fit_average(g: GroupAverage, fs: float, components: str, tau_init=None,
                choice: dict | None = None):
    """Fit the combined response's transients with shared time constants.

    Returns the fit and `g` with its segment records filled in; `choice` receives the
    record of how many components were chosen and why ("auto").
    """
    segs, records = _segments(g.v_V, fs, g.step, g.windows_s)
    if not segs:
        raise ValueError("no fit window holds enough samples")
    return _fit(segs, components, tau_init, choice=choice), replace(g, segments=records)


def _onset_amplitudes(fit, g: GroupAverage) -> tuple[float, ...]:
    """Response-direction amplitudes of the group's first transient (charging, or decay)."""
    return _response_amplitudes(fit, g.segments[0].index, g.step.kind)


def _percentile_halfwidth(samples: np.ndarray) -> float | None:
    """95 % CI half-width from bootstrap samples (None with fewer than 10).

    Half the central 95 % range with 40 or more samples; 1.96 sd with fewer, where the
    extreme percentiles are too rough.
    """
    samples = samples[np.isfinite(samples)]
    if samples.size < 10:
        return None
    if samples.size < 40:
        return float(1.96 * np.std(samples, ddof=1))
    lo, hi = np.percentile(samples, [2.5, 97.5])
    return float((hi - lo) / 2)


CABLE_BOOTSTRAP = 12


def _baseline(v: np.ndarray, g: GroupAverage, fs: float) -> float:
    """Baseline level (V) of `v` in the baseline window of `g`."""
    a, b = (_index(t, fs, v.size) for t in g.windows_s["baseline"])
    return steady.robust_level(v[a:b])


def _bootstrap(pool: SweepPool, g: GroupAverage, fs: float, fit, n_boot: int,
               cable: tuple | None = None, seed: int = 0) -> dict[str, np.ndarray]:
    """Cell values refitted on sweeps resampled with replacement.

    `cable` = (combined response with the cable-fit windows, BallStickFit, delay in s)
    adds the ball-and-stick values for the first CABLE_BOOTSTRAP resamples (each such fit
    costs ~10 ms); a resample whose fit fails, or is not refitted, gives NaN there.
    """
    rng = np.random.default_rng(seed)
    n = len(fit.taus)
    out: dict[str, list[float]] = {k: [] for k in ("tau0", "tau1", "tau1_model", "L", "rho",
                                                   "bridge")}
    for _ in range(n_boot):
        pick = rng.integers(0, len(pool.indices), len(pool.indices))
        if np.all(pool.currents[pick] == 0):
            continue
        v = pool.combine(pick)
        try:
            boot, _ = fit_average(replace(g, v_V=v), fs, str(n), tau_init=fit.taus)
        except (ValueError, np.linalg.LinAlgError, RuntimeError):
            continue
        if not boot.success:
            continue
        out["tau0"].append(boot.taus[0])
        out["tau1"].append(boot.taus[1] if n > 1 else np.nan)
        bs = bridge = None
        if cable is not None and len(out["tau0"]) <= CABLE_BOOTSTRAP:
            g_cable, bs0, delay = cable
            bs = fit_cable(replace(g_cable, v_V=v), fs, (bs0.tau0_s, bs0.L, bs0.rho), delay,
                           None)
            bridge = _bridge(bs, replace(g_cable, v_base_V=_baseline(v, g_cable, fs)))
        out["tau1_model"].append(bs.taus_s[1] if bs else np.nan)
        out["L"].append(bs.L if bs else np.nan)
        out["rho"].append(bs.rho if bs else np.nan)
        out["bridge"].append(np.nan if bridge is None else bridge)
    return {k: np.asarray(v, dtype=float) for k, v in out.items()}


def fit_start_scan(g: GroupAverage, fs: float, n_components: int, tau_init,
                   n_starts: int = 10, span_s: float = 4e-3) -> dict:
    """τ0 and τ1 refitted from a series of later fit starts (for the plateau check)."""
    edges = {"fit": g.step.onset_s, "fit_off": g.step.offset_s}  # as in _segments
    starts = g.fit_start_s + np.linspace(0.0, span_s, n_starts)
    rows = []
    for s0 in starts:
        wins = dict(g.windows_s)
        for name in edges.keys() & wins.keys():
            wins[name] = (edges[name] + s0, wins[name][1])
        try:
            fit, _ = fit_average(replace(g, windows_s=wins), fs, str(n_components), tau_init)
            taus = list(fit.taus) + [np.nan] * 2
            ci = list(fit.tau_ci95) + [np.nan] * 2
            rows.append((s0, taus[0], ci[0], taus[1], ci[1]))
        except (ValueError, np.linalg.LinAlgError, RuntimeError):
            rows.append((s0, np.nan, np.nan, np.nan, np.nan))
    a = np.array(rows)
    return {"start_s": a[:, 0], "tau0_s": a[:, 1], "tau0_ci95_s": a[:, 2],
            "tau1_s": a[:, 3], "tau1_ci95_s": a[:, 4]}


# --------------------------------------------------------------------------- the analysis
def analyze(recording: Recording, settings: Settings | None = None) -> RecordingResult:
    """Fit every sweep and the cell; the one entry point for CLI, GUI, batch and tests."""
    settings = settings or Settings()
    fs = recording.sample_rate_hz
    steps = sweep_steps(recording, settings)
    chosen = [(s, st) for s, st in zip(recording.sweeps, steps, strict=True)
              if settings.sweeps is None or s.index in settings.sweeps]
    if not chosen:
        raise LoadError(recording.path, f"none of the sweeps {list(settings.sweeps or [])} exist; "
                        f"the file has sweeps 0-{len(recording.sweeps) - 1}")
    voltages = {s.index: s.voltage for s, _ in chosen}

    screened = [baseline_only(s.voltage, st, s.index, fs, settings) for s, st in chosen]
    start, tau_init = first_look(screened, voltages, fs, settings)
    effective = settings if start is None else replace(settings, fit_start_ms=start / MS)
    fits = [analyze_sweep(s.voltage, st, s.index, fs, effective, tau_init) for s, st in chosen]
    fits = apply_decisions(reject_outliers(fits), effective)
    delay = bessel_delay_s(settings.filter_hz or _metadata_float(recording, "filter_hz"))
    cell, extras = summarize_cell(fits, voltages, fs, effective, settings, delay)
    if extras.get("average") is not None:
        cell["fit_start_ms"] = _num(extras["average"].fit_start_s, MS, 4)
    flags = tuple(extras.pop("flags"))
    return RecordingResult(
        source={"path": recording.path, "sha256": recording.sha256, "format": recording.format,
                "sweep_count": len(recording.sweeps)},
        settings=settings, sweeps=tuple(fits), cell=CellResult(cell), flags=flags,
        effective_settings=effective, **extras)


def _metadata_float(recording: Recording, key: str) -> float | None:
    try:
        value = float(recording.metadata.get(key))
    except (TypeError, ValueError):
        return None
    return value if np.isfinite(value) and value > 0 else None


def bessel_delay_s(filter_hz: float | None) -> float:
    """Group delay of a 4-pole Bessel low-pass at low frequency, 0.336/fc, in s (0 if None).

    From memory (textbook value for the 4-pole Bessel's normalised group delay,
    0.3363/fc with fc the −3 dB corner).
    """
    return 0.0 if not filter_hz else 0.336 / filter_hz


#: The fit starts this many τ1 after the edge, where τ2, τ3 … have decayed enough that two
#: exponentials describe the transient: bias of τ1 ≈ −1.4 % at 0.78 τ1 for a ball-and-stick
#: with L = 1, ρ = 5 behind a 5 kHz Bessel filter (noiseless, benchmarks/bench_fit.py).
START_TAU1 = 0.8


def first_look(screened: list[SweepFit], voltages: dict[int, np.ndarray], fs: float,
               settings: Settings) -> tuple[float | None, tuple[float, ...] | None]:
    """Fit start (s after the edge, None = as set) and start values for the sweep fits.

    A first fit of all sweeps combined, from the end of the artefact, gives τ1; for steps
    the automatic start moves to START_TAU1·τ1 when that is later (capped at 5 ms).
    """
    pool = sweep_pool(screened, voltages)
    if pool is None:
        return None, None
    avg = _average(pool.step, list(pool.indices), pool.combine(), fs, settings)
    try:
        fit, avg = fit_average(avg, fs, settings.components)
    except (ValueError, np.linalg.LinAlgError, RuntimeError):
        return None, None
    if not fit.success:
        return None, None
    taus = tuple(float(t) for t in fit.taus)
    if settings.fit_start_ms is not None or pool.step.kind == "pulse" or len(taus) < 2:
        return None, taus  # pulses weight τ1 strongly: fit from the artefact on
    artefact = avg.fit_start_s
    return float(np.clip(START_TAU1 * taus[1], artefact, 5e-3)), taus


def _empty_cell() -> dict:
    return dict.fromkeys(CELL_KEYS)


def summarize_cell(fits: list[SweepFit], voltages: dict[int, np.ndarray], fs: float,
                   settings: Settings, asked: Settings | None = None,
                   delay_s: float = 0.0) -> tuple[dict, dict]:
    """Cell-level values (display units) and the arrays behind them.

    `settings` hold the fit start used for the exponential fits; the cable-model fit
    starts where the person `asked` (default: after the artefact) and shifts time zero
    by the filter delay `delay_s`. `fits` get the cell's bridge correction in place.
    """
    cell = _empty_cell()
    flags: list[Flag] = []
    used = [f for f in fits if f.accepted]
    cell["n_sweeps_used"] = len(used)
    extras: dict = {"flags": flags, "protocol": used[0].step.kind if used else "step"}
    if not used:
        flags.append(Flag("cell.no_sweeps", "no sweep was accepted; nothing to report"))
        return cell, extras
    if len(used) < 3:
        flags.append(Flag("cell.few_sweeps", "fewer than 3 sweeps accepted: averages are noisy "
                          "and no bootstrap CIs (number of sweeps)", len(used)))
    kind = extras["protocol"]
    cell["v_rest_mV"] = _num(np.mean([f.v_rest_V for f in used]), MV)
    pool = sweep_pool(fits, voltages)
    avg = _average(pool.step, list(pool.indices), pool.combine(), fs, settings)
    choice: dict = {}
    try:
        fit, avg = fit_average(avg, fs, settings.components, choice=choice)
        if not fit.success:
            raise ValueError(fit.message)
    except (ValueError, np.linalg.LinAlgError, RuntimeError) as exc:
        flags.append(Flag("fit.failed", f"the fit of the averaged sweeps failed: {exc}"))
        fit = None
    cell["components_reason"] = choice.get("reason", f"set to {settings.components}")
    avg_cable = _average(pool.step, list(pool.indices), avg.v_V, fs, asked or settings)
    bs = fit_cable(avg_cable, fs, cable_init(fit, pool.step), delay_s, flags) \
        if fit is not None else None
    extras.update(average=avg, cable_fit=bs, cell_fit=fit)
    boot = None
    if fit is not None and settings.bootstrap and len(pool.indices) >= 3:
        cable = None if bs is None else (avg_cable, bs, delay_s)
        boot = _bootstrap(pool, avg, fs, fit, settings.bootstrap, cable)
    cell["ci_method"] = "bootstrap over sweeps" if boot is not None else "fit covariance"
    _bridge_correction(fits, fit.taus if fit is not None else (), bs, avg, boot, settings,
                       cell, flags)
    used = [f for f in fits if f.accepted]
    _input_resistance(used, cell, extras, flags)
    _sag(used, cell, flags)
    if fit is None:
        return cell, extras
    _time_constants(cell, fit, bs, avg, boot, fs, flags)
    tau1 = cell["tau1_ms"] * MS if cell["tau1_ms"] is not None else None
    n = len(fit.taus)
    per_sweep_tau0 = [f.tau(0) for f in used if f.tau(0) is not None]
    if len(per_sweep_tau0) >= 3:
        spread = np.std(per_sweep_tau0, ddof=1) / np.sqrt(len(per_sweep_tau0))
        gap = abs(np.median(per_sweep_tau0) - fit.taus[0])
        if gap > max(3 * spread, 0.05 * fit.taus[0]):
            flags.append(Flag("cell.sweep_spread", "τ0 of the averaged sweeps differs from the "
                              "median of the single sweeps (ms)", gap / MS))
    _residual_structure(fit, avg, fs, flags)
    _onset_offset(avg, fs, n, fit, flags)
    extras["scan"] = fit_start_scan(avg, fs, n, fit.taus)
    if tau1 is not None:
        _scan_drift(extras["scan"], flags)
    extras["peel"] = _peel(avg, avg_cable, fs, fit, n)
    _cable(cell, fit, bs, avg, kind, tau1, boot, flags)
    if settings.area_um2 and cell["c_total_pF"]:
        from passivefit.core import cable

        cm, rm = cable.specific_membrane(cell["c_total_pF"] * PF, float(fit.taus[0]),
                                         settings.area_um2 * 1e-12)
        cell["cm_uF_per_cm2"] = _num(cm * 100, 1.0, 4)        # F/m² → µF/cm²
        cell["rm_kOhm_cm2"] = _num(rm * 10, 1.0, 4)           # Ω·m² → kΩ·cm²
    return cell, extras


def _time_constants(cell: dict, fit, bs, avg: GroupAverage, boot: dict | None, fs: float,
                    flags: list[Flag]) -> None:
    """τ0, τ1 (τ2) with CIs and the component amplitudes of the reference step."""
    n = len(fit.taus)
    cell["n_components"] = n
    cell["tau0_ms"] = _num(fit.taus[0], MS)
    hw = _percentile_halfwidth(boot["tau0"]) if boot is not None else None
    cell["tau0_ci95_ms"] = _num(hw if hw is not None else fit.tau_ci95[0], MS, 3)
    amps = _onset_amplitudes(fit, avg)
    cell["c0_mV"] = _num(amps[0], MV)
    cell["ref_step_pA"] = _num(avg.amplitude_A, PA, 5)
    if n >= 2:
        cell["c1_mV"] = _num(amps[1], MV)
        cell["tau1_exp_ms"] = _num(fit.taus[1], MS)
    if n >= 3:
        cell["tau2_ms"] = _num(fit.taus[2], MS)
    tau1, tau1_ci = _tau1(fit, bs, boot, cell)
    if tau1 is None:
        flags.append(Flag("fit.tau1_unresolved", "only one exponential component is resolved: "
                          "no τ1, so no electrotonic length"))
    elif _tau1_resolved(tau1, tau1_ci, fs, flags):
        cell["tau1_ms"], cell["tau1_ci95_ms"] = _num(tau1, MS), _num(tau1_ci, MS, 3)


def _bridge_correction(fits: list[SweepFit], fit_taus, bs, avg: GroupAverage,
                       boot: dict | None, settings: Settings, cell: dict,
                       flags: list[Flag]) -> None:
    """Estimate the bridge jump and, when it is real, take it out of every sweep's R_in.

    It is subtracted only when the exponential fit shows a second component, the
    ball-and-stick fit resolves L, and the jump is larger than its own 95 % CI from the
    bootstrap over sweeps (no bootstrap, no correction): an unresolved cable model cannot
    tell a bridge error from fast dendritic charging or noise.
    """
    bridge = _bridge(bs, avg)
    cell["bridge_MOhm"] = _num(bridge, MOHM, 4)
    if bridge is None:
        return
    ci = _percentile_halfwidth(boot["bridge"]) if boot is not None else None
    cell["bridge_ci95_MOhm"] = _num(ci, MOHM, 3)
    L_ci, _ = _cable_cis(bs, boot)
    resolved = ci is not None and len(fit_taus) >= 2 and L_ci < bs.L and abs(bridge) > ci
    if not resolved:
        if abs(bridge) > 5 * MOHM:
            flags.append(Flag("cell.bridge_uncertain", "the jump at the step edge cannot be "
                              "told apart from fast charging or noise; R_in is not corrected "
                              "for it (MΩ)", bridge / MOHM))
        return
    if abs(bridge) > 5 * MOHM:
        what = "subtracted from" if settings.correct_bridge else "left in"
        flags.append(Flag("cell.bridge", f"an instantaneous jump at the step edge shows a bridge "
                          f"imbalance; it is {what} R_in (MΩ)", bridge / MOHM))
    if settings.correct_bridge:
        fits[:] = [_corrected(f, bridge) for f in fits]


def cable_init(exp_fit, step: Step) -> tuple[float, float, float] | None:
    """Start values (τ0, L, ρ) for the ball-and-stick fit from an exponential fit."""
    from passivefit.core import cablefit

    if exp_fit is None or len(exp_fit.taus) < 2:
        return None
    amps = _response_amplitudes(exp_fit, 0, step.kind)  # segment 0: the first transient
    kind = "step" if step.kind == "step" else "square"
    try:
        return cablefit.initial_guess(exp_fit.taus[0], exp_fit.taus[1], amps[1] / amps[0],
                                      kind, None if kind == "step" else step.duration_s)
    except ValueError:
        return None


def fit_cable(avg: GroupAverage, fs: float, init, delay_s: float, flags: list[Flag] | None):
    """Ball-and-stick fit of the combined response (core.cablefit); None if it fails."""
    from passivefit.core import cablefit

    fit_segs, records = _segments(avg.v_V, fs, avg.step, avg.windows_s)
    segs = [cablefit.CableSegment(
        seg.t, seg.y, seg.weight, kind="charge" if rec.charging else "decay", group=0,
        duration_s=None if rec.charging else avg.step.duration_s, sample_interval_s=1 / fs)
        for seg, rec in zip(fit_segs, records, strict=True)]
    if not segs:
        return None
    try:
        bs = cablefit.fit_ballstick(segs, init=init, delay_s=delay_s)
    except (ValueError, np.linalg.LinAlgError, RuntimeError) as exc:
        bs, problem = None, f"the ball-and-stick fit failed: {exc}"
    else:
        problem = None if bs.success else f"the ball-and-stick fit did not converge: {bs.message}"
    if problem:
        if flags is not None:
            flags.append(Flag("cable.fit_failed", problem))
        return None
    return bs


def _bridge(bs, avg: GroupAverage) -> float | None:
    """Bridge imbalance (Ω): the jump at the step onset that is not membrane charging.

    From the ball-and-stick fit, whose modes sum to the whole membrane response (free
    exponentials extrapolated to the edge miss the fast components); None without it.
    """
    if bs is None or avg.step.kind != "step":
        return None
    return bs.bridge_jump_V(0, avg.v_base_V) / avg.amplitude_A


def _corrected(f: SweepFit, bridge: float) -> SweepFit:
    """The sweep with the bridge jump taken out of its deflection and R_in."""
    if f.dv_ss_V is None:
        return f
    dv = f.dv_ss_V - bridge * f.step.amplitude_A
    return replace(f, dv_ss_V=dv, r_in_ohm=dv / f.step.amplitude_A)


def _tau1(fit, bs, boot: dict | None, cell: dict) -> tuple[float | None, float | None]:
    """τ1 and its 95 % CI half-width (s), from the ball-and-stick fit when there is one.

    The ball-and-stick fit uses the early transient with every equalizing mode in it, so
    its τ1 is far more precise than two free exponentials fitted late enough to be free
    of τ2, τ3 … (benchmarks/bench_cell.py); without it, the exponential fit's τ1.
    """
    if len(fit.taus) < 2:
        return None, None  # the data show no second component: no τ1 from any model
    if bs is not None:
        cell["tau1_source"] = "ball-and-stick fit"
        hw = _percentile_halfwidth(boot["tau1_model"]) if boot is not None else None
        return float(bs.taus_s[1]), max(hw or 0.0, _model_tau1_ci(bs))
    cell["tau1_source"] = "exponential fit"
    hw = _percentile_halfwidth(boot["tau1"]) if boot is not None else None
    return float(fit.taus[1]), hw if hw is not None else float(fit.tau_ci95[1])


def _model_tau1_ci(bs) -> float:
    """95 % CI half-width of the model τ1 = τ0/(1 + α1²), propagated from the CIs of τ0,
    L and ρ (correlations ignored)."""
    from passivefit.core import cable

    def tau1(tau0: float, L: float, rho: float) -> float:
        return tau0 / (1 + cable.ballstick_alphas(L, rho, 1)[0] ** 2)

    x = np.array([bs.tau0_s, bs.L, bs.rho])
    ci = np.array([bs.tau0_ci95_s, bs.L_ci95, bs.rho_ci95])
    base = tau1(*x)
    parts = []
    for k in range(3):
        h = 1e-4 * x[k]
        moved = x.copy()
        moved[k] += h
        parts.append((tau1(*moved) - base) / h * ci[k])
    return float(np.sqrt(np.sum(np.square(parts))))


def _tau1_resolved(tau1: float, ci: float | None, fs: float, flags: list[Flag]) -> bool:
    if tau1 < 3 / fs:
        flags.append(Flag("fit.tau1_unresolved", "τ1 is shorter than 3 sampling intervals: "
                          "not resolved (ms)", tau1 / MS))
        return False
    if ci is None or not np.isfinite(ci) or ci > tau1:
        flags.append(Flag("fit.tau1_unresolved", "the 95 % CI of τ1 is wider than τ1 itself: "
                          "not resolved (ms)", tau1 / MS))
        return False
    return True


def _input_resistance(used: list[SweepFit], cell: dict, extras: dict, flags: list[Flag]) -> None:
    pts = [(f.step.amplitude_A, f.dv_ss_V) for f in used if f.dv_ss_V is not None]
    if not pts:
        flags.append(Flag("cell.no_steady_state", "brief pulses reach no steady state: R_in is "
                          "not measured"))
        return
    i, dv = (np.array(x) for x in zip(*pts, strict=True))
    fitline = steady.vi_slope(i, dv)
    extras["vi"] = {"current_A": i, "dv_V": dv, "slope": fitline}
    if fitline is not None:
        cell["r_in_MOhm"] = _num(fitline.slope_ohm, MOHM)
        cell["r_in_method"] = "V-I slope"
        cell["vi_r2"] = _num(fitline.r2, 1.0, 5)
        if fitline.r2 < 0.98 or fitline.curvature > 0.15:
            flags.append(Flag("vi.nonlinear", "the V–I relation is not straight over the step "
                              "range (relative change of slope)", fitline.curvature))
    else:
        cell["r_in_MOhm"] = _num(np.sum(dv * i) / np.sum(i * i), MOHM)
        cell["r_in_method"] = "mean step"
    neg, pos = dv[i < 0] / i[i < 0], dv[i > 0] / i[i > 0]
    if neg.size and pos.size:
        asym = abs(neg.mean() - pos.mean()) / abs(np.mean(dv / i))
        cell["r_in_asymmetry"] = _num(asym, 1.0, 3)
        if asym > 0.1:
            flags.append(Flag("cell.asymmetric", "depolarizing and hyperpolarizing steps give R_in "
                              "that differ: the responses are not linear (relative difference)",
                              asym))


def _residual_structure(fit, avg: GroupAverage, fs: float, flags: list[Flag]) -> None:
    """Runs test on 0.5-ms bin means of the residuals (bins make filtered noise independent)."""
    width = max(1, int(0.5e-3 * fs))
    resid = []
    for seg in avg.segments:
        r = residual(avg.v_V, fit, seg, fs)[1]
        m = r.size // width * width
        resid.append(r[:m].reshape(-1, width).mean(axis=1))
    z = runs_test_z(np.concatenate(resid)) if resid else 0.0
    if z < -4:
        flags.append(Flag("fit.residual_structure", "the residuals keep their sign too long: the "
                          "model misses part of the transient (runs-test z)", z))


def _onset_offset(g: GroupAverage, fs: float, n: int, fit, flags: list[Flag]) -> None:
    """Compare τ0 of the charging and the decay transient fitted apart."""
    if g.step.kind != "step" or len(g.segments) < 2:
        return
    taus = []
    for name in ("fit", "fit_off"):
        other = "fit_off" if name == "fit" else "fit"
        wins = {k: v for k, v in g.windows_s.items() if k != other}
        try:
            part, _ = fit_average(replace(g, windows_s=wins), fs, str(n), fit.taus)
            taus.append((part.taus[0], part.tau_ci95[0]))
        except (ValueError, np.linalg.LinAlgError, RuntimeError):
            return
    (t_on, ci_on), (t_off, ci_off) = taus
    diff = abs(t_on - t_off) / fit.taus[0]
    if diff > 0.1 and abs(t_on - t_off) > np.hypot(ci_on, ci_off):
        flags.append(Flag("fit.onset_offset", "τ0 of the charging and of the decay transient "
                          "disagree (relative difference)", diff))


def _scan_drift(scan: dict, flags: list[Flag]) -> None:
    tau1 = scan["tau1_s"]
    later = np.flatnonzero(scan["start_s"] - scan["start_s"][0] >= 1e-3)
    if later.size and np.isfinite(tau1[0]) and np.isfinite(tau1[later[0]]):
        drift = (tau1[later[0]] - tau1[0]) / tau1[0]
        if abs(drift) > 0.1:
            flags.append(Flag("fit.tau1_drift", "τ1 still changes when the fit starts 1 ms later: "
                              "early artefact or unresolved faster components (relative change)",
                              drift))


def _peel(g: GroupAverage, early: GroupAverage, fs: float, fit, n: int):
    """Automated peel of the first transient, from the early (artefact-end) fit start so
    the fast components are in view; its asymptote from the exponential fit."""
    from passivefit.core import peel

    seg = g.segments[0]
    name = "fit" if g.step.kind == "step" else "fit_off"
    a, b = (_index(t, fs, g.v_V.size) for t in early.windows_s[name])
    t = np.arange(a, b) / fs - seg.edge_s
    try:
        # the first line from 10 % of its span, ending 5 noise sds above the floor: the log
        # of a remainder near the noise is biased, which tilts τ0 and then spoils τ1
        return peel.peel(t, g.v_V[a:b], float(fit.offsets[seg.index]), n_components=max(2, n),
                         snr=5.0, late_start=0.1)
    except (ValueError, np.linalg.LinAlgError):
        return None


def _sag(used: list[SweepFit], cell: dict, flags: list[Flag]) -> None:
    hyper = [f for f in used if f.sag is not None and f.step.amplitude_A < 0]
    if not hyper:
        return
    most = min(f.step.amplitude_A for f in hyper)
    ratio = float(np.mean([f.sag for f in hyper if f.step.amplitude_A == most]))
    cell["sag_ratio"] = _num(ratio, 1.0, 4)
    if ratio < 0.95:
        flags.append(Flag("cell.sag", "the voltage sags back during hyperpolarizing steps "
                          "(an active, e.g. h-type, conductance): the cell is not passive "
                          "(steady/peak ratio)", ratio))


def _cable_cis(bs, boot: dict | None) -> tuple[float, float]:
    """95 % CI half-widths of L and ρ: the larger of the bootstrap (few resamples) and the
    fit-covariance ones."""
    L_ci = _percentile_halfwidth(boot["L"]) if boot is not None else None
    rho_ci = _percentile_halfwidth(boot["rho"]) if boot is not None else None
    return max(L_ci or 0.0, bs.L_ci95), max(rho_ci or 0.0, bs.rho_ci95)


def _rho_cross_check(cell: dict, bs, v_inf: float, flags: list[Flag]) -> None:
    """ρ from the amplitudes (steady deflection vs B0, REFERENCES.md §2) against the fit's ρ."""
    from passivefit.core import cable

    try:
        rho_amp = cable.rho_from_amplitudes_step(v_inf, float(bs.b0_V[0]), bs.L)
    except cable.CableFitError as exc:
        flags.append(Flag("cable.rho_mismatch", str(exc)))
        return
    cell["rho_amplitude"] = _num(rho_amp, 1.0, 4)
    if not 0.5 < rho_amp / bs.rho < 2.0:
        flags.append(Flag("cable.rho_mismatch", "ρ from the amplitudes and ρ from the time "
                          "course disagree by more than 2×: the cell is not a uniform "
                          "ball-and-stick (ρ from amplitudes)", rho_amp))


def _cable(cell: dict, fit, bs, g: GroupAverage, kind: str, tau1: float | None,
           boot: dict | None, flags: list[Flag]) -> None:
    """Equivalent cylinder (exponential fit), ball-and-stick and capacitance (cable fit)."""
    from passivefit.core import cable

    tau0 = float(fit.taus[0])
    step = g.step
    r_in = cell["r_in_MOhm"] * MOHM if cell["r_in_MOhm"] and cell["r_in_MOhm"] > 0 else None
    if r_in:
        cell["c_tau_pF"] = _num(cable.c_tau(tau0, r_in), PF, 5)
    if bs is not None:
        L_ci, rho_ci = _cable_cis(bs, boot)
        for key, value, ci in (("L_bs", bs.L, L_ci), ("rho", bs.rho, rho_ci)):
            ci_key = "L_ci95" if key == "L_bs" else "rho_ci95"
            if ci < value:
                cell[key], cell[ci_key] = _num(value, 1.0, 5), _num(ci, 1.0, 3)
            else:
                flags.append(Flag(f"cable.{key}_unresolved", f"the 95 % CI of {key} is wider "
                                  "than the value itself: not resolved", value))
        cell["tau0_model_ms"] = _num(bs.tau0_s, MS)
        cell["c_total_pF"] = _num(bs.c_total_F(0, step.amplitude_A), PF, 5)
        if kind == "step" and r_in:
            _rho_cross_check(cell, bs, r_in * step.amplitude_A, flags)
    elif kind == "step":  # no cable fit: I·τ0/B0 of the exponential fit (REFERENCES.md §3)
        c0 = _onset_amplitudes(fit, g)[0]
        if c0 * step.amplitude_A > 0:
            cell["c_total_pF"] = _num(cable.c_total_step(step.amplitude_A, tau0, c0), PF, 5)
    if cell["c_tau_pF"] and cell["c_total_pF"]:
        cell["c_ratio"] = _num(cell["c_tau_pF"] / cell["c_total_pF"], 1.0, 4)
    if tau1 is None:
        return
    cell["L_cyl"] = _num(cable.cylinder_L(tau0, tau1), 1.0, 5)
    pairs = None if boot is None else zip(
        boot["tau0"], boot["tau1_model" if bs is not None else "tau1"], strict=True)
    cyl_ci = None if pairs is None else _percentile_halfwidth(np.array(
        [cable.cylinder_L(t0, t1) if 0 < t1 < t0 else np.nan for t0, t1 in pairs]))
    cell["L_cyl_ci95"] = _num(cyl_ci, 1.0, 3)
    # amplitude ratios of free exponentials are trustworthy only with τ2 fitted as well
    ratios = {}
    if len(fit.taus) >= 3:
        amps = _onset_amplitudes(fit, g)
        t0, t1 = float(fit.taus[0]), float(fit.taus[1])
        ratios = {"b1_over_b0": amps[1] / amps[0]} if kind == "step" else {
            "c1_over_c0": amps[1] / amps[0] / cable.square_pulse_factor(t0, t1, step.duration_s)}
    tau2 = float(fit.taus[2]) if len(fit.taus) > 2 else None
    flags.extend(cable.plausibility_flags(tau0=tau0, tau1=tau1, tau2=tau2, **ratios,
                                          L=bs.L if bs else None, rho=bs.rho if bs else None))
