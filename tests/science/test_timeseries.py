"""Min/max downsampling of logged series for plots: a burst survives, nothing is invented."""

import numpy as np
import pytest

from labbook.science.errors import ScienceInputError
from labbook.science.timeseries import minmax_buckets

RNG = np.random.default_rng(7)


def reference_buckets(t, v, buckets, start, end):
    """The definition, one bucket at a time in plain Python: the outside reference."""
    width = (end - start) / buckets
    out = []
    for b in range(buckets):
        lo_edge = start + b * width
        members = [
            (ti, vi)
            for ti, vi in zip(t, v, strict=True)
            if start <= ti <= end and min(int((ti - start) / width), buckets - 1) == b
        ]
        if members:
            times = [m[0] for m in members]
            values = [m[1] for m in members]
            out.append(((times[0] + times[-1]) / 2, min(values), max(values)))
        assert lo_edge >= start
    return out


def test_a_single_spike_in_100000_points_survives_500_buckets():
    # A UHV gauge at ~2e-10 mbar with 1 % noise, and one reading of a burst to 3e-7 mbar.
    t = np.arange(100_000, dtype=float) * 10.0
    p = 2e-10 * (1 + 0.01 * RNG.standard_normal(t.size))
    p[61_237] = 3e-7
    bt, low, high = minmax_buckets(t, p, 500)
    assert bt.size == low.size == high.size == 500
    assert high.max() == 3e-7
    spike_bucket = int(np.argmax(high))
    # The bucket that carries it is the one around the spike's time (200 points a bucket).
    assert abs(bt[spike_bucket] - t[61_237]) <= 100 * 10.0
    # Everywhere else the band stays at the base pressure.
    others = np.delete(high, spike_bucket)
    assert others.max() < 3e-10
    assert low.min() == p.min()


def test_a_dip_survives_as_well():
    t = np.linspace(0, 1000, 50_001)
    level = np.full(t.size, 80.0)
    level[12_345] = 5.0  # a level meter glitch is as much a fact as a burst
    _, low, high = minmax_buckets(t, level, 100)
    assert low.min() == 5.0
    assert high.max() == 80.0


def test_matches_the_definition_bucket_by_bucket():
    t = np.sort(RNG.uniform(0, 3600, 2_000))
    v = RNG.standard_normal(t.size)
    bt, low, high = minmax_buckets(t, v, 37, start=-100.0, end=3700.0)
    expected = reference_buckets(t, v, 37, -100.0, 3700.0)
    assert len(expected) == bt.size
    assert bt == pytest.approx([e[0] for e in expected], abs=1e-9)
    assert low.tolist() == [e[1] for e in expected]
    assert high.tolist() == [e[2] for e in expected]


def test_empty_buckets_are_left_out_so_a_gap_stays_a_gap():
    # Readings for an hour, a logger outage of two hours, readings for another hour.
    t = np.concatenate([np.arange(0, 3600, 10.0), np.arange(3 * 3600, 4 * 3600, 10.0)])
    v = np.ones(t.size)
    bt, _, _ = minmax_buckets(t, v, 40, start=0.0, end=4 * 3600.0)
    assert bt.size == 20  # 10 buckets an hour, 2 hours of them empty
    assert not np.any((bt > 3600) & (bt < 3 * 3600))


def test_fewer_points_than_buckets_come_back_unchanged():
    t = np.array([0.0, 600.0, 1200.0])
    v = np.array([1e-10, 2e-10, 1.5e-10])
    bt, low, high = minmax_buckets(t, v, 1000, start=0.0, end=86_400.0)
    assert bt.tolist() == t.tolist()
    assert low.tolist() == v.tolist() == high.tolist()


def test_start_and_end_cut_the_series_and_every_point_lands_in_a_bucket():
    t = np.arange(0, 101, dtype=float)
    v = t.copy()
    bt, low, high = minmax_buckets(t, v, 10, start=20.0, end=60.0)
    assert low.min() == 20.0 and high.max() == 60.0  # the point at ``end`` is in the last bucket
    assert bt.size == 10
    assert np.all(np.diff(bt) > 0)


def test_non_finite_values_are_left_out():
    t = np.arange(10, dtype=float)
    v = np.array([1, 2, np.nan, 4, np.inf, 6, 7, -np.inf, 9, 10], dtype=float)
    bt, low, high = minmax_buckets(t, v, 2)
    assert np.all(np.isfinite(low)) and np.all(np.isfinite(high))
    assert low.min() == 1 and high.max() == 10


def test_empty_input_gives_empty_arrays():
    bt, low, high = minmax_buckets([], [], 500)
    assert bt.size == low.size == high.size == 0
    assert bt.dtype == np.float64
    bt, low, high = minmax_buckets([1.0, 2.0], [np.nan, np.nan], 5)
    assert bt.size == 0


def test_all_readings_at_one_instant_make_one_bucket():
    bt, low, high = minmax_buckets([5.0, 5.0, 5.0], [3.0, 1.0, 2.0], 2)
    assert bt.tolist() == [5.0] and low.tolist() == [1.0] and high.tolist() == [3.0]


@pytest.mark.parametrize(
    ("t", "v", "buckets", "argument"),
    [
        ([0.0, 2.0, 1.0, 3.0], [1, 2, 3, 4], 2, "t_seconds"),  # out of time order
        ([0.0, np.nan], [1, 2], 1, "t_seconds"),
        ([0.0, 1.0], [1.0], 1, "values"),
        ([0.0, 1.0], [1.0, 2.0], 0, "buckets"),
        ([0.0, 1.0], [1.0, 2.0], 2.5, "buckets"),
        ([0.0, 1.0], [1.0, 2.0], True, "buckets"),
    ],
)
def test_bad_input_is_refused_naming_the_argument(t, v, buckets, argument):
    with pytest.raises(ScienceInputError) as caught:
        minmax_buckets(t, v, buckets)
    assert caught.value.argument == argument


def test_end_before_start_is_refused():
    with pytest.raises(ScienceInputError) as caught:
        minmax_buckets([0.0, 1.0], [1.0, 2.0], 2, start=5.0, end=1.0)
    assert caught.value.argument == "end"
