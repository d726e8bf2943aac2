"""Speed and statistical efficiency of passivefit's exponential fitting.

Run:  python benchmarks/bench_fit.py [--sweeps N] [--seed S]

Prints markdown tables:
1. time per sweep of the joint onset + offset 2-component fit (20,000-sample,
   20 kHz sweep; one BLAS thread), from the raw sweep array to the ExpFit;
2. bias and sd of tau0, tau1 over independent noisy sweeps against the
   Cramér–Rao lower bound of the same design (passivefit.core.expfit.crlb_taus);
3. side by side on the same sweeps: passivefit, a plain scipy curve_fit script
   (two exponentials + offset on the onset from 0.5 ms) and a classic two-line peel;
4. a ball-and-stick cell (L = 1, rho = 5, 5 kHz Bessel filter, passivefit.simulate):
   tau1 bias against fit start for curve_fit (2 exp) and passivefit (2 and 3 exp).
"""

from __future__ import annotations

import os

os.environ["OPENBLAS_NUM_THREADS"] = "1"  # before numpy is imported
os.environ["OMP_NUM_THREADS"] = "1"
os.environ["MKL_NUM_THREADS"] = "1"

import argparse  # noqa: E402
import platform  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402

import numpy as np  # noqa: E402
import scipy  # noqa: E402
from scipy.optimize import curve_fit  # noqa: E402

from passivefit.core.expfit import (  # noqa: E402
    Segment,
    crlb_taus,
    decimate_tail,
    fit_exponentials,
    fit_start_scan,
)
from passivefit.core.peel import peel  # noqa: E402

FS = 20_000.0
DT = 1.0 / FS
N_SAMPLES = 20_000
ON_S, OFF_S = 0.100, 0.600  # step edges within the 1 s sweep
FIT_START_S = 0.5e-3
KEEP_FIRST_S = 5e-3  # full resolution for the first 5 ms (> 3 tau1), then bins
BIN_FACTOR = 1.05
TAU0, TAU1 = 0.020, 0.0015
DELTA_V = -5e-3  # hyperpolarising step, V
B1_OVER_B0 = 0.2
SIGMA = 0.2e-3
V_REST = -0.070


def true_amplitudes() -> tuple[float, float]:
    """B0, B1 (V) of the charging curve V_rest + dV - B0 e^-t/tau0 - B1 e^-t/tau1, V(0) = V_rest."""
    b0 = DELTA_V / (1.0 + B1_OVER_B0)
    return b0, B1_OVER_B0 * b0


def make_sweep(rng: np.random.Generator) -> np.ndarray:
    """One 20,000-sample sweep: rest, step on at 100 ms, off at 600 ms, white noise."""
    b0, b1 = true_amplitudes()
    t = np.arange(N_SAMPLES) * DT
    v = np.full(N_SAMPLES, V_REST)
    on = (t >= ON_S) & (t < OFF_S)
    s = t[on] - ON_S
    v[on] += DELTA_V - b0 * np.exp(-s / TAU0) - b1 * np.exp(-s / TAU1)
    after = t >= OFF_S
    s = t[after] - OFF_S
    for b, tau in ((b0, TAU0), (b1, TAU1)):  # each mode decays from where the step left it
        v[after] += b * (1.0 - np.exp(-(OFF_S - ON_S) / tau)) * np.exp(-s / tau)
    return v + rng.normal(0.0, SIGMA, N_SAMPLES)


def cut(v: np.ndarray, edge_s: float, stop_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Samples from FIT_START_S after an edge to stop_s, t from the edge."""
    i0 = int(round((edge_s + FIT_START_S) * FS))
    i1 = int(round(stop_s * FS))
    return np.arange(i0, i1) * DT - edge_s, v[i0:i1]


def fit_passivefit(v: np.ndarray, joint: bool = True, tau_init=None):
    """The per-sweep pipeline: cut, decimate the tails, fit 2 exponentials jointly.

    Without ``tau_init`` the start comes from peeling; with it (e.g. the taus of
    the cell's average, as a batch of sweeps would use) peeling is skipped.
    """
    segs = [Segment(*decimate_tail(*cut(v, ON_S, OFF_S), KEEP_FIRST_S, BIN_FACTOR))]
    if joint:
        segs.append(
            Segment(*decimate_tail(*cut(v, OFF_S, N_SAMPLES * DT), KEEP_FIRST_S, BIN_FACTOR))
        )
    return fit_exponentials(segs, 2, tau_init).taus


def _two_exp(t, c, a0, tau0, a1, tau1):
    return c + a0 * np.exp(-t / tau0) + a1 * np.exp(-t / tau1)


def fit_curve_fit(t: np.ndarray, y: np.ndarray) -> np.ndarray:
    """What a plain hand script does: curve_fit with a generic starting guess."""
    c0 = float(np.mean(y[-1000:]))
    p0 = [c0, y[0] - c0, 0.010, 0.2 * (y[0] - c0), 0.001]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        p, _ = curve_fit(_two_exp, t, y, p0=p0, maxfev=5000)
    return np.sort(np.abs(p[[2, 4]]))[::-1]


def fit_classic_peel(t: np.ndarray, y: np.ndarray) -> np.ndarray:
    return peel(t, y, y_inf=None, n_components=2).taus


def timed(fn, *args):
    """Result, wall-clock time (s) and CPU time of this thread (s).

    On a shared machine the wall clock also counts time spent waiting for a
    core; the thread's CPU time is the cost on one core.
    """
    w0, c0 = time.perf_counter(), time.thread_time()
    out = fn(*args)
    return out, time.perf_counter() - w0, time.thread_time() - c0


def crlb_design() -> np.ndarray:
    """CRLB (s) of tau0, tau1 for the joint design (full resolution, offsets unknown)."""
    b0, b1 = true_amplitudes()
    t_on = cut(np.zeros(N_SAMPLES), ON_S, OFF_S)[0]
    t_off = cut(np.zeros(N_SAMPLES), OFF_S, N_SAMPLES * DT)[0]
    amps = np.array([[-b0, -b1], [b0, b1]])  # signs do not matter for the bound
    return crlb_taus([t_on, t_off], SIGMA, [TAU0, TAU1], amps)


def crlb_onset() -> np.ndarray:
    b0, b1 = true_amplitudes()
    t_on = cut(np.zeros(N_SAMPLES), ON_S, OFF_S)[0]
    return crlb_taus(t_on, SIGMA, [TAU0, TAU1], [b0, b1])


def stats_row(name: str, taus: np.ndarray, times: np.ndarray, bound: np.ndarray) -> str:
    ok = np.all(np.isfinite(taus), axis=1)
    est = taus[ok]
    bias = (est.mean(axis=0) / [TAU0, TAU1] - 1) * 100
    sd = est.std(axis=0, ddof=1)
    return (
        f"| {name} | {bias[0]:+.2f} | {1e3 * sd[0]:.3f} ({sd[0] / bound[0]:.2f}) "
        f"| {bias[1]:+.1f} | {1e3 * sd[1]:.3f} ({sd[1] / bound[1]:.2f}) "
        f"| {1e3 * np.nanmedian(times):.2f} | {ok.sum()}/{len(taus)} |"
    )


def ball_and_stick_section() -> list[str]:
    try:
        from scipy.signal import bessel, lfilter, lfilter_zi

        from passivefit.simulate import BallStick
    except ImportError as exc:  # simulate.py missing: say so instead of failing
        return [f"(ball-and-stick case skipped: {exc})"]
    cell = BallStick.from_electrotonic(tau_m_s=TAU0, L=1.0, rho=5.0, r_in_ohm=200e6)
    current = np.zeros(N_SAMPLES)
    i_on, i_off = int(ON_S * FS), int(OFF_S * FS)
    current[i_on:i_off] = -25e-12
    v = cell.soma_response(current, DT)
    b, a = bessel(4, 5_000, btype="low", norm="phase", fs=FS)
    v = lfilter(b, a, v, zi=lfilter_zi(b, a) * v[0])[0] + V_REST
    tau1 = float(cell.taus(2)[1])
    starts = [0.5e-3, 1e-3, 2e-3, 4e-3]
    t_all = np.arange(i_on, i_off) * DT - ON_S
    y_all = v[i_on:i_off]
    seg = Segment(t_all, y_all)
    scan2 = fit_start_scan([seg], starts, 2)
    scan3 = fit_start_scan([seg], starts, 3)
    lines = [
        f"Ball-and-stick (passivefit.simulate): L = 1, rho = 5, tau0 = {1e3 * TAU0:g} ms, "
        f"tau1 = {1e3 * tau1:.3f} ms, step -25 pA into 200 MOhm, 4-pole 5 kHz Bessel, "
        "20 kHz, no noise (the bias alone). Onset transient only.",
        "",
        "| fit start (ms) | curve_fit 2-exp tau1 bias (%) | passivefit 2-exp (%) "
        "| passivefit 3-exp (%) | passivefit 3-exp tau0 bias (%) |",
        "|---|---|---|---|---|",
    ]
    for j, start in enumerate(starts):
        keep = t_all >= start
        try:
            cf = fit_curve_fit(t_all[keep], y_all[keep])[1] / tau1 - 1
        except RuntimeError:
            cf = np.nan
        lines.append(
            f"| {1e3 * start:g} | {100 * cf:+.1f} | {100 * (scan2['tau1'][j] / tau1 - 1):+.1f} "
            f"| {100 * (scan3['tau1'][j] / tau1 - 1):+.1f} "
            f"| {100 * (scan3['tau0'][j] / TAU0 - 1):+.3f} |"
        )
    return lines


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sweeps", type=int, default=200, help="noisy sweeps (default 200)")
    parser.add_argument("--seed", type=int, default=20261103)
    args = parser.parse_args(argv)
    rng = np.random.default_rng(args.seed)

    print(
        "Reproduce: `OPENBLAS_NUM_THREADS=1 python benchmarks/bench_fit.py "
        f"--sweeps {args.sweeps} --seed {args.seed}` (the script sets one BLAS thread itself)"
    )
    print(
        f"Python {platform.python_version()}, numpy {np.__version__}, scipy {scipy.__version__}, "
        f"{platform.machine()}; load average at start {os.getloadavg()[0]:.2f} "
        f"on {os.cpu_count()} CPUs"
    )
    print()
    fit_passivefit(make_sweep(rng))  # warm-up: lazy imports, caches

    names = [
        "passivefit joint onset+offset",
        "passivefit onset only",
        "curve_fit onset",
        "peel onset",
        "passivefit joint, warm start",
    ]
    taus = {n: np.full((args.sweeps, 2), np.nan) for n in names}
    times = {n: np.full(args.sweeps, np.nan) for n in names}  # CPU time
    wall = np.full(args.sweeps, np.nan)
    for k in range(args.sweeps):
        v = make_sweep(rng)
        t_on, y_on = cut(v, ON_S, OFF_S)
        jobs = {
            names[0]: (fit_passivefit, v),
            names[1]: (fit_passivefit, v, False),
            names[2]: (fit_curve_fit, t_on, y_on),
            names[3]: (fit_classic_peel, t_on, y_on),
            names[4]: (fit_passivefit, v, True, (0.8 * TAU0, 1.3 * TAU1)),
        }
        for name, (fn, *fn_args) in jobs.items():
            try:
                taus[name][k], w, times[name][k] = timed(fn, *fn_args)
            except (RuntimeError, ValueError):
                continue
            if name == names[0]:
                wall[k] = w

    t_pf = times[names[0]]
    print("## Speed: joint onset + offset, 2 components, 20,000-sample 20 kHz sweep, 1 thread")
    print()
    print(
        "| statistic | CPU time per sweep (ms) | wall-clock time per sweep (ms) "
        "| CPU time, warm start (ms) |"
    )
    print("|---|---|---|---|")
    for label, fn in [
        ("median", np.nanmedian),
        ("10th percentile", lambda x: np.nanpercentile(x, 10)),
        ("90th percentile", lambda x: np.nanpercentile(x, 90)),
        ("minimum", np.nanmin),
    ]:
        print(
            f"| {label} | {1e3 * fn(t_pf):.2f} | {1e3 * fn(wall):.2f} "
            f"| {1e3 * fn(times[names[4]]):.2f} |"
        )
    print()
    print("(cut + decimate_tail of both segments + peel start + variable-projection fit +")
    print(" covariance. Warm start: the same with tau_init = (0.8 tau0, 1.3 tau1) given,")
    print(f" no peel. {args.sweeps} sweeps; load average now {os.getloadavg()[0]:.2f}.)")
    print()

    bound_joint, bound_on = crlb_design(), crlb_onset()
    print(
        f"## Efficiency and comparison: {args.sweeps} noisy sweeps, tau0 = {1e3 * TAU0:g} ms, "
        f"tau1 = {1e3 * TAU1:g} ms, B1/B0 = {B1_OVER_B0}, dV = {1e3 * DELTA_V:g} mV, "
        f"sigma = {1e3 * SIGMA:g} mV, 20 kHz, fit from {1e3 * FIT_START_S:g} ms"
    )
    print()
    print(
        f"CRLB (offsets unknown): joint onset+offset sd(tau0) = {1e3 * bound_joint[0]:.3f} ms, "
        f"sd(tau1) = {1e3 * bound_joint[1]:.3f} ms; onset only {1e3 * bound_on[0]:.3f} ms, "
        f"{1e3 * bound_on[1]:.3f} ms. In brackets: sd / CRLB of the same data."
    )
    print()
    print(
        "| method | tau0 bias (%) | sd(tau0) ms (/CRLB) | tau1 bias (%) | sd(tau1) ms (/CRLB) "
        "| median CPU time (ms) | fits |"
    )
    print("|---|---|---|---|---|---|---|")
    for name in names[:4]:
        bound = bound_joint if name == names[0] else bound_on
        print(stats_row(name, taus[name], times[name], bound))
    print()
    for line in ball_and_stick_section():
        print(line)


if __name__ == "__main__":
    main(sys.argv[1:])
