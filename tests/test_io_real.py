"""How the nine real recordings in tests/data/real/ are read.

The files have no ground truth. Step times and levels are checked against the epoch
table as pyabf draws it (`sweepEpochs`, an independent reader of the same header),
recorded-current amplitudes against plain window means of the recorded trace, and
signs against the voltage's own response (mean in the step minus mean before it).
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pyabf
import pytest

from passivefit.core.steps import common_steps, find_step, find_steps
from passivefit.io import LoadError, load
from passivefit.model import schema as S

REAL = Path(__file__).parent / "data" / "real"
PA = 1e-12


def _pyabf(name: str) -> pyabf.ABF:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return pyabf.ABF(str(REAL / name))


def _table_epochs(name: str, sweep: int, dac_channel: int = 0) -> list[tuple[int, int, float]]:
    """(first sample, end sample, level pA) of the non-zero epochs pyabf draws."""
    abf = _pyabf(name)
    abf.setSweep(sweep, channel=dac_channel)
    e = abf.sweepEpochs
    return [(p1, p2, level) for p1, p2, level in zip(e.p1s, e.p2s, e.levels, strict=True)
            if level != 0 and p2 > p1]


def _delta_v_mV(voltage: np.ndarray, onset: int, offset: int, baseline_start: int) -> float:
    """Mean voltage over the last half of a step minus the mean before it, in mV."""
    before = voltage[max(baseline_start, onset - 1000) : onset - 5].mean()
    during = voltage[(onset + offset) // 2 : offset - 5].mean()
    return float(during - before) * 1e3


@pytest.mark.parametrize("sweep", [0, 3, 16])
def test_171116sh_variable_step_first_and_fixed_step_listed_separately(sweep):
    rec = load(REAL / "171116sh_0018.abf")
    assert (rec.clamp_mode, rec.current_source, rec.voltage_channel) == (
        "current clamp", "epoch table", "IN 0 [mV]")
    assert len(rec.sweeps) == 17 and rec.flags == ()
    fs = rec.sample_rate_hz
    steps = find_steps(rec.sweeps[sweep].current, fs)
    # pyabf's epochs for this sweep: variable level at 2937..12937, fixed -100 pA at
    # 22937..32937, variable level again at 32937..42937
    table = _table_epochs("171116sh_0018.abf", sweep)
    variable = table[0][2]
    assert (table[0][0], table[0][1]) == (2937, 12937)
    first = steps[0]
    assert (first.onset, first.offset) == (2937, 12937)
    assert first.amplitude_A == pytest.approx(variable * PA)
    assert first.from_rest
    fixed = steps[1]
    assert fixed.onset == 22937 and fixed.amplitude_A == pytest.approx(-100 * PA)
    if variable != -100:  # the fixed step ends where the variable level starts again
        assert fixed.offset == 32937
        assert steps[2].amplitude_A == pytest.approx((variable + 100) * PA)
        assert not steps[2].from_rest
    assert find_step(rec.sweeps[sweep].current, fs) == first


def test_171116sh_zero_sweep_gets_no_step_at_the_protocol_position():
    rec = load(REAL / "171116sh_0018.abf")
    fs = rec.sample_rate_hz
    chosen = common_steps([find_steps(s.current, fs) for s in rec.sweeps])
    assert chosen[4] is None  # -100 + 4 * 25 = 0 pA
    on = {c.onset for c in chosen if c is not None}
    assert on == {2937}
    assert [round(c.amplitude_A / PA) for c in chosen if c is not None] == [
        -100 + 25 * k for k in range(17) if k != 4]


def test_18711001_early_step_has_its_true_sign_and_short_baseline():
    rec = load(REAL / "18711001.abf")
    assert (rec.current_source, rec.voltage_channel, len(rec.sweeps)) == (
        "epoch table", "IN 0 [mV]", 30)
    fs = rec.sample_rate_hz
    for k in (0, 12, 29):
        sweep = rec.sweeps[k]
        table = _table_epochs("18711001.abf", k)
        step = find_step(sweep.current, fs)
        assert (step.onset, step.offset) == (table[0][0], table[0][1]) == (468, 6468)
        assert step.amplitude_A == pytest.approx(-100 * PA)
        assert step.baseline_start == 0 and step.baseline_s == pytest.approx(0.0234)
        # the cell's answer has the same sign: it hyperpolarizes
        assert _delta_v_mV(sweep.voltage, step.onset, step.offset, 0) < -5
        listed = find_steps(sweep.current, fs)
        assert len(listed) == (1 if k == 0 else 2)  # the variable step is 0 pA in sweep 0
        if k:
            assert listed[1].amplitude_A == pytest.approx(10 * k * PA)


def test_file_axon_5_channel_named_like_a_current_is_the_voltage():
    rec = load(REAL / "File_axon_5.abf")
    assert (rec.current_source, rec.voltage_channel, len(rec.sweeps)) == (
        "epoch table", "_Ipatch [mV]", 9)
    fs = rec.sample_rate_hz
    for k in range(9):
        step = find_step(rec.sweeps[k].current, fs)
        table = _table_epochs("File_axon_5.abf", k)
        if not table:
            assert step is None
            continue
        assert (step.onset, step.offset) == (table[0][0], table[0][1])
        assert step.amplitude_A == pytest.approx((-100 + 50 * k) * PA)
        assert step.amplitude_A == pytest.approx(table[0][2] * PA)


def test_190619B_steps_from_the_abf1_epoch_table_and_the_flat_channel_left_out():
    rec = load(REAL / "190619B_0003.abf")
    assert (rec.current_source, rec.voltage_channel, len(rec.sweeps)) == (
        "epoch table", "IN 0 [mV]", 10)
    assert rec.metadata["abf_version"] == 1
    assert [f.code for f in rec.flags] == [S.PROTOCOL_CHANNEL.code]
    assert "IN 2 [mV] is flat" in rec.flags[0].message
    fs = rec.sample_rate_hz
    assert fs == 10_000
    for k, sweep in enumerate(rec.sweeps):
        step = find_step(sweep.current, fs)
        table = _table_epochs("190619B_0003.abf", k)
        if k == 2:  # -120 + 2 * 60 = 0 pA: no step, and none in pyabf's drawing
            assert step is None and table == []
            continue
        assert (step.onset, step.offset) == (table[0][0], table[0][1]) == (10478, 20478)
        assert step.amplitude_A == pytest.approx((-120 + 60 * k) * PA)
        if step.amplitude_A < 0:
            assert _delta_v_mV(sweep.voltage, step.onset, step.offset, 0) < -2


def test_18425108_test_pulse_from_the_recorded_current_not_the_train():
    rec = load(REAL / "18425108.abf")
    assert (rec.current_source, rec.voltage_channel) == ("recorded channel", "10_Vm [mV]")
    assert rec.metadata["current_channel"] == "Imemb [nA]"
    fs = rec.sample_rate_hz
    assert fs == 25_000
    current = rec.sweeps[0].current
    steps = find_steps(current, fs)
    step = find_step(current, fs)
    assert step == steps[0]
    assert abs(step.onset_s - 0.250) < 0.5e-3 and abs(step.offset_s - 0.500) < 0.5e-3
    # independent estimate: window means of the recorded current
    t = np.arange(current.size) / fs
    before = current[(t > 0.10) & (t < 0.24)].mean()
    during = current[(t > 0.30) & (t < 0.45)].mean()
    # the current is digitized in 3.05 pA steps: a median snaps to them (−48.83 pA), the
    # window means do not (−50.1 pA)
    assert step.amplitude_A == pytest.approx(during - before, abs=0.3 * PA)
    assert step.amplitude_A == pytest.approx(-50 * PA, abs=1 * PA)
    assert step.holding_A == pytest.approx(79 * PA, abs=2 * PA)
    # the train: as many brief pulses as the recorded trace crosses 1 nA upwards
    pulses = steps[1:]
    crossings = int(np.count_nonzero(np.diff((current > 1e-9).astype(int)) == 1))
    assert len(pulses) == crossings == 20
    assert all(p.kind == "pulse" and p.amplitude_A > 2e-9 for p in pulses)
    holding = [f for f in rec.flags if f.code == S.PROTOCOL_HOLDING.code]
    assert len(holding) == 1 and "rests at 79.1 pA" in holding[0].message   # mean, not median


@pytest.mark.parametrize("name", ["multichannelAbf1WithTags.abf", "model_vc_step.abf"])
def test_voltage_clamp_files_are_refused_in_one_line(name):
    with pytest.raises(LoadError, match=r"a voltage-clamp recording \(current recorded in pA, "
                                        r"command in mV\); passivefit needs current clamp") as err:
        load(REAL / name)
    assert "\n" not in str(err.value)


def test_a_ramp_file_is_refused():
    with pytest.raises(LoadError, match="a current-ramp recording with no current step"):
        load(REAL / "17o05027_ic_ramp.abf")


def test_a_gap_free_file_with_only_noise_is_refused():
    with pytest.raises(LoadError, match=r"a gap-free recording with no current step "
                                        r"\(recorded channel I_Com \[pA\] holds no step\)"):
        load(REAL / "2020_07_29_0062.abf")


def test_channel_override_by_index_and_by_name():
    by_name = load(REAL / "190619B_0003.abf", channel="in 0")
    assert by_name.voltage_channel == "IN 0 [mV]"
    # IN 2 is a copy of the command near 0 mV (tests/data/real/README.md): asked for, it
    # is refused rather than analysed as a membrane potential
    with pytest.raises(LoadError, match=r"the voltages never leave ±0.203 mV of 0 mV: this "
                                        r"is not a membrane potential"):
        load(REAL / "190619B_0003.abf", channel=1)
    with pytest.raises(LoadError, match=r"no channel 5 in this file \(channels: 0: IN 0 \[mV\], "
                                        r"1: IN 2 \[mV\]\)"):
        load(REAL / "190619B_0003.abf", channel=5)
    with pytest.raises(LoadError, match=r"channel Imemb \[nA\] is not a voltage"):
        load(REAL / "18425108.abf", channel="Imemb")


def test_abf1_stimulus_on_dac1_while_the_header_names_dac0(tmp_path):
    # Some ABF 1 files keep nActiveDACChannel = 0 while only DAC 1 plays an epoch table.
    # The real 190619B file with its table, units and holding moved from DAC 0 to DAC 1
    # (offsets as pyabf's abf1/headerV1.py reads them) must read as the original does.
    import struct

    raw = bytearray((REAL / "190619B_0003.abf").read_bytes())
    raw[1346:1362] = b"mV".ljust(8, b"\0") + b"pA".ljust(8, b"\0")  # sDACChannelUnit
    struct.pack_into("<f", raw, 1398, struct.unpack_from("<f", raw, 1394)[0])  # holding
    struct.pack_into("<hh", raw, 2296, 0, 1)  # nWaveformEnable: DAC 1 only
    assert struct.unpack_from("<h", raw, 1440)[0] == 0  # nActiveDACChannel stays 0
    for at, fmt in ((2308, "h"), (2348, "f"), (2428, "f"), (2508, "i"), (2588, "i")):
        size = struct.calcsize(fmt)  # nEpochType ... lEpochDurationInc: 10 per DAC
        raw[at + 10 * size: at + 20 * size] = raw[at: at + 10 * size]
        raw[at: at + 10 * size] = bytes(10 * size)
    path = tmp_path / "dac1.abf"
    path.write_bytes(bytes(raw))
    moved, original = load(path), load(REAL / "190619B_0003.abf")
    assert moved.current_source == "epoch table"
    assert moved.metadata["current_channel"] == "DAC 1 [pA]"
    for a, b in zip(moved.sweeps, original.sweeps, strict=True):
        np.testing.assert_array_equal(a.current, b.current)
        np.testing.assert_array_equal(a.voltage, b.voltage)


def test_abf1_holding_level_is_read_from_the_header_not_the_epoch_levels():
    from passivefit.io.abf import _abf1_holding

    # the voltage-clamp file holds -50 mV: its copy of the command (AO #0) rests at -50 mV
    # between its steps, while pyabf's holdingCommand gives the epoch-level list
    path = REAL / "multichannelAbf1WithTags.abf"
    abf = _pyabf("multichannelAbf1WithTags.abf")
    abf.setSweep(0, channel=1)
    rest_mV = float(np.percentile(abf.sweepY, 99))
    assert rest_mV == pytest.approx(-50.0, abs=0.1)
    assert _abf1_holding(path, abf, 0) == pytest.approx(rest_mV, abs=0.1)
    # the current-clamp file holds 0 pA on its stimulus DAC
    assert _abf1_holding(REAL / "190619B_0003.abf", _pyabf("190619B_0003.abf"), 0) == 0.0
