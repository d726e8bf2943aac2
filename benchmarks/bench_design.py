"""Does the design advice hold? (issue 16)

For each simulated cell (ball-and-stick, 20 kHz, 5 kHz Bessel, three hyperpolarizing
steps):

1. **Bound against repeats.** `REPEATS` recordings of `N0` sweeps (other seeds) are
   analysed (bootstrap 0); the sd of each value over the repeats is compared with the
   Cramér–Rao sd of the same protocol at the true cell (`analysis.design`). This does not
   depend on how the analysis computes its CIs.
2. **Advice against a new recording.** The first recording is analysed with the default
   bootstrap; `design.advise` gets its fitted values, its CIs and the noise measured from
   its baselines, and says how many sweeps reach the default targets (τ0 ±2 %, τ1 ±10 %,
   L ±10 %, ρ ±30 %). That many sweeps (at most `CAP`) are simulated with a new seed and
   analysed; the CI achieved is compared with the CI the advice predicted for that many
   sweeps (the first CI × √(n_first / n_new)) and with the target; so are the median CI
   and the spread of the values over `repeats_new` more recordings of that length (one
   recording's CI scatters by itself; the median is the CI one gets typically).

    python benchmarks/bench_design.py           # 5 cells, 16 repeats (a few minutes)
    python benchmarks/bench_design.py --quick   # 5 cells, 6 repeats
"""

from __future__ import annotations

import argparse
import math
import platform
import time

import numpy as np

from passivefit.analysis import analyze, design
from passivefit.model import schema as S
from passivefit.model.settings import Settings
from passivefit.simulate import BallStick, StepProtocol, simulate_recording

FS, FC, SWEEP_S, ONSET_S, DURATION_S = 20_000.0, 5_000.0, 1.0, 0.1, 0.4
N0 = 10
CAP = 150
ML_REPEATS = 40   # noisy copies in part 0 (each fit is quick)
FIT_START_S = 0.5e-3
#: name, tau0 (s), L, rho, R_in (Ohm), noise sd (V)
CELLS = (
    ("CA1-like", 20e-3, 1.0, 3.0, 150e6, 0.2e-3),
    ("slow", 30e-3, 0.9, 4.0, 200e6, 0.2e-3),
    ("long dendrite", 15e-3, 1.5, 2.0, 100e6, 0.15e-3),
    ("big dendrite", 25e-3, 1.2, 8.0, 250e6, 0.3e-3),
    ("fast, small", 10e-3, 0.6, 1.5, 80e6, 0.1e-3),
)
SHOWN = ("tau0", "tau1", "L", "rho")
#: Targets of part 2 (95 % half-widths relative to the value), stricter than the defaults
#: so that every cell needs more than N0 sweeps.
TARGETS = {"tau0": 0.01, "tau1": 0.05, "L": 0.03, "rho": 0.15}


def _protocol(r_in: float) -> StepProtocol:
    """Steps of −9, −6 and −3 mV at steady state."""
    return StepProtocol(ONSET_S, DURATION_S, tuple(-v / r_in for v in (9e-3, 6e-3, 3e-3)))


def _values(cell: dict) -> dict:
    """The analysis's values (SI) by design name."""
    def si(q, scale=1.0):
        v = cell.get(q.key)
        return None if v is None else v * scale

    return {"tau0": si(S.TAU0, 1e-3), "tau1": si(S.TAU1, 1e-3), "L": si(S.L_BS),
            "rho": si(S.RHO), "r_in": si(S.R_IN, 1e6), "bridge": si(S.BRIDGE, 1e6)}


def _cis(cell: dict) -> dict:
    def ci(key, scale=1.0):
        v = cell.get(key)
        return None if v is None else v * scale

    return {"tau0": ci(S.TAU0.ci, 1e-3), "tau1": ci(S.TAU1.ci, 1e-3), "L": ci(S.L_BS.ci),
            "rho": ci(S.RHO.ci), "bridge": ci(S.BRIDGE.ci, 1e6)}


def _record(cell: BallStick, r_in: float, noise: float, n: int, seed: int):
    return simulate_recording(cell, protocol=_protocol(r_in), sample_rate_hz=FS,
                              sweep_duration_s=SWEEP_S, n_sweeps=n, noise_sd_V=noise,
                              filter_hz=FC, seed=seed)[0]


def _advise(recording, result, targets=None) -> design.DesignAdvice:
    cell = result.cell.to_dict()
    values = _values(cell)
    used = [s for s in result.sweeps if s.accepted]
    onset = int(round(ONSET_S * FS))
    sd, acf = design.noise_autocorrelation([recording.sweeps[s.index].voltage[:onset]
                                            for s in used])
    amps = [float(recording.sweeps[s.index].current[onset]) for s in used]
    return design.advise(tau0_s=values["tau0"], L=values["L"], rho=values["rho"],
                         r_in_ohm=values["r_in"], bridge_ohm=values["bridge"] or 0.0,
                         kind="step", onset_s=ONSET_S, duration_s=DURATION_S,
                         amplitudes_A=amps, sweep_s=SWEEP_S, sample_rate_hz=FS, filter_hz=FC,
                         noise_sd_V=sd, noise_acf=acf, n_sweeps=len(used),
                         achieved_ci=_cis(cell), targets=targets,
                         fit_start_s=(result.design.protocol.fit_start_s if result.design
                                      else FIT_START_S),   # the samples the analysis used
                         bridge_known=result.cable_fit is not None
                         and not result.cable_fit.bridge_needed)


def _ml_check(cell_row, repeats: int, seed: int) -> list[tuple]:
    """The bound against a maximum-likelihood fit of the bound's own model: noisy
    copies of one sweep (amplitude the rms of the steps, noise sd/√N0: the same
    information as N0 sweeps), fitted by least squares on whitened residuals."""
    from scipy.optimize import least_squares
    from scipy.signal import lfilter

    from passivefit.simulate import filtered_noise_acf
    from passivefit.simulate.recording import OVERSAMPLE, _apply_filter, _bessel, _noise_gain

    name, tau0, L, rho, r_in, noise = cell_row
    amps = np.array(_protocol(r_in).amplitudes_A)
    protocol = design.Protocol("step", ONSET_S, DURATION_S, -float(np.sqrt(np.mean(amps**2))),
                               SWEEP_S, FS, FC, FIT_START_S)
    model = design._forward(protocol)
    theta = np.array([math.log(tau0), math.log(L), math.log(rho), math.log(r_in), 0.0, 0.0])
    cov = design.cell_covariance(tau0, L, rho, r_in, 0.0, protocol, noise, N0)
    whiten, _ = design.ar_whitener(filtered_noise_acf(FC, FS, design.AR_ORDER))
    keep = protocol.keep()
    keep[: whiten.size - 1] = False
    ba = _bessel(FC, OVERSAMPLE * FS)   # the simulator's noise: the analog filter, sampled
    sd = noise / math.sqrt(N0)
    scale = np.array([1, 1, 1, 1, 1e6, 1e-3])
    truth = model(theta)
    rng = np.random.default_rng(seed)
    found = []
    for _ in range(repeats):
        white = rng.normal(0, sd / _noise_gain(ba), OVERSAMPLE * (truth.size + 2000))
        y = truth + _apply_filter(ba, white)[::OVERSAMPLE][2000:]

        def residual(p, y=y):
            return lfilter(whiten, [1.0], model(p * scale) - y)[keep] / sd

        start = theta / scale + np.array([0.02, -0.03, 0.05, 0.01, 0.1, 0.0])
        found.append(least_squares(residual, start, x_scale="jac", xtol=1e-12, ftol=1e-12,
                                   gtol=1e-12).x[:3])
    spread = np.std(np.array(found), axis=0, ddof=1)
    return [(name, v, math.sqrt(cov[i, i]), spread[i])
            for i, v in enumerate(("ln tau0", "ln L", "ln rho"))]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="6 repeats instead of 16")
    args = parser.parse_args()
    repeats = 6 if args.quick else 16
    repeats_new = 4 if args.quick else 8
    started = time.perf_counter()
    ml_rows = [row for k in (0, 2) for row in _ml_check(CELLS[k], ML_REPEATS, 900 + k)]
    bound_rows, advice_rows = [], []
    for k, (name, tau0, L, rho, r_in, noise) in enumerate(CELLS):
        cell = BallStick.from_electrotonic(tau0, L, rho, r_in)
        # 1. the bound against the spread over repeats
        fits = []
        for rep in range(repeats):
            rec = _record(cell, r_in, noise, N0, seed=100 * k + rep)
            fits.append(_values(analyze(rec, Settings(bootstrap=0)).cell.to_dict()))
        amps = list(_protocol(r_in).amplitudes_A)
        truth = design.advise(tau0_s=tau0, L=L, rho=rho, r_in_ohm=r_in, kind="step",
                              onset_s=ONSET_S, duration_s=DURATION_S, amplitudes_A=amps,
                              sweep_s=SWEEP_S, sample_rate_hz=FS, filter_hz=FC,
                              noise_sd_V=noise, n_sweeps=N0, fit_start_s=FIT_START_S,
                              bridge_known=True)   # the cells have no bridge error
        for v in SHOWN + ("r_in",):
            got = [f[v] for f in fits if f[v] is not None]
            empirical = float(np.std(got, ddof=1)) if len(got) > 2 else math.nan
            crlb = truth.bound(v).crlb_ci / design.Z95
            bound_rows.append((name, v, truth.bound(v).value, crlb, empirical, len(got)))
        # 2. the advice against recordings of the advised length
        first = _record(cell, r_in, noise, N0, seed=100 * k)
        result = analyze(first, Settings())
        advice = _advise(first, result, TARGETS)
        n_first = advice.n_sweeps
        needed = [advice.bound(v).sweeps_needed for v in SHOWN]
        n_new = min(CAP, max([n for n in needed if n is not None] or [n_first]))
        second = _record(cell, r_in, noise, n_new, seed=100 * k + 77)
        result2 = analyze(second, Settings())
        n_used = result2.cell.to_dict()[S.N_SWEEPS_USED.key]
        achieved = _cis(result2.cell.to_dict())
        repeated = [analyze(_record(cell, r_in, noise, n_new, seed=100 * k + 50 + rep),
                            Settings(), advise=False).cell.to_dict()
                    for rep in range(repeats_new)]
        spread = [_values(c) for c in repeated]
        cis = [_cis(c) for c in repeated]
        for v in SHOWN:
            b = advice.bound(v)
            if b.achieved_ci is None:
                continue
            predicted = b.achieved_ci * math.sqrt(n_first / n_used)
            from_bound = b.crlb_ci * math.sqrt(n_first / n_used)
            got = [f[v] for f in spread if f[v] is not None]
            empirical = design.Z95 * float(np.std(got, ddof=1)) if len(got) > 2 else math.nan
            typical = [c[v] for c in cis if c[v] is not None]
            advice_rows.append((name, v, n_first, b.sweeps_needed, b.sweeps_needed_bound,
                                n_used, b.target_ci, predicted, from_bound,
                                achieved[v] if achieved[v] is not None else math.nan,
                                empirical, float(np.median(typical)) if typical else math.nan))
    _print(ml_rows, bound_rows, advice_rows, repeats, time.perf_counter() - started)


def _print(ml_rows, bound_rows, advice_rows, repeats: int, seconds: float) -> None:
    print(f"bench_design: {len(CELLS)} cells, {FS / 1e3:g} kHz, {FC / 1e3:g} kHz Bessel, "
          f"steps of -9/-6/-3 mV; {platform.processor() or platform.machine()}, "
          f"{seconds:.0f} s")
    print()
    print(f"0. The bound against a maximum-likelihood fit of its own model ({ML_REPEATS} noisy "
          f"copies, the information of {N0} sweeps)")
    print("| cell | parameter | CRLB sd | sd of the ML fits | CRLB / ML |")
    print("|---|---|---|---|---|")
    for name, v, crlb, spread in ml_rows:
        print(f"| {name} | {v} | {crlb:.3g} | {spread:.3g} | {crlb / spread:.2f} |")
    print()
    print(f"1. Cramér–Rao sd against the sd over {repeats} repeats of {N0} sweeps "
          "(analysis, bootstrap 0)")
    print("| cell | value | true | CRLB sd | sd over repeats | CRLB / repeats |")
    print("|---|---|---|---|---|---|")
    ratios = {}
    for name, v, value, crlb, emp, _n in bound_rows:
        ratio = crlb / emp if emp > 0 else math.nan
        ratios.setdefault(v, []).append(ratio)
        print(f"| {name} | {v} | {_g(value)} | {_g(crlb)} | {_g(emp)} | {ratio:.2f} |")
    print()
    print("median CRLB / empirical sd: " + ", ".join(
        f"{v} {np.nanmedian(r):.2f}" for v, r in ratios.items()))
    print()
    print(f"2. Advised sweeps (targets {_targets()}) against recordings of that many "
          "sweeps")
    print("| cell | value | first | advised (from first CI / bound) | recorded | target ± | "
          "predicted ± (first CI / bound) | achieved ± (bootstrap 40) | "
          "1.96 sd over repeats | median CI over repeats | achieved / predicted | "
          "median CI / predicted | repeats / predicted |")
    print("|---|---|---|---|---|---|---|---|---|---|---|---|---|")
    counts = {"ci": 0, "bound": 0, "med_ci": 0, "med_bound": 0, "rep_ci": 0, "rep_bound": 0}
    total = 0
    for (name, v, n0, adv, adv_b, n_new, target, pred, bound, got,
         emp, med) in advice_rows:
        total += 1
        counts["ci"] += abs(got / pred - 1) <= 0.30
        counts["bound"] += abs(got / bound - 1) <= 0.30
        counts["med_ci"] += abs(med / pred - 1) <= 0.30
        counts["med_bound"] += abs(med / bound - 1) <= 0.30
        counts["rep_ci"] += abs(emp / pred - 1) <= 0.30
        counts["rep_bound"] += abs(emp / bound - 1) <= 0.30
        shown = "/".join("> 500" if a is None else str(a) for a in (adv, adv_b))
        print(f"| {name} | {v} | {n0} | {shown} | {n_new} | {_g(target)} | {_g(pred)} / "
              f"{_g(bound)} | {_g(got)} | {_g(emp)} | {_g(med)} | {got / pred:.2f} / "
              f"{got / bound:.2f} | {med / pred:.2f} / {med / bound:.2f} | "
              f"{emp / pred:.2f} / {emp / bound:.2f} |")
    print()
    print(f"within ±30 % of the prediction, of {total} (first CI scaled / bound): the CI of "
          f"the new recording {counts['ci']} / {counts['bound']}; the median CI over the "
          f"repeats {counts['med_ci']} / {counts['med_bound']}; 1.96 sd over the repeats "
          f"{counts['rep_ci']} / {counts['rep_bound']}")


def _targets() -> str:
    return ", ".join(f"{v} ±{100 * t:g} %" for v, t in TARGETS.items())


def _g(x) -> str:
    return "—" if x is None or not math.isfinite(x) else f"{x:.3g}"


if __name__ == "__main__":
    main()
