"""Peak memory of `analyze` on a long recording, as a multiple of its float64 data.

Run:  .venv/bin/python benchmarks/bench_memory.py [--bootstrap N] [--data DIR] [--trace]
Target (issue #14): peak ≤ 2× the float64 size of the data, for 200 sweeps × 2 s at
50 kHz (20 million samples: 153 MiB as float64).

The recording is simulated (ball-and-stick, τm 22 ms, L = 1, ρ = 5; one -30 pA step
per sweep) and written as an ABF 1 file (16-bit samples, voltage only), the kind of
file whose ADC gives 16 bits; it is analysed with its step given, as
`passivefit analyze FILE --step 100 500 -30` would. A fresh process loads and analyses
it; the peak is its resident memory at most (getrusage) minus its resident memory
after the imports (the libraries are not the data's). With `--trace`, tracemalloc's
peak of the allocations during load + analysis is printed too (slower).
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

N_SWEEPS, SWEEP_S, RATE_HZ = 200, 2.0, 50_000
TARGET = 2.0

CHILD = r"""
import json, resource, sys, time
trace = sys.argv[3] == "1"
from passivefit.analysis import analyze
from passivefit.io import load
from passivefit.io.recording import StepSpec
from passivefit.model.settings import Settings
import passivefit.io.abf, pyabf, scipy.optimize, scipy.special  # imported before the baseline

def rss_kib():
    with open("/proc/self/status") as f:
        return next(int(line.split()[1]) for line in f if line.startswith("VmRSS:"))

base = rss_kib()
if trace:
    import tracemalloc
    tracemalloc.start()
t = time.perf_counter()
rec = load(sys.argv[1])
result = analyze(rec, Settings(step=StepSpec(0.1, 0.5, -30e-12), bootstrap=int(sys.argv[2])))
out = {"seconds": time.perf_counter() - t, "base_kib": base,
       "maxrss_kib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss,
       "samples": sum(s.voltage.size for s in rec.sweeps),
       "dtype": str(rec.sweeps[0].voltage.dtype),
       "tau0_ms": result.cell.to_dict().get("tau0_ms")}
if trace:
    out["traced_peak"] = tracemalloc.get_traced_memory()[1]
print(json.dumps(out))
"""


def make_file(folder: Path) -> Path:
    """The long ABF recording (reused when it is there already)."""
    path = folder / f"LOL-2026-12-02-c1_long{N_SWEEPS}.abf"
    if path.exists():
        return path
    from passivefit.io import save
    from passivefit.simulate import BallStick, StepProtocol, simulate_recording

    cell = BallStick.from_electrotonic(0.022, 1.0, 5.0, 110e6)
    rec, _ = simulate_recording(cell, protocol=StepProtocol(0.1, 0.5, (-30e-12,)),
                                n_sweeps=N_SWEEPS, sweep_duration_s=SWEEP_S,
                                sample_rate_hz=RATE_HZ, seed=3, cell_id="LOL-2026-12-02-c1")
    return save(rec, path)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--bootstrap", type=int, default=40,
                        help="bootstrap resamples (default 40, as the command)")
    parser.add_argument("--data", metavar="DIR", help="keep the recording here for reruns")
    parser.add_argument("--trace", action="store_true", help="also tracemalloc's peak")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(args.data or tmp)
        folder.mkdir(parents=True, exist_ok=True)
        t = time.perf_counter()
        path = make_file(folder)
        made = time.perf_counter() - t
        run = subprocess.run([sys.executable, "-c", CHILD, str(path), str(args.bootstrap),
                              "1" if args.trace else "0"], capture_output=True, text=True,
                             check=True, env=dict(os.environ, OPENBLAS_NUM_THREADS="1"))
    import json

    out = json.loads(run.stdout.strip().splitlines()[-1])
    data = out["samples"] * 8
    peak = (out["maxrss_kib"] - out["base_kib"]) * 1024
    mib = 2**20
    print("command: .venv/bin/python benchmarks/bench_memory.py"
          + (f" --bootstrap {args.bootstrap}" if args.bootstrap != 40 else ""))
    print()
    print("| measure | value | × float64 data | target |")
    print("|---|---|---|---|")
    print(f"| float64 size of the data ({N_SWEEPS} sweeps × {SWEEP_S:g} s × "
          f"{RATE_HZ / 1e3:g} kHz) | {data / mib:.0f} MiB | 1 | |")
    print(f"| peak resident memory of load + `analyze` (bootstrap {args.bootstrap}), above "
          f"the imports | {peak / mib:.0f} MiB | {peak / data:.2f} | ≤ {TARGET:g} |")
    if "traced_peak" in out:
        print(f"| tracemalloc peak of load + `analyze` | {out['traced_peak'] / mib:.0f} MiB | "
              f"{out['traced_peak'] / data:.2f} | |")
    print()
    print(f"samples held as {out['dtype']}; load + analysis {out['seconds']:.0f} s "
          f"(file made in {made:.0f} s); τ0 {out['tau0_ms']} ms; Python "
          f"{sys.version.split()[0]}; load average {os.getloadavg()[0]:.1f} on "
          f"{os.cpu_count()} cores")


if __name__ == "__main__":
    main()
