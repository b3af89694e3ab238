"""The min/max envelope of readings reduced in the database (instruments.queries.
reading_envelope), checked against numpy's per-bucket minimum and maximum over the same rows,
on whichever database the suite runs on (SQLite, or PostgreSQL with DATABASE_URL); its plan
uses the (channel_id, t) key; and the channel plot over a day, a month and a year through the
real view, cached under a key that moves with new readings, in a bounded number of queries."""

from __future__ import annotations

import io
from datetime import UTC, datetime, timedelta
from unittest import mock

import numpy as np
import pytest
from django.core.cache import cache
from django.db import connection
from django.test import Client
from django.utils import timezone
from PIL import Image

from labbook.instruments import actions, queries
from labbook.instruments.readings import insert_readings
from labbook.web import plots

pytestmark = pytest.mark.django_db

US = 1_000_000


@pytest.fixture(autouse=True)
def _fresh_cache():
    cache.clear()
    yield
    cache.clear()


def gauge(instrument, manager, name: str, **fields):
    return actions.create_channel(
        instrument, name=name, quantity="pressure", unit="mbar", actor=manager, **fields
    )


def epoch_us(t: datetime) -> int:
    """Exact integer microseconds since the epoch (no float on the way)."""
    delta = t - datetime(1970, 1, 1, tzinfo=UTC)
    return (delta.days * 86400 + delta.seconds) * US + delta.microseconds


def numpy_envelope(t_us: np.ndarray, values: np.ndarray, origin_us: int, width_us: int):
    """The expected envelope, computed here with numpy alone: bucket = floor((t - origin) /
    width) in integers, then per bucket min, max, first and last instant and count."""
    keep = np.isfinite(values)
    t_us, values = t_us[keep], values[keep]
    order = np.argsort(t_us, kind="stable")
    t_us, values = t_us[order], values[order]
    bucket = (t_us - origin_us) // width_us
    starts = np.flatnonzero(np.r_[True, bucket[1:] != bucket[:-1]])
    ends = np.r_[starts[1:], t_us.size] - 1
    return {
        "index": bucket[starts],
        "low": np.minimum.reduceat(values, starts),
        "high": np.maximum.reduceat(values, starts),
        "first": t_us[starts],
        "last": t_us[ends],
        "count": ends - starts + 1,
    }


def test_the_envelope_equals_numpys_per_bucket_min_and_max(manager, instrument):
    # Across a new year, so on PostgreSQL the query spans two yearly partitions; instants
    # carry microseconds and irregular steps, as loggers send them.
    a, b, c = (gauge(instrument, manager, name) for name in ("prep", "microscope", "lock"))
    since = datetime(2025, 12, 20, 6, 30, 12, 250_000, tzinfo=UTC)
    until = datetime(2026, 1, 10, 18, 0, 0, 500_000, tzinfo=UTC)
    rng = np.random.default_rng(20261201)
    rows, expected_rows = [], {a.pk: [], b.pk: []}
    for channel in (a, b, c):
        steps_us = rng.integers(5 * US, 120 * US, size=30_000)
        t_us = epoch_us(since) - 3600 * US + np.cumsum(steps_us)  # starts before the window
        # A logger outage of two days: a gap of empty buckets, not zeros.
        t_us = t_us[
            (t_us < epoch_us(since) + 5 * 86400 * US) | (t_us > epoch_us(since) + 7 * 86400 * US)
        ]
        values = 2e-10 * (1 + 0.2 * rng.standard_normal(t_us.size))
        values[rng.integers(0, t_us.size, size=5)] = 3e-6  # bursts of one reading
        values[7] = np.inf  # a gauge switched off: left out, as minmax_buckets leaves it
        instants = [datetime(1970, 1, 1, tzinfo=UTC) + timedelta(microseconds=int(x)) for x in t_us]
        for t, v in zip(instants, values.tolist(), strict=True):
            rows.append((channel.pk, t, v))
            if channel.pk in expected_rows and since <= t <= until:
                expected_rows[channel.pk].append((epoch_us(t), v))
        # The window's own edges belong to it.
        for t in (since, until):
            rows.append((channel.pk, t, 5e-10))
            if channel.pk in expected_rows:
                expected_rows[channel.pk].append((epoch_us(t), 5e-10))
    if connection.vendor == "postgresql":
        rows.append((a.pk, since + timedelta(hours=1, microseconds=3), float("nan")))
    insert_readings(rows)

    buckets = 1_300
    envelope = queries.reading_envelope([b.pk, a.pk, a.pk], since, until, buckets)

    # The grid: whole seconds, starting at or before since, reaching past until in at most
    # ``buckets`` buckets, and no wider than needed for that.
    origin_us, width_us = epoch_us(envelope.origin), int(envelope.width.total_seconds()) * US
    assert envelope.origin <= since < envelope.origin + timedelta(seconds=1)
    assert epoch_us(until) < origin_us + buckets * width_us
    assert epoch_us(until) >= origin_us + buckets * (width_us - US) - US
    assert set(envelope.channels) == {a.pk, b.pk}  # the third channel was not asked for

    for channel in (a, b):
        t_us = np.array([t for t, _ in expected_rows[channel.pk]], dtype=np.int64)
        values = np.array([v for _, v in expected_rows[channel.pk]])
        want = numpy_envelope(t_us, values, origin_us, width_us)
        got = envelope.channels[channel.pk]
        assert 1_000 < len(got) <= buckets  # the gap leaves buckets out
        assert [r.index for r in got] == want["index"].tolist()
        assert all(0 <= r.index < buckets for r in got)
        assert [r.low for r in got] == want["low"].tolist()
        assert [r.high for r in got] == want["high"].tolist()
        assert [epoch_us(r.first_t) for r in got] == want["first"].tolist()
        assert [epoch_us(r.last_t) for r in got] == want["last"].tolist()
        assert [r.count for r in got] == want["count"].tolist()
        assert max(r.high for r in got) == 3e-6  # every burst survives
        assert all(r.first_t.tzinfo is not None for r in got)


def test_an_envelope_with_no_channels_or_no_readings_is_empty(manager, instrument):
    empty = gauge(instrument, manager, "unused")
    now = timezone.now()
    assert queries.reading_envelope([], now - timedelta(days=1), now, 100).channels == {}
    found = queries.reading_envelope([empty.pk], now - timedelta(days=1), now, 100)
    assert found.channels == {empty.pk: []}


@pytest.mark.parametrize(
    ("since", "until", "buckets", "message"),
    [
        (datetime(2026, 1, 2, tzinfo=UTC), datetime(2026, 1, 1, tzinfo=UTC), 10, "before since"),
        (datetime(2026, 1, 1), datetime(2026, 1, 2, tzinfo=UTC), 10, "time zone"),  # noqa: DTZ001
        (datetime(2026, 1, 1, tzinfo=UTC), datetime(2026, 1, 2, tzinfo=UTC), 0, "buckets"),
        (datetime(2026, 1, 1, tzinfo=UTC), datetime(2026, 1, 2, tzinfo=UTC), 2.5, "buckets"),
    ],
)
def test_an_impossible_envelope_is_refused_saying_why(since, until, buckets, message):
    with pytest.raises(ValueError, match=message):
        queries.reading_envelope([1], since, until, buckets)


def test_the_envelope_query_walks_the_channel_time_key(manager, instrument):
    """On PostgreSQL an index (only) scan of the covering key (channel_id, t) INCLUDE (value)
    in the one partition the window touches; on SQLite a search of the composite key."""
    channels = [gauge(instrument, manager, f"gauge {i}") for i in range(4)]
    start = datetime(2026, 3, 1, tzinfo=UTC)
    rows = [
        (channel.pk, start + timedelta(minutes=i), 1e-10 + i * 1e-15)
        for channel in channels
        for i in range(20_000)
    ]
    insert_readings(rows)
    since, until = start + timedelta(days=2), start + timedelta(days=6)
    origin, width = queries.envelope_grid(since, until, 1_000)
    with connection.cursor() as cursor:
        if connection.vendor == "postgresql":
            cursor.execute("ANALYZE instruments_reading")
            cursor.execute(
                "EXPLAIN " + queries._ENVELOPE_SQL_POSTGRESQL,
                {
                    "last_bucket": (until - origin) // width,
                    "width": width,
                    "origin": origin,
                    "channels": [channels[1].pk],
                    "since": since,
                    "until": until,
                },
            )
            plan = "\n".join(row[0] for row in cursor.fetchall())
            assert "Seq Scan" not in plan, plan
            assert "Index Only Scan using instruments_reading_y2026_pkey" in plan, plan
            assert "y2025" not in plan and "y2027" not in plan, plan  # pruned to its year
        else:
            cursor.execute(
                "EXPLAIN QUERY PLAN " + queries._ENVELOPE_SQL_SQLITE,
                {
                    "origin_s": int(origin.timestamp()),
                    "width_s": int(width.total_seconds()),
                    "channels_json": f"[{channels[1].pk}]",
                    "since": connection.ops.adapt_datetimefield_value(since),
                    "until": connection.ops.adapt_datetimefield_value(until),
                },
            )
            plan = "\n".join(str(row[-1]) for row in cursor.fetchall())
            assert "SEARCH instruments_reading USING" in plan, plan
            assert "channel_id=? AND t>? AND t<?" in plan.replace("t>=?", "t>?").replace(
                "t<=?", "t<?"
            ), plan


# --- the plot over a day, a month and a year ---------------------------------------------------


@pytest.fixture
def year_of_readings(manager, instrument):
    """A year of a gauge read every 10 minutes (52,560 readings: above the envelope
    threshold), with one burst in the middle; ends at a whole minute before now."""
    channel = gauge(instrument, manager, "prep ion gauge", expected_interval_s=600)
    end = timezone.now().replace(second=0, microsecond=0) - timedelta(minutes=1)
    count = 365 * 24 * 6
    start = end - timedelta(minutes=10 * (count - 1))
    rows = [(channel.pk, start + timedelta(minutes=10 * i), 2e-10) for i in range(count)]
    rows[count // 2] = (channel.pk, rows[count // 2][1], 4e-6)
    insert_readings(rows)
    return channel, start, end


def plot_url(instrument, channel, since, until) -> str:
    def iso(t):
        return t.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")

    return (
        f"/instruments/{instrument.pk}/channels/{channel.pk}/plot.png"
        f"?since={iso(since)}&until={iso(until)}&w=720&h=260"
    )


@pytest.mark.parametrize(
    ("span", "enveloped"),
    [(timedelta(days=1), False), (timedelta(days=30), False), (timedelta(days=365), True)],
    ids=["1 day", "1 month", "1 year"],
)
def test_the_plot_view_draws_a_day_a_month_and_a_year(
    member, instrument, year_of_readings, span, enveloped
):
    channel, start, end = year_of_readings
    client = Client()
    client.force_login(member)
    since, until = end + timedelta(minutes=1) - span, end + timedelta(minutes=1)
    with mock.patch.object(plots, "reading_envelope", wraps=queries.reading_envelope) as envelope:
        response = client.get(plot_url(instrument, channel, since, until))
    assert response.status_code == 200, response.content[:200]
    assert response["Content-Type"] == "image/png"
    image = Image.open(io.BytesIO(response.content))
    assert image.format == "PNG" and image.size == (720, 260)
    assert envelope.called is enveloped  # long windows are reduced by the database

    size = plots.PlotSize(720, 260)
    series = plots.channel_series(channel, since, until, size.buckets)
    expected = int((until - max(since, start)).total_seconds() // 600)
    assert abs(series.readings - expected) <= 1
    assert series.t.size <= size.buckets
    if span.days == 365:
        assert series.readings == 365 * 24 * 6
        assert series.high.max() == 4e-6  # the one burst still reaches its height
        assert np.median(series.high) == 2e-10


def test_the_year_plot_is_cached_until_a_new_reading_comes_in(
    member, instrument, year_of_readings, django_assert_max_num_queries
):
    channel, _, end = year_of_readings
    client = Client()
    client.force_login(member)
    until = end + timedelta(minutes=1)
    url = plot_url(instrument, channel, until - timedelta(days=365), until)
    client.get(f"/instruments/{instrument.pk}/")  # the session and user are loaded once
    with mock.patch.object(
        plots, "render_channel_figure", wraps=plots.render_channel_figure
    ) as render:
        # Drawn: session, user, groups, instrument, channel, the cache key's newest reading
        # and event fingerprint, the bounded count, the envelope and the events. No query
        # per reading or per bucket.
        with django_assert_max_num_queries(12) as drawn:
            first = client.get(url)
        assert first.status_code == 200 and render.call_count == 1
        sqls = [q["sql"] for q in drawn.captured_queries]
        assert sum("/* reading_envelope */" in sql for sql in sqls) == 1
        # No query brings the year's raw values over.
        assert not any('"instruments_reading"."value"' in sql for sql in sqls), sqls

        # From the cache: only the key's queries, matplotlib not asked.
        with django_assert_max_num_queries(8):
            second = client.get(url)
        assert second.content == first.content and render.call_count == 1

        # Another range is another key.
        other = plot_url(instrument, channel, until - timedelta(days=200), until)
        assert client.get(other).status_code == 200 and render.call_count == 2

        # A reading newer than the cached picture's newest makes a new key.
        insert_readings([(channel.pk, end + timedelta(seconds=30), 7e-6)])
        third = client.get(url)
        assert third.status_code == 200 and render.call_count == 3
        assert third.content != first.content
