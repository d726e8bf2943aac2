"""Mains hum taken out of the sweeps before they are fitted (core.hum, analysis.hum).

Mains runs within a few tenths of a hertz of 50 or 60 Hz and carries harmonics (common
practice, no source); a hum of a few hundred µV of random phase per sweep does not
average out over the two to four sweeps of many real cells.
"""

from __future__ import annotations

import numpy as np
import pytest
from real_reference import DATA_DIR

from passivefit.analysis import analyze
from passivefit.core.hum import fit_hum, hum_wave, refine_frequency
from passivefit.io import load
from passivefit.model import schema as S
from passivefit.model.settings import Settings
from passivefit.simulate import BallStick, StepProtocol, simulate_recording

FS = 20_000.0


def _hummed(freq: float, seed: int) -> tuple[np.ndarray, np.ndarray, list[tuple[int, int]]]:
    """A -5 mV charging step (τ 30 ms, 100–600 ms of a 1 s sweep) with 0.1 mV white noise,
    and the same with 0.5 mV of hum at `freq` and 0.15 mV at its second harmonic."""
    rng = np.random.default_rng(seed)
    t = np.arange(int(FS)) / FS
    clean = np.where((t >= 0.1) & (t < 0.6), -5e-3 * (1 - np.exp(-(t - 0.1) / 0.03)), 0.0)
    clean[t >= 0.6] = -5e-3 * (1 - np.exp(-0.5 / 0.03)) * np.exp(-(t[t >= 0.6] - 0.6) / 0.03)
    clean += rng.normal(0, 0.1e-3, t.size) - 0.070
    phase = rng.uniform(0, 2 * np.pi)
    hum = 0.5e-3 * np.sin(2 * np.pi * freq * t + phase) \
        + 0.15e-3 * np.sin(4 * np.pi * freq * t + 2 * phase)
    flat = [(0, 1980), (10500, 11980), (16000, 20000)]   # baseline, step end, tail end
    return clean, clean + hum, flat


def test_the_hum_is_fitted_in_the_flat_stretches_and_taken_out_everywhere():
    sweeps = [_hummed(50.08, seed) for seed in range(3)]
    freq = refine_frequency([(v, flat) for _, v, flat in sweeps], FS, 50.0)
    assert freq == pytest.approx(50.08, abs=0.01)
    for clean, v, flat in sweeps:
        coef, _ = fit_hum(v, FS, flat, freq)
        left = v - hum_wave(v.size, FS, freq, coef) - clean
        assert np.sqrt(np.mean(left ** 2)) < 0.03e-3   # of a 0.37 mV rms hum
        # the charging transient, where no stretch was fitted, is cleaned as well
        assert np.max(np.abs(left[2000:4000])) < 0.1e-3


def test_a_few_hummed_sweeps_give_the_hum_free_time_constant():
    """Three sweeps with 0.5 mV of 50 Hz hum (random phase per sweep): τ0 with the hum
    taken out is the simulated cell's (within 2 %); left in, it is not."""
    cell = BallStick.from_electrotonic(0.03, 0.6, 3.0, 200e6)
    rec, truth = simulate_recording(cell, protocol=StepProtocol(0.1, 0.4, (-50e-12,)),
                                    sweep_duration_s=1.0, n_sweeps=3, noise_sd_V=0.1e-3,
                                    hum_V=0.5e-3, seed=5)
    removed = analyze(rec, Settings(bootstrap=0))
    kept = analyze(rec, Settings(bootstrap=0, remove_hum=False))
    tau0 = truth[S.TAU0.key]
    removed_tau0, kept_tau0 = (r.to_dict()["cell"][S.TAU0.key] for r in (removed, kept))
    assert removed_tau0 == pytest.approx(tau0, rel=0.02)
    assert abs(kept_tau0 - tau0) > 2 * abs(removed_tau0 - tau0)
    flag = next(f for f in removed.flags if f.code == S.CELL_HUM.code)
    assert "taken out before the fits" in flag.message


@pytest.mark.slow
def test_hum_added_to_a_real_cell_is_taken_out():
    """190619B_0003 (two usable sweeps) with 0.5 mV of 50 Hz hum added: τ0 and R_in stay
    within 2 % of the file's own (its τ0 fell 16 % before the hum was taken out)."""
    rec = load(DATA_DIR / "190619B_0003.abf")
    own = analyze(rec, Settings(bootstrap=0)).to_dict()["cell"]
    rng = np.random.default_rng(1)
    t = np.arange(rec.sweeps[0].n_samples) / rec.sample_rate_hz
    for s in rec.sweeps:
        s.voltage = s.voltage + 0.5e-3 * np.sin(2 * np.pi * 50 * t + rng.uniform(0, 2 * np.pi))
    hummed = analyze(rec, Settings(bootstrap=0)).to_dict()["cell"]
    for key in (S.TAU0.key, S.R_IN.key):
        assert hummed[key] == pytest.approx(own[key], rel=0.02)


def _event_noise(n_segments: int, seed: int, hum_V: float = 0.0) -> list[np.ndarray]:
    """100 ms baselines at 20 kHz of spontaneous synaptic potentials (Poisson, 20/s,
    0.2–0.6 mV, 1 ms rise, 8 ms decay) on 30 µV of white noise, with a 60 Hz sine of
    `hum_V` and random phase added to each."""
    rng = np.random.default_rng(seed)
    n = int(0.1 * FS)
    t = np.arange(n + int(0.05 * FS)) / FS   # 50 ms of lead-in: events begun before
    kernel = np.exp(-t[:int(0.06 * FS)] / 8e-3) - np.exp(-t[:int(0.06 * FS)] / 1e-3)
    out = []
    for _ in range(n_segments):
        spikes = np.zeros(t.size)
        times = rng.integers(0, t.size, rng.poisson(20 * t[-1]))
        spikes[times] = rng.uniform(0.2e-3, 0.6e-3, times.size) / kernel.max()
        v = np.convolve(spikes, kernel)[:t.size][-n:] + rng.normal(0, 30e-6, n)
        out.append(v + hum_V * np.sin(2 * np.pi * 60.0 * t[:n] + rng.uniform(0, 2 * np.pi)))
    return out


def test_synaptic_noise_in_short_baselines_is_not_taken_for_hum():
    """Spontaneous events put power at 50–60 Hz far above the white-noise floor of short
    baselines (a false hum on two real files, 18711001 and File_axon_5): the amplitude at
    the neighbouring frequencies tells noise from a mains line (common practice, no
    source)."""
    from passivefit.analysis.hum import HUM_FLOOR_FACTOR, HUM_MIN_V, Hum
    from passivefit.core.qc import mains_hum

    found = mains_hum(_event_noise(4, seed=3), FS)
    freq, amp, floor, local = found
    # the white-noise rule alone would call it hum: the test can fail
    assert amp >= max(HUM_FLOOR_FACTOR * floor, HUM_MIN_V)
    assert 0.5 < amp / local < 2.0
    assert not Hum(*found).seen

    hummed = mains_hum(_event_noise(4, seed=3, hum_V=0.4e-3), FS)
    assert hummed[0] == 60.0 and Hum(*hummed).seen
    assert hummed[1] == pytest.approx(0.4e-3, rel=0.25)


def test_neighbouring_frequencies_keep_away_from_mains_lines():
    from passivefit.core.qc import _neighbours

    for size in (2000, 5000, 20000, 100000):   # 0.1–5 s at 20 kHz
        step = FS / size
        near = _neighbours(60.0, size, FS)
        assert near
        for c in near:
            assert c >= 1.5 * step
            for mains in (50.0, 60.0):
                k = max(round(c / mains), 1)
                assert abs(c - k * mains) >= 1.5 * step
