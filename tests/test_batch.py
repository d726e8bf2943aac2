"""`passivefit batch`: folders → analyses → database, resumable, parallel, exit codes."""

from __future__ import annotations

import csv
import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from passivefit import cli
from passivefit.store.database import open_database
from passivefit.store.models import AnalysisRow, CellRow, RecordingRow, SweepRow

N_FILES = 8
CLI = [sys.executable, "-m", "passivefit.cli"]


def _write_cells(folder: Path, n: int, first: int = 0) -> list[tuple[Path, dict]]:
    """Simulated recordings of invented cells (4 steps, 10 kHz), with their truth."""
    from passivefit.io import save
    from passivefit.simulate import BallStick, StepProtocol, simulate_recording

    out = []
    for k in range(first, first + n):
        cell = BallStick.from_electrotonic((15 + 2 * k) * 1e-3, 1.0, 5.0, (100 + 20 * k) * 1e6)
        protocol = StepProtocol(0.05, 0.25, (-50e-12, -30e-12, -10e-12, 10e-12))
        recording, truth = simulate_recording(
            cell, protocol=protocol, sample_rate_hz=10_000, sweep_duration_s=0.4, n_sweeps=4,
            filter_hz=2_000, seed=k, cell_id=f"LOL-2026-11-{3 + k:02d}-c1")
        sub = folder / ("day1" if k % 2 else "day2")
        sub.mkdir(parents=True, exist_ok=True)
        path = sub / f"LOL-2026-11-{3 + k:02d}-c1.csv"
        save(recording, path)
        out.append((path, truth))
    return out


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    folder = tmp_path_factory.mktemp("lab")
    return folder, _write_cells(folder, N_FILES)


@pytest.fixture
def run_batch():
    return cli.main


def _statuses(out: str) -> list[str]:
    """First word of each per-file line of a batch's plain output."""
    return [line.split()[0] for line in out.splitlines() if not line.startswith("batch:")]


def _count(url: str, model, *where) -> int:
    db = open_database(url, create=False)
    try:
        with Session(db.engine) as s:
            return s.scalar(select(func.count()).select_from(model).where(*where))
    finally:
        db.close()


def _copy_folder(src: Path, dst: Path) -> Path:
    import shutil

    shutil.copytree(src, dst)
    return dst


def test_batch_stores_every_file_and_skips_them_on_rerun(lab, tmp_path, run_batch, capsys):
    folder, cells = lab
    url = f"sqlite:///{tmp_path / 'lab.db'}"
    sheet = tmp_path / "cells.csv"
    assert run_batch(["batch", str(folder), "--db", url, "--workers", "2",
                      "--sheet", str(sheet)]) == 0
    out = capsys.readouterr().out
    assert _statuses(out) == ["stored"] * N_FILES + ["sheet:"]
    assert f"batch: {N_FILES} files: {N_FILES} analysed ({4 * N_FILES} sweeps), 0 skipped, " \
           "0 failed" in out
    assert _count(url, RecordingRow) == N_FILES and _count(url, AnalysisRow) == N_FILES
    assert _count(url, SweepRow) == 4 * N_FILES

    db = open_database(url, create=False)
    rows = {Path(r.recording["path"]).name: r for r in db.current_analyses()}
    db.close()
    errors = []
    for path, truth in cells:
        row = rows[path.name]
        assert row.cell["cell_id"] == truth["cell_id"]  # from the file's own metadata
        assert row.cell["temperature_C"] == 32.0 and row.cell["date"] == path.stem[4:14]
        errors.append(abs(row.analysis["tau0_ms"] / truth["tau0_ms"] - 1))
    # Each stored τ0 belongs to its own file: τ0 = τm for a ball-and-stick (docs/references.md
    # §3 [der]) and the simulated τm differ by 2 ms (~10 %) from file to file, so rows
    # stored against the wrong recording would put the median error near 10 %.
    assert sorted(errors)[N_FILES // 2] < 0.03

    with open(sheet, newline="") as f:
        sheet_rows = list(csv.DictReader(f))
    assert len(sheet_rows) == N_FILES
    for r in sheet_rows:
        assert float(r["tau0_ms"]) == rows[Path(r["source_path"]).name].analysis["tau0_ms"]

    # The sheet now sits inside the scanned tree? Put one there: it must not be read.
    (folder / "day1" / "old_results.csv").write_text(sheet.read_text())
    assert run_batch(["batch", str(folder), "--db", url]) == 0
    out = capsys.readouterr().out
    assert _statuses(out) == ["skipped"] * N_FILES and "0 analysed" in out
    assert _count(url, AnalysisRow) == N_FILES  # nothing added, nothing replaced
    (folder / "day1" / "old_results.csv").unlink()


def test_batch_stores_what_analyze_json_prints(lab, tmp_path, run_batch):
    import json

    folder, cells = lab
    path = cells[0][0].absolute()
    url = f"sqlite:///{tmp_path / 'one.db'}"
    assert run_batch(["batch", str(path), "--db", url, "--workers", "1"]) == 0
    db = open_database(url, create=False)
    (row,) = db.current_analyses()
    db.close()
    # both from fresh processes, so both run the same code as installed now
    printed = subprocess.run([*CLI, "analyze", str(path), "--json"], capture_output=True,
                             text=True, timeout=300)
    assert printed.returncode == 0, printed.stderr
    analysed = json.loads(printed.stdout)
    # the advice on what to record next is for the rig: batch leaves it out
    assert analysed.pop("design") is not None and row.result.pop("design") is None
    assert row.result == analysed


def test_bad_files_are_listed_and_the_rest_is_stored(lab, tmp_path, run_batch, capsys):
    folder = _copy_folder(lab[0], tmp_path / "mixed")
    (folder / "empty.abf").write_bytes(b"")
    (folder / "day1" / "broken.csv").write_text("time_ms,V0_mV\n0,abc\n")
    (folder / "notes.txt").write_text("not a recording extension: ignored")
    url = f"sqlite:///{tmp_path / 'mixed.db'}"
    assert run_batch(["batch", str(folder), "--db", url]) == 1
    captured = capsys.readouterr()
    assert f"{N_FILES} analysed" in captured.out and "2 failed" in captured.out
    failed_block = captured.err.split("failed files:\n", 1)[1].splitlines()
    assert len(failed_block) == 2
    assert any("empty.abf: the file is empty" in line for line in failed_block)
    assert any("broken.csv: " in line for line in failed_block)
    assert _count(url, RecordingRow) == N_FILES


def test_metadata_csv_fills_the_cells(lab, tmp_path, run_batch):
    folder, cells = lab
    meta = tmp_path / "cells_meta.csv"
    lines = ["file,cell_id,region,cell_type,temperature_C,notes"]
    for k, (path, _) in enumerate(cells):
        rel = os.path.relpath(path, tmp_path)
        region = "CA1" if k % 2 else "dentate gyrus"
        lines.append(f'{rel},LOL-cell-{k},{region},pyramidal,{33 + k % 2},"seal 2 GΩ, ok"')
    meta.write_text("\n".join(lines) + "\n")
    url = f"sqlite:///{tmp_path / 'meta.db'}"
    assert run_batch(["batch", str(folder), "--db", url, "--metadata", str(meta)]) == 0
    db = open_database(url, create=False)
    rows = db.current_analyses()
    db.close()
    by_id = {r.cell["cell_id"]: r.cell for r in rows}
    assert set(by_id) == {f"LOL-cell-{k}" for k in range(N_FILES)}
    assert by_id["LOL-cell-1"]["region"] == "CA1" and by_id["LOL-cell-2"]["temperature_C"] == 33
    assert by_id["LOL-cell-0"]["notes"] == "seal 2 GΩ, ok"
    assert by_id["LOL-cell-0"]["date"] == "2026-11-03"  # from the file: CSV left it out

    # A corrected metadata sheet on a rerun updates the cells, not the analyses.
    meta.write_text(meta.read_text().replace(",dentate gyrus,", ",DG,"))
    assert run_batch(["batch", str(folder), "--db", url, "--metadata", str(meta)]) == 0
    db = open_database(url, create=False)
    regions = {r.cell["cell_id"]: r.cell["region"] for r in db.current_analyses()}
    db.close()
    assert regions["LOL-cell-0"] == "DG" and regions["LOL-cell-1"] == "CA1"
    assert _count(url, AnalysisRow) == N_FILES and _count(url, CellRow) == N_FILES


@pytest.mark.parametrize("content, message", [
    ("file,cell_id,colour\nx.csv,c1,red\n", "unknown column(s) 'colour'"),
    ("cell_id,region\nc1,CA1\n", "one `file` column"),
    ("file,temperature_C\nx.csv,warm\n", "row 2: temperature_C 'warm' is not a number"),
    ("file,date\nx.csv,03/11/2026\n", "row 2: date '03/11/2026' is not YYYY-MM-DD"),
    ("file,region\nx.csv,CA1,extra\n", "row 2: 3 fields, the header has 2"),
    ("file,region\nx.csv,CA1\nx.csv,CA3\n", "row 3: 'x.csv' is listed twice"),
    ("", "the file is empty"),
])
def test_malformed_metadata_stops_before_anything_is_written(lab, tmp_path, run_batch, capsys,
                                                             content, message):
    meta = tmp_path / "meta.csv"
    meta.write_text(content)
    db_path = tmp_path / "never.db"
    assert run_batch(["batch", str(lab[0]), "--db", str(db_path), "--metadata", str(meta),
                      "--sheet", str(tmp_path / "s.xlsx")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("passivefit: error: `--metadata`") and message in err
    assert len(err.strip().splitlines()) == 1
    assert not db_path.exists() and not (tmp_path / "s.xlsx").exists()


def test_bad_usage_exits_2(tmp_path, run_batch, capsys):
    assert run_batch(["batch", str(tmp_path / "nowhere"), "--db", str(tmp_path / "x.db")]) == 2
    assert "nowhere: no such file or folder" in capsys.readouterr().err
    assert run_batch(["batch", str(tmp_path), "--db", str(tmp_path / "x.db"),
                      "--sheet", str(tmp_path / "s.ods")]) == 2
    assert "`--sheet`" in capsys.readouterr().err
    assert run_batch(["batch", str(tmp_path), "--db", str(tmp_path / "x.db"),
                      "--workers", "0"]) == 2
    assert not (tmp_path / "x.db").exists()


def _start_batch(args: list[str]) -> subprocess.Popen:
    return subprocess.Popen([*CLI, "batch", *args],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)


def _end_group(proc: subprocess.Popen) -> None:
    """Stop what is left of a batch we started (its orphaned workers), by group id."""
    try:
        os.killpg(proc.pid, signal.SIGKILL)
    except ProcessLookupError:
        pass
    proc.wait(timeout=30)


@pytest.mark.slow
def test_kill_9_mid_batch_then_rerun_completes_without_duplicates(tmp_path):
    folder = tmp_path / "many"
    _write_cells(folder, 16)
    url = f"sqlite:///{tmp_path / 'killed.db'}"
    proc = _start_batch([str(folder), "--db", url, "--workers", "2"])
    stored = 0
    try:
        for line in proc.stdout:  # plain lines: stdout is not a terminal
            stored += line.startswith("stored ")
            if stored == 3:
                proc.send_signal(signal.SIGKILL)  # the parent, the only database writer
                break
    finally:
        _end_group(proc)
    assert proc.returncode == -signal.SIGKILL
    after_kill = _count(url, AnalysisRow)
    assert 3 <= after_kill < 16
    # Whole recordings only: every analysis has all its sweeps, every recording a cell.
    assert _count(url, SweepRow) == 4 * after_kill
    assert _count(url, RecordingRow) == after_kill == _count(url, CellRow)

    rerun = subprocess.run([*CLI, "batch", str(folder), "--db", url],
                           capture_output=True, text=True, timeout=300)
    assert rerun.returncode == 0, rerun.stderr
    assert f"{16 - after_kill} analysed" in rerun.stdout and f"{after_kill} skipped" in rerun.stdout
    assert _count(url, AnalysisRow) == 16 == _count(url, RecordingRow)
    assert _count(url, AnalysisRow, AnalysisRow.is_current) == 16
    assert _count(url, SweepRow) == 4 * 16


@pytest.mark.slow
def test_two_batches_on_the_same_files_do_not_duplicate(lab, tmp_path):
    url = f"sqlite:///{tmp_path / 'shared.db'}"
    procs = [_start_batch([str(lab[0]), "--db", url, "--workers", "1"]) for _ in range(2)]
    try:
        outputs = [p.communicate(timeout=300) for p in procs]
    finally:
        for p in procs:
            _end_group(p)
    assert all(p.returncode == 0 for p in procs), [o[1] for o in outputs]
    assert _count(url, RecordingRow) == N_FILES == _count(url, AnalysisRow)
    assert _count(url, SweepRow) == 4 * N_FILES
    status = [word for out, _ in outputs for word in _statuses(out)]
    # each file is stored once; the other batch skipped it (before or after analysing it)
    assert status.count("stored") == N_FILES and status.count("skipped") == N_FILES


class _Terminal:
    """A fake terminal: a text buffer that says it is a tty."""

    def __init__(self) -> None:
        import io

        self.buffer = io.StringIO()

    def isatty(self) -> bool:
        return True

    def write(self, text: str) -> None:
        self.buffer.write(text)

    def flush(self) -> None:
        pass


class _Clock:
    """A clock moved by hand (s)."""

    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def test_progress_is_one_rewritten_line_on_a_terminal(capsys):
    from passivefit.batch import Progress

    screen, clock = _Terminal(), _Clock()
    progress = Progress(4, stream=screen, clock=clock)
    progress.start()
    for status, sweeps in (("stored", 10), ("skipped", 0), ("failed", 0), ("stored", 10)):
        clock.now += 2.0 if status != "skipped" else 0.0
        progress.update(status, "/data/lol/LOL-2026-11-03-c1.nwb", "detail", sweeps=sweeps)
    progress.finish()
    text = screen.buffer.getvalue()
    assert text.count("\r") == 5 and text.endswith("\n") and text.count("\n") == 1
    lines = text.split("\r")
    assert "0/4 files · — sweeps/s · — left" in lines[1]
    # after the first file: 10 sweeps in 2 s; 3 files left at 2 s per analysed file
    assert "1/4 files · 5.0 sweeps/s · 0:06 left · stored 1, skipped 0, failed 0" in lines[2]
    # after the third (one skipped, taking no time): 10 sweeps in 4 s, 1 file left, 2 s each
    assert "3/4 files · 2.5 sweeps/s · 0:02 left" in lines[4]
    assert "4/4 files · 3.3 sweeps/s · 0:00 left · stored 2, skipped 1, failed 1" in lines[5]
    assert "[########################]" in lines[5] and "LOL-2026-11-03-c1.nwb" in lines[5]
    assert capsys.readouterr().out == ""  # no per-file lines when the line is shown


def test_progress_is_plain_lines_when_not_a_terminal(capsys):
    import io

    from passivefit.batch import Progress

    pipe = io.StringIO()          # isatty() is False, as for a pipe or a file
    progress = Progress(2, stream=pipe)
    progress.start()
    progress.update("stored", "/data/a.nwb", "4 sweeps", sweeps=4)
    progress.update("failed", "/data/b.nwb", "not a recording")
    progress.finish()
    assert pipe.getvalue() == ""
    assert capsys.readouterr().out.splitlines() == ["stored   /data/a.nwb: 4 sweeps",
                                                    "failed   /data/b.nwb: not a recording"]


def test_clock_time():
    from passivefit.batch import clock_time

    assert [clock_time(s) for s in (0, 59.6, 61, 3599, 3600, 7325)] == [
        "0:00", "1:00", "1:01", "59:59", "1:00:00", "2:02:05"]


@pytest.mark.slow
def test_run_batch_tells_its_progress_to_a_callback(lab, tmp_path, capsys):
    """The callback the window uses: an event at the start and one per file, in order."""
    from passivefit.batch import run_batch
    from passivefit.model.settings import Settings

    folder, _ = lab
    events = []
    summary = run_batch([str(folder / "day1")], str(tmp_path / "p.db"), Settings(bootstrap=0),
                        workers=1, progress=events.append)
    n = N_FILES // 2
    assert len(summary.stored) == n
    assert [e.done for e in events] == list(range(n + 1)) and events[0].status == ""
    assert all(e.total == n for e in events)
    assert events[-1].sweeps == 4 * n and events[-1].stored == n
    assert events[-1].sweeps_per_s > 0 and events[-1].remaining_s == 0
    assert capsys.readouterr().out == ""   # the callback replaced the lines


def test_a_batch_asked_to_stop_ends_after_the_file_it_stored(lab, tmp_path):
    """The window's "Stop analysing the folder": `stop()` is asked after every file; once
    it says so, the rest are listed as not started and what was stored stays."""
    import multiprocessing

    from passivefit.batch import run_batch
    from passivefit.model.settings import Settings
    from passivefit.store.database import open_database

    folder, _ = lab
    db = tmp_path / "stopped.db"
    stored = []
    summary = run_batch([str(folder / "day1")], str(db), Settings(bootstrap=0), workers=1,
                        progress=lambda e: stored.append(e.stored), stop=lambda: stored[-1] >= 1)
    n = N_FILES // 2
    assert len(summary.stored) == 1
    assert len(summary.not_started) == n - 1
    assert not set(summary.not_started) & set(summary.stored)
    assert not multiprocessing.active_children()     # its worker processes ended
    database = open_database(str(db), create=False)
    assert len(database.current_analyses()) == 1
    database.close()


@pytest.mark.slow
def test_batch_writes_a_report_per_analysed_recording(lab, tmp_path, run_batch):
    from passivefit.io.recording import file_sha256

    folder, cells = lab
    reports = tmp_path / "reports"
    reports.mkdir()
    picked = [str(p) for p, _ in cells[:2]]
    assert run_batch(["batch", *picked, "--db", str(tmp_path / "r.db"), "--reports",
                      str(reports)]) == 0
    expected = {f"{Path(p).stem}-{file_sha256(p)[:8]}.pdf" for p in picked}
    assert {p.name for p in reports.iterdir()} == expected
    assert all(p.read_bytes()[:5] == b"%PDF-" for p in reports.iterdir())
    missing = tmp_path / "new" / "reports"  # created on demand
    assert run_batch(["batch", picked[0], "--db", str(tmp_path / "r2.db"), "--reports",
                      str(missing)]) == 0
    assert len(list(missing.iterdir())) == 1
    blocked = tmp_path / "a-file"
    blocked.write_text("not a folder")
    assert run_batch(["batch", picked[0], "--db", str(tmp_path / "r3.db"), "--reports",
                      str(blocked / "reports")]) == 2
