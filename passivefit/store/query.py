"""A small filter language for `passivefit db export --where`.

A filter is one or more conditions joined by ``and``::

    region=CA1
    region=CA1 and tau0_ms<30
    cell_type!=interneuron and temperature_C>=30 and notes~slice

``KEY`` must be one of `FILTER_COLUMNS`; the operator one of ``= != < <= > >=`` or
``~`` (contains, case-insensitive). Values of number columns must be numbers.
Conditions become SQLAlchemy expressions with bound parameters: the text of a
filter never reaches the database as SQL.
"""

from __future__ import annotations

import re

from passivefit.model import schema as S
from passivefit.store.models import (
    ANALYSIS_VALUE_KEYS,
    CELL_METADATA_KEYS,
    AnalysisRow,
    CellRow,
    RecordingRow,
)

_CONDITION = re.compile(r"^\s*(?P<key>[A-Za-z_][A-Za-z0-9_]*)\s*"
                        r"(?P<op><=|>=|!=|=|<|>|~)\s*(?P<value>.*?)\s*$")
_AND = re.compile(r"\s+and\s+", re.IGNORECASE)


def _columns() -> dict:
    cols = {"cell_id": CellRow.cell_id}
    cols |= {k: getattr(CellRow, k) for k in CELL_METADATA_KEYS}
    cols |= {"path": RecordingRow.path, "format": RecordingRow.format,
             "sha256": RecordingRow.sha256, "sweep_count": RecordingRow.sweep_count}
    cols |= {k: getattr(AnalysisRow, k) for k in ANALYSIS_VALUE_KEYS}
    cols |= {S.N_SWEEPS_USED.key: AnalysisRow.n_sweeps_used, "flags": AnalysisRow.flags,
             "passivefit_version": AnalysisRow.passivefit_version,
             "settings_hash": AnalysisRow.settings_hash}
    return cols


FILTER_COLUMNS = _columns()
NUMERIC_COLUMNS = frozenset(
    {"temperature_C", "sweep_count", S.N_SWEEPS_USED.key, *ANALYSIS_VALUE_KEYS})


def parse_where(text: str) -> list:
    """Turn a filter text into SQLAlchemy conditions.

    Parameters
    ----------
    text : str
        Conditions ``KEY OP VALUE`` joined by ``and``.

    Returns
    -------
    list
        Boolean column expressions, to be combined with AND.

    Raises
    ------
    ValueError
        Unknown key or operator, a non-numeric value for a number column, or an
        empty condition; the message shows the allowed keys.
    """
    return [_condition(part) for part in _AND.split(text.strip())]


def _condition(part: str):
    match = _CONDITION.match(part)
    if not match:
        raise ValueError(f"`--where` {part!r}: write KEY=VALUE, KEY<VALUE, KEY>=VALUE, "
                         "KEY!=VALUE or KEY~TEXT (contains), joined by `and`")
    key, op, raw = match["key"], match["op"], match["value"].strip("'\"")
    if key not in FILTER_COLUMNS:
        raise ValueError(f"`--where`: unknown key {key!r}; known keys: "
                         + ", ".join(sorted(FILTER_COLUMNS, key=str.lower)))
    column = FILTER_COLUMNS[key]
    if op == "~":
        return column.ilike(f"%{_escape_like(raw)}%", escape="\\")
    value = _number(key, raw) if key in NUMERIC_COLUMNS else raw
    if op in ("<", "<=", ">", ">=") and key not in NUMERIC_COLUMNS and key != "date":
        raise ValueError(f"`--where` {part!r}: {key} is text; use = , != or ~ with it")
    return {"=": column == value, "!=": column != value, "<": column < value,
            "<=": column <= value, ">": column > value, ">=": column >= value}[op]


def _number(key: str, raw: str) -> float:
    try:
        return float(raw)
    except ValueError:
        raise ValueError(f"`--where`: {key} is a number, not {raw!r}") from None


def _escape_like(text: str) -> str:
    return text.replace("\\", "\\\\").replace("%", "\\%").replace("_", "\\_")
