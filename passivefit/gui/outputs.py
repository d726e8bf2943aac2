"""What the review window writes: parameter sheets, PDF reports, the cell database and
the review file elsewhere, and their failures in words (a mixin of ReviewWindow)."""

from __future__ import annotations

from pathlib import Path

from PySide6 import QtCore, QtWidgets

from passivefit.model import schema as S

Qt = QtCore.Qt
SHEET_FILTER = "Excel workbook (*.xlsx);;CSV tables (*.csv);;JSON (*.json)"


def write_problem(path, exc: Exception) -> str:
    """A failed write in words: where, and what the system said."""
    if isinstance(exc, OSError):
        return f"could not write {exc.filename or path}: {exc.strerror or exc}"
    return str(exc)


def database_problem(target: str, exc: Exception) -> str:
    """A failed database write in words (read-only folder, full disk, locked, refused);
    a password in the address is never shown."""
    from passivefit.store.database import display_url

    target = display_url(target)
    if isinstance(exc, OSError):
        return f"the cell could not be added to {target}: {exc.strerror or exc}"
    text = str(getattr(exc, "orig", None) or exc).strip().splitlines()
    return f"the cell could not be added to {target}: {text[0] if text else type(exc).__name__}"


def stored_cell(database, cell_id) -> dict:
    """The metadata a database holds for `cell_id` (empty when it has no such cell)."""
    if not cell_id:
        return {}
    from passivefit.store.models import CellRow

    found = database.current_analyses([CellRow.cell_id == str(cell_id)])
    return dict(found[0].cell) if found else {}


def unset_only(metadata: dict, stored: dict) -> dict:
    """`metadata` without the fields the database already holds a value for.

    Curated metadata (e.g. region "DG" from a metadata sheet) is never replaced by what
    a file header says ("dentate gyrus"); only empty fields are filled. The cell id is
    kept: it names the cell.
    """
    return {k: v for k, v in metadata.items()
            if k == "cell_id" or stored.get(k) in (None, "")}


class OutputActions:
    """Sheets, reports, database and "save review as" of the window on screen."""

    def export_sheet(self, path: str | Path) -> list[Path]:
        """Write the cell and its sweeps to a CSV, XLSX or JSON parameter sheet."""
        from passivefit.export.sheets import write_sheet

        result = self.current_result()
        written = write_sheet([result.to_dict()], path, annotations=[self._annotations()])
        self.statusBar().showMessage("wrote " + ", ".join(p.name for p in written), 6000)
        return written

    def export_report(self, path: str | Path) -> Path:
        """Write the per-cell PDF report (figures, values, flags, provenance, cautions)."""
        from passivefit.export.report import write_report

        result = self.current_result()
        QtWidgets.QApplication.setOverrideCursor(Qt.CursorShape.WaitCursor)
        try:
            written = write_report([(self.state.recording, result)], path)
        finally:
            QtWidgets.QApplication.restoreOverrideCursor()
        self.statusBar().showMessage(f"wrote {written.name}", 6000)
        return written

    def add_to_database(self, target: str) -> str:
        """Store the reviewed analysis in a cell database (SQLite path or URL)."""
        from passivefit.store.database import display_url, open_database

        result = self.current_result().to_dict()
        database = open_database(target, create=True)
        try:
            metadata = self._cell_metadata()
            metadata = unset_only(metadata, stored_cell(database, metadata.get("cell_id")))
            outcome = database.store(result, cell_metadata=metadata)
        finally:
            database.close()
        shown = display_url(target)
        message = (f"stored in {shown} (analysis {outcome.analysis_id}, revision "
                   f"{outcome.revision})" if outcome.status == "stored" else
                   f"already in {shown} with these settings (analysis {outcome.analysis_id})")
        self.statusBar().showMessage(message, 8000)
        return outcome.status

    def _cell_metadata(self) -> dict:
        md = self.state.recording.metadata or {}
        return {k: md[k] for k in S.METADATA_KEYS if isinstance(md.get(k), str | int | float)}

    def _annotations(self) -> dict:
        return {**self._cell_metadata(), "review_file": str(self.state.review_file)}

    def save_review_as(self, path: str | Path) -> bool:
        """Write the review to `path` and keep saving there; False (said) when it cannot."""
        if self.state is None:
            return False
        try:
            written = self.state.save_as(path)
        except OSError as exc:
            self._problem(write_problem(path, exc))
            return False
        self.statusBar().showMessage(f"review saved to {written}; it is read from there only "
                                     "in this window (copy it beside the recording to keep it "
                                     "with the recording)", 15000)
        return True

    def _ask_save_review_as(self) -> None:
        if self.state is None:
            return
        from passivefit.gui.state import REVIEW_SUFFIX

        name = Path(self.state.recording.path).name + REVIEW_SUFFIX
        path, _ = QtWidgets.QFileDialog.getSaveFileName(
            self, "Save review as", str(Path.home() / name), "passivefit review (*.json)")
        if path:
            self.save_review_as(path)

    def _ask_export(self) -> None:
        if self.state is None:
            return
        stem = Path(self.state.recording.path).with_suffix("")
        path, _ = QtWidgets.QFileDialog.getSaveFileName(self, "Export parameter sheet",
                                                        f"{stem}_passivefit.xlsx", SHEET_FILTER)
        if path:
            try:
                self.export_sheet(path)
            except (OSError, ValueError) as exc:
                self._problem(write_problem(path, exc))

    def _ask_report(self) -> None:
        if self.state is None:
            return
        stem = Path(self.state.recording.path).with_suffix("")
        path, _ = QtWidgets.QFileDialog.getSaveFileName(self, "Export PDF report",
                                                        f"{stem}_passivefit.pdf", "PDF (*.pdf)")
        if path:
            try:
                self.export_report(path)
            except (OSError, ValueError) as exc:
                self._problem(write_problem(path, exc))

    def _database_target(self) -> str | None:
        """The cell database last used, else one the person picks (remembered); None when
        they cancel."""
        target = self.store.value("database", "")
        if not target:
            target, _ = QtWidgets.QFileDialog.getSaveFileName(
                self, "Cell database (SQLite file)", str(Path.home() / "cells.sqlite"),
                "SQLite database (*.sqlite *.db)", options=(
                    QtWidgets.QFileDialog.Option.DontConfirmOverwrite))
            if not target:
                return None
            self.store.setValue("database", target)
        return target

    def _ask_database(self) -> None:
        if self.state is None:
            return
        target = self._database_target()
        if target is None:
            return
        try:
            self.add_to_database(target)
        except Exception as exc:  # noqa: BLE001 - a store that fails must not end the review
            self._problem(database_problem(target, exc))

    def analyse_folder(self, folder: str | Path, target: str, workers: int | None = None
                       ) -> bool:
        """Analyse every recording in `folder` (and its subfolders) into the cell database
        `target` with the window's settings, in the background, as `passivefit batch`
        does; the status bar shows the files done, sweeps per second and time left.

        False (and said) when another folder is still being analysed.
        """
        if not self.folder_runner.start([folder], target, self.base_settings, workers):
            self._problem("a folder is still being analysed; wait until it has finished")
            return False
        self.folder_label.setText(f"analysing {Path(folder).name}…")
        self.folder_progress.setRange(0, 0)
        self.folder_progress.show()
        self.stop_folder_action.setEnabled(True)
        return True

    def stop_folder(self) -> None:
        """Stop the folder's analysis after the file being stored; what is stored stays."""
        if self.folder_runner.busy:
            self.folder_runner.stop()
            self.folder_label.setText("stopping after the file being stored…")

    def _folder_progress(self, event) -> None:
        self.folder_progress.setRange(0, max(event.total, 1))
        self.folder_progress.setValue(event.done)
        self.folder_label.setText(("stopping after the file being stored · "
                                   if self.folder_runner.stopping else "folder: ")
                                  + event.summary())

    def _folder_done(self, summary) -> None:
        self.folder_progress.hide()
        self.folder_label.setText("")
        self.stop_folder_action.setEnabled(False)
        rate = (f", {summary.sweeps / summary.seconds:.0f} sweeps/s"
                if summary.sweeps and summary.seconds > 0 else "")
        done = (f"folder stopped: {len(summary.not_started)} not analysed, "
                if summary.not_started else "folder analysed: ")
        message = (f"{done}{len(summary.stored)} stored ({summary.sweeps} sweeps), "
                   f"{len(summary.skipped)} skipped, {len(summary.failed)} failed in "
                   f"{summary.seconds:.0f} s{rate}")
        if summary.failed:
            path, reason = summary.failed[0]
            self._problem(f"{message}; {Path(path).name}: {reason}"
                          + (f" (and {len(summary.failed) - 1} more)"
                             if len(summary.failed) > 1 else ""))
        else:
            self.statusBar().showMessage(message, 15000)

    def _folder_failed(self, message: str) -> None:
        self.folder_progress.hide()
        self.folder_label.setText("")
        self.stop_folder_action.setEnabled(False)
        self._problem(f"the folder could not be analysed: {message}")

    def _ask_analyse_folder(self) -> None:
        folder = QtWidgets.QFileDialog.getExistingDirectory(
            self, "Analyse a folder of recordings into the database", self._last_folder())
        if not folder:
            return
        target = self._database_target()
        if target is not None:
            self.analyse_folder(folder, target)

    # ------------------------------------------------------------------ recent files
