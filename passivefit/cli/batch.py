"""`passivefit batch PATH ... --db URL`: folders of recordings → analyses → cell database
(the work itself is `passivefit.batch.run_batch`)."""

from __future__ import annotations

import argparse
import sys

from passivefit.cli.options import add_settings_arguments, settings_from
from passivefit.model.schema import METADATA_KEYS


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("paths", nargs="+", metavar="PATH", help="recording files or folders")
    p.add_argument("--db", required=True, metavar="URL",
                   help="database: an SQLite file path, sqlite:///FILE or "
                        "postgresql+psycopg://USER@HOST/DB")
    p.add_argument("--workers", type=int, metavar="N",
                   help="analysis processes (default: min(2, CPUs))")
    p.add_argument("--sheet", metavar="FILE",
                   help="also write the current results of these files to FILE "
                        "(.csv/.tsv, .xlsx or .json)")
    p.add_argument("--metadata", metavar="FILE.csv",
                   help="cell metadata: a `file` column plus any of " + ", ".join(METADATA_KEYS))
    p.add_argument("--reports", metavar="DIR",
                   help="also write a PDF report per analysed recording into DIR "
                        "(<file stem>-<hash prefix>.pdf; slower)")
    p.add_argument("--reanalyse", action="store_true",
                   help="analyse files already in the database again and store a new "
                        "revision (earlier analyses are kept)")
    p.add_argument("--file-timeout", type=float, default=300.0, metavar="S",
                   help="give up on a file after S seconds; its worker is replaced "
                        "(default 300)")
    p.add_argument("--file-memory-mb", type=int, default=4096, metavar="MB",
                   help="memory (address space) per worker process; a file that needs more "
                        "fails (default 4096; 0: no limit)")
    add_settings_arguments(p)


def run(args: argparse.Namespace) -> int:
    import math

    from passivefit.batch import ConsoleProgress, Limits, run_batch
    from passivefit.cli import UsageError
    from passivefit.store.database import StoreError

    if not (math.isfinite(args.file_timeout) and args.file_timeout > 0):
        raise UsageError(f"`--file-timeout` must be a positive number of seconds, not "
                         f"{args.file_timeout:g}")
    if args.file_memory_mb < 0 or 0 < args.file_memory_mb < 256:
        raise UsageError(f"`--file-memory-mb` must be 0 (no limit) or at least 256, not "
                         f"{args.file_memory_mb}")
    limits = Limits(seconds=args.file_timeout, memory_mb=args.file_memory_mb)
    try:
        summary = run_batch(args.paths, args.db, settings_from(args), workers=args.workers,
                            sheet=args.sheet, metadata=args.metadata, reports=args.reports,
                            reanalyse=args.reanalyse, limits=limits,
                            progress=ConsoleProgress(sys.stderr))
    except StoreError as exc:
        raise UsageError(str(exc)) from None
    _report(summary)
    return 1 if summary.failed or summary.report_failed else 0


def _report(summary) -> None:
    seconds = summary.seconds
    total = len(summary.stored) + len(summary.skipped) + len(summary.failed)
    rate = f", {summary.sweeps / seconds:.0f} sweeps/s" if summary.sweeps and seconds > 0 else ""
    print(f"batch: {total} files: {len(summary.stored)} analysed ({summary.sweeps} sweeps), "
          f"{len(summary.skipped)} skipped, {len(summary.failed)} failed in {seconds:.1f} s{rate}")
    if summary.unused_metadata:
        print(f"note: {summary.unused_metadata} metadata rows matched none of these files",
              file=sys.stderr)
    if summary.failed:
        print("failed files:", file=sys.stderr)
        for path, reason in summary.failed:
            print(f"  {path}: {reason}", file=sys.stderr)
    if summary.report_failed:
        print("reports not written (the analyses are stored):", file=sys.stderr)
        for path, reason in summary.report_failed:
            print(f"  {path}: {reason}", file=sys.stderr)
