"""A search whose bounds cannot find anything because of how they were typed (the low end
above the high one, a bound that is not a number) is refused and named, on the page and in
the API alike, instead of answering an empty list that reads as "no such data"."""

from __future__ import annotations

import pytest

from labbook.datafiles.queries import RANGES, inverted_ranges

pytestmark = pytest.mark.django_db


def test_inverted_ranges_names_each_pair_given_the_wrong_way_round():
    assert inverted_ranges({"bias_min": 0.5, "bias_max": 0.1}) == [("bias_min", "bias_max")]
    assert inverted_ranges({"bias_min": 0.1, "bias_max": 0.1}) == []  # one bias exactly
    assert inverted_ranges({"bias_min": 0.5, "coverage_min": 2.0, "coverage_max": 1.0}) == [
        ("coverage_min", "coverage_max")
    ]
    assert [low for low, _ in RANGES] == ["bias_min", "setpoint_min", "coverage_min", "since"]


def test_the_api_refuses_swapped_bounds_and_names_them(member, api_as):
    api = api_as(member)
    answer = api.get("/files?bias_min=0.5&bias_max=0.1&setpoint_min=2e-10&setpoint_max=1e-10")
    assert answer.status_code == 422
    text = answer.json()["detail"]
    assert "bias_max is below bias_min: swap them" in text
    assert "setpoint_max is below setpoint_min: swap them" in text
    swapped_times = api.get("/files?since=2026-05-02T00:00:00Z&until=2026-05-01T00:00:00Z")
    assert swapped_times.status_code == 422 and "until is below since" in str(swapped_times.json())
    assert api.get("/files?bias_min=0.1&bias_max=0.5").status_code == 200


@pytest.mark.parametrize("value", ["nan", "inf", "-inf"])
def test_the_api_refuses_a_bound_that_is_not_a_finite_number(member, api_as, value):
    answer = api_as(member).get(f"/files?bias_min={value}")
    assert answer.status_code == 422
    assert "bias_min" in str(answer.json())


def test_the_page_still_says_swap_them_beside_the_field(client, member):
    client.force_login(member)
    text = client.get("/datasets/?bias_min=0.5&bias_max=0.1").content.decode()
    assert "is below the lower bound; swap them" in text
