"""The planner's picture of one cryostat: the level history in litres with the fitted boil-off
segments, the forecast with its ±2σ band, the minimum line and the planned refills.

Drawn like the instrument plots (``labbook.web.plots``): one Agg figure per image, never pyplot,
style passed per call, a palette PNG, cached under a key of everything the picture shows.
"""

from __future__ import annotations

import hashlib
from datetime import timedelta
from zoneinfo import ZoneInfo

import numpy as np
from django.core.cache import cache

from labbook.cryo import queries
from labbook.web import plots as web_plots

PAST = timedelta(days=14)
AHEAD = timedelta(days=7)
STYLE_VERSION = 1
CACHE_S = 10 * 60
FORECAST = "#2f6f9f"
MINIMUM = "#a3201a"
PLANNED = "#4f7f3a"
LEGEND_TOP_WIDE = 30
LEGEND_TOP_NARROW = 48


def _x(t_s: np.ndarray | float) -> np.ndarray | float:
    return np.asarray(t_s, dtype=float) / 86400.0 + web_plots._epoch_day()


def render_png(
    fc: queries.CryostatForecast,
    planned: list,
    size: web_plots.PlotSize,
    zone: ZoneInfo,
) -> bytes:
    from matplotlib import dates as mdates
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    cryostat, a = fc.cryostat, fc.analysis
    f = fc.forecast
    now = fc.at
    since, until = now - PAST, now + AHEAD
    dpi = 100 * size.scale
    fig = Figure(figsize=(size.width_px / dpi, size.height_px / dpi), dpi=dpi)
    FigureCanvasAgg(fig)
    fig.patch.set_facecolor(web_plots.SURFACE)
    left, right, top, bottom = size.margins
    # Room above the axes for the legend: two rows on a phone, one on a wide page.
    top = (LEGEND_TOP_WIDE if size.css_width >= 600 else LEGEND_TOP_NARROW) * size.scale
    fig.subplots_adjust(
        left=left / size.width_px,
        right=1 - right / size.width_px,
        top=1 - top / size.height_px,
        bottom=bottom / size.height_px,
    )
    ax = fig.add_subplot()
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(web_plots.LINE)
    ax.tick_params(
        colors=web_plots.LINE, labelcolor=web_plots.MUTED, labelsize=7.5, length=3, width=0.8
    )
    ax.grid(True, which="major", color=web_plots.LINE_SOFT, linewidth=0.6)
    ax.set_axisbelow(True)

    shown = a.t >= since.timestamp()
    ax.plot(
        _x(a.t[shown]),
        a.level_l[shown],
        color=web_plots.ACCENT,
        linewidth=0.6,
        alpha=0.55,
        label="readings",
        zorder=2,
    )
    for k, seg in enumerate(a.analysis.segments):
        if seg.t_end < since.timestamp():
            continue
        ax.plot(
            _x(np.array([seg.t_start, seg.t_end])),
            [seg.intercept_l, seg.level_at_end_l],
            color=web_plots.INK,
            linewidth=1.2,
            label="boil-off fit" if k == len(a.analysis.segments) - 1 else None,
            zorder=3,
        )
    # The forecast without a refill, from now until it reaches the minimum (or the edge),
    # with the ±2σ band.
    t0 = now.timestamp()
    t_end = until.timestamp()
    stop = f.minimum_at_latest or f.minimum_at or until
    t_fc = np.linspace(t0, max(min(t_end, stop.timestamp()), t0 + 60), 80)
    days = (t_fc - t0) / 86400.0
    sigma = f.rate_uncertainty_l_per_day
    central = f.level_now_l - f.rate_l_per_day * days
    worst = f.level_now_l - (f.rate_l_per_day + 2 * sigma) * days
    best = f.level_now_l - (f.rate_l_per_day - 2 * sigma) * days
    floor = cryostat.minimum_l
    ax.fill_between(
        _x(t_fc),
        np.maximum(worst, floor),
        np.maximum(best, floor),
        color=FORECAST,
        alpha=0.25,
        linewidth=0,
        zorder=1,
    )
    ax.plot(
        _x(t_fc),
        np.maximum(central, floor),
        color=FORECAST,
        linewidth=1.2,
        linestyle="--",
        label="no refill, ±2σ",
        zorder=3,
    )
    ax.axhline(
        cryostat.minimum_l, color=MINIMUM, linewidth=1.0, linestyle=":", label="minimum", zorder=4
    )
    ax.axvline(_x(t0), color=web_plots.MUTED, linewidth=0.6, zorder=1)
    if planned:
        # The plan's own simulation (worst-case rate): down to each refill, up to the target.
        xs, ys = [_x(t0)], [f.level_now_l]
        for r in planned:
            xs += [_x(r.at.timestamp()), _x(r.at.timestamp())]
            ys += [r.level_before_l, r.level_before_l + r.amount_l]
        last = planned[-1]
        tail_days = max(t_end - last.at.timestamp(), 0.0) / 86400.0
        xs.append(_x(t_end))
        ys.append(last.level_before_l + last.amount_l - (f.rate_l_per_day + 2 * sigma) * tail_days)
        ax.plot(xs, ys, color=PLANNED, linewidth=1.0, zorder=4, label="plan")
        ax.scatter(
            [_x(r.at.timestamp()) for r in planned],
            [r.level_before_l for r in planned],
            marker="^",
            s=26,
            color=PLANNED,
            zorder=5,
            linewidth=0,
            label="planned refill",
        )
    ax.set_xlim(_x(since.timestamp()), _x(t_end))
    ax.set_ylim(0, cryostat.capacity_l * 1.05)
    locator = mdates.AutoDateLocator(
        tz=zone, minticks=3, maxticks=max(4, int(size.axes_width_px / size.scale / 60))
    )
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator, tz=zone))
    ax.xaxis.get_offset_text().set_fontsize(7.5)
    ax.set_xlabel(
        web_plots.time_label(since, until, zone), fontsize=7.5, color=web_plots.MUTED, loc="left"
    )
    ax.set_ylabel(f"{cryostat.cryogen} / L", fontsize=8.5, color=web_plots.INK)
    ax.legend(
        loc="lower left",
        bbox_to_anchor=(0.0, 1.0),
        fontsize=6.5,
        frameon=False,
        ncols=6 if size.css_width >= 600 else 3,
        labelcolor=web_plots.MUTED,
        handlelength=1.4,
        columnspacing=0.8,
        borderaxespad=0.2,
    )
    return web_plots.figure_png(fig)


def cache_key(fc: queries.CryostatForecast, planned: list, size, zone: ZoneInfo) -> str:
    a = fc.analysis
    parts = (
        STYLE_VERSION,
        fc.cryostat.pk,
        fc.cryostat.updated_at.timestamp() if fc.cryostat.updated_at else None,
        float(a.t[-1]),
        len(a.t),
        [(r.source, r.pk, r.at.timestamp()) for r in a.logged],
        [(r.at.timestamp(), round(r.level_before_l, 3)) for r in planned],
        # The forecast moves with the clock; ten minutes of it is one picture.
        int(fc.at.timestamp() // CACHE_S),
        size.width_px,
        size.height_px,
        size.scale,
        str(zone),
    )
    return "labbook:cryoplot:" + hashlib.sha256(repr(parts).encode()).hexdigest()[:32]


def cryostat_plot_png(
    fc: queries.CryostatForecast, planned: list, size: web_plots.PlotSize, zone: ZoneInfo
) -> bytes:
    key = cache_key(fc, planned, size, zone)
    png = cache.get(key)
    if png is None:
        png = render_png(fc, planned, size, zone)
        cache.set(key, png, CACHE_S)
    return png
