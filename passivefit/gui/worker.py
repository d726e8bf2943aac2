"""Run the cell analysis off the UI thread (QThreadPool), newest settings first.

One analysis runs at a time. A request that arrives meanwhile waits; when several
arrive, only the newest is run (the others would be thrown away anyway).
"""

from __future__ import annotations

import gc
import threading

from PySide6 import QtCore


def _collect_here() -> None:
    """Free the garbage now, in the GUI thread. Qt objects left in reference cycles (a
    closed window's widgets) must be freed in the thread that owns them: a collection
    that a worker's allocations trigger would free them there, and Qt can deadlock."""
    gc.collect()


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
        _collect_here()
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


class _FolderSignals(QtCore.QObject):
    progress = QtCore.Signal(object)      # batch.ProgressEvent
    done = QtCore.Signal(object, str)     # batch.BatchSummary (None on error), error


class _FolderJob(QtCore.QRunnable):
    def __init__(self, paths, target: str, settings, workers, signals: _FolderSignals,
                 stop: threading.Event) -> None:
        super().__init__()
        self.paths, self.target, self.settings = paths, target, settings
        self.workers, self.signals, self.stop = workers, signals, stop
        self.setAutoDelete(True)

    def run(self) -> None:
        from passivefit.batch import run_batch

        try:
            summary = run_batch(self.paths, self.target, self.settings, workers=self.workers,
                                progress=self.signals.progress.emit, stop=self.stop.is_set)
        except Exception as exc:  # noqa: BLE001 - shown to the person, the window goes on
            self.signals.done.emit(None, str(exc).splitlines()[0] if str(exc)
                                   else type(exc).__name__)
        else:
            self.signals.done.emit(summary, "")


class FolderRunner(QtCore.QObject):
    """Analyses folders of recordings into a cell database (`batch.run_batch`) in a worker
    thread, one folder at a time, and passes on the batch's progress.

    Signals
    -------
    progress(ProgressEvent)   at the start and after every file
    finished(BatchSummary)
    failed(message)           the batch could not run (one line)
    """

    progress = QtCore.Signal(object)
    finished = QtCore.Signal(object)
    failed = QtCore.Signal(str)

    def __init__(self, parent: QtCore.QObject | None = None) -> None:
        super().__init__(parent)
        self.pool = QtCore.QThreadPool(self)
        self.pool.setMaxThreadCount(1)
        self._signals = _FolderSignals()
        self._signals.progress.connect(self.progress)
        self._signals.done.connect(self._done)
        self.busy = False
        self._stop = threading.Event()

    def start(self, paths, target: str, settings, workers: int | None = None) -> bool:
        """Start analysing `paths` into `target`; False when a folder is still running."""
        if self.busy:
            return False
        self.busy = True
        self._stop = threading.Event()
        _collect_here()
        self.pool.start(_FolderJob([str(p) for p in paths], str(target), settings, workers,
                                   self._signals, self._stop))
        return True

    def stop(self) -> None:
        """Stop after the file being stored (the files in progress are abandoned)."""
        self._stop.set()

    @property
    def stopping(self) -> bool:
        """A stop was asked and the folder's analysis has not ended yet."""
        return self.busy and self._stop.is_set()

    def _done(self, summary, error: str) -> None:
        self.busy = False
        if error:
            self.failed.emit(error)
        else:
            self.finished.emit(summary)

    def wait(self, msecs: int = -1) -> bool:
        """Block until the folder's analysis ends (tests, closing)."""
        return self.pool.waitForDone(msecs)
