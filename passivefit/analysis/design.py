"""What to record next: the Cramér–Rao lower bound of the cell's values under the protocol
that was recorded, and what more sweeps or another protocol would give.

The Cramér–Rao lower bound (CRLB) of an unbiased estimator of parameters θ from data
x = s(θ) + w, with Gaussian noise w of covariance C, is the inverse of the Fisher
information F = Jᵀ C⁻¹ J, J = ∂s/∂θ (docs/references.md §10); a derived value g(θ) has
the bound ∇gᵀ F⁻¹ ∇g. Here

- s(θ) is one sweep of the recorded protocol without noise, the model the analysis fits
  (core.cablefit, docs/references.md §3 and §11): the ball-and-stick response, the
  residual bridge through the electrode lag, the 4-pole Bessel filter applied exactly,
  at the fitted cell;
- θ = (ln τ0, ln L, ln ρ, ln R_in, R_bridge) plus, as a nuisance, each sweep's baseline
  level (in the logarithms: the bound of a relative error comes out directly); J is
  analytic: s is linear in R_in, R_bridge and the baseline, and its derivatives in ln τ0,
  ln L and ln ρ follow from those of the modes' rates and amplitudes (implicit
  differentiation of the eigenvalue equation, core.cablefit.mode_table) through the
  filtered exponentials (core.lowpass.filtered_exponential_slopes; docs/references.md
  §10, §11);
- the noise is Gaussian and stationary with the standard deviation measured from the
  baselines. Filtered noise is correlated: it is whitened by an autoregressive model
  fitted to its autocorrelation (the measured one, or else that of white noise through
  the recorded filter), and F = J_wᵀ J_w / σ_e² (docs/references.md §10);
- sweeps are independent: F adds up over the sweeps. Each sweep's response scales with
  its amplitude and has its own baseline, so n sweeps of amplitudes a_k give
  (Σ a_k²)/a² times the information of one sweep of amplitude a (after the baseline is
  projected out).

Samples within `fit_start_s` after each edge of the current are left out, as the
analysis leaves out the electrode artefact. Drift, hum, spontaneous events and active
conductances are not in the model: the bound is for a passive cell in stationary noise,
and an estimator can only be worse.

From the bound: the efficiency of the achieved CI (bound sd / achieved sd), the sweeps of
this protocol needed to reach a target CI (the CI shrinks as 1/√n, a bootstrap's with its
few-sweeps widening as well; from the achieved CI when there is one, else from the
bound), and the factor by which a few other protocols (brief pulses, double sampling
rate, a wider filter, half or double amplitude) would
narrow the L and ρ intervals, each computed by the same model.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from functools import lru_cache

import numpy as np

from passivefit.core.lowpass import Lowpass, filtered_exponential_slopes, filtered_exponentials
from passivefit.core.qc import Z95, detrended, few_units_factor, fft_length
from passivefit.model import schema as S

MAX_SWEEPS = 500                   # beyond this a value is "not resolvable" in practice
#: Default targets: 95 % CI half-width relative to the value.
TARGETS = {"tau0": 0.02, "tau1": 0.10, "L": 0.10, "rho": 0.30}
#: The values bounded, in order, with their schema quantity (labels, units, digits).
NAMES = ("tau0", "tau1", "L", "rho", "r_in", "bridge")
QUANTITY = {"tau0": S.TAU0, "tau1": S.TAU1, "L": S.L_BS, "rho": S.RHO, "r_in": S.R_IN,
            "bridge": S.BRIDGE}
PULSE_S = 0.5e-3                   # the brief pulse of the "pulses instead of steps" change
AR_ORDER = 64                      # autoregressive order of the noise whitening
_LOG_STEP = 1e-4                   # central-difference step in the logarithms


# ---------------------------------------------------------------------------- generic
def ar_whitener(acf: Sequence[float], order: int | None = None) -> tuple[np.ndarray, float]:
    """Autoregressive whitening filter of stationary noise from its autocorrelation.

    Parameters
    ----------
    acf : sequence of float
        Autocorrelation at lags 0, 1, ... samples (lag 0 = 1, or any scale).
    order : int, optional
        AR order (default: len(acf) − 1, at most `AR_ORDER`).

    Returns
    -------
    b : ndarray
        FIR coefficients [1, −a_1, ..., −a_p]: e = b * x is nearly white.
    ratio : float
        var(e)/var(x), the innovation variance relative to the noise variance.

    Notes
    -----
    Yule–Walker equations (docs/references.md §10); with `acf` = [1, 0, ...] (white noise)
    the filter is [1] and the ratio 1.
    """
    r = np.asarray(acf, dtype=float)
    r = r / r[0]
    p = min(len(r) - 1, AR_ORDER) if order is None else min(order, len(r) - 1)
    if p < 1 or np.allclose(r[1:p + 1], 0.0):
        return np.ones(1), 1.0
    lags = np.arange(p)
    a = np.linalg.solve(r[np.abs(lags[:, None] - lags)], r[1:p + 1])
    ratio = float(1.0 - np.dot(a, r[1:p + 1]))
    if not (math.isfinite(ratio) and ratio > 1e-6):       # not positive definite: no whitening
        return np.ones(1), 1.0
    return np.concatenate(([1.0], -a)), ratio


def noise_autocorrelation(baselines: Sequence[np.ndarray], lags: int = AR_ORDER
                          ) -> tuple[float, np.ndarray]:
    """Standard deviation (V) and autocorrelation (lags 0..`lags`) of the noise in
    stretches of baseline (each detrended by a straight line first).

    Parameters
    ----------
    baselines : sequence of ndarray
        Voltage stretches with no stimulus, in V (e.g. the pre-step part of each sweep).
    lags : int
        Largest lag, in samples.
    """
    total, acov, count = 0.0, np.zeros(lags + 1), 0
    by_size: dict[int, list[np.ndarray]] = {}   # stretches of one length done together
    for x in baselines:
        x = np.asarray(x, dtype=float)
        if x.size > 2 * lags + 2:
            by_size.setdefault(x.size, []).append(x)
    for n, group in by_size.items():
        x = detrended(np.stack(group))   # each row about its own line
        products = np.stack([np.einsum("ij,ij->i", x[:, : n - k], x[:, k:])
                             for k in range(lags + 1)], axis=1)
        for row in products:
            acov += row
            total += float(row[0])
            count += n
    if count == 0 or total <= 0:
        raise ValueError(f"no baseline stretch longer than {2 * lags + 2} samples to measure "
                         "the noise from")
    return math.sqrt(total / count), acov / acov[0]


def jacobian(model: Callable[[np.ndarray], np.ndarray], theta: Sequence[float],
             steps: Sequence[float]) -> np.ndarray:
    """∂model/∂θ by central differences, one column per parameter.

    Parameters
    ----------
    model : callable
        θ (ndarray) → the noiseless signal (ndarray, N samples).
    theta : sequence of float
        Where to differentiate (give logarithms for relative parameters).
    steps : sequence of float
        Difference step of each parameter (in its own units).
    """
    theta = np.asarray(theta, dtype=float)
    cols = []
    for i, h in enumerate(steps):
        up, down = theta.copy(), theta.copy()
        up[i] += h
        down[i] -= h
        cols.append((model(up) - model(down)) / (2.0 * h))
    return np.column_stack(cols)


def fisher_information(jac: np.ndarray, sigma: float, acf: Sequence[float] | None = None,
                       keep: np.ndarray | None = None, *,
                       spectrum: Callable[[], np.ndarray] | None = None) -> np.ndarray:
    """Fisher information JᵀC⁻¹J of Gaussian noise of sd `sigma` (signal units).

    Parameters
    ----------
    jac : ndarray, shape (N, P)
        Derivatives of the noiseless signal (`jacobian`).
    sigma : float
        Noise standard deviation.
    acf : sequence of float, optional
        Noise autocorrelation at lags 0.. (None: white noise). The columns are whitened
        by `ar_whitener` along the samples before the sum.
    keep : ndarray of bool, optional
        Samples that are used (the others are whitened with the rest, then left out).
    spectrum : callable, optional
        Gives the columns' `_spectrum`, when it is kept for other noise models of the same
        Jacobian (default: computed here).

    Notes
    -----
    The first p whitened samples (p the AR order) lack their history and are left out:
    the sum is the conditional likelihood's (docs/references.md §10). With an order of
    64 the bound of Bessel-filtered noise is within about 5 % of the exact JᵀC⁻¹J
    (slightly optimistic; tests/test_design.py).
    """
    used = np.ones(jac.shape[0], dtype=bool) if keep is None else np.asarray(keep, bool).copy()
    if acf is None:
        return _gram(jac, used) / sigma**2
    b, ratio = ar_whitener(acf)
    used[: b.size - 1] = False
    if b.size == 1:
        return _gram(jac, used) * b[0] ** 2 / (sigma**2 * ratio)
    columns = _spectrum(jac) if spectrum is None else spectrum()
    return _whitened_gram(jac, columns, b, used) / (sigma**2 * ratio)


def _gram(x: np.ndarray, used: np.ndarray) -> np.ndarray:
    """Σ xₙxₙᵀ over the `used` rows of `x`."""
    x = x[used]
    return x.T @ x


def _spectrum(jac: np.ndarray) -> np.ndarray:
    """The columns' real DFT, zero-padded so that an FIR filter of up to `AR_ORDER` + 1
    taps does not wrap around, one row per column with the real and imaginary parts
    interleaved: shape (P, 2 (M // 2 + 1)), M the padded length."""
    size = fft_length(jac.shape[0] + AR_ORDER)
    return np.fft.rfft(np.ascontiguousarray(jac.T), size, axis=1).view(float)


def _whitened_gram(jac: np.ndarray, spectrum: np.ndarray, b: np.ndarray, used: np.ndarray
                   ) -> np.ndarray:
    """Σ eₙeₙᵀ over the `used` rows of e = `b` * `jac` (the columns FIR-filtered, zero
    history), from the columns' `spectrum` (`_spectrum`).

    Every sample of the filtered columns, those past the end included, sums by Parseval's
    theorem to Σₖ wₖ |B(k)|² Re(Ĵₖ* Ĵₖᵀ) (wₖ = 1/M at 0 and M/2, else 2/M; B the filter's
    DFT); the samples not used and the p past the end are then taken off, each filtered
    directly. When those hold much of the sum (or are many), the filtered columns are
    summed instead, so that no difference of near-equal sums loses digits."""
    n, taps = jac.shape[0], b.size
    size = fft_length(n + AR_ORDER)
    response = np.fft.rfft(b, size)
    if np.count_nonzero(~used) <= n // 8:
        weight = np.full(response.size, 2.0 / size)
        weight[0] = 1.0 / size
        if size % 2 == 0:
            weight[-1] = 1.0 / size
        weight *= response.real**2 + response.imag**2
        total = (spectrum * np.repeat(weight, 2)) @ spectrum.T
        left = np.concatenate((np.flatnonzero(~used), np.arange(n, n + taps - 1)))
        rows = left[:, None] - np.arange(taps)               # the samples each one sums
        inside = (rows >= 0) & (rows < n)
        e = np.einsum("j,ijp->ip", b, jac[np.clip(rows, 0, n - 1)] * inside[..., None])
        dropped = e.T @ e
        if np.all(np.diag(dropped) <= 0.5 * np.diag(total)):
            return total - dropped
    filtered = np.fft.irfft(spectrum.view(complex) * response, size, axis=1)[:, :n]
    return _gram(filtered.T, used)


def covariance(fisher: np.ndarray) -> np.ndarray:
    """The CRLB covariance F⁻¹. A direction with no information (an eigenvalue of the
    scaled F below 1e-12 of the largest) gives an infinite variance to the parameters
    that take part in it (loading above 1e-3); the others keep finite values."""
    scale = np.sqrt(np.clip(np.diag(fisher), 1e-300, None))
    f = fisher / np.outer(scale, scale)
    w, v = np.linalg.eigh(f)
    tiny = w.max() * 1e-12 if w.size and w.max() > 0 else np.inf
    good = w > tiny
    cov = (v[:, good] / w[good]) @ v[:, good].T
    lost = np.any(np.abs(v[:, ~good]) > 1e-3, axis=1)
    cov = cov / np.outer(scale, scale)
    cov[lost, :] = np.inf
    cov[:, lost] = np.inf
    return cov


def profile_out(fisher: np.ndarray, nuisance: Sequence[int]) -> np.ndarray:
    """Information on the other parameters with the `nuisance` ones estimated as well
    (the Schur complement)."""
    keep = [i for i in range(fisher.shape[0]) if i not in set(nuisance)]
    a = fisher[np.ix_(keep, keep)]
    b = fisher[np.ix_(keep, list(nuisance))]
    c = fisher[np.ix_(list(nuisance), list(nuisance))]
    return a - b @ np.linalg.pinv(c) @ b.T


# ---------------------------------------------------------------------------- the cell
@dataclass(frozen=True)
class Protocol:
    """One sweep of the recorded protocol, in SI.

    Attributes
    ----------
    kind : str
        "step" or "pulse".
    onset_s, duration_s : float
        The step's (or pulse's) start from the sweep start and its duration, in s.
    amplitude_A : float
        The root-mean-square amplitude over the sweeps used, in A (sign kept).
    sweep_s : float
        The part of the sweep analysed, from its start, in s.
    sample_rate_hz : float
    filter_hz : float or None
        The low-pass corner of the recording, in Hz.
    fit_start_s : float
        Samples this long after each edge are not used (the electrode artefact), in s.
    electrode_tau_s : float
        Time constant of the residual bridge's artefact, in s.
    bridge_known : bool
        The analysis fitted no bridge jump (its data did not need one): the bridge is then
        not a parameter of the bound either.
    """

    kind: str
    onset_s: float
    duration_s: float
    amplitude_A: float
    sweep_s: float
    sample_rate_hz: float
    filter_hz: float | None
    fit_start_s: float = 0.0
    electrode_tau_s: float = 50e-6
    bridge_known: bool = False

    def times(self) -> np.ndarray:
        """The sample times of the sweep analysed, in s."""
        return np.arange(int(round(self.sweep_s * self.sample_rate_hz))) / self.sample_rate_hz

    @property
    def lowpass(self) -> Lowpass | None:
        return None if self.filter_hz is None else Lowpass(self.filter_hz)

    def keep(self) -> np.ndarray:
        t = self.times()
        out = np.ones(t.size, dtype=bool)
        for edge in (self.onset_s, self.onset_s + self.duration_s):
            out &= ~((t >= edge) & (t < edge + self.fit_start_s))
        if self.kind == "pulse":
            out &= ~((t >= self.onset_s) & (t < self.onset_s + self.duration_s))
        return out


@dataclass(frozen=True)
class Bound:
    """One value: its bound, the CI achieved, and the sweeps for its target.

    Attributes (SI; `to_dict` gives display units)
    ----------
    name : str
        One of `NAMES`.
    value : float
    crlb_ci : float
        1.96 × the CRLB sd for the sweeps used (inf: not resolvable by this protocol).
    achieved_ci : float or None
        The analysis's 95 % CI half-width, when given.
    efficiency : float or None
        crlb_ci / achieved_ci (1: as good as any unbiased estimator can be).
    target_ci : float or None
        The target half-width (absolute).
    sweeps_needed : int or None
        Sweeps of this protocol for the target, from the achieved CI when there is one,
        else from the bound (None: no target, or more than the limit).
    sweeps_needed_bound : int or None
        The same from the bound alone: what an efficient estimator would need.
    note : str
        The answer in words.
    """

    name: str
    value: float
    crlb_ci: float
    achieved_ci: float | None
    efficiency: float | None
    target_ci: float | None
    sweeps_needed: int | None
    note: str
    sweeps_needed_bound: int | None = None

    def to_dict(self) -> dict:
        q = QUANTITY[self.name]
        return {"quantity": q.key, "label": q.label, "unit": q.unit,
                "value": q.display(self.value), "crlb_ci95": _shown(q, self.crlb_ci),
                "achieved_ci95": _shown(q, self.achieved_ci),
                "efficiency": _round(self.efficiency, 3),
                "target_ci95": _shown(q, self.target_ci),
                "sweeps_needed": self.sweeps_needed,
                "sweeps_needed_bound": self.sweeps_needed_bound, "note": self.note}


@dataclass(frozen=True)
class Change:
    """A protocol change and the factor by which it narrows the L and ρ intervals (the
    CRLB now / with the change, the same number of sweeps; > 1 narrower)."""

    change: str
    L_narrower: float
    rho_narrower: float
    detail: str

    def to_dict(self) -> dict:
        return {"change": self.change, "L_narrower_by": _round(self.L_narrower, 3),
                "rho_narrower_by": _round(self.rho_narrower, 3), "detail": self.detail}


@dataclass(frozen=True)
class DesignAdvice:
    """What `advise` found: the bounds, the sweeps needed, the protocol changes, in words.

    `to_dict()` is the JSON ``design`` block.
    """

    n_sweeps: int
    noise_sd_V: float
    protocol: Protocol
    bounds: tuple[Bound, ...]
    changes: tuple[Change, ...]
    advice: str
    assumptions: str
    max_sweeps: int = MAX_SWEEPS

    def bound(self, name: str) -> Bound:
        return next(b for b in self.bounds if b.name == name)

    def to_dict(self) -> dict:
        p = self.protocol
        return {
            "n_sweeps": self.n_sweeps,
            "noise_sd_mV": _round(self.noise_sd_V * 1e3, 4),
            "protocol": {"kind": p.kind, "onset_ms": _round(p.onset_s * 1e3, 6),
                         "duration_ms": _round(p.duration_s * 1e3, 6),
                         "amplitude_rms_pA": _round(p.amplitude_A * 1e12, 5),
                         "sample_rate_hz": p.sample_rate_hz,
                         "filter_hz": p.filter_hz,
                         S.FIT_START.key: S.FIT_START.display(p.fit_start_s)},
            "values": [b.to_dict() for b in self.bounds],
            "changes": [c.to_dict() for c in self.changes],
            "max_sweeps": self.max_sweeps,
            "advice": self.advice,
            "assumptions": self.assumptions,
        }


def _round(x: float | None, digits: int) -> float | None:
    if x is None or not math.isfinite(x):
        return None
    return float(f"{x:.{digits}g}")


def _shown(q, x: float | None) -> float | None:
    return None if x is None or not math.isfinite(x) else q.display(x)


def _forward(protocol: Protocol):
    """θ = (ln τ0, ln L, ln ρ, ln R_in, R_bridge, baseline) → one sweep (V)."""
    membrane, bridge = _membrane_unit(protocol), _bridge_unit(protocol)

    def model(theta: np.ndarray) -> np.ndarray:
        return (protocol.amplitude_A * (math.exp(theta[3]) * membrane(theta[:3])
                                        + theta[4] * bridge) + theta[5])

    return model


def _sweep_of(protocol: Protocol, edge_response, columns: tuple[int, ...] = ()) -> np.ndarray:
    """One sweep of `protocol` from the response to a unit step at an edge
    (`edge_response(u)`, u the times after the edge, ascending; `columns` more axes after
    the time's): the step's onset minus its end."""
    t = protocol.times()
    out = np.zeros((t.size, *columns))
    first = None   # the onset's response, reused for the end when it falls on the same grid
    for edge, sign in ((protocol.onset_s, 1.0), (protocol.onset_s + protocol.duration_s, -1.0)):
        after = int(np.searchsorted(t, edge, side="right"))   # the first sample after it
        if after == t.size:
            continue
        u = t[after:] - edge
        if first is not None and u.size <= first[0].size and np.allclose(
                u, first[0][:u.size], rtol=0.0, atol=1e-9 / protocol.sample_rate_hz):
            response = first[1][:u.size]   # the times after the edge agree to round-off
        else:
            response = edge_response(u)
            first = first or (u, response)
        out[after:] += sign * response
    return out


def _membrane_modes(protocol: Protocol, log_cell: np.ndarray, derivative: bool = False):
    """The rates (1/s) and amplitudes of the membrane's response to a unit step per unit
    R_in × current (its steady deflection 1): the step, the ball-and-stick modes
    (core.cablefit.mode_table), the modes beyond the shortest sampled time lumped into one
    at the next mode's rate (their sum at the edge is exact).

    With `derivative`, also their derivatives in (ln τ0, ln L, ln ρ), shape (3, n_rates)
    each: the table's by implicit differentiation of the eigenvalue equation; the lumped
    amplitude's from the others (all the modes' amplitudes sum to −1)."""
    from passivefit.core.cable import b0_over_vinf
    from passivefit.core.cablefit import mode_table, modes_needed

    tau0, L, rho = np.exp(log_cell)
    n = modes_needed(L, tau0, 1.0 / protocol.sample_rate_hz)
    rate, ratio, *slopes = mode_table(L, rho, n + 1, derivative)
    b0 = b0_over_vinf(L, rho)
    ratio[-1] = 1.0 / b0 - ratio[:-1].sum()   # the modes left out, at the next rate
    rates = np.concatenate(([0.0], rate / tau0))
    amplitudes = np.concatenate(([1.0], -b0 * ratio))
    if not derivative:
        return rates, amplitudes
    d_rate, d_ratio, d_inv = slopes[0]
    d_rates = np.zeros((3, rates.size))
    d_rates[0, 1:] = -rates[1:]
    d_rates[1:, 1:] = d_rate / tau0
    d_amplitudes = np.zeros((3, rates.size))   # −b0·ratio with 1/b0 = V_inf/B0
    d_amplitudes[1:, 1:-1] = -b0 * (d_ratio[:, :-1] - b0 * ratio[:-1] * d_inv[:, None])
    d_amplitudes[1:, -1] = -d_amplitudes[1:, 1:-1].sum(axis=1)
    return rates, amplitudes, d_rates, d_amplitudes


def _membrane_unit(protocol: Protocol):
    """(ln τ0, ln L, ln ρ) → the membrane's sweep response per unit R_in × current
    (`_membrane_modes`, filtered)."""
    def unit(log_cell: np.ndarray) -> np.ndarray:
        rates, amplitudes = _membrane_modes(protocol, log_cell)
        return _sweep_of(protocol, lambda u: filtered_exponentials(u, rates, amplitudes,
                                                                   protocol.lowpass))

    return unit


def _membrane_slopes(protocol: Protocol, log_cell: np.ndarray) -> np.ndarray:
    """∂/∂(ln τ0, ln L, ln ρ, ln R_in) of R_in × the membrane unit (`_membrane_unit`), per
    unit R_in × current, shape (n_samples, 4): analytic (the rates' and amplitudes'
    derivatives through core.lowpass.filtered_exponential_slopes). The last column, the
    unit itself, is the derivative with every amplitude moving in proportion."""
    rates, amplitudes, d_rates, d_amplitudes = _membrane_modes(protocol, log_cell, True)
    d_rates = np.vstack([d_rates, np.zeros(rates.size)])
    d_amplitudes = np.vstack([d_amplitudes, amplitudes])
    return _sweep_of(protocol, lambda u: filtered_exponential_slopes(
        u, rates, amplitudes, d_rates, d_amplitudes, protocol.lowpass), (4,))


def _bridge_unit(protocol: Protocol) -> np.ndarray:
    """The residual bridge's sweep response per unit resistance × current: a jump through
    the electrode's first-order lag, filtered."""
    rates = np.array([0.0, 1.0 / protocol.electrode_tau_s])
    return _sweep_of(protocol, lambda u: filtered_exponentials(u, rates, np.array([1.0, -1.0]),
                                                               protocol.lowpass))


def _sweep_jacobian(protocol: Protocol, theta: np.ndarray) -> np.ndarray:
    """∂s/∂θ of one sweep, θ = (ln τ0, ln L, ln ρ, ln R_in, R_bridge, baseline), analytic:
    the membrane's through its modes (`_membrane_slopes`), and s is linear in R_in,
    R_bridge and the baseline."""
    scale = protocol.amplitude_A * math.exp(theta[3])
    membrane = scale * _membrane_slopes(protocol, theta[:3])
    bridge = protocol.amplitude_A * _bridge_unit(protocol)
    return np.column_stack([membrane, bridge, np.ones(bridge.size)])


@lru_cache(maxsize=4)
def _cached_jacobian(protocol: Protocol, theta: tuple[float, ...]) -> np.ndarray:
    """`_sweep_jacobian`, kept for the next bound of the same protocol and cell (the
    advice's bound and the protocol changes' reference differ only in the noise model)."""
    jac = _sweep_jacobian(protocol, np.array(theta))
    jac.setflags(write=False)
    return jac


@lru_cache(maxsize=4)
def _cached_spectrum(protocol: Protocol, theta: tuple[float, ...]) -> np.ndarray:
    """`_spectrum` of `_cached_jacobian`, kept with it (the advice's bound and the
    protocol changes' reference whiten the same Jacobian by two noise models)."""
    spectrum = _spectrum(_cached_jacobian(protocol, theta))
    spectrum.setflags(write=False)
    return spectrum


def _per_unit_current(protocol: Protocol) -> Protocol:
    """`protocol` with an amplitude of 1 A: all but the baseline's column of the Jacobian
    scale with the amplitude, so one Jacobian serves every amplitude."""
    return replace(protocol, amplitude_A=1.0)


def _model_acf(protocol: Protocol) -> np.ndarray:
    lags = np.arange(AR_ORDER + 1) / protocol.sample_rate_hz
    if protocol.lowpass is None:
        return (lags == 0).astype(float)
    return protocol.lowpass.noise_acf(lags)


def cell_covariance(tau0_s: float, L: float, rho: float, r_in_ohm: float, bridge_ohm: float,
                    protocol: Protocol, noise_sd_V: float, n_sweeps: float,
                    acf: Sequence[float] | None = None) -> np.ndarray:
    """CRLB covariance of (ln τ0, ln L, ln ρ, ln R_in, R_bridge) for `n_sweeps` sweeps of
    `protocol` (each sweep's baseline estimated too); `acf` None: the filter's."""
    theta = np.array([math.log(tau0_s), math.log(L), math.log(rho), math.log(r_in_ohm),
                      bridge_ohm, 0.0])
    key, unit = tuple(theta), _per_unit_current(protocol)
    fisher = fisher_information(_cached_jacobian(unit, key), noise_sd_V,
                                _model_acf(protocol) if acf is None else acf, protocol.keep(),
                                spectrum=lambda: _cached_spectrum(unit, key))
    scale = np.array([*[protocol.amplitude_A] * 5, 1.0])   # s is linear in the current
    fisher = fisher * np.outer(scale, scale)
    if not protocol.bridge_known:
        return covariance(n_sweeps * profile_out(fisher, [5]))
    keep = [0, 1, 2, 3, 5]   # the bridge held at its value: not estimated
    cov = np.zeros((5, 5))
    cov[:4, :4] = covariance(n_sweeps * profile_out(fisher[np.ix_(keep, keep)], [4]))
    cov[4, 4] = math.inf
    return cov


def _sds(cov: np.ndarray, tau0_s: float, L: float, rho: float, r_in_ohm: float
         ) -> tuple[dict, float]:
    """CRLB sd of each of `NAMES` (SI) from the covariance of θ, and τ1 (s)."""
    grad, tau1 = _tau1_gradient(tau0_s, L, rho)

    def sd(var: float) -> float:
        return math.sqrt(var) if math.isfinite(var) and var >= 0 else math.inf

    with np.errstate(invalid="ignore"):
        var_tau1 = (float(grad[:3] @ cov[:3, :3] @ grad[:3]) if np.all(np.isfinite(cov[:3, :3]))
                    else math.inf)
    return {"tau0": tau0_s * sd(cov[0, 0]), "tau1": tau1 * sd(var_tau1),
            "L": L * sd(cov[1, 1]), "rho": rho * sd(cov[2, 2]),
            "r_in": r_in_ohm * sd(cov[3, 3]), "bridge": sd(cov[4, 4])}, tau1


@lru_cache(maxsize=8)
def _tau1_gradient(tau0_s: float, L: float, rho: float) -> tuple[np.ndarray, float]:
    """∂ ln τ1/∂(ln τ0, ln L, ln ρ) by central differences, and τ1 (s): the same for every
    protocol of one cell, so kept for the protocol changes' bounds."""
    def ln_tau1(t: np.ndarray) -> float:
        from passivefit.core.cable import ballstick_alphas

        alpha = ballstick_alphas(math.exp(t[1]), math.exp(t[2]), 1)[0]
        return t[0] - math.log1p(alpha**2)

    t = np.array([math.log(tau0_s), math.log(L), math.log(rho)])
    grad = np.zeros(5)
    for i in range(3):
        up, down = t.copy(), t.copy()
        up[i] += _LOG_STEP
        down[i] -= _LOG_STEP
        grad[i] = (ln_tau1(up) - ln_tau1(down)) / (2 * _LOG_STEP)
    grad.setflags(write=False)
    return grad, math.exp(ln_tau1(t))


# ---------------------------------------------------------------------------- advise
def advise(*, tau0_s: float, L: float, rho: float, r_in_ohm: float, bridge_ohm: float = 0.0,
           kind: str, onset_s: float, duration_s: float, amplitudes_A: Sequence[float],
           sweep_s: float, sample_rate_hz: float, filter_hz: float | None,
           noise_sd_V: float, n_sweeps: int,
           achieved_ci: Mapping[str, float | None] | None = None,
           targets: Mapping[str, float] | None = None,
           noise_acf: Sequence[float] | None = None, fit_start_s: float = 0.0,
           electrode_tau_s: float = 50e-6, max_sweeps: int = MAX_SWEEPS,
           protocol_changes: bool = True, bridge_known: bool = False,
           bootstrapped: bool = False) -> DesignAdvice:
    """The CRLB of this cell under this protocol, and what to record next.

    Parameters
    ----------
    tau0_s, L, rho, r_in_ohm, bridge_ohm : float
        The fitted cell: τ0 (s), ball-and-stick L and ρ, input resistance (Ω), the bridge
        jump (Ω; 0 when none).
    kind : {"step", "pulse"}
        The current waveform of each sweep.
    onset_s, duration_s : float
        Its start from the sweep start and its duration, in s.
    amplitudes_A : sequence of float
        The amplitude of each sweep used (A); cycled when shorter than `n_sweeps`.
    sweep_s : float
        The length of the sweep used, from its start (s), e.g. up to the next step.
    sample_rate_hz : float
    filter_hz : float or None
        The recording's low-pass corner (Hz), None when unknown or none.
    noise_sd_V : float
        The noise standard deviation measured from the baselines, in V.
    n_sweeps : int
        The sweeps the cell values come from.
    achieved_ci : mapping, optional
        The analysis's 95 % CI half-widths by name (`NAMES`), in SI (s, Ω, pure numbers);
        None or missing for values without a CI.
    targets : mapping, optional
        Target 95 % half-widths relative to the value, by name (default `TARGETS`).
    noise_acf : sequence of float, optional
        The noise autocorrelation at lags 0.. samples (`noise_autocorrelation`); default:
        white noise through the recorded filter.
    fit_start_s : float
        Samples this long after each current edge are not used, in s.
    electrode_tau_s : float
        Time constant of the bridge artefact, in s.
    max_sweeps : int
        More sweeps than this count as "not resolvable with any reasonable number".
    protocol_changes : bool
        Also compute the protocol changes (most of the time: about 1 s of the 1.4 s of a
        1 s sweep at 20 kHz on a 2-core machine); False leaves `changes` empty.
    bridge_known : bool
        The analysis fitted no bridge jump (a likelihood-ratio test found none): the bound
        then holds the bridge at `bridge_ohm` instead of estimating it, as the fit did.
    bootstrapped : bool
        The achieved CIs come from a bootstrap over the `n_sweeps` sweeps, widened for few
        sweeps (core.qc.few_units_factor): the widening is taken out before they are scaled
        as 1/√n, and put back at the count of sweeps needed.

    Raises
    ------
    ValueError
        A value that is not finite and positive, or an unknown `kind`, in one line.
    """
    for name, value in (("tau0_s", tau0_s), ("L", L), ("rho", rho), ("r_in_ohm", r_in_ohm),
                        ("sweep_s", sweep_s), ("sample_rate_hz", sample_rate_hz),
                        ("noise_sd_V", noise_sd_V), ("duration_s", duration_s)):
        if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
            raise ValueError(f"`{name}` must be a finite positive number, not {value!r}")
    if kind not in ("step", "pulse"):
        raise ValueError(f"`kind` must be 'step' or 'pulse', not {kind!r}")
    if n_sweeps < 1 or not amplitudes_A:
        raise ValueError("no sweeps: the bound needs at least one sweep and its amplitude")
    amps = np.array([amplitudes_A[k % len(amplitudes_A)] for k in range(n_sweeps)], float)
    rms = float(np.sqrt(np.mean(amps**2)))
    if not rms > 0:
        raise ValueError("every amplitude is 0: the sweeps carry no information on the cell")
    sign = -1.0 if np.sum(amps) < 0 else 1.0
    protocol = Protocol(kind, onset_s, duration_s, sign * rms, sweep_s, sample_rate_hz,
                        filter_hz, fit_start_s, electrode_tau_s, bridge_known)
    cell = (tau0_s, L, rho, r_in_ohm)
    cov = cell_covariance(*cell, bridge_ohm, protocol, noise_sd_V, n_sweeps, noise_acf)
    sds, tau1 = _sds(cov, *cell)
    values = {"tau0": tau0_s, "tau1": tau1, "L": L, "rho": rho, "r_in": r_in_ohm,
              "bridge": bridge_ohm}
    goals = dict(TARGETS if targets is None else targets)
    achieved = dict(achieved_ci or {})
    bounds = tuple(_bound(name, values[name], Z95 * sds[name], achieved.get(name),
                          goals.get(name), n_sweeps, max_sweeps, bootstrapped)
                   for name in NAMES)
    changes = _changes(cell, bridge_ohm, protocol, noise_sd_V, sds) if protocol_changes \
        else ()
    advice = _advice(bounds, changes, n_sweeps, max_sweeps)
    return DesignAdvice(n_sweeps, noise_sd_V, protocol, bounds, changes, advice,
                        _assumptions(noise_acf is not None, fit_start_s))


def _bound(name: str, value: float, crlb_ci: float, achieved: float | None,
           target_rel: float | None, n: int, max_sweeps: int,
           bootstrapped: bool = False) -> Bound:
    q = QUANTITY[name]
    achieved = achieved if achieved is not None and math.isfinite(achieved) and achieved > 0 \
        else None
    efficiency = crlb_ci / achieved if achieved is not None and math.isfinite(crlb_ci) else None
    target = None if target_rel is None else abs(value) * target_rel
    expected = achieved if achieved is not None else crlb_ci
    needed, note = None, ""
    if target is not None and target > 0:
        want = f"±{100 * target_rel:g} %"
        count = math.inf
        if math.isfinite(expected):
            count = _count(n, expected, target, bootstrapped and achieved is not None)
        if not math.isfinite(crlb_ci) or count > max_sweeps:
            note = (f"{q.label} cannot be resolved to {want} with this protocol in any "
                    f"reasonable number of sweeps (more than {max_sweeps} needed)")
        elif expected <= target:
            needed = n
            note = f"{q.label} is within {want} already"
        else:
            needed = math.ceil(count)
            note = (f"{q.label} reaches {want} with about {needed} sweeps of this protocol "
                    f"({needed - n} more)")
    elif not math.isfinite(crlb_ci):
        note = f"{q.label} is not resolved by this protocol"
    if name == "r_in":
        note = ("the bound of R_in counts the bridge as unknown; an R_in that takes the bridge "
                "as balanced can be narrower")
    return Bound(name, value, crlb_ci, achieved, efficiency, target, needed, note,
                 _needed(n, crlb_ci, target, max_sweeps))


def _count(n: int, ci: float, target: float, widened: bool) -> float:
    """Sweeps (not rounded) for a CI of `ci` from `n` sweeps to shrink to `target`, as 1/√n;
    a `widened` CI (a bootstrap's, core.qc.few_units_factor) shrinks as that factor over √n,
    so the count is found by a few fixed-point steps (the factor changes slowly)."""
    if not widened:
        return n * (ci / target) ** 2
    per_sweep = ci / few_units_factor(n)
    count = n * (per_sweep / target) ** 2
    for _ in range(8):
        count = n * (per_sweep * few_units_factor(max(math.ceil(count), 2)) / target) ** 2
    return count


def _needed(n: int, ci: float, target: float | None, max_sweeps: int) -> int | None:
    """Sweeps for a CI of `ci` with `n` sweeps to shrink to `target` (as 1/√n)."""
    if target is None or not target > 0 or not math.isfinite(ci):
        return None
    count = max(float(n), n * (ci / target) ** 2)
    return None if count > max_sweeps else math.ceil(count - 1e-9)


def _changes(cell, bridge_ohm: float, protocol: Protocol, sd: float, now: dict
             ) -> tuple[Change, ...]:
    """The L and ρ CRLB of a few other protocols, relative to the recorded one (the same
    sweeps, the filter's noise model for both)."""
    base = _sds(cell_covariance(*cell, bridge_ohm, protocol, sd, 1.0), *cell)[0]

    def ratio(other: Protocol, other_sd: float) -> tuple[float, float]:
        new = _sds(cell_covariance(*cell, bridge_ohm, other, other_sd, 1.0), *cell)[0]
        return tuple(_narrower(base[k], new[k]) for k in ("L", "rho"))

    out = []
    if protocol.kind == "step":
        pulse = _pulse_like(cell, bridge_ohm, protocol)
        out.append(Change("brief pulses instead of steps", *ratio(pulse, sd),
                          f"{PULSE_S * 1e3:g} ms pulses of {abs(pulse.amplitude_A) * 1e12:.0f} pA "
                          "(the same peak deflection as the steps' steady state), the same "
                          "sweep length"))
    fast = replace(protocol, sample_rate_hz=2 * protocol.sample_rate_hz)
    out.append(Change("double sampling rate", *ratio(fast, sd),
                      f"{fast.sample_rate_hz / 1e3:g} kHz, the same filter and noise sd"))
    if protocol.filter_hz is not None:
        wide = min(2 * protocol.filter_hz, 0.4 * protocol.sample_rate_hz)
        if wide > protocol.filter_hz * 1.05:
            wider = replace(protocol, filter_hz=wide)
            wide_sd = sd * math.sqrt(wide / protocol.filter_hz)
            out.append(Change("wider filter", *ratio(wider, wide_sd),
                              f"{wide / 1e3:g} kHz corner; noise sd grows to "
                              f"{wide_sd * 1e3:.3g} mV (white noise before the filter)"))
    for factor, name in ((0.5, "half amplitude"), (2.0, "double amplitude")):
        out.append(Change(name, factor, factor, "the bound scales with 1/amplitude in a "
                          "passive cell" + ("; a larger step may recruit active conductances"
                                            if factor > 1 else "")))
    return tuple(out)


def _narrower(before: float, after: float) -> float:
    if not math.isfinite(after):
        return 0.0
    if not math.isfinite(before):
        return math.inf
    return before / after


def _pulse_like(cell, bridge_ohm: float, protocol: Protocol) -> Protocol:
    """A `PULSE_S` pulse at the step's onset whose peak deflection equals the step's
    steady deflection (I × R_in)."""
    unit = replace(protocol, kind="pulse", duration_s=PULSE_S, amplitude_A=1.0)
    theta = tuple(np.array([*map(math.log, cell), bridge_ohm, 0.0]))   # as cell_covariance's
    # the response per unit current is the Jacobian's column in ln R_in (kept for the
    # pulse's bound)
    peak = float(np.max(np.abs(_cached_jacobian(unit, theta)[:, 3])))
    amplitude = protocol.amplitude_A * cell[3] / peak
    return replace(unit, amplitude_A=amplitude)


def _advice(bounds: tuple[Bound, ...], changes: tuple[Change, ...], n: int, max_sweeps: int
            ) -> str:
    targeted = [b for b in bounds if b.target_ci is not None]
    hopeless = [b for b in targeted if b.sweeps_needed is None]
    short = [b for b in targeted if b.sweeps_needed is not None and b.sweeps_needed > n]
    parts = []
    if short:
        most = max(b.sweeps_needed for b in short)
        names = ", ".join(QUANTITY[b.name].label for b in short)
        parts.append(f"Record about {most - n} more sweeps of this protocol ({most} in all) "
                     f"for {names} to reach the targets.")
    elif not hopeless and targeted:
        parts.append("Every value is within its target: no more sweeps are needed.")
    if hopeless:
        names = ", ".join(QUANTITY[b.name].label for b in hopeless)
        parts.append(f"{names}: not resolvable with this protocol in any reasonable number of "
                     f"sweeps (more than {max_sweeps}).")
    tried = [c for c in changes if "amplitude" not in c.change]   # those scale trivially
    for label, factor in (("ρ", lambda c: c.rho_narrower), ("L", lambda c: c.L_narrower)):
        best = max(tried, key=factor, default=None)
        if best is None:
            continue
        if factor(best) > 1.05:
            parts.append(f"For {label}, {best.change} would narrow the interval most "
                         f"({factor(best):.2g}×).")
        else:
            parts.append(f"For {label}, none of the protocol changes tried narrows the "
                         "interval; more sweeps or a larger amplitude do.")
    return " ".join(parts)


def _assumptions(measured_acf: bool, fit_start_s: float) -> str:
    noise = ("stationary Gaussian noise with the autocorrelation measured from the baselines"
             if measured_acf else "stationary Gaussian noise: white noise through the "
             "recorded filter")
    return (f"Cramér–Rao bound of the fitted ball-and-stick model (bridge lag, filter) for a "
            f"passive cell in {noise} (whitened by an autoregressive model); each sweep's baseline "
            f"estimated; samples within {fit_start_s * 1e3:g} ms of each current edge left "
            "out; no drift, events or active conductances. Sweeps needed scale the achieved "
            "CI (else the bound) by 1/√n.")


# ---------------------------------------------------------------------------- in words
def _fmt(x: float | None, digits: int = 3) -> str:
    return "—" if x is None or not math.isfinite(x) else f"{x:.{digits}g}"


def text_lines(advice: DesignAdvice | Mapping) -> list[str]:
    """The advice (or its JSON `design` block) as plain lines (the PDF report, a
    terminal): one row per value, the protocol changes, the advice and its assumptions."""
    data = advice.to_dict() if isinstance(advice, DesignAdvice) else advice
    lines = [f"{'value':<20} {'now':>9} {'bound ±':>9} {'achieved ±':>10} {'effic.':>6} "
             f"{'target ±':>9} {'sweeps':>7}"]
    for row in data["values"]:
        unit = f" {row['unit']}" if row["unit"] else ""
        needed = row["sweeps_needed"]
        sweeps = "—" if row["target_ci95"] is None else (f"> {data['max_sweeps']}"
                                                         if needed is None else str(needed))
        lines.append(f"{(row['label'] + unit)[:20]:<20} {_fmt(row['value'], 4):>9} "
                     f"{_fmt(row['crlb_ci95'], 2):>9} {_fmt(row['achieved_ci95'], 2):>10} "
                     f"{_fmt(row['efficiency'], 2):>6} {_fmt(row['target_ci95'], 2):>9} "
                     f"{sweeps:>7}")
    lines.append(f"(95 % half-widths for the {data['n_sweeps']} sweeps used; noise sd "
                 f"{_fmt(data['noise_sd_mV'], 3)} mV)")
    if data["changes"]:
        lines.append("If the protocol changed (same sweeps): L and ρ intervals narrower by")
    for change in data["changes"]:
        lines.append(f"  {change['change']:<30} L ×{_fmt(change['L_narrower_by'], 2):<5} "
                     f"ρ ×{_fmt(change['rho_narrower_by'], 2):<5} ({change['detail']})")
    lines += [row["note"] for row in data["values"] if row["note"]]
    lines.append(data["advice"])
    lines.append("Assumptions: " + data["assumptions"])
    return [line for line in lines if line]
