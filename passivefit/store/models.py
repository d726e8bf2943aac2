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

SCHEMA_VERSION = 1

JsonType = JSON().with_variant(JSONB(), "postgresql")

# Key values of a cell result copied into `analyses` columns (names as in to_dict()).
ANALYSIS_VALUE_KEYS = (
    "v_rest_mV", "r_in_MOhm", "tau0_ms", "tau1_ms", "L_cyl", "L_bs", "rho",
    "c_tau_pF", "c_total_pF", "sag_ratio",
)
# Key values of a sweep result copied into `sweeps` columns.
SWEEP_VALUE_KEYS = (
    "step_pA", "v_rest_mV", "r_in_MOhm", "tau0_ms", "tau1_ms", "c0_mV", "c1_mV", "rmse_mV",
)
# Cell metadata columns, filled from the recording file and the metadata CSV.
CELL_METADATA_KEYS = (
    "date", "preparation", "region", "cell_type", "temperature_C", "internal_solution", "notes",
)


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
    date: Mapped[str | None] = mapped_column(Text)  # ISO YYYY-MM-DD when the source gives one
    preparation: Mapped[str | None] = mapped_column(Text)
    region: Mapped[str | None] = mapped_column(Text)
    cell_type: Mapped[str | None] = mapped_column(Text)
    temperature_C: Mapped[float | None] = mapped_column(Float)
    internal_solution: Mapped[str | None] = mapped_column(Text)
    notes: Mapped[str | None] = mapped_column(Text)

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
    v_rest_mV: Mapped[float | None] = mapped_column(Float)
    r_in_MOhm: Mapped[float | None] = mapped_column(Float)
    tau0_ms: Mapped[float | None] = mapped_column(Float)
    tau1_ms: Mapped[float | None] = mapped_column(Float)
    L_cyl: Mapped[float | None] = mapped_column(Float)
    L_bs: Mapped[float | None] = mapped_column(Float)
    rho: Mapped[float | None] = mapped_column(Float)
    c_tau_pF: Mapped[float | None] = mapped_column(Float)
    c_total_pF: Mapped[float | None] = mapped_column(Float)
    sag_ratio: Mapped[float | None] = mapped_column(Float)
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
    step_pA: Mapped[float | None] = mapped_column(Float)
    v_rest_mV: Mapped[float | None] = mapped_column(Float)
    r_in_MOhm: Mapped[float | None] = mapped_column(Float)
    tau0_ms: Mapped[float | None] = mapped_column(Float)
    tau1_ms: Mapped[float | None] = mapped_column(Float)
    c0_mV: Mapped[float | None] = mapped_column(Float)
    c1_mV: Mapped[float | None] = mapped_column(Float)
    rmse_mV: Mapped[float | None] = mapped_column(Float)
    flags: Mapped[str] = mapped_column(Text)

    analysis: Mapped[AnalysisRow] = relationship(back_populates="sweeps")
