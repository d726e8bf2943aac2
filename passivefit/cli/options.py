"""Options that change the analysis, shared by `analyze`, `batch` and `gui`."""

from __future__ import annotations

import argparse


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
    p.add_argument("--all-sweeps", action="store_true",
                   help="take the cell values from all accepted sweeps even when R_in drifts "
                        "(default: from the longest stable stretch)")
    p.add_argument("--channel", metavar="NAME_OR_INDEX",
                   help="the membrane-potential channel, when the file has several")
    p.add_argument("--bootstrap", type=int, default=40, metavar="N",
                   help="resamples over sweeps for the 95 %% CIs (0: from the fit covariance, "
                        "about 4x faster; default 40)")


def settings_from(args: argparse.Namespace):
    from passivefit.cli import UsageError
    from passivefit.io.recording import StepSpec
    from passivefit.model.settings import Settings

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
                        correct_bridge=not args.no_bridge_correction,
                        all_sweeps=args.all_sweeps, channel=args.channel)
    except ValueError as exc:  # name the option, not the setting
        raise UsageError(str(exc).replace("`filter_hz`", "`--filter-hz`")
                         .replace("`area_um2`", "`--area-um2`")) from None
