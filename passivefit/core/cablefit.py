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
trial (log tau0, log L, log rho) the offsets and scales enter linearly and are solved by
least squares; :func:`scipy.optimize.least_squares` searches the three nonlinear parameters
with the Golub–Pereyra Jacobian of the projected residual (sums over the samples analytic,
the per-mode rates and amplitudes differentiated by central differences). The eigenvalue
roots are found for all modes at once by Newton's method, warm-started from the last ones.
Segments may share a scale (``group``), e.g. the onset and the decay of the same step.
Binned data (``expfit.decimate_tail``) are modelled as exact bin means when the sampling
interval is given, and a known delay of the recording (a filter's group delay) shifts the
model in time.

The sum is truncated where it has converged for the fitted times: every mode with
``t_min/tau_n < 30`` is kept (the others are below e^-30 of their amplitude); at t = 0 the
model uses the exact sum ``sum_n r_n = V_inf/B0`` (docs/references.md §3, B0/V_inf).

Units are SI: s, V, A, F.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from passivefit.core import cable
from passivefit.core.peel import check_samples

__all__ = [
    "L_BOUNDS",
    "RHO_BOUNDS",
    "BallStickFit",
    "CableSegment",
    "fit_ballstick",
    "initial_guess",
    "mode_table",
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
_MODE_STEP = 1e-6  # central-difference step of the per-mode vectors in log tau0, log L, log rho
_GRID_STARTS = 3  # fits tried from the best points of the fallback grid
_FALLBACK_L_FACTOR = 0.9  # the naive cylinder L overestimates the ball-and-stick L


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
    """

    t: np.ndarray
    y: np.ndarray
    weight: np.ndarray | None = None
    offset: float | None = None
    kind: str = "charge"
    duration_s: float | None = None
    group: object = None
    sample_interval_s: float | None = None


# ---------------------------------------------------------------------- model shape


def _roots(k: float, n: int, y_start: np.ndarray | None = None) -> np.ndarray:
    """x_n = alpha_n*L (n = 1..n) solving sin(x) + k*x*cos(x) = 0 in ((n - 1/2)pi, n*pi].

    With x = (n - 1/2)*pi + y the equation is y = arctan(1/(k*x)); Newton's method on
    G(y) = y - arctan(1/(k*(c + y))), whose slope lies in [1, 1 + 1/pi], converges from
    any start in [0, pi/2], vectorised over all modes.
    """
    c = (np.arange(1, n + 1) - 0.5) * math.pi
    y = np.arctan2(1.0, k * (c + 0.25 * math.pi)) if y_start is None else y_start.copy()
    for _ in range(_NEWTON_STEPS):
        u = k * (c + y)
        step = (y - np.arctan2(1.0, u)) / (1.0 + k / (1.0 + u * u))
        y = np.clip(y - step, 0.0, 0.5 * math.pi)
        if np.max(np.abs(step)) < 1e-15:
            break
    return c + y


def mode_table(L: float, rho: float, n_modes: int) -> tuple[np.ndarray, np.ndarray]:
    """Rates and charging amplitude ratios of the first ``n_modes`` + 1 modes.

    Parameters
    ----------
    L : float
        Electrotonic length of the cylinder.
    rho : float
        Dendritic-to-somatic conductance ratio (``inf`` for a bare cylinder).
    n_modes : int
        Number of equalizing modes (mode 0 is added).

    Returns
    -------
    rate_ratio : numpy.ndarray
        tau0/tau_n = 1 + alpha_n^2, n = 0..n_modes (first entry 1).
    b_ratio : numpy.ndarray
        B_n/B_0 of the step charging curve (first entry 1; docs/references.md §3).
    """
    s = math.tanh(L) / rho  # G_S/G_inf (0 for a bare cylinder)
    alphas = _roots(s / L, int(n_modes)) / L
    return _table(alphas, L, rho)


def _table(alphas: np.ndarray, L: float, rho: float) -> tuple[np.ndarray, np.ndarray]:
    rate = np.concatenate(([1.0], 1.0 + alphas**2))
    pulse = cable.pulse_ratios_from_alphas(alphas, L, rho)
    return rate, np.concatenate(([1.0], pulse / rate[1:]))


def _modes_needed(L: float, tau0: float, t_min: float) -> int:
    """Equalizing modes with t_min/tau_n < _TRUNCATION (alpha_n >= (n - 1/2)pi/L)."""
    alpha = math.sqrt(max(_TRUNCATION * tau0 / t_min - 1.0, 0.0))
    return int(min(max(math.ceil(L * alpha / math.pi + 0.5), 1), _MAX_MODES))


def _inv_expm1(x: np.ndarray, scale) -> np.ndarray:
    """scale/(exp(x) - 1) for x > 0, without overflow."""
    return scale * np.exp(-x) / -np.expm1(-x)


def _decay_factor(rate_ratio: np.ndarray, tau0: float, duration: float) -> np.ndarray:
    """1 - exp(-D/tau_n) per mode (1 for a complete step, D = inf)."""
    return -np.expm1(-duration * rate_ratio / tau0)


def _shape_amplitudes(
    rate: np.ndarray, ratio: np.ndarray, tau0: float, kinds: Sequence[str], durations: np.ndarray
) -> np.ndarray:
    """Signed mode amplitudes per unit b0, shape (n_segments, n_modes + 1)."""
    out = np.empty((len(kinds), rate.size))
    for s, kind in enumerate(kinds):
        if kind == "charge":
            out[s] = -ratio
        else:
            out[s] = ratio * _decay_factor(rate, tau0, durations[s])
    return out


# ------------------------------------------------------------------------- problem


@dataclass
class _Problem:
    """Concatenated samples of all segments and the variable-projection residual.

    Nonlinear parameters theta = (log tau0, log L, log rho); linear ones are the free
    offsets (one per segment) then the scales (one per group). Single samples come first,
    then bins (late points, which need only the slow modes).
    """

    u: np.ndarray  # time since the (delayed) edge of each point's first sample, s
    count: np.ndarray  # samples per bin, for the bins only
    dt: np.ndarray  # their sampling interval, s
    sw: np.ndarray  # sqrt(weight)
    yw: np.ndarray  # sqrt(weight) * (y - fixed offset)
    seg: np.ndarray  # segment index per point
    kinds: tuple[str, ...]
    durations: np.ndarray  # inf for a complete step
    fixed: np.ndarray  # known offsets (0 where fitted)
    offset_col: np.ndarray  # column of each segment's offset, -1 if known
    scale_col: np.ndarray  # column of each segment's scale
    n_cols: int
    y_scale: float  # largest swing of any segment (V): the solver sees residuals in its units
    n_modes: int = 1  # equalizing modes summed for single samples
    n_bin_modes: int = 1  # ... and for bins
    _y_start: np.ndarray | None = field(default=None, repr=False)
    _offsets: np.ndarray | None = field(default=None, repr=False)
    _key: tuple | None = field(default=None, repr=False)
    _solved: tuple = field(default=(), repr=False)

    @property
    def n_single(self) -> int:
        return self.u.size - self.count.size

    @property
    def t_min(self) -> float:
        return float(self.u[0] if self.n_single else np.min(self.u))

    @property
    def t_min_bins(self) -> float:
        return float(np.min(self.u[self.n_single :])) if self.count.size else math.inf

    def modes_for(self, theta: np.ndarray, margin: float = 1.0) -> tuple[int, int]:
        """Mode counts for single samples and bins that converge at ``theta``.

        ``margin`` > 1 allows L and tau0 to grow by that factor during a search.
        """
        tau0, L = margin * math.exp(theta[0]), min(margin * math.exp(theta[1]), L_BOUNDS[1])
        n = _modes_needed(L, tau0, self.t_min)
        return n, min(_modes_needed(L, tau0, self.t_min_bins), n)

    def set_modes(self, theta: np.ndarray, margin: float = 1.2) -> None:
        self.n_modes, self.n_bin_modes = self.modes_for(theta, margin)

    def amplitudes(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Mode rates (1/s) and signed amplitudes per unit scale of every segment."""
        tau0, L, rho = np.exp(theta)
        k = math.tanh(L) / (rho * L)
        warm = self._y_start is not None and self._y_start.size == self.n_modes
        x = _roots(k, self.n_modes, self._y_start if warm else None)
        self._y_start = x - (np.arange(1, self.n_modes + 1) - 0.5) * math.pi
        rate, ratio = _table(x / L, L, rho)
        return rate / tau0, _shape_amplitudes(rate, ratio, tau0, self.kinds, self.durations)

    def shape(self, theta: np.ndarray, derivative: bool = False):
        """Model per unit scale at every point (unweighted; bins averaged exactly).

        With ``derivative``, also d(shape)/d(theta), shape (n_points, 3): the mode rates
        and amplitudes are differentiated numerically (central differences of cheap
        per-mode vectors), the sums over the points analytically.
        """
        rates, amps = self.amplitudes(theta)
        n1, m = self.n_single, self.n_bin_modes + 1
        seg1, segb = self.seg[:n1], self.seg[n1:]
        n, x = self.count[:, None], self.dt[:, None] * rates[:m]
        # mean of exp(-rate*t) over n samples dt apart, relative to the first one
        e1 = np.exp(-self.u[:n1, None] * rates)
        eb = np.exp(-self.u[n1:, None] * rates[:m] + np.log(np.expm1(-n * x) / (n * np.expm1(-x))))
        value = np.concatenate(
            [np.einsum("pm,pm->p", e1, amps[seg1]), np.einsum("pm,pm->p", eb, amps[segb, :m])]
        )
        if not derivative:
            return value
        dlog1 = -self.u[:n1, None]  # d log(e)/d rate
        dlogb = -self.u[n1:, None] + self.dt[:, None] * (_inv_expm1(n * x, n) - _inv_expm1(x, 1.0))
        out = np.empty((value.size, theta.size))
        for j in range(theta.size):
            step = np.zeros_like(theta)
            step[j] = _MODE_STEP
            (r_up, a_up), (r_dn, a_dn) = (
                self.amplitudes(theta + step),
                self.amplitudes(theta - step),
            )
            d_rate, d_amp = (r_up - r_dn) / (2 * _MODE_STEP), (a_up - a_dn) / (2 * _MODE_STEP)
            out[:n1, j] = np.einsum("pm,pm->p", e1 * dlog1 * d_rate, amps[seg1])
            out[:n1, j] += np.einsum("pm,pm->p", e1, d_amp[seg1])
            out[n1:, j] = np.einsum("pm,pm->p", eb * dlogb * d_rate[:m], amps[segb, :m])
            out[n1:, j] += np.einsum("pm,pm->p", eb, d_amp[segb, :m])
        return value, out

    def _design(self, shape: np.ndarray) -> np.ndarray:
        """Weighted design matrix, shape (n_points, n_cols), for the given model shape."""
        if self._offsets is None:
            self._offsets = np.zeros((self.u.size, self.n_cols))
            free = np.flatnonzero(self.offset_col[self.seg] >= 0)
            self._offsets[free, self.offset_col[self.seg[free]]] = self.sw[free]
        a = self._offsets.copy()
        a[np.arange(self.u.size), self.scale_col[self.seg]] = shape * self.sw
        return a

    def design(self, theta: np.ndarray) -> np.ndarray:
        return self._design(self.shape(theta))

    def solve(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Linear coefficients and the weighted residual at ``theta`` (QR, cached)."""
        key = (theta.tobytes(), self.n_modes, self.n_bin_modes)
        if key != self._key:
            q, r = np.linalg.qr(self.design(theta))
            qty = q.T @ self.yw
            self._solved = (np.linalg.solve(r, qty), self.yw - q @ qty, q, r)
            self._key = key
        return self._solved[:2]

    def residual(self, theta: np.ndarray) -> np.ndarray:
        return self.solve(theta)[1]

    def jacobian(self, theta: np.ndarray) -> np.ndarray:
        """Golub–Pereyra Jacobian of the projected residual, shape (n_points, 3).

        dr/dtheta_j = -(P_perp dA_j A^+ y + (A^+)^T dA_j^T r), where only the scale
        columns of A depend on theta.
        """
        self.solve(theta)
        coef, resid, q, r = self._solved
        _, d_shape = self.shape(theta, derivative=True)
        cols = self.scale_col[self.seg]
        jac = np.empty((self.u.size, theta.size))
        for j in range(theta.size):
            d_col = d_shape[:, j] * self.sw
            first = d_col * coef[cols]
            first -= q @ (q.T @ first)
            g = np.bincount(cols, weights=d_col * resid, minlength=self.n_cols)
            jac[:, j] = -(first + q @ np.linalg.solve(r.T, g))
        return jac

    def full_jacobian(self, theta: np.ndarray) -> np.ndarray:
        """Jacobian of the weighted model in (theta, linear coefficients)."""
        coef, _ = self.solve(theta)
        shape, d_shape = self.shape(theta, derivative=True)
        d_model = d_shape * (self.sw * coef[self.scale_col[self.seg]])[:, None]
        return np.column_stack([d_model, self._design(shape)])


def _check(segments: Sequence[CableSegment], delay_s: float) -> _Problem:
    if isinstance(segments, CableSegment):
        segments = [segments]
    if len(segments) == 0:
        raise ValueError("no segments given; pass at least one CableSegment(t, y)")
    if not math.isfinite(delay_s):
        raise ValueError(f"`delay_s` must be a finite time in s, got {delay_s!r}")
    parts, kinds, durations, fixed = [], [], [], []
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
        if seg.offset is not None and not math.isfinite(seg.offset):
            raise ValueError(f"{label}: a known `offset` must be finite, got {seg.offset!r}")
        u = t - delay_s
        count, dt = _bin_counts(seg, w, label)
        u = u - 0.5 * (count - 1) * dt  # first sample of each bin
        if u[0] <= 0:
            raise ValueError(
                f"{label}: the first sample (t = {t[0]:.3g} s) is not after the edge plus "
                f"`delay_s` ({delay_s:.3g} s); start the fit later (e.g. 0.3 ms after the edge)"
            )
        need = 2 + (seg.offset is None) + _MIN_EXTRA_POINTS
        if t.size < need:
            raise ValueError(f"{label}: {t.size} samples are too few; pass at least {need}")
        kinds.append(seg.kind)
        durations.append(math.inf if seg.duration_s is None else float(seg.duration_s))
        fixed.append(0.0 if seg.offset is None else float(seg.offset))
        offset_col.append(-1 if seg.offset is not None else sum(c >= 0 for c in offset_col))
        groups.setdefault(("own", k) if seg.group is None else ("shared", seg.group), []).append(k)
        parts.append((u, np.sqrt(w), y, np.full(t.size, k), count, np.full(t.size, dt)))
    n_off = sum(c >= 0 for c in offset_col)
    scale_col = np.empty(len(segments), dtype=int)
    for j, members in enumerate(groups.values()):
        scale_col[members] = n_off + j
    u, sw, y, seg_index, count, dt = (np.concatenate(p) for p in zip(*parts, strict=True))
    order = np.argsort(count > 1, kind="stable")  # single samples first, then bins
    u, sw, y, seg_index, count, dt = (x[order] for x in (u, sw, y, seg_index, count, dt))
    binned = count > 1
    fixed_arr = np.array(fixed)
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
        offset_col=np.array(offset_col),
        scale_col=scale_col,
        n_cols=n_off + len(groups),
        y_scale=max(float(np.ptp(y)), np.finfo(float).tiny),
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
    segments: Sequence[CableSegment], delay_s: float
) -> tuple[float, float, float]:
    """initial_guess from a 2-exponential fit of the segments (amplitudes of the first).

    Falls back to one exponential (L = 1, rho = 3) when two cannot be fitted.
    """
    from passivefit.core import expfit

    exp_segments = [
        expfit.Segment(np.asarray(s.t, float) - delay_s, s.y, s.weight, s.offset) for s in segments
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
        Standard errors from the covariance of the full Jacobian (offsets and scales
        included), scaled by the residual variance. Filtered (correlated) noise makes them
        too small; a bootstrap over sweeps is the honest interval.
    tau0_ci95_s, L_ci95, rho_ci95 : float
        95 % half-widths (Student t times the standard error; for rho, whose error is
        skewed, ``exp(log rho +- ...)`` would be better).
    taus_s : numpy.ndarray
        tau0, tau1, tau2, tau3 of the fitted cell (s).
    b_ratios : numpy.ndarray
        B1/B0, B2/B0, B3/B0 of the step charging curve.
    b0_V, b0_se_V, offset_V : numpy.ndarray
        Per segment: scale (V, tau0 amplitude of the step charging curve, sign of the
        current), its standard error, and offset (V; the given value when known).
    v_inf_membrane_V : numpy.ndarray
        Per segment: membrane part of the steady deflection, b0/b0_over_vinf(L, rho) (V).
    kinds : tuple of str
    durations_s : numpy.ndarray
        Step/pulse duration per segment (inf for charging and complete steps).
    delay_s : float
        Time shift the model was fitted with (s).
    rmse : float
        Weighted root-mean-square residual (V).
    rss : float
        Weighted residual sum of squares (V^2).
    n_points, n_params, n_modes : int
        Samples (bins count once), free parameters, equalizing modes summed.
    success : bool
        Converged with L and rho inside their bounds.
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
    taus_s: np.ndarray
    b_ratios: np.ndarray
    b0_V: np.ndarray
    b0_se_V: np.ndarray
    offset_V: np.ndarray
    v_inf_membrane_V: np.ndarray
    kinds: tuple[str, ...]
    durations_s: np.ndarray
    delay_s: float
    rmse: float
    rss: float
    n_points: int
    n_params: int
    n_modes: int
    success: bool
    message: str

    def evaluate(self, segment_index: int, t: np.ndarray) -> np.ndarray:
        """Fitted model of one segment at times ``t`` (s from its edge), in V.

        Before the delayed edge (t <= delay_s) the model holds its value at the edge, which
        for a charging segment is ``offset - v_inf_membrane`` (the sum over all modes).
        """
        t = np.asarray(t, dtype=float)
        u = np.maximum(t - self.delay_s, 0.0)
        kind, duration = self.kinds[segment_index], self.durations_s[segment_index]
        shortest = np.append(u[u > 0], duration)  # decay: the pulse's modes must converge too
        n = _modes_needed(self.L, self.tau0_s, float(shortest.min()))
        rate, ratio = mode_table(self.L, self.rho, n)
        amps = _shape_amplitudes(rate, ratio, self.tau0_s, (kind,), np.array([duration]))[0]
        shape = np.exp(-u[..., None] * (rate / self.tau0_s)) @ amps
        # at the edge add the modes left out: sum_n r_n = V_inf/B0 (docs/references.md §3); their
        # tau_n < duration/30, so a pulse charged them fully
        tail = 1.0 / cable.b0_over_vinf(self.L, self.rho) - ratio.sum()
        shape = np.where(u == 0, shape + (-tail if kind == "charge" else tail), shape)
        return self.offset_V[segment_index] + self.b0_V[segment_index] * shape

    def bridge_jump_V(self, segment_index: int, v_base_V: float) -> float:
        """Instantaneous jump at a step onset that is not membrane charging, in V.

        ``offset - v_base - v_inf_membrane``; divide by the step current for the bridge
        (series) resistance error in Ohm.
        """
        if self.kinds[segment_index] != "charge":
            raise ValueError(
                f"segment {segment_index} is a {self.kinds[segment_index]!r} segment; the "
                "bridge jump needs a charging (step onset) segment"
            )
        return float(self.offset_V[segment_index] - v_base_V - self.v_inf_membrane_V[segment_index])

    def c_total_F(self, segment_index: int, current_A: float) -> float:
        """Total membrane capacitance I*tau0/b0, in F (docs/references.md §4, uniform tau_m).

        ``current_A`` is the step (or pulse) current of that segment, in A.
        """
        return cable.c_total_step(current_A, self.tau0_s, float(self.b0_V[segment_index]))

    def to_dict(self) -> dict:
        """Plain-JSON summary; keys carry their SI unit."""
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
            "taus_s": self.taus_s.tolist(),
            "b_ratios": self.b_ratios.tolist(),
            "b0_V": self.b0_V.tolist(),
            "b0_se_V": self.b0_se_V.tolist(),
            "offset_V": self.offset_V.tolist(),
            "v_inf_membrane_V": self.v_inf_membrane_V.tolist(),
            "delay_s": self.delay_s,
            "rmse_V": self.rmse,
            "n_points": self.n_points,
            "n_modes": self.n_modes,
            "success": self.success,
            "message": self.message,
        }


# ---------------------------------------------------------------------------- fitting


def _bounds() -> tuple[np.ndarray, np.ndarray]:
    lo = np.log([TAU0_BOUNDS_S[0], L_BOUNDS[0], RHO_BOUNDS[0]])
    hi = np.log([TAU0_BOUNDS_S[1], L_BOUNDS[1], RHO_BOUNDS[1]])
    return lo, hi


def _solve(prob: _Problem, theta0: np.ndarray):
    """least_squares from ``theta0``, enlarging the mode count until it suffices."""
    from scipy.optimize import least_squares

    lo, hi = _bounds()
    theta = np.clip(theta0, lo + 1e-9, hi - 1e-9)
    for _ in range(4):
        prob.set_modes(theta)
        res = least_squares(
            lambda th: prob.residual(th) / prob.y_scale, theta, bounds=(lo, hi), x_scale=1.0,
            jac=lambda th: prob.jacobian(th) / prob.y_scale,
            xtol=1e-12, ftol=1e-12, gtol=1e-12, max_nfev=200,
        )  # fmt: skip
        theta = res.x
        if np.all(np.array(prob.modes_for(theta)) <= (prob.n_modes, prob.n_bin_modes)):
            break
    return res


def _starts(prob: _Problem, theta0: np.ndarray):
    """The given start, then the best points of a coarse (L, rho) grid at its tau0.

    A generator: the grid (81 cheap residual evaluations) is searched only when the
    fit from the given start failed.
    """
    yield theta0
    grid = [
        np.array([theta0[0], math.log(L), math.log(rho)])
        for L in np.geomspace(0.1, 4.0, 9)
        for rho in np.geomspace(0.03, 300.0, 9)
    ]
    prob.set_modes(np.array([theta0[0], math.log(4.0), 0.0]), margin=1.0)
    cost = [float(np.sum(prob.residual(g) ** 2)) for g in grid]
    for j in np.argsort(cost)[:_GRID_STARTS]:
        yield grid[j]


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
    delay_s: float = 0.0,
) -> BallStickFit:
    """Fit a uniform ball-and-stick model to somatic voltage transients.

    Parameters
    ----------
    segments : sequence of CableSegment
        Transients sharing tau0, L and rho (onset and decay of a step, several step
        amplitudes...), each with its own offset and, unless grouped, its own scale.
    init : (tau0_s, L, rho) or None
        Start values; None takes them from a 2-exponential fit (:func:`initial_guess`).
    delay_s : float
        Known delay of the recording against the membrane (s), e.g. the group delay of a
        low-pass filter: the model is evaluated at ``t - delay_s``. Default 0.

    Returns
    -------
    BallStickFit

    Raises
    ------
    ValueError
        Bad segments (too few or non-finite samples, samples before the edge plus delay,
        unknown kind, bad duration) or start values outside the bounds
        (L in [0.05, 5], rho in [0.01, 1000], tau0 in [0.1 ms, 10 s]).
    """
    prob = _check(segments, float(delay_s))
    if init is None:
        init = _guess_from_exponentials(segments, float(delay_s))
    theta0 = _check_init(init)
    lo, hi = _bounds()
    tried = []
    for start in _starts(prob, theta0):
        res = _solve(prob, start)
        problem = _problem_with(res, lo, hi)
        tried.append((bool(problem), 2 * res.cost, res, problem))
        if not problem:
            break
    _, _, best, problem = min(tried, key=lambda item: item[:2])
    return _summarize(prob, best.x, problem or "converged", not problem, float(delay_s))


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


def _summarize(
    prob: _Problem, theta: np.ndarray, message: str, success: bool, delay_s: float
) -> BallStickFit:
    from scipy.special import stdtrit

    prob.set_modes(theta)
    coef, resid = prob.solve(theta)
    rss = float(resid @ resid)
    n, p = prob.u.size, 3 + prob.n_cols
    dof = max(n - p, 1)
    jac = prob.full_jacobian(theta)
    cov = rss / dof * np.linalg.pinv(jac.T @ jac)
    se = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    q = float(stdtrit(dof, 0.975))
    tau0, L, rho = np.exp(theta)
    free = prob.offset_col >= 0
    offsets = prob.fixed.copy()
    offsets[free] = coef[prob.offset_col[free]]
    b0 = coef[prob.scale_col]
    b0_se = se[3 + prob.scale_col]
    rate, ratio = mode_table(L, rho, 3)
    v_inf = b0 / cable.b0_over_vinf(L, rho)
    return BallStickFit(
        tau0_s=float(tau0),
        L=float(L),
        rho=float(rho),
        tau0_se_s=float(tau0 * se[0]),
        L_se=float(L * se[1]),
        rho_se=float(rho * se[2]),
        tau0_ci95_s=float(q * tau0 * se[0]),
        L_ci95=float(q * L * se[1]),
        rho_ci95=float(q * rho * se[2]),
        taus_s=tau0 / rate,
        b_ratios=ratio[1:].copy(),
        b0_V=b0.copy(),
        b0_se_V=b0_se.copy(),
        offset_V=offsets,
        v_inf_membrane_V=v_inf,
        kinds=prob.kinds,
        durations_s=prob.durations.copy(),
        delay_s=delay_s,
        rmse=math.sqrt(rss / n),
        rss=rss,
        n_points=n,
        n_params=p,
        n_modes=prob.n_modes,
        success=success,
        message=message,
    )
