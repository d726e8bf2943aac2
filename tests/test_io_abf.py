"""ABF specifics: ABF 2 command waveforms, current fallbacks, pyabf header quirks."""

from __future__ import annotations

import struct

import numpy as np
import pyabf
import pyabf.abfWriter
import pytest
from io_fixtures import abf2_bytes, charging_recording
from numpy.testing import assert_allclose

from passivefit.io import LoadError, load, save

SAMPLES = 3000
EPOCHS = [(1, 0.0, 0.0, 300), (1, -40.0, -20.0, 1500)]  # step type 1: baseline, then step


def _counts(sweeps: int = 3) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(11)
    v = (-7000 + rng.integers(-300, 300, (sweeps, SAMPLES))).astype(np.int16)  # ~ -70 mV
    i = (rng.integers(-50, 50, (sweeps, SAMPLES))).astype(np.int16)  # +-5 pA noise
    return v, i


def _expected_command_A(sweep: int) -> np.ndarray:
    """The DAC 0 waveform as the epoch table defines it: 1/64 sweep at holding first."""
    command = np.zeros(SAMPLES)
    start = SAMPLES // 64 + EPOCHS[0][3]
    command[start : start + EPOCHS[1][3]] = EPOCHS[1][1] + sweep * EPOCHS[1][2]
    return command * 1e-12


def _abf2(
    tmp_path, rate_hz=20_000.0, epochs=EPOCHS, enabled=True, name="cell.abf", lowpass=(0.0, 0.0)
):
    v, i = _counts()
    path = tmp_path / name
    path.write_bytes(
        abf2_bytes(v, i, rate_hz, epochs, waveform_enabled=enabled, lowpass_hz=lowpass)
    )
    return path, v, i


def test_abf2_command_from_the_epoch_table(tmp_path):
    path, v, _ = _abf2(tmp_path)
    rec = load(path)
    assert rec.format == "abf" and len(rec.sweeps) == 3
    for k, sweep in enumerate(rec.sweeps):
        assert_allclose(sweep.voltage, v[k] * 0.01e-3, rtol=1e-6)
        assert_allclose(sweep.current, _expected_command_A(k), atol=1e-18)
    assert rec.current_source == rec.metadata["current_source"] == "epoch table"
    assert rec.metadata["current_channel"] == "DAC 0 [pA]"
    assert rec.voltage_channel == "IN 0 [mV]"
    assert rec.metadata["date"] == "2026-11-03T14:22:05.250"
    assert rec.metadata["protocol"] == "lol-steps"
    assert rec.metadata["comment"] == "LOL-2026-11-03-c1 bath 32 C"
    assert rec.metadata["abf_version"] == 2


def test_abf2_rate_from_the_sample_interval_not_pyabf_datarate(tmp_path):
    path, _, _ = _abf2(tmp_path, rate_hz=22_050.0)
    assert pyabf.ABF(str(path)).dataRate != 22_050  # pyabf truncates (ECOSYSTEM.md)
    assert load(path).sample_rate_hz == 22_050.0


def test_disabled_waveform_falls_back_to_the_recorded_current(tmp_path):
    path, _, i = _abf2(tmp_path, enabled=False)
    rec = load(path)
    assert rec.current_source == rec.metadata["current_source"] == "recorded channel"
    assert rec.metadata["current_channel"] == "IN 1 [pA]"
    assert_allclose(rec.sweeps[2].current, i[2] * 0.1e-12, rtol=1e-6)


def test_flat_epoch_table_is_not_trusted(tmp_path):
    path, _, i = _abf2(tmp_path, epochs=[(1, 0.0, 0.0, 300), (1, 0.0, 0.0, 1500)])
    rec = load(path)
    assert rec.current_source == rec.metadata["current_source"] == "recorded channel"
    assert rec.metadata["current_channel"] == "IN 1 [pA]"
    assert_allclose(rec.sweeps[0].current, i[0] * 0.1e-12, rtol=1e-6)


def test_truncated_abf2(tmp_path):
    path, _, _ = _abf2(tmp_path)
    path.write_bytes(path.read_bytes()[:-5000])
    with pytest.raises(LoadError, match="truncated ABF file: the header promises"):
        load(path)


def _raw_abf1(tmp_path, data_mV, units="mV"):
    path = tmp_path / "raw.abf"
    pyabf.abfWriter.writeABF1(np.atleast_2d(data_mV), str(path), 20_000.0, units=units)
    return path


def test_plain_pyabf_abf1_with_a_phantom_telegraph_gain(tmp_path):
    # pyabf's writer puts samples where its reader looks for the telegraph fields:
    # sample 1232 == 1 count "enables" a gain read from samples 1264-1265.
    counts_per_mV = 327.68  # pyabf's scale for |data| < 100 mV (abfWriter.py)
    data = -70 + np.random.default_rng(5).normal(0, 1, 3000)
    data[1232] = 1.5 / counts_per_mV
    data[1264], data[1265] = 1000 / counts_per_mV, 17000 / counts_per_mV
    path = _raw_abf1(tmp_path, data)
    assert np.max(np.abs(pyabf.ABF(str(path)).sweepY - data)) > 1.0  # pyabf: wrong gain
    raw = path.read_bytes()
    samples = np.frombuffer(raw, "<i2", count=3000, offset=2048)  # data at block 4
    read = load(path).sweeps[0].voltage
    assert_allclose(read, samples / counts_per_mV * 1e-3, rtol=1e-6)  # value by value


def test_plain_pyabf_abf1_too_short_for_its_header(tmp_path):
    with pytest.raises(LoadError, match=r"damaged or unsupported ABF file \(struct.error"):
        load(_raw_abf1(tmp_path, -70 + np.sin(np.arange(500) / 9)))


def test_abf_without_a_voltage_channel(tmp_path):
    path = _raw_abf1(tmp_path, 20 * np.sin(np.arange(3000) / 30), units="pA")
    with pytest.raises(LoadError, match=r"no voltage channel in mV \(channels: .*\[pA\]\)"):
        load(path)


def test_abf1_float_data_is_refused(tmp_path):
    path = _raw_abf1(tmp_path, -70 + np.sin(np.arange(3000) / 9))
    raw = bytearray(path.read_bytes())
    struct.pack_into("<h", raw, 100, 1)  # nDataFormat: float32, unsupported by pyabf
    path.write_bytes(bytes(raw))
    with pytest.raises(LoadError, match="float data is not implemented"):
        load(path)


# ---------------------------------------------------------------- low-pass filter setting


@pytest.mark.parametrize(
    ("lowpass", "expected"),
    [
        ((2000.0, 0.0), 2000.0),  # the voltage channel's setting
        ((3333.3, 0.0), 3333.3),  # float32 in the header, shortest decimal back
        ((0.0, 2000.0), None),  # the current channel's setting is not the voltage's
        ((100_000.0, 0.0), None),  # "bypass" (common practice, no source): above Nyquist
        ((10_000.0, 0.0), None),  # at the Nyquist frequency of 20 kHz sampling
        ((5.0, 0.0), None),  # below 10 Hz: no amplifier corner
        ((float("nan"), 0.0), None),
    ],
)
def test_abf2_lowpass_setting(tmp_path, lowpass, expected):
    path, _, _ = _abf2(tmp_path, lowpass=lowpass)
    assert load(path).metadata.get("filter_hz") == expected


def _abf1_lowpass_field(path) -> float:
    """fSignalLowpassFilter of ADC 0, decoded here: ABF 1 header offset 1178 (from memory)."""
    return struct.unpack_from("<f", path.read_bytes(), 1178)[0]


def test_abf1_round_trip_keeps_the_filter(tmp_path):
    recording = charging_recording(n_sweeps=2, n_samples=3000)
    recording.metadata["filter_hz"] = 2345.5
    path = save(recording, tmp_path / "cell.abf")
    assert _abf1_lowpass_field(path) == 2345.5
    assert load(path).metadata["filter_hz"] == 2345.5


def test_abf1_without_a_filter(tmp_path):
    recording = charging_recording(n_sweeps=2, n_samples=3000)
    del recording.metadata["filter_hz"]
    path = save(recording, tmp_path / "cell.abf")
    assert _abf1_lowpass_field(path) == 0.0
    assert "filter_hz" not in load(path).metadata
    plain = _raw_abf1(tmp_path, -70 + np.sin(np.arange(3000) / 9))  # pyabf's own writer
    assert "filter_hz" not in load(plain).metadata


def test_abf1_filter_above_nyquist_is_written_but_not_read_as_a_corner(tmp_path):
    recording = charging_recording(n_sweeps=2, n_samples=3000, rate_hz=10_000.0)
    recording.metadata["filter_hz"] = 5000.0  # the Nyquist frequency itself
    path = save(recording, tmp_path / "cell.abf")
    assert _abf1_lowpass_field(path) == 5000.0
    assert "filter_hz" not in load(path).metadata


def test_abf1_bad_filter_metadata_is_refused(tmp_path):
    recording = charging_recording(n_sweeps=2, n_samples=3000)
    recording.metadata["filter_hz"] = "fast"
    with pytest.raises(ValueError, match=r"metadata `filter_hz` is 'fast'; give the low-pass"):
        save(recording, tmp_path / "cell.abf")
    assert not (tmp_path / "cell.abf").exists()
