"""The cell database: open by URL or path, store results, read current analyses.

SQLite by default (a plain path or ``sqlite:///path``), PostgreSQL by URL
(``postgresql+psycopg://user@host/db``). Every recording is written in one
transaction, so a writer killed at any moment leaves either the whole recording or
nothing. Unique constraints (recording hash; recording + settings hash + version +
revision; one current analysis per recording) stop concurrent writers from storing
the same analysis twice: the loser rolls back, re-reads and skips.

SQLite is opened in WAL mode with a busy timeout, and every transaction starts with
``BEGIN IMMEDIATE`` so concurrent writers queue for the write lock instead of failing
when they upgrade a read to a write.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, date, datetime
from pathlib import Path

from sqlalchemy import create_engine, event, func, select, text, update
from sqlalchemy.engine import Engine, make_url
from sqlalchemy.exc import IntegrityError, OperationalError
from sqlalchemy.orm import Session

from passivefit.model import schema as S
from passivefit.model.provenance import flags_text, result_settings_hash
from passivefit.store.models import (
    ANALYSIS_VALUE_KEYS,
    CELL_METADATA_KEYS,
    SCHEMA_VERSION,
    SWEEP_VALUE_KEYS,
    AnalysisRow,
    Base,
    CellRow,
    RecordingRow,
    SchemaInfo,
    SweepRow,
)

SQLITE_BUSY_TIMEOUT_MS = 60_000
_WRITE_ATTEMPTS = 8
_PG_SCHEMA_LOCK = 0x70617373  # advisory lock id serialising schema creation


class StoreError(ValueError):
    """The database cannot be opened or used; the message says what to do."""


@dataclass(frozen=True)
class StoreOutcome:
    """What `Database.store` did with one result.

    Attributes
    ----------
    status : str
        ``"stored"`` (new analysis, now current) or ``"skipped"`` (the same
        recording, settings and version were already stored).
    analysis_id : int
        Primary key of the stored or the existing analysis.
    revision : int
        Revision number of that analysis (1 for the first).
    """

    status: str
    analysis_id: int
    revision: int


@dataclass(frozen=True)
class CurrentAnalysis:
    """One recording with its current analysis and its cell (detached plain values)."""

    cell: dict
    recording: dict
    analysis: dict
    result: dict


def database_url(target: str) -> str:
    """SQLAlchemy URL for a `--db` value: a URL, or a plain path meaning an SQLite file.

    ``postgresql://`` is read as ``postgresql+psycopg://`` (the driver we ship with).
    """
    if "://" not in target:
        return f"sqlite:///{Path(target).expanduser().resolve()}"
    if target.startswith("postgresql://") or target.startswith("postgres://"):
        return "postgresql+psycopg://" + target.split("://", 1)[1]
    return target


def display_url(target: str) -> str:
    """A `--db` value fit to show: any password in a URL replaced by ``***``.

    Parameters
    ----------
    target : str
        URL or SQLite file path, as the user gave it.

    Returns
    -------
    str
        `target` with its password masked; a plain path or a URL without a password
        unchanged. Text that is not a parseable URL but holds ``user:secret@`` has the
        part between ``:`` and ``@`` masked.
    """
    if "://" not in target:
        return target
    try:
        parsed = make_url(target)
    except Exception:  # not parseable: mask anything that looks like user:password@
        return _masked_userinfo(target)
    if parsed.password is None:
        return target
    return parsed.render_as_string(hide_password=True)


def _masked_userinfo(text: str) -> str:
    scheme, _, rest = text.partition("://")
    userinfo, at, host = rest.rpartition("@")
    if not at or ":" not in userinfo:
        return text
    user = userinfo.split(":", 1)[0]
    return f"{scheme}://{user}:***@{host}"


def _without_password(text: str, target: str) -> str:
    """`text` with the password of the URL `target` (if any) replaced by ``***``."""
    try:
        password = make_url(target).password if "://" in target else None
    except Exception:
        password = None
    return text.replace(str(password), "***") if password else text


def open_database(target: str, *, create: bool = True) -> Database:
    """Open (and with `create`, make) the database at `target`.

    Parameters
    ----------
    target : str
        URL or SQLite file path.
    create : bool
        Create the file and tables when missing. When False, a missing SQLite file
        is a `StoreError` (read-only commands never create databases).
    """
    url = database_url(target)
    shown = display_url(target)
    parsed = make_url(url)
    if parsed.get_backend_name() == "sqlite":
        db_path = Path(parsed.database or "")
        if not parsed.database or parsed.database == ":memory:":
            raise StoreError(f"`--db` {shown!r}: give a file path for the SQLite database")
        if not create and not db_path.exists():
            raise StoreError(
                f"`--db` {shown}: no database there; fill one first with "
                "`passivefit batch FOLDER --db ...`"
            )
        if not db_path.parent.is_dir():
            raise StoreError(f"`--db` {shown}: folder {db_path.parent} does not exist")
    try:
        engine = _make_engine(url)
        database = Database(engine)
        _prepare(database, create)
    except ModuleNotFoundError as exc:
        raise StoreError(
            f"`--db` {shown}: the database driver is not installed ({exc.name}); "
            "for PostgreSQL install passivefit[postgres]"
        ) from exc
    except OperationalError as exc:
        reason = str(exc.orig).strip().splitlines()[0] if exc.orig else str(exc)
        reason = _without_password(reason, url)
        raise StoreError(f"`--db` {shown}: cannot open the database: {reason}") from None
    return database


def _prepare(database: Database, create: bool) -> None:
    """`prepare_schema`, tried again while SQLite says the file is locked: two writers
    creating a new file at once can be refused at once (switching it to WAL), not only
    after the busy timeout."""
    import time

    deadline = time.monotonic() + SQLITE_BUSY_TIMEOUT_MS / 1000
    while True:
        try:
            return database.prepare_schema(create=create)
        except OperationalError as exc:
            if not (database.is_sqlite and "locked" in str(exc.orig)
                    and time.monotonic() < deadline):
                raise
            database.engine.dispose()
            time.sleep(0.2)


def _make_engine(url: str) -> Engine:
    if make_url(url).get_backend_name() != "sqlite":
        return create_engine(url, pool_pre_ping=True)
    engine = create_engine(url, connect_args={"timeout": SQLITE_BUSY_TIMEOUT_MS / 1000})

    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection, _record):
        dbapi_connection.isolation_level = None  # we issue BEGIN ourselves
        cursor = dbapi_connection.cursor()
        cursor.execute("PRAGMA journal_mode=WAL")
        cursor.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_TIMEOUT_MS}")
        cursor.execute("PRAGMA foreign_keys=ON")
        cursor.close()

    @event.listens_for(engine, "begin")
    def _on_begin(connection):
        connection.exec_driver_sql("BEGIN IMMEDIATE")

    return engine


class Database:
    """A cell database behind one SQLAlchemy engine."""

    def __init__(self, engine: Engine) -> None:
        self.engine = engine

    @property
    def is_sqlite(self) -> bool:
        return self.engine.dialect.name == "sqlite"

    def close(self) -> None:
        self.engine.dispose()

    def prepare_schema(self, *, create: bool) -> None:
        """Create missing tables (when `create`) and check the schema version."""
        with self.engine.begin() as conn:
            if self.engine.dialect.name == "postgresql":
                conn.execute(text("SELECT pg_advisory_xact_lock(:k)"), {"k": _PG_SCHEMA_LOCK})
            if create:
                Base.metadata.create_all(conn)
                if conn.execute(select(SchemaInfo.value).where(SchemaInfo.key == "schema_version")
                                ).scalar() is None:
                    conn.execute(SchemaInfo.__table__.insert(),
                                 {"key": "schema_version", "value": str(SCHEMA_VERSION)})
            found = _schema_version(conn)
        if found is None:
            raise StoreError("this database holds no passivefit tables; "
                             "fill it first with `passivefit batch FOLDER --db ...`")
        if found > SCHEMA_VERSION:
            raise StoreError(f"the database schema is version {found}, newer than this "
                             f"passivefit understands ({SCHEMA_VERSION}); update passivefit")

    # ------------------------------------------------------------------ reading
    def analysed_hashes(self, settings_hash: str, version: str) -> set[str]:
        """sha256 of every recording already analysed with these settings and version."""
        query = (select(RecordingRow.sha256).join(AnalysisRow)
                 .where(AnalysisRow.settings_hash == settings_hash,
                        AnalysisRow.passivefit_version == version).distinct())
        with Session(self.engine) as session, session.begin():
            return set(session.scalars(query))

    def current_analyses(self, conditions: Sequence = ()) -> list[CurrentAnalysis]:
        """Every recording's current analysis with its cell, filtered by `conditions`.

        Parameters
        ----------
        conditions : sequence of SQLAlchemy boolean expressions
            Built by `passivefit.store.query.parse_where` (never raw SQL).
        """
        query = (select(AnalysisRow, RecordingRow, CellRow)
                 .join(RecordingRow, AnalysisRow.recording_pk == RecordingRow.id)
                 .outerjoin(CellRow, RecordingRow.cell_pk == CellRow.id)
                 .where(AnalysisRow.is_current, *conditions)
                 .order_by(CellRow.cell_id, RecordingRow.path, RecordingRow.id))
        with Session(self.engine) as session, session.begin():
            return [_current(a, r, c) for a, r, c in session.execute(query)]

    def analysis_counts(self) -> dict[int, int]:
        """Number of stored analyses per recording primary key."""
        query = select(AnalysisRow.recording_pk, func.count()).group_by(AnalysisRow.recording_pk)
        with Session(self.engine) as session, session.begin():
            return {pk: n for pk, n in session.execute(query)}

    def sweep_rows(self, analysis_id: int) -> list[dict]:
        """The stored sweep columns of one analysis, in sweep order."""
        query = select(SweepRow).where(SweepRow.analysis_pk == analysis_id).order_by(
            SweepRow.sweep_index)
        with Session(self.engine) as session, session.begin():
            return [_columns(row, ("sweep_index", "accepted", S.REJECT_REASON.key,
                                   *SWEEP_VALUE_KEYS, "flags")) for row in session.scalars(query)]

    # ------------------------------------------------------------------ writing
    def store(
        self,
        result: Mapping,
        *,
        cell_metadata: Mapping | None = None,
        settings_hash: str | None = None,
        if_exists: str = "skip",
        analysed_at: datetime | None = None,
        file_cell_id: str | None = None,
    ) -> StoreOutcome:
        """Store one recording's result in one transaction.

        Parameters
        ----------
        result : mapping
            ``RecordingResult.to_dict()``.
        cell_metadata : mapping, optional
            ``cell_id`` and the cell columns (date, region, temperature_C, ...);
            given values update the cell, missing ones leave it as it is. Without a
            ``cell_id`` the cell is `file_cell_id`, or else named after the file's
            folder and stem (see `_cell_identity`).
        settings_hash : str, optional
            Identity of the settings; default: hash of ``result["settings"]``.
        if_exists : {"skip", "new_revision"}
            What to do when this recording was already analysed with the same
            settings hash and version: skip it, or add a new revision that becomes
            the current analysis. Stored analyses are never overwritten.
        analysed_at : datetime, optional
            Time of the analysis (UTC); default now.
        file_cell_id : str, optional
            The cell id the recording file itself carries (used when no other folder
            has a cell of that name).
        """
        if if_exists not in ("skip", "new_revision"):
            raise ValueError(f"`if_exists` must be 'skip' or 'new_revision', not {if_exists!r}")
        digest = settings_hash or result_settings_hash(result)
        when = analysed_at or datetime.now(UTC)
        for attempt in range(_WRITE_ATTEMPTS):
            try:
                with Session(self.engine, expire_on_commit=False) as session, session.begin():
                    return self._store_once(session, result, cell_metadata or {}, digest,
                                            if_exists, when, file_cell_id)
            except IntegrityError:
                # Another writer stored the same recording, cell or analysis between
                # our read and our write; it committed, so the next attempt sees it.
                if attempt == _WRITE_ATTEMPTS - 1:
                    raise
        raise AssertionError("unreachable")

    def update_cell_metadata(self, sha256: str, cell_metadata: Mapping) -> bool:
        """Apply metadata to the cell of an already stored recording (one transaction).

        A ``cell_id`` moves the recording to that cell (made if new); other given
        values update the cell, missing ones leave it as it is. Analyses are not
        touched. Returns False when no recording has this hash.
        """
        for attempt in range(_WRITE_ATTEMPTS):
            try:
                with Session(self.engine) as session, session.begin():
                    recording = session.scalars(
                        select(RecordingRow).where(RecordingRow.sha256 == sha256)).one_or_none()
                    if recording is None:
                        return False
                    current = recording.cell.cell_id if recording.cell else None
                    recording.cell = _upsert_cell(session, {"cell_id": current, **{
                        k: v for k, v in cell_metadata.items() if v is not None}},
                        recording.path)
                    return True
            except IntegrityError:
                if attempt == _WRITE_ATTEMPTS - 1:
                    raise
        raise AssertionError("unreachable")

    def _store_once(self, session: Session, result: Mapping, metadata: Mapping, digest: str,
                    if_exists: str, when: datetime,
                    file_cell_id: str | None = None) -> StoreOutcome:
        source = result["source"]
        version = str(result["passivefit_version"])
        recording = session.scalars(
            select(RecordingRow).where(RecordingRow.sha256 == source["sha256"])).one_or_none()
        if recording is None:
            recording = RecordingRow(sha256=source["sha256"], path=str(source["path"]),
                                     format=str(source["format"]),
                                     sweep_count=int(source["sweep_count"]), first_seen=when)
            session.add(recording)
        if recording.cell is None or metadata.get("cell_id"):
            recording.cell = _upsert_cell(session, metadata, str(source["path"]), file_cell_id)
        else:  # a stored recording keeps its cell; given values update it
            _upsert_cell(session, {**metadata, "cell_id": recording.cell.cell_id},
                         str(source["path"]))
        session.flush()
        same = (select(AnalysisRow).where(AnalysisRow.recording_pk == recording.id,
                                          AnalysisRow.settings_hash == digest,
                                          AnalysisRow.passivefit_version == version)
                .order_by(AnalysisRow.revision.desc()))
        latest = session.scalars(same).first()
        if latest is not None and if_exists == "skip":
            return StoreOutcome("skipped", latest.id, latest.revision)
        session.execute(update(AnalysisRow)
                        .where(AnalysisRow.recording_pk == recording.id, AnalysisRow.is_current)
                        .values(is_current=False))
        analysis = _analysis_row(result, digest, version, when,
                                 revision=1 if latest is None else latest.revision + 1)
        analysis.recording_pk = recording.id
        session.add(analysis)
        session.flush()
        return StoreOutcome("stored", analysis.id, analysis.revision)


def _schema_version(conn) -> int | None:
    from sqlalchemy import inspect

    if not inspect(conn).has_table(SchemaInfo.__tablename__):
        return None
    value = conn.execute(select(SchemaInfo.value).where(SchemaInfo.key == "schema_version")
                         ).scalar()
    return None if value is None else int(value)


def _upsert_cell(session: Session, metadata: Mapping, path: str,
                 file_cell_id: str | None = None) -> CellRow:
    cell_id = _cell_identity(session, metadata.get("cell_id"), file_cell_id, Path(path))
    cell = session.scalars(select(CellRow).where(CellRow.cell_id == cell_id)).one_or_none()
    if cell is None:
        cell = CellRow(cell_id=cell_id)
        session.add(cell)
    for key in CELL_METADATA_KEYS:
        value = metadata.get(key)
        if value is not None and value != "":
            setattr(cell, key, _cell_value(key, value))
    return cell


def _cell_identity(session: Session, given, file_cell_id: str | None, path: Path) -> str:
    """The cell a recording belongs to.

    The metadata's ``cell_id`` when given; else the file's own cell id, unless a cell of
    that name already holds recordings from another folder; else the folder and the
    file stem (``day1/c1``), never the file name alone: files of the same name in
    different folders are different cells. When even that name is taken by another
    folder (``/a/day1`` and ``/b/day1``), a digest of the full folder path is appended.
    """
    if given:
        return str(given)
    folder = path.parent
    if file_cell_id and not _cell_elsewhere(session, str(file_cell_id), folder):
        return str(file_cell_id)
    derived = f"{folder.name}/{path.stem}" if folder.name else path.stem
    if not _cell_elsewhere(session, derived, folder):
        return derived
    import hashlib

    return f"{derived}~{hashlib.sha256(str(folder).encode()).hexdigest()[:8]}"


def _cell_elsewhere(session: Session, cell_id: str, folder: Path) -> bool:
    """True when the cell `cell_id` holds a recording from a folder other than `folder`."""
    query = (select(RecordingRow.path).join(CellRow, RecordingRow.cell_pk == CellRow.id)
             .where(CellRow.cell_id == cell_id))
    return any(Path(p).parent != folder for p in session.scalars(query))


def _cell_value(key: str, value) -> float | str:
    """A metadata value as stored: temperature as a number, dates as YYYY-MM-DD."""
    if key == "temperature_C":
        return float(value)
    text = value.isoformat() if isinstance(value, date | datetime) else str(value)
    if key == "date":
        try:  # "2026-11-20T00:00:00+00:00" (NWB session start) → "2026-11-20"
            return date.fromisoformat(text[:10]).isoformat()
        except ValueError:
            return text
    return text


def _analysis_row(result: Mapping, digest: str, version: str, when: datetime,
                  revision: int) -> AnalysisRow:
    cell = result.get("cell") or {}
    row = AnalysisRow(
        settings_hash=digest, settings=dict(result["settings"]), passivefit_version=version,
        revision=revision, analysed_at=when, is_current=True,
        n_sweeps_used=_int_or_none(cell.get(S.N_SWEEPS_USED.key)),
        flags=flags_text(result.get("flags", ())), result=_json_safe(result),
        **{key: _float_or_none(cell.get(key)) for key in ANALYSIS_VALUE_KEYS},
    )
    row.sweeps = [
        SweepRow(sweep_index=int(s["index"]), accepted=bool(s["accepted"]),
                 reject_reason=s.get(S.REJECT_REASON.key), flags=flags_text(s.get("flags", ())),
                 **{key: _float_or_none(s.get(key)) for key in SWEEP_VALUE_KEYS})
        for s in result.get("sweeps", ())
    ]
    return row


def _float_or_none(value) -> float | None:
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _int_or_none(value) -> int | None:
    return None if value is None else int(value)


def _json_safe(value):
    """A copy with non-finite floats as None (JSON columns reject NaN on PostgreSQL)."""
    if isinstance(value, Mapping):
        return {str(k): _json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_json_safe(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _utc(moment: datetime) -> datetime:
    return moment if moment.tzinfo else moment.replace(tzinfo=UTC)


def _columns(row, names: Sequence[str]) -> dict:
    return {name: getattr(row, name) for name in names}


def _current(analysis: AnalysisRow, recording: RecordingRow, cell: CellRow | None
             ) -> CurrentAnalysis:
    cell_values = _columns(cell, ("cell_id", *CELL_METADATA_KEYS)) if cell else {
        "cell_id": None, **dict.fromkeys(CELL_METADATA_KEYS)}
    recording_values = _columns(recording, ("id", "sha256", "path", "format", "sweep_count"))
    recording_values["first_seen"] = _utc(recording.first_seen)
    analysis_values = _columns(analysis, (
        "id", "settings_hash", "passivefit_version", "revision", *ANALYSIS_VALUE_KEYS,
        S.N_SWEEPS_USED.key, "flags"))
    analysis_values["analysed_at"] = _utc(analysis.analysed_at)
    return CurrentAnalysis(cell_values, recording_values, analysis_values, dict(analysis.result))


def annotations_of(rows) -> list[dict]:
    """Per-row sheet columns from the database: cell metadata, analysis time, revision."""
    return [{**r.cell, "analysed_at": r.analysis["analysed_at"],
             "revision": r.analysis["revision"]} for r in rows]
