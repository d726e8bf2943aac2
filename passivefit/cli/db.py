"""`passivefit db list|export|plot --db URL`: read the cell database.

All three show the current analysis of every recording (one row per recording;
the cell columns come from the recording file and the metadata CSV), optionally
filtered with ``--where`` (see `passivefit.store.query`).
"""

from __future__ import annotations

import argparse
import sys

from passivefit.model import schema as S

PLOT_SUFFIXES = (".png", ".pdf", ".svg")


def add_arguments(p: argparse.ArgumentParser) -> None:
    sub = p.add_subparsers(dest="db_command", metavar="ACTION", required=True)
    listing = sub.add_parser("list", help="print the current analysis of every recording")
    export = sub.add_parser("export", help="write the current analyses to a sheet")
    export.add_argument("file", metavar="FILE", help=".csv, .tsv, .xlsx or .json")
    plot = sub.add_parser("plot", help="plot distributions of key values by group")
    plot.add_argument("--by", default="region", metavar="KEY",
                      help="group by this cell column (default: region)")
    plot.add_argument("file", metavar="FILE", help=".png, .pdf or .svg")
    for action in (listing, export, plot):
        action.add_argument("--db", required=True, metavar="URL",
                            help="SQLite file path, sqlite:///FILE or postgresql+psycopg://...")
        action.add_argument("--where", metavar="FILTER",
                            help='e.g. "region=CA1 and tau0_ms<30" (keys: cell and result '
                                 "columns; operators = != < <= > >= ~)")


def run(args: argparse.Namespace) -> int:
    from sqlalchemy.exc import SQLAlchemyError

    from passivefit.cli import UsageError
    from passivefit.store.database import StoreError
    from passivefit.store.query import open_for_reading, parse_where

    action = {"list": _list, "export": _export, "plot": _plot}[args.db_command]
    try:
        conditions = parse_where(args.where) if args.where else []
        _check_target(args)
        database = open_for_reading(args.db)
    except (ValueError, StoreError) as exc:
        raise UsageError(str(exc)) from None
    try:
        rows = database.current_analyses(conditions)
        return action(args, database, rows)
    except SQLAlchemyError as exc:
        orig = getattr(exc, "orig", None)
        reason = str(orig if orig is not None else exc).strip().splitlines()[:1]
        raise UsageError(f"`--db` {args.db}: cannot read it ({''.join(reason)})") from None
    finally:
        database.close()


def _check_target(args: argparse.Namespace) -> None:
    from pathlib import Path

    from passivefit.export.sheets import SHEET_SUFFIXES
    from passivefit.store.query import FILTER_COLUMNS

    if args.db_command == "export" and Path(args.file).suffix.lower() not in SHEET_SUFFIXES:
        raise ValueError(f"{args.file}: use one of {', '.join(SHEET_SUFFIXES)}")
    if args.db_command == "plot":
        if Path(args.file).suffix.lower() not in PLOT_SUFFIXES:
            raise ValueError(f"{args.file}: use one of {', '.join(PLOT_SUFFIXES)}")
        if args.by not in FILTER_COLUMNS:
            raise ValueError(f"`--by`: unknown key {args.by!r}; e.g. region, cell_type, "
                             "preparation, date")
    if args.db_command in ("export", "plot"):
        from passivefit.cli import check_writable

        check_writable(args.file, args.db_command)


# ---------------------------------------------------------------------------- list
def _list(args, database, rows) -> int:
    counts = database.analysis_counts()
    columns = [(S.CELL_ID.key, S.CELL_ID.key, 20), ("region", "region", 12),
               (S.TAU0.key, S.TAU0.key, 8), (S.R_IN.key, S.R_IN.key, 9),
               (S.L_BS.key, S.L_BS.key, 6), (S.N_SWEEPS_USED.key, "sweeps", 6),
               ("revs", "revs", 4), ("analysed", "analysed", 10)]
    print("  ".join(f"{header:<{width}}" for _, header, width in columns) + "  path")
    for r in rows:
        values = {**r.cell, **r.analysis, "revs": counts.get(r.recording["id"], 0),
                  "analysed": r.analysis["analysed_at"].date().isoformat()}
        cells = [_cell_text(values.get(key), width) for key, _, width in columns]
        print("  ".join(cells) + "  " + r.recording["path"])
    n_cells = len({r.cell[S.CELL_ID.key] for r in rows})
    print(f"{len(rows)} recordings, {n_cells} cells")
    return 0


def _cell_text(value, width: int) -> str:
    if value is None:
        text = "—"
    elif isinstance(value, float):
        text = f"{value:.4g}"
    else:
        text = str(value)
    return f"{text[:width]:<{width}}"


# ---------------------------------------------------------------------------- export
def _export(args, database, rows) -> int:
    from passivefit.export.sheets import write_sheet
    from passivefit.store.database import annotations_of

    written = write_sheet([r.result for r in rows], args.file, annotations=annotations_of(rows))
    print(f"{len(rows)} recordings → " + ", ".join(str(p) for p in written))
    return 0


# ---------------------------------------------------------------------------- plot
def _plot(args, database, rows) -> int:
    from passivefit.export.dbplot import plot_by_group

    if not rows:
        print("passivefit: no analyses match; nothing to plot", file=sys.stderr)
        return 1
    n_groups = plot_by_group([(r.cell, r.recording, r.analysis) for r in rows], args.by,
                             args.file)
    print(f"{len(rows)} recordings in {n_groups} groups → {args.file}")
    return 0
