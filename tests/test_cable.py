"""Cable-theory relations (passivefit.core.cable) against docs/references.md and an
independent compartmental model."""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from passivefit.core import cable
from passivefit.core.cable import CableFitError
from passivefit.simulate import BallStick, compartmental_modes


def assert_printed(value: float, printed: str) -> None:
    """`value` rounds to the printed table entry (within half a unit of its last digit)."""
    decimals = len(printed.split(".")[1]) if "." in printed else 0
    assert abs(value - float(printed)) <= 0.5 * 10.0**-decimals + 1e-12, (value, printed)


# docs/references.md §5.1 cylinder table [der]
CYLINDER_TABLE = [
    # L, tau0/tau1, tau0/tau2, B0/Vinf = tanh L/L, step B1/B0, coth L
    ("0.5", "40.478", "158.91", "0.92423", "0.04941", "2.16395"),
    ("1.0", "10.8696", "40.478", "0.76159", "0.18400", "1.31304"),
    ("1.5", "5.3865", "18.546", "0.60343", "0.37130", "1.10479"),
    ("2.0", "3.4674", "10.870", "0.48201", "0.57680", "1.03731"),
]

# docs/references.md §5.2 ball-and-stick table [der]
BALLSTICK_TABLE = [
    # L, rho, alpha1*L, tau0/tau1, naive pi/alpha1, pulse C1/C0, step B1/B0, B0/Vinf
    ("1", "1", "2.1244", "5.5131", "1.4788", "0.8045", "0.1459", "0.8647"),
    ("1", "2", "2.4009", "6.7645", "1.3085", "1.2458", "0.1842", "0.8273"),
    ("1", "5", "2.7455", "8.5378", "1.1443", "1.7365", "0.2034", "0.7931"),
    ("1", "10", "2.9226", "9.5415", "1.0749", "1.9120", "0.2004", "0.7785"),
    ("1.5", "2", "2.4961", "3.7691", "1.8879", "1.3930", "0.3696", "0.6953"),
    ("0.5", "5", "2.6814", "29.7602", "0.5858", "1.6565", "0.0557", "0.9361"),
]

WORKED = dict(
    rm_ohm_cm2=20e3, cm_F_cm2=1e-6, ri_ohm_cm=100.0, soma_diameter_m=0.0, dend_diameter_m=2e-6
)


@pytest.mark.parametrize("row", CYLINDER_TABLE, ids=lambda r: f"L={r[0]}")
def test_cylinder_table(row):
    # docs/references.md §5.1 cylinder table [der]
    L = float(row[0])
    ratios = cable.ballstick_tau_ratios(L, math.inf, 2)
    assert_printed(ratios[0], row[1])
    assert_printed(ratios[1], row[2])
    assert_printed(cable.b0_over_vinf(L, math.inf), row[3])
    assert_printed(cable.step_ratio(L, math.inf), row[4])
    # coth L = R_N/R_inf of a bare cylinder built from morphology (docs/references.md §2 [der])
    cell = BallStick.from_morphology(**WORKED, dend_length_m=L * 1e-3)
    assert_printed(cell.r_in_ohm * cell.g_inf_S, row[5])
    # and L comes back from the table's own tau0/tau1 (docs/references.md §2, Rall 1969 [pub])
    assert_allclose(cable.cylinder_L(1.0, 1.0 / float(row[1])), L, rtol=5e-5)
    assert_allclose(cable.cylinder_L(1.0, 1.0 / float(row[2]), n=2), L, rtol=5e-5)


@pytest.mark.parametrize("row", BALLSTICK_TABLE, ids=lambda r: f"L={r[0]}-rho={r[1]}")
def test_ballstick_table(row):
    # docs/references.md §5.2 ball-and-stick table [der]
    L, rho = float(row[0]), float(row[1])
    alpha1 = cable.ballstick_alphas(L, rho, 1)[0]
    assert_printed(alpha1 * L, row[2])
    assert_printed(cable.ballstick_tau_ratios(L, rho, 1)[0], row[3])
    assert_printed(math.pi / alpha1, row[4])
    assert_printed(cable.pulse_ratio(L, rho), row[5])
    assert_printed(cable.step_ratio(L, rho), row[6])
    assert_printed(cable.b0_over_vinf(L, rho), row[7])
    # last column also = (tau0/R_N)/C_total (docs/references.md §4 [der])
    cell = BallStick.from_electrotonic(0.02, L, rho, 150e6)
    assert_printed(cell.c_tau_F / cell.c_total_F, row[7])


@pytest.mark.parametrize("L", [0.3, 1.0, 2.5])
def test_cylinder_sum_identity(L):
    # docs/references.md §2: 1 + 2*sum 1/(1 + (n pi/L)^2) = L coth L [der]
    n = 20000
    terms = 1.0 / cable.ballstick_tau_ratios(L, math.inf, n)
    tail = 2.0 * L**2 / (math.pi**2 * (n + 0.5))  # sum over n' > n of 2 L^2/(n' pi)^2
    assert_allclose(1.0 + 2.0 * terms.sum() + tail, L / math.tanh(L), rtol=1e-9)


@pytest.mark.parametrize(("L", "rho"), [(0.5, 1.0), (1.0, 5.0), (2.0, 0.5), (1.0, math.inf)])
def test_step_amplitudes_sum_to_steady_state(L, rho):
    # V_inf = sum_n B_n at t = 0: docs/references.md §2/§3 charging curve
    # V = V_inf - sum B_n exp(-t/tau_n) [der]
    n = 20000
    total = cable.b0_over_vinf(L, rho) * (1.0 + cable.step_ratios(L, rho, n).sum())
    # each neglected term B_m/V_inf is in (0, 2/alpha_m^2) with alpha_m >= (m - 1/2) pi/L,
    # so together they are below 2 L^2/(pi^2 (n - 1/2))
    assert 0.0 <= 1.0 - total <= 2.0 * L**2 / (math.pi**2 * (n - 0.5)) + 1e-12


def test_worked_numbers():
    # docs/references.md §5.4 worked numbers [der]: Rm 20 kOhm cm2, Ri 100 Ohm cm, d 2 um
    long_cell = BallStick.from_morphology(**WORKED, dend_length_m=1e-3)
    lam_m = 1e-3 / long_cell.L
    assert_allclose(lam_m * 1e3, 1.000, atol=5e-4)
    assert_allclose(1e-6 / long_cell.g_inf_S, 318.31, atol=0.005)
    assert_allclose(long_cell.r_in_ohm * 1e-6, 417.95, atol=0.005)
    short_cell = BallStick.from_morphology(**WORKED, dend_length_m=0.5e-3)
    assert_allclose(short_cell.r_in_ohm * 1e-6, 688.81, atol=0.005)
    # tau0 = 20 ms, tau1 = 2 ms -> L = pi/3 = 1.0472 (docs/references.md §5.4 [der])
    assert_allclose(cable.cylinder_L(20e-3, 2e-3), math.pi / 3, rtol=1e-12)
    assert_printed(cable.cylinder_L(20e-3, 2e-3), "1.0472")


def test_rho_limits():
    # docs/references.md §3: rho -> inf gives alpha_n L -> n pi; rho -> 0 gives (n - 1/2) pi [der]
    n = np.arange(1, 6)
    for L in (0.5, 1.0, 2.0):
        assert_allclose(cable.ballstick_alphas(L, 1e9, 5) * L, n * math.pi, rtol=1e-8)
        assert_allclose(cable.ballstick_alphas(L, 1e-9, 5) * L, (n - 0.5) * math.pi, rtol=1e-8)
        # cylinder limits of the amplitude ratios: C_n/C_0 = 2, B_n/B_0 = 2 tau_n/tau0
        # (docs/references.md §2)
        assert_allclose(cable.pulse_ratios(L, 1e9, 5), 2.0, rtol=1e-6)
        assert_allclose(
            cable.step_ratios(L, math.inf, 5),
            2.0 / cable.ballstick_tau_ratios(L, math.inf, 5),
            rtol=1e-12,
        )
        assert_allclose(cable.b0_over_vinf(L, 1e9), math.tanh(L) / L, rtol=1e-8)
        # isopotential limit: all of the response in the tau0 term
        assert_allclose(cable.b0_over_vinf(L, 1e-9), 1.0, rtol=1e-8)


def test_tau2_ratio_range():
    # docs/references.md §3: (tau0/tau2 - 1)/(tau0/tau1 - 1) in [4, 9] [der]
    qs = []
    for L in (0.2, 0.5, 1.0, 2.0, 3.0):
        for rho in (0.01, 0.3, 1.0, 5.0, 30.0, 1e4):
            r1, r2 = cable.ballstick_tau_ratios(L, rho, 2)
            q = (r2 - 1.0) / (r1 - 1.0)
            qs.append(q)
            assert 4.0 <= q <= 9.0
            assert not [
                check
                for check, _, _ in cable.implausible(tau0=1.0, tau1=1 / r1, tau2=1 / r2)
                if check == "tau2_ratio"
            ]
    assert min(qs) < 4.1 and max(qs) > 8.5  # the grid reaches both ends of the range


GRID = [(float(r[0]), float(r[1])) for r in BALLSTICK_TABLE] + [
    (0.2, 0.3),
    (0.4, 50.0),
    (0.8, 0.15),
    (2.0, 1.0),
    (2.8, 20.0),
    (3.0, 0.2),
]


@pytest.mark.parametrize(("L", "rho"), GRID)
def test_estimate_ballstick_round_trip(L, rho):
    # (L, rho) -> (tau0, tau1, ratio) -> (L, rho), docs/references.md §3 estimation [der]
    tau0 = 0.025
    tau1 = tau0 / cable.ballstick_tau_ratios(L, rho, 1)[0]
    for kind, ratio in (("pulse", cable.pulse_ratio(L, rho)), ("step", cable.step_ratio(L, rho))):
        assert_allclose(cable.estimate_ballstick(tau0, tau1, ratio, kind), (L, rho), rtol=1e-7)
    duration = 0.5e-3
    square = cable.pulse_ratio(L, rho) * cable.square_pulse_factor(tau0, tau1, duration)
    assert_allclose(
        cable.estimate_ballstick(tau0, tau1, square, "square", duration_s=duration),
        (L, rho),
        rtol=1e-7,
    )


def test_square_pulse_factor_against_compartmental_model():
    # Square-pulse factor (docs/references.md §2 [der]) vs decay amplitudes of an independent
    # compartmental model: C_n' = I g_n tau_n (1 - exp(-D/tau_n)) at the pulse end.
    cell = BallStick.from_electrotonic(0.02, 1.2, 3.0, 200e6)
    taus, gains = compartmental_modes(cell, 800)
    duration = 2e-3
    held = gains[:2] * taus[:2] * -np.expm1(-duration / taus[:2])
    brief = cable.pulse_ratio(cell.L, cell.rho)
    assert_allclose(
        held[1] / held[0], brief * cable.square_pulse_factor(taus[0], taus[1], duration), rtol=1e-5
    )


def test_cylinder_overestimates_L_and_c_tau_underestimates_capacitance():
    # docs/references.md §3 (naive pi/alpha1 overestimates L) and §4 (tau0/R_N < C_total) [der]
    for L, rho in GRID:
        cell = BallStick.from_electrotonic(0.02, L, rho, 100e6)
        tau0, tau1 = cell.taus(2)
        assert cable.cylinder_L(tau0, tau1) > L
        c_tau = cable.c_tau(tau0, cell.r_in_ohm)
        assert c_tau < cell.c_total_F
        assert_allclose(c_tau, cell.c_tau_F, rtol=1e-12)


def test_rho_and_capacitance_from_amplitudes():
    # docs/references.md §3 "independent rho from amplitudes" and §4 unbiased C_total [der],
    # with amplitudes taken from the independent compartmental model.
    cell = BallStick.from_electrotonic(0.03, 0.9, 4.0, 250e6)
    taus, gains = compartmental_modes(cell, 1000)
    i_step = -40e-12
    v_inf = i_step * float(np.sum(gains * taus))
    b0 = i_step * gains[0] * taus[0]
    assert_allclose(cable.rho_from_amplitudes_step(v_inf, b0, cell.L), 4.0, rtol=1e-5)
    assert_allclose(cable.c_total_step(i_step, taus[0], b0), cell.c_total_F, rtol=1e-6)
    q = 0.4e-12
    c0 = q * gains[0]
    r_n = float(np.sum(gains * taus))
    assert_allclose(cable.rho_from_amplitudes_pulse(q, r_n, c0, taus[0], cell.L), 4.0, rtol=1e-5)
    assert_allclose(cable.c_total_pulse(q, c0), cell.c_total_F, rtol=1e-6)
    with pytest.raises(CableFitError, match="no positive finite rho"):
        cable.rho_from_amplitudes_step(v_inf, 1.2 * v_inf, cell.L)
    with pytest.raises(CableFitError, match="same sign"):
        cable.c_total_step(i_step, taus[0], -b0)


def test_specific_membrane():
    # Cm = 1 uF/cm2 = 1e-2 F/m2, Rm = 20 kOhm cm2 = 2 Ohm m2 (the morphology we built)
    cell = BallStick.from_morphology(20e3, 1e-6, 100.0, 20e-6, 2e-6, 1e-3)
    area = math.pi * (20e-6) ** 2 + math.pi * 2e-6 * 1e-3
    cm, rm = cable.specific_membrane(cell.c_total_F, cell.tau0_s, area)
    assert_allclose((cm, rm), (1e-2, 2.0), rtol=1e-12)


def test_cylinder_L_ci_matches_section5_and_numeric_derivative():
    tau0, tau1, ci0, ci1 = 20e-3, 2e-3, 0.5e-3, 0.2e-3
    half = cable.cylinder_L_ci(tau0, ci0, tau1, ci1)
    h0, h1 = 1e-9, 1e-10
    d0 = (cable.cylinder_L(tau0 + h0, tau1) - cable.cylinder_L(tau0 - h0, tau1)) / (2 * h0)
    d1 = (cable.cylinder_L(tau0, tau1 + h1) - cable.cylinder_L(tau0, tau1 - h1)) / (2 * h1)
    assert_allclose(half, math.hypot(d0 * ci0, d1 * ci1), rtol=1e-6)
    # docs/references.md §6 [der]:
    # dL/L = 1/2 tau0/(tau0 - tau1) sqrt((dtau0/tau0)^2 + (dtau1/tau1)^2)
    rel = 0.5 * tau0 / (tau0 - tau1) * math.hypot(ci0 / tau0, ci1 / tau1)
    assert_allclose(half / cable.cylinder_L(tau0, tau1), rel, rtol=1e-12)


def test_estimate_ballstick_ci_matches_monte_carlo():
    # delta method vs a seeded parametric Monte Carlo with small, linear-regime errors
    L, rho, tau0 = 1.0, 2.0, 0.02
    tau1 = tau0 / cable.ballstick_tau_ratios(L, rho, 1)[0]
    ratio = cable.pulse_ratio(L, rho)
    sd = np.array([tau0, tau1, ratio]) * np.array([0.002, 0.004, 0.003])
    cov = np.diag(sd**2)
    L_ci, rho_ci = cable.estimate_ballstick_ci(tau0, tau1, ratio, cov, "pulse")
    rng = np.random.default_rng(1)
    draws = rng.multivariate_normal([tau0, tau1, ratio], cov, size=3000)
    est = np.array([cable.estimate_ballstick(*d, "pulse") for d in draws])
    mc = 1.959964 * est.std(axis=0)
    assert_allclose((L_ci, rho_ci), mc, rtol=0.06)


def test_errors_are_clear():
    with pytest.raises(CableFitError, match="tau1.*not shorter than `tau0`"):
        cable.cylinder_L(2e-3, 20e-3)
    with pytest.raises(CableFitError, match="`tau0` must be a finite positive"):
        cable.cylinder_L(float("nan"), 2e-3)
    with pytest.raises(CableFitError, match="`tau1` is missing"):
        cable.cylinder_L(20e-3, None)
    with pytest.raises(CableFitError, match="larger than a uniform ball-and-stick allows"):
        cable.estimate_ballstick(20e-3, 2e-3, 2.1, "pulse")
    # B1/B0 > 2 tau1/tau0 is the step form of the same limit (docs/references.md §3 [der])
    with pytest.raises(CableFitError, match=r"B1/B0.*somatic shunt"):
        cable.estimate_ballstick(20e-3, 2e-3, 0.21, "step")
    with pytest.raises(CableFitError, match="must be a finite positive"):
        cable.estimate_ballstick(20e-3, 2e-3, -0.5, "pulse")
    with pytest.raises(CableFitError, match="`duration_s` is needed"):
        cable.estimate_ballstick(20e-3, 2e-3, 1.0, "square")
    with pytest.raises(ValueError, match="`kind` must be"):
        cable.estimate_ballstick(20e-3, 2e-3, 1.0, "ramp")
    assert issubclass(CableFitError, ValueError)


def test_implausible():
    found = cable.implausible(
        tau0=20e-3, tau1=2e-3, tau2=1.5e-3, c1_over_c0=2.3, b1_over_b0=0.25, L=4.0, rho=0.05
    )
    assert [check for check, _, _ in found] == [
        "tau2_ratio", "shunt_pulse", "shunt_step", "L_range", "rho_range"]
    assert [value for _, value, _ in found] == pytest.approx(
        [(20 / 1.5 - 1) / (20 / 2 - 1), 2.3, 0.25, 4.0, 0.05])
    assert found[2][2] == {"limit": pytest.approx(0.2)}  # 2*tau1/tau0
    # a uniform ball-and-stick in the usual range raises none (docs/references.md §3 [der])
    cell = BallStick.from_electrotonic(0.02, 1.0, 5.0, 100e6)
    tau0, tau1, tau2 = cell.taus(3)
    assert (
        cable.implausible(
            tau0=tau0,
            tau1=tau1,
            tau2=tau2,
            c1_over_c0=cell.pulse_ratios(1)[0],
            b1_over_b0=cell.step_ratios(1)[0],
            L=cell.L,
            rho=cell.rho,
        )
        == []
    )
    # missing values are skipped, not flagged
    assert cable.implausible(tau0=20e-3, tau1=None, L=None) == []


def test_ballstick_roots_match_a_bracketing_solver():
    """The vectorised Newton-bisection roots equal scipy's brentq (xtol 1e-15) to round-off."""
    from scipy.optimize import brentq

    from passivefit.core.cable import ballstick_alphas

    rng = np.random.default_rng(5)
    for _ in range(200):
        L, rho = 10 ** rng.uniform(-1.5, 0.7), 10 ** rng.uniform(-1, 2.5)
        k = math.tanh(L) / rho / L
        ref = [brentq(lambda x, k=k: math.sin(x) + k * x * math.cos(x), (i - 0.5) * math.pi,
                      i * math.pi, xtol=1e-15) / L for i in range(1, 31)]
        np.testing.assert_allclose(ballstick_alphas(L, rho, 30), ref, rtol=1e-14)
    np.testing.assert_allclose(ballstick_alphas(1.0, np.inf, 3), np.pi * np.arange(1, 4))
