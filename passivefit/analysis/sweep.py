"""One sweep: baseline, drift, steady state, R_in, sag, the fitted transients, and the
tests that reject it (action potential, event, drift, failed fit)."""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from passivefit.analysis.fits import (
    FIT_ERRORS,
    fit_exponentials,
    fit_segments,
    fit_segments_rows,
    label_components,
    residual,
    response_amplitudes,
)
from passivefit.analysis.windows import (
    MIN_FIT_START_S,
    fit_start_after_artefact,
    resolve_windows,
    span,
)
from passivefit.core import steady
from passivefit.core.qc import Flag, first_spike
from passivefit.core.steps import Step
from passivefit.model import schema as S
from passivefit.model.results import SweepFit, mask
from passivefit.model.settings import Settings

MV = 1e-3
DRIFT_V = 1e-3       # baseline change over a sweep beyond which the sweep is rejected
TAIL_S = 0.2         # the last tenth of a tail at least this long is back at baseline
QUIET_S = 1e-3       # after a step edge, no upstroke is taken for an action potential
#: Samples of the sweeps fitted together (analyze_sweeps): 64 MB of the float64 copies.
_TOGETHER_SAMPLES = 4_000_000


def baseline_drift(v: np.ndarray, step: Step, fs: float, v_base: float,
                   base_window: tuple[int, int]) -> tuple[float, float, float] | None:
    """(drift in V, slope in V/s, reference time in s) of a sweep's baseline.

    The drift is the level at the end of the sweep minus the baseline before the step; the
    slope joins the centres of the two windows. Measured only when the sweep goes on for
    at least TAIL_S after the step, so the decay is over in its last tenth; None otherwise.
    Samples cut out (NaN, an event) are skipped: the end level is then that of the last
    tenth's worth of samples still there in the tail's second half.
    """
    tail = v.size - step.offset
    if tail / fs < TAIL_S:
        return None
    last = np.arange(v.size - tail // 10, v.size)
    if not np.all(np.isfinite(v[last])):
        late = np.arange(v.size - tail // 2, v.size)
        last = late[np.isfinite(v[late])][-(tail // 10):]
        if last.size < 10:
            return None
    drift = steady.robust_level(v[last]) - v_base
    t_ref = 0.5 * (base_window[0] + base_window[1]) / fs
    t_end = (last[0] + last[-1] + 1) / 2 / fs
    return drift, drift / (t_end - t_ref), t_ref


def baseline_only(v: np.ndarray, step: Step | None, index: int, fs: float,
                  settings: Settings) -> SweepFit:
    """A sweep with its step and baseline only, unfitted: enough to pool sweeps."""
    if step is None:
        return SweepFit(index, False, "no step in this sweep", None)
    wins = resolve_windows(step, v.size, fs, settings.windows_for(index), MIN_FIT_START_S)
    b0, b1 = span(wins["baseline"], fs, v.size)
    if b1 - b0 < 10:
        return SweepFit(index, False, "no baseline before the step", step)
    return SweepFit(index, spike_in(v, step, fs) is None, None, step,
                    v_rest_V=steady.robust_level(v[b0:b1]))


def spike_in(v: np.ndarray, step: Step, fs: float) -> int | None:
    """The sample of the sweep's first action potential's peak, or None
    (core.qc.first_spike): upstrokes are looked for in the step's region only, and not in
    the millisecond after an edge (the electrode's jump) nor during a pulse."""
    settle = round(QUIET_S * fs)
    end = v.size if step.region_end is None else step.region_end
    edges = ([(step.onset, step.offset + settle)] if step.kind == "pulse"
             else [(step.onset, step.onset + settle), (step.offset, step.offset + settle)])
    return first_spike(v, fs, [(0, step.baseline_start), *edges, (end, v.size)])


def _fit_sweeps(parts: list[tuple[np.ndarray, Step, dict]], fs: float, settings: Settings,
                tau_init: tuple[float, ...] | None) -> list[tuple]:
    """For each (voltage, step, windows) of `parts`: (fit, segment records, None), or
    (None, (), the reason the fit failed). With start values and automatic components
    (the usual case) the sweeps' first fits are searched together."""
    from passivefit.core.expfit import fit_exponentials_many

    segments = _segments_of(parts, fs)
    together = tau_init is not None and settings.components == "auto"
    if together:   # single sweeps rarely resolve a third component
        n = min(len(tau_init), 2)
        firsts = fit_exponentials_many(
            [s[0] if isinstance(s, tuple) else [] for s in segments], n, tau_init[:n])
    out = []
    for k, ((_, step, _), found) in enumerate(zip(parts, segments, strict=True)):
        try:
            if isinstance(found, Exception):
                raise found
            segs, records = found
            if not segs:
                raise ValueError("the fit window holds too few samples")
            if together:
                fit = firsts[k]
                if isinstance(fit, Exception):
                    raise fit
                if not fit.success and n == 2:  # a small step may not show τ1: one exponential
                    fit = fit_exponentials(segs, "1", tau_init=tau_init[:1])
            elif settings.components == "auto":
                fit = fit_exponentials(segs, "auto", max_components=2)
            else:
                fit = _fewer_if_needed(segs, int(settings.components), tau_init)
            if not fit.success:
                raise ValueError(fit.message)
        except FIT_ERRORS as exc:
            out.append((None, (), f"fit failed: {exc}"))
            continue
        out.append((label_components(fit, step, records[0].charging), records, None))
    return out


def _segments_of(parts: list[tuple[np.ndarray, Step, dict]], fs: float) -> list:
    """fit_segments of each (voltage, step, windows) of `parts`, or the error it raises;
    sweeps of one length, step and windows (the usual case) binned together."""
    groups: dict[tuple, list[int]] = {}
    for k, (v, step, wins) in enumerate(parts):
        groups.setdefault((v.size, step, tuple(sorted(wins.items()))), []).append(k)
    out: list = [None] * len(parts)
    for members in groups.values():
        if len(members) > 1:
            _, step, wins = parts[members[0]]
            try:
                rows = np.stack([parts[k][0] for k in members])
                for k, found in zip(members, fit_segments_rows(rows, fs, step, wins),
                                    strict=True):
                    out[k] = found
                continue
            except FIT_ERRORS:
                pass   # each on its own below, to keep its own error
        for k in members:
            v, step, wins = parts[k]
            try:
                out[k] = fit_segments(v, fs, step, wins)
            except FIT_ERRORS as exc:
                out[k] = exc
    return out


def _fewer_if_needed(segs, n: int, tau_init: tuple[float, ...] | None):
    """The fit with `n` components, or with fewer when a single sweep cannot carry them
    (a small step rarely shows τ1, let alone τ2): the sweep keeps its steady state."""
    for k in range(n, 0, -1):
        init = tau_init[:k] if tau_init is not None and len(tau_init) >= k else None
        try:
            fit = fit_exponentials(segs, str(k), tau_init=init)
        except FIT_ERRORS:
            if k == 1:
                raise
            continue
        if fit.success or k == 1:
            return fit
    return fit


def analyze_sweep(v: np.ndarray, step: Step | None, index: int, fs: float,
                  settings: Settings, tau_init: tuple[float, ...] | None = None,
                  masked_s: tuple[tuple[float, float], ...] = (),
                  cache: dict | None = None) -> SweepFit:
    """Baseline, steady state, sag, fitted transients and tests of one sweep.

    `tau_init` (s), from a fit of the combined sweeps, starts the fit there and fixes the
    number of components (at most two: single sweeps rarely resolve a third).
    `masked_s` are (start, end) times (s) cut out of the fits and the steady state:
    spontaneous events (analysis.events).
    `cache`, a dict kept by the caller for this sweep's voltage `v` only, keeps the work
    that the fit and steady windows do not change (baseline level, drift, noise, the
    artefact's end, sag), so a refit with another fit window redoes only the fit.
    """
    return analyze_sweeps([(v, step, index)], fs, settings, tau_init, masked_s, cache)[0]


def analyze_sweeps(sweeps: list[tuple[np.ndarray, Step | None, int]], fs: float,
                   settings: Settings, tau_init: tuple[float, ...] | None = None,
                   masked_s: tuple[tuple[float, float], ...] = (),
                   cache: dict | None = None) -> list[SweepFit]:
    """:func:`analyze_sweep` of each (voltage, step, index) of `sweeps`, their fits
    searched together, as many sweeps at a time as _TOGETHER_SAMPLES allows (each holds
    copies of its voltage until it is done); `masked_s` and `cache` only with one sweep."""
    out: list[SweepFit] = []
    per_pass = max(1, _TOGETHER_SAMPLES // max(v.size for v, _, _ in sweeps)) if sweeps else 1
    for a in range(0, len(sweeps), per_pass):
        begun = [_begin(v, step, index, fs, settings, masked_s, cache)
                 for v, step, index in sweeps[a:a + per_pass]]
        ready = [b for b in begun if not isinstance(b, SweepFit)]
        fitted = iter(_fit_sweeps([(b[1][1], b[0][1], b[2]) for b in ready], fs, settings,
                                  tau_init))
        out += [b if isinstance(b, SweepFit) else _end(*b, *next(fitted), fs, settings)
                for b in begun]
    return out


def _begin(v: np.ndarray, step: Step | None, index: int, fs: float, settings: Settings,
           masked_s: tuple[tuple[float, float], ...], cache: dict | None):
    """A sweep up to its fit: ((v, step, index, masked_s), what _prepare gives, the
    windows), or its SweepFit when it cannot be fitted."""
    if step is None:
        return SweepFit(index, False, "no step in this sweep", None)
    w = settings.windows_for(index)
    guess = resolve_windows(step, v.size, fs, w, MIN_FIT_START_S)
    b0, b1 = span(guess["baseline"], fs, v.size)
    if b1 - b0 < 10:
        return SweepFit(index, False, "no baseline before the step", step)
    key = (step.onset, step.offset, b0, b1, tuple(masked_s), settings.correct_drift,
           settings.fit_start_ms)
    prep = cache.get(key) if cache is not None else None
    if prep is None:
        prep = _prepare(v, step, fs, settings, masked_s, b0, b1)
        if cache is not None:
            cache.clear()            # one baseline at a time: a drag moves one window
            cache[key] = prep
    return (v, step, index, masked_s), prep, resolve_windows(step, v.size, fs, w, prep[6])


def _end(sweep: tuple, prep: tuple, wins: dict, fit, records, fit_error: str | None,
         fs: float, settings: Settings) -> SweepFit:
    """The sweep's levels, tests and record, from its fit (analyze_sweep)."""
    v, step, index, masked_s = sweep
    v, seen, v_base, drift, trend, noise, _, sag_values = prep
    flags: list[Flag] = []

    v_ss = dv = r_in = bridge = sag = rmse = r_peak = rebound = None
    amps: tuple[float, ...] = ()
    if step.kind == "step":
        s0, s1 = span(wins["steady"], fs, v.size)
        # the steady window, unless events cut most of it out (then the fitted asymptote)
        v_ss = (steady.robust_level(seen[s0:s1])
                if np.count_nonzero(np.isfinite(seen[s0:s1])) >= max(5, (s1 - s0) // 2)
                else None)
        if fit is not None:
            amps = response_amplitudes(fit, 0, "step")
            v_inf = float(fit.offsets[0])
            jump = float(fit.evaluate(0, np.zeros(1))[0]) - v_base
            bridge = jump / step.amplitude_A
            model_in_steady = fit.evaluate(0, np.arange(s0, s1) / fs - step.onset_s)
            unsettled = abs(np.mean(model_in_steady) - v_inf) / max(abs(v_inf - v_base), 1e-9)
            if v_ss is None or unsettled > 0.01:
                # the asymptote only of a fit that reaches the steady window: one cut
                # short (before a sag) extrapolates a model the data no longer follow;
                # a settled fit's asymptote stands in for a window events took, unflagged
                covered = v_ss is None or wins["fit"][1] >= wins["steady"][0]
                if unsettled > 0.01:
                    flags.append(S.STEADY_NOT_REACHED.make(
                        unsettled, reason="asymptote" if covered else "measured"))
                v_ss = v_inf if covered else v_ss
        if v_ss is not None:
            dv = v_ss - v_base
            r_in = dv / step.amplitude_A    # the cell's bridge estimate is subtracted later
            sag, r_peak, rebound = sag_values()
    elif fit is not None:
        amps = response_amplitudes(fit, 0, "pulse")

    drift = drift[0] if drift is not None else None
    if drift is not None and abs(drift) > 0.25 * DRIFT_V:
        done = "subtracted as a straight line" if settings.correct_drift else "not corrected"
        flags.append(S.SWEEP_DRIFT.make(drift / MV, done=done))
    accepted, reason, through_spike = True, None, False
    spike = spike_in(v, step, fs)
    if spike is not None:
        where = _part_of_sweep(spike, step)
        accepted, reason = False, (f"action potential {where} (peak {v[spike] / MV:+.0f} mV "
                                   f"at {spike / fs * 1e3:.0f} ms)")
        if step.onset <= spike < step.offset:   # spikes, not a steady state: no R_in
            dv = r_in = None
        # a fit through a spike means nothing: its values are not shown (the fit is kept
        # for the noise model of the event search, which reads every fitted sweep)
        through_spike = fit is not None and any(
            cover.start <= spike < cover.stop for cover in (r.samples(fs) for r in records))
        if through_spike:
            amps, bridge = (), None
    elif fit_error:
        cut = masked_s and fit_error.endswith("too few samples")
        accepted, reason = False, fit_error + (" once the spontaneous events are cut out"
                                               if cut else "")
    elif drift is not None and abs(drift) > max(DRIFT_V, 0.25 * abs(dv or 0.0)):
        accepted, reason = False, (f"the baseline drifts {drift / MV:+.1f} mV between the "
                                   "start and the end of the sweep")
    if fit is not None and not through_spike:
        resids = np.concatenate([residual(seen, fit, r, fs)[1] for r in records])
        rmse = float(np.sqrt(np.nanmean(resids ** 2)))
    return SweepFit(
        index=index, accepted=accepted, reject_reason=reason, step=step,
        v_rest_V=v_base, dv_ss_V=dv, r_in_ohm=r_in,
        taus_s=tuple(float(t) for t in fit.taus) if fit is not None and not through_spike
        else (),
        amps_V=amps, rmse_V=rmse,
        bridge_ohm=bridge, sag=sag, r_in_peak_ohm=r_peak, rebound_V=rebound, noise_V=noise,
        drift_V=drift, trend=trend, windows_s=wins, masked_s=masked_s, segments=records,
        fit=fit, flags=tuple(flags),
    )


def _prepare(v: np.ndarray, step: Step, fs: float, settings: Settings,
             masked_s: tuple[tuple[float, float], ...], b0: int, b1: int) -> tuple:
    """The part of `analyze_sweep` that only the baseline window (samples b0:b1), the cut
    out stretches and the drift and fit-start settings change: (voltage with the drift
    taken out, the same with the stretches cut out, baseline level, drift, trend, noise,
    fit start after the artefact, and a function giving the sag, measured once)."""
    seen = mask(v, masked_s, fs)    # what the levels, the fits and the steady state read
    if np.count_nonzero(np.isfinite(seen[b0:b1])) < max(10, (b1 - b0) // 4):
        seen = mask(v, [m for m in masked_s if m[1] < b0 / fs or m[0] > b1 / fs], fs)
    v_base = steady.robust_level(seen[b0:b1])
    drift = baseline_drift(seen, step, fs, v_base, (b0, b1))
    trend = (0.0, 0.0)
    if drift is not None and settings.correct_drift:
        trend = drift[1:]
        v = v - trend[0] * (np.arange(v.size) / fs - trend[1])
        seen = seen - trend[0] * (np.arange(v.size) / fs - trend[1])
        v_base = steady.robust_level(seen[b0:b1])
    noise = steady.noise_sd(v[b0:b1])
    fit_start = fit_start_after_artefact(v, step, fs, noise, settings)
    measured: list = []

    def sag_values() -> tuple[float | None, float | None, float | None]:
        if not measured:
            measured.append(_sag(v, step, fs, v_base))
        return measured[0]

    return v, seen, v_base, drift, trend, noise, fit_start, sag_values


def _sag(v: np.ndarray, step: Step, fs: float, v_base: float
         ) -> tuple[float | None, float | None, float | None]:
    """(sag ratio, R_in at the peak in Ω, rebound in V) of a step (core.sag): the ratio is 1
    and the peak R_in None when the peak is within the noise of the steady state."""
    from passivefit.core.sag import measure_sag

    try:
        s = measure_sag(v, fs, step.onset_s, step.offset_s, baseline_V=v_base,
                        direction=float(np.sign(step.amplitude_A)))
    except ValueError:
        return None, None, None
    if not s.has_sag:
        return 1.0, None, s.rebound_V
    return s.ratio, s.peak_V / step.amplitude_A, s.rebound_V


def _part_of_sweep(sample: int, step: Step) -> str:
    """Where a sample lies relative to the step (or pulse), in words."""
    if sample < step.onset:
        return f"before the {step.kind}"
    return f"during the {step.kind}" if sample < step.offset else f"after the {step.kind}"


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


def with_bridge_removed(f: SweepFit, bridge_ohm: float) -> SweepFit:
    """The sweep with the bridge jump taken out of its deflection and R_in."""
    if f.dv_ss_V is None:
        return f
    dv = f.dv_ss_V - bridge_ohm * f.step.amplitude_A
    return replace(f, dv_ss_V=dv, r_in_ohm=dv / f.step.amplitude_A)
