"""Batch throughput (sweeps/s) and peak memory for folders of N and 4N recordings.

Writes simulated recordings of invented cells (20 kHz, 1 s sweeps, NWB with the
command current), runs `passivefit batch FOLDER --db FILE --workers 2` as a
separate process and samples the resident memory of that process and its worker
processes (summed, from /proc, every 20 ms). Targets (issue #14): >= 150 sweeps/s with
2 workers, and >= 85 % of two single-core rates; peak memory for 4N files about the same
as for N (bounded, not growing with the folder).

    python benchmarks/bench_batch.py [--files N] [--sweeps S] [--workers W] [--data DIR]

Linux only (reads /proc). Prints one line per folder size and a verdict.
"""

from __future__ import annotations

import argparse
import os
import re
import subprocess
import sys
import tempfile
import time
from pathlib import Path

for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")   # the one-core rate on one core, as each worker runs

TARGET_SWEEPS_PER_S = 150.0


def write_recordings(folder: Path, n_files: int, n_sweeps: int) -> list[Path]:
    """`n_files` simulated step recordings (files already there are reused)."""
    from passivefit.io import save
    from passivefit.simulate import BallStick, StepProtocol, simulate_recording

    folder.mkdir(parents=True, exist_ok=True)
    amplitudes = (-50e-12, -30e-12, -10e-12, 10e-12)
    paths = []
    for k in range(n_files):
        path = folder / f"LOL-2026-12-{1 + k % 28:02d}-c{k + 1}_s{n_sweeps}.nwb"
        if not path.exists():
            cell = BallStick.from_electrotonic((15 + k % 20) * 1e-3, 0.8 + 0.02 * (k % 20),
                                               2.0 + k % 7, (80 + 10 * (k % 25)) * 1e6)
            recording, _ = simulate_recording(
                cell, protocol=StepProtocol(0.1, 0.5, amplitudes), sample_rate_hz=20_000,
                sweep_duration_s=1.0, n_sweeps=n_sweeps, seed=k,
                cell_id=f"LOL-2026-12-{1 + k % 28:02d}-c{k + 1}")
            save(recording, path)
        paths.append(path)
    return paths


def _tree_rss_kib(pid: int) -> int:
    """Resident memory of `pid` and all its descendants, in KiB (0 when gone)."""
    total, stack = 0, [pid]
    while stack:
        p = stack.pop()
        try:
            status = Path(f"/proc/{p}/status").read_text()
            total += int(re.search(r"VmRSS:\s+(\d+)", status).group(1))
            for task in Path(f"/proc/{p}/task").iterdir():
                stack.extend(int(c) for c in (task / "children").read_text().split())
        except (OSError, AttributeError):
            continue
    return total


def installed_env(folder: Path) -> dict:
    """The environment of a batch run, with passivefit's modules compiled once, as an
    installed package has them (pip compiles on install; bench_analyze does the same),
    not on every start of the parent and of each spawned worker, as
    PYTHONDONTWRITEBYTECODE would have it. The bytecode goes to a cache beside the data,
    filled before the runs (main compiles the package into it)."""
    env = dict(os.environ)
    env.pop("PYTHONDONTWRITEBYTECODE", None)
    env["PYTHONPYCACHEPREFIX"] = str(folder / "pycache")
    return env


def run_batch(folder: Path, db: Path, workers: int, bootstrap: int) -> tuple[float, int, str]:
    """Wall time in s, peak summed RSS in KiB and stdout of one batch run."""
    db.unlink(missing_ok=True)
    start = time.perf_counter()
    proc = subprocess.Popen([sys.executable, "-m", "passivefit.cli", "batch", str(folder), "--db",
                             str(db), "--workers", str(workers), "--bootstrap", str(bootstrap)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=installed_env(db.parent))
    peak = 0
    while proc.poll() is None:
        peak = max(peak, _tree_rss_kib(proc.pid))
        time.sleep(0.02)
    seconds = time.perf_counter() - start
    out, err = proc.communicate()
    if proc.returncode != 0:
        raise SystemExit(f"batch failed ({proc.returncode}):\n{out}\n{err}")
    return seconds, peak, out


def serial_rate(paths: list[Path], bootstrap: int) -> float:
    """Sweeps/s of a batch worker's work (batch.analyse_file: load, analyze without the
    rig's advice, the result as plain data) in this process, one file after another."""
    from passivefit.analysis import Settings
    from passivefit.batch import analyse_file

    settings = Settings(bootstrap=bootstrap)
    analyse_file(str(paths[0]), settings)  # imports and caches out of the timing
    start, sweeps = time.perf_counter(), 0
    for path in paths:
        sweeps += len(analyse_file(str(path), settings).result["sweeps"])
    return sweeps / (time.perf_counter() - start)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--files", type=int, default=20,
                        help="N (the larger folder has 4N: 80 files, as the speed issue measures)")
    parser.add_argument("--sweeps", type=int, default=10, help="sweeps per recording")
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--bootstrap", type=int, default=40,
                        help="resamples for the CIs, as `passivefit batch --bootstrap`")
    parser.add_argument("--data", type=Path,
                        default=Path(tempfile.gettempdir()) / "passivefit-bench-batch",
                        help="folder for the recordings (kept and reused between runs)")
    args = parser.parse_args()
    print(f"command: python benchmarks/bench_batch.py --files {args.files} --sweeps "
          f"{args.sweeps} --workers {args.workers} --bootstrap {args.bootstrap}")
    args.data.mkdir(parents=True, exist_ok=True)
    package = Path(__file__).resolve().parents[1] / "passivefit"
    subprocess.run([sys.executable, "-m", "compileall", "-q", str(package)], check=True,
                   stdout=subprocess.DEVNULL, env=installed_env(args.data))
    results = []
    for n in (args.files, 4 * args.files):
        folder = args.data / f"n{n}_s{args.sweeps}"
        t0 = time.perf_counter()
        write_recordings(folder, n, args.sweeps)
        prepared = time.perf_counter() - t0
        seconds, peak_kib, out = run_batch(folder, args.data / f"n{n}.db", args.workers,
                                           args.bootstrap)
        sweeps = n * args.sweeps
        rate = sweeps / seconds
        analysed = re.search(r"(\d+) analysed \((\d+) sweeps\)", out)
        if analysed is None or int(analysed.group(2)) != sweeps:
            raise SystemExit(f"expected {sweeps} analysed sweeps, batch said:\n{out}")
        # rate of the analysis alone, as the batch reports it (excludes start-up)
        reported = re.search(r"([\d.]+) sweeps/s", out)
        results.append((n, sweeps, seconds, rate, peak_kib))
        print(f"{n:4d} files  {sweeps:5d} sweeps  {seconds:6.1f} s wall  {rate:6.1f} sweeps/s "
              f"(batch's own count {reported.group(1) if reported else '?'})  peak RSS "
              f"parent+workers {peak_kib / 1024:6.0f} MiB  (data written in {prepared:.0f} s)")

    (_, _, _, _, peak_n), (_, _, _, rate_4n, peak_4n) = results
    # on the same files as the 4N batch: the cells differ, and so does their cost
    one_core = serial_rate(write_recordings(args.data / f"n{4 * args.files}_s{args.sweeps}",
                                            4 * args.files, args.sweeps), args.bootstrap)
    print(f"a worker's work alone, one core, no batch: {one_core:.1f} sweeps/s -> with "
          f"{args.workers} workers at most {args.workers * one_core:.0f} sweeps/s; the batch "
          f"reached {rate_4n / (args.workers * one_core):.0%} of that at 4N")
    growth = peak_4n / peak_n
    print(f"throughput at 4N: {rate_4n:.0f} sweeps/s (target >= {TARGET_SWEEPS_PER_S:.0f}): "
          f"{'met' if rate_4n >= TARGET_SWEEPS_PER_S else 'NOT met'}")
    print(f"peak memory 4N / N = {growth:.2f} "
          f"({'bounded' if growth < 1.3 else 'GROWS with the folder'})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
