"""The display filters: notation of values with units, ages, staleness, and escaping."""

from __future__ import annotations

from datetime import timedelta
from types import SimpleNamespace

import pytest
from django.template import engines

from labbook.web.templatetags.labbook_format import (
    channel_value,
    display_unit,
    format_age,
    format_quantity,
    formula,
    is_stale,
    kind_note,
    scientific,
    thousands,
)

NB = "\u00a0"


def render(source: str, **context) -> str:
    return engines["django"].from_string("{% load labbook_format %}" + source).render(context)


@pytest.mark.parametrize(
    ("value", "digits", "expected"),
    [
        (2.34e-10, 2, "2.3×10⁻¹⁰"),
        (2.35e-10, 3, "2.35×10⁻¹⁰"),
        (9.96e-11, 2, "1.0×10⁻¹⁰"),  # rounding carries into the next decade
        (1013.25, 2, "1.0×10³"),
        (5.0, 2, "5.0"),
        (-3.2e-6, 2, "-3.2×10⁻⁶"),
        (0, 2, "0"),
        (1e-12, 1, "1×10⁻¹²"),
    ],
)
def test_scientific(value, digits, expected):
    assert scientific(value, digits) == expected


def test_scientific_of_nothing_and_of_non_numbers():
    assert scientific(None) == "—"
    assert scientific("") == "—"
    assert scientific("not a number") == "—"
    assert scientific(float("nan")) == "NaN"
    assert scientific(float("inf")) == "∞"


@pytest.mark.parametrize(
    ("value", "unit", "quantity", "expected"),
    [
        # pressures: scientific whatever the size, by unit or by the channel's quantity
        (2.3e-10, "mbar", None, f"2.3×10⁻¹⁰{NB}mbar"),
        (4.1e-8, "Pa", None, f"4.1×10⁻⁸{NB}Pa"),
        (7.6e-11, "Torr", None, f"7.6×10⁻¹¹{NB}Torr"),
        (1000.0, "mbar", None, f"1.0×10³{NB}mbar"),
        (3.3e-9, "gauge units", "pressure", f"3.3×10⁻⁹{NB}gauge units"),
        # temperatures and levels: three significant figures, no prefix on K or %
        (4.523, "K", "temperature", f"4.52{NB}K"),
        (77.35, "K", "temperature", f"77.3{NB}K"),
        (295.0, "K", "temperature", f"295{NB}K"),
        (1180.4, "K", "temperature", f"1180{NB}K"),
        (63.04, "%", "cryogen_level", f"63.0{NB}%"),
        (0.0, "%", "cryogen_level", f"0{NB}%"),
        (12.0, "degC", None, f"12.0{NB}°C"),
        # base SI units take a prefix
        (1.5e-9, "A", None, f"1.50{NB}nA"),
        (0.35, "V", None, f"350{NB}mV"),
        (-2.0, "V", None, f"-2.00{NB}V"),
        (1500.0, "V", None, f"1.50{NB}kV"),
        (999.96e-12, "A", None, f"1.00{NB}nA"),  # rounding carries into the next prefix
        (12e-9, "m", None, f"12.0{NB}nm"),
        # very small or large values of other units fall back to scientific
        (2e-5, "L/h", None, f"2.00×10⁻⁵{NB}L/h"),
        (3.4e7, "counts", None, f"3.40×10⁷{NB}counts"),
        # no unit at all
        (0.5, "", None, "0.500"),
    ],
)
def test_format_quantity(value, unit, quantity, expected):
    assert format_quantity(value, unit, quantity=quantity) == expected


def test_format_quantity_without_a_value_is_a_dash():
    assert format_quantity(None, "mbar") == "—"


def test_channel_value_uses_the_channels_unit_and_quantity():
    gauge = SimpleNamespace(unit="mbar", quantity="pressure")
    bath = SimpleNamespace(unit="%", quantity="cryogen_level")
    assert channel_value(5.2e-11, gauge) == f"5.2×10⁻¹¹{NB}mbar"
    assert channel_value(48.26, bath) == f"48.3{NB}%"
    assert channel_value(None, gauge) == "—"


def test_display_unit():
    assert display_unit("degC") == "°C"
    assert display_unit("ohm") == "Ω"
    assert display_unit(" mbar ") == "mbar"
    assert display_unit(None) == ""


@pytest.mark.parametrize(
    ("age", "expected"),
    [
        (timedelta(seconds=2), "just now"),
        (timedelta(seconds=42), f"42{NB}s ago"),
        (timedelta(minutes=4, seconds=50), f"4{NB}min ago"),
        (timedelta(minutes=59, seconds=59), f"59{NB}min ago"),
        (timedelta(hours=3, minutes=40), f"3{NB}h ago"),
        (timedelta(hours=47), f"47{NB}h ago"),
        (timedelta(days=9, hours=5), f"9{NB}d ago"),
        (timedelta(minutes=-3), "ahead of now"),
        (None, "never"),
        (300, f"5{NB}min ago"),  # plain seconds are accepted too
    ],
)
def test_format_age(age, expected):
    assert format_age(age) == expected


def test_stale_after_one_hour_by_default():
    assert not is_stale(timedelta(minutes=59))
    assert not is_stale(timedelta(hours=1))
    assert is_stale(timedelta(hours=1, seconds=1))
    assert not is_stale(None)  # never read is not "stale"; the page says so in words


def test_stale_threshold_can_be_given_in_seconds():
    assert is_stale(timedelta(minutes=11), 600)
    assert not is_stale(timedelta(minutes=9), "600")


def test_thousands():
    assert thousands(1234567) == "1\u202f234\u202f567"
    assert thousands(12) == "12"
    assert thousands(None) == "—"


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("N2", "N₂"),
        ("CO2", "CO₂"),
        ("C60", "C₆₀"),
        ("H2O", "H₂O"),
        ("Ar", "Ar"),
        ("NaCl", "NaCl"),
        ("air (dry)", "air (dry)"),
        ("n2", "n2"),  # not a formula as typed: left alone
        (None, ""),
    ],
)
def test_formula_subscripts_counts(text, expected):
    assert formula(text) == expected


@pytest.mark.parametrize(
    ("kind", "name", "expected"),
    [
        ("preparation chamber", "Prep", ""),
        ("microscope chamber", "Microscope", ""),
        ("load lock", "Load lock", ""),
        ("microscope chamber", "Main", "microscope chamber"),
        ("other", "Garage", "other"),
        ("", "Main", ""),
    ],
)
def test_kind_note_drops_what_the_name_already_says(kind, name, expected):
    assert kind_note(kind, name) == expected


def test_filters_in_a_template():
    reading = SimpleNamespace(
        value=2.3e-10,
        channel=SimpleNamespace(unit="mbar", quantity="pressure"),
        age=timedelta(hours=2),
    )
    out = render(
        "{{ r.value|channel_value:r.channel }}|{{ r.age|age }}|"
        "{% if r.age|is_stale %}stale{% endif %}",
        r=reading,
    )
    assert out == f"2.3×10⁻¹⁰{NB}mbar|2{NB}h ago|stale"


def test_user_typed_units_stay_escaped():
    channel = SimpleNamespace(unit="<script>alert(1)</script>", quantity="other")
    out = render(
        "{{ v|channel_value:c }} {{ c.unit|unit }} {{ v|quantity:c.unit }}", v=1.0, c=channel
    )
    assert "<script>" not in out
    assert out.count("&lt;script&gt;") == 3
