"""Parameter sheets: CSV/TSV, XLSX and JSON files of analysis results.

Every sheet reads ``RecordingResult.to_dict()`` objects, and its column names are
the keys of those objects:

- cells: one row per recording — ``source_path, source_sha256, source_format``,
  then any annotation columns (cell metadata, ``analysed_at`` ...), then the
  ``cell`` keys, then ``flags`` (``"CODE: message; ..."``), ``passivefit_version``
  and ``settings_hash``. A 95 % interval ``tau0_ci95_ms = [lo, hi]`` becomes the
  two columns ``tau0_ci95_ms_lo`` and ``tau0_ci95_ms_hi``.
- sweeps: one row per sweep — ``source_path, source_sha256``, then the sweep keys.

CSV (or TSV) writes the cells to ``FILE.csv`` and the sweeps to
``FILE_sweeps.csv`` beside it: two plain rectangular tables that any program reads
without knowing our layout. XLSX writes the sheets ``cells``, ``sweeps``, ``flags``
and ``provenance`` (version, settings, hash, analysis time), each with a row of
units under the header (from the schema, `passivefit.model.schema`). JSON writes the
list of result objects unchanged (plus an ``annotations`` object per result when
annotations are given).
Files are written to a temporary name and renamed, so a reader never sees half a file.
"""

from __future__ import annotations

import csv
import json
import math
import os
from collections.abc import Mapping, Sequence
from datetime import datetime
from pathlib import Path

from passivefit.model import schema as S
from passivefit.model.provenance import flags_text, result_settings_hash, unit_of

# Column order: the contract's keys first; keys not listed follow in their own order.
CELL_KEY_ORDER = tuple(q.key for q in S.CELL_CORE)
SWEEP_KEY_ORDER = (*(q.key for q in S.SWEEP_CORE), S.FLAGS_KEY)
SOURCE_COLUMNS = ("source_path", "source_sha256", "source_format")
SHEET_SUFFIXES = (".csv", ".tsv", ".xlsx", ".json")

Table = tuple[list[str], list[dict]]


def write_sheet(
    results: Sequence[Mapping],
    path: str | os.PathLike,
    *,
    annotations: Sequence[Mapping] | None = None,
) -> list[Path]:
    """Write results to a parameter sheet chosen by the file extension.

    Parameters
    ----------
    results : sequence of mapping
        ``RecordingResult.to_dict()`` objects, one per recording.
    path : path-like
        ``.csv``/``.tsv`` (cells, plus ``<stem>_sweeps.csv``), ``.xlsx`` or ``.json``.
    annotations : sequence of mapping, optional
        Extra per-result columns (same length as `results`), e.g. the cell
        metadata and ``analysed_at`` from the database.

    Returns
    -------
    list of Path
        The files written.

    Raises
    ------
    ValueError
        Unknown extension, or `annotations` not matching `results`.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in SHEET_SUFFIXES:
        raise ValueError(f"{path}: unknown sheet type {path.suffix!r}; "
                         f"use one of {', '.join(SHEET_SUFFIXES)}")
    annotations = list(annotations) if annotations is not None else [{}] * len(results)
    if len(annotations) != len(results):
        raise ValueError(f"{len(annotations)} annotations given for {len(results)} results")
    annotations = [{k: _plain(v) for k, v in a.items()} for a in annotations]
    if suffix == ".json":
        return [_write_json(results, annotations, path)]
    cells, sweeps = cell_table(results, annotations), sweep_table(results)
    if suffix == ".xlsx":
        return [_write_xlsx(results, annotations, cells, sweeps, path)]
    delimiter = "\t" if suffix == ".tsv" else ","
    sweeps_path = path.with_name(f"{path.stem}_sweeps{path.suffix}")
    return [_write_delimited(cells, path, delimiter), _write_delimited(sweeps, sweeps_path,
                                                                         delimiter)]


def cell_table(results: Sequence[Mapping], annotations: Sequence[Mapping]) -> Table:
    """Columns and rows of the cells table (one row per result)."""
    keys = _ordered_keys([r.get("cell") or {} for r in results], CELL_KEY_ORDER)
    extra = _ordered_keys(annotations, ())
    rows = []
    for result, notes in zip(results, annotations, strict=True):
        row = _source_columns(result) | dict(notes)
        row.update(_flatten(result.get("cell") or {}, keys))
        row["flags"] = flags_text(result.get("flags", ()))
        row["passivefit_version"] = result.get("passivefit_version")
        row["settings_hash"] = result_settings_hash(result)
        rows.append(row)
    columns = [*SOURCE_COLUMNS, *extra, *_flat_names(results, "cell", keys),
               "flags", "passivefit_version", "settings_hash"]
    return columns, rows


def sweep_table(results: Sequence[Mapping]) -> Table:
    """Columns and rows of the sweeps table (one row per sweep of every result)."""
    sweeps = [s for r in results for s in r.get("sweeps", ())]
    keys = _ordered_keys(sweeps, SWEEP_KEY_ORDER)
    rows = []
    for result in results:
        source = {k: v for k, v in _source_columns(result).items() if k != "source_format"}
        for sweep in result.get("sweeps", ()):
            row = source | _flatten(sweep, keys)
            if "flags" in sweep:
                row["flags"] = flags_text(sweep["flags"])
            rows.append(row)
    columns = ["source_path", "source_sha256", *_flat_names(results, "sweeps", keys)]
    return columns, rows


def _source_columns(result: Mapping) -> dict:
    source = result.get("source") or {}
    return {"source_path": source.get("path"), "source_sha256": source.get("sha256"),
            "source_format": source.get("format")}


def _ordered_keys(dicts: Sequence[Mapping], preferred: Sequence[str]) -> list[str]:
    seen = {key: None for d in dicts for key in d}
    return [k for k in preferred if k in seen] + [k for k in seen if k not in preferred]


def _is_interval(value) -> bool:
    """A [lo, hi] pair of numbers (or nulls), as the ``*_ci95*`` keys hold."""
    return (isinstance(value, list | tuple) and len(value) == 2
            and all(v is None or (isinstance(v, int | float) and not isinstance(v, bool))
                    for v in value))


def _flat_names(results: Sequence[Mapping], part: str, keys: Sequence[str]) -> list[str]:
    """Column names for `keys`, with interval keys split into ``_lo``/``_hi``."""
    items = []
    for r in results:
        items.extend([r.get(part) or {}] if part == "cell" else r.get(part, ()))
    intervals = {k for item in items for k, v in item.items() if _is_interval(v)}
    names = []
    for key in keys:
        names.extend([f"{key}_lo", f"{key}_hi"] if key in intervals else [key])
    return names


def _flatten(values: Mapping, keys: Sequence[str]) -> dict:
    row = {}
    for key in keys:
        value = values.get(key)
        if _is_interval(value):
            row[f"{key}_lo"], row[f"{key}_hi"] = (_plain(v) for v in value)
        elif isinstance(value, list | tuple | Mapping):
            row[key] = json.dumps(value)
        else:
            row[key] = _plain(value)
    return row


def _plain(value):
    if isinstance(value, datetime):
        return value.isoformat()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _replace_atomically(path: Path, write) -> Path:
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        write(tmp)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)
    return path


def _write_delimited(table: Table, path: Path, delimiter: str) -> Path:
    columns, rows = table

    def write(target: Path) -> None:
        with open(target, "w", newline="", encoding="utf-8") as f:
            writer = csv.DictWriter(f, columns, delimiter=delimiter, extrasaction="raise")
            writer.writerow({c: _escaped(c) for c in columns})
            writer.writerows({k: _csv_value(v) for k, v in row.items()} for row in rows)

    return _replace_atomically(path, write)


# Text starting with one of these is read as a formula by spreadsheet programs
# (common practice, no source): such cells are written with a leading "'".
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def _escaped(text: str) -> str:
    """`text` made inert for a spreadsheet: a leading "'" when it could start a formula."""
    return "'" + text if text.startswith(FORMULA_STARTS) else text


def _csv_value(value):
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return _escaped(value)
    return value


def _write_json(results: Sequence[Mapping], annotations: Sequence[Mapping], path: Path) -> Path:
    objects = [dict(r) | ({"annotations": dict(a)} if a else {})
               for r, a in zip(results, annotations, strict=True)]

    def write(target: Path) -> None:
        with open(target, "w", encoding="utf-8") as f:
            json.dump(objects, f, indent=1)
            f.write("\n")

    return _replace_atomically(path, write)


def _write_xlsx(results: Sequence[Mapping], annotations: Sequence[Mapping], cells: Table,
                sweeps: Table, path: Path) -> Path:
    from openpyxl import Workbook

    book = Workbook()
    book.remove(book.active)
    _add_sheet(book, "cells", *cells)
    _add_sheet(book, "sweeps", *sweeps)
    _add_sheet(book, "flags", *_flag_table(results))
    _add_sheet(book, "provenance", *_provenance_table(results, annotations))
    return _replace_atomically(path, book.save)


def _flag_table(results: Sequence[Mapping]) -> Table:
    rows = [{"source_path": (r.get("source") or {}).get("path"), "code": f.get("code"),
             "message": f.get("message"), "value": _plain(f.get("value"))}
            for r in results for f in r.get("flags", ()) if isinstance(f, Mapping)]
    return ["source_path", "code", "message", "value"], rows


def _provenance_table(results: Sequence[Mapping], annotations: Sequence[Mapping]) -> Table:
    rows = []
    for result, notes in zip(results, annotations, strict=True):
        source = result.get("source") or {}
        rows.append({
            "source_path": source.get("path"), "source_sha256": source.get("sha256"),
            "source_format": source.get("format"), "sweep_count": source.get("sweep_count"),
            "passivefit_version": result.get("passivefit_version"),
            "settings_hash": result_settings_hash(result),
            "analysed_at": notes.get("analysed_at"),
            "settings": json.dumps(result.get("settings"), sort_keys=True),
        })
    return ["source_path", "source_sha256", "source_format", "sweep_count",
            "passivefit_version", "settings_hash", "analysed_at", "settings"], rows


def _add_sheet(book, title: str, columns: list[str], rows: list[dict]) -> None:
    from openpyxl.styles import Font
    from openpyxl.utils import get_column_letter

    sheet = book.create_sheet(title)
    sheet.append(columns)
    sheet.append([unit_of(c) for c in columns])
    for row in rows:
        sheet.append([row.get(c) for c in columns])
    for line in sheet.iter_rows():
        for cell in line:
            if isinstance(cell.value, str):
                cell.data_type = "s"  # text stays text, never a formula, whatever it starts with
    for cell in sheet[1]:
        cell.font = Font(bold=True)
    for cell in sheet[2]:
        cell.font = Font(italic=True)
    sheet.freeze_panes = "B3"
    for i, name in enumerate(columns, start=1):
        sheet.column_dimensions[get_column_letter(i)].width = min(max(len(name) + 2, 10), 60)
