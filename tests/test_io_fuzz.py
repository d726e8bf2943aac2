"""Damaged files give a LoadError or a recording that validates — never another error.

Property-based: valid files of each format are truncated, have bytes flipped, or get
NaNs written into them; `load` must either refuse them with LoadError or return data
that passes `Recording.validate()`.
"""

from __future__ import annotations

import functools
import struct
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from io_fixtures import charging_recording

from passivefit.io import LoadError, load, save

FUZZ = settings(
    max_examples=40,
    derandomize=True,
    database=None,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture],
)
# NWB examples cost ~0.1 s each (HDF5 open + pynwb object mapping)
NWB = pytest.param(".nwb", marks=pytest.mark.slow)
FORMATS = [".abf", NWB, ".csv"]


@functools.cache
def _valid_bytes(ext: str, folder: str) -> bytes:
    path = save(charging_recording(n_sweeps=2, n_samples=1200), Path(folder) / f"valid{ext}")
    return path.read_bytes()


def _load_or_refuse(path: Path, data: bytes) -> None:
    path.write_bytes(data)
    try:
        recording = load(path)
    except LoadError:
        return
    recording.validate()  # a load that succeeds must hand over analysable data


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> str:
    return str(tmp_path_factory.mktemp("fuzz"))


@pytest.mark.parametrize("ext", FORMATS)
@FUZZ
@given(fraction=st.floats(0.0, 1.0, exclude_max=True))
def test_truncated_anywhere(tmp_path, folder, ext, fraction):
    valid = _valid_bytes(ext, folder)
    _load_or_refuse(tmp_path / f"cut{ext}", valid[: int(len(valid) * fraction)])


@pytest.mark.parametrize("ext", FORMATS)
@FUZZ
@given(
    flips=st.lists(
        st.tuples(st.floats(0.0, 1.0, exclude_max=True), st.integers(1, 255)),
        min_size=1,
        max_size=12,
    )
)
def test_flipped_bytes(tmp_path, folder, ext, flips):
    data = bytearray(_valid_bytes(ext, folder))
    for where, mask in flips:
        data[int(where * len(data))] ^= mask
    _load_or_refuse(tmp_path / f"flipped{ext}", bytes(data))


@pytest.mark.parametrize("ext", [".abf", NWB])
@FUZZ
@given(spots=st.lists(st.floats(0.0, 1.0, exclude_max=True), min_size=1, max_size=8))
def test_nan_patterns_written_into_binary_files(tmp_path, folder, ext, spots):
    data = bytearray(_valid_bytes(ext, folder))
    for where in spots:
        at = min(int(where * len(data)), len(data) - 4)
        struct.pack_into("<f", data, at, float("nan"))
    _load_or_refuse(tmp_path / f"nan{ext}", bytes(data))


@FUZZ
@given(cells=st.lists(st.tuples(st.integers(0, 1199), st.integers(0, 4)), min_size=1, max_size=8))
def test_nan_cells_in_a_table(tmp_path, folder, cells):
    lines = _valid_bytes(".csv", folder).decode().splitlines()
    header_at = next(i for i, line in enumerate(lines) if not line.startswith("#"))
    for row, column in cells:
        values = lines[header_at + 1 + row].split(",")
        values[column] = "nan"
        lines[header_at + 1 + row] = ",".join(values)
    path = tmp_path / "nan.csv"
    path.write_text("\n".join(lines))
    with pytest.raises(LoadError, match="NaN|time value"):
        load(path)
