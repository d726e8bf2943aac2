"""The review window as a person at the rig meets it (issue 13, and the step dialog of
issue 10): grabbing windows, the typed step, the database, 1280×800, the first analysis,
labels, keys, the settings panel, failures in words, and start-up without a usable display.

Offscreen with pytest-qt, on the same short simulated recording as tests/test_gui.py.
"""

from __future__ import annotations

import errno
import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest

from passivefit.analysis import Settings

pytestmark = pytest.mark.gui
pytest.importorskip("pytestqt")

REPO = Path(__file__).resolve().parent.parent
SETTINGS = Settings(bootstrap=0)
CA3_NO_COMMAND = REPO / "sample_recordings" / "LOL-2026-11-12-c3_CA3.abf"


@pytest.fixture
def recording(recording_file, tmp_path) -> Path:
    return Path(shutil.copy(recording_file, tmp_path / recording_file.name))


def wait_idle(qtbot, window) -> None:
    qtbot.waitUntil(lambda: window.idle, timeout=30_000)


def _clean_env(**extra) -> dict:
    env = {k: v for k, v in os.environ.items()
           if k not in ("DISPLAY", "WAYLAND_DISPLAY", "QT_QPA_PLATFORM")}
    env["PYTHONPATH"] = str(REPO)
    env.update(extra)
    return env


def _note_texts(plot) -> list[str]:
    import pyqtgraph as pg

    return [item.textItem.toPlainText() for item in plot.getPlotItem().items
            if isinstance(item, pg.TextItem)]


# ----------------------------------------------------------------------------- start-up
def test_a_display_qt_cannot_use_gives_text_and_one_line_not_an_abort(recording, tmp_path):
    """DISPLAY names a screen that does not exist: Qt's xcb plugin cannot start (as when
    its libraries are missing); the command must not abort with status 134."""
    run = subprocess.run([sys.executable, "-m", "passivefit.cli", "gui", str(recording)],
                         env=_clean_env(DISPLAY=":4321", HOME=str(tmp_path)),
                         capture_output=True, text=True, timeout=180)
    assert run.returncode == 0, run.stderr
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("passivefit: no window:"), run.stderr
    assert "here is the analysis as text" in lines[0]
    assert "sweep  step pA" in run.stdout


def test_the_platform_probe_reports_a_plugin_that_cannot_load():
    from passivefit.gui.platform import window_problem

    problem = window_problem(_clean_env(QT_QPA_PLATFORM="no-such-platform"))
    assert problem is not None and "\n" not in problem
    assert window_problem(_clean_env(QT_QPA_PLATFORM="offscreen")) is None


def test_the_readme_lists_the_system_packages_the_probe_names():
    from passivefit.gui.platform import XCB_PACKAGES

    readme = (REPO / "README.md").read_text(encoding="utf-8")
    setup = readme[readme.index("## Set-up"):readme.index("## Cautions")]
    for package in XCB_PACKAGES.values():
        assert package in setup, package


def test_a_snapshot_leaves_the_users_settings_alone(recording, tmp_path):
    home = tmp_path / "home"
    home.mkdir()
    out = tmp_path / "shot.png"
    run = subprocess.run([sys.executable, "-m", "passivefit.cli", "gui", str(recording),
                          "--snapshot", str(out)],
                         env=_clean_env(HOME=str(home), XDG_CONFIG_HOME=str(home / ".config")),
                         capture_output=True, text=True, timeout=180)
    assert run.returncode == 0, run.stderr
    assert out.exists()
    written = [p for p in home.rglob("*") if p.is_file()]
    assert written == [], written


# ----------------------------------------------------------------------------- windows
def _drag(plot_widget, x0_data: float, x1_data: float, y_frac: float = 0.5) -> None:
    """A real left-button drag on a plot from x0 to x1 (data coordinates)."""
    from PySide6 import QtCore, QtGui, QtWidgets

    vb = plot_widget.getPlotItem().getViewBox()
    y_lo, y_hi = vb.viewRange()[1]
    y = y_lo + y_frac * (y_hi - y_lo)

    def at(x):
        scene = vb.mapViewToScene(QtCore.QPointF(x, y))
        return QtCore.QPointF(plot_widget.mapFromScene(scene))

    viewport = plot_widget.viewport()
    Q = QtCore.QEvent.Type
    left, none = QtCore.Qt.MouseButton.LeftButton, QtCore.Qt.MouseButton.NoButton
    mods = QtCore.Qt.KeyboardModifier.NoModifier

    def send(kind, pos, button, buttons):
        event = QtGui.QMouseEvent(kind, pos, viewport.mapToGlobal(pos), button, buttons, mods)
        QtWidgets.QApplication.sendEvent(viewport, event)

    start, end = at(x0_data), at(x1_data)
    send(Q.MouseMove, start, none, none)          # hover first: pyqtgraph picks the item
    QtWidgets.QApplication.processEvents()
    send(Q.MouseButtonPress, start, left, left)
    for k in range(1, 11):
        time.sleep(0.04)      # pyqtgraph drops mouse moves that come faster than its rate
        send(Q.MouseMove, start + (end - start) * (k / 10), none, left)
    send(Q.MouseButtonRelease, end, left, none)
    QtWidgets.QApplication.processEvents()


def test_dragging_inside_the_steady_window_moves_it_not_the_fit_window(
        qtbot, open_window, recording):
    window = open_window(recording)
    state = window.state
    onset_ms = state.steps[state.current].onset_s * 1e3
    steady0, fit0 = state.window_ms("steady"), state.window_ms("fit")
    assert fit0[0] < steady0[0] < steady0[1] <= fit0[1] + 1e-6   # steady lies on the fit
    middle = onset_ms + (steady0[0] + steady0[1]) / 2
    _drag(window.trace.plot, middle, middle - 30.0)
    wait_idle(qtbot, window)
    steady1, fit1 = state.window_ms("steady"), state.window_ms("fit")
    assert steady1[0] == pytest.approx(steady0[0] - 30.0, abs=2.0)
    assert fit1 == pytest.approx(fit0, abs=1e-6)
    # and the fit window is still grabbable where it is alone
    _drag(window.trace.plot, onset_ms + fit0[0] + 10.0, onset_ms + fit0[0] + 40.0)
    wait_idle(qtbot, window)
    assert state.window_ms("fit")[0] == pytest.approx(fit0[0] + 30.0, abs=2.0)


def test_the_fit_start_stops_at_the_artefacts_end(qtbot, open_window, recording):
    window = open_window(recording)
    state = window.state
    floor = state.fit_start_floor_ms()
    assert floor > 0.0
    state.set_window("fit", (0.0, 150.0))                 # typed or dragged to the edge
    assert state.window_ms("fit")[0] == pytest.approx(floor, abs=0.11)   # one sample
    onset_ms = state.steps[state.current].onset_s * 1e3
    region = window.trace.regions["fit"]
    assert region.lines[0].maxRange[0] == pytest.approx(onset_ms + floor)
    wait_idle(qtbot, window)
    assert state.result.settings.windows.fit_ms[0] > 0.0
    assert not [f for f in state.result.flags if "`" in f.message]


def test_a_numerics_message_quoting_code_is_shown_in_words(qtbot):
    from types import SimpleNamespace

    from passivefit.gui.panels import NotesPanel
    from passivefit.model import schema as S

    panel = NotesPanel()
    qtbot.addWidget(panel)
    flag = S.CABLE_FIT_FAILED.make(reason="failed", problem="segment 0: the first sample "
                                   "(0.0 ms) is not after the edge plus `delay_s`")
    panel.show_result(SimpleNamespace(flags=[flag]))
    text = panel.text.text()
    assert "ball-and-stick fit failed" in text
    assert "`" not in text and "delay_s" not in text


def test_this_sweep_only_stays_out_of_the_cell_and_the_row_shows_it(
        qtbot, open_window, recording):
    window = open_window(recording)
    state = window.state
    cell_before = state.result.cell.to_dict()
    window.windows_bar.only_this.setChecked(True)
    state.go_to(0)
    state.set_window("fit", (6.0, 120.0), this_sweep_only=True)
    wait_idle(qtbot, window)
    cell = state.result.cell.to_dict()
    assert state.settings.windows.fit_ms is None
    assert cell["fit_start_ms"] == pytest.approx(cell_before["fit_start_ms"])
    own, plain = window.table.item(0, 0), window.table.item(1, 0)
    assert own.text().startswith("◆") and not plain.text().startswith("◆")
    assert own.background().color() != plain.background().color()
    assert "own windows" in window.sweep_line.text()


# ----------------------------------------------------------------------------- the step
def test_a_typed_step_is_saved_at_once_restored_and_shown(qtbot, open_window, tmp_path):
    from passivefit.io.recording import StepSpec

    path = Path(shutil.copy(CA3_NO_COMMAND, tmp_path / CA3_NO_COMMAND.name))
    step = StepSpec(0.1, 0.3, -40e-12, 0.0)
    window = open_window(path, Settings(bootstrap=0, step=step))
    review = Path(window.state.review_file)
    assert review.exists()                        # saved before any other change
    assert json.loads(review.read_text())["settings"]["step"]["amplitude_A"] == -40e-12
    assert "step typed: -40 pA" in window.header.meta.text()
    window.close()

    again = open_window(path, SETTINGS)           # no step given this time: not asked again
    assert again.state.restored and again.state.settings.step == step
    assert again.set_step(StepSpec(0.1, 0.3, -30e-12, 0.0))
    assert "step typed: -30 pA" in again.header.meta.text()
    saved = json.loads(review.read_text())["settings"]["step"]
    assert saved["amplitude_A"] == pytest.approx(-30e-12)
    wait_idle(qtbot, again)
    assert again.state.result.sweeps[0].step.amplitude_A == pytest.approx(-30e-12)
    again.undo()                                   # the step goes back with its sweeps
    assert again.state.settings.step == step
    assert again.state.steps[0].amplitude_A == pytest.approx(-40e-12)
    assert "step typed: -40 pA" in again.header.meta.text()
    wait_idle(qtbot, again)


def test_a_step_given_in_the_dialog_is_saved_before_any_other_change(qtbot, tmp_path):
    from PySide6 import QtCore

    from passivefit.gui.window import ReviewWindow
    from passivefit.io.recording import StepSpec

    path = Path(shutil.copy(CA3_NO_COMMAND, tmp_path / CA3_NO_COMMAND.name))
    store = QtCore.QSettings(str(tmp_path / "gui.ini"), QtCore.QSettings.Format.IniFormat)
    window = ReviewWindow(SETTINGS, store=store, interactive=True)
    qtbot.addWidget(window)
    asked = []
    window._ask_step = lambda recording, step: asked.append(step) or StepSpec(
        0.1, 0.3, -40e-12, 0.0)
    assert window.open_paths([path])
    assert asked == [None]
    review = Path(window.state.review_file)
    assert review.exists()
    assert json.loads(review.read_text())["settings"]["step"]["amplitude_A"] == -40e-12
    wait_idle(qtbot, window)


def test_the_step_dialog_draws_the_step_it_will_return(qtbot, recording):
    import numpy as np

    from passivefit.gui.dialogs import StepDialog
    from passivefit.io import load
    from passivefit.io.recording import StepSpec

    rec = load(recording)
    dialog = StepDialog(rec, StepSpec(0.05, 0.2, -50e-12, 10e-12))
    qtbot.addWidget(dialog)
    assert dialog.span.getRegion() == pytest.approx((50.0, 250.0))
    dialog.boxes["amplitude"].setValue(-20.0)
    dialog.boxes["onset"].setValue(60.0)
    assert dialog.span.getRegion() == pytest.approx((60.0, 260.0))
    _x, y = dialog._curves[2].getData()
    assert np.min(y) == pytest.approx(-20.0 + 2 * 10.0)      # third sweep: two increments
    dialog.span.setRegion((70.0, 170.0))                       # dragging the shading
    assert dialog.step() == StepSpec(0.07, 0.1, -20e-12, 10e-12)
    dialog.boxes["duration"].setValue(5000.0)                  # beyond the 0.4 s sweeps
    ok = dialog.buttons.button(dialog.buttons.StandardButton.Ok)
    assert not ok.isEnabled() and "after the sweeps end" in dialog.problem.text()


def test_the_step_dialog_is_reachable_from_a_menu(qtbot, open_window, recording):
    window = open_window(recording)
    texts = [a.text() for menu in window.menuBar().findChildren(type(window.recent_menu))
             for a in menu.actions()]
    assert "Set the step…" in texts


# ----------------------------------------------------------------------------- database
def test_ctrl_d_fills_empty_metadata_and_keeps_curated_values(qtbot, open_window, recording,
                                                              tmp_path):
    from passivefit.store.database import open_database

    window = open_window(recording)
    db = str(tmp_path / "cells.sqlite")
    database = open_database(db, create=True)
    try:                                        # batch with a metadata sheet, earlier
        database.store(window.current_result().to_dict(),
                       cell_metadata={"cell_id": "LOL-2026-12-01-c9", "region": "DG"})
    finally:
        database.close()
    window._cell_metadata = lambda: {"cell_id": "LOL-2026-12-01-c9",
                                     "region": "dentate gyrus", "cell_type": "granule"}
    window.decide(False, "noisy baseline")      # a new analysis, stored as a new revision
    assert window.add_to_database(db) == "stored"
    database = open_database(db, create=False)
    try:
        (current,) = database.current_analyses()
    finally:
        database.close()
    assert current.cell["region"] == "DG"
    assert current.cell["cell_type"] == "granule"


def test_a_database_that_cannot_be_written_is_said_in_words(qtbot, open_window, recording,
                                                            tmp_path, capfd):
    window = open_window(recording)
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    window.store.setValue("database", str(blocker / "cells.sqlite"))
    window._ask_database()
    assert window.last_error.startswith("the cell could not be added to")
    assert window.statusBar().currentMessage() == window.last_error
    assert "Traceback" not in capfd.readouterr().err


def test_a_review_that_cannot_be_saved_is_said_in_words(qtbot, open_window, recording,
                                                        monkeypatch, capfd):
    import passivefit.gui.state as state_module

    window = open_window(recording)

    def full_disk(path, document):
        raise OSError(errno.ENOSPC, "No space left on device", str(path))

    monkeypatch.setattr(state_module, "write_review", full_disk)
    window.decide(False, "noisy baseline")
    assert window.banner.isVisible()
    assert "could not be saved" in window.banner.text()
    assert "No space left on device" in window.banner.text()
    assert window.state.settings.decision_for(0) == (False, "noisy baseline")   # kept
    wait_idle(qtbot, window)
    monkeypatch.undo()
    window.state.go_to(0)
    window.decide(None)
    assert not window.banner.isVisible()       # saved again: the warning goes
    assert "Traceback" not in capfd.readouterr().err


def test_a_review_folder_that_is_not_writable_is_said_in_words(qtbot, make_window, recording,
                                                               tmp_path):
    from passivefit.gui.state import ReviewState

    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    window = make_window()
    state = ReviewState.open(recording, SETTINGS, review_file=blocker / "r.json")
    window.paths, window.position = [recording], 0
    window._attach(state)
    wait_idle(qtbot, window)
    window.decide(False, "drift")
    assert window.banner.isVisible() and "could not be saved" in window.banner.text()


# ----------------------------------------------------------------------------- 1280 × 800
def test_the_window_fits_1280_by_800_without_cut_labels(qtbot, open_window, recording):
    from PySide6 import QtWidgets

    window = open_window(recording, size=(1280, 800))
    assert window.minimumSizeHint().width() <= 1280
    assert window.width() <= 1280
    QtWidgets.QApplication.processEvents()
    cut = []
    for label in window.findChildren(QtWidgets.QLabel):
        if not label.isVisible() or not label.text():
            continue
        if label.wordWrap():
            if label.height() < label.heightForWidth(label.width()):
                cut.append(label.text())
        elif label.sizePolicy().horizontalPolicy() != QtWidgets.QSizePolicy.Policy.Ignored:
            if label.width() < label.minimumSizeHint().width():
                cut.append(label.text())
    assert cut == []
    assert window.windows_bar.lead.width() >= window.windows_bar.lead.sizeHint().width()
    header = window.header
    chip = header.verdict.geometry()
    meta = header.meta.geometry()
    assert not chip.intersects(meta)                     # the chip never hides the subtitle
    vi = window.vi.plot
    title = vi.getPlotItem().titleLabel
    assert "r²" in title.text
    assert title.item.boundingRect().width() <= vi.width()


# ----------------------------------------------------------------------------- first analysis
def test_while_the_first_analysis_runs_nothing_is_cut_or_wrong(qtbot, make_window, recording):
    window = make_window(size=(1280, 800))
    assert window.open_paths([recording])
    # the analysis runs in the worker; its result cannot arrive before events are processed
    assert window.state.result is None
    line = window.sweep_line.text()
    assert "not analysed" not in line and "fitted" in line
    assert window.table.item(0, 4).text() != "—"        # row 0 has its own fit's values
    for plot in (window.semilog.plot, window.vi.plot, window.scan.tau0, window.scan.tau1):
        texts = _note_texts(plot)
        assert texts == ["analysing…"], texts
    wait_idle(qtbot, window)
    assert _note_texts(window.vi.plot) == []              # a step recording has a V–I line


def test_notes_fit_inside_a_narrow_plot(qtbot):
    from passivefit.gui.plots import SemilogView

    view = SemilogView()
    qtbot.addWidget(view)
    view.resize(220, 220)
    view.show()
    from types import SimpleNamespace

    view.show_result(SimpleNamespace(peel=None))
    (text,) = _note_texts(view.plot)
    assert "peeled" in text
    item = next(i for i in view.plot.getPlotItem().items if hasattr(i, "textItem"))
    assert item.textItem.boundingRect().width() <= view.plot.width()


# ----------------------------------------------------------------------------- words & colours
def test_amplitudes_bridge_decimals_and_rejected_colour(qtbot, open_window, recording):
    from PySide6 import QtGui, QtWidgets

    from passivefit.gui import theme
    from passivefit.gui.panels import bridge_applied

    window = open_window(recording, Settings(bootstrap=0, correct_bridge=False))
    labels = [w.text() for w in window.cell.findChildren(QtWidgets.QLabel)]
    assert "C0 amplitude" in labels and "C1 amplitude" in labels
    assert "C0" not in labels and "C1" not in labels
    result = window.state.result
    assert not bridge_applied(result)
    if result.cell.values.get("bridge_MOhm") is not None:
        assert "font-weight: 400" in window.cell.values["bridge_MOhm"].styleSheet()
    table = window.table
    for col in range(1, table.columnCount() - 1):
        decimals = {len(t.split(".")[1]) if "." in t else 0
                    for t in (table.item(r, col).text() for r in range(table.rowCount()))
                    if t != "—"}
        assert len(decimals) <= 1, (col, decimals)
    window.decide(False, "noisy baseline")
    pen = window.trace._faint[0].opts["pen"]
    rejected, fit = pen.color(), QtGui.QColor(theme.TERRACOTTA)
    assert abs(rejected.hue() - fit.hue()) > 60
    wait_idle(qtbot, window)


def test_right_arrow_after_typing_in_a_window_box_goes_to_the_next_sweep(
        qtbot, open_window, recording):
    from PySide6.QtCore import Qt

    window = open_window(recording)
    window.activateWindow()
    box = window.windows_bar.boxes["fit"][0]
    box.setFocus()
    box.selectAll()
    qtbot.keyClicks(box, "6")
    qtbot.keyClick(box, Qt.Key.Key_Return)
    assert window.state.window_ms("fit", 0)[0] == pytest.approx(6.0)
    assert not box.hasFocus()
    qtbot.keyClick(window, Qt.Key.Key_Right)
    assert window.state.current == 1
    box.setFocus()
    box.selectAll()
    qtbot.keyClicks(box, "7")
    qtbot.keyClick(box, Qt.Key.Key_Right)                 # → at the end of the text
    assert window.state.current == 2
    assert window.state.settings.windows.fit_ms[0] == pytest.approx(7.0)
    wait_idle(qtbot, window)


# ----------------------------------------------------------------------------- settings panel
def test_the_settings_panel_changes_the_analysis_and_is_saved(qtbot, open_window, recording):
    from PySide6.QtCore import Qt

    window = open_window(recording)
    panel = window.settings_panel
    window.activateWindow()
    qtbot.keyClick(window, Qt.Key.Key_S)
    assert window.tabs.currentWidget() is panel
    panel.components.setCurrentText("1")
    panel.bootstrap.setValue(5)
    panel.area.setValue(20000.0)
    panel.filter.setValue(3000.0)
    panel.bridge.setChecked(False)
    panel.hum.setChecked(False)
    s = window.state.settings
    assert (s.components, s.bootstrap, s.area_um2, s.filter_hz, s.correct_bridge,
            s.remove_hum) == ("1", 5, 20000.0, 3000.0, False, False)
    saved = json.loads(Path(window.state.review_file).read_text())["settings"]
    assert (saved["components"], saved["bootstrap"], saved["area_um2"]) == ("1", 5, 20000.0)
    wait_idle(qtbot, window)
    cell = window.state.result.cell.to_dict()
    assert cell["n_components"] == 1 and cell.get("cm_uF_per_cm2") is not None
    window.undo()
    assert window.state.settings.remove_hum and panel.hum.isChecked()
    window.undo()
    assert window.state.settings.correct_bridge and panel.bridge.isChecked()
    window.close()
    again = open_window(recording)
    assert again.settings_panel.components.currentText() == "1"
    assert again.settings_panel.area.value() == pytest.approx(20000.0)


def test_before_a_recording_opens_no_window_is_drawn(qtbot, make_window):
    window = make_window()
    assert not any(r.isVisible() for r in window.trace.regions.values())
    assert not any(box.isEnabled() for pair in window.windows_bar.boxes.values()
                   for box in pair)


def test_the_time_course_tab_shows_every_measured_sweep(qtbot, open_window, recording):
    """Issue: per-sweep R_in, τ0 and V_rest against sweep, in the window as in the PDF."""
    import pyqtgraph as pg

    window = open_window(recording)
    window.tabs.setCurrentWidget(window.time_course)
    sweeps = [s.to_dict() for s in window.current_result().sweeps]
    for plot, q in zip(window.time_course.plots, window.time_course.QUANTITIES, strict=True):
        items = [i for i in plot.getPlotItem().listDataItems() if isinstance(i, pg.PlotDataItem)]
        shown = sum(len(i.getData()[0]) for i in items)
        assert shown == sum(1 for s in sweeps if s.get(q.key) is not None) >= 2


def test_the_vi_panel_counts_the_steps_it_draws_through_the_origin(qtbot, open_window):
    """190619B (real): two step amplitudes, too few for a V–I slope: the panel's line is
    ΔV/ΔI through the origin, and its title says two steps (it had said "one step")."""
    from real_reference import DATA_DIR

    window = open_window(DATA_DIR / "190619B_0003.abf")
    assert window.vi.plot.getPlotItem().titleLabel.text.startswith("2 steps · ΔV/ΔI")
