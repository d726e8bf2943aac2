"""The "What to record next" panel: the Cramér–Rao bound of each value beside the CI
achieved, the sweeps needed for the targets, and what other protocols would give."""

from __future__ import annotations

import math

from PySide6 import QtCore, QtWidgets

from passivefit.gui import theme
from passivefit.gui.panels import card

Qt = QtCore.Qt
HEADINGS = ("value", "now", "bound ±", "CI ±", "effic.", "target ±", "sweeps")
#: What each column holds (the headings' tooltips).
EXPLAINED = ("", "the value now", "95 % half-width of the Cramér–Rao bound for the sweeps used",
             "the 95 % CI half-width the analysis achieved",
             "efficiency: bound ± over CI ± (1: no unbiased estimator could do better)",
             "the target 95 % half-width",
             "sweeps of this protocol for the target (from the CI achieved, else the bound)")


def _fmt(x, digits: int = 3) -> str:
    return "—" if x is None or (isinstance(x, float) and not math.isfinite(x)) \
        else f"{x:.{digits}g}"


class DesignPanel(QtWidgets.QFrame):
    """Shows a :class:`~passivefit.analysis.design.DesignAdvice` (or nothing).

    The table has one row per value (τ0, τ1, L, ρ, R_in, bridge) in display units; a
    second table lists the protocol changes and the factor by which each narrows the L
    and ρ intervals; the advice and its assumptions are in words below.
    """

    def __init__(self, parent: QtWidgets.QWidget | None = None) -> None:
        super().__init__(parent)
        frame, layout = card("What to record next")
        outer = QtWidgets.QVBoxLayout(self)
        outer.setContentsMargins(0, 0, 0, 0)
        scroll = QtWidgets.QScrollArea()   # the tables keep their full height; the panel scrolls
        scroll.setWidgetResizable(True)
        scroll.setFrameShape(QtWidgets.QFrame.Shape.NoFrame)
        scroll.setWidget(frame)
        outer.addWidget(scroll)
        self.values = self._table(HEADINGS)
        for column, tip in enumerate(EXPLAINED):
            self.values.horizontalHeaderItem(column).setToolTip(tip)
        layout.addWidget(self.values)
        self.changes = self._table(("protocol change", "L narrower ×", "ρ narrower ×"))
        layout.addWidget(self.changes)
        self.advice = QtWidgets.QLabel("")
        self.advice.setWordWrap(True)
        self.advice.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        layout.addWidget(self.advice)
        self.assumptions = QtWidgets.QLabel("")
        self.assumptions.setObjectName("unit")
        self.assumptions.setWordWrap(True)
        layout.addWidget(self.assumptions)
        layout.addStretch(1)
        self.show_advice(None)

    @staticmethod
    def _table(headings) -> QtWidgets.QTableWidget:
        table = QtWidgets.QTableWidget(0, len(headings))
        table.setHorizontalHeaderLabels(list(headings))
        table.verticalHeader().hide()
        table.setEditTriggers(QtWidgets.QAbstractItemView.EditTrigger.NoEditTriggers)
        table.setSelectionMode(QtWidgets.QAbstractItemView.SelectionMode.NoSelection)
        table.setFocusPolicy(Qt.FocusPolicy.NoFocus)
        header = table.horizontalHeader()   # the names as wide as they are, numbers share the rest
        header.setSectionResizeMode(QtWidgets.QHeaderView.ResizeMode.Stretch)
        header.setSectionResizeMode(0, QtWidgets.QHeaderView.ResizeMode.ResizeToContents)
        table.setVerticalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        table.setHorizontalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        table.setSizePolicy(QtWidgets.QSizePolicy.Policy.Expanding,
                            QtWidgets.QSizePolicy.Policy.Fixed)
        return table

    @staticmethod
    def _fit_height(table: QtWidgets.QTableWidget) -> None:
        """Make `table` exactly as tall as its header and rows (it never scrolls)."""
        table.resizeRowsToContents()
        rows = sum(table.rowHeight(r) for r in range(table.rowCount()))
        table.setFixedHeight(table.horizontalHeader().sizeHint().height() + rows
                             + 2 * table.frameWidth())

    def show_advice(self, advice) -> None:
        """Fill the panel from `advice` (None: empty, with a word why)."""
        if advice is None:
            self.values.setRowCount(0)
            self.changes.setRowCount(0)
            self.advice.setText("No advice yet: it needs a ball-and-stick fit of the cell.")
            self.assumptions.setText("")
            self._fit_height(self.values)
            self._fit_height(self.changes)
            return
        data = advice.to_dict()
        self.values.setRowCount(len(data["values"]))
        for r, row in enumerate(data["values"]):
            unit = f" ({row['unit']})" if row["unit"] else ""
            needed = row["sweeps_needed"]
            sweeps = "—" if row["target_ci95"] is None else (
                f"> {advice.max_sweeps}" if needed is None else str(needed))
            cells = (row["label"] + unit, _fmt(row["value"], 4), _fmt(row["crlb_ci95"], 2),
                     _fmt(row["achieved_ci95"], 2), _fmt(row["efficiency"], 2),
                     _fmt(row["target_ci95"], 2), sweeps)
            for c, text in enumerate(cells):
                item = QtWidgets.QTableWidgetItem(text)
                if c:
                    item.setTextAlignment(Qt.AlignmentFlag.AlignRight
                                          | Qt.AlignmentFlag.AlignVCenter)
                if row["note"]:
                    item.setToolTip(row["note"])
                if c == 6 and needed is None and row["target_ci95"] is not None:
                    item.setForeground(_colour(theme.TERRACOTTA))
                self.values.setItem(r, c, item)
        self.changes.setRowCount(len(data["changes"]))
        for r, change in enumerate(data["changes"]):
            for c, text in enumerate((change["change"], _fmt(change["L_narrower_by"], 2),
                                      _fmt(change["rho_narrower_by"], 2))):
                item = QtWidgets.QTableWidgetItem(text)
                item.setToolTip(change["detail"])
                self.changes.setItem(r, c, item)
        self.advice.setText(data["advice"])
        self.assumptions.setText(data["assumptions"])
        self._fit_height(self.values)
        self._fit_height(self.changes)


def _colour(name: str):
    from PySide6 import QtGui

    return QtGui.QBrush(QtGui.QColor(name))
