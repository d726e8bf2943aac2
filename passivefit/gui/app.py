"""Start the review window: a QApplication, the window, and the snapshot mode."""

from __future__ import annotations

import sys
from pathlib import Path

from PySide6 import QtCore, QtGui, QtWidgets

from passivefit.model.errors import InputError

SNAPSHOT_SIZE = (1400, 900)
QUIET_MESSAGES = ("This plugin does not support propagateSizeHints()",)


def _qt_messages(mode, context, message: str) -> None:
    """Qt's own messages on stderr, without the offscreen plugin's harmless chatter."""
    if not message.startswith(QUIET_MESSAGES):
        print(message, file=sys.stderr)


class _Probe(QtCore.QObject):
    ping = QtCore.Signal()


def guard_bool_refcounts() -> bool:
    """Keep a known PySide6 bug from aborting the process; True when it was found.

    PySide6-Essentials 6.12.0 on Python 3.11 drops one reference to ``True`` on every
    signal emission; after a few thousand signals Python aborts ("bool_dealloc").
    Python 3.12 made True and False immortal; here we do the same by giving them a
    huge reference count, and say which PySide6 to install.
    """
    if sys.version_info >= (3, 12):
        return False
    probe = _Probe()
    before = sys.getrefcount(True)
    for _ in range(16):
        probe.ping.emit()
    if sys.getrefcount(True) >= before:
        return False
    import ctypes

    import PySide6

    for flag in (True, False):
        ctypes.c_ssize_t.from_address(id(flag)).value += 1 << 40
    print(f"passivefit: PySide6 {PySide6.__version__} loses references on every signal "
          "(worked around); install PySide6-Essentials 6.11 for a clean fix", file=sys.stderr)
    return True


def make_app() -> QtWidgets.QApplication:
    """The running QApplication, or a new one with our names and plot defaults."""
    import pyqtgraph as pg

    from passivefit.gui import theme
    from passivefit.resources import resource_path

    QtCore.qInstallMessageHandler(_qt_messages)
    guard_bool_refcounts()
    app = QtWidgets.QApplication.instance() or QtWidgets.QApplication(sys.argv[:1])
    app.setApplicationName("passivefit")
    app.setOrganizationName("passivefit")
    app.setWindowIcon(QtGui.QIcon(str(resource_path("icon.svg"))))  # resources/icon.svg
    pg.setConfigOptions(antialias=True, background=theme.CARD, foreground=theme.INK)
    return app


class WindowError(InputError):
    """The window could not show what it was asked to (the message says why)."""


def run_window(paths, settings, snapshot: str | Path | None = None) -> int:
    """Open the window on `paths`; with `snapshot`, analyse, render a PNG and return.

    Returns Qt's exit status; raises `WindowError` when the first recording cannot be
    opened in snapshot mode.
    """
    from passivefit.gui.window import ReviewWindow

    app = make_app()
    if snapshot is None:
        window = ReviewWindow(settings)
        window.show()
        window.open_paths(paths)
        status = app.exec()
    else:
        window = ReviewWindow(settings, interactive=False, synchronous=True, autosave=False,
                              remember=False)
        window.resize(*SNAPSHOT_SIZE)
        status = 0
        if window.open_paths(paths):
            window.show()
            app.processEvents()
            window.snapshot(snapshot)
        else:
            _dispose(app, window)
            raise WindowError(window.last_error)
    _dispose(app, window)
    return status


def run_watch_window(folder, settings, *, settle_s: float, include_existing: bool = False,
                     database: str | None = None) -> int:
    """Open the window and watch `folder` (``passivefit watch`` without ``--no-window``).

    Ctrl-C in the terminal closes the window cleanly. Raises `WindowError` when the
    folder cannot be watched.
    """
    import signal

    from passivefit.gui.window import ReviewWindow

    app = make_app()
    window = ReviewWindow(settings)
    if not _start_watch(window, folder, settle_s, include_existing, database):
        _dispose(app, window)
        raise WindowError(window.last_error)
    window.show()
    previous = signal.signal(signal.SIGINT, lambda *_: app.quit())
    wake = QtCore.QTimer()      # lets Python see Ctrl-C while Qt's loop runs
    wake.timeout.connect(lambda: None)
    wake.start(200)
    try:
        status = app.exec()
    finally:
        wake.stop()
        signal.signal(signal.SIGINT, previous)
        _dispose(app, window)
    return status


def _start_watch(window, folder, settle_s: float, include_existing: bool,
                 database: str | None) -> bool:
    interactive, window.interactive = window.interactive, False   # no dialog before show
    try:
        return window.watch_folder(folder, settle_s=settle_s, include_existing=include_existing,
                                   database=database)
    finally:
        window.interactive = interactive


def _dispose(app: QtWidgets.QApplication, window: QtWidgets.QWidget) -> None:
    """Close and delete the window before Python exits.

    Left to the interpreter's final garbage collection, the window's plots are freed
    after parts of Qt and the process aborts.
    """
    import gc

    window.close()
    window.deleteLater()
    app.sendPostedEvents(None, QtCore.QEvent.Type.DeferredDelete)
    del window
    gc.collect()
