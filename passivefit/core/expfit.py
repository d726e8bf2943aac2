"""Multi-exponential least squares by variable projection.

Model, for segments ``s`` that share the time constants ``tau_i``::

    y_s(t) = offset_s + sum_i a[s, i] * exp(-t / tau_i)

with ``t`` measured (in seconds) from each segment's own edge. Only ``log(tau)``
is searched by the nonlinear solver; for every trial ``tau`` the amplitudes and
offsets are solved linearly, segment by segment (Golub & Pereyra 2003, Inverse
Problems 19:R1). The Jacobian of the projected residual is the full
Golub–Pereyra form, used by a small Levenberg–Marquardt loop (see
:func:`_levenberg_marquardt` for why not :func:`scipy.optimize.least_squares`).

Segments are padded to a common length with zero-weight rows so that all
linear solves run as one batched call: no Python loop over samples or segments
on the hot path. The linear solve orthonormalises each design matrix through
its column-scaled Gram matrix (a symmetric eigendecomposition): much faster
than an SVD of a tall, thin matrix and accurate for the conditioning of sums of
exponentials whose taus differ by more than a few per cent. Samples may be
non-uniform with per-sample weights (see :func:`decimate_tail`), so the late,
slow part of a transient can be averaged into bins while the early, fast part
stays at full resolution.

All quantities are SI (s, V).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from passivefit.core.peel import check_samples, geometric_bins, peel_checked
from passivefit.core.qc import f_survival, normal_inverse, t975

_MIN_EXTRA_POINTS = 3  # points required beyond the number of free parameters
_MAX_EXP_ARG = 700.0  # exp() argument clip: exp(700) ~ 1e304 < float64 max
_SPREAD_STARTS = 2  # extra, log-spread starting points tried after a failed fit
_RANK_TOL = 1e-7  # relative singular value below which a design column is dropped
_FILL_RATIO = 8.0  # tau_n / tau_(n+1) assumed for starts peeling could not give
_XTOL = 1e-10  # stop when no log tau moves more than this
_SE_FRACTION = 1e-2  # ... or than this fraction of its standard error
_FTOL = 1e-13  # ... or the cost falls by less than this fraction


@dataclass(frozen=True, eq=False)
class Segment:
    """One transient to fit: samples ``y`` (V) at times ``t`` (s) from its edge.

    Parameters
    ----------
    t : numpy.ndarray
        Sample times (s) measured from the segment's edge, strictly increasing.
        Need not be uniform.
    y : numpy.ndarray
        Membrane potential (V), same shape as ``t``.
    weight : numpy.ndarray or None
        Statistical weight of each sample (dimensionless): the number of raw
        samples a binned value averages, or 1/variance up to a common factor.
        ``None`` means all ones.
    offset : float or None
        Known asymptote (V). ``None`` fits the offset.
    """

    t: np.ndarray
    y: np.ndarray
    weight: np.ndarray | None = None
    offset: float | None = None


@dataclass(frozen=True, eq=False)
class ExpFit:
    """Result of a multi-exponential fit (SI units).

    Attributes
    ----------
    taus : numpy.ndarray
        Time constants (s), descending: ``taus[0]`` is the slowest (tau0).
    amplitudes : numpy.ndarray
        Amplitudes (V), shape (n_segments, n_components), columns in ``taus`` order.
    offsets : numpy.ndarray
        Asymptote of each segment (V); the given value when it was fixed.
    tau_se : numpy.ndarray
        Standard errors of ``taus`` (s), marginal of the full-parameter covariance
        (amplitudes and offsets included), scaled by the residual variance.
    tau_ci95 : numpy.ndarray
        95 % confidence half-widths of ``taus`` (s), Student-t quantile.
    amp_se : numpy.ndarray
        Standard errors of ``amplitudes`` (V).
    rmse : float
        Weighted root-mean-square residual (V) per unit weight.
    n_points : int
        Number of data points (bins count once).
    n_params : int
        Number of free parameters (taus, amplitudes, free offsets).
    rss : float
        Weighted residual sum of squares (V^2).
    aic, bic : float
        Information criteria ``N ln(RSS/N) + 2P`` and ``N ln(RSS/N) + P ln N``.
    success : bool
        Whether the solver converged away from the bounds.
    message : str
        Solver message, or why ``success`` is false.
    """

    taus: np.ndarray
    amplitudes: np.ndarray
    offsets: np.ndarray
    tau_se: np.ndarray
    tau_ci95: np.ndarray
    amp_se: np.ndarray
    rmse: float
    n_points: int
    n_params: int
    rss: float
    aic: float
    bic: float
    success: bool
    message: str

    def evaluate(self, segment_index: int, t: np.ndarray) -> np.ndarray:
        """Model of one segment at times ``t`` (s from its edge); returns V."""
        t = np.asarray(t, dtype=float)
        e = np.divide(t[..., None], -self.taus)   # -t / tau, in place from here on
        np.minimum(e, _MAX_EXP_ARG, out=e)
        np.exp(e, out=e)
        out = e @ self.amplitudes[segment_index]
        out += self.offsets[segment_index]
        return out

    def to_dict(self) -> dict:
        """Plain-JSON summary; keys carry their SI unit."""
        return {
            "taus_s": self.taus.tolist(),
            "tau_se_s": self.tau_se.tolist(),
            "tau_ci95_s": self.tau_ci95.tolist(),
            "amplitudes_V": self.amplitudes.tolist(),
            "amp_se_V": self.amp_se.tolist(),
            "offsets_V": self.offsets.tolist(),
            "rmse_V": float(self.rmse),
            "rss_V2": float(self.rss),
            "n_points": int(self.n_points),
            "n_params": int(self.n_params),
            "aic": float(self.aic),
            "bic": float(self.bic),
            "success": bool(self.success),
            "message": str(self.message),
        }


# ---------------------------------------------------------------- validation


def _check_segments(segments: Sequence[Segment], n_components: int) -> list[tuple]:
    if isinstance(segments, Segment):
        segments = [segments]
    if len(segments) == 0:
        raise ValueError("no segments given; pass at least one Segment(t, y)")
    if int(n_components) < 1:
        raise ValueError(f"`n_components` must be at least 1, got {n_components}")
    out = []
    for k, seg in enumerate(segments):
        t, y, w = check_samples(seg.t, seg.y, seg.weight, f"segment {k}")
        n_free = n_components + (seg.offset is None)
        if t.size < n_free + _MIN_EXTRA_POINTS:
            raise ValueError(
                f"segment {k}: {t.size} points are too few for {n_components} exponential(s); "
                f"need at least {n_free + _MIN_EXTRA_POINTS}"
            )
        if seg.offset is not None and not math.isfinite(seg.offset):
            raise ValueError(f"segment {k}: fixed `offset` must be finite, got {seg.offset}")
        out.append((t, y, w, seg.offset))
    return out


# ---------------------------------------------------------- projected problem


class _Projected:
    """Variable-projection residual and Jacobian over padded, batched segments.

    Time is scaled by ``scale`` (the record length) and the nonlinear parameters
    are ``theta_i = log(tau_i / scale)``. :meth:`stack` puts several problems of the
    same number of components on a leading axis (theta then has shape (P, k)), so that
    one call evaluates them all.
    """

    def __init__(self, checked: list[tuple], n_components: int) -> None:
        self.k = n_components
        n_seg = len(checked)
        n_max = max(c[0].size for c in checked)
        self.scale = max(float(c[0][-1]) for c in checked)
        if self.scale <= 0:
            raise ValueError("all sample times are <= 0; `t` must be measured from the edge (s)")
        self.u = np.zeros((n_seg, n_max))
        self.sw = np.zeros((n_seg, n_max))
        self.yw = np.zeros((n_seg, n_max))
        self.has_offset = np.zeros(n_seg, dtype=bool)
        self.fixed = np.zeros(n_seg)
        self.sizes = np.array([c[0].size for c in checked])
        for s, (t, y, w, off) in enumerate(checked):
            n = t.size
            self.u[s, :n] = t / self.scale
            self.sw[s, :n] = np.sqrt(w)
            self.has_offset[s] = off is None
            self.fixed[s] = 0.0 if off is None else off
            self.yw[s, :n] = self.sw[s, :n] * (y - self.fixed[s])
        self.n_points = int(self.sizes.sum())
        self.n_params = n_components * (n_seg + 1) + int(self.has_offset.sum())
        self._cache_key: bytes | None = None

    @classmethod
    def stack(cls, problems: Sequence[_Projected]) -> _Projected:
        """The problems on a leading axis, padded with zero-weight segments and rows."""
        out = cls.__new__(cls)
        out.k = problems[0].k
        shape = (len(problems), max(p.u.shape[0] for p in problems),
                 max(p.u.shape[1] for p in problems))
        for name in ("u", "sw", "yw", "has_offset", "fixed"):
            like = getattr(problems[0], name)
            array = np.zeros(shape[:like.ndim + 1], dtype=like.dtype)
            for i, p in enumerate(problems):
                part = getattr(p, name)
                array[(i, *(slice(0, n) for n in part.shape))] = part
            setattr(out, name, array)
        out.scale = np.array([p.scale for p in problems])
        out.n_points = np.array([p.n_points for p in problems])
        out.n_params = np.array([p.n_params for p in problems])
        out._cache_key = None
        return out

    def take(self, rows: np.ndarray) -> _Projected:
        """The stacked problems ``rows`` (indices on the leading axis) alone."""
        out = type(self).__new__(type(self))
        out.k = self.k
        for name in ("u", "sw", "yw", "has_offset", "fixed", "scale", "n_points", "n_params"):
            setattr(out, name, getattr(self, name)[rows])
        out._cache_key = None
        return out

    def basis(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Weighted design matrices (..., S, N, k+1) and exponentials (..., S, N, k)."""
        rate = np.exp(-theta)[..., None, None, :]
        e = self.u[..., None] * -rate   # -u rate, in place from here on
        np.maximum(e, -_MAX_EXP_ARG, out=e)
        np.exp(e, out=e)
        const = (self.sw * self.has_offset[..., None])[..., None]
        phi = np.concatenate([e * self.sw[..., None], const], axis=-1)
        return phi, e

    def _solve(self, theta: np.ndarray) -> None:
        key = theta.tobytes()
        if key == self._cache_key:
            return
        phi, e = self.basis(theta)
        # Orthonormal basis of each design matrix from its column-scaled Gram
        # matrix (much faster than an SVD of a tall, thin matrix; columns whose
        # singular value falls below 1e-7 of the largest are dropped).
        gram = np.swapaxes(phi, -1, -2) @ phi
        norms = np.sqrt(np.diagonal(gram, axis1=-2, axis2=-1))
        norms = np.where(norms > 0, norms, 1.0)
        lam, vec = np.linalg.eigh(gram / (norms[..., :, None] * norms[..., None, :]))
        keep = lam > lam[..., -1:] * _RANK_TOL**2
        inv_sqrt = np.where(keep, 1.0 / np.sqrt(np.where(keep, lam, 1.0)), 0.0)
        q = (phi / norms[..., None, :]) @ (vec * inv_sqrt[..., None, :])
        proj = np.swapaxes(q, -1, -2) @ self.yw[..., None]  # (..., S, p, 1)
        self.q, self.e = q, e
        # (Phi^+)^T = q @ m
        self.m = inv_sqrt[..., :, None] * np.swapaxes(vec, -1, -2) / norms[..., None, :]
        self.coef = (np.swapaxes(self.m, -1, -2) @ proj)[..., 0]
        self.resid = self.yw - (q @ proj)[..., 0]
        self._cache_key = key

    def residual(self, theta: np.ndarray) -> np.ndarray:
        """Weighted residual, shape (S*N,), or (P, S*N) for stacked problems."""
        self._solve(theta)
        return self.resid.reshape(self.resid.shape[:-2] + (-1,))

    def jacobian(self, theta: np.ndarray) -> np.ndarray:
        """Golub–Pereyra Jacobian of the projected residual, shape ([P,] S*N, k)."""
        self._solve(theta)
        k = self.k
        # d(phi_i)/d(theta_i)
        d = (self.sw * self.u)[..., None] * np.exp(-theta)[..., None, None, :] * self.e
        dc = d * self.coef[..., None, :k]
        a = dc - self.q @ (np.swapaxes(self.q, -1, -2) @ dc)
        g = np.einsum("...snk,...sn->...sk", d, self.resid)
        b = (self.q @ self.m[..., :, :k]) * g[..., None, :]
        return -(a + b).reshape(self.resid.shape[:-2] + (-1, k))

    def full_jacobian(self, theta: np.ndarray) -> np.ndarray:
        """Jacobian of the weighted model in (theta, coefficients of every segment), shape
        ([P,] S*N, k + S*(k+1)) for theta of shape ([P,] k)."""
        self._solve(theta)
        k, n_seg = self.k, self.u.shape[-2]
        phi, e = self.basis(theta)
        d = ((self.sw * self.u)[..., None] * np.exp(-theta)[..., None, None, :] * e
             * self.coef[..., :, None, :k])
        n_c = phi.shape[-1]
        jac = np.zeros(phi.shape[:-1] + (k + n_seg * n_c,))
        jac[..., :k] = d
        for s in range(n_seg):
            jac[..., s, :, k + s * n_c : k + (s + 1) * n_c] = phi[..., s, :, :]
        return jac.reshape(jac.shape[:-3] + (-1, jac.shape[-1]))


# ------------------------------------------------------------------- fitting


def _theta_bounds(prob: _Projected, checked: list[tuple], tau_bounds) -> tuple[float, float]:
    dt = min(float(np.min(np.diff(c[0]))) for c in checked)
    lo = max(float(tau_bounds[0]), dt / 2.0)
    hi = min(float(tau_bounds[1]), 10.0 * prob.scale)
    if not lo < hi:
        raise ValueError(f"`tau_bounds` {tau_bounds} leave no room between dt/2 and 10x the record")
    return math.log(lo / prob.scale), math.log(hi / prob.scale)


def _peel_init(checked: list[tuple], n_components: int) -> np.ndarray | None:
    """Starting taus from peeling the segment with the largest swing.

    When the noise leaves too little of the fast part for all the lines, peel
    fewer and put each missing tau a factor ``_FILL_RATIO`` below the last one.
    """
    t, y, w, off = max(checked, key=lambda c: abs(float(c[1][0] - c[1][-1])))
    for n in range(n_components, 0, -1):
        try:
            taus = peel_checked(t, y, w, off, n).taus
        except ValueError:
            continue
        fill = taus[-1] / _FILL_RATIO ** np.arange(1, n_components - n + 1)
        return np.concatenate([taus, fill])
    return None


def _spread_starts(lo: float, hi: float, k: int, count: int) -> list[np.ndarray]:
    """Starting thetas spread over the inner part of [lo, hi]."""
    starts = []
    for j in range(count):
        a = lo + (hi - lo) * (0.15 + 0.1 * j)
        b = lo + (hi - lo) * (0.75 - 0.1 * j)
        starts.append(np.linspace(b, a, k))
    return starts


@dataclass(frozen=True)
class _Solution:
    x: np.ndarray
    cost: float
    status: int  # 1 converged, 0 iteration limit
    message: str
    iterations: int = 0  # accepted steps taken


def _levenberg_marquardt(
    prob: _Projected, theta0: np.ndarray, lo: np.ndarray, hi: np.ndarray, max_iter: int = 100
) -> list[_Solution]:
    """Marquardt-scaled Levenberg–Marquardt on the projected residual, box by clipping,
    for P stacked problems at once (``prob`` from :meth:`_Projected.stack`, ``theta0``
    of shape (P, k), bounds of shape (P,)): each keeps its own damping and stops on its
    own; all are evaluated together. Returns one solution per problem.

    With only the log taus as unknowns (1–3 of them) the normal equations are
    tiny, so this loop costs little beyond one residual and Jacobian per step;
    that makes it several times faster here than scipy's general trust-region
    solver, whose per-iteration overhead dominates for such small problems.

    The damping follows the gain ratio rho = actual / predicted decrease of the
    cost (Nielsen's rule; Madsen, Nielsen & Tingleff 2004, Methods for non-linear
    least squares problems, IMM DTU, §3.2; docs/references.md §6 [mem]): an accepted
    step scales the damping by max(1/3, 1 - (2 rho - 1)^3), so it shrinks only
    when the quadratic model predicted the decrease well, and each rejection
    multiplies it by a factor that doubles. Cutting the damping by a fixed 10x
    after every accepted step instead made the iterates oscillate between an
    undamped overshoot and a heavily damped step.
    """
    lo, hi = lo[:, None], hi[:, None]
    theta = np.clip(theta0, lo + 1e-3 * (hi - lo), hi - 1e-3 * (hi - lo))
    r = prob.residual(theta)
    cost = np.einsum("pm,pm->p", r, r)
    n_prob = theta.shape[0]
    lam, nu = np.full(n_prob, 1e-3), np.full(n_prob, 2.0)
    dof = np.maximum(prob.n_points - prob.n_params, 1)
    out: list[_Solution | None] = [None] * n_prob
    active = np.ones(n_prob, dtype=bool)
    rows, sub = np.arange(n_prob), prob   # the problems still searching, alone

    def finish(which: np.ndarray, status: int, message: str, iterations: int) -> None:
        for i in np.flatnonzero(which):
            out[i] = _Solution(theta[i], 0.5 * float(cost[i]), status, message, iterations)
        active[which] = False

    for it in range(max_iter):
        # every array below is of the active problems only (rows of the stack)
        th, res, lo_a, hi_a = theta[rows], r[rows], lo[rows], hi[rows]
        jac = sub.jacobian(th)
        grad = np.einsum("pmk,pm->pk", jac, res)
        hess = np.swapaxes(jac, 1, 2) @ jac
        damp = np.maximum(np.diagonal(hess, axis1=1, axis2=2), 1e-300)
        trial, cost_trial = th.copy(), cost[rows]
        searching = np.ones(rows.size, dtype=bool)
        while searching.any():
            try_theta = th.copy()
            step = _solve_each(hess[searching] + lam[rows[searching], None, None]
                               * (damp[searching, :, None] * np.eye(th.shape[1])),
                               -grad[searching])
            try_theta[searching] = np.clip(th[searching] + step, lo_a[searching],
                                           hi_a[searching])
            r_try = sub.residual(try_theta)
            cost_try = np.einsum("pm,pm->p", r_try, r_try)
            better = searching & (cost_try <= cost[rows])
            trial[better], cost_trial[better] = try_theta[better], cost_try[better]
            worse = np.zeros(n_prob, dtype=bool)
            worse[rows[searching & ~better]] = True
            lam[worse] *= nu[worse]
            nu[worse] *= 2.0
            finish(worse & (lam > 1e10), 1, "no further decrease of the cost", it)
            searching = (worse & active)[rows]
        moved = trial - th
        decrease = cost[rows] - cost_trial
        # decrease of the linearised cost |r + J h|^2 for the step taken (after clipping)
        predicted = -np.einsum("pk,pk->p", moved, 2.0 * grad + np.einsum("pkl,pl->pk", hess,
                                                                          moved))
        with np.errstate(divide="ignore", invalid="ignore"):
            rho = np.where(predicted > 0, decrease / predicted, 0.0)
        scaled = lam[rows] * np.maximum(1.0 / 3.0, 1.0 - (2.0 * rho - 1.0) ** 3)
        still = active[rows]
        lam[rows] = np.where(still, np.clip(scaled, 1e-12, 1e10), lam[rows])
        nu[rows[still]] = 2.0
        theta[rows] = np.where(still[:, None], trial, th)
        cost[rows] = np.where(still, cost_trial, cost[rows])
        # negligible against the statistical error of theta, or against rounding
        se = np.sqrt(cost[rows, None] / dof[rows, None] * _inverse_diagonal(hess))
        small = np.all(np.abs(moved) < np.maximum(_XTOL, _SE_FRACTION * se), axis=1)
        done = np.zeros(n_prob, dtype=bool)
        done[rows[small | (decrease <= _FTOL * cost[rows])]] = True
        finish(active & done, 1, "converged", it + 1)
        if not active.any():
            break
        if not active[rows].all():
            rows = np.flatnonzero(active)
            sub = prob.take(rows)
        r[rows] = sub.residual(theta[rows])
    finish(active, 0, f"no convergence in {max_iter} iterations", max_iter)
    return out


def _solve_each(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """x with a[i] x[i] = b[i]; a singular system raises (numpy.linalg.LinAlgError)."""
    return np.linalg.solve(a, b[..., None])[..., 0]


def _inverse_diagonal(hess: np.ndarray) -> np.ndarray:
    """|diag(inv(h))| of each matrix; zeros for a singular one."""
    try:
        return np.abs(np.diagonal(np.linalg.inv(hess), axis1=1, axis2=2))
    except np.linalg.LinAlgError:
        out = np.zeros(hess.shape[:2])
        for i, h in enumerate(hess):
            try:
                out[i] = np.abs(np.diag(np.linalg.inv(h)))
            except np.linalg.LinAlgError:
                continue
        return out


def _problems(theta: np.ndarray, lo: float, hi: float, status: int) -> str:
    """Why a solution is suspect ('' when it is fine)."""
    if status <= 0:
        return "solver did not converge"
    edge = 1e-6 * (hi - lo)
    if np.any(theta <= lo + edge) or np.any(theta >= hi - edge):
        return "a time constant sits at its bound"
    if theta.size > 1 and np.min(np.diff(np.sort(theta))) < math.log(1.05):
        return "time constants collapsed together"
    return ""


def fit_exponentials(
    segments: Sequence[Segment],
    n_components: int,
    tau_init: Sequence[float] | None = None,
    tau_bounds: tuple[float, float] = (1e-5, 10.0),
) -> ExpFit:
    """Fit offset + sum of exponentials with time constants shared by all segments.

    Parameters
    ----------
    segments : sequence of Segment
        Transients (t in s from their edges, y in V), e.g. onset and offset of a step.
    n_components : int
        Number of exponentials.
    tau_init : sequence of float or None
        Starting time constants (s). ``None`` takes them from :func:`peel`.
    tau_bounds : (float, float)
        Allowed range of every tau (s); further limited to [dt/2, 10 x record length].

    Returns
    -------
    ExpFit
        Time constants (descending), amplitudes, offsets and their uncertainties.

    Raises
    ------
    ValueError
        Too few points, NaN samples, non-increasing ``t`` or bad ``tau_init``.
    """
    checked = _check_segments(segments, n_components)
    prob = _Projected(checked, n_components)
    lo, hi = _theta_bounds(prob, checked, tau_bounds)
    if tau_init is not None:
        tau0 = np.asarray(tau_init, dtype=float).ravel()
        if tau0.size != n_components or np.any(~np.isfinite(tau0)) or np.any(tau0 <= 0):
            raise ValueError(
                f"`tau_init` must hold {n_components} positive values (s), got {tau_init!r}"
            )
    else:
        tau0 = _peel_init(checked, n_components)
    starts = [] if tau0 is None else [np.log(np.sort(tau0)[::-1] / prob.scale)]
    starts += _spread_starts(lo, hi, n_components, _SPREAD_STARTS)
    tried = []
    stacked, bounds = _Projected.stack([prob]), (np.array([lo]), np.array([hi]))
    for theta0 in starts:
        res = _levenberg_marquardt(stacked, theta0[None], *bounds)[0]
        problem = _problems(res.x, lo, hi, res.status)
        tried.append((bool(problem), res.cost, res, problem))
        if not problem:
            break
    _, _, best, best_problem = min(tried, key=lambda item: item[:2])
    return _summarize(prob, best.x, best_problem or best.message, not best_problem)


def fit_exponentials_many(
    problems: Sequence[Sequence[Segment]],
    n_components: int,
    tau_init: Sequence[float],
    tau_bounds: tuple[float, float] = (1e-5, 10.0),
    errors: bool = True,
) -> list[ExpFit | ValueError]:
    """:func:`fit_exponentials` of each problem from the same ``tau_init``, the searches
    run together (e.g. the resamples of a bootstrap).

    Returns, per problem, what ``fit_exponentials(segments, n_components, tau_init,
    tau_bounds)`` returns, or the ValueError it raises (numpy's LinAlgError is one). A
    problem whose search from ``tau_init`` ends in trouble is fitted again alone, which
    also tries the other starts. Without ``errors``, the fits of the joint search carry no
    standard errors (NaN), which saves their covariance (a bootstrap needs only values).
    """
    tau0 = np.asarray(tau_init, dtype=float).ravel()
    if tau0.size != n_components or np.any(~np.isfinite(tau0)) or np.any(tau0 <= 0):
        raise ValueError(
            f"`tau_init` must hold {n_components} positive values (s), got {tau_init!r}"
        )
    out: list[ExpFit | ValueError | None] = [None] * len(problems)
    ready = []
    for i, segments in enumerate(problems):
        try:
            checked = _check_segments(segments, n_components)
            prob = _Projected(checked, n_components)
            ready.append((i, prob, *_theta_bounds(prob, checked, tau_bounds)))
        except ValueError as exc:
            out[i] = exc
    if ready:
        stacked = _Projected.stack([prob for _, prob, _, _ in ready])
        lo, hi = (np.array([r[k] for r in ready]) for k in (2, 3))
        theta0 = np.log(np.sort(tau0)[::-1] / stacked.scale[:, None])
        try:
            solutions = _levenberg_marquardt(stacked, theta0, lo, hi)
        except np.linalg.LinAlgError:   # a singular step in one of them: each alone
            solutions = [None] * len(ready)
        good = [(i, prob, sol) for (i, prob, lo_i, hi_i), sol in zip(ready, solutions, strict=True)
                if sol is not None and not _problems(sol.x, lo_i, hi_i, sol.status)]
        for i, fit in zip([i for i, _, _ in good], _summarize_many(
                [(prob, sol.x, sol.message) for _, prob, sol in good], errors), strict=True):
            out[i] = fit
        for i, _, _, _ in ready:
            if out[i] is None:
                try:
                    out[i] = fit_exponentials(problems[i], n_components, tau_init, tau_bounds)
                except ValueError as exc:
                    out[i] = exc
    return out


def _summarize_many(items: list[tuple[_Projected, np.ndarray, str]], errors: bool = True
                    ) -> list[ExpFit | ValueError]:
    """:func:`_summarize` (a success) of each (problem, theta, message), or the ValueError
    it raises; problems of one shape solved together (stacked: the same values)."""
    groups: dict[tuple, list[int]] = {}
    for j, (prob, _, _) in enumerate(items):
        groups.setdefault((prob.u.shape, prob.has_offset.tobytes()), []).append(j)
    out: list = [None] * len(items)
    for members in groups.values():
        solved = [None] * len(members)
        if len(members) > 1:
            try:
                stacked = _Projected.stack([items[j][0] for j in members])
                thetas = np.array([items[j][1] for j in members])
                thetas = np.take_along_axis(thetas, np.argsort(thetas, axis=1)[:, ::-1], axis=1)
                resid = stacked.residual(thetas)
                jac = stacked.full_jacobian(thetas) if errors else [None] * len(members)
                solved = list(zip(thetas, resid, jac, stacked.coef, strict=True))
            except (ValueError, np.linalg.LinAlgError):
                pass   # each on its own, to keep its own error
        for j, pre in zip(members, solved, strict=True):
            prob, theta, message = items[j]
            try:
                out[j] = _summarize(prob, theta, message, True, pre, errors)
            except ValueError as exc:
                out[j] = exc
    return out


def _summarize(prob: _Projected, theta: np.ndarray, message: str, success: bool,
               solved: tuple | None = None, errors: bool = True) -> ExpFit:
    """The ExpFit of `prob` at `theta`; `solved`: (sorted theta, residual, full Jacobian
    or None, coefficients) computed already (:func:`_summarize_many`). Without `errors`,
    its standard errors are NaN (not computed)."""
    k = prob.k
    if solved is None:
        theta = theta[np.argsort(theta)[::-1]]
        resid = prob.residual(theta)
        jac, coef = prob.full_jacobian(theta) if errors else None, prob.coef
    else:
        theta, resid, jac, coef = solved
    rss = float(resid @ resid)
    n, p = prob.n_points, prob.n_params
    dof = max(n - p, 1)
    n_c = k + 1
    var = np.full(k + coef.size, np.nan)
    if errors:
        free = np.ones(jac.shape[1], dtype=bool)  # drop fixed-offset columns (all zero)
        for s in np.flatnonzero(~prob.has_offset):
            free[k + s * n_c + k] = False
        cov = np.zeros((jac.shape[1],) * 2)
        # (a component whose amplitude collapsed has a tiny column in its tau: scaled, its
        # variance stays the large one it has, not zero, which would read as resolved)
        cov[np.ix_(free, free)] = rss / dof * normal_inverse(jac[:, free])
        var = np.diag(cov)
        var = np.where(var >= 0, var, np.nan)  # round-off in a near-singular problem: unknown
    taus = np.exp(theta) * prob.scale
    tau_se = taus * np.sqrt(var[:k])
    coef_se = np.sqrt(var[k:]).reshape(-1, n_c)
    offsets = np.where(prob.has_offset, coef[:, k], prob.fixed)
    rss_safe = max(rss, np.finfo(float).tiny)
    loglik_term = n * math.log(rss_safe / n)
    return ExpFit(
        taus=taus,
        amplitudes=coef[:, :k].copy(),
        offsets=offsets,
        tau_se=tau_se,
        tau_ci95=tau_se * t975(dof),
        amp_se=coef_se[:, :k].copy(),
        rmse=math.sqrt(rss / n),
        n_points=n,
        n_params=p,
        rss=rss,
        aic=loglik_term + 2 * p,
        bic=loglik_term + p * math.log(n),
        success=success,
        message=message if message else "converged",
    )


# ------------------------------------------------------------------ helpers


def decimate_tail(
    t: np.ndarray, y: np.ndarray, keep_first_s: float, bin_factor: float = 1.05
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Keep the early part of a transient, average the late part into geometric bins.

    Samples with ``t <= keep_first_s`` are kept; later ones are averaged in bins
    whose edges grow by ``bin_factor`` (width ~ (bin_factor - 1) x t), each bin
    at least one sample. A bin of n samples gets weight n, the inverse variance
    of its mean in units of one sample's variance, so the weighted fit keeps the
    statistics of the full data (up to the tiny curvature of the model inside a
    bin, relative size ~ (width/tau)^2 / 24).

    Parameters
    ----------
    t : numpy.ndarray
        Sample times (s) from the edge, strictly increasing.
    y : numpy.ndarray
        Potential (V).
    keep_first_s : float
        Samples up to this time (s) stay at full resolution; choose a few tau1.
    bin_factor : float
        Ratio of successive bin edges, > 1.

    Returns
    -------
    (t, y, weight) : tuple of numpy.ndarray
        Pass them on as ``Segment(t, y, weight)``.
    """
    t, y, w = check_samples(t, y, None, "decimate_tail")
    return geometric_bins(t, y, w, float(keep_first_s), float(bin_factor))


def _record(fit: ExpFit) -> dict:
    return {
        "bic": float(fit.bic),
        "aic": float(fit.aic),
        "rss": float(fit.rss),
        "taus_s": fit.taus.tolist(),
        "success": bool(fit.success),
    }


def _component_problems(fit: ExpFit) -> list[str]:
    """Reasons to distrust a fit's components (empty when all look real)."""

    out = []
    if not fit.success:
        out.append(f"fit failed: {fit.message}")
    wide = np.flatnonzero(~(fit.tau_ci95 < fit.taus))
    if wide.size:
        out.append(f"tau CI wider than the value for component(s) {wide.tolist()}")
    if fit.taus.size > 1 and np.min(fit.taus[:-1] / fit.taus[1:]) < _MIN_TAU_RATIO:
        out.append(f"taus closer than a factor {_MIN_TAU_RATIO}")
    q = t975(max(fit.n_points - fit.n_params, 1))
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.abs(fit.amplitudes) / fit.amp_se
    weak = np.flatnonzero(~(np.nanmax(z, axis=0) > q))
    if weak.size:
        out.append(f"amplitude not significant (95 %) for component(s) {weak.tolist()}")
    return out


_MIN_TAU_RATIO = 1.5
_F_ALPHA = 0.01


def fit_auto(
    segments: Sequence[Segment],
    max_components: int = 3,
    tau_init: Sequence[float] | None = None,
    tau_bounds: tuple[float, float] = (1e-5, 10.0),
) -> tuple[ExpFit, dict]:
    """Fit 1..``max_components`` exponentials and choose how many the data support.

    Component n+1 is accepted over n only if BIC falls, the extra-sum-of-squares
    F-test gives p < 0.01, and the new fit is sound: every tau CI half-width is
    below its tau, neighbouring taus differ by at least a factor 1.5, and every
    component has an amplitude significant at 95 % in at least one segment. The
    search stops at the first n+1 that is not accepted.

    Parameters
    ----------
    segments : sequence of Segment
        As for :func:`fit_exponentials`.
    max_components : int
        Largest number of exponentials tried (1–3 is sensible).
    tau_init : sequence of float or None
        Starting taus (s) for the largest model; smaller models take its slowest ones.
    tau_bounds : (float, float)
        As for :func:`fit_exponentials`.

    Returns
    -------
    (ExpFit, dict)
        The chosen fit and a record ``{"criterion", "per_n", "chosen", "reason"}``;
        ``per_n[n]`` holds bic, aic, rss, taus_s, success, F-test p and problems.
    """
    if int(max_components) < 1:
        raise ValueError(f"`max_components` must be at least 1, got {max_components}")
    fits: dict[int, ExpFit] = {}
    per_n: dict[int, dict] = {}
    chosen, reason = 1, "one exponential is the simplest model"
    stopped = False
    for n in range(1, int(max_components) + 1):
        init = None if tau_init is None else np.sort(np.asarray(tau_init, float))[::-1][:n]
        if init is not None and init.size < n:
            init = None
        fits[n] = fit_exponentials(segments, n, init, tau_bounds)
        per_n[n] = _record(fits[n]) | {"problems": _component_problems(fits[n])}
        if n == 1:
            if per_n[1]["problems"]:
                reason = "one exponential (nothing simpler), but: " + "; ".join(
                    per_n[1]["problems"]
                )
            continue
        prev = fits[n - 1]
        extra = fits[n].n_params - prev.n_params
        dof = fits[n].n_points - fits[n].n_params
        f_stat = ((prev.rss - fits[n].rss) / extra) / max(fits[n].rss / max(dof, 1), 1e-300)
        p_value = f_survival(extra, max(dof, 1), f_stat)
        per_n[n]["f_p"] = p_value
        if stopped:
            continue
        why_not = list(per_n[n]["problems"])
        if not fits[n].bic < prev.bic:
            why_not.append(f"BIC did not fall ({fits[n].bic:.1f} vs {prev.bic:.1f})")
        if not p_value < _F_ALPHA:
            why_not.append(f"F-test p = {p_value:.3g} >= {_F_ALPHA}")
        if why_not:
            reason = f"{n - 1} chosen; {n} rejected: " + "; ".join(why_not)
            stopped = True
        else:
            chosen = n
            reason = (
                f"{n} chosen: BIC fell by {prev.bic - fits[n].bic:.1f}, F-test p = {p_value:.3g}"
            )
    record = {
        "criterion": "BIC + F-test (p < 0.01) + sound components",
        "per_n": per_n,
        "chosen": chosen,
        "reason": reason,
    }
    return fits[chosen], record


def fit_start_scan(
    segments: Sequence[Segment],
    starts_s: Sequence[float],
    n_components: int,
    tau_init: Sequence[float] | None = None,
    tau_bounds: tuple[float, float] = (1e-5, 10.0),
) -> dict[str, np.ndarray]:
    """Refit with the fit window starting at each of ``starts_s`` (s from the edge).

    Pass the whole transients (``t`` from the edge); each start drops the samples
    before it in every segment. Each fit starts from the previous successful one.
    A start that leaves too few points gives NaN.

    Parameters
    ----------
    segments : sequence of Segment
        Whole transients, ``t`` in s from each edge (decimated tails are fine).
    starts_s : sequence of float
        Fit start times (s from the edge), usually increasing.
    n_components : int
        Number of exponentials.
    tau_init : sequence of float or None
        Starting taus (s) of the first fit; ``None`` peels.
    tau_bounds : (float, float)
        As for :func:`fit_exponentials`.

    Returns
    -------
    dict of numpy.ndarray
        ``start_s``; ``tau{i}`` and ``tau{i}_ci`` (95 % half-width), both in s,
        for i < n_components; ``rmse`` (V); ``success`` (bool).
    """
    if isinstance(segments, Segment):
        segments = [segments]
    starts = np.asarray(starts_s, dtype=float).ravel()
    taus = np.full((starts.size, n_components), np.nan)
    cis = np.full_like(taus, np.nan)
    rmse = np.full(starts.size, np.nan)
    success = np.zeros(starts.size, dtype=bool)
    guess = None if tau_init is None else np.asarray(tau_init, dtype=float)
    for j, start in enumerate(starts):
        cropped = []
        for seg in segments:
            t = np.asarray(seg.t, dtype=float)
            keep = t >= start
            w = None if seg.weight is None else np.asarray(seg.weight)[keep]
            cropped.append(Segment(t[keep], np.asarray(seg.y)[keep], w, seg.offset))
        try:
            fit = fit_exponentials(cropped, n_components, guess, tau_bounds)
        except ValueError:
            continue
        taus[j], cis[j], rmse[j], success[j] = fit.taus, fit.tau_ci95, fit.rmse, fit.success
        if fit.success:
            guess = fit.taus
    out = {"start_s": starts}
    for i in range(n_components):
        out[f"tau{i}"] = taus[:, i]
        out[f"tau{i}_ci"] = cis[:, i]
    out["rmse"] = rmse
    out["success"] = success
    return out


def crlb_taus(
    t: np.ndarray | Sequence[np.ndarray],
    sigma: float | np.ndarray | Sequence[np.ndarray],
    taus: Sequence[float],
    amplitudes: Sequence[float] | np.ndarray,
    offset_known: bool = False,
) -> np.ndarray:
    """Cramér–Rao lower bound (sd, s) of each tau for white Gaussian noise.

    From the Fisher information of the full model ``offset + sum a_i exp(-t/tau_i)``
    with the amplitudes (and the offsets unless ``offset_known``) as nuisance
    parameters; several segments share the taus.

    Parameters
    ----------
    t : numpy.ndarray or sequence of numpy.ndarray
        Sample times (s) of one segment, or one array per segment.
    sigma : float or numpy.ndarray or sequence of numpy.ndarray
        Noise sd per sample (V): a scalar for all, or arrays shaped like ``t``
        (a bin of n samples has sd sigma/sqrt(n)).
    taus : sequence of float
        True time constants (s).
    amplitudes : array-like
        True amplitudes (V): shape (n_components,) for one segment, or
        (n_segments, n_components).
    offset_known : bool
        True when every offset is known (not estimated).

    Returns
    -------
    numpy.ndarray
        Lower bound of sd(tau_i) (s), in the order of ``taus``.
    """
    ts = [np.asarray(t, float)] if np.ndim(t[0]) == 0 else [np.asarray(x, float) for x in t]
    taus = np.asarray(taus, dtype=float)
    amps = np.atleast_2d(np.asarray(amplitudes, dtype=float))
    if amps.shape != (len(ts), taus.size):
        raise ValueError(
            f"`amplitudes` must have shape ({len(ts)}, {taus.size}) to match `t` and `taus`, "
            f"got {amps.shape}"
        )
    k = taus.size
    n_lin = k + (not offset_known)
    if np.ndim(sigma) == 0:
        sds = [float(sigma)] * len(ts)
    elif len(ts) == 1 and np.ndim(sigma) == 1:
        sds = [np.asarray(sigma, float)]
    else:
        sds = [np.asarray(x, float) for x in sigma]
    fisher = np.zeros((k + len(ts) * n_lin,) * 2)
    for s, (ts_, sd) in enumerate(zip(ts, sds, strict=True)):
        e = np.exp(-ts_[:, None] / taus)
        cols = [amps[s] * ts_[:, None] / taus**2 * e, e]
        if not offset_known:
            cols.append(np.ones((ts_.size, 1)))
        jac = np.zeros((ts_.size, fisher.shape[0]))
        jac[:, :k] = cols[0]
        jac[:, k + s * n_lin : k + (s + 1) * n_lin] = np.hstack(cols[1:])
        jw = jac / np.broadcast_to(sd, ts_.shape)[:, None]
        fisher += jw.T @ jw
    return np.sqrt(np.diag(np.linalg.inv(fisher))[:k])
