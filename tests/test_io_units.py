"""Values read in the wrong unit are refused, with the likely mistake named.

A membrane potential at rest reads about -120 to +20 mV and no current clamp injects
100 nA (common practice, no source); a table whose `V` column holds mV values reads
-70 V and must not reach the analysis as a cell resting at -70,000 mV.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest
from io_fixtures import charging_recording

from passivefit.io import LoadError, load, save

ROOT = Path(__file__).resolve().parent.parent
REAL = ROOT / "tests" / "data" / "real"
SAMPLES = ROOT / "sample_recordings"


def _relabelled(tmp_path: Path, old: str, new: str, name: str = "cell.csv") -> Path:
    """A sweep table whose column labels name the wrong unit, the numbers unchanged."""
    path = save(charging_recording(n_sweeps=2, n_samples=1200), tmp_path / "right.csv")
    text = path.read_text()
    assert old in text
    target = tmp_path / name
    target.write_text(text.replace(old, new))
    return target


def test_the_right_units_load(tmp_path):
    recording = load(save(charging_recording(n_sweeps=2, n_samples=1200), tmp_path / "ok.csv"))
    assert -0.075 < np.median(recording.sweeps[0].voltage) < -0.066  # rest -68 mV, step


def test_mv_values_under_a_v_header_are_refused(tmp_path):
    path = _relabelled(tmp_path, "_mV", "_V")
    with pytest.raises(LoadError) as caught:
        load(path)
    message = str(caught.value)
    assert "mV values seem to be labelled V" in message
    assert re.search(r"voltages read -7\d{4}(\.\d+)? mV at rest", message), message  # -70 V
    assert "\n" not in message


def test_mv_values_under_a_v_header_in_a_tsv(tmp_path):
    right = save(charging_recording(n_sweeps=2, n_samples=1200), tmp_path / "right.tsv")
    wrong = tmp_path / "wrong.tsv"
    wrong.write_text(right.read_text().replace("_mV", "_V"))
    with pytest.raises(LoadError, match="labelled V"):
        load(wrong)


def test_v_values_under_a_mv_header_are_refused(tmp_path):
    path = save(charging_recording(n_sweeps=2, n_samples=1200), tmp_path / "cell.csv")
    lines = path.read_text().splitlines()
    at = next(i for i, line in enumerate(lines) if line.startswith("time_ms"))
    volt_cols = [i for i, name in enumerate(lines[at].split(",")) if name.endswith("_mV")]
    rows = [",".join(f"{float(x) * 1e-3:.9g}" if i in volt_cols else x
                     for i, x in enumerate(row.split(","))) for row in lines[at + 1:]]
    path.write_text("\n".join(lines[:at + 1] + rows) + "\n")  # V numbers labelled mV
    with pytest.raises(LoadError) as caught:
        load(path)
    message = str(caught.value)
    assert re.search(r"never leave ±0\.0\d+ mV of 0 mV: this is not a membrane potential",
                     message), message
    assert "\n" not in message


def test_pa_values_labelled_na_are_refused(tmp_path):
    path = _relabelled(tmp_path, "_pA", "_nA")  # -40 pA read as -40 nA ... -60 nA: fine
    load(path)
    path = _relabelled(tmp_path, "_pA", "_A", "amps.csv")  # -40 A
    with pytest.raises(LoadError, match="current unit seems wrong"):
        load(path)


def test_nwb_voltages_in_the_wrong_unit_are_refused(tmp_path):
    recording = charging_recording(n_sweeps=2, n_samples=1200)
    for sweep in recording.sweeps:
        sweep.voltage = sweep.voltage * 1e3  # as if the mV numbers had been stored as V
    with pytest.raises(LoadError, match="labelled V"):
        load(save(recording, tmp_path / "big.nwb"))


@pytest.mark.parametrize("path", sorted(REAL.glob("*.abf")) + sorted(
    p for p in SAMPLES.iterdir() if p.suffix in (".abf", ".nwb", ".csv")), ids=lambda p: p.name)
def test_real_files_and_samples_pass_the_unit_check(path):
    try:
        recording = load(path)
    except LoadError as err:  # refused for what they record (ramps, voltage clamp), not units
        assert "unit" not in str(err), str(err)
        return
    assert -0.12 < np.median([np.median(s.voltage) for s in recording.sweeps]) < 0.02


def test_a_current_too_small_to_be_a_step_names_its_size(tmp_path):
    """-40 pA read as -0.04 pA (a unit mistake): the one-line refusal says how small the
    current is instead of calling it flat (common practice, no source: a current-clamp
    step is tens to hundreds of pA)."""
    from passivefit.analysis import analyze

    recording = charging_recording(n_sweeps=2, n_samples=1200)
    for sweep in recording.sweeps:
        sweep.current = sweep.current * 1e-3
    with pytest.raises(LoadError, match=r"the current is flat, changing by at most 0.06 pA: "
                                        r"is its unit right\?"):
        analyze(load(save(recording, tmp_path / "tiny.nwb")))


def test_a_current_that_changes_much_without_a_step_is_not_called_flat(tmp_path):
    """A long noise stimulus (±60 pA, held 1 ms at a time): the edge detector finds no
    step, and the refusal names a waveform rather than calling the current flat and
    doubting its unit."""
    from passivefit.analysis import analyze

    recording = charging_recording(n_sweeps=2, n_samples=6000)
    rng = np.random.default_rng(2)
    for sweep in recording.sweeps:
        current = np.zeros(sweep.current.size)
        current[2000:] = np.repeat(rng.normal(0, 60e-12, 200), 20)
        sweep.current = current
    with pytest.raises(LoadError, match=r"no current step from rest found in any sweep "
                                        r"\(the current is a waveform\); give `--step"):
        analyze(load(save(recording, tmp_path / "noise.nwb")))
