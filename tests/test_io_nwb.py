"""NWB files written by other tools: table slices, plain pairs, scaling, metadata;
the h5py reader gives what the pynwb reader gives, and hands unusual files to it."""

from __future__ import annotations

import datetime as dt
import subprocess
import sys

import h5py
import numpy as np
import pytest
from io_fixtures import FILTER_HZ, charging_recording
from numpy.testing import assert_allclose, assert_array_equal
from pynwb import NWBHDF5IO, NWBFile
from pynwb.file import Subject
from pynwb.icephys import (
    CurrentClampSeries,
    CurrentClampStimulusSeries,
    IZeroClampSeries,
    VoltageClampSeries,
)

from passivefit.io import LoadError, Recording, load, save
from passivefit.io import nwb as nwb_reader
from passivefit.io.nwb import filter_hz_from_text, read_nwb_hdf5, read_nwb_pynwb
from passivefit.model import schema as S

RATE = 10_000.0
N = 1500


def _file(filtering=None, **kwargs) -> tuple[NWBFile, object]:
    nwb = NWBFile(
        session_description="steps",
        identifier="LOL-2026-11-05-c3",
        session_start_time=dt.datetime(2026, 11, 5, 9, 30, tzinfo=dt.UTC),
        **kwargs,
    )
    device = nwb.create_device(name="amp")
    electrode = nwb.create_icephys_electrode(
        name="e0", description="patch", device=device, filtering=filtering
    )
    return nwb, electrode


def _write(nwb, path):
    with NWBHDF5IO(str(path), "w") as io:
        io.write(nwb)
    return path


def _ramp(k):
    return np.linspace(0, 1, N) + k - 65  # mV: near a resting potential


def _pairs_file(path):
    """No intracellular_recordings table: acquisition + stimulus paired by sweep_number."""
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
    return _write(nwb, path)


def test_pairs_by_sweep_number_with_conversion_and_offset(tmp_path):
    rec = load(_pairs_file(tmp_path / "pairs.nwb"))
    assert rec.sample_rate_hz == RATE
    assert_allclose(rec.sweeps[0].voltage, (np.arange(N) % 50) * 1e-4 - 0.07)
    assert_allclose(rec.sweeps[1].voltage, (np.arange(N) % 50 + 100) * 1e-4 - 0.07)
    assert_allclose(rec.sweeps[1].current, -31e-12)


def _slices_file(path):
    """Two table rows cut from one long response and one long stimulus series."""
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
    return _write(nwb, path)


def test_table_rows_slice_one_long_series(tmp_path):
    rec = load(_slices_file(tmp_path / "slices.nwb"))
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
    with pytest.raises(LoadError, match=r"a voltage-clamp recording \(VoltageClampSeries; no "
                                        r"current-clamp sweeps in this NWB file\); passivefit "
                                        r"needs current clamp with current steps"):
        load(_write(nwb, tmp_path / "vc.nwb"))


def _metadata_file(path, filtering="Bessel 4-pole low-pass at 2.5 kHz, high-pass off"):
    nwb, electrode = _file(
        filtering=filtering,
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
    return _write(nwb, path)


def test_metadata_from_the_file(tmp_path):
    meta = load(_metadata_file(tmp_path / "meta.nwb")).metadata
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
    assert meta["filter_hz"] == 2500.0  # from the electrode's `filtering` text


@pytest.mark.parametrize(
    ("text", "hz"),
    [
        ("low-pass 4-pole Bessel, -3 dB at 5000 Hz", 5000.0),
        ("Bessel 10KHz", 10_000.0),
        ("lowpass 3.3 kHz", 3300.0),
        ("high-pass 1 Hz, low-pass 2 kHz", 2000.0),
        ("highpass 0.1 Hz", None),
        ("corner 1e4 Hz", 10_000.0),
        ("sampled at 20 kHz after a 5 kHz low-pass", 5000.0),
        ("4-pole Bessel, -3 dB", None),
        ("filter bypassed", None),
        ("0 Hz", None),
        ("", None),
        (None, None),
    ],
)
def test_filter_frequency_from_free_text(text, hz):
    assert filter_hz_from_text(text) == hz


def test_written_filter_is_in_the_electrode_filtering_field(tmp_path):
    recording = charging_recording(n_sweeps=1, n_samples=2000)
    recording.metadata["filter_hz"] = 2345.5
    path = save(recording, tmp_path / "cell.nwb")
    # read with pynwb's object model, not through passivefit's readers
    with NWBHDF5IO(str(path), "r") as io:
        (electrode,) = io.read().icephys_electrodes.values()
        assert electrode.filtering == "low-pass, -3 dB at 2345.5 Hz"
    assert load(path).metadata["filter_hz"] == 2345.5


def test_no_filter_writes_no_filtering_field(tmp_path):
    recording = charging_recording(n_sweeps=1, n_samples=2000)
    recording.metadata["filter_hz"] = None  # as the simulator gives for no filter
    path = save(recording, tmp_path / "cell.nwb")
    with h5py.File(path, "r") as f:
        assert "filtering" not in f["general/intracellular_ephys/electrode_0"]
    assert "filter_hz" not in load(path).metadata


@pytest.mark.parametrize("value", [-5.0, 0.0, float("nan"), "fast"])
def test_bad_filter_metadata_is_refused_when_writing(tmp_path, value):
    recording = charging_recording(n_sweeps=1, n_samples=2000)
    recording.metadata["filter_hz"] = value
    with pytest.raises(ValueError, match="metadata `filter_hz` is .*; give the low-pass corner"):
        save(recording, tmp_path / "cell.nwb")


def test_hdf5_that_is_not_nwb(tmp_path):
    path = tmp_path / "plain.nwb"
    with h5py.File(path, "w") as f:
        f["trace"] = np.zeros(100)
    with pytest.raises(LoadError, match="HDF5 but not a readable NWB file"):
        load(path)


def _timestamps_file(path):
    """A CurrentClampSeries sampled by timestamps instead of a rate."""
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
    return _write(nwb, path)


def test_timestamps_instead_of_rate(tmp_path):
    assert load(_timestamps_file(tmp_path / "ts.nwb")).sample_rate_hz == 8000.0


# ---------------------------------------------------------------- h5py reader == pynwb reader


def _saved(path, **kwargs):
    """A file as `save` writes it (the reader-contract files): table layout."""
    return save(charging_recording(n_sweeps=3, n_samples=3000, **kwargs), path)


def _mixed_table_file(path):
    """Table rows of voltage clamp, I=0 clamp and current clamp: only the last is a sweep."""
    nwb, electrode = _file()
    common = {"electrode": electrode, "gain": 1.0, "rate": RATE, "sweep_number": np.uint32(0)}
    vc = VoltageClampSeries(name="vc", data=_ramp(0) * 1e-12, **common)
    izero = IZeroClampSeries(name="i0", data=_ramp(1) * 1e-3, **common)
    cc = CurrentClampSeries(name="cc", data=_ramp(2) * 1e-3, **common)
    step = CurrentClampStimulusSeries(name="step", data=np.full(N, -25e-12), **common)
    nwb.add_intracellular_recording(electrode=electrode, response=vc)
    nwb.add_intracellular_recording(electrode=electrode, response=izero)
    nwb.add_intracellular_recording(electrode=electrode, response=cc, stimulus=step)
    return _write(nwb, path)


def _float32_conversion_file(path):
    """Pairs whose conversion and offset are stored as float32, as some writers do."""
    _pairs_file(path)
    with h5py.File(path, "r+") as f:
        for name in ("acquisition/v0/data", "acquisition/v1/data"):
            attrs = f[name].attrs
            attrs["conversion"] = np.float32(attrs["conversion"])
            attrs["offset"] = np.float32(attrs["offset"])
    return path


SAME_READING = {
    "saved, table + stimulus, 20 kHz": lambda p: _saved(p),
    "saved, table + stimulus, 22.05 kHz": lambda p: _saved(p, rate_hz=22_050.0),
    "saved, table, no stimulus": lambda p: _saved(p, with_current=False),
    "acquisition/stimulus pairs, int16 + offset": _pairs_file,
    "acquisition only, full metadata": _metadata_file,
    "table slices of one long series": _slices_file,
    "table with voltage-clamp and I=0 rows": _mixed_table_file,
    "float32 conversion and offset": _float32_conversion_file,
    "filtering text without a frequency": lambda p: _metadata_file(p, filtering="bypass"),
}


def _assert_same_recording(direct: Recording, reference: Recording) -> None:
    assert direct.sample_rate_hz == reference.sample_rate_hz
    assert direct.metadata == reference.metadata
    assert [s.index for s in direct.sweeps] == [s.index for s in reference.sweeps]
    for a, b in zip(direct.sweeps, reference.sweeps, strict=True):
        assert_array_equal(a.voltage, b.voltage)  # bit for bit
        assert (a.current is None) == (b.current is None)
        if b.current is not None:
            assert_array_equal(a.current, b.current)


@pytest.mark.parametrize("build", SAME_READING.values(), ids=SAME_READING.keys())
def test_h5py_reader_gives_what_pynwb_gives(tmp_path, build):
    path = build(tmp_path / "cell.nwb")
    direct = read_nwb_hdf5(path)
    assert direct is not None, "the h5py reader declined a common layout"
    _assert_same_recording(direct, read_nwb_pynwb(path))


FILTER_OF = {
    "saved, table + stimulus, 20 kHz": FILTER_HZ,
    "acquisition only, full metadata": 2500.0,
    "filtering text without a frequency": None,
}


@pytest.mark.parametrize("name", FILTER_OF)
def test_both_readers_read_the_filter(tmp_path, name):
    path = SAME_READING[name](tmp_path / "cell.nwb")
    for reader in (read_nwb_hdf5, read_nwb_pynwb):
        assert reader(path).metadata.get("filter_hz") == FILTER_OF[name], reader.__name__


def test_h5py_reader_keeps_the_written_values(tmp_path):
    # independent of both readers: what `save` was given, within float32 storage
    original = charging_recording(n_sweeps=2, n_samples=3000)
    direct = read_nwb_hdf5(save(original, tmp_path / "cell.nwb"))
    for a, b in zip(original.sweeps, direct.sweeps, strict=True):
        assert_allclose(b.voltage, a.voltage, rtol=1e-6, atol=0)
        assert_allclose(b.current, a.current, rtol=1e-6, atol=1e-24)
    assert direct.metadata["cell_id"] == "LOL-2026-11-03-c1"


def _count_pynwb_reads(monkeypatch) -> list:
    """Calls of the pynwb reader from here on (it still reads)."""
    calls: list = []
    read = nwb_reader.read_nwb_pynwb

    def spy(path, channel=None):
        calls.append(path)
        return read(path, channel)

    monkeypatch.setattr(nwb_reader, "read_nwb_pynwb", spy)
    return calls


def _two_electrodes_file(path):
    nwb, electrode = _file()
    nwb.create_icephys_electrode(name="e1", description="second", device=electrode.device)
    nwb.add_acquisition(
        CurrentClampSeries(
            name="v0", data=_ramp(0) * 1e-3, electrode=electrode, gain=1.0, rate=RATE
        )
    )
    return _write(nwb, path)


@pytest.mark.parametrize(
    "build", [_timestamps_file, _two_electrodes_file], ids=["timestamps", "two electrodes"]
)
def test_unusual_files_fall_back_to_pynwb(tmp_path, monkeypatch, build):
    path = build(tmp_path / "unusual.nwb")
    assert read_nwb_hdf5(path) is None
    calls = _count_pynwb_reads(monkeypatch)
    rec = load(path)
    assert calls == [path]
    _assert_same_recording(rec, read_nwb_pynwb(path))


def test_common_file_is_read_without_pynwb(tmp_path, monkeypatch):
    path = _saved(tmp_path / "cell.nwb")
    calls = _count_pynwb_reads(monkeypatch)
    assert len(load(path).sweeps) == 3
    assert calls == []


def test_mismatched_stimulus_keeps_the_pynwb_error(tmp_path):
    nwb, electrode = _file()
    common = {"electrode": electrode, "gain": 1.0, "rate": RATE, "sweep_number": np.uint32(0)}
    nwb.add_acquisition(CurrentClampSeries(name="v0", data=_ramp(0) * 1e-3, **common))
    nwb.add_stimulus(CurrentClampStimulusSeries(name="i0", data=np.zeros(N - 10), **common))
    path = _write(nwb, tmp_path / "mismatch.nwb")
    assert read_nwb_hdf5(path) is None
    with pytest.raises(LoadError, match=r"sweep 0: stimulus has 1490 samples, response 1500"):
        load(path)


def test_loading_a_plain_icephys_file_does_not_import_pynwb(tmp_path):
    path = _saved(tmp_path / "cell.nwb")
    code = (
        "import sys; from passivefit.io import load; rec = load(sys.argv[1]); "
        "assert len(rec.sweeps) == 3, rec; "
        "heavy = [m for m in ('pynwb', 'hdmf') if m in sys.modules]; "
        "assert not heavy, heavy"
    )
    subprocess.run([sys.executable, "-c", code, str(path)], check=True)


# ---------------------------------------------------------------- two electrodes, two cells


def _two_electrode_file(path, table: bool = True):
    """Two cells patched at once: electrode e0 rests at -70 mV, e1 at -80 mV.

    Each electrode has three sweeps with a -50 pA step; the rows alternate between
    the electrodes as a dual recording stores them.
    """
    nwb, e0 = _file(filtering="low-pass at 5 kHz")
    e1 = nwb.create_icephys_electrode(name="e1", description="second patch",
                                      device=nwb.devices["amp"], cell_id="second-cell",
                                      filtering="low-pass at 2 kHz")
    t = np.arange(N) / RATE
    step = np.where((t >= 0.02) & (t < 0.1), -50e-12, 0.0)
    for k in range(3):
        for electrode, rest in ((e0, -0.070), (e1, -0.080)):
            v = rest + 150e6 * step * (1 - np.exp(-np.clip(t - 0.02, 0, None) / 0.015)) \
                + 1e-4 * np.sin(t * 700 + k)
            number = np.uint32(k)
            response = CurrentClampSeries(name=f"v_{electrode.name}_{k}", data=v,
                                          electrode=electrode, gain=1.0, rate=RATE,
                                          sweep_number=number)
            stimulus = CurrentClampStimulusSeries(name=f"i_{electrode.name}_{k}", data=step,
                                                  electrode=electrode, gain=1.0, rate=RATE,
                                                  sweep_number=number)
            if table:
                nwb.add_intracellular_recording(electrode=electrode, stimulus=stimulus,
                                                response=response)
            else:
                nwb.add_acquisition(response)
                nwb.add_stimulus(stimulus)
    return _write(nwb, path)


@pytest.mark.parametrize("table", [True, False], ids=["table", "acquisition"])
def test_two_electrodes_are_never_mixed(tmp_path, table):
    path = _two_electrode_file(tmp_path / "dual.nwb", table)
    first = load(path)
    assert len(first.sweeps) == 3
    rests = [float(np.median(s.voltage[:150])) for s in first.sweeps]
    assert_allclose(rests, -0.070, atol=5e-4)  # e0 only, not the mean -75 mV of both
    (flag,) = [f for f in first.flags if f.code == S.PROTOCOL_ELECTRODE.code]
    assert "electrode e0 only" in flag.message and "e1" in flag.message
    assert "`--channel NAME`" in flag.message
    assert first.metadata["filter_hz"] == 5000.0
    assert first.metadata["cell_id"] == "LOL-2026-11-05-c3"

    second = load(path, channel="e1")
    assert len(second.sweeps) == 3
    assert_allclose([float(np.median(s.voltage[:150])) for s in second.sweeps], -0.080,
                    atol=5e-4)
    assert second.metadata["cell_id"] == "second-cell"
    assert second.metadata["filter_hz"] == 2000.0
    assert any("e0" in f.message for f in second.flags if f.code == S.PROTOCOL_ELECTRODE.code)
    assert_allclose(load(path, channel=1).sweeps[0].voltage, second.sweeps[0].voltage)
    with pytest.raises(LoadError, match=r"no electrode `e7`.*0: e0, 1: e1"):
        load(path, channel="e7")


def test_one_electrode_gives_no_choice_flag(tmp_path):
    recording = load(save(charging_recording(n_sweeps=2, n_samples=1200), tmp_path / "one.nwb"))
    assert not any(f.code == S.PROTOCOL_ELECTRODE.code for f in recording.flags)
    same = load(tmp_path / "one.nwb", channel="electrode_0")
    assert_allclose(same.sweeps[1].voltage, recording.sweeps[1].voltage)


def test_a_mixed_protocol_file_is_analysed_from_its_steps(tmp_path):
    # as archives of patch-clamp data hold them: one file, sweeps of several stimulus
    # types and lengths paired by sweep number (a ramp, long squares, a brief square),
    # written by pynwb itself. The cell comes from the long squares; the other sweeps
    # say what they are.
    from passivefit.analysis import Settings, analyze
    from passivefit.simulate import BallStick, StepProtocol, simulate_recording

    rate = 20_000.0
    nwb, electrode = _file()
    sweeps = []
    t = np.arange(int(1.2 * rate)) / rate
    ramp = np.where(t > 0.2, (t - 0.2) * 100e-12, 0.0)
    sweeps.append((-0.070 + ramp * 150e6, ramp, "Ramp"))
    cell = BallStick.from_electrotonic(0.025, 1.0, 4.0, 150e6)
    for k, (onset, duration, amp) in enumerate([(0.2, 0.5, -50e-12), (0.2, 0.5, -30e-12),
                                                (0.2, 0.5, -10e-12), (0.3, 0.003, -400e-12)]):
        rec, _ = simulate_recording(cell, protocol=StepProtocol(onset, duration, (amp,)),
                                    n_sweeps=1, sweep_duration_s=1.0, sample_rate_hz=rate,
                                    noise_sd_V=0.2e-3, filter_hz=5_000, seed=k)
        sweep = rec.sweeps[0]
        sweeps.append((sweep.voltage, sweep.current, "LongSquare" if duration > 0.1 else
                       "ShortSquare"))
    for k, (v, i, kind) in enumerate(sweeps):
        common = dict(electrode=electrode, gain=1.0, rate=rate, sweep_number=np.uint32(k),
                      stimulus_description=kind)
        nwb.add_acquisition(CurrentClampSeries(name=f"data_{k:05d}_AD0",
                                               data=np.asarray(v) * 1e3, conversion=1e-3,
                                               **common))
        nwb.add_stimulus(CurrentClampStimulusSeries(name=f"data_{k:05d}_DA0",
                                                    data=np.asarray(i) * 1e12, conversion=1e-12,
                                                    **common))
    result = analyze(load(_write(nwb, tmp_path / "mixed.nwb")), Settings(bootstrap=0))
    fits = {f.index: f for f in result.sweeps}
    assert {k for k, f in fits.items() if f.accepted} == {1, 2, 3}
    assert fits[0].reject_reason == "a current ramp, no step"
    assert fits[4].reject_reason.startswith("only brief pulses")
    cell_values = result.to_dict()["cell"]
    assert cell_values["r_in_MOhm"] == pytest.approx(150.0, rel=0.03)
    assert cell_values["tau0_ms"] == pytest.approx(25.0, rel=0.03)


def _clamp_file(path, rates: dict[int, float], seal_test: bool = False):
    """Current-clamp sweeps with the given sweep numbers and rates, paired by number; with
    `seal_test`, a voltage-clamp sweep 0 before them (numbers as an acquisition program
    gives them)."""
    nwb, electrode = _file()
    if seal_test:
        nwb.add_acquisition(VoltageClampSeries(name="seal", data=np.zeros(N), electrode=electrode,
                                               gain=1.0, rate=RATE, sweep_number=np.uint32(0)))
    for number, rate in rates.items():
        common = dict(electrode=electrode, gain=1.0, rate=rate, sweep_number=np.uint32(number))
        nwb.add_acquisition(CurrentClampSeries(name=f"v{number}", data=_ramp(number) * 1e-3,
                                               **common))
        nwb.add_stimulus(CurrentClampStimulusSeries(name=f"i{number}",
                                                    data=np.full(N, -1e-12 * number), **common))
    return _write(nwb, path)


@pytest.mark.parametrize("reader", [read_nwb_hdf5, read_nwb_pynwb], ids=["h5py", "pynwb"])
def test_sweeps_keep_the_files_own_numbers(tmp_path, reader):
    # a seal test in voltage clamp is sweep 0 of the file: the current-clamp sweeps are
    # named 1, 2, 3 as in the acquisition program, not renumbered from 0
    rec = reader(_clamp_file(tmp_path / "seal.nwb", {1: RATE, 2: RATE, 3: RATE},
                             seal_test=True))
    assert [s.index for s in rec.sweeps] == [1, 2, 3]
    assert_allclose(rec.sweeps[2].current, -3e-12)


@pytest.mark.parametrize("reader", [read_nwb_hdf5, read_nwb_pynwb], ids=["h5py", "pynwb"])
def test_sweeps_in_other_clamp_modes_are_left_out_and_said(tmp_path, reader):
    # a seal test in voltage clamp among current-clamp sweeps (acquisition layout), and
    # table rows in voltage clamp and at I = 0: read alike by both readers, and named
    seal = reader(_clamp_file(tmp_path / "seal.nwb", {1: RATE, 2: RATE}, seal_test=True))
    (flag,) = [f for f in seal.flags if f.code == "protocol.other_clamp"]
    assert flag.message.startswith("1 sweep(s) of the file were not recorded in current "
                                   "clamp (voltage clamp: sweeps 0) and are left out")
    table = reader(_mixed_table_file(tmp_path / "mixed.nwb"))
    assert len(table.sweeps) == 1
    (flag,) = [f for f in table.flags if f.code == "protocol.other_clamp"]
    assert "2 sweep(s)" in flag.message and "(I = 0 and voltage clamp: sweeps 0, 0)" in flag.message
    plain = reader(_clamp_file(tmp_path / "plain.nwb", {1: RATE, 2: RATE}))
    assert not [f for f in plain.flags if f.code == "protocol.other_clamp"]


def test_sweeps_at_another_rate_are_left_out_and_said(tmp_path):
    # three sweeps at 10 kHz, one at 50 kHz (a brief square sampled faster): the three
    # are read, the other left out with a flag (the h5py reader leaves such files to pynwb)
    path = _clamp_file(tmp_path / "rates.nwb", {0: RATE, 1: RATE, 2: 50_000.0, 3: RATE})
    assert read_nwb_hdf5(path) is None
    rec = load(path)
    assert rec.sample_rate_hz == RATE and [s.index for s in rec.sweeps] == [0, 1, 3]
    (flag,) = [f for f in rec.flags if f.code == "protocol.rates_mixed"]
    assert "the 3 sweeps at 10000 Hz are analysed, 1 at 50000 Hz left out" in flag.message
