"""Options that change the analysis, shared by `analyze`, `batch` and `gui`."""

from __future__ import annotations

import argparse
import math

MAX_BOOTSTRAP = 10_000  # beyond this the CIs do not improve and one file takes minutes
MAX_SWEEP_INDEX = 100_000  # no recording has more sweeps; bounds `--sweeps 0-999999999`


def parse_sweeps(text: str) -> tuple[int, ...]:
    """'0-9,12' → (0, 1, ..., 9, 12); UsageError for anything else."""
    from passivefit.cli import UsageError

    out: list[int] = []
    try:
        for part in text.split(","):
            a, _, b = part.strip().partition("-")
            first, last = int(a), int(b) if b else int(a)
            if not 0 <= first <= last <= MAX_SWEEP_INDEX:
                raise ValueError
            out.extend(range(first, last + 1))
    except ValueError:
        raise UsageError(
            f"`--sweeps` takes indices and ranges like 0-9,12 (0 to {MAX_SWEEP_INDEX}), "
            f"not {text!r}") from None
    return tuple(out)


def add_settings_arguments(p: argparse.ArgumentParser) -> None:
    """Options that change the analysis (shared with `batch` and `gui`)."""
    p.add_argument("--sweeps", metavar="LIST", help="e.g. 0-9,12")
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
    p.add_argument("--keep-hum", action="store_true",
                   help="leave 50/60 Hz mains hum in the sweeps (default: fitted in each "
                        "sweep's flat stretches and taken out before the fits)")
    p.add_argument("--channel", metavar="NAME_OR_INDEX",
                   help="the membrane-potential channel, when the file has several")
    p.add_argument("--bootstrap", type=int, default=40, metavar="N",
                   help="resamples over sweeps for the 95 %% CIs (0: from the fit covariance, "
                        f"about 4x faster; default 40, at most {MAX_BOOTSTRAP})")


def settings_from(args: argparse.Namespace):
    from passivefit.cli import UsageError
    from passivefit.io.recording import StepSpec
    from passivefit.model.settings import Settings

    for option, value in (("--fit-start-ms", args.fit_start_ms), ("--filter-hz", args.filter_hz),
                          ("--area-um2", args.area_um2), *(("--step", v) for v in args.step or ())):
        if value is not None and not math.isfinite(value):
            raise UsageError(f"`{option}` takes finite numbers, not {value}")
    if not 0 <= args.bootstrap <= MAX_BOOTSTRAP:
        raise UsageError(f"`--bootstrap` takes 0 to {MAX_BOOTSTRAP} resamples, not "
                         f"{args.bootstrap}")
    step = None
    if args.step:
        if len(args.step) not in (3, 4):
            raise UsageError("`--step` takes ON_MS DURATION_MS AMPLITUDE_PA [INCREMENT_PA]")
        on, dur, amp, inc = (*args.step, 0.0)[:4]
        if dur <= 0 or on < 0:
            raise UsageError("`--step`: ON_MS must be >= 0 and DURATION_MS > 0")
        step = StepSpec(on * 1e-3, dur * 1e-3, amp * 1e-12, inc * 1e-12)
    sweeps = None if args.sweeps is None else parse_sweeps(args.sweeps)
    try:
        return Settings(sweeps=sweeps, step=step, fit_start_ms=args.fit_start_ms,
                        components=args.components, filter_hz=args.filter_hz,
                        area_um2=args.area_um2, bootstrap=args.bootstrap,
                        correct_bridge=not args.no_bridge_correction,
                        all_sweeps=args.all_sweeps, channel=args.channel,
                        remove_hum=not args.keep_hum)
    except ValueError as exc:  # name the option, not the setting
        raise UsageError(str(exc).replace("`filter_hz`", "`--filter-hz`")
                         .replace("`area_um2`", "`--area-um2`")) from None


def check_against(recording, settings) -> None:
    """LoadError when `--step` or `--fit-start-ms` cannot fit this recording's sweeps."""
    from passivefit.io.recording import LoadError

    if not recording.sweeps:
        return
    sweep_ms = 1e3 * min(len(s.voltage) for s in recording.sweeps) / recording.sample_rate_hz
    step = settings.step
    if step is not None:
        end_ms = 1e3 * (step.onset_s + step.duration_s)
        if end_ms >= sweep_ms:
            raise LoadError(recording.path, f"`--step` ends at {end_ms:g} ms, at or after the "
                            f"end of the sweeps ({sweep_ms:g} ms); give the step's onset and "
                            "duration in ms")
        if settings.fit_start_ms is not None and settings.fit_start_ms >= 1e3 * step.duration_s:
            raise LoadError(recording.path, f"`--fit-start-ms` {settings.fit_start_ms:g} is not "
                            f"within the step ({1e3 * step.duration_s:g} ms); give a smaller "
                            "value")
    if settings.fit_start_ms is not None and settings.fit_start_ms >= sweep_ms:
        raise LoadError(recording.path, f"`--fit-start-ms` {settings.fit_start_ms:g} is beyond "
                        f"the sweeps ({sweep_ms:g} ms long); give a smaller value")


def check_fitted(path: str, data: dict, settings) -> None:
    """LoadError when every sweep failed to fit with the user's `--step`/`--fit-start-ms`."""
    from passivefit.io.recording import LoadError
    from passivefit.model import schema as S

    if settings.step is None and settings.fit_start_ms is None:
        return
    reasons = [s.get(S.REJECT_REASON.key) or "" for s in data.get("sweeps", ())]
    if reasons and all(r.startswith("fit failed") for r in reasons):
        given = "`--fit-start-ms`" if settings.fit_start_ms is not None else "`--step`"
        raise LoadError(path, f"no sweep could be fitted with this {given} "
                        f"({reasons[0]}); check the value against the recording")
