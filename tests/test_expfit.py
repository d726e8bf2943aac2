"""Tests of the variable-projection exponential fitter (passivefit.core.expfit)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.optimize import brentq

from passivefit.core.expfit import (
    ExpFit,
    Segment,
    crlb_taus,
    decimate_tail,
    fit_auto,
    fit_exponentials,
    fit_start_scan,
)

FS = 20_000.0
DT = 1.0 / FS


def transient(t, offset, amps, taus):
    """offset + sum a_i exp(-t/tau_i)."""
    return offset + np.exp(-np.asarray(t)[:, None] / np.asarray(taus)) @ np.asarray(amps)


def step_pair(taus, amps, rng=None, sigma=0.0, start=0.5e-3, on_s=0.5, off_s=0.4):
    """Onset (charging, negative amplitudes) and offset (decay) segments of one sweep."""
    t_on = np.arange(start, on_s, DT)
    t_off = np.arange(start, off_s, DT)
    y_on = transient(t_on, -0.065, -np.asarray(amps), taus)
    y_off = transient(t_off, -0.070, amps, taus)
    if rng is not None:
        y_on = y_on + rng.normal(0.0, sigma, t_on.size)
        y_off = y_off + rng.normal(0.0, sigma, t_off.size)
    return (t_on, y_on), (t_off, y_off)


# ----------------------------------------------------------- exact recovery


@pytest.mark.parametrize(
    ("taus", "amps"),
    [
        ([0.030], [5e-3]),
        ([0.020, 0.0015], [4e-3, 0.8e-3]),
        ([0.030, 0.004, 0.0006], [4e-3, 1.5e-3, 1e-3]),
    ],
)
def test_exact_recovery_single_segment(taus, amps):
    t = np.arange(0.2e-3, 0.3, DT)
    y = transient(t, -0.065, amps, taus)
    fit = fit_exponentials([Segment(t, y)], len(taus))
    assert fit.success, fit.message
    assert_allclose(fit.taus, taus, rtol=1e-6)
    assert_allclose(fit.amplitudes[0], amps, rtol=1e-6)
    assert_allclose(fit.offsets, [-0.065], rtol=1e-9)
    assert_allclose(fit.evaluate(0, t), y, atol=1e-12)


@pytest.mark.parametrize("fixed", [False, True])
def test_exact_recovery_joint_onset_offset(fixed):
    taus, amps = [0.020, 0.0015], [4e-3, 0.8e-3]
    (t_on, y_on), (t_off, y_off) = step_pair(taus, amps)
    segs = [
        Segment(t_on, y_on, offset=-0.065 if fixed else None),
        Segment(t_off, y_off, offset=-0.070 if fixed else None),
    ]
    fit = fit_exponentials(segs, 2)
    assert fit.success, fit.message
    assert_allclose(fit.taus, taus, rtol=1e-6)
    assert_allclose(fit.amplitudes, [[-4e-3, -0.8e-3], [4e-3, 0.8e-3]], rtol=1e-6)
    assert_allclose(fit.offsets, [-0.065, -0.070], rtol=1e-9)
    # a fixed offset is not a parameter: 2 taus + 2x2 amplitudes (+ 2 offsets when free)
    assert fit.n_params == (6 if fixed else 8)
    assert fit.n_points == t_on.size + t_off.size


def test_exact_recovery_from_bad_start():
    t = np.arange(0.5e-3, 0.4, DT)
    y = transient(t, -0.06, [3e-3, 1e-3], [0.025, 0.002])
    fit = fit_exponentials([Segment(t, y)], 2, tau_init=[1e-4, 8e-5])
    assert_allclose(fit.taus, [0.025, 0.002], rtol=1e-6)


def test_ordering_and_dict_are_plain():
    t = np.arange(0.5e-3, 0.3, DT)
    y = transient(t, 0.0, [1e-3, 3e-3], [0.002, 0.02])
    fit = fit_exponentials([Segment(t, y)], 2, tau_init=[0.001, 0.03])
    assert fit.taus[0] > fit.taus[1]
    assert_allclose(fit.amplitudes[0], [3e-3, 1e-3], rtol=1e-6)
    d = fit.to_dict()
    assert json.loads(json.dumps(d)) == d
    assert d["taus_s"] == fit.taus.tolist()


# ------------------------------------------------------------------ noise


def test_one_exponential_ci_coverage_and_se():
    rng = np.random.default_rng(20261103)
    tau, amp, sigma = 0.030, 5e-3, 2e-4
    t = np.arange(0.0, 0.15, 1e-4)
    truth = transient(t, -0.065, [amp], [tau])
    est, se, covered = [], [], 0
    for _ in range(200):
        fit = fit_exponentials([Segment(t, truth + rng.normal(0, sigma, t.size))], 1)
        est.append(fit.taus[0])
        se.append(fit.tau_se[0])
        covered += abs(fit.taus[0] - tau) <= fit.tau_ci95[0]
    est = np.array(est)
    # coverage of the nominal 95 % CI: loose binomial bounds for 200 trials
    assert 0.88 <= covered / 200 <= 0.99
    assert abs(est.mean() - tau) < 3 * est.std() / np.sqrt(est.size)
    assert np.median(se) == pytest.approx(est.std(ddof=1), rel=0.15)
    # the least-squares sd reaches the Cramer-Rao bound of the same design
    bound = crlb_taus(t, sigma, [tau], [amp])[0]
    assert np.median(se) == pytest.approx(bound, rel=0.05)


def test_two_exponential_joint_fit_is_unbiased():
    rng = np.random.default_rng(7)
    taus, amps, sigma = [0.020, 0.0015], [4e-3, 0.8e-3], 2e-4
    est = []
    for _ in range(40):
        (t_on, y_on), (t_off, y_off) = step_pair(taus, amps, rng, sigma)
        segs = [
            Segment(*decimate_tail(t_on, y_on, 5e-3)),
            Segment(*decimate_tail(t_off, y_off, 5e-3)),
        ]
        est.append(fit_exponentials(segs, 2).taus)
    est = np.array(est)
    sem = est.std(axis=0, ddof=1) / np.sqrt(len(est))
    assert np.all(np.abs(est.mean(axis=0) - taus) < 3.5 * sem)
    assert np.all(np.abs(est.mean(axis=0) - taus) / taus < [0.01, 0.05])


def test_decimated_fit_matches_full_resolution():
    rng = np.random.default_rng(11)
    (t_on, y_on), (t_off, y_off) = step_pair([0.020, 0.0015], [4e-3, 0.8e-3], rng, 2e-4)
    full = fit_exponentials([Segment(t_on, y_on), Segment(t_off, y_off)], 2)
    dec_segs = [
        Segment(*decimate_tail(t_on, y_on, 5e-3, 1.05)),
        Segment(*decimate_tail(t_off, y_off, 5e-3, 1.05)),
    ]
    dec = fit_exponentials(dec_segs, 2)
    assert dec.n_points < full.n_points / 20
    assert np.all(np.abs(dec.taus - full.taus) < 0.05 * full.tau_ci95)
    # the noise sd is estimated from ~400 bins instead of ~18,000 samples:
    # its relative sd is ~sqrt(1/(2*400)) ~ 3.5 %, so CIs agree to ~10 %
    assert_allclose(dec.tau_ci95, full.tau_ci95, rtol=0.15)
    assert dec.rmse == pytest.approx(full.rmse, rel=0.15)


def test_decimate_tail_weights_count_samples():
    t = np.arange(0.0, 0.2, DT)
    y = np.sin(t * 50)
    td, yd, wd = decimate_tail(t, y, 0.01, 1.1)
    assert wd.sum() == t.size
    assert np.all(wd[td <= 0.01] == 1)
    assert np.all(np.diff(td) > 0)
    assert wd @ yd == pytest.approx(y.sum(), rel=1e-12)
    with pytest.raises(ValueError, match="bin_factor"):
        decimate_tail(t, y, 0.01, 1.0)


# ------------------------------------------------------------------ CRLB


@pytest.mark.parametrize(
    ("n_tau", "expected_percent"),
    [(1, 7.2), (2, 2.0), (3, 1.1), (5, 0.71), (10, 0.53)],
)
def test_crlb_offset_unknown_matches_reference(n_tau, expected_percent):
    # docs/references.md §6 precision, offset unknown vs record length [der]
    tau, dt = 0.030, 0.05e-3
    t = np.arange(0.0, n_tau * tau, dt)
    sd = crlb_taus(t, 0.04, [tau], [1.0], offset_known=False)[0]
    assert 100 * sd / tau == pytest.approx(expected_percent, rel=0.05)


def test_crlb_offset_known_long_record_matches_formula():
    # docs/references.md §6: sd(tau)/tau ~ (sigma/A) sqrt(8 dt / tau), offset known,
    # record >> tau [der]
    tau, dt, sigma, amp = 0.030, 0.05e-3, 0.04, 1.0
    t = np.arange(0.0, 20 * tau, dt)
    sd = crlb_taus(t, sigma, [tau], [amp], offset_known=True)[0]
    assert sd / tau == pytest.approx(sigma / amp * np.sqrt(8 * dt / tau), rel=0.02)


def test_crlb_shape_check():
    with pytest.raises(ValueError, match="amplitudes"):
        crlb_taus(np.arange(10.0), 0.1, [1.0, 0.1], [1.0])


# ------------------------------------------------------------- model choice


def test_fit_auto_picks_one_for_single_exponential():
    rng = np.random.default_rng(3)
    t = np.arange(0.5e-3, 0.2, DT)
    y = transient(t, -0.065, [-5e-3], [0.025]) + rng.normal(0, 2e-4, t.size)
    fit, rec = fit_auto([Segment(*decimate_tail(t, y, 5e-3))], max_components=3)
    assert rec["chosen"] == 1 and fit.taus.size == 1
    assert rec["reason"].startswith("1 chosen; 2 rejected")
    assert set(rec["per_n"]) == {1, 2, 3}
    assert {"bic", "rss", "problems"} <= set(rec["per_n"][2])


def test_fit_auto_picks_two_for_clear_double_exponential():
    rng = np.random.default_rng(4)
    (t_on, y_on), (t_off, y_off) = step_pair([0.020, 0.002], [4e-3, 1.5e-3], rng, 1e-4)
    segs = [Segment(*decimate_tail(t_on, y_on, 5e-3)), Segment(*decimate_tail(t_off, y_off, 5e-3))]
    fit, rec = fit_auto(segs, max_components=3)
    assert rec["chosen"] == 2, rec["reason"]
    assert rec["per_n"][2]["bic"] < rec["per_n"][1]["bic"]
    assert "3 rejected" in rec["reason"]
    assert_allclose(fit.taus, [0.020, 0.002], rtol=0.1)


# ------------------------------------------------------ ball-and-stick scan


def ball_and_stick_step(L, rho, tau0, t, n_modes=300):
    """Somatic step response (V per V_inf scale) from docs/references.md §3 formulas [der]."""
    rho_inf = rho / np.tanh(L)
    alpha = np.array(
        [0.0]
        + [
            brentq(
                lambda x: np.tan(x) + x * np.tanh(L) / (rho * L),
                (n - 0.5) * np.pi + 1e-12,
                n * np.pi - 1e-12,
            )
            / L
            for n in range(1, n_modes)
        ]
    )
    c_ratio = 2 * rho_inf * (L * rho_inf + 1) / (L * rho_inf**2 + rho_inf + L * alpha**2)
    c_ratio[0] = 1.0
    b = c_ratio / (1 + alpha**2)
    taus = tau0 / (1 + alpha**2)
    return -(np.exp(-t[:, None] / taus) @ b), taus, b


def test_ball_and_stick_late_start_recovers_table_and_early_start_biases_tau1():
    t = np.arange(0.0, 0.2, 1e-5)
    y, taus, b = ball_and_stick_step(1.0, 5.0, 0.020, t)
    # docs/references.md §5.2 ball-and-stick table, L = 1, rho = 5:
    # tau0/tau1 = 8.5378, step B1/B0 = 0.2034 [der]
    assert taus[0] / taus[1] == pytest.approx(8.5378, rel=1e-4)
    scan = fit_start_scan([Segment(t, y)], [0.5e-3, 2e-3, 4e-3, 8e-3], 2)
    late = fit_exponentials([Segment(t[t >= 8e-3], y[t >= 8e-3])], 2)
    assert late.taus[0] / late.taus[1] == pytest.approx(8.5378, rel=1e-3)
    assert late.amplitudes[0, 1] / late.amplitudes[0, 0] == pytest.approx(0.2034, rel=2e-3)
    # docs/references.md §6: an early 2-exp start absorbs tau2.. into tau1 and biases it low [der]
    bias = scan["tau1"] / taus[1] - 1
    assert np.all(bias < 0) and np.all(np.diff(bias) > 0)
    assert bias[0] < -0.03 and abs(bias[-1]) < 1e-3
    three = fit_start_scan([Segment(t, y)], [0.5e-3], 3)
    assert abs(three["tau1"][0] / taus[1] - 1) < abs(bias[0]) / 3
    assert set(scan) == {"start_s", "tau0", "tau0_ci", "tau1", "tau1_ci", "rmse", "success"}


def test_start_scan_too_late_gives_nan():
    t = np.arange(0.0, 0.05, DT)
    y = transient(t, 0.0, [1e-3], [0.01])
    out = fit_start_scan([Segment(t, y)], [0.0, 0.0499], 1)
    assert np.isfinite(out["tau0"][0]) and np.isnan(out["tau0"][1])
    assert list(out["success"]) == [True, False]


# -------------------------------------------------------------- bad input


def test_bad_input_errors():
    t = np.arange(0.0, 0.01, DT)
    y = np.exp(-t / 0.003)
    with pytest.raises(ValueError, match="too few"):
        fit_exponentials([Segment(t[:4], y[:4])], 2)
    with pytest.raises(ValueError, match="all-NaN"):
        fit_exponentials([Segment(t, np.full_like(t, np.nan))], 1)
    with pytest.raises(ValueError, match="NaN or infinite"):
        fit_exponentials([Segment(t, np.where(t > 0.005, np.nan, y))], 1)
    with pytest.raises(ValueError, match="strictly increasing"):
        fit_exponentials([Segment(t[::-1], y)], 1)
    with pytest.raises(ValueError, match="equal lengths"):
        fit_exponentials([Segment(t, y[:-1])], 1)
    with pytest.raises(ValueError, match="no segments"):
        fit_exponentials([], 1)
    with pytest.raises(ValueError, match="tau_init"):
        fit_exponentials([Segment(t, y)], 2, tau_init=[0.01])
    with pytest.raises(ValueError, match="weight"):
        fit_exponentials([Segment(t, y, weight=-np.ones_like(t))], 1)


def test_result_type():
    t = np.arange(0.0, 0.05, DT)
    fit = fit_exponentials([Segment(t, transient(t, 0.0, [1e-3], [0.01]))], 1)
    assert isinstance(fit, ExpFit)
    with pytest.raises(AttributeError):
        fit.rss = 0.0  # frozen


def test_crlb_two_segments_and_binned_sigma():
    # a bin of n samples has sd sigma/sqrt(n): binning the whole record into pairs
    # (model nearly linear over a pair) must give almost the same bound
    t = np.arange(0.0, 0.1, 1e-4)
    single = crlb_taus(t, 1e-3, [0.02], [5e-3])
    t_pairs = t.reshape(-1, 2).mean(axis=1)
    binned = crlb_taus(t_pairs, np.full(t_pairs.size, 1e-3 / np.sqrt(2)), [0.02], [5e-3])
    assert binned[0] == pytest.approx(single[0], rel=1e-3)
    # two identical segments with free offsets: the bound shrinks by sqrt(2)
    both = crlb_taus([t, t], 1e-3, [0.02], [[5e-3], [-5e-3]])
    assert both[0] == pytest.approx(single[0] / np.sqrt(2), rel=1e-9)


# ------------------------------------------------------------------- damping


def _oscillation_case():
    """Two binned segments (onset and offset of a combined response, fit-start scan of the
    simulated sample LOL-2026-11-03-c1_CA1.nwb) on which the former damping rule, a fixed
    10x cut after every accepted step, oscillated (tau1 ~1.86 <-> 1.89 ms) for all 100
    iterations without converging."""
    from pathlib import Path

    data = np.load(Path(__file__).parent / "data" / "expfit_oscillation.npz")
    segments = [Segment(data[f"t{i}"], data[f"y{i}"], data[f"w{i}"]) for i in range(2)]
    return segments, data["tau_init"]


def _one_lm(prob, theta0, lo, hi):
    """The solver on one problem (it takes problems stacked on a leading axis)."""
    from passivefit.core.expfit import _levenberg_marquardt, _Projected

    return _levenberg_marquardt(_Projected.stack([prob]), theta0[None], np.array([lo]),
                                np.array([hi]))[0]


def test_gain_ratio_damping_converges_where_the_fixed_cut_oscillated():
    from passivefit.core.expfit import _check_segments, _Projected, _theta_bounds

    segments, tau_init = _oscillation_case()
    checked = _check_segments(segments, 2)
    prob = _Projected(checked, 2)
    lo, hi = _theta_bounds(prob, checked, (1e-5, 10.0))
    theta0 = np.log(np.sort(tau_init)[::-1] / prob.scale)
    sol = _one_lm(prob, theta0, lo, hi)
    assert sol.status == 1, sol.message
    # the fixed 10x cut used all 100 iterations here; the gain-ratio rule needed 21
    assert sol.iterations <= 40
    fit = fit_exponentials(segments, 2, tau_init)
    assert fit.success, fit.message
    # it stops at the minimum: restarted from there, the solver moves the log taus by
    # less than 2 % of their standard errors
    again = _one_lm(prob, sol.x, lo, hi)
    assert np.all(np.abs(again.x - sol.x) < 0.02 * fit.tau_se / fit.taus)
    assert again.cost <= sol.cost


def test_gain_ratio_damping_needs_few_iterations_on_noisy_sweeps():
    from passivefit.core.expfit import _check_segments, _peel_init, _Projected, _theta_bounds

    rng = np.random.default_rng(14)
    counts = []
    for _ in range(20):
        (t_on, y_on), (t_off, y_off) = step_pair([0.020, 0.0015], [4e-3, 0.8e-3], rng, 0.2e-3)
        checked = _check_segments([Segment(t_on, y_on), Segment(t_off, y_off)], 2)
        prob = _Projected(checked, 2)
        lo, hi = _theta_bounds(prob, checked, (1e-5, 10.0))
        theta0 = np.log(np.sort(_peel_init(checked, 2))[::-1] / prob.scale)
        sol = _one_lm(prob, theta0, lo, hi)
        assert sol.status == 1, sol.message
        counts.append(sol.iterations)
    assert max(counts) < 100 and np.median(counts) <= 15, counts


def test_summaries_of_stacked_problems_equal_their_own():
    # the summaries of many fitted problems (fit_exponentials_many) are computed stacked
    # where the problems have one shape: every field must equal the problem's own summary
    # exactly; a problem of another shape, and one with a fixed offset, go alone
    import dataclasses

    from passivefit.core import expfit

    rng = np.random.default_rng(4)
    problems = []
    for k in range(6):
        short = dict(on_s=0.2, off_s=0.2) if k == 5 else {}
        (t1, y1), (t2, y2) = step_pair((0.02, 0.002), (0.01, 0.002), rng, 1e-4, **short)
        segs = [Segment(*decimate_tail(t1, y1, 5e-3)), Segment(*decimate_tail(t2, y2, 5e-3))]
        if k == 4:
            segs[1] = Segment(segs[1].t, segs[1].y, segs[1].weight, offset=-0.070)
        problems.append(segs)
    items = []
    for segs in problems:
        prob = expfit._Projected(expfit._check_segments(segs, 2), 2)
        items.append((prob, np.log(np.array([0.002, 0.02]) / prob.scale), "converged"))
    stacked = expfit._summarize_many(items)
    kinds = [(item[0].u.shape, item[0].has_offset.tobytes()) for item in items]
    assert len(set(kinds)) == 3 and kinds.count(kinds[0]) == 4   # one stack of 4
    for (prob, theta, message), fit in zip(items, stacked, strict=True):
        alone = expfit._summarize(prob, theta, message, True)
        for f in dataclasses.fields(ExpFit):
            a, b = getattr(alone, f.name), getattr(fit, f.name)
            same = np.array_equal(a, b, equal_nan=True) if isinstance(a, np.ndarray) else a == b
            assert same, f.name
        assert fit.taus[0] > fit.taus[1]   # sorted slowest first, as fitted
    # values only (a bootstrap's refits): the same values, the errors not computed
    for (prob, theta, message), fit in zip(items, expfit._summarize_many(items, errors=False),
                                            strict=True):
        full = expfit._summarize(prob, theta, message, True)
        for name in ("taus", "amplitudes", "offsets", "rss", "rmse", "aic"):
            assert np.array_equal(getattr(fit, name), getattr(full, name)), name
        assert np.all(np.isnan(fit.tau_se)) and np.all(np.isnan(fit.amp_se))


def test_a_collapsed_component_has_no_zero_interval():
    # data of one exponential read as two: the second's amplitude is ~0, so its tau's
    # column is ~0 too. The unscaled pseudo-inverse dropped that direction and gave the
    # tau a CI of 1e-24 s ("resolved"); from the column-scaled matrix it is the wide
    # interval it has (wider than the tau itself: not resolved)
    from passivefit.core import expfit

    t = np.arange(1, 4000) / 20_000
    rng = np.random.default_rng(0)
    y = -0.070 - 0.005 * np.exp(-t / 0.02) + rng.normal(0, 1e-12, t.size)
    prob = expfit._Projected(expfit._check_segments([Segment(t, y)], 2), 2)
    fit = expfit._summarize(prob, np.log(np.array([0.02, 0.002]) / prob.scale), "", True)
    assert abs(fit.amplitudes[0, 1]) < 1e-9
    assert fit.tau_ci95[1] > fit.taus[1]
