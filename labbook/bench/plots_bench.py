"""The channel plot over a long window (PostgreSQL): a year of one gauge read about once a minute
(~500,000 readings, two yearly partitions) drawn as the page asks for it, cache cold, against
a floor measured in the same run: ``SELECT count(*)`` over the same rows (what merely visiting
them through the covering key costs). Registered as ``plots``.

Also printed, not a figure: the same render the old way (every row fetched and reduced in
Python), the envelope query alone, and its EXPLAIN ANALYZE, so a plan that stops using the
(channel_id, t) key shows up in the log.
"""

from __future__ import annotations

import io
import os
import statistics
import time
from datetime import UTC, datetime, timedelta

import numpy as np
from django.core.cache import cache
from django.db import connection

from labbook.bench import Figure, benchmark

READINGS = int(os.environ.get("LABBOOK_BENCH_PLOT_READINGS", 500_000))
REPEAT = int(os.environ.get("LABBOOK_BENCH_PLOT_REPEAT", 7))
#: Other channels of the same instrument, so the table is not the channel alone.
OTHER_CHANNELS = 3


def _copy_rows(channel_id: int, start: datetime, count: int, interval_s: float, seed: int) -> None:
    """COPY ``count`` readings of a gauge at 1-3e-10 mbar with sputter-like bursts."""
    rng = np.random.default_rng(seed)
    base = np.datetime64(start.replace(tzinfo=None), "ms")
    steps = (np.arange(count, dtype=np.int64) * int(interval_s * 1000)).astype("timedelta64[ms]")
    stamps = np.char.add(np.datetime_as_string(base + steps, unit="ms"), "+00")
    values = 2e-10 * (1 + 0.2 * rng.standard_normal(count))
    values[rng.integers(0, count, size=200)] = 5e-6
    lines = np.char.add(np.char.add(f"{channel_id}\t", stamps), "\t")
    text = "\n".join(np.char.add(lines, values.astype(str)).tolist()) + "\n"
    connection.ensure_connection()
    with (
        connection.connection.cursor() as cursor,
        cursor.copy("COPY instruments_reading (channel_id, t, value) FROM STDIN") as copy,
    ):
        stream = io.StringIO(text)
        while chunk := stream.read(1 << 20):
            copy.write(chunk)


def _median_s(func, repeat: int) -> float:
    samples = []
    for _ in range(repeat):
        began = time.perf_counter()
        func()
        samples.append(time.perf_counter() - began)
    return statistics.median(samples)


@benchmark("plots")
def plots_bench() -> list[Figure]:
    if connection.vendor != "postgresql":
        print("plots: skipped, needs PostgreSQL (set DATABASE_URL)")
        return []
    from django.contrib.auth import get_user_model

    from labbook.accounts.actions import set_role
    from labbook.instruments import queries
    from labbook.instruments.actions import create_channel, create_instrument
    from labbook.instruments.models import Instrument
    from labbook.web import plots

    manager, _ = get_user_model().objects.get_or_create(username="bench-plots")
    set_role(manager, "manager")
    instrument = Instrument.objects.filter(name="BENCH-PLOTS").first() or create_instrument(
        name="BENCH-PLOTS", actor=manager
    )
    channels = [
        create_channel(
            instrument, name=f"plot gauge {i}", quantity="pressure", unit="mbar", actor=manager
        )
        for i in range(1 + OTHER_CHANNELS)
    ]
    channel = channels[0]
    until = datetime.now(UTC).replace(second=0, microsecond=0) - timedelta(hours=2)
    since = until - timedelta(days=365)
    interval_s = 365 * 86400 / READINGS
    print(
        f"plots: loading {READINGS:,} readings a channel over {len(channels)} channels "
        f"({interval_s:.0f} s apart) from {since:%Y-%m-%d} to {until:%Y-%m-%d} …",
        flush=True,
    )
    for seed, each in enumerate(channels):
        _copy_rows(each.pk, since, READINGS, interval_s, seed)
    with connection.cursor() as cursor:
        cursor.execute("VACUUM (ANALYZE) instruments_reading")

    size = plots.PlotSize(720, 260)  # the page's 2x wide image is 1160 px: more buckets
    buckets = size.buckets

    def render() -> bytes:
        cache.clear()  # cold every time: the first reader's wait is the figure
        return plots.channel_plot_png(channel, since, until, size)

    def count_floor() -> int:
        with connection.cursor() as cursor:
            cursor.execute(
                "SELECT count(*) FROM instruments_reading"
                " WHERE channel_id = %s AND t >= %s AND t <= %s",
                [channel.pk, since, until],
            )
            return cursor.fetchone()[0]

    assert count_floor() == READINGS
    render()  # warm the matplotlib import and fonts, and the buffer cache
    count_floor()
    floor_s = _median_s(count_floor, REPEAT)
    render_s = _median_s(render, REPEAT)
    envelope_s = _median_s(
        lambda: queries.reading_envelope([channel.pk], since, until, buckets), REPEAT
    )
    cached_s = _median_s(lambda: plots.channel_plot_png(channel, since, until, size), REPEAT)

    # Before: every row fetched as (t, value) and reduced in Python (the threshold lifted).
    threshold = plots.ENVELOPE_ABOVE
    plots.ENVELOPE_ABOVE = 10**12
    try:
        cache.clear()
        began = time.perf_counter()
        plots.channel_plot_png(channel, since, until, size)
        python_s = time.perf_counter() - began
    finally:
        plots.ENVELOPE_ABOVE = threshold
        cache.clear()

    origin, width = queries.envelope_grid(since, until, buckets)
    with connection.cursor() as cursor:
        cursor.execute(
            "EXPLAIN (ANALYZE, BUFFERS) " + queries._ENVELOPE_SQL_POSTGRESQL,
            {
                "last_bucket": (until - origin) // width,
                "width": width,
                "origin": origin,
                "channels": [channel.pk],
                "since": since,
                "until": until,
            },
        )
        plan = "\n".join(row[0] for row in cursor.fetchall())
    print("plots: EXPLAIN ANALYZE of the year's envelope:\n" + plan, flush=True)
    print(
        f"plots: year render {render_s * 1000:.0f} ms (envelope query {envelope_s * 1000:.0f} ms,"
        f" from the cache {cached_s * 1000:.1f} ms); the same render fetching every row into"
        f" Python {python_s * 1000:.0f} ms",
        flush=True,
    )
    return [
        Figure(
            f"1-year channel plot, {READINGS:,} readings, cache cold, median",
            render_s * 1000,
            "ms",
            floor_s * 1000,
            "SELECT count(*) over the same readings, median",
            goal_value=1000.0,
        ),
        Figure(
            "1-year min/max envelope query (reading_envelope), median",
            envelope_s * 1000,
            "ms",
            floor_s * 1000,
            "SELECT count(*) over the same readings, median",
        ),
    ]
