"""Batch integrity (issue 15): cell identity, reports, unreadable folders, limits."""

from __future__ import annotations

import os
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


# ---------------------------------------------------------------------------- item 5
def _analysed(tmp_path: Path):
    from passivefit.analysis import analyze
    from passivefit.io import load
    from passivefit.model.settings import Settings

    recording = load(_write(tmp_path / "rec" / "c1.csv", 0, None))
    return recording, analyze(recording, Settings(bootstrap=0))


def test_a_report_that_fails_mid_write_leaves_no_file(tmp_path, monkeypatch):
    import errno

    from matplotlib.backends.backend_pdf import PdfPages

    from passivefit.export.report import write_report

    recording, result = _analysed(tmp_path)
    folder = tmp_path / "reports"
    folder.mkdir()
    earlier = folder / "old.pdf"
    earlier.write_bytes(b"%PDF- an earlier report")
    calls = []

    def savefig(self, *args, **kwargs):
        calls.append(1)
        self._ensure_file().fh.write(b"half a page")  # some bytes reach the disk first
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(PdfPages, "savefig", savefig)
    with pytest.raises(OSError, match="No space left"):
        write_report([(recording, result)], folder / "new.pdf")
    with pytest.raises(OSError):
        write_report([(recording, result)], earlier)
    assert len(calls) == 2
    assert sorted(p.name for p in folder.iterdir()) == ["old.pdf"]  # no truncated file
    assert earlier.read_bytes() == b"%PDF- an earlier report"  # the old one intact


def test_a_report_failure_keeps_the_analysis(tmp_path, monkeypatch):
    import errno

    import passivefit.export.report as report
    from passivefit.batch import BatchSummary, Progress, _store_outcome, analyse_file
    from passivefit.model.settings import Settings

    def full_disk(cells, path):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(report, "write_report", full_disk)
    path = _write(tmp_path / "rec" / "c1.csv", 0, None)
    outcome = analyse_file(str(path), Settings(bootstrap=0), str(tmp_path / "reports"))
    assert outcome.result is not None and outcome.error is None
    assert outcome.report_error == "report not written (No space left on device)"
    db = open_database(str(tmp_path / "r.db"))
    summary = BatchSummary()
    _store_outcome(outcome, db, {}, "digest", False, summary, Progress(1))
    assert summary.stored == [str(path)] and summary.failed == []
    assert summary.report_failed == [(str(path), outcome.report_error)]
    assert len(db.current_analyses()) == 1
    db.close()


def test_batch_stores_the_analysis_when_its_report_cannot_be_written(tmp_path, capsys):
    from passivefit.io.recording import file_sha256

    path = _write(tmp_path / "rec" / "c1.csv", 0, None)
    reports = tmp_path / "reports"
    # A folder already holds the report's name, so the final rename fails (works as root).
    (reports / f"c1-{file_sha256(path)[:8]}.pdf").mkdir(parents=True)
    url = f"sqlite:///{tmp_path / 'r.db'}"
    assert cli.main(["batch", str(path), "--db", url, "--reports", str(reports),
                     "--bootstrap", "0"]) == 1
    err = capsys.readouterr().err
    assert "reports not written (the analyses are stored):" in err
    assert f"{path}: report not written" in err
    assert len(_rows(url)) == 1
    assert [p.name for p in reports.iterdir()] == [f"c1-{file_sha256(path)[:8]}.pdf"]


# ---------------------------------------------------------------------------- item 6
def test_an_unreadable_folder_is_a_failure(tmp_path, capsys, monkeypatch):
    good = _write(tmp_path / "lab" / "day1" / "c1.csv", 0, None)
    _write(tmp_path / "lab" / "day2" / "c2.csv", 1, None)
    locked = tmp_path / "lab" / "day2"
    if os.geteuid() == 0:  # root reads folders whatever their mode: make scandir refuse
        real = os.scandir

        def scandir(path="."):
            if Path(path) == locked:
                raise PermissionError(13, "Permission denied", str(path))
            return real(path)

        monkeypatch.setattr(os, "scandir", scandir)
    else:
        locked.chmod(0)
    try:
        code = cli.main(["batch", str(tmp_path / "lab"), "--db", str(tmp_path / "l.db"),
                         "--bootstrap", "0"])
    finally:
        locked.chmod(0o755)
    captured = capsys.readouterr()
    assert code == 1
    assert "1 analysed" in captured.out and "1 failed" in captured.out
    assert f"  {locked}: cannot read the folder (Permission denied)" in captured.err
    assert [Path(r.recording["path"]) for r in _rows(str(tmp_path / "l.db"))] == [good]


# ---------------------------------------------------------------------------- item 8
def sleep_work(path, settings, reports):
    """A stand-in analysis (in the worker): files named slow* never finish in time."""
    import time

    from passivefit.batch import FileOutcome

    if Path(path).name.startswith("slow"):
        Path(f"{path}.started").touch()  # relative to the batch's folder
        time.sleep(120)
    return FileOutcome(path, error="quick stand-in")


def hungry_work(path, settings, reports):
    """A stand-in analysis that asks for 16 GiB."""
    import numpy as np

    return np.ones(2**31).sum()


def test_a_file_over_time_fails_and_its_worker_is_replaced(tmp_path):
    import time

    from passivefit.batch import Limits, _analyse_all

    paths = [tmp_path / "slow.csv", tmp_path / "a.csv", tmp_path / "b.csv"]
    started = time.monotonic()
    outcomes = {Path(o.path).name: o.error for o in _analyse_all(
        paths, None, 1, None, Limits(seconds=3, memory_mb=0), work=sleep_work)}
    assert time.monotonic() - started < 60
    assert outcomes == {"slow.csv": "took longer than 3 s, the limit per file "
                                    "(`--file-timeout`)",
                        "a.csv": "quick stand-in", "b.csv": "quick stand-in"}


def test_a_file_over_the_memory_limit_fails_with_its_reason(tmp_path):
    from passivefit.batch import Limits, _analyse_all

    (outcome,) = _analyse_all([tmp_path / "big.csv"], None, 1, None,
                              Limits(seconds=60, memory_mb=1024), work=hungry_work)
    assert outcome.error == ("out of memory: over the 1024 MB limit per file "
                             "(`--file-memory-mb`)")


_PARENT = """
import os, sys, threading, time
sys.path.insert(0, {tests!r})
from pathlib import Path
from passivefit.batch import Limits, _analyse_all
from test_batch_integrity import sleep_work

paths = [Path("slow-a.csv"), Path("slow-b.csv"), Path("slow-c.csv")]
threading.Thread(target=lambda: list(_analyse_all(paths, None, 2, None, Limits(600, 0),
                                                  work=sleep_work)), daemon=True).start()

def children():
    out = []
    for entry in os.listdir("/proc"):
        try:
            with open(f"/proc/{{entry}}/stat") as f:
                fields = f.read().rsplit(")", 1)[1].split()
        except (OSError, IndexError):
            continue
        if entry.isdigit() and int(fields[1]) == os.getpid():
            out.append(int(entry))
    return out

deadline = time.monotonic() + 60
while len(list(Path().glob("*.started"))) < 2 and time.monotonic() < deadline:
    time.sleep(0.2)  # until both workers are busy
print(" ".join(map(str, children())), flush=True)
time.sleep(600)
"""


def _alive(pid: int) -> bool:
    try:
        with open(f"/proc/{pid}/stat") as f:
            return f.read().rsplit(")", 1)[1].split()[0] != "Z"  # a zombie has ended
    except OSError:
        return False


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_workers_die_with_a_killed_batch(tmp_path):
    import signal
    import subprocess
    import time

    script = _PARENT.format(tests=str(Path(__file__).parent))
    parent = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE,
                              text=True, cwd=tmp_path)
    try:
        pids = [int(p) for p in parent.stdout.readline().split()]
        assert len(list(tmp_path.glob("*.started"))) == 2  # both workers are in the analysis
        assert len(pids) == 3 and all(_alive(p) for p in pids)  # with the resource tracker
        os.kill(parent.pid, signal.SIGKILL)
        parent.wait(10)
        deadline = time.monotonic() + 10
        while any(_alive(p) for p in pids) and time.monotonic() < deadline:
            time.sleep(0.2)
        assert not [p for p in pids if _alive(p)]
    finally:
        if parent.poll() is None:
            parent.kill()
            parent.wait()
