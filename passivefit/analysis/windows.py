"""Where each sweep's step is and which parts of the sweep each measurement reads.

All windows are absolute (start, end) times in s within the sweep: the baseline before
the step, the steady state at its end, the fit of the charging transient and of the
decay after the step ("fit", "fit_off").
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from passivefit.core.qc import Flag
from passivefit.core.steps import Step, classify_stimulus, common_steps, find_steps
from passivefit.io.recording import LoadError, Recording
from passivefit.model import schema as S
from passivefit.model.settings import Settings, Windows

MS = 1e-3
GUARD_S = 0.5e-3         # keep windows this far from step edges
MIN_FIT_START_S = 0.3e-3  # earliest automatic fit start after an edge
TAIL_AFTER_S = 0.1       # the decay after a step is read for its duration and this long


def tail_end(step: Step, n_samples: int) -> int:
    """The sample where the response to a step ends: its decay read for the step's
    duration plus TAIL_AFTER_S (for a pulse, the end of the sweep)."""
    if step.kind != "step":
        return n_samples
    return min(n_samples, 2 * step.offset - step.onset + round(TAIL_AFTER_S * step.sample_rate_hz))


def _protocol_region_ends(steps: list[Step | None]) -> list[Step | None]:
    """A sweep whose next step is missing (its level 0 pA in this sweep, as a family of
    second steps starting at 0 pA has it) is read only as far as the sweeps of the same
    step timing are, up to their next step: the protocol holds that step there, and the
    sweep is then combined with the others rather than set apart by its length."""
    ends: dict[tuple[int, int], int] = {}
    for st in steps:
        if st is not None and st.region_end is not None:
            key = (st.onset, st.offset)
            ends[key] = min(ends.get(key, st.region_end), st.region_end)
    return [st if st is None or st.region_end is not None or (st.onset, st.offset) not in ends
            else replace(st, region_end=ends[(st.onset, st.offset)]) for st in steps]


#: A current that changes by this much is not taken for one read in the wrong unit
#: (a current-clamp step is tens to hundreds of pA; common practice, no source)
_NO_UNIT_DOUBT_A = 5e-12


def sweep_steps(recording: Recording, settings: Settings) -> list[Step | None]:
    """The analysed step of every sweep: from the user's StepSpec, else from the current.

    Every step and pulse of each sweep is found (core.steps.find_steps); all sweeps
    take the step at the protocol's common position that leaves the holding level after
    a flat baseline (core.steps.common_steps), and each is read up to the sweep's next
    step (`Step.region_end`), or up to a waveform that follows it (`Step.waveform_from`:
    noise, a chirp), so a second step, a train or a waveform after it is not taken in. A
    step the user describes is read to the end of its tail (`tail_end`): what follows
    in the sweep is not described, so not known to be quiet.
    """
    fs = recording.sample_rate_hz
    if settings.step is not None:
        rec = recording.with_step(settings.step)
    elif recording.has_current:
        rec = recording
    else:
        played = recording.metadata.get("stimulus_file")
        what = (f"the command was played from a stimulus file ({played}) that the recording "
                "does not hold, and no current was recorded" if played else
                "this file carries no command or current waveform")
        raise LoadError(recording.path, f"no step found: {what}; give "
                        "`--step ON_MS DURATION_MS AMPLITUDE_PA [INCREMENT_PA]`")
    per_sweep = [find_steps(s.current, fs) for s in rec.sweeps]
    steps = [None if st is None else replace(st, region_end=min(
        (later.onset for later in found if later.onset >= st.offset),
        default=tail_end(st, s.n_samples) if settings.step is not None else st.waveform_from))
        for st, found, s in zip(common_steps(per_sweep), per_sweep, rec.sweeps, strict=True)]
    steps = _protocol_region_ends(steps)
    if all(s is None for s in steps):
        largest = max(float(np.ptp(s.current)) for s in rec.sweeps)
        flat = ("flat" if largest == 0 else
                f"flat, changing by at most {largest * 1e12:.3g} pA: is its unit right?"
                if largest < _NO_UNIT_DOUBT_A else
                f"changing by up to {largest * 1e12:.3g} pA with no step standing out")
        words = {"ramp": "a ramp", "waveform": "a waveform", "none": flat}
        kinds = {classify_stimulus(s.current, fs) for s in rec.sweeps} - {"step", "pulse"}
        what = f" (the current is {' or '.join(words[k] for k in sorted(kinds))})" if kinds else ""
        raise LoadError(recording.path, f"no current step from rest found in any sweep{what}; "
                        "give `--step ON_MS DURATION_MS AMPLITUDE_PA [INCREMENT_PA]` if the "
                        "waveform is wrong")
    return steps


def region_flags(chosen: list[tuple[object, Step | None]], fs: float,
                 described: bool = False) -> list[Flag]:
    """What the sweeps go on to after the step analysed, where it is read only up to there:
    a waveform (`Step.waveform_from`: protocol.waveform_after_step) or later steps of the
    protocol (protocol.later_steps; not for a step the user `described`, read to its
    tail's end). None of either: no flag."""
    waveform, later = [], []
    for s, st in chosen:
        if st is None or st.region_end is None:
            continue
        if st.waveform_from is not None and st.region_end == st.waveform_from:
            waveform.append((s.index, st.region_end))
        elif not described:
            later.append((s.index, st.region_end))
    flags = []
    for spec, cut in ((S.PROTOCOL_WAVEFORM, waveform), (S.PROTOCOL_LATER_STEPS, later)):
        if cut:
            first = min(at for _, at in cut) / fs / MS
            which = f"sweep{'s' if len(cut) > 1 else ''} {sweep_list([k for k, _ in cut])}"
            flags.append(spec.make(first, which=which, at=f"{first:.0f} ms"))
    return flags


def sweep_list(indices: list[int]) -> str:
    """Sweep numbers with runs shortened: [0, 1, 2, 3, 7] -> "0–3, 7"."""
    runs: list[list[int]] = []
    for k in sorted(indices):
        if runs and k == runs[-1][1] + 1:
            runs[-1][1] = k
        else:
            runs.append([k, k])
    return ", ".join(f"{a}" if a == b else f"{a}, {b}" if b == a + 1 else f"{a}–{b}"
                     for a, b in runs)


#: What a sweep without an analysed step holds instead (core.steps.classify_stimulus)
_NO_STEP = {"step": "no step where the other sweeps have theirs",
            "pulse": "only brief pulses: the cell is analysed from its steps",
            "ramp": "a current ramp, no step", "waveform": "a current waveform, no step",
            "none": "no current step: the current is flat"}


def no_step_reason(current: np.ndarray, fs: float) -> str:
    """Why a sweep has no analysed step, from what its current holds."""
    return _NO_STEP[classify_stimulus(current, fs)]


def artefact_end_s(v: np.ndarray, edge: int, fs: float, noise: float) -> float:
    """Time after a step edge at which the electrode/filter artefact has settled, in s.

    The artefact is the fast jump at the edge and the filter's ringing: the second
    difference of the voltage stays far above its baseline noise while it lasts.
    """
    n = min(int(5e-3 * fs), v.size - edge - 2)
    if n < 4:
        return MIN_FIT_START_S
    d2 = np.abs(np.diff(v[edge - 1: edge + n + 1], 2))
    pre = np.abs(np.diff(v[max(0, edge - int(0.02 * fs)): edge - 1], 2))
    level = 6.0 * (np.median(pre) / 0.6745 if pre.size > 10 else noise)
    loud = np.flatnonzero(d2 > level)
    settle = (loud[-1] + 3) / fs if loud.size else 0.0
    return float(np.clip(settle, max(MIN_FIT_START_S, 8 / fs), 3e-3))


def resolve_windows(step: Step, n_samples: int, fs: float, w: Windows,
                    fit_start_s: float) -> dict:
    """Absolute (start, end) times in s of the baseline, steady and fit windows."""
    on, off, end = step.onset / fs, step.offset / fs, n_samples / fs
    duration = off - on

    def absolute(rel_ms):
        return (on + rel_ms[0] * MS, on + rel_ms[1] * MS)

    base = absolute(w.baseline_ms) if w.baseline_ms else (
        max(step.baseline_start / fs, on - 0.1), on - GUARD_S / 2)
    out = {"baseline": base}
    if step.kind == "step":
        out["steady"] = (absolute(w.steady_ms) if w.steady_ms
                         else (off - max(0.2 * duration, min(duration, 2e-3)), off - GUARD_S / 2))
        fit_end = min(on + w.fit_end_ms * MS, off - GUARD_S / 2) if w.fit_end_ms \
            else off - GUARD_S / 2
        fit = absolute(w.fit_ms) if w.fit_ms else (on + fit_start_s, fit_end)
        out["fit"] = fit
        if w.decay is not False:
            tail = tail_end(step, n_samples) / fs
            out["fit_off"] = (off + (fit[0] - on), tail)
    else:
        fit = absolute(w.fit_ms) if w.fit_ms else (off + fit_start_s, end)
        out["fit_off"] = fit
    return out


def sample_index(t_s: float, fs: float, n: int) -> int:
    """The sample at time `t_s` (s), clipped to 0…n."""
    return int(min(max(round(t_s * fs), 0), n))   # not np.clip: 20 µs on a scalar


def span(window: tuple[float, float], fs: float, n: int) -> tuple[int, int]:
    """Sample indices (start, stop) of an absolute window."""
    return sample_index(window[0], fs, n), sample_index(window[1], fs, n)


def fit_start_after_artefact(v: np.ndarray, step: Step, fs: float, noise: float,
                             settings: Settings) -> float:
    """The fit start after each edge, in s: as set, else where the artefact has settled
    (for a pulse, after both of its edges)."""
    if settings.fit_start_ms is not None:
        return settings.fit_start_ms * MS
    start = artefact_end_s(v, step.onset, fs, noise)
    if step.kind == "pulse":
        start = max(start, artefact_end_s(v, step.offset, fs, noise))
    return start
