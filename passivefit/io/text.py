"""The passivefit sweep table: sweeps as columns of a CSV/TSV text file.

Layout (see docs/csv-format.md)::

    # cell_id: LOL-2026-11-03-c1          optional `# key: value` metadata lines
    # sample_rate_hz: 20000                optional; checked against the time column
    time_ms,V0_mV,I0_pA,V1_mV,I1_pA        one header row, units in the names
    0.00,-70.12,0,-70.09,-50
    ...

The time column (`time_s` or `time_ms`) may be left out when a `sample_rate_hz`
line is given. Voltage columns are `V<k>_mV` or `V<k>_V`; current columns, optional,
`I<k>_pA`, `I<k>_nA` or `I<k>_A`; names are read without regard to case
(`time_s,v0_mV,i0_pA` is the same header as `time_s,V0_mV,I0_pA`). The delimiter
(comma, tab or semicolon) is taken from the header row.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from passivefit.core.steps import find_steps
from passivefit.io._rate import rate_from_times, whole_hz
from passivefit.io.recording import LoadError, Recording, Sweep
from passivefit.model.protocol import SOURCE_NONE, SOURCE_TABLE, protocol_from_steps

FORMAT_NAME = "passivefit sweep table"

_TIME_SCALE = {"time_s": 1.0, "time_ms": 1e-3}
_VOLTAGE_SCALE = {"mV": 1e-3, "V": 1.0}
_CURRENT_SCALE = {"pA": 1e-12, "nA": 1e-9, "A": 1.0}
# column names are matched without regard to case: v0_mV, V0_MV and v0_mv are V0_mV
_SIGNAL_COLUMN = re.compile(r"^(?P<kind>[VI])(?P<sweep>\d+)_(?P<unit>\w+)$", re.IGNORECASE)
_DELIMITERS = (",", "\t", ";")
_HELP = "expected time_s or time_ms, V<k>_mV or V<k>_V, I<k>_pA, I<k>_nA or I<k>_A"
# metadata keys read as numbers, with an example value for the error; every other key
# stays text
_NUMERIC_KEYS = {"sample_rate_hz": "20000", "temperature_C": "32", "filter_hz": "5000"}
# Largest sweep table read: the text, its lines and the table of numbers are all held
# at once (a few times the file's size), so a larger file is refused before reading.
MAX_TEXT_BYTES = 2**30


@dataclass(frozen=True)
class _Column:
    """Where one signal sits in the table and how to reach SI units."""

    position: int
    scale: float


@dataclass
class _Header:
    time: _Column | None
    voltage: dict[int, _Column]
    current: dict[int, _Column]
    n_columns: int


def _split_preamble(path: Path, lines: list[str]) -> tuple[dict, int]:
    """Metadata from leading `# key: value` lines; index of the header line."""
    metadata: dict = {}
    for number, line in enumerate(lines):
        stripped = line.strip()
        if not stripped:
            continue
        if not stripped.startswith("#"):
            return metadata, number
        key, sep, value = stripped.lstrip("#").partition(":")
        if sep and key.strip():
            metadata[key.strip()] = value.strip()
    raise LoadError(path, f"no header row; add one such as time_ms,V0_mV,I0_pA ({_HELP})")


def _typed_metadata(path: Path, raw: dict) -> dict:
    metadata = dict(raw)
    for key, example in _NUMERIC_KEYS.items():
        if key in metadata:
            try:
                metadata[key] = float(metadata[key])
            except ValueError:
                raise LoadError(
                    path,
                    f"metadata `{key}` is {raw[key]!r}, not a number; "
                    f"write e.g. `# {key}: {example}`",
                ) from None
    return metadata


def _sniff_delimiter(header_line: str) -> str:
    counts = {d: header_line.count(d) for d in _DELIMITERS}
    return max(counts, key=lambda d: counts[d])


def _looks_numeric(token: str) -> bool:
    try:
        float(token)
    except ValueError:
        return False
    return True


def _parse_header(path: Path, names: list[str], line_no: int) -> _Header:
    if all(_looks_numeric(n) for n in names if n):
        raise LoadError(
            path,
            f"line {line_no}: no header row (the first row is numbers); "
            f"add one such as time_ms,V0_mV,I0_pA",
        )
    header = _Header(None, {}, {}, len(names))
    for position, name in enumerate(names):
        if name.lower() in _TIME_SCALE:
            if header.time is not None:
                raise LoadError(path, f"line {line_no}: two time columns; keep one")
            header.time = _Column(position, _TIME_SCALE[name.lower()])
            continue
        match = _SIGNAL_COLUMN.match(name)
        if match is None:
            raise LoadError(path, f"line {line_no}: column {name!r} is not understood; {_HELP}")
        kind, sweep, unit = match["kind"].upper(), int(match["sweep"]), match["unit"]
        scales, target = (
            (_VOLTAGE_SCALE, header.voltage) if kind == "V" else (_CURRENT_SCALE, header.current)
        )
        by_case = {known.lower(): known for known in scales}
        unit = by_case.get(unit.lower(), unit)
        if unit not in scales:
            known = " or ".join(scales)
            raise LoadError(
                path, f"line {line_no}: unknown unit {unit!r} in column {name!r}; use {known}"
            )
        if sweep in target:
            raise LoadError(path, f"line {line_no}: column {kind}{sweep} appears twice")
        target[sweep] = _Column(position, scales[unit])
    if not header.voltage:
        raise LoadError(
            path, f"line {line_no}: no voltage column; name one V0_mV (or V0_V), one per sweep"
        )
    orphans = sorted(set(header.current) - set(header.voltage))
    if orphans:
        raise LoadError(
            path,
            f"line {line_no}: current column I{orphans[0]} has no voltage column V{orphans[0]}",
        )
    return header


def _first_bad_row(
    path: Path, numbered_rows: list[tuple[int, str]], delimiter: str, names: list[str]
) -> LoadError:
    """Find and describe the row that numpy could not parse."""
    for line_no, row in numbered_rows:
        cells = row.split(delimiter)
        if len(cells) != len(names):
            return LoadError(
                path,
                f"line {line_no}: {len(cells)} values where the header has {len(names)}; "
                f"every row needs one value per column",
            )
        for name, cell in zip(names, cells, strict=True):
            if not _looks_numeric(cell):
                return LoadError(
                    path, f"line {line_no}, column {name!r}: {cell.strip()!r} is not a number"
                )
    return LoadError(path, "the table could not be read as numbers; check the delimiter")


def _read_table(
    path: Path, lines: list[str], first_line_no: int, delimiter: str, names: list[str]
) -> np.ndarray:
    numbered_rows = [(first_line_no + k, row) for k, row in enumerate(lines) if row.strip()]
    if not numbered_rows:
        raise LoadError(path, "the table has a header but no data rows; add the samples")
    rows = [row for _, row in numbered_rows]
    try:
        table = np.loadtxt(rows, delimiter=delimiter, dtype=np.float64, ndmin=2, comments=None)
    except ValueError:
        raise _first_bad_row(path, numbered_rows, delimiter, names) from None
    if table.shape[1] != len(names):
        raise _first_bad_row(path, numbered_rows, delimiter, names)
    return table


def _sample_rate(path: Path, header: _Header, table: np.ndarray, metadata: dict) -> float:
    declared = metadata.pop("sample_rate_hz", None)
    if header.time is None:
        if declared is None:
            raise LoadError(path, "no time column and no `# sample_rate_hz:` line; add either one")
        if not (np.isfinite(declared) and declared > 0):
            raise LoadError(path, f"`sample_rate_hz` is {declared!r}; give a positive rate in Hz")
        return whole_hz(declared)
    try:
        rate = rate_from_times(table[:, header.time.position] * header.time.scale)
    except ValueError as err:
        raise LoadError(path, f"time column: {err}") from None
    if declared is not None and not np.isclose(rate, declared, rtol=1e-6):
        raise LoadError(
            path,
            f"the time column gives {rate!r} Hz but `sample_rate_hz` says {declared!r}; "
            f"correct one of them",
        )
    return rate if declared is None else whole_hz(declared)


def read_text(path: str | Path) -> Recording:
    """Read a passivefit sweep table (CSV, TSV or semicolon-separated).

    Parameters
    ----------
    path : str or Path
        The text file.

    Returns
    -------
    Recording
        Sweeps in V and A, ordered by sweep number and renumbered from 0; metadata
        from the `# key: value` lines (`temperature_C` and `filter_hz`, the low-pass
        corner in Hz, as floats).

    Raises
    ------
    LoadError
        Not text, no header, unknown column or unit, ragged row, non-numeric cell,
        uneven time column, no voltage column (the message names the line); a file
        larger than `MAX_TEXT_BYTES`.
    """
    path = Path(path)
    try:
        size = path.stat().st_size
        if size > MAX_TEXT_BYTES:
            raise LoadError(
                path,
                f"the sweep table is {size / 2**20:.0f} MiB, larger than the "
                f"{MAX_TEXT_BYTES / 2**20:.0f} MiB passivefit reads; split it into files "
                f"of fewer sweeps or save it as NWB",
            )
        lines = path.read_text(encoding="utf-8-sig").splitlines()
    except UnicodeDecodeError:
        raise LoadError(
            path, f"not a text file (undecodable bytes); {FORMAT_NAME} files are UTF-8 text"
        ) from None
    except OSError as err:
        raise LoadError(path, f"cannot read the file: {err.strerror or err}") from None
    raw_metadata, header_index = _split_preamble(path, lines)
    raw_metadata.pop("format", None)  # the file naming its own layout
    metadata = _typed_metadata(path, raw_metadata)
    delimiter = _sniff_delimiter(lines[header_index])
    names = [n.strip() for n in lines[header_index].split(delimiter)]
    header = _parse_header(path, names, header_index + 1)
    table = _read_table(path, lines[header_index + 1 :], header_index + 2, delimiter, names)
    rate = _sample_rate(path, header, table, metadata)
    sweeps = []
    for index, number in enumerate(sorted(header.voltage)):
        v = header.voltage[number]
        i = header.current.get(number)
        current = None if i is None else table[:, i.position] * i.scale
        sweeps.append(Sweep(index, table[:, v.position] * v.scale, current))
    recording = Recording(sweeps, rate, path=str(path), format="csv", metadata=metadata)
    if recording.has_current:
        recording.current_source = SOURCE_TABLE
        recording.protocol = protocol_from_steps(
            [find_steps(s.current, rate) for s in sweeps], SOURCE_TABLE)
    else:
        recording.current_source = SOURCE_NONE
    return recording


def _metadata_lines(recording: Recording) -> list[str]:
    lines = [f"# format: {FORMAT_NAME}", f"# sample_rate_hz: {recording.sample_rate_hz!r}"]
    for key, value in recording.metadata.items():
        if key in ("format", "sample_rate_hz") or value is None:
            continue
        text = str(value).replace("\n", " ").replace("\r", " ")
        lines.append(f"# {key}: {text}")
    return lines


def write_csv(recording: Recording, path: str | Path) -> None:
    """Write a recording as a passivefit sweep table.

    Times go in ms, voltages in mV, currents in pA, each with 10 significant digits
    (1e-10 relative), plus a ``# sample_rate_hz:`` line with the exact rate. A
    ``.tsv`` path is written tab-separated.

    Parameters
    ----------
    recording : Recording
        Sweeps of equal length (SI units).
    path : str or Path
        Target file.

    Raises
    ------
    ValueError
        The sweeps differ in length (a table needs equal columns).
    """
    path = Path(path)
    lengths = {s.n_samples for s in recording.sweeps}
    if len(lengths) != 1:
        raise ValueError(
            f"{path}: sweeps have different lengths {sorted(lengths)}; "
            f"a sweep table needs equal lengths (write .nwb instead)"
        )
    n = lengths.pop()
    names = ["time_ms"]
    columns = [np.arange(n) / recording.sample_rate_hz * 1e3]
    for k, sweep in enumerate(recording.sweeps):
        names.append(f"V{k}_mV")
        columns.append(sweep.voltage * 1e3)
        if sweep.current is not None:
            names.append(f"I{k}_pA")
            columns.append(sweep.current * 1e12)
    delimiter = "\t" if path.suffix.lower() == ".tsv" else ","
    header = "\n".join([*_metadata_lines(recording), delimiter.join(names)])
    np.savetxt(
        path,
        np.column_stack(columns),
        fmt="%.10g",
        delimiter=delimiter,
        header=header,
        comments="",
        encoding="utf-8",
    )
