"""The review window: traces and fits on the left, the cell and its sweeps on the right.

The window owns one :class:`~passivefit.gui.state.ReviewState` at a time (the
recording on screen) and a list of recordings to step through. Widgets call the
state; the state's events redraw the widgets; the cell analysis runs in a worker
thread (:class:`~passivefit.gui.worker.AnalysisRunner`) so the window never freezes.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

from PySide6 import QtCore, QtGui, QtWidgets

from passivefit.gui import theme
from passivefit.gui.dialogs import StepDialog
from passivefit.gui.files import FileActions
from passivefit.gui.layout import WindowLayout
from passivefit.gui.outputs import (  # noqa: F401 (these are part of the window's API)
    OutputActions,
    database_problem,
    stored_cell,
    unset_only,
    write_problem,
)
from passivefit.gui.panels import (
    status_sentence,
)
from passivefit.gui.state import WINDOW_NAMES, ReviewState, expand_paths
from passivefit.gui.watching import WatchActions
from passivefit.gui.worker import AnalysisRunner, FolderRunner
from passivefit.io.recording import LoadError, StepSpec
from passivefit.model.settings import Settings

Qt = QtCore.Qt
REJECT_REASONS = ("noisy baseline", "spontaneous event", "unstable access or drift",
                  "action potential", "artefact in the fit window")


def fitting_size(width: int, height: int) -> tuple[int, int]:
    """(width, height) made small enough for the screen's free area (1280×800 screens)."""
    screen = QtGui.QGuiApplication.primaryScreen()
    if screen is None:
        return width, height
    free = screen.availableGeometry()
    return min(width, free.width()), min(height, free.height())


class ReviewWindow(WindowLayout, OutputActions, FileActions, WatchActions,
                   QtWidgets.QMainWindow):
    """Review recordings one by one: check fits, move windows, keep or reject sweeps.

    Parameters
    ----------
    settings : Settings, optional
        Settings for recordings that have no saved review yet.
    store : QSettings, optional
        Where recent files and the database path are remembered.
    interactive : bool
        False: never open a dialog (snapshots, tests); problems go to the status bar.
    synchronous : bool
        True: analyse in the UI thread (snapshots); False: in a worker thread.
    autosave : bool
        Write the review file after every change.
    remember : bool
        Keep the list of recent files in `store` (off for snapshots).
    """

    def __init__(self, settings: Settings | None = None, *, store: QtCore.QSettings | None = None,
                 interactive: bool = True, synchronous: bool = False,
                 autosave: bool = True, remember: bool = True) -> None:
        super().__init__()
        self.base_settings = settings or Settings()
        self.store = store or QtCore.QSettings("passivefit", "passivefit")
        self.interactive, self.synchronous, self.autosave = interactive, synchronous, autosave
        self.remember = remember
        self.paths: list[Path] = []
        self.position = -1
        self.state: ReviewState | None = None
        self.last_error = ""
        self._notes: dict[str, str] = {}     # banner lines by topic (save, review, open, fit)
        self._previewed = False
        self._shown_step = None
        self.failed_settings: Settings | None = None
        self.runner = AnalysisRunner(self)
        self.runner.finished.connect(self._analysis_done)
        self.runner.failed.connect(self._analysis_failed)
        self.runner.busy_changed.connect(self._busy)
        self.folder_runner = FolderRunner(self)
        self.folder_runner.progress.connect(self._folder_progress)
        self.folder_runner.finished.connect(self._folder_done)
        self.folder_runner.failed.connect(self._folder_failed)
        self.setWindowTitle("passivefit · review")
        self.setStyleSheet(theme.STYLE_SHEET)
        self.setAcceptDrops(True)
        self._build()
        self._menus()
        self._shortcuts()
        self.resize(*fitting_size(1400, 900))

    # ------------------------------------------------------------------ layout
    def open_paths(self, paths) -> bool:
        """Open files (folders are searched for recordings); show the first one."""
        files = expand_paths(paths)
        if not files:
            self._problem("no recordings found there (passivefit reads .abf, .nwb, .csv, .tsv)")
            return False
        self.paths = files
        return self.open_position(0)

    def open_position(self, position: int) -> bool:
        """Show recording number `position` of the list (saving happens on every change)."""
        if not 0 <= position < len(self.paths):
            return False
        path = self.paths[position]
        try:
            state = self._make_state(path)
        except (LoadError, ValueError) as exc:
            self._open_failed(str(exc))
            return False
        except Exception as exc:  # noqa: BLE001 - a reader's bug must not close the window
            self._open_failed(f"{path}: could not be opened ({type(exc).__name__}: {exc})")
            return False
        if state is None:
            return False
        previous = (self.state, self.position)
        self.position = position
        try:
            self._attach(state)
        except Exception as exc:  # noqa: BLE001 - absurd values must not close the window
            self._detach(state)
            self.state, self.position = None, previous[1]
            if previous[0] is not None:
                try:
                    self._attach(previous[0])        # back to the recording shown before
                except Exception:  # noqa: BLE001 - it was shown before; leave it be
                    self.state = None
            self._open_failed(f"{path}: could not be shown ({type(exc).__name__}: "
                              f"{str(exc).splitlines()[0] if str(exc) else ''})")
            return False
        self._note("open", None)
        self._remember(path)
        return True

    def _open_failed(self, message: str) -> None:
        self._note("open", message)
        self._problem(message)

    def _detach(self, state: ReviewState) -> None:
        for event, slot in ((state.current_changed, self._on_current),
                            (state.sweep_refitted, self._on_refit),
                            (state.settings_changed, self._on_settings),
                            (state.analysis_needed, self._on_analysis_needed),
                            (state.result_changed, self._on_result),
                            (state.saved, self._saved),
                            (state.save_failed, self._save_failed),
                            (state.refit_failed, self._refit_failed)):
            if slot in event._callbacks:
                event.disconnect(slot)

    def _make_state(self, path: Path) -> ReviewState | None:
        from passivefit.io import load

        recording = load(path)
        try:
            state = ReviewState(recording, self.base_settings, autosave=self.autosave)
        except LoadError:
            if self.base_settings.step is not None or not self.interactive:
                raise
            step = self._ask_step(recording, None)
            if step is None:
                return None
            state = ReviewState(recording, replace(self.base_settings, step=step),
                                autosave=self.autosave)
        if state.settings.step is not None and not state.restored and self.autosave:
            state.try_save()     # a typed step is kept at once, not at the next change
        return state

    def _attach(self, state: ReviewState) -> None:
        if self.state is not None:
            self.runner.wait()
            self.state.save_position()
        self.state = state
        self._shown_step = state.settings.step
        state.current_changed.connect(self._on_current)
        state.sweep_refitted.connect(self._on_refit)
        state.settings_changed.connect(self._on_settings)
        state.analysis_needed.connect(self._on_analysis_needed)
        state.result_changed.connect(self._on_result)
        state.saved.connect(self._saved)
        state.save_failed.connect(self._save_failed)
        state.refit_failed.connect(self._refit_failed)
        for topic in ("save", "review", "fit"):
            self._note(topic, None)
        if state.save_error:
            self._save_failed(state.save_error)
        if state.restore_note:
            self._note("review", state.restore_note)
        self.setWindowTitle(f"passivefit · review — {Path(state.recording.path).name}")
        self.header.show_recording(state, self.position, len(self.paths))
        self.trace.set_recording(state)
        self.table.show_state(state)
        self.settings_panel.show_settings(state.settings)
        if state.steps.get(state.current) is not None:
            state.refit_sweep()
        self._show_windows()
        self.cell.show_result(None, True)
        for view in (self.notes, self.semilog, self.scan, self.vi):
            view.show_result(None)
        self.header.show_verdict(None, True)
        self._update_undo()
        note = "review restored from " + state.review_file.name if state.restored else \
            state.restore_note
        if note:
            self.statusBar().showMessage(note, 15000)
        self._on_analysis_needed(state.settings)

    # ------------------------------------------------------------------ state events
    def _on_current(self, index: int) -> None:
        self.trace.show_sweep(self.state)
        self.table.select(index)
        self._show_windows()

    def _on_refit(self, fit) -> None:
        if fit.index == self.state.current:
            self.trace.show_fit(fit)
            self._show_windows()
        self.table.show_row(self.state, fit.index)

    def _on_settings(self, _settings) -> None:
        self.header.show_recording(self.state, self.position, len(self.paths))
        self.settings_panel.show_settings(self.state.settings)
        if self._step_changed():
            self.trace.set_recording(self.state)     # new step edges and windows
        self.table.show_state(self.state)
        self.trace.set_statuses(self.state)
        self.trace.show_sweep(self.state)
        self.header.show_verdict(self.state.result, True)
        self._update_undo()

    def _on_analysis_needed(self, settings) -> None:
        if self.synchronous:
            try:
                self.state.run_analysis()
            except Exception as exc:  # noqa: BLE001 - said in words, the window goes on
                self._analysis_failed(self.state, f"{type(exc).__name__}: {exc}")
        else:
            self.runner.request(self.state, settings)

    def _on_result(self, result) -> None:
        busy = self.runner.busy
        self.trace.set_statuses(self.state)
        self.trace.show_sweep(self.state)
        self.table.show_state(self.state)
        self.cell.show_result(result, busy)
        self.notes.show_result(result)
        self.semilog.show_result(result)
        self.scan.show_result(result)
        self.time_course.show_result(result)
        self.design_panel.show_advice(result.design if result is not None else None)
        self.vi.show_result(result)
        self.header.show_verdict(result, busy)
        self._show_windows()

    def _analysis_done(self, owner, result) -> None:
        if owner is self.state:
            owner.accept_result(result)

    def _analysis_failed(self, owner, message: str) -> None:
        if owner is self.state:
            self.failed_settings = owner.settings
            self._problem(f"the analysis failed: {message}")

    def _busy(self, busy: bool) -> None:
        self.progress.setVisible(busy)
        self.busy_label.setText("analysing the cell…" if busy else "")
        if self.state is not None and not busy:
            self.header.show_verdict(self.state.result, False)
            self.cell.show_result(self.state.result, False)

    @property
    def idle(self) -> bool:
        """No analysis running or waiting, and the last one ended (result or failure)."""
        if self.runner.busy or self.state is None:
            return not self.runner.busy
        return self.state.up_to_date or self.failed_settings == self.state.settings

    # ------------------------------------------------------------------ editing
    def _preview_window(self, name: str, start_ms: float, end_ms: float) -> None:
        if self.state is None or not end_ms > start_ms:
            return
        self._previewed = True
        self.state.preview_window(name, (start_ms, end_ms),
                                  this_sweep_only=self.windows_bar.only_this.isChecked())

    def _keep_window(self, name: str, start_ms: float, end_ms: float) -> None:
        if self.state is None or not end_ms > start_ms:
            return
        shown = self.state.window_ms(name)
        unchanged = shown is not None and max(abs(shown[0] - start_ms),
                                              abs(shown[1] - end_ms)) < 1e-6
        if unchanged and not self._previewed:
            return    # a click on a window without moving it
        self._previewed = False
        self.state.set_window(name, (start_ms, end_ms),
                              this_sweep_only=self.windows_bar.only_this.isChecked())

    def _reset_windows(self) -> None:
        if self.state is not None:
            self.state.reset_windows()

    def _show_windows(self) -> None:
        """The windows of the sweep on screen in the spin boxes, and its fate in words."""
        if self.state is not None:
            self.windows_bar.show_windows({n: self.state.window_ms(n) for n in WINDOW_NAMES})
            index = self.state.current
            self.sweep_line.setText(status_sentence(
                index, self.state.status(index), fitted=self.state.sweep_fit(index) is not None,
                own_windows=self.state.has_own_windows(index)))

    def _pick_sweep(self, index: int) -> None:
        if self.state is not None:
            self.state.go_to(index)

    def step_sweep(self, delta: int) -> None:
        if self.state is not None:
            self.state.step_sweep(delta)

    def step_recording(self, delta: int) -> None:
        self.open_position(self.position + delta)

    def decide(self, accepted: bool | None, reason: str | None = None) -> None:
        """Accept, reject (asking a reason unless given) or clear the sweep on screen."""
        if self.state is None:
            return
        if accepted is False and reason is None:
            reason = self._ask_reason()
            self.activateWindow()     # keys go back to the window after the dialog
            if reason is None:
                return
        self.state.set_decision(None, accepted, reason or "")
        if accepted is not None:
            self.state.step_sweep(1)

    def refit(self) -> None:
        if self.state is not None:
            self._on_analysis_needed(self.state.settings)

    def undo(self) -> None:
        if self.state is not None and not self.state.undo():
            self.statusBar().showMessage("nothing to undo", 3000)

    def redo(self) -> None:
        if self.state is not None and not self.state.redo():
            self.statusBar().showMessage("nothing to redo", 3000)

    def _update_undo(self) -> None:
        self.undo_action.setEnabled(self.state is not None and self.state.can_undo)
        self.redo_action.setEnabled(self.state is not None and self.state.can_redo)

    # ------------------------------------------------------------------ output
    def current_result(self):
        """The analysis for the current settings (computed now if the worker is behind)."""
        if self.state is None:
            raise ValueError("no recording is open")
        if not self.state.up_to_date:
            self.runner.wait()
            if not self.state.up_to_date:
                self.state.run_analysis()
        return self.state.result

    def snapshot(self, path: str | Path) -> Path:
        """Render the window (at its present size) to a PNG file."""
        QtWidgets.QApplication.processEvents()
        if not self.grab().toImage().save(str(path), "PNG", 0):   # 0: smallest file
            raise OSError(f"{path}: could not write the PNG")
        return Path(path)

    # ------------------------------------------------------------------ dialogs
    def _note(self, topic: str, message: str | None) -> None:
        """Keep (or, with None, drop) a line of the red banner; it shows while any is kept."""
        if message:
            self._notes[topic] = message[:1].upper() + message[1:]
        else:
            self._notes.pop(topic, None)
        self.banner.setText("\n".join(self._notes.values()))
        self.banner.setVisible(bool(self._notes))

    def _saved(self, path: Path) -> None:
        self._note("save", None)
        self.statusBar().showMessage(f"review saved · {path.name}", 4000)

    def _save_failed(self, message: str) -> None:
        """A review that cannot be written: said in the window, the review goes on."""
        self.last_error = message
        self._note("save", message)

    def _refit_failed(self, message: str) -> None:
        self.last_error = message
        self.statusBar().showMessage(message, 15000)

    def _problem(self, message: str) -> None:
        self.last_error = message
        self.statusBar().showMessage(message, 15000)
        if self.interactive:
            QtWidgets.QMessageBox.warning(self, "passivefit", message)

    def _ask_reason(self) -> str | None:
        if not self.interactive:
            return "rejected in review"
        text, ok = QtWidgets.QInputDialog.getItem(
            self, f"Reject sweep {self.state.current}", "Why leave this sweep out?",
            REJECT_REASONS, 0, True)
        return text.strip() or "rejected in review" if ok else None

    def _ask_step(self, recording, step: StepSpec | None) -> StepSpec | None:
        dialog = StepDialog(recording, step, self)
        return dialog.step() if dialog.exec() else None

    def _ask_set_step(self) -> None:
        if self.state is None:
            return
        step = self._ask_step(self.state.recording, self.state.settings.step)
        self.activateWindow()
        if step is not None:
            self.set_step(step)

    def set_step(self, step: StepSpec | None) -> bool:
        """Use a typed step (None: the file's own) for this recording; saved at once."""
        try:
            self.state.set_step(step)
        except (LoadError, ValueError) as exc:
            self._problem(f"that step cannot be used: {exc}")
            return False
        return True

    def _step_changed(self) -> bool:
        """True once after the step in use changed (undo and redo included)."""
        shown = self._shown_step
        self._shown_step = self.state.settings.step
        return shown != self.state.settings.step

    def _set_options(self, options: dict) -> None:
        if self.state is None:
            return
        try:
            self.state.set_options(**options)
        except ValueError as exc:
            self._problem(str(exc))
            self.settings_panel.show_settings(self.state.settings)

    def resizeEvent(self, event: QtGui.QResizeEvent) -> None:  # noqa: N802 (Qt name)
        super().resizeEvent(event)
        if self.help.isVisible():
            self.help.setGeometry(self.centralWidget().rect())

    def closeEvent(self, event: QtGui.QCloseEvent) -> None:  # noqa: N802 (Qt name)
        self.runner.wait()
        if self.state is not None:
            self.state.save_position()
            if self.state.unsaved and self.interactive and not self._close_unsaved():
                event.ignore()
                return
        super().closeEvent(event)

    def _close_unsaved(self) -> bool:
        """Ask before a review that could not be saved is lost; True: close."""
        buttons = QtWidgets.QMessageBox.StandardButton
        answer = QtWidgets.QMessageBox.warning(
            self, "passivefit", f"{self.state.save_error[:1].upper()}"
            f"{self.state.save_error[1:]}.\n\nSave the review elsewhere before closing?",
            buttons.Save | buttons.Discard | buttons.Cancel, buttons.Save)
        if answer == buttons.Save:
            self._ask_save_review_as()
            return not self.state.unsaved
        return answer == buttons.Discard
