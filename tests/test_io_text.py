"""The passivefit sweep table: layout variants and precise errors."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose

from passivefit.io import LoadError, load


def _table(tmp_path: Path, text: str, name: str = "cell.csv") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def _rows(n: int, columns, delimiter: str = ",") -> str:
    """n rows of time_ms at 10 kHz followed by the given column functions of k."""
    return "\n".join(delimiter.join([f"{k * 0.1:.1f}", *(f(k) for f in columns)]) for k in range(n))


def _wave(k: int) -> str:
    return f"{-70 + np.sin(k / 10):.6f}"


def test_units_and_semicolons_and_metadata(tmp_path):
    body = _rows(200, [lambda k: f"{-0.07 + k * 1e-6:.9f}", lambda k: "-0.05"], ";")
    path = _table(
        tmp_path,
        "# cell_id: LOL-2026-11-04-c2\n# temperature_C: 31.5\n# filter_hz: 2000\n# rig: B\n"
        "time_ms;V3_V;I3_nA\n" + body + "\n",
    )
    rec = load(path)
    assert rec.sample_rate_hz == 10_000.0
    assert rec.metadata == {
        "cell_id": "LOL-2026-11-04-c2",
        "temperature_C": 31.5,
        "filter_hz": 2000.0,
        "rig": "B",
    }
    assert len(rec.sweeps) == 1 and rec.sweeps[0].index == 0  # V3 renumbered from 0
    assert_allclose(rec.sweeps[0].voltage[:2], [-0.07, -0.069999])
    assert_allclose(rec.sweeps[0].current, -0.05e-9)


def test_tabs_seconds_and_sweeps_in_number_order(tmp_path):
    lines = ["time_s\tV2_mV\tV1_mV"]
    lines += [f"{k / 5000:.6f}\t{-60 - k % 7}\t{-80 + k % 5}" for k in range(300)]
    rec = load(_table(tmp_path, "\n".join(lines), "cell.tsv"))
    assert rec.sample_rate_hz == 5000.0
    assert rec.sweeps[0].voltage[0] == pytest.approx(-0.080)  # V1 comes first
    assert rec.sweeps[1].voltage[0] == pytest.approx(-0.060)
    assert not rec.has_current


def test_rate_from_metadata_without_time_column(tmp_path):
    path = _table(
        tmp_path, "# sample_rate_hz: 25000\nV0_mV\n" + "\n".join(_wave(k) for k in range(150))
    )
    assert load(path).sample_rate_hz == 25_000.0


def test_blank_lines_keep_line_numbers(tmp_path):
    text = "time_ms,V0_mV\n0.0,-70\n\n0.1,-70.1\n0.2,abc\n" + _rows(200, [_wave])
    with pytest.raises(LoadError, match=r"line 5, column 'V0_mV': 'abc' is not a number"):
        load(_table(tmp_path, text))


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("# cell_id: x\n", "no header row; add one such as time_ms,V0_mV"),
        ("time_ms,V0_kV\n0,1\n", r"line 1: unknown unit 'kV' in column 'V0_kV'; use mV or V"),
        ("time_ms,I0_mA,V0_mV\n0,1,2\n", r"unknown unit 'mA' in column 'I0_mA'; use pA or nA or A"),
        ("time_ms,Vm\n0,1\n", r"column 'Vm' is not understood; expected time_s or time_ms"),
        ("time_ms,I0_pA\n0,1\n", "line 1: no voltage column; name one V0_mV"),
        ("time_ms,V0_mV,I1_pA\n0,1,2\n", "current column I1 has no voltage column V1"),
        ("time_ms,V0_mV,V0_V\n0,1,2\n", "column V0 appears twice"),
        ("time_ms,time_s,V0_mV\n0,1,2\n", "two time columns"),
        ("time_ms,V0_mV\n", "a header but no data rows"),
        ("V0_mV\n1\n2\n", r"no time column and no `# sample_rate_hz:` line"),
        ("# temperature_C: warm\ntime_ms,V0_mV\n0,1\n", "`temperature_C` is 'warm', not a number"),
        (
            "# filter_hz: 5 kHz\ntime_ms,V0_mV\n0,1\n",
            r"`filter_hz` is '5 kHz', not a number; write e.g. `# filter_hz: 5000`",
        ),
        ("time_ms,V0_mV\n0,1\n0.1,2,3\n", "line 3: 3 values where the header has 2"),
        ("time_ms,V0_mV\n0,1\n0.1,\n", r"line 3, column 'V0_mV': '' is not a number"),
        (
            "time_ms,V0_mV\n0,1\n0.1,2\n0.15,3\n0.3,4\n",
            r"time column: time is not evenly sampled: sample 2 is 0\.\d+ intervals off",
        ),
        ("time_ms,V0_mV\n0,1\n0.1,2\n0.1,3\n", r"time does not increase at sample 2"),
        (
            "# sample_rate_hz: 20000\ntime_ms,V0_mV\n0,1\n0.1,2\n",
            r"the time column gives 10000.0 Hz but `sample_rate_hz` says 20000.0",
        ),
        ("# sample_rate_hz: -5\nV0_mV\n1\n2\n", r"`sample_rate_hz` is -5.0; give a positive rate"),
    ],
)
def test_precise_errors(tmp_path, text, message):
    with pytest.raises(LoadError, match=message):
        load(_table(tmp_path, text))


def test_rounded_times_still_count_as_uniform(tmp_path):
    # 22.05 kHz written with 3 decimals in ms: rounding jitter of ~1 % of an interval
    lines = ["time_ms,V0_mV"] + [f"{k / 22.05:.3f},{_wave(k)}" for k in range(2205)]
    assert load(_table(tmp_path, "\n".join(lines))).sample_rate_hz == 22_050.0


def test_large_table_reads(tmp_path):
    # 20 sweeps x 20,000 rows with currents: the size a rig produces per cell
    n, sweeps = 20_000, 20
    t = np.arange(n) / 20.0  # ms at 20 kHz
    cols = [t]
    names = ["time_ms"]
    rng = np.random.default_rng(3)
    for k in range(sweeps):
        cols += [-70 + rng.normal(0, 0.1, n), np.where(t > 100, -10.0 * k, 0.0)]
        names += [f"V{k}_mV", f"I{k}_pA"]
    path = tmp_path / "big.csv"
    np.savetxt(
        path, np.column_stack(cols), fmt="%.6g", delimiter=",", header=",".join(names), comments=""
    )
    rec = load(path)
    assert len(rec.sweeps) == sweeps and rec.sweeps[0].n_samples == n
    assert_allclose(rec.sweeps[19].current[-1], -190e-12)
