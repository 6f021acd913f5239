"""SQLAlchemy 2.0 typed models: the queue, conditions, plans, outcomes and re-plan orders.

Column types follow the annotations (``Base.type_annotation_map``): every ``datetime`` is
stored as naive UTC and read back as aware UTC (``UTCDateTime``), so SQLite and PostgreSQL
behave alike; ``dict`` is a JSON column; a request's status and an outcome's result are their
enums' values, held to them by a CHECK constraint (portable: no database enum type). The
Alembic migrations in ``db/migrations/`` must agree with these models (tests/test_db.py compares
them).
"""

from __future__ import annotations

from datetime import date, datetime, timezone
from typing import Any

from sqlalchemy import (
    JSON, DateTime, Enum, Float, ForeignKey, Index, MetaData, String, Text, TypeDecorator, UniqueConstraint,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship

from scheduler.model.request import OutcomeResult, RequestStatus
from scheduler.model.timegrid import stored_utc, utcnow  # noqa: F401  (models' default timestamps; re-exported for storage)

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
        return None if value is None else stored_utc(value)

    def process_result_value(self, value, dialect):
        if value is None:
            return None
        return value.replace(tzinfo=timezone.utc)


def _text_enum(cls: type, name: str) -> Enum:
    """An enum stored as its values in VARCHAR(16) with a CHECK constraint named ``name``."""
    return Enum(cls, name=name, native_enum=False, create_constraint=True, length=16, validate_strings=True,
                values_callable=lambda e: [m.value for m in e])


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING)
    type_annotation_map = {
        float: Float(),  # SQLAlchemy 2.1 would default to Double; the schema says FLOAT
        datetime: UTCDateTime(),
        dict[str, Any]: JSON(),
        RequestStatus: _text_enum(RequestStatus, "status"),
        OutcomeResult: _text_enum(OutcomeResult, "result"),
    }


class Program(Base):
    __tablename__ = "program"

    id: Mapped[int] = mapped_column(primary_key=True)
    code: Mapped[str] = mapped_column(String(64), unique=True)
    pi: Mapped[str] = mapped_column(String(200))
    hours_allocated: Mapped[float] = mapped_column(default=0.0)
    weight: Mapped[float] = mapped_column(default=1.0)
    tier: Mapped[int] = mapped_column(default=2, server_default="2")  # 1 = most important; tiers are strict
    created_at: Mapped[datetime] = mapped_column(default=utcnow)

    requests: Mapped[list[Request]] = relationship(back_populates="program")


class Request(Base):
    __tablename__ = "request"
    __table_args__ = (Index("ix_request_status", "status"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    program_id: Mapped[int] = mapped_column(ForeignKey("program.id"))
    target: Mapped[str] = mapped_column(String(200))
    ra_deg: Mapped[float]
    dec_deg: Mapped[float]
    band: Mapped[str] = mapped_column(String(16))
    instrument: Mapped[str | None] = mapped_column(String(64))
    exposure_s: Mapped[float]
    repeats: Mapped[int] = mapped_column(default=1)
    min_spacing_s: Mapped[float | None]
    resolution_arcsec: Mapped[float | None]
    max_seeing_arcsec: Mapped[float | None]
    max_pwv_mm: Mapped[float | None]
    max_airmass: Mapped[float | None]
    min_moon_sep_deg: Mapped[float | None]
    max_moon_illum: Mapped[float | None]
    min_sky_mag: Mapped[float | None]
    max_cloud_mag: Mapped[float | None]
    not_before: Mapped[datetime | None]
    not_after: Mapped[datetime | None]
    period_epoch: Mapped[datetime | None]
    period_days: Mapped[float | None]
    phase_min: Mapped[float | None]
    phase_max: Mapped[float | None]
    priority: Mapped[int] = mapped_column(default=5)
    too: Mapped[bool] = mapped_column(default=False)
    status: Mapped[RequestStatus] = mapped_column(default=RequestStatus.QUEUED)
    completed_repeats: Mapped[int] = mapped_column(default=0)
    partial_exposure_s: Mapped[float] = mapped_column(default=0.0)
    guide_star_sep_arcsec: Mapped[float | None]  # AO guide star distance (0: on axis)
    body: Mapped[str | None] = mapped_column(String(16))  # moving target: a planet or Pluto
    ephemeris_csv: Mapped[str | None] = mapped_column(Text)  # moving target: the PI's table, canonical CSV
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    updated_at: Mapped[datetime] = mapped_column(default=utcnow, onupdate=utcnow)

    program: Mapped[Program] = relationship(back_populates="requests")


class ConditionsReport(Base):
    __tablename__ = "conditions_report"

    id: Mapped[int] = mapped_column(primary_key=True)
    issued_at: Mapped[datetime]
    received_at: Mapped[datetime] = mapped_column(default=utcnow)
    source: Mapped[str] = mapped_column(String(200))
    n_samples: Mapped[int]

    samples: Mapped[list[ConditionsSample]] = relationship(
        back_populates="report", order_by="ConditionsSample.time", cascade="all, delete-orphan"
    )


class ConditionsSample(Base):
    __tablename__ = "conditions_sample"
    __table_args__ = (UniqueConstraint("report_id", "time", name="uq_conditions_sample_report_time"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    report_id: Mapped[int] = mapped_column(ForeignKey("conditions_report.id"))
    time: Mapped[datetime]
    seeing_arcsec: Mapped[float | None]
    pwv_mm: Mapped[float | None]
    cloud_mag: Mapped[float | None]
    wind_ms: Mapped[float | None]
    humidity_pct: Mapped[float | None]
    dome_open: Mapped[bool | None]
    coherence_time_ms: Mapped[float | None]  # tau0 at 500 nm, zenith

    report: Mapped[ConditionsReport] = relationship(back_populates="samples")


class Plan(Base):
    """One immutable plan version. Exactly one plan per night is active at a time."""

    __tablename__ = "plan"
    __table_args__ = (Index("ix_plan_night_active", "night", "active"),)

    id: Mapped[int] = mapped_column(primary_key=True)  # the version number
    night: Mapped[date]
    created_at: Mapped[datetime] = mapped_column(default=utcnow)
    reason: Mapped[str] = mapped_column(Text)
    planned_from: Mapped[datetime]  # start of the night or the re-plan time
    conditions_report_id: Mapped[int | None] = mapped_column(ForeignKey("conditions_report.id"))
    solver_status: Mapped[str] = mapped_column(String(32))
    objective: Mapped[float]
    bound: Mapped[float]
    gap: Mapped[float]
    runtime_s: Mapped[float]
    greedy_objective: Mapped[float | None]
    active: Mapped[bool] = mapped_column(default=True)
    superseded_at: Mapped[datetime | None]
    previous_id: Mapped[int | None] = mapped_column(ForeignKey("plan.id"))
    summary: Mapped[dict[str, Any]] = mapped_column(default=dict)  # figures, unscheduled, timings
    diff: Mapped[dict[str, Any]] = mapped_column(default=dict)  # added / dropped / moved vs previous

    entries: Mapped[list[PlanEntry]] = relationship(
        back_populates="plan", order_by="PlanEntry.start", cascade="all, delete-orphan"
    )


class PlanEntry(Base):
    __tablename__ = "plan_entry"

    id: Mapped[int] = mapped_column(primary_key=True)
    plan_id: Mapped[int] = mapped_column(ForeignKey("plan.id"), index=True)
    request_id: Mapped[int] = mapped_column(ForeignKey("request.id"), index=True)
    execution: Mapped[int] = mapped_column(default=0)
    start: Mapped[datetime]
    end: Mapped[datetime]
    slew_s: Mapped[float]  # axis motion from the previous entry
    transition_s: Mapped[float] = mapped_column(default=0.0)  # slew + settle + instrument/filter change
    setup_s: Mapped[float]
    exposure_s: Mapped[float]
    airmass_start: Mapped[float]
    airmass_end: Mapped[float]
    fwhm_arcsec: Mapped[float]
    pwv_mm: Mapped[float]
    transmission: Mapped[float]
    merit: Mapped[float]
    moon_sep_deg: Mapped[float | None]
    value: Mapped[float] = mapped_column(default=0.0)
    fixed: Mapped[bool] = mapped_column(default=False)  # kept from the previous plan
    # factors of the value (model/plan.PlanEntry); plans stored before them read as the defaults
    tier: Mapped[int] = mapped_column(default=2, server_default="2")
    urgency: Mapped[float] = mapped_column(default=1.0, server_default="1")
    opportunities_left: Mapped[int | None]
    balance: Mapped[float] = mapped_column(default=1.0, server_default="1")
    ra_deg: Mapped[float | None]  # the target's position at the start (a moving target's own)
    dec_deg: Mapped[float | None]
    strehl: Mapped[float | None]  # predicted AO Strehl ratio at the start
    surface_efficiency: Mapped[float | None]  # dish Ruze efficiency at the start

    plan: Mapped[Plan] = relationship(back_populates="entries")


class Outcome(Base):
    __tablename__ = "outcome"

    id: Mapped[int] = mapped_column(primary_key=True)
    request_id: Mapped[int] = mapped_column(ForeignKey("request.id"), index=True)
    plan_entry_id: Mapped[int | None] = mapped_column(ForeignKey("plan_entry.id"))
    result: Mapped[OutcomeResult]
    exposure_s: Mapped[float | None]
    note: Mapped[str | None] = mapped_column(Text)
    recorded_at: Mapped[datetime] = mapped_column(default=utcnow)
    charge: Mapped[str] = mapped_column(String(16), default="program", server_default="program")  # none | program
    charged_h: Mapped[float] = mapped_column(default=0.0, server_default="0")  # hours charged to the program


class Opportunity(Base):
    """Cache of the remaining-opportunities count (constraints/opportunities.py): whether a
    request (by the hash of the fields the count reads) has a feasible start on a night, for a
    configuration (by hash). Rows of past nights are removed as nights go by."""

    __tablename__ = "opportunity"

    config_key: Mapped[str] = mapped_column(String(16), primary_key=True)
    request_key: Mapped[str] = mapped_column(String(16), primary_key=True)
    night: Mapped[date] = mapped_column(primary_key=True)
    feasible: Mapped[bool]


class ReplanOrder(Base):
    __tablename__ = "replan_order"

    id: Mapped[int] = mapped_column(primary_key=True)
    requested_by: Mapped[str] = mapped_column(String(200))
    reason: Mapped[str] = mapped_column(Text)
    requested_at: Mapped[datetime] = mapped_column(default=utcnow)
    taken_at: Mapped[datetime | None]
    done_at: Mapped[datetime | None]
    result: Mapped[str | None] = mapped_column(Text)
    plan_id: Mapped[int | None] = mapped_column(ForeignKey("plan.id"))


class ServiceLock(Base):
    """One row per database while a service holds it (stale when the heartbeat is old)."""

    __tablename__ = "service_lock"

    name: Mapped[str] = mapped_column(String(32), primary_key=True)
    holder: Mapped[str] = mapped_column(String(200))  # host:pid:token
    pid: Mapped[int]
    host: Mapped[str] = mapped_column(String(200))
    started_at: Mapped[datetime]
    heartbeat_at: Mapped[datetime]


class SeasonOutlook(Base):
    """One subject's result of a stored season outlook (`season simulate --store`): a request's
    probability of completion or a program's completion spread. Rows of one run share
    ``computed_at`` and the run's parameters; the newest row per subject is its outlook."""

    __tablename__ = "season_outlook"
    __table_args__ = (Index("ix_season_outlook_request", "request_id", "computed_at"),
                      Index("ix_season_outlook_program", "program_id", "computed_at"))

    id: Mapped[int] = mapped_column(primary_key=True)
    computed_at: Mapped[datetime]
    season_from: Mapped[date]
    season_to: Mapped[date]
    realizations: Mapped[int]
    seed: Mapped[int]
    effort: Mapped[int]
    weather: Mapped[str] = mapped_column(String(200))  # the climatology file's name
    request_id: Mapped[int | None] = mapped_column(ForeignKey("request.id"))
    program_id: Mapped[int | None] = mapped_column(ForeignKey("program.id"))
    p_complete: Mapped[float | None]  # requests
    completion_mean: Mapped[float | None]  # programs
    completion_p10: Mapped[float | None]
    completion_p90: Mapped[float | None]
    charged_h_mean: Mapped[float | None]
