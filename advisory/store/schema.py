"""SQLAlchemy 2.x ORM schema.

All times are stored in UTC.  Observation times are stored as integer seconds
since the Unix epoch (fast bulk import and range queries); every other time
column is a timezone-aware ``DateTime`` normalised to UTC.  The ORM hands back
timezone-aware UTC datetimes for both.

Changing anything here needs an Alembic migration (see DEVELOPERS.md); a test
checks that the migrations produce exactly this schema.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    Boolean,
    Date,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    String,
    Text,
    TypeDecorator,
    UniqueConstraint,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship

NAMING = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}


class UTCDateTime(TypeDecorator):
    """Timezone-aware datetime stored as naive UTC; naive input is rejected."""

    impl = DateTime
    cache_ok = True

    def process_bind_param(self, value, dialect):
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetime given to a UTC column")
        return value.astimezone(dt.UTC).replace(tzinfo=None)

    def process_result_value(self, value, dialect):
        if value is None:
            return None
        return value.replace(tzinfo=dt.UTC)


class EpochSeconds(TypeDecorator):
    """Timezone-aware datetime stored as integer seconds since 1970-01-01 UTC.

    SQLite's INTEGER holds 64 bits; on PostgreSQL the column is a BIGINT (its INTEGER would end in 2038).
    """

    impl = Integer
    cache_ok = True

    def load_dialect_impl(self, dialect):
        if dialect.name == "sqlite":
            return dialect.type_descriptor(Integer())
        return dialect.type_descriptor(BigInteger())

    def process_bind_param(self, value, dialect):
        if value is None or isinstance(value, int):
            return value
        if value.tzinfo is None:
            raise ValueError("naive datetime given to a UTC column")
        return int(value.timestamp())

    def process_result_value(self, value, dialect):
        if value is None:
            return None
        return dt.datetime.fromtimestamp(value, dt.UTC)


def utcnow() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING)
    type_annotation_map = {dict[str, Any]: JSON, list[Any]: JSON}


class Farm(Base):
    __tablename__ = "farms"

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String(200), unique=True)
    timezone: Mapped[str] = mapped_column(String(64))
    #: "metric" (°C, mm) or "imperial" (°F) for notices; storage is always SI.
    units: Mapped[str] = mapped_column(String(16), default="metric")
    #: Farm-wide settings: risk thresholds, heat season, margins.
    settings: Mapped[dict[str, Any]] = mapped_column(default=dict)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow, onupdate=utcnow)

    stations: Mapped[list[Station]] = relationship(back_populates="farm", cascade="all, delete-orphan")
    blocks: Mapped[list[Block]] = relationship(back_populates="farm", cascade="all, delete-orphan")
    recipients: Mapped[list[Recipient]] = relationship(back_populates="farm", cascade="all, delete-orphan")


class Station(Base):
    __tablename__ = "stations"

    id: Mapped[int] = mapped_column(primary_key=True)
    #: Station identifier used on the command line and in file names; unique.
    code: Mapped[str] = mapped_column(String(64), unique=True)
    farm_id: Mapped[int] = mapped_column(ForeignKey("farms.id", ondelete="CASCADE"), index=True)
    name: Mapped[str] = mapped_column(String(200))
    latitude: Mapped[float] = mapped_column(Float)
    longitude: Mapped[float] = mapped_column(Float)
    elevation_m: Mapped[float] = mapped_column(Float)
    timezone: Mapped[str] = mapped_column(String(64))
    temp_sensor_height_m: Mapped[float] = mapped_column(Float, default=1.5)
    upper_sensor_height_m: Mapped[float | None] = mapped_column(Float, nullable=True)
    wind_sensor_height_m: Mapped[float] = mapped_column(Float, default=2.0)
    #: Logger export header -> canonical column name.
    column_map: Mapped[dict[str, Any]] = mapped_column(default=dict)
    inbox: Mapped[str | None] = mapped_column(String(500), nullable=True)

    farm: Mapped[Farm] = relationship(back_populates="stations")
    blocks: Mapped[list[Block]] = relationship(back_populates="station")


class BlockRecipient(Base):
    __tablename__ = "block_recipients"

    block_id: Mapped[int] = mapped_column(ForeignKey("blocks.id", ondelete="CASCADE"), primary_key=True)
    recipient_id: Mapped[int] = mapped_column(ForeignKey("recipients.id", ondelete="CASCADE"),
                                              primary_key=True)


class Block(Base):
    __tablename__ = "blocks"
    __table_args__ = (UniqueConstraint("farm_id", "name"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    farm_id: Mapped[int] = mapped_column(ForeignKey("farms.id", ondelete="CASCADE"), index=True)
    station_id: Mapped[int] = mapped_column(ForeignKey("stations.id"), index=True)
    name: Mapped[str] = mapped_column(String(200))
    latitude: Mapped[float] = mapped_column(Float)
    longitude: Mapped[float] = mapped_column(Float)
    elevation_m: Mapped[float] = mapped_column(Float)
    area_ha: Mapped[float] = mapped_column(Float)
    crop: Mapped[str] = mapped_column(String(40))
    variety: Mapped[str | None] = mapped_column(String(100), nullable=True)
    stage: Mapped[str] = mapped_column(String(60))
    stage_date: Mapped[dt.date] = mapped_column(Date)
    t10_override_c: Mapped[float | None] = mapped_column(Float, nullable=True)
    t90_override_c: Mapped[float | None] = mapped_column(Float, nullable=True)
    #: Minutes after sunset of the evening reference time.
    reference_offset_min: Mapped[int] = mapped_column(Integer, default=120)
    active: Mapped[bool] = mapped_column(Boolean, default=True)
    #: Block-level settings that override the farm's (risk thresholds, margins).
    settings: Mapped[dict[str, Any]] = mapped_column(default=dict)

    farm: Mapped[Farm] = relationship(back_populates="blocks")
    station: Mapped[Station] = relationship(back_populates="blocks")
    equipment: Mapped[list[Equipment]] = relationship(back_populates="block", cascade="all, delete-orphan",
                                                      order_by="Equipment.id")
    stage_history: Mapped[list[StageRecord]] = relationship(
        back_populates="block", cascade="all, delete-orphan", order_by="StageRecord.observed_on")
    recipients: Mapped[list[Recipient]] = relationship(secondary="block_recipients",
                                                       back_populates="blocks")


class Equipment(Base):
    """One protection system on a block (wind machine, sprinklers, heaters)."""

    __tablename__ = "equipment"

    id: Mapped[int] = mapped_column(primary_key=True)
    block_id: Mapped[int] = mapped_column(ForeignKey("blocks.id", ondelete="CASCADE"), index=True)
    #: wind_machine | overtree_sprinkler | undertree_sprinkler | heater
    kind: Mapped[str] = mapped_column(String(40))
    params: Mapped[dict[str, Any]] = mapped_column(default=dict)

    block: Mapped[Block] = relationship(back_populates="equipment")


class StageRecord(Base):
    __tablename__ = "stage_history"
    __table_args__ = (UniqueConstraint("block_id", "stage", "observed_on"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    block_id: Mapped[int] = mapped_column(ForeignKey("blocks.id", ondelete="CASCADE"), index=True)
    stage: Mapped[str] = mapped_column(String(60))
    observed_on: Mapped[dt.date] = mapped_column(Date)
    recorded_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    #: Where the change came from: "farm file", "command line".
    source: Mapped[str] = mapped_column(String(40), default="")

    block: Mapped[Block] = relationship(back_populates="stage_history")


class Recipient(Base):
    __tablename__ = "recipients"
    __table_args__ = (UniqueConstraint("farm_id", "name"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    farm_id: Mapped[int] = mapped_column(ForeignKey("farms.id", ondelete="CASCADE"), index=True)
    name: Mapped[str] = mapped_column(String(200))
    role: Mapped[str] = mapped_column(String(60), default="")
    #: e.g. {"email": "a@b", "webhook": "http://...", "sms": "+1..."}; outbox is implicit.
    channels: Mapped[dict[str, Any]] = mapped_column(default=dict)

    farm: Mapped[Farm] = relationship(back_populates="recipients")
    blocks: Mapped[list[Block]] = relationship(secondary="block_recipients", back_populates="recipients")


class Observation(Base):
    """One station reading.  Each value has a QC bit mask (0 = passed)."""

    __tablename__ = "observations"

    station_id: Mapped[int] = mapped_column(ForeignKey("stations.id", ondelete="CASCADE"), primary_key=True)
    time_utc: Mapped[dt.datetime] = mapped_column(EpochSeconds, primary_key=True)
    air_temp_c: Mapped[float | None] = mapped_column(Float, nullable=True)
    dew_point_c: Mapped[float | None] = mapped_column(Float, nullable=True)
    rel_humidity_pct: Mapped[float | None] = mapped_column(Float, nullable=True)
    wind_speed_ms: Mapped[float | None] = mapped_column(Float, nullable=True)
    cloud_cover_pct: Mapped[float | None] = mapped_column(Float, nullable=True)
    upper_air_temp_c: Mapped[float | None] = mapped_column(Float, nullable=True)
    air_temp_qc: Mapped[int] = mapped_column(Integer, default=0)
    dew_point_qc: Mapped[int] = mapped_column(Integer, default=0)
    rel_humidity_qc: Mapped[int] = mapped_column(Integer, default=0)
    wind_speed_qc: Mapped[int] = mapped_column(Integer, default=0)
    cloud_cover_qc: Mapped[int] = mapped_column(Integer, default=0)
    upper_air_temp_qc: Mapped[int] = mapped_column(Integer, default=0)
    import_id: Mapped[int | None] = mapped_column(ForeignKey("imports.id"), nullable=True)


class Import(Base):
    """One observation file import (for reports and idempotency)."""

    __tablename__ = "imports"

    id: Mapped[int] = mapped_column(primary_key=True)
    station_id: Mapped[int] = mapped_column(ForeignKey("stations.id", ondelete="CASCADE"), index=True)
    file_name: Mapped[str] = mapped_column(String(500))
    sha256: Mapped[str] = mapped_column(String(64))
    imported_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    rows_read: Mapped[int] = mapped_column(Integer, default=0)
    rows_added: Mapped[int] = mapped_column(Integer, default=0)
    rows_replaced: Mapped[int] = mapped_column(Integer, default=0)
    conflicts: Mapped[int] = mapped_column(Integer, default=0)
    summary: Mapped[dict[str, Any]] = mapped_column(default=dict)


class Outlook(Base):
    """A forecast daily high/low for a station and local date, as copied by a grower."""

    __tablename__ = "outlooks"
    __table_args__ = (UniqueConstraint("station_id", "day"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    station_id: Mapped[int] = mapped_column(ForeignKey("stations.id", ondelete="CASCADE"), index=True)
    day: Mapped[dt.date] = mapped_column(Date)
    high_c: Mapped[float] = mapped_column(Float)
    low_c: Mapped[float | None] = mapped_column(Float, nullable=True)
    min_rel_humidity_pct: Mapped[float | None] = mapped_column(Float, nullable=True)
    imported_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class NightOutlook(Base):
    """One hour of a night outlook for a station (sky cover, wind, temperature), as copied by an agent."""

    __tablename__ = "night_outlooks"
    __table_args__ = (UniqueConstraint("station_id", "valid_time"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    station_id: Mapped[int] = mapped_column(ForeignKey("stations.id", ondelete="CASCADE"), index=True)
    valid_time: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    sky_cover_pct: Mapped[float | None] = mapped_column(Float, nullable=True)
    wind_speed_ms: Mapped[float | None] = mapped_column(Float, nullable=True)
    air_temp_c: Mapped[float | None] = mapped_column(Float, nullable=True)
    imported_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class Calibration(Base):
    """Fitted model parameters for a station (night minimum or day maximum)."""

    __tablename__ = "calibrations"

    id: Mapped[int] = mapped_column(primary_key=True)
    station_id: Mapped[int] = mapped_column(ForeignKey("stations.id", ondelete="CASCADE"), index=True)
    #: "night_min" or "day_max"
    kind: Mapped[str] = mapped_column(String(20))
    fitted_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    training_nights: Mapped[int] = mapped_column(Integer, default=0)
    params: Mapped[dict[str, Any]] = mapped_column(default=dict)


class Forecast(Base):
    """One forecast for a block and night (or day), revision 0 in the evening, then updates."""

    __tablename__ = "forecasts"
    __table_args__ = (UniqueConstraint("block_id", "kind", "night", "revision"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    block_id: Mapped[int] = mapped_column(ForeignKey("blocks.id", ondelete="CASCADE"), index=True)
    #: "frost" (a night) or "heat" (a day)
    kind: Mapped[str] = mapped_column(String(10), default="frost")
    #: Local date of the evening (frost) or of the day (heat).
    night: Mapped[dt.date] = mapped_column(Date)
    revision: Mapped[int] = mapped_column(Integer, default=0)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    reference_time: Mapped[dt.datetime | None] = mapped_column(UTCDateTime, nullable=True)
    #: "ok", "no_forecast" (reason says why), "no_night" (sun does not set/rise), "missed"
    status: Mapped[str] = mapped_column(String(20))
    reason: Mapped[str] = mapped_column(Text, default="")
    model: Mapped[str] = mapped_column(String(20), default="")
    training_nights: Mapped[int] = mapped_column(Integer, default=0)
    min_p10_c: Mapped[float | None] = mapped_column(Float, nullable=True)
    min_p50_c: Mapped[float | None] = mapped_column(Float, nullable=True)
    min_p90_c: Mapped[float | None] = mapped_column(Float, nullable=True)
    level: Mapped[str] = mapped_column(String(20), default="")
    #: Curve, risk and plan details as composed for the notice.
    payload: Mapped[dict[str, Any]] = mapped_column(default=dict)

    block: Mapped[Block] = relationship()


class Notice(Base):
    __tablename__ = "notices"

    id: Mapped[int] = mapped_column(primary_key=True)
    #: Idempotency key: kind/farm/block/night/revision.
    key: Mapped[str] = mapped_column(String(300), unique=True)
    farm_id: Mapped[int] = mapped_column(ForeignKey("farms.id", ondelete="CASCADE"), index=True)
    block_id: Mapped[int | None] = mapped_column(ForeignKey("blocks.id", ondelete="CASCADE"), nullable=True)
    forecast_id: Mapped[int | None] = mapped_column(ForeignKey("forecasts.id", ondelete="SET NULL"),
                                                    nullable=True)
    kind: Mapped[str] = mapped_column(String(20))
    night: Mapped[dt.date] = mapped_column(Date)
    revision: Mapped[int] = mapped_column(Integer, default=0)
    is_update: Mapped[bool] = mapped_column(Boolean, default=False)
    level: Mapped[str] = mapped_column(String(20), default="")
    subject: Mapped[str] = mapped_column(String(300))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    #: The composed notice as plain data (renderers work from :attr:`full_content`).  The nightly
    #: run leaves a block notice's ``data`` out: it is its forecast's payload, stored once there.
    content: Mapped[dict[str, Any]] = mapped_column(default=dict)

    forecast: Mapped[Forecast | None] = relationship()

    @property
    def full_content(self) -> dict[str, Any]:
        """The composed notice whole: ``content``, with ``data`` from the forecast's payload
        where it was stored only there (loads the forecast row when not loaded yet)."""
        c = self.content or {}
        if "data" in c or c.get("type", "block") != "block" or self.forecast_id is None:
            return c
        return with_data(c, self.forecast.payload if self.forecast is not None else None)


def with_data(content: dict[str, Any] | None, payload: dict[str, Any] | None) -> dict[str, Any]:
    """A stored notice's ``content`` with its forecast's ``payload`` as ``data`` where it has none."""
    content = content or {}
    if payload is None or "data" in content or content.get("type", "block") != "block":
        return content
    return {**content, "data": payload}


# A night's notices of a farm (delivery of what a run left), a block's notices; a night's forecasts.
Index("ix_notices_night_farm_kind", Notice.night, Notice.farm_id, Notice.kind)
Index("ix_notices_block_id", Notice.block_id)
Index("ix_forecasts_night_kind_revision", Forecast.night, Forecast.kind, Forecast.revision)


class Delivery(Base):
    """One delivery attempt of a notice to a recipient on a channel."""

    __tablename__ = "deliveries"

    id: Mapped[int] = mapped_column(primary_key=True)
    notice_id: Mapped[int] = mapped_column(ForeignKey("notices.id", ondelete="CASCADE"), index=True)
    recipient_id: Mapped[int | None] = mapped_column(ForeignKey("recipients.id", ondelete="SET NULL"),
                                                     nullable=True)
    channel: Mapped[str] = mapped_column(String(20))
    address: Mapped[str] = mapped_column(String(500), default="")
    attempt: Mapped[int] = mapped_column(Integer, default=1)
    #: "sent" or "failed"
    status: Mapped[str] = mapped_column(String(10))
    attempted_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    error: Mapped[str] = mapped_column(Text, default="")


Index("ix_deliveries_notice_channel", Delivery.notice_id, Delivery.recipient_id, Delivery.channel)


class Verification(Base):
    """The morning check of a forecast against the observed minimum (or maximum)."""

    __tablename__ = "verifications"

    id: Mapped[int] = mapped_column(primary_key=True)
    forecast_id: Mapped[int] = mapped_column(ForeignKey("forecasts.id", ondelete="CASCADE"), unique=True)
    block_id: Mapped[int] = mapped_column(ForeignKey("blocks.id", ondelete="CASCADE"), index=True)
    kind: Mapped[str] = mapped_column(String(10), default="frost")
    night: Mapped[dt.date] = mapped_column(Date)
    observed_c: Mapped[float | None] = mapped_column(Float, nullable=True)
    forecast_c: Mapped[float | None] = mapped_column(Float, nullable=True)
    error_c: Mapped[float | None] = mapped_column(Float, nullable=True)
    verified_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    detail: Mapped[dict[str, Any]] = mapped_column(default=dict)


class RunRecord(Base):
    """One scheduled or manual run (evening, update, morning), for restart safety."""

    __tablename__ = "runs"
    __table_args__ = (UniqueConstraint("key"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    #: e.g. "evening:2026-04-12:farm:block-ids-hash"
    key: Mapped[str] = mapped_column(String(300))
    kind: Mapped[str] = mapped_column(String(20))
    night: Mapped[dt.date] = mapped_column(Date)
    started_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    finished_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime, nullable=True)
    status: Mapped[str] = mapped_column(String(20), default="running")
    detail: Mapped[dict[str, Any]] = mapped_column(default=dict)


class RunClaim(Base):
    """A planned run offered to every host serving the database; one host claims it at a time.

    ``key`` is the run's key (:attr:`advisory.schedule.PlannedRun.key`, the same on every host).
    ``state``: ``pending`` (offered), ``running`` (claimed by ``host``, kept alive by its
    ``heartbeat_at``), ``done`` (marked in the transaction that marks the run finished), ``failed``
    (gave up after a bounded number of attempts).  ``due_at`` is the wall time to start it (the
    planned time, or its place on a rehearsal's compressed clock); ``run_at`` the run's logical clock.
    """

    __tablename__ = "run_claims"
    __table_args__ = (UniqueConstraint("key"), Index("ix_run_claims_state_due", "state", "due_at"))

    id: Mapped[int] = mapped_column(primary_key=True)
    key: Mapped[str] = mapped_column(String(300))
    kind: Mapped[str] = mapped_column(String(20))
    night: Mapped[dt.date] = mapped_column(Date)
    run_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    due_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    block_ids: Mapped[list[int]] = mapped_column(JSON, default=list)
    state: Mapped[str] = mapped_column(String(12), default="pending")
    host: Mapped[str | None] = mapped_column(String(200), nullable=True)
    heartbeat_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime, nullable=True)
    attempts: Mapped[int] = mapped_column(Integer, default=0)
    finished_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime, nullable=True)
    error: Mapped[str | None] = mapped_column(Text, nullable=True)


class WebUser(Base):
    """A person who signs in to the web console: an agent (given farms, or all) or a grower (one farm)."""

    __tablename__ = "web_users"

    id: Mapped[int] = mapped_column(primary_key=True)
    username: Mapped[str] = mapped_column(String(80), unique=True)
    #: An argon2 hash (never the password).
    password_hash: Mapped[str] = mapped_column(String(200))
    #: "agent" or "grower"
    role: Mapped[str] = mapped_column(String(10))
    #: An agent who sees every farm.
    all_farms: Mapped[bool] = mapped_column(Boolean, default=False)
    #: A grower's own farm.
    farm_id: Mapped[int | None] = mapped_column(ForeignKey("farms.id", ondelete="CASCADE"), nullable=True)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class WebUserFarm(Base):
    """A farm given to an agent."""

    __tablename__ = "web_user_farms"

    user_id: Mapped[int] = mapped_column(ForeignKey("web_users.id", ondelete="CASCADE"), primary_key=True)
    farm_id: Mapped[int] = mapped_column(ForeignKey("farms.id", ondelete="CASCADE"), primary_key=True)


class AuditEntry(Base):
    """One change made through the web console: who, when, what."""

    __tablename__ = "audit_log"

    id: Mapped[int] = mapped_column(primary_key=True)
    at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    #: The user's name as it was (kept when the user is removed).
    username: Mapped[str] = mapped_column(String(80))
    farm_id: Mapped[int] = mapped_column(ForeignKey("farms.id", ondelete="CASCADE"), index=True)
    block_id: Mapped[int | None] = mapped_column(ForeignKey("blocks.id", ondelete="CASCADE"), nullable=True,
                                                 index=True)
    #: "stage", "recipient" or "resend"
    action: Mapped[str] = mapped_column(String(20))
    #: What changed, in words.
    summary: Mapped[str] = mapped_column(Text, default="")
    detail: Mapped[dict[str, Any]] = mapped_column(default=dict)
