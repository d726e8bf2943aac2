"""What real cells add to the passive one: an Ih-like sag conductance, an inwardly
rectifying leak and action potentials, fed back as somatic currents into the exact passive
response (passivefit.simulate.recording)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from passivefit.simulate.cell import _RELAXED, BallStick

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

    Row r is driven by amplitudes_A[r] * unit_A, or by amplitudes_A[r] * unit_A[r] when
    `unit_A` is 2-D (one command per row, e.g. sweeps of several epochs). The passive cable
    is the exact modal
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
    unit_A = np.asarray(unit_A, dtype=float)
    unit_v = np.zeros_like(unit_A)
    for ak, bk in zip(a, b, strict=True):
        unit_v += lfilter([0.0, bk], [1.0, -ak], unit_A, axis=-1)
    unit_v[..., 1:] += instant_ohm * unit_A[..., :-1]
    scales = np.asarray(scales, dtype=float)
    v_cmd = (scales * amplitudes_A)[:, None] * np.atleast_2d(unit_v)
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

