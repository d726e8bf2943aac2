"""Tables of the cell database (SQLAlchemy 2 ORM).

One row per recording file (by content hash), per cell, per analysis of a recording
and per sweep of an analysis. Analyses are never replaced: a re-analysis with the same
settings and version adds a new ``revision`` and becomes the current one.
Key values are copied into columns (for filtering and plotting); the complete
``RecordingResult.to_dict()`` object is kept in ``analyses.result``.
"""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import (
    JSON,
    Boolean,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy.dialects.postgresql import JSONB
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship

from passivefit.model import schema as S

SCHEMA_VERSION = 1

JsonType = JSON().with_variant(JSONB(), "postgresql")

# Key values of a cell result copied into `analyses` columns (names as in to_dict()).
ANALYSIS_VALUE_KEYS = tuple(q.key for q in S.COLUMNS)
# Key values of a sweep result copied into `sweeps` columns.
SWEEP_VALUE_KEYS = tuple(q.key for q in S.SWEEP_COLUMNS)
# Cell metadata columns, filled from the recording file and the metadata CSV.
CELL_METADATA_KEYS = tuple(m.key for m in S.METADATA if m is not S.CELL_ID)


def _float_columns(keys) -> dict:
    """One nullable float column per key (the schema's value columns)."""
    return {key: mapped_column(key, Float, nullable=True) for key in keys}


def _metadata_columns() -> dict:
    """The cell's metadata columns: text, or a float for numbers."""
    return {m.key: mapped_column(m.key, Float if m.kind == "number" else Text, nullable=True)
            for m in S.METADATA if m is not S.CELL_ID}


class Base(DeclarativeBase):
    pass


class SchemaInfo(Base):
    """Key/value facts about the database itself (schema version)."""

    __tablename__ = "schema_info"

    key: Mapped[str] = mapped_column(String(64), primary_key=True)
    value: Mapped[str] = mapped_column(String(256))


class CellRow(Base):
    __tablename__ = "cells"

    id: Mapped[int] = mapped_column(primary_key=True)
    cell_id: Mapped[str] = mapped_column(Text, unique=True)
    locals().update(_metadata_columns())  # date (ISO YYYY-MM-DD), region, ...

    recordings: Mapped[list[RecordingRow]] = relationship(back_populates="cell")


class RecordingRow(Base):
    __tablename__ = "recordings"

    id: Mapped[int] = mapped_column(primary_key=True)
    sha256: Mapped[str] = mapped_column(String(64), unique=True)
    path: Mapped[str] = mapped_column(Text)
    format: Mapped[str] = mapped_column(String(32))
    sweep_count: Mapped[int] = mapped_column(Integer)
    first_seen: Mapped[datetime] = mapped_column(DateTime(timezone=True))
    cell_pk: Mapped[int | None] = mapped_column(ForeignKey("cells.id"))

    cell: Mapped[CellRow | None] = relationship(back_populates="recordings")
    analyses: Mapped[list[AnalysisRow]] = relationship(back_populates="recording")


class AnalysisRow(Base):
    __tablename__ = "analyses"
    __table_args__ = (
        # Two writers storing the same analysis cannot both succeed.
        UniqueConstraint("recording_pk", "settings_hash", "passivefit_version", "revision",
                         name="uq_analysis_revision"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    recording_pk: Mapped[int] = mapped_column(ForeignKey("recordings.id"))
    settings_hash: Mapped[str] = mapped_column(String(64))
    settings: Mapped[dict] = mapped_column(JsonType)
    passivefit_version: Mapped[str] = mapped_column(String(32))
    revision: Mapped[int] = mapped_column(Integer)
    analysed_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))
    is_current: Mapped[bool] = mapped_column(Boolean)
    locals().update(_float_columns(ANALYSIS_VALUE_KEYS))
    n_sweeps_used: Mapped[int | None] = mapped_column(Integer)
    flags: Mapped[str] = mapped_column(Text)
    result: Mapped[dict] = mapped_column(JsonType)

    recording: Mapped[RecordingRow] = relationship(back_populates="analyses")
    sweeps: Mapped[list[SweepRow]] = relationship(
        back_populates="analysis", order_by="SweepRow.sweep_index"
    )


# At most one current analysis per recording, whatever the writers do.
Index("uq_analysis_current", AnalysisRow.recording_pk, unique=True,
      sqlite_where=AnalysisRow.is_current, postgresql_where=AnalysisRow.is_current)


class SweepRow(Base):
    __tablename__ = "sweeps"
    __table_args__ = (UniqueConstraint("analysis_pk", "sweep_index", name="uq_sweep_index"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    analysis_pk: Mapped[int] = mapped_column(ForeignKey("analyses.id"))
    sweep_index: Mapped[int] = mapped_column(Integer)
    accepted: Mapped[bool] = mapped_column(Boolean)
    reject_reason: Mapped[str | None] = mapped_column(Text)
    locals().update(_float_columns(SWEEP_VALUE_KEYS))
    flags: Mapped[str] = mapped_column(Text)

    analysis: Mapped[AnalysisRow] = relationship(back_populates="sweeps")
