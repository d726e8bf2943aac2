"""Cable-theory interpretation of passive transients.

Rall's finite equivalent cylinder and the ball-and-stick (a lumped soma plus one
uniform cylinder with a sealed far end, uniform membrane time constant), following
the formulas collected in ``docs/references.md`` §2–§4.

Units: times in s, resistances in Ohm, capacitances in F, charges in C, voltages in
V; L, rho and the alphas are dimensionless. ``rho = G_D / G_S`` with
``G_D = G_inf * tanh(L)`` (Rall 1969). ``rho = inf`` is the bare cylinder (no soma).

Errors: every estimator raises :class:`CableFitError` (a ``ValueError``) with a
plain-words reason when its inputs admit no answer; none of them returns NaN.
"""

from __future__ import annotations

import math

import numpy as np

from passivefit.core.qc import Z95

__all__ = [
    "CableFitError",
    "ballstick_alphas",
    "ballstick_tau_ratios",
    "b0_over_vinf",
    "c_tau",
    "c_total_pulse",
    "c_total_step",
    "cylinder_L",
    "cylinder_L_ci",
    "estimate_ballstick",
    "estimate_ballstick_ci",
    "implausible",
    "pulse_ratio",
    "pulse_ratios",
    "pulse_ratios_from_alphas",
    "rho_from_amplitudes_pulse",
    "rho_from_amplitudes_step",
    "specific_membrane",
    "square_pulse_factor",
    "step_ratio",
    "step_ratios",
]



class CableFitError(ValueError):
    """The measured quantities admit no cable-model answer; the message says why."""


def _positive(name: str, value: float | None) -> float:
    """`value` as a float, or CableFitError when it is missing, non-finite or <= 0."""
    if value is None:
        raise CableFitError(f"`{name}` is missing")
    x = float(value)
    if not (math.isfinite(x) and x > 0):
        raise CableFitError(f"`{name}` must be a finite positive number, got {x!r}")
    return x


def _tau_pair(tau0: float | None, tau_n: float | None, name: str = "tau1") -> tuple[float, float]:
    t0 = _positive("tau0", tau0)
    tn = _positive(name, tau_n)
    if tn >= t0:
        raise CableFitError(
            f"`{name}` ({tn:.4g} s) is not shorter than `tau0` ({t0:.4g} s): "
            "no equalizing time constant, L cannot be estimated"
        )
    return t0, tn


# --------------------------------------------------------------------------- cylinder


def cylinder_L(tau0: float, tau_n: float, n: int = 1) -> float:
    """Electrotonic length of a finite equivalent cylinder, L = n*pi / sqrt(tau0/tau_n - 1).

    Parameters
    ----------
    tau0 : float
        Membrane (slowest) time constant, in s.
    tau_n : float
        The n-th equalizing time constant, in s; must be shorter than `tau0`.
    n : int
        Index of `tau_n` (1 for tau1).

    Returns
    -------
    float
        L (dimensionless).

    Raises
    ------
    CableFitError
        When a time constant is missing, non-positive, or `tau_n` >= `tau0`.
    """
    t0, tn = _tau_pair(tau0, tau_n, f"tau{n}")
    return n * math.pi / math.sqrt(t0 / tn - 1.0)


def cylinder_L_ci(tau0: float, tau0_ci: float, tau1: float, tau1_ci: float) -> float:
    """95 % CI half-width of :func:`cylinder_L`, by first-order (delta-method) propagation.

    Treats the two time constants as independent:
    dL/L = 1/2 * tau0/(tau0 - tau1) * sqrt((dtau0/tau0)^2 + (dtau1/tau1)^2).

    Parameters
    ----------
    tau0, tau1 : float
        Time constants, in s.
    tau0_ci, tau1_ci : float
        Their 95 % CI half-widths, in s (the result is then a 95 % half-width too).

    Returns
    -------
    float
        Half-width for L (dimensionless).
    """
    t0, t1 = _tau_pair(tau0, tau1)
    for name, ci in (("tau0_ci", tau0_ci), ("tau1_ci", tau1_ci)):
        if not (math.isfinite(ci) and ci >= 0):
            raise CableFitError(f"`{name}` must be a finite number >= 0, got {ci!r}")
    L = cylinder_L(t0, t1)
    rel = 0.5 * t0 / (t0 - t1) * math.hypot(tau0_ci / t0, tau1_ci / t1)
    return L * rel


# ----------------------------------------------------------------- ball-and-stick roots


def _soma_over_ginf(L: float, rho: float) -> float:
    """s = G_S / G_inf = tanh(L) / rho (0 for the bare cylinder, rho = inf)."""
    if not (math.isfinite(L) and L > 0):
        raise CableFitError(f"`L` must be a finite positive number, got {L!r}")
    if not (rho > 0):
        raise CableFitError(f"`rho` must be positive (inf for a bare cylinder), got {rho!r}")
    return math.tanh(L) / rho


def _alphas_from_s(L: float, s: float, n: int) -> np.ndarray:
    """Roots alpha_k (k = 1..n) of sin(x) + (s/L)*x*cos(x) = 0 with x = alpha*L.

    All n roots at once by Newton's method kept inside each root's bracket
    ((k - 1/2)*pi, k*pi], with bisection whenever Newton would leave it. On the
    bracket the function is monotone (its derivative (1 + s/L)*cos(x) - (s/L)*x*sin(x)
    has one sign there), so the root is unique and the iteration converges to the last
    bits of a double, as tightly as a bracketing solver with xtol 1e-15.
    """
    k = s / L
    i = np.arange(1, n + 1, dtype=float)
    hi = i * math.pi
    if k == 0.0:
        return hi / L
    lo = (i - 0.5) * math.pi
    sign_lo = np.sign(np.sin(lo))  # f(lo) = sin(lo); f(hi) has the opposite sign
    x = 0.5 * (lo + hi)
    for _ in range(100):
        sin, cos = np.sin(x), np.cos(x)
        f = sin + k * x * cos
        below = np.sign(f) == sign_lo  # root lies above x
        lo = np.where(below, x, lo)
        hi = np.where(below, hi, x)
        df = (1.0 + k) * cos - k * x * sin
        with np.errstate(divide="ignore", invalid="ignore"):
            newton = x - f / df
        inside = (newton >= lo) & (newton <= hi)
        new = np.where(inside, newton, 0.5 * (lo + hi))
        done = inside & (np.abs(new - x) <= 4.0 * np.finfo(float).eps * np.abs(x))
        x = new
        if np.all(done | (f == 0.0)):
            break
    return x / L


def _bisect(f, lo: float, hi: float) -> float:
    """Root of ``f`` in [lo, hi], where f(lo) and f(hi) differ in sign, to within
    1e-15 + 4 eps |x| (the tolerance a bracketing solver would be given); plain
    bisection: about 50 evaluations of a cheap function, once per cell."""
    f_lo = f(lo)
    tol = 4.0 * np.finfo(float).eps
    while hi - lo > 1e-15 + tol * abs(lo):
        mid = 0.5 * (lo + hi)
        f_mid = f(mid)
        if f_mid == 0.0:
            return mid
        if (f_mid > 0) == (f_lo > 0):
            lo, f_lo = mid, f_mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


def ballstick_alphas(L: float, rho: float, n: int) -> np.ndarray:
    """First `n` roots of the ball-and-stick eigenvalue equation tan(alpha*L) = -alpha*tanh(L)/rho.

    docs/references.md §3: alpha_k*L lies in ((k - 1/2)*pi, k*pi]; tau0/tau_k = 1 + alpha_k^2.

    Parameters
    ----------
    L : float
        Electrotonic length of the cylinder.
    rho : float
        Dendritic-to-somatic conductance ratio; ``inf`` for a bare cylinder.
    n : int
        Number of roots (k = 1..n).

    Returns
    -------
    ndarray
        alpha_1..alpha_n (dimensionless, per length constant).
    """
    return _alphas_from_s(float(L), _soma_over_ginf(float(L), float(rho)), int(n))


def ballstick_tau_ratios(L: float, rho: float, n: int) -> np.ndarray:
    """tau0/tau_k = 1 + alpha_k^2 for k = 1..n (docs/references.md §3)."""
    return 1.0 + ballstick_alphas(L, rho, n) ** 2


def _pulse_ratio_s(alpha: np.ndarray | float, L: float, s: float) -> np.ndarray | float:
    """C_k/C_0 = 2 rho_inf (L rho_inf + 1)/(L rho_inf^2 + rho_inf + L alpha^2); s = 1/rho_inf."""
    return 2.0 * (L + s) / (L + s + L * (alpha * s) ** 2)


def pulse_ratios(L: float, rho: float, n: int) -> np.ndarray:
    """Somatic brief-pulse amplitude ratios C_k/C_0 for k = 1..n (docs/references.md §3)."""
    return pulse_ratios_from_alphas(ballstick_alphas(L, rho, n), L, rho)


def pulse_ratios_from_alphas(alphas: np.ndarray, L: float, rho: float) -> np.ndarray:
    """C_k/C_0 for roots `alphas` already found by :func:`ballstick_alphas` (same L, rho)."""
    s = _soma_over_ginf(float(L), float(rho))
    return np.asarray(_pulse_ratio_s(np.asarray(alphas, dtype=float), float(L), s))


def pulse_ratio(L: float, rho: float, n: int = 1) -> float:
    """C_n/C_0 of the somatic response to a brief charge pulse (2 for a bare cylinder)."""
    return float(pulse_ratios(L, rho, n)[n - 1])


def step_ratios(L: float, rho: float, n: int) -> np.ndarray:
    """Somatic step-charging amplitude ratios B_k/B_0 = (C_k/C_0)/(1 + alpha_k^2), k = 1..n."""
    s = _soma_over_ginf(float(L), float(rho))
    alphas = _alphas_from_s(float(L), s, int(n))
    return np.asarray(_pulse_ratio_s(alphas, float(L), s)) / (1.0 + alphas**2)


def step_ratio(L: float, rho: float, n: int = 1) -> float:
    """B_n/B_0 of the somatic charging curve for a current step (2*tau_n/tau0 for a cylinder)."""
    return float(step_ratios(L, rho, n)[n - 1])


def b0_over_vinf(L: float, rho: float) -> float:
    """B0/V_inf = (1 + rho)/(1 + rho*L*coth L) (docs/references.md §3); tanh(L)/L for a cylinder.

    Also equals (tau0/R_N)/C_total (docs/references.md §4).
    """
    s = _soma_over_ginf(float(L), float(rho))
    return (s + math.tanh(L)) / (s + L)


def square_pulse_factor(tau0: float, tau_n: float, duration_s: float) -> float:
    """Factor by which a square pulse of duration D scales C_n/C_0 of a brief pulse.

    tau_n*(1 - exp(-D/tau_n)) / (tau0*(1 - exp(-D/tau0))), for amplitudes of the decay
    measured from the pulse end (docs/references.md §2, square pulse); tends to 1 as D -> 0.
    """
    t0, tn = _positive("tau0", tau0), _positive("tau_n", tau_n)
    d = _positive("duration_s", duration_s)
    return (tn * -math.expm1(-d / tn)) / (t0 * -math.expm1(-d / t0))


# ------------------------------------------------------------------ L and rho estimation

_KIND_NAMES = {"pulse": "C1/C0", "step": "B1/B0", "square": "C1/C0 (square pulse)"}


def _brief_pulse_ratio(
    tau0: float, tau1: float, ratio: float, kind: str, duration_s: float | None
) -> float:
    """The measured amplitude ratio converted to the C1/C0 of a brief pulse."""
    if kind == "pulse":
        return ratio
    if kind == "step":
        return ratio * tau0 / tau1
    if kind == "square":
        if duration_s is None:
            raise CableFitError(
                "`duration_s` is needed for kind='square' (the pulse duration in s)"
            )
        return ratio / square_pulse_factor(tau0, tau1, duration_s)
    raise ValueError(f"`kind` must be 'step', 'pulse' or 'square', got {kind!r}")


def estimate_ballstick(
    tau0: float, tau1: float, ratio: float, kind: str = "pulse", duration_s: float | None = None
) -> tuple[float, float]:
    """L and rho of a uniform ball-and-stick from tau0, tau1 and the first amplitude ratio.

    docs/references.md §3: with alpha1 = sqrt(tau0/tau1 - 1), L is searched in
    (pi/(2*alpha1), pi/alpha1); for each trial L, rho_inf = -alpha1*cot(alpha1*L), and
    the brief-pulse ratio C1/C0 it implies is matched to the measured one (by bisection).
    Then rho = rho_inf*tanh(L).

    Parameters
    ----------
    tau0, tau1 : float
        Membrane and first equalizing time constants, in s.
    ratio : float
        First amplitude ratio: B1/B0 of a step's charging curve (``kind="step"``),
        C1/C0 of a brief pulse (``kind="pulse"``), or C1/C0 of the decay after a square
        pulse of duration `duration_s`, amplitudes taken at the pulse end
        (``kind="square"``).
    kind : {"pulse", "step", "square"}
    duration_s : float, optional
        Square-pulse duration, in s (``kind="square"`` only).

    Returns
    -------
    (L, rho) : tuple of float

    Raises
    ------
    CableFitError
        When no uniform ball-and-stick has these values (e.g. the ratio is too large:
        somatic shunt or non-uniform membrane).
    """
    t0, t1 = _tau_pair(tau0, tau1)
    r = float(ratio)
    c = _brief_pulse_ratio(t0, t1, r, kind, duration_s)
    name = _KIND_NAMES[kind]
    if not (math.isfinite(c) and c > 0):
        raise CableFitError(f"{name} = {r:.4g} must be a finite positive number")
    if c >= 2.0:
        limit = "2*tau1/tau0" if kind == "step" else "2"
        raise CableFitError(
            f"{name} = {r:.4g} is larger than a uniform ball-and-stick allows (limit {limit}): "
            "somatic shunt or non-uniform membrane?"
        )
    a1 = math.sqrt(t0 / t1 - 1.0)

    def mismatch(x: float) -> float:  # x = alpha1*L in (pi/2, pi)
        s = -math.tan(x) / a1  # G_S/G_inf = 1/rho_inf
        return _pulse_ratio_s(a1, x / a1, s) - c

    eps = 1e-12
    lo, hi = 0.5 * math.pi + eps, math.pi - eps
    if mismatch(lo) * mismatch(hi) > 0:
        raise CableFitError(
            f"{name} = {r:.4g} is too close to the limits of a uniform ball-and-stick "
            "to solve for L and rho"
        )
    x = _bisect(mismatch, lo, hi)
    L = x / a1
    return L, math.tanh(L) * a1 / -math.tan(x)


def estimate_ballstick_ci(
    tau0: float,
    tau1: float,
    ratio: float,
    cov: np.ndarray,
    kind: str = "pulse",
    duration_s: float | None = None,
) -> tuple[float, float]:
    """95 % CI half-widths of (L, rho) from :func:`estimate_ballstick`.

    First-order (delta-method) propagation of the covariance of (tau0, tau1, ratio)
    through numerical partial derivatives (central differences, one-sided next to a
    limit). It is symmetric and local: near the limits (rho large, ratio close to
    its maximum) the true interval for rho is wide and skewed.

    Parameters
    ----------
    tau0, tau1, ratio, kind, duration_s
        As for :func:`estimate_ballstick`.
    cov : array_like, shape (3, 3)
        Covariance of (tau0 [s], tau1 [s], ratio); for independent estimates use
        ``np.diag([sd_tau0**2, sd_tau1**2, sd_ratio**2])``.

    Returns
    -------
    (L_ci95, rho_ci95) : tuple of float
    """
    cov = np.asarray(cov, dtype=float)
    if cov.shape != (3, 3) or not np.all(np.isfinite(cov)):
        raise CableFitError("`cov` must be a finite 3x3 covariance of (tau0, tau1, ratio)")
    x0 = np.array([tau0, tau1, ratio], dtype=float)

    def f(x: np.ndarray) -> np.ndarray:
        return np.array(estimate_ballstick(x[0], x[1], x[2], kind, duration_s))

    y0 = f(x0)
    jac = np.empty((2, 3))
    for i in range(3):
        h = 1e-6 * abs(x0[i])
        step = np.zeros(3)
        step[i] = h
        jac[:, i] = _difference(f, x0, step, y0)
    var = np.einsum("ij,jk,ik->i", jac, cov, jac)
    return float(Z95 * math.sqrt(var[0])), float(Z95 * math.sqrt(var[1]))


def _difference(f, x0: np.ndarray, step: np.ndarray, y0: np.ndarray) -> np.ndarray:
    """Central difference of f along `step`, falling back to one side near a limit."""
    h = float(np.max(np.abs(step)))
    try:
        up = f(x0 + step)
    except CableFitError:
        up = None
    try:
        down = f(x0 - step)
    except CableFitError:
        down = None
    if up is not None and down is not None:
        return (up - down) / (2 * h)
    if up is not None:
        return (up - y0) / h
    if down is not None:
        return (y0 - down) / h
    raise CableFitError("L and rho cannot be differentiated here: both neighbours have no solution")


def rho_from_amplitudes_step(v_inf: float, b0: float, L: float) -> float:
    """rho from the step amplitudes: (V_inf - B0)/(B0*L*coth L - V_inf) (docs/references.md §3).

    Parameters
    ----------
    v_inf : float
        Steady-state deflection, in V.
    b0 : float
        Amplitude of the tau0 component of the charging curve, in V (same sign as v_inf).
    L : float
        Electrotonic length.
    """
    L = _positive("L", L)
    num = v_inf - b0
    den = b0 * L / math.tanh(L) - v_inf
    return _positive_rho(num, den, "B0/V_inf")


def rho_from_amplitudes_pulse(q: float, r_n: float, c0: float, tau0: float, L: float) -> float:
    """rho from pulse amplitudes: (Q*R_N - C0*tau0)/(C0*tau0*L*coth L - Q*R_N)
    (docs/references.md §3).

    Parameters
    ----------
    q : float
        Injected charge, in C.
    r_n : float
        Input resistance, in Ohm.
    c0 : float
        Amplitude of the tau0 component after a brief pulse, in V (same sign as q).
    tau0 : float
        Membrane time constant, in s.
    L : float
        Electrotonic length.
    """
    L = _positive("L", L)
    qr = q * r_n
    ct = c0 * tau0
    return _positive_rho(qr - ct, ct * L / math.tanh(L) - qr, "C0*tau0/(Q*R_N)")


def _positive_rho(num: float, den: float, what: str) -> float:
    rho = num / den if den != 0 else math.inf
    if not (math.isfinite(rho) and rho > 0):
        raise CableFitError(
            f"the amplitudes give no positive finite rho ({what} outside the range of a "
            "uniform ball-and-stick with this L)"
        )
    return rho


# ------------------------------------------------------------------------ capacitance


def c_tau(tau0: float, r_in: float) -> float:
    """tau0/R_in, in F: the voltage-weighted capacitance; underestimates C_total in a
    non-isopotential cell (docs/references.md §4)."""
    return _positive("tau0", tau0) / _positive("r_in", r_in)


def c_total_step(i_step: float, tau0: float, b0: float) -> float:
    """Total capacitance from a step, I*tau0/B0, in F (docs/references.md §4; uniform tau_m).

    `i_step` (A) and `b0` (V, amplitude of the tau0 component) must have the same sign.
    """
    c = i_step * _positive("tau0", tau0) / b0 if b0 != 0 else math.nan
    return _positive("I*tau0/B0 (step current and B0 must have the same sign)", c)


def c_total_pulse(q: float, c0: float) -> float:
    """Total capacitance from a brief pulse, Q/C0, in F (docs/references.md §4; uniform tau_m)."""
    c = q / c0 if c0 != 0 else math.nan
    return _positive("Q/C0 (charge and C0 must have the same sign)", c)


def specific_membrane(c_total: float, tau0: float, area_m2: float) -> tuple[float, float]:
    """Specific membrane capacitance and resistance from the total capacitance and area.

    Cm = C_total/area, Rm = tau0/Cm (uniform membrane time constant).

    Parameters
    ----------
    c_total : float
        Total membrane capacitance, in F.
    tau0 : float
        Membrane time constant, in s.
    area_m2 : float
        Membrane area, in m^2.

    Returns
    -------
    (cm_F_per_m2, rm_ohm_m2) : tuple of float
        SI units; 1 uF/cm^2 = 1e-2 F/m^2, 1 kOhm*cm^2 = 0.1 Ohm*m^2.
    """
    cm = _positive("c_total", c_total) / _positive("area_m2", area_m2)
    return cm, _positive("tau0", tau0) / cm


# ----------------------------------------------------------------------- plausibility


def _valid(*values: float | None) -> bool:
    return all(v is not None and math.isfinite(v) and v > 0 for v in values)


def implausible(
    *,
    tau0: float | None = None,
    tau1: float | None = None,
    tau2: float | None = None,
    c1_over_c0: float | None = None,
    b1_over_b0: float | None = None,
    L: float | None = None,
    rho: float | None = None,
) -> list[tuple[str, float, dict]]:
    """Cable estimates that a uniform passive ball-and-stick cannot produce.

    Checks (each only when its inputs are given and finite): the tau2 ratio
    (tau0/tau2 - 1)/(tau0/tau1 - 1) within [4, 9]; brief-pulse C1/C0 <= 2 and step
    B1/B0 <= 2*tau1/tau0 (docs/references.md §3, signs of a shunt); L within 0.1–3 and
    rho within 0.1–100 (docs/references.md §8 ranges, common practice).

    Returns
    -------
    list of (check, value, extra)
        The checks that failed: "tau2_ratio", "shunt_pulse", "shunt_step" (extra
        ``limit`` = 2*tau1/tau0), "L_range", "rho_range", each with the value tested.
    """
    out: list[tuple[str, float, dict]] = []
    if _valid(tau0, tau1, tau2) and tau2 < tau1 < tau0:
        q = (tau0 / tau2 - 1.0) / (tau0 / tau1 - 1.0)
        if not 4.0 <= q <= 9.0:
            out.append(("tau2_ratio", q, {}))
    if c1_over_c0 is not None and math.isfinite(c1_over_c0) and c1_over_c0 > 2.0:
        out.append(("shunt_pulse", c1_over_c0, {}))
    if (
        b1_over_b0 is not None
        and math.isfinite(b1_over_b0)
        and _valid(tau0, tau1)
        and b1_over_b0 > 2.0 * tau1 / tau0
    ):
        out.append(("shunt_step", b1_over_b0, {"limit": 2.0 * tau1 / tau0}))
    if L is not None and math.isfinite(L) and not 0.1 <= L <= 3.0:
        out.append(("L_range", L, {}))
    if rho is not None and math.isfinite(rho) and not 0.1 <= rho <= 100.0:
        out.append(("rho_range", rho, {}))
    return out
