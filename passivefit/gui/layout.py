"""How the review window is laid out: its panels, menus and keys (a mixin of
ReviewWindow; the panels themselves are in panels.py and plots.py)."""

from __future__ import annotations

from PySide6 import QtCore, QtGui, QtWidgets

from passivefit.gui.design_panel import DesignPanel
from passivefit.gui.dialogs import SettingsPanel
from passivefit.gui.panels import (
    CellCard,
    Header,
    HelpOverlay,
    NotesPanel,
    SweepTable,
    WindowsBar,
    card,
)
from passivefit.gui.plots import ScanView, SemilogView, TimeCourseView, TraceView, VIView

Qt = QtCore.Qt


class WindowLayout:
    """Builds the window's widgets, menus and shortcuts and connects them."""

    def _build(self) -> None:
        central = QtWidgets.QWidget()
        central.setObjectName("central")
        self.setCentralWidget(central)
        self.header = Header()
        self.trace = TraceView()
        self.windows_bar = WindowsBar()
        trace_card, trace_layout = card("Traces · sweep on screen in teal, fit in terracotta",
                                        self.windows_bar.tools)
        trace_layout.addWidget(self.trace, 1)
        trace_layout.addWidget(self.windows_bar)

        self.semilog, self.scan, self.vi = SemilogView(), ScanView(), VIView()
        lower = QtWidgets.QWidget()
        lower_layout = QtWidgets.QHBoxLayout(lower)
        lower_layout.setContentsMargins(0, 0, 0, 0)
        lower_layout.setSpacing(8)
        for title, view in (("Semilog view", self.semilog), ("Fit-start scan", self.scan),
                            ("Input resistance", self.vi)):
            frame, layout = card(title)
            layout.addWidget(view)
            lower_layout.addWidget(frame, 1)

        left_split = QtWidgets.QSplitter(Qt.Orientation.Vertical)
        left_split.addWidget(trace_card)
        left_split.addWidget(lower)
        left_split.setSizes([560, 260])
        left_split.setChildrenCollapsible(False)
        left = QtWidgets.QWidget()
        left_layout = QtWidgets.QVBoxLayout(left)
        left_layout.setContentsMargins(0, 0, 0, 0)
        left_layout.addWidget(self.header)
        self.banner = QtWidgets.QLabel("")
        self.banner.setObjectName("banner")
        self.banner.setWordWrap(True)
        self.banner.setSizePolicy(QtWidgets.QSizePolicy.Policy.Ignored,
                                  QtWidgets.QSizePolicy.Policy.Minimum)
        self.banner.hide()
        left_layout.addWidget(self.banner)
        left_layout.addWidget(left_split, 1)

        self.cell = CellCard()
        self.notes = NotesPanel()
        self.table = SweepTable()
        sweeps_card, sweeps_layout = card("One row per sweep · ◆ own windows")
        sweeps_layout.addWidget(self.table, 1)
        self.sweep_line = QtWidgets.QLabel("")
        self.sweep_line.setObjectName("unit")
        self.sweep_line.setWordWrap(True)
        sweeps_layout.addWidget(self.sweep_line)
        buttons = QtWidgets.QHBoxLayout()
        for text, tip, slot in (("Accept  A", "Keep this sweep in the cell values",
                                 lambda: self.decide(True)),
                                ("Reject  R", "Leave this sweep out (asks a reason)",
                                 lambda: self.decide(False)),
                                ("Automatic  C", "Let the automatic tests decide",
                                 lambda: self.decide(None))):
            button = QtWidgets.QPushButton(text)
            button.setToolTip(tip)
            button.setFocusPolicy(Qt.FocusPolicy.NoFocus)
            button.clicked.connect(slot)
            buttons.addWidget(button)
        sweeps_layout.addLayout(buttons)
        self.settings_panel = SettingsPanel()
        self.tabs = QtWidgets.QTabWidget()
        self.tabs.setObjectName("sideTabs")
        self.tabs.addTab(sweeps_card, "Sweeps")
        self.tabs.addTab(self.settings_panel, "Analysis settings")
        self.time_course = TimeCourseView()
        self.tabs.addTab(self.time_course, "Over time")
        self.design_panel = DesignPanel()
        self.tabs.addTab(self.design_panel, "Record next")
        right_split = QtWidgets.QSplitter(Qt.Orientation.Vertical)
        for widget in (self.cell, self.notes, self.tabs):
            right_split.addWidget(widget)
        right_split.setSizes([250, 130, 440])
        right_split.setChildrenCollapsible(False)

        split = QtWidgets.QSplitter(Qt.Orientation.Horizontal)
        split.addWidget(left)
        split.addWidget(right_split)
        split.setSizes([900, 440])
        split.setChildrenCollapsible(False)
        outer = QtWidgets.QVBoxLayout(central)
        outer.setContentsMargins(8, 6, 8, 2)
        outer.addWidget(split)

        self.progress = QtWidgets.QProgressBar()
        self.progress.setRange(0, 0)
        self.progress.setFixedWidth(110)
        self.progress.setFixedHeight(12)
        self.progress.setTextVisible(False)
        self.progress.hide()
        self.busy_label = QtWidgets.QLabel("")
        self.watch_label = QtWidgets.QLabel("")
        self.statusBar().addPermanentWidget(self.watch_label)
        self.folder_label = QtWidgets.QLabel("")       # a folder analysed into a database
        self.folder_progress = QtWidgets.QProgressBar()
        self.folder_progress.setFixedWidth(110)
        self.folder_progress.setFixedHeight(12)
        self.folder_progress.setTextVisible(False)
        self.folder_progress.hide()
        self.statusBar().addPermanentWidget(self.folder_label)
        self.statusBar().addPermanentWidget(self.folder_progress)
        self.statusBar().addPermanentWidget(self.busy_label)
        self.statusBar().addPermanentWidget(self.progress)
        self.statusBar().addPermanentWidget(QtWidgets.QLabel("F1: keys"))
        self.help = HelpOverlay(central)
        self.windows_bar.show_windows({})           # no recording yet: nothing to type

        self.trace.region_moved.connect(self._preview_window)
        self.trace.region_finished.connect(self._keep_window)
        self.windows_bar.edited.connect(self._keep_window)
        self.windows_bar.reset.connect(self._reset_windows)
        self.windows_bar.done.connect(self.setFocus)
        self.windows_bar.leave.connect(self.step_sweep)
        self.settings_panel.changed.connect(self._set_options)
        self.table.picked.connect(self._pick_sweep)

    def _menus(self) -> None:
        bar = self.menuBar()
        file_menu = bar.addMenu("&File")
        self._action(file_menu, "Open recordings…", "Ctrl+O", self._ask_open)
        self._action(file_menu, "Open a folder…", "Ctrl+Shift+O", self._ask_open_folder)
        self._action(file_menu, "Watch folder…", "Ctrl+Shift+W", self._ask_watch_folder)
        self.recent_menu = file_menu.addMenu("Open recent")
        self.recent_menu.aboutToShow.connect(self._fill_recent)
        file_menu.addSeparator()
        self._action(file_menu, "Save review as…", "Ctrl+Shift+S", self._ask_save_review_as)
        self._action(file_menu, "Export parameter sheet…", "Ctrl+E", self._ask_export)
        self._action(file_menu, "Export PDF report…", "Ctrl+P", self._ask_report)
        self._action(file_menu, "Add cell to database…", "Ctrl+D", self._ask_database)
        self._action(file_menu, "Analyse a folder into the database…", "Ctrl+Shift+D",
                     self._ask_analyse_folder)
        self.stop_folder_action = self._action(file_menu, "Stop analysing the folder", "",
                                               self.stop_folder)
        self.stop_folder_action.setEnabled(False)
        file_menu.addSeparator()
        self._action(file_menu, "Quit", "Ctrl+Q", self.close)
        edit = bar.addMenu("&Edit")
        self.undo_action = self._action(edit, "Undo", "Ctrl+Z", self.undo)
        self.redo_action = self._action(edit, "Redo", "Ctrl+Shift+Z", self.redo)
        edit.addSeparator()
        self._action(edit, "Windows back to automatic", "", self._reset_windows)
        self._action(edit, "Set the step…", "Ctrl+T", self._ask_set_step)
        self._action(edit, "Analysis settings", "S",
                     lambda: self.tabs.setCurrentWidget(self.settings_panel))
        review = bar.addMenu("&Review")
        self._action(review, "Next sweep", "Right", lambda: self.step_sweep(1))
        self._action(review, "Previous sweep", "Left", lambda: self.step_sweep(-1))
        self._action(review, "Accept sweep", "A", lambda: self.decide(True))
        self._action(review, "Reject sweep…", "R", lambda: self.decide(False))
        self._action(review, "Clear decision", "C", lambda: self.decide(None))
        self._action(review, "Re-run the analysis", "F5", self.refit)
        review.addSeparator()
        self._action(review, "Next recording", "PgDown", lambda: self.step_recording(1))
        self._action(review, "Previous recording", "PgUp", lambda: self.step_recording(-1))
        help_menu = bar.addMenu("&Help")
        self._action(help_menu, "Keys for reviewing", "F1", self.help.toggle)

    def _action(self, menu: QtWidgets.QMenu, text: str, keys: str, slot) -> QtGui.QAction:
        action = QtGui.QAction(text, self)
        if keys:
            action.setShortcut(QtGui.QKeySequence(keys))
        action.triggered.connect(slot)
        menu.addAction(action)
        return action

    def _shortcuts(self) -> None:
        extra = (("J", lambda: self.step_sweep(1)), ("K", lambda: self.step_sweep(-1)),
                 ("N", lambda: self.step_recording(1)), ("P", lambda: self.step_recording(-1)),
                 ("Ctrl+Y", self.redo), ("Ctrl+R", self.refit), ("?", self.help.toggle),
                 ("Z", self.trace.fit_view), ("W", self.windows_bar.only_this.toggle),
                 ("Esc", self.help.hide))
        for keys, slot in extra:
            QtGui.QShortcut(QtGui.QKeySequence(keys), self, slot)

    # ------------------------------------------------------------------ opening
