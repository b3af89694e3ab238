"""Forms of the logbook pages: the timeline's filters, starting and ending a session, a note.

They read what was typed; ``labbook.logbook.actions`` decides (one open session per operator,
whose logbook a note belongs to) and its errors are put back beside the inputs.
"""

from __future__ import annotations

from datetime import date, datetime, time, timedelta
from typing import Any

from django import forms
from django.core.exceptions import ValidationError

from labbook.instruments.queries import instruments_for
from labbook.logbook.queries import timeline_kinds
from labbook.samples.forms import LabDateTimeField, lab_zone
from labbook.tips.queries import tips

#: How each kind of entry is called on the page; kinds other apps add later get a label made
#: from their name (``kind_label``).
KIND_LABELS = {
    "session": "Sessions",
    "note": "Notes",
    "preparation": "Preparations",
    "sample_transfer": "Sample transfers",
    "tip_mount": "Tip mounts",
    "conditioning": "Tip conditioning",
    "instrument_event": "Instrument events",
}


KIND_NAMES = {
    "session": "session",
    "note": "note",
    "preparation": "preparation",
    "sample_transfer": "sample transfer",
    "tip_mount": "tip mount",
    "conditioning": "tip conditioning",
    "instrument_event": "instrument event",
}


def kind_label(kind: str) -> str:
    """What a filter checkbox says: 'Tip conditioning'."""
    return KIND_LABELS.get(kind) or kind.replace("_", " ").capitalize()


def kind_name(kind: str) -> str:
    """What one entry of the kind is called: 'tip conditioning', 'sample transfer'."""
    return KIND_NAMES.get(kind) or kind.replace("_", " ")


class ActionErrorsMixin:
    def add_action_errors(self, error: ValidationError) -> None:
        if not hasattr(error, "error_dict"):
            self.add_error(None, error)  # type: ignore[attr-defined]
            return
        for name, problems in error.error_dict.items():
            target = name if name in self.fields else None  # type: ignore[attr-defined]
            for problem in problems:
                self.add_error(target, " ".join(problem.messages))  # type: ignore[attr-defined]


def _day_start(day: date) -> datetime:
    return datetime.combine(day, time.min, tzinfo=lab_zone())


class TimelineFilterForm(forms.Form):
    """Kinds (checkboxes, none ticked = all), text, and a span of days in the lab's zone."""

    kind = forms.MultipleChoiceField(required=False, label="Show")
    q = forms.CharField(required=False, max_length=200, label="Text")
    since = forms.DateField(required=False, label="From")
    until = forms.DateField(required=False, label="To")

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.fields["kind"].choices = [(k, kind_label(k)) for k in timeline_kinds()]

    def clean(self) -> dict[str, Any]:
        data = super().clean()
        since, until = data.get("since"), data.get("until")
        if since and until and until < since:
            self.add_error("until", "must not be before the first day")
        return data

    def window(self) -> tuple[datetime | None, datetime | None]:
        """The days as instants: from the first day's midnight to the end of the last day."""
        if not self.is_valid():
            return None, None
        since, until = self.cleaned_data.get("since"), self.cleaned_data.get("until")
        start = _day_start(since) if since else None
        # The last instant of the day: timeline windows are closed at both ends.
        end = _day_start(until + timedelta(days=1)) - timedelta(microseconds=1) if until else None
        return start, end

    def kinds(self) -> list[str]:
        return list(self.cleaned_data.get("kind") or []) if self.is_valid() else []

    def text(self) -> str:
        return (self.cleaned_data.get("q") or "").strip() if self.is_valid() else ""


class SessionStartForm(ActionErrorsMixin, forms.Form):
    goal = forms.CharField(required=False, max_length=2000, label="Goal", widget=forms.Textarea)
    start = LabDateTimeField(label="Started", error_messages={"required": "give the time"})


class SessionEndForm(ActionErrorsMixin, forms.Form):
    summary = forms.CharField(
        required=False, max_length=4000, label="What came of it", widget=forms.Textarea
    )
    end = LabDateTimeField(label="Ended", error_messages={"required": "give the time"})


class NoteForm(ActionErrorsMixin, forms.Form):
    """A note: the text (Markdown source, kept exactly as typed), whose logbook, and
    optionally the tip it is about. It goes into the writer's open session there, if any."""

    text = forms.CharField(
        max_length=20_000,
        strip=False,
        label="Note",
        widget=forms.Textarea,
        error_messages={"required": "write something first"},
    )
    instrument = forms.ModelChoiceField(
        queryset=None,
        label="Logbook of",
        empty_label="Choose the instrument…",
        error_messages={"required": "choose whose logbook it goes into"},
    )
    at = LabDateTimeField(required=False, label="At")
    tip = forms.ModelChoiceField(queryset=None, required=False, widget=forms.HiddenInput)
    about_tip = forms.BooleanField(required=False, label="About this tip")
    next = forms.CharField(required=False, widget=forms.HiddenInput)

    def __init__(self, *args: Any, user, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.fields["instrument"].queryset = instruments_for(user)
        self.fields["tip"].queryset = tips()

    def clean_text(self) -> str:
        text = self.cleaned_data.get("text") or ""
        if not text.strip():
            raise ValidationError("write something first", code="required")
        return text
