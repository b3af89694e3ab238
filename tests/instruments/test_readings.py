"""Bulk readings: idempotent, converted to the channel's unit, bad rows rejected one by one."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import pytest

from labbook.instruments.actions import create_channel, record_event
from labbook.instruments.models import Reading

pytestmark = pytest.mark.django_db

T0 = datetime(2026, 3, 2, 9, 0, tzinfo=UTC)


@pytest.fixture
def gauge(instrument, manager):
    return create_channel(
        instrument, name="prep ion gauge", quantity="pressure", unit="mbar", gas="N2", actor=manager
    )


@pytest.fixture
def head(instrument, manager):
    return create_channel(
        instrument,
        name="STM head",
        quantity="temperature",
        unit="K",
        expected_interval_s=600,
        actor=manager,
    )


def iso(t: datetime) -> str:
    return t.isoformat().replace("+00:00", "Z")


def test_a_batch_is_stored_and_resending_it_doubles_nothing(member, gauge, api_as):
    api = api_as(member)
    batch = [
        {"channel": gauge.pk, "t": iso(T0 + timedelta(minutes=i)), "value": 2e-10 + i * 1e-12}
        for i in range(50)
    ]
    first = api.post("/readings", batch).json()
    assert first == {"accepted": 50, "inserted": 50, "duplicates": 0, "rejected": []}
    again = api.post("/readings", batch).json()
    assert again == {"accepted": 50, "inserted": 0, "duplicates": 50, "rejected": []}
    assert Reading.objects.filter(channel=gauge).count() == 50


def test_values_with_units_are_converted_to_the_channel_unit(member, gauge, head, api_as):
    rows = [
        {"channel": gauge.pk, "t": iso(T0), "value": "1e-8 Torr"},
        {"channel": gauge.pk, "t": iso(T0 + timedelta(seconds=1)), "value": "1e-6 Pa"},
        {"channel": gauge.pk, "t": "2026-03-02T10:00:02+01:00", "value": "3e-10"},
        {"channel": head.pk, "t": iso(T0), "value": "-268.95 degC"},
        {"channel": head.pk, "t": iso(T0 + timedelta(seconds=1)), "value": 4.6},
    ]
    assert api_as(member).post("/readings", rows).json()["inserted"] == 5
    stored = dict(Reading.objects.filter(channel=gauge).values_list("t", "value"))
    # 1 Torr = 101325/760 Pa exactly (REFERENCES.md §5; scipy.constants.torr), 1 mbar = 100 Pa.
    assert stored[T0] == pytest.approx(1e-8 * 101325 / 760 / 100, rel=1e-12)
    assert stored[T0 + timedelta(seconds=1)] == pytest.approx(1e-8, rel=1e-12)
    assert stored[T0 + timedelta(seconds=2)] == 3e-10  # +01:00 stored as 09:00:02 UTC
    temperatures = sorted(Reading.objects.filter(channel=head).values_list("value", flat=True))
    assert temperatures == pytest.approx([4.2, 4.6])  # -268.95 °C = 4.20 K (0 °C = 273.15 K)


def test_bad_rows_are_rejected_with_their_index_and_the_good_ones_kept(member, gauge, head, api_as):
    rows = [
        {"channel": gauge.pk, "t": iso(T0), "value": 2e-10},
        {"channel": gauge.pk, "t": iso(T0), "value": "3 K"},
        {"channel": 999_999, "t": iso(T0), "value": 1},
        {"channel": gauge.pk, "t": "2026-03-02T09:00:05", "value": 1e-10},
        {"channel": gauge.pk, "t": "yesterday", "value": 1e-10},
        {"channel": head.pk, "t": iso(T0), "value": "4.5 kelvins-ish"},
        {"channel": head.pk, "t": iso(T0), "value": None},
        "not an object",
        {"channel": head.pk, "t": iso(T0), "value": 4.5, "colour": "blue"},
        {"channel": head.pk, "t": iso(T0 + timedelta(seconds=3)), "value": 4.5},
    ]
    body = api_as(member).post("/readings", rows).json()
    assert (body["accepted"], body["inserted"]) == (2, 2)
    errors = {item["index"]: item["error"] for item in body["rejected"]}
    assert sorted(errors) == [1, 2, 3, 4, 5, 6, 7, 8]
    assert (
        "cannot be converted to K" not in errors[1] and "cannot be converted to mbar" in errors[1]
    )
    assert "channel 999999 does not exist" in errors[2]
    assert "has no time zone" in errors[3]
    assert "not an ISO 8601 instant" in errors[4]
    assert "unknown unit 'kelvins-ish'" in errors[5]
    assert "unknown field(s) colour" in errors[8]
    assert Reading.objects.count() == 2


def test_scoped_token_writes_only_its_instruments_channels(
    manager, instrument, other_instrument, gauge, api_as
):
    elsewhere = create_channel(
        other_instrument, name="gauge", quantity="pressure", unit="mbar", actor=manager
    )
    api = api_as(manager, instrument=instrument)
    body = api.post(
        "/readings",
        [
            {"channel": gauge.pk, "t": iso(T0), "value": 1e-10},
            {"channel": elsewhere.pk, "t": iso(T0), "value": 1e-10},
        ],
    ).json()
    assert body["inserted"] == 1
    assert body["rejected"] == [
        {"index": 1, "error": f"this token may write only records of instrument {instrument.pk}"}
    ]


def test_read_only_token_cannot_post_readings(member, gauge, api_as):
    response = api_as(member, read_only=True).post(
        "/readings", [{"channel": gauge.pk, "t": iso(T0), "value": 1}]
    )
    assert response.status_code == 403


def test_a_body_that_is_not_a_list_is_a_clear_error(member, api_as):
    response = api_as(member).post("/readings", {"channel": 1})
    assert response.status_code == 422
    assert "JSON list" in response.json()["detail"]


def test_state_at_an_instant_with_age_flags_and_ranges(
    member, manager, instrument, gauge, head, api_as
):
    api = api_as(member)
    api.post(
        "/readings",
        [
            {"channel": gauge.pk, "t": iso(T0), "value": 2e-10},
            {
                "channel": gauge.pk,
                "t": iso(T0 + timedelta(minutes=30)),
                "value": 5e-6,
            },  # sputtering
            {"channel": head.pk, "t": iso(T0), "value": 4.5},
        ],
    )
    record_event(
        instrument,
        kind="cryogen_transfer",
        start=T0 + timedelta(minutes=40),
        end=T0 + timedelta(minutes=55),
        summary="LHe top-up",
        actor=member,
    )

    before = api.get(
        f"/instruments/{instrument.pk}/state", at=iso(T0 + timedelta(minutes=10))
    ).json()
    channels = {c["name"]: c for c in before["channels"]}
    assert (
        channels["prep ion gauge"]["value"] == 2e-10 and channels["prep ion gauge"]["age_s"] == 600
    )
    # ISO 3529-1:2019 ranges (REFERENCES.md §5): 2e-10 mbar is ultra-high vacuum.
    assert channels["prep ion gauge"]["vacuum_range"]["name"] == "ultra-high"
    assert channels["STM head"]["flags"] == []
    assert before["flags"] == []

    later = api.get(
        f"/instruments/{instrument.pk}/state", at=iso(T0 + timedelta(hours=1, minutes=30))
    ).json()
    channels = {c["name"]: c for c in later["channels"]}
    # 5e-6 mbar is high vacuum (1e-8 to 1e-3 mbar): above UHV.
    assert channels["prep ion gauge"]["vacuum_range"]["name"] == "high"
    assert "above_uhv" in channels["prep ion gauge"]["flags"]
    # 90 min without a head reading, expected every 10 min: stale after 3 intervals.
    assert channels["STM head"]["flags"] == ["stale"]
    assert later["flags"] == ["after_cryogen_transfer", "pressure_above_uhv"]

    during = api.get(
        f"/instruments/{instrument.pk}/state", at=iso(T0 + timedelta(minutes=45))
    ).json()
    assert "cryogen_transfer_under_way" in during["flags"]
    long_after = api.get(
        f"/instruments/{instrument.pk}/state", at=iso(T0 + timedelta(hours=4))
    ).json()
    assert "after_cryogen_transfer" not in long_after["flags"]


def test_state_needs_an_aware_instant(member, instrument, api_as):
    response = api_as(member).get(f"/instruments/{instrument.pk}/state", at="2026-03-02T09:00:00")
    assert response.status_code == 422


def test_one_channels_readings_for_a_plot(member, gauge, api_as):
    api = api_as(member)
    api.post(
        "/readings",
        [
            {"channel": gauge.pk, "t": iso(T0 + timedelta(minutes=i)), "value": float(i)}
            for i in range(10)
        ],
    )
    body = api.get(
        f"/channels/{gauge.pk}/readings",
        since=iso(T0 + timedelta(minutes=2)),
        until=iso(T0 + timedelta(minutes=5)),
    ).json()
    assert [r["value"] for r in body["readings"]] == [2.0, 3.0, 4.0, 5.0]
    assert body["unit"] == "mbar"


def test_readings_land_in_their_years_partition_on_postgresql(gauge):
    from django.db import connection

    from labbook.instruments.partitions import ensure_partitions, existing_partitions

    if connection.vendor != "postgresql":
        pytest.skip("partitioning is PostgreSQL's")
    assert "instruments_reading_default" in existing_partitions()
    old = datetime(2015, 6, 1, tzinfo=UTC)  # no 2015 partition yet: the default takes it
    Reading.objects.create(channel=gauge, t=old, value=1e-9)
    Reading.objects.create(channel=gauge, t=T0, value=2e-10)

    def partition_of(t):
        with connection.cursor() as cursor:
            cursor.execute(
                "SELECT tableoid::regclass::text FROM instruments_reading WHERE t = %s", [t]
            )
            return cursor.fetchone()[0]

    assert partition_of(T0) == "instruments_reading_y2026"
    assert partition_of(old) == "instruments_reading_default"
    assert ensure_partitions(2015, 2015) == ["instruments_reading_y2015"]
    assert partition_of(old) == "instruments_reading_y2015"  # moved out of the default
    assert Reading.objects.filter(channel=gauge).count() == 2


def test_readings_from_a_reset_clock_are_refused(member, gauge, api_as):
    body = (
        api_as(member)
        .post(
            "/readings",
            [
                {"channel": gauge.pk, "t": "2000-01-01T00:00:00Z", "value": 1e-10},
                {"channel": gauge.pk, "t": "1980-01-01T00:00:00Z", "value": 1e-10},
                {"channel": gauge.pk, "t": "2999-01-01T00:00:00Z", "value": 1e-10},
            ],
        )
        .json()
    )
    assert body["inserted"] == 1  # 2000 is plausible history; 1980 and 2999 are not
    assert [r["index"] for r in body["rejected"]] == [1, 2]
    assert "in the future" in body["rejected"][1]["error"]


def test_an_oversized_body_is_a_json_413(member, gauge, api_as, settings):
    settings.DATA_UPLOAD_MAX_MEMORY_SIZE = 1000
    rows = [
        {"channel": gauge.pk, "t": iso(T0 + timedelta(seconds=i)), "value": 1e-10}
        for i in range(100)
    ]
    response = api_as(member).post("/readings", rows)
    assert response.status_code == 413
    assert "too large" in response.json()["detail"]


def test_a_load_lock_vent_does_not_flag_the_microscope_as_vented(
    member, manager, instrument, api_as
):
    from labbook.instruments.actions import add_chamber

    load_lock = add_chamber(instrument, name="load lock", kind="load_lock", actor=manager)
    record_event(
        instrument,
        kind="vent",
        start=T0,
        end=T0 + timedelta(minutes=20),
        chamber=load_lock,
        actor=member,
    )
    record_event(
        instrument,
        kind="vent",
        start=T0 + timedelta(hours=5),
        end=T0 + timedelta(hours=6),
        actor=member,
    )
    api = api_as(member)
    during_load = api.get(
        f"/instruments/{instrument.pk}/state", at=iso(T0 + timedelta(minutes=5))
    ).json()
    assert during_load["flags"] == ["load_lock_vented"]
    whole = api.get(
        f"/instruments/{instrument.pk}/state", at=iso(T0 + timedelta(hours=5, minutes=5))
    ).json()
    assert whole["flags"] == ["vented"]


def test_a_load_lock_between_loads_does_not_raise_the_above_uhv_flag(
    member, manager, instrument, api_as
):
    from labbook.instruments.actions import add_chamber

    load_lock = add_chamber(instrument, name="load lock", kind="load_lock", actor=manager)
    pirani = create_channel(
        instrument,
        name="load lock gauge",
        quantity="pressure",
        unit="mbar",
        chamber=load_lock,
        actor=manager,
    )
    api = api_as(member)
    api.post("/readings", [{"channel": pirani.pk, "t": iso(T0), "value": 7e-8}])
    state = api.get(f"/instruments/{instrument.pk}/state", at=iso(T0 + timedelta(minutes=1))).json()
    assert state["channels"][0]["flags"] == ["above_uhv"]  # the channel says what it reads
    assert state["flags"] == []  # but the microscope is not above UHV
