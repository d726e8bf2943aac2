"""How recordings reach the review window: open dialogs, folders, recent files and
drag-and-drop (a mixin of ReviewWindow)."""

from __future__ import annotations

from pathlib import Path

from PySide6 import QtGui, QtWidgets

MAX_RECENT = 10


class FileActions:
    """Open dialogs, recent files and dropped files of the review window."""

    def _ask_open(self) -> None:
        from passivefit.io import supported_extensions

        pattern = " ".join(f"*{e}" for e in supported_extensions())
        files, _ = QtWidgets.QFileDialog.getOpenFileNames(
            self, "Open recordings", self._last_folder(), f"Recordings ({pattern})")
        if files:
            self.open_paths(files)

    def _ask_open_folder(self) -> None:
        folder = QtWidgets.QFileDialog.getExistingDirectory(self, "Open a folder of recordings",
                                                            self._last_folder())
        if folder:
            self.open_paths([folder])

    def _remember(self, path: Path) -> None:
        if not self.remember:
            return
        recent = [str(Path(path).resolve())]
        recent += [p for p in self.recent_files() if p != recent[0]]
        self.store.setValue("recent", recent[:MAX_RECENT])

    def recent_files(self) -> list[str]:
        value = self.store.value("recent", [])
        return [value] if isinstance(value, str) else list(value or [])

    def _fill_recent(self) -> None:
        self.recent_menu.clear()
        for path in self.recent_files():
            action = self.recent_menu.addAction(path)
            action.triggered.connect(lambda _=False, p=path: self.open_paths([p]))
        if not self.recent_menu.actions():
            self.recent_menu.addAction("(none yet)").setEnabled(False)

    def _last_folder(self) -> str:
        recent = self.recent_files()
        return str(Path(recent[0]).parent) if recent else str(Path.home())

    # ------------------------------------------------------------------ Qt events
    def dragEnterEvent(self, event: QtGui.QDragEnterEvent) -> None:  # noqa: N802 (Qt name)
        if event.mimeData().hasUrls():
            event.acceptProposedAction()

    def dropEvent(self, event: QtGui.QDropEvent) -> None:  # noqa: N802 (Qt name)
        paths = [u.toLocalFile() for u in event.mimeData().urls() if u.isLocalFile()]
        if paths:
            event.acceptProposedAction()
            self.open_paths(paths)
