"""Accuracy of whole-cell analyses against the simulated truth, and passivefit beside
plain hand scripts on the same simulated recordings.

Run:  .venv/bin/python benchmarks/bench_cell.py [--quick]

1. A grid of simulated ball-and-stick cells (passivefit.simulate; L 0.3–2, ρ 1–20,
   noise 0.1–1 mV; 20 sweeps of −50/−30 pA, 20 kHz, 5 kHz Bessel filter), each clean and
   "with artefacts" (10 MΩ bridge error, drift 0.5 mV/s, 50 Hz hum 0.1 mV, spontaneous
   events 1/s): error of τ0, τ1, R_in, L, ρ, C_total against the truth.
2. Side by side on one cell (L = 1, ρ = 5, 0.2 mV noise), 10 recordings: the averaged
   charging transient fitted by a plain scipy curve_fit script (two exponentials + offset
   from 0.5 ms), by a classic two-line semilog peel, and by `passivefit.analysis.analyze`:
   bias and sd of τ1 (and τ0), and time per recording.
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402

import numpy as np  # noqa: E402

from passivefit.analysis import Settings, analyze  # noqa: E402
from passivefit.core.peel import peel  # noqa: E402
from passivefit.simulate import BallStick, StepProtocol, simulate_recording  # noqa: E402

PROTOCOL = StepProtocol(0.1, 0.4, (-50e-12, -30e-12))
KEYS = (("tau0_ms", "tau0_ms"), ("tau1_ms", "tau1_ms"), ("r_in_MOhm", "r_in_MOhm"),
        ("L_bs", "L"), ("rho", "rho"), ("c_total_pF", "c_total_pF"))


def record(L, rho, noise_mV, artefacts, seed, tau_ms=22.0, r_in_MOhm=110.0):
    cell = BallStick.from_electrotonic(tau_ms * 1e-3, L, rho, r_in_MOhm * 1e6)
    extra = dict(bridge_ohm=10e6, drift_V_per_s=0.5e-3, hum_V=0.1e-3, events_per_s=1.0) \
        if artefacts else {}
    return simulate_recording(cell, protocol=PROTOCOL, n_sweeps=20, sweep_duration_s=0.8,
                              noise_sd_V=noise_mV * 1e-3, filter_hz=5_000, seed=seed, **extra)


def grid(quick: bool) -> list[str]:
    Ls, rhos, noises = ((0.3, 1.0, 2.0), (1.0, 5.0, 20.0), (0.1, 0.5, 1.0))
    if quick:
        Ls, rhos, noises = (1.0,), (5.0,), (0.2,)
    rows = ["| L | ρ | noise mV | artefacts | " + " | ".join(k for k, _ in KEYS) + " |",
            "|---|---|---|---|" + "---|" * len(KEYS)]
    errors = {k: [] for k, _ in KEYS}
    for L in Ls:
        for rho in rhos:
            for noise in noises:
                for artefacts in (False, True):
                    rec, truth = record(L, rho, noise, artefacts, seed=11)
                    cell = analyze(rec, Settings()).cell.to_dict()
                    cells = []
                    for key, tkey in KEYS:
                        if cell.get(key) is None:
                            cells.append("null")
                            continue
                        err = 100 * (cell[key] / truth[tkey] - 1)
                        errors[key].append(abs(err))
                        cells.append(f"{err:+.1f} %")
                    rows.append(f"| {L} | {rho} | {noise} | {'yes' if artefacts else 'no'} | "
                                + " | ".join(cells) + " |")
    rows.append("| **median abs. error** | | | | " + " | ".join(
        f"{np.median(v):.1f} %" if v else "—" for v in errors.values()) + " |")
    return rows


def _two_exp(t, c, a0, tau0, a1, tau1):
    return c + a0 * np.exp(-t / tau0) + a1 * np.exp(-t / tau1)


def hand_scripts(rec):
    """τ0, τ1 (s) of the averaged −50 pA charging transient from 0.5 ms by curve_fit and by
    a two-line peel, as a plain script would do it, and the time each took."""
    from scipy.optimize import curve_fit

    fs = rec.sample_rate_hz
    v = np.mean([s.voltage for s in rec.sweeps if s.current.min() < -40e-12], axis=0)
    on, off = int(0.1 * fs), int(0.5 * fs)
    t = np.arange(off - on) / fs
    keep = t >= 0.5e-3
    t, y = t[keep], v[on:off][keep]
    c0 = float(np.mean(y[-1000:]))
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        p, _ = curve_fit(_two_exp, t, y, p0=[c0, y[0] - c0, 0.01, 0.2 * (y[0] - c0), 0.001],
                         maxfev=5000)
    t_cf = time.perf_counter() - t0
    t0 = time.perf_counter()
    pl = peel(t, y, y_inf=None, n_components=2)
    t_peel = time.perf_counter() - t0
    return np.sort(np.abs(p[[2, 4]]))[::-1], t_cf, np.asarray(pl.taus), t_peel


def side_by_side(n: int) -> list[str]:
    res = {"curve_fit, 2 exp from 0.5 ms": [], "two-line peel": [], "passivefit": []}
    times = {k: [] for k in res}
    truth = None
    for seed in range(n):
        rec, truth = record(1.0, 5.0, 0.2, False, seed=100 + seed)
        cf, t_cf, pl, t_pl = hand_scripts(rec)
        res["curve_fit, 2 exp from 0.5 ms"].append(cf)
        times["curve_fit, 2 exp from 0.5 ms"].append(t_cf)
        res["two-line peel"].append(pl if pl.size == 2 else [pl[0], np.nan])
        times["two-line peel"].append(t_pl)
        t0 = time.perf_counter()
        cell = analyze(rec, Settings()).cell.to_dict()
        times["passivefit"].append(time.perf_counter() - t0)
        res["passivefit"].append([cell["tau0_ms"] * 1e-3,
                                  (cell["tau1_ms"] or np.nan) * 1e-3])
    t0_true, t1_true = truth["tau0_ms"] * 1e-3, truth["tau1_ms"] * 1e-3
    rows = [f"Truth: τ0 = {t0_true * 1e3:.2f} ms, τ1 = {t1_true * 1e3:.3f} ms; "
            f"{n} recordings of 20 sweeps.", "",
            "| method | τ0 bias | τ1 bias | τ1 sd | time per recording |",
            "|---|---|---|---|---|"]
    for name, vals in res.items():
        a = np.array(vals, dtype=float)
        b0 = 100 * (np.nanmean(a[:, 0]) / t0_true - 1)
        b1 = 100 * (np.nanmean(a[:, 1]) / t1_true - 1)
        sd1 = 100 * np.nanstd(a[:, 1]) / t1_true
        what = "whole analysis (all sweeps, CIs, cable fit)" if name == "passivefit" \
            else "one fit of the average"
        rows.append(f"| {name} | {b0:+.1f} % | {b1:+.1f} % | {sd1:.1f} % | "
                    f"{np.median(times[name]) * 1e3:.0f} ms ({what}) |")
    return rows


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true", help="one cell, 3 recordings")
    args = parser.parse_args()
    print("command: .venv/bin/python benchmarks/bench_cell.py")
    print("\n### Accuracy against the simulated truth (error of the cell value)\n")
    print("\n".join(grid(args.quick)))
    print("\n### Side by side: τ1 of a ball-and-stick cell (L = 1, ρ = 5)\n")
    print("\n".join(side_by_side(3 if args.quick else 10)))


if __name__ == "__main__":
    main()
