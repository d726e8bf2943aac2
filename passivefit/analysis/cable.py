"""The cable interpretation: ball-and-stick fit of the combined response, the bridge
jump, L, ρ and the capacitances (docs/references.md §2–§4)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from passivefit.analysis.fits import FIT_ERRORS, fit_segments, onset_amplitudes
from passivefit.analysis.windows import span
from passivefit.core.qc import Flag
from passivefit.model import schema as S
from passivefit.model.results import GroupAverage


@dataclass(frozen=True)
class Chain:
    """What the model knows of the measurement chain: the filter corner (Hz; None =
    unfiltered or unknown), whether it is estimated, the variance inflation of the
    recording's correlated noise, whether a bridge jump may be fitted, and where the
    corner came from."""

    corner_hz: float | None = None
    estimate_corner: bool = False
    noise_factor: float = 1.0
    bridge: bool = True
    source: str = ""


def noise_factor(avg: GroupAverage, fs: float) -> float:
    """Variance inflation of the cable fit's errors by the recording's correlated noise,
    from the combined baseline, lags up to 2 ms (core.qc.correlated_noise_factor)."""
    from passivefit.core.qc import correlated_noise_factor

    a, b = span(avg.windows_s["baseline"], fs, avg.v_V.size)
    return correlated_noise_factor(avg.v_V[a:b], int(2e-3 * fs))


def fit_cable(avg: GroupAverage, fs: float, init, chain: Chain, profile: bool = False,
              segments: tuple | None = None, errors: bool = True
              ) -> tuple[object | None, Flag | None]:
    """Ball-and-stick fit of the combined response with the measurement chain
    (core.cablefit), searched thoroughly and with profile intervals when `profile`: (fit,
    None) when it succeeded; (fit, flag) when it converged with a
    value at its bound (its bridge still counts); (None, flag) when it failed.
    `segments`: those of `avg` (fit_segments) when already made; without `errors`, values
    only (no standard errors)."""
    from passivefit.core import cablefit

    fit_segs, records = segments or fit_segments(avg.v_V, fs, avg.step, avg.windows_s)
    segs = [cablefit.CableSegment(
        seg.t, seg.y, seg.weight, kind="charge" if rec.charging else "decay", group=0,
        duration_s=None if rec.charging else avg.step.duration_s, sample_interval_s=1 / fs,
        baseline=avg.v_base_V if rec.charging else None)
        for seg, rec in zip(fit_segs, records, strict=True)]
    if not segs:
        return None, None
    try:
        bs = cablefit.fit_ballstick(segs, init=init, corner_hz=chain.corner_hz,
                                    estimate_corner=chain.estimate_corner, bridge=chain.bridge,
                                    noise_factor=chain.noise_factor, profile=profile,
                                    thorough=profile, errors=errors)
    except FIT_ERRORS as exc:
        return None, S.CABLE_FIT_FAILED.make(reason="failed", problem=exc)
    if not bs.success:
        converged = not bs.message.startswith("solver")
        return bs if converged else None, S.CABLE_FIT_FAILED.make(
            reason="not_converged", problem=bs.message)
    return bs, None


def bridge_of(bs, avg: GroupAverage) -> tuple[float, float, bool] | None:
    """Bridge imbalance and its 95 % CI half-width (Ω), the fitted jump at the step onset
    that is not membrane charging over the step current, and whether the data need it;
    None without a fitted jump."""
    if bs is None or avg.step.kind != "step" or not np.isfinite(bs.bridge_V[0]):
        return None
    jump, ci = bs.bridge_V[0] / avg.amplitude_A, 1.96 * bs.bridge_se_V[0] / abs(avg.amplitude_A)
    if not bs.bridge_needed:  # the data are consistent with no jump: so is its interval
        ci = max(ci, abs(jump))
    return jump, ci, bs.bridge_needed


def model_tau1_ci(bs) -> float:
    """95 % CI half-width of the model τ1 = τ0/(1 + α1²), propagated from the covariance
    of ln τ0, ln L and ln ρ (1.96 sd; docs/references.md §6, a derived value)."""
    from passivefit.core import cable

    def ln_tau1(t: np.ndarray) -> float:
        alpha = cable.ballstick_alphas(float(np.exp(t[1])), float(np.exp(t[2])), 1)[0]
        return float(t[0] - np.log1p(alpha**2))

    t = np.log([bs.tau0_s, bs.L, bs.rho])
    grad = np.zeros(3)
    for k in range(3):
        step = np.zeros(3)
        step[k] = 1e-4
        grad[k] = (ln_tau1(t + step) - ln_tau1(t - step)) / 2e-4
    return float(1.96 * np.exp(ln_tau1(t)) * np.sqrt(max(grad @ bs.log_cov @ grad, 0.0)))


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


#: C = τ0/R_in and I·τ0/C0 of a fit that stops before the sag differ by more than this
#: share before the note on it is given (common practice, no source)
C_SAG_SHARE = 0.1


def _c_tau_before_sag(c_tau: float, i_step: float, tau0: float, c0: float) -> list[Flag]:
    """In a sagging cell τ0 comes from a fit that stops before the sag, but R_in from the
    steady state after it, where the sag's conductance is open: C = τ0/R_in pairs the two
    and comes out too large. The fit's own amplitude C0 (where its exponential heads,
    before the sag) gives I·τ0/C0 (docs/references.md §4) for the same membrane state; a
    note gives it when the two differ by more than C_SAG_SHARE."""
    from passivefit.core import cable

    if not c0 * i_step > 0:
        return []
    before = cable.c_total_step(i_step, tau0, c0)
    if abs(c_tau / before - 1) <= C_SAG_SHARE:
        return []
    return [S.CELL_C_BEFORE_SAG.make(before / S.PF, c=f"{before / S.PF:.0f} pF")]


def cable_values(fit, bs, g: GroupAverage, r_in: float | None, tau1: float | None,
                 cis: dict[str, float | None], L_cyl_ci: float | None,
                 passive: bool = True) -> tuple[dict, list[Flag]]:
    """Equivalent cylinder (exponential fit), ball-and-stick and capacitance (cable fit).

    `cis` holds the 95 % intervals (low, high) of "L" and "rho" (None without a cable fit);
    `L_cyl_ci` the bootstrap's half-width of L_cyl (None without one). A cell that is not `passive`
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

        for q, spec, value, bounds, ends in (
                (S.L_BS, S.CABLE_L_UNRESOLVED, bs.L, L_BOUNDS, (S.L_CI_LOW, S.L_CI_HIGH)),
                (S.RHO, S.CABLE_RHO_UNRESOLVED, bs.rho, RHO_BOUNDS, (S.RHO_CI_LOW, S.RHO_CI_HIGH))):
            lo, hi = cis[q.key]
            if not _inside(value, bounds):
                flags.append(S.CABLE_AT_BOUND.make(value, name=q.label, x=value))
            elif tau1 is None:
                pass  # no τ1 resolved, so no electrotonic length (fit.tau1_unresolved)
            elif np.isfinite(lo) and np.isfinite(hi) and 0 < lo <= value <= hi:
                # a bounded interval, asymmetric where the likelihood is (profile)
                values[q], values[S.BY_KEY[q.ci]] = value, (hi - lo) / 2
                values[ends[0]], values[ends[1]] = lo, hi
            else:
                flags.append(spec.make(value))
        values[S.TAU0_MODEL] = bs.tau0_s
        values[S.C_TOTAL] = bs.c_total_F(0, step.amplitude_A)
        if kind == "step" and r_in and S.RHO in values:   # a ρ given, to check
            more, more_flags = rho_cross_check(bs, r_in * step.amplitude_A)
            values.update(more)
            flags.extend(more_flags)
    elif kind == "step" and passive and fit.sag is None:  # no cable fit: I·τ0/B0 of the exp. fit
        #                                          (docs/references.md §4)
        c0 = onset_amplitudes(fit, g)[0]
        if c0 * step.amplitude_A > 0:
            values[S.C_TOTAL] = cable.c_total_step(step.amplitude_A, tau0, c0)
    elif kind == "step" and not passive and fit.sag is None and values.get(S.C_TAU):
        flags.extend(_c_tau_before_sag(values[S.C_TAU], step.amplitude_A, tau0,
                                       onset_amplitudes(fit, g)[0]))
    if values.get(S.C_TAU) and values.get(S.C_TOTAL):
        values[S.C_RATIO] = values[S.C_TAU] / values[S.C_TOTAL]
    if tau1 is None or fit.sag is not None or not passive:  # no τ1, or not a passive cell
        return values, flags
    values[S.L_CYL] = cable.cylinder_L(tau0, tau1)
    values[S.L_CYL_CI] = L_cyl_ci
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
