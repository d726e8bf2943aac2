"""The cable interpretation: ball-and-stick fit of the combined response, the bridge
jump, L, ρ and the capacitances (docs/references.md §2–§4)."""

from __future__ import annotations

import numpy as np

from passivefit.analysis.fits import FIT_ERRORS, fit_segments, onset_amplitudes, response_amplitudes
from passivefit.core.qc import Flag, percentile_halfwidth
from passivefit.core.steps import Step
from passivefit.model import schema as S
from passivefit.model.results import GroupAverage


def bessel_delay_s(filter_hz: float | None) -> float:
    """Group delay of a 4-pole Bessel low-pass at low frequency, 0.336/fc, in s (0 if None).

    From memory (textbook value for the 4-pole Bessel's normalised group delay,
    0.3363/fc with fc the −3 dB corner).
    """
    return 0.0 if not filter_hz else 0.336 / filter_hz


def cable_init(exp_fit, step: Step) -> tuple[float, float, float] | None:
    """Start values (τ0, L, ρ) for the ball-and-stick fit from an exponential fit."""
    from passivefit.core import cablefit

    if exp_fit is None or len(exp_fit.taus) < 2:
        return None
    amps = response_amplitudes(exp_fit, 0, step.kind)  # segment 0: the first transient
    kind = "step" if step.kind == "step" else "square"
    try:
        return cablefit.initial_guess(exp_fit.taus[0], exp_fit.taus[1], amps[1] / amps[0],
                                      kind, None if kind == "step" else step.duration_s)
    except ValueError:
        return None


def fit_cable(avg: GroupAverage, fs: float, init, delay_s: float
              ) -> tuple[object | None, Flag | None]:
    """Ball-and-stick fit of the combined response (core.cablefit): (fit, None), or
    (None, the flag that says why it failed)."""
    from passivefit.core import cablefit

    fit_segs, records = fit_segments(avg.v_V, fs, avg.step, avg.windows_s)
    segs = [cablefit.CableSegment(
        seg.t, seg.y, seg.weight, kind="charge" if rec.charging else "decay", group=0,
        duration_s=None if rec.charging else avg.step.duration_s, sample_interval_s=1 / fs)
        for seg, rec in zip(fit_segs, records, strict=True)]
    if not segs:
        return None, None
    try:
        bs = cablefit.fit_ballstick(segs, init=init, delay_s=delay_s)
    except FIT_ERRORS as exc:
        return None, S.CABLE_FIT_FAILED.make(reason="failed", problem=exc)
    if not bs.success:
        return None, S.CABLE_FIT_FAILED.make(reason="not_converged", problem=bs.message)
    return bs, None


def bridge_of(bs, avg: GroupAverage) -> float | None:
    """Bridge imbalance (Ω): the jump at the step onset that is not membrane charging.

    From the ball-and-stick fit, whose modes sum to the whole membrane response (free
    exponentials extrapolated to the edge miss the fast components); None without it.
    """
    if bs is None or avg.step.kind != "step":
        return None
    return bs.bridge_jump_V(0, avg.v_base_V) / avg.amplitude_A


def model_tau1_ci(bs) -> float:
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


def rho_cross_check(bs, v_inf: float) -> tuple[dict, list[Flag]]:
    """ρ from the amplitudes (steady deflection vs B0, docs/references.md §3) against the
    fit's ρ."""
    from passivefit.core import cable

    try:
        rho_amp = cable.rho_from_amplitudes_step(v_inf, float(bs.b0_V[0]), bs.L)
    except cable.CableFitError as exc:
        return {}, [S.CABLE_RHO_MISMATCH.make(reason="no_value", problem=exc)]
    flags = []
    if not 0.5 < rho_amp / bs.rho < 2.0:
        flags.append(S.CABLE_RHO_MISMATCH.make(rho_amp, reason="disagree"))
    return {S.RHO_AMPLITUDE: rho_amp}, flags


def _inside(value: float, bounds: tuple[float, float]) -> bool:
    """Whether a fitted value lies clear of its fit bounds (2 % margin)."""
    return bounds[0] * 1.02 < value < bounds[1] / 1.02


def cable_values(fit, bs, g: GroupAverage, r_in: float | None, tau1: float | None,
                 cis: dict[str, float | None], L_cyl_samples: np.ndarray | None,
                 passive: bool = True) -> tuple[dict, list[Flag]]:
    """Equivalent cylinder (exponential fit), ball-and-stick and capacitance (cable fit).

    `cis` holds the 95 % half-widths of "L" and "rho" (None without a cable fit);
    `L_cyl_samples` the resampled L_cyl values for its CI. A cell that is not `passive`
    (it sags) gets only C = τ0/R_in: the cable values assume a passive membrane.
    """
    from passivefit.core import cable

    values: dict = {}
    flags: list[Flag] = []
    tau0 = float(fit.taus[0])
    step, kind = g.step, g.step.kind
    if r_in:
        values[S.C_TAU] = cable.c_tau(tau0, r_in)
    if bs is not None:
        from passivefit.core.cablefit import L_BOUNDS, RHO_BOUNDS

        for q, spec, value, bounds in ((S.L_BS, S.CABLE_L_UNRESOLVED, bs.L, L_BOUNDS),
                                       (S.RHO, S.CABLE_RHO_UNRESOLVED, bs.rho, RHO_BOUNDS)):
            ci = cis[q.key]
            if not _inside(value, bounds):
                flags.append(S.CABLE_AT_BOUND.make(value, name=q.label, x=value))
            elif tau1 is None:
                pass  # no τ1 resolved, so no electrotonic length (fit.tau1_unresolved)
            elif ci < value:
                values[q], values[S.BY_KEY[q.ci]] = value, ci
            else:
                flags.append(spec.make(value))
        values[S.TAU0_MODEL] = bs.tau0_s
        values[S.C_TOTAL] = bs.c_total_F(0, step.amplitude_A)
        if kind == "step" and r_in and _inside(bs.rho, RHO_BOUNDS):
            more, more_flags = rho_cross_check(bs, r_in * step.amplitude_A)
            values.update(more)
            flags.extend(more_flags)
    elif kind == "step" and passive and fit.sag is None:  # no cable fit: I·τ0/B0 of the exp. fit
        #                                          (docs/references.md §4)
        c0 = onset_amplitudes(fit, g)[0]
        if c0 * step.amplitude_A > 0:
            values[S.C_TOTAL] = cable.c_total_step(step.amplitude_A, tau0, c0)
    if values.get(S.C_TAU) and values.get(S.C_TOTAL):
        values[S.C_RATIO] = values[S.C_TAU] / values[S.C_TOTAL]
    if tau1 is None or fit.sag is not None or not passive:  # no τ1, or not a passive cell
        return values, flags
    values[S.L_CYL] = cable.cylinder_L(tau0, tau1)
    values[S.L_CYL_CI] = None if L_cyl_samples is None else percentile_halfwidth(L_cyl_samples)
    # amplitude ratios of free exponentials are trustworthy only with τ2 fitted as well
    ratios = {}
    if len(fit.taus) >= 3:
        amps = onset_amplitudes(fit, g)
        t0, t1 = float(fit.taus[0]), float(fit.taus[1])
        ratios = {"b1_over_b0": amps[1] / amps[0]} if kind == "step" else {
            "c1_over_c0": amps[1] / amps[0] / cable.square_pulse_factor(t0, t1, step.duration_s)}
    tau2 = float(fit.taus[2]) if len(fit.taus) > 2 else None
    for check, value, extra in cable.implausible(
            tau0=tau0, tau1=tau1, tau2=tau2, **ratios,
            L=bs.L if bs else None, rho=bs.rho if bs else None):
        spec = S.PLAUSIBILITY[check]
        reason = check.split("_")[1] if spec is S.CABLE_SHUNT_SUSPECTED else None
        flags.append(spec.make(value, reason=reason, x=value, **extra))
    return values, flags
