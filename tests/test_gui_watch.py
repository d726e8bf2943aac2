"""File ▸ Watch folder… (issue 16): the window opens each finished recording, analyses it
and shows the cell card; newest first; with a database each one is filed."""

from __future__ import annotations

import os
import shutil
import time
from pathlib import Path

import pytest

from passivefit.model import schema as S
from passivefit.model.settings import Settings

pytestmark = pytest.mark.gui
pytest.importorskip("pytestqt")


@pytest.fixture
def folder(tmp_path) -> Path:
    out = tmp_path / "rig"
    out.mkdir()
    return out


@pytest.fixture
def second_file(tmp_path) -> Path:
    """Another simulated cell (other seed and R_in), so that the database keeps both."""
    from passivefit.io import save
    from passivefit.simulate import BallStick, StepProtocol, simulate_recording

    cell = BallStick.from_electrotonic(20e-3, 1.0, 3.0, 120e6)
    recording, _truth = simulate_recording(
        cell, protocol=StepProtocol(0.05, 0.2, (-50e-12, -30e-12, -10e-12, 10e-12)),
        sample_rate_hz=10_000, filter_hz=2_000, sweep_duration_s=0.4, n_sweeps=8, seed=8,
        cell_id="LOL-2026-12-01-c10")
    return save(recording, tmp_path / "second.csv")


def _shown(window) -> str | None:
    return None if window.state is None else Path(window.state.recording.path).name


def test_watch_folder_is_in_the_file_menu(make_window):
    window = make_window()
    file_menu = window.menuBar().actions()[0].menu()
    assert "Watch folder…" in [a.text() for a in file_menu.actions()]


def test_the_window_opens_and_analyses_each_new_recording(qtbot, make_window, folder,
                                                          recording_file, second_file,
                                                          tmp_path):
    window = make_window(Settings(bootstrap=0))
    shutil.copy(recording_file, folder / "there-before.csv")
    db = tmp_path / "cells.sqlite"
    assert window.watch_folder(folder, settle_s=0.3, database=str(db), interval_s=0.05)
    assert window.watching and "rig" in window.watch_label.text()
    # two files at once, the newer one must come first
    for name, source, age_s in (("older.csv", recording_file, 20),
                                ("newer.csv", second_file, 5)):
        path = Path(shutil.copy(source, folder / f".{name}"))
        stamp = time.time() - age_s
        os.utime(path, (stamp, stamp))
        path.rename(folder / name)
    qtbot.waitUntil(lambda: _shown(window) == "newer.csv", timeout=15_000)
    qtbot.waitUntil(lambda: _shown(window) == "older.csv", timeout=60_000)
    qtbot.waitUntil(lambda: window.idle, timeout=60_000)
    assert window.state.result is not None
    cell = window.state.result.cell.to_dict()
    assert cell[S.TAU0.key] == pytest.approx(20.0, rel=0.15)   # simulated τm 20 ms
    assert "there-before.csv" not in [p.name for p in window.paths]
    # both filed in the database (the last one when the window polls after its analysis)
    from passivefit.store.database import open_database

    def stored() -> list[str]:
        database = open_database(str(db), create=False)
        try:
            return sorted(Path(r.recording["path"]).name for r in database.current_analyses())
        finally:
            database.close()

    qtbot.waitUntil(lambda: stored() == ["newer.csv", "older.csv"], timeout=15_000)
    window.stop_watching()
    assert not window.watching and window.watch_label.text() == ""


def test_a_missing_folder_is_said_in_the_window(make_window, tmp_path):
    window = make_window()
    assert not window.watch_folder(tmp_path / "nowhere")
    assert "no such folder" in window.last_error and not window.watching


def test_a_recording_that_cannot_be_opened_does_not_stop_the_watch(qtbot, make_window, folder,
                                                                    recording_file):
    """The sample ABF has no command waveform: without a person to type the step it
    cannot be opened; the watch says so and opens the next recording."""
    repo = Path(__file__).resolve().parent.parent
    window = make_window(Settings(bootstrap=0))
    assert window.watch_folder(folder, settle_s=0.2, interval_s=0.05)
    shutil.copy(repo / "sample_recordings" / "LOL-2026-11-12-c3_CA3.abf", folder / "c3.abf")
    qtbot.waitUntil(lambda: "no step found" in window.last_error, timeout=15_000)
    assert window.watching and window.state is None
    shutil.copy(recording_file, folder / "c4.csv")
    qtbot.waitUntil(lambda: _shown(window) == "c4.csv", timeout=15_000)
    qtbot.waitUntil(lambda: window.idle, timeout=60_000)
    assert window.state.result is not None


def test_no_second_poll_while_one_runs(make_window, folder):
    window = make_window()
    assert window.watch_folder(folder, settle_s=0.2)
    calls = []
    window._poll_watch_once = lambda: calls.append(1)
    window._watch_polling = True             # as while a dialog of a poll is open
    window._poll_watch()
    assert calls == []
    window._watch_polling = False
    window._poll_watch()
    assert calls == [1]
