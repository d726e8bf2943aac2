"""Where the sweep fits of `analyze()` start: steps 1–3 of the pipeline, on their own.

The review window refits one sweep while a window is dragged. To give the values the
full analysis gives, it needs what the analysis gave every sweep fit: each sweep read up
to its next step, the fit window before a sag, the fit start after 0.8 τ1 and the start
values of the first look. :func:`start_values` computes exactly these, in the same order
as `pipeline.analyze` (steps, screening, sag window, first look).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from passivefit.analysis.hum import Hum, without_hum
from passivefit.analysis.pool import first_look, sag_window
from passivefit.analysis.selection import hyperpolarizing_only
from passivefit.analysis.sweep import baseline_only
from passivefit.analysis.windows import sweep_steps
from passivefit.io.recording import LoadError, Recording
from passivefit.model.settings import Settings

MS = 1e-3


@dataclass(frozen=True, eq=False)
class StartValues:
    """What every sweep fit of one analysis starts from.

    Attributes
    ----------
    settings : Settings
        The settings asked for.
    effective : Settings
        The settings the sweep fits used (fit start after 0.8 τ1, the window before a sag).
    tau_init : tuple of float or None
        Start values of the sweep fits (s), from the first look at the combined sweeps.
    start_s : float or None
        The fit start the first look chose (s after the edge), None = as set.
    sag_end_s : float or None
        End of the charging fit of a sagging cell (s after the onset), None = no sag.
    voltages : dict of int to numpy.ndarray
        Each chosen sweep's voltage (V) up to its next step.
    chosen : list of (Sweep, Step or None)
        The sweeps analysed, with their steps.
    screened : list of SweepFit
        Their baselines measured (only the hyperpolarizing ones in a sagging cell).
    base : Settings
        `settings` with the fit window before a sag.
    hum : Hum or None
        The mains hum of the baselines, taken out of `voltages` when `hum.removed`.
    """

    settings: Settings
    effective: Settings
    tau_init: tuple[float, ...] | None
    start_s: float | None
    sag_end_s: float | None
    voltages: dict[int, np.ndarray]
    chosen: list = field(default_factory=list)
    screened: list = field(default_factory=list)
    base: Settings | None = None
    hum: Hum | None = None

    def effective_for(self, settings: Settings) -> Settings:
        """`settings` (e.g. with a window moved) as the analysis would fit sweeps with them,
        keeping this analysis's first look: its fit start when none is set, and its sag
        window when the fit window is automatic."""
        out = settings
        if self.sag_end_s is not None and settings.windows.fit_ms is None:
            out = replace(out, windows=replace(
                out.windows, fit_end_ms=out.windows.fit_end_ms or self.sag_end_s / MS,
                decay=bool(out.windows.decay)))
        if self.start_s is not None and settings.fit_start_ms is None:
            out = replace(out, fit_start_ms=self.start_s / MS)
        return out


def start_values(recording: Recording, settings: Settings) -> StartValues:
    """Steps 1–3 of `pipeline.analyze` for `recording` with `settings`.

    Raises what `analyze` raises for these steps (LoadError when no step can be found).
    """
    fs = recording.sample_rate_hz
    steps = sweep_steps(recording, settings)
    chosen = [(s, st) for s, st in zip(recording.sweeps, steps, strict=True)
              if settings.sweeps is None or s.index in settings.sweeps]
    if not chosen:
        raise LoadError(recording.path, f"none of the sweeps {list(settings.sweeps or [])} exist; "
                        f"the file has sweeps 0-{len(recording.sweeps) - 1}")
    # each sweep is read up to its next step (the step's region)
    voltages = {s.index: s.voltage[:st.region_end] if st is not None else s.voltage
                for s, st in chosen}
    hum = None
    if settings.remove_hum:
        voltages, hum = without_hum(voltages, {s.index: st for s, st in chosen if st is not None},
                                    fs)
    screened = [baseline_only(voltages[s.index], st, s.index, fs, settings) for s, st in chosen]
    sag_end = sag_window(screened, voltages, fs) if settings.windows.fit_ms is None else None
    base = settings
    if sag_end is not None:
        base = replace(settings, windows=replace(
            settings.windows, fit_end_ms=settings.windows.fit_end_ms or sag_end / MS,
            decay=bool(settings.windows.decay)))
        screened = hyperpolarizing_only(screened)
    start, tau_init = first_look(screened, voltages, fs, base)
    effective = base if start is None else replace(base, fit_start_ms=start / MS)
    return StartValues(settings, effective, tau_init, start, sag_end, voltages, chosen,
                       screened, base, hum)
