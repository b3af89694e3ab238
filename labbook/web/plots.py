"""Server-side plots of an instrument's logged channels: PNG images drawn with matplotlib.

Why on the server: the pages stay plain HTML (no charting library in the browser, nothing to
load at the chamber PC), and a year of readings never travels to the browser.

* **Drawing.** One :class:`~matplotlib.figure.Figure` per image on the Agg canvas, never
  pyplot: pyplot keeps global state (a current figure, a figure registry) that is neither
  thread-safe nor freed by itself in a long-running web process. Style is passed to each call,
  never through ``rcParams``, for the same reason. Fonts are the DejaVu family bundled with
  matplotlib, so nothing is looked up on or downloaded to the machine.
* **Reducing.** The readings are reduced with :func:`labbook.science.timeseries.minmax_buckets`
  to two buckets per pixel column and drawn as a band from each bucket's minimum to its
  maximum, so a pressure burst of a single reading still reaches its true height.
* **Fetching.** A window of up to :data:`ENVELOPE_ABOVE` readings is fetched as (t, value)
  pairs (``instruments.queries.readings_between``) and reduced here, so a short window keeps
  its raw points. A longer one is reduced by the database
  (``instruments.queries.reading_envelope``: one query over the covering primary key) and
  only the buckets travel: a year of 500,000 readings is ~1,300 rows, drawn in ~0.3 s where
  fetching every row and reducing it in Python took ~4-6 s (``labbook/bench/plots_bench.py``).
* **Caching.** A PNG is kept in Django's cache under a key made of the channel, the window,
  the size, the time of the channel's latest reading in the window, and a fingerprint of the
  instrument's events in it. A new reading, a new or corrected event or a renamed channel makes
  a new key; an unchanged plot is served without touching matplotlib. The pages ask for
  windows whose end is rounded down to one pixel column (:func:`window_ending`), so "the last
  24 hours" is the same image for every reader during that column's worth of time.
"""

from __future__ import annotations

import hashlib
import io
import math
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import TYPE_CHECKING
from zoneinfo import ZoneInfo

import numpy as np
from django.conf import settings
from django.core.cache import cache
from django.utils import timezone

from labbook.instruments.models import Channel, InstrumentEvent
from labbook.instruments.queries import (
    DEFAULT_STALE_AFTER,
    STALE_FACTOR,
    events_between,
    latest_reading_time,
    reading_envelope,
    readings_between,
    readings_upto,
)
from labbook.science.timeseries import minmax_buckets
from labbook.web.templatetags.labbook_format import display_unit

if TYPE_CHECKING:
    from matplotlib.figure import Figure

# The palette of labbook.css: the copper accent draws the data, the page's greys the frame.
ACCENT = "#8f3f16"
INK = "#1b1d1f"
MUTED = "#565a5f"
LINE = "#d5d2ca"
LINE_SOFT = "#e7e5df"
SURFACE = "#ffffff"

#: Event shading, one colour a kind, chosen to stay apart from the copper data band.
EVENT_COLOURS: dict[str, tuple[str, float]] = {
    InstrumentEvent.Kind.BAKEOUT: ("#e3a21a", 0.26),
    InstrumentEvent.Kind.CRYOGEN_TRANSFER: ("#2f6f9f", 0.20),
    InstrumentEvent.Kind.VENT: ("#767a80", 0.24),
    InstrumentEvent.Kind.PUMP_FAILURE: ("#a3201a", 0.20),
    InstrumentEvent.Kind.MAINTENANCE: ("#4f7f3a", 0.20),
    InstrumentEvent.Kind.OTHER: ("#7a6a9a", 0.18),
}

_QUANTITY_WORDS = {
    Channel.Quantity.PRESSURE: "pressure",
    Channel.Quantity.TEMPERATURE: "temperature",
    Channel.Quantity.CRYOGEN_LEVEL: "level",
}

#: Above this many readings in a window the database reduces them (module docstring). Below
#: it the raw pairs cost little to fetch (20,000 in ~30 ms, from PERFORMANCE.md §6's 8,640 in
#: 13 ms: an estimate) and a window with fewer readings than buckets keeps its raw points.
ENVELOPE_ABOVE = 20_000
#: Windows longer than this are refused: a decade of 10-second readings is 30 million rows.
MAX_SPAN = timedelta(days=731)
#: Plots whose window reaches into the last hour are kept this long; older windows longer.
LIVE_TIMEOUT_S = 15 * 60
PAST_TIMEOUT_S = 24 * 3600
#: Bump when the drawing changes, so no image drawn the old way is served again.
STYLE_VERSION = 2

#: Frame around the axes in CSS pixels (left, right, top, bottom); room for tick labels.
MARGINS_PX = (64, 14, 24, 40)
BUCKETS_PER_COLUMN = 2


class PlotRequestError(ValueError):
    """A plot asked for with an impossible size or window; the message says what to change."""


@dataclass(frozen=True)
class PlotSize:
    """The PNG's size in device pixels and its scale (2 for a high-density screen: the same
    picture with everything drawn twice as large, so text stays readable)."""

    width_px: int
    height_px: int
    scale: int = 1

    MIN_WIDTH = 240
    MAX_WIDTH = 2400
    MIN_HEIGHT = 160
    MAX_HEIGHT = 1200

    def __post_init__(self) -> None:
        if self.scale not in (1, 2, 3):
            raise PlotRequestError("scale is 1, 2 or 3")
        for name, value, low, high in (
            ("w", self.width_px, self.MIN_WIDTH, self.MAX_WIDTH),
            ("h", self.height_px, self.MIN_HEIGHT, self.MAX_HEIGHT),
        ):
            if not low <= value <= high:
                raise PlotRequestError(f"{name} is {low} to {high} pixels, got {value}")

    @property
    def margins(self) -> tuple[int, int, int, int]:
        return tuple(m * self.scale for m in MARGINS_PX)  # type: ignore[return-value]

    @property
    def axes_width_px(self) -> int:
        left, right, _, _ = self.margins
        return max(self.width_px - left - right, 1)

    @property
    def buckets(self) -> int:
        return BUCKETS_PER_COLUMN * self.axes_width_px

    @property
    def css_width(self) -> float:
        return self.width_px / self.scale


@dataclass(frozen=True)
class EventSpan:
    kind: str
    label: str
    start: datetime
    end: datetime | None  # open: still under way


@dataclass(frozen=True)
class Series:
    """One channel's readings in a window, reduced to buckets (instants in UTC seconds)."""

    name: str
    quantity: str
    unit: str
    since: datetime
    until: datetime
    t: np.ndarray
    low: np.ndarray
    high: np.ndarray
    readings: int  # how many readings the buckets hold
    gap_s: float  # readings further apart than this are not joined by the band
    events: tuple[EventSpan, ...] = ()

    @property
    def is_pressure(self) -> bool:
        return self.quantity == Channel.Quantity.PRESSURE


def lab_zone() -> ZoneInfo:
    return ZoneInfo(settings.TIME_ZONE)


def check_window(since: datetime, until: datetime) -> None:
    if since.tzinfo is None or until.tzinfo is None:
        raise PlotRequestError("since and until need a time zone")
    if until <= since:
        raise PlotRequestError("until must be after since")
    if until - since > MAX_SPAN:
        raise PlotRequestError(f"a plot spans at most {MAX_SPAN.days} days")


def window_ending(
    until: datetime, span: timedelta, columns: int = 600
) -> tuple[datetime, datetime]:
    """The window of length ``span`` ending at ``until`` rounded down to one of ``columns``
    pixel columns (and to the second): the newest column of a live plot lags by at most that
    much, and every reader in the meantime gets the same, cached, image."""
    step = max(span.total_seconds() / columns, 1.0)
    end_s = math.floor(until.timestamp() / step) * step
    end = datetime.fromtimestamp(math.floor(end_s), tz=UTC)
    return end - span, end


def _epoch_day() -> float:
    from matplotlib import dates as mdates

    return float(mdates.date2num(datetime(1970, 1, 1, tzinfo=UTC)))


def _gap_seconds(channel: Channel) -> float:
    # The same rule as "stale" on the instrument page: three expected intervals, else an hour.
    if channel.expected_interval_s:
        return STALE_FACTOR * channel.expected_interval_s
    return DEFAULT_STALE_AFTER.total_seconds()


def _arrays(rows: list[tuple[datetime, float]]) -> tuple[np.ndarray, np.ndarray]:
    t = np.fromiter((row[0].timestamp() for row in rows), dtype=float, count=len(rows))
    v = np.fromiter((row[1] for row in rows), dtype=float, count=len(rows))
    return t, v


def reduced_readings(
    channel: Channel, since: datetime, until: datetime, buckets: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """(t, low, high, readings) of ``channel`` in [since, until] on about ``buckets`` buckets:
    reduced here from the raw readings for a short window, by the database for a long one
    (module docstring). Either way a bucket's ``t`` is the middle of its first and last
    reading, and a window with no more readings than buckets keeps every point."""
    if readings_upto(channel, since, until, ENVELOPE_ABOVE + 1) > ENVELOPE_ABOVE:
        return enveloped_readings(channel, since, until, buckets)
    t, v = _arrays(readings_between(channel, since, until))
    t_mid, low, high = minmax_buckets(t, v, buckets, start=since.timestamp(), end=until.timestamp())
    return t_mid, low, high, int(np.count_nonzero(np.isfinite(v)))


def enveloped_readings(
    channel: Channel, since: datetime, until: datetime, buckets: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """(t, low, high, readings) from the database's min/max envelope of the window."""
    rows = reading_envelope([channel.pk], since, until, buckets).channels[channel.pk]
    n = len(rows)
    first = np.fromiter((r.first_t.timestamp() for r in rows), dtype=float, count=n)
    last = np.fromiter((r.last_t.timestamp() for r in rows), dtype=float, count=n)
    low = np.fromiter((r.low for r in rows), dtype=float, count=n)
    high = np.fromiter((r.high for r in rows), dtype=float, count=n)
    return (first + last) / 2.0, low, high, sum(r.count for r in rows)


def channel_series(channel: Channel, since: datetime, until: datetime, buckets: int) -> Series:
    """Everything one plot draws: the channel's reduced readings and the instrument's events."""
    t, low, high, count = reduced_readings(channel, since, until, buckets)
    events = tuple(
        EventSpan(e.kind, e.get_kind_display(), e.start, e.end)
        for e in events_between(channel.instrument, since, until)
    )
    return Series(
        name=channel.name,
        quantity=channel.quantity,
        unit=channel.unit,
        since=since,
        until=until,
        t=t,
        low=low,
        high=high,
        readings=count,
        # Two buckets apart is still joined; +1 s for the envelope grid's whole-second width.
        gap_s=max(_gap_seconds(channel), 2 * ((until - since).total_seconds() / buckets + 1)),
        events=events,
    )


def y_label(quantity: str, unit: str) -> str:
    """'pressure / mbar', 'temperature / K', 'level / %': quantity over unit (ISO 80000-1)."""
    word = _QUANTITY_WORDS.get(quantity, "value")
    shown = display_unit(unit)
    return f"{word} / {shown}" if shown else word


def time_label(since: datetime, until: datetime, zone: ZoneInfo) -> str:
    """'time in Europe/Berlin (CET)': the zone named, with both abbreviations across a
    daylight-saving change."""
    names = []
    for instant in (since, until):
        name = instant.astimezone(zone).tzname() or ""
        if name and name not in names:
            names.append(name)
    key = getattr(zone, "key", str(zone))
    if names == [key] or not names:
        return f"time in {key}"
    return f"time in {key} ({'/'.join(names)})"


def _with_gaps(
    x: np.ndarray, low: np.ndarray, high: np.ndarray, gap_days: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """NaN between buckets further apart than the gap, so a logger outage shows as a break."""
    if x.size < 2:
        return x, low, high
    breaks = np.flatnonzero(np.diff(x) > gap_days) + 1
    if breaks.size == 0:
        return x, low, high
    middle = (x[breaks - 1] + x[breaks]) / 2
    return (
        np.insert(x, breaks, middle),
        np.insert(low, breaks, np.nan),
        np.insert(high, breaks, np.nan),
    )


_SUPERSCRIPT = str.maketrans("0123456789-", "⁰¹²³⁴⁵⁶⁷⁸⁹⁻")


def decade_label(value: float, _position: object = None) -> str:
    """'10⁻¹⁰' for a whole decade, nothing between them. Plain Unicode superscripts rather
    than mathtext: the same look as the pages' numbers, and no TeX parsing per label."""
    if value <= 0:
        return ""
    exponent = math.log10(value)
    if abs(exponent - round(exponent)) > 1e-9:
        return ""
    return "10" + str(round(exponent)).translate(_SUPERSCRIPT)


def in_decade_label(value: float, _position: object = None) -> str:
    """'2×10⁻¹⁰' for a tick inside a decade."""
    if value <= 0:
        return ""
    exponent = math.floor(math.log10(value) + 1e-9)
    mantissa = value / 10.0**exponent
    return f"{mantissa:.0f}×10" + str(exponent).translate(_SUPERSCRIPT)


def _log_axis(ax, low: np.ndarray, high: np.ndarray) -> None:
    """A log axis from whole decade to whole decade: a vacuum log is read in decades, and a
    window that spans less than one still gets two labelled ticks."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    ax.set_yscale("log")
    finite = np.concatenate([low[np.isfinite(low)], high[np.isfinite(high)]])
    if finite.size:
        bottom = math.floor(math.log10(float(finite.min())))
        top = math.ceil(math.log10(float(finite.max())))
        if top <= bottom:
            top = bottom + 1
        ax.set_ylim(10.0**bottom, 10.0**top)
        decades = top - bottom
        # Beyond six decades every decade still has a tick, but only some have a label.
        step = 1 if decades <= 6 else math.ceil(decades / 6)
        ax.yaxis.set_major_locator(LogLocator(base=10, subs=(1.0,), numticks=decades + 2))
        formatter = decade_label
        if step > 1:

            def formatter(value, position=None):
                text = decade_label(value)
                exponent = round(math.log10(value)) if value > 0 else 0
                return text if exponent % step == 0 else ""

        ax.yaxis.set_major_formatter(FuncFormatter(formatter))
        if decades <= 2:
            # Within one or two decades the reader needs more than the decades: 2 and 5 too.
            ax.yaxis.set_minor_locator(LogLocator(base=10, subs=(2.0, 5.0), numticks=10))
            ax.yaxis.set_minor_formatter(FuncFormatter(in_decade_label))
            return
    ax.yaxis.set_minor_formatter(NullFormatter())


def render_channel_figure(series: Series, size: PlotSize, zone: ZoneInfo | None = None) -> Figure:
    """Draw ``series`` on a new Agg figure of exactly ``size`` pixels and return the figure.

    Pressures get a log axis (gauges span twelve decades); non-positive pressures (a gauge
    switched off reads 0) are left out rather than drawn at the bottom edge.
    """
    from matplotlib import dates as mdates
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch

    zone = zone or lab_zone()
    dpi = 100 * size.scale
    fig = Figure(figsize=(size.width_px / dpi, size.height_px / dpi), dpi=dpi)
    FigureCanvasAgg(fig)
    fig.patch.set_facecolor(SURFACE)
    left, right, top, bottom = size.margins
    fig.subplots_adjust(
        left=left / size.width_px,
        right=1 - right / size.width_px,
        top=1 - top / size.height_px,
        bottom=bottom / size.height_px,
    )
    ax = fig.add_subplot()
    ax.set_facecolor(SURFACE)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(LINE)
    ax.tick_params(colors=LINE, labelcolor=MUTED, labelsize=7.5, length=3, width=0.8)
    ax.tick_params(which="minor", colors=LINE, labelcolor=MUTED, labelsize=7, length=2)
    ax.grid(True, which="major", color=LINE_SOFT, linewidth=0.6)
    ax.set_axisbelow(True)

    epoch = _epoch_day()
    x_since = series.since.timestamp() / 86400 + epoch
    x_until = series.until.timestamp() / 86400 + epoch
    column_days = (x_until - x_since) / size.axes_width_px

    low, high = series.low, series.high
    x = series.t / 86400 + epoch
    if series.is_pressure:
        keep = high > 0
        x, low, high = x[keep], np.where(low[keep] > 0, low[keep], high[keep]), high[keep]
        _log_axis(ax, low, high)

    present: list[str] = []
    for event in series.events:
        start = max(event.start, series.since).timestamp() / 86400 + epoch
        end_at = event.end if event.end is not None else series.until
        end = min(end_at, series.until).timestamp() / 86400 + epoch
        # At least a pixel column wide, so a half-hour transfer on a year's plot still shows.
        end = max(end, start + column_days)
        colour, alpha = EVENT_COLOURS.get(event.kind, EVENT_COLOURS[InstrumentEvent.Kind.OTHER])
        ax.axvspan(start, end, color=colour, alpha=alpha, linewidth=0, zorder=1)
        if event.kind not in present:
            present.append(event.kind)

    if x.size:
        x, low, high = _with_gaps(x, low, high, series.gap_s / 86400)
        ax.fill_between(x, low, high, color=ACCENT, alpha=0.30, linewidth=0, zorder=2)
        few = np.count_nonzero(~np.isnan(high)) < 40
        for edge in (high, low):
            ax.plot(
                x,
                edge,
                color=ACCENT,
                linewidth=0.8,
                zorder=3,
                marker="o" if few else None,
                markersize=2.2,
            )
    else:
        ax.text(
            0.5,
            0.5,
            "no readings in this window",
            transform=ax.transAxes,
            ha="center",
            va="center",
            color=MUTED,
            fontsize=9,
        )
        ax.set_yticks([])

    ax.set_xlim(x_since, x_until)
    locator = mdates.AutoDateLocator(
        tz=zone, minticks=3, maxticks=max(4, int(size.axes_width_px / size.scale / 55))
    )
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(
        mdates.ConciseDateFormatter(
            locator,
            tz=zone,
            formats=["%Y", "%b", "%d %b", "%H:%M", "%H:%M", "%S.%f"],
            zero_formats=["", "%Y", "%b", "%d %b", "%H:%M", "%H:%M"],
            offset_formats=["", "%Y", "%b %Y", "%d %b %Y", "%d %b %Y", "%d %b %Y %H:%M"],
        )
    )
    ax.xaxis.get_offset_text().set_fontsize(7.5)
    ax.xaxis.get_offset_text().set_color(MUTED)
    ax.set_xlabel(
        time_label(series.since, series.until, zone), fontsize=7.5, color=MUTED, loc="left"
    )
    ax.set_ylabel(y_label(series.quantity, series.unit), fontsize=8.5, color=INK)

    if size.css_width >= 720:
        # Wide enough for the name beside the legend (a picture saved on its own keeps it);
        # on the pages, the figure's caption names the channel.
        ax.set_title(series.name, loc="left", fontsize=8.5, color=INK, pad=5)
    if present:
        labels = dict(InstrumentEvent.Kind.choices)
        handles = [
            Patch(
                facecolor=EVENT_COLOURS.get(kind, EVENT_COLOURS[InstrumentEvent.Kind.OTHER])[0],
                alpha=min(1.0, 2.2 * EVENT_COLOURS.get(kind, ("", 0.2))[1]),
                linewidth=0,
                label=str(labels.get(kind, kind)),
            )
            for kind in present
        ]
        ax.legend(
            handles=handles,
            loc="lower right",
            bbox_to_anchor=(1.0, 1.0),
            ncols=len(handles),
            frameon=False,
            fontsize=7,
            handlelength=1.0,
            handleheight=0.8,
            handletextpad=0.35,
            columnspacing=0.8,
            borderaxespad=0.15,
            borderpad=0.1,
            labelcolor=MUTED,
        )
    return fig


def figure_png(fig: Figure) -> bytes:
    """The figure as a palette PNG: drawn once on its Agg canvas and encoded by Pillow.

    ``savefig`` would draw the whole figure a second time. A plot has a handful of colours
    plus their antialiased edges, so a 128-colour palette looks the same at a third of the
    bytes of an RGB image (PERFORMANCE.md §2c: palette PNGs are also the fastest to write).
    """
    from PIL import Image

    canvas = fig.canvas
    canvas.draw()
    width, height = canvas.get_width_height(physical=True)
    rgba = Image.frombuffer("RGBA", (width, height), canvas.buffer_rgba(), "raw", "RGBA", 0, 1)
    picture = rgba.convert("RGB").quantize(colors=128, method=Image.Quantize.FASTOCTREE)
    buffer = io.BytesIO()
    picture.save(buffer, format="PNG", compress_level=6)
    return buffer.getvalue()


def _events_fingerprint(channel: Channel, since: datetime, until: datetime) -> str:
    rows = events_between(channel.instrument, since, until).values_list(
        "pk", "kind", "start", "end", "updated_at"
    )
    return hashlib.sha256(repr(list(rows)).encode()).hexdigest()[:16]


def plot_cache_key(channel: Channel, since: datetime, until: datetime, size: PlotSize) -> str:
    """The key the PNG is cached under (module docstring): whatever would change the picture."""
    # The newest reading up to the window's end: a reading logged since the image was drawn
    # makes a new key. One probe on (channel_id, t), whatever the window's length.
    latest = latest_reading_time(channel, until)
    latest_t = latest.timestamp() if latest else None
    parts = (
        STYLE_VERSION,
        channel.pk,
        channel.updated_at.timestamp() if channel.updated_at else None,
        since.timestamp(),
        until.timestamp(),
        size.width_px,
        size.height_px,
        size.scale,
        latest_t,
        _events_fingerprint(channel, since, until),
        settings.TIME_ZONE,
    )
    digest = hashlib.sha256(repr(parts).encode()).hexdigest()[:32]
    return f"labbook:plot:{channel.pk}:{digest}"


def channel_plot_png(channel: Channel, since: datetime, until: datetime, size: PlotSize) -> bytes:
    """The channel's plot over [since, until] as PNG bytes, from the cache when nothing it
    shows has changed, else drawn (and then cached)."""
    check_window(since, until)
    key = plot_cache_key(channel, since, until, size)
    png = cache.get(key)
    if png is not None:
        return png
    series = channel_series(channel, since, until, size.buckets)
    fig = render_channel_figure(series, size)
    png = figure_png(fig)
    live = until >= timezone.now() - timedelta(hours=1)
    cache.set(key, png, LIVE_TIMEOUT_S if live else PAST_TIMEOUT_S)
    return png
