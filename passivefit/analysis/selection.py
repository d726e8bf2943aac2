"""Which sweeps the passive values come from: sweeps that respond passively, of a stable
stretch of the recording, with the step's sign confirmed by the response.

Each function returns new sweep fits (and flags); nothing is changed in place.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from passivefit.core.qc import Flag
from passivefit.model import schema as S
from passivefit.model.errors import LoadError
from passivefit.model.results import SweepFit

MV, MOHM = 1e-3, 1e6
#: A depolarizing sweep whose R_in differs more than this from the hyperpolarizing
#: sweeps' responds actively (common practice, no source: linear responses agree
#: within a few % between the two directions, docs/references.md §7).
ACTIVE_R_IN = 0.15
#: R_in changing more than this over the recording is drift (common practice, no
#: source: a 20 % change of access or input resistance ends a recording for many labs).
UNSTABLE_R_IN = 0.2
#: Sweeps of a stable stretch stay within this fraction of its median R_in.
STABLE_BAND = 0.1


#: Sweeps that move against their current, as a share of those measured, beyond which
#: the step as described is wrong rather than a sweep or two odd (common practice, no
#: source).
AGAINST_SHARE = 0.25


def check_sign(fits: list[SweepFit], path: str) -> list[SweepFit]:
    """The fits, a sweep whose voltage moves against its current rejected; LoadError
    when many do (a sign error in `--step`, a forgotten increment, an inverted current
    monitor), so no nonsense is fitted."""
    r = np.array([f.r_in_ohm for f in fits if f.r_in_ohm is not None])
    against = int(np.sum(r < 0))
    if against and (against >= max(2, AGAINST_SHARE * r.size) or np.median(r) < 0):
        # all wrong: the sign; some right and some wrong: the amplitude changes too
        what = ("the step's sign is wrong" if against == r.size else
                "the step's amplitude changes from sweep to sweep (INCREMENT_PA in "
                "`--step`) or its sign is wrong")
        raise LoadError(path, f"the voltage moves against the current in {against} "
                        f"of {r.size} sweeps: {what}; check `--step` or the current channel")
    return [f if f.r_in_ohm is None or f.r_in_ohm >= 0 or not f.accepted else replace(
        f, accepted=False, reject_reason=f"the voltage moves against the current (R_in "
                                         f"{f.r_in_ohm / MOHM:.0f} MΩ)") for f in fits]


def leave_out_active(fits: list[SweepFit]) -> tuple[list[SweepFit], list[Flag]]:
    """Leave depolarizing sweeps out when they respond unlike the hyperpolarizing ones.

    Depolarization brings a neuron towards its firing threshold and switches on
    (or off) voltage-gated conductances; a physiologist takes passive values from the
    hyperpolarizing steps when the two directions disagree. The reference is R_in of the
    accepted hyperpolarizing sweeps of the smallest step; without any, that of the
    smallest depolarizing step, the nearest to rest (and the cell is flagged).
    """
    measured = [f for f in fits if f.accepted and f.r_in_ohm is not None]
    hyper = [f for f in measured if f.step.amplitude_A < 0]
    depolarizing_only = not hyper and any(f.step.kind == "step" for f in measured)
    if not (hyper or depolarizing_only):
        return fits, []
    smallest = (max if hyper else min)(f.step.amplitude_A for f in hyper or measured)
    ref = float(np.median([f.r_in_ohm for f in hyper or measured
                           if f.step.amplitude_A == smallest]))
    source = "the hyperpolarizing steps" if hyper else "the smallest depolarizing step"
    out, n = [], 0
    for f in fits:
        if (f.accepted and f.r_in_ohm is not None and f.step.amplitude_A > 0
                and abs(f.r_in_ohm / ref - 1) > ACTIVE_R_IN):
            n += 1
            f = replace(f, accepted=False, reject_reason=(
                f"responds actively: R_in {f.r_in_ohm / MOHM:.0f} MΩ against "
                f"{ref / MOHM:.0f} MΩ from {source}"))
        out.append(f)
    flags = [S.CELL_ACTIVE_SWEEPS.make(n, n=n, reference=source)] if n else []
    if depolarizing_only:
        stepped_down = any(f.step is not None and f.step.amplitude_A < 0 for f in fits)
        flags.append(S.CELL_DEPOLARIZING_ONLY.make(
            smallest * 1e12, reason="left_out" if stepped_down else "none"))
    return out, flags


def hyperpolarizing_only(fits: list[SweepFit]) -> list[SweepFit]:
    """In a sagging cell depolarizing steps close the sag's (h-type) channels that are
    open at rest: they are not passive either, so only hyperpolarizing steps are used."""
    return [replace(f, accepted=False, reject_reason="the cell sags: its passive values come "
                    "from the hyperpolarizing steps")
            if f.accepted and f.step is not None and f.step.amplitude_A > 0 else f
            for f in fits]


def _tau0_drift(used: list[SweepFit], k: int, values: dict) -> list[Flag]:
    """The change of the sweeps' own τ0 from the first to the last `k` of `used` (one step)
    into `values`, flagged beyond UNSTABLE_R_IN; nothing when either end has fewer than
    two resolved τ0."""
    first = [t for t in (f.tau(0) for f in used[:k]) if t is not None]
    last = [t for t in (f.tau(0) for f in used[-k:]) if t is not None]
    if min(len(first), len(last)) < 2:
        return []
    change = float(np.median(last) / np.median(first) - 1)
    values[S.TAU0_CHANGE] = change
    if abs(change) <= UNSTABLE_R_IN:
        return []
    return [S.CELL_TAU0_DRIFT.make(100 * change, x=100 * change)]


def stable_stretch(fits: list[SweepFit], use_all: bool
                   ) -> tuple[list[SweepFit], dict, list[Flag]]:
    """The change of V_rest and R_in over the recording and, when R_in drifts, the
    longest run of consecutive accepted sweeps whose R_in stays within STABLE_BAND of
    the run's median (unless `use_all`); the sweeps outside it are left out.

    R_in is compared between sweeps of the same step (the most common one): across
    different steps it changes with the step (sag, rectification), not with time.
    """
    used = [f for f in fits if f.accepted and f.r_in_ohm is not None]
    if len(used) < 4:
        return fits, {}, []
    k = max(2, len(used) // 4)              # first and last quarter of the recording
    dv = np.median([f.v_rest_V for f in used[-k:]]) - np.median([f.v_rest_V for f in used[:k]])
    values: dict = {S.V_REST_CHANGE: dv}
    steps = [round(f.step.amplitude_A * 1e12) for f in used]
    common = max(set(steps), key=steps.count)
    used = [f for f, a in zip(used, steps, strict=True) if a == common]
    if len(used) < 4:
        return fits, values, []
    k = max(2, len(used) // 4)
    change = (np.median([f.r_in_ohm for f in used[-k:]])
              / np.median([f.r_in_ohm for f in used[:k]]) - 1)
    values[S.R_IN_CHANGE] = change
    drift = _tau0_drift(used, k, values)
    if abs(change) <= UNSTABLE_R_IN:
        return fits, values, drift
    best: list[SweepFit] = []
    for i in range(len(used)):
        for j in range(len(used), i + len(best), -1):
            run = used[i:j]
            median = np.median([f.r_in_ohm for f in run])
            if all(abs(f.r_in_ohm / median - 1) <= STABLE_BAND for f in run):
                best = run
                break
    keep = {f.index for f in best}
    what = ("all sweeps (as set)" if use_all
            else f"the longest stable stretch, sweeps {best[0].index}–{best[-1].index}")
    values[S.STABLE_SWEEPS] = f"{best[0].index}-{best[-1].index}"
    flags = [S.CELL_UNSTABLE.make(100 * change, x=100 * change, dv=dv / MV, what=what), *drift]
    if use_all:
        return fits, values, flags
    out = [f if f.index in keep or not f.accepted or f not in used else replace(
        f, accepted=False, reject_reason="outside the stable stretch of the recording (R_in "
        f"{f.r_in_ohm / MOHM:.0f} MΩ)") for f in fits]
    return out, values, flags
