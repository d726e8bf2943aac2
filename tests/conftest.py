"""Shared test set-up: Qt renders offscreen, so GUI tests need no display."""

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

from pathlib import Path  # noqa: E402

import pytest  # noqa: E402


@pytest.fixture(scope="session")
def recording_file(tmp_path_factory) -> Path:
    """A simulated ball-and-stick cell (τm 20 ms, L 1, ρ 3) written as a CSV recording
    (the window's tests open copies of it)."""
    from passivefit.io import save
    from passivefit.simulate import BallStick, StepProtocol, simulate_recording

    cell = BallStick.from_electrotonic(20e-3, 1.0, 3.0, 150e6)
    recording, _truth = simulate_recording(
        cell, protocol=StepProtocol(0.05, 0.2, (-50e-12, -30e-12, -10e-12, 10e-12)),
        sample_rate_hz=10_000, filter_hz=2_000, sweep_duration_s=0.4, n_sweeps=8, seed=7,
        cell_id="LOL-2026-12-01-c9")
    return save(recording, tmp_path_factory.mktemp("rec") / "LOL-2026-12-01-c9.csv")
