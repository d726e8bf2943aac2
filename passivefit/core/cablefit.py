"""Direct fit of the ball-and-stick model to somatic current-clamp transients.

Instead of free exponentials, the somatic voltage is fitted with the full eigen-expansion
of a uniform ball-and-stick (docs/references.md §3), whose mode shapes depend on three
nonlinear parameters only, tau0, L and rho. With ``r_n = B_n/B_0`` (``r_0 = 1``) and
``tau_n = tau0/(1 + alpha_n^2)``:

- charging after a step onset (t from the edge)::

      V(t) = offset - b0 * sum_n r_n exp(-t/tau_n)

- decay after the end of a step or square pulse of duration D (t from its end)::

      V(t) = offset + b0 * sum_n r_n (1 - exp(-D/tau_n)) exp(-t/tau_n)

  (docs/references.md §2 "Decay after a step of duration D", which carries over to the
  ball-and-stick mode by mode; ``D = None`` means a long step, factor 1).

``b0`` is always the tau0 amplitude of the charging curve of the same current, I*tau0/C_total
(docs/references.md §4), so it has the sign of the current and gives C_total; the membrane part of
the steady deflection is ``b0 / b0_over_vinf(L, rho)``. The rest of a charging transient's
offset, relative to the baseline, is the instantaneous (bridge) jump.

Fitting is by variable projection (Golub & Pereyra 2003, Inverse Problems 19:R1): for each
trial (log tau0, log L, log rho) the offsets, scales and bridge jumps enter linearly and are
solved by least squares; a small Levenberg–Marquardt loop searches the nonlinear
parameters with the Golub–Pereyra Jacobian of the projected residual (the sums over the
samples and the per-mode rates and amplitudes differentiated analytically), and
:func:`scipy.optimize.least_squares` takes over where it does not converge or ends at a
bound. The eigenvalue roots are found for all modes at once by Newton's method,
warm-started from the last ones. Segments may share a scale (``group``), e.g. the onset
and the decay of the same step. Binned data (``expfit.decimate_tail``) are modelled as
exact bin means when the sampling interval is given.

The measurement chain is part of the model (docs/references.md §11): a charge from a known
``baseline`` adds the bridge jump ``J (1 - exp(-t/lag))`` (a residual series resistance seen
through the electrode's first-order lag; J is linear, the lag nonlinear), and the amplifier's
4-pole Bessel low-pass filters the whole response exactly (:mod:`passivefit.core.lowpass`),
its corner given or estimated with the cell. A decay is the superposition of the pulse's
two edges, filtered alike.

The sum is truncated where it has converged for the fitted times: every mode with
``t_min/tau_n < 30`` is kept (the others are below e^-30 of their amplitude); at t = 0 the
model uses the exact sum ``sum_n r_n = V_inf/B0`` (docs/references.md §3, B0/V_inf); through
the filter, the modes left out act as one extra mode at the first rate left out.

Units are SI: s, V, A, F.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from functools import cache, cached_property

import numpy as np

from passivefit.core import cable
from passivefit.core.lowpass import Lowpass
from passivefit.core.peel import check_samples
from passivefit.core.qc import normal_inverse, t975

__all__ = [
    "L_BOUNDS",
    "RHO_BOUNDS",
    "BallStickFit",
    "CableSegment",
    "fit_ballstick",
    "initial_guess",
    "mode_table",
    "modes_needed",
]

L_BOUNDS = (0.05, 5.0)
RHO_BOUNDS = (0.01, 1000.0)
TAU0_BOUNDS_S = (1e-4, 10.0)
_TRUNCATION = 30.0  # keep modes with t_min/tau_n below this: dropped ones are < e^-30
_MAX_MODES = 20_000
_NEWTON_STEPS = 50
_MIN_EXTRA_POINTS = 3
_KINDS = ("charge", "decay")
_FALLBACK_RHO = 3.0
_MODE_STEP = 1e-6  # difference step in the filter corner, when it is estimated
_GRID_STARTS = 3  # fits tried from the best points of the fallback grid
_FALLBACK_L_FACTOR = 0.9  # the naive cylinder L overestimates the ball-and-stick L
LAG_BOUNDS_S = (1e-6, 2e-4)  # electrode lag of the bridge jump (tens of µs; common practice)
LAG_START_S = 50e-6
CORNER_BOUNDS = (0.02, 2.0)  # an estimated filter corner, times the sampling rate
CORNER_START = 0.25


@dataclass(frozen=True, eq=False)
class CableSegment:
    """One transient for :func:`fit_ballstick`.

    Parameters
    ----------
    t : numpy.ndarray
        Sample times (s) from the segment's step edge (onset for ``"charge"``, end of the
        step or pulse for ``"decay"``), strictly increasing; need not be uniform.
    y : numpy.ndarray
        Membrane potential (V).
    weight : numpy.ndarray or None
        Statistical weight per sample (e.g. samples per bin from ``expfit.decimate_tail``);
        None means ones.
    offset : float or None
        Known asymptote (V); None fits it.
    kind : {"charge", "decay"}
        Charging after a step onset, or decay after a step/pulse ends.
    duration_s : float or None
        ``"decay"`` only: duration of the step or pulse that ended (s); None for a step
        long enough (>= ~7 tau0) that the charging was complete.
    group : hashable or None
        Segments with equal ``group`` share one scale ``b0`` (same current, e.g. onset
        and decay of one averaged step); None gives the segment a scale of its own.
    sample_interval_s : float or None
        Sampling interval (s) of data binned by ``expfit.decimate_tail``: each point's
        ``weight`` is then the number of consecutive samples it averages, and the model is
        averaged over exactly those samples (no bias from a bin's curvature). None treats
        every point as one instant.
    baseline : float or None
        ``"charge"`` only: the known level before the edge (V). The model then holds the
        whole step from that level — the membrane's charging and a bridge jump — and the
        segment has no free offset.
    """

    t: np.ndarray
    y: np.ndarray
    weight: np.ndarray | None = None
    offset: float | None = None
    kind: str = "charge"
    duration_s: float | None = None
    group: object = None
    sample_interval_s: float | None = None
    baseline: float | None = None


# ---------------------------------------------------------------------- model shape


def _roots(k: float, n: int, y_start: np.ndarray | None = None) -> np.ndarray:
    """x_n = alpha_n*L (n = 1..n) solving sin(x) + k*x*cos(x) = 0 in ((n - 1/2)pi, n*pi].

    With x = (n - 1/2)*pi + y the equation is y = arctan(1/(k*x)); Newton's method on
    G(y) = y - arctan(1/(k*(c + y))), whose slope lies in [1, 1 + 1/pi], converges from
    any start in [0, pi/2], vectorised over all modes (:func:`_root_offsets`).
    """
    return _centres(n) + _root_offsets(k, n, y_start)


@cache
def _centres(n: int) -> np.ndarray:
    """(n - 1/2)pi for n = 1..n (read only)."""
    c = (np.arange(1, n + 1) - 0.5) * math.pi
    c.flags.writeable = False
    return c


def _root_offsets(k: float, n: int, y_start: np.ndarray | None = None) -> np.ndarray:
    """The y_n = x_n - (n - 1/2)pi of :func:`_roots`, in [0, pi/2].

    Newton's error after a step is at most max|G''|/(2 min G') < 0.14 times the square
    of the step (|G''| = 2k^2 u/(1 + u^2)^2 with u = k x >= k pi/2 stays below 0.27), so a
    step below 1e-8 leaves an error below 1e-16: the iteration stops there.
    """
    c = _centres(n)
    y = np.arctan2(1.0, k * (c + 0.25 * math.pi)) if y_start is None else y_start
    for _ in range(_NEWTON_STEPS):
        u = k * (c + y)
        step = (y - np.arctan2(1.0, u)) / (1.0 + k / (1.0 + u * u))
        y = np.minimum(np.maximum(y - step, 0.0), 0.5 * math.pi)
        if np.abs(step).max() < 1e-8:
            break
    return y


def mode_table(L: float, rho: float, n_modes: int, derivative: bool = False):
    """Rates and charging amplitude ratios of the first ``n_modes`` + 1 modes.

    Parameters
    ----------
    L : float
        Electrotonic length of the cylinder.
    rho : float
        Dendritic-to-somatic conductance ratio (``inf`` for a bare cylinder).
    n_modes : int
        Number of equalizing modes (mode 0 is added).
    derivative : bool
        Also return the derivatives of both in log L and log rho.

    Returns
    -------
    rate_ratio : numpy.ndarray
        tau0/tau_n = 1 + alpha_n^2, n = 0..n_modes (first entry 1).
    b_ratio : numpy.ndarray
        B_n/B_0 of the step charging curve (first entry 1; docs/references.md §3).
    slopes : tuple of numpy.ndarray
        With ``derivative`` only: d rate_ratio and d b_ratio, shape (2, n_modes + 1) (first
        column 0), and d(V_inf/B0), shape (2,), in log L (first row) and log rho, by
        implicit differentiation of the eigenvalue equation (:func:`_table_slopes`).
    """
    s = math.tanh(L) / rho  # G_S/G_inf (0 for a bare cylinder)
    x = _roots(s / L, int(n_modes))
    rate, ratio = _table(x / L, L, rho)
    if not derivative:
        return rate, ratio
    d_rate, d_ratio, d_inv = _table_slopes(x, L, rho)
    first = np.zeros((2, 1))
    return rate, ratio, (np.hstack([first, d_rate]), np.hstack([first, d_ratio]), d_inv)


def _table(alphas: np.ndarray, L: float, rho: float) -> tuple[np.ndarray, np.ndarray]:
    rate = np.concatenate(([1.0], 1.0 + alphas**2))
    pulse = cable.pulse_ratios_from_alphas(alphas, L, rho)
    return rate, np.concatenate(([1.0], pulse / rate[1:]))


def modes_needed(L: float, tau0: float, t_min: float) -> int:
    """Equalizing modes with t_min/tau_n < _TRUNCATION (alpha_n >= (n - 1/2)pi/L)."""
    alpha = math.sqrt(max(_TRUNCATION * tau0 / t_min - 1.0, 0.0))
    return int(min(max(math.ceil(L * alpha / math.pi + 0.5), 1), _MAX_MODES))


def _edge_weights(rates: np.ndarray, kinds: Sequence[str], durations: np.ndarray) -> np.ndarray:
    """Per segment and rate: 1 for a charging edge; exp(-lam*D) - 1 for a decay after a
    step or pulse of duration D (superposition of its two edges; -1, and 0 for lam = 0,
    when the step was complete). Shape (..., n_segments, n_rates) for rates (..., n_rates);
    complex rates allowed."""
    out = np.ones(rates.shape[:-1] + (len(kinds), rates.shape[-1]),
                  dtype=np.result_type(rates, float))
    for s, kind in enumerate(kinds):
        if kind == "decay":
            d = durations[s]
            out[..., s, :] = (np.expm1(-rates * d) if math.isfinite(d)
                              else np.where(rates == 0, 0.0, -1.0))
    return out


def _edge_slopes(rates: np.ndarray, kinds: Sequence[str], durations: np.ndarray) -> np.ndarray:
    """d/d lam of :func:`_edge_weights` (real rates): -D exp(-lam D) for a decay after a
    step or pulse of finite duration D, 0 otherwise."""
    out = np.zeros((len(kinds), rates.size))
    for s, kind in enumerate(kinds):
        if kind == "decay" and math.isfinite(durations[s]):
            out[s] = -durations[s] * np.exp(-rates * durations[s])
    return out


def _table_slopes(x: np.ndarray, L: float, rho: float
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Derivatives in log L and log rho (leading axis) of the rate ratios 1 + alpha_n^2
    and the step amplitude ratios B_n/B_0 of the equalizing modes with roots x_n = alpha_n L
    (shape (2, n) each), and of V_inf/B0 = 1/b0_over_vinf (shape (2,)).

    The roots x_n of f(x, k) = sin x + k x cos x = 0, k = tanh(L)/(rho L), move with k as
    dx/dk = -f_k/f_x = -x cos x / ((1 + k) cos x - k x sin x) (implicit differentiation);
    alpha_n = x_n/L, tau0/tau_n = 1 + alpha_n^2 and the amplitudes (docs/references.md §3)
    follow by the chain rule.
    """
    t = math.tanh(L)
    s = t / rho  # G_S/G_inf
    k = s / L
    alpha = x / L
    cos, sin = np.cos(x), np.sin(x)
    dx_dk = -x * cos / ((1.0 + k) * cos - k * x * sin)
    # per log L and log rho: dL, ds, dk
    dL = np.array([L, 0.0])
    ds = np.array([L * (1.0 - t * t) / rho, -s])
    dk = np.array([k * (2.0 * L / math.sinh(2.0 * L) - 1.0), -k])
    d_alpha = dk[:, None] * dx_dk / L - np.array([[1.0], [0.0]]) * alpha
    rate = 1.0 + alpha**2
    d_rate = 2.0 * alpha * d_alpha
    # pulse ratio 2P/Q with P = L + s, Q = L + s + L alpha^2 s^2 (cable._pulse_ratio_s)
    P = L + s
    Q = P + L * (alpha * s) ** 2
    dP = dL + ds
    dQ = dP[:, None] + (dL[:, None] * s * s + 2.0 * L * s * ds[:, None]) * alpha**2 \
        + 2.0 * L * s * s * alpha * d_alpha
    pulse = 2.0 * P / Q
    d_pulse = 2.0 * (dP[:, None] * Q - P * dQ) / Q**2
    d_ratio = (d_pulse - pulse / rate * d_rate) / rate
    # 1/(B0/V_inf) = (s + L)/(s + tanh L) (cable.b0_over_vinf)
    dt = (1.0 - t * t) * dL
    d_inv = ((ds + dL) * (s + t) - (s + L) * (ds + dt)) / (s + t) ** 2
    return d_rate, d_ratio, d_inv


def _cable_terms(x: np.ndarray, L, tanh_L, s, tau0: float, lag_rate: float
                 ) -> tuple[np.ndarray, np.ndarray, float]:
    """The rates (1/s) of :meth:`_Problem.amplitudes` — the step, the lag, mode 0, the
    modes with roots ``x`` (last axis), the tail mode — and the scale's step amplitudes on
    them, and the tail's root. ``L``, ``tanh_L`` and ``s`` = G_S/G_inf are numbers, or
    columns (one row of ``x`` each) for several cells at once."""
    n = x.shape[-1]
    alpha2 = (x / L) ** 2
    # step amplitude ratios: the pulse ratios 2(L + s)/(L + s + L alpha^2 s^2) over
    # 1 + alpha^2 (cable.pulse_ratios_from_alphas), and V_inf/B0 = (s + L)/(s + tanh L)
    ratio = 2.0 * (L + s) / (L + s + L * alpha2 * s * s) / (1.0 + alpha2)
    v_inf = (s + L) / (s + tanh_L)
    # the modes beyond the truncation, at the first rate left out: they matter only
    # through the filter's ringing (their own exponentials are < e^-30 at every sample)
    x_next = (n + 0.5) * math.pi + 0.5 * math.pi
    rates = np.empty(x.shape[:-1] + (n + 4,))
    rates[..., 0] = 0.0
    rates[..., 1] = lag_rate
    rates[..., 2] = 1.0 / tau0
    rates[..., 3:-1] = (1.0 + alpha2) / tau0
    rates[..., -1:] = (1.0 + (x_next / L) ** 2) / tau0
    b0 = np.empty_like(rates)
    b0[..., :1] = v_inf
    b0[..., 1:3] = 0.0, -1.0
    b0[..., 3:-1] = -ratio
    b0[..., -1:] = -(v_inf - 1.0 - ratio.sum(axis=-1, keepdims=True))
    return rates, b0, x_next


def _mode_slopes(x: np.ndarray, L: float, rho: float, x_next: float, rates: np.ndarray,
                 b0: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Derivatives of the rates and of the step amplitudes of :meth:`_Problem.amplitudes`
    in log tau0, log L and log rho, shape (3, n_rates) each (:func:`_table_slopes`; the
    tail mode's amplitude keeps the sum V_inf/B0, its rate is fixed at x_next/L)."""
    tau0 = 1.0 / rates[2]
    d_rate, d_ratio, d_inv = _table_slopes(x, L, rho)
    d_tail = d_inv - d_ratio.sum(axis=1)
    d_next = np.array([-2.0 * (x_next / L) ** 2, 0.0])
    # per rate: step, lag, mode 0, modes 1..n, the tail mode
    d_rates = np.zeros((3, rates.size))
    d_rates[0, 2:] = -rates[2:]
    d_rates[1:, 3:-1] = d_rate / tau0
    d_rates[1:, -1] = d_next / tau0
    d_b0 = np.zeros((3, rates.size))
    d_b0[1:, 0] = d_inv
    d_b0[1:, 3:-1] = -d_ratio
    d_b0[1:, -1] = -d_tail
    return d_rates, d_b0


# ------------------------------------------------------------------------- problem


@dataclass
class _Problem:
    """Concatenated samples of all segments and the variable-projection residual.

    Nonlinear parameters theta = (log tau0, log L, log rho[, log lag][, log corner]): the
    electrode lag when a bridge jump is fitted, the filter corner when it is estimated.
    Linear ones are the free offsets (one per segment), the scales b0 (one per group) and
    the bridge jumps (one per group with a charging segment from a known baseline).
    Single samples come first, then bins (late points, which need only the slow modes).

    The model is built from "rates": the step (0), the electrode lag (1/lag), the cable's
    modes (tau0/tau_n) and one extra rate carrying the modes beyond the truncation. Each
    segment's column is a sum of filtered exponentials over these rates
    (:mod:`passivefit.core.lowpass`).
    """

    u: np.ndarray  # time since the edge of each point's first sample, s
    count: np.ndarray  # samples per bin, for the bins only
    dt: np.ndarray  # their sampling interval, s
    sw: np.ndarray  # sqrt(weight)
    yw: np.ndarray  # sqrt(weight) * (y - fixed offset)
    seg: np.ndarray  # segment index per point
    kinds: tuple[str, ...]
    durations: np.ndarray  # inf for a complete step
    fixed: np.ndarray  # known offsets (0 where fitted)
    known_base: np.ndarray  # per segment: a charge from a known baseline (its step is modelled)
    offset_col: np.ndarray  # column of each segment's offset, -1 if known
    scale_col: np.ndarray  # column of each segment's scale
    bridge_col: np.ndarray  # column of each segment's bridge jump, -1 if none
    n_cols: int
    y_scale: float  # largest swing of any segment (V): the solver sees residuals in its units
    corner_hz: float | None  # known filter corner (None: unfiltered, or estimated)
    estimate_corner: bool
    shortest_dt: float  # shortest sampling interval (s), for the corner's bounds
    n_modes: int = 1  # equalizing modes summed for single samples
    n_bin_modes: int = 1  # ... and for bins
    _y_start: np.ndarray | None = field(default=None, repr=False)
    _offsets: np.ndarray | None = field(default=None, repr=False)
    _key: tuple | None = field(default=None, repr=False)
    _solved: tuple = field(default=(), repr=False)
    _cache: dict = field(default_factory=dict, repr=False)  # the filter's terms, column maps

    @cached_property
    def lag(self) -> bool:
        """Whether a bridge jump (with the electrode's lag) is fitted."""
        return bool(np.any(self.bridge_col >= 0))

    @property
    def n_theta(self) -> int:
        return 3 + self.lag + self.estimate_corner

    @cached_property
    def n_single(self) -> int:
        return self.u.size - self.count.size

    @cached_property
    def t_min(self) -> float:
        return float(self.u[0] if self.n_single else np.min(self.u))

    @cached_property
    def t_min_bins(self) -> float:
        return float(np.min(self.u[self.n_single :])) if self.count.size else math.inf

    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        lo = [TAU0_BOUNDS_S[0], L_BOUNDS[0], RHO_BOUNDS[0]]
        hi = [TAU0_BOUNDS_S[1], L_BOUNDS[1], RHO_BOUNDS[1]]
        if self.lag:
            lo.append(LAG_BOUNDS_S[0])
            hi.append(LAG_BOUNDS_S[1])
        if self.estimate_corner:
            lo.append(CORNER_BOUNDS[0] / self.shortest_dt)
            hi.append(CORNER_BOUNDS[1] / self.shortest_dt)
        return np.log(lo), np.log(hi)

    def start(self, init: np.ndarray) -> np.ndarray:
        """Full theta from (log tau0, log L, log rho): lag and corner at their start values."""
        extra = [math.log(LAG_START_S)] * self.lag
        extra += [math.log(CORNER_START / self.shortest_dt)] * self.estimate_corner
        return np.concatenate([init[:3], extra])

    def lowpass(self, theta: np.ndarray) -> Lowpass | None:
        if self.estimate_corner:
            return Lowpass(math.exp(theta[-1]))
        return self._known_lowpass

    @cached_property
    def _known_lowpass(self) -> Lowpass | None:
        return None if self.corner_hz is None else Lowpass(self.corner_hz)

    def modes_for(self, theta: np.ndarray, margin: float = 1.0) -> tuple[int, int]:
        """Mode counts for single samples and bins that converge at ``theta``.

        ``margin`` > 1 allows L and tau0 to grow by that factor during a search.
        """
        tau0, L = margin * math.exp(theta[0]), min(margin * math.exp(theta[1]), L_BOUNDS[1])
        n = modes_needed(L, tau0, self.t_min)
        return n, min(modes_needed(L, tau0, self.t_min_bins), n)

    def set_modes(self, theta: np.ndarray, margin: float = 1.2) -> None:
        self.n_modes, self.n_bin_modes = self.modes_for(theta, margin)

    def amplitudes(self, theta: np.ndarray, derivative: bool = False):
        """The rates (1/s) and, per segment, the amplitudes of the scale's and the bridge's
        columns, shape (2, n_segments, 2 n_poles + n_rates): on the real and imaginary parts
        of the filter's exp(p_k u) terms (real(a exp(p u)) = re(a) re(exp(p u)) - im(a)
        im(exp(p u))), then on exp(-lam u) (filter gain and edge weight included).

        With ``derivative``, also the derivatives of both in each of log tau0, log L,
        log rho (and log lag when fitted) on a leading axis, by the implicit derivative of
        the eigenvalue equation (:func:`_mode_slopes`) and the chain rule.
        """
        key = (theta.tobytes(), self.n_modes)
        if self._cache.get("amplitudes_key") != key:   # the residual's, then the Jacobian's
            self._cache["amplitudes"] = self._amplitudes(theta)
            self._cache["amplitudes_key"] = key
        base, (x, L, rho, x_next, b0, bridge, lp, gain, weights, filt, pole_weights,
               inverse, edge) = self._cache["amplitudes"]
        if not derivative:
            return base
        rates = base[0]
        # the same in each parameter (leading axis): rates and b0 move, the bridge's
        # amplitudes are constants; through the filter's gain, the edge weights and the
        # filter's pole weights, all functions of the rates
        d_rates, d_b0 = _mode_slopes(x, L, rho, x_next, rates, b0)
        if self.lag:
            d_rates = np.vstack([d_rates, np.zeros(rates.size)])
            d_rates[3, 1] = -rates[1]
            d_b0 = np.vstack([d_b0, np.zeros(rates.size)])
        # H'(-lam) = -H(-lam) sum_k 1/(p_k + lam) (lowpass.filtered_exponential_slopes)
        d_gain = 0.0 if lp is None else -gain * np.real(inverse.sum(axis=1))
        d_filt = d_gain * weights + gain * _edge_slopes(rates, self.kinds, self.durations)
        d_filt[~self.known_base, 0] = 0.0
        d_filt = d_rates[:, None, :] * d_filt  # (n_par, n_segments, n_rates)
        d_direct = np.stack([d_b0[:, None, :] * filt + b0 * d_filt, bridge * d_filt], axis=1)
        if lp is None:
            return base, (d_rates, d_direct)
        d_pole_weights = -pole_weights * inverse * d_rates[:, :, None]
        d_ring = edge * np.stack([d_b0 @ pole_weights + b0 @ d_pole_weights,
                                  bridge @ d_pole_weights], axis=1)[:, :, None, :]
        return base, (d_rates, np.concatenate([d_ring.real, -d_ring.imag, d_direct], axis=3))

    def _amplitudes(self, theta: np.ndarray):
        """:meth:`amplitudes` without derivatives, and what its derivatives need."""
        tau0, L, rho = math.exp(theta[0]), math.exp(theta[1]), math.exp(theta[2])
        n = self.n_modes
        tanh_L = math.tanh(L)
        s = tanh_L / rho  # G_S/G_inf
        warm = self._y_start is not None and self._y_start.size == n
        self._y_start = _root_offsets(s / L, n, self._y_start if warm else None)
        x = _centres(n) + self._y_start
        rates, b0, x_next = _cable_terms(x, L, tanh_L, s, tau0, self._lag_rate(theta))
        amps, filtered = self._filtered(theta, rates, b0)
        return (rates, amps), (x, L, rho, x_next, b0, *filtered)

    def _lag_rate(self, theta: np.ndarray) -> float:
        """1/lag when a bridge jump is fitted (a placeholder 1 otherwise)."""
        return math.exp(-theta[3]) if self.lag else 1.0

    def _filtered(self, theta: np.ndarray, rates: np.ndarray, b0: np.ndarray):
        """The amplitudes of :meth:`amplitudes` from the rates and the scale's amplitudes
        per rate, ``b0``: through the filter and the edge weights, for the scale and the
        bridge; then what their derivatives need. Leading axes of ``rates`` and ``b0``
        (several cells at once) lead the amplitudes too."""
        bridge = np.zeros(rates.shape[-1])
        if self.lag:
            bridge[:2] = 1.0, -1.0
        lp = self.lowpass(theta)
        if lp is None:
            gain, inverse = np.ones_like(rates), None
        else:
            inverse = 1.0 / (lp.poles + rates[..., None])   # 1/(p_k + lam), (..., n_rates, 4)
            gain = np.real(np.prod(lp.poles * inverse, axis=-1))
        weights = _edge_weights(rates, self.kinds, self.durations)
        filt = gain[..., None, :] * weights
        filt[..., ~self.known_base, 0] = 0.0   # a step from a free offset: the offset carries it
        amps = np.stack([b0[..., None, :] * filt, bridge * filt], axis=-3)
        pole_weights = edge = None
        if lp is not None:
            pole_weights = lp.residues * inverse   # c_k/(p_k + lam) (Lowpass.pole_weights)
            edge = self._ring_edges(lp)
            both = np.stack([b0, np.broadcast_to(bridge, b0.shape)], axis=-2)
            ring = edge * (both @ pole_weights)[..., None, :]
            amps = np.concatenate([ring.real, -ring.imag, amps], axis=-1)
        return amps, (bridge, lp, gain, weights, filt, pole_weights, inverse, edge)

    def _ring_edges(self, lp: Lowpass) -> np.ndarray:
        """Edge weights of the filter's own terms, per segment and pole (cached)."""
        if self._cache.get("edges_hz") != lp.corner_hz:
            self._cache["edges"] = _edge_weights(-lp.poles, self.kinds, self.durations)
            self._cache["edges_hz"] = lp.corner_hz
        return self._cache["edges"]

    def _ring_bases(self, lp: Lowpass | None) -> np.ndarray:
        """The real and imaginary parts of the filter's exp(p_k u) per point, bins averaged,
        shape (n_points, 2 n_poles) (cached; no columns when unfiltered)."""
        if lp is None:
            return np.zeros((self.u.size, 0))
        if self._cache.get("bases_hz") != lp.corner_hz:
            n, dt, n1 = self.count[:, None], self.dt[:, None], self.n_single
            z = dt * lp.poles
            ring = np.exp(self.u[:, None] * lp.poles)
            ring[n1:] *= np.expm1(n * z) / (n * np.expm1(z))
            self._cache["bases"] = np.hstack([ring.real, ring.imag])
            self._cache["bases_hz"] = lp.corner_hz
        return self._cache["bases"]

    def _bases(self, theta: np.ndarray, rates: np.ndarray, derivative: bool = False):
        """The bases of :meth:`amplitudes`' columns per point: the filter's terms
        (:meth:`_ring_bases`), then exp(-lam u) per rate, for the single samples and for
        the bins (averaged exactly; the modes they need), and, with ``derivative``, d/d
        lam of the bins' exp(-lam u) (for single samples it is -u times their
        exp(-lam u)). Leading axes of ``rates`` (several cells at once) lead the bases
        too."""
        m = 3 + self.n_bin_modes
        minus_u1, minus_ub, n, dt = self._columns
        lp = self.lowpass(theta)
        key = (rates.shape, rates.tobytes(), m, None if lp is None else lp.corner_hz)
        if self._cache.get("exp_key") != key:   # the residual's, then the Jacobian's
            ring, n1 = self._ring_bases(lp), self.n_single
            q = ring.shape[1]
            lead, row = rates.shape[:-1], rates[..., None, :]   # the same for every point
            single = np.empty(lead + (n1, q + rates.shape[-1]))
            single[..., :q] = ring[:n1]
            np.exp(minus_u1 * row, out=single[..., q:])
            # a bin's mean of exp(-lam t) over t = u + i dt, i < n, is exp(-lam u) times
            # (1 - exp(-n x))/(n (1 - exp(-x))), x = lam dt; 1 for the step (lam = 0)
            x = dt * row[..., 1:m]
            em_n, em_1 = np.expm1(-n * x), np.expm1(-x)
            bins = np.empty(lead + (self.u.size - n1, q + m))
            bins[..., :q] = ring[n1:]
            eb = bins[..., q:]
            np.exp(minus_ub * row[..., :m], out=eb)
            eb[..., 1:] *= em_n / (n * em_1)
            self._cache["exp"] = (single, bins, eb, em_n, em_1)
            self._cache["exp_key"] = key
        single, bins, eb, em_n, em_1 = self._cache["exp"]
        eb_d = None
        if derivative:   # (0 for the step, whose rate does not move)
            # d/dx log((1 - e^-nx)/(1 - e^-x)) = n/(e^nx - 1) - 1/(e^x - 1), e^-x = 1 + em_1
            eb_d = np.zeros_like(eb)
            eb_d[:, 1:] = eb[:, 1:] * (minus_ub + dt * (
                n * (1.0 + em_n) / -em_n - (1.0 + em_1) / -em_1))
        return single, bins, eb_d

    @cached_property
    def _columns(self) -> tuple[np.ndarray, ...]:
        """-u of the single samples and of the bins, the bins' sample counts and sampling
        intervals, each as a column."""
        n1 = self.n_single
        return -self.u[:n1, None], -self.u[n1:, None], self.count[:, None], self.dt[:, None]

    @cached_property
    def _runs(self) -> list[tuple[int, int, int]]:
        """(first, end, segment) of each run of points of one segment, the single samples
        and the bins apart."""
        cuts = np.union1d([0, self.n_single, self.u.size], np.flatnonzero(np.diff(self.seg)) + 1)
        return [(int(a), int(b), int(self.seg[a]))
                for a, b in zip(cuts[:-1], cuts[1:], strict=True) if b > a]

    def _sum(self, single: np.ndarray, bins: np.ndarray, amps: np.ndarray) -> np.ndarray:
        """Per point, its bases (``single`` or ``bins``, per column) times its segment's
        amplitudes, summed, for K sets of amplitudes ``amps`` (K, n_segments, >= columns)
        at once. Returns shape (n_points, K); leading axes of all three (several cells at
        once) lead it."""
        n1 = self.n_single
        out = np.empty(single.shape[:-2] + (self.u.size, amps.shape[-3]))
        for a, b, s in self._runs:
            bases = single[..., a:b, :] if a < n1 else bins[..., a - n1:b - n1, :]
            out[..., a:b, :] = bases @ np.swapaxes(amps[..., s, :bases.shape[-1]], -1, -2)
        return out

    def shape(self, theta: np.ndarray, derivative: bool = False):
        """Model columns per unit scale and per unit bridge at every point (unweighted).

        With ``derivative``, also their derivatives in theta, shape (n_points, n_theta):
        for the cable's parameters and the lag analytically (the per-rate amplitudes by
        :meth:`amplitudes`, the sums over the points in closed form); the filter corner,
        when estimated, by central differences of the whole. The last result with
        derivatives is kept (the search's last Jacobian is the summary's).
        """
        if derivative:
            key = (theta.tobytes(), self.n_modes, self.n_bin_modes)
            if self._cache.get("slopes_key") != key:
                self._cache["slopes"] = self._compute_shape(theta, derivative=True)
                self._cache["slopes_key"] = key
            return self._cache["slopes"]
        return self._compute_shape(theta, derivative=False)

    def _compute_shape(self, theta: np.ndarray, derivative: bool):
        """:meth:`shape`, computed."""
        base = self.amplitudes(theta, derivative)
        if derivative:
            base, (d_rates, d_amps) = base
        rates, amps = base
        single, bins, eb_d = self._bases(theta, rates, derivative)
        if not derivative:
            value = self._sum(single, bins, amps)
            return value[..., 0], value[..., 1]
        n_num = theta.size - self.estimate_corner  # differentiated through the amplitudes
        n_seg, q = amps.shape[1], amps.shape[2] - rates.size
        # K = 2 + 2 n_num amplitude sets: (b0, bridge), then (d b0, d bridge) per parameter
        plain = self._sum(single, bins, np.concatenate(
            [amps, d_amps.reshape(2 * n_num, n_seg, -1)]))
        # through the rates: d exp(-lam u)/d lam is -u exp(-lam u) for single samples
        through = self._sum(single[:, q:], eb_d, (amps[None, :, :, q:] * d_rates[
            :, None, None, :]).reshape(2 * n_num, n_seg, -1))
        n1 = self.n_single
        through[:n1] *= -self.u[:n1, None]
        value = (plain[:, 0], plain[:, 1])
        out = (np.empty((self.u.size, theta.size)), np.empty((self.u.size, theta.size)))
        for c in range(2):
            out[c][:, :n_num] = plain[:, 2 + c::2] + through[:, c::2]
        if self.estimate_corner:
            step = np.zeros_like(theta)
            step[-1] = _MODE_STEP
            up, down = self.shape(theta + step), self.shape(theta - step)
            for o, a, b in zip(out, up, down, strict=True):
                o[:, -1] = (a - b) / (2 * _MODE_STEP)
        return value, out

    def cell_shapes(self, theta: np.ndarray, cells: np.ndarray):
        """:meth:`shape` (without derivatives) at ``theta`` with its (log L, log rho) set to
        each row of ``cells`` in turn, all at once: shape (n_cells, n_points) each. The
        current mode counts must suffice for every cell."""
        L, rho = np.exp(cells[:, :1]), np.exp(cells[:, 1:2])   # columns: a cell per row
        tanh_L = np.tanh(L)
        s = tanh_L / rho  # G_S/G_inf
        x = _centres(self.n_modes) + _root_offsets(s / L, self.n_modes)
        rates, b0, _ = _cable_terms(x, L, tanh_L, s, math.exp(theta[0]), self._lag_rate(theta))
        amps, _ = self._filtered(theta, rates, b0)
        single, bins, _ = self._bases(theta, rates)
        value = self._sum(single, bins, amps)
        return value[..., 0], value[..., 1]

    def _design(self, shapes) -> np.ndarray:
        """Weighted design matrix, shape (n_points, n_cols), for the given model columns
        (their leading axes lead it)."""
        if self._offsets is None:
            self._offsets = np.zeros((self.u.size, self.n_cols))
            free = np.flatnonzero(self.offset_col[self.seg] >= 0)
            self._offsets[free, self.offset_col[self.seg[free]]] = self.sw[free]
        a = np.broadcast_to(self._offsets, shapes[0].shape[:-1] + self._offsets.shape).copy()
        rows = np.arange(self.u.size)
        a[..., rows, self.scale_col[self.seg]] = shapes[0] * self.sw
        with_bridge = self.bridge_col[self.seg] >= 0
        a[..., rows[with_bridge], self.bridge_col[self.seg[with_bridge]]] = \
            shapes[1][..., with_bridge] * self.sw[with_bridge]
        return a

    def design(self, theta: np.ndarray) -> np.ndarray:
        return self._design(self.shape(theta))

    def solve(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Linear coefficients and the weighted residual at ``theta`` (QR, cached)."""
        key = (theta.tobytes(), self.n_modes, self.n_bin_modes)
        if key != self._key:
            self._solved = self._project(self.design(theta))
            self._key = key
        return self._solved[:2]

    def _project(self, a: np.ndarray) -> tuple:
        """Least squares of the data on the weighted design `a`: (coefficients, residual,
        q, r, the inverse of r or None) with a = q r."""
        q, r = np.linalg.qr(a)   # numpy's: importing scipy.linalg costs more than a fit
        qty = q.T @ self.yw
        r_inv = _inverse_r(r)
        return _solve_r(r, r_inv, qty), self.yw - q @ qty, q, r, r_inv

    def residual(self, theta: np.ndarray) -> np.ndarray:
        return self.solve(theta)[1]

    def costs_of(self, shapes, n_cols: Sequence[int]) -> np.ndarray:
        """Sums of squared weighted residuals of the designs made of the first ``n`` columns
        of the one for the given model columns, for each n in ``n_cols`` (first axis), from
        one QR (the first n columns of q span the first n of the design). Leading axes of
        the model columns (several cells at once) follow."""
        q, _ = np.linalg.qr(self._design(shapes))
        costs = []
        for n in n_cols:
            resid = self.yw - (q[..., :n] @ (self.yw @ q[..., :n])[..., None])[..., 0]
            costs.append(np.sum(resid * resid, axis=-1))
        return np.array(costs)

    def _d_design(self, d_shapes):
        """The weighted derivatives of the theta-dependent design columns (scale, then
        bridge when fitted), each (n_points, n_theta), with one-hot maps (n_cols,
        n_points) from the points to their columns."""
        if "maps" not in self._cache:
            rows = np.arange(self.u.size)
            scale = np.zeros((self.n_cols, self.u.size))
            scale[self.scale_col[self.seg], rows] = 1.0
            bridge = np.zeros((self.n_cols, self.u.size))
            has = self.bridge_col[self.seg] >= 0
            bridge[self.bridge_col[self.seg[has]], rows[has]] = 1.0
            self._cache["maps"] = (scale, bridge)
        scale, bridge = self._cache["maps"]
        sw = self.sw[:, None]
        if not self.lag:
            return [(d_shapes[0] * sw, scale)]
        return [(d_shapes[0] * sw, scale), (d_shapes[1] * sw * bridge.sum(axis=0)[:, None],
                                            bridge)]

    def jacobian(self, theta: np.ndarray) -> np.ndarray:
        """Golub–Pereyra Jacobian of the projected residual, shape (n_points, n_theta).

        dr/dtheta_j = -(P_perp dA_j A^+ y + (A^+)^T dA_j^T r), where only the scale and
        bridge columns of A depend on theta.
        """
        self.solve(theta)
        coef, resid, q, r, r_inv = self._solved
        _, d_shapes = self.shape(theta, derivative=True)
        first = np.zeros((self.u.size, theta.size))
        g = np.zeros((self.n_cols, theta.size))
        for d_col, to_col in self._d_design(d_shapes):
            first += d_col * (coef @ to_col)[:, None]
            g += to_col @ (d_col * resid[:, None])
        first -= q @ (q.T @ first)
        return -(first + q @ _solve_r(r, r_inv, g, transpose=True))

    def full_jacobian(self, theta: np.ndarray) -> np.ndarray:
        """Jacobian of the weighted model in (theta, linear coefficients)."""
        coef, _ = self.solve(theta)
        shapes, d_shapes = self.shape(theta, derivative=True)
        d_model = np.zeros((self.u.size, theta.size))
        for d_col, to_col in self._d_design(d_shapes):
            d_model += d_col * (coef @ to_col)[:, None]
        return np.column_stack([d_model, self._design(shapes)])



def _inverse_r(r: np.ndarray) -> np.ndarray | None:
    """The inverse of the upper triangle r of a QR when r is well conditioned (reciprocal
    condition number in the 1-norm above 1e-10), else None."""
    if not np.all(np.diag(r) != 0):
        return None
    with np.errstate(over="ignore"):
        inverse = np.linalg.inv(r)
    rcond = 1.0 / (np.abs(r).sum(axis=0).max() * np.abs(inverse).sum(axis=0).max())
    return inverse if rcond > 1e-10 else None


def _solve_r(r: np.ndarray, r_inv: np.ndarray | None, b: np.ndarray,
             transpose: bool = False) -> np.ndarray:
    """x with r x = b (r^T x = b with ``transpose``) for the upper triangle r of a QR: by
    its inverse ``r_inv`` (:func:`_inverse_r`) when r is well conditioned, else as the
    least-squares solution of numpy.linalg.lstsq."""
    if r_inv is not None:
        return (r_inv.T if transpose else r_inv) @ b
    return np.linalg.lstsq(r.T if transpose else r, b, rcond=None)[0]


def _check(segments: Sequence[CableSegment], corner_hz: float | None,
           estimate_corner: bool, bridge: bool, strict: bool = True) -> _Problem:
    if isinstance(segments, CableSegment):
        segments = [segments]
    if len(segments) == 0:
        raise ValueError("no segments given; pass at least one CableSegment(t, y)")
    if corner_hz is not None and not (math.isfinite(corner_hz) and corner_hz > 0):
        raise ValueError(f"`corner_hz` must be a positive frequency in Hz, got {corner_hz!r}")
    parts, kinds, durations, fixed, known = [], [], [], [], []
    offset_col, groups = [], {}
    for k, seg in enumerate(segments):
        if not isinstance(seg, CableSegment):
            raise ValueError(f"segment {k} is a {type(seg).__name__}; pass CableSegment objects")
        label = f"segment {k}"
        t, y, w = check_samples(seg.t, seg.y, seg.weight, label)
        if seg.kind not in _KINDS:
            raise ValueError(f"{label}: `kind` must be 'charge' or 'decay', got {seg.kind!r}")
        if seg.duration_s is not None:
            if seg.kind == "charge":
                raise ValueError(f"{label}: `duration_s` applies to 'decay' segments only")
            if not (math.isfinite(seg.duration_s) and seg.duration_s > 0):
                raise ValueError(
                    f"{label}: `duration_s` must be a positive time in s, got {seg.duration_s!r}"
                )
        for name, value in (("offset", seg.offset), ("baseline", seg.baseline)):
            if value is not None and not math.isfinite(value):
                raise ValueError(f"{label}: a known `{name}` must be finite, got {value!r}")
        if seg.baseline is not None and (seg.kind != "charge" or seg.offset is not None):
            raise ValueError(f"{label}: `baseline` applies to 'charge' segments without a "
                             "known `offset`")
        count, dt = _bin_counts(seg, w, label)
        u = t - 0.5 * (count - 1) * dt  # first sample of each bin
        if u[0] <= 0:
            raise ValueError(
                f"{label}: the first sample (t = {t[0]:.3g} s) is not after the edge; start "
                "the fit after it"
            )
        need = 2 + (seg.offset is None and seg.baseline is None) + _MIN_EXTRA_POINTS
        if strict and t.size < need:
            raise ValueError(f"{label}: {t.size} samples are too few; pass at least {need}")
        kinds.append(seg.kind)
        durations.append(math.inf if seg.duration_s is None else float(seg.duration_s))
        level = seg.offset if seg.offset is not None else seg.baseline
        fixed.append(0.0 if level is None else float(level))
        known.append(seg.baseline is not None)
        offset_col.append(-1 if level is not None else sum(c >= 0 for c in offset_col))
        groups.setdefault(("own", k) if seg.group is None else ("shared", seg.group), []).append(k)
        parts.append((u, np.sqrt(w), y, np.full(t.size, k), count, np.full(t.size, dt)))
    n_off = sum(c >= 0 for c in offset_col)
    scale_col = np.empty(len(segments), dtype=int)
    bridge_col = np.full(len(segments), -1)
    n_cols = n_off + len(groups)
    for j, members in enumerate(groups.values()):
        scale_col[members] = n_off + j
        if bridge and any(known[m] for m in members):  # a jump seen from a known baseline
            bridge_col[members] = n_cols
            n_cols += 1
    u, sw, y, seg_index, count, dt = (np.concatenate(p) for p in zip(*parts, strict=True))
    order = np.argsort(count > 1, kind="stable")  # single samples first, then bins
    u, sw, y, seg_index, count, dt = (x[order] for x in (u, sw, y, seg_index, count, dt))
    binned = count > 1
    fixed_arr = np.array(fixed)
    steps = [np.min(np.diff(p[0])) for p in parts if p[0].size > 1]
    return _Problem(
        u=u,
        count=count[binned],
        dt=dt[binned],
        sw=sw,
        yw=sw * (y - fixed_arr[seg_index]),
        seg=seg_index,
        kinds=tuple(kinds),
        durations=np.array(durations),
        fixed=fixed_arr,
        known_base=np.array(known),
        offset_col=np.array(offset_col),
        scale_col=scale_col,
        bridge_col=bridge_col,
        n_cols=n_cols,
        y_scale=max(float(np.ptp(y)), np.finfo(float).tiny),
        corner_hz=None if estimate_corner or corner_hz is None else float(corner_hz),
        estimate_corner=bool(estimate_corner),
        shortest_dt=float(min(steps)) if steps else 1e-4,
    )



def _bin_counts(seg: CableSegment, w: np.ndarray, label: str) -> tuple[np.ndarray, float]:
    """Samples per point and the sampling interval (ones and 0 for unbinned data)."""
    if seg.sample_interval_s is None:
        return np.ones(w.size), 0.0
    dt = float(seg.sample_interval_s)
    if not (math.isfinite(dt) and dt > 0):
        raise ValueError(f"{label}: `sample_interval_s` must be a positive time in s, got {dt!r}")
    count = np.round(w)
    if np.any(np.abs(w - count) > 1e-6 * count) or np.any(count < 1):
        raise ValueError(
            f"{label}: with `sample_interval_s`, `weight` must count the samples per bin "
            "(whole numbers >= 1, as from expfit.decimate_tail)"
        )
    return count, dt


# ---------------------------------------------------------------------- start values


def initial_guess(
    tau0_s: float,
    tau1_s: float | None = None,
    ratio: float | None = None,
    kind: str = "step",
    duration_s: float | None = None,
) -> tuple[float, float, float]:
    """Start values (tau0, L, rho) from an exponential fit.

    ``cable.estimate_ballstick`` when tau1 and the first amplitude ratio give a solution;
    otherwise L = 0.9*pi/sqrt(tau0/tau1 - 1) (the cylinder L overestimates it) and
    rho = 3; without tau1, L = 1, rho = 3. L and rho are clipped into the fit bounds.

    Parameters
    ----------
    tau0_s, tau1_s : float
        Slowest and next time constant of an exponential fit (s).
    ratio : float or None
        First amplitude ratio (B1/B0 for ``kind="step"``; see ``cable.estimate_ballstick``).
    kind : {"step", "pulse", "square"}
    duration_s : float or None
        Square-pulse duration (s), ``kind="square"`` only.

    Returns
    -------
    (tau0_s, L, rho) : tuple of float
    """
    tau0 = float(tau0_s)
    if not (math.isfinite(tau0) and tau0 > 0):
        raise ValueError(f"`tau0_s` must be a positive time in s, got {tau0_s!r}")
    L, rho = 1.0, _FALLBACK_RHO
    if tau1_s is not None and math.isfinite(tau1_s) and 0 < tau1_s < tau0:
        L = _FALLBACK_L_FACTOR * cable.cylinder_L(tau0, tau1_s)
        if ratio is not None:
            try:
                L, rho = cable.estimate_ballstick(tau0, tau1_s, ratio, kind, duration_s)
            except cable.CableFitError:
                pass  # keep the fallback
    return tau0, float(np.clip(L, *L_BOUNDS)), float(np.clip(rho, *RHO_BOUNDS))


def _guess_from_exponentials(
    segments: Sequence[CableSegment], lowpass: Lowpass | None
) -> tuple[float, float, float]:
    """initial_guess from a 2-exponential fit of the segments (amplitudes of the first).

    Falls back to one exponential (L = 1, rho = 3) when two cannot be fitted.
    """
    from passivefit.core import expfit

    delay = 0.0 if lowpass is None else lowpass.group_delay_s()
    exp_segments = [
        expfit.Segment(np.asarray(s.t, float) - delay, s.y, s.weight, s.offset) for s in segments
    ]
    try:
        fit = expfit.fit_exponentials(exp_segments, 2)
    except (ValueError, np.linalg.LinAlgError):
        fit = expfit.fit_exponentials(exp_segments, 1)
    tau0 = float(np.clip(fit.taus[0], *TAU0_BOUNDS_S))
    if fit.taus.size < 2:
        return initial_guess(tau0)
    first = segments[0]
    ratio = fit.amplitudes[0, 1] / fit.amplitudes[0, 0]
    if first.kind == "charge" or first.duration_s is None:
        return initial_guess(tau0, fit.taus[1], ratio, "step")
    return initial_guess(tau0, fit.taus[1], ratio, "square", first.duration_s)


# ----------------------------------------------------------------------------- result


@dataclass(frozen=True, eq=False)
class BallStickFit:
    """Result of :func:`fit_ballstick` (SI units).

    Attributes
    ----------
    tau0_s, L, rho : float
        Membrane time constant (s), electrotonic length, dendritic-to-somatic conductance
        ratio.
    tau0_se_s, L_se, rho_se : float
        Standard errors from the covariance of the full Jacobian (offsets, scales and
        bridge jumps included), scaled by the residual variance times ``noise_factor``.
    tau0_ci95_s, L_ci95, rho_ci95 : float
        95 % half-widths: Student t times the standard error for tau0; for L and rho half
        the width of the interval below.
    L_interval, rho_interval : (float, float)
        95 % intervals of L and rho. Where the likelihood is far from quadratic they are
        profile-likelihood intervals (asymmetric; an end is ``nan`` when the profile does
        not rise enough before the fit's bound: the value is then not determined on that
        side); otherwise ``exp(log x -+ t*se)``.
    profiled : tuple of str
        Names whose interval comes from the profile likelihood.
    taus_s : numpy.ndarray
        tau0, tau1, tau2, tau3 of the fitted cell (s).
    b_ratios : numpy.ndarray
        B1/B0, B2/B0, B3/B0 of the step charging curve.
    b0_V, b0_se_V, offset_V : numpy.ndarray
        Per segment: scale (V, tau0 amplitude of the step charging curve, sign of the
        current), its standard error, and the asymptote (V; for a charge from a known
        baseline, baseline + membrane deflection + bridge jump).
    bridge_V, bridge_se_V : numpy.ndarray
        Per segment: the fitted bridge jump (V; the instantaneous voltage across the
        residual series resistance) and its standard error; nan where none is fitted.
    bridge_needed : bool
        Whether the data need the jump (likelihood ratio test). When they do not, the cell
        values come from the model without it, and ``bridge_V`` from the one with it.
    log_cov : numpy.ndarray
        Covariance of (ln tau0, ln L, ln rho), 3 x 3, scaled as the standard errors: for
        values derived from more than one of them (tau1), whose errors are correlated.
    baseline_V : numpy.ndarray
        Per segment: the known level before a charging edge (nan where not given).
    v_inf_membrane_V : numpy.ndarray
        Per segment: membrane part of the steady deflection, b0/b0_over_vinf(L, rho) (V).
    kinds : tuple of str
    durations_s : numpy.ndarray
        Step/pulse duration per segment (inf for charging and complete steps).
    lag_s, lag_se_s : float
        Electrode lag of the bridge jump (s) and its standard error; nan without a jump.
    corner_hz, corner_se_hz : float or None
        The filter corner the model used (None: unfiltered) and, when it was estimated,
        its standard error (else None).
    noise_factor : float
        Variance inflation of the residual noise the errors were scaled by (1 for white
        noise; larger for filtered, correlated noise).
    rmse : float
        Weighted root-mean-square residual (V).
    rss : float
        Weighted residual sum of squares (V^2).
    n_points, n_params, n_modes : int
        Samples (bins count once), free parameters, equalizing modes summed.
    success : bool
        Converged with tau0, L and rho inside their bounds.
    message : str
    """

    tau0_s: float
    L: float
    rho: float
    tau0_se_s: float
    L_se: float
    rho_se: float
    tau0_ci95_s: float
    L_ci95: float
    rho_ci95: float
    L_interval: tuple[float, float]
    rho_interval: tuple[float, float]
    profiled: tuple[str, ...]
    taus_s: np.ndarray
    b_ratios: np.ndarray
    b0_V: np.ndarray
    b0_se_V: np.ndarray
    offset_V: np.ndarray
    bridge_V: np.ndarray
    bridge_se_V: np.ndarray
    baseline_V: np.ndarray
    v_inf_membrane_V: np.ndarray
    kinds: tuple[str, ...]
    durations_s: np.ndarray
    lag_s: float
    lag_se_s: float
    corner_hz: float | None
    corner_se_hz: float | None
    noise_factor: float
    rmse: float
    rss: float
    n_points: int
    n_params: int
    n_modes: int
    success: bool
    message: str
    bridge_needed: bool = True
    log_cov: np.ndarray = field(default_factory=lambda: np.full((3, 3), np.nan))

    def evaluate(self, segment_index: int, t: np.ndarray) -> np.ndarray:
        """Fitted model of one segment at times ``t`` (s from its edge), in V, filtered
        as it was fitted.

        Before the edge (t <= 0) a charge from a known baseline is at the baseline; other
        segments hold their value at the edge.
        """
        t = np.asarray(t, dtype=float)
        after = t > 0
        u = np.where(after, t, 1e-12)  # at the edge every mode counts (the tail mode too)
        order = np.argsort(u, kind="stable")
        kind, duration = self.kinds[segment_index], self.durations_s[segment_index]
        base = self.baseline_V[segment_index]
        seg = CableSegment(u[order], np.zeros(u.size), kind=kind,
                           duration_s=None if math.isinf(duration) else float(duration),
                           baseline=None if math.isnan(base) else float(base))
        has_bridge = self.bridge_needed and not math.isnan(self.bridge_V[segment_index])
        prob = _check([seg], self.corner_hz, False, has_bridge, strict=False)
        theta = np.log([self.tau0_s, self.L, self.rho] + ([self.lag_s] if has_bridge else []))
        prob.set_modes(theta, margin=1.0)
        shape_b0, shape_bridge = prob.shape(theta)
        value = np.empty(u.size)
        value[order] = self.b0_V[segment_index] * shape_b0 + (
            self.bridge_V[segment_index] * shape_bridge if has_bridge else 0.0)
        if math.isnan(base):
            return self.offset_V[segment_index] + value
        return base + np.where(after, value, 0.0)

    def bridge_jump_V(self, segment_index: int, v_base_V: float | None = None) -> float:
        """Instantaneous jump at a step onset that is not membrane charging, in V.

        The fitted jump when the segment was fitted from its baseline; otherwise
        ``offset - v_base - v_inf_membrane``. Divide by the step current for the bridge
        (series) resistance error in Ohm.
        """
        if self.kinds[segment_index] != "charge":
            raise ValueError(
                f"segment {segment_index} is a {self.kinds[segment_index]!r} segment; the "
                "bridge jump needs a charging (step onset) segment"
            )
        if not math.isnan(self.bridge_V[segment_index]):
            return float(self.bridge_V[segment_index])
        if v_base_V is None:
            raise ValueError("give `v_base_V`: this segment was fitted from a free offset")
        return float(self.offset_V[segment_index] - v_base_V - self.v_inf_membrane_V[segment_index])

    def c_total_F(self, segment_index: int, current_A: float) -> float:
        """Total membrane capacitance I*tau0/b0, in F (docs/references.md §4, uniform tau_m).

        ``current_A`` is the step (or pulse) current of that segment, in A.
        """
        return cable.c_total_step(current_A, self.tau0_s, float(self.b0_V[segment_index]))

    def to_dict(self) -> dict:
        """Plain-JSON summary; keys carry their SI unit."""
        def plain(x):
            return None if x is None or not np.isfinite(x) else float(x)

        return {
            "tau0_s": self.tau0_s,
            "L": self.L,
            "rho": self.rho,
            "tau0_se_s": self.tau0_se_s,
            "L_se": self.L_se,
            "rho_se": self.rho_se,
            "tau0_ci95_s": self.tau0_ci95_s,
            "L_ci95": self.L_ci95,
            "rho_ci95": self.rho_ci95,
            "L_interval": [plain(x) for x in self.L_interval],
            "rho_interval": [plain(x) for x in self.rho_interval],
            "profiled": list(self.profiled),
            "taus_s": self.taus_s.tolist(),
            "b_ratios": self.b_ratios.tolist(),
            "b0_V": self.b0_V.tolist(),
            "b0_se_V": self.b0_se_V.tolist(),
            "offset_V": self.offset_V.tolist(),
            "bridge_V": [plain(x) for x in self.bridge_V],
            "bridge_se_V": [plain(x) for x in self.bridge_se_V],
            "bridge_needed": self.bridge_needed,
            "v_inf_membrane_V": self.v_inf_membrane_V.tolist(),
            "lag_s": plain(self.lag_s),
            "corner_hz": plain(self.corner_hz),
            "corner_se_hz": plain(self.corner_se_hz),
            "noise_factor": self.noise_factor,
            "rmse_V": self.rmse,
            "n_points": self.n_points,
            "n_modes": self.n_modes,
            "success": self.success,
            "message": self.message,
        }


# ---------------------------------------------------------------------------- fitting


@dataclass
class _Solution:
    """The end of a search: x, half the sum of squared scaled residuals, status (> 0
    converged, 0 evaluation limit) and a message."""

    x: np.ndarray
    cost: float
    status: int
    message: str
    nfev: int = 0


#: Changes of the cost (in units of the residual variance) too small to matter
_NEGLIGIBLE_CHI2 = 1e-6


def _levenberg_marquardt(fun, jac, x0: np.ndarray, lo: np.ndarray, hi: np.ndarray,
                         tol: float, max_nfev: int = 200) -> _Solution:
    """Levenberg–Marquardt for the few nonlinear parameters, inside the box [lo, hi].

    Each step solves the damped normal equations through the SVD of the column-scaled
    Jacobian (Marquardt's scaling), so one SVD serves every damping tried. Trial points
    are clipped into the box, and a parameter at its bound whose gradient points out of
    the box is held there for the step (an active set). The damping follows the gain
    ratio of actual to predicted decrease (Nielsen's rule; Madsen, Nielsen & Tingleff
    2004, §3.2; docs/references.md §6), as in ``expfit._levenberg_marquardt``.

    It stops when the linear model predicts a decrease below ``tol`` times the cost, an
    accepted step decreases the cost by less than that, or a step moves x by less than
    ``tol (tol + |x|)`` — the criteria of :func:`scipy.optimize.least_squares` with
    ``ftol = xtol = tol`` — where a decrease counts as too small also when it is below
    ``_NEGLIGIBLE_CHI2`` times the residual variance (far below any parameter's error).
    """
    x = np.clip(x0, lo, hi)
    r = fun(x)
    cost, nfev, lam, nu = float(r @ r), 1, 1e-3, 2.0
    dof = max(r.size - x.size, 1)
    while nfev < max_nfev:
        # a change of the cost below this is negligible against the noise: the step that
        # gives it moves no parameter by more than sqrt(_NEGLIGIBLE_CHI2) of its sd
        negligible = max(tol, _NEGLIGIBLE_CHI2 / dof) * cost
        j = jac(x)
        grad = j.T @ r
        held = ((x <= lo) & (grad > 0)) | ((x >= hi) & (grad < 0))
        move = ~held
        scale = np.sqrt(np.sum(j[:, move] ** 2, axis=0))
        scale[scale == 0] = 1.0
        u, sv, vt = np.linalg.svd(j[:, move] / scale, full_matrices=False)
        ur = u.T @ r
        if float(np.sum(ur**2)) <= negligible:  # the Gauss-Newton step gains nothing
            return _Solution(x, 0.5 * cost, 1, "the predicted decrease is below the tolerance",
                             nfev)
        while True:
            step = np.zeros_like(x)
            step[move] = -(vt.T @ (sv / (sv**2 + lam) * ur)) / scale
            trial = np.clip(x + step, lo, hi)
            r_trial = fun(trial)
            nfev += 1
            cost_trial = float(r_trial @ r_trial)
            if cost_trial < cost:
                break
            moved = trial - x
            if np.linalg.norm(moved) <= tol * (tol + np.linalg.norm(x)) or nfev >= max_nfev:
                return _Solution(x, 0.5 * cost, 1 if nfev < max_nfev else 0,
                                 "no further decrease of the cost" if nfev < max_nfev else
                                 "the evaluation limit was reached", nfev)
            lam *= nu
            nu *= 2.0
        moved = trial - x
        fit = r + j @ moved
        predicted = cost - float(fit @ fit)
        gain = (cost - cost_trial) / predicted if predicted > 0 else 0.0
        lam = min(max(lam * max(1.0 / 3.0, 1.0 - (2.0 * gain - 1.0) ** 3), 1e-12), 1e10)
        nu = 2.0
        decrease = cost - cost_trial
        x, r, cost = trial, r_trial, cost_trial
        if decrease <= negligible:
            return _Solution(x, 0.5 * cost, 2, "the decrease of the cost is below the "
                             "tolerance", nfev)
        if np.linalg.norm(moved) <= tol * (tol + np.linalg.norm(x)):
            return _Solution(x, 0.5 * cost, 3, "the step is below the tolerance", nfev)
    return _Solution(x, 0.5 * cost, 0, "the evaluation limit was reached", nfev)


def _trust_region(fun, jac, x0: np.ndarray, lo: np.ndarray, hi: np.ndarray,
                  tol: float) -> _Solution:
    """:func:`scipy.optimize.least_squares` (trust region reflective): slower per step,
    but its scaling by the distance to the bounds follows a curved valley along a bound
    where :func:`_levenberg_marquardt` crawls."""
    from scipy.optimize import least_squares

    res = least_squares(fun, x0, jac=jac, bounds=(lo, hi), x_scale=1.0, xtol=tol, ftol=tol,
                        gtol=tol, max_nfev=200)
    return _Solution(res.x, float(res.cost), int(res.status), str(res.message), int(res.nfev))


def _solve(prob: _Problem, theta0: np.ndarray, free: np.ndarray | None = None,
           tol: float = 1e-12, fallback: bool = True) -> _Solution:
    """Levenberg–Marquardt from ``theta0`` over the ``free`` parameters (default all),
    enlarging the mode count until it suffices; with ``fallback``, the trust-region
    solver where it does not converge or ends at a bound of tau0, L or rho."""
    lo, hi = prob.bounds()
    free = np.ones(theta0.size, bool) if free is None else free
    theta = np.clip(theta0, lo + 1e-9, hi - 1e-9)

    def full(x):
        out = theta.copy()
        out[free] = x
        return out

    for _ in range(4):
        prob.set_modes(theta)
        fun = lambda x: prob.residual(full(x)) / prob.y_scale  # noqa: E731
        jac = lambda x: prob.jacobian(full(x))[:, free] / prob.y_scale  # noqa: E731
        res = _levenberg_marquardt(fun, jac, theta[free], lo[free], hi[free], tol)
        cell = free & (np.arange(theta.size) < 3)  # tau0, L, rho
        at_bound = np.any(np.minimum(full(res.x) - lo, hi - full(res.x))[cell] < 1e-6)
        if fallback and (res.status <= 0 or at_bound):
            # a crawl along a curved valley, or tau0, L or rho at a bound (where the cost
            # is flat, the trust-region solver stops short of it, as the fit always did)
            res = _trust_region(fun, jac, theta[free], lo[free], hi[free], tol)
        theta = full(res.x)
        if np.all(np.array(prob.modes_for(theta)) <= (prob.n_modes, prob.n_bin_modes)):
            break
    res.x = theta
    return res


def _starts(prob: _Problem, theta0: np.ndarray, ranked: np.ndarray | None = None):
    """The given start, then the best points of a coarse (L, rho) grid at its tau0.

    A generator: the grid is searched (:func:`_grid_ranks`) only when the fit from the
    given start failed, unless its ranking is ``ranked`` already.
    """
    yield theta0
    if ranked is None:
        ranked = _grid_ranks([prob], [theta0])[0]
    for j in ranked[:_GRID_STARTS]:
        point = theta0.copy()
        point[1:3] = _GRID[j]
        yield point


#: The coarse grid of (log L, log rho) for starts: 81 points
_GRID = np.log([(L, rho) for L in np.geomspace(0.1, 4.0, 9)
                for rho in np.geomspace(0.03, 300.0, 9)])


def _grid_ranks(probs: Sequence[_Problem], theta0s: Sequence[np.ndarray]) -> list[np.ndarray]:
    """The grid points ordered by their cost, for each problem at its ``theta0``'s tau0.

    Problems of the same segments differ only in their linear columns (with or without
    the bridge jump), so the model columns are computed once, by the first problem. The
    points needing the same modes (those of one L) are computed together.
    """
    lead, costs = probs[0], np.empty((len(probs), len(_GRID)))
    theta0 = theta0s[0]
    groups = {}
    for i, cell in enumerate(_GRID):
        point = theta0.copy()
        point[1:3] = cell
        groups.setdefault(lead.modes_for(point), []).append(i)
    shared = None   # whether every design is the first columns of the lead's
    for modes, cells in groups.items():
        lead.n_modes, lead.n_bin_modes = modes
        shapes = lead.cell_shapes(theta0, _GRID[cells])
        if shared is None:
            a = lead._design(shapes)
            shared = all(np.array_equal(p.yw, lead.yw) and p.n_cols <= lead.n_cols
                         and np.array_equal(p._design(shapes), a[..., :p.n_cols])
                         for p in probs)
        costs[:, cells] = (lead.costs_of(shapes, [p.n_cols for p in probs]) if shared
                           else [p.costs_of(shapes, [p.n_cols])[0] for p in probs])
    return [np.argsort(c, kind="stable") for c in costs]


def _problem_with(res, lo: np.ndarray, hi: np.ndarray) -> str:
    """Why a solution is not a success ('' when it is)."""
    if res.status <= 0:
        return f"solver did not converge: {res.message}"
    names = ("tau0", "L", "rho")
    at = [names[j] for j in range(3) if min(res.x[j] - lo[j], hi[j] - res.x[j]) < 1e-6]
    if at:
        return f"{', '.join(at)} reached the bound of the fit: not determined by these data"
    return ""


def fit_ballstick(
    segments: Sequence[CableSegment],
    init: tuple[float, float, float] | None = None,
    corner_hz: float | None = None,
    estimate_corner: bool = False,
    bridge: bool = True,
    noise_factor: float = 1.0,
    profile: bool = False,
    thorough: bool = False,
    errors: bool = True,
) -> BallStickFit:
    """Fit a uniform ball-and-stick model to somatic voltage transients.

    The model is the whole measurement chain: the cell's response, a bridge jump (the
    voltage across a residual series resistance) rising with the electrode's first-order
    lag, and the amplifier's 4-pole Bessel low-pass applied as a filter
    (:mod:`passivefit.core.lowpass`).

    Parameters
    ----------
    segments : sequence of CableSegment
        Transients sharing tau0, L and rho (onset and decay of a step, several step
        amplitudes...), each with its own offset and, unless grouped, its own scale.
    init : (tau0_s, L, rho) or None
        Start values; None takes them from a 2-exponential fit (:func:`initial_guess`).
    corner_hz : float or None
        The filter's −3 dB corner (Hz); None: unfiltered (or estimated).
    estimate_corner : bool
        Fit the corner as well (``corner_hz`` is then ignored).
    bridge : bool
        Fit a bridge jump (with its lag) for each group with a charge from a known
        ``baseline``.
    noise_factor : float
        Variance inflation of correlated residual noise (>= 1), applied to the errors.
    profile : bool
        Profile-likelihood intervals of L and rho where the likelihood is not quadratic.
    thorough : bool
        Fit from the grid's best starts as well as from ``init`` and keep the best, so the
        answer does not depend on the start; otherwise the grid is tried only when the fit
        from ``init`` fails.
    errors : bool
        Compute the standard errors and intervals (NaN without: values only, as for the
        refits of a bootstrap).

    Returns
    -------
    BallStickFit

    Raises
    ------
    ValueError
        Bad segments (too few or non-finite samples, samples before the edge, unknown
        kind, bad duration) or start values outside the bounds
        (L in [0.05, 5], rho in [0.01, 1000], tau0 in [0.1 ms, 10 s]).
    """
    prob = _check(segments, corner_hz, estimate_corner, bridge)
    if init is None:
        init = _guess_from_exponentials(segments, prob.lowpass(prob.start(np.zeros(3))))
    init = _check_init(init)
    noise_factor = max(float(noise_factor), 1.0)
    bare = _check(segments, corner_hz, estimate_corner, False) if prob.lag else None
    probs = [prob] if bare is None else [prob, bare]
    # when thorough, both models are fitted from the grid's best points as well
    ranked = (_grid_ranks(probs, [p.start(init) for p in probs]) if thorough
              else [None] * len(probs))
    best, problem = _best_fit(prob, prob.start(init), thorough, ranked[0])
    if not prob.lag:
        return _summarize(prob, best.x, problem or "converged", not problem, noise_factor,
                          profile and not problem, errors)
    # Is the jump needed? A lagged jump can stand in for fast dendritic charging, so the
    # cell is read from the model without one unless the data reject that model
    # (likelihood ratio, chi-square with 2 degrees of freedom at 95 %).
    with_jump = _summarize(prob, best.x, problem or "converged", not problem, noise_factor,
                           False, errors)
    bare_best, bare_problem = _best_fit(bare, bare.start(init), thorough, ranked[1])
    sigma2 = noise_factor * with_jump.rss / max(with_jump.n_points - with_jump.n_params, 1)
    needed = 2 * bare_best.cost * bare.y_scale**2 - with_jump.rss > 5.991 * sigma2
    if needed or bare_problem and not problem:
        if not (profile and not problem):
            return with_jump   # the same summary: no profile to add
        return _summarize(prob, best.x, problem or "converged", True, noise_factor, True, errors)
    fit = _summarize(bare, bare_best.x, bare_problem or "converged", not bare_problem,
                     noise_factor, profile and not bare_problem, errors)
    return replace(fit, bridge_V=with_jump.bridge_V, bridge_se_V=with_jump.bridge_se_V,
                   lag_s=with_jump.lag_s, lag_se_s=with_jump.lag_se_s, bridge_needed=False)


def _best_fit(prob: _Problem, theta0: np.ndarray, thorough: bool,
              ranked: np.ndarray | None = None):
    """The best fit from ``theta0`` and the grid starts (all of them when ``thorough``,
    else only after a failure): (result, problem). Fits without a problem win.

    When ``thorough``, a start whose search ends at a bound or does not converge is handed
    to the trust-region solver only if its cost could still win (the solver ends short of
    a bound, without a problem, where the cost is flat)."""
    lo, hi = prob.bounds()
    tried, crawled = [], []
    for start in _starts(prob, theta0, ranked):
        res = _solve(prob, start, fallback=not thorough)
        problem = _problem_with(res, lo, hi)
        (crawled if problem and thorough else tried).append(
            (bool(problem), 2 * res.cost, res, problem, start))
        if not problem and not thorough:
            break
    clean = min((cost for bad, cost, *_ in tried if not bad), default=math.inf)
    for _, cost, res, problem, start in crawled:
        if cost <= clean * (1 + 1e-6):   # it could still win: as the trust region ends it
            res = _solve(prob, start)
            problem = _problem_with(res, lo, hi)
        tried.append((bool(problem), 2 * res.cost, res, problem, start))
    _, _, best, problem, _ = min(tried, key=lambda item: item[:2])
    return best, problem


def _check_init(init) -> np.ndarray:
    try:
        tau0, L, rho = (float(v) for v in init)
    except (TypeError, ValueError):
        raise ValueError(f"`init` must be (tau0_s, L, rho), got {init!r}") from None
    for name, value, (a, b) in (
        ("tau0_s", tau0, TAU0_BOUNDS_S),
        ("L", L, L_BOUNDS),
        ("rho", rho, RHO_BOUNDS),
    ):
        if not (math.isfinite(value) and a <= value <= b):
            raise ValueError(f"`init` {name} = {value!r} is outside the fit bounds [{a}, {b}]")
    return np.log([tau0, L, rho])


def _profile(prob: _Problem, theta: np.ndarray, j: int, rss: float, sigma2: float,
             wald: float) -> tuple[float, float]:
    """95 % profile-likelihood interval of theta[j] (log scale).

    The signed root deviance z(v) = sqrt((RSS_profile(v) - RSS_min)/sigma2) is nearly
    linear in a parameter even where RSS is not quadratic, so each end (z = 1.96, the
    chi-square(1) 95 % point) is found by secant steps from the Wald end; a Wald end within
    0.05 of it is kept. An end is nan when z stays below 1.96 up to the fit's bound.
    """
    lo, hi = prob.bounds()
    free = np.ones(theta.size, bool)
    free[j] = False
    target = 1.959964

    def z(v: float, start: np.ndarray) -> tuple[float, np.ndarray]:
        trial = start.copy()
        trial[j] = v
        res = _solve(prob, trial, free, tol=1e-9)
        excess = float(np.sum(prob.residual(res.x) ** 2)) - rss
        return math.sqrt(max(excess, 0.0) / sigma2), res.x

    ends = []
    for sign in (-1.0, 1.0):
        bound = lo[j] if sign < 0 else hi[j]
        points = [(theta[j], 0.0)]
        v, x, end = float(np.clip(theta[j] + sign * wald, lo[j], hi[j])), theta, math.nan
        for _ in range(6):
            zv, x = z(v, x)
            if abs(zv - target) < 0.05:
                end = v
                break
            points.append((v, zv))
            if zv < target and v == bound:
                break  # not determined on this side
            (v0, z0), (v1, z1) = points[-2], points[-1]
            if v1 == v0:
                break
            slope = (z1 - z0) / (v1 - v0) if z1 != z0 else 0.0
            jump = (target - z1) / slope if slope * sign > 0 else 3.0 * (v1 - theta[j])
            jump = float(np.clip(jump, -3 * abs(v1 - theta[j]) - 0.05,
                                 3 * abs(v1 - theta[j]) + 0.05))
            v = float(np.clip(v1 + jump, min(lo[j], bound), max(hi[j], bound)))
        else:
            end = v if points[-1][1] >= target * 0.9 else math.nan
        ends.append(end)
    return ends[0], ends[1]


def _lag_se(jac: np.ndarray, sigma2: float) -> float:
    """The standard error of log lag (column 3 of `jac`) from the column-scaled normal
    matrix (core.qc.normal_inverse). A lag far below the sampling interval barely moves
    the model: its column is so small that the pseudo-inverse of the unscaled matrix
    drops it and gives it no variance at all (a CI of 10⁻¹² s)."""
    if not np.any(jac[:, 3]):
        return math.inf
    return math.sqrt(max(normal_inverse(jac)[3, 3] * sigma2, 0.0))


def _summarize(
    prob: _Problem, theta: np.ndarray, message: str, success: bool, noise_factor: float,
    profile: bool, errors: bool = True,
) -> BallStickFit:
    """The BallStickFit of `prob` at `theta`; without `errors`, its standard errors and
    intervals are NaN (not computed: a bootstrap's refits need values only)."""
    prob.set_modes(theta)
    coef, resid = prob.solve(theta)
    rss = float(resid @ resid)
    n, p = prob.u.size, theta.size + prob.n_cols
    dof = max(n - p, 1)
    sigma2 = noise_factor * rss / dof
    cov = np.full((p, p), np.nan)
    if errors:
        jac = prob.full_jacobian(theta)
        cov = sigma2 * np.linalg.pinv(jac.T @ jac)
    se = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    if errors and prob.lag:
        se[3] = _lag_se(jac, sigma2)
    q = t975(dof)
    tau0, L, rho = np.exp(theta[:3])
    free = prob.offset_col >= 0
    offsets = prob.fixed.copy()
    offsets[free] = coef[prob.offset_col[free]]
    nt = theta.size
    b0 = coef[prob.scale_col]
    b0_se = se[nt + prob.scale_col]
    has = prob.bridge_col >= 0
    bridge = np.where(has, coef[np.where(has, prob.bridge_col, 0)], np.nan)
    bridge_se = np.where(has, se[nt + np.where(has, prob.bridge_col, 0)], np.nan)
    rate, ratio = mode_table(L, rho, 3)
    v_inf = b0 / cable.b0_over_vinf(L, rho)
    offsets[prob.known_base] += v_inf[prob.known_base] + np.nan_to_num(bridge)[prob.known_base]
    intervals, profiled = {}, []
    lo, hi = prob.bounds()
    for j, name in ((1, "L"), (2, "rho")):
        wald = (theta[j] - q * se[j], theta[j] + q * se[j])
        if profile and rss > 0:
            ends = _profile(prob, theta, j, rss, sigma2, q * se[j])
            if ends != wald:
                profiled.append(name)
            wald = ends
            prob.set_modes(theta)
            prob.solve(theta)
        # an end beyond the fit's bound is not determined by the data
        intervals[name] = tuple(math.exp(e) if lo[j] <= e <= hi[j] else math.nan
                                for e in wald)
    lp = prob.lowpass(theta)
    return BallStickFit(
        tau0_s=float(tau0),
        L=float(L),
        rho=float(rho),
        tau0_se_s=float(tau0 * se[0]),
        L_se=float(L * se[1]),
        rho_se=float(rho * se[2]),
        tau0_ci95_s=float(q * tau0 * se[0]),
        L_ci95=float(np.diff(intervals["L"])[0] / 2),
        rho_ci95=float(np.diff(intervals["rho"])[0] / 2),
        L_interval=intervals["L"],
        rho_interval=intervals["rho"],
        profiled=tuple(profiled),
        taus_s=tau0 / rate,
        b_ratios=ratio[1:].copy(),
        b0_V=b0.copy(),
        b0_se_V=b0_se.copy(),
        offset_V=offsets,
        bridge_V=bridge,
        bridge_se_V=bridge_se,
        baseline_V=np.where(prob.known_base, prob.fixed, np.nan),
        v_inf_membrane_V=v_inf,
        kinds=prob.kinds,
        durations_s=prob.durations.copy(),
        lag_s=float(math.exp(theta[3])) if prob.lag else math.nan,
        lag_se_s=float(math.exp(theta[3]) * se[3]) if prob.lag else math.nan,
        corner_hz=None if lp is None else lp.corner_hz,
        corner_se_hz=float(lp.corner_hz * se[nt - 1]) if prob.estimate_corner else None,
        noise_factor=noise_factor,
        rmse=math.sqrt(rss / n),
        rss=rss,
        n_points=n,
        n_params=p,
        n_modes=prob.n_modes,
        success=success,
        message=message,
        log_cov=cov[:3, :3].copy(),
    )
