"""Recordings of 16-bit ADC data held as float32: the analysis gives the float64 values
to round-off, and the pooled sweeps are combined without copies."""

from __future__ import annotations

import numpy as np
import pytest

from passivefit.analysis import Settings, analyze
from passivefit.analysis.pool import SweepPool
from passivefit.core.steps import Step
from passivefit.model.recording import Recording, Sweep
from passivefit.model.results import SweepFit
from passivefit.simulate import BallStick, StepProtocol, simulate_recording


def _as_float32(rec: Recording) -> Recording:
    sweeps = [Sweep(s.index, s.voltage.astype(np.float32), s.current) for s in rec.sweeps]
    return Recording(sweeps, rec.sample_rate_hz, rec.path, rec.sha256, rec.format,
                     dict(rec.metadata), rec.flags, rec.current_source, rec.clamp_mode,
                     rec.voltage_channel, rec.protocol)


def test_a_sweep_keeps_float32_and_makes_other_types_float64():
    v32 = np.linspace(-0.07, -0.06, 200, dtype=np.float32)
    assert Sweep(0, v32).voltage is v32                      # no copy
    assert Sweep(0, v32.astype(np.int16)).voltage.dtype == np.float64
    assert Sweep(0, v32.tolist()).voltage.dtype == np.float64


@pytest.mark.slow
def test_float32_samples_give_the_float64_values_to_round_off():
    cell = BallStick.from_electrotonic(0.022, 1.0, 5.0, 110e6)
    rec, _ = simulate_recording(cell, protocol=StepProtocol(0.1, 0.5, (-50e-12, -30e-12)),
                                n_sweeps=8, sweep_duration_s=1.0, sample_rate_hz=20_000,
                                seed=4, events_per_s=0.5)
    settings = Settings(bootstrap=10)
    full = analyze(rec, settings).to_dict()
    half = analyze(_as_float32(rec), settings).to_dict()
    for key, value in full["cell"].items():
        other = half["cell"][key]
        if isinstance(value, float):
            # float32 keeps 24 bits (6e-8 relative): values move by round-off only
            # (abs: values near 0 shown to 4 significant digits can step by one digit)
            assert other == pytest.approx(value, rel=1e-4, abs=2e-4), key
        else:
            assert other == value, key
    assert [s["accepted"] for s in half["sweeps"]] == [s["accepted"] for s in full["sweeps"]]


class _AsRecorded:
    """A sweep whose fit saw it as recorded: no drift taken out, no events cut out."""

    trend, masked_s = (0.0, 0.0), ()
    corrected = SweepFit.corrected


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("gaps", [False, True])
def test_a_resample_as_weights_equals_the_resample_as_copies(dtype, gaps):
    rng = np.random.default_rng(3)
    n, m = 7, 20_000                               # more samples than one block of the sums
    d = rng.normal(-5e-3, 1e-3, (n, m))
    if gaps:
        d[2, 100:900] = np.nan
        d[:, 5000:5010] = np.nan                   # cut out of every sweep: NaN in the result
    currents = rng.choice([-50e-12, -30e-12, 10e-12], n)
    step = Step(1000, 3000, -50e-12, 20_000.0, 0.0, 0, 0.0)
    pool = SweepPool(step, tuple(range(n)), currents, (_AsRecorded(),) * n,
                     tuple(d.astype(dtype)), np.zeros(n), -0.07, gaps)
    for pick in (None, rng.integers(0, n, n), np.array([1, 1, 1, 4, 4, 6, 0])):
        i = currents if pick is None else currents[pick]
        rows = d.astype(dtype).astype(np.float64)
        rows = rows if pick is None else rows[pick]
        seen = np.isfinite(rows)
        with np.errstate(invalid="ignore", divide="ignore"):
            expected = -0.07 + step.amplitude_A * (i @ np.where(seen, rows, 0.0)) / (
                (i * i) @ seen)
        weights = None if pick is None else np.bincount(pick, minlength=n)
        np.testing.assert_allclose(pool.combine(weights), expected, rtol=1e-12, atol=1e-18)
