"""Batch integrity (issue 15): cell identity, reports, unreadable folders, limits."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

from passivefit import cli
from passivefit.store.database import open_database

CLI = [sys.executable, "-m", "passivefit.cli"]


def _write(path: Path, k: int, cell_id: str | None) -> Path:
    """A small simulated recording (4 steps); `cell_id=None` leaves the id out of the file."""
    from passivefit.io import save
    from passivefit.simulate import BallStick, StepProtocol, simulate_recording

    cell = BallStick.from_electrotonic((15 + 4 * k) * 1e-3, 1.0, 5.0, (100 + 40 * k) * 1e6)
    protocol = StepProtocol(0.05, 0.25, (-50e-12, -30e-12, -10e-12, 10e-12))
    recording, _ = simulate_recording(cell, protocol=protocol, sample_rate_hz=10_000,
                                      sweep_duration_s=0.4, n_sweeps=4, filter_hz=2_000,
                                      seed=k, cell_id=cell_id or "unused")
    if cell_id is None:
        recording.metadata.pop("cell_id", None)
    path.parent.mkdir(parents=True, exist_ok=True)
    save(recording, path)
    return path


def _rows(url: str):
    db = open_database(url, create=False)
    try:
        return db.current_analyses()
    finally:
        db.close()


# ---------------------------------------------------------------------------- item 1
@pytest.mark.parametrize("file_id", [None, "c1"])
def test_same_file_name_in_two_folders_is_two_cells(tmp_path, capsys, file_id):
    a = _write(tmp_path / "lab" / "day1" / "c1.csv", 0, file_id)
    b = _write(tmp_path / "lab" / "day2" / "c1.csv", 1, file_id)
    meta = tmp_path / "lab" / "meta.csv"
    meta.write_text("file,region\nday1/c1.csv,CA1\nday2/c1.csv,DG\n")
    url = f"sqlite:///{tmp_path / 'cells.db'}"
    assert cli.main(["batch", str(tmp_path / "lab"), "--db", url, "--metadata", str(meta)]) == 0
    rows = {Path(r.recording["path"]): r.cell for r in _rows(url)}
    assert rows[a]["cell_id"] != rows[b]["cell_id"]
    assert (rows[a]["region"], rows[b]["region"]) == ("CA1", "DG")
    if file_id is None:
        assert (rows[a]["cell_id"], rows[b]["cell_id"]) == ("day1/c1", "day2/c1")
    capsys.readouterr()
    assert cli.main(["db", "list", "--db", url]) == 0
    assert capsys.readouterr().out.splitlines()[-1] == "2 recordings, 2 cells"


def test_a_bare_file_name_matching_two_folders_is_an_error(tmp_path, capsys):
    _write(tmp_path / "lab" / "day1" / "c1.csv", 0, None)
    _write(tmp_path / "lab" / "day2" / "c1.csv", 1, None)
    meta = tmp_path / "meta.csv"
    meta.write_text("file,region\nc1.csv,CA1\n")
    db = tmp_path / "cells.db"
    assert cli.main(["batch", str(tmp_path / "lab"), "--db", str(db), "--metadata",
                     str(meta)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "day1/c1.csv" in err[0] and "day2/c1.csv" in err[0]
    assert not db.exists()  # checked before anything is written


def test_a_bare_file_name_matching_one_file_still_applies(tmp_path):
    a = _write(tmp_path / "lab" / "day1" / "c1.csv", 0, None)
    meta = tmp_path / "meta.csv"
    meta.write_text("file,region\nc1.csv,CA1\n")
    url = f"sqlite:///{tmp_path / 'cells.db'}"
    assert cli.main(["batch", str(a), "--db", url, "--metadata", str(meta)]) == 0
    (row,) = _rows(url)
    assert row.cell["region"] == "CA1"
