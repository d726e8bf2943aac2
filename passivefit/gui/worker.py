"""Run the cell analysis off the UI thread (QThreadPool), newest settings first.

One analysis runs at a time. A request that arrives meanwhile waits; when several
arrive, only the newest is run (the others would be thrown away anyway).
"""

from __future__ import annotations

from PySide6 import QtCore


class _Signals(QtCore.QObject):
    done = QtCore.Signal(object, object, object, str)   # owner, settings, result, error


class _Job(QtCore.QRunnable):
    def __init__(self, owner, settings, signals: _Signals) -> None:
        super().__init__()
        self.owner, self.settings, self.signals = owner, settings, signals
        self.setAutoDelete(True)

    def run(self) -> None:
        try:
            result = self.owner.compute(self.settings)
        except Exception as exc:  # noqa: BLE001 - shown to the person, the window goes on
            self.signals.done.emit(self.owner, self.settings, None, f"{type(exc).__name__}: {exc}")
        else:
            self.signals.done.emit(self.owner, self.settings, result, "")


class AnalysisRunner(QtCore.QObject):
    """Analyses a review state's recording in a worker thread.

    Signals
    -------
    finished(owner, result)   a result is ready (the owner decides if it is stale)
    failed(owner, message)    the analysis raised
    busy_changed(bool)
    """

    finished = QtCore.Signal(object, object)
    failed = QtCore.Signal(object, str)
    busy_changed = QtCore.Signal(bool)

    def __init__(self, parent: QtCore.QObject | None = None) -> None:
        super().__init__(parent)
        self.pool = QtCore.QThreadPool(self)
        self.pool.setMaxThreadCount(1)
        self._signals = _Signals()
        self._signals.done.connect(self._done)
        self._running = False
        self._waiting: tuple | None = None

    @property
    def busy(self) -> bool:
        return self._running or self._waiting is not None

    def request(self, owner, settings) -> None:
        """Analyse `owner` (an object with ``compute(settings)``) with `settings`."""
        if self._running:
            self._waiting = (owner, settings)
            return
        self._start(owner, settings)

    def _start(self, owner, settings) -> None:
        self._running = True
        self.busy_changed.emit(True)
        self.pool.start(_Job(owner, settings, self._signals))

    def _done(self, owner, _settings, result, error: str) -> None:
        self._running = False
        if error:
            self.failed.emit(owner, error)
        else:
            self.finished.emit(owner, result)
        if self._waiting is not None:
            waiting, self._waiting = self._waiting, None
            self._start(*waiting)
        else:
            self.busy_changed.emit(False)

    def wait(self, msecs: int = 30_000) -> bool:
        """Block until the running analysis ends (for closing the window)."""
        self._waiting = None
        return self.pool.waitForDone(msecs)
