"""Bad input of every kind gives one LoadError that names the problem."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from io_fixtures import charging_recording

from passivefit.io import LoadError, Recording, Sweep, load, save

EXTENSIONS = [".abf", ".nwb", ".csv"]


def _saved(tmp_path: Path, ext: str, recording: Recording | None = None) -> Path:
    return save(
        recording or charging_recording(n_sweeps=2, n_samples=2500), tmp_path / f"cell{ext}"
    )


@pytest.mark.parametrize("ext", EXTENSIONS)
def test_missing_file(tmp_path, ext):
    with pytest.raises(LoadError, match="no such file; check the path"):
        load(tmp_path / f"absent{ext}")


@pytest.mark.parametrize("ext", EXTENSIONS)
def test_empty_file(tmp_path, ext):
    path = tmp_path / f"empty{ext}"
    path.write_bytes(b"")
    with pytest.raises(LoadError, match=r"the file is empty \(0 bytes\)"):
        load(path)


def test_folder_is_not_a_file(tmp_path):
    folder = tmp_path / "cells.abf"
    folder.mkdir()
    with pytest.raises(LoadError, match="folder, not a recording file"):
        load(folder)


@pytest.mark.parametrize(
    ("ext", "message"),
    [
        (".abf", "truncated ABF file: the header promises"),
        (".nwb", r"unreadable HDF5 \(truncated or damaged"),
        (".csv", r"line \d+: \d values where the header has 5"),
    ],
)
def test_truncated_file(tmp_path, ext, message):
    path = _saved(tmp_path, ext)
    raw = path.read_bytes()
    path.write_bytes(raw[: len(raw) * 2 // 3 + 7])  # +7: cut a CSV row mid-way
    with pytest.raises(LoadError, match=message):
        load(path)


@pytest.mark.parametrize(
    ("ext", "message"),
    [
        (".abf", r"not an ABF file \(bad signature .*\); passivefit reads .abf, .nwb, .csv"),
        (".nwb", r"not an NWB file \(no HDF5 signature\); passivefit reads .abf"),
        (".csv", r"not a text file \(undecodable bytes\)"),
    ],
)
def test_random_bytes_with_the_right_extension(tmp_path, ext, message):
    path = tmp_path / f"noise{ext}"
    noise = np.random.default_rng(7).integers(0, 256, 4096, dtype=np.uint8).tobytes()
    path.write_bytes(b"\xff\xfe" + noise)  # never valid UTF-8, no signature
    with pytest.raises(LoadError, match=message):
        load(path)


@pytest.mark.parametrize("ext", [".nwb", ".csv"])
def test_nan_filled_data(tmp_path, ext):
    recording = charging_recording(n_sweeps=2, n_samples=2500)
    recording.sweeps[1].voltage[:] = np.nan
    path = _saved(tmp_path, ext, recording)
    with pytest.raises(LoadError, match="sweep 1 holds NaN or infinite voltages"):
        load(path)


def test_abf_writer_refuses_nan(tmp_path):
    recording = charging_recording(n_sweeps=1, n_samples=2500)
    recording.sweeps[0].voltage[10] = np.nan
    with pytest.raises(ValueError, match="NaN or infinite values; ABF 1 cannot"):
        save(recording, tmp_path / "nan.abf")


@pytest.mark.parametrize("ext", EXTENSIONS)
def test_too_short_sweeps(tmp_path, ext):
    path = _saved(tmp_path, ext, charging_recording(n_sweeps=2, n_samples=60))
    with pytest.raises(LoadError, match="sweep 0 has only 60 samples; at least 100"):
        load(path)


@pytest.mark.parametrize("ext", EXTENSIONS)
def test_flat_sweep(tmp_path, ext):
    flat = Recording([Sweep(0, np.full(2000, -0.07))], 20_000.0)
    path = _saved(tmp_path, ext, flat)
    with pytest.raises(LoadError, match="sweep 0 is flat"):
        load(path)


def test_header_less_csv(tmp_path):
    path = tmp_path / "bare.csv"
    path.write_text("0.0,-70.1\n0.05,-70.2\n")
    with pytest.raises(LoadError, match="line 1: no header row .* add one such as time_ms"):
        load(path)


def test_unknown_extension(tmp_path):
    path = tmp_path / "cell.xyz"
    path.write_text("time_ms,V0_mV\n")
    with pytest.raises(
        LoadError, match=r"unknown file type \(\.xyz\); passivefit reads \.abf, \.nwb, \.csv, \.tsv"
    ):
        load(path)


@pytest.mark.parametrize(("written_as", "named"), [(".nwb", ".csv"), (".abf", ".dat")])
def test_content_wins_over_a_lying_extension(tmp_path, written_as, named):
    path = _saved(tmp_path, written_as)
    renamed = path.rename(path.with_suffix(named))
    assert load(renamed).format == written_as.lstrip(".")


def test_save_unknown_extension(tmp_path):
    with pytest.raises(ValueError, match=r"cannot write \.xlsx files; passivefit writes \.nwb"):
        save(charging_recording(), tmp_path / "cell.xlsx")


def test_io_import_is_light_and_qt_free(tmp_path):
    # the io layer never imports Qt, and pynwb/pyabf only when a file needs them
    path = _saved(tmp_path, ".csv")
    code = (
        "import sys; import passivefit.io as io; "
        "heavy = [m for m in ('pynwb', 'pyabf', 'scipy') if m in sys.modules]; "
        "assert not heavy, heavy; io.load(sys.argv[1]); "
        "qt = [m for m in sys.modules if m.startswith(('PySide6', 'pyqtgraph'))]; "
        "assert not qt, qt"
    )
    subprocess.run([sys.executable, "-c", code, str(path)], check=True)
