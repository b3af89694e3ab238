"""Forms of the tip pages: mount a tip, take it out, log a conditioning event.

They read the page's inputs and hand them over as typed; the tips actions check the mounts
(overlaps, a retired tip) and read the parameters' units, and the errors they raise are put
back beside the inputs (``add_action_errors``).
"""

from __future__ import annotations

from typing import Any

from django import forms
from django.core.exceptions import ValidationError

from labbook.instruments.queries import instruments_for
from labbook.samples.forms import LabDateTimeField
from labbook.tips.models import Conditioning

#: The conditioning parameters the form offers: (form field, parameter key, label, unit shown,
#: example). Their keys name their unit, as ``labbook.tips.actions.normalise_params`` reads it.
CONDITIONING_PARAMS: tuple[tuple[str, str, str, str, str], ...] = (
    ("voltage", "voltage_v", "Voltage", "V", "100 V"),
    ("current", "current_a", "Current", "A", "2 uA"),
    ("duration", "duration_s", "Duration", "s", "50 ms"),
    ("depth", "depth_m", "Depth", "m", "2 nm"),
    ("bias", "bias_v", "Bias", "V", "50 mV"),
    ("setpoint", "setpoint_a", "Setpoint", "A", "10 pA"),
    ("species", "species", "Picked up", "", "CO, Xe, Cu"),
)
PARAM_FIELD = {key: name for name, key, *_ in CONDITIONING_PARAMS}


class ActionErrorsMixin:
    """Errors of an action (a ``ValidationError`` keyed by field) beside the form's inputs."""

    #: Action error keys that are called differently in the form.
    action_fields: dict[str, str] = {}

    def add_action_errors(self, error: ValidationError) -> None:
        if not hasattr(error, "error_dict"):
            self.add_error(None, error)  # type: ignore[attr-defined]
            return
        for key, problems in error.error_dict.items():
            name = self.action_fields.get(key, key)
            target = name if name in self.fields else None  # type: ignore[attr-defined]
            for problem in problems:
                self.add_error(target, " ".join(problem.messages))  # type: ignore[attr-defined]


class MountForm(ActionErrorsMixin, forms.Form):
    instrument = forms.ModelChoiceField(
        queryset=None,
        label="Into the scanner of",
        empty_label="Choose the instrument…",
        error_messages={"required": "choose the instrument"},
    )
    start = LabDateTimeField(label="Mounted", error_messages={"required": "give the time"})
    notes = forms.CharField(required=False, max_length=500, label="Notes")

    # A mount typed here is open-ended, so a clash at its "end" (a later mount of the same
    # scanner) is answered at the one time the form has: its start.
    action_fields = {"end": "start"}

    def __init__(self, *args: Any, user, **kwargs: Any) -> None:
        # The tip page also holds the conditioning form, which has an instrument field too.
        kwargs.setdefault("auto_id", "mount-%s")
        super().__init__(*args, **kwargs)
        self.fields["instrument"].queryset = instruments_for(user)


class UnmountForm(ActionErrorsMixin, forms.Form):
    end = LabDateTimeField(label="Taken out", error_messages={"required": "give the time"})


class ConditioningForm(ActionErrorsMixin, forms.Form):
    kind = forms.ChoiceField(choices=Conditioning.Kind.choices, label="What was done")
    at = LabDateTimeField(label="When", error_messages={"required": "give the time"})
    instrument = forms.ModelChoiceField(
        queryset=None,
        required=False,
        label="Where",
        empty_label="where it is mounted",
    )
    outcome = forms.CharField(
        required=False, max_length=2000, label="Outcome", widget=forms.Textarea
    )

    action_fields = {f"params.{key}": name for name, key, *_ in CONDITIONING_PARAMS}

    def __init__(self, *args: Any, user, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.fields["instrument"].queryset = instruments_for(user)
        for name, _key, label, _unit, example in CONDITIONING_PARAMS:
            self.fields[name] = forms.CharField(
                required=False,
                max_length=60,
                label=label,
                widget=forms.TextInput(attrs={"placeholder": example}),
            )

    def param_fields(self) -> list[tuple[forms.BoundField, str]]:
        return [(self[name], unit) for name, _key, _label, unit, _example in CONDITIONING_PARAMS]

    def params(self) -> dict[str, str]:
        """The parameters as typed ("100 V"), keyed by the unit-named parameter key."""
        return {
            key: self.cleaned_data[name].strip()
            for name, key, *_ in CONDITIONING_PARAMS
            if self.cleaned_data.get(name, "").strip()
        }
