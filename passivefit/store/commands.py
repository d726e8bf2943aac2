"""`passivefit db list|export|plot --db URL`: read the cell database.

All three show the current analysis of every recording (one row per recording;
the cell columns come from the recording file and the metadata CSV), optionally
filtered with ``--where`` (see `passivefit.store.query`).
"""

from __future__ import annotations

import argparse
import sys

PLOT_SUFFIXES = (".png", ".pdf", ".svg")
# (analysis column, axis label); the L panel falls back to L_cyl when no L_bs exists.
PLOT_PANELS = (("tau0_ms", "τ0 (ms)"), ("r_in_MOhm", "R_in (MΩ)"), ("L_bs", "L (ball-and-stick)"),
               ("c_total_pF", "C total (pF)"))


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
    from passivefit.cli import UsageError
    from passivefit.store.database import StoreError, open_database
    from passivefit.store.query import parse_where

    action = {"list": _list, "export": _export, "plot": _plot}[args.db_command]
    try:
        conditions = parse_where(args.where) if args.where else []
        _check_target(args)
        database = open_database(args.db, create=False)
    except (ValueError, StoreError) as exc:
        raise UsageError(str(exc)) from None
    try:
        rows = database.current_analyses(conditions)
        return action(args, database, rows)
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


def annotations_of(rows) -> list[dict]:
    """Per-row sheet columns from the database: cell metadata, analysis time, revision."""
    return [{**r.cell, "analysed_at": r.analysis["analysed_at"],
             "revision": r.analysis["revision"]} for r in rows]


# ---------------------------------------------------------------------------- list
def _list(args, database, rows) -> int:
    counts = database.analysis_counts()
    columns = [("cell_id", "cell_id", 20), ("region", "region", 12), ("tau0_ms", "tau0_ms", 8),
               ("r_in_MOhm", "r_in_MOhm", 9), ("L_bs", "L_bs", 6), ("n_sweeps_used", "sweeps", 6),
               ("revs", "revs", 4), ("analysed", "analysed", 10)]
    print("  ".join(f"{header:<{width}}" for _, header, width in columns) + "  path")
    for r in rows:
        values = {**r.cell, **r.analysis, "revs": counts.get(r.recording["id"], 0),
                  "analysed": r.analysis["analysed_at"].date().isoformat()}
        cells = [_cell_text(values.get(key), width) for key, _, width in columns]
        print("  ".join(cells) + "  " + r.recording["path"])
    n_cells = len({r.cell["cell_id"] for r in rows})
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

    written = write_sheet([r.result for r in rows], args.file, annotations=annotations_of(rows))
    print(f"{len(rows)} recordings → " + ", ".join(str(p) for p in written))
    return 0


# ---------------------------------------------------------------------------- plot
def _plot(args, database, rows) -> int:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import numpy as np

    if not rows:
        print("passivefit: no analyses match; nothing to plot", file=sys.stderr)
        return 1
    groups = sorted({_group(r, args.by) for r in rows})
    panels = list(PLOT_PANELS)
    if all(r.analysis["L_bs"] is None for r in rows):
        panels[2] = ("L_cyl", "L (equivalent cylinder)")
    fig, axes = plt.subplots(2, 2, figsize=(9, 7), layout="constrained")
    rng = np.random.default_rng(0)  # jitter only; fixed so the figure is reproducible
    for ax, (key, label) in zip(axes.flat, panels, strict=True):
        data = [[r.analysis[key] for r in rows
                 if _group(r, args.by) == g and r.analysis[key] is not None] for g in groups]
        positions = np.arange(1, len(groups) + 1)
        filled = [(p, d) for p, d in zip(positions, data, strict=True) if d]
        if filled:
            ax.boxplot([d for _, d in filled], positions=[p for p, _ in filled], widths=0.5,
                       showfliers=False, medianprops={"color": "#b5472d"})
        for p, d in filled:
            ax.scatter(p + rng.uniform(-0.12, 0.12, len(d)), d, s=14, color="#2b6f8f",
                       alpha=0.8, zorder=3)
        ax.set_xticks(positions, [f"{g}\n(n={len(d)})" for g, d in zip(groups, data,
                                                                          strict=True)])
        ax.set_ylabel(label)
        ax.grid(axis="y", alpha=0.3)
    fig.suptitle(f"Current analyses by {args.by} ({len(rows)} recordings)")
    fig.savefig(args.file)
    plt.close(fig)
    print(f"{len(rows)} recordings in {len(groups)} groups → {args.file}")
    return 0


def _group(row, key: str) -> str:
    merged = {**row.cell, **row.recording, **row.analysis}
    value = merged.get(key)
    return "(none)" if value is None else str(value)
