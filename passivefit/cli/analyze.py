"""`passivefit analyze PATH`: fit one recording and print its passive properties."""

from __future__ import annotations

import argparse
import json
import sys

from passivefit.cli.options import (
    add_settings_arguments,
    check_against,
    check_fitted,
    settings_from,
)
from passivefit.model import schema as S


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("path", help="recording (.abf, .nwb, .csv, .tsv)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.add_argument("--out", metavar="FILE", help="also write the JSON result to FILE")
    add_settings_arguments(p)


def load_and_analyze(path: str, settings):
    """Load and analyse one file; LoadError for anything wrong with the input, including
    `--step` or `--fit-start-ms` values the recording cannot take."""
    from passivefit.analysis import analyze
    from passivefit.io import load

    recording = load(path, channel=settings.reader_channel)
    check_against(recording, settings)
    result = analyze(recording, settings)
    check_fitted(path, result.to_dict(), settings)
    return result


def run(args: argparse.Namespace) -> int:
    from passivefit.cli import check_writable

    settings = settings_from(args)
    if args.out:
        check_writable(args.out, "--out")  # before the analysis, not after
    result = load_and_analyze(args.path, settings)
    data = result.to_dict()
    if args.json:
        json.dump(data, sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(format_table(data))
    if args.out:
        sys.stdout.flush()
        with open(args.out, "w") as f:  # an OSError here is one line from cli.main
            json.dump(data, f, indent=2)
    return 0


SWEEP_WIDTHS = tuple(zip(S.SWEEP_TABLE, (5, 7, 9, 7, 6, 6, 7), strict=True))
DIGITS = {S.TAU1: 3, S.RMSE: 2}


#: Summary labels that say more than the quantity's short label (as the window's card)
LABELS = {**S.AMPLITUDE_LABELS, S.SAG_RATIO.key: "sag, steady/peak"}

#: Sweep flags named in the table's status column, in a few words.
SWEEP_NOTES = {S.SWEEP_EVENT.code: "spontaneous event cut out",
               S.STEADY_NOT_REACHED.code: "still settling at the step's end",
               S.SWEEP_DRIFT.code: "baseline drifts"}


def _heading(q: S.Quantity) -> str:
    return "sweep" if q is S.INDEX else f"{q.label} {q.unit}".strip()


def _fmt(x, digits: int = 4) -> str:
    return "—" if x is None else f"{x:.{digits}g}"


def format_table(data: dict) -> str:
    """A short human-readable summary of an analysis."""
    cell, src = data["cell"], data["source"]
    lines = [f"{src['path']}  ({src['format']}, {src['sweep_count']} sweeps, "
             f"{cell[S.N_SWEEPS_USED.key]} used)", ""]
    for q in S.SUMMARY:
        value = _fmt(cell.get(q.key)) + S.uncertainty_text(cell, q)
        lines.append(f"  {LABELS.get(q.key, q.label):<20} {value:>18} {q.unit}")
    how = S.legend(cell)
    if how:
        lines += ["", "  " + " · ".join(how)]
    lines += ["", "  " + "  ".join(f"{_heading(q):>{w}}" for q, w in SWEEP_WIDTHS) + "  status"]
    for s in data["sweeps"]:
        status = "ok" if s[S.ACCEPTED.key] else f"rejected: {s[S.REJECT_REASON.key]}"
        codes = {f["code"] for f in s[S.FLAGS_KEY]}
        notes = [note for code, note in SWEEP_NOTES.items() if code in codes]
        if s[S.ACCEPTED.key] and s[S.TAU0.key] is None and s[S.RMSE.key] is not None:
            notes.append("τ0 not resolved in this sweep alone")   # fitted, CI too wide
        status += f" ({'; '.join(notes)})" if notes else ""
        cells = [f"{_fmt(s[q.key], DIGITS.get(q, 4)):>{w}}" for q, w in SWEEP_WIDTHS]
        lines.append("  " + "  ".join(cells) + f"  {status}")
    if data["flags"]:
        lines += ["", "  flags:"] + [f"    [{f['code']}] {f['message']}"
                                     + (f" = {f['value']:.3g}" if f.get("value") is not None
                                        else "") for f in data["flags"]]
    return "\n".join(lines) + "\n"
