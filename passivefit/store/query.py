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


# ---------------------------------------------------------------------------- reading
def open_for_reading(target: str):
    """Open the database at `target` for reading only (`passivefit db ...`).

    SQLite files are opened read-only (``mode=ro``); on a read-only file system, where
    SQLite could not make its shared-memory file, also as immutable, so a database on a
    read-only mount or a CD can be listed. Other URLs open as `open_database` does.
    Anything that is not a passivefit database is a one-line `StoreError`.
    """
    import sqlite3
    from pathlib import Path
    from urllib.parse import quote

    from sqlalchemy import create_engine
    from sqlalchemy.engine import make_url
    from sqlalchemy.exc import SQLAlchemyError

    from passivefit.store.database import Database, StoreError, database_url, open_database

    try:
        url = database_url(target)
        parsed = make_url(url)
        if parsed.get_backend_name() != "sqlite":
            return open_database(target, create=False)
        path = Path(parsed.database or "")
        if not path.is_file():
            raise StoreError(f"`--db` {target}: no database there; fill one first with "
                             "`passivefit batch FOLDER --db ...`")
        uri = f"file:{quote(str(path.resolve()))}?mode=ro"
        if _read_only_folder(path.parent):
            uri += "&immutable=1"
        engine = create_engine("sqlite://", creator=lambda: sqlite3.connect(
            uri, uri=True, timeout=60, check_same_thread=False))
        database = Database(engine)
        try:
            database.prepare_schema(create=False)
        except BaseException:
            database.close()
            raise
        return database
    except SQLAlchemyError as exc:
        orig = getattr(exc, "orig", None)
        reason = str(orig if orig is not None else exc).strip().splitlines()
        raise StoreError(f"`--db` {target}: cannot read it as a passivefit database "
                         f"({reason[0] if reason else type(exc).__name__})") from None
    except OSError as exc:
        raise StoreError(f"`--db` {target}: cannot open it ({exc.strerror or exc})") from None


def _read_only_folder(folder) -> bool:
    import os

    try:
        if os.statvfs(folder).f_flag & os.ST_RDONLY:
            return True
    except (OSError, AttributeError):
        pass
    return not os.access(folder, os.W_OK)
