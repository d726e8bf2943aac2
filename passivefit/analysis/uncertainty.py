"""95 % confidence intervals: a bootstrap over sweeps (resample the accepted sweeps with
replacement, refit the combined response) and its 95 % half-widths (core.qc.bootstrap_halfwidth)."""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from passivefit.analysis.cable import Chain, fit_cable
from passivefit.analysis.fits import fit_segments_rows, refit_many
from passivefit.analysis.pool import SweepPool
from passivefit.analysis.windows import span
from passivefit.core import steady
from passivefit.core.qc import bootstrap_halfwidth
from passivefit.model.results import GroupAverage

#: Ball-and-stick refits in the bootstrap (each costs ~10 ms); their CI is the larger of
#: the bootstrap's and the fit covariance's.
CABLE_BOOTSTRAP = 12


@dataclass(frozen=True)
class CableContext:
    """What the bootstrap needs to refit the ball-and-stick model of a resample."""

    average: GroupAverage      # the combined response with the cable-fit windows
    fit: object                # core.cablefit.BallStickFit of the full data
    chain: Chain


def _baseline(v: np.ndarray, g: GroupAverage, fs: float) -> float:
    """Baseline level (V) of `v` in the baseline window of `g`."""
    a, b = span(g.windows_s["baseline"], fs, v.size)
    return steady.robust_level(v[a:b])


#: Samples (resamples × samples) combined per pass over the sweeps: 32 MB of float64.
_COMBINE_BUDGET = 4_000_000


def _combined(pool: SweepPool, weights: np.ndarray, g: GroupAverage, fs: float,
              cable: CableContext | None):
    """Blocks of rows of `weights`, combined in one pass over the sweeps: per row its
    combined response, the segments of its exponential fit and those of its cable fit
    (None without `cable`), the fit windows of a block binned at once."""
    per_pass = max(1, _COMBINE_BUDGET // pool.n_samples)
    for a in range(0, len(weights), per_pass):
        block = pool.combine(weights[a:a + per_pass])
        segments = fit_segments_rows(block, fs, g.step, g.windows_s)
        cable_segments = ([None] * len(block) if cable is None else fit_segments_rows(
            block, fs, cable.average.step, cable.average.windows_s))
        yield block, segments, cable_segments


def bootstrap(pool: SweepPool, g: GroupAverage, fs: float, fit, n_boot: int,
              cable: CableContext | None = None, seed: int = 0) -> dict[str, np.ndarray]:
    """Cell values refitted on sweeps resampled with replacement (and, as "n_sweeps", the
    number of sweeps resampled).

    With `cable`, the first CABLE_BOOTSTRAP resamples also refit the ball-and-stick
    model; a resample whose fit fails, or is not refitted, gives NaN there.
    """
    rng = np.random.default_rng(seed)
    n = len(fit.taus)   # membrane components; refits use every component
    out: dict[str, list[float]] = {k: [] for k in ("tau0", "tau1", "tau1_model", "L", "rho")}
    size = len(pool.indices)
    counts = np.array([np.bincount(rng.integers(0, size, size), minlength=size)
                       for _ in range(n_boot)], dtype=float).reshape(n_boot, size)
    usable = np.array([c for c in counts if not np.all(pool.currents[c > 0] == 0)])
    for block, segments, cable_segments in _combined(pool, usable, g, fs, cable):
        refits = refit_many(segments, g.step, fit)
        for v, boot, cable_segs in zip(block, refits, cable_segments, strict=True):
            if boot is None or not boot.success or len(boot.taus) != n:
                continue
            out["tau0"].append(boot.taus[0])
            out["tau1"].append(boot.taus[1] if n > 1 else np.nan)
            bs = None
            if cable is not None and len(out["tau0"]) <= CABLE_BOOTSTRAP:
                bs0 = cable.fit
                bs, problem = fit_cable(
                    replace(cable.average, v_V=v, v_base_V=_baseline(v, cable.average, fs)),
                    fs, (bs0.tau0_s, bs0.L, bs0.rho), cable.chain, segments=cable_segs,
                    errors=False)
                bs = None if problem else bs
            out["tau1_model"].append(bs.taus_s[1] if bs else np.nan)
            out["L"].append(bs.L if bs else np.nan)
            out["rho"].append(bs.rho if bs else np.nan)
    return {k: np.asarray(v, dtype=float) for k, v in out.items()} | {
        "n_sweeps": np.asarray(size)}


def halfwidth(boot: dict | None, name: str) -> float | None:
    """The bootstrap's 95 % half-width of `name`, widened for few sweeps
    (core.qc.few_units_factor); None without a bootstrap."""
    if boot is None:
        return None
    return bootstrap_halfwidth(boot[name], int(boot["n_sweeps"]))
