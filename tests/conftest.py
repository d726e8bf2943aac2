"""Shared test set-up: Qt renders offscreen, so GUI tests need no display."""

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

from pathlib import Path  # noqa: E402

import pytest  # noqa: E402


@pytest.fixture(scope="session")
def recording_file(tmp_path_factory) -> Path:
    """A simulated ball-and-stick cell (τm 20 ms, L 1, ρ 3) written as a CSV recording
    (the window's tests open copies of it)."""
    from passivefit.io import save
    from passivefit.simulate import BallStick, StepProtocol, simulate_recording

    cell = BallStick.from_electrotonic(20e-3, 1.0, 3.0, 150e6)
    recording, _truth = simulate_recording(
        cell, protocol=StepProtocol(0.05, 0.2, (-50e-12, -30e-12, -10e-12, 10e-12)),
        sample_rate_hz=10_000, filter_hz=2_000, sweep_duration_s=0.4, n_sweeps=8, seed=7,
        cell_id="LOL-2026-12-01-c9")
    return save(recording, tmp_path_factory.mktemp("rec") / "LOL-2026-12-01-c9.csv")


@pytest.fixture(autouse=True)
def _qt_garbage_freed_in_the_gui_thread():
    """After a test that used Qt, its closed windows are deleted and their Python
    garbage collected here, in the GUI thread: left for later, a collection triggered in
    the next test's analysis thread would free Qt objects there and can deadlock."""
    yield
    import sys

    if "PySide6" in sys.modules:
        import gc

        from PySide6 import QtCore, QtWidgets

        app = QtWidgets.QApplication.instance()
        if app is not None:
            app.sendPostedEvents(None, QtCore.QEvent.Type.DeferredDelete)
        gc.collect()


@pytest.fixture
def make_window(qtbot, tmp_path):
    """A ReviewWindow (not yet open on anything) with a private settings store."""
    from PySide6 import QtCore

    from passivefit.gui.window import ReviewWindow
    from passivefit.model.settings import Settings

    store = QtCore.QSettings(str(tmp_path / "gui.ini"), QtCore.QSettings.Format.IniFormat)

    def make(settings=None, size=(1400, 900), *, interactive: bool = False):
        window = ReviewWindow(settings or Settings(bootstrap=0), store=store,
                              interactive=interactive)
        qtbot.addWidget(window)
        window.resize(*size)
        window.show()
        return window

    return make


@pytest.fixture
def open_window(qtbot, make_window):
    """Open a ReviewWindow on a path and wait for its cell analysis."""
    def make(path: Path, settings=None, size=(1400, 900)):
        window = make_window(settings, size)
        assert window.open_paths([path]), window.last_error
        qtbot.waitUntil(lambda: window.idle, timeout=30_000)
        return window

    return make
