"""The dataset page's picture of a spectrum: dI/dV and current on top, the normalised
conductance (dI/dV)/(I/V) below, against the sample bias.

Drawn from the traces processing stored with the file (``stats["traces"]``, at most 512
points a trace), never from the file itself: the page costs no read of the bytes and no
science. Drawn like the instrument plots (``labbook.web.plots``): one Agg figure per image,
never pyplot, style passed to each call (no ``rcParams``), the pages' palette, a palette PNG
by :func:`labbook.web.plots.figure_png`. Cached in Django's cache under a key made of the
file's SHA-256, a hash of the stored traces and ε, the size and the style version, so a
file processed again with other traces gets a new picture and an unchanged one is served
without touching matplotlib.
"""

from __future__ import annotations

import hashlib
import json
import math
from typing import TYPE_CHECKING, Any

import numpy as np
from django.core.cache import cache

from labbook.web import plots as web_plots
from labbook.web.templatetags.labbook_format import format_quantity

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

    from labbook.datafiles.models import AcquiredFile

#: The picture's size in CSS pixels; the template's <img> carries the same numbers.
WIDTH_PX = 640
HEIGHT_PX = 440
#: Bump when the drawing changes, so no image drawn the old way is served again.
STYLE_VERSION = 1
#: A dataset's traces never change once stored (the bytes are immutable); a day is plenty.
CACHE_S = 24 * 3600
#: Frame in CSS pixels (left, right, top, bottom): room for the current's axis on the right.
MARGINS_PX = (66, 66, 26, 42)
#: The current is drawn in the pages' muted grey, so the copper dI/dV stays the subject.
CURRENT_COLOUR = web_plots.MUTED

# SI prefixes a tunnelling current or conductance takes: fA to A, fS to S.
_PREFIXES = ((-15, "f"), (-12, "p"), (-9, "n"), (-6, "µ"), (-3, "m"), (0, ""))


def stored_traces(record: AcquiredFile) -> dict[str, Any] | None:
    """The traces processing stored for ``record``, or None when there is nothing to draw."""
    traces = (record.stats or {}).get("traces")
    if not isinstance(traces, dict) or not isinstance(traces.get("bias_v"), list):
        return None
    if not any(
        isinstance(traces.get(key), list)
        for key in ("didv_a_per_v", "current_a", "norm_conductance", "didv_lockin")
    ):
        return None
    return traces


def _array(values: Any) -> np.ndarray | None:
    """A stored trace (None for a missing point) as floats with NaN there; None if absent."""
    if not isinstance(values, list):
        return None
    return np.array([np.nan if v is None else float(v) for v in values], dtype=np.float64)


def si_scale(values: np.ndarray | None) -> tuple[float, str]:
    """(factor, prefix) that puts the largest finite |value| between 1 and 1000 (fA…A)."""
    if values is None:
        return 1.0, ""
    finite = np.abs(values[np.isfinite(values)])
    if finite.size == 0 or float(finite.max()) == 0.0:
        return 1.0, ""
    power = math.floor(math.log10(float(finite.max())) / 3) * 3
    power = min(max(power, _PREFIXES[0][0]), _PREFIXES[-1][0])
    return 10.0**-power, dict(_PREFIXES)[power]


def traces_digest(traces: dict[str, Any], epsilon_v: float | None) -> str:
    """A hash of what the picture shows: the stored traces and ε."""
    text = json.dumps([traces, epsilon_v], sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()[:32]


def spectrum_cache_key(sha256: str, traces: dict[str, Any], epsilon_v: Any, scale: int) -> str:
    parts = (STYLE_VERSION, WIDTH_PX, HEIGHT_PX, scale, traces_digest(traces, epsilon_v))
    digest = hashlib.sha256(repr(parts).encode()).hexdigest()[:32]
    return f"labbook:spectrum:{sha256}:{digest}"


def _style(ax: Axes) -> None:
    ax.set_facecolor(web_plots.SURFACE)
    ax.spines["top"].set_visible(False)
    for side in ("left", "bottom", "right"):
        ax.spines[side].set_color(web_plots.LINE)
    ax.tick_params(
        colors=web_plots.LINE, labelcolor=web_plots.MUTED, labelsize=7.5, length=3, width=0.8
    )
    ax.grid(True, which="major", color=web_plots.LINE_SOFT, linewidth=0.6)
    ax.set_axisbelow(True)


def _note(ax: Axes, text: str) -> None:
    ax.text(
        0.5,
        0.5,
        text,
        transform=ax.transAxes,
        ha="center",
        va="center",
        color=web_plots.MUTED,
        fontsize=8.5,
        wrap=True,
    )
    ax.set_yticks([])


def _legend(ax: Axes, handles: list) -> None:
    ax.legend(
        handles=handles,
        loc="lower left",
        bbox_to_anchor=(0.0, 1.0),
        ncols=len(handles),
        frameon=False,
        fontsize=7.5,
        handlelength=1.6,
        borderaxespad=0.15,
        borderpad=0.1,
        labelcolor=web_plots.MUTED,
    )


def render_spectrum_figure(
    traces: dict[str, Any],
    *,
    epsilon_v: float | None = None,
    note: str = "",
    scale: int = 1,
) -> Figure:
    """The two-panel figure of a spectrum's stored traces on a new Agg canvas.

    Top: dI/dV (left axis, A/V with the SI prefix that suits it, shown as S) and the current
    (right axis); an uncalibrated lock-in output is drawn in its own unit instead. Bottom:
    (dI/dV)/(I/V) with I/V broadened over ε (named in the legend), dimensionless, with the
    ohmic value 1 marked; ``note`` says why it is missing when it is.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    width, height = WIDTH_PX * scale, HEIGHT_PX * scale
    dpi = 100 * scale
    fig = Figure(figsize=(width / dpi, height / dpi), dpi=dpi)
    FigureCanvasAgg(fig)
    fig.patch.set_facecolor(web_plots.SURFACE)
    left, right, top, bottom = (m * scale for m in MARGINS_PX)
    fig.subplots_adjust(
        left=left / width,
        right=1 - right / width,
        top=1 - top / height,
        bottom=bottom / height,
        hspace=0.32,
    )
    upper, lower = fig.subplots(2, 1, sharex=True)
    for ax in (upper, lower):
        _style(ax)

    bias = _array(traces.get("bias_v"))
    assert bias is not None  # stored_traces checked it
    didv = _array(traces.get("didv_a_per_v"))
    lockin = _array(traces.get("didv_lockin"))
    current = _array(traces.get("current_a"))
    ratio = _array(traces.get("norm_conductance"))

    handles = []
    if didv is not None:
        factor, prefix = si_scale(didv)
        (line,) = upper.plot(
            bias, didv * factor, color=web_plots.ACCENT, linewidth=1.1, label="dI/dV"
        )
        handles.append(line)
        upper.set_ylabel(f"dI/dV ({prefix}S)", fontsize=8.5, color=web_plots.INK)
    elif lockin is not None:
        unit = str(traces.get("didv_lockin_unit") or "") or "arb. units"
        factor = 1.0
        if unit in ("V", "A"):  # a lock-in output in volts (or amperes) takes a prefix too
            factor, prefix = si_scale(lockin)
            unit = prefix + unit
        (line,) = upper.plot(
            bias, lockin * factor, color=web_plots.ACCENT, linewidth=1.1, label="dI/dV (lock-in)"
        )
        handles.append(line)
        upper.set_ylabel(f"dI/dV, lock-in ({unit})", fontsize=8.5, color=web_plots.INK)
    else:
        upper.set_yticks([])
    if current is not None:
        factor, prefix = si_scale(current)
        twin = upper.twinx()
        twin.spines["top"].set_visible(False)
        for side in ("left", "bottom", "right"):
            twin.spines[side].set_color(web_plots.LINE)
        twin.tick_params(
            colors=web_plots.LINE, labelcolor=web_plots.MUTED, labelsize=7.5, length=3, width=0.8
        )
        (line,) = twin.plot(
            bias,
            current * factor,
            color=CURRENT_COLOUR,
            linewidth=0.9,
            linestyle=(0, (4, 2)),
            label="current",
        )
        handles.append(line)
        twin.set_ylabel(f"current ({prefix}A)", fontsize=8.5, color=web_plots.INK)
    if handles:
        _legend(upper, handles)
    else:
        _note(upper, "no dI/dV or current stored")

    if ratio is not None and np.isfinite(ratio).any():
        lower.axhline(1.0, color=web_plots.LINE, linewidth=0.8, zorder=1)
        label = "(dI/dV)/(I/V)"
        if epsilon_v is not None:
            label += f", I/V broadened over ε = {format_quantity(epsilon_v, 'V')}"
        (line,) = lower.plot(bias, ratio, color=web_plots.ACCENT, linewidth=1.1, label=label)
        _legend(lower, [line])
    else:
        _note(lower, f"no normalised conductance: {note}" if note else "no normalised conductance")
    lower.set_ylabel("(dI/dV)/(I/V)\n(dimensionless)", fontsize=8.5, color=web_plots.INK)
    lower.set_xlabel("Sample bias (V)", fontsize=8.5, color=web_plots.INK)
    finite = bias[np.isfinite(bias)]
    if finite.size >= 2 and finite.min() < finite.max():
        lower.set_xlim(float(finite.min()), float(finite.max()))
    return fig


def spectrum_plot_png(record: AcquiredFile, scale: int = 1) -> bytes | None:
    """The spectrum plot of ``record`` as PNG bytes (from the cache when drawn before), or
    None when it has no stored traces."""
    traces = stored_traces(record)
    if traces is None:
        return None
    stats = record.stats or {}
    epsilon = stats.get("norm_conductance_epsilon_v")
    epsilon_v = float(epsilon) if isinstance(epsilon, int | float) else None
    key = spectrum_cache_key(record.sha256, traces, epsilon_v, scale)
    png = cache.get(key)
    if png is not None:
        return png
    fig = render_spectrum_figure(
        traces,
        epsilon_v=epsilon_v,
        note=str(stats.get("norm_conductance_error") or ""),
        scale=scale,
    )
    png = web_plots.figure_png(fig)
    cache.set(key, png, CACHE_S)
    return png
