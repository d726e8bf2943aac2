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


# ---------------------------------------------------------------- ABF header fields

# (offset, struct format) of the header's integer fields that size what is read:
# ABF 1 as pyabf's abf1/headerV1.py reads them, ABF 2 the header and section map
# (abf2/headerV2.py, abf2/section.py: block, bytes per entry, entries per section).
ABF1_FIELDS = [(10, "<i"), (14, "<h"), (16, "<i"), (40, "<i"), (44, "<i"), (48, "<i"),
               (92, "<i"), (96, "<i"), (100, "<h"), (120, "<h"), (138, "<i")]
ABF2_FIELDS = [(12, "<I")] + [(at + part, "<I" if part < 8 else "<i")
                              for at in range(76, 348, 16) for part in (0, 4, 8)]
REAL_ABF2 = Path(__file__).parent / "data" / "real" / "File_axon_5.abf"
MEMORY_BOUND = 256 * 2**20  # bytes: the largest valid file here needs far less
HUGE = [0, 1, -1, 2**15 - 1, -(2**15), 2**16, 2**31 - 1, -(2**31), 2**32 - 1]


class _MemoryGuard:
    """Cap the process's data segment (Linux) so a runaway allocation fails at once.

    A load that tries to allocate gigabytes then raises MemoryError, which the test
    reports, instead of exhausting the machine; tracemalloc measures the peak too.
    """

    def __enter__(self):
        import resource

        self.resource = resource
        self.old = resource.getrlimit(resource.RLIMIT_DATA)
        with open("/proc/self/status") as f:
            used_kb = next(int(line.split()[1]) for line in f if line.startswith("VmData:"))
        cap = used_kb * 1024 + 4 * MEMORY_BOUND
        hard = self.old[1]
        if hard != resource.RLIM_INFINITY:
            cap = min(cap, hard)
        resource.setrlimit(resource.RLIMIT_DATA, (cap, hard))
        return self

    def __exit__(self, *exc):
        self.resource.setrlimit(self.resource.RLIMIT_DATA, self.old)
        return False


def _value_for(fmt: str, value: int) -> int:
    bits = struct.calcsize(fmt) * 8
    value %= 2**bits
    signed = fmt[-1].islower()
    return value - 2**bits if signed and value >= 2 ** (bits - 1) else value


def _load_bounded(path: Path, data: bytes) -> None:
    import tracemalloc

    path.write_bytes(data)
    tracemalloc.start()
    try:
        with _MemoryGuard():
            try:
                recording = load(path)
            except LoadError as err:
                assert "MemoryError" not in str(err), str(err)  # refused only once out of memory
                recording = None
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < MEMORY_BOUND, f"a {len(data)}-byte file made the reader allocate {peak} bytes"
    if recording is not None:
        recording.validate()


needs_linux = pytest.mark.skipif(not Path("/proc/self/status").exists(),
                                 reason="the memory guard reads /proc (Linux)")


@needs_linux
@pytest.mark.parametrize("version", ["abf1", "abf2"])
@FUZZ
@given(data=st.data())
def test_abf_header_fields_never_allocate_beyond_the_file(tmp_path, folder, version, data):
    if version == "abf1":
        valid, fields = _valid_bytes(".abf", folder), ABF1_FIELDS
    else:
        valid, fields = REAL_ABF2.read_bytes(), ABF2_FIELDS
    changes = data.draw(st.lists(st.tuples(
        st.sampled_from(fields), st.one_of(st.sampled_from(HUGE), st.integers(-(2**31), 2**32))),
        min_size=1, max_size=3))
    header = bytearray(valid)
    for (at, fmt), value in changes:
        struct.pack_into(fmt, header, at, _value_for(fmt, value))
    _load_bounded(tmp_path / f"header_{version}.abf", bytes(header))


@needs_linux
def test_a_sweep_count_of_two_billion_is_refused_at_once(tmp_path, folder):
    # issue 15: lActualEpisodes = 2**31 - 1 made pyabf list two billion sweeps
    for valid, at in ((_valid_bytes(".abf", folder), 16), (REAL_ABF2.read_bytes(), 12)):
        header = bytearray(valid)
        struct.pack_into("<i", header, at, 2**31 - 1)
        path = tmp_path / "episodes.abf"
        path.write_bytes(bytes(header))
        with _MemoryGuard(), pytest.raises(LoadError, match="2147483647 sweeps"):
            load(path)


@needs_linux
def test_a_huge_sparse_table_is_refused_before_reading(tmp_path):
    # issue 15: a 2 GB sparse CSV made the reader hold 4.2 GB
    from passivefit.io.text import MAX_TEXT_BYTES

    path = tmp_path / "huge.csv"
    with open(path, "wb") as f:
        f.write(b"time_ms,V0_mV\n0,-70\n")
        f.truncate(MAX_TEXT_BYTES + 1)  # sparse: no disk used, zeros read back
    with _MemoryGuard(), pytest.raises(LoadError, match=r"larger than the 1024 MiB"):
        load(path)


def test_a_table_within_the_bound_is_read(tmp_path, monkeypatch):
    from passivefit.io import text

    path = save(charging_recording(n_sweeps=2, n_samples=1200), tmp_path / "ok.csv")
    monkeypatch.setattr(text, "MAX_TEXT_BYTES", path.stat().st_size)
    assert len(load(path).sweeps) == 2
    monkeypatch.setattr(text, "MAX_TEXT_BYTES", path.stat().st_size - 1)
    with pytest.raises(LoadError, match="split it into files"):
        load(path)
