"""`passivefit analyze PATH`: fit one recording and print its passive properties."""

from __future__ import annotations

import argparse
import json
import sys


def parse_sweeps(text: str) -> tuple[int, ...]:
    """'0-9,12' → (0, 1, ..., 9, 12)."""
    out: list[int] = []
    try:
        for part in text.split(","):
            a, _, b = part.strip().partition("-")
            out.extend(range(int(a), int(b) + 1) if b else [int(a)])
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"`--sweeps` takes indices and ranges like 0-9,12, not {text!r}") from None
    return tuple(out)


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("path", help="recording (.abf, .nwb, .csv, .tsv)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.add_argument("--out", metavar="FILE", help="also write the JSON result to FILE")
    add_settings_arguments(p)


def add_settings_arguments(p: argparse.ArgumentParser) -> None:
    """Options that change the analysis (shared with `batch` and `gui`)."""
    p.add_argument("--sweeps", type=parse_sweeps, metavar="LIST", help="e.g. 0-9,12")
    p.add_argument("--step", nargs="+", type=float,
                   metavar=("ON_MS DURATION_MS AMPLITUDE_PA", "INCREMENT_PA"),
                   help="the current step, for files without a command waveform")
    p.add_argument("--fit-start-ms", type=float, metavar="X",
                   help="start fits X ms after each step edge (default: after the artefact)")
    p.add_argument("--components", choices=["auto", "1", "2", "3"], default="auto")
    p.add_argument("--no-bridge-correction", action="store_true",
                   help="leave the instantaneous jump at the step edge in R_in")
    p.add_argument("--filter-hz", type=float, metavar="F",
                   help="the amplifier's low-pass (−3 dB) corner, when the file does not say")
    p.add_argument("--area-um2", type=float, metavar="A",
                   help="the cell's membrane area, for specific Cm and Rm")
    p.add_argument("--bootstrap", type=int, default=40, metavar="N",
                   help="resamples over sweeps for the 95 %% CIs (0: from the fit covariance, "
                        "about 4x faster; default 40)")


def settings_from(args: argparse.Namespace):
    from passivefit.analysis import Settings
    from passivefit.cli import UsageError
    from passivefit.io.recording import StepSpec

    step = None
    if args.step:
        if len(args.step) not in (3, 4):
            raise UsageError("`--step` takes ON_MS DURATION_MS AMPLITUDE_PA [INCREMENT_PA]")
        on, dur, amp, inc = (*args.step, 0.0)[:4]
        if dur <= 0 or on < 0:
            raise UsageError("`--step`: ON_MS must be >= 0 and DURATION_MS > 0")
        step = StepSpec(on * 1e-3, dur * 1e-3, amp * 1e-12, inc * 1e-12)
    try:
        return Settings(sweeps=args.sweeps, step=step, fit_start_ms=args.fit_start_ms,
                        components=args.components, filter_hz=args.filter_hz,
                        area_um2=args.area_um2, bootstrap=args.bootstrap,
                        correct_bridge=not args.no_bridge_correction)
    except ValueError as exc:  # name the option, not the setting
        raise UsageError(str(exc).replace("`filter_hz`", "`--filter-hz`")
                         .replace("`area_um2`", "`--area-um2`")) from None


def load_and_analyze(path: str, settings):
    """Load and analyse one file; LoadError for anything wrong with the input."""
    from passivefit.analysis import analyze
    from passivefit.io import load

    return analyze(load(path), settings)


def run(args: argparse.Namespace) -> int:
    from passivefit.cli import EXIT_BAD_INPUT, error_line
    from passivefit.io.recording import LoadError

    settings = settings_from(args)
    try:
        result = load_and_analyze(args.path, settings)
    except LoadError as exc:
        print(error_line(exc.path, exc.reason), file=sys.stderr)
        return EXIT_BAD_INPUT
    data = result.to_dict()
    if args.out:
        with open(args.out, "w") as f:
            json.dump(data, f, indent=2)
    if args.json:
        json.dump(data, sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(format_table(data))
    return 0


CELL_ROWS = [
    ("V_rest", "v_rest_mV", None, "mV"),
    ("R_in", "r_in_MOhm", None, "MΩ"),
    ("τ0", "tau0_ms", "tau0_ci95_ms", "ms"),
    ("τ1", "tau1_ms", "tau1_ci95_ms", "ms"),
    ("C0", "c0_mV", None, "mV"),
    ("C1", "c1_mV", None, "mV"),
    ("L (cylinder)", "L_cyl", "L_cyl_ci95", ""),
    ("L (ball-and-stick)", "L_bs", "L_ci95", ""),
    ("ρ", "rho", "rho_ci95", ""),
    ("C from τ0/R_in", "c_tau_pF", None, "pF"),
    ("C total (cable)", "c_total_pF", None, "pF"),
    ("sag ratio", "sag_ratio", None, ""),
    ("bridge jump", "bridge_MOhm", "bridge_ci95_MOhm", "MΩ"),
]


def _fmt(x, digits: int = 4) -> str:
    return "—" if x is None else f"{x:.{digits}g}"


def format_table(data: dict) -> str:
    """A short human-readable summary of an analysis."""
    cell, src = data["cell"], data["source"]
    lines = [f"{src['path']}  ({src['format']}, {src['sweep_count']} sweeps, "
             f"{cell['n_sweeps_used']} used)", ""]
    for label, key, ci, unit in CELL_ROWS:
        value = _fmt(cell.get(key))
        if ci and cell.get(ci) is not None:
            value += f" ± {_fmt(cell[ci], 2)}"
        lines.append(f"  {label:<20} {value:>18} {unit}")
    lines += ["", "  sweep  step pA  V_rest mV  R_in MΩ  τ0 ms   τ1 ms   rmse mV  status"]
    for s in data["sweeps"]:
        status = "ok" if s["accepted"] else f"rejected: {s['reject_reason']}"
        lines.append(f"  {s['index']:>5}  {_fmt(s['step_pA']):>7}  {_fmt(s['v_rest_mV']):>9}  "
                     f"{_fmt(s['r_in_MOhm']):>7}  {_fmt(s['tau0_ms']):>6}  "
                     f"{_fmt(s['tau1_ms'], 3):>6}  {_fmt(s['rmse_mV'], 2):>7}  {status}")
    if data["flags"]:
        lines += ["", "  flags:"] + [f"    [{f['code']}] {f['message']}"
                                     + (f" = {f['value']:.3g}" if f.get("value") is not None
                                        else "") for f in data["flags"]]
    return "\n".join(lines) + "\n"
