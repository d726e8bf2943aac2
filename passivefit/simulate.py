"""Simulated ball-and-stick neurons under somatic current clamp, and simulated recordings.

A :class:`BallStick` is a lumped soma plus one uniform equivalent cylinder with a
sealed far end, uniform Rm, Cm and Ri. Its somatic impulse response is the exact
eigen-expansion h(t) = sum_n g_n exp(-t/tau_n) (docs/references.md §3);
:func:`compartmental_modes` gives the same modes by an independent route (a fine
compartmental discretisation, eigen-decomposed). :meth:`BallStick.soma_response`
is exact for a current held constant over each sample (zero-order hold).

:func:`simulate_recording` wraps a cell into a :class:`~passivefit.io.recording.Recording`
with the usual recording imperfections (noise, low-pass filter, residual bridge
imbalance, drift, mains hum, spontaneous events) and returns the ground truth beside it.
Opt-in, what real cells add: an Ih-like sag conductance (:class:`SagConductance`), an
inwardly rectifying leak (:class:`RectifyingLeak`), both fed back as somatic currents into
the exact passive response; action potentials (:class:`Spiking`); and a drift of the
input resistance over the sweeps. With all of them off the output is unchanged.
All quantities are SI inside; the truth dict carries display units in its keys.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass

import numpy as np

from passivefit.core import cable
from passivefit.model import schema as S
from passivefit.model.recording import Recording, Sweep

__all__ = [
    "BallStick",
    "PulseProtocol",
    "RectifyingLeak",
    "SagConductance",
    "Spiking",
    "StepProtocol",
    "compartmental_modes",
    "simulate_recording",
    "truth_to_json",
]

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


@dataclass(frozen=True)
class StepProtocol:
    """Current steps; sweep k gets amplitudes_A[k % len(amplitudes_A)].

    Parameters
    ----------
    onset_s, duration_s : float
        Step edge from sweep start and step duration, in s.
    amplitudes_A : tuple of float
        Step amplitudes, in A (hyperpolarizing negative).
    """

    onset_s: float
    duration_s: float
    amplitudes_A: tuple[float, ...]

    kind = "step"

    def amplitude_of(self, sweep_index: int) -> float:
        return float(self.amplitudes_A[sweep_index % len(self.amplitudes_A)])

    def describe(self) -> str:
        amps = ", ".join(f"{a * 1e12:+g}" for a in self.amplitudes_A)
        return (
            f"current steps at {self.onset_s * 1e3:g} ms for {self.duration_s * 1e3:g} ms, "
            f"amplitudes cycling through {amps} pA"
        )


@dataclass(frozen=True)
class PulseProtocol:
    """A brief square current pulse, the same in every sweep.

    Parameters
    ----------
    onset_s, duration_s : float
        Pulse start from sweep start and pulse duration (e.g. 0.5e-3), in s.
    amplitude_A : float
        Pulse amplitude, in A.
    """

    onset_s: float
    duration_s: float
    amplitude_A: float

    kind = "pulse"

    @property
    def amplitudes_A(self) -> tuple[float, ...]:
        return (float(self.amplitude_A),)

    def amplitude_of(self, sweep_index: int) -> float:
        return float(self.amplitude_A)

    def describe(self) -> str:
        return (
            f"brief current pulse at {self.onset_s * 1e3:g} ms, "
            f"{self.duration_s * 1e3:g} ms of {self.amplitude_A * 1e12:+g} pA"
        )


def _unit_command(
    protocol: StepProtocol | PulseProtocol, n_samples: int, sample_rate_hz: float
) -> np.ndarray:
    """1 while the step/pulse is on, else 0 (same sampling rule as StepSpec.command)."""
    t = np.arange(n_samples) / sample_rate_hz
    on = (t >= protocol.onset_s) & (t < protocol.onset_s + protocol.duration_s)
    return on.astype(float)


# ---------------------------------------------------------------------- active membrane


def _sigmoid_down(v_V: np.ndarray | float, v_half_V: float, slope_V: float) -> np.ndarray:
    """1 / (1 + exp((V - V_half)/k)): 1 well below V_half, 0 well above."""
    return 0.5 * (1.0 - np.tanh(0.5 * (np.asarray(v_V, dtype=float) - v_half_V) / slope_V))


def _check_positive(obj: object, names: tuple[str, ...]) -> None:
    for name in names:
        value = getattr(obj, name)
        if not (math.isfinite(value) and value > 0):
            raise ValueError(f"`{name}` must be a finite positive number, got {value!r}")


@dataclass(frozen=True)
class SagConductance:
    """An Ih-like somatic conductance: activated by hyperpolarization, slow, with rebound.

    I_h = g_max * m * (V - e_rev), with first-order gating dm/dt = (m_inf(V) - m)/tau and
    m_inf(V) = 1/(1 + exp((V - v_half)/slope)). Hyperpolarization opens it slowly, so the
    voltage first overshoots and then sags back toward rest; after the step the still-open
    conductance depolarizes the cell above rest (rebound). Defaults are typical of
    pyramidal-cell h-current (reversal about -30 mV, half-activation -80 to -90 mV,
    time constant tens to a hundred ms; from memory).

    Parameters
    ----------
    g_max_S : float
        Maximal conductance, in S (a few nS gives a sag ratio of about 0.8 at -10 mV).
    tau_s : float
        Gating time constant (voltage-independent here), in s.
    v_half_V : float
        Half-activation voltage, in V.
    slope_V : float
        Slope factor of the activation curve, in V.
    e_rev_V : float
        Reversal potential, in V.
    """

    g_max_S: float
    tau_s: float = 0.1
    v_half_V: float = -0.085
    slope_V: float = 0.007
    e_rev_V: float = -0.030

    def __post_init__(self) -> None:
        _check_positive(self, ("g_max_S", "tau_s", "slope_V"))

    def m_inf(self, v_V: np.ndarray | float) -> np.ndarray:
        """Steady-state open fraction at membrane potential `v_V` (V)."""
        return _sigmoid_down(v_V, self.v_half_V, self.slope_V)

    def steady_slope_S(self, v_V: float) -> float:
        """Steady-state slope conductance d(I_h,inf)/dV at `v_V` (V), in S."""
        m = float(self.m_inf(v_V))
        dm = -m * (1.0 - m) / self.slope_V
        return self.g_max_S * (m + dm * (v_V - self.e_rev_V))

    def summary(self) -> dict:
        return {
            "ih_g_nS": float(self.g_max_S * 1e9),
            "ih_tau_ms": float(self.tau_s * 1e3),
            "ih_v_half_mV": float(self.v_half_V * 1e3),
            "ih_slope_mV": float(self.slope_V * 1e3),
            "ih_e_rev_mV": float(self.e_rev_V * 1e3),
        }


@dataclass(frozen=True)
class RectifyingLeak:
    """An instantaneous inwardly rectifying somatic leak (Kir-like, no gating delay).

    g(V) = g_max / (1 + exp((V - v_half)/slope)): the conductance grows with
    hyperpolarization, so the input resistance falls for larger hyperpolarizing steps.
    The current is g(V) * (V - e_rev).

    Parameters
    ----------
    g_max_S : float
        Conductance well below `v_half_V`, in S.
    v_half_V : float
        Voltage of half the maximal conductance, in V.
    slope_V : float
        Slope factor, in V.
    e_rev_V : float or None
        Reversal potential, in V; None for the resting potential (no standing current).
    """

    g_max_S: float
    v_half_V: float = -0.080
    slope_V: float = 0.010
    e_rev_V: float | None = None

    def __post_init__(self) -> None:
        _check_positive(self, ("g_max_S", "slope_V"))

    def conductance_S(self, v_V: np.ndarray | float) -> np.ndarray:
        """Chord conductance at membrane potential `v_V` (V), in S."""
        return self.g_max_S * _sigmoid_down(v_V, self.v_half_V, self.slope_V)

    def slope_S(self, v_V: float, v_rest_V: float) -> float:
        """Slope conductance dI/dV at `v_V` (V), in S."""
        e_rev = v_rest_V if self.e_rev_V is None else self.e_rev_V
        g = float(self.conductance_S(v_V))
        dg = -g * (1.0 - g / self.g_max_S) / self.slope_V
        return g + dg * (v_V - e_rev)

    def summary(self, v_rest_V: float) -> dict:
        return {
            "rect_g_nS": float(self.g_max_S * 1e9),
            "rect_v_half_mV": float(self.v_half_V * 1e3),
            "rect_slope_mV": float(self.slope_V * 1e3),
            "rect_e_rev_mV": float((v_rest_V if self.e_rev_V is None else self.e_rev_V) * 1e3),
        }


@dataclass(frozen=True)
class Spiking:
    """Action potentials pasted onto the membrane potential where it crosses a threshold.

    Each spike is a brief bump to about `peak_V` (half-width about 0.7 ms, peak 0.8 ms after
    the crossing) followed by an afterhyperpolarization of depth `ahp_V` decaying with
    `ahp_tau_s`. The AHP adds to the voltage, so a sustained step fires repetitively at a
    rate set by how far it drives the cell past threshold (at most 1/`refractory_s`). The
    spikes do not feed back on the sag or rectifier conductances.

    Parameters
    ----------
    threshold_V : float
        Firing threshold, in V.
    peak_V : float
        Spike peak, in V.
    ahp_V : float
        AHP depth (positive), in V.
    ahp_tau_s : float
        AHP decay time constant, in s.
    refractory_s : float
        Shortest interval between spikes, in s.
    """

    threshold_V: float = -0.050
    peak_V: float = 0.030
    ahp_V: float = 0.008
    ahp_tau_s: float = 0.015
    refractory_s: float = 0.003

    def __post_init__(self) -> None:
        _check_positive(self, ("ahp_tau_s", "refractory_s"))
        if not self.peak_V > self.threshold_V:
            raise ValueError(
                f"`peak_V` ({self.peak_V!r} V) must lie above `threshold_V` "
                f"({self.threshold_V!r} V)"
            )
        if not (math.isfinite(self.ahp_V) and self.ahp_V >= 0):
            raise ValueError(f"`ahp_V` must be finite and >= 0, got {self.ahp_V!r}")

    def shapes(self, dt_s: float) -> tuple[np.ndarray, np.ndarray]:
        """(spike bump with peak 1, AHP with trough -1), sampled from the crossing."""
        t = np.arange(int(max(6 * self.ahp_tau_s, 5e-3) / dt_s) + 1) * dt_s
        bump = np.exp(-0.5 * ((t - 0.8e-3) / 0.3e-3) ** 2)
        ahp = np.exp(-t / self.ahp_tau_s) - np.exp(-t / 1e-3)
        return bump, -ahp / ahp.max()

    def paste(self, v_V: np.ndarray, dt_s: float) -> tuple[np.ndarray, np.ndarray]:
        """Membrane potential `v_V` (V) with spikes added, and the crossing times (s)."""
        bump, ahp = self.shapes(dt_s)
        out = np.array(v_V, dtype=float)
        times = []
        refractory = max(1, int(round(self.refractory_s / dt_s)))
        start = 0
        while start < out.size:
            above = np.flatnonzero(out[start:] >= self.threshold_V)
            if above.size == 0:
                break
            k = start + int(above[0])
            m = min(bump.size, out.size - k)
            out[k : k + m] += (self.peak_V - out[k]) * bump[:m] + self.ahp_V * ahp[:m]
            times.append(k * dt_s)
            start = k + refractory
        return out, np.asarray(times)

    def summary(self) -> dict:
        return {
            "spike_threshold_mV": float(self.threshold_V * 1e3),
            "spike_peak_mV": float(self.peak_V * 1e3),
            "spike_ahp_mV": float(self.ahp_V * 1e3),
        }


def _active_responses(
    cell: BallStick,
    unit_A: np.ndarray,
    amplitudes_A: np.ndarray,
    scales: np.ndarray,
    dt_s: float,
    v_rest_V: float,
    sag: SagConductance | None,
    rectifier: RectifyingLeak | None,
) -> np.ndarray:
    """Somatic voltage deviations (rows, V) of `cell` with its conductances scaled by 1/scale.

    Row r is driven by amplitudes_A[r] * unit_A. The passive cable is the exact modal
    response (zero-order hold); the sag and rectifier currents are fed back into it as
    somatic currents held over each sample (their value at the sample's start), with the
    sag gate advanced by exponential Euler. The currents are taken relative to rest, so
    rest stays at `v_rest_V` (equivalent to adjusting the leak reversal).
    """
    from scipy.signal import lfilter

    taus, gains = cell.modes(cell._modes_for_dt(dt_s))
    tail_ohm = max(cell.r_in_ohm - float(np.sum(gains * taus)), 0.0)
    decay = np.exp(-dt_s / taus)
    slow = decay > _RELAXED
    instant_ohm = float(np.sum(gains[~slow] * taus[~slow])) + tail_ohm
    a = decay[slow]
    b = gains[slow] * taus[slow] * (1.0 - a)
    # the command's response, exact and linear
    unit_v = np.zeros_like(unit_A)
    for ak, bk in zip(a, b, strict=True):
        unit_v += lfilter([0.0, bk], [1.0, -ak], unit_A)
    unit_v[1:] += instant_ohm * unit_A[:-1]
    scales = np.asarray(scales, dtype=float)
    v_cmd = (scales * amplitudes_A)[:, None] * unit_v[None, :]
    # The feedback is explicit: stable while the resistance the soma shows within one
    # sample, times the active conductance, stays below about 1.
    g_active = (sag.g_max_S if sag else 0.0) + (rectifier.g_max_S if rectifier else 0.0)
    one_sample_ohm = float(np.max(scales)) * (float(np.sum(b)) + instant_ohm)
    if one_sample_ohm * g_active > 1.0:
        raise ValueError(
            f"the active conductances ({g_active * 1e9:g} nS) are too large for a sampling "
            f"interval of {dt_s * 1e6:g} us in this cell: raise `sample_rate_hz` or lower them"
        )

    rows, n = v_cmd.shape
    out = np.empty((rows, n))
    x = np.zeros((rows, a.size))
    b_rows = scales[:, None] * b[None, :]
    inst_rows = scales * instant_ohm
    i_prev = np.zeros(rows)
    if sag is not None:
        m_rest = float(sag.m_inf(v_rest_V))
        i_h_rest = sag.g_max_S * m_rest * (v_rest_V - sag.e_rev_V)
        m = np.full(rows, m_rest)
        gate = math.exp(-dt_s / sag.tau_s)
    if rectifier is not None:
        e_rect = v_rest_V if rectifier.e_rev_V is None else rectifier.e_rev_V
        i_r_rest = float(rectifier.conductance_S(v_rest_V)) * (v_rest_V - e_rect)
    for k in range(n):
        dv = v_cmd[:, k] + x.sum(axis=1) + inst_rows * i_prev
        out[:, k] = dv
        v = v_rest_V + dv
        i_fb = np.zeros(rows)  # membrane currents as injected current (inward positive)
        if sag is not None:
            i_fb -= sag.g_max_S * m * (v - sag.e_rev_V) - i_h_rest
            m_inf = sag.m_inf(v)
            m = m_inf + (m - m_inf) * gate
        if rectifier is not None:
            i_fb -= rectifier.conductance_S(v) * (v - e_rect) - i_r_rest
        x = x * a + b_rows * i_fb[:, None]
        i_prev = i_fb
    return out


# --------------------------------------------------------------------------- recording


def _bessel(filter_hz: float, sample_rate_hz: float) -> tuple[np.ndarray, np.ndarray]:
    """An amplifier's analog 4-pole Bessel low-pass (−3 dB at `filter_hz`), digitised.

    The analog filter is mapped by the bilinear transform without pre-warping, which keeps
    its low-frequency group delay (0.336/fc) — the delay that shifts a recorded transient.
    """
    from scipy.signal import bessel, bilinear

    if not 0 < filter_hz < sample_rate_hz / 2:
        raise ValueError(
            f"`filter_hz` ({filter_hz} Hz) must be between 0 and half the "
            f"sampling rate ({sample_rate_hz / 2:g} Hz), or None for no filter"
        )
    b, a = bessel(4, 2 * np.pi * filter_hz, btype="low", norm="mag", analog=True)
    return bilinear(b, a, fs=sample_rate_hz)


def _apply_filter(ba: tuple[np.ndarray, np.ndarray] | None, x: np.ndarray) -> np.ndarray:
    from scipy.signal import lfilter, lfilter_zi

    if ba is None:
        return x
    b, a = ba
    y, _ = lfilter(b, a, x, zi=lfilter_zi(b, a) * x[0])
    return y


def _noise_gain(ba: tuple[np.ndarray, np.ndarray] | None) -> float:
    """sd of the filter's output for unit-sd white noise input."""
    from scipy.signal import lfilter

    if ba is None:
        return 1.0
    impulse = np.zeros(4096)
    impulse[0] = 1.0
    return float(np.sqrt(np.sum(lfilter(*ba, impulse) ** 2)))


def _electrode_lag(current: np.ndarray, dt_s: float, tau_s: float) -> np.ndarray:
    """Current seen through a first-order electrode lag (zero-order hold, exact)."""
    from scipy.signal import lfilter

    if tau_s <= 0:
        return current
    a = math.exp(-dt_s / tau_s)
    return lfilter([0.0, 1.0 - a], [1.0, -a], current)


def _events(
    rng: np.random.Generator,
    rate_per_s: float,
    n_samples: int,
    dt_s: float,
    amplitude_V: tuple[float, float] = (0.5e-3, 2e-3),
    rise_s: float = 1e-3,
    decay_s: float = 8e-3,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Spontaneous synaptic events: biexponential, peaks uniform in `amplitude_V` (V).

    Returns the summed trace (V), and the onset times (s) and peak amplitudes (V) of the
    events, sorted by time. The defaults (rise 1 ms, decay 8 ms, 0.5–2 mV) are the
    simulator's original events, drawn from `rng` in the same order.
    """
    from scipy.signal import oaconvolve

    trace = np.zeros(n_samples)
    if rate_per_s <= 0:
        return trace, np.zeros(0), np.zeros(0)
    count = rng.poisson(rate_per_s * n_samples * dt_s)
    where = rng.integers(0, n_samples, size=count)
    amps = rng.uniform(amplitude_V[0], amplitude_V[1], size=count)
    np.add.at(trace, where, amps)
    t = np.arange(max(int(0.08 / dt_s), int(10 * decay_s / dt_s))) * dt_s
    shape = np.exp(-t / decay_s) - np.exp(-t / rise_s)
    order = np.argsort(where, kind="stable")
    return oaconvolve(trace, shape / shape.max())[:n_samples], where[order] * dt_s, amps[order]


def _date_from_cell_id(cell_id: str) -> str:
    parts = cell_id.split("-")
    if len(parts) >= 4 and all(p.isdigit() for p in parts[1:4]):
        return "-".join(parts[1:4])
    return "2026-11-03"


def _protocol_truth(
    cell: BallStick, protocol: StepProtocol | PulseProtocol, dt_s: float, n_samples: int
) -> dict:
    """Protocol settings and the amplitudes they should produce, plain types."""
    out: dict = {
        "protocol": protocol.kind,
        "onset_ms": float(protocol.onset_s * 1e3),
        "duration_ms": float(protocol.duration_s * 1e3),
        "amplitudes_pA": [float(a * 1e12) for a in protocol.amplitudes_A],
    }
    if isinstance(protocol, PulseProtocol):
        d = float(_unit_command(protocol, n_samples, 1.0 / dt_s).sum() * dt_s)
        taus, gains = cell.modes(2)
        held = gains * taus * -np.expm1(-d / taus) * protocol.amplitude_A
        out["charge_pC"] = float(protocol.amplitude_A * d * 1e12)
        out[S.C0.key] = float(held[0] * 1e3)  # decay amplitudes, time zero at pulse end
        out[S.C1.key] = float(held[1] * 1e3)
        out["c1_over_c0_square"] = float(held[1] / held[0])
    return out


def _sweep_scales(n_sweeps: int, r_in_ohm: float, r_in_final_ohm: float | None) -> np.ndarray:
    """Per-sweep factor on the input resistance: linear from 1 to r_in_final/r_in."""
    if r_in_final_ohm is None:
        return np.ones(n_sweeps)
    if not (math.isfinite(r_in_final_ohm) and r_in_final_ohm > 0):
        raise ValueError(f"`r_in_final_ohm` must be finite and positive, got {r_in_final_ohm!r}")
    return np.linspace(1.0, r_in_final_ohm / r_in_ohm, n_sweeps)


def _sag_truth(dv_V: np.ndarray, amp_A: float, on: int, off: int, dt_s: float) -> dict:
    """Sag measures of one noiseless, spike-free deviation from rest (V), in display units.

    Peak: the extreme deflection during the step in the step's direction; steady: the
    mean over the step's last ms; rebound: the extreme overshoot beyond rest opposite to
    the step after it ends (0 and no time when there is none).
    """
    sign = 1.0 if amp_A > 0 else -1.0
    step = sign * dv_V[on:off]
    peak_i = int(np.argmax(step))
    steady = float(np.mean(step[-max(1, int(round(1e-3 / dt_s))):]))
    after = -sign * dv_V[off:]
    reb_i = int(np.argmax(after)) if after.size else 0
    rebound = float(after[reb_i]) if after.size and after[reb_i] > 0 else 0.0
    return {
        "peak_mV": sign * float(step[peak_i]) * 1e3,
        "peak_ms": peak_i * dt_s * 1e3,
        "steady_mV": sign * steady * 1e3,
        S.SAG_RATIO.key: steady / float(step[peak_i]) if step[peak_i] > 0 else None,
        S.REBOUND.key: -sign * rebound * 1e3,
        "rebound_ms": reb_i * dt_s * 1e3 if rebound > 0 else None,
    }


def simulate_recording(
    cell: BallStick,
    *,
    protocol: StepProtocol | PulseProtocol,
    sample_rate_hz: float = 20_000,
    sweep_duration_s: float = 1.0,
    n_sweeps: int = 20,
    v_rest_V: float = -0.070,
    noise_sd_V: float = 0.2e-3,
    filter_hz: float | None = 5_000,
    bridge_ohm: float = 0.0,
    electrode_tau_s: float = 50e-6,
    drift_V_per_s: float = 0.0,
    hum_V: float = 0.0,
    events_per_s: float = 0.0,
    seed: int = 0,
    cell_id: str = "LOL-2026-11-03-c1",
    metadata: dict | None = None,
    event_amplitude_V: tuple[float, float] = (0.5e-3, 2e-3),
    event_rise_s: float = 1e-3,
    event_decay_s: float = 8e-3,
    sag: SagConductance | None = None,
    rectifier: RectifyingLeak | None = None,
    spiking: Spiking | None = None,
    r_in_final_ohm: float | None = None,
) -> tuple[Recording, dict]:
    """A simulated current-clamp recording of `cell` and its ground truth.

    Parameters
    ----------
    cell : BallStick
    protocol : StepProtocol or PulseProtocol
    sample_rate_hz : float
        Sampling rate, in Hz.
    sweep_duration_s : float
        Sweep length, in s.
    n_sweeps : int
    v_rest_V : float
        Resting potential, in V.
    noise_sd_V : float
        Standard deviation of the recorded (after filtering) white noise, in V.
    filter_hz : float or None
        -3 dB corner of a 4-pole Bessel low-pass applied to the voltage, in Hz; None
        for no filter.
    bridge_ohm : float
        Residual bridge imbalance: adds I*R through the electrode lag, in Ohm.
    electrode_tau_s : float
        Electrode time constant of that artefact, in s.
    drift_V_per_s : float
        Linear drift within each sweep, in V/s.
    hum_V : float
        Peak amplitude of 50 Hz hum (random phase per sweep), in V.
    events_per_s : float
        Mean rate of spontaneous synaptic events (Poisson, anywhere in the sweep), in 1/s.
    seed : int
        Seed of the random generator: equal seeds give equal recordings.
    cell_id : str
    metadata : dict, optional
        Extra metadata; overrides the defaults.
    event_amplitude_V : (float, float)
        Range of the events' peak amplitudes (uniform), in V; negative for IPSP-like
        events.
    event_rise_s, event_decay_s : float
        Rise and decay time constants of the biexponential events, in s.
    sag : SagConductance, optional
        An Ih-like somatic conductance (sag during hyperpolarizing steps, rebound after).
    rectifier : RectifyingLeak, optional
        An instantaneous inwardly rectifying somatic leak.
    spiking : Spiking, optional
        Action potentials wherever the membrane potential crosses the threshold.
    r_in_final_ohm : float, optional
        Input resistance of the last sweep, in Ohm: the passive cell's R_in changes
        linearly over the sweeps from the cell's own to this (all its conductances and
        capacitances scaled together, so tau0, L and rho stay fixed).

    Returns
    -------
    recording : Recording
        format "simulated"; each sweep carries its ideal command current.
    truth : dict
        Plain floats (units in the keys): cell properties (tau0_ms, tau1_ms, tau2_ms,
        tau3_ms, L, rho, r_in_MOhm, c_total_pF, c_tau_pF, b1_over_b0, c1_over_c0,
        b0_over_vinf, L_cyl_naive), recording settings (v_rest_mV, bridge_MOhm,
        noise_sd_mV, ...) and protocol values. With events, the per-sweep lists
        event_times_ms (onsets, before the filter) and event_amplitudes_mV. With the
        options above also: their parameters (ih_*, rect_*, spike_*); r_in_rest_MOhm
        (small-signal steady input resistance at rest with the active conductances);
        per-sweep lists sweep_r_in_MOhm (passive R_in), spike_times_ms and, for steps
        with sag or rectifier, sweep_peak_mV, sweep_peak_ms (from the step onset),
        sweep_steady_mV (mean of the step's last ms), sweep_sag_ratio (steady/peak),
        sweep_rebound_mV and sweep_rebound_ms (from the step end), all from the
        noiseless, unfiltered membrane potential (None for sweeps that fire).
    """
    if n_sweeps < 1:
        raise ValueError(f"`n_sweeps` must be >= 1, got {n_sweeps}")
    if protocol.onset_s < 0 or protocol.onset_s + protocol.duration_s > sweep_duration_s:
        raise ValueError(
            f"the {protocol.kind} ({protocol.onset_s:g} s + {protocol.duration_s:g} s) does not "
            f"fit in a sweep of {sweep_duration_s:g} s: lengthen `sweep_duration_s`"
        )
    for name, value in (("event_rise_s", event_rise_s), ("event_decay_s", event_decay_s)):
        if not (math.isfinite(value) and value > 0):
            raise ValueError(f"`{name}` must be a finite positive number, got {value!r}")
    if not event_decay_s > event_rise_s:
        raise ValueError("`event_decay_s` must be longer than `event_rise_s`")
    n = int(round(sweep_duration_s * sample_rate_hz))
    dt = 1.0 / sample_rate_hz
    t = np.arange(n) * dt
    unit = _unit_command(protocol, n, sample_rate_hz)
    if not unit.any():
        raise ValueError(f"the {protocol.kind} is shorter than one sample at {sample_rate_hz:g} Hz")
    unit_response = cell.soma_response(unit, dt) + bridge_ohm * _electrode_lag(
        unit, dt, electrode_tau_s
    )
    ba = None if filter_hz is None else _bessel(filter_hz, sample_rate_hz)
    white_sd = noise_sd_V / _noise_gain(ba)
    rng = np.random.default_rng(seed)

    # Membrane potentials (deviation from rest) of the extended cell, one per sweep.
    scales = _sweep_scales(n_sweeps, cell.r_in_ohm, r_in_final_ohm)
    amps = np.array([protocol.amplitude_of(k) for k in range(n_sweeps)])
    extended = sag is not None or rectifier is not None or spiking is not None
    extended = extended or r_in_final_ohm is not None
    membrane = None
    if extended:
        keys = sorted(set(zip(amps.tolist(), scales.tolist(), strict=True)))
        if sag is not None or rectifier is not None:
            rows = _active_responses(
                cell, unit, np.array([k[0] for k in keys]), np.array([k[1] for k in keys]),
                dt, v_rest_V, sag, rectifier,
            )
        else:
            passive = cell.soma_response(unit, dt)
            rows = np.array([a * s * passive for a, s in keys])
        row_of = {key: i for i, key in enumerate(keys)}
        membrane = [rows[row_of[key]] for key in zip(amps.tolist(), scales.tolist(), strict=True)]
        bridge_v = bridge_ohm * _electrode_lag(unit, dt, electrode_tau_s)
    spike_times: list[list[float]] = []
    sag_truth: list[dict] = []

    sweeps = []
    event_times, event_amps = [], []
    for k in range(n_sweeps):
        amp = protocol.amplitude_of(k)
        if membrane is None:
            cell_v = amp * unit_response
        else:
            if (sag is not None or rectifier is not None) and protocol.kind == "step":
                on, off = np.flatnonzero(unit)[[0, -1]]
                sag_truth.append(_sag_truth(membrane[k], amp, int(on), int(off) + 1, dt))
            if spiking is not None:
                fired, times = spiking.paste(v_rest_V + membrane[k], dt)
                if times.size and sag_truth:
                    sag_truth[-1] = dict.fromkeys(sag_truth[-1])
                membrane[k] = fired - v_rest_V
                spike_times.append([float(x * 1e3) for x in times])
            cell_v = membrane[k] + amp * bridge_v
        signal = cell_v + drift_V_per_s * t
        if hum_V:
            signal = signal + hum_V * np.sin(2 * np.pi * 50.0 * t + rng.uniform(0, 2 * np.pi))
        events, times, sizes = _events(
            rng, events_per_s, n, dt, event_amplitude_V, event_rise_s, event_decay_s
        )
        event_times.append([float(x * 1e3) for x in times])
        event_amps.append([float(x * 1e3) for x in sizes])
        signal = signal + events
        noise = _apply_filter(ba, rng.normal(0.0, white_sd, n)) if noise_sd_V > 0 else 0.0
        voltage = v_rest_V + _apply_filter(ba, signal) + noise
        sweeps.append(Sweep(k, voltage, amp * unit))

    digest = hashlib.sha256(b"".join(s.voltage.tobytes() for s in sweeps)).hexdigest()
    meta = {
        "cell_id": cell_id,
        "date": _date_from_cell_id(cell_id),
        "temperature_C": 32.0,
        "lab": LAB_NAME,
        "simulated": True,
        "protocol": protocol.describe(),
        "filter_hz": None if filter_hz is None else float(filter_hz),
    }
    meta.update(metadata or {})
    recording = Recording(
        sweeps,
        float(sample_rate_hz),
        path=f"<simulated {cell_id}>",
        sha256=digest,
        format="simulated",
        metadata=meta,
    )

    truth = cell.summary()
    truth.update(
        {
            "cell_id": cell_id,
            S.V_REST.key: float(v_rest_V * 1e3),
            S.BRIDGE.key: float(bridge_ohm * 1e-6),
            "electrode_tau_ms": float(electrode_tau_s * 1e3),
            "noise_sd_mV": float(noise_sd_V * 1e3),
            "filter_hz": None if filter_hz is None else float(filter_hz),
            "drift_mV_per_s": float(drift_V_per_s * 1e3),
            "hum_mV": float(hum_V * 1e3),
            "events_per_s": float(events_per_s),
            "sample_rate_hz": float(sample_rate_hz),
            "sweep_duration_ms": float(sweep_duration_s * 1e3),
            "n_sweeps": int(n_sweeps),
            "seed": int(seed),
        }
    )
    truth.update(_protocol_truth(cell, protocol, dt, n))
    if events_per_s > 0:
        truth["event_times_ms"] = event_times
        truth["event_amplitudes_mV"] = event_amps
    if extended:
        truth.update(_extension_truth(cell, scales, v_rest_V, sag, rectifier, spiking))
        if spiking is not None:
            truth["spike_times_ms"] = spike_times
        for key in sag_truth[0] if sag_truth else ():
            truth[f"sweep_{key}"] = [row[key] for row in sag_truth]
    return recording, truth


def _extension_truth(
    cell: BallStick,
    scales: np.ndarray,
    v_rest_V: float,
    sag: SagConductance | None,
    rectifier: RectifyingLeak | None,
    spiking: Spiking | None,
) -> dict:
    """Parameters of the opt-in extensions and the resting input resistance, display units."""
    out: dict = {"sweep_r_in_MOhm": [float(cell.r_in_ohm * s * 1e-6) for s in scales]}
    g_rest = 0.0
    if sag is not None:
        out.update(sag.summary())
        g_rest += sag.steady_slope_S(v_rest_V)
    if rectifier is not None:
        out.update(rectifier.summary(v_rest_V))
        g_rest += rectifier.slope_S(v_rest_V, v_rest_V)
    if spiking is not None:
        out.update(spiking.summary())
    out["r_in_rest_MOhm"] = float(1e-6 / (1.0 / cell.r_in_ohm + g_rest))
    return out


def truth_to_json(truth: dict) -> str:
    """The truth dict as JSON text (sorted keys, 2-space indent, non-finite as null)."""

    def plain(v):
        if isinstance(v, float | np.floating) and not math.isfinite(v):
            return None
        if isinstance(v, np.generic):
            return v.item()
        if isinstance(v, list | tuple):
            return [plain(x) for x in v]
        return v

    return json.dumps({k: plain(v) for k, v in truth.items()}, sort_keys=True, indent=2)
