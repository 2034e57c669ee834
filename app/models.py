"""SQLAlchemy tables of a heedmap project."""

from __future__ import annotations

from datetime import datetime, timezone

from sqlalchemy import JSON, Boolean, DateTime, Float, ForeignKey, Integer, String, Text, UniqueConstraint
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column

SCHEMA_VERSION = 1


def _now() -> datetime:
    return datetime.now(timezone.utc)


class Base(DeclarativeBase):
    pass


class SchemaInfo(Base):
    __tablename__ = "schema_info"
    id: Mapped[int] = mapped_column(primary_key=True)
    version: Mapped[int] = mapped_column(Integer)


class ImageRow(Base):
    __tablename__ = "images"
    id: Mapped[int] = mapped_column(primary_key=True)
    path: Mapped[str] = mapped_column(String, unique=True)
    label: Mapped[str] = mapped_column(String)
    split: Mapped[str] = mapped_column(String, default="")
    width: Mapped[int | None] = mapped_column(Integer, nullable=True)
    height: Mapped[int | None] = mapped_column(Integer, nullable=True)
    problem: Mapped[str | None] = mapped_column(Text, nullable=True)


class SaliencyRun(Base):
    __tablename__ = "saliency_runs"
    id: Mapped[int] = mapped_column(primary_key=True)
    config_key: Mapped[str] = mapped_column(String, unique=True)
    provenance: Mapped[dict[str, object]] = mapped_column(JSON)
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True), default=_now)


class Prediction(Base):
    __tablename__ = "predictions"
    __table_args__ = (UniqueConstraint("run_id", "image_id"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("saliency_runs.id"))
    image_id: Mapped[int] = mapped_column(ForeignKey("images.id"))
    predicted: Mapped[str] = mapped_column(String)
    confidence: Mapped[float] = mapped_column(Float)
    empty_map: Mapped[bool] = mapped_column(Boolean)
    map_path: Mapped[str] = mapped_column(String)


class RegionRow(Base):
    __tablename__ = "regions"
    __table_args__ = (UniqueConstraint("prediction_id", "rank"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    prediction_id: Mapped[int] = mapped_column(ForeignKey("predictions.id"))
    rank: Mapped[int] = mapped_column(Integer)
    x0: Mapped[int] = mapped_column(Integer)
    y0: Mapped[int] = mapped_column(Integer)
    x1: Mapped[int] = mapped_column(Integer)
    y1: Mapped[int] = mapped_column(Integer)
    area: Mapped[int] = mapped_column(Integer)
    mass_share: Mapped[float] = mapped_column(Float)
    crop_path: Mapped[str] = mapped_column(String)
    outline_path: Mapped[str] = mapped_column(String)


class Annotator(Base):
    __tablename__ = "annotators"
    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String, unique=True)
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True), default=_now)


class Annotation(Base):
    __tablename__ = "annotations"
    __table_args__ = (UniqueConstraint("region_id", "annotator_id"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    client_id: Mapped[str] = mapped_column(String, unique=True)
    region_id: Mapped[int] = mapped_column(ForeignKey("regions.id"))
    annotator_id: Mapped[int] = mapped_column(ForeignKey("annotators.id"))
    entities: Mapped[list[list[object]]] = mapped_column(JSON)  # [[entity, [attributes...]], ...]; [] = nothing recognisable
    submitted_at: Mapped[datetime] = mapped_column(DateTime(timezone=True), default=_now)
    seconds_spent: Mapped[float | None] = mapped_column(Float, nullable=True)
