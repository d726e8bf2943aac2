"""Exponential fits of the transients: segments, the fit itself, residuals, the scan.

A fit takes the charging transient of a step and the decay after it (or a pulse's
decay) as segments with shared time constants (core.expfit, variable projection).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from passivefit.analysis.windows import span
from passivefit.core.steps import Step
from passivefit.model.results import GroupAverage, Segment

KEEP_FULL_S, BIN_FACTOR = 5e-3, 1.05  # fit samples at full rate up to 5 ms, then 5 % bins
#: A fit window with events cut out (NaN) is fitted only when at least this share of it
#: is left: a scrap (e.g. the first millisecond before an event) cannot show a time
#: constant of tens of ms, and its fit would be taken for the sweep's.
MIN_KEPT_SHARE = 0.25
FIT_ERRORS = (ValueError, np.linalg.LinAlgError, RuntimeError)


def fit_segments(v: np.ndarray, fs: float, step: Step, wins: dict):
    """Fit segments (t from their edge, y) and their drawing records."""
    return fit_segments_rows(v[None], fs, step, wins)[0]


def fit_segments_rows(rows: np.ndarray, fs: float, step: Step, wins: dict) -> list[tuple]:
    """:func:`fit_segments` of each row of `rows` (responses on the same samples, shape
    (k, n)), binned together where no row has a gap (a bootstrap's resamples)."""
    from passivefit.core.expfit import Segment as FitSegment
    from passivefit.core.expfit import decimate_tail
    from passivefit.core.peel import geometric_bins

    out: list[tuple[list, list]] = [([], []) for _ in rows]
    for name, edge in (("fit", step.onset_s), ("fit_off", step.offset_s)):
        if name not in wins:
            continue
        a, b = span(wins[name], fs, rows.shape[1])
        if b - a < 20:
            continue
        t, y = np.arange(a, b) / fs - edge, rows[:, a:b]
        kept = np.isfinite(y)                   # events cut out (NaN) are not fitted
        if kept.all():
            tb, yb, wb = geometric_bins(t, y, np.ones(t.size), KEEP_FULL_S, BIN_FACTOR)
            binned = [(tb, row, wb) for row in yb]
        else:
            binned = [decimate_tail(t[k], row[k], KEEP_FULL_S, BIN_FACTOR)
                      if np.count_nonzero(k) >= max(20, MIN_KEPT_SHARE * k.size) else None
                      for row, k in zip(y, kept, strict=True)]
        for (segs, records), bins in zip(out, binned, strict=True):
            if bins is not None:
                segs.append(FitSegment(*bins))
                records.append(Segment(edge, a / fs, (b - 1) / fs, len(records),
                                       charging=name == "fit"))
    return [(segs, tuple(records)) for segs, records in out]


@dataclass(frozen=True, eq=False)
class TransientFit:
    """An exponential fit with its components sorted into membrane modes and a sag.

    The membrane's modes (τ0, τ1, …) all move the voltage in the direction of the
    response (docs/references.md §2–§3: every Bn of a passive cable has the sign of the
    step). A component of the opposite sign is not a membrane mode: the slowest such one,
    slower than τ0, is the sag of an active (e.g. h-type) conductance relaxing the
    voltage back, and is reported as the sag's time constant, never as τ0. `taus`,
    `tau_ci95` and `amplitudes` show the membrane modes only; `evaluate` draws them all.
    """

    full: object                   # core.expfit.ExpFit
    keep: tuple[int, ...]          # membrane components, slowest first
    sag: int | None = None         # the sag component, if any

    @property
    def taus(self) -> np.ndarray:
        return self.full.taus[list(self.keep)]

    @property
    def tau_ci95(self) -> np.ndarray:
        return self.full.tau_ci95[list(self.keep)]

    @property
    def amplitudes(self) -> np.ndarray:
        return self.full.amplitudes[:, list(self.keep)]

    @property
    def offsets(self) -> np.ndarray:
        return self.full.offsets

    @property
    def success(self) -> bool:
        return self.full.success

    @property
    def message(self) -> str:
        return self.full.message

    @property
    def rmse(self) -> float:
        return self.full.rmse

    @property
    def n_total(self) -> int:
        """Components fitted, the sag's included (for refits)."""
        return len(self.full.taus)

    @property
    def all_taus(self) -> np.ndarray:
        """Every fitted time constant (s), slowest first (start values of refits)."""
        return self.full.taus

    @property
    def sag_share(self) -> float | None:
        """|sag amplitude| over |τ0 amplitude| at the first transient's edge; None without
        a sag component."""
        if self.sag is None:
            return None
        a = np.abs(np.asarray(self.full.amplitudes[0], dtype=float))
        return float(a[self.sag] / a[self.keep[0]]) if a[self.keep[0]] > 0 else float("inf")

    @property
    def sag_tau(self) -> float | None:
        """Time constant of the sag component (s); None without one."""
        return None if self.sag is None else float(self.full.taus[self.sag])

    def evaluate(self, segment_index: int, t: np.ndarray) -> np.ndarray:
        return self.full.evaluate(segment_index, t)


def label_components(fit, step: Step, first_charging: bool) -> TransientFit:
    """Sort `fit`'s components into membrane modes and a sag (see TransientFit).

    `first_charging` says whether segment 0 is a step's charging transient (else a
    decay): the amplitudes of segment 0, turned into the direction of the response, are
    compared with the sign of the step.
    """
    a = np.asarray(fit.amplitudes[0], dtype=float)
    towards = (-a if first_charging else a) * np.sign(step.amplitude_A)
    keep = tuple(int(k) for k in np.flatnonzero(towards >= 0))
    if not keep or len(keep) == len(a):
        return TransientFit(fit, tuple(range(len(a))))
    against = [k for k in range(len(a)) if k not in keep]
    sag = against[0] if against[0] < keep[0] else None   # slower than τ0
    return TransientFit(fit, keep, sag)


def fit_exponentials(segs, components: str, tau_init=None, max_components: int = 3,
                     choice: dict | None = None):
    """Fit 1–3 exponentials; with "auto", the chooser's record goes into `choice`."""
    from passivefit.core import expfit

    if components == "auto":
        fit, record = expfit.fit_auto(segs, max_components=max_components, tau_init=tau_init)
        if choice is not None:
            choice.update(record)
        return fit
    return expfit.fit_exponentials(segs, int(components), tau_init=tau_init)


def refit_many(segments: list[tuple], step: Step, fit: TransientFit
               ) -> list[TransientFit | None]:
    """`fit` refitted (its components, from its time constants) to each of `segments`
    (from fit_segments_rows), all at once, values only (no standard errors: a bootstrap
    needs none); None where a refit fails."""
    from passivefit.core import expfit

    results = expfit.fit_exponentials_many([segs for segs, _ in segments], fit.n_total,
                                           fit.all_taus, errors=False)
    return [None if isinstance(r, Exception) else label_components(r, step, rec[0].charging)
            for r, (_, rec) in zip(results, segments, strict=True)]


def response_amplitudes(fit, segment: int, kind: str) -> tuple[float, ...]:
    """Component amplitudes at the edge, signed in the direction of the response.

    Charging: V(t) = V∞ − Σ c_n e^(−t/τn); decay: V(t) = V_base + Σ c_n e^(−t/τn).
    """
    a = np.asarray(fit.amplitudes[segment], dtype=float)
    return tuple(float(x) for x in (-a if kind == "step" else a))


def onset_amplitudes(fit, g: GroupAverage) -> tuple[float, ...]:
    """Response-direction amplitudes of the group's first transient (charging, or decay)."""
    return response_amplitudes(fit, g.segments[0].index, g.step.kind)


def residual(v: np.ndarray, fit, seg: Segment, fs: float) -> tuple[np.ndarray, np.ndarray]:
    """(sample times in s, data − model in V) over one fitted segment at full resolution."""
    samples = seg.samples(fs)
    t = np.arange(samples.start, samples.stop) / fs
    return t, v[samples] - fit.evaluate(seg.index, t - seg.edge_s)


def fit_average(g: GroupAverage, fs: float, components: str, tau_init=None,
                choice: dict | None = None, segments: tuple | None = None):
    """Fit the combined response's transients with shared time constants.

    Returns the fit and `g` with its segment records filled in; `choice` receives the
    record of how many components were chosen and why ("auto"). `segments`: those of
    `g` (fit_segments) when already made.
    """
    segs, records = segments or fit_segments(g.v_V, fs, g.step, g.windows_s)
    if not segs:
        raise ValueError("no fit window holds enough samples")
    fit = fit_exponentials(segs, components, tau_init, choice=choice)
    return label_components(fit, g.step, records[0].charging), replace(g, segments=records)


def fit_start_scan(g: GroupAverage, fs: float, fit: TransientFit,
                   n_starts: int = 10, span_s: float = 4e-3) -> dict:
    """τ0 and τ1 refitted from a series of later fit starts (for the plateau check):
    core.expfit.fit_start_scan over the combined response's segments, from `fit`."""
    from passivefit.core import expfit

    segs, _ = fit_segments(g.v_V, fs, g.step, g.windows_s)
    starts = g.fit_start_s + np.linspace(0.0, span_s, n_starts)
    scan = expfit.fit_start_scan(segs, starts, fit.n_total, fit.all_taus)
    membrane = fit.keep
    nan = np.full(starts.size, np.nan)
    cols = [f"tau{k}" for k in membrane] + [None, None]  # τ0, τ1 among all components
    return {"start_s": starts,
            "tau0_s": scan.get(cols[0], nan), "tau0_ci95_s": scan.get(f"{cols[0]}_ci", nan),
            "tau1_s": scan.get(cols[1], nan), "tau1_ci95_s": scan.get(f"{cols[1]}_ci", nan)}
