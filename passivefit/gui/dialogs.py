"""The step dialog (with a preview of the step over the traces) and the settings panel.

Both only collect a person's choices; the review state applies them (and saves them
with the review at once).
"""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from passivefit.gui import theme
from passivefit.io.recording import StepSpec
from passivefit.model.settings import Settings

Qt = QtCore.Qt
MS, MV, PA = 1e-3, 1e-3, 1e-12
DEFAULT_STEP = StepSpec(0.1, 0.3, -50e-12, 0.0)


class StepDialog(QtWidgets.QDialog):
    """Type the current step of a recording; see it drawn over the traces as you type.

    Parameters
    ----------
    recording : Recording
        Its sweeps are drawn faint; the step's span is shaded over them (drag the
        shading or its edges to move the step) and the current each sweep gets is drawn
        below.
    step : StepSpec or None
        The step to start from (None: the one in use, else 100 ms, 300 ms, −50 pA).
    """

    def __init__(self, recording, step: StepSpec | None = None,
                 parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.setWindowTitle("Set the current step")
        self.recording = recording
        step = step or DEFAULT_STEP
        layout = QtWidgets.QVBoxLayout(self)
        name = QtCore.QFileInfo(recording.path).fileName()
        text = QtWidgets.QLabel(
            f"Describe the current step of {name} (first sweep; the increment is added on "
            "each later sweep). The shaded span and the lower plot show the step as typed; "
            "it is saved with the review at once.")
        text.setWordWrap(True)
        layout.addWidget(text)
        form = QtWidgets.QFormLayout()
        self.boxes: dict[str, QtWidgets.QDoubleSpinBox] = {}
        for key, label, value, low in (("onset", "onset (ms)", step.onset_s / MS, 0.0),
                                       ("duration", "duration (ms)", step.duration_s / MS, 0.01),
                                       ("amplitude", "amplitude (pA)", step.amplitude_A / PA, -1e5),
                                       ("increment", "increment per sweep (pA)",
                                        step.increment_A / PA, -1e5)):
            box = QtWidgets.QDoubleSpinBox()
            box.setRange(low, 1e5)
            box.setDecimals(2)
            box.setValue(value)
            box.valueChanged.connect(self._redraw)
            form.addRow(label, box)
            self.boxes[key] = box
        layout.addLayout(form)

        self.traces = pg.PlotWidget(background=theme.CARD)
        self.traces.setLabel("left", "membrane potential (mV)", color=theme.MUTED)
        self.current = pg.PlotWidget(background=theme.CARD)
        self.current.setLabel("left", "step (pA)", color=theme.MUTED)
        self.current.setLabel("bottom", "time (ms)", color=theme.MUTED)
        self.current.setXLink(self.traces)
        self.current.setFixedHeight(120)
        fs = recording.sample_rate_hz
        for sweep in recording.sweeps:
            v = sweep.voltage
            item = self.traces.plot(np.arange(v.size) / fs / MS, v / MV,
                                    pen=pg.mkPen(theme.FAINT, width=1))
            item.setDownsampling(auto=True, method="peak")
            item.setClipToView(True)
        tint = theme.REGION_TINT["fit"]
        self.span = pg.LinearRegionItem(brush=pg.mkBrush(*tint),
                                        pen=pg.mkPen(theme.TERRACOTTA, width=1.5))
        self.span.setZValue(10)
        self.span.sigRegionChanged.connect(self._dragged)
        self.traces.addItem(self.span)
        self._curves = [self.current.plot(pen=pg.mkPen(theme.TERRACOTTA, width=1.4))
                        for _ in recording.sweeps]
        self._n = max(s.voltage.size for s in recording.sweeps)
        self._fs = fs
        layout.addWidget(self.traces, 1)
        layout.addWidget(self.current)
        self.problem = QtWidgets.QLabel("")
        self.problem.setStyleSheet(f"color: {theme.VERDICT['none'][1]};")
        self.problem.setWordWrap(True)
        layout.addWidget(self.problem)
        self.buttons = QtWidgets.QDialogButtonBox(
            QtWidgets.QDialogButtonBox.StandardButton.Ok
            | QtWidgets.QDialogButtonBox.StandardButton.Cancel)
        self.buttons.accepted.connect(self.accept)
        self.buttons.rejected.connect(self.reject)
        layout.addWidget(self.buttons)
        self.resize(720, 560)
        self._quiet = False
        self._redraw()

    def step(self) -> StepSpec:
        """The step as typed (SI units)."""
        b = self.boxes
        return StepSpec(b["onset"].value() * MS, b["duration"].value() * MS,
                        b["amplitude"].value() * PA, b["increment"].value() * PA)

    def _dragged(self) -> None:
        if self._quiet:
            return
        lo, hi = self.span.getRegion()
        self._quiet = True
        try:
            self.boxes["onset"].setValue(max(0.0, lo))
            self.boxes["duration"].setValue(max(0.01, hi - lo))
        finally:
            self._quiet = False
        self._redraw()

    def _redraw(self) -> None:
        step = self.step()
        on, off = step.onset_s / MS, (step.onset_s + step.duration_s) / MS
        if not self._quiet:
            self._quiet = True
            try:
                self.span.setRegion((on, off))
            finally:
                self._quiet = False
        end_ms = self._n / self._fs / MS
        for k, curve in enumerate(self._curves):
            amp = (step.amplitude_A + k * step.increment_A) / PA
            curve.setData([0, on, on, off, off, end_ms], [0, 0, amp, amp, 0, 0])
        outside = off > end_ms
        self.problem.setText(f"the step ends at {off:g} ms, after the sweeps end "
                             f"({end_ms:g} ms)" if outside else
                             "the amplitude is 0 pA: there is no step" if
                             step.amplitude_A == 0 and step.increment_A == 0 else "")
        self.buttons.button(QtWidgets.QDialogButtonBox.StandardButton.Ok).setEnabled(
            not self.problem.text())


class SettingsPanel(QtWidgets.QWidget):
    """The analysis settings of the command line, for this recording (saved with its review).

    Emits ``changed(dict)`` with the settings a person changed, by their
    :class:`~passivefit.model.settings.Settings` names.
    """

    changed = QtCore.Signal(dict)

    def __init__(self, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        from passivefit.gui.panels import card

        frame, inner = card("Analysis settings of this recording")
        outer = QtWidgets.QVBoxLayout(self)
        outer.setContentsMargins(0, 0, 0, 0)
        outer.addWidget(frame)
        form = QtWidgets.QFormLayout()
        inner.addLayout(form)
        inner.addStretch(1)
        form.setContentsMargins(0, 4, 0, 0)
        form.setLabelAlignment(Qt.AlignmentFlag.AlignRight)
        self.filter = self._number(0, 1e6, 0, " Hz", "from the file",
                                   "corner of the amplifier's low-pass filter (its delay shifts "
                                   "time zero of the cable fit)")
        self.components = QtWidgets.QComboBox()
        self.components.addItems(["auto", "1", "2", "3"])
        self.components.setToolTip("number of exponential components (auto: chosen by BIC, an "
                                   "F-test and sanity checks)")
        self.components.currentTextChanged.connect(
            lambda text: self._emit(components=text))
        self.area = self._number(0, 1e7, 0, " µm²", "unknown",
                                 "membrane area of the cell, for specific Cm and Rm")
        self.bootstrap = QtWidgets.QSpinBox()
        self.bootstrap.setRange(0, 2000)
        self.bootstrap.setKeyboardTracking(False)
        self.bootstrap.setSpecialValueText("0 (CIs from the fit)")
        self.bootstrap.setToolTip("resamples over sweeps for the 95 % CIs")
        self.bootstrap.valueChanged.connect(lambda n: self._emit(bootstrap=int(n)))
        self.fit_start = self._number(0, 1000, 2, " ms", "after the artefact",
                                      "fit start after each step edge")
        self.bridge = QtWidgets.QCheckBox("take a resolved bridge jump out of R_in")
        self.bridge.toggled.connect(lambda on: self._emit(correct_bridge=bool(on)))
        self.hum = QtWidgets.QCheckBox("take 50/60 Hz mains hum out of the sweeps")
        self.hum.setToolTip("fitted in each sweep's flat stretches when the baselines show it")
        self.hum.toggled.connect(lambda on: self._emit(remove_hum=bool(on)))
        self.filter.valueChanged.connect(lambda x: self._emit(filter_hz=x or None))
        self.area.valueChanged.connect(lambda x: self._emit(area_um2=x or None))
        self.fit_start.valueChanged.connect(lambda x: self._emit(fit_start_ms=x or None))
        form.addRow("filter corner", self.filter)
        form.addRow("components", self.components)
        form.addRow("membrane area", self.area)
        form.addRow("bootstrap", self.bootstrap)
        form.addRow("fit start", self.fit_start)
        form.addRow("bridge", self.bridge)
        form.addRow("hum", self.hum)
        note = QtWidgets.QLabel("Saved with the review; the cell is re-analysed at once.")
        note.setObjectName("unit")
        note.setWordWrap(True)
        form.addRow(note)
        self._quiet = False

    def _number(self, low: float, high: float, decimals: int, suffix: str, special: str,
                tip: str) -> QtWidgets.QDoubleSpinBox:
        box = QtWidgets.QDoubleSpinBox()
        box.setRange(low, high)
        box.setDecimals(decimals)
        box.setSuffix(suffix)
        box.setSpecialValueText(special)      # shown at the minimum: not set
        box.setKeyboardTracking(False)
        box.setToolTip(tip)
        return box

    def _emit(self, **options) -> None:
        if not self._quiet:
            self.changed.emit(options)

    def show_settings(self, settings: Settings) -> None:
        """Show `settings` without emitting anything."""
        self._quiet = True
        try:
            self.filter.setValue(settings.filter_hz or 0.0)
            self.components.setCurrentText(settings.components)
            self.area.setValue(settings.area_um2 or 0.0)
            self.bootstrap.setValue(settings.bootstrap)
            self.fit_start.setValue(settings.fit_start_ms or 0.0)
            self.bridge.setChecked(settings.correct_bridge)
            self.hum.setChecked(settings.remove_hum)
        finally:
            self._quiet = False
