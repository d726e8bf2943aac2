"""Per-cell PDF report: the fits over the traces, diagnostics, the numbers and their limits.

Per recording, one A4 page of figures and one or more pages of text:

1. the sweeps with their fitted curves; the combined response with the cell fit;
   the semilog (peel) view; the residuals of the cell fit; the V–I relation; and
   τ0, τ1 of exponential fits against the fit start, beside the cell's values;
2. the cell values with their 95 % intervals, the flags, the sweeps table, the
   provenance (file hash, version, settings) and the cautions that go with
   cable-theory estimates.

Reads the arrays of `passivefit.analysis.RecordingResult` (model curves, peel lines,
fit-start scan, V–I points) and the recording's traces; the numbers on page 2 come
from ``RecordingResult.to_dict()``, the same object the sheets and database hold.
"""

from __future__ import annotations

import json
import os
import secrets
import textwrap
from collections.abc import Mapping, Sequence
from datetime import UTC, datetime
from pathlib import Path

from passivefit.model import schema as S
from passivefit.model.provenance import result_settings_hash
from passivefit.resources import read_json

MS, MV, PA = 1e-3, 1e-3, 1e-12
A4_PORTRAIT = (8.27, 11.69)
RASTER_DPI = 150  # dense traces are embedded as images at this resolution; text stays vector
FIT_COLOUR, DATA_COLOUR, REJECT_COLOUR, MODE_COLOURS = (
    "#c0392b", "#3b4a5a", "#e6a3a3", ("#1f6f8b", "#d4881e", "#5c8a3a"))

# The values table: what a physiologist reads first, then the number of sweeps used.
VALUE_ROWS = (*S.SUMMARY, S.N_SWEEPS_USED)

CAUTIONS = "\n".join(read_json("report_texts.json")["cautions"])  # resources/report_texts.json


def write_report(cells: Sequence[tuple], path: str | Path, *,
                 analysed_at: datetime | None = None) -> Path:
    """Write the PDF report of one or more analysed recordings.

    Parameters
    ----------
    cells : sequence of (Recording, RecordingResult)
        Each recording with the result of `passivefit.analysis.analyze` on it.
    path : str or Path
        The ``.pdf`` file to write (replaced if it exists).
    analysed_at : datetime, optional
        Time shown in the provenance block; default: now (UTC).

    Returns
    -------
    Path
        The written file.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.backends.backend_pdf import PdfPages

    path = Path(path)
    if path.suffix.lower() != ".pdf":
        raise ValueError(f"{path}: the report is a PDF; give a file ending in .pdf")
    when = analysed_at or datetime.now(UTC)
    # Written under a temporary name in the same folder and renamed when complete, so a
    # full disk or a crash never leaves a truncated report under the final name.
    tmp = path.with_name(f".{path.stem}-{secrets.token_hex(4)}.pdf.tmp")
    try:
        with plt.rc_context({"font.size": 7.5, "axes.titlesize": 8.5, "axes.labelsize": 7.5,
                             "xtick.labelsize": 7, "ytick.labelsize": 7,
                             "legend.fontsize": 6.5, "pdf.fonttype": 42}), \
                PdfPages(tmp) as pdf:
            for recording, result in cells:
                data = result.to_dict()
                fig = _figure_page(recording, result, data)
                try:
                    pdf.savefig(fig, dpi=RASTER_DPI)
                finally:
                    plt.close(fig)
                _numbers_pages(pdf, recording, data, when)
            info = pdf.infodict()
            info["Title"] = "passivefit report"
            info["Creator"] = (f"passivefit {cells[0][1].to_dict()['passivefit_version']}"
                               if cells else "passivefit")
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


# ---------------------------------------------------------------------------- page 1
def _figure_page(recording, result, data: dict):
    import matplotlib.pyplot as plt

    fig = plt.figure(figsize=A4_PORTRAIT)
    grid = fig.add_gridspec(5, 2, left=0.09, right=0.97, top=0.92, bottom=0.045, hspace=0.62,
                            wspace=0.38, height_ratios=[1.15, 1, 1, 1, 0.9])
    _header(fig, recording, data, "fits and diagnostics")
    _draw_sweeps(fig.add_subplot(grid[0, :]), recording, result)
    _draw_average(fig.add_subplot(grid[1, 0]), result, recording.sample_rate_hz)
    _draw_semilog(fig.add_subplot(grid[1, 1]), result, recording.sample_rate_hz)
    _draw_residuals(fig.add_subplot(grid[2, 0]), result, recording.sample_rate_hz)
    _draw_vi(fig.add_subplot(grid[2, 1]), result)
    _draw_scan(fig.add_subplot(grid[3, 0]), fig.add_subplot(grid[3, 1]), result, data)
    _draw_time_course(fig.add_subplot(grid[4, 0]), fig.add_subplot(grid[4, 1]), data)
    return fig


def _header(fig, recording, data: dict, what: str) -> None:
    meta = recording.metadata or {}
    name = meta.get("cell_id") or Path(data["source"]["path"]).stem
    fig.text(0.09, 0.965, f"{name} — {what}", fontsize=12, weight="bold")
    details = [Path(data["source"]["path"]).name, f"{data['source']['format']}",
               f"{data['source']['sweep_count']} sweeps", f"{recording.sample_rate_hz:g} Hz"]
    if meta.get("date"):
        details.append(str(meta["date"])[:10])  # NWB gives a full session start time
    details += [str(meta[k]) for k in ("region", "cell_type") if meta.get(k)]
    if meta.get("temperature_C") is not None:
        details.append(f"{meta['temperature_C']} °C")
    fig.text(0.09, 0.945, textwrap.shorten(" · ".join(map(str, details)), 150), fontsize=8,
             color="#444444")


def _unavailable(ax, why: str) -> None:
    ax.text(0.5, 0.5, textwrap.fill(why, 45), ha="center", va="center", transform=ax.transAxes,
            color="#777777")
    ax.set_xticks([])
    ax.set_yticks([])


def _window(result, fs: float, n: int) -> tuple[int, int]:
    """Sample range to show: from before the first fit segment to after the last one."""
    segments = [s for f in result.sweeps for s in f.segments]
    if not segments:
        return 0, n
    first = min(s.edge_s for s in segments)
    last = max(s.end_s for s in segments)
    pad = 0.1 * (last - first)
    return max(0, int((first - pad) * fs)), min(n, int((last + pad) * fs) + 1)


def _draw_sweeps(ax, recording, result) -> None:
    import numpy as np

    fs = recording.sample_rate_hz
    fits = {f.index: f for f in result.sweeps}
    a, b = _window(result, fs, max(s.n_samples for s in recording.sweeps))
    for sweep in recording.sweeps:
        fit = fits.get(sweep.index)
        if fit is None:
            continue
        t = np.arange(a, min(b, sweep.n_samples)) / fs
        colour = DATA_COLOUR if fit.accepted else REJECT_COLOUR
        ax.plot(t / MS, sweep.voltage[a:b] / MV, color=colour, lw=0.4, alpha=0.7,
                rasterized=True)
        for tc, vc in fit.model_curves():
            ax.plot(tc / MS, vc / MV, color=FIT_COLOUR, lw=0.8)
    ax.plot([], [], color=DATA_COLOUR, lw=0.8, label="accepted sweeps")
    if any(not f.accepted for f in result.sweeps):
        ax.plot([], [], color=REJECT_COLOUR, lw=0.8, label="rejected sweeps")
    ax.plot([], [], color=FIT_COLOUR, lw=0.8, label="per-sweep fits")
    ax.legend(loc="best", frameon=False, ncol=3)
    ax.set_title("Sweeps and their fits")
    ax.set_xlabel("time (ms)")
    ax.set_ylabel("V (mV)")


def _draw_average(ax, result, fs: float) -> None:
    import numpy as np

    g, fit = result.average, result.cell_fit
    if g is None or fit is None:
        _unavailable(ax, "no cell fit: see the flags")
        return
    a, b = _window(result, fs, g.v_V.size)
    t = np.arange(a, b) / fs
    ax.plot(t / MS, g.v_V[a:b] / MV, color=DATA_COLOUR, lw=0.5, label="combined response",
            rasterized=True)
    for k, (tc, vc) in enumerate(g.model_curves(fit)):
        ax.plot(tc / MS, vc / MV, color=FIT_COLOUR, lw=1.0, label="cell fit" if k == 0 else None)
    ax.set_title(f"Combined response ({len(g.sweep_indices)} sweeps, "
                 f"{g.amplitude_A / PA:.4g} pA)")
    ax.set_xlabel("time (ms)")
    ax.set_ylabel("V (mV)")
    ax.legend(loc="best", frameon=False)


def _draw_semilog(ax, result, fs: float) -> None:
    import numpy as np

    g, fit, peel = result.average, result.cell_fit, result.peel
    if g is None or fit is None or not g.segments:
        _unavailable(ax, "no cell fit: nothing to peel")
        return
    seg = g.segments[0]
    span = seg.samples(fs)
    t = np.arange(span.start, span.stop) / fs - seg.edge_s
    distance = np.abs(g.v_V[span] - fit.offsets[seg.index])
    floor = max(float(np.median(distance)) * 1e-2, 1e-7)
    keep = distance > floor
    ax.semilogy(t[keep] / MS, distance[keep] / MV, ".", ms=1.2, color=DATA_COLOUR,
                label="|V − V∞|", rasterized=True)
    amps = fit.amplitudes[seg.index]
    for k, (tau, amp) in enumerate(zip(fit.taus, amps, strict=True)):
        line = np.abs(amp) * np.exp(-t / tau)
        ax.semilogy(t / MS, line / MV, color=MODE_COLOURS[k % 3], lw=1.0,
                    label=f"fit τ0 = {tau / MS:.3g} ms" if k == 0 else f"exp. component {k}")
    caption, tau1 = result.cell.tau1_caption(), result.cell.values.get(S.TAU1.key)
    if caption and len(amps) > 1:  # the cell's one τ1, drawn from the component's amplitude
        ax.semilogy(t / MS, np.abs(amps[1]) * np.exp(-t / (tau1 * MS)) / MV, ":",
                    color=FIT_COLOUR, lw=1.2, label=caption)
    if peel is not None:
        for k, line in enumerate(peel.lines):
            tl = np.linspace(0.0, line.t_end, 50)
            ax.semilogy(tl / MS, np.exp(line.intercept_log + line.slope * tl) / MV, "--",
                        color=MODE_COLOURS[k % 3], lw=0.8,
                        label=f"peel line {k} (start value)")
    top = float(distance.max())
    ax.set_ylim(max(floor, top * 1e-3) / MV, top * 2 / MV)
    ax.set_xlim(0.0, min(t.max(), 6.0 * fit.taus[0]) / MS)  # beyond ~6 τ0 only noise is left
    ax.set_title("Semilog view of the first transient")
    ax.set_xlabel("time from the step edge (ms)")
    ax.set_ylabel("|V − V∞| (mV)")
    ax.legend(loc="upper right", frameon=False)


def _draw_residuals(ax, result, fs: float) -> None:
    import numpy as np

    from passivefit.analysis.fits import residual

    g, fit = result.average, result.cell_fit
    if g is None or fit is None or not g.segments:
        _unavailable(ax, "no cell fit: no residuals")
        return
    names = ("charging", "decay") if g.step.kind == "step" else ("decay",)
    for k, seg in enumerate(g.segments):
        t, r = residual(g.v_V, fit, seg, fs)
        ax.plot((t - seg.edge_s) / MS, r / MV, lw=0.4, color=MODE_COLOURS[k % 3],
                label=names[k] if k < len(names) else f"segment {k}", rasterized=True)
    ax.axhline(0.0, color="black", lw=0.6)
    rmse = float(np.sqrt(np.mean(np.concatenate(
        [residual(g.v_V, fit, s, fs)[1] for s in g.segments]) ** 2)))
    ax.set_title(f"Residuals of the cell fit (rms {rmse / MV:.3g} mV)")
    ax.set_xlabel("time from the step edge (ms)")
    ax.set_ylabel("data − fit (mV)")
    ax.legend(loc="upper right", frameon=False)


def _draw_vi(ax, result) -> None:
    import numpy as np

    vi = result.vi
    if not vi or len(vi.get("current_A", ())) == 0:
        _unavailable(ax, "no steady-state deflections (brief pulses): no V–I relation")
        return
    i, dv = np.asarray(vi["current_A"]), np.asarray(vi["dv_V"])
    ax.plot(i / PA, dv / MV, "o", ms=3, color=DATA_COLOUR, label="steady-state ΔV per sweep")
    line = vi.get("slope")
    if line is not None:
        span = np.linspace(min(i.min(), 0.0), max(i.max(), 0.0), 20)
        ax.plot(span / PA, (line.slope_ohm * span + line.intercept_V) / MV, color=FIT_COLOUR,
                lw=1.0, label=f"slope {line.slope_ohm / 1e6:.4g} MΩ (r² {line.r2:.4f})")
        ax.set_title("V–I relation (R_in = slope)")
    else:
        ax.set_title("V–I points (fewer than 3 step amplitudes)")
    ax.axhline(0, color="#999999", lw=0.5)
    ax.axvline(0, color="#999999", lw=0.5)
    ax.set_xlabel("step current (pA)")
    ax.set_ylabel("ΔV (mV)")
    ax.legend(loc="best", frameon=False)


def _draw_scan(ax0, ax1, result, data: dict) -> None:
    import numpy as np

    scan = result.scan
    if not scan or np.all(~np.isfinite(scan["tau0_s"])):
        _unavailable(ax0, "no fit-start scan")
        _unavailable(ax1, "no fit-start scan")
        return
    start = np.asarray(scan["start_s"]) / MS
    for ax, key, name, chosen in ((ax0, "tau0", "τ0", data["cell"].get(S.TAU0.key)),
                                  (ax1, "tau1", "τ1", data["cell"].get(S.TAU1.key))):
        value = np.asarray(scan[f"{key}_s"]) / MS
        ci = np.asarray(scan[f"{key}_ci95_s"]) / MS
        if not np.any(np.isfinite(value)):
            _unavailable(ax, f"{name} not resolved at any fit start")
            continue
        ax.errorbar(start, value, yerr=np.where(np.isfinite(ci), ci, 0.0), fmt="o-", ms=3,
                    lw=0.8, capsize=2, color=MODE_COLOURS[0 if key == "tau0" else 1])
        if chosen is not None:
            label = (result.cell.tau1_caption() if key == "tau1"
                     else f"cell τ0 {chosen:.4g} ms")
            ax.axhline(chosen, color=FIT_COLOUR, lw=0.7, ls="--", label=label)
            ax.legend(loc="best", frameon=False)
        ax.set_title(f"{name} of exponential fits from later starts")
        ax.set_xlabel("fit start after the step edge (ms)")
        ax.set_ylabel(f"{name} (ms)")


def _draw_time_course(ax_r, ax_v, data: dict) -> None:
    """R_in, τ0 and V_rest of every sweep in recording order: drift shows here."""
    sweeps = [s for s in data["sweeps"] if s.get(S.R_IN.key) is not None]
    if len(sweeps) < 2:
        _unavailable(ax_r, "fewer than 2 measured sweeps: no time course")
        _unavailable(ax_v, "fewer than 2 measured sweeps: no time course")
        return
    for ax, q, colour in ((ax_r, S.R_IN, DATA_COLOUR), (ax_v, S.V_REST, MODE_COLOURS[0])):
        for used, marker in ((True, "o"), (False, "x")):
            pts = [(s[S.INDEX.key], s[q.key]) for s in sweeps
                   if bool(s[S.ACCEPTED.key]) == used and s.get(q.key) is not None]
            if pts:
                x, y = zip(*pts, strict=True)
                ax.plot(x, y, marker, ms=3, color=colour if used else REJECT_COLOUR,
                        label="used" if used else "left out")
        ax.set_xlabel("sweep")
        ax.set_ylabel(q.heading)
        ax.legend(loc="best", frameon=False)
    tau = [(s[S.INDEX.key], s[S.TAU0.key]) for s in sweeps
           if s[S.ACCEPTED.key] and s.get(S.TAU0.key) is not None]
    if tau:
        twin = ax_r.twinx()
        twin.plot(*zip(*tau, strict=True), "s", ms=2.5, color=MODE_COLOURS[1], alpha=0.8)
        twin.set_ylabel(S.TAU0.heading, color=MODE_COLOURS[1])
    change = data["cell"].get(S.R_IN_CHANGE.key)
    tau_change = data["cell"].get(S.TAU0_CHANGE.key)
    ax_r.set_title("Over the recording: R_in (τ0 right)" + (
        f", R_in {change:+.0f} %" if change is not None else "") + (
        f", τ0 {tau_change:+.0f} %" if tau_change is not None else ""))
    ax_v.set_title("Over the recording: V_rest")


# ---------------------------------------------------------------------------- page 2
LINE = 0.0125  # figure-height fraction per text line at 7.5 pt on A4
TOP, BOTTOM, LEFT = 0.915, 0.035, 0.06


class _TextPages:
    """Lines of text laid out down A4 pages; a full page is saved and a new one begun."""

    def __init__(self, pdf, recording, data: dict) -> None:
        self.pdf, self.recording, self.data = pdf, recording, data
        self.fig, self.y = None, TOP

    def _new_page(self) -> None:
        import matplotlib.pyplot as plt

        self.close()
        self.fig = plt.figure(figsize=A4_PORTRAIT)
        _header(self.fig, self.recording, self.data, "values, flags and provenance")
        self.y = TOP

    def row(self, cells: Sequence[tuple[float, str]], step: float = LINE, **style) -> None:
        if self.fig is None or self.y - step < BOTTOM:
            self._new_page()
        for x, text in cells:
            self.fig.text(x, self.y, text, **style)
        self.y -= step

    def title(self, text: str) -> None:
        if self.fig is not None and self.y - 4 * LINE < BOTTOM:
            self._new_page()  # keep a title with the lines after it
        self.row([(LEFT, text)], step=0.018, fontsize=10, weight="bold")

    def paragraphs(self, paragraphs: Sequence[str], width: int, fontsize: float = 7.5) -> None:
        step = LINE * fontsize / 7.5
        for paragraph in paragraphs:
            for line in textwrap.wrap(paragraph, width, subsequent_indent="  ") or [""]:
                self.row([(LEFT, line)], step=step, fontsize=fontsize)
        self.y -= 0.008

    def close(self) -> None:
        import matplotlib.pyplot as plt

        if self.fig is not None:
            self.pdf.savefig(self.fig)
            plt.close(self.fig)
            self.fig = None


def _numbers_pages(pdf, recording, data: dict, when: datetime) -> None:
    pages = _TextPages(pdf, recording, data)
    pages.title("Cell values")
    pages.row([(LEFT, "quantity"), (0.45, "value ± 95 % CI half-width"), (0.75, "unit")],
              weight="bold")
    for label, text, unit in _value_rows(data["cell"]):
        pages.row([(LEFT, label), (0.45, text), (0.75, unit)])
    pages.y -= 0.008
    pages.title("How they were found, and more values")
    more = _more_rows(data["cell"])
    half = (len(more) + 1) // 2          # two columns: these are many, and short
    for k in range(half):
        cells = []
        for x, row in ((LEFT, more[k]), (0.52, more[k + half] if k + half < len(more) else None)):
            if row is not None:
                label, text, unit = row
                cells += [(x, textwrap.shorten(label, 34)),
                          (x + 0.23, textwrap.shorten(f"{text} {unit}".strip(), 30))]
        pages.row(cells, step=0.0100, fontsize=6.8)
    pages.y -= 0.008
    pages.title("Flags")
    pages.paragraphs(_flag_lines(data), width=118)
    pages.title("Sweeps")
    width = 22 if len(data["sweeps"]) > 16 else 60
    lines = _sweep_lines(data["sweeps"], _by_hand(data), width)
    if len(data["sweeps"]) > 16:  # two columns, so a long recording keeps to two pages
        head, body = lines[0], lines[1:]
        half = (len(body) + 1) // 2
        right = [*body[half:], *[""] * (2 * half - len(body))]
        lines = [f"{head:<78}{head}"] + [f"{a:<78}{b}" for a, b in
                                         zip(body[:half], right, strict=True)]
    for line in lines:
        pages.row([(LEFT, line)], step=0.0098, family="monospace", fontsize=6)
    pages.paragraphs(_reason_lines(data["sweeps"], _by_hand(data), width), width=150,
                     fontsize=6.2)
    if data.get("design"):   # its full table is in the JSON and the window
        pages.title("What to record next")
        pages.paragraphs([data["design"]["advice"]], width=138, fontsize=6.6)
    pages.y -= 0.008
    pages.title("Provenance")
    pages.paragraphs(_provenance_lines(data, when), width=118)
    pages.title("Cautions")
    pages.paragraphs(CAUTIONS.split("\n"), width=150, fontsize=6.2)
    pages.close()


def _value_rows(cell: Mapping) -> list[tuple[str, str, str]]:
    rows = []
    for q in VALUE_ROWS:
        value = cell.get(q.key)
        text = "— (not estimable: see flags)" if value is None else _fmt(value)
        rows.append((q.title or q.label, text + S.uncertainty_text(cell, q), q.unit))
    return rows


def _more_rows(cell: Mapping) -> list[tuple[str, str, str]]:
    """Every other cell value that was estimated (how R_in, τ1 and the CIs were found,
    the fit start, sag, drift, …), with its CI where it has one."""
    shown = {q.key for q in VALUE_ROWS} | {q.ci for q in VALUE_ROWS if q.ci}
    shown |= {e.key for ends in S.INTERVALS.values() for e in ends}
    shown.add(S.R_IN_CI_FROM.key)   # on the row of how R_in was found
    rows = []
    for q in S.CELL_EXTRA:
        value = cell.get(q.key)
        if q.key in shown or value is None or value is False or "ci95" in q.key:
            continue
        text = textwrap.shorten(_fmt(value), 70) + S.uncertainty_text(cell, q)
        if q is S.R_IN_METHOD and cell.get(S.R_IN_CI_FROM.key):
            text += f" (± from {cell[S.R_IN_CI_FROM.key]})"
        rows.append((q.title or q.label, text, q.unit))
    return rows


def _by_hand(data: dict) -> set[int]:
    """Sweeps a person accepted or rejected (their decisions are in the settings)."""
    return {int(d[0]) for d in data["settings"].get("decisions", ())}


def _fmt(value, digits: int = 4) -> str:
    if isinstance(value, bool) or not isinstance(value, int | float):
        return str(value)
    return f"{value:.{digits}g}"


def _flag_lines(data: dict) -> list[str]:
    lines = []
    for flag in data.get("flags", ()):
        value = flag.get("value")
        extra = f" (value {_fmt(value, 3)})" if value is not None else ""
        lines.append(f"[{flag['code']}] {flag['message']}{extra}")
    return lines or ["none"]


def _status(s: Mapping, by_hand: set[int]) -> str:
    status = "ok" if s[S.ACCEPTED.key] else f"rejected: {s.get(S.REJECT_REASON.key) or ''}"
    if s[S.INDEX.key] in by_hand:
        status = ("accepted" if s[S.ACCEPTED.key] else "rejected") + " by hand" + (
            "" if s[S.ACCEPTED.key] else f": {s.get(S.REJECT_REASON.key) or ''}")
    return status


def _sweep_lines(sweeps: Sequence[Mapping], by_hand: set[int] = frozenset(),
                 status_width: int = 60) -> list[str]:
    """The sweep table; a status too long for `status_width` reads "… (below)" and is
    written out whole by `_reason_lines`."""
    widths = (3, 8, 9, 8, 7, 7, 8)
    columns = tuple(zip(S.SWEEP_TABLE, widths, strict=True))
    lines = [" ".join(f"{f'{q.label} {q.unit}'.strip():>{w}}" for q, w in columns) + "  status"]
    for s in sweeps:
        status = _status(s, by_hand)
        if len(status) > status_width:
            status = status.split(":")[0] + " (below)"
        cells = [_fmt(s.get(q.key)) if s.get(q.key) is not None else "—" for q, _ in columns]
        lines.append(" ".join(f"{c:>{w}}" for c, (_, w) in zip(cells, columns, strict=True))
                     + f"  {status}")
    return lines


def _reason_lines(sweeps: Sequence[Mapping], by_hand: set[int], status_width: int
                  ) -> list[str]:
    """The statuses `_sweep_lines` left for below, one line per reason with its sweeps
    ("sweeps 6, 7: rejected: action potential during the step"; the details in
    parentheses, such as each spike's time, are in the JSON and the window)."""
    groups: dict[str, list[str]] = {}
    for s in sweeps:
        status = _status(s, by_hand)
        if len(status) > status_width:
            groups.setdefault(status.split(" (")[0], []).append(str(s[S.INDEX.key]))
    return [f"sweep{'s' if len(k) > 1 else ''} {', '.join(k)}: {why}"
            for why, k in groups.items()]


def _provenance_lines(data: dict, when: datetime) -> list[str]:
    source = data["source"]
    from passivefit.model.settings import Settings

    defaults = Settings().to_dict()
    changed = {k: v for k, v in data["settings"].items() if defaults.get(k) != v}
    settings = json.dumps(changed, sort_keys=True, separators=(", ", ": ")) if changed \
        else "the defaults"
    return [f"file: {source['path']}", f"sha256: {source['sha256']}",
            f"format: {source['format']}, {source['sweep_count']} sweeps",
            f"passivefit {data['passivefit_version']}, settings hash {result_settings_hash(data)}",
            f"analysed at: {when.isoformat(timespec='seconds')}",
            f"settings (those not at their default): {settings}"]
