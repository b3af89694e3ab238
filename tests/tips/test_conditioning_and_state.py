"""Conditioning events with units in their parameters, and the tip state at a time."""

from __future__ import annotations

from datetime import timedelta

import pytest
from django.core.exceptions import ValidationError

from labbook.tips import actions, queries
from tests.tips.conftest import T0

pytestmark = pytest.mark.django_db

H = timedelta(hours=1)


def test_parameters_are_read_in_the_unit_their_key_names(member, instrument, tip):
    actions.mount_tip(tip, instrument, start=T0, actor=member)
    typed = {"voltage_v": "100 V", "current_a": "1 uA", "duration_s": "30 s", "species": "CO"}
    emission = actions.record_conditioning(
        tip, kind="field_emission", at=T0 + H, params=typed, actor=member
    )
    assert emission.params == {
        "voltage_v": 100.0,
        "current_a": pytest.approx(1e-6),
        "duration_s": 30.0,
        "species": "CO",
    }
    assert emission.params_raw == typed
    poke = actions.record_conditioning(
        tip, kind="indentation", at=T0 + 2 * H, params={"depth_m": "2 nm"}, actor=member
    )
    assert poke.params["depth_m"] == pytest.approx(2e-9)
    assert poke.instrument == instrument  # where the tip was mounted
    assert poke.history.get().history_user == member


def test_other_unit_suffixes_and_plain_values_are_kept(member, instrument, tip):
    actions.mount_tip(tip, instrument, start=T0, actor=member)
    event = actions.record_conditioning(
        tip,
        kind="field_emission",
        at=T0 + H,
        params={"resistance_ohm": "100 kohm", "bias_v": -3, "pulses": 5, "place": "clean terrace"},
        actor=member,
    )
    assert event.params == {
        "resistance_ohm": 100_000.0,
        "bias_v": -3.0,
        "pulses": 5,
        "place": "clean terrace",
    }


def test_every_bad_parameter_is_named(member, instrument, tip):
    actions.mount_tip(tip, instrument, start=T0, actor=member)
    with pytest.raises(ValidationError) as refused:
        actions.record_conditioning(
            tip,
            kind="pulse",
            at=T0 + H,
            params={"voltage_v": "3 nm", "duration_s": "fast", "shape": {"rise_s": 1}},
            actor=member,
        )
    errors = refused.value.message_dict
    assert sorted(errors) == ["params.duration_s", "params.shape", "params.voltage_v"]
    assert "cannot be converted to V" in errors["params.voltage_v"][0]


def test_a_functionalisation_names_its_species(member, instrument, tip):
    actions.mount_tip(tip, instrument, start=T0, actor=member)
    with pytest.raises(ValidationError) as refused:
        actions.record_conditioning(tip, kind="functionalisation", at=T0 + H, actor=member)
    assert "params.species" in refused.value.message_dict


def test_conditioning_a_tip_in_no_scanner_needs_the_instrument(member, instrument, tip):
    with pytest.raises(ValidationError) as refused:
        actions.record_conditioning(tip, kind="other", at=T0, actor=member)
    assert (
        "was in no scanner at 2026-03-02 09:00 UTC" in refused.value.message_dict["instrument"][0]
    )
    annealed = actions.record_conditioning(
        tip,
        kind="other",
        at=T0,
        params={"temperature_k": "600 degC", "place": "preparation chamber e-beam heater"},
        instrument=instrument,
        actor=member,
    )
    assert annealed.instrument == instrument
    assert annealed.params["temperature_k"] == pytest.approx(873.15)


def test_an_instrument_contradicting_the_mount_is_refused(
    member, instrument, other_instrument, tip
):
    mount = actions.mount_tip(tip, instrument, start=T0, actor=member).mount
    with pytest.raises(ValidationError) as refused:
        actions.record_conditioning(
            tip, kind="pulse", at=T0 + H, instrument=other_instrument, actor=member
        )
    assert f"mount #{mount.pk}" in refused.value.message_dict["instrument"][0]


def test_tip_state_is_the_mounted_tip_and_the_events_since_the_mount(
    member, instrument, other_instrument, tip, django_assert_max_num_queries
):
    # An earlier stay in the other microscope, with its own conditioning.
    actions.mount_tip(tip, other_instrument, start=T0, end=T0 + H, actor=member)
    before = actions.record_conditioning(
        tip, kind="indentation", at=T0 + H / 2, params={"depth_m": "1 nm"}, actor=member
    )
    mount = actions.mount_tip(tip, instrument, start=T0 + 2 * H, actor=member).mount
    emission = actions.record_conditioning(
        tip, kind="field_emission", at=T0 + 3 * H, params={"voltage_v": 100}, actor=member
    )
    pickup = actions.record_conditioning(
        tip, kind="functionalisation", at=T0 + 4 * H, params={"species": "CO"}, actor=member
    )
    later = actions.record_conditioning(tip, kind="pulse", at=T0 + 6 * H, actor=member)

    with django_assert_max_num_queries(2):
        state = queries.tip_state(instrument, T0 + 5 * H)
    assert state.tip == tip and state.mount == mount
    assert state.events == [emission, pickup]
    assert before not in state.events and later not in state.events
    assert state.apex_species == "CO"

    # A pulse after the pick-up reshapes the apex: the CO is gone.
    assert queries.tip_state(tip, T0 + 7 * H).events == [emission, pickup, later]
    assert queries.tip_state(tip, T0 + 7 * H).apex_species is None

    # In the other microscope at 40 min: the earlier stay's own state.
    earlier = queries.tip_state(other_instrument, T0 + 40 * timedelta(minutes=1))
    assert earlier.events == [before] and earlier.instrument == other_instrument
    # Between the stays the tip was in no scanner; no instrument had a tip.
    assert queries.tip_state(instrument, T0 + 90 * timedelta(minutes=1)) is None
    between = queries.tip_state(tip, T0 + 90 * timedelta(minutes=1))
    assert between.mount is None and between.events == []


def test_tip_state_costs_two_queries_however_long_the_history(
    member, instrument, tip, django_assert_max_num_queries
):
    actions.mount_tip(tip, instrument, start=T0, actor=member)
    for minute in range(40):
        actions.record_conditioning(
            tip, kind="pulse", at=T0 + timedelta(minutes=minute + 1), actor=member
        )
    with django_assert_max_num_queries(2):
        state = queries.tip_state(tip, T0 + H)
    assert len(state.events) == 40
