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
    add_settings_arguments(p)


def run(args: argparse.Namespace) -> int:
    from passivefit.batch import run_batch
    from passivefit.store.database import StoreError

    try:
        summary = run_batch(args.paths, args.db, settings_from(args), workers=args.workers,
                            sheet=args.sheet, metadata=args.metadata, reports=args.reports,
                            reanalyse=args.reanalyse)
    except StoreError as exc:
        from passivefit.cli import UsageError

        raise UsageError(str(exc)) from None
    _report(summary)
    return 1 if summary.failed else 0


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
