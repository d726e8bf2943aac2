"""Independent, transparent passive estimates for the real recordings in tests/data/real/.

Independent transparent estimate, common practice, no source: baseline and steady-state
means, ΔV/ΔI, sag from the peak and steady deflections, and a single-exponential fit of the
early charging curve. Deliberately written WITHOUT importing anything from passivefit (only
pyabf, numpy and scipy.optimize.curve_fit), so that tests can hold passivefit's answers
against numbers that do not come from the code under test.

The protocol facts (which channel is Vm, when the step starts and how long it lasts, the
amplitude of each sweep, which sweeps are hyperpolarizing from rest and do not fire) were
determined by hand, by reading the headers and looking at plots of the sweeps; each entry
below says how. Nothing here detects a step: the facts are data.

Units: times in ms, voltages in mV, currents in pA, resistances in MΩ (as a physiologist
reads them; these numbers are compared at the edge, not fed to passivefit).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyabf
from scipy.optimize import curve_fit

DATA_DIR = Path(__file__).resolve().parent / "data" / "real"


@dataclass(frozen=True)
class StepFacts:
    """Hand-determined protocol facts of one current-clamp step file.

    Attributes
    ----------
    file : str
        File name in tests/data/real/.
    vm_channel : int
        ADC channel index holding the membrane potential (mV).
    onset_ms : float
        Time of the analysed step's onset from the sweep start (ms), same in every sweep.
    duration_ms : float
        Length of the analysed step (ms).
    amplitudes_pA : tuple of float
        Step amplitude of each sweep relative to the level before it (pA).
    passive_sweeps : tuple of int
        Sweeps whose analysed step is hyperpolarizing, from rest, and do not fire.
    rin_sweeps : tuple of int
        The smallest hyperpolarizing steps among `passive_sweeps`, used for R_in.
    sagging : bool
        True if the cell shows a clear sag: the τ fit then ends at the voltage minimum;
        otherwise it ends at about 5 τ.
    baseline_ms : float
        Length of the baseline window that ends 0.5 ms before onset (ms).
    """

    file: str
    vm_channel: int
    onset_ms: float
    duration_ms: float
    amplitudes_pA: tuple[float, ...]
    passive_sweeps: tuple[int, ...]
    rin_sweeps: tuple[int, ...]
    sagging: bool
    baseline_ms: float


# --- protocol facts, determined by hand ---------------------------------------------------
# In ABF 2 files the epoch table sits in abf._epochPerDacSection (fEpochInitLevel,
# fEpochLevelInc, lEpochInitDuration); the first epoch starts after the 1/64-sweep
# pre-holding period. None of these files has a user list enabled (abf._userListSection
# empty / nULEnable all 0), so the linear series pyabf draws is what was played.

FACTS: dict[str, StepFacts] = {
    # ABF 2, one channel 'IN 0' (mV), 17 sweeps x 3 s at 20 kHz, no recorded current.
    # Epoch table (DAC 0): A 2000 samples at 0; B 10000 samples at -100 pA + 25 pA/sweep;
    # C 10000 at 0; D 10000 at -100 pA fixed; E 10000 at -100 + 25 pA/sweep.
    # Pre-holding 60000/64 = 937 samples, so B starts at sample 2937 = 146.85 ms and lasts
    # 500 ms. Only the first (variable) step is analysed here; D (1146.85-1646.85 ms) is a
    # second, fixed step, and E follows D at once. Sweeps 0-3 (-100, -75, -50, -25 pA) are
    # hyperpolarizing and fire no spike (max V < -10 mV in the whole sweep, checked);
    # sweep 4 is 0 pA; 5-16 depolarize and fire from sweep 6 (+50 pA) on. Clear sag
    # (Ih) on the -100 and -75 pA steps (plots), so τ is fitted up to the minimum.
    "171116sh_0018": StepFacts(
        file="171116sh_0018.abf",
        vm_channel=0,
        onset_ms=146.85,
        duration_ms=500.0,
        amplitudes_pA=tuple(-100.0 + 25.0 * k for k in range(17)),
        passive_sweeps=(0, 1, 2, 3),
        rin_sweeps=(2, 3),
        sagging=True,
        baseline_ms=100.0,
    ),
    # ABF 2, one channel 'IN 0' (mV), 30 sweeps x 1.5 s at 20 kHz, no recorded current.
    # Epoch table: A 6000 samples at -100 pA (no increment); B 10000 at 0; C 10000 at
    # 0 + 10 pA/sweep. Pre-holding 30000/64 = 468 samples, so the -100 pA step starts at
    # 23.4 ms (only 23.4 ms of baseline before it) and lasts 300 ms, in every sweep. The
    # later variable step (823.4-1323.4 ms) fires in later sweeps, but that comes after
    # the analysed step in the same sweep, so every sweep's first step is usable. No sag
    # visible (plots); small instantaneous jumps at both edges (bridge not fully
    # balanced), skipped by starting the fit 1 ms after onset.
    "18711001": StepFacts(
        file="18711001.abf",
        vm_channel=0,
        onset_ms=23.4,
        duration_ms=300.0,
        amplitudes_pA=(-100.0,) * 30,
        passive_sweeps=tuple(range(30)),
        rin_sweeps=tuple(range(30)),
        sagging=False,
        baseline_ms=20.0,
    ),
    # ABF 2, one channel named '_Ipatch' whose units are mV (it is the membrane
    # potential), 9 sweeps x 1 s at 20 kHz, no recorded current. Epoch table: A 4000
    # samples at 0; B 10000 at -100 pA + 50 pA/sweep; C 4000 at 0. Pre-holding
    # 20000/64 = 312 samples, so B starts at sample 4312 = 215.6 ms and lasts 500 ms.
    # Sweeps 0, 1 (-100, -50 pA) hyperpolarize and do not fire; 2 is 0 pA; spikes from
    # sweep 6 (+200 pA) on. Spontaneous synaptic events ride on all sweeps (plots); no
    # Ih sag: the apparent sag ratio comes from events in the steady window. Both
    # hyperpolarizing sweeps give R_in (only two exist).
    "File_axon_5": StepFacts(
        file="File_axon_5.abf",
        vm_channel=0,
        onset_ms=215.6,
        duration_ms=500.0,
        amplitudes_pA=tuple(-100.0 + 50.0 * k for k in range(9)),
        passive_sweeps=(0, 1),
        rin_sweeps=(0, 1),
        sagging=False,
        baseline_ms=100.0,
    ),
    # ABF 1.8, two channels: 'IN 0' (mV) is Vm; 'IN 2', also labelled mV, is a scaled
    # copy of the command current (flat -0.010 at 0 pA, steps of 0.030 per 60 pA in
    # step with the epoch table: plots), not a membrane potential. 10 sweeps x 3.064 s
    # at 10 kHz (fADCSampleInterval 50 us x 2 channels). ABF 1 epoch table
    # (abf._headerV1): A 10000 samples at 0; B 10000 at -120 pA + 60 pA/sweep.
    # Pre-holding 30640/64 = 478 samples, so B starts at sample 10478 = 1047.8 ms and
    # lasts 1000 ms. Sweeps 0, 1 (-120, -60 pA) hyperpolarize, no spikes; sweep 2 is 0;
    # spikes from sweep 4 (+120 pA). Little or no sag (plots). Both hyperpolarizing
    # sweeps give R_in (only two exist).
    "190619B_0003": StepFacts(
        file="190619B_0003.abf",
        vm_channel=0,
        onset_ms=1047.8,
        duration_ms=1000.0,
        amplitudes_pA=tuple(-120.0 + 60.0 * k for k in range(10)),
        passive_sweeps=(0, 1),
        rin_sweeps=(0, 1),
        sagging=False,
        baseline_ms=200.0,
    ),
    # ABF 2, one 10 s sweep at 25 kHz: channel 0 'Imemb' (nA) is the recorded current,
    # channel 1 '10_Vm' (mV) the voltage. DAC 1 epoch table: 2344 samples at 0, then
    # 6250 at -0.05 nA; pre-holding 250000/64 = 3906, so the test pulse runs from sample
    # 6250 = 250 ms for 250 ms. Amplitude from the recorded current (witness): mean of
    # ch 0 over 300-499.5 ms minus mean over 150-249.5 ms = 0.02903 - 0.07915 nA
    # = -50.1 pA (on a +79 pA offset). The 15-pulse 2.5 nA train from 1000 ms fires and
    # is not analysed. No sag (plots).
    "18425108": StepFacts(
        file="18425108.abf",
        vm_channel=1,
        onset_ms=250.0,
        duration_ms=250.0,
        amplitudes_pA=(-50.1,),
        passive_sweeps=(0,),
        rin_sweeps=(0,),
        sagging=False,
        baseline_ms=100.0,
    ),
}

FIT_START_MS = 1.0  # skip the electrode / bridge artifact right after onset
SPIKE_MV = -10.0  # a sweep "fires" if V exceeds this within the step or its tail
TAIL_MS = 300.0  # tail after the step end searched for spikes / rebound
SMOOTH_MS = 1.0  # boxcar used only to locate the voltage minimum (peak of the sag)


@dataclass(frozen=True)
class SweepEstimate:
    """Per-sweep measurements of one step (mV, pA, MΩ, ms).

    ``sag_ratio`` = (V_ss - V_peak) / (V_base - V_peak) for a hyperpolarizing step: 0 = no
    sag, 0.2 = the steady deflection is 20 % smaller than the peak one. ``rebound_mV`` is
    the largest rise above baseline (1 ms boxcar) in the 300 ms after the step. ``tau_ms`` is
    fitted over [fit_start_ms, fit_end_ms], ``tau_early_ms`` over its first half (how much τ
    depends on the window); ``t63_ms`` is the time from onset until the 1 ms boxcar first
    reaches 63 % of the steady deflection (no fit at all). τs, t63 and the window are NaN
    when the fit fails or the step is not hyperpolarizing.
    """

    sweep: int
    amplitude_pA: float
    baseline_mV: float
    steady_mV: float
    delta_v_mV: float
    r_in_MOhm: float
    peak_mV: float
    sag_ratio: float
    rebound_mV: float
    fired: bool
    tau_ms: float
    tau_early_ms: float
    t63_ms: float
    fit_start_ms: float
    fit_end_ms: float


@dataclass(frozen=True)
class Spread:
    """Median and range of one quantity over the sweeps used."""

    median: float
    low: float
    high: float
    n: int


@dataclass(frozen=True)
class FileSummary:
    """Per-file summary over the usable sweeps: V_rest (mV), R_in (MΩ), τ0 (ms), sag."""

    file: str
    v_rest_mV: Spread
    r_in_MOhm: Spread
    tau0_ms: Spread
    sag_ratio: Spread
    passive_sweeps: tuple[int, ...]
    rin_sweeps: tuple[int, ...]


def load_vm(name: str, sweep: int) -> tuple[np.ndarray, np.ndarray]:
    """Time (ms) and membrane potential (mV) of one sweep, from the hand-chosen channel."""
    facts = FACTS[name]
    abf = pyabf.ABF(str(DATA_DIR / facts.file))
    abf.setSweep(sweep, channel=facts.vm_channel)
    return np.asarray(abf.sweepX, float) * 1e3, np.asarray(abf.sweepY, float)


def _mean(t: np.ndarray, v: np.ndarray, start_ms: float, stop_ms: float) -> float:
    sel = (t >= start_ms) & (t < stop_ms)
    return float(np.mean(v[sel]))


def _charging(t: np.ndarray, v_inf: float, amp: float, tau: float) -> np.ndarray:
    return v_inf + amp * np.exp(-t / tau)


def fit_tau(t: np.ndarray, v: np.ndarray, start_ms: float, end_ms: float) -> float:
    """τ (ms) of a single exponential V = V∞ + A·exp(-(t - start)/τ) fitted by curve_fit.

    Independent transparent estimate, common practice, no source.
    """
    sel = (t >= start_ms) & (t <= end_ms)
    x, y = t[sel] - start_ms, v[sel]
    if x.size < 10:
        return float("nan")
    v_inf0 = float(np.mean(y[-max(3, y.size // 20):]))
    p0 = (v_inf0, float(y[0]) - v_inf0, max((end_ms - start_ms) / 4.0, 0.5))
    try:
        popt, _ = curve_fit(_charging, x, y, p0=p0, maxfev=5000,
                            bounds=([-200.0, -200.0, 0.05], [100.0, 200.0, 5000.0]))
    except (RuntimeError, ValueError):
        return float("nan")
    return float(popt[2])


def _smooth(v: np.ndarray, n: int) -> np.ndarray:
    """Centred boxcar of n samples; the ends are padded with the end values (no zero pull)."""
    if n <= 1:
        return v
    padded = np.concatenate([np.full(n, v[0]), v, np.full(n, v[-1])])
    return np.convolve(padded, np.ones(n) / n, mode="same")[n:-n]


def measure_step(t: np.ndarray, v: np.ndarray, onset_ms: float, duration_ms: float,
                 amplitude_pA: float, baseline_ms: float, sagging: bool,
                 sweep: int = -1) -> SweepEstimate:
    """Measure one current step in one trace (t in ms, v in mV); see `SweepEstimate`.

    Independent transparent estimate, common practice, no source: baseline = mean over
    `baseline_ms` ending 0.5 ms before onset; steady = mean over the last 20 % of the step;
    R_in = ΔV/ΔI; peak = minimum of a 1 ms boxcar inside the step; τ from a single
    exponential fitted from 1 ms after onset to the voltage minimum (`sagging`) or to
    ~5 τ of a first whole-step fit; ``tau_early_ms`` from the first half of that window.
    """
    dt = float(t[1] - t[0])
    on, dur = onset_ms, duration_ms
    off = on + dur
    base = _mean(t, v, on - 0.5 - baseline_ms, on - 0.5)
    steady = _mean(t, v, off - 0.2 * dur, off - 0.5)  # last 20 % of the step
    amp = amplitude_pA
    dv = steady - base
    r_in = dv / amp * 1e3 if amp != 0 else float("nan")  # mV / pA = GΩ -> MΩ
    in_step = (t > on + FIT_START_MS) & (t < off)
    tail = (t >= off) & (t < off + TAIL_MS)
    fired = bool(np.max(v[(t >= on) & (t < off + TAIL_MS)]) > SPIKE_MV)
    vs = _smooth(v, max(1, round(SMOOTH_MS / dt)))
    rebound = float(np.max(vs[tail]) - base) if np.any(tail) else float("nan")
    nan = float("nan")
    if amp >= 0:
        return SweepEstimate(sweep, amp, base, steady, dv, r_in, nan, nan, rebound, fired,
                             nan, nan, nan, nan, nan)
    i_min = np.flatnonzero(in_step)[np.argmin(vs[in_step])]
    peak = float(vs[i_min])
    sag = (steady - peak) / (base - peak)
    start = on + FIT_START_MS
    if sagging:
        end = float(t[i_min])  # the charging curve up to the voltage minimum
    else:
        tau1 = fit_tau(t, v, start, off - 0.5)  # first pass over the whole step
        end = min(on + 5.0 * tau1, off - 0.5) if np.isfinite(tau1) else off - 0.5
    tau = fit_tau(t, v, start, end)
    tau_early = fit_tau(t, v, start, start + 0.5 * (end - start))
    reached = np.flatnonzero((t > on) & (t < off) & (vs <= base + 0.632 * dv))
    t63 = float(t[reached[0]] - on) if reached.size else nan
    return SweepEstimate(sweep, amp, base, steady, dv, r_in, peak, float(sag), rebound, fired,
                         tau, tau_early, t63, start, end)


def sweep_estimate(name: str, sweep: int) -> SweepEstimate:
    """Measure the hand-located step of one sweep of file `name` (see `FACTS`)."""
    facts = FACTS[name]
    t, v = load_vm(name, sweep)
    return measure_step(t, v, facts.onset_ms, facts.duration_ms, facts.amplitudes_pA[sweep],
                        facts.baseline_ms, facts.sagging, sweep)


def _spread(values: list[float], extra: list[float] | None = None) -> Spread:
    """Median of `values`; low/high over `values` and `extra` (finite ones only)."""
    a = np.asarray([x for x in values if np.isfinite(x)], float)
    if a.size == 0:
        return Spread(float("nan"), float("nan"), float("nan"), 0)
    both = np.concatenate([a, [x for x in (extra or []) if np.isfinite(x)]])
    return Spread(float(np.median(a)), float(np.min(both)), float(np.max(both)), int(a.size))


def file_summary(name: str) -> FileSummary:
    """Per-file summary of the independent transparent estimate (common practice, no source).

    V_rest: baselines of `passive_sweeps` (hyperpolarizing, non-firing). R_in: steady-state
    ΔV/ΔI of `rin_sweeps` (the smallest such steps). τ0: median of the standard-window τ
    over `passive_sweeps`; its low/high also span the early-half-window τ, so the range
    shows both the sweep-to-sweep and the fit-window spread. Sag: `sag_ratio` over
    `passive_sweeps`. Low/high are min/max.
    """
    facts = FACTS[name]
    est = {s: sweep_estimate(name, s) for s in facts.passive_sweeps}
    used = facts.passive_sweeps
    return FileSummary(
        file=facts.file,
        v_rest_mV=_spread([est[s].baseline_mV for s in used]),
        r_in_MOhm=_spread([est[s].r_in_MOhm for s in facts.rin_sweeps]),
        tau0_ms=_spread([est[s].tau_ms for s in used], [est[s].tau_early_ms for s in used]),
        sag_ratio=_spread([est[s].sag_ratio for s in used]),
        passive_sweeps=used,
        rin_sweeps=facts.rin_sweeps,
    )


def vi_slope_MOhm(name: str) -> float:
    """Slope (MΩ) of steady ΔV against I over the passive sweeps and any 0 pA sweeps.

    A second, least-squares view of R_in that is less sensitive to one sweep's synaptic
    events. Independent transparent estimate, common practice, no source.
    """
    facts = FACTS[name]
    sweeps = list(facts.passive_sweeps) + [
        k for k, a in enumerate(facts.amplitudes_pA) if a == 0.0]
    est = [sweep_estimate(name, s) for s in sweeps]
    i = np.array([e.amplitude_pA for e in est])
    dv = np.array([e.delta_v_mV for e in est])
    if np.unique(i).size < 2:
        return float("nan")
    return float(np.polyfit(i, dv, 1)[0] * 1e3)
