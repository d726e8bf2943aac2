"""One line and exit 2 where the contract promises it (issue 15, item 9).

Each case runs the command as a subprocess and asserts exit 2, no traceback and exactly
one line on stderr. Cases that need a permission the test cannot take away (the tests
may run as root) patch the file system call in-process instead.
"""

from __future__ import annotations

import builtins
import errno
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from passivefit import cli

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_recordings" / "LOL-2026-11-05-c2_DG.csv"
CLI = [sys.executable, "-m", "passivefit.cli"]
UNWRITABLE = "/sys/passivefit-test.out"  # EACCES even for root (sysfs)


def _run(args: list[str], cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([*CLI, *args], capture_output=True, text=True, cwd=cwd, timeout=300)


def _one_line(proc: subprocess.CompletedProcess) -> str:
    assert "Traceback" not in proc.stderr, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert proc.returncode == 2, (proc.returncode, proc.stderr)
    assert lines[0].startswith("passivefit: error: ")
    return lines[0]


@pytest.fixture(scope="module")
def stored(tmp_path_factory):
    """A folder with the sample recording and a database holding its analysis."""
    folder = tmp_path_factory.mktemp("stored")
    shutil.copy(SAMPLE, folder / SAMPLE.name)
    proc = _run(["batch", SAMPLE.name, "--db", "cells.db", "--bootstrap", "0"], folder)
    assert proc.returncode == 0, proc.stderr
    (folder / "notes.md").write_text("# not a database\n" * 50)
    return folder


CASES = {
    "step nan": (["analyze", "SAMPLE", "--step", "100", "300", "nan"], "finite numbers"),
    "fit start inf": (["analyze", "SAMPLE", "--fit-start-ms", "inf"], "finite numbers"),
    "filter nan": (["analyze", "SAMPLE", "--filter-hz", "nan"], "finite numbers"),
    "huge sweep range": (["analyze", "SAMPLE", "--sweeps", "0-999999999"], "`--sweeps`"),
    "sweeps beyond file": (["analyze", "SAMPLE", "--sweeps", "50-60"], "the file has"),
    "bootstrap bound": (["analyze", "SAMPLE", "--bootstrap", "100000"], "0 to 10000"),
    "fit start beyond": (["analyze", "SAMPLE", "--fit-start-ms", "5000"], "`--fit-start-ms`"),
    "fit start after step": (["analyze", "SAMPLE", "--fit-start-ms", "299"], "`--fit-start-ms`"),
    "step beyond": (["analyze", "SAMPLE", "--step", "300", "5000", "-50"], "`--step` ends"),
    "out unwritable": (["analyze", "SAMPLE", "--out", UNWRITABLE], "permission denied"),
    "out is a folder": (["analyze", "SAMPLE", "--out", "."], "is a directory"),
    "out full disk": (["analyze", "SAMPLE", "--out", "/dev/full"], "no space left"),
    "snapshot unwritable": (["gui", "SAMPLE", "--snapshot", UNWRITABLE + ".png"],
                            "permission denied"),
    "batch db text file": (["batch", "SAMPLE", "--db", "notes.md"], "notes.md"),
    "batch db bad url": (["batch", "SAMPLE", "--db", "foo://bar"], "foo://bar"),
    "batch sheet unwritable": (["batch", "SAMPLE", "--db", "new.db", "--sheet",
                                UNWRITABLE + ".csv"], "permission denied"),
    "batch timeout zero": (["batch", "SAMPLE", "--db", "new.db", "--file-timeout", "0"],
                           "`--file-timeout`"),
    "batch memory tiny": (["batch", "SAMPLE", "--db", "new.db", "--file-memory-mb", "5"],
                          "`--file-memory-mb`"),
    "list text file": (["db", "list", "--db", "notes.md"], "notes.md"),
    "list bad url": (["db", "list", "--db", "foo://bar"], "foo://bar"),
    "export unwritable": (["db", "export", UNWRITABLE + ".csv", "--db", "cells.db"],
                          "permission denied"),
    "plot unwritable": (["db", "plot", UNWRITABLE + ".png", "--db", "cells.db"],
                        "permission denied"),
}


@pytest.mark.parametrize("case", list(CASES))
def test_one_line_and_exit_2(stored, case):
    args, words = CASES[case]
    args = [SAMPLE.name if a == "SAMPLE" else a for a in args]
    line = _one_line(_run(args, stored))
    assert words.lower() in line.lower(), line
    assert not (stored / "new.db").exists()  # nothing was written for a bad command


def test_the_sample_prints_no_warnings(stored):
    """stderr holds only our lines: numerical warnings never reach it."""
    proc = _run(["analyze", SAMPLE.name, "--components", "3", "--bootstrap", "0"], stored)
    assert proc.returncode == 0 and proc.stderr == ""


_NOISY = """
import sys, warnings
import numpy as np
import passivefit.cli.demo as demo

def noisy(args):
    warnings.warn("something numerical", RuntimeWarning, stacklevel=1)
    np.log(np.zeros(1))  # divide by zero encountered in log
    return 0

demo.run = noisy
from passivefit.cli import main
sys.exit(main(["demo"]))
"""


def test_warnings_raised_in_a_command_stay_off_stderr(tmp_path):
    proc = subprocess.run([sys.executable, "-c", _NOISY], capture_output=True, text=True,
                          cwd=tmp_path, timeout=120)
    assert proc.returncode == 0 and proc.stderr == "", proc.stderr


# ------------------------------------------------------- permission denied (in-process)
def _deny(monkeypatch, target: Path) -> None:
    """Reading `target` fails with EACCES, as for a file without read permission."""
    real = builtins.open

    def guarded(file, *args, **kwargs):
        if isinstance(file, str | Path) and Path(file).resolve() == target.resolve():
            raise PermissionError(errno.EACCES, "Permission denied", str(file))
        return real(file, *args, **kwargs)

    monkeypatch.setattr(builtins, "open", guarded)


@pytest.mark.parametrize("command", [["analyze"], ["gui"]])
def test_permission_denied_on_a_file_is_one_line(tmp_path, monkeypatch, capsys, command):
    target = tmp_path / SAMPLE.name
    shutil.copy(SAMPLE, target)
    _deny(monkeypatch, target)
    monkeypatch.delenv("DISPLAY", raising=False)  # gui: the text fallback, no window
    monkeypatch.delenv("WAYLAND_DISPLAY", raising=False)
    monkeypatch.delenv("QT_QPA_PLATFORM", raising=False)
    monkeypatch.setattr(sys, "platform", "linux")
    assert cli.main([*command, str(target), "--bootstrap", "0"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err[-1] == (f"passivefit: error: {target}: permission denied; check its "
                       "permissions")
    assert "Traceback" not in "\n".join(err)


def test_a_database_that_fails_mid_batch_is_one_line(tmp_path, monkeypatch, capsys):
    from sqlalchemy.exc import OperationalError

    from passivefit.store.database import Database

    folder = tmp_path / "lab"
    folder.mkdir()
    for name in (SAMPLE.name, "LOL-2026-11-03-c1_CA1.nwb", "LOL-2026-11-19-c4_L5-pulses.nwb"):
        shutil.copy(SAMPLE.parent / name, folder / name)
    real = Database.store
    calls = []

    def store(self, *args, **kwargs):
        calls.append(1)
        if len(calls) > 1:
            raise OperationalError("INSERT", {}, Exception("database or disk is full"))
        return real(self, *args, **kwargs)

    monkeypatch.setattr(Database, "store", store)
    url = f"sqlite:///{tmp_path / 'cells.db'}"
    assert cli.main(["batch", str(folder), "--db", url, "--bootstrap", "0"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [f"passivefit: error: `--db` {url}: cannot write to the database (database "
                   "or disk is full); 1 recordings of this batch were stored before it "
                   "stopped; run the same command again to analyse the rest"]


# ------------------------------------------------------- a read-only mount
def _unshare_works() -> bool:
    if not sys.platform.startswith("linux") or shutil.which("unshare") is None:
        return False
    probe = subprocess.run(["unshare", "-rm", "true"], capture_output=True)
    return probe.returncode == 0


@pytest.mark.skipif(not _unshare_works(), reason="needs unprivileged mount namespaces")
def test_a_database_on_a_read_only_mount_can_be_listed(stored, tmp_path):
    import shlex

    folder = tmp_path / "ro"
    folder.mkdir()
    shutil.copy(stored / "cells.db", folder / "cells.db")
    before = sorted(p.name for p in folder.iterdir())
    command = " ".join(shlex.quote(a) for a in [*CLI, "db", "list", "--db",
                                                str(folder / "cells.db")])
    script = (f"mount --bind {folder} {folder} && mount -o remount,bind,ro {folder} && "
              f"touch {folder}/probe 2>/dev/null && exit 99; {command}")
    proc = subprocess.run(["unshare", "-rm", "sh", "-c", script], capture_output=True,
                          text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.splitlines()[-1] == "1 recordings, 1 cells"
    assert sorted(p.name for p in folder.iterdir()) == before
