"""The simulated neuron: a lumped soma plus one uniform equivalent cylinder with a sealed
far end (ball-and-stick), solved exactly by its eigen-expansion, and the same cell by an
independent compartmental route (docs/references.md §3)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from passivefit.core import cable
from passivefit.model import schema as S

LAB_NAME = "Lindqvist-Okafor Lab of Dendritic Physiology (invented)"

# A mode whose exp(-dt/tau) is below this is fully relaxed within one sample (exact in
# double precision): it is applied as an instantaneous resistance, delayed one sample.
_RELAXED = 1e-17


@dataclass(frozen=True)
class BallStick:
    """A ball-and-stick neuron: lumped soma plus a uniform, sealed-end cylinder.

    Parameters
    ----------
    tau_m_s : float
        Membrane time constant Rm*Cm (uniform), in s.
    L : float
        Electrotonic length of the cylinder.
    g_soma_S : float
        Somatic membrane conductance G_S, in S (0 for a bare cylinder).
    g_inf_S : float
        Input conductance G_inf of a semi-infinite extension of the cylinder, in S.
    """

    tau_m_s: float
    L: float
    g_soma_S: float
    g_inf_S: float

    def __post_init__(self) -> None:
        for name in ("tau_m_s", "L", "g_inf_S"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0):
                raise ValueError(f"`{name}` must be a finite positive number, got {value!r}")
        if not (math.isfinite(self.g_soma_S) and self.g_soma_S >= 0):
            raise ValueError(f"`g_soma_S` must be finite and >= 0, got {self.g_soma_S!r}")

    # ------------------------------------------------------------------ constructors
    @classmethod
    def from_electrotonic(cls, tau_m_s: float, L: float, rho: float, r_in_ohm: float) -> BallStick:
        """Cell from tau_m (s), L, rho = G_D/G_S and input resistance (Ohm).

        G_N = 1/R_N = G_S*(1 + rho), G_D = rho*G_S = G_inf*tanh(L).
        """
        if not (rho > 0 and math.isfinite(rho)):
            raise ValueError(
                f"`rho` must be finite and positive, got {rho!r} "
                "(use BallStick.cylinder for a cell without soma)"
            )
        if not (r_in_ohm > 0 and math.isfinite(r_in_ohm)):
            raise ValueError(f"`r_in_ohm` must be finite and positive, got {r_in_ohm!r}")
        g_soma = 1.0 / (r_in_ohm * (1.0 + rho))
        return cls(tau_m_s, L, g_soma, rho * g_soma / math.tanh(L))

    @classmethod
    def cylinder(cls, tau_m_s: float, L: float, r_in_ohm: float) -> BallStick:
        """A bare finite cylinder (no soma) with input resistance R_N = R_inf*coth(L), in Ohm."""
        return cls(tau_m_s, L, 0.0, 1.0 / (r_in_ohm * math.tanh(L)))

    @classmethod
    def from_morphology(
        cls,
        rm_ohm_cm2: float,
        cm_F_cm2: float,
        ri_ohm_cm: float,
        soma_diameter_m: float,
        dend_diameter_m: float,
        dend_length_m: float,
    ) -> BallStick:
        """Cell from specific membrane properties and a spherical soma plus one cylinder.

        Parameters
        ----------
        rm_ohm_cm2 : float
            Specific membrane resistance, in Ohm*cm^2.
        cm_F_cm2 : float
            Specific membrane capacitance, in F/cm^2 (1e-6 for 1 uF/cm^2).
        ri_ohm_cm : float
            Axial resistivity, in Ohm*cm.
        soma_diameter_m : float
            Soma sphere diameter (area pi*d^2), in m; 0 for a bare cylinder.
        dend_diameter_m, dend_length_m : float
            Equivalent-cylinder diameter and length, in m.

        Notes
        -----
        lambda = sqrt(Rm*d/(4*Ri)), G_inf = (pi/2)*d^(3/2)/sqrt(Rm*Ri)
        (docs/references.md §1, notation).
        """
        rm = rm_ohm_cm2 * 1e-4  # Ohm*m^2
        ri = ri_ohm_cm * 1e-2  # Ohm*m
        tau = rm * cm_F_cm2 * 1e4
        d = dend_diameter_m
        lam = math.sqrt(rm * d / (4.0 * ri))
        g_inf = 0.5 * math.pi * d**1.5 / math.sqrt(rm * ri)
        g_soma = math.pi * soma_diameter_m**2 / rm
        return cls(tau, dend_length_m / lam, g_soma, g_inf)

    # -------------------------------------------------------------------- properties
    @property
    def tau0_s(self) -> float:
        """Slowest time constant, in s (= tau_m for a uniform membrane)."""
        return self.tau_m_s

    @property
    def rho(self) -> float:
        """Dendritic-to-somatic conductance ratio G_inf*tanh(L)/G_S (inf without soma)."""
        g_d = self.g_inf_S * math.tanh(self.L)
        return g_d / self.g_soma_S if self.g_soma_S > 0 else math.inf

    @property
    def r_in_ohm(self) -> float:
        """Somatic input resistance 1/(G_S + G_inf*tanh L), in Ohm."""
        return 1.0 / (self.g_soma_S + self.g_inf_S * math.tanh(self.L))

    @property
    def c_total_F(self) -> float:
        """Total membrane capacitance tau_m*(G_S + G_inf*L), in F."""
        return self.tau_m_s * (self.g_soma_S + self.g_inf_S * self.L)

    @property
    def c_tau_F(self) -> float:
        """tau0/R_N, in F (underestimates c_total_F; docs/references.md §4)."""
        return self.tau0_s / self.r_in_ohm

    def alphas(self, n: int) -> np.ndarray:
        """alpha_1..alpha_n of the eigenvalue equation tan(alpha*L) = -alpha*tanh(L)/rho."""
        return cable.ballstick_alphas(self.L, self.rho, n)

    def taus(self, n: int) -> np.ndarray:
        """The first `n` time constants tau0, tau1, ..., tau_{n-1}, in s."""
        if n < 1:
            raise ValueError(f"`n` must be >= 1, got {n}")
        return self.tau0_s / np.concatenate(([1.0], 1.0 + self.alphas(n - 1) ** 2))

    def pulse_ratios(self, n: int) -> np.ndarray:
        """C_k/C_0 of a brief somatic charge pulse, k = 1..n."""
        return cable.pulse_ratios(self.L, self.rho, n)

    def step_ratios(self, n: int) -> np.ndarray:
        """B_k/B_0 of the somatic charging curve for a current step, k = 1..n."""
        return cable.step_ratios(self.L, self.rho, n)

    def b0_over_vinf(self) -> float:
        """B0/V_inf of the step charging curve (also (tau0/R_N)/C_total)."""
        return cable.b0_over_vinf(self.L, self.rho)

    # ------------------------------------------------------------------------- modes
    def modes(self, n_modes: int = 400) -> tuple[np.ndarray, np.ndarray]:
        """Somatic impulse response h(t) = sum_n g_n exp(-t/tau_n) by eigen-expansion.

        Parameters
        ----------
        n_modes : int
            Number of modes including the tau0 mode.

        Returns
        -------
        taus_s : ndarray
            Time constants, slowest first, in s.
        gains_V_per_C : ndarray
            g_n, in V/C (g_0 = 1/C_total, g_n = g_0*C_n/C_0; docs/references.md §3).
        """
        if n_modes < 1:
            raise ValueError(f"`n_modes` must be >= 1, got {n_modes}")
        alphas = self.alphas(n_modes - 1)
        taus = self.tau0_s / np.concatenate(([1.0], 1.0 + alphas**2))
        ratios = cable.pulse_ratios_from_alphas(alphas, self.L, self.rho)
        return taus, np.concatenate(([1.0], ratios)) / self.c_total_F

    def _modes_for_dt(self, dt_s: float) -> int:
        """Mode count whose neglected tail is fully relaxed within one sample."""
        # alpha_n >= (n - 1/2)*pi/L; need tau_n <= dt/40.
        need = self.L * math.sqrt(40.0 * self.tau0_s / dt_s) / math.pi + 2.0
        return max(400, int(need))

    def soma_response(
        self, current_A: np.ndarray, dt_s: float, modes: tuple[np.ndarray, np.ndarray] | None = None
    ) -> np.ndarray:
        """Somatic voltage deviation for a sampled current, exact for a zero-order hold.

        Sample k of the output is the voltage at t = k*dt when current[k] flows from
        k*dt to (k+1)*dt. Per mode: x[k+1] = x[k]*e^(-dt/tau) + g*tau*(1 - e^(-dt/tau))*I[k].

        Parameters
        ----------
        current_A : array_like
            Injected current per sample, in A.
        dt_s : float
            Sample interval, in s.
        modes : (taus_s, gains_V_per_C), optional
            Modes to use as given (e.g. from :func:`compartmental_modes`). By default the
            analytic modes, enough of them for `dt_s`, with the resistance of the
            remaining (instantaneous) tail added so the steady state is exactly I*R_N.

        Returns
        -------
        ndarray
            Voltage deviation from rest, in V.
        """
        from scipy.signal import lfilter

        current = np.asarray(current_A, dtype=float)
        if not (math.isfinite(dt_s) and dt_s > 0):
            raise ValueError(f"`dt_s` must be a finite positive number, got {dt_s!r}")
        tail_ohm = 0.0
        if modes is None:
            taus, gains = self.modes(self._modes_for_dt(dt_s))
            tail_ohm = max(self.r_in_ohm - float(np.sum(gains * taus)), 0.0)
        else:
            taus, gains = (np.asarray(m, dtype=float) for m in modes)
        decay = np.exp(-dt_s / taus)
        slow = decay > _RELAXED
        v = np.zeros_like(current)
        for tau, g, a in zip(taus[slow], gains[slow], decay[slow], strict=True):
            v += lfilter([0.0, g * tau * (1.0 - a)], [1.0, -a], current)
        instant_ohm = float(np.sum(gains[~slow] * taus[~slow])) + tail_ohm
        v[1:] += instant_ohm * current[:-1]
        return v

    def summary(self) -> dict:
        """Cell properties as plain floats, display units in the keys."""
        taus = self.taus(4)
        ratios_c = self.pulse_ratios(1)
        ratios_b = self.step_ratios(1)
        return {
            S.TAU0.key: float(taus[0] * 1e3),
            S.TAU1.key: float(taus[1] * 1e3),
            S.TAU2.key: float(taus[2] * 1e3),
            "tau3_ms": float(taus[3] * 1e3),
            "L": float(self.L),
            "rho": float(self.rho),
            S.R_IN.key: float(self.r_in_ohm * 1e-6),
            S.C_TOTAL.key: float(self.c_total_F * 1e12),
            S.C_TAU.key: float(self.c_tau_F * 1e12),
            "b1_over_b0": float(ratios_b[0]),
            "c1_over_c0": float(ratios_c[0]),
            "b0_over_vinf": float(self.b0_over_vinf()),
            "L_cyl_naive": float(cable.cylinder_L(taus[0], taus[1])),
        }


def compartmental_modes(
    cell: BallStick, n_compartments: int = 1000
) -> tuple[np.ndarray, np.ndarray]:
    """Somatic impulse-response modes of a compartmental model of `cell` (independent check).

    The cylinder is cut into `n_compartments` equal pieces with nodes at both ends of
    each (half compartments at the ends); the soma is lumped into node 0. The
    generalized problem C dV/dt = -G V is symmetrised, W = C^(-1/2) G C^(-1/2), and
    W (tridiagonal) is eigen-decomposed with scipy.linalg.eigh_tridiagonal.

    Returns
    -------
    taus_s : ndarray
        All n_compartments + 1 time constants, slowest first, in s.
    gains_V_per_C : ndarray
        g_k = U[0, k]^2 / C_0, in V/C.
    """
    from scipy.linalg import eigh_tridiagonal

    n = int(n_compartments)
    if n < 2:
        raise ValueError(f"`n_compartments` must be >= 2, got {n}")
    dx = cell.L / n
    weight = np.ones(n + 1)
    weight[[0, -1]] = 0.5
    cap = cell.tau_m_s * cell.g_inf_S * dx * weight
    cap[0] += cell.tau_m_s * cell.g_soma_S
    g_axial = cell.g_inf_S / dx
    n_links = np.full(n + 1, 2.0)
    n_links[[0, -1]] = 1.0
    diag = 1.0 / cell.tau_m_s + g_axial * n_links / cap
    off = -g_axial / np.sqrt(cap[:-1] * cap[1:])
    rates, vecs = eigh_tridiagonal(diag, off)
    return 1.0 / rates, vecs[0] ** 2 / cap[0]


# ---------------------------------------------------------------------------- protocols


