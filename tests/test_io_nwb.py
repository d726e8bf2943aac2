"""NWB files written by other tools: table slices, plain pairs, scaling, metadata."""

from __future__ import annotations

import datetime as dt

import h5py
import numpy as np
import pytest
from numpy.testing import assert_allclose
from pynwb import NWBHDF5IO, NWBFile
from pynwb.file import Subject
from pynwb.icephys import CurrentClampSeries, CurrentClampStimulusSeries, VoltageClampSeries

from passivefit.io import LoadError, load

RATE = 10_000.0
N = 1500


def _file(**kwargs) -> tuple[NWBFile, object]:
    nwb = NWBFile(
        session_description="steps",
        identifier="LOL-2026-11-05-c3",
        session_start_time=dt.datetime(2026, 11, 5, 9, 30, tzinfo=dt.UTC),
        **kwargs,
    )
    device = nwb.create_device(name="amp")
    electrode = nwb.create_icephys_electrode(name="e0", description="patch", device=device)
    return nwb, electrode


def _write(nwb, path):
    with NWBHDF5IO(str(path), "w") as io:
        io.write(nwb)
    return path


def _ramp(k):
    return np.linspace(0, 1, N) + k


def test_pairs_by_sweep_number_with_conversion_and_offset(tmp_path):
    # no intracellular_recordings table: acquisition + stimulus paired by sweep_number
    nwb, electrode = _file()
    for k in (1, 0):  # stored out of order
        counts = (np.arange(N) % 50 + 100 * k).astype(np.int16)
        nwb.add_acquisition(
            CurrentClampSeries(
                name=f"v{k}",
                data=counts,
                electrode=electrode,
                gain=1.0,
                rate=RATE,
                conversion=1e-4,
                offset=-0.07,
                sweep_number=np.uint32(k),
            )
        )
        nwb.add_stimulus(
            CurrentClampStimulusSeries(
                name=f"i{k}",
                data=np.full(N, -30.0 - k),
                electrode=electrode,
                gain=1.0,
                rate=RATE,
                conversion=1e-12,
                sweep_number=np.uint32(k),
            )
        )
    rec = load(_write(nwb, tmp_path / "pairs.nwb"))
    assert rec.sample_rate_hz == RATE
    assert_allclose(rec.sweeps[0].voltage, (np.arange(N) % 50) * 1e-4 - 0.07)
    assert_allclose(rec.sweeps[1].voltage, (np.arange(N) % 50 + 100) * 1e-4 - 0.07)
    assert_allclose(rec.sweeps[1].current, -31e-12)


def test_table_rows_slice_one_long_series(tmp_path):
    nwb, electrode = _file()
    long_v = np.concatenate([_ramp(0), _ramp(5)]) * 1e-3
    long_i = np.concatenate([np.full(N, -20.0), np.full(N, -40.0)]) * 1e-12
    response = CurrentClampSeries(
        name="v", data=long_v, electrode=electrode, gain=1.0, rate=RATE, sweep_number=np.uint32(0)
    )
    stimulus = CurrentClampStimulusSeries(
        name="i", data=long_i, electrode=electrode, gain=1.0, rate=RATE, sweep_number=np.uint32(0)
    )
    for k in range(2):
        nwb.add_intracellular_recording(
            electrode=electrode,
            response=response,
            stimulus=stimulus,
            response_start_index=k * N,
            response_index_count=N,
            stimulus_start_index=k * N,
            stimulus_index_count=N,
        )
    rec = load(_write(nwb, tmp_path / "slices.nwb"))
    assert len(rec.sweeps) == 2
    assert_allclose(rec.sweeps[1].voltage, _ramp(5) * 1e-3)
    assert_allclose(rec.sweeps[1].current, -40e-12)


def test_voltage_clamp_rows_are_skipped(tmp_path):
    nwb, electrode = _file()
    vc = VoltageClampSeries(
        name="vc",
        data=_ramp(0) * 1e-12,
        electrode=electrode,
        gain=1.0,
        rate=RATE,
        sweep_number=np.uint32(0),
    )
    nwb.add_intracellular_recording(electrode=electrode, response=vc)
    with pytest.raises(LoadError, match="no current-clamp sweeps in this NWB file"):
        load(_write(nwb, tmp_path / "vc.nwb"))


def test_metadata_from_the_file(tmp_path):
    nwb, electrode = _file(
        lab="Lindqvist-Okafor Lab of Dendritic Physiology",
        institution="Invented Institute",
        notes="Bath temperature: 31.5 C, slice 2",
        protocol="steps -50..+10 pA",
        subject=Subject(subject_id="mouse-17", species="Mus musculus"),
    )
    nwb.add_acquisition(
        CurrentClampSeries(
            name="v0",
            data=_ramp(0) * 1e-3,
            electrode=electrode,
            gain=1.0,
            rate=RATE,
            sweep_number=np.uint32(0),
        )
    )
    meta = load(_write(nwb, tmp_path / "meta.nwb")).metadata
    assert meta["cell_id"] == "LOL-2026-11-05-c3"  # no electrode cell_id: the identifier
    assert meta["date"] == "2026-11-05T09:30:00+00:00"
    assert meta["temperature_C"] == 31.5
    assert meta["protocol"] == "steps -50..+10 pA"
    assert (meta["lab"], meta["institution"]) == (
        "Lindqvist-Okafor Lab of Dendritic Physiology",
        "Invented Institute",
    )
    assert (meta["subject_id"], meta["species"], meta["electrode"]) == (
        "mouse-17",
        "Mus musculus",
        "patch",
    )


def test_hdf5_that_is_not_nwb(tmp_path):
    path = tmp_path / "plain.nwb"
    with h5py.File(path, "w") as f:
        f["trace"] = np.zeros(100)
    with pytest.raises(LoadError, match="HDF5 but not a readable NWB file"):
        load(path)


def test_timestamps_instead_of_rate(tmp_path):
    nwb, electrode = _file()
    nwb.add_acquisition(
        CurrentClampSeries(
            name="v0",
            data=_ramp(0) * 1e-3,
            electrode=electrode,
            gain=1.0,
            timestamps=np.arange(N) / 8000.0,
            sweep_number=np.uint32(0),
        )
    )
    assert load(_write(nwb, tmp_path / "ts.nwb")).sample_rate_hz == 8000.0
