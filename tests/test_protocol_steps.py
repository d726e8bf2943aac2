"""Every step and pulse of a sweep, measured against the level just before it."""

import numpy as np
import pytest

from passivefit.core.steps import (
    MIN_DURATION_S,
    Step,
    classify_stimulus,
    common_steps,
    find_step,
    find_steps,
)
from passivefit.model import schema as S
from passivefit.model.protocol import (
    Epoch,
    SweepProtocol,
    compare_steps,
)

FS = 20_000.0
PA = 1e-12


def _levels(n: int, *pieces: tuple[float, float, float]) -> np.ndarray:
    """A current at 0 A with (onset s, duration s, level A) pieces set in order."""
    out = np.zeros(n)
    for onset, duration, level in pieces:
        out[int(round(onset * FS)) : int(round((onset + duration) * FS))] = level
    return out


def _summary(steps: list[Step]) -> list[tuple[float, float, float, bool]]:
    return [(round(s.onset_s * 1e3, 2), round(s.duration_s * 1e3, 2),
             round(s.amplitude_A / PA, 1), s.from_rest) for s in steps]


def test_an_early_step_keeps_its_sign_and_its_short_baseline():
    # -100 pA from 23.4 ms: the first 5 % of the sweep (75 ms) is mostly the step
    current = _levels(30_000, (0.0234, 0.3, -100 * PA))
    steps = find_steps(current, FS)
    assert _summary(steps) == [(23.4, 300.0, -100.0, True)]
    chosen = find_step(current, FS)
    assert chosen.amplitude_A == pytest.approx(-100 * PA)
    assert chosen.baseline_start == 0 and chosen.baseline_s == pytest.approx(0.0234)
    assert chosen.holding_A == 0.0


def test_a_step_on_a_holding_current_is_measured_from_the_holding_level():
    current = 30 * PA + _levels(20_000, (0.1, 0.4, -50 * PA))
    step = find_step(current, FS)
    assert step.amplitude_A == pytest.approx(-50 * PA)
    assert step.holding_A == pytest.approx(30 * PA)
    assert step.level_A == pytest.approx(-20 * PA)


def test_two_steps_back_to_back_are_listed_separately():
    # variable +50 pA, back to rest, fixed -100 pA followed at once by the variable level
    current = _levels(60_000, (0.147, 0.5, 50 * PA), (1.147, 0.5, -100 * PA),
                      (1.647, 0.5, 50 * PA))
    steps = find_steps(current, FS)
    assert _summary(steps) == [(147.0, 500.0, 50.0, True), (1147.0, 500.0, -100.0, True),
                               (1647.0, 500.0, 150.0, False)]
    assert steps[2].level_before_A == pytest.approx(-100 * PA)
    assert steps[2].baseline_start == steps[1].onset
    assert find_step(current, FS).onset_s == pytest.approx(0.147)


def test_a_test_pulse_before_a_train_is_chosen_and_the_train_listed():
    current = _levels(50_000, (0.25, 0.25, -50 * PA))
    for k in range(15):
        current += _levels(50_000, (1.0 + 0.01 * k, 0.002, 2500 * PA))
    steps = find_steps(current, FS)
    assert len(steps) == 16
    assert _summary(steps[:1]) == [(250.0, 250.0, -50.0, True)]
    assert all(s.kind == "pulse" and s.amplitude_A == pytest.approx(2500 * PA)
               for s in steps[1:])
    assert find_step(current, FS).onset_s == pytest.approx(0.25)
    assert classify_stimulus(current, FS) == "step"


def test_a_long_step_is_chosen_over_a_brief_test_pulse_before_it():
    """A 10 ms bridge-check pulse at 20 ms, then the 1 s step the protocol is about
    (as many acquisition protocols do; common practice, no source): a 10 ms step cannot
    show a steady state, so the long step is analysed; a sweep whose long step is 0 pA
    gets none rather than its test pulse."""
    sweeps = [_levels(40_000, (0.02, 0.01, -50 * PA), (0.3, 1.0, amp * PA))
              for amp in (-90, -50, 0, 50)]
    assert find_step(sweeps[0], FS).onset_s == pytest.approx(0.3)
    chosen = common_steps([find_steps(c, FS) for c in sweeps])
    assert [None if s is None else (round(s.onset_s, 3), round(s.amplitude_A / PA))
            for s in chosen] == [(0.3, -90), (0.3, -50), None, (0.3, 50)]


def test_in_a_file_of_several_protocols_the_long_steps_win_over_test_pulses():
    """Every sweep begins with the same 10 ms test pulse (as some acquisition systems
    add; common practice, no source); three sweeps then hold a 1 s step, six a ramp or
    nothing. The long steps are analysed, not the six sweeps' test pulses, which had
    won the vote."""
    pulse = (0.02, 0.01, -50 * PA)
    steps = [_levels(40_000, pulse, (0.3, 1.0, amp * PA)) for amp in (-90, -50, -30)]
    others = [_levels(40_000, pulse) for _ in range(3)]
    ramp = _levels(40_000, pulse)
    ramp[6000:36_000] = np.linspace(0, 200 * PA, 30_000)
    others += [ramp.copy() for _ in range(3)]
    chosen = common_steps([find_steps(c, FS) for c in steps + others])
    assert [None if s is None else (round(s.onset_s, 3), round(s.amplitude_A / PA))
            for s in chosen] == [(0.3, -90), (0.3, -50), (0.3, -30)] + [None] * 6


def test_a_noisy_recorded_current_with_offset_and_capacitive_spikes():
    rng = np.random.default_rng(7)
    current = 79 * PA + _levels(60_000, (0.25, 0.25, -49 * PA))
    current += rng.normal(0, 4 * PA, current.size)
    for edge in (5000, 10_000):  # capacitive spikes at the edges, 2 samples long
        current[edge : edge + 2] += 800 * PA
    current[30_000] += 300 * PA  # a one-sample noise blip
    steps = find_steps(current, FS)
    assert len(steps) == 1
    step = steps[0]
    assert abs(step.onset - 5000) <= 2 and abs(step.offset - 10_000) <= 2
    assert step.amplitude_A == pytest.approx(-49 * PA, abs=1 * PA)
    assert step.holding_A == pytest.approx(79 * PA, abs=1 * PA)


def test_a_recorded_current_with_mains_hum_keeps_its_step():
    rng = np.random.default_rng(5)
    t = np.arange(40_000) / FS
    current = _levels(40_000, (0.5, 0.5, -50 * PA)) + 10 * PA * np.sin(2 * np.pi * 50 * t)
    current += rng.normal(0, 2 * PA, current.size)
    (step,) = find_steps(current, FS)
    assert abs(step.onset - 10_000) <= 4 and abs(step.offset - 20_000) <= 4
    assert step.amplitude_A == pytest.approx(-50 * PA, abs=3 * PA)


def test_a_drifting_recorded_holding_current_keeps_the_step_on_it():
    rng = np.random.default_rng(6)
    n = 200_000  # 10 s
    current = 80 * PA + np.linspace(0, 20 * PA, n) + _levels(n, (0.25, 0.25, -49 * PA))
    current += rng.normal(0, 2 * PA, n)
    (step,) = find_steps(current, FS)
    assert abs(step.onset - 5000) <= 2 and abs(step.offset - 10_000) <= 2
    assert step.amplitude_A == pytest.approx(-49 * PA, abs=1.5 * PA)


def test_noise_alone_and_a_flat_command_have_no_step():
    rng = np.random.default_rng(1)
    assert find_steps(rng.normal(0, 5 * PA, 40_000), FS) == []
    assert find_steps(np.zeros(4000), FS) == []
    assert classify_stimulus(rng.normal(0, 5 * PA, 40_000), FS) == "none"


def test_blips_shorter_than_the_minimum_duration_are_not_steps():
    current = np.zeros(20_000)
    short = int(MIN_DURATION_S * FS) - 1
    current[5000 : 5000 + short] = 200 * PA  # a command glitch
    assert find_steps(current, FS) == []
    current[10_000:10_020] = 200 * PA  # 1 ms: a real pulse
    assert _summary(find_steps(current, FS)) == [(500.0, 1.0, 200.0, True)]


def test_ramps_are_not_steps():
    ramp = np.concatenate([np.zeros(2000), np.linspace(0, 300 * PA, 10_000), np.zeros(2000)])
    assert find_steps(ramp, FS) == []
    assert find_step(ramp, FS) is None
    assert classify_stimulus(ramp, FS) == "ramp"
    steep = np.concatenate([np.zeros(2000), np.linspace(0, 3000 * PA, 200), np.zeros(2000)])
    assert find_steps(steep, FS) == []  # 10 ms rise: no edge


def test_a_sine_is_a_waveform_not_a_step():
    t = np.arange(40_000) / FS
    sine = 50 * PA * np.sin(2 * np.pi * 5 * t)
    assert find_steps(sine, FS) == []
    assert classify_stimulus(sine, FS) == "waveform"
    assert classify_stimulus(None, FS) == "none"


def test_a_step_without_enough_baseline_is_listed_but_not_chosen():
    current = _levels(10_000, (0.001, 0.2, -50 * PA))  # 1 ms baseline
    assert len(find_steps(current, FS)) == 1
    assert find_step(current, FS) is None


def test_common_steps_keep_the_protocol_position_when_a_sweep_lacks_its_step():
    sweeps = [
        _levels(40_000, (0.147, 0.5, a * PA), (1.147, 0.5, -100 * PA)) for a in (-50, 0, 50)
    ]
    chosen = common_steps([find_steps(c, FS) for c in sweeps])
    assert chosen[1] is None  # the 0 pA sweep: not its -100 pA step at 1.147 s
    assert [round(c.amplitude_A / PA) for c in (chosen[0], chosen[2])] == [-50, 50]
    assert find_step(sweeps[1], FS).onset_s == pytest.approx(1.147)


def test_epoch_command_draws_steps_ramps_and_trains():
    sweep = SweepProtocol((Epoch(0.01, 0.02, -50 * PA), Epoch(0.03, 0.01, 100 * PA, "ramp"),
                           Epoch(0.05, 0.01, 1e-9, "pulse train", 0.005, 0.001)), 10 * PA)
    c = sweep.command(2000, FS)
    assert c[0] == pytest.approx(10 * PA) and c[300] == pytest.approx(-50 * PA)
    assert c[799] == pytest.approx(100 * PA)  # end of the ramp
    assert c[1000] == pytest.approx(1e-9) and c[1030] == pytest.approx(100 * PA)
    assert np.count_nonzero(c == 1e-9) == 2 * 20  # two 1 ms pulses of 20 samples
    assert sweep.kinds == {"step", "ramp", "pulse train"}


def test_compare_steps_flags_each_disagreement_with_values_in_units():
    table = find_steps(_levels(20_000, (0.25, 0.25, -100 * PA)), FS)
    recorded = find_steps(79 * PA + _levels(20_000, (0.252, 0.25, -49 * PA)), FS)
    flags = compare_steps(0, table, recorded)
    codes = {f.code for f in flags}
    assert codes == {S.PROTOCOL_AMPLITUDE.code, S.PROTOCOL_TIMING.code, S.PROTOCOL_HOLDING.code}
    amplitude = next(f for f in flags if f.code == S.PROTOCOL_AMPLITUDE.code)
    assert "-100.0 pA" in amplitude.message and "-49.0 pA" in amplitude.message
    assert amplitude.value == pytest.approx(51)   # in pA, as the message's units say
    timing = next(f for f in flags if f.code == S.PROTOCOL_TIMING.code)
    assert timing.value == pytest.approx(2, abs=0.1) and timing.message.endswith("shift, ms)")
    assert compare_steps(0, table, table) == []
    missing = compare_steps(3, table, [])
    assert [f.code for f in missing] == [S.PROTOCOL_STEP_MISSING.code]
    assert "sweep 3" in missing[0].message


def test_common_steps_group_onsets_that_differ_by_a_sample_or_two():
    # recorded currents put the same edge a sample apart: 146.45 ms and 146.55 ms
    sweeps = [_levels(40_000, (onset, 0.5, -50 * PA)) for onset in (0.14645, 0.14655, 0.14655)]
    sweeps.append(_levels(40_000, (0.6, 0.5, -80 * PA)))  # a stray sweep elsewhere
    chosen = common_steps([find_steps(c, FS) for c in sweeps])
    assert [c is not None for c in chosen] == [True, True, True, False]
    assert chosen[0].onset == 2929 and chosen[1].onset == 2931


def test_a_sweep_whose_second_step_is_0_pA_is_read_as_far_as_the_others():
    """A fixed first step, then a family of second steps from 0 pA (as 18711001 has): the
    0 pA sweep has no next step of its own, yet it is read only to where the others' second
    step begins, so all sweeps have one length and are combined together."""
    from io_fixtures import charging_recording

    from passivefit.analysis.windows import sweep_steps
    from passivefit.model.settings import Settings

    rec = charging_recording(n_sweeps=3, n_samples=8000)
    for k, sweep in enumerate(rec.sweeps):
        sweep.current = _levels(8000, (0.04, 0.1, -100 * PA), (0.25, 0.1, 50 * k * PA))
    steps = sweep_steps(rec, Settings())
    assert [round(s.onset_s, 3) for s in steps] == [0.04] * 3
    assert [s.region_end for s in steps] == [5000, 5000, 5000]


def _pulse_then_noise(pulse_pA: float, seed: int = 3, count_pA: float = 0.0) -> np.ndarray:
    """4 s at 20 kHz of a recorded current: 1.5 pA of white noise, a 100 ms pulse at
    100 ms, and from 600 ms to 3.6 s white noise low-passed at 200 Hz (running mean of
    5 ms), 80 pA sd; digitized at `count_pA` per count when given."""
    rng = np.random.default_rng(seed)
    x = _levels(80_000, (0.1, 0.1, pulse_pA * PA)) + rng.normal(0.0, 1.5, 80_000) * PA
    wide = np.convolve(rng.normal(0.0, 1.0, 60_100), np.ones(100) / 100, mode="valid")[:60_000]
    x[12_000:72_000] += 80 * PA * wide / wide.std()
    return np.round(x / (count_pA * PA)) * count_pA * PA if count_pA else x


@pytest.mark.parametrize("count_pA", [0.0, 0.5])
def test_a_test_pulse_before_a_noise_stimulus_is_found_and_ends_at_the_noise(count_pA):
    current = _pulse_then_noise(-30.0, count_pA=count_pA)
    steps = find_steps(current, FS)
    assert _summary(steps) == [(100.0, 100.0, pytest.approx(-30.0, abs=1.0), True)]
    assert 11_950 <= steps[0].waveform_from <= 12_010   # the noise starts at sample 12 000
    assert classify_stimulus(current, FS) == "step"


def test_a_noise_stimulus_alone_holds_no_step_and_is_a_waveform():
    current = _pulse_then_noise(0.0)
    assert find_steps(current, FS) == []
    assert classify_stimulus(current, FS) == "waveform"


def test_a_sweep_whose_steps_are_found_keeps_them_without_a_waveform_end():
    # the first reading finds the step: nothing is read again, the region is not cut
    current = _levels(40_000, (0.1, 0.5, -50 * PA)) + np.random.default_rng(4).normal(
        0.0, 1.5, 40_000) * PA
    steps = find_steps(current, FS)
    assert len(steps) == 1 and steps[0].waveform_from is None
