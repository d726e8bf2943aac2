"""File ▸ Watch folder…: open each recording the acquisition program finishes, analyse it
and show its cell card (a mixin of ReviewWindow).

The same :class:`~passivefit.watch.FolderWatcher` as ``passivefit watch`` is polled from
a QTimer in the UI thread (no thread touches Qt). Finished recordings wait in a queue,
newest first; the next one is opened when the window is idle (the previous analysis has
ended), so a burst of files is shown one after the other and the newest comes first.
With a database, each analysed recording is added to it as ``Add cell to database``
does.
"""

from __future__ import annotations

from pathlib import Path

from PySide6 import QtCore, QtWidgets

from passivefit.watch import POLL_S, SETTLE_S, FolderWatcher, Unreadable, WatchError


class WatchActions:
    """Watch a folder from the window."""

    watcher: FolderWatcher | None = None

    def watch_folder(self, folder, *, settle_s: float = SETTLE_S, include_existing: bool = False,
                     database: str | None = None, interval_s: float = POLL_S) -> bool:
        """Start watching `folder` (replacing any folder watched before); False (said in
        the window) when it cannot be watched."""
        self.stop_watching()
        try:
            self.watcher = FolderWatcher(folder, settle_s=settle_s,
                                         include_existing=include_existing)
        except WatchError as exc:
            self._problem(str(exc))
            return False
        self._watch_queue: list = []
        self._watch_database = database
        self._watch_to_file: Path | None = None
        self.watch_timer = QtCore.QTimer(self)
        self.watch_timer.setInterval(int(interval_s * 1000))
        self.watch_timer.timeout.connect(self._poll_watch)
        self.watch_timer.start()
        self.watch_label.setText(f"watching {Path(folder).name}")
        self.watch_label.setToolTip(str(Path(folder).resolve()))
        self.statusBar().showMessage(f"watching {folder} for new recordings", 6000)
        return True

    def stop_watching(self) -> None:
        """Stop watching (recordings already opened stay open)."""
        timer = getattr(self, "watch_timer", None)
        if timer is not None:
            timer.stop()
            timer.deleteLater()
            self.watch_timer = None
        self.watcher = None
        if hasattr(self, "watch_label"):
            self.watch_label.setText("")

    @property
    def watching(self) -> bool:
        return self.watcher is not None

    def _poll_watch(self) -> None:
        if self.watcher is None or getattr(self, "_watch_polling", False):
            return      # a dialog opened from here runs its own loop: no second poll inside
        self._watch_polling = True
        try:
            self._poll_watch_once()
        finally:
            self._watch_polling = False

    def _poll_watch_once(self) -> None:
        try:
            found = self.watcher.poll()
        except WatchError as exc:
            self.stop_watching()
            self._note("open", f"stopped watching: {exc}")
            return
        for item in found:
            if isinstance(item, Unreadable):
                self.statusBar().showMessage(f"{item.path.name}: {item.reason}", 15000)
            else:
                self._watch_queue.append(item)
        self._watch_queue.sort(key=lambda f: f.mtime_s, reverse=True)
        if not self.idle:
            return
        if self._watch_to_file is not None:
            self._file_watched()
        if self._watch_queue:
            self._open_watched(self._watch_queue.pop(0))

    def _open_watched(self, finished) -> None:
        path = finished.path
        if path not in self.paths:
            self.paths.append(path)
        if self.open_position(self.paths.index(path)):
            self._watch_to_file = path if self._watch_database else None
            self.statusBar().showMessage(f"new recording: {path.name}", 6000)

    def _file_watched(self) -> None:
        """Add the analysed watched recording to the database (once)."""
        path, self._watch_to_file = self._watch_to_file, None
        if self.state is None or Path(self.state.recording.path).resolve() != path.resolve():
            return
        if self.state.result is None or not self.state.up_to_date:
            return
        from passivefit.gui.outputs import database_problem

        try:
            self.add_to_database(self._watch_database)
        except Exception as exc:  # noqa: BLE001 - a store that fails must not end the watch
            self._note("open", database_problem(self._watch_database, exc))

    def _ask_watch_folder(self) -> None:
        if self.watching:
            answer = QtWidgets.QMessageBox.question(
                self, "passivefit", f"Stop watching {self.watcher.folder}?")
            if answer == QtWidgets.QMessageBox.StandardButton.Yes:
                self.stop_watching()
            return
        folder = QtWidgets.QFileDialog.getExistingDirectory(
            self, "Watch a folder for new recordings", self._last_folder())
        if folder:
            self.watch_folder(folder)
