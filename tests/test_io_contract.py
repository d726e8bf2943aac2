"""Every format keeps a recording through write -> load: the reader contract.

Each format's class subclasses `ReaderContract` and states what the format can hold
(its value tolerance, whether it carries the current, which metadata it keeps).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import struct
from pathlib import Path

import numpy as np
import pytest
from io_fixtures import CELL_ID, DATE, FILTER_HZ, PROTOCOL, charging_recording
from numpy.testing import assert_allclose

from passivefit.io import Recording, load, save


def _wall_clock(iso: str) -> dt.datetime:
    """A date as naive wall-clock time (formats differ in how they keep the zone)."""
    return dt.datetime.fromisoformat(iso).replace(tzinfo=None)


@pytest.fixture(scope="class", params=[20_000.0, 22_050.0], ids=["20kHz", "22.05kHz"])
def rate_hz(request):
    return request.param


@pytest.fixture(scope="class")
def written(request, tmp_path_factory, rate_hz):
    """(original, file, loaded) — written once per contract class and rate."""
    original = charging_recording(n_sweeps=3, n_samples=3000, rate_hz=rate_hz)
    folder = tmp_path_factory.mktemp("contract")
    path = save(original, folder / f"cell{request.cls.extension}")
    return original, path, load(path)


class ReaderContract:
    extension: str = ""
    format_name: str = ""
    keeps_current: bool = True
    kept_metadata: dict = {}
    #: float32 for formats whose samples come from a 16-bit ADC (half the memory)
    voltage_dtype = np.float64

    def voltage_tolerance(self, written: Recording, path: Path) -> float:
        """Largest allowed |read - written| voltage, in V."""
        raise NotImplementedError

    # -- the contract
    def test_voltage_round_trip(self, written):
        original, path, read = written
        atol = self.voltage_tolerance(original, path)
        for a, b in zip(original.sweeps, read.sweeps, strict=True):
            assert b.voltage.dtype == self.voltage_dtype
            assert_allclose(b.voltage, a.voltage, rtol=0, atol=atol)

    def test_sample_rate_exact(self, written, rate_hz):
        _, _, read = written
        assert read.sample_rate_hz == rate_hz

    def test_sweep_count_and_indices(self, written):
        original, _, read = written
        assert len(read.sweeps) == len(original.sweeps)
        assert [s.index for s in read.sweeps] == list(range(len(original.sweeps)))

    def test_current_kept_or_absent(self, written):
        original, _, read = written
        assert read.has_current is self.keeps_current
        if self.keeps_current:
            for a, b in zip(original.sweeps, read.sweeps, strict=True):
                # pA stored with >= float32 precision; the step is -40..-80 pA
                assert_allclose(b.current, a.current, rtol=1e-6, atol=1e-18)

    def test_no_current_stays_none(self, tmp_path):
        original = charging_recording(n_sweeps=2, n_samples=3000, with_current=False)
        read = load(save(original, tmp_path / f"nocurrent{self.extension}"))
        assert all(s.current is None for s in read.sweeps)

    def test_sha256_of_file_bytes(self, written):
        _, path, read = written
        assert read.sha256 == hashlib.sha256(Path(path).read_bytes()).hexdigest()
        assert read.path == str(path)

    def test_format_name(self, written):
        assert written[2].format == self.format_name

    def test_metadata_kept(self, written):
        _, _, read = written
        for key, expected in self.kept_metadata.items():
            if key == "date":
                assert _wall_clock(read.metadata["date"]) == _wall_clock(expected)
            else:
                assert read.metadata[key] == expected, key

    def test_validates(self, written):
        written[2].validate()  # load() ran it too; the data are analysable


# What NWB and the sweep table both keep of the test recording's metadata.
FULL_METADATA = {
    "cell_id": CELL_ID,
    "date": DATE,
    "temperature_C": 32.0,
    "lab": "Lindqvist-Okafor Lab of Dendritic Physiology",
    "protocol": PROTOCOL,
    "filter_hz": FILTER_HZ,
}


class TestNWBContract(ReaderContract):
    extension = ".nwb"
    format_name = "nwb"
    kept_metadata = FULL_METADATA

    def voltage_tolerance(self, written, path):
        # stored as float32 mV: half an ulp of the largest |mV| value
        largest_mV = max(np.max(np.abs(s.voltage)) for s in written.sweeps) * 1e3
        return float(np.spacing(np.float32(largest_mV))) * 1e-3

    def test_file_passes_the_nwb_validator(self, written):
        # external check: the NWB schema validator shipped with pynwb (open standard)
        from pynwb import validate

        assert list(validate(path=str(written[1]))) == []


class TestCSVContract(ReaderContract):
    extension = ".csv"
    format_name = "csv"
    kept_metadata = FULL_METADATA

    def voltage_tolerance(self, written, path):
        # 10 significant digits: each value within 5e-10 of its own magnitude
        return 5e-10 * max(np.max(np.abs(s.voltage)) for s in written.sweeps)


class TestTSVContract(TestCSVContract):
    extension = ".tsv"

    def test_tab_separated(self, written):
        header = [ln for ln in Path(written[1]).read_text().splitlines() if not ln.startswith("#")][
            0
        ]
        assert header.split("\t")[:3] == ["time_ms", "V0_mV", "I0_pA"]


def _abf1_int16_and_gain(path: Path) -> tuple[np.ndarray, float, int]:
    """Samples and mV-per-count of an ABF 1 file, decoded here from the header fields.

    Independent of pyabf: offsets from the ABF 1 header layout (lDataSectionPtr @40,
    lActualAcqLength @10, fADCRange @244, lADCResolution @252, fADCProgrammableGain
    @730, fInstrumentScaleFactor @922, fSignalGain @1050) — from memory, cross-read
    against the writer's struct offsets.
    """
    raw = Path(path).read_bytes()
    (ptr,) = struct.unpack_from("i", raw, 40)
    (count,) = struct.unpack_from("i", raw, 10)
    (adc_range,) = struct.unpack_from("f", raw, 244)
    (resolution,) = struct.unpack_from("i", raw, 252)
    (prog_gain,) = struct.unpack_from("f", raw, 730)
    (scale,) = struct.unpack_from("f", raw, 922)
    (signal_gain,) = struct.unpack_from("f", raw, 1050)
    samples = np.frombuffer(raw, dtype="<i2", count=count, offset=ptr * 512)
    mV_per_count = adc_range / resolution / scale / signal_gain / prog_gain
    return samples, mV_per_count, ptr


class TestABF1Contract(ReaderContract):
    extension = ".abf"
    format_name = "abf"
    keeps_current = False  # ABF 1 from pyabf's writer has no command waveform
    voltage_dtype = np.float32  # int16 samples
    kept_metadata = {"date": DATE, "comment": CELL_ID, "abf_version": 1, "filter_hz": FILTER_HZ}

    def voltage_tolerance(self, written, path):
        _, mV_per_count, _ = _abf1_int16_and_gain(path)
        largest = max(float(np.max(np.abs(s.voltage))) for s in written.sweeps)
        # values are truncated toward zero (< one count), then held as float32 (half an
        # ulp: eps/2 relative)
        return mV_per_count * 1e-3 + 0.5 * np.finfo(np.float32).eps * largest

    def test_values_are_the_stored_counts_times_the_gain(self, written):
        _, path, read = written
        samples, mV_per_count, ptr = _abf1_int16_and_gain(path)
        assert ptr == 12  # data behind a full 6144-byte header
        stacked = np.concatenate([s.voltage for s in read.sweeps])
        # value by value: pyabf scales in float32
        assert_allclose(stacked, samples * mV_per_count * 1e-3, rtol=2e-7, atol=0)
