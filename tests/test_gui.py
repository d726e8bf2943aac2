"""The review window, driven offscreen with real widgets (pytest-qt).

A short simulated recording (8 sweeps of 0.4 s at 10 kHz, four step amplitudes) keeps
each test around a second; the cell analysis runs in the window's worker thread and
the tests wait for it.
"""

from __future__ import annotations

import csv
import json
import os
import shutil
import struct
import subprocess
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose

from passivefit.analysis import Settings

pytestmark = pytest.mark.gui
pytest.importorskip("pytestqt")

REPO = Path(__file__).resolve().parent.parent
SETTINGS = Settings(bootstrap=0)
TAU_M_S = 20e-3


@pytest.fixture
def recording(recording_file, tmp_path) -> Path:
    """A private copy (the review file is written beside it)."""
    return Path(shutil.copy(recording_file, tmp_path / recording_file.name))


def wait_idle(qtbot, window) -> None:
    qtbot.waitUntil(lambda: window.idle, timeout=30_000)


# ----------------------------------------------------------------------------- live refit
def test_dragging_the_fit_window_refits_the_sweep_like_the_core(qtbot, open_window, recording):
    window = open_window(recording)
    state = window.state
    before = state.sweep_fit().taus_s[0]
    step = state.steps[state.current]
    onset_ms = step.onset_s * 1e3
    region = window.trace.regions["fit"]

    region.setRegion((onset_ms + 4.0, onset_ms + 120.0))   # emits changed + finished

    after = state.sweep_fit()
    assert after.taus_s[0] != before
    assert_allclose(state.window_ms("fit"), (4.0, 120.0), atol=0.1)   # one sample at 10 kHz
    assert window.windows_bar.boxes["fit"][0].value() == pytest.approx(4.0, abs=0.1)
    row = window.table._rows[state.current]
    assert float(window.table.item(row, 4).text()) == pytest.approx(after.taus_s[0] * 1e3,
                                                                    rel=1e-3)
    wait_idle(qtbot, window)
    assert state.result.settings.windows.fit_ms == (4.0, 120.0)
    # the live fit (started from the sweep's previous fit) found what the analysis found
    # for this sweep with the new window, to the solver's tolerance
    done = state.result_sweep(state.current)
    assert_allclose(after.taus_s, done.taus_s, rtol=1e-3)
    assert_allclose(after.r_in_ohm, done.r_in_ohm, rtol=1e-6)
    # Rall 1969 Biophys J 9:1483 [pub]: τ0 of a uniform passive cell equals its τm
    assert state.result.cell["tau0_ms"] == pytest.approx(TAU_M_S * 1e3, rel=0.05)


def test_a_drag_in_this_sweep_only_mode_leaves_the_other_sweeps(qtbot, open_window, recording):
    window = open_window(recording)
    window.windows_bar.only_this.setChecked(True)
    window.state.go_to(2)
    onset_ms = window.state.steps[2].onset_s * 1e3
    window.trace.regions["fit"].setRegion((onset_ms + 5.0, onset_ms + 100.0))
    wait_idle(qtbot, window)
    s = window.state.settings
    assert s.windows_for(2).fit_ms == pytest.approx((5.0, 100.0))
    assert s.windows_for(1).fit_ms is None


# ----------------------------------------------------------------------------- decisions
def test_reject_recomputes_the_cell_and_undo_restores_it(qtbot, open_window, recording):
    window = open_window(recording)
    state = window.state
    cell_before = state.result.cell.to_dict()
    window.table.selectRow(3)
    assert state.current == 3

    window.decide(False, "noisy baseline")
    assert window.table.status_text(3) == "no (you)"          # at once, before the worker ends
    wait_idle(qtbot, window)
    cell = state.result.cell.to_dict()
    assert cell["n_sweeps_used"] == cell_before["n_sweeps_used"] - 1
    assert cell["tau0_ms"] != cell_before["tau0_ms"]
    assert window.cell.values["tau0_ms"].text().startswith(f"{cell['tau0_ms']:.4g}")
    assert next(f for f in state.result.sweeps if f.index == 3).reject_reason == "noisy baseline"

    window.undo()
    wait_idle(qtbot, window)
    assert state.result.cell.to_dict() == cell_before
    assert window.table.status_text(3) == "yes"
    window.redo()
    wait_idle(qtbot, window)
    assert state.result.cell["n_sweeps_used"] == cell_before["n_sweeps_used"] - 1


def test_keyboard_review(qtbot, open_window, recording):
    from PySide6.QtCore import Qt

    window = open_window(recording)
    window.activateWindow()
    window.setFocus()
    qtbot.keyClick(window, Qt.Key.Key_Right)
    qtbot.keyClick(window, Qt.Key.Key_J)
    assert window.state.current == 2
    qtbot.keyClick(window, Qt.Key.Key_Left)
    assert window.state.current == 1
    qtbot.keyClick(window, Qt.Key.Key_R)                 # reject (reason asked only if interactive)
    assert window.state.settings.decision_for(1) == (False, "rejected in review")
    assert window.state.current == 2                     # moves on to the next sweep
    qtbot.keyClick(window, Qt.Key.Key_Z, Qt.KeyboardModifier.ControlModifier)
    assert window.state.settings.decision_for(1) is None
    qtbot.keyClick(window, Qt.Key.Key_F1)
    assert window.help.isVisible()
    qtbot.keyClick(window.help, Qt.Key.Key_Escape)
    assert not window.help.isVisible()
    wait_idle(qtbot, window)


def test_dropping_a_folder_opens_its_recordings_and_n_goes_to_the_next(
        qtbot, open_window, recording, tmp_path):
    from PySide6 import QtCore, QtGui

    folder = tmp_path / "day"
    folder.mkdir()
    for name in ("LOL-2026-12-01-c9.csv", "LOL-2026-12-01-c10.csv"):
        shutil.copy(recording, folder / name)
    (folder / "notes.md").write_text("not a recording")
    window = open_window(recording)
    mime = QtCore.QMimeData()
    mime.setUrls([QtCore.QUrl.fromLocalFile(str(folder))])
    drop = QtGui.QDropEvent(QtCore.QPointF(200, 200), QtCore.Qt.DropAction.CopyAction, mime,
                            QtCore.Qt.MouseButton.LeftButton, QtCore.Qt.KeyboardModifier.NoModifier)
    window.dropEvent(drop)
    assert [p.name for p in window.paths] == ["LOL-2026-12-01-c10.csv", "LOL-2026-12-01-c9.csv"]
    assert Path(window.state.recording.path).name == "LOL-2026-12-01-c10.csv"
    wait_idle(qtbot, window)
    qtbot.keyClick(window, QtCore.Qt.Key.Key_N)
    assert Path(window.state.recording.path).name == "LOL-2026-12-01-c9.csv"
    assert window.recent_files()[0] == str((folder / "LOL-2026-12-01-c9.csv").resolve())
    wait_idle(qtbot, window)


# ----------------------------------------------------------------------------- persistence
def test_closing_and_reopening_restores_the_review(qtbot, open_window, recording):
    from passivefit.gui.state import REVIEW_FORMAT, REVIEW_SUFFIX

    window = open_window(recording)
    window.state.set_window("fit", (3.0, 150.0))
    window.state.go_to(5)
    window.decide(False, "spontaneous event")
    wait_idle(qtbot, window)
    settings = window.state.settings
    window.close()

    review = recording.with_name(recording.name + REVIEW_SUFFIX)
    doc = json.loads(review.read_text())
    assert doc["format"] == REVIEW_FORMAT and doc["version"] == 1
    assert not [p for p in review.parent.iterdir() if p.name.endswith(".tmp")]

    again = open_window(recording)
    assert again.state.restored
    assert again.state.settings == settings
    assert again.state.settings.decision_for(5) == (False, "spontaneous event")
    assert again.state.current == 6
    assert again.table.status_text(5) == "no (you)"
    assert again.windows_bar.boxes["fit"][0].value() == pytest.approx(3.0)
    assert again.state.result.settings.windows.fit_ms == (3.0, 150.0)


def test_review_files_that_cannot_be_used_are_refused(tmp_path, recording):
    from passivefit.gui.state import ReviewFileError, read_review, review_document, write_review
    from passivefit.io import load

    rec = load(recording)
    path = write_review(tmp_path / "r.json", review_document(rec, SETTINGS, 2))
    assert read_review(path, rec.sha256) == (SETTINGS, 2)
    with pytest.raises(ReviewFileError, match="different version of the recording"):
        read_review(path, "0" * 64)
    (tmp_path / "other.json").write_text(json.dumps({"format": "something-else"}))
    with pytest.raises(ReviewFileError, match="not a passivefit-review file"):
        read_review(tmp_path / "other.json")
    newer = dict(json.loads(path.read_text()), version=99)
    (tmp_path / "newer.json").write_text(json.dumps(newer))
    with pytest.raises(ReviewFileError, match="newer than this passivefit reads"):
        read_review(tmp_path / "newer.json")
    (tmp_path / "broken.json").write_text("{not json")
    with pytest.raises(ReviewFileError, match="not a readable review file"):
        read_review(tmp_path / "broken.json")


# ----------------------------------------------------------------------------- output
@pytest.mark.parametrize("suffix", [".xlsx", ".csv"])
def test_export_writes_a_sheet_that_reads_back(qtbot, open_window, recording, tmp_path, suffix):
    window = open_window(recording)
    window.decide(False, "noisy baseline")
    written = window.export_sheet(tmp_path / f"sheet{suffix}")
    cell = window.state.result.cell.to_dict()
    if suffix == ".xlsx":
        import openpyxl

        rows = list(openpyxl.load_workbook(written[0])["cells"].iter_rows(values_only=True))
        header, units, values = rows[0], rows[1], rows[2]
        row = dict(zip(header, values, strict=True))
        assert units[header.index("tau0_ms")] == "ms"
    else:
        with open(written[0], newline="") as f:
            row = next(csv.DictReader(f))
        with open(written[1], newline="") as f:
            sweeps = list(csv.DictReader(f))
        assert sweeps[0]["reject_reason"] == "noisy baseline"
    assert float(row["tau0_ms"]) == pytest.approx(cell["tau0_ms"])
    assert float(row["n_sweeps_used"]) == 7
    assert row["cell_id"] == "LOL-2026-12-01-c9"


def test_export_report_writes_a_pdf(qtbot, open_window, recording, tmp_path):
    window = open_window(recording)
    written = window.export_report(tmp_path / "cell.pdf")
    data = written.read_bytes()
    assert data.startswith(b"%PDF") and data.count(b"/Type /Page") >= 2
    with pytest.raises(ValueError, match="ending in .pdf"):
        window.export_report(tmp_path / "cell.png")


def test_add_to_database_stores_the_reviewed_analysis(qtbot, open_window, recording, tmp_path):
    from passivefit.store.database import open_database

    window = open_window(recording)
    window.decide(False, "noisy baseline")
    db = str(tmp_path / "cells.sqlite")
    assert window.add_to_database(db) == "stored"
    assert window.add_to_database(db) == "skipped"
    database = open_database(db, create=False)
    try:
        (current,) = database.current_analyses()
        assert current.cell["cell_id"] == "LOL-2026-12-01-c9"
        assert current.result["cell"]["n_sweeps_used"] == 7
    finally:
        database.close()


# ----------------------------------------------------------------------------- command
def _clean_env(**extra) -> dict:
    env = {k: v for k, v in os.environ.items()
           if k not in ("DISPLAY", "WAYLAND_DISPLAY", "QT_QPA_PLATFORM")}
    env["PYTHONPATH"] = str(REPO)
    env.update(extra)
    return env


def _png_size(path: Path) -> tuple[int, int]:
    head = path.read_bytes()[:24]
    assert head[:8] == b"\x89PNG\r\n\x1a\n"
    return struct.unpack(">II", head[16:24])


def test_snapshot_writes_a_png_of_the_window(recording, tmp_path):
    out = tmp_path / "shot.png"
    run = subprocess.run([sys.executable, "-m", "passivefit.cli", "gui", str(recording),
                          "--snapshot", str(out)], env=_clean_env(), capture_output=True,
                         text=True, timeout=120)
    assert run.returncode == 0, run.stderr
    assert _png_size(out) == (1400, 900)
    review = recording.with_name(recording.name + ".passivefit-review.json")
    assert not review.exists()          # a snapshot changes nothing


def test_without_a_display_the_command_prints_the_table(recording):
    run = subprocess.run([sys.executable, "-m", "passivefit.cli", "gui", str(recording)],
                         env=_clean_env(), capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stderr
    assert "no display" in run.stderr and len(run.stderr.strip().splitlines()) == 1
    assert str(recording) in run.stdout
    assert "sweep  step pA" in run.stdout
    tau0 = next(line for line in run.stdout.splitlines() if line.strip().startswith("τ0"))
    # Rall 1969 Biophys J 9:1483 [pub]: τ0 of a uniform passive cell equals its τm
    assert float(tau0.split()[1]) == pytest.approx(TAU_M_S * 1e3, rel=0.05)


def test_without_a_display_a_bad_file_is_one_line_and_status_2(tmp_path):
    bad = tmp_path / "empty.csv"
    bad.write_text("")
    run = subprocess.run([sys.executable, "-m", "passivefit.cli", "gui", str(bad)],
                         env=_clean_env(), capture_output=True, text=True, timeout=120)
    assert run.returncode == 2
    assert run.stderr.strip().splitlines()[-1].startswith(f"passivefit: error: {bad}")
    assert "Traceback" not in run.stderr


def test_the_state_module_imports_no_qt():
    code = ("import sys, passivefit.gui.state; "
            "bad = [m for m in sys.modules if m.split('.')[0] in ('PySide6', 'pyqtgraph', "
            "'shiboken6')]; print(bad); sys.exit(1 if bad else 0)")
    run = subprocess.run([sys.executable, "-c", code], env=_clean_env(), capture_output=True,
                         text=True, timeout=60)
    assert run.returncode == 0, run.stdout + run.stderr


def test_the_state_alone_reviews_a_recording(recording, tmp_path):
    """The Qt-free state: edits, undo and saving work without any window."""
    from passivefit.gui.state import ReviewState

    state = ReviewState.open(recording, SETTINGS, review_file=tmp_path / "r.json")
    seen = []
    state.analysis_needed.connect(seen.append)
    state.run_analysis()
    n = state.result.cell["n_sweeps_used"]
    state.set_decision(0, False, "drift")
    state.set_window("baseline", (-40.0, -1.0))
    assert len(seen) == 2 and seen[-1] == state.settings
    assert state.settings.windows.baseline_ms == (-40.0, -1.0)
    state.run_analysis()
    assert state.result.cell["n_sweeps_used"] == n - 1
    with pytest.raises(ValueError, match="must end after it starts"):
        state.set_window("fit", (10.0, 5.0))
    stale = state.compute(replace(state.settings, bootstrap=5))
    assert not state.accept_result(stale)
    assert state.undo() and state.undo() and not state.undo()
    assert state.settings == SETTINGS
    assert np.isfinite(state.refit_sweep().taus_s[0])


_SWEEP_VALUES = ("v_rest_V", "dv_ss_V", "r_in_ohm", "taus_s", "amps_V", "rmse_V", "bridge_ohm",
                 "sag", "r_in_peak_ohm", "rebound_V", "noise_V", "drift_V", "trend")


def _same_values(live, done) -> list[str]:
    """The sweep values (SI) that differ between two SweepFits, beyond 1e-12 relative."""
    out = []
    for name in _SWEEP_VALUES:
        a, b = getattr(live, name), getattr(done, name)
        if (a is None) != (b is None) or (a is not None and not np.allclose(
                np.asarray(a, float), np.asarray(b, float), rtol=1e-12, atol=0)):
            out.append(f"{name}: {a} (analysis {b})")
    if live.windows_s != done.windows_s:
        out.append(f"windows_s: {live.windows_s} (analysis {done.windows_s})")
    return out


@pytest.mark.slow
@pytest.mark.parametrize("sample", ["LOL-2026-11-03-c1_CA1.nwb",
                                    "LOL-2026-11-19-c4_L5-pulses.nwb",
                                    "LOL-2026-11-05-c2_DG.csv"])
def test_live_refit_with_the_analysis_settings_gives_the_analysis_values(sample, tmp_path):
    """With the windows the analysis used, a live refit of each sweep gives the analysis's
    values (the CA1 sample has spontaneous events cut out and its bridge subtracted, the
    L5 sample is fitted on brief pulses, the DG sample's mains hum is taken out); also
    after a drag and back."""
    from passivefit.gui.state import ReviewState

    state = ReviewState.open(REPO / "sample_recordings" / sample, restore=False,
                             autosave=False, review_file=tmp_path / "r.json")
    state.run_analysis()
    result = state.result
    if sample.endswith("DG.csv"):   # the refit and the residuals read the hum-free sweep
        first = state.indices[0]
        assert not np.allclose(state.analysed_voltage(first), state.voltage(first))
    else:
        assert any(f.masked_s for f in result.sweeps) or sample.endswith("pulses.nwb")
    checked = 0
    for index in state.indices:
        done = state.result_sweep(index)
        if done is None or done.step is None or done.fit is None:
            continue
        live = state.refit_sweep(index)
        assert not _same_values(live, done), (index, _same_values(live, done))
        checked += 1
    assert checked >= 5
    state.go_to(state.indices[0])
    shown = state.window_ms("fit")
    state.preview_window("fit", (shown[0] + 1.0, shown[1]))
    moved = state.sweep_fit()
    assert moved.taus_s != result.sweeps[0].taus_s
    live = state.refit_sweep()        # the analysis's settings again: its values again
    assert not _same_values(live, state.result_sweep(state.current))


@pytest.mark.slow
def test_analysing_a_folder_shows_its_progress(qtbot, make_window, recording_file, tmp_path):
    """File › Analyse a folder into the database: the batch runs in the background and the
    status bar shows files done of total, sweeps per second and time left."""
    from passivefit.io import load, save

    folder = tmp_path / "folder"
    folder.mkdir()
    shutil.copy(recording_file, folder / "a.csv")
    other = load(recording_file)
    for sweep in other.sweeps:            # a second cell: other content, not a duplicate
        sweep.voltage = sweep.voltage + 1e-3
    save(other, folder / "b.csv")
    window = make_window()
    events, labels, values = [], [], []
    window.folder_runner.progress.connect(events.append)
    window.folder_runner.progress.connect(
        lambda _e: (labels.append(window.folder_label.text()),
                    values.append((window.folder_progress.value(),
                                   window.folder_progress.maximum()))))
    db = tmp_path / "cells.sqlite"
    assert window.analyse_folder(folder, str(db), workers=1)
    assert window.folder_progress.isVisible()
    assert not window.analyse_folder(folder, str(db))          # one folder at a time
    assert "still being analysed" in window.last_error
    qtbot.waitUntil(lambda: not window.folder_runner.busy, timeout=300_000)
    assert [e.done for e in events] == [0, 1, 2]
    assert values == [(0, 2), (1, 2), (2, 2)]
    assert labels[0].startswith("folder: 0/2 files · — sweeps/s · — left")
    assert labels[-1].startswith("folder: 2/2 files · ") and "0:00 left" in labels[-1]
    assert " sweeps/s" in labels[-1] and "— sweeps/s" not in labels[-1]
    assert not window.folder_progress.isVisible() and window.folder_label.text() == ""
    assert window.statusBar().currentMessage().startswith("folder analysed: 2 stored (16 sweeps)")
    from passivefit.store.database import open_database

    database = open_database(str(db), create=False)
    assert len(database.current_analyses()) == 2
    database.close()


@pytest.mark.slow
def test_analysing_a_folder_can_be_stopped(qtbot, make_window, recording_file, tmp_path):
    """File › Stop analysing the folder: the batch ends after the file it stores; the
    status bar says how many were not analysed."""
    from passivefit.io import load, save

    folder = tmp_path / "folder"
    folder.mkdir()
    base = load(recording_file)
    for k in range(3):                    # three cells with other content
        for sweep in base.sweeps:
            sweep.voltage = sweep.voltage + 1e-3
        save(base, folder / f"c{k}.csv")
    window = make_window()
    assert not window.stop_folder_action.isEnabled()
    assert window.analyse_folder(folder, str(tmp_path / "cells.sqlite"), workers=1)
    assert window.stop_folder_action.isEnabled()
    labels = []
    window.folder_runner.progress.connect(lambda _e: labels.append(window.folder_label.text()))
    window.stop_folder_action.trigger()   # asked before the first file is stored
    assert window.folder_label.text().startswith("stopping")
    qtbot.waitUntil(lambda: not window.folder_runner.busy, timeout=300_000)
    assert window.statusBar().currentMessage().startswith(
        "folder stopped: 2 not analysed, 1 stored")
    assert labels and all(text.startswith("stopping after the file") for text in labels)
    assert not window.stop_folder_action.isEnabled()
    assert not window.folder_progress.isVisible()


def test_a_folder_that_cannot_be_analysed_is_said_in_one_line(qtbot, make_window, tmp_path):
    window = make_window()
    assert window.analyse_folder(tmp_path / "nowhere", str(tmp_path / "c.sqlite"))
    qtbot.waitUntil(lambda: not window.folder_runner.busy, timeout=60_000)
    assert window.last_error.startswith("the folder could not be analysed: ")
    assert "nowhere" in window.last_error and "\n" not in window.last_error
    assert not window.folder_progress.isVisible()
