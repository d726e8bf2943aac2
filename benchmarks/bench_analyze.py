"""Wall time of `passivefit analyze` on a 60-sweep, 20 kHz, 1 s/sweep NWB file.

Run:  .venv/bin/python benchmarks/bench_analyze.py
Target (issue: fitting engine): ≤ 1.5 s wall including start-up, on one core.
The recording is simulated (ball-and-stick, L = 1, ρ = 5, 4 step amplitudes).
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


def main() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        path = make_file(Path(tmp))
        env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
        cmd = [sys.executable, "-m", "passivefit.cli", "analyze", str(path), "--json"]
        subprocess.run(cmd, check=True, capture_output=True, env=env)  # warm the disk cache
        walls = []
        for _ in range(5):
            t = time.perf_counter()
            subprocess.run(cmd, check=True, capture_output=True, env=env)
            walls.append(time.perf_counter() - t)
    print("command: .venv/bin/python benchmarks/bench_analyze.py")
    print()
    print("| measure | median | min | target |")
    print("|---|---|---|---|")
    print(f"| `passivefit analyze --json`, 60 sweeps × 1 s at 20 kHz (NWB), wall | "
          f"{statistics.median(walls):.2f} s | {min(walls):.2f} s | ≤ 1.5 s |")


if __name__ == "__main__":
    main()
