"""The instrument pages through the real views: the state with its flags and vacuum ranges,
the state at an instant, the plots (PNG, cached, min/max band, log scale for pressure, events
shaded), the event form, and who may see them."""

from __future__ import annotations

import io
import re
from datetime import UTC, timedelta
from unittest import mock

import numpy as np
import pytest
from django.core.cache import cache
from django.test import Client
from django.utils import timezone
from PIL import Image

from labbook.instruments import actions
from labbook.instruments.models import InstrumentEvent
from labbook.instruments.readings import insert_readings
from labbook.web import plots

pytestmark = pytest.mark.django_db


def as_client(user) -> Client:
    client = Client()
    client.force_login(user)
    return client


def html(response) -> str:
    return response.content.decode()


def local_input(instant) -> str:
    """A time as a datetime-local input sends it (tests run with TIME_ZONE = UTC)."""
    return instant.astimezone(UTC).strftime("%Y-%m-%dT%H:%M")


def row_of(response, channel) -> str:
    match = re.search(rf'<tr[^>]*id="channel-{channel.pk}".*?</tr>', html(response), re.S)
    assert match, f"no row for {channel.name}"
    return match.group(0)


@pytest.fixture(autouse=True)
def _fresh_cache():
    cache.clear()
    yield
    cache.clear()


@pytest.fixture
def now():
    return timezone.now().replace(microsecond=0)


@pytest.fixture
def channels(manager, instrument):
    prep = actions.add_chamber(instrument, name="prep", kind="preparation", actor=manager)
    lock = actions.add_chamber(instrument, name="load lock", kind="load_lock", actor=manager)
    return {
        "prep": actions.create_channel(
            instrument,
            name="prep ion gauge",
            quantity="pressure",
            unit="mbar",
            gas="N2",
            chamber=prep,
            expected_interval_s=60,
            actor=manager,
        ),
        "lock": actions.create_channel(
            instrument,
            name="load lock gauge",
            quantity="pressure",
            unit="mbar",
            chamber=lock,
            expected_interval_s=60,
            actor=manager,
        ),
        "head": actions.create_channel(
            instrument,
            name="STM head",
            quantity="temperature",
            unit="K",
            expected_interval_s=60,
            actor=manager,
        ),
        "lhe": actions.create_channel(
            instrument, name="LHe level", quantity="cryogen_level", unit="%", actor=manager
        ),
    }


@pytest.fixture
def logged(channels, now):
    """An hour of readings a minute apart; the head thermometer stopped two hours ago."""
    rows = []
    for minute in range(61):
        t = now - timedelta(minutes=60 - minute)
        rows.append((channels["prep"].pk, t, 2.0e-10))
        rows.append((channels["lock"].pk, t, 3.0e-7))
        rows.append((channels["lhe"].pk, t, 60.0 - minute * 0.01))
    rows.append((channels["head"].pk, now - timedelta(hours=2), 4.52))
    insert_readings(rows)
    return channels


# --- the state --------------------------------------------------------------------------------


def test_instrument_page_shows_every_channel_with_its_flags_and_vacuum_range(
    member, manager, instrument, logged, now
):
    actions.record_event(
        instrument,
        kind="bakeout",
        start=now - timedelta(hours=5),
        summary="all chambers at 130 °C",
        actor=manager,
    )
    page = as_client(member).get(f"/instruments/{instrument.pk}/")
    assert page.status_code == 200
    text = html(page)

    prep = row_of(page, logged["prep"])
    assert "2.0×10⁻¹⁰\u00a0mbar" in prep
    assert "ultra-high vacuum (UHV)" in prep
    assert "above UHV" not in prep and "stale" not in prep

    lock = row_of(page, logged["lock"])
    assert "3.0×10⁻⁷\u00a0mbar" in lock
    assert "high vacuum (HV)" in lock and "ultra-high" not in lock
    assert "above UHV" in lock

    head = row_of(page, logged["head"])
    assert "4.52\u00a0K" in head and "tag-stale" in head and "2\u00a0h ago" in head
    assert "59.4\u00a0%" in row_of(page, logged["lhe"])

    # The convention the ranges follow is named once, in the column head.
    assert "ISO 3529-1:2019" in text
    assert "Bake-out under way" in text
    assert "Pressure above UHV" in text
    # The state refreshes itself with htmx while it shows "now".
    assert 'hx-trigger="every 30s"' in text
    assert f'hx-get="/instruments/{instrument.pk}/state/"' in text
    assert "Europe/Berlin" not in text and "UTC" in text  # the lab's zone, named


def test_the_state_part_alone_is_what_htmx_swaps_in(member, instrument, logged):
    part = as_client(member).get(f"/instruments/{instrument.pk}/state/")
    assert part.status_code == 200
    text = html(part)
    assert text.lstrip().startswith("<section") and "<html" not in text
    assert 'id="instrument-state"' in text and 'hx-trigger="every 30s"' in text
    assert "ultra-high vacuum (UHV)" in text


def test_state_at_an_earlier_instant_shows_the_readings_then(
    member, manager, instrument, logged, now
):
    actions.record_event(
        instrument,
        kind="cryogen_transfer",
        start=now - timedelta(hours=2, minutes=30),
        end=now - timedelta(hours=1, minutes=50),
        details={"cryogen": "LHe", "taken_l": 11.0},
        actor=manager,
    )
    at = now - timedelta(minutes=90)
    page = as_client(member).get(f"/instruments/{instrument.pk}/", {"at": local_input(at)})
    assert page.status_code == 200
    text = html(page)
    assert "State at" in text and "Back to now" in text
    assert 'hx-trigger="every 30s"' not in text  # a past instant does not refresh
    # Before the hour of logging began, only the head thermometer had read anything.
    assert "4.52\u00a0K" in row_of(page, logged["head"])
    assert "no readings by then" in row_of(page, logged["prep"])
    # 20 minutes after the helium transfer ended.
    assert "Within 2 h after a cryogen transfer" in text


def test_a_transfer_under_way_is_flagged(member, manager, instrument, logged, now):
    actions.record_event(
        instrument,
        kind="cryogen_transfer",
        start=now - timedelta(minutes=10),
        details={"cryogen": "LN2"},
        actor=manager,
    )
    text = html(as_client(member).get(f"/instruments/{instrument.pk}/"))
    assert "LN₂ transfer under way" in text


def test_the_instrument_list_shows_each_instrument_and_its_flags(member, instrument, logged):
    page = as_client(member).get("/instruments/")
    assert page.status_code == 200
    assert f'href="/instruments/{instrument.pk}/"' in html(page)
    assert "Pressure above UHV" in html(page)


def test_the_page_asks_for_a_plot_of_every_channel_over_the_chosen_window(
    member, instrument, logged
):
    client = as_client(member)
    page = client.get(f"/instruments/{instrument.pk}/")
    text = html(page)
    for channel in logged.values():
        assert f"/instruments/{instrument.pk}/channels/{channel.pk}/plot.png?since=" in text
    assert 'aria-current="true"><span class="visually-hidden">last </span>24 h' in text
    week = html(client.get(f"/instruments/{instrument.pk}/", {"range": "7d"}))
    assert 'aria-current="true"><span class="visually-hidden">last </span>7 d' in week
    custom = client.get(
        f"/instruments/{instrument.pk}/", {"since": "2026-03-01T08:00", "until": "2026-03-02T08:00"}
    )
    assert "since=2026-03-01T08%3A00%3A00Z&amp;until=2026-03-02T08%3A00%3A00Z" in html(custom)
    backwards = client.get(
        f"/instruments/{instrument.pk}/", {"since": "2026-03-02T08:00", "until": "2026-03-01T08:00"}
    )
    assert "must be after the start" in html(backwards)


# --- plots ------------------------------------------------------------------------------------


def plot_url(instrument, channel, since, until, **size) -> str:
    params = {
        "since": since.astimezone(UTC).isoformat().replace("+00:00", "Z"),
        "until": until.astimezone(UTC).isoformat().replace("+00:00", "Z"),
        **{k: str(v) for k, v in size.items()},
    }
    query = "&".join(f"{k}={v}" for k, v in params.items())
    return f"/instruments/{instrument.pk}/channels/{channel.pk}/plot.png?{query}"


def test_the_plot_is_a_png_of_the_size_asked_for_and_the_second_is_from_the_cache(
    member, instrument, logged, now
):
    client = as_client(member)
    until = now + timedelta(minutes=1)
    url = plot_url(instrument, logged["prep"], now - timedelta(hours=2), until, w=500, h=220)
    with mock.patch.object(
        plots, "render_channel_figure", wraps=plots.render_channel_figure
    ) as render:
        first = client.get(url)
        assert first.status_code == 200
        assert first["Content-Type"] == "image/png"
        assert "private" in first["Cache-Control"]
        image = Image.open(io.BytesIO(first.content))
        assert image.format == "PNG" and image.size == (500, 220)
        assert render.call_count == 1

        second = client.get(url)
        assert second.status_code == 200 and second.content == first.content
        assert render.call_count == 1  # matplotlib was not asked again

        # A newer reading in the window is a new picture (the key holds the latest reading's
        # time; a reading sent late for an older instant waits for the cache entry to expire).
        insert_readings([(logged["prep"].pk, now + timedelta(seconds=30), 5.0e-9)])
        third = client.get(url)
        assert third.status_code == 200 and third.content != first.content
        assert render.call_count == 2


def test_a_high_density_plot_is_drawn_at_twice_the_pixels(member, instrument, logged, now):
    url = plot_url(instrument, logged["head"], now - timedelta(hours=3), now, w=720, h=480, scale=2)
    response = as_client(member).get(url)
    assert response.status_code == 200
    assert Image.open(io.BytesIO(response.content)).size == (720, 480)


@pytest.mark.parametrize(
    ("query", "message"),
    [
        ("until=2026-03-02T10:00:00Z&w=500&h=200", "since is missing"),
        ("since=2026-03-02T09:00:00&until=2026-03-02T10:00:00Z", "no time zone"),
        ("since=2026-03-02T09:00:00Z&until=2026-03-02T08:00:00Z", "after since"),
        ("since=2026-03-02T09:00:00Z&until=2026-03-02T10:00:00Z&w=10", "w is 240 to 2400"),
        ("since=2026-03-02T09:00:00Z&until=2026-03-02T10:00:00Z&h=tall", "whole number"),
        ("since=2016-03-02T09:00:00Z&until=2026-03-02T10:00:00Z", "at most 731 days"),
    ],
)
def test_a_plot_asked_for_wrongly_is_refused_saying_why(member, instrument, logged, query, message):
    response = as_client(member).get(
        f"/instruments/{instrument.pk}/channels/{logged['prep'].pk}/plot.png?{query}"
    )
    assert response.status_code == 400
    assert message in response.content.decode()


def test_a_channel_of_another_instrument_has_no_plot_here(
    member, manager, instrument, other_instrument, logged, now
):
    foreign = actions.create_channel(
        other_instrument, name="gauge", quantity="pressure", unit="mbar", actor=manager
    )
    url = plot_url(instrument, foreign, now - timedelta(hours=1), now)
    assert as_client(member).get(url).status_code == 404


def test_pressure_is_drawn_on_a_log_axis_with_units_and_events_shaded(
    manager, instrument, logged, now
):
    actions.record_event(
        instrument,
        kind="bakeout",
        start=now - timedelta(minutes=50),
        end=now - timedelta(minutes=20),
        actor=manager,
    )
    since, until = now - timedelta(hours=1), now
    size = plots.PlotSize(600, 250)
    pressure = plots.render_channel_figure(
        plots.channel_series(logged["prep"], since, until, size.buckets), size
    )
    ax = pressure.axes[0]
    assert ax.get_yscale() == "log"
    assert ax.get_ylabel() == "pressure / mbar"
    assert ax.get_xlabel() == "time in UTC"
    assert [t.get_text() for t in ax.get_legend().get_texts()] == ["bake-out"]
    assert len(ax.patches) >= 1  # the shaded span

    temperature = plots.render_channel_figure(
        plots.channel_series(logged["head"], since - timedelta(hours=2), until, size.buckets), size
    )
    assert temperature.axes[0].get_yscale() == "linear"
    assert temperature.axes[0].get_ylabel() == "temperature / K"
    level = plots.render_channel_figure(
        plots.channel_series(logged["lhe"], since, until, size.buckets), size
    )
    assert level.axes[0].get_ylabel() == "level / %"


def test_the_time_axis_names_the_lab_zone(settings, manager, instrument, logged, now):
    settings.TIME_ZONE = "Europe/Berlin"
    size = plots.PlotSize(600, 250)
    series = plots.channel_series(logged["prep"], now - timedelta(hours=1), now, size.buckets)
    label = plots.render_channel_figure(series, size).axes[0].get_xlabel()
    assert label.startswith("time in Europe/Berlin (") and ("CET" in label or "CEST" in label)


def test_a_burst_of_one_reading_survives_into_the_plotted_band(manager, instrument, now):
    gauge = actions.create_channel(
        instrument, name="gauge", quantity="pressure", unit="mbar", actor=manager
    )
    start = now - timedelta(days=1)
    rows = [(gauge.pk, start + timedelta(seconds=10 * i), 1.5e-10) for i in range(8_640)]
    rows[4_321] = (gauge.pk, rows[4_321][1], 4.0e-6)
    insert_readings(rows)
    series = plots.channel_series(gauge, start, now, 1_000)
    assert series.readings == 8_640
    assert series.t.size <= 1_000  # reduced: about 9 readings a bucket
    assert series.high.max() == 4.0e-6 and np.median(series.high) == 1.5e-10


# --- the event form ---------------------------------------------------------------------------


def test_the_event_form_logs_a_bakeout_with_its_zones_and_base_pressure(
    member, instrument, logged, now
):
    client = as_client(member)
    start, end = now - timedelta(days=3), now - timedelta(days=1)
    response = client.post(
        f"/instruments/{instrument.pk}/events/",
        {
            "kind": "bakeout",
            "start": local_input(start),
            "end": local_input(end),
            "summary": "bake-out of both chambers",
            "zone_1_name": "chamber",
            "zone_1_temperature": "135 degC",
            "zone_2_name": "cryostat",
            "zone_2_temperature": "325",
            "base_pressure": "2e-10 mbar",
            "base_pressure_gauge": "prep ion gauge",
            "cryogen": "LHe",  # another kind's input, left over: not stored
            "taken": "12 L",
        },
    )
    event = InstrumentEvent.objects.get(instrument=instrument, kind="bakeout")
    assert response.status_code == 302
    assert response["Location"] == f"/instruments/events/{event.pk}/"
    assert event.start == start.replace(second=0) and event.end == end.replace(second=0)
    assert event.recorded_by == member
    assert event.details["zone_temperatures_k"] == {
        "chamber": pytest.approx(408.15),
        "cryostat": 325.0,
    }
    assert event.details["base_pressure_mbar"] == pytest.approx(2e-10)
    assert event.details["base_pressure_gauge"] == "prep ion gauge"
    assert event.details["as_typed"]["zone chamber"] == "135 degC"
    assert "cryogen" not in event.details and "taken_l" not in event.details
    assert event.history.filter(history_user=member).exists()

    detail = client.get(response["Location"], follow=True)
    text = html(detail)
    assert "Bake-out logged." in text
    assert "408\u00a0K (135\u00a0°C)" in text and "2.0×10⁻¹⁰\u00a0mbar" in text
    assert "Plots around it" in text
    # On the instrument page among the recent events.
    assert f'href="/instruments/events/{event.pk}/"' in html(
        client.get(f"/instruments/{instrument.pk}/")
    )


def test_an_event_form_with_mistakes_comes_back_with_them_beside_the_inputs(
    member, instrument, logged, now
):
    response = as_client(member).post(
        f"/instruments/{instrument.pk}/events/",
        {
            "kind": "bakeout",
            "start": local_input(now - timedelta(hours=1)),
            "end": local_input(now - timedelta(hours=3)),
            "zone_1_name": "chamber",
            "zone_1_temperature": "135 furlongs",
            "base_pressure": "2e-10 mbar",
        },
    )
    assert response.status_code == 200
    text = html(response)
    assert not InstrumentEvent.objects.exists()
    assert "Not logged yet" in text
    assert 'id="id_zone_1_temperature-error"' in text
    assert 'value="135 furlongs"' in text and 'value="2e-10 mbar"' in text  # kept as typed
    assert 'aria-invalid="true"' in text


def test_an_event_that_ends_before_it_starts_is_refused_by_the_action(
    member, instrument, logged, now
):
    lock = logged["lock"].chamber
    response = as_client(member).post(
        f"/instruments/{instrument.pk}/events/",
        {
            "kind": "vent",
            "start": local_input(now - timedelta(hours=1)),
            "end": local_input(now - timedelta(hours=3)),
            "chamber": lock.pk,
            "vented_with": "Ar",
        },
    )
    assert response.status_code == 200
    assert "the event ends before it starts" in html(response)
    assert f'<option value="{lock.pk}" selected>' in html(response)
    assert 'value="Ar"' in html(response)


def test_a_load_lock_vent_names_its_chamber_and_does_not_flag_the_instrument_vented(
    member, instrument, logged, now
):
    lock = logged["lock"].chamber
    client = as_client(member)
    response = client.post(
        f"/instruments/{instrument.pk}/events/",
        {
            "kind": "vent",
            "start": local_input(now - timedelta(minutes=10)),
            "chamber": lock.pk,
            "vented_with": "N2",
        },
    )
    assert response.status_code == 302
    event = InstrumentEvent.objects.get(kind="vent")
    assert event.chamber == lock and event.details == {"vented_with": "N2"}
    text = html(client.get(f"/instruments/{instrument.pk}/"))
    assert "Load lock vented" in text
    assert ">Vented<" not in text


def test_a_cryogen_transfer_keeps_its_cryogen_and_litres(member, instrument, logged, now):
    as_client(member).post(
        f"/instruments/{instrument.pk}/events/",
        {
            "kind": "cryogen_transfer",
            "start": local_input(now - timedelta(minutes=40)),
            "end": local_input(now - timedelta(minutes=5)),
            "cryogen": "LHe",
            "taken": "12 L",
            "level_before": "18",
            "level_after": "95 %",
        },
    )
    event = InstrumentEvent.objects.get(kind="cryogen_transfer")
    assert event.details["cryogen"] == "LHe"
    assert event.details["taken_l"] == pytest.approx(12.0)
    assert event.details["level_before_pct"] == pytest.approx(18.0)
    assert event.details["level_after_pct"] == pytest.approx(95.0)


# --- who may look -----------------------------------------------------------------------------


@pytest.mark.parametrize(
    "path",
    ["/instruments/", "/instruments/{pk}/", "/instruments/{pk}/state/", "/instruments/{pk}/plot"],
)
def test_anonymous_visitors_are_sent_to_log_in_and_outsiders_are_refused(
    outsider, instrument, logged, now, path
):
    if path.endswith("/plot"):
        path = plot_url(instrument, logged["prep"], now - timedelta(hours=1), now)
    path = path.format(pk=instrument.pk)
    anonymous = Client().get(path)
    assert anonymous.status_code == 302 and anonymous["Location"].startswith("/login/")
    assert as_client(outsider).get(path).status_code == 403


def test_outsiders_cannot_log_events(outsider, instrument, now):
    response = as_client(outsider).post(
        f"/instruments/{instrument.pk}/events/",
        {"kind": "vent", "start": local_input(now)},
    )
    assert response.status_code == 403
    assert not InstrumentEvent.objects.exists()
