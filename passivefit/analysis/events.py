"""Spontaneous synaptic events: found in each sweep's fit residual with the detector of
core.events and cut out of that sweep's fits, steady state and the combined response.

A physiologist does not throw away a sweep for a PSP late in a long step; the event's
stretch is left out and the rest of the sweep is used. A sweep is rejected only when its
residual still holds an event after the cut (events on events, or a misfit).
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np

from passivefit.analysis.fits import residual
from passivefit.analysis.windows import span
from passivefit.model import schema as S
from passivefit.model.results import SweepFit

#: An event's stretch: from this long before its onset …
BEFORE_S = 2e-3
#: … to this long after it: PSPs decay over tens of ms (docs/references.md §7).
AFTER_S = 0.1
#: Cut and refit at most this many times before the sweep is given up.
ROUNDS = 3
#: When the AFTER_S cut would leave no fit window (an event just before a step edge), the
#: event's stretch ends where a PSP of the detector's template decay (core.events
#: EventShape) has fallen to the noise, but lasts at least this long (s).
SHORT_MIN_S = 0.02


def noise_model(fits: list[SweepFit], voltages: dict[int, np.ndarray], fs: float):
    """The detector's noise model: from the sweeps' baselines, else (baselines too short)
    from their fit residuals, whose median over sweeps resists the events in a few;
    None when neither is long enough."""
    from passivefit.core import events

    used = [f for f in fits if f.fit is not None]

    def baselines():   # copies of the stretches, not views that keep whole sweeps alive
        return [np.array(f.corrected(voltages[f.index], fs)[slice(*span(
            f.windows_s["baseline"], fs, voltages[f.index].size))], dtype=np.float64)
            for f in used]

    def residuals():   # only when the baselines are too short
        return [np.nan_to_num(residual(f.corrected(voltages[f.index], fs), f.fit, r, fs)[1])
                for f in used for r in f.segments]

    for segments in (baselines, residuals):
        try:
            return events.noise_model(segments(), fs)
        except ValueError:
            continue
    return None


def find_events(f: SweepFit, v: np.ndarray, fs: float, noise) -> list[tuple[float, float, float]]:
    """(onset in s from the sweep start, amplitude in V, z) of every event in the residual
    of sweep `f`'s fit and in the rest of its step up to the steady state, when the fit
    ends early (raw voltage about its level: the detector's local background takes up the
    slow sag); cut-out samples count as no event."""
    return find_events_many([f], [v], fs, noise)[0]


#: Samples of the sweeps whose stretches are scanned together: the scan holds several
#: float64 arrays of each (16 MB per array at most).
_TOGETHER_SAMPLES = 2_000_000


def find_events_many(fits: list[SweepFit], voltages: list[np.ndarray], fs: float, noise
                     ) -> list[list[tuple[float, float, float]]]:
    """:func:`find_events` of each sweep of `fits` (voltages alike), the stretches of as
    many of them as _TOGETHER_SAMPLES allows scanned together
    (core.events.detect_events_many)."""
    per_pass = max(1, _TOGETHER_SAMPLES // max((v.size for v in voltages), default=1))
    return [found for a in range(0, len(fits), per_pass)
            for found in _find_together(fits[a:a + per_pass], voltages[a:a + per_pass], fs,
                                        noise)]


def _find_together(fits: list[SweepFit], voltages: list[np.ndarray], fs: float, noise
                   ) -> list[list[tuple[float, float, float]]]:
    """:func:`find_events_many` of sweeps scanned together."""
    from passivefit.core import events

    runs, owners = [], []   # every stretch scanned, and (sweep, its start time in s)
    for k, (f, v) in enumerate(zip(fits, voltages, strict=True)):
        seen = f.corrected(v, fs)
        parts = [residual(seen, f.fit, seg, fs) for seg in f.segments]
        for a, b in _unfitted(f, fs, v.size):
            part = seen[a:b]
            parts.append((np.arange(a, b) / fs, part - np.nanmedian(part)))
        for t, r in parts:
            for run in _finite_runs(r):   # scanned apart: a cut-out stretch is no edge
                runs.append(r[run])
                owners.append((k, float(t[run.start])))
    found: list[list] = [[] for _ in fits]
    for (k, t0), got in zip(owners, events.detect_events_many(runs, fs, noise), strict=True):
        found[k] += [(float(t0 + e.time_s), e.amplitude_V, e.z) for e in got]
    return [sorted(x) for x in found]


def _unfitted(f: SweepFit, fs: float, n: int) -> list[tuple[int, int]]:
    """Sample spans the fits do not cover but the sweep's levels are read from: the
    baseline, the rest of a step fitted only at its start, and the tail after the last
    fit (the drift's end level); spans next to a step edge are left alone."""
    w = f.windows_s
    spans = [span(w["baseline"], fs, n)]
    if "steady" in w and "fit" in w:
        spans.append((span(w["fit"], fs, n)[1], span(w["steady"], fs, n)[1]))
    last = max((span(w[k], fs, n)[1] for k in ("fit", "fit_off") if k in w), default=n)
    if f.step is not None and f.step.offset / fs + 0.05 < last / fs:
        spans.append((last, n))
    return [(a, b) for a, b in spans if b - a > 0.05 * fs]


def _finite_runs(r: np.ndarray) -> list[slice]:
    """The stretches of `r` without NaN."""
    finite = np.isfinite(r)
    if finite.all():   # the usual case: nothing cut out
        return [slice(0, r.size)] if r.size else []
    edges = np.flatnonzero(np.diff(np.concatenate(([0], finite.view(np.int8), [0]))))
    return [slice(a, b) for a, b in zip(edges[0::2], edges[1::2], strict=True)]


def cut_out_events(fits: list[SweepFit], voltages: dict[int, np.ndarray], fs: float,
                   refit) -> list[SweepFit]:
    """Each accepted sweep with its events cut out and refitted (`refit(fit, masked_s)`
    returns the new SweepFit); rejected when an event is still found after the cut."""
    noise = noise_model(fits, voltages, fs)
    if noise is None:
        return fits
    scanned = [f for f in fits if f.accepted and f.fit is not None]
    first = iter(find_events_many(scanned, [voltages[f.index] for f in scanned], fs, noise))
    out = []
    for f in fits:
        if not f.accepted or f.fit is None:
            out.append(f)
            continue
        v = voltages[f.index]
        found = next(first)
        if not found:
            out.append(f)
            continue
        cut: list[tuple[float, float]] = []
        new, left = f, found
        for _ in range(ROUNDS):   # a slow PSP can show again past its first cut
            wide = _merged([*cut, *((t - BEFORE_S, t + AFTER_S) for t, _, _ in left)])
            new = refit(f, tuple(wide))
            if new.fit is None:   # the cut took the fit window: cut each event's own extent
                short = _merged([*cut, *((t - BEFORE_S, t + _extent_s(a, noise))
                                         for t, a, _ in left)])
                trial = refit(f, tuple(short)) if short != wide else new
                wide, new = (short, trial) if trial.fit is not None else (wide, new)
            cut = wide
            left = find_events(new, v, fs, noise) if new.fit is not None else []
            found += left
            if not left:
                break
        times = ", ".join(f"{t * 1e3:.0f}" for t, _, _ in sorted(found))
        flag = S.SWEEP_EVENT.make(max(abs(z) for _, _, z in found), n=len(found),
                                  at=f"{times} ms")
        if left or not new.accepted:
            why = new.reject_reason or f"spontaneous events at {times} ms that cannot be cut out"
            out.append(replace(new, accepted=False, reject_reason=why,
                               flags=(*new.flags, flag)))
        else:
            out.append(replace(new, flags=(*new.flags, flag)))
    return out


def _extent_s(amplitude_V: float, noise) -> float:
    """How long after its onset an event of `amplitude_V` stays above the noise, for the
    detector's template (rise and decay of core.events.EventShape): the time to its peak
    plus the decay time constants needed to fall to the raw noise sd; between SHORT_MIN_S
    and AFTER_S. Whatever is left of a slower event is found again in the refit's residual
    and cut in the next round."""
    shape = noise.shape
    peak = (shape.rise_s * shape.decay_s / (shape.decay_s - shape.rise_s)
            * math.log(shape.decay_s / shape.rise_s))
    ratio = abs(amplitude_V) / noise.sd_V if noise.sd_V > 0 else math.inf
    tail = shape.decay_s * math.log(ratio) if ratio > 1 else 0.0
    return float(np.clip(peak + tail, SHORT_MIN_S, AFTER_S))


def _merged(intervals: list[tuple[float, float]]) -> list[tuple[float, float]]:
    out: list[tuple[float, float]] = []
    for a, b in sorted(intervals):
        if out and a <= out[-1][1]:
            out[-1] = (out[-1][0], max(b, out[-1][1]))
        else:
            out.append((a, b))
    return out
