"""The accepted sweeps combined into one response, and the first look at it.

Under linearity sweep k is base_k + I_k·h(t); the least-squares h over a set of sweeps
is Σ I_k (v_k − base_k) / Σ I_k². The combined response is shown and fitted as
base + I_ref·h, scaled to the reference step I_ref (the largest hyperpolarizing step,
else the largest step).
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, replace

import numpy as np

from passivefit.analysis.fits import FIT_ERRORS, fit_average
from passivefit.analysis.windows import MIN_FIT_START_S, artefact_end_s, resolve_windows, span
from passivefit.core import steady
from passivefit.core.steps import Step
from passivefit.model.results import GroupAverage, SweepFit
from passivefit.model.settings import Settings

MS = 1e-3
_BLOCK = 8192   # samples per block of the weighted sums: a float64 block of 200 sweeps is 13 MB

#: The fit starts this many τ1 after the edge, where τ2, τ3 … have decayed enough that two
#: exponentials describe the transient: bias of τ1 ≈ −1.4 % at 0.78 τ1 for a ball-and-stick
#: with L = 1, ρ = 5 behind a 5 kHz Bessel filter (noiseless, benchmarks/bench_fit.py).
START_TAU1 = 0.8


@dataclass(frozen=True)
class SweepPool:
    """Accepted sweeps of one step timing, ready to be combined (and resampled).

    The sweeps are the recording's own arrays: each is read as its fit saw it (drift
    taken out, events cut out: `SweepFit.corrected`) and less its baseline only block
    by block while combining, so the pool holds no copy of the data.
    """

    step: Step                  # timing of the pool, with amplitude I_ref
    indices: tuple[int, ...]
    currents: np.ndarray        # A, per sweep
    members: tuple[SweepFit, ...]
    voltages: tuple[np.ndarray, ...]   # V, the recording's sweeps (float32 for 16-bit data)
    bases: np.ndarray           # V, per sweep
    base: float                 # V, mean baseline
    gaps: bool = False          # some samples are cut out (NaN)

    @property
    def n_samples(self) -> int:
        return self.voltages[0].size

    def _deflections(self, a: int, b: int) -> np.ndarray:
        """Every sweep's deflection (V, float64) over samples a:b, shape (n_sweeps, b - a)."""
        fs = self.step.sample_rate_hz
        out = np.empty((len(self.members), min(b, self.n_samples) - a))
        for k, (f, v) in enumerate(zip(self.members, self.voltages, strict=True)):
            out[k] = f.corrected(v[a:b], fs, a) - self.bases[k]
        return out

    def combine(self, weights: np.ndarray | None = None) -> np.ndarray:
        """The combined response (V) of all sweeps, or with each sweep counted `weights`
        times (a bootstrap resample: no copy of the sweeps is made). `weights` of shape
        (k, n_sweeps) give k responses at once, shape (k, n_samples), in one pass over
        the sweeps.

        Samples cut out of a sweep (NaN: a spontaneous event) are left out of the sums at
        their times; where every sweep is cut out the response is NaN.

        The sums run in float64, block by block.
        """
        w = self.currents if weights is None else self.currents * weights
        n = self.n_samples
        num = np.empty(w.shape[:-1] + (n,))
        den = np.empty(w.shape[:-1] + (n,)) if self.gaps else None
        for a in range(0, n, _BLOCK):
            d = self._deflections(a, a + _BLOCK)
            if self.gaps:
                seen = np.isfinite(d)
                num[..., a:a + _BLOCK] = w @ np.where(seen, d, 0.0)
                den[..., a:a + _BLOCK] = (w * self.currents) @ seen
            else:
                num[..., a:a + _BLOCK] = w @ d
        if not self.gaps:
            return self.base + self.step.amplitude_A * num / (w @ self.currents)[..., None]
        with np.errstate(invalid="ignore", divide="ignore"):
            h = num / den
        return self.base + self.step.amplitude_A * h


def sweep_pool(fits: list[SweepFit], voltages: dict[int, np.ndarray]) -> SweepPool | None:
    """The accepted sweeps of the most common step timing; None without any."""
    used = [f for f in fits if f.accepted and f.step is not None]
    if not used:
        return None

    def timing(f: SweepFit) -> tuple:
        return (f.step.onset, f.step.offset, voltages[f.index].size)

    common = Counter(timing(f) for f in used).most_common(1)[0][0]
    members = tuple(f for f in used if timing(f) == common)
    currents = np.array([f.step.amplitude_A for f in members])
    bases = np.array([f.v_rest_V for f in members])
    fs, n = members[0].step.sample_rate_hz, common[2]
    gaps = (any(a * fs < n and b > 0 for f in members for a, b in f.masked_s)
            or any(np.isnan(voltages[f.index]).any() for f in members))
    i_ref = currents.min() if np.any(currents < 0) else currents.max()
    return SweepPool(replace(members[0].step, amplitude_A=float(i_ref)),
                     tuple(f.index for f in members), currents, members,
                     tuple(voltages[f.index] for f in members), bases, float(bases.mean()),
                     gaps=gaps)


def average_of(pool: SweepPool, v: np.ndarray, fs: float, settings: Settings) -> GroupAverage:
    """The combined response `v` of `pool` with its windows; the fit starts as set, else
    after the artefact of the first fitted edge."""
    step = pool.step
    w = settings.windows
    guess = resolve_windows(step, v.size, fs, w, MIN_FIT_START_S)
    b0, b1 = span(guess["baseline"], fs, v.size)
    v_base = steady.robust_level(v[b0:b1])
    if settings.fit_start_ms is not None:
        start = settings.fit_start_ms * MS
    else:
        edge = step.onset if step.kind == "step" else step.offset
        start = artefact_end_s(v, edge, fs, steady.noise_sd(v[b0:b1]))
    wins = resolve_windows(step, v.size, fs, w, start)
    return GroupAverage(step, pool.indices, v, v_base, wins)


#: A combined hyperpolarizing response whose steady/peak ratio is below this sags
#: (the cell.sag flag's threshold).
SAG_RATIO = 0.95
#: The charging fit of a sagging cell ends where the deflection first reaches this share
#: of its peak, before the sag shapes it (core.sag.sag_free_end_s).
SAG_FREE_FRACTION = 0.9


def sag_window(screened: list[SweepFit], voltages: dict[int, np.ndarray], fs: float
               ) -> float | None:
    """When the cell sags: how long after the onset its charging transient can be fitted
    (s), from the hyperpolarizing sweeps combined; None when it does not sag.

    Ih makes a hyperpolarized cell's voltage relax back; a sum of exponentials describes
    that nonlinear relaxation poorly, so the charging fit stops before it, and the decay
    after the step (shaped by the rebound) is not fitted.
    """
    from passivefit.core.sag import measure_sag, sag_free_end_s

    hyper = [f for f in screened if f.accepted and f.step is not None and f.step.kind == "step"
             and f.step.amplitude_A < 0]
    pool = sweep_pool(hyper, voltages)
    if pool is None:
        return None
    v, step = pool.combine(), pool.step
    try:
        sag = measure_sag(v, fs, step.onset_s, step.offset_s, baseline_V=pool.base,
                          direction=-1.0)
        if not (sag.has_sag and sag.ratio is not None and sag.ratio < SAG_RATIO):
            return None
        return sag_free_end_s(v, fs, step.onset_s, step.offset_s, sag=sag,
                              fraction=SAG_FREE_FRACTION)
    except ValueError:
        return None


def first_look(screened: list[SweepFit], voltages: dict[int, np.ndarray], fs: float,
               settings: Settings) -> tuple[float | None, tuple[float, ...] | None]:
    """Fit start (s after the edge, None = as set) and start values for the sweep fits.

    A first fit of all sweeps combined, from the end of the artefact, gives τ1; for steps
    the automatic start moves to START_TAU1·τ1 when that is later (capped at 5 ms).
    """
    pool = sweep_pool(screened, voltages)
    if pool is None:
        return None, None
    avg = average_of(pool, pool.combine(), fs, settings)
    try:
        fit, avg = fit_average(avg, fs, settings.components)
    except FIT_ERRORS:
        return None, None
    if not fit.success:
        return None, None
    taus = tuple(float(t) for t in fit.all_taus)  # the sag's too: start values of refits
    if settings.fit_start_ms is not None or pool.step.kind == "pulse" or len(fit.taus) < 2:
        return None, taus  # pulses weight τ1 strongly: fit from the artefact on
    artefact = avg.fit_start_s
    return float(np.clip(START_TAU1 * fit.taus[1], artefact, 5e-3)), taus
