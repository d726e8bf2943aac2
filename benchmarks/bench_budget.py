"""What the analysis costs against the CPU budgets of issue #14, with and without its two
dearest parts: the bootstrap and the ball-and-stick (chain) fit.

Issue #14 asks for ≤ 10 ms of CPU per sweep in a batch of 10-sweep files and for
`analyze --json` on a 60-sweep file at ≤ 0.4× the CPU of a hand script (the anchor of
`bench_analyze.py`). This prints, for the batch's files (one core, as a batch worker
analyses them) and for the 60-sweep file, the CPU of the analysis as shipped, with
`bootstrap=0`, and with `bootstrap=0` and no chain fit at all (the fit replaced by "no
model", as for a cell that is not passive). The last is not a setting: it shows what is
left when the two are free. The 60-sweep file's budget for the analysis is 0.4× the
anchor's CPU minus what a fresh process spends before analysing (interpreter, imports,
reading the file), both measured here in fresh processes.

    python benchmarks/bench_budget.py

All recordings are simulated (invented cells, as in bench_batch.py and bench_analyze.py).
"""

from __future__ import annotations

import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")   # one core, as a batch worker runs

sys.path.insert(0, str(Path(__file__).parent))
from bench_analyze import ANCHOR, cpu_seconds, make_file  # noqa: E402
from bench_batch import write_recordings  # noqa: E402

VARIANTS = ("as shipped", "bootstrap 0", "bootstrap 0, no chain fit")
START_AND_READ = "import sys, passivefit.cli; from passivefit.io import load; load(sys.argv[1])"


def analysis_cpu(recordings: list, variant: str, advise: bool) -> float:
    """CPU seconds of analysing `recordings` once each, after one warm-up analysis."""
    from passivefit.analysis import Settings, analyze, pipeline

    settings = Settings(bootstrap=0) if variant != "as shipped" else Settings()
    shipped = pipeline.fit_cable
    if variant.endswith("no chain fit"):
        pipeline.fit_cable = lambda *args, **kwargs: (None, None)
    try:
        analyze(recordings[0], settings, advise=advise)
        start = time.process_time()
        for recording in recordings:
            analyze(recording, settings, advise=advise)
        return time.process_time() - start
    finally:
        pipeline.fit_cable = shipped


def print_table(header: tuple[str, ...], rows: list[tuple[str, ...]]) -> None:
    """A Markdown table, as the README holds it."""
    for row in (header, ("---",) * len(header), *rows):
        print("| " + " | ".join(row) + " |")


def main() -> None:
    from passivefit.io import load

    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        files = write_recordings(folder / "batch", 20, 10)
        batch = [load(path) for path in files]
        n_sweeps = sum(len(r.sweeps) for r in batch)
        print("command: python benchmarks/bench_budget.py")
        print()
        print("10-sweep files (20 files, one core, as a batch worker; target ≤ 10 ms/sweep)")
        print()
        print_table(("analysis", "CPU per sweep"), [
            (v, f"{1000 * analysis_cpu(batch, v, advise=False) / n_sweeps:.1f} ms")
            for v in VARIANTS])

        path = make_file(folder)
        anchor = folder / "anchor.py"
        anchor.write_text(ANCHOR)
        env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1",
                   PYTHONPYCACHEPREFIX=str(folder / "pycache"))
        env.pop("PYTHONDONTWRITEBYTECODE", None)   # as installed: bytecode compiled once
        hand = [sys.executable, str(anchor), str(path)]
        before = [sys.executable, "-c", START_AND_READ, str(path)]
        for cmd in (hand, before):   # warm the disk and bytecode caches
            cpu_seconds(cmd, env)
        anchor_cpu = statistics.median(cpu_seconds(hand, env) for _ in range(3))
        before_cpu = statistics.median(cpu_seconds(before, env) for _ in range(3))
        budget = 0.4 * anchor_cpu - before_cpu
        long = [load(path)]
        print()
        print(f"60-sweep file: anchor {anchor_cpu:.2f} s of CPU, so 0.4× is "
              f"{0.4 * anchor_cpu:.2f} s; start-up and reading {before_cpu:.2f} s; "
              f"left for the analysis {budget:.2f} s")
        print()
        cpus = [analysis_cpu(long, v, advise=True) for v in VARIANTS]
        print_table(("analysis (with the design advice, as `analyze` has it)", "CPU",
                     "of the budget"),
                    [(v, f"{c:.2f} s", f"{c / budget:.1f}×")
                     for v, c in zip(VARIANTS, cpus, strict=True)])


if __name__ == "__main__":
    main()
