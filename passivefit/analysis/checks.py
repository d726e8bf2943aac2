"""Cell-level measurements and checks that read the fitted sweeps: R_in from the V–I
relation, sag, and the quality checks of the cell fit. Each returns new values (SI,
keyed by schema quantity) and flags; nothing is changed in place."""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from passivefit.analysis.fits import FIT_ERRORS, fit_average, residual
from passivefit.analysis.hum import Hum
from passivefit.analysis.pool import SAG_RATIO
from passivefit.analysis.windows import span
from passivefit.core import steady
from passivefit.core.qc import Flag, mains_hum, runs_ratio, runs_test_z, t975
from passivefit.model import schema as S
from passivefit.model.results import GroupAverage, SweepFit

MS, MV = 1e-3, 1e-3


def input_resistance(used: list[SweepFit], voltages: dict[int, np.ndarray] | None = None,
                     fs: float | None = None) -> tuple[dict, dict | None, list[Flag]]:
    """R_in from the steady-state V–I relation; (values, V–I points, flags).

    With ≥ 3 step amplitudes and a straight V–I relation, its slope; when the relation
    bends beyond the points' scatter (`VISlope.bends`; e.g. inward rectification pins the
    voltage on large hyperpolarizing steps), the chord of the smallest steps, which stay
    nearest to rest; with fewer amplitudes, the least-squares ratio of all steps. Slope
    and chord are both reported. When R_in rests on one sweep (with `voltages` and `fs`),
    its CI is that of the sweep's noise (`_one_sweep_ci`).
    """
    measured = [f for f in used if f.dv_ss_V is not None]
    pts = [(f.step.amplitude_A, f.dv_ss_V) for f in measured]
    if not pts:
        return {}, None, [S.CELL_NO_STEADY_STATE.make()]
    values: dict = {}
    flags: list[Flag] = []
    i, dv = (np.array(x) for x in zip(*pts, strict=True))
    fitline = steady.vi_slope(i, dv)
    vi = {"current_A": i, "dv_V": dv, "slope": fitline}
    small = np.abs(i) == np.min(np.abs(i))
    chord = np.sum(dv[small] * i[small]) / np.sum(i[small] ** 2)
    values[S.R_IN_CHORD] = chord
    on = measured   # the sweeps R_in rests on
    if fitline is not None:
        values[S.R_IN_SLOPE] = fitline.slope_ohm
        values[S.VI_R2] = fitline.r2
        values[S.R_IN], values[S.R_IN_METHOD] = fitline.slope_ohm, "V-I slope"
        values[S.R_IN_CI] = t975(i.size - 2) * fitline.slope_se_ohm
        values[S.R_IN_CI_FROM] = "the V–I regression"
        if fitline.bends:
            flags.append(S.VI_NONLINEAR.make(fitline.curvature))
            values[S.R_IN], values[S.R_IN_METHOD] = chord, "smallest steps (V-I not linear)"
            values[S.R_IN_CI] = _ratio_ci(dv[small] / i[small])
            values[S.R_IN_CI_FROM] = "the sweeps' spread"
            on = [f for f, s in zip(measured, small, strict=True) if s]
    else:
        values[S.R_IN] = np.sum(dv * i) / np.sum(i * i)
        values[S.R_IN_METHOD] = "mean step"
        values[S.R_IN_CI] = _ratio_ci(dv / i)
        values[S.R_IN_CI_FROM] = "the sweeps' spread"
        on = measured
    if values.get(S.R_IN_CI) is None and len(on) == 1 and voltages is not None:
        values[S.R_IN_CI] = _one_sweep_ci(on[0], voltages[on[0].index], fs)
        values[S.R_IN_CI_FROM] = "the sweep's noise"
    if values[S.R_IN_CI] is None or not np.isfinite(values[S.R_IN_CI]):
        del values[S.R_IN_CI]
        values.pop(S.R_IN_CI_FROM, None)
    neg, pos = dv[i < 0] / i[i < 0], dv[i > 0] / i[i > 0]
    if neg.size and pos.size:
        asym = abs(neg.mean() - pos.mean()) / abs(np.mean(dv / i))
        values[S.R_IN_ASYMMETRY] = asym
        if asym > 0.1:
            flags.append(S.CELL_ASYMMETRIC.make(asym))
    return values, vi, flags


def _one_sweep_ci(f: SweepFit, v: np.ndarray, fs: float) -> float | None:
    """95 % CI half-width of one sweep's R_in from its noise: the errors of its baseline
    and steady-state levels (its drift taken out), each from the scatter of the means of
    5 ms blocks, so that slow noise counts; None when a window holds fewer than 4."""
    slope, t_ref = f.trend
    block = max(1, round(5e-3 * fs))
    errors, blocks = [], []
    for name in ("baseline", "steady"):
        a, b = span(f.windows_s[name], fs, v.size)
        n = (b - a) // block
        if n < 4:
            return None
        x = v[a:a + n * block] - slope * (np.arange(a, a + n * block) / fs - t_ref)
        means = np.nanmean(x.reshape(n, block), axis=1)
        errors.append(float(np.std(means, ddof=1)) / np.sqrt(n))
        blocks.append(n)
    return t975(min(blocks) - 1) * float(np.hypot(*errors)) / abs(f.step.amplitude_A)


def _ratio_ci(r: np.ndarray) -> float | None:
    """95 % CI half-width of the mean of per-sweep ratios ΔV/ΔI; None from one sweep."""
    if r.size < 2:
        return None
    return t975(r.size - 1) * float(np.std(r, ddof=1)) / np.sqrt(r.size)


def pulse_input_resistance(g: GroupAverage, fit, fs: float, used: list[SweepFit] = (),
                           voltages: dict[int, np.ndarray] | None = None
                           ) -> tuple[dict, list[Flag]]:
    """R_in of brief pulses: the charge the cell holds, ∫ΔV dt, over the charge injected,
    Q = I·D (for a linear cell the integral of the voltage response to a charge is
    Q·R_in — the impulse response's integral is the input resistance; derived,
    docs/references.md §3). The integral runs from the pulse onset over the recorded
    decay, plus the fitted exponentials' remainder past the end of the sweep. Its CI is
    that of the mean of the `used` sweeps' own integrals (each with the same remainder)."""
    step = g.step
    seg = next((s for s in g.segments if not s.charging), g.segments[0])
    t_end = (g.v_V.size - 1) / fs - seg.edge_s
    amps = np.asarray(fit.full.amplitudes[seg.index], dtype=float)
    taus = np.asarray(fit.full.taus, dtype=float)
    remainder = float(np.sum(amps * taus * np.exp(-t_end / taus)))
    r_in = (_held_charge(g.v_V[step.onset:], g.v_base_V, fs) + remainder) / (
        step.amplitude_A * step.duration_s)
    if not r_in > 0:
        return {}, [S.CELL_NO_STEADY_STATE.make()]
    values = {S.R_IN: r_in, S.R_IN_METHOD: "charge integral (brief pulses)"}
    if voltages is not None:
        each = np.array([(_held_charge(voltages[f.index][f.step.onset:], f.v_rest_V, fs)
                          + remainder) / (f.step.amplitude_A * f.step.duration_s)
                         for f in used if f.step is not None and f.v_rest_V is not None])
        if each.size >= 2:
            values[S.R_IN_CI] = t975(each.size - 1) * float(np.std(each, ddof=1)) / np.sqrt(
                each.size)
            values[S.R_IN_CI_FROM] = "the sweeps' spread"
    return values, []


def _held_charge(v: np.ndarray, v_base: float, fs: float) -> float:
    """∫(v − v_base) dt over `v` (V·s), samples cut out (NaN) filled by the mean of the rest."""
    dv = v - v_base
    seen = np.isfinite(dv)
    return float(np.sum(dv[seen])) / fs * dv.size / max(np.count_nonzero(seen), 1)


def sag(used: list[SweepFit]) -> tuple[dict, list[Flag]]:
    """Sag ratio (steady/peak), R_in at the peak and the rebound after the step, of the
    largest hyperpolarizing step (core.sag)."""
    hyper = [f for f in used if f.sag is not None and f.step.amplitude_A < 0]
    if not hyper:
        return {}, []
    most = min(f.step.amplitude_A for f in hyper)
    largest = [f for f in hyper if f.step.amplitude_A == most]
    values: dict = {S.SAG_RATIO: float(np.mean([f.sag for f in largest]))}
    for q, got in ((S.R_IN_PEAK, [f.r_in_peak_ohm for f in largest]),
                   (S.REBOUND, [f.rebound_V for f in largest])):
        got = [x for x in got if x is not None]
        if got:
            values[q] = float(np.median(got))
    ratio = values[S.SAG_RATIO]
    return values, [S.CELL_SAG.make(ratio)] if ratio < SAG_RATIO else []


def hum(used: list[SweepFit], voltages: dict[int, np.ndarray], fs: float,
        found_first: Hum | None = None) -> tuple[dict, list[Flag]]:
    """50 or 60 Hz mains hum in the sweeps' baselines (analysis.hum): as `found_first`
    (analysis.hum.without_hum) when that took it out before the fits, else as seen in the
    accepted sweeps."""
    from passivefit.analysis.windows import span

    if found_first is not None and found_first.removed:
        found, reason = found_first, "removed"
    else:
        segments = []
        for f in used:
            v = f.corrected(voltages[f.index], fs)
            a, b = span(f.windows_s["baseline"], fs, v.size)
            segments.append(np.array(v[a:b], dtype=np.float64))  # not a view: frees the sweep
        found, reason = Hum(*mains_hum(segments, fs)), "seen"
    if not found.seen:
        return {}, []
    amp, digits = found.amplitude_V, 2 if found.removed else 0   # refined when removed
    return {S.HUM: amp}, [S.CELL_HUM.make(amp / MV, reason=reason,
                                          hz=f"{found.freq_hz:.{digits}f} Hz",
                                          amplitude=f"{amp / MV * 1e3:.0f} µV")]


def sweep_spread(used: list[SweepFit], fit) -> list[Flag]:
    """τ0 of the combined sweeps against the median of the single sweeps."""
    per_sweep = [f.tau(0) for f in used if f.tau(0) is not None]
    if len(per_sweep) < 3:
        return []
    spread = np.std(per_sweep, ddof=1) / np.sqrt(len(per_sweep))
    gap = abs(np.median(per_sweep) - fit.taus[0])
    if gap > max(3 * spread, 0.05 * fit.taus[0]):
        return [S.CELL_SWEEP_SPREAD.make(gap / MS)]
    return []


#: Baseline bins needed to weigh the residuals' runs against the noise's own
MIN_BASELINE_BINS = 20


#: Mains hum left in the sweeps is named as the cause of structured residuals when its rms
#: is at least this share of theirs (common practice, no source)
HUM_SHARE = 0.3


def residual_structure(fit, avg: GroupAverage, fs: float, hum_V: float = 0.0) -> list[Flag]:
    """Runs test on 0.5-ms bin means of the residuals (bins make filtered noise
    independent), with the runs expected from the noise taken from the same bins of the
    baseline (about a line): the slow noise of a real cell keeps its sign for long too,
    and the plain test flags every real recording. Mains hum of amplitude `hum_V` left
    in the sweeps is named as what it sees when the hum could be (HUM_SHARE)."""
    width = max(1, int(0.5e-3 * fs))

    def bins(r: np.ndarray) -> np.ndarray:
        m = r.size // width * width
        return r[:m].reshape(-1, width).mean(axis=1)

    raw = [residual(avg.v_V, fit, seg, fs)[1] for seg in avg.segments]
    if not raw:
        return []
    resid = np.concatenate([bins(r) for r in raw])
    z = runs_test_z(resid)
    if z >= -4:
        return []
    a, b = span(avg.windows_s["baseline"], fs, avg.v_V.size)
    base = bins(avg.v_V[a:b])
    if base.size >= MIN_BASELINE_BINS:
        k = np.arange(base.size)
        base = base - np.polyval(np.polyfit(k, base, 1), k)
        z = runs_test_z(resid, min(runs_ratio(base), 1.0))
        if z >= -4:
            return []   # no more runs than the recording's own noise makes
    rms = float(np.sqrt(np.nanmean(np.concatenate(raw) ** 2)))
    hum = hum_V / np.sqrt(2) >= HUM_SHARE * rms
    return [S.FIT_RESIDUAL_STRUCTURE.make(z, reason="hum" if hum else "misfit")]


def onset_offset(g: GroupAverage, fs: float, fit) -> list[Flag]:
    """Compare τ0 of the charging and the decay transient fitted apart."""
    if g.step.kind != "step" or len(g.segments) < 2:
        return []
    taus = []
    for name in ("fit", "fit_off"):
        other = "fit_off" if name == "fit" else "fit"
        wins = {k: v for k, v in g.windows_s.items() if k != other}
        try:
            part, _ = fit_average(replace(g, windows_s=wins), fs, str(fit.n_total),
                                  fit.all_taus)
            taus.append((part.taus[0], part.tau_ci95[0]))
        except FIT_ERRORS:
            return []
    (t_on, ci_on), (t_off, ci_off) = taus
    diff = abs(t_on - t_off) / fit.taus[0]
    if diff > 0.1 and abs(t_on - t_off) > np.hypot(ci_on, ci_off):
        return [S.FIT_ONSET_OFFSET.make(diff, on=f"{t_on / MS:.3g} ms", off=f"{t_off / MS:.3g} ms")]
    return []


def scan_drift(scan: dict) -> list[Flag]:
    """τ1 of the fit-start scan should not move when the fit starts 1 ms later."""
    tau1 = scan["tau1_s"]
    later = np.flatnonzero(scan["start_s"] - scan["start_s"][0] >= 1e-3)
    if later.size and np.isfinite(tau1[0]) and np.isfinite(tau1[later[0]]):
        drift = (tau1[later[0]] - tau1[0]) / tau1[0]
        if abs(drift) > 0.1:
            return [S.FIT_TAU1_DRIFT.make(drift)]
    return []


#: What whole neurons show, with a decade of margin (docs/references.md §8: R_in from
#: ~1 MΩ in motoneurons to a few GΩ in small granule cells; capacitance from a few pF to a
#: few nF). A current read in the wrong unit (nA as pA, or pA as nA) moves both 1000-fold.
R_IN_RANGE_OHM = (1e5, 5e10)
C_RANGE_F = (5e-13, 1e-7)


def scale(values: dict) -> list[Flag]:
    """A flag when R_in or C = τ0/R_in is outside what any neuron shows: most likely the
    current (or the voltage) was read with the wrong unit or amplifier gain."""
    r_in, c = values.get(S.R_IN), values.get(S.C_TAU)
    if r_in is not None and r_in > 0 and not R_IN_RANGE_OHM[0] <= r_in <= R_IN_RANGE_OHM[1]:
        return [S.CELL_SCALE_SUSPECT.make(r_in / 1e6, reason="r_in")]
    if c is not None and c > 0 and not C_RANGE_F[0] <= c <= C_RANGE_F[1]:
        return [S.CELL_SCALE_SUSPECT.make(c / 1e-12, reason="capacitance")]
    return []
