"""Coverage of the 95 % intervals: how often each interval holds the simulated truth.

Run:  .venv/bin/python benchmarks/bench_coverage.py [--cells 200] [--workers 2] [--sweeps 20]

Cells are drawn at random (fixed seed) from L 0.4–1.8, ρ 1–20, τm 15–35 ms,
R_in 80–300 MΩ, noise 0.1–0.6 mV; half carry a 5–15 MΩ bridge error seen through a
30–100 µs electrode lag; every recording is filtered by a 5 kHz Bessel, and half of the
files do not state it (the model then estimates the corner from the step edge). Each
recording has 20 sweeps (`--sweeps`) of −50/−30 pA steps (400 ms, 20 kHz), analysed with the default
settings (bootstrap over sweeps).

For τ0, τ1, L (ball-and-stick), ρ, R_in and the bridge: the share of cells whose 95 %
interval holds the truth (among the cells that report the value), and the share where the
value was not reported. τ0 is the membrane time constant τm; τ1 the first equalizing time
constant of the cell; the bridge's truth is 0 for the cells without one.
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from concurrent.futures import ProcessPoolExecutor  # noqa: E402

import numpy as np  # noqa: E402

PROTOCOL_A = (-50e-12, -30e-12)
NAMES = ("τ0", "τ1", "L", "ρ", "R_in", "bridge")


def draw(n: int, seed: int = 2026) -> list[dict]:
    rng = np.random.default_rng(seed)
    cells = []
    for k in range(n):
        bridge = k % 2 == 1
        cells.append(dict(
            L=float(rng.uniform(0.4, 1.8)), rho=float(np.exp(rng.uniform(np.log(1), np.log(20)))),
            tau_s=float(rng.uniform(0.015, 0.035)), r_in=float(rng.uniform(80e6, 300e6)),
            noise=float(rng.uniform(0.1e-3, 0.6e-3)),
            bridge=float(rng.uniform(5e6, 15e6)) if bridge else 0.0,
            lag=float(rng.uniform(30e-6, 100e-6)), stated=(k // 2) % 2 == 0, seed=k))
    return cells


def one(c: dict, n_sweeps: int = 20) -> dict:
    from passivefit.analysis import Settings, analyze
    from passivefit.simulate import BallStick, StepProtocol, simulate_recording

    cell = BallStick.from_electrotonic(c["tau_s"], c["L"], c["rho"], c["r_in"])
    rec, _ = simulate_recording(
        cell, protocol=StepProtocol(0.1, 0.4, PROTOCOL_A), n_sweeps=n_sweeps, sweep_duration_s=0.8,
        noise_sd_V=c["noise"], filter_hz=5_000, bridge_ohm=c["bridge"],
        electrode_tau_s=c["lag"], seed=c["seed"])
    if not c["stated"]:
        rec.metadata["filter_hz"] = None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = analyze(rec, Settings(), advise=False).cell.to_dict()
    truth = {"τ0": c["tau_s"] * 1e3, "τ1": cell.taus(2)[1] * 1e3, "L": c["L"], "ρ": c["rho"],
             "R_in": c["r_in"] / 1e6, "bridge": c["bridge"] / 1e6}
    got = {}
    for name, key, ci in (("τ0", "tau0_ms", "tau0_ci95_ms"), ("τ1", "tau1_ms", "tau1_ci95_ms"),
                          ("R_in", "r_in_MOhm", "r_in_ci95_MOhm"),
                          ("bridge", "bridge_MOhm", "bridge_ci95_MOhm")):
        v, h = out.get(key), out.get(ci)
        got[name] = None if v is None or h is None else (v - h, v + h)
    for name, key in (("L", "L_bs"), ("ρ", "rho")):
        lo, hi = out.get(f"{key if key != 'L_bs' else 'L'}_ci95_low"), \
            out.get(f"{key if key != 'L_bs' else 'L'}_ci95_high")
        got[name] = None if out.get(key) is None or lo is None or hi is None else (lo, hi)
    return {name: (None if got[name] is None else bool(got[name][0] <= truth[name] <= got[name][1]))
            for name in NAMES} | {"stated": c["stated"], "has_bridge": c["bridge"] > 0}


def table(rows: list[dict], title: str) -> str:
    lines = [f"**{title}** ({len(rows)} cells)", "",
             "| | " + " | ".join(NAMES) + " |", "|---|" + "---|" * len(NAMES)]
    cover, null = [], []
    for name in NAMES:
        seen = [r[name] for r in rows if r[name] is not None]
        cover.append(f"{100 * np.mean(seen):.0f} %" if seen else "—")
        null.append(f"{100 * (1 - len(seen) / len(rows)):.0f} %")
    lines += ["| 95 % interval holds the truth | " + " | ".join(cover) + " |",
              "| not reported | " + " | ".join(null) + " |"]
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cells", type=int, default=200)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--sweeps", type=int, default=20)
    args = parser.parse_args()
    cells = draw(args.cells)
    t0 = time.perf_counter()
    with ProcessPoolExecutor(args.workers) as pool:
        rows = list(pool.map(one, cells, [args.sweeps] * len(cells), chunksize=4))
    print(f"{len(rows)} cells of {args.sweeps} sweeps in {time.perf_counter() - t0:.0f} s\n")
    print(table(rows, "All cells"))
    print()
    print(table([r for r in rows if not r["stated"]], "Files that do not state the filter"))
    print()
    print(table([r for r in rows if r["has_bridge"]], "Cells with a bridge error"))


if __name__ == "__main__":
    main()
