"""Time of `passivefit analyze` on a 60-sweep, 20 kHz, 1 s/sweep NWB file, and its
CPU time paired against a plain hand script on the same file.

Run:  .venv/bin/python benchmarks/bench_analyze.py
Targets: ≤ 1.5 s wall including start-up (issue: fitting engine); CPU time ≤ 0.4× that
of the anchor (issue: speed). The anchor is what a person would write by hand: read the
NWB with pynwb, average the sweeps of each amplitude, and fit two exponentials plus an
offset to the charging of each average with scipy's curve_fit, bootstrapping nothing.
The runs alternate (anchor, passivefit, anchor, …), each in a fresh process, one BLAS
thread. The recording is simulated (ball-and-stick, L = 1, ρ = 5, 4 step amplitudes).
"""

from __future__ import annotations

import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")


def make_file(folder: Path) -> Path:
    from passivefit.io import save
    from passivefit.simulate import BallStick, StepProtocol, simulate_recording

    cell = BallStick.from_electrotonic(0.022, 1.0, 5.0, 110e6)
    protocol = StepProtocol(0.1, 0.5, (-50e-12, -30e-12, -10e-12, 10e-12))
    rec, _ = simulate_recording(cell, protocol=protocol, n_sweeps=60, sweep_duration_s=1.0,
                                sample_rate_hz=20_000, seed=7)
    path = folder / "LOL-2026-11-30-c9_bench.nwb"
    save(rec, path)
    return path


ANCHOR = """
import sys
import numpy as np
from pynwb import NWBHDF5IO
from scipy.optimize import curve_fit

with NWBHDF5IO(sys.argv[1], "r") as io:
    nwb = io.read()
    sweeps = [(np.asarray(s.data[:], float) * s.conversion, s.rate)
              for s in nwb.acquisition.values() if hasattr(s, "rate")]
fs = sweeps[0][1]
on, off = int(0.1 * fs), int(0.6 * fs)
groups = {}
for v, _ in sweeps:
    dv = v[on + int(0.4 * fs):off].mean() - v[:on].mean()
    groups.setdefault(round(dv * 1e4), []).append(v)

def model(t, a0, t0, a1, t1, c):
    return c + a0 * np.exp(-t / t0) + a1 * np.exp(-t / t1)

for members in groups.values():
    avg = np.mean(members, axis=0)
    t = np.arange(off - on - 10) / fs
    y = avg[on + 10:off]
    p0 = (y[0] - y[-1], 0.02, (y[0] - y[-1]) * 0.2, 0.002, y[-1])
    p, cov = curve_fit(model, t, y, p0=p0, maxfev=5000)
    print(p[1], p[3], np.sqrt(np.diag(cov))[1])
"""


def cpu_seconds(cmd: list[str], env: dict) -> float:
    """User + system CPU time of one fresh process running `cmd`, in s."""
    before = os.times()
    subprocess.run(cmd, check=True, capture_output=True, env=env)
    after = os.times()
    return (after.children_user - before.children_user
            + after.children_system - before.children_system)


def main() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        path = make_file(Path(tmp))
        anchor = Path(tmp) / "anchor.py"
        anchor.write_text(ANCHOR)
        env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
        # both programs as installed: their modules compiled once (pip compiles a package
        # on install), not on every start as PYTHONDONTWRITEBYTECODE would have it (that
        # costs passivefit's ~0.5 MB of source ~0.1 s a run); the warm-up runs fill the cache
        env.pop("PYTHONDONTWRITEBYTECODE", None)
        env["PYTHONPYCACHEPREFIX"] = str(Path(tmp) / "pycache")
        cmd = [sys.executable, "-m", "passivefit.cli", "analyze", str(path), "--json"]
        cmd_b0 = [*cmd, "--bootstrap", "0"]
        hand = [sys.executable, str(anchor), str(path)]
        subprocess.run(cmd, check=True, capture_output=True, env=env)  # warm the disk cache
        subprocess.run(cmd_b0, check=True, capture_output=True, env=env)   # and the bytecode
        subprocess.run(hand, check=True, capture_output=True, env=env)
        walls, ratios, ratios_b0, anchors = [], [], [], []
        for _ in range(5):
            a = cpu_seconds(hand, env)
            t = time.perf_counter()
            p = cpu_seconds(cmd, env)
            walls.append(time.perf_counter() - t)
            p0 = cpu_seconds(cmd_b0, env)
            anchors.append(a)
            ratios.append(p / a)
            ratios_b0.append(p0 / a)
    print("command: .venv/bin/python benchmarks/bench_analyze.py")
    print()
    print("| measure | median | min | target |")
    print("|---|---|---|---|")
    print(f"| `passivefit analyze --json`, 60 sweeps × 1 s at 20 kHz (NWB), wall | "
          f"{statistics.median(walls):.2f} s | {min(walls):.2f} s | ≤ 1.5 s |")
    print(f"| anchor script (pynwb + curve_fit), CPU | {statistics.median(anchors):.2f} s | "
          f"{min(anchors):.2f} s | — |")
    print(f"| passivefit CPU / anchor CPU (paired) | {statistics.median(ratios):.2f}× | "
          f"{min(ratios):.2f}× | ≤ 0.4× |")
    print(f"| the same with `--bootstrap 0` | {statistics.median(ratios_b0):.2f}× | "
          f"{min(ratios_b0):.2f}× | ≤ 0.4× |")


if __name__ == "__main__":
    main()
