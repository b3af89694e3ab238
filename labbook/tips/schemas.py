"""Request and answer shapes of the tips API (DESIGN.md §4).

Numbers may be sent in the unit the field name carries or as strings with a unit ("32.8 kHz",
"1.8 kN/m"); answers carry the unit of the name. Times need a zone (Z or an offset) and are
answered in UTC.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from ninja import Schema
from pydantic import Field

from labbook.core.schemas import AwareTime, quantity
from labbook.tips.models import Conditioning, Tip

Frequency = quantity("Hz", positive=True)
Stiffness = quantity("N/m", positive=True)


class TipIn(Schema):
    name: str = Field(min_length=1, max_length=100)
    material: str = Field(min_length=1, max_length=50, description="W, PtIr, Au, Cr, …")
    origin: Tip.Origin = Tip.Origin.OTHER
    identifier: str = Field("", max_length=100)
    preparation: str = Field("", description="how it was made, e.g. etched in 2 M NaOH")
    prepared_at: AwareTime | None = None
    notes: str = ""
    sensor_kind: Tip.SensorKind = Field(
        Tip.SensorKind.NONE, description="empty for an STM tip; tuning_fork or cantilever"
    )
    resonance_frequency_hz: Frequency | None = None
    resonance_frequency_nominal_hz: Frequency | None = None
    quality_factor: float | None = Field(None, gt=0)
    stiffness_n_per_m: Stiffness | None = None
    stiffness_nominal_n_per_m: Stiffness | None = None
    stiffness_method: str = Field("", max_length=100)


class TipFilters(Schema):
    material: str | None = Field(None, description="e.g. W, PtIr")
    origin: Tip.Origin | None = None
    q: str | None = Field(None, description="text in the name or identifier")


class MountOut(Schema):
    id: int
    tip: int = Field(alias="tip_id")
    instrument: int = Field(alias="instrument_id")
    start: datetime
    end: datetime | None
    notes: str
    mounted_by: int | None = Field(None, alias="mounted_by_id")


class MountCreatedOut(MountOut):
    closed_previous: MountOut | None = Field(
        None, description="the instrument's open mount this one closed (close_previous)"
    )


class MountIn(Schema):
    instrument: int
    start: AwareTime | None = Field(None, description="default: now")
    end: AwareTime | None = Field(None, description="leave out while the tip is mounted")
    close_previous: bool = Field(
        True,
        description="end the instrument's open mount of another tip at this start "
        "(it had to come out for this one to go in); false refuses any overlap",
    )
    notes: str = ""


class MountEndIn(Schema):
    end: AwareTime | None = Field(None, description="default: now")


class ConditioningIn(Schema):
    kind: Conditioning.Kind
    at: AwareTime | None = Field(None, description="default: now")
    params: dict[str, Any] = Field(
        default_factory=dict,
        description="units in the key names: voltage_v, current_a, duration_s, depth_m, "
        'resistance_ohm …, numbers or strings with units ("100 V", "2 nm"); words: species, '
        "place, method, verified_by, gas, notes. A functionalisation names its species.",
    )
    outcome: str = ""
    instrument: int | None = Field(
        None, description="only needed when the tip was in no scanner at that time"
    )


class ConditioningOut(Schema):
    id: int
    tip: int = Field(alias="tip_id")
    instrument: int = Field(alias="instrument_id")
    kind: str
    at: datetime
    params: dict[str, Any]
    params_raw: dict[str, Any]
    outcome: str
    performed_by: int | None = Field(None, alias="performed_by_id")


class TipOut(Schema):
    id: int
    name: str
    material: str
    origin: str
    identifier: str
    preparation: str
    prepared_at: datetime | None
    notes: str
    sensor_kind: str
    resonance_frequency_hz: float | None
    resonance_frequency_nominal_hz: float | None
    quality_factor: float | None
    stiffness_n_per_m: float | None
    stiffness_nominal_n_per_m: float | None
    stiffness_method: str
    retired_at: datetime | None


class TipListOut(TipOut):
    current_mount: MountOut | None = None

    @staticmethod
    def resolve_current_mount(obj: Tip):
        current = getattr(obj, "current_mounts", None)
        return current[0] if current else None


class StateOut(Schema):
    at: datetime
    mount: MountOut | None
    events: list[ConditioningOut] = Field(description="conditioning since the mount, oldest first")
    apex_species: str | None = Field(
        None, description="what the apex carries: the last functionalisation not since reshaped"
    )


class InstrumentTipOut(StateOut):
    tip: TipOut | None = Field(None, description="null when no tip was mounted")


class TipDetailOut(TipOut):
    current_mount: MountOut | None
    state: StateOut


class TipFileOut(Schema):
    """A dataset the tip produced, with the links stored at ingestion."""

    id: int
    sha256: str
    kind: str
    status: str
    original_name: str
    acquired_at: datetime | None
    bias_v: float | None
    setpoint_a: float | None
    sample: int | None = Field(None, alias="sample_id")
    instrument: int | None = Field(None, alias="instrument_id")
