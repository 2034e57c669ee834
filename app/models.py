"""SQLAlchemy tables of a heedmap project."""

from __future__ import annotations

from datetime import UTC, datetime

from sqlalchemy import JSON, Boolean, DateTime, Float, ForeignKey, Index, Integer, String, Text, UniqueConstraint
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column

ROLES = ("annotator", "reviewer", "analyst", "admin")


def utcnow() -> datetime:
    """Now in UTC, without tzinfo: SQLite stores datetimes naive, and comparisons must match."""
    return datetime.now(UTC).replace(tzinfo=None)


# A label as stored (JSON): [[entity, [attribute, ...]], ...]; [] = nothing recognisable.
StoredEntities = list[tuple[str, list[str]]]

class Base(DeclarativeBase):
    pass


class SchemaInfo(Base):
    """The hand-kept schema version of projects made before Alembic; now 4, so those heedmaps refuse newer projects.

    Schema changes are Alembic revisions in ``app/migrations/versions`` (see DEVELOPERS.md).
    """

    __tablename__ = "schema_info"
    id: Mapped[int] = mapped_column(primary_key=True)
    version: Mapped[int] = mapped_column(Integer)


class Secret(Base):
    """Project-wide random keys (the cookie-signing key); made once, never shown."""

    __tablename__ = "secrets"
    name: Mapped[str] = mapped_column(String, primary_key=True)
    value: Mapped[str] = mapped_column(String)


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
    created_at: Mapped[datetime] = mapped_column(DateTime(), default=utcnow)
    # Where the model was when the run was made, so later steps (interventions) can reload it.
    model_path: Mapped[str | None] = mapped_column(String, nullable=True)
    sidecar_path: Mapped[str | None] = mapped_column(String, nullable=True)


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


class Person(Base):
    """Someone on the project; ``role`` says what they may do (ROLES, least to most)."""

    __tablename__ = "people"
    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String, unique=True)
    role: Mapped[str] = mapped_column(String, default="annotator")
    created_at: Mapped[datetime] = mapped_column(DateTime(), default=utcnow)


class Invite(Base):
    """A link that signs its holder in as ``person``; only a hash of its token is kept."""

    __tablename__ = "invites"
    id: Mapped[int] = mapped_column(primary_key=True)
    token_hash: Mapped[str] = mapped_column(String, unique=True)
    person_id: Mapped[int] = mapped_column(ForeignKey("people.id"))
    campaign_id: Mapped[int | None] = mapped_column(ForeignKey("campaigns.id"), nullable=True)
    note: Mapped[str] = mapped_column(String, default="")
    created_at: Mapped[datetime] = mapped_column(DateTime(), default=utcnow)
    expires_at: Mapped[datetime] = mapped_column(DateTime())
    revoked_at: Mapped[datetime | None] = mapped_column(DateTime(), nullable=True)
    last_used_at: Mapped[datetime | None] = mapped_column(DateTime(), nullable=True)


class Campaign(Base):
    """Which regions of a run get labelled, by how many people each, with what instructions."""

    __tablename__ = "campaigns"
    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String, unique=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("saliency_runs.id"))
    classes: Mapped[list[str]] = mapped_column(JSON, default=list)  # predicted classes included; [] = all
    labels_per_region: Mapped[int] = mapped_column(Integer, default=3)
    instructions: Mapped[str] = mapped_column(Text, default="")
    lease_seconds: Mapped[int] = mapped_column(Integer, default=600)
    check_every: Mapped[int] = mapped_column(Integer, default=10)  # one check item in about this many tasks
    method: Mapped[str] = mapped_column(String, default="majority")  # label aggregation for results
    n_regions: Mapped[int] = mapped_column(Integer, default=0)  # kept with campaign_regions, read on every request
    n_checks: Mapped[int] = mapped_column(Integer, default=0)
    expectations: Mapped[str] = mapped_column(Text, default="")  # TOML text, see analysis.expectations
    created_at: Mapped[datetime] = mapped_column(DateTime(), default=utcnow)
    closed_at: Mapped[datetime | None] = mapped_column(DateTime(), nullable=True)


class CampaignRegion(Base):
    """A region in a campaign; ``check_answer`` set makes it a check item with that known label."""

    __tablename__ = "campaign_regions"
    # The index walks regions least-labelled first, so picking the next task never sorts the campaign.
    __table_args__ = (UniqueConstraint("campaign_id", "region_id"), Index("ix_campaign_regions_load", "campaign_id", "n_labels", "region_id"))
    id: Mapped[int] = mapped_column(primary_key=True)
    campaign_id: Mapped[int] = mapped_column(ForeignKey("campaigns.id"))
    region_id: Mapped[int] = mapped_column(ForeignKey("regions.id"))
    check_answer: Mapped[StoredEntities | None] = mapped_column(JSON(none_as_null=True), nullable=True)
    # An example shown with the instructions, with its answer; examples are never handed out as tasks.
    example_answer: Mapped[StoredEntities | None] = mapped_column(JSON(none_as_null=True), nullable=True)
    n_labels: Mapped[int] = mapped_column(Integer, default=0)  # kept with every label stored or undone
    # Labels this region wants now, where it differs from the campaign's labels_per_region: 2 in an adaptive
    # campaign until its first two disagree, 0 once its class is closed; NULL = the campaign's number.
    quota: Mapped[int | None] = mapped_column(Integer, nullable=True)


class CampaignPlan(Base):
    """How a campaign chose its regions and how many labels each gets (a campaign without one labels all, k each)."""

    __tablename__ = "campaign_plans"
    campaign_id: Mapped[int] = mapped_column(ForeignKey("campaigns.id"), primary_key=True)
    sampled: Mapped[bool] = mapped_column(Boolean, default=False)  # a stratified sample of the images (campaign_samples)
    budget: Mapped[int | None] = mapped_column(Integer, nullable=True)  # judgments the sample was sized for
    regions_per_class: Mapped[int | None] = mapped_column(Integer, nullable=True)
    confident_at: Mapped[float] = mapped_column(Float, default=0.8)
    seed: Mapped[int] = mapped_column(Integer, default=0)
    adaptive: Mapped[bool] = mapped_column(Boolean, default=False)  # base_labels first, up to labels_per_region on disagreement
    base_labels: Mapped[int] = mapped_column(Integer, default=2)
    settle_window: Mapped[int] = mapped_column(Integer, default=60)  # judgments over which a class's top rules must hold still
    closed_classes: Mapped[list[str]] = mapped_column(JSON, default=list)


class CampaignStratum(Base):
    """One stratum of a sampled campaign: its images in the run (population) and how many were drawn."""

    __tablename__ = "campaign_strata"
    __table_args__ = (UniqueConstraint("campaign_id", "name"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    campaign_id: Mapped[int] = mapped_column(ForeignKey("campaigns.id"))
    name: Mapped[str] = mapped_column(String)
    cls: Mapped[str] = mapped_column(String)  # predicted class
    kind: Mapped[str] = mapped_column(String)  # confident error | confident correct | other
    images: Mapped[int] = mapped_column(Integer)
    regions: Mapped[int] = mapped_column(Integer)
    drawn: Mapped[int] = mapped_column(Integer)


class CampaignSample(Base):
    """An image drawn into a sampled campaign, with its stratum and inclusion probability (all its regions are labelled)."""

    __tablename__ = "campaign_samples"
    __table_args__ = (UniqueConstraint("campaign_id", "image_id"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    campaign_id: Mapped[int] = mapped_column(ForeignKey("campaigns.id"))
    image_id: Mapped[int] = mapped_column(ForeignKey("images.id"))
    stratum_id: Mapped[int] = mapped_column(ForeignKey("campaign_strata.id"))
    inclusion_probability: Mapped[float] = mapped_column(Float)


class Lease(Base):
    """A region handed to a person; it counts toward the region's quota until it expires."""

    __tablename__ = "leases"
    __table_args__ = (UniqueConstraint("campaign_id", "region_id", "person_id"), Index("ix_leases_person", "campaign_id", "person_id"))
    id: Mapped[int] = mapped_column(primary_key=True)
    campaign_id: Mapped[int] = mapped_column(ForeignKey("campaigns.id"))
    region_id: Mapped[int] = mapped_column(ForeignKey("regions.id"))
    person_id: Mapped[int] = mapped_column(ForeignKey("people.id"))
    created_at: Mapped[datetime] = mapped_column(DateTime(), default=utcnow)
    expires_at: Mapped[datetime] = mapped_column(DateTime())


class Label(Base):
    """One person's judgment of one region in a campaign; ``client_id`` makes a retried submit harmless."""

    __tablename__ = "labels"
    __table_args__ = (UniqueConstraint("campaign_id", "region_id", "person_id"), Index("ix_labels_person", "campaign_id", "person_id"))
    id: Mapped[int] = mapped_column(primary_key=True)
    client_id: Mapped[str] = mapped_column(String, unique=True)
    campaign_id: Mapped[int] = mapped_column(ForeignKey("campaigns.id"))
    region_id: Mapped[int] = mapped_column(ForeignKey("regions.id"))
    person_id: Mapped[int] = mapped_column(ForeignKey("people.id"))
    entities: Mapped[StoredEntities] = mapped_column(JSON)  # [[entity, [attributes...]], ...]; [] = nothing recognisable
    unsure: Mapped[bool] = mapped_column(Boolean, default=False)
    submitted_at: Mapped[datetime] = mapped_column(DateTime(), default=utcnow)
    seconds_spent: Mapped[float | None] = mapped_column(Float, nullable=True)
    # Given as part of a group: the id of the group judgment (group_labels) it came from; None for a single crop.
    # Not a foreign key: group judgments are never deleted, and a plain column can be dropped on SQLite.
    group_label_id: Mapped[int | None] = mapped_column(Integer, nullable=True)


class WithdrawnLabel(Base):
    """A label its author undid; its ``client_id`` stays spent, so a late retry of that submit stores nothing."""

    __tablename__ = "withdrawn_labels"
    id: Mapped[int] = mapped_column(primary_key=True)
    client_id: Mapped[str] = mapped_column(String, unique=True)
    campaign_id: Mapped[int] = mapped_column(ForeignKey("campaigns.id"))
    region_id: Mapped[int] = mapped_column(ForeignKey("regions.id"))
    person_id: Mapped[int] = mapped_column(ForeignKey("people.id"))
    entities: Mapped[list[list[object]]] = mapped_column(JSON)
    withdrawn_at: Mapped[datetime] = mapped_column(DateTime(), default=utcnow)


class Skip(Base):
    """A region a person passed over; it is not offered to them again."""

    __tablename__ = "skips"
    __table_args__ = (UniqueConstraint("campaign_id", "region_id", "person_id"), Index("ix_skips_person", "campaign_id", "person_id"))
    id: Mapped[int] = mapped_column(primary_key=True)
    campaign_id: Mapped[int] = mapped_column(ForeignKey("campaigns.id"))
    region_id: Mapped[int] = mapped_column(ForeignKey("regions.id"))
    person_id: Mapped[int] = mapped_column(ForeignKey("people.id"))
    created_at: Mapped[datetime] = mapped_column(DateTime(), default=utcnow)


class SynonymRule(Base):
    """An analyst's merge, split or rejected suggestion; deleting the row undoes it."""

    __tablename__ = "synonym_rules"
    id: Mapped[int] = mapped_column(primary_key=True)
    campaign_id: Mapped[int] = mapped_column(ForeignKey("campaigns.id"), index=True)
    kind: Mapped[str] = mapped_column(String)  # "merge" | "merge-attribute" | "split" | "reject"
    source: Mapped[str] = mapped_column(String)
    target: Mapped[str] = mapped_column(String, default="")
    targets: Mapped[dict[str, str]] = mapped_column(JSON, default=dict)  # split: class -> concept
    created_by: Mapped[str] = mapped_column(String, default="")
    created_at: Mapped[datetime] = mapped_column(DateTime(), default=utcnow)


class WordCount(Base):
    """How often a normalised word was typed in a campaign, as an entity or an attribute.

    Kept with every label stored or undone, in the same transaction, so the labelling page's
    vocabulary reads these few rows instead of every label of the campaign. Synonym rules are
    applied when reading, so a new rule never needs a recount.
    """

    __tablename__ = "word_counts"
    __table_args__ = (UniqueConstraint("campaign_id", "kind", "word"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    campaign_id: Mapped[int] = mapped_column(ForeignKey("campaigns.id"))
    kind: Mapped[str] = mapped_column(String)  # entity | attribute
    word: Mapped[str] = mapped_column(String)
    n: Mapped[int] = mapped_column(Integer, default=0)


class RegionGroup(Base):
    """Similar regions of a campaign shown together on the group labelling page; ``position`` is the labelling order."""

    __tablename__ = "region_groups"
    __table_args__ = (UniqueConstraint("campaign_id", "position"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    campaign_id: Mapped[int] = mapped_column(ForeignKey("campaigns.id"))
    position: Mapped[int] = mapped_column(Integer)
    created_at: Mapped[datetime] = mapped_column(DateTime(), default=utcnow)


class RegionGroupMember(Base):
    """A region in a group; a region is in at most one group of a campaign."""

    __tablename__ = "region_group_members"
    __table_args__ = (UniqueConstraint("campaign_id", "region_id"), Index("ix_region_group_members_group", "group_id", "region_id"))
    id: Mapped[int] = mapped_column(primary_key=True)
    campaign_id: Mapped[int] = mapped_column(ForeignKey("campaigns.id"))
    group_id: Mapped[int] = mapped_column(ForeignKey("region_groups.id"))
    region_id: Mapped[int] = mapped_column(ForeignKey("regions.id"))


class GroupLease(Base):
    """The group a person is labelling now; its crops are held by ordinary leases."""

    __tablename__ = "group_leases"
    __table_args__ = (UniqueConstraint("campaign_id", "person_id"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    campaign_id: Mapped[int] = mapped_column(ForeignKey("campaigns.id"))
    person_id: Mapped[int] = mapped_column(ForeignKey("people.id"))
    group_id: Mapped[int] = mapped_column(ForeignKey("region_groups.id"))
    expires_at: Mapped[datetime] = mapped_column(DateTime())


class GroupLabel(Base):
    """One person's judgment of a group: what the ticked crops share. Each ticked crop gets its own label
    (``labels.group_label_id`` points here); unticked crops get none from this person."""

    __tablename__ = "group_labels"
    __table_args__ = (UniqueConstraint("campaign_id", "group_id", "person_id"),)
    id: Mapped[int] = mapped_column(primary_key=True)
    client_id: Mapped[str] = mapped_column(String, unique=True)
    campaign_id: Mapped[int] = mapped_column(ForeignKey("campaigns.id"))
    group_id: Mapped[int] = mapped_column(ForeignKey("region_groups.id"))
    person_id: Mapped[int] = mapped_column(ForeignKey("people.id"))
    entities: Mapped[StoredEntities] = mapped_column(JSON)
    unsure: Mapped[bool] = mapped_column(Boolean, default=False)
    ticked: Mapped[list[int]] = mapped_column(JSON, default=list)  # region ids given the label
    unticked: Mapped[list[int]] = mapped_column(JSON, default=list)  # region ids shown and left out
    submitted_at: Mapped[datetime] = mapped_column(DateTime(), default=utcnow)
    seconds_spent: Mapped[float | None] = mapped_column(Float, nullable=True)
