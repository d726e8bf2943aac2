"""Panels of the review window: the verdict strip, cell values, notes, windows, sweeps, help.

Each panel reads the review state (or a result) and turns a person's edits into calls
on the state; none of them computes anything.
"""

from __future__ import annotations

from PySide6 import QtCore, QtGui, QtWidgets

from passivefit.gui import theme
from passivefit.model import schema as S

Qt = QtCore.Qt


def card(title: str, tools: QtWidgets.QWidget | None = None
         ) -> tuple[QtWidgets.QFrame, QtWidgets.QVBoxLayout]:
    """A white rounded panel with a small grey title (and `tools` at its right end).

    Returns the panel and the layout to fill.
    """
    frame = QtWidgets.QFrame()
    frame.setObjectName("card")
    layout = QtWidgets.QVBoxLayout(frame)
    layout.setContentsMargins(10, 6, 10, 8)
    layout.setSpacing(4)
    label = QtWidgets.QLabel(title.upper())
    label.setObjectName("cardTitle")
    if tools is None:
        layout.addWidget(label)
    else:
        row = QtWidgets.QHBoxLayout()
        row.addWidget(label)
        row.addStretch(1)
        row.addWidget(tools)
        layout.addLayout(row)
    return frame, layout


def fmt(x, digits: int = 4) -> str:
    return "—" if x is None else f"{x:.{digits}g}"


def fixed(x, decimals: int) -> str:
    """A number with a fixed count of decimals (a table column reads evenly), or —."""
    return "—" if x is None else f"{x:.{decimals}f}".replace("-", "−")


# the window's own words for quantities whose short names mislead beside their neighbours:
# C0 and C1 are amplitudes (mV) of the exponential components, not capacitances
CARD_LABELS = {**S.AMPLITUDE_LABELS,
               S.C_TAU.key: "C from τ0/R_in", S.C_TOTAL.key: "C total (cable)"}


def bridge_applied(result) -> bool:
    """True when the bridge jump was taken out of R_in (shown in bold only then)."""
    return bool(result.cell.to_dict().get(S.BRIDGE_APPLIED.key))


# ----------------------------------------------------------------------------- header
class Header(QtWidgets.QWidget):
    """File name and verdict chip on one row; below, what the file is and the step in use.

    The subtitle has the whole width to itself and wraps rather than being cut, so the
    chip never hides it.
    """

    def __init__(self, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        self.name = QtWidgets.QLabel("no recording open")
        self.name.setObjectName("fileName")
        self.name.setSizePolicy(QtWidgets.QSizePolicy.Policy.Ignored,
                                QtWidgets.QSizePolicy.Policy.Preferred)
        self.meta = QtWidgets.QLabel("")
        self.meta.setObjectName("fileMeta")
        self.meta.setWordWrap(True)
        self.meta.setSizePolicy(QtWidgets.QSizePolicy.Policy.Ignored,
                                QtWidgets.QSizePolicy.Policy.Minimum)
        self.verdict = QtWidgets.QLabel("")
        self.verdict.setObjectName("verdict")
        top = QtWidgets.QHBoxLayout()
        top.setSpacing(10)
        top.addWidget(self.name, 1)
        top.addWidget(self.verdict, 0, Qt.AlignmentFlag.AlignVCenter)
        layout = QtWidgets.QVBoxLayout(self)
        layout.setContentsMargins(4, 0, 4, 0)
        layout.setSpacing(0)
        layout.addLayout(top)
        layout.addWidget(self.meta)

    def show_recording(self, state, position: int, count: int) -> None:
        rec = state.recording
        md = rec.metadata or {}
        name = md.get("cell_id") or ""
        parts = [p for p in (name, md.get("region"), md.get("cell_type"),
                             str(md.get("date", ""))[:10]) if p]
        parts.append(f"{len(rec.sweeps)} sweeps at {rec.sample_rate_hz / 1e3:g} kHz")
        if md.get("simulated") in (True, "True", "true") or "invented" in str(md.get("lab", "")):
            parts.append("simulated")
        if count > 1:
            parts.append(f"recording {position + 1} of {count}")
        parts.append(step_text(state))
        self.name.setText(QtCore.QFileInfo(rec.path).fileName())
        self.name.setToolTip(rec.path)
        self.meta.setText("  ·  ".join(parts))

    def show_verdict(self, result, busy: bool) -> None:
        if result is None or busy:
            self._set("busy", "analysing…")
            return
        used = result.cell.values.get(S.N_SWEEPS_USED.key) or 0
        if used == 0:
            self._set("none", "no usable sweeps")
        elif result.flags:
            n = len(result.flags)
            self._set("notes", f"{n} note{'s' if n > 1 else ''} to read · {used} sweeps used")
        else:
            self._set("clean", f"nothing unusual · {used} sweeps used")

    def _set(self, kind: str, text: str) -> None:
        back, fore = theme.VERDICT[kind]
        self.verdict.setStyleSheet(f"background: {back}; color: {fore};")
        self.verdict.setText(text)
        self.verdict_kind = kind


def step_text(state) -> str:
    """The step in use, in words: typed by a person (settings) or read from the file."""
    typed = state.settings.step
    if typed is not None:
        inc = f", {typed.increment_A / 1e-12:+g} pA per sweep" if typed.increment_A else ""
        return (f"step typed: {typed.amplitude_A / 1e-12:+g} pA{inc} at {typed.onset_s * 1e3:g} "
                f"ms for {typed.duration_s * 1e3:g} ms")
    step = state.steps.get(state.current)
    if step is None:
        return "no step in this sweep"
    duration_ms = (step.offset - step.onset) / state.fs * 1e3
    return (f"{step.kind} from the file: {step.amplitude_A / 1e-12:+.4g} pA at "
            f"{step.onset_s * 1e3:.4g} ms for {duration_ms:.4g} ms")


# ----------------------------------------------------------------------------- cell
class CellCard(QtWidgets.QFrame):
    """The cell's values with their 95 % CIs and units, two columns of quantities."""

    def __init__(self, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        frame, layout = card("Cell")
        outer = QtWidgets.QVBoxLayout(self)
        outer.setContentsMargins(0, 0, 0, 0)
        outer.addWidget(frame)
        grid = QtWidgets.QGridLayout()
        grid.setHorizontalSpacing(8)
        grid.setVerticalSpacing(3)
        layout.addLayout(grid)
        self.values: dict[str, QtWidgets.QLabel] = {}
        rows = (len(S.SUMMARY) + 1) // 2
        for k, q in enumerate(S.SUMMARY):
            row, col = k % rows, (k // rows) * 3
            quantity = QtWidgets.QLabel(CARD_LABELS.get(q.key, q.label))
            quantity.setObjectName("quantity")
            quantity.setToolTip(getattr(q, "title", "") or q.label)
            value = QtWidgets.QLabel("—")
            value.setObjectName("value")
            value.setTextFormat(Qt.TextFormat.RichText)
            value.setAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
            value.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
            unit_label = QtWidgets.QLabel(q.unit)
            unit_label.setObjectName("unit")
            grid.addWidget(quantity, row, col)
            grid.addWidget(value, row, col + 1)
            grid.addWidget(unit_label, row, col + 2)
            self.values[q.key] = value
        grid.setColumnStretch(1, 1)
        grid.setColumnStretch(4, 1)
        grid.setColumnMinimumWidth(2, 24)
        grid.setColumnMinimumWidth(5, 24)
        self.footer = QtWidgets.QLabel("")
        self.footer.setObjectName("unit")
        self.footer.setWordWrap(True)
        layout.addWidget(self.footer)

    def show_result(self, result, busy: bool) -> None:
        cell = result.cell.to_dict() if result is not None else {}
        for q in S.SUMMARY:
            text = fmt(cell.get(q.key))
            sure = S.uncertainty_text(cell, q)
            if sure:
                text += (f"<span style='font-weight:400; font-size:9pt; color:{theme.MUTED}'>"
                         f"{sure}</span>")
            label = self.values[q.key]
            label.setText(text)
            label.setStyleSheet("")
            label.setToolTip("from the " + cell[S.TAU1_SOURCE.key] if q is S.TAU1
                             and cell.get(S.TAU1_SOURCE.key) else "")
        if result is not None and cell.get(S.BRIDGE.key) is not None \
                and not bridge_applied(result):
            label = self.values[S.BRIDGE.key]
            label.setStyleSheet(f"font-weight: 400; color: {theme.MUTED};")
            label.setToolTip("measured, but not taken out of R_in")
        if result is None:
            self.footer.setText("")
            return
        used, total = cell.get(S.N_SWEEPS_USED.key) or 0, len(result.sweeps)
        bits = [f"{used} of {total} sweeps used"]
        bits += [bit.replace("-", "\u2011") for bit in S.legend(cell)]
        if busy:
            bits.append("updating…")
        self.footer.setText(" · ".join(bits))


# ----------------------------------------------------------------------------- notes
class NotesPanel(QtWidgets.QFrame):
    """The analysis's quality flags, in plain words."""

    def __init__(self, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        frame, layout = card("Notes")
        outer = QtWidgets.QVBoxLayout(self)
        outer.setContentsMargins(0, 0, 0, 0)
        outer.addWidget(frame)
        self.text = QtWidgets.QLabel("")
        self.text.setObjectName("notes")
        self.text.setWordWrap(True)
        self.text.setTextFormat(Qt.TextFormat.RichText)
        self.text.setAlignment(Qt.AlignmentFlag.AlignTop | Qt.AlignmentFlag.AlignLeft)
        scroll = QtWidgets.QScrollArea()
        scroll.setWidgetResizable(True)
        scroll.setFrameShape(QtWidgets.QFrame.Shape.NoFrame)
        scroll.setWidget(self.text)
        scroll.setStyleSheet(f"background: {theme.CARD};")
        layout.addWidget(scroll)

    def show_result(self, result) -> None:
        if result is None:
            self.text.setText("")
            return
        if not result.flags:
            self.text.setText(f"<span style='color:{theme.MUTED}'>Nothing unusual: the fits "
                              "follow the data and the cell behaves passively.</span>")
            return
        items = []
        for flag in result.flags:
            message = plain_message(flag.message)
            if message[:1].isascii():        # "τ0 ..." must not become "Τ0 ..."
                message = message[:1].upper() + message[1:]
            message, value = note_text(message, flag.value)
            if value:
                value = f" <span style='color:{theme.MUTED}'>{value}</span>"
            items.append(f"<p style='margin:0 0 5px 0'>• {message}{value}</p>")
        self.text.setText("".join(items))


def plain_message(message: str) -> str:
    """A flag message fit to show: an internal detail quoting code (a `name` in
    backticks, as a numerics error reads) is left out, keeping the words before it."""
    if "`" not in message:
        return message
    head = message.split(": ", 1)[0]
    return f"{head} (an internal check of the numerics failed; try a later fit start)"


def note_text(message: str, value) -> tuple[str, str]:
    """A flag's message and its value in words: "… R_in (MΩ)", 8.15 → ("… R_in", "8.15 MΩ").

    A message ending in a parenthesis names what the value is ("(MΩ)", "(relative
    change)"); it is moved beside the number instead of standing before "(8.15)".
    """
    import re

    if value is None:
        return message, ""
    number = f"{value:.3g}".replace("-", "−")
    found = re.search(r"\s*\(([^()]{1,40})\)$", message)
    if found is None:
        return message, f"({number})"
    what = found.group(1)
    if what.endswith("?"):           # a question about the cause, not the value's name
        return message, f"({number})"
    message = message[:found.start()]
    if len(what) <= 4 or what in ("MΩ", "ms", "mV", "pA", "pF", "s"):
        return message, f"— {number} {what}"
    return message, f"— {what}: {number}"


# ----------------------------------------------------------------------------- windows
class WindowsBar(QtWidgets.QFrame):
    """Start and end (ms from the step onset) of each window, to read and to type.

    Emits ``edited(name, start_ms, end_ms)`` when a person types a value, and
    ``leave(delta)`` when → (at the end of a box's text) or ← (at its start) asks for
    the next or previous sweep: the value is taken and the keys go back to the review.
    Enter takes the value and gives the keys back too. The scope check box and the reset
    button sit in the trace card's title row (``tools``).
    """

    edited = QtCore.Signal(str, float, float)
    reset = QtCore.Signal()
    leave = QtCore.Signal(int)
    done = QtCore.Signal()

    def __init__(self, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        layout = QtWidgets.QHBoxLayout(self)
        layout.setContentsMargins(4, 4, 4, 2)
        layout.setSpacing(4)
        self.lead = QtWidgets.QLabel("ms from step")
        self.lead.setObjectName("unit")
        self.lead.setToolTip("window edges in ms from the step onset (negative: before it)")
        layout.addWidget(self.lead)
        self.boxes: dict[str, tuple[QtWidgets.QDoubleSpinBox, QtWidgets.QDoubleSpinBox]] = {}
        for name in ("baseline", "steady", "fit"):
            layout.addSpacing(6)
            dot = QtWidgets.QLabel("■")
            dot.setStyleSheet(f"color: {theme.REGION_LINE[name]};")
            layout.addWidget(dot)
            layout.addWidget(QtWidgets.QLabel(name))
            pair = (self._box(name), self._box(name))
            layout.addWidget(pair[0])
            layout.addWidget(QtWidgets.QLabel("–"))
            layout.addWidget(pair[1])
            self.boxes[name] = pair
        layout.addStretch(1)
        self.only_this = QtWidgets.QCheckBox("this sweep only")
        self.only_this.setToolTip("Window edits apply to the sweep on screen only (W)")
        self.only_this.setFocusPolicy(Qt.FocusPolicy.NoFocus)
        self.reset_button = QtWidgets.QPushButton("automatic windows")
        self.reset_button.setToolTip("Every window back to the automatic choice")
        self.reset_button.setFocusPolicy(Qt.FocusPolicy.NoFocus)
        self.reset_button.clicked.connect(self.reset)
        self.tools = QtWidgets.QWidget()
        tools = QtWidgets.QHBoxLayout(self.tools)
        tools.setContentsMargins(0, 0, 0, 0)
        tools.addWidget(self.only_this)
        tools.addWidget(self.reset_button)

    def _box(self, name: str) -> QtWidgets.QDoubleSpinBox:
        box = QtWidgets.QDoubleSpinBox()
        box.setRange(-9999.9, 9999.9)
        box.setSpecialValueText("—")      # shown at the minimum: a window not used
        box.setDecimals(1)
        box.setSingleStep(0.5)
        box.setKeyboardTracking(False)
        box.setButtonSymbols(QtWidgets.QAbstractSpinBox.ButtonSymbols.NoButtons)
        box.setAlignment(Qt.AlignmentFlag.AlignRight)
        box.setFixedWidth(58)
        box.valueChanged.connect(lambda _v, n=name: self._typed(n))
        box.installEventFilter(self)
        return box

    def eventFilter(self, obj, event) -> bool:  # noqa: N802 (Qt name)
        if isinstance(obj, QtWidgets.QAbstractSpinBox) and event.type() in (
                QtCore.QEvent.Type.KeyPress, QtCore.QEvent.Type.ShortcutOverride):
            key, edit = event.key(), obj.lineEdit()
            at_end = edit.cursorPosition() >= len(edit.text()) or edit.hasSelectedText()
            at_start = edit.cursorPosition() == 0 or edit.hasSelectedText()
            delta = 1 if key == Qt.Key.Key_Right and at_end else \
                -1 if key == Qt.Key.Key_Left and at_start else 0
            enter = key in (Qt.Key.Key_Return, Qt.Key.Key_Enter)
            if (delta or enter) and event.type() == QtCore.QEvent.Type.KeyPress:
                obj.interpretText()          # take what was typed (emits `edited`)
                obj.clearFocus()
                self.done.emit()
                if delta:
                    self.leave.emit(delta)
                return True
            if delta and event.type() == QtCore.QEvent.Type.ShortcutOverride:
                event.accept()               # the box handles it (above), not the menu
                return True
        return super().eventFilter(obj, event)

    def _typed(self, name: str) -> None:
        start, end = (b.value() for b in self.boxes[name])
        if end > start:
            self.edited.emit(name, start, end)

    def show_windows(self, spans: dict) -> None:
        """Show each window's (start, end) in ms, or disable it when it is not used."""
        for name, boxes in self.boxes.items():
            span = spans.get(name)
            unused = (boxes[0].minimum(),) * 2
            for box, value in zip(boxes, span or unused, strict=True):
                box.blockSignals(True)
                box.setValue(value)
                box.setEnabled(span is not None)
                box.blockSignals(False)


# ----------------------------------------------------------------------------- sweeps
SWEEP_COLUMNS = (*(f"{q.label}\n{q.unit}".strip() for q in S.SWEEP_TABLE), "kept")
# decimals per column, the same on every row
DECIMALS = {S.STEP.key: 0, S.V_REST.key: 2, S.R_IN.key: 1, S.TAU0.key: 2, S.TAU1.key: 2,
            S.RMSE.key: 3}
OWN_WINDOWS_MARK = "◆"


class SweepTable(QtWidgets.QTableWidget):
    """One row per sweep; selecting a row shows that sweep (``picked(index)``)."""

    picked = QtCore.Signal(int)

    def __init__(self, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(0, len(SWEEP_COLUMNS), parent)
        self.setHorizontalHeaderLabels(SWEEP_COLUMNS)
        self.verticalHeader().setVisible(False)
        self.setSelectionBehavior(QtWidgets.QAbstractItemView.SelectionBehavior.SelectRows)
        self.setSelectionMode(QtWidgets.QAbstractItemView.SelectionMode.SingleSelection)
        self.setEditTriggers(QtWidgets.QAbstractItemView.EditTrigger.NoEditTriggers)
        self.setShowGrid(False)
        self.setAlternatingRowColors(False)
        self.verticalHeader().setDefaultSectionSize(22)
        header = self.horizontalHeader()
        header.setSectionResizeMode(QtWidgets.QHeaderView.ResizeMode.ResizeToContents)
        header.setSectionResizeMode(len(SWEEP_COLUMNS) - 1,
                                    QtWidgets.QHeaderView.ResizeMode.Stretch)
        self._rows: dict[int, int] = {}
        self.itemSelectionChanged.connect(self._selection)
        self._quiet = False

    def _selection(self) -> None:
        if self._quiet:
            return
        rows = {i.row() for i in self.selectedIndexes()}
        if rows:
            index = next(k for k, r in self._rows.items() if r == min(rows))
            self.picked.emit(index)

    def show_state(self, state) -> None:
        """Fill every row from the state (numbers from the newest fit of each sweep)."""
        self._quiet = True
        self.setRowCount(len(state.indices))
        self._rows = {index: row for row, index in enumerate(state.indices)}
        for index in state.indices:
            self.show_row(state, index)
        self._quiet = False
        self.select(state.current)

    def show_row(self, state, index: int) -> None:
        row = self._rows.get(index)
        if row is None:
            return
        fit = state.sweep_fit(index)
        d = fit.to_dict() if fit is not None else {}
        status = state.status(index)
        own = state.has_own_windows(index)
        cells = [f"{OWN_WINDOWS_MARK} {index}" if own else str(index),
                 *(fixed(d.get(q.key), DECIMALS.get(q.key, 2)) for q in S.SWEEP_TABLE[1:]),
                 _status_text(status)]
        back = None
        if own:
            back = QtGui.QColor(theme.ROW_OWN_WINDOWS)
        if status is not None and not status.accepted:
            back = QtGui.QColor(theme.ROW_REJECTED)
        elif status is not None and status.by_hand:
            back = QtGui.QColor(theme.ROW_BY_HAND)
        muted = status is not None and not status.accepted
        for col, text in enumerate(cells):
            item = self.item(row, col)
            if item is None:
                item = QtWidgets.QTableWidgetItem()
                last = col == len(cells) - 1
                align = Qt.AlignmentFlag.AlignLeft if last else Qt.AlignmentFlag.AlignRight
                item.setTextAlignment(align | Qt.AlignmentFlag.AlignVCenter)
                self.setItem(row, col, item)
            item.setText(text)
            item.setBackground(back if back is not None else QtGui.QBrush())
            item.setForeground(QtGui.QColor(theme.MUTED if muted else theme.INK))
            tips = [status.reason] if muted else []
            if own:
                tips.append("this sweep uses its own windows")
            item.setToolTip("; ".join(tips))
            if col == 0:
                font = item.font()
                font.setBold(own)
                item.setFont(font)

    def select(self, index: int) -> None:
        row = self._rows.get(index)
        if row is None:
            return
        self._quiet = True
        self.selectRow(row)
        self.scrollToItem(self.item(row, 0))
        self._quiet = False

    def status_text(self, index: int) -> str:
        """The text of a sweep's "kept" cell (for tests and screen readers)."""
        return self.item(self._rows[index], len(SWEEP_COLUMNS) - 1).text()


def _status_text(status) -> str:
    if status is None:
        return "…"
    return ("yes" if status.accepted else "no") + (" (you)" if status.by_hand else "")


def status_sentence(index: int, status, *, fitted: bool = False, own_windows: bool = False
                    ) -> str:
    """One line about a sweep's fate, e.g. "Sweep 4 is left out by you: noisy baseline".

    `fitted`: the sweep has a fit of its own while the cell analysis has not decided
    yet; `own_windows`: the sweep uses windows of its own.
    """
    own = " · own windows (◆)" if own_windows else ""
    if status is None:
        if fitted:
            return f"Sweep {index} is fitted; the cell analysis decides which sweeps to " \
                   f"keep…{own}"
        return f"Sweep {index}: waiting for the analysis{own}"
    who = "by you" if status.by_hand else "by the automatic tests"
    if status.accepted:
        return f"Sweep {index} is kept ({who}){own}"
    return f"Sweep {index} is left out {who}: {status.reason}{own}"


# ----------------------------------------------------------------------------- help
SHORTCUTS = (
    ("→  or  J", "next sweep"),
    ("←  or  K", "previous sweep"),
    ("A", "accept the sweep"),
    ("R", "reject the sweep (asks a reason)"),
    ("C", "clear the decision (automatic tests decide)"),
    ("W", "window edits: this sweep only / all sweeps"),
    ("S", "the analysis settings"),
    ("Ctrl+T", "set the step (drawn over the traces)"),
    ("F5", "re-run the analysis"),
    ("Z", "zoom out to all data"),
    ("Ctrl+Z / Ctrl+Shift+Z", "undo / redo"),
    ("N  or  Page Down", "next recording"),
    ("P  or  Page Up", "previous recording"),
    ("Ctrl+O / Ctrl+Shift+O", "open files / a folder"),
    ("Ctrl+E / Ctrl+P", "export a parameter sheet / a PDF report"),
    ("Ctrl+D", "add the cell to a database"),
    ("F1  or  ?", "show / hide this list"),
)


class HelpOverlay(QtWidgets.QWidget):
    """A dimmed layer over the window listing every shortcut; any key or click closes it."""

    def __init__(self, parent: QtWidgets.QWidget) -> None:
        super().__init__(parent)
        self.setAttribute(Qt.WidgetAttribute.WA_StyledBackground, True)
        self.setStyleSheet("HelpOverlay { background: rgba(24, 28, 34, 150); }")
        box = QtWidgets.QFrame(self)
        box.setObjectName("helpCard")
        grid = QtWidgets.QGridLayout(box)
        grid.setContentsMargins(28, 22, 28, 22)
        grid.setHorizontalSpacing(18)
        grid.setVerticalSpacing(7)
        title = QtWidgets.QLabel("Keys for reviewing")
        title.setObjectName("fileName")
        grid.addWidget(title, 0, 0, 1, 2)
        for row, (keys, what) in enumerate(SHORTCUTS, start=1):
            key = QtWidgets.QLabel(keys)
            key.setObjectName("key")
            grid.addWidget(key, row, 0, Qt.AlignmentFlag.AlignRight)
            grid.addWidget(QtWidgets.QLabel(what), row, 1)
        hint = QtWidgets.QLabel("Drag a shaded window on the traces, or type its edges below "
                                "them; the sweep refits as you move.\nEvery change is saved "
                                "beside the recording at once.  Esc closes this list.")
        hint.setObjectName("unit")
        grid.addWidget(hint, len(SHORTCUTS) + 1, 0, 1, 2)
        layout = QtWidgets.QVBoxLayout(self)
        layout.addStretch(1)
        row = QtWidgets.QHBoxLayout()
        row.addStretch(1)
        row.addWidget(box)
        row.addStretch(1)
        layout.addLayout(row)
        layout.addStretch(1)
        self.hide()

    def toggle(self) -> None:
        if self.isVisible():
            self.hide()
        else:
            self.setGeometry(self.parentWidget().rect())
            self.raise_()
            self.show()
            self.setFocus()

    def mousePressEvent(self, event: QtGui.QMouseEvent) -> None:  # noqa: N802 (Qt name)
        self.hide()

    def keyPressEvent(self, event: QtGui.QKeyEvent) -> None:  # noqa: N802 (Qt name)
        if event.key() in (Qt.Key.Key_Escape, Qt.Key.Key_F1, Qt.Key.Key_Question):
            self.hide()
        else:
            super().keyPressEvent(event)
