"""The tables of schema 3 exactly as heedmap made them before Alembic: the baseline revision's content.

A frozen copy, never edited: later changes go into new revisions. The baseline creates these
tables in a new database, and projects of schema 1 or 2 are brought to this point before the
revisions run.
"""

from __future__ import annotations

from sqlalchemy import JSON, Boolean, Column, DateTime, Float, ForeignKey, Index, Integer, MetaData, String, Table, Text, UniqueConstraint

metadata = MetaData()


def _id() -> Column[int]:
    return Column("id", Integer, primary_key=True)


def _fk(name: str, target: str) -> Column[int]:
    return Column(name, Integer, ForeignKey(target), nullable=False)


Table("schema_info", metadata, _id(), Column("version", Integer, nullable=False))
Table("secrets", metadata, Column("name", String, primary_key=True), Column("value", String, nullable=False))
Table(
    "images", metadata, _id(), Column("path", String, nullable=False, unique=True), Column("label", String, nullable=False),
    Column("split", String, nullable=False), Column("width", Integer), Column("height", Integer), Column("problem", Text),
)
Table(
    "saliency_runs", metadata, _id(), Column("config_key", String, nullable=False, unique=True), Column("provenance", JSON, nullable=False),
    Column("created_at", DateTime, nullable=False), Column("model_path", String), Column("sidecar_path", String),
)
Table(
    "predictions", metadata, _id(), _fk("run_id", "saliency_runs.id"), _fk("image_id", "images.id"), Column("predicted", String, nullable=False),
    Column("confidence", Float, nullable=False), Column("empty_map", Boolean, nullable=False), Column("map_path", String, nullable=False),
    UniqueConstraint("run_id", "image_id"),
)
Table(
    "regions", metadata, _id(), _fk("prediction_id", "predictions.id"), Column("rank", Integer, nullable=False),
    *(Column(n, Integer, nullable=False) for n in ("x0", "y0", "x1", "y1", "area")), Column("mass_share", Float, nullable=False),
    Column("crop_path", String, nullable=False), Column("outline_path", String, nullable=False), UniqueConstraint("prediction_id", "rank"),
)
Table(
    "people", metadata, _id(), Column("name", String, nullable=False, unique=True), Column("role", String, nullable=False),
    Column("created_at", DateTime, nullable=False),
)
Table(
    "campaigns", metadata, _id(), Column("name", String, nullable=False, unique=True), _fk("run_id", "saliency_runs.id"),
    Column("classes", JSON, nullable=False), Column("labels_per_region", Integer, nullable=False), Column("instructions", Text, nullable=False),
    Column("lease_seconds", Integer, nullable=False), Column("check_every", Integer, nullable=False), Column("method", String, nullable=False),
    Column("n_regions", Integer, nullable=False), Column("n_checks", Integer, nullable=False), Column("expectations", Text, nullable=False),
    Column("created_at", DateTime, nullable=False), Column("closed_at", DateTime),
)
Table(
    "invites", metadata, _id(), Column("token_hash", String, nullable=False, unique=True), _fk("person_id", "people.id"),
    Column("campaign_id", Integer, ForeignKey("campaigns.id")), Column("note", String, nullable=False), Column("created_at", DateTime, nullable=False),
    Column("expires_at", DateTime, nullable=False), Column("revoked_at", DateTime), Column("last_used_at", DateTime),
)
Table(
    "campaign_regions", metadata, _id(), _fk("campaign_id", "campaigns.id"), _fk("region_id", "regions.id"),
    Column("check_answer", JSON(none_as_null=True)), Column("example_answer", JSON(none_as_null=True)), Column("n_labels", Integer, nullable=False),
    UniqueConstraint("campaign_id", "region_id"), Index("ix_campaign_regions_load", "campaign_id", "n_labels", "region_id"),
)
Table(
    "leases", metadata, _id(), _fk("campaign_id", "campaigns.id"), _fk("region_id", "regions.id"), _fk("person_id", "people.id"),
    Column("created_at", DateTime, nullable=False), Column("expires_at", DateTime, nullable=False),
    UniqueConstraint("campaign_id", "region_id", "person_id"), Index("ix_leases_person", "campaign_id", "person_id"),
)
Table(
    "labels", metadata, _id(), Column("client_id", String, nullable=False, unique=True), _fk("campaign_id", "campaigns.id"),
    _fk("region_id", "regions.id"), _fk("person_id", "people.id"), Column("entities", JSON, nullable=False), Column("unsure", Boolean, nullable=False),
    Column("submitted_at", DateTime, nullable=False), Column("seconds_spent", Float),
    UniqueConstraint("campaign_id", "region_id", "person_id"), Index("ix_labels_person", "campaign_id", "person_id"),
)
Table(
    "withdrawn_labels", metadata, _id(), Column("client_id", String, nullable=False, unique=True), _fk("campaign_id", "campaigns.id"),
    _fk("region_id", "regions.id"), _fk("person_id", "people.id"), Column("entities", JSON, nullable=False),
    Column("withdrawn_at", DateTime, nullable=False),
)
Table(
    "skips", metadata, _id(), _fk("campaign_id", "campaigns.id"), _fk("region_id", "regions.id"), _fk("person_id", "people.id"),
    Column("created_at", DateTime, nullable=False), UniqueConstraint("campaign_id", "region_id", "person_id"),
    Index("ix_skips_person", "campaign_id", "person_id"),
)
Table(
    "synonym_rules", metadata, _id(), Column("campaign_id", Integer, ForeignKey("campaigns.id"), nullable=False, index=True),
    Column("kind", String, nullable=False), Column("source", String, nullable=False), Column("target", String, nullable=False),
    Column("targets", JSON, nullable=False), Column("created_by", String, nullable=False), Column("created_at", DateTime, nullable=False),
)
Table(
    "word_counts", metadata, _id(), _fk("campaign_id", "campaigns.id"), Column("kind", String, nullable=False), Column("word", String, nullable=False),
    Column("n", Integer, nullable=False), UniqueConstraint("campaign_id", "kind", "word"),
)
