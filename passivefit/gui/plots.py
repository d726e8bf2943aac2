"""The plots of the review window (pyqtgraph): traces with draggable windows and residuals,
the semilog view with the peel lines, the fit-start scan and the V–I relation.

Views only draw: they read a :class:`~passivefit.gui.state.ReviewState` or a
``RecordingResult`` and report window drags as signals; they never fit anything.
Axes are in display units (ms, mV, pA).
"""

from __future__ import annotations

from functools import partial

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from passivefit.core import steady
from passivefit.gui import theme
from passivefit.model import schema as S

MS, MV, PA = 1e-3, 1e-3, 1e-12
STAGE_COLOURS = (theme.TEAL, theme.TERRACOTTA, "#7a5ea8")
MAX_SEMILOG_POINTS = 500
# stacking of the windows (higher on top): the steady-state window lies inside the fit
# window, so it must be above it to take the mouse there; the fit keeps its free start.
# All lie over the faint sweeps (z 0), so that their labels are not hidden where many
# sweeps fire, and under the sweep on screen (5) and its fit (6)
REGION_Z = {"fit_off": 1, "fit": 2, "baseline": 3, "steady": 4}
#: Heights of the window labels, as fractions of the view: four rows, so that none
#: overlap even when a long sweep squeezes the windows into a few pixels
LABEL_HEIGHT = {"baseline": 0.97, "fit": 0.91, "steady": 0.85, "fit_off": 0.79}


def new_plot(title: str = "", x_label: str = "", y_label: str = "", *,
             grid: bool = True) -> pg.PlotWidget:
    """A calm, white plot with our axes and (with `grid`) a faint grid.

    Plots redrawn while a window is dragged go without a grid: pyqtgraph draws grid
    lines with the axes, so a grid makes every redraw repaint the axes and their
    labels too (about 3 ms per axis).
    """
    widget = pg.PlotWidget(background=theme.CARD)
    item = widget.getPlotItem()
    if grid:
        item.showGrid(x=True, y=True, alpha=0.10)
    item.hideButtons()
    for side in ("left", "bottom"):
        axis = item.getAxis(side)
        axis.setPen(pg.mkPen(theme.RULE))
        axis.setTextPen(pg.mkPen(theme.INK))
        axis.enableAutoSIPrefix(False)
    if x_label:
        item.setLabel("bottom", x_label, color=theme.MUTED)
    if y_label:
        item.setLabel("left", y_label, color=theme.MUTED)
    if title:
        item.setTitle(title, color=theme.MUTED, size="9pt")
    return widget


def set_title(widget: pg.PlotWidget, text: str) -> None:
    widget.getPlotItem().setTitle(text, color=theme.MUTED, size="9pt")


WAITING = "analysing…"


def _note(widget: pg.PlotWidget, text: str) -> pg.TextItem:
    """A grey centred message inside an empty plot, wrapped to the plot's width."""
    item = pg.TextItem(text, color=theme.MUTED, anchor=(0.5, 0.5))
    item.setTextWidth(max(60.0, widget.getPlotItem().getViewBox().width() - 12.0))
    item.textItem.document().setDefaultTextOption(
        pg.QtGui.QTextOption(QtCore.Qt.AlignmentFlag.AlignCenter))
    widget.addItem(item, ignoreBounds=True)
    item.setPos(0.5, 0.5)
    widget.getPlotItem().getViewBox().setRange(xRange=(0, 1), yRange=(0, 1), padding=0)
    return item


# ----------------------------------------------------------------------------- traces
def _light(item: pg.PlotDataItem) -> None:
    """Draw a long noisy trace fast: about one min/max pair per pixel, no antialiasing.

    Peak downsampling keeps every excursion visible; antialiasing thousands of noisy
    segments made a repaint of a 20,000-sample sweep take ~200 ms instead of ~10 ms.
    """
    item.opts["autoDownsampleFactor"] = 1.0
    item.setDownsampling(auto=True, method="peak")
    item.setClipToView(True)
    item.opts["antialias"] = False
    item.curve.opts["antialias"] = False


class TraceView(QtWidgets.QWidget):
    """All sweeps faint, the sweep on screen bold with its fit, windows to drag, residuals.

    Signals carry a window name (``baseline``, ``steady``, ``fit``) and its start and
    end in ms from the step onset.
    """

    region_moved = QtCore.Signal(str, float, float)
    region_finished = QtCore.Signal(str, float, float)

    def __init__(self, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.plot = new_plot(y_label="membrane potential (mV)", grid=False)
        self.resid = new_plot(x_label="time (ms)", y_label="residual (mV)", grid=False)
        self.resid.setXLink(self.plot)
        self.resid.setFixedHeight(118)
        self.plot.getPlotItem().getAxis("left").setWidth(62)
        self.resid.getPlotItem().getAxis("left").setWidth(62)
        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.setSpacing(0)
        layout.addWidget(self.plot, 1)
        layout.addWidget(self.resid)

        self._faint: dict[int, pg.PlotDataItem] = {}
        self._bold = self.plot.plot(pen=pg.mkPen(theme.TEAL, width=1.6))
        self._bold.setZValue(5)
        self._model = [self.plot.plot(pen=pg.mkPen(theme.TERRACOTTA, width=2.4))
                       for _ in range(2)]
        for curve in self._model:
            curve.setZValue(6)
        dash = pg.mkPen(theme.EDGE, width=1, style=QtCore.Qt.PenStyle.DashLine)
        self._edges = [pg.InfiniteLine(angle=90, movable=False, pen=dash) for _ in range(2)]
        for line in self._edges:
            self.plot.addItem(line)
        self.regions: dict[str, pg.LinearRegionItem] = {}
        for name, tint in theme.REGION_TINT.items():
            self.regions[name] = self._make_region(name, tint)
            self.regions[name].setVisible(False)      # shown once a sweep has its windows
        self._resid = [self.resid.plot(pen=pg.mkPen(theme.TERRACOTTA, width=1)) for _ in range(2)]
        for curve in self._resid:
            _light(curve)
        self.resid.addItem(pg.InfiniteLine(angle=0, pos=0.0, pen=pg.mkPen(theme.EDGE)))
        self._onset_ms = 0.0
        self._updating = False
        self._v: np.ndarray | None = None
        self._fs = 1.0
        self._extent = None
        self.redraws = 0   # counts fit redraws (for the benchmark and tests)

    def _make_region(self, name: str, tint) -> pg.LinearRegionItem:
        movable = name != "fit_off"
        line_pen = pg.mkPen(theme.REGION_LINE[name], width=1.2)
        hover = pg.mkBrush(*tint[:3], min(255, tint[3] + 40))
        region = pg.LinearRegionItem(brush=pg.mkBrush(*tint), pen=line_pen,
                                     hoverBrush=hover if movable else None, movable=movable)
        region.setZValue(REGION_Z[name])
        for line in region.lines:
            line.setHoverPen(pg.mkPen(theme.REGION_LINE[name], width=3))
        # labels at staggered heights: the onset fit's window starts right after the
        # baseline's, the decay fit's right after the narrow steady-state window
        pg.InfLineLabel(region.lines[0], text=theme.REGION_LABEL[name],
                        position=LABEL_HEIGHT[name],
                        anchors=[(0, 0), (0, 0)], color=theme.REGION_LINE[name])
        if movable:
            region.sigRegionChanged.connect(partial(self._on_region, name, False))
            region.sigRegionChangeFinished.connect(partial(self._on_region, name, True))
        self.plot.addItem(region)
        return region

    def _on_region(self, name: str, finished: bool, region: pg.LinearRegionItem) -> None:
        if self._updating:
            return
        lo, hi = region.getRegion()
        signal = self.region_finished if finished else self.region_moved
        signal.emit(name, lo - self._onset_ms, hi - self._onset_ms)

    @property
    def dragging(self) -> bool:
        return any(r.moving or any(line.moving for line in r.lines)
                   for r in self.regions.values())

    # ------------------------------------------------------------------ drawing
    def set_recording(self, state) -> None:
        """Draw every sweep faint (once per recording) and zoom to them."""
        for item in self._faint.values():
            self.plot.removeItem(item)
        self._faint.clear()
        self._fs = state.fs
        for index in state.indices:
            v = state.voltage(index)
            item = self.plot.plot(np.arange(v.size) / state.fs / MS, v / MV,
                                  pen=pg.mkPen(theme.FAINT, width=1))
            _light(item)
            # the other sweeps never change during a drag: paint them from a cached image
            item.curve.setCacheMode(QtWidgets.QGraphicsItem.CacheMode.DeviceCoordinateCache)
            self._faint[index] = item
        _light(self._bold)
        self._extent = _extent(state)
        self.show_sweep(state)
        self.fit_view()

    def set_statuses(self, state) -> None:
        """Rejected sweeps faint rose, the others faint slate."""
        for index, item in self._faint.items():
            status = state.status(index)
            colour = theme.FAINT_OUT if status is not None and not status.accepted else theme.FAINT
            item.setPen(pg.mkPen(colour, width=1))

    def show_sweep(self, state) -> None:
        """The sweep on screen: bold trace, step edges, windows, fit and residuals."""
        index = state.current
        v = state.voltage(index)
        self._v = state.analysed_voltage(index)   # what the fit saw, for the residuals
        self._bold.setData(np.arange(v.size) / state.fs / MS, v / MV)
        step = state.steps.get(index)
        for line, edge in zip(self._edges, (step.onset, step.offset) if step else (), strict=False):
            line.setValue(edge / state.fs / MS)
        for line in self._edges:
            line.setVisible(step is not None)
        if step is None:
            for region in self.regions.values():
                region.setVisible(False)
            self.show_fit(None)
            return
        self._onset_ms = step.onset_s / MS
        offset_ms, end_ms = step.offset / state.fs / MS, v.size / state.fs / MS
        during = (self._onset_ms, offset_ms)
        floor = state.fit_start_floor_ms() + self._onset_ms   # the artefact's end
        bounds = {"baseline": (0.0, self._onset_ms), "steady": during,
                  "fit": (floor, offset_ms) if step.kind == "step" else (floor, end_ms)}
        if not self.dragging:
            self._updating = True
            try:
                for name in ("baseline", "steady", "fit"):
                    span = state.window_ms(name)
                    region = self.regions[name]
                    region.setVisible(span is not None)
                    if span is not None:
                        region.setBounds(bounds[name])
                        region.setRegion((span[0] + self._onset_ms, span[1] + self._onset_ms))
            finally:
                self._updating = False
        fit = state.sweep_fit()
        self.show_fit(fit)
        if fit is not None and fit.noise_V:
            # a fixed scale per sweep: residuals of a good fit fill about half the strip,
            # and the axis does not jump (nor repaint) while a window is dragged
            self.resid.setYRange(-6 * fit.noise_V / MV, 6 * fit.noise_V / MV, padding=0)
        else:
            self.resid.getPlotItem().getViewBox().enableAutoRange(axis="y")

    def show_fit(self, fit) -> None:
        """Draw a sweep's fitted model, its decay window and the residuals."""
        curves = fit.model_curves() if fit is not None else []
        for k, item in enumerate(self._model):
            if k < len(curves):
                t, y = curves[k]
                item.setData(t / MS, y / MV)
            else:
                item.setData([], [])
        decay = fit.windows_s.get("fit_off") if fit is not None and "fit" in fit.windows_s else None
        self.regions["fit_off"].setVisible(decay is not None)
        if decay is not None:
            self.regions["fit_off"].setRegion((decay[0] / MS, decay[1] / MS))
        residuals = self._residuals(fit)
        for k, item in enumerate(self._resid):
            item.setData(*(residuals[k] if k < len(residuals) else ([], [])))
        self.redraws += 1

    def _residuals(self, fit) -> list[tuple[np.ndarray, np.ndarray]]:
        """(time in ms, data − model in mV) over each fitted segment."""
        if fit is None or fit.fit is None or self._v is None:
            return []
        from passivefit.analysis.fits import residual

        v = fit.corrected(self._v, self._fs)  # as the fit saw it (drift taken out)
        return [(t / MS, r / MV) for t, r in (residual(v, fit.fit, seg, self._fs)
                                             for seg in fit.segments)]

    def fit_view(self) -> None:
        """Zoom out to show every sample of every sweep.

        The range comes from the data, not from pyqtgraph's auto-range, which sees only
        the part of a clipped, downsampled trace that was on screen before.
        """
        if self._extent is not None:
            (x0, x1), (y0, y1) = self._extent
            self.plot.setRange(xRange=(x0, x1), yRange=(y0, y1), padding=0.03)


def _extent(state) -> tuple[tuple[float, float], tuple[float, float]]:
    """(time range in ms, voltage range in mV) of every sweep of a review."""
    volts = [state.voltage(i) for i in state.indices]
    t_end = max(v.size for v in volts) / state.fs / MS
    lows, highs = (np.array([f(v) for v in volts]) / MV for f in (np.min, np.max))
    return (0.0, t_end), (float(lows.min()), float(highs.max()))


# ----------------------------------------------------------------------------- semilog
class SemilogView(QtWidgets.QWidget):
    """|V − V∞| of the cell average on a log axis, with the straight peel lines."""

    def __init__(self, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.plot = new_plot("Semilog", "time from the step edge (ms)", "|V − V∞| (mV)")
        self.plot.setLogMode(x=False, y=True)
        # the lines' key under the plot, wrapped to the panel: a legend inside the plot
        # is wider than a narrow panel and covers the points
        self.key = QtWidgets.QLabel()
        self.key.setObjectName("plotKey")
        self.key.setWordWrap(True)
        self.key.setStyleSheet("font-size: 8pt;")
        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.setSpacing(0)
        layout.addWidget(self.plot)
        layout.addWidget(self.key)

    def _show_key(self) -> None:
        """The named lines, each with a square of its colour."""
        entries = []
        for item in self.plot.getPlotItem().listDataItems():
            if item.name():
                colour = item.opts["pen"].color().name()
                name = item.name().replace(" ", "&nbsp;")   # wrapped between entries only
                entries.append(f'<span style="color:{colour}">■</span>&nbsp;{name}')
        self.key.setText(" &nbsp; ".join(entries))
        self.key.setVisible(bool(entries))

    def show_result(self, result) -> None:
        self.plot.clear()
        self.key.clear()
        self.key.hide()
        self.plot.setLogMode(x=False, y=True)
        peel = result.peel if result is not None else None
        if peel is None or not peel.residual_log:
            set_title(self.plot, "Semilog")
            self.plot.setLogMode(x=False, y=False)
            _note(self.plot, WAITING if result is None else
                  "no semilog view:\nthe transient could not be peeled")
            return
        set_title(self.plot, f"peel of the {result.average.amplitude_A / PA:+.0f} pA average")
        t_end = min(float(peel.residual_log[0][0][-1]), 1.25 * peel.lines[0].t_end)
        lo, hi = np.inf, 0.0
        for stage, (t, log_a) in enumerate(peel.residual_log):
            keep = _spread_indices(int(np.searchsorted(t, t_end)), MAX_SEMILOG_POINTS)
            y = np.exp(log_a[keep]) / MV
            colour = STAGE_COLOURS[stage % len(STAGE_COLOURS)]
            self.plot.plot(t[keep] / MS, y, pen=None, symbol="o", symbolSize=3,
                           symbolPen=None, symbolBrush=pg.mkBrush(colour))
            hi = max(hi, float(np.max(y)))
        for stage, line in enumerate(peel.lines):
            span = t_end if stage == 0 else min(t_end, 2.5 * line.t_end)
            t = np.linspace(0.0, span, 200)
            y = np.exp(line.intercept_log + line.slope * t) / MV
            colour = STAGE_COLOURS[stage % len(STAGE_COLOURS)]
            self.plot.plot(t / MS, y, pen=pg.mkPen(colour, width=2),
                           name=f"peel τ{stage} {-1 / line.slope / MS:.3g} ms, start value")
        caption = result.cell.tau1_caption()
        if caption and len(peel.lines) > 1:  # the cell's one τ1, from the second line's start
            t = np.linspace(0.0, min(t_end, 2.5 * peel.lines[1].t_end), 100)
            tau1 = result.cell.values[S.TAU1.key] * MS
            self.plot.plot(t / MS, np.exp(peel.lines[1].intercept_log - t / tau1) / MV,
                           pen=pg.mkPen(theme.EDGE, width=2, style=QtCore.Qt.PenStyle.DashLine),
                           name=caption)
        self._show_key()
        lo = max(peel.noise_sd / MV * 0.5, hi * 1e-4)
        self.plot.setYRange(np.log10(lo), np.log10(hi * 1.6), padding=0)
        self.plot.setXRange(0, t_end / MS, padding=0.02)


def _spread_indices(n: int, most: int) -> np.ndarray:
    """At most `most` indices into n samples, dense early and sparse late (log spacing)."""
    if n <= most:
        return np.arange(n)
    return np.unique(np.geomspace(1, n, most).astype(int) - 1)


# ----------------------------------------------------------------------------- time course
class TimeCourseView(QtWidgets.QWidget):
    """R_in, τ0 and V_rest of every sweep in recording order: drift shows here (sweeps
    used filled, left out hollow)."""

    QUANTITIES = (S.R_IN, S.TAU0, S.V_REST)

    def __init__(self, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.plots = [new_plot("", "sweep" if q is S.V_REST else "", q.heading)
                      for q in self.QUANTITIES]
        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.setSpacing(0)
        for plot in self.plots:
            plot.getPlotItem().getAxis("left").setWidth(52)
            layout.addWidget(plot)

    def show_result(self, result) -> None:
        sweeps = [] if result is None else [s.to_dict() for s in result.sweeps]
        change = None if result is None else result.cell.values.get(S.R_IN_CHANGE.key)
        for plot, q in zip(self.plots, self.QUANTITIES, strict=True):
            plot.clear()
            pts = [(s[S.INDEX.key], s[q.key], s[S.ACCEPTED.key]) for s in sweeps
                   if s.get(q.key) is not None]
            if len(pts) < 2:
                _note(plot, WAITING if result is None else "fewer than 2 measured sweeps")
                continue
            for used in (True, False):
                xs = [x for x, _, a in pts if a == used]
                ys = [y for _, y, a in pts if a == used]
                if xs:
                    colour = theme.TEAL if used else theme.MUTED
                    plot.plot(xs, ys, pen=None, symbol="o", symbolSize=6,
                              symbolPen=pg.mkPen(colour),
                              symbolBrush=pg.mkBrush(colour) if used else None)
        title = "over the recording" + (f" · R_in {change:+.0f} %" if change is not None else "")
        set_title(self.plots[0], title)


# ----------------------------------------------------------------------------- scan
class ScanView(QtWidgets.QWidget):
    """τ0 and τ1 of the cell average refitted from later and later fit starts, with CIs."""

    def __init__(self, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.tau0 = new_plot("", "", "τ0 (ms)")
        self.tau1 = new_plot("", "fit start after the edge (ms)", "τ1 (ms)")
        for plot in (self.tau0, self.tau1):
            plot.getPlotItem().getAxis("left").setWidth(48)
        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.setSpacing(0)
        layout.addWidget(self.tau0)
        layout.addWidget(self.tau1)

    def show_result(self, result) -> None:
        scan = result.scan if result is not None else None
        for plot, key, q in ((self.tau0, "tau0", S.TAU0), (self.tau1, "tau1", S.TAU1)):
            plot.clear()
            if scan is None or not np.any(np.isfinite(scan[f"{key}_s"])):
                _note(plot, WAITING if result is None else f"no {key.replace('tau', 'τ')} scan")
                continue
            x = scan["start_s"] / MS
            y = scan[f"{key}_s"] / MS
            ci = np.nan_to_num(scan[f"{key}_ci95_s"] / MS, nan=0.0, posinf=0.0)
            ok = np.isfinite(y)
            colour = theme.TEAL if key == "tau0" else theme.TERRACOTTA
            plot.addItem(pg.ErrorBarItem(x=x[ok], y=y[ok], height=2 * ci[ok], beam=0.06,
                                         pen=pg.mkPen(colour, width=1)))
            plot.plot(x[ok], y[ok], pen=pg.mkPen(colour, width=1), symbol="o", symbolSize=5,
                      symbolPen=None, symbolBrush=pg.mkBrush(colour))
            value = result.cell.values.get(q.key)
            if value is not None:   # right-aligned in small type: the panel is narrow
                label = (result.cell.tau1_caption() if key == "tau1"
                         else f"cell τ0 {value:.4g} ms")
                line = pg.InfiniteLine(angle=0, pos=value, label=label, labelOpts={
                    "position": 0.98, "anchors": [(1, 1), (1, 1)], "color": theme.EDGE},
                    pen=pg.mkPen(theme.EDGE, style=QtCore.Qt.PenStyle.DashLine))
                font = line.label.textItem.font()
                font.setPointSizeF(7.0)
                line.label.setFont(font)
                plot.addItem(line)
            plot.getPlotItem().getViewBox().autoRange(padding=0.12)
            plot.setXRange(x[0], x[-1], padding=0.08)


# ----------------------------------------------------------------------------- V–I
class VIView(QtWidgets.QWidget):
    """Steady-state deflection against step current, with the regression line."""

    def __init__(self, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.plot = new_plot("V–I", "step current (pA)", "ΔV steady (mV)")
        self.plot.getPlotItem().getAxis("left").setWidth(48)
        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.addWidget(self.plot)

    def show_result(self, result) -> None:
        self.plot.clear()
        vi = result.vi if result is not None else None
        if vi is None:
            set_title(self.plot, "V–I")
            if result is None:
                _note(self.plot, WAITING)
            elif all(f.step is None or f.step.kind == "pulse" for f in result.sweeps):
                _note(self.plot, "brief pulses:\nno steady state,\nno V–I relation")
            else:
                _note(self.plot, "no V–I relation:\ntoo few sweeps with a steady state")
            return
        i_pa, dv_mv = vi["current_A"] / PA, vi["dv_V"] / MV
        self.plot.plot(i_pa, dv_mv, pen=None, symbol="o", symbolSize=7, symbolPen=None,
                       symbolBrush=pg.mkBrush(theme.TEAL))
        slope = vi.get("slope")
        x = np.array([min(0.0, i_pa.min()), max(0.0, i_pa.max())])
        values = result.cell.values
        chord = values.get(S.R_IN_CHORD.key)
        if slope is not None and values.get(S.R_IN.key) == chord:
            # the relation bends: R_in is the chord of the smallest steps, drawn as such
            # (through the raw points: a bridge taken out is added back)
            raw = chord + ((values.get(S.BRIDGE.key) or 0.0)
                           if values.get(S.BRIDGE_APPLIED.key) else 0.0)
            line = raw * 1e6 * x * PA / MV
            title = f"bends · smallest steps {raw:.4g} MΩ"
        elif slope is not None:
            raw = slope.slope_ohm / 1e6
            line = (slope.slope_ohm * x * PA + slope.intercept_V) / MV
            title = f"slope {raw:.4g} MΩ · r² {slope.r2:.4f}"
        else:   # one or two amplitudes: the line through the origin is ΔV/ΔI
            raw = float(np.sum(vi["dv_V"] * vi["current_A"]) / np.sum(vi["current_A"] ** 2)) / 1e6
            line = raw * 1e6 * x * PA / MV
            levels = steady.current_levels(vi["current_A"])
            title = f"{'one step' if levels == 1 else f'{levels} steps'} · ΔV/ΔI {raw:.4g} MΩ"
        if values.get(S.BRIDGE_APPLIED.key) and values.get(S.R_IN.key) is not None:
            # the points are the raw deflections; the cell's R_in has the bridge taken out
            # (short: the panel is narrow)
            title = f"raw {raw:.4g} → R_in {values[S.R_IN.key]:.4g} MΩ"
        set_title(self.plot, title)
        self.plot.plot(x, line, pen=pg.mkPen(theme.TERRACOTTA, width=1.6))
        self.plot.getPlotItem().getViewBox().autoRange(padding=0.1)
