"""Every name passivefit reports, declared once: quantities, flag codes, metadata keys.

A :class:`Quantity` is one reported value: its key in ``to_dict()`` (with the display
unit in the name), its labels, display unit and scale, significant digits, the key of
its 95 % CI and whether the database keeps it in a column. The JSON, the sheets, the
PDF report, the command line's table, the window's cell card and sweep table and the
database columns are all generated from these declarations.

A :class:`FlagSpec` is one quality flag: a stable code, a severity and the words
(a template, filled in with the numbers of the case). Code never writes a key or a flag
code as a string literal; a test greps for strays.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from passivefit.core.qc import Flag


# --------------------------------------------------------------------------- quantities
@dataclass(frozen=True)
class Quantity:
    """One reported value.

    Parameters
    ----------
    key : str
        Its name in ``to_dict()``, the sheets and the database; ends in its unit.
    label : str
        Short label (tables, the cell card).
    unit : str
        Display unit ("" for a pure number).
    scale : float
        SI value of one display unit (1e-3 for ms); 1 for pure numbers.
    digits : int
        Significant digits kept in ``to_dict()``.
    ci : str or None
        Key of the 95 % CI half-width of this value.
    title : str
        Longer label for the PDF report ("" = the label).
    kind : str
        "number", "int", "text" or "bool".
    column : bool
        The database keeps it in a column of its own (for filtering and plots).
    """

    key: str
    label: str
    unit: str = ""
    scale: float = 1.0
    digits: int = 6
    ci: str | None = None
    title: str = ""
    kind: str = "number"
    column: bool = False

    def display(self, value):
        """`value` (SI for numbers) in display units and digits; None when not finite."""
        if value is None:
            return None
        if self.kind == "text":
            return str(value)
        if self.kind == "bool":
            return bool(value)
        if self.kind == "int":
            return int(value)
        if not np.isfinite(value):
            return None
        return float(f"{float(value) / self.scale:.{self.digits}g}")

    @property
    def heading(self) -> str:
        """Label with unit, e.g. "τ0 (ms)"."""
        return f"{self.label} ({self.unit})" if self.unit else self.label


MS, MV, PA, MOHM, PF = 1e-3, 1e-3, 1e-12, 1e6, 1e-12


def _ci(key: str, of: str, unit: str = "", scale: float = 1.0) -> Quantity:
    return Quantity(key, f"{of} 95 % CI", unit, scale, 3)


# Cell values, in the order of the JSON contract, then the extras.
V_REST = Quantity("v_rest_mV", "V_rest", "mV", MV, title="Resting potential V_rest",
                  column=True)
R_IN = Quantity("r_in_MOhm", "R_in", "MΩ", MOHM, ci="r_in_ci95_MOhm",
                title="Input resistance R_in", column=True)
TAU0 = Quantity("tau0_ms", "τ0", "ms", MS, ci="tau0_ci95_ms",
                title="Membrane time constant τ0", column=True)
TAU0_CI = _ci("tau0_ci95_ms", "τ0", "ms", MS)
TAU1 = Quantity("tau1_ms", "τ1", "ms", MS, ci="tau1_ci95_ms", title="First equalizing τ1",
                column=True)
TAU1_CI = _ci("tau1_ci95_ms", "τ1", "ms", MS)
C0 = Quantity("c0_mV", "C0", "mV", MV, title="Amplitude C0")
C1 = Quantity("c1_mV", "C1", "mV", MV, title="Amplitude C1")
#: Words for C0 and C1 where they stand beside capacitances (the window's card, the text
#: summary): they are amplitudes (mV) of the exponential components
AMPLITUDE_LABELS = {C0.key: "C0 amplitude", C1.key: "C1 amplitude"}
L_CYL = Quantity("L_cyl", "L (cylinder)", digits=5, ci="L_cyl_ci95",
                 title="L, equivalent cylinder", column=True)
L_BS = Quantity("L_bs", "L (ball-and-stick)", digits=5, ci="L_ci95",
                title="L, ball-and-stick", column=True)
L_CI = _ci("L_ci95", "L (ball-and-stick)")
RHO = Quantity("rho", "ρ", digits=5, ci="rho_ci95", title="ρ, ball-and-stick", column=True)
RHO_CI = _ci("rho_ci95", "ρ")
C_TAU = Quantity("c_tau_pF", "C from τ0/R_in", "pF", PF, 5, title="C = τ0/R_in", column=True)
C_TOTAL = Quantity("c_total_pF", "C total (cable)", "pF", PF, 5,
                   title="C total (cable-corrected)", column=True)
SAG_RATIO = Quantity("sag_ratio", "sag ratio", digits=4, title="Sag ratio (steady/peak)",
                     column=True)
N_SWEEPS_USED = Quantity("n_sweeps_used", "sweeps used", kind="int", title="Sweeps used")

BRIDGE = Quantity("bridge_MOhm", "bridge jump", "MΩ", MOHM, 4, ci="bridge_ci95_MOhm",
                  title="Bridge jump at the step edge")
BRIDGE_CI = _ci("bridge_ci95_MOhm", "bridge jump", "MΩ", MOHM)
BRIDGE_APPLIED = Quantity("bridge_applied", "bridge subtracted from R_in", kind="bool")
TAU1_SOURCE = Quantity("tau1_source", "τ1 from", kind="text")
TAU1_EXP = Quantity("tau1_exp_ms", "τ1 (exponential fit)", "ms", MS)
TAU2 = Quantity("tau2_ms", "τ2", "ms", MS)
TAU0_MODEL = Quantity("tau0_model_ms", "τ0 (ball-and-stick fit)", "ms", MS)
L_CYL_CI = _ci("L_cyl_ci95", "L (cylinder)")
RHO_AMPLITUDE = Quantity("rho_amplitude", "ρ from amplitudes", digits=4)
FIT_START = Quantity("fit_start_ms", "fit start", "ms", MS, 4)
R_IN_METHOD = Quantity("r_in_method", "R_in from", kind="text")
R_IN_CI_FROM = Quantity("r_in_ci_from", "R_in's CI from", kind="text")
VI_R2 = Quantity("vi_r2", "V–I r²", digits=5)
R_IN_ASYMMETRY = Quantity("r_in_asymmetry", "± step R_in difference", digits=3)
N_COMPONENTS = Quantity("n_components", "components", kind="int")
COMPONENTS_REASON = Quantity("components_reason", "components because", kind="text")
CI_METHOD = Quantity("ci_method", "CIs from", kind="text")
REF_STEP = Quantity("ref_step_pA", "reference step", "pA", PA, 5)
C_RATIO = Quantity("c_ratio", "C ratio τ0/R_in : total", digits=4)
TAU_SAG = Quantity("tau_sag_ms", "sag τ", "ms", MS, title="Time constant of the sag")
R_IN_PEAK = Quantity("r_in_peak_MOhm", "R_in at the peak", "MΩ", MOHM,
                     title="Input resistance at the peak of a sagging response")
R_IN_SLOPE = Quantity("r_in_slope_MOhm", "R_in, V–I slope", "MΩ", MOHM)
R_IN_CHORD = Quantity("r_in_chord_MOhm", "R_in, smallest steps", "MΩ", MOHM)
REBOUND = Quantity("rebound_mV", "rebound", "mV", MV, title="Rebound after the step")
R_IN_CHANGE = Quantity("r_in_change_pct", "R_in change over the recording", "%", 0.01, 3,
                       title="R_in change, first to last quarter of the sweeps")
TAU0_CHANGE = Quantity("tau0_change_pct", "τ0 change over the recording", "%", 0.01, 3,
                      title="τ0 change, first to last quarter of the sweeps")
V_REST_CHANGE = Quantity("v_rest_change_mV", "V_rest change over the recording", "mV", MV, 3,
                         title="V_rest change, first to last quarter of the sweeps")
HUM = Quantity("hum_mV", "mains hum", "mV", MV, 3, title="Mains hum in the baselines")
STABLE_SWEEPS = Quantity("stable_sweeps", "sweeps of the stable stretch", kind="text")
R_IN_CI = _ci("r_in_ci95_MOhm", "R_in", "MΩ", MOHM)
R_IN_RAW = Quantity("r_in_raw_MOhm", "R_in, raw ΔV/ΔI", "MΩ", MOHM,
                    title="Input resistance before any bridge correction")
R_IN_CORRECTED = Quantity("r_in_bridge_corrected_MOhm", "R_in, bridge taken out", "MΩ", MOHM,
                          title="Input resistance with the fitted bridge jump taken out")
L_CI_LOW = Quantity("L_ci95_low", "L (ball-and-stick) 95 % CI, low end", digits=4)
L_CI_HIGH = Quantity("L_ci95_high", "L (ball-and-stick) 95 % CI, high end", digits=4)
RHO_CI_LOW = Quantity("rho_ci95_low", "ρ 95 % CI, low end", digits=4)
RHO_CI_HIGH = Quantity("rho_ci95_high", "ρ 95 % CI, high end", digits=4)
FILTER = Quantity("filter_corner_hz", "filter corner", "Hz", 1.0, 4, ci="filter_corner_ci95_hz",
                  title="Low-pass filter corner used by the model")
FILTER_CI = _ci("filter_corner_ci95_hz", "filter corner", "Hz")
FILTER_SOURCE = Quantity("filter_source", "filter corner from", kind="text")
LAG = Quantity("electrode_lag_us", "electrode lag", "µs", 1e-6, 3, ci="electrode_lag_ci95_us",
               title="Electrode lag of the bridge jump")
LAG_CI = _ci("electrode_lag_ci95_us", "electrode lag", "µs", 1e-6)
CM = Quantity("cm_uF_per_cm2", "specific Cm", "µF/cm²", 1e-2, 4)   # SI: F/m²
RM = Quantity("rm_kOhm_cm2", "specific Rm", "kΩ·cm²", 0.1, 4)      # SI: Ω·m²

#: Asymmetric 95 % intervals (low, high) of values whose likelihood is skewed.
INTERVALS = {L_BS.key: (L_CI_LOW, L_CI_HIGH), RHO.key: (RHO_CI_LOW, RHO_CI_HIGH)}



def _two_digits(x: float) -> str:
    """`x` to two significant digits, without an exponent where it is not needed: 240,
    not 2.4e+02."""
    return f"{float(f'{x:.2g}'):g}"


def _interval(low: float, high: float) -> str:
    """"low–high": ends of like size with the same decimals, enough for two significant
    digits of each (3.0–3.1, 0.88–1.10) or, where those round both ends alike, for two of
    the width (1.286–1.334); ends a decade or more apart each to two digits (0.66–35)."""
    if not (0 < low < high) or high >= 10 * low:
        return f"{_two_digits(low)}–{_two_digits(high)}"
    decimals = max(_decimals(low), _decimals(high))
    if f"{low:.{decimals}f}" == f"{high:.{decimals}f}":
        decimals = _decimals(high - low)
    return f"{low:.{decimals}f}–{high:.{decimals}f}"


def _decimals(x: float) -> int:
    """Decimals that show `x` (> 0) to two significant digits."""
    return max(0, 1 - math.floor(math.log10(x)))


def uncertainty_text(cell: Mapping, q: Quantity) -> str:
    """How sure a value of `cell` (display units) is, for tables and cards: " (2.5–11)"
    for a skewed interval, " ± 0.29" from the CI half-width, "" without either."""
    if cell.get(q.key) is None:
        return ""
    ends = [cell.get(e.key) for e in INTERVALS.get(q.key, ())]
    if len(ends) == 2 and None not in ends:
        return f" ({_interval(*ends)})"
    ci = cell.get(q.ci) if q.ci else None
    if isinstance(ci, list | tuple) and len(ci) == 2 and None not in ci:   # (low, high)
        return f" ({_interval(ci[0], ci[1])})"
    if isinstance(ci, int | float):
        return f" ± {_two_digits(ci)}"
    return ""


def legend(cell: Mapping) -> list[str]:
    """Where a cell's ± come from and how R_in was found, for the text summary and the
    window's card: ["± = 95 % CI (…; R_in's from …)", "R_in by …"] (parts missing from
    `cell` left out)."""
    ci, r_in_ci = cell.get(CI_METHOD.key), cell.get(R_IN_CI_FROM.key)
    out = []
    if ci:
        out.append(f"± = 95 % CI ({ci}; R_in's from {r_in_ci})" if r_in_ci
                   else f"± = 95 % CI ({ci})")
    if cell.get(R_IN_METHOD.key):
        out.append(f"R_in by {cell[R_IN_METHOD.key]}")
    return out


#: The `cell` object of the JSON contract: these keys always, null when not estimable.
CELL_CORE = (V_REST, R_IN, TAU0, TAU0_CI, TAU1, TAU1_CI, C0, C1, L_CYL, L_BS, L_CI, RHO,
             RHO_CI, C_TAU, C_TOTAL, SAG_RATIO, N_SWEEPS_USED)
CELL_EXTRA = (BRIDGE, BRIDGE_CI, BRIDGE_APPLIED, TAU1_SOURCE, TAU1_EXP, TAU2, TAU0_MODEL, L_CYL_CI,
              RHO_AMPLITUDE, FIT_START, R_IN_METHOD, R_IN_CI_FROM, VI_R2, R_IN_ASYMMETRY,
              N_COMPONENTS, COMPONENTS_REASON, CI_METHOD, REF_STEP, C_RATIO, CM, RM, TAU_SAG,
              R_IN_PEAK, R_IN_SLOPE, R_IN_CHORD, REBOUND, R_IN_CHANGE, TAU0_CHANGE, V_REST_CHANGE,
              STABLE_SWEEPS, HUM, R_IN_CI, R_IN_RAW, R_IN_CORRECTED, L_CI_LOW, L_CI_HIGH,
              RHO_CI_LOW, RHO_CI_HIGH, FILTER, FILTER_CI, FILTER_SOURCE, LAG, LAG_CI)
CELL = CELL_CORE + CELL_EXTRA

# Sweep values (each of `sweeps`), in contract order.
INDEX = Quantity("index", "#", kind="int")
ACCEPTED = Quantity("accepted", "accepted", kind="bool")
REJECT_REASON = Quantity("reject_reason", "status", kind="text")
STEP = Quantity("step_pA", "step", "pA", PA, 5)
RMSE = Quantity("rmse_mV", "rmse", "mV", MV)
FLAGS_KEY = "flags"
SWEEP = (INDEX, ACCEPTED, REJECT_REASON, STEP, V_REST, R_IN, TAU0, TAU1, TAU2, C0, C1, RMSE,
         BRIDGE, SAG_RATIO, N_COMPONENTS, TAU_SAG, R_IN_PEAK, REBOUND)
SWEEP_CORE = (INDEX, ACCEPTED, REJECT_REASON, STEP, V_REST, R_IN, TAU0, TAU1, C0, C1, RMSE)

BY_KEY: dict[str, Quantity] = {q.key: q for q in (*CELL, *SWEEP)}

#: What a physiologist reads first: the command line's table, the window's card and the
#: report's values table, in this order (CIs shown beside their value).
SUMMARY = (V_REST, R_IN, TAU0, TAU1, C0, C1, L_CYL, L_BS, RHO, C_TAU, C_TOTAL, SAG_RATIO,
           BRIDGE)
#: The per-sweep table of the command line and the window.
SWEEP_TABLE = (INDEX, STEP, V_REST, R_IN, TAU0, TAU1, RMSE)
#: Cell values the database keeps in columns of their own.
COLUMNS = tuple(q for q in CELL if q.column)
SWEEP_COLUMNS = (STEP, V_REST, R_IN, TAU0, TAU1, C0, C1, RMSE)


def unit_of(key: str) -> str:
    """Display unit of a key or of a sheet column made from one (``tau0_ci95_ms_lo``);
    "" when unknown or unitless."""
    for end in ("_lo", "_hi"):
        if key.endswith(end) and key[: -len(end)] in BY_KEY:
            key = key[: -len(end)]
    q = BY_KEY.get(key)
    if q is not None:
        return q.unit
    q = METADATA_BY_KEY.get(key)
    return q.unit if q is not None else ""


# --------------------------------------------------------------------------- metadata
@dataclass(frozen=True)
class MetadataKey:
    """One cell-metadata column (metadata sheet, database, file headers)."""

    key: str
    label: str
    unit: str = ""
    kind: str = "text"      # "text", "number" or "date"


CELL_ID = MetadataKey("cell_id", "cell")
METADATA = (
    CELL_ID,
    MetadataKey("date", "date", kind="date"),
    MetadataKey("preparation", "preparation"),
    MetadataKey("region", "region"),
    MetadataKey("cell_type", "cell type"),
    MetadataKey("temperature_C", "temperature", "°C", "number"),
    MetadataKey("internal_solution", "internal solution"),
    MetadataKey("notes", "notes"),
)
METADATA_KEYS = tuple(m.key for m in METADATA)
METADATA_BY_KEY = {m.key: m for m in METADATA}


# --------------------------------------------------------------------------- flags
@dataclass(frozen=True)
class FlagSpec:
    """One quality flag code and its words.

    Parameters
    ----------
    code : str
        Stable code, "<where>.<what>".
    severity : str
        "info" (a correction was made), "warning" (read with care) or "error" (no value).
    template : str
        The message; ``{name}`` fields are filled in by :meth:`make`. A ``{reason}``
        field takes one of `reasons` by name.
    reasons : mapping
        Named variants of the message for one code.
    """

    code: str
    severity: str
    template: str
    reasons: Mapping[str, str] = field(default_factory=dict)

    def make(self, value: float | None = None, *, reason: str | None = None,
             **fields) -> Flag:
        """A flag of this code with its message filled in and the value behind it."""
        if reason is not None:
            fields["reason"] = self.reasons[reason].format(**fields)
        return Flag(self.code, self.template.format(**fields), value)


FLAGS: dict[str, FlagSpec] = {}


def _flag(code: str, severity: str, template: str, **reasons: str) -> FlagSpec:
    spec = FlagSpec(code, severity, template, reasons)
    FLAGS[code] = spec
    return spec


# sweep level
STEADY_NOT_REACHED = _flag(
    "steady.not_reached", "warning",
    "the voltage is still changing in the steady-state window; {reason} (fraction of the "
    "deflection left)",
    asymptote="the fitted asymptote is used",
    measured="the fit ends before that window (before a sag), so it cannot tell how far the "
             "voltage has yet to go: the level measured there is used")
SWEEP_DRIFT = _flag(
    "sweep.drift", "warning",
    "the baseline at the end of the sweep differs from the one before the step ({done}) (mV)")
SWEEP_EVENT = _flag(
    "sweep.event", "info",
    "{n} spontaneous event(s) at {at} cut out of the fits and the steady state (largest, "
    "in detector noise sds)")
# cell level
CELL_NO_SWEEPS = _flag("cell.no_sweeps", "error", "no sweep was accepted; nothing to report")
CELL_FEW_SWEEPS = _flag(
    "cell.few_sweeps", "warning",
    "fewer than 3 sweeps accepted: averages are noisy, and the CIs of the time constants "
    "come from the fit alone (the noise), not from what changes between sweeps (number of "
    "sweeps)")
CELL_NO_STEADY_STATE = _flag(
    "cell.no_steady_state", "info",
    "no step reaches a steady state and the pulses' charge integral gives no positive R_in: "
    "R_in is not measured")
CELL_SWEEP_SPREAD = _flag(
    "cell.sweep_spread", "warning",
    "τ0 of the averaged sweeps differs from the median of the single sweeps (ms)")
CELL_BRIDGE = _flag(
    "cell.bridge", "info",
    "an instantaneous jump at the step edge shows a bridge imbalance; it is {what} R_in (MΩ)")
CELL_BRIDGE_UNCERTAIN = _flag(
    "cell.bridge_uncertain", "warning", "{reason}",
    includes_zero="the jump at the step edge cannot be told apart from zero (its 95 % CI "
                  "includes it); R_in is not corrected for it (MΩ)",
    undetermined="these data do not determine the jump at the step edge (its 95 % CI is "
                 "wider than R_in), so it is not reported: R_in is not corrected for it and "
                 "may hold a bridge error (fitted jump, MΩ)")
CELL_FILTER_ESTIMATED = _flag(
    "cell.filter_estimated", "info",
    "the file does not state the amplifier's low-pass corner; it was {how}{undetermined} (Hz)")
CELL_ASYMMETRIC = _flag(
    "cell.asymmetric", "warning",
    "depolarizing and hyperpolarizing steps give R_in that differ: the responses are not "
    "linear (relative difference)")
CELL_SAG = _flag(
    "cell.sag", "warning",
    "the voltage sags back during hyperpolarizing steps (an active, e.g. h-type, "
    "conductance): the cell is not passive (steady/peak ratio)")
VI_NONLINEAR = _flag(
    "vi.nonlinear", "warning",
    "the V–I relation is not straight over the step range (relative change of slope)")
FIT_FAILED = _flag("fit.failed", "error", "the fit of the averaged sweeps failed: {problem}")
FIT_TAU1_UNRESOLVED = _flag(
    "fit.tau1_unresolved", "warning", "{reason}",
    one_component="only one exponential component is resolved: no τ1, so no electrotonic "
                  "length",
    too_fast="τ1 is shorter than 3 sampling intervals: not resolved (ms)",
    wide_ci="the 95 % CI of τ1 is wider than τ1 itself: not resolved (ms)",
    not_passive="the response is not passive (it sags back, or holds a slow component of "
                "the opposite sign), so no τ1 and no electrotonic length are given: they "
                "describe a passive membrane")
FIT_TAU1_DRIFT = _flag(
    "fit.tau1_drift", "warning",
    "τ1 still changes when the fit starts 1 ms later: early artefact or unresolved faster "
    "components (relative change)")
FIT_ONSET_OFFSET = _flag(
    "fit.onset_offset", "warning",
    "τ0 of the charging ({on}) and of the decay transient ({off}), fitted apart, disagree; "
    "the cell's τ0 is fitted to both (relative difference)")
FIT_RESIDUAL_STRUCTURE = _flag(
    "fit.residual_structure", "warning", "{reason}",
    misfit="the residuals keep their sign too long: the model misses part of the transient "
           "(runs-test z)",
    hum="the residuals keep their sign too long, as the mains hum in the recording makes "
        "them do (runs-test z)")
CELL_HUM = _flag(
    "cell.hum", "info", "{reason}",
    removed="mains hum of {amplitude} at {hz}, fitted in each sweep's flat stretches "
            "(baseline, end of the step, end of the tail), was taken out before the fits "
            "(amplitude, mV)",
    seen="mains hum of {amplitude} at {hz} in the baselines; it averages out over sweeps of "
         "random phase but shows in single sweeps and their residuals (amplitude, mV)")
CABLE_FIT_FAILED = _flag(
    "cable.fit_failed", "warning", "{reason}",
    failed="the ball-and-stick fit failed: {problem}",
    not_converged="the ball-and-stick fit did not converge: {problem}")
CABLE_L_UNRESOLVED = _flag(
    "cable.L_bs_unresolved", "warning",
    "the 95 % CI of the ball-and-stick L is wider than the value itself: not resolved")
CABLE_RHO_UNRESOLVED = _flag(
    "cable.rho_unresolved", "warning",
    "the 95 % CI of ρ is wider than the value itself: not resolved")
CABLE_RHO_MISMATCH = _flag(
    "cable.rho_mismatch", "warning", "{reason}",
    disagree="ρ from the amplitudes and ρ from the time course disagree by more than 2×: the "
             "cell is not a uniform ball-and-stick (ρ from amplitudes)",
    no_value="{problem}")
CABLE_TAU2_RATIO = _flag(
    "cable.tau2_ratio", "warning",
    "(τ0/τ2 − 1)/(τ0/τ1 − 1) = {x:.2f} is outside 4–9, the range of a uniform "
    "ball-and-stick: τ1 or τ2 is unreliable, or the cell is not uniform")
CABLE_SHUNT_SUSPECTED = _flag(
    "cable.shunt_suspected", "warning",
    "{reason}: not a uniform passive cell (somatic shunt or non-uniform membrane?)",
    pulse="pulse C1/C0 = {x:.3f} exceeds 2",
    step="step B1/B0 = {x:.3f} exceeds 2·τ1/τ0 = {limit:.3f}")
CABLE_L_RANGE = _flag(
    "cable.L_range", "warning",
    "L = {x:.3g} is outside 0.1–3, unusual for a neuron: check τ1")
CABLE_RHO_RANGE = _flag(
    "cable.rho_range", "warning",
    "ρ = {x:.3g} is outside 0.1–100, unusual for a neuron: check the amplitude ratio")

# reading: the protocol against the recorded current, the channel chosen
PROTOCOL_AMPLITUDE = _flag(
    "protocol.amplitude_disagrees", "warning",
    "sweep {sweep}: the step at {at} is {planned} in the {source} but {recorded} in the "
    "recorded current; the recorded current is used (recorded − planned, pA)")
PROTOCOL_TIMING = _flag(
    "protocol.timing_disagrees", "warning",
    "sweep {sweep}: the step is at {planned} in the {source} but at {recorded} in the "
    "recorded current; the recorded current is used (largest shift, ms)")
PROTOCOL_HOLDING = _flag(
    "protocol.holding_disagrees", "info",
    "sweep {sweep}: the recorded current rests at {recorded} where the {source} holds "
    "{planned} (offset {offset}); steps are measured from the level before each (offset, "
    "pA)")
PROTOCOL_STEP_MISSING = _flag(
    "protocol.step_missing", "warning", "{reason}",
    not_recorded="sweep {sweep}: the {source} has a {amplitude} step at {at} that the "
                 "recorded current does not show (its amplitude, pA)",
    not_planned="sweep {sweep}: the recorded current has a {amplitude} step at {at} that "
                "the {source} does not have (its amplitude, pA)")
PROTOCOL_USER_LIST = _flag(
    "protocol.user_list", "warning",
    "the epoch table varies a parameter through a user list (values: {values}); the drawn "
    "command may differ from what was played, so a recorded current channel is preferred "
    "where there is one")
PROTOCOL_CHANNEL = _flag(
    "protocol.channel_chosen", "info",
    "membrane potential read from {channel} (median {median}); {others}")
PROTOCOL_ELECTRODE = _flag(
    "protocol.electrode_chosen", "info",
    "sweeps read from electrode {electrode} only, one cell of {count}; the file also holds "
    "{others}: analyse each on its own by naming it as the channel (`--channel NAME`)")
PROTOCOL_OTHER_CLAMP = _flag(
    "protocol.other_clamp", "info",
    "{count} sweep(s) of the file were not recorded in current clamp ({kinds}: sweeps "
    "{which}) and are left out (sweeps left out)")
PROTOCOL_WAVEFORM = _flag(
    "protocol.waveform_after_step", "info",
    "{which}: a changing current (noise, a chirp) follows the step from {at}; the "
    "step is analysed up to there, the waveform is not (earliest start, ms)")
PROTOCOL_LATER_STEPS = _flag(
    "protocol.later_steps", "info",
    "{which}: the step analysed is followed by other steps or pulses of current from {at}, "
    "which are not analysed; it is read up to there (earliest, ms)")
PROTOCOL_RATES = _flag(
    "protocol.rates_mixed", "warning",
    "the file's current-clamp sweeps are sampled at several rates: the {kept} at {rate} are "
    "analysed, {others} left out (sweeps left out)")

# real cells: sag, activity, the sign of the step, stability over the recording
FIT_SAG_COMPONENT = _flag(
    "fit.sag_component", "info",
    "a slow component of the opposite sign (τ {tau}) is the sag of an active conductance, "
    "not a membrane mode; τ0 is the slowest component in the direction of the response "
    "(sag time constant, ms)")
FIT_SAG_WINDOW = _flag(
    "fit.sag_window", "info",
    "the cell sags, so the charging transient is fitted only up to {end} after the onset, "
    "before the sag acts, and the decay after the step (with its rebound) is not fitted "
    "(fit end, ms)")
CABLE_NOT_PASSIVE = _flag(
    "cable.not_passive", "warning",
    "{reason}, so the passive cable model (L, ρ, C total, bridge) is not fitted",
    sag="the response sags back (an active conductance)",
    component="the response holds a slow component of the opposite sign (an active "
              "conductance), though too small or slow to show as a sag of the peak")
CELL_C_BEFORE_SAG = _flag(
    "cell.c_before_sag", "info",
    "τ0 is fitted before the sag but R_in is the steady state after it, where the sag's "
    "conductance is open, so C = τ0/R_in comes out too large; the fit's own amplitude "
    "gives I·τ0/C0 = {c} for the membrane before the sag (pF)")
CABLE_AT_BOUND = _flag(
    "cable.at_bound", "warning",
    "{name} sits at the bound of the ball-and-stick fit ({x:.3g}): not determined by these "
    "data, so it is not reported")
CELL_ACTIVE_SWEEPS = _flag(
    "cell.active_sweeps", "info",
    "{n} depolarizing sweep(s) respond unlike {reference} (active conductances): the "
    "passive values come from the sweeps that respond passively (number left out)")
CELL_DEPOLARIZING_ONLY = _flag(
    "cell.depolarizing_only", "warning",
    "{reason}: it moves the cell towards threshold, where voltage-gated conductances open, so "
    "even the smallest step may not respond passively; hyperpolarizing steps give the "
    "passive values (smallest step, pA)",
    none="every step is depolarizing",
    left_out="every hyperpolarizing step was left out (see the sweeps' reasons), so the "
             "values come from depolarizing steps")
CELL_SCALE_SUSPECT = _flag(
    "cell.scale_suspect", "warning", "{reason}",
    r_in="R_in is outside what neurons show (0.1 MΩ–50 GΩ): check the current's unit and "
         "the amplifier's gain (MΩ)",
    capacitance="C = τ0/R_in is outside what neurons show (0.5 pF–100 nF): check the "
                "current's unit and the amplifier's gain (pF)")
CELL_UNSTABLE = _flag(
    "cell.unstable", "warning",
    "R_in changes by {x:+.0f} % and V_rest by {dv:+.1f} mV over the recording; the cell "
    "values come from {what} (R_in change, %)")

CELL_TAU0_DRIFT = _flag(
    "cell.tau0_drift", "warning",
    "τ0 changes by {x:+.0f} % over the recording (first to last quarter of the sweeps of one "
    "step): the cell or the recording changed (series resistance, the cell's health), and "
    "the cell's τ0 and its interval average over that change (τ0 change, %)")

#: core.cable.implausible() check names → flag codes.
PLAUSIBILITY = {"tau2_ratio": CABLE_TAU2_RATIO, "shunt_pulse": CABLE_SHUNT_SUSPECTED,
                "shunt_step": CABLE_SHUNT_SUSPECTED, "L_range": CABLE_L_RANGE,
                "rho_range": CABLE_RHO_RANGE}


def flags_markdown() -> str:
    """The README's table of flag codes (a test keeps the README equal to it)."""
    import re

    rows = ["| code | severity | what it says |", "|---|---|---|"]
    for spec in FLAGS.values():
        words = (" / ".join(spec.template.replace("{reason}", r) for r in spec.reasons.values())
                 if spec.reasons else spec.template)
        words = re.sub(r"\{x[^}]*\}", "x", words)          # the value tested
        words = re.sub(r"\{[^}]*\}", "…", words).replace("|", "\\|")
        rows.append(f"| `{spec.code}` | {spec.severity} | {words} |")
    return "\n".join(rows) + "\n"
