"""The demo microscope LTM-1: its chambers and logged channels, and the fast writer for the
year of readings the demo logs on them.

Records go through ``labbook.instruments.actions`` so their history names the lab manager as
the one who set them up. Readings are bulk facts from a logger (they carry no history), so
they are written straight into their table: COPY on PostgreSQL, one ``executemany`` of
``INSERT OR IGNORE`` on SQLite.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime

import numpy as np
from django.db import IntegrityError, connection, transaction

from labbook.demo import DemoContext
from labbook.instruments.actions import add_chamber, create_channel, create_instrument
from labbook.instruments.models import Chamber, Channel, Instrument, Reading

INSTRUMENT_NAME = "LTM-1"
INSTRUMENT_DESCRIPTION = (
    "Low-temperature STM / nc-AFM of the demo surface-physics group (invented for the demo). "
    "The scan head sits at about 4.5 K in a 12 L liquid-helium bath cryostat inside a 24 L "
    "liquid-nitrogen shield. The preparation chamber has an argon sputter gun, a sample heater, "
    "evaporators and a leak valve for gas doses; samples and tips come in through the load lock."
)
INSTRUMENT_TIME_ZONE = "Europe/Berlin"

PREP = "preparation chamber"
MICROSCOPE = "microscope chamber"
LOAD_LOCK = "load lock"
CHAMBERS: tuple[tuple[str, str], ...] = (
    (PREP, Chamber.Kind.PREPARATION),
    (MICROSCOPE, Chamber.Kind.MICROSCOPE),
    (LOAD_LOCK, Chamber.Kind.LOAD_LOCK),
)

TEN_MINUTES = 600
# The helium level meter is a heated superconducting wire: reading it boils off helium, so
# it is read only every half hour (FIELD.md §3); the nitrogen meter is logged alongside.
HALF_AN_HOUR = 1800


@dataclass(frozen=True)
class ChannelSpec:
    name: str
    quantity: str
    unit: str
    chamber: str
    location: str
    series: str  # the generator in labbook.demo.readings.SERIES
    interval_s: int
    gas: str = ""


CHANNELS: tuple[ChannelSpec, ...] = (
    ChannelSpec(
        name="prep chamber ion gauge",
        quantity=Channel.Quantity.PRESSURE,
        unit="mbar",
        chamber=PREP,
        location="Bayard–Alpert ion gauge on the preparation chamber, N2-calibrated",
        series="prep_pressure",
        interval_s=TEN_MINUTES,
        gas="N2",
    ),
    ChannelSpec(
        name="microscope chamber ion gauge",
        quantity=Channel.Quantity.PRESSURE,
        unit="mbar",
        chamber=MICROSCOPE,
        location="Bayard–Alpert ion gauge on the microscope chamber, N2-calibrated",
        series="microscope_pressure",
        interval_s=TEN_MINUTES,
        gas="N2",
    ),
    ChannelSpec(
        name="load lock gauge",
        quantity=Channel.Quantity.PRESSURE,
        unit="mbar",
        chamber=LOAD_LOCK,
        location="combined Pirani / cold-cathode gauge on the load lock, N2-calibrated",
        series="load_lock_pressure",
        interval_s=TEN_MINUTES,
        gas="N2",
    ),
    ChannelSpec(
        name="STM head temperature",
        quantity=Channel.Quantity.TEMPERATURE,
        unit="K",
        chamber=MICROSCOPE,
        location="silicon diode on the STM head",
        series="head_temperature",
        interval_s=TEN_MINUTES,
    ),
    ChannelSpec(
        name="LN2 shield temperature",
        quantity=Channel.Quantity.TEMPERATURE,
        unit="K",
        chamber=MICROSCOPE,
        location="silicon diode on the radiation shield below the nitrogen tank",
        series="shield_temperature",
        interval_s=TEN_MINUTES,
    ),
    ChannelSpec(
        name="LHe bath level",
        quantity=Channel.Quantity.CRYOGEN_LEVEL,
        unit="%",
        chamber=MICROSCOPE,
        location="superconducting level meter in the helium bath, % of active length",
        series="lhe_level",
        interval_s=HALF_AN_HOUR,
    ),
    ChannelSpec(
        name="LN2 shield level",
        quantity=Channel.Quantity.CRYOGEN_LEVEL,
        unit="%",
        chamber=MICROSCOPE,
        location="capacitive level meter in the nitrogen tank",
        series="ln2_level",
        interval_s=HALF_AN_HOUR,
    ),
    ChannelSpec(
        name="He recovery flow",
        quantity=Channel.Quantity.OTHER,
        unit="L/min",
        chamber=MICROSCOPE,
        location="gas flow meter in the helium recovery line (gas at room temperature)",
        series="recovery_flow",
        interval_s=TEN_MINUTES,
    ),
)


def ensure_instrument(ctx: DemoContext) -> dict[str, int]:
    """LTM-1 with its three chambers and its channels, each got by its natural key (name per
    instrument) or created through the actions, acting as the lab manager. A record that
    already exists is left as it is: someone may have edited it on purpose."""
    actor = ctx.manager
    created = {"instrument": 0, "chambers": 0, "channels": 0}
    instrument = Instrument.objects.filter(name=INSTRUMENT_NAME).first()
    if instrument is None:
        instrument = create_instrument(
            name=INSTRUMENT_NAME,
            description=INSTRUMENT_DESCRIPTION,
            time_zone=INSTRUMENT_TIME_ZONE,
            actor=actor,
        )
        created["instrument"] = 1
    ctx.instrument = instrument
    for name, kind in CHAMBERS:
        chamber = Chamber.objects.filter(instrument=instrument, name=name).first()
        if chamber is None:
            chamber = add_chamber(instrument, name=name, kind=kind, actor=actor)
            created["chambers"] += 1
        ctx.chambers[name] = chamber
    for spec in CHANNELS:
        channel = Channel.objects.filter(instrument=instrument, name=spec.name).first()
        if channel is None:
            channel = create_channel(
                instrument,
                name=spec.name,
                quantity=spec.quantity,
                unit=spec.unit,
                location=spec.location,
                gas=spec.gas,
                chamber=ctx.chambers[spec.chamber],
                actor=actor,
            )
            created["channels"] += 1
        ctx.channels[spec.name] = channel
    ctx.report(
        f"instrument: {INSTRUMENT_NAME} with {len(CHAMBERS)} chambers and {len(CHANNELS)} "
        f"channels ({created['instrument']} instrument, {created['chambers']} chambers, "
        f"{created['channels']} channels new)"
    )
    return {"instruments": 1, "chambers": len(CHAMBERS), "channels": len(CHANNELS)}


# --- readings ---------------------------------------------------------------------------------


def _utc_strings(t_s: np.ndarray) -> np.ndarray:
    """'YYYY-MM-DD HH:MM:SS' in UTC for epoch seconds, vectorised. Whole seconds only: the
    demo's instants are whole multiples of the logging interval."""
    text = np.datetime_as_string(t_s.astype("datetime64[s]"), unit="s")
    return np.char.replace(text, "T", " ")


def insert_readings(channel_id: int, t_s: np.ndarray, values: np.ndarray) -> int:
    """Insert readings of one channel (instants as UTC epoch seconds); rows whose (channel, t)
    already exist are skipped, as the unique constraint on readings intends (a logger may send
    a batch twice). Returns how many rows were added."""
    if t_s.shape != values.shape:
        raise ValueError("one value per instant is needed")
    if t_s.size == 0:
        return 0
    with transaction.atomic():
        if connection.vendor == "postgresql":
            return _copy_postgresql(channel_id, t_s, values)
        if connection.vendor == "sqlite":
            return _insert_sqlite(channel_id, t_s, values)
        return _insert_orm(channel_id, t_s, values)


def _insert_sqlite(channel_id: int, t_s: np.ndarray, values: np.ndarray) -> int:
    stamps = _utc_strings(t_s).tolist()
    # Django's SQLite backend stores an aware datetime as naive UTC text: str(datetime). Check
    # the first instant against the backend's own adapter, so the unique constraint and the
    # ORM's lookups see exactly the text it would have written.
    first = connection.ops.adapt_datetimefield_value(datetime.fromtimestamp(int(t_s[0]), UTC))
    if first != stamps[0]:
        raise RuntimeError(f"SQLite datetime text changed: {first!r} != {stamps[0]!r}")
    rows = zip([channel_id] * len(stamps), stamps, values.tolist(), strict=True)
    with connection.cursor() as cursor:
        cursor.executemany(
            "INSERT OR IGNORE INTO instruments_reading (channel_id, t, value) VALUES (%s, %s, %s)",
            rows,
        )
        return max(cursor.rowcount, 0)


def _copy_postgresql(channel_id: int, t_s: np.ndarray, values: np.ndarray) -> int:
    stamps = (np.char.add(_utc_strings(t_s), "+00")).tolist()
    rows = list(zip([channel_id] * len(stamps), stamps, values.tolist(), strict=True))
    try:
        # The fast path: COPY straight into the table. The loader only asks for instants
        # outside the span the channel already has, so a clash means someone else wrote
        # meanwhile; then fall back to a staged copy that skips what exists.
        with transaction.atomic(), connection.cursor() as cursor:
            with cursor.cursor.copy(
                "COPY instruments_reading (channel_id, t, value) FROM STDIN"
            ) as copy:
                for row in rows:
                    copy.write_row(row)
            return len(rows)
    except (IntegrityError, connection.Database.IntegrityError):
        return _copy_postgresql_staged(rows)


def _copy_postgresql_staged(rows: list[tuple[int, str, float]]) -> int:
    """COPY into a temporary table, then INSERT … ON CONFLICT DO NOTHING: the semantics of
    ``bulk_create(ignore_conflicts=True)`` at COPY speed."""
    with connection.cursor() as cursor:
        raw = cursor.cursor
        raw.execute(
            "CREATE TEMPORARY TABLE demo_reading_stage "
            "(channel_id bigint, t timestamptz, value double precision) ON COMMIT DROP"
        )
        with raw.copy("COPY demo_reading_stage (channel_id, t, value) FROM STDIN") as copy:
            for row in rows:
                copy.write_row(row)
        raw.execute(
            "INSERT INTO instruments_reading (channel_id, t, value) "
            "SELECT channel_id, t, value FROM demo_reading_stage "
            "ON CONFLICT (channel_id, t) DO NOTHING"
        )
        added = raw.rowcount
        raw.execute("DROP TABLE demo_reading_stage")
        return max(added, 0)


def _insert_orm(channel_id: int, t_s: np.ndarray, values: np.ndarray) -> int:
    before = Reading.objects.filter(channel_id=channel_id).count()
    Reading.objects.bulk_create(
        (
            Reading(channel_id=channel_id, t=datetime.fromtimestamp(int(s), UTC), value=float(v))
            for s, v in zip(t_s.tolist(), values.tolist(), strict=True)
        ),
        batch_size=5000,
        ignore_conflicts=True,
    )
    return Reading.objects.filter(channel_id=channel_id).count() - before
