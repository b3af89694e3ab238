"""Time series reduced for plotting, without losing what matters in them.

A year of one gauge at a reading every 10 s is about 3.2 million points; a plot has about a
thousand pixel columns. Averaging each column's points (or taking every n-th) would flatten a
pressure burst of a few readings into nothing, and a burst is exactly what a reader of a vacuum
log is looking for. :func:`minmax_buckets` keeps, for each time bucket, the smallest and the
largest value, so a band drawn from the minima to the maxima still reaches the top of every
burst and the bottom of every dip (the classic "min/max decimation" of oscilloscopes and
monitoring plots).

Pure numpy: no Django, no matplotlib.
"""

from __future__ import annotations

import numpy as np

from labbook.science.errors import ScienceInputError


def minmax_buckets(
    t_seconds,
    values,
    buckets: int,
    *,
    start: float | None = None,
    end: float | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Split [start, end] into ``buckets`` equal stretches of time and return, for every
    stretch that holds readings, its time and the smallest and largest value in it.

    ``t_seconds`` must be non-decreasing (readings come out of the database in time order; a
    series that is not is a caller's bug, and silently sorting it would hide that). ``start``
    and ``end`` default to the first and last instant; points outside them, and values that
    are NaN or infinite (a gauge that was switched off), are left out.

    Returns ``(t, low, high)`` as float arrays of one length, oldest first. A bucket's ``t`` is
    the middle of its own first and last reading, so it never lies outside the data. Empty
    buckets are left out, so a gap in the log stays a gap in the arrays (the plot decides how
    to draw it). When there are no more points than buckets, each point is its own bucket and
    ``low == high`` is the value itself: nothing is reduced that did not need to be.
    """
    if isinstance(buckets, bool) or not isinstance(buckets, int | np.integer) or buckets < 1:
        raise ScienceInputError(
            f"buckets must be a whole number of at least 1, got {buckets!r}", argument="buckets"
        )
    t = np.asarray(t_seconds, dtype=float).ravel()
    v = np.asarray(values, dtype=float).ravel()
    if t.shape != v.shape:
        raise ScienceInputError(
            f"t_seconds and values differ in length ({t.size} and {v.size})", argument="values"
        )
    if t.size and not np.all(np.isfinite(t)):
        raise ScienceInputError("t_seconds holds NaN or infinite instants", argument="t_seconds")
    # A comparison of neighbours, not np.diff: a boolean array is an eighth of the memory.
    if t.size > 1 and np.any(t[1:] < t[:-1]):
        raise ScienceInputError(
            "t_seconds must be in time order (non-decreasing)", argument="t_seconds"
        )
    if start is not None and end is not None and end < start:
        raise ScienceInputError(f"end {end!r} is before start {start!r}", argument="end")

    # Since t is in order, the window is a slice (a view, no copy) found by bisection.
    first = 0 if start is None else int(np.searchsorted(t, start, side="left"))
    stop = t.size if end is None else int(np.searchsorted(t, end, side="right"))
    t, v = t[first:stop], v[first:stop]
    finite = np.isfinite(v)
    if not finite.all():
        t, v = t[finite], v[finite]
    if t.size == 0:
        empty = np.empty(0, dtype=float)
        return empty, empty.copy(), empty.copy()
    if t.size <= buckets:
        return t.copy(), v.copy(), v.copy()

    lo = float(t[0] if start is None else start)
    hi = float(t[-1] if end is None else end)
    width = (hi - lo) / buckets
    if width <= 0:  # every reading at one instant
        return np.array([t[0]]), np.array([v.min()]), np.array([v.max()])
    # Each bucket is one contiguous run of points (t is in order), so its first point is found
    # by bisection at the bucket's left edge: ``buckets`` binary searches instead of a bucket
    # number for each of millions of points. The point at ``end`` falls in the last bucket.
    firsts = np.searchsorted(t, lo + width * np.arange(buckets), side="left")
    counts = np.diff(firsts, append=t.size)
    filled = counts > 0
    firsts, counts = firsts[filled], counts[filled]
    lasts = firsts + counts - 1
    low = np.minimum.reduceat(v, firsts)
    high = np.maximum.reduceat(v, firsts)
    middle = (t[firsts] + t[lasts]) / 2.0
    return middle, low, high
