"""Every state change of tips, their mounting periods and conditioning events: the one path views,
API, tasks and commands call.

Decisions (see also the API docs of ``labbook.tips.api``):

* **Overlapping mounts are refused**, naming the mount they clash with: a scanner holds one tip
  at a time and a tip is in one instrument at a time. Periods are half-open, so a new mount may
  start at the very instant the previous one ended.
* **Mounting a tip closes the instrument's open mount** (``close_previous=True``, the default):
  the old tip physically had to come out for the new one to go in, so the open period ends at
  the new start. Only an open mount of *that instrument* that started earlier is closed. A tip
  still open in *another* instrument is refused instead: when it left that microscope is not
  known, and guessing would put it in two places or neither. ``close_previous=False`` refuses
  any overlap.
* **Conditioning happens on a mounted tip**: its instrument is the one the tip sat in at ``at``.
  A tip that was in no scanner then (sputtered or annealed in a preparation chamber, stored in the
  carousel) is accepted only with the instrument given explicitly; an instrument that disagrees
  with the tip's mount is refused.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from django.core.exceptions import ValidationError
from django.db import transaction
from django.utils import timezone

from labbook.accounts.permissions import require_member
from labbook.core.records import save_record
from labbook.instruments.models import Instrument
from labbook.science.errors import ScienceInputError
from labbook.science.units import parse_quantity, unit_for_field
from labbook.tips import queries
from labbook.tips.models import Conditioning, Tip, TipMount

# Units the general suffix table (labbook.science.units) does not know, checked first because
# "_n_per_m" also ends in "_m".
_EXTRA_SUFFIX_UNITS = (("_n_per_m", "newton / meter"), ("_ohm", "ohm"))

#: Parameters of conditioning that are words, not quantities.
TEXT_PARAMS = frozenset({"species", "place", "method", "verified_by", "gas", "notes"})

#: The parameters the lab usually records, with their units (any key ending in a unit suffix
#: is read the same way: "bias_v", "temperature_k", "pressure_mbar" …).
KNOWN_PARAMS: dict[str, str] = {
    "voltage_v": "volt",
    "current_a": "ampere",
    "duration_s": "second",
    "depth_m": "meter",
    "resistance_ohm": "ohm",
}


def _unit_of_param(key: str) -> str | None:
    lowered = key.lower()
    for suffix, unit in _EXTRA_SUFFIX_UNITS:
        if lowered.endswith(suffix):
            return unit
    if key in KNOWN_PARAMS:
        return KNOWN_PARAMS[key]
    try:
        return unit_for_field(key)
    except ScienceInputError:
        return None


def normalise_params(params: Mapping[str, Any] | None, *, kind: str) -> dict[str, Any]:
    """Conditioning parameters in the unit their key names: ``{"voltage_v": "100 V",
    "depth_m": "2 nm"}`` → ``{"voltage_v": 100.0, "depth_m": 2e-09}``.

    Keys ending in a unit suffix are quantities (a number in that unit, or a string with any
    unit pint converts to it); the words in ``TEXT_PARAMS`` are text; anything else is kept as
    given if it is a plain value. Raises ``ValidationError`` naming every bad parameter as
    ``params.<key>``.
    """
    params = dict(params or {})
    normalised: dict[str, Any] = {}
    errors: dict[str, str] = {}
    for key, value in params.items():
        name = f"params.{key}"
        unit = _unit_of_param(key)
        if isinstance(value, dict | list):
            errors[name] = "give one value per parameter (a number, a quantity or a word)"
        elif key in TEXT_PARAMS:
            if not isinstance(value, str) or not value.strip():
                errors[name] = "must be a word or phrase, e.g. CO"
            else:
                normalised[key] = value.strip()
        elif unit is not None:
            try:
                normalised[key] = parse_quantity(value, unit, field=key)
            except ScienceInputError as exc:
                errors[name] = str(exc).removeprefix(f"{key}: ")
        else:
            normalised[key] = value
    if kind == Conditioning.Kind.FUNCTIONALISATION and "species" not in params:
        errors["params.species"] = "a functionalisation names what the apex picked up, e.g. CO"
    if errors:
        raise ValidationError(errors)
    return normalised


def _when(at: datetime) -> str:
    return f"{at.astimezone(UTC):%Y-%m-%d %H:%M} UTC"


def describe_mount(mount: TipMount) -> str:
    """A mount in words for an error message: which, where, from when to when."""
    until = "still mounted" if mount.end is None else f"until {_when(mount.end)}"
    return (
        f"mount #{mount.pk}: tip {mount.tip} in {mount.instrument} "
        f"from {_when(mount.start)}, {until}"
    )


@transaction.atomic
def create_tip(
    *,
    name: str,
    material: str,
    origin: str = Tip.Origin.OTHER,
    identifier: str = "",
    preparation: str = "",
    prepared_at: datetime | None = None,
    notes: str = "",
    sensor_kind: str = "",
    resonance_frequency_hz: float | None = None,
    resonance_frequency_nominal_hz: float | None = None,
    quality_factor: float | None = None,
    stiffness_n_per_m: float | None = None,
    stiffness_nominal_n_per_m: float | None = None,
    stiffness_method: str = "",
    actor,
) -> Tip:
    require_member(actor)
    tip = Tip(
        name=name,
        material=material,
        origin=origin,
        identifier=identifier,
        preparation=preparation,
        prepared_at=prepared_at,
        notes=notes,
        sensor_kind=sensor_kind,
        resonance_frequency_hz=resonance_frequency_hz,
        resonance_frequency_nominal_hz=resonance_frequency_nominal_hz,
        quality_factor=quality_factor,
        stiffness_n_per_m=stiffness_n_per_m,
        stiffness_nominal_n_per_m=stiffness_nominal_n_per_m,
        stiffness_method=stiffness_method,
        created_by=actor if getattr(actor, "is_authenticated", False) else None,
    )
    return save_record(tip, actor)


@dataclass(frozen=True)
class Mounted:
    """The outcome of mounting a tip: the new mount, and the mount it closed, if any."""

    mount: TipMount
    closed_previous: TipMount | None = None


def _refuse_overlaps(
    mount_start: datetime, mount_end: datetime | None, *, instrument: Instrument, tip: Tip
) -> None:
    checks = (
        (
            queries.overlapping_mounts(start=mount_start, end=mount_end, instrument=instrument),
            "{instrument} holds one tip at a time and overlaps {mount}",
        ),
        (
            queries.overlapping_mounts(start=mount_start, end=mount_end, tip=tip),
            "a tip is in one instrument at a time and overlaps {mount}",
        ),
    )
    for clashing, message in checks:
        other = clashing.first()
        if other is None:
            continue
        # Name the end of the new period that falls inside the other one.
        field = "start" if other.covers(mount_start) else "end"
        raise ValidationError(
            {field: message.format(instrument=instrument, mount=describe_mount(other))}
        )


@transaction.atomic
def mount_tip(
    tip: Tip,
    instrument: Instrument,
    *,
    start: datetime,
    end: datetime | None = None,
    close_previous: bool = True,
    notes: str = "",
    actor,
) -> Mounted:
    """Put ``tip`` into ``instrument``'s scanner from ``start`` (until ``end``, or open).

    With ``close_previous`` an open mount of another tip on this instrument that started
    earlier ends at ``start`` (module docstring); every other overlap is refused.
    """
    require_member(actor)
    if tip.is_retired:
        raise ValidationError({"tip": f"tip {tip} is retired and goes into no scanner"})
    if end is not None and end <= start:
        raise ValidationError({"end": "a mount ends after it starts"})
    # Serialise concurrent mounts of this tip. The partial unique constraints (one open mount
    # per tip and per instrument) and, on PostgreSQL, the exclusion constraints back this up.
    Tip.objects.select_for_update().filter(pk=tip.pk).first()
    closed = None
    if close_previous:
        previous = (
            TipMount.objects.select_for_update()
            .filter(
                instrument=instrument, end__isnull=True, retired_at__isnull=True, start__lt=start
            )
            .exclude(tip=tip)
            .first()
        )
        if previous is not None:
            previous.end = start
            closed = save_record(previous, actor)
    _refuse_overlaps(start, end, instrument=instrument, tip=tip)
    mount = TipMount(
        tip=tip,
        instrument=instrument,
        start=start,
        end=end,
        notes=notes,
        mounted_by=actor if getattr(actor, "is_authenticated", False) else None,
    )
    return Mounted(mount=save_record(mount, actor), closed_previous=closed)


@transaction.atomic
def unmount_tip(mount: TipMount, *, end: datetime | None = None, actor) -> TipMount:
    """The tip came out of the scanner at ``end`` (now by default)."""
    require_member(actor)
    mount = (
        TipMount.objects.select_for_update().select_related("tip", "instrument").get(pk=mount.pk)
    )
    end = end or timezone.now()
    if mount.end is not None:
        raise ValidationError({"end": f"{describe_mount(mount)}: it has already ended"})
    if end <= mount.start:
        raise ValidationError({"end": f"a mount ends after it starts ({_when(mount.start)})"})
    mount.end = end
    return save_record(mount, actor)


def conditioning_instrument(
    tip: Tip, at: datetime, instrument: Instrument | None = None
) -> Instrument:
    """Where a conditioning event at ``at`` happened: the instrument the tip was mounted in,
    or the one given when it was in no scanner (module docstring). Raises ``ValidationError``
    on ``instrument`` otherwise."""
    mount = queries.mount_of(tip, at)
    if mount is None:
        if instrument is None:
            raise ValidationError(
                {
                    "instrument": (
                        f"tip {tip} was in no scanner at {_when(at)}; give the instrument where "
                        "it was conditioned (e.g. in its preparation chamber)"
                    )
                }
            )
        return instrument
    if instrument is not None and instrument.pk != mount.instrument_id:
        raise ValidationError(
            {"instrument": f"the tip was mounted elsewhere then ({describe_mount(mount)})"}
        )
    return mount.instrument


@transaction.atomic
def record_conditioning(
    tip: Tip,
    *,
    kind: str,
    at: datetime | None = None,
    params: Mapping[str, Any] | None = None,
    outcome: str = "",
    instrument: Instrument | None = None,
    actor,
) -> Conditioning:
    """Log a field emission, pulse, indentation, pick-up … done to ``tip`` at ``at``."""
    require_member(actor)
    at = at or timezone.now()
    where = conditioning_instrument(tip, at, instrument)
    event = Conditioning(
        tip=tip,
        instrument=where,
        kind=kind,
        at=at,
        params=normalise_params(params, kind=kind),
        params_raw=dict(params or {}),
        outcome=outcome,
        performed_by=actor if getattr(actor, "is_authenticated", False) else None,
    )
    return save_record(event, actor)
