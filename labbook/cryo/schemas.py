"""Request and answer shapes of the cryostats API (DESIGN.md §4).

Numbers may be sent in the unit the field name carries or as strings with a unit ("12 L",
"30 m^3"); answers carry the unit of the name. Times need a zone and are answered in UTC.
"""

from __future__ import annotations

from datetime import date, datetime
from typing import Any

from ninja import Schema
from pydantic import Field

from labbook.core.schemas import AwareTime, quantity
from labbook.cryo.models import Cryogen

Litres = quantity("L", non_negative=True)
PositiveLitres = quantity("L", positive=True)
RoomVolume = quantity("m^3", positive=True)


class CryostatIn(Schema):
    instrument: int
    cryogen: Cryogen
    name: str = Field("", max_length=100, description="default: '<cryogen> bath'")
    capacity_l: PositiveLitres
    minimum_l: Litres
    level_channel: int
    fill_to_l: PositiveLitres | None = None
    calibration: dict[str, Any] | None = Field(
        None,
        description='reading → litres: {"kind": "linear", "litres_at_zero", "litres_at_full", '
        '"full_reading"} or {"kind": "table", "points": [[reading, litres], …]}; '
        "default linear from 0 L at 0 to the capacity at 100",
    )
    transfer_loss_fraction: float | None = Field(
        None, ge=0, le=0.95, description="default (common practice): 0.2 LHe, 0.1 LN2"
    )
    line_cooldown_l: Litres | None = Field(
        None, description="default (common practice): 1 L LHe, 0.5 L LN2"
    )
    price_per_l: float = Field(0.0, ge=0)
    currency: str = Field("EUR", min_length=3, max_length=3)
    lead_time_working_days: int = Field(5, ge=0, le=60)
    recovery_flow_channel: int | None = None
    oxygen_channel: int | None = None
    room_volume_m3: RoomVolume | None = None
    transfer_dewar_l: Litres | None = None


class CryostatOut(Schema):
    id: int
    instrument: int = Field(alias="instrument_id")
    name: str
    cryogen: str
    capacity_l: float
    minimum_l: float
    fill_to_l: float | None
    level_channel: int = Field(alias="level_channel_id")
    calibration: dict[str, Any] | None
    transfer_loss_fraction: float = Field(alias="loss_fraction")
    line_cooldown_l: float = Field(alias="cooldown_l")
    price_per_l: float
    currency: str
    lead_time_working_days: int
    recovery_flow_channel: int | None = Field(None, alias="recovery_flow_channel_id")
    oxygen_channel: int | None = Field(None, alias="oxygen_channel_id")
    room_volume_m3: float | None
    transfer_dewar_l: float | None
    retired_at: datetime | None


class BandOut(Schema):
    minimum_at_earliest: datetime | None = Field(
        description="when the minimum is reached at the rate + 2σ"
    )
    minimum_at_latest: datetime | None = Field(
        description="at the rate − 2σ (null if that rate is not positive)"
    )


class ForecastOut(Schema):
    cryostat: int
    cryogen: str
    at: datetime
    level_l: float
    level_read_at: datetime = Field(description="the last level reading the forecast uses")
    rate_l_per_day: float = Field(description="boil-off, positive = consumption")
    rate_uncertainty_l_per_day: float
    heat_load_w: float
    minimum_l: float
    minimum_at: datetime | None
    latest_safe_refill_at: datetime | None
    recommended_refill_at: datetime | None
    band: BandOut
    warning: str | None


class PlannedRefillOut(Schema):
    cryostat: int
    cryogen: str
    at: datetime
    level_before_l: float
    amount_l: float = Field(description="litres to transfer into the bath")
    order_l: float = Field(description="litres to order: amount with transfer losses")
    order_by: date
    cost: float
    in_working_hours: bool = Field(
        description="false when the calendar cannot fit it: someone must come in specially"
    )


class SkippedOut(Schema):
    cryostat: int
    reason: str


class PlanOut(Schema):
    at: datetime
    weeks: int
    time_zone: str
    refills: list[PlannedRefillOut]
    total_order_l: dict[str, float] = Field(description="litres to order per cryogen")
    cost: float
    order_by: dict[str, date] = Field(description="earliest order-by date per cryogen")
    skipped: list[SkippedOut] = Field(description="cryostats that could not be forecast, and why")


class RefillIn(Schema):
    at: AwareTime | None = Field(None, description="default: now")
    end: AwareTime | None = None
    transferred_l: Litres | None = Field(None, description="reached the bath")
    taken_l: Litres | None = Field(None, description="left the supply dewar")
    level_before_l: Litres | None = None
    level_after_l: Litres | None = None
    supply_dewar: str = Field("", max_length=100)
    notes: str = ""


class RefillOut(Schema):
    id: int
    cryostat: int = Field(alias="cryostat_id")
    at: datetime
    end: datetime | None
    transferred_l: float | None
    taken_l: float | None
    losses_l: float | None
    level_before_l: float | None
    level_after_l: float | None
    supply_dewar: str
    notes: str
    person: int | None = Field(None, alias="person_id")
    event: int | None = Field(None, alias="event_id")


class AlertOut(Schema):
    id: int
    cryostat: int = Field(alias="cryostat_id")
    kind: str
    state: str
    message: str
    details: dict[str, Any]
    opened_at: datetime
    last_seen_at: datetime
    cleared_at: datetime | None
    acknowledged_at: datetime | None
    acknowledged_by: int | None = Field(None, alias="acknowledged_by_id")


class RecoveryOut(Schema):
    since: datetime
    until: datetime
    gas_m3: float = Field(description="returned gas, m³ at 15 °C and 1 atm")
    recovered_liquid_l: float = Field(description="liquid-equivalent litres (637 L gas per L)")
    drawn_liquid_l: float = Field(description="liquid drawn from the supply dewars then")
    fraction: float | None
