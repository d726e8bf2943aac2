"""Reading-side details: header cleaning, CSV header case, NWB amplifier settings,
current sources and the user's step checked against a file's own current."""

from __future__ import annotations

import re

import numpy as np
import pytest
from io_fixtures import abf2_bytes, charging_recording
from numpy.testing import assert_allclose

from passivefit.core.steps import find_step, find_steps
from passivefit.io import LoadError, StepSpec, load, save
from passivefit.io.nwb import read_nwb_hdf5, read_nwb_pynwb
from passivefit.model import schema as S

_ABF1_ADC_NAME = 442  # sADCChannelName of physical channel 0 (10 bytes), as pyabf reads it
_ABF1_ADC_UNITS = 602  # sADCUnits of physical channel 0 (8 bytes)


def _abf1_with_header_text(tmp_path, name: bytes, units: bytes):
    path = save(charging_recording(n_sweeps=2), tmp_path / "cell.abf")
    raw = bytearray(path.read_bytes())
    raw[_ABF1_ADC_NAME : _ABF1_ADC_NAME + 10] = name.ljust(10, b"\0")
    raw[_ABF1_ADC_UNITS : _ABF1_ADC_UNITS + 8] = units.ljust(8, b"\0")
    path.write_bytes(bytes(raw))
    return path


def test_abf1_names_and_units_lose_their_nul_padding(tmp_path):
    rec = load(_abf1_with_header_text(tmp_path, b"Vm", b"mV"))
    assert rec.voltage_channel == "Vm [mV]"
    assert "\0" not in rec.metadata["voltage_channel"]


def test_nul_padded_names_reach_error_messages_clean(tmp_path):
    path = _abf1_with_header_text(tmp_path, b"Im\0junk", b"fA\0\0")
    with pytest.raises(LoadError) as err:
        load(path)
    message = str(err.value)
    assert "\0" not in message and "junk" not in message
    assert "0: Im [fA]" in message


def _csv(tmp_path, header: str) -> object:
    rows = [f"{k * 0.05:.2f},{-70 - (k > 20) * 5:.1f},{-50 * (k > 20)}" for k in range(100)]
    path = tmp_path / "cell.csv"
    path.write_text("\n".join([header, *rows]) + "\n")
    return path


@pytest.mark.parametrize("header", ["time_ms,V0_mV,I0_pA", "time_ms,v0_mV,i0_pA",
                                    "TIME_MS,V0_MV,I0_PA", "Time_ms,v0_mv,i0_pa"])
def test_csv_headers_are_read_without_regard_to_case(tmp_path, header):
    rec = load(_csv(tmp_path, header))
    assert rec.sample_rate_hz == 20_000
    assert_allclose(rec.sweeps[0].voltage[:3], -0.070)
    assert_allclose(rec.sweeps[0].current[30], -50e-12)
    assert rec.current_source == "current column"


def test_csv_unknown_unit_is_still_refused(tmp_path):
    with pytest.raises(LoadError, match="unknown unit 'kV' in column 'v0_kV'; use mV or V"):
        load(_csv(tmp_path, "time_ms,v0_kV,i0_pA"))


def test_nwb_amplifier_settings_round_trip_in_both_readers(tmp_path):
    original = charging_recording(n_sweeps=3)
    original.metadata.update(bias_current_A=-20e-12, bridge_balance_ohm=[10e6, 11e6, 12e6],
                             capacitance_compensation_F=4.5e-12)
    path = save(original, tmp_path / "cell.nwb")
    for reader in (read_nwb_hdf5, read_nwb_pynwb):
        rec = reader(path)
        assert rec.metadata["bias_current_A"] == pytest.approx(-20e-12)
        assert rec.metadata["bridge_balance_ohm"] == pytest.approx([10e6, 11e6, 12e6])
        assert rec.metadata["capacitance_compensation_F"] == pytest.approx(4.5e-12)
        assert rec.current_source == "stimulus series"
        assert [len(s.epochs) for s in rec.protocol.sweeps] == [1, 1, 1]
    bare = load(save(charging_recording(n_sweeps=1, with_current=False), tmp_path / "b.nwb"))
    assert "bias_current_A" not in bare.metadata and bare.current_source == "none"


def test_user_step_is_checked_against_the_files_own_current(tmp_path):
    rec = load(save(charging_recording(n_sweeps=2), tmp_path / "cell.nwb"))
    fs = rec.sample_rate_hz
    file_step = find_step(rec.sweeps[0].current, fs)
    agreeing = rec.with_step(StepSpec(file_step.onset_s, file_step.duration_s, -40e-12, -20e-12))
    assert agreeing.current_source == "user step" and agreeing.flags == ()
    wrong = rec.with_step(StepSpec(file_step.onset_s, file_step.duration_s, -100e-12))
    codes = [f.code for f in wrong.flags]
    assert S.PROTOCOL_AMPLITUDE.code in codes
    assert "-100.0 pA in the user step but -40.0 pA in the recorded current" in \
        next(f for f in wrong.flags if f.code == S.PROTOCOL_AMPLITUDE.code).message
    late = rec.with_step(StepSpec(0.15, 0.02, -40e-12))
    assert S.PROTOCOL_STEP_MISSING.code in [f.code for f in late.flags]


def test_user_step_from_an_early_onset_keeps_its_sign():
    # a typed --step goes through find_steps as well: measured from the level before it
    rec = charging_recording(n_sweeps=1, with_current=False)
    fs = rec.sample_rate_hz
    stepped = rec.with_step(StepSpec(0.002, 0.15, -100e-12))
    (step,) = find_steps(stepped.sweeps[0].current, fs)
    assert step.amplitude_A == pytest.approx(-100e-12) and step.onset_s == pytest.approx(0.002)
    assert find_step(stepped.sweeps[0].current, fs) is None  # 2 ms of baseline is too little
    later = rec.with_step(StepSpec(0.006, 0.15, -100e-12))
    assert find_step(later.sweeps[0].current, fs).amplitude_A == pytest.approx(-100e-12)
    assert stepped.flags == ()  # the file had no current to check against


def test_abf2_recorded_current_that_disagrees_with_the_table_is_used_and_flagged(tmp_path):
    samples, rng = 3000, np.random.default_rng(2)
    v = (-7000 + rng.integers(-300, 300, (2, samples))).astype(np.int16)
    start = samples // 64 + 300
    i = rng.integers(-20, 20, (2, samples)).astype(np.int16)  # +-2 pA noise, 0.1 pA/count
    i[:, start : start + 1500] -= 200  # recorded: -20 pA where the table says -40, -60 pA
    path = tmp_path / "cell.abf"
    path.write_bytes(abf2_bytes(v, i, 20_000.0, [(1, 0.0, 0.0, 300), (1, -40.0, -20.0, 1500)]))
    rec = load(path)
    assert rec.current_source == "recorded channel"
    steps = [find_steps(s.current, rec.sample_rate_hz) for s in rec.sweeps]
    assert [len(s) for s in steps] == [1, 1]
    assert steps[0][0].amplitude_A == pytest.approx(-20e-12, abs=1e-12)
    assert steps[0][0].onset == start
    flag = next(f for f in rec.flags if f.code == S.PROTOCOL_AMPLITUDE.code)
    assert re.search(r"is -40.0 pA in the epoch table \(DAC 0\) but -20.\d pA in the recorded "
                     r"current; the recorded current is used", flag.message)
    assert "(and 1 more like it)" in flag.message  # sweep 1: -60 pA against -20 pA
    assert rec.protocol.source == "epoch table"


def test_abf2_recorded_current_of_another_cell_is_not_taken_for_the_command(tmp_path):
    # A paired recording: cell 1 in current clamp (IN 0, driven by DAC 0), cell 2 in voltage
    # clamp (IN 1 in pA: its own holding and test-step current, at other times). IN 1 is not
    # the current DAC 0 injected, so the epoch table is used; the mismatch stays flagged.
    samples, rng = 3000, np.random.default_rng(6)
    v = (-7000 + rng.integers(-300, 300, (2, samples))).astype(np.int16)
    i = (-200 + rng.integers(-20, 20, (2, samples))).astype(np.int16)  # -20 pA holding
    i[:, 1000:1400] -= 590  # cell 2's -59 pA test step, 20 ms after cell 1's step began
    epochs = [(1, 0.0, 0.0, 300), (1, -40.0, -20.0, 300), (1, 0.0, 0.0, 1500)]
    path = tmp_path / "pair.abf"
    path.write_bytes(abf2_bytes(v, i, 20_000.0, epochs))
    rec = load(path)
    assert rec.current_source == "epoch table"
    assert rec.metadata["current_channel"] == "DAC 0 [pA]"
    start = samples // 64 + 300
    for k, sweep in enumerate(rec.sweeps):
        (step,) = find_steps(sweep.current, rec.sample_rate_hz)
        assert (step.onset, step.offset) == (start, start + 300)
        assert step.amplitude_A == pytest.approx((-40 - 20 * k) * 1e-12)
    codes = [f.code for f in rec.flags]
    assert S.PROTOCOL_STEP_MISSING.code in codes and S.PROTOCOL_AMPLITUDE.code not in codes


def test_channel_option_is_for_abf_files_only(tmp_path):
    path = save(charging_recording(n_sweeps=1), tmp_path / "cell.csv")
    with pytest.raises(LoadError, match="`channel` applies to ABF and NWB files only"):
        load(path, channel=0)


def _two_channel_abf2(tmp_path, second_mV: np.ndarray, command_units: bytes = b"pA",
                      second_units: bytes = b"mV", rate: float = 20_000.0,
                      waveform_source: int = 1):
    """IN 0: a cell answering a -40/-60 pA step; IN 1: `second_mV` (in mV, 0.01 mV/count)."""
    samples, rng = 3000, np.random.default_rng(4)
    start = samples // 64 + 300
    answer = np.zeros((2, samples))
    answer[0, start : start + 1500] = -6.0  # mV
    answer[1, start : start + 1500] = -9.0
    v = (100 * (-70 + answer) + rng.integers(-20, 20, (2, samples))).astype(np.int16)
    second = (100 * np.broadcast_to(second_mV, (2, samples))).astype(np.int16)
    path = tmp_path / "two.abf"
    path.write_bytes(abf2_bytes(v, second, rate, [(1, 0.0, 0.0, 300), (1, -40.0, -20.0, 1500)],
                                second_units=second_units, command_units=command_units,
                                second_per_count=0.01, waveform_source=waveform_source))
    return path


def test_a_second_mv_channel_reading_volts_is_not_the_membrane_potential(tmp_path):
    path = _two_channel_abf2(tmp_path, 310 + np.sin(np.arange(3000) / 50))  # not a cell
    rec = load(path)
    assert rec.voltage_channel == "IN 0 [mV]" and rec.current_source == "epoch table"
    (flag,) = rec.flags
    assert flag.code == "protocol.channel_chosen"
    assert "IN 1 [mV] sits at 310.1 mV, outside −120…+20 mV" in flag.message
    with pytest.raises(LoadError, match="310.07 mV at rest .*this is not a membrane potential"):
        load(path, channel="IN 1")  # asked for, but refused: no cell sits at +310 mV


def test_of_two_plausible_channels_the_one_answering_the_steps_is_chosen(tmp_path):
    rng = np.random.default_rng(9)
    wandering = -60 + np.cumsum(rng.normal(0, 0.05, 3000))  # plausible, but ignores the steps
    rec = load(_two_channel_abf2(tmp_path, wandering[::-1].copy()))
    assert rec.voltage_channel == "IN 0 [mV]"
    assert "IN 1 [mV] answers the steps less" in rec.flags[0].message


def test_a_command_played_from_a_stimulus_file_is_named_in_the_refusal(tmp_path):
    # A DAC that replays a stimulus file (nWaveformSource 2, as real files whose command
    # is a noise or sine waveform do) leaves the recording without its command; with no
    # current channel either, the error says why, and a step the user gives still counts.
    from passivefit.analysis.windows import sweep_steps
    from passivefit.model.settings import Settings

    rec = load(_two_channel_abf2(tmp_path, np.zeros(3000), second_units=b"dB",
                                 waveform_source=2))
    assert rec.current_source == "none" and not rec.has_current
    assert rec.metadata["stimulus_file"] == "not named in the header"
    with pytest.raises(LoadError, match=r"no step found: the command was played from a "
                       r"stimulus file \(not named in the header\) that the recording does "
                       r"not hold, and no current was recorded; give `--step"):
        sweep_steps(rec, Settings())
    given = StepSpec(0.0173, 0.075, -40e-12, -20e-12)
    steps = sweep_steps(rec, Settings(step=given))
    assert [round(s.amplitude_A * 1e12) for s in steps] == [-40, -60]


def test_voltage_clamp_from_the_units_of_a_synthetic_file(tmp_path):
    path = _two_channel_abf2(tmp_path, np.zeros(3000), command_units=b"mV", second_units=b"pA")
    with pytest.raises(LoadError, match=r"a voltage-clamp recording \(current recorded in pA, "
                                        r"command in mV\)"):
        load(path)


def test_voltage_clamp_with_the_current_in_microamperes(tmp_path):
    # Two-electrode voltage clamp (oocytes) records its current in uA; Clampex writes the
    # micro sign as byte 0xB5, which pyabf turns into "u" (pyabf/abf2/stringsSection.py).
    path = _two_channel_abf2(tmp_path, np.zeros(3000), command_units=b"mV",
                             second_units=b"\xb5A")
    with pytest.raises(LoadError, match=r"a voltage-clamp recording \(current recorded in uA, "
                                        r"command in mV\)"):
        load(path)


def test_nwb_without_any_sweep_is_not_called_voltage_clamp(tmp_path):
    import datetime as dt

    from pynwb import NWBHDF5IO, NWBFile

    nwb = NWBFile(session_description="empty", identifier="empty-1",
                  session_start_time=dt.datetime(2026, 11, 3, tzinfo=dt.UTC))
    path = tmp_path / "empty.nwb"
    with NWBHDF5IO(str(path), mode="w") as io:
        io.write(nwb)
    with pytest.raises(LoadError, match=r"no current-clamp sweeps in this NWB file "
                                        r"\(CurrentClampSeries\); passivefit analyses"):
        load(path)
