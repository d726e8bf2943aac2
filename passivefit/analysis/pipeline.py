"""`analyze()`: Recording + Settings → RecordingResult, stage by stage, top to bottom.

1.–3. (start.start_values) steps: each sweep's step, each sweep read up to its next step
   (windows.sweep_steps); sag: whether the cell sags, and then the fit window before the
   sag (pool.sag_window); first look: the accepted sweeps combined and fitted once, for
   the fit start after 0.8 τ1 and start values (pool.first_look);
4. sweeps: each sweep fitted and tested (sweep.analyze_sweep), its spontaneous events
   cut out (events), the step's sign checked, outliers, active sweeps and an unstable
   stretch left out (selection), the person's decisions applied;
5. cell: the accepted sweeps combined (pool), the exponential fit, the ball-and-stick
   fit (cable), bootstrap CIs (uncertainty), bridge, R_in, sag and hum, time constants,
   checks, cable values (summarize_cell).

Every stage returns new values; the cell's values are SI, keyed by schema quantity, and
become display units in `CellResult.from_si`.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from passivefit.analysis import checks
from passivefit.analysis.cable import (
    Chain,
    bridge_of,
    cable_values,
    fit_cable,
    model_tau1_ci,
    noise_factor,
)
from passivefit.analysis.events import cut_out_events
from passivefit.analysis.fits import FIT_ERRORS, fit_average, fit_start_scan, onset_amplitudes
from passivefit.analysis.hum import Hum
from passivefit.analysis.pool import average_of, first_look, sweep_pool
from passivefit.analysis.selection import (
    check_sign,
    hyperpolarizing_only,
    leave_out_active,
    stable_stretch,
)
from passivefit.analysis.start import start_values
from passivefit.analysis.sweep import (
    analyze_sweep,
    analyze_sweeps,
    apply_decisions,
    reject_outliers,
    with_bridge_removed,
)
from passivefit.analysis.uncertainty import CableContext, bootstrap, halfwidth
from passivefit.analysis.windows import no_step_reason, region_flags, span
from passivefit.core.qc import Flag, bootstrap_halfwidth, detrended
from passivefit.io.recording import Recording
from passivefit.model import schema as S
from passivefit.model.results import CellResult, GroupAverage, RecordingResult, SweepFit
from passivefit.model.settings import Settings

MS, MOHM = 1e-3, 1e6


def analyze(recording: Recording, settings: Settings | None = None, *,
            advise: bool = True) -> RecordingResult:
    """Fit every sweep and the cell; the one entry point for CLI, GUI, batch and tests.

    With `advise`, also what to record next (the `design` block: analysis.design)."""
    settings = settings or Settings()
    fs = recording.sample_rate_hz
    start = start_values(recording, settings)   # steps, sag window, first look
    chosen, screened, voltages = start.chosen, start.screened, start.voltages
    base, sag_end = start.base, start.sag_end_s
    effective, tau_init = start.effective, start.tau_init
    fits = _fitted_sweeps(chosen, voltages, fs, effective, tau_init)
    automatic = replace(base, components="auto", fit_start_ms=None)
    if automatic != base:
        # spontaneous events are found with the automatic fits, so that the person's
        # fit start or number of components does not change which samples are used
        auto_start, auto_init = first_look(screened, voltages, fs, automatic)
        found = _fitted_sweeps(chosen, voltages, fs, automatic if auto_start is None else
                               replace(automatic, fit_start_ms=auto_start / MS), auto_init)
        fits = [_with_cut_of(f, auto, voltages[f.index], fs, effective, tau_init)
                for f, auto in zip(fits, found, strict=True)]
    fits = check_sign(fits, recording.path)
    fits, active = leave_out_active(reject_outliers(fits))
    if sag_end is not None:
        fits = hyperpolarizing_only(fits)
        active += [S.FIT_SAG_WINDOW.make(sag_end / MS, end=f"{sag_end / MS:.0f} ms")]
    fits, stability, unstable = stable_stretch(fits, settings.all_sweeps)
    fits = _why_no_step(apply_decisions(fits, effective), chosen, fs)
    cell = summarize_cell(fits, voltages, fs, effective, replace(base, fit_start_ms=None),
                          _chain(recording, settings, chosen), sagging=sag_end is not None,
                          hum=start.hum)
    cell.values.update(stability)
    cell.flags[:0] = [*recording.flags, *active, *unstable]
    cell.flags += region_flags(chosen, fs, settings.step is not None)   # last: what is not read
    advice = _design(cell, chosen, recording.sample_rate_hz) if advise else None
    return RecordingResult(
        source={"path": recording.path, "sha256": recording.sha256, "format": recording.format,
                "sweep_count": len(recording.sweeps)},
        settings=settings, sweeps=cell.sweeps, cell=CellResult.from_si(cell.values),
        flags=tuple(cell.flags), effective_settings=effective, protocol=cell.protocol,
        average=cell.average, cable_fit=cell.cable_fit, cell_fit=cell.cell_fit,
        peel=cell.peel, scan=cell.scan, vi=cell.vi, design=advice)


def _why_no_step(fits: list[SweepFit], chosen, fs: float) -> list[SweepFit]:
    """A sweep without the protocol's step says what its current holds instead."""
    current = {s.index: s.current for s, st in chosen if st is None and s.current is not None}
    return [replace(f, reject_reason=no_step_reason(current[f.index], fs))
            if f.step is None and f.index in current else f for f in fits]


def _fitted_sweeps(chosen, voltages: dict[int, np.ndarray], fs: float, effective: Settings,
                   tau_init) -> list[SweepFit]:
    """Every sweep fitted with `effective` settings from the start values `tau_init`, its
    spontaneous events cut out."""
    fits = analyze_sweeps([(voltages[s.index], st, s.index) for s, st in chosen], fs,
                          effective, tau_init)
    return cut_out_events(fits, voltages, fs, lambda f, cut: analyze_sweep(
        voltages[f.index], f.step, f.index, fs, effective, tau_init, masked_s=cut))


def _with_cut_of(fit: SweepFit, automatic: SweepFit, v: np.ndarray, fs: float,
                 settings: Settings, tau_init) -> SweepFit:
    """`fit` with the events cut out that the `automatic` fit of the same sweep found (and
    left out when they could not be cut)."""
    if automatic.masked_s == fit.masked_s and automatic.accepted == fit.accepted:
        return fit
    events = tuple(f for f in automatic.flags if f.code == S.SWEEP_EVENT.code)
    if not automatic.accepted and events:   # events that could not be cut out
        return replace(fit, accepted=False, reject_reason=automatic.reject_reason,
                       flags=(*fit.flags, *events))
    new = analyze_sweep(v, fit.step, fit.index, fs, settings, tau_init,
                        masked_s=automatic.masked_s)
    kept = tuple(f for f in new.flags if f.code != S.SWEEP_EVENT.code)
    return replace(new, flags=(*kept, *events))


def _chain(recording: Recording, settings: Settings, chosen) -> Chain:
    """The filter corner: as set, as the file states it, else from the spectrum of the
    baseline noise (core.lowpass.corner_from_noise), else fitted at the step edge."""
    from passivefit.core.lowpass import corner_from_noise

    corner = settings.filter_hz or _metadata_float(recording, "filter_hz")
    if corner is not None:
        return Chain(corner, source=CORNER_GIVEN)
    baselines = [s.voltage[st.baseline_start:st.onset] for s, st in chosen if st is not None]
    corner = corner_from_noise(baselines, recording.sample_rate_hz)
    if corner is not None:
        return Chain(corner, source=CORNER_FROM_NOISE)
    return Chain(None, estimate_corner=True, source=CORNER_FROM_EDGE)


#: Where the filter corner came from (`filter_source`).
CORNER_GIVEN = "file or --filter-hz"
CORNER_FROM_NOISE = "estimated from the baseline noise spectrum"
CORNER_FROM_EDGE = "estimated from the step edge"


def _design(cell: CellSummary, chosen, fs: float):
    """What to record next (analysis.design.advise) from the cell's values and the
    protocol as recorded; None when the cell has no cable model to bound."""
    from passivefit.analysis import design

    v, bs, avg = cell.values, cell.cable_fit, cell.average
    used = [f for f in cell.sweeps if f.accepted]
    if bs is None or avg is None or not used or not v.get(S.R_IN) or S.TAU0 not in v:
        return None
    step = avg.step
    # the noise of baselines without events (they are cut out of the fits as well)
    clean = {f.index for f in used if not any(a < f.step.onset / fs for a, _ in f.masked_s)}
    baselines = [s.voltage[st.baseline_start:st.onset] for s, st in chosen
                 if st is not None and s.index in clean]
    if not baselines:
        return None
    noise_sd, acf = design.noise_autocorrelation(baselines)
    achieved = {"tau0": v.get(S.TAU0_CI), "tau1": v.get(S.TAU1_CI), "L": v.get(S.L_CI),
                "rho": v.get(S.RHO_CI), "r_in": v.get(S.R_IN_CI), "bridge": v.get(S.BRIDGE_CI)}
    try:
        return design.advise(
            tau0_s=v[S.TAU0], L=v.get(S.L_BS) or bs.L, rho=v.get(S.RHO) or bs.rho,
            r_in_ohm=v[S.R_IN], bridge_ohm=v[S.BRIDGE] if v.get(S.BRIDGE_APPLIED) else 0.0,
            kind=step.kind, onset_s=step.onset / fs, duration_s=step.duration_s,
            amplitudes_A=[f.step.amplitude_A for f in used], sweep_s=avg.v_V.size / fs,
            sample_rate_hz=fs, filter_hz=bs.corner_hz, noise_sd_V=noise_sd, noise_acf=acf,
            n_sweeps=len(used), achieved_ci=achieved,
            fit_start_s=cell.cable_average.fit_start_s,   # the samples the chain fit used
            electrode_tau_s=bs.lag_s if np.isfinite(bs.lag_s) else 50e-6,
            bridge_known=not bs.bridge_needed,
            bootstrapped=v.get(S.CI_METHOD) == "bootstrap over sweeps")
    except (ValueError, np.linalg.LinAlgError):
        return None


def _noise_share(fit, avg: GroupAverage, fs: float) -> float:
    """The baseline's noise sd over the fit's residual sd (at most 1): the part of the
    fit's error that the noise explains (per sample; the fit's residuals are weighted to
    per-sample variance)."""
    a, b = span(avg.windows_s["baseline"], fs, avg.v_V.size)
    base = avg.v_V[a:b]
    base = base[np.isfinite(base)]
    full = fit.full   # core.expfit.ExpFit
    residual_sd = float(np.sqrt(full.rss / max(full.n_points - full.n_params, 1)))
    if base.size < 10 or not residual_sd > 0:
        return 1.0
    return min(1.0, float(np.std(detrended(base))) / residual_sd)


def _metadata_float(recording: Recording, key: str) -> float | None:
    try:
        value = float(recording.metadata.get(key))
    except (TypeError, ValueError):
        return None
    return value if np.isfinite(value) and value > 0 else None


@dataclass
class CellSummary:
    """The cell stage's output: SI values by quantity, flags, sweeps (with the bridge
    taken out where it was), and the arrays behind the values for drawing."""

    sweeps: tuple[SweepFit, ...]
    values: dict = field(default_factory=dict)
    flags: list[Flag] = field(default_factory=list)
    protocol: str = "step"
    average: GroupAverage | None = None
    cell_fit: object | None = None
    cable_fit: object | None = None
    cable_average: GroupAverage | None = None   # with the windows of the chain fit
    peel: object | None = None
    scan: dict | None = None
    vi: dict | None = None


def summarize_cell(fits: list[SweepFit], voltages: dict[int, np.ndarray], fs: float,
                   settings: Settings, automatic: Settings | None = None,
                   chain: Chain | None = None, sagging: bool = False,
                   hum: Hum | None = None) -> CellSummary:
    """Cell-level values from the accepted sweeps.

    `settings` hold the fit start used for the exponential fits. The model of the whole
    measurement chain (cell, bridge with its lag, filter) is fitted from the `automatic`
    start, after the artefact, whatever start the person chose: the bridge, and so R_in,
    do not depend on it. A `sagging` cell gets no cable model. `hum`: the mains hum
    taken out of `voltages` before, if any.
    """
    used = [f for f in fits if f.accepted]
    out = CellSummary(tuple(fits), {S.N_SWEEPS_USED: len(used)},
                      protocol=used[0].step.kind if used else "step")
    if not used:
        out.flags.append(S.CELL_NO_SWEEPS.make())
        return out
    if len(used) < 3:
        out.flags.append(S.CELL_FEW_SWEEPS.make(len(used)))
    out.values[S.V_REST] = np.mean([f.v_rest_V for f in used])

    pool = sweep_pool(fits, voltages)
    avg = average_of(pool, pool.combine(), fs, settings)
    choice: dict = {}
    try:
        fit, avg = fit_average(avg, fs, settings.components, choice=choice)
        if not fit.success:
            raise ValueError(fit.message)
    except FIT_ERRORS as exc:
        out.flags.append(S.FIT_FAILED.make(problem=exc))
        fit = None
    out.values[S.COMPONENTS_REASON] = choice.get("reason", f"set to {settings.components}")
    avg_cable = average_of(pool, avg.v_V, fs, automatic or settings)
    chain = replace(chain or Chain(), noise_factor=noise_factor(avg_cable, fs))
    bs = bridge = None
    if fit is not None and fit.sag is not None:
        out.values[S.TAU_SAG] = fit.sag_tau
        out.flags.append(S.FIT_SAG_COMPONENT.make(fit.sag_tau / MS,
                                                  tau=f"{fit.sag_tau / MS:.0f} ms"))
    passive = not (sagging or fit is not None and (fit.sag_share or 0.0) >= SLIGHT_SAG)
    # the sag of the largest hyperpolarizing step (the bridge correction below leaves the
    # sag values as they are)
    sag_values, sag_flags = checks.sag(used)
    if not passive:
        # no cable model; "sag" when the sag is seen, else the fit's component
        out.flags.append(S.CABLE_NOT_PASSIVE.make(
            reason="sag" if sagging or sag_flags else "component"))
    else:  # its start values from its own data, not from the person's exponential fit
        chain_fit, problem = fit_cable(avg_cable, fs, None, chain, profile=True)
        out.flags.extend([problem] if problem else [])
        out.values.update(_chain_values(chain_fit, chain))
        out.flags.extend(_chain_flags(chain_fit, chain))
        bs = chain_fit if chain_fit is not None and chain_fit.success else None
        bridge = bridge_of(chain_fit, avg_cable)
    out.average, out.cable_fit, out.cell_fit, out.cable_average = avg, bs, fit, avg_cable
    out.values[S.FIT_START] = avg.fit_start_s
    boot = None
    if fit is not None and settings.bootstrap and len(pool.indices) >= 3:
        # the resamples refit the model the data chose (with or without a jump)
        cable = None if bs is None else CableContext(
            avg_cable, bs, replace(chain, bridge=bs.bridge_needed))
        boot = bootstrap(pool, avg, fs, fit, settings.bootstrap, cable)
    out.values[S.CI_METHOD] = "bootstrap over sweeps" if boot is not None else "fit covariance"
    cis = _cable_cis(bs, boot)

    # R_in: once, from the steady state and the bridge estimate (whatever the fit start,
    # the number of components or the bootstrap)
    used = [f for f in fits if f.accepted]
    if out.protocol == "pulse" and fit is not None:
        values, flags = checks.pulse_input_resistance(avg, fit, fs, used, voltages)
    else:
        values, out.vi, flags = checks.input_resistance(used, voltages, fs)
    out.values.update(values)
    out.flags.extend(flags)
    values, flags, fits = _bridge_correction(fits, bridge, out.values, settings)
    out.values.update(values)
    out.flags.extend(flags)
    out.sweeps = tuple(fits)
    used = [f for f in fits if f.accepted]
    out.values.update(sag_values)
    out.flags.extend(sag_flags)
    values, flags = checks.hum(used, voltages, fs, hum)
    out.values.update(values)
    out.flags.extend(flags)
    if fit is None:
        return out

    values, flags = _time_constants(fit, bs, avg, boot, fs, not passive, chain.noise_factor)
    out.values.update(values)
    out.flags.extend(flags)
    tau1 = values.get(S.TAU1)
    out.flags.extend(checks.sweep_spread(used, fit))
    out.flags.extend(checks.residual_structure(
        fit, avg, fs, hum_V=0.0 if hum and hum.removed else out.values.get(S.HUM, 0.0)))
    out.flags.extend(checks.onset_offset(avg, fs, fit))
    out.scan = fit_start_scan(avg, fs, fit)
    if tau1 is not None:
        out.flags.extend(checks.scan_drift(out.scan))
    out.peel = _peel(avg, avg_cable, fs, fit)
    r_in = out.values.get(S.R_IN)
    values, flags = cable_values(fit, bs, avg, r_in if r_in and r_in > 0 else None, tau1, cis,
                                 _L_cyl_ci(boot, bs is not None), passive=passive)
    out.values.update(values)
    out.flags.extend(flags)
    out.flags.extend(checks.scale(out.values))
    if settings.area_um2 and out.values.get(S.C_TOTAL):
        from passivefit.core import cable

        cm, rm = cable.specific_membrane(out.values[S.C_TOTAL], float(fit.taus[0]),
                                         settings.area_um2 * 1e-12)
        out.values[S.CM], out.values[S.RM] = cm, rm
    return out


def _cable_cis(bs, boot: dict | None) -> dict[str, tuple[float, float] | None]:
    """95 % intervals of L and ρ: the fit's (profile likelihood where it is not quadratic),
    widened to the bootstrap's where that reaches further (its robust spread of log L and
    log ρ, as few cable refits make percentiles unstable); None without a cable fit."""
    if bs is None:
        return {S.L_BS.key: None, S.RHO.key: None}
    from passivefit.core.qc import few_units_factor, robust_sd

    out = {}
    for q, value, (lo, hi), name in ((S.L_BS, bs.L, bs.L_interval, "L"),
                                     (S.RHO, bs.rho, bs.rho_interval, "rho")):
        seen = boot[name][np.isfinite(boot[name])] if boot is not None else np.array([])
        if seen.size >= 5:  # the resamples' robust spread, on the log scale (skewed values),
            #                 widened for few sweeps
            spread = 1.96 * robust_sd(np.log(seen)) * few_units_factor(int(boot["n_sweeps"]))
            lo, hi = min(lo, value * np.exp(-spread)), max(hi, value * np.exp(spread))
        out[q.key] = (lo, hi)
    return out


def _chain_values(fit, chain: Chain) -> dict:
    """The measurement chain as fitted: filter corner (and where it came from), lag."""
    if fit is None:
        return {}
    values = {S.FILTER_SOURCE: chain.source if fit.corner_hz is not None
              else "none (unfiltered)"}
    if fit.corner_hz is not None:
        values[S.FILTER] = fit.corner_hz
        if fit.corner_se_hz is not None:
            values[S.FILTER_CI] = 1.96 * fit.corner_se_hz
    if _lag_determined(fit):
        values[S.LAG], values[S.LAG_CI] = fit.lag_s, 1.96 * fit.lag_se_s
    return values


def _lag_determined(fit) -> bool:
    """Whether the electrode lag means something: the data need the bridge jump it belongs
    to, and the lag is clear of its fit bounds with a 95 % CI narrower than itself."""
    from passivefit.core.cablefit import LAG_BOUNDS_S

    low, high = LAG_BOUNDS_S
    return (fit.bridge_needed and low * 1.02 < fit.lag_s < high / 1.02
            and 1.96 * fit.lag_se_s < fit.lag_s)


def _chain_flags(fit, chain: Chain) -> list[Flag]:
    if fit is None or chain.source == CORNER_GIVEN or fit.corner_hz is None:
        return []
    fitted = fit.corner_se_hz is not None   # fitted to the step edge (else: from the noise)
    undetermined = ("; these data do not determine it (its 95 % CI is wider than the value): "
                    "give the corner (`--filter-hz`; in the window, the analysis settings)"
                    if fitted and not 1.96 * fit.corner_se_hz < fit.corner_hz else "")
    return [S.CELL_FILTER_ESTIMATED.make(fit.corner_hz, how=chain.source,
                                         undetermined=undetermined)]


def _L_cyl_ci(boot: dict | None, cable: bool) -> float | None:
    """The 95 % half-width of L_cyl over the bootstrap's resamples (their τ1 from the cable
    fit when there is one), widened for few sweeps; None without a bootstrap."""
    from passivefit.core import cable as cable_theory

    if boot is None:
        return None
    pairs = zip(boot["tau0"], boot["tau1_model" if cable else "tau1"], strict=True)
    samples = np.array([cable_theory.cylinder_L(t0, t1) if 0 < t1 < t0 else np.nan
                        for t0, t1 in pairs])
    return bootstrap_halfwidth(samples, int(boot["n_sweeps"]))


def _bridge_correction(fits: list[SweepFit], bridge: tuple[float, float, bool] | None,
                       measured: dict, settings: Settings
                       ) -> tuple[dict, list[Flag], list[SweepFit]]:
    """The bridge jump, and R_in with it taken out when it is real.

    `bridge` is the fitted jump over the step current, its 95 % CI half-width (from the
    fit of the measurement chain, not the bootstrap) and whether the data need a jump at
    all; it is real when they do and the interval excludes zero. `measured` holds the raw
    R_in from the steady state (and its CI). R_in is then the raw value, or the raw value
    minus the bridge with the CIs combined. The raw value's CI takes in the bridge the
    data cannot rule out.
    """
    raw = measured.get(S.R_IN)
    values: dict = {S.BRIDGE_APPLIED: False}
    if raw is not None:
        values[S.R_IN_RAW] = raw
    if bridge is None:
        return values, [], fits
    jump, ci, needed = bridge
    if raw is not None and not (np.isfinite(ci) and ci < abs(raw)):
        # the fit cannot tell the jump from the membrane's charging: nothing to report
        return values, [S.CELL_BRIDGE_UNCERTAIN.make(jump / MOHM, reason="undetermined")], fits
    values[S.BRIDGE], values[S.BRIDGE_CI] = jump, ci
    if raw is not None:
        values[S.R_IN_CORRECTED] = raw - jump
    if not (needed and np.isfinite(ci) and abs(jump) > ci):
        flags = ([S.CELL_BRIDGE_UNCERTAIN.make(jump / MOHM, reason="includes_zero")]
                 if abs(jump) > 5 * MOHM
                 else [])
        if measured.get(S.R_IN_CI) is not None:
            # the raw R_in holds whatever bridge the data cannot rule out: up to |jump| + CI
            values[S.R_IN_CI] = float(np.hypot(measured[S.R_IN_CI], abs(jump) + ci))
            values[S.R_IN_CI_FROM] = (f"{measured[S.R_IN_CI_FROM]} and the bridge the data "
                                      "cannot rule out")
        return values, flags, fits
    flags = []
    if abs(jump) > 5 * MOHM:
        what = "subtracted from" if settings.correct_bridge else "left in"
        flags.append(S.CELL_BRIDGE.make(jump / MOHM, what=what))
    if settings.correct_bridge and raw is not None:
        fits = [with_bridge_removed(f, jump) for f in fits]
        values[S.BRIDGE_APPLIED] = True
        for q in (S.R_IN, S.R_IN_SLOPE, S.R_IN_CHORD):
            if measured.get(q) is not None:
                values[q] = measured[q] - jump
        if measured.get(S.R_IN_CI) is not None:
            values[S.R_IN_CI] = float(np.hypot(measured[S.R_IN_CI], ci))
            values[S.R_IN_CI_FROM] = f"{measured[S.R_IN_CI_FROM]} and the bridge's"
    return values, flags, fits


#: A sag component smaller than this share of τ0's amplitude leaves the cell passive
#: enough for the cable model (a trace of Ih, as in many fast-spiking interneurons; the
#: cell.sag flag's steady/peak threshold is 0.95; common practice, no source)
SLIGHT_SAG = 0.05


def _time_constants(fit, bs, avg: GroupAverage, boot: dict | None, fs: float,
                    not_passive: bool = False, noise_factor: float = 1.0
                    ) -> tuple[dict, list[Flag]]:
    """τ0, τ1 (τ2) with CIs and the component amplitudes of the reference step.

    τ0's CI is the fit's without a bootstrap; with one, the larger of the bootstrap's and
    what the noise allows: the bootstrap over sweeps sees what changes between sweeps,
    and from ten sweeps its sd alone scatters by a quarter; the floor is the fit's CI
    with the residual sd replaced by the baseline's (a misfit is no measure of precision)
    and widened for the correlated noise (`noise_factor`, a variance ratio)."""
    n = len(fit.taus)
    amps = onset_amplitudes(fit, avg)
    tau0_ci = float(fit.tau_ci95[0])
    if boot is not None:
        floor = tau0_ci * _noise_share(fit, avg, fs) * float(np.sqrt(max(noise_factor, 1.0)))
        tau0_ci = max(halfwidth(boot, "tau0") or 0.0, floor)
    values: dict = {S.N_COMPONENTS: n, S.TAU0: fit.taus[0], S.TAU0_CI: tau0_ci,
                    S.C0: amps[0], S.REF_STEP: avg.amplitude_A}
    if n >= 2:   # the exponential fit's own τ1 always; C1 only with the cell's τ1 (below)
        values[S.TAU1_EXP] = fit.taus[1]
    if n >= 3:
        values[S.TAU2] = fit.taus[2]
    if n < 2:  # the data show no second component: no τ1 from any model
        return values, [S.FIT_TAU1_UNRESOLVED.make(reason="one_component")]
    if not_passive:  # a fast component of a sagging response is no equalizing mode
        return values, [S.FIT_TAU1_UNRESOLVED.make(reason="not_passive")]
    if bs is not None:
        # the ball-and-stick fit uses the early transient with every equalizing mode in it,
        # so its τ1 is far more precise than two free exponentials fitted late enough to be
        # free of τ2, τ3 … (benchmarks/bench_cell.py)
        values[S.TAU1_SOURCE] = "ball-and-stick fit"
        tau1, tau1_ci = float(bs.taus_s[1]), max(halfwidth(boot, "tau1_model") or 0.0,
                                                  model_tau1_ci(bs))
    else:
        values[S.TAU1_SOURCE] = "exponential fit"
        hw = halfwidth(boot, "tau1")
        tau1, tau1_ci = float(fit.taus[1]), hw if hw is not None else float(fit.tau_ci95[1])
    if tau1 < 3 / fs:
        return values, [S.FIT_TAU1_UNRESOLVED.make(tau1 / MS, reason="too_fast")]
    if tau1_ci is None or not np.isfinite(tau1_ci) or tau1_ci > tau1:
        return values, [S.FIT_TAU1_UNRESOLVED.make(tau1 / MS, reason="wide_ci")]
    values[S.TAU1], values[S.TAU1_CI], values[S.C1] = tau1, tau1_ci, amps[1]
    return values, []


def _peel(g: GroupAverage, early: GroupAverage, fs: float, fit):
    """Automated peel of the first transient, from the early (artefact-end) fit start so
    the fast components are in view; its asymptote from the exponential fit."""
    from passivefit.core import peel

    seg = g.segments[0]
    name = "fit" if g.step.kind == "step" else "fit_off"
    a, b = span(early.windows_s[name], fs, g.v_V.size)
    t = np.arange(a, b) / fs - seg.edge_s
    try:
        # the first line from 10 % of its span, ending 5 noise sds above the floor: the log
        # of a remainder near the noise is biased, which tilts τ0 and then spoils τ1
        return peel.peel(t, g.v_V[a:b], float(fit.offsets[seg.index]),
                         n_components=max(2, len(fit.taus)), snr=5.0, late_start=0.1)
    except (ValueError, np.linalg.LinAlgError):
        return None
