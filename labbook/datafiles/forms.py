"""Forms of the dataset pages: the search filters (a GET form, so a search is a URL), the
metadata that goes with an upload, and the correction of what was logged about a dataset.

Quantities are typed with their unit ("-500 mV", "50 pA", "0.3 ML"); a bare number is read in
the unit shown beside the input. Values leave these forms in the unit their name carries
(``bias_v`` in V, ``setpoint_a`` in A), as the datafiles queries and actions take them.
"""

from __future__ import annotations

import re
from datetime import datetime, time, timedelta
from typing import Any

from django import forms
from django.core.exceptions import ValidationError
from django.utils import timezone

from labbook.datafiles.models import AcquiredFile, FileCoverage
from labbook.datafiles.queries import inverted_ranges
from labbook.instruments.queries import instruments_for
from labbook.samples import queries as sample_queries
from labbook.samples.forms import LabDateTimeField, lab_zone
from labbook.science.errors import QuantityError
from labbook.science.units import parse_quantity
from labbook.tips import queries as tip_queries

# pint's explanation of a dimension mismatch reads as a formula, not as advice.
_DIMENSION_NOTE = re.compile(r"\s*\(expected a quantity of dimension [^)]*\)\s*$")
_BARE_NUMBER = re.compile(r"^[+\-−]?(\d+\.?\d*|\.\d+)([eE][+\-−]?\d+)?$")

# Search bounds are inclusive, and a bound typed as "50 pA" must find the file logged as
# "50 pA" even when the two conversions round differently in the last bit.
_BOUND_SLACK = 1e-9


class QuantityField(forms.Field):
    """A quantity typed with or without a unit, cleaned to a float in ``canonical`` units.

    ``shown`` is the unit printed beside the input: a bare number is read in it ("50" in a
    setpoint field means 50 pA). A string with a unit is converted straight to ``canonical``,
    the way the readers convert the metadata they store, so equal inputs give equal floats.
    """

    #: Read by the field template for the input's ``maxlength``; checked in ``to_python``.
    max_length = 60

    def __init__(
        self, *, shown: str, canonical: str, example: str, placeholder: str = "", **kwargs: Any
    ) -> None:
        kwargs.setdefault("required", False)
        kwargs.setdefault(
            "widget", forms.TextInput(attrs={"placeholder": placeholder or f"e.g. {example}"})
        )
        super().__init__(**kwargs)
        self.shown = shown
        self.canonical = canonical
        self.example = example

    def to_python(self, value: Any) -> float | None:  # type: ignore[override]
        text = str(value or "").strip()
        if not text:
            return None
        if len(text) > self.max_length:
            raise ValidationError(f"at most {self.max_length} characters", code="max_length")
        try:
            if _BARE_NUMBER.match(text):
                shown = parse_quantity(text.replace("−", "-"), self.shown, field="value")
                return shown * parse_quantity(f"1 {self.shown}", self.canonical, field="value")
            return parse_quantity(text.replace("−", "-"), self.canonical, field="value")
        except QuantityError as exc:
            message = _DIMENSION_NOTE.sub("", str(exc)).removeprefix("value: ")
            if message.startswith("cannot read"):
                message = f"cannot read {text!r} as a quantity"
            raise ValidationError(f"{message}; type e.g. {self.example}", code="invalid") from exc


def loosened(low: float | None, high: float | None) -> tuple[float | None, float | None]:
    """Inclusive bounds widened by a part in 10⁹ (see ``_BOUND_SLACK``)."""
    return (
        None if low is None else low - abs(low) * _BOUND_SLACK,
        None if high is None else high + abs(high) * _BOUND_SLACK,
    )


class LabDayField(forms.Field):
    """A day (``2026-03-02``) or a date and time in the lab's zone; returned aware.

    ``end_of_day`` makes a bare day mean its last instant, so "until 2026-03-02" includes
    that day, as a person means it.
    """

    def __init__(self, *, end_of_day: bool = False, **kwargs: Any) -> None:
        kwargs.setdefault("required", False)
        super().__init__(**kwargs)
        self.end_of_day = end_of_day

    def to_python(self, value: Any) -> datetime | None:  # type: ignore[override]
        text = str(value or "").strip()[:40]
        if not text:
            return None
        try:
            parsed = datetime.fromisoformat(text)
        except ValueError as exc:
            raise ValidationError("give a day as YYYY-MM-DD", code="invalid") from exc
        if parsed.tzinfo is not None:
            return parsed
        if len(text) <= 10 and self.end_of_day:
            parsed = datetime.combine(parsed.date() + timedelta(days=1), time()) - timedelta(
                microseconds=1
            )
        return parsed.replace(tzinfo=lab_zone())


SORTS = {
    "newest": "newest first",
    "oldest": "oldest first",
    "bias": "bias, lowest first",
    "-bias": "bias, highest first",
}


def _kind_choices(empty: str) -> list[tuple[str, str]]:
    return [("", empty), *AcquiredFile.Kind.choices]


def _choices_in_one_query(field: forms.ModelChoiceField) -> None:
    """Read a select's options once, in one plain query: left to itself the field counts its
    queryset and then reads it through a server-side cursor (three round trips a select, for
    every render of the search page). Validation still goes through the queryset."""
    field.choices = [
        ("", field.empty_label),
        *((obj.pk, field.label_from_instance(obj)) for obj in list(field.queryset)),
    ]


class SearchForm(forms.Form):
    """The filters of the dataset search. Every field is optional; an empty form finds all."""

    q = forms.CharField(
        required=False,
        max_length=200,
        label="Text",
        widget=forms.TextInput(attrs={"placeholder": "file, channel or sample name"}),
    )
    # The placeholders are short: the search's inputs sit two to a row beside their unit.
    bias_min = QuantityField(
        label="Bias from", shown="V", canonical="V", example="-1 V", placeholder="-1"
    )
    bias_max = QuantityField(
        label="Bias to", shown="V", canonical="V", example="500 mV", placeholder="0.5"
    )
    setpoint_min = QuantityField(
        label="Setpoint from", shown="pA", canonical="A", example="10 pA", placeholder="10"
    )
    setpoint_max = QuantityField(
        label="Setpoint to", shown="pA", canonical="A", example="1 nA", placeholder="1000"
    )
    coverage_min = QuantityField(
        label="Coverage from", shown="ML", canonical="ML", example="0.1 ML", placeholder="0.1"
    )
    coverage_max = QuantityField(
        label="Coverage to", shown="ML", canonical="ML", example="1 ML", placeholder="1"
    )
    adsorbate = forms.ChoiceField(required=False, label="Coverage of")
    sample = forms.ModelChoiceField(queryset=None, required=False, empty_label="any sample")
    tip = forms.ModelChoiceField(queryset=None, required=False, empty_label="any tip")
    instrument = forms.ModelChoiceField(queryset=None, required=False, empty_label="any instrument")
    kind = forms.ChoiceField(required=False, choices=_kind_choices("any kind"))
    status = forms.ChoiceField(
        required=False,
        choices=[("", "any state"), *AcquiredFile.Status.choices],
        label="State",
    )
    since = LabDayField(label="Acquired from")
    until = LabDayField(label="Acquired until", end_of_day=True)
    sort = forms.ChoiceField(required=False, choices=list(SORTS.items()), label="Order")

    #: Filters beyond the text and the order: the ones that say "a search is narrowed".
    FILTERS = (
        "bias_min",
        "bias_max",
        "setpoint_min",
        "setpoint_max",
        "coverage_min",
        "coverage_max",
        "adsorbate",
        "sample",
        "tip",
        "instrument",
        "kind",
        "status",
        "since",
        "until",
    )

    def __init__(self, *args: Any, user, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.fields["sample"].queryset = sample_queries.samples().order_by("name")
        self.fields["tip"].queryset = tip_queries.tips().order_by("name")
        self.fields["instrument"].queryset = instruments_for(user)
        for name in ("sample", "tip", "instrument"):
            _choices_in_one_query(self.fields[name])
        materials = (
            FileCoverage.objects.order_by("material").values_list("material", flat=True).distinct()
        )
        self.fields["adsorbate"].choices = [
            ("", "all adsorbates together"),
            *((m, m) for m in materials),
        ]

    def clean(self) -> dict[str, Any]:
        data = super().clean()
        for _, high in inverted_ranges(data):
            self.add_error(high, "is below the lower bound; swap them")
        return data

    def criteria(self) -> dict[str, Any]:
        """The cleaned filters as ``FileSearch`` takes them (ids, SI units, loosened bounds)."""
        data = self.cleaned_data
        found: dict[str, Any] = {}
        for low, high in (
            ("bias_min", "bias_max"),
            ("setpoint_min", "setpoint_max"),
            ("coverage_min", "coverage_max"),
        ):
            found[low], found[high] = loosened(data.get(low), data.get(high))
        for name in ("sample", "tip", "instrument"):
            found[name] = data[name].pk if data.get(name) is not None else None
        for name in ("adsorbate", "kind", "status", "q"):
            found[name] = data.get(name) or None
        found["since"], found["until"] = data.get("since"), data.get("until")
        return found

    def active_filters(self) -> list[str]:
        """Labels of the filters that narrow this search (for the summary above the grid)."""
        if not self.is_bound or not hasattr(self, "cleaned_data"):
            return []
        return [
            str(self.fields[name].label or name).lower()
            for name in self.FILTERS
            if self.cleaned_data.get(name) not in (None, "")
        ]

    @property
    def order(self) -> str:
        value = self.cleaned_data.get("sort") if hasattr(self, "cleaned_data") else ""
        return value if value in SORTS else "newest"


class UploadForm(forms.Form):
    """What is known about the files of one upload; every field optional. The files come
    from ``request.FILES`` directly: a file field would refuse an empty file, and an empty
    file must still be kept, as unreadable, with its reason (nothing is lost)."""

    kind = forms.ChoiceField(required=False, choices=_kind_choices("as the file says"))
    instrument = forms.ModelChoiceField(queryset=None, required=False, empty_label="not given")
    sample = forms.ModelChoiceField(
        queryset=None, required=False, empty_label="the one on the stage then"
    )
    tip = forms.ModelChoiceField(
        queryset=None, required=False, empty_label="the one in the scanner then"
    )
    bias = QuantityField(label="Bias", shown="V", canonical="V", example="-0.5 V")
    setpoint = QuantityField(label="Setpoint", shown="pA", canonical="A", example="50 pA")
    acquired_at = LabDateTimeField(required=False, label="Acquired")

    def __init__(self, *args: Any, user, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.fields["instrument"].queryset = instruments_for(user)
        self.fields["sample"].queryset = sample_queries.samples().order_by("name")
        self.fields["tip"].queryset = tip_queries.tips().order_by("name")

    def metadata(self) -> dict[str, Any]:
        """The upload's metadata JSON in the field names the readers normalise (DESIGN §4)."""
        data = self.cleaned_data
        given: dict[str, Any] = {}
        if data.get("kind"):
            given["kind"] = data["kind"]
        for name in ("instrument", "sample", "tip"):
            if data.get(name) is not None:
                given[name] = data[name].pk
        if data.get("bias") is not None:
            given["bias_v"] = data["bias"]
        if data.get("setpoint") is not None:
            given["setpoint_a"] = data["setpoint"]
        if data.get("acquired_at") is not None:
            given["acquired_at"] = data["acquired_at"].isoformat()
        return given


class CorrectionForm(forms.Form):
    """Correct the instrument, sample, tip or acquisition time of one dataset.

    Empty sample or tip means "as the records say": the lineage then finds what was on the
    stage or in the scanner at the acquisition time. Only the fields that differ from the
    record are handed to ``correct_file``, so the history shows what was really changed.
    """

    instrument = forms.ModelChoiceField(queryset=None, required=False, empty_label="not known")
    sample = forms.ModelChoiceField(queryset=None, required=False, empty_label="from the records")
    tip = forms.ModelChoiceField(queryset=None, required=False, empty_label="from the records")
    acquired_at = LabDateTimeField(required=False, label="Acquired")

    def __init__(self, *args: Any, record: AcquiredFile, user, **kwargs: Any) -> None:
        kwargs.setdefault("initial", self.initial_for(record))
        super().__init__(*args, **kwargs)
        self.record = record
        self.fields["instrument"].queryset = instruments_for(user)
        self.fields["sample"].queryset = sample_queries.samples().order_by("name")
        self.fields["tip"].queryset = tip_queries.tips().order_by("name")

    @staticmethod
    def initial_for(record: AcquiredFile) -> dict[str, Any]:
        given = record.given_metadata or {}
        acquired = record.acquired_at
        return {
            "instrument": record.instrument_id,
            "sample": _explicit_id(given.get("sample"), sample_queries.samples()),
            "tip": _explicit_id(given.get("tip"), tip_queries.tips()),
            "acquired_at": ""
            if acquired is None
            else timezone.localtime(acquired, lab_zone()).strftime("%Y-%m-%dT%H:%M"),
        }

    def clean_instrument(self):
        value = self.cleaned_data.get("instrument")
        if value is None and self.record.instrument_id is not None:
            # The lineage falls back to the stored instrument, so "none" would change nothing.
            raise ValidationError("choose the instrument it was taken on", code="required")
        return value

    def changes(self) -> dict[str, Any]:
        """What differs from the record, as ``correct_file`` takes it (ids, aware times)."""
        data = self.cleaned_data
        initial = self.initial_for(self.record)
        found: dict[str, Any] = {}
        for name in ("instrument", "sample", "tip"):
            chosen = data.get(name)
            chosen_id = None if chosen is None else chosen.pk
            if chosen_id != initial[name]:
                found[name] = chosen_id
        acquired = data.get("acquired_at")
        if acquired is not None and self.record.acquired_at is not None:
            # The form shows minutes: an unchanged field must not shift the time by seconds.
            shown = timezone.localtime(self.record.acquired_at, lab_zone()).replace(
                second=0, microsecond=0
            )
            if acquired != shown:
                found["acquired_at"] = acquired
        elif acquired is not None:
            found["acquired_at"] = acquired
        return found


def _explicit_id(value: Any, choices) -> int | None:
    """The id of a record named in the upload's metadata (by id or by name), if it exists."""
    if value in (None, ""):
        return None
    if isinstance(value, int) or (isinstance(value, str) and value.isdigit()):
        return choices.filter(pk=int(value)).values_list("pk", flat=True).first()
    return choices.filter(name=str(value)).values_list("pk", flat=True).first()
