"""SQLAlchemy 2.0 typed models: the queue, conditions, plans, outcomes and re-plan orders.

Times are stored as naive UTC and read back as aware UTC (``UTCDateTime``), so SQLite and
PostgreSQL behave alike. The Alembic migrations in ``migrations/`` must agree with these
models (tests/test_db.py compares them).
"""

from __future__ import annotations

from datetime import date, datetime, timezone

from scheduler.model.timegrid import utcnow  # noqa: F401  (models' default timestamps; re-exported for storage)
from sqlalchemy import (
    Boolean, Date, DateTime, Float, ForeignKey, Index, Integer, MetaData, String, Text,
    TypeDecorator, UniqueConstraint,
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
    """Aware UTC datetimes in, aware UTC datetimes out; stored naive UTC."""

    impl = DateTime
    cache_ok = True

    def process_bind_param(self, value, dialect):
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetime given to a UTC column")
        return value.astimezone(timezone.utc).replace(tzinfo=None)

    def process_result_value(self, value, dialect):
        if value is None:
            return None
        return value.replace(tzinfo=timezone.utc)


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING)


class Program(Base):
    __tablename__ = "program"

    id: Mapped[int] = mapped_column(primary_key=True)
    code: Mapped[str] = mapped_column(String(64), unique=True)
    pi: Mapped[str] = mapped_column(String(200))
    hours_allocated: Mapped[float] = mapped_column(Float, default=0.0)
    weight: Mapped[float] = mapped_column(Float, default=1.0)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)

    requests: Mapped[list[Request]] = relationship(back_populates="program")


class Request(Base):
    __tablename__ = "request"
    __table_args__ = (Index("ix_request_status", "status"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    program_id: Mapped[int] = mapped_column(ForeignKey("program.id"))
    target: Mapped[str] = mapped_column(String(200))
    ra_deg: Mapped[float] = mapped_column(Float)
    dec_deg: Mapped[float] = mapped_column(Float)
    band: Mapped[str] = mapped_column(String(16))
    instrument: Mapped[str | None] = mapped_column(String(64))
    exposure_s: Mapped[float] = mapped_column(Float)
    repeats: Mapped[int] = mapped_column(Integer, default=1)
    min_spacing_s: Mapped[float | None] = mapped_column(Float)
    resolution_arcsec: Mapped[float | None] = mapped_column(Float)
    max_seeing_arcsec: Mapped[float | None] = mapped_column(Float)
    max_pwv_mm: Mapped[float | None] = mapped_column(Float)
    max_airmass: Mapped[float | None] = mapped_column(Float)
    min_moon_sep_deg: Mapped[float | None] = mapped_column(Float)
    max_moon_illum: Mapped[float | None] = mapped_column(Float)
    min_sky_mag: Mapped[float | None] = mapped_column(Float)
    max_cloud_mag: Mapped[float | None] = mapped_column(Float)
    not_before: Mapped[datetime | None] = mapped_column(UTCDateTime)
    not_after: Mapped[datetime | None] = mapped_column(UTCDateTime)
    period_epoch: Mapped[datetime | None] = mapped_column(UTCDateTime)
    period_days: Mapped[float | None] = mapped_column(Float)
    phase_min: Mapped[float | None] = mapped_column(Float)
    phase_max: Mapped[float | None] = mapped_column(Float)
    priority: Mapped[int] = mapped_column(Integer, default=5)
    too: Mapped[bool] = mapped_column(Boolean, default=False)
    status: Mapped[str] = mapped_column(String(16), default="queued")
    completed_repeats: Mapped[int] = mapped_column(Integer, default=0)
    partial_exposure_s: Mapped[float] = mapped_column(Float, default=0.0)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    updated_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow, onupdate=utcnow)

    program: Mapped[Program] = relationship(back_populates="requests")


class ConditionsReport(Base):
    __tablename__ = "conditions_report"

    id: Mapped[int] = mapped_column(primary_key=True)
    issued_at: Mapped[datetime] = mapped_column(UTCDateTime)
    received_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    source: Mapped[str] = mapped_column(String(200))
    n_samples: Mapped[int] = mapped_column(Integer)

    samples: Mapped[list[ConditionsSample]] = relationship(
        back_populates="report", order_by="ConditionsSample.time", cascade="all, delete-orphan"
    )


class ConditionsSample(Base):
    __tablename__ = "conditions_sample"
    __table_args__ = (UniqueConstraint("report_id", "time", name="uq_conditions_sample_report_time"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    report_id: Mapped[int] = mapped_column(ForeignKey("conditions_report.id"))
    time: Mapped[datetime] = mapped_column(UTCDateTime)
    seeing_arcsec: Mapped[float | None] = mapped_column(Float)
    pwv_mm: Mapped[float | None] = mapped_column(Float)
    cloud_mag: Mapped[float | None] = mapped_column(Float)
    wind_ms: Mapped[float | None] = mapped_column(Float)
    humidity_pct: Mapped[float | None] = mapped_column(Float)
    dome_open: Mapped[bool | None] = mapped_column(Boolean)

    report: Mapped[ConditionsReport] = relationship(back_populates="samples")


class Plan(Base):
    """One immutable plan version. Exactly one plan per night is active at a time."""

    __tablename__ = "plan"
    __table_args__ = (Index("ix_plan_night_active", "night", "active"),)

    id: Mapped[int] = mapped_column(primary_key=True)  # the version number
    night: Mapped[date] = mapped_column(Date)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    reason: Mapped[str] = mapped_column(Text)
    planned_from: Mapped[datetime] = mapped_column(UTCDateTime)  # start of the night or the re-plan time
    conditions_report_id: Mapped[int | None] = mapped_column(ForeignKey("conditions_report.id"))
    solver_status: Mapped[str] = mapped_column(String(32))
    objective: Mapped[float] = mapped_column(Float)
    bound: Mapped[float] = mapped_column(Float)
    gap: Mapped[float] = mapped_column(Float)
    runtime_s: Mapped[float] = mapped_column(Float)
    greedy_objective: Mapped[float | None] = mapped_column(Float)
    active: Mapped[bool] = mapped_column(Boolean, default=True)
    superseded_at: Mapped[datetime | None] = mapped_column(UTCDateTime)
    previous_id: Mapped[int | None] = mapped_column(ForeignKey("plan.id"))
    summary_json: Mapped[str] = mapped_column(Text, default="{}")  # figures, unscheduled, timings
    diff_json: Mapped[str] = mapped_column(Text, default="{}")  # added / dropped / moved vs previous

    entries: Mapped[list[PlanEntry]] = relationship(
        back_populates="plan", order_by="PlanEntry.start", cascade="all, delete-orphan"
    )


class PlanEntry(Base):
    __tablename__ = "plan_entry"

    id: Mapped[int] = mapped_column(primary_key=True)
    plan_id: Mapped[int] = mapped_column(ForeignKey("plan.id"), index=True)
    request_id: Mapped[int] = mapped_column(ForeignKey("request.id"), index=True)
    execution: Mapped[int] = mapped_column(Integer, default=0)
    start: Mapped[datetime] = mapped_column(UTCDateTime)
    end: Mapped[datetime] = mapped_column(UTCDateTime)
    slew_s: Mapped[float] = mapped_column(Float)  # axis motion from the previous entry
    transition_s: Mapped[float] = mapped_column(Float, default=0.0)  # slew + settle + instrument/filter change
    setup_s: Mapped[float] = mapped_column(Float)
    exposure_s: Mapped[float] = mapped_column(Float)
    airmass_start: Mapped[float] = mapped_column(Float)
    airmass_end: Mapped[float] = mapped_column(Float)
    fwhm_arcsec: Mapped[float] = mapped_column(Float)
    pwv_mm: Mapped[float] = mapped_column(Float)
    transmission: Mapped[float] = mapped_column(Float)
    merit: Mapped[float] = mapped_column(Float)
    moon_sep_deg: Mapped[float | None] = mapped_column(Float)
    value: Mapped[float] = mapped_column(Float, default=0.0)
    fixed: Mapped[bool] = mapped_column(Boolean, default=False)  # kept from the previous plan

    plan: Mapped[Plan] = relationship(back_populates="entries")


class Outcome(Base):
    __tablename__ = "outcome"

    id: Mapped[int] = mapped_column(primary_key=True)
    request_id: Mapped[int] = mapped_column(ForeignKey("request.id"), index=True)
    plan_entry_id: Mapped[int | None] = mapped_column(ForeignKey("plan_entry.id"))
    result: Mapped[str] = mapped_column(String(16))  # done | failed | partial
    exposure_s: Mapped[float | None] = mapped_column(Float)
    note: Mapped[str | None] = mapped_column(Text)
    recorded_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)


class ReplanOrder(Base):
    __tablename__ = "replan_order"

    id: Mapped[int] = mapped_column(primary_key=True)
    requested_by: Mapped[str] = mapped_column(String(200))
    reason: Mapped[str] = mapped_column(Text)
    requested_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    taken_at: Mapped[datetime | None] = mapped_column(UTCDateTime)
    done_at: Mapped[datetime | None] = mapped_column(UTCDateTime)
    result: Mapped[str | None] = mapped_column(Text)
    plan_id: Mapped[int | None] = mapped_column(ForeignKey("plan.id"))


class ServiceLock(Base):
    """One row per database while a service holds it (stale when the heartbeat is old)."""

    __tablename__ = "service_lock"

    name: Mapped[str] = mapped_column(String(32), primary_key=True)
    holder: Mapped[str] = mapped_column(String(200))  # host:pid:token
    pid: Mapped[int] = mapped_column(Integer)
    host: Mapped[str] = mapped_column(String(200))
    started_at: Mapped[datetime] = mapped_column(UTCDateTime)
    heartbeat_at: Mapped[datetime] = mapped_column(UTCDateTime)


class SeasonOutlook(Base):
    """One subject's result of a stored season outlook (`season simulate --store`): a request's
    probability of completion or a program's completion spread. Rows of one run share
    ``computed_at`` and the run's parameters; the newest row per subject is its outlook."""

    __tablename__ = "season_outlook"
    __table_args__ = (Index("ix_season_outlook_request", "request_id", "computed_at"),
                      Index("ix_season_outlook_program", "program_id", "computed_at"))

    id: Mapped[int] = mapped_column(primary_key=True)
    computed_at: Mapped[datetime] = mapped_column(UTCDateTime)
    season_from: Mapped[date] = mapped_column(Date)
    season_to: Mapped[date] = mapped_column(Date)
    realizations: Mapped[int] = mapped_column(Integer)
    seed: Mapped[int] = mapped_column(Integer)
    effort: Mapped[int] = mapped_column(Integer)
    weather: Mapped[str] = mapped_column(String(200))  # the climatology file's name
    request_id: Mapped[int | None] = mapped_column(ForeignKey("request.id"))
    program_id: Mapped[int | None] = mapped_column(ForeignKey("program.id"))
    p_complete: Mapped[float | None] = mapped_column(Float)  # requests
    completion_mean: Mapped[float | None] = mapped_column(Float)  # programs
    completion_p10: Mapped[float | None] = mapped_column(Float)
    completion_p90: Mapped[float | None] = mapped_column(Float)
    charged_h_mean: Mapped[float | None] = mapped_column(Float)
